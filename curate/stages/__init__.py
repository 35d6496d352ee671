"""Every stage module registers itself on import; importing this package loads them all."""
from .base import REGISTRY, SECTIONS, CheckSpec, Stage, StageContext, all_checks, section_of  # noqa: F401
from . import inspect, caption  # noqa: F401,E401  (registration order does not matter; plan.ORDER does)
from . import pack, risk  # noqa: F401,E401
