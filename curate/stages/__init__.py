"""Every stage module registers itself on import; importing this package loads them all.

Registration order does not matter: curate.plan orders the stages from their declared columns.
"""
from . import agreement, caption, concepts, embed, hashes, inspect, neardup, pack, risk, split  # noqa: F401
from .base import REGISTRY, SECTIONS, CheckSpec, Column, ConfigView, Stage, StageContext, all_checks  # noqa: F401
