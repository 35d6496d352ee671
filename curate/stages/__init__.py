"""Every stage module registers itself on import; importing this package loads them all.

Registration order does not matter: curate.plan.ORDER fixes the run order.
"""
from .base import REGISTRY, SECTIONS, CheckSpec, Stage, StageContext, all_checks, section_of  # noqa: F401
from . import inspect, hashes, caption, embed, agreement, neardup, risk, split, pack  # noqa: F401,E401
