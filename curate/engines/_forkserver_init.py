"""Imported only by the local engine's forkserver (as a preload): it dies with the run's main process."""
from ._lifeline import die_with_parent

die_with_parent()
