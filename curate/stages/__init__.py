"""Every stage module registers itself on import; importing this package loads them all.

Registration order does not matter: curate.plan orders the stages from their declared columns.
"""
from . import (  # noqa: F401
    agreement,
    caption,
    concepts,
    embed,
    faces,
    hashes,
    inspect,
    neardup,
    pack,
    probes,
    quality,
    review,
    risk,
    split,
    watermark,
)
from .base import REGISTRY, SECTIONS, CheckSpec, Column, ConfigView, Stage, StageContext, all_checks  # noqa: F401
