"""HOW to run a plan's per-shard tasks: local worker processes or Ray. Same results either way."""
from __future__ import annotations

from typing import Any


def make_engine(cfg: Any) -> Any:
    if cfg.run.engine == "ray":
        from .ray import RayEngine

        return RayEngine(cfg)
    from .local import LocalEngine

    return LocalEngine(cfg)
