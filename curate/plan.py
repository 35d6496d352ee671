"""WHAT to run: stage order, which stages are active, and their fingerprints.

The engines decide HOW (processes, Ray); this module never touches files.
"""
from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from typing import Any

from .config import PipelineConfig
from .stages import REGISTRY, SECTIONS, Stage, section_of
from .workdir import fingerprint

# The order stages run in. A stage reads only stages before it.
ORDER = ("inspect", "caption", "caption_repeats", "embed", "agreement", "neardup", "risk", "split")


def config_sections() -> dict[str, type]:
    """Every config section a pipeline file may have: stages' and the extra ones."""
    out: dict[str, type] = {}
    for st in REGISTRY.values():
        out.setdefault(section_of(st), st.config_cls)
    out.update(SECTIONS)
    return out


def is_active(stage: Stage, cfg: PipelineConfig) -> bool:
    if stage.active is not None:
        return bool(stage.active(cfg))
    return bool(getattr(cfg.section(section_of(stage)), "enabled", True))


@dataclass(frozen=True)
class PlannedStage:
    stage: Stage
    inputs: tuple[str, ...]  # active inputs only
    config_fp: str  # fingerprint of the config sections and identity this stage depends on
    identity: dict


def build_plan(cfg: PipelineConfig) -> list[PlannedStage]:
    unknown = set(REGISTRY) - set(ORDER)
    if unknown:
        raise RuntimeError(f"stages registered but not ordered: {sorted(unknown)}")
    active = [REGISTRY[n] for n in ORDER if n in REGISTRY and is_active(REGISTRY[n], cfg)]
    names = {s.name for s in active}
    plan = []
    for st in active:
        ident = st.identity(cfg) if st.identity else {}
        sections = [section_of(st), *st.reads_sections]
        sec = {s: dataclasses.asdict(cfg.section(s)) for s in sections if s in cfg.names()}
        plan.append(
            PlannedStage(
                stage=st,
                inputs=tuple(i for i in st.inputs if i in names),
                config_fp=fingerprint(st.name, st.version, sec, ident),
                identity=ident,
            )
        )
    return plan


def shard_fingerprint(ps: PlannedStage, input_fps: list[Any]) -> str:
    return fingerprint(ps.config_fp, input_fps)
