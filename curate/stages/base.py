"""The one contract every stage follows, and the registry the runner reads.

A stage is a name, a typed config (a dataclass), a version string, the
stages whose columns it reads, and a function. A per-shard stage maps one
shard's Arrow table (the `source` table joined with its inputs' columns, same
rows in the same order) to an Arrow table of new columns keyed by
`sample_id`, one row per input row, in the same order. A global stage gets
the same join over all shards at once and returns one table for all samples.

Stages never raise for one bad sample: they record a failed check and go on.
Every check a stage makes is recorded in its `<stage>.checks` column, so
`curate explain` can show value, threshold and verdict for each.
"""
from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field
from typing import Any, Callable, Literal

import pyarrow as pa

# One check result. `code` is the reason code (see Stage.checks); `value` and
# `threshold` are human-readable strings; `failed` says the check did not pass.
CHECK_TYPE = pa.struct(
    [
        ("code", pa.string()),
        ("value", pa.string()),
        ("threshold", pa.string()),
        ("failed", pa.bool_()),
    ]
)
CHECKS_TYPE = pa.list_(CHECK_TYPE)


def check(code: str, value: Any, threshold: Any, failed: bool) -> dict:
    """One check record, ready to go into a `checks` list column."""
    return {
        "code": code,
        "value": None if value is None else _fmt(value),
        "threshold": None if threshold is None else _fmt(threshold),
        "failed": bool(failed),
    }


def _fmt(v: Any) -> str:
    if isinstance(v, float):
        return f"{v:.4g}"
    return str(v)


def checks_column(name: str) -> str:
    """Column that holds a stage's list of check records."""
    return f"{name}.checks"


@dataclass(frozen=True)
class CheckSpec:
    """A reason code a stage can emit, its default action and what it means."""

    code: str
    action: Literal["drop", "flag", "keep"]
    help: str


@dataclass
class StageContext:
    """What the runner hands a stage besides its table: the resolved config and services."""

    config: Any  # curate.config.PipelineConfig
    shard: str | None = None
    workers: int = 1
    progress: Any = None  # curate.progress.Progress or None
    work_dir: str | None = None
    input_root: str | None = None
    extra: dict = field(default_factory=dict)


@dataclass(frozen=True)
class Stage:
    name: str
    version: str
    config_cls: type
    fn: Callable[[pa.Table, Any, StageContext], pa.Table]
    kind: Literal["shard", "global"] = "shard"
    inputs: tuple[str, ...] = ()
    # Other config sections whose values change this stage's output (fingerprint).
    reads_sections: tuple[str, ...] = ()
    checks: tuple[CheckSpec, ...] = ()
    # "process": the runner may fan shards out to worker processes;
    # "inline": runs in the main process (it manages its own threads/workers).
    parallel: Literal["process", "inline"] = "process"
    # Runs only when this returns True for the resolved config (default: its section's `enabled`).
    active: Callable[[Any], bool] | None = None
    # Config section this stage reads (default: its name). Two stages may share one section.
    section: str | None = None
    # Extra identity (e.g. model name, weights checksum) from the resolved config: goes into the
    # fingerprint and into manifest.json. Called once per run in the main process.
    identity: Callable[[Any], dict] | None = None


REGISTRY: dict[str, Stage] = {}
# Config sections that belong to no runnable stage of their own (e.g. `hashes`, computed inside
# the inspect pass) but still need a typed config: name -> dataclass.
SECTIONS: dict[str, type] = {}


def register_section(name: str, config_cls: type) -> type:
    SECTIONS[name] = config_cls
    return config_cls


def register(stage: Stage) -> Stage:
    if stage.name in REGISTRY:
        raise ValueError(f"stage {stage.name!r} registered twice")
    if not dataclasses.is_dataclass(stage.config_cls):
        raise TypeError(f"stage {stage.name!r}: config_cls must be a dataclass")
    REGISTRY[stage.name] = stage
    return stage


def section_of(stage: Stage) -> str:
    return stage.section or stage.name


def all_checks() -> dict[str, CheckSpec]:
    """Every reason code any registered stage can emit, by code."""
    out: dict[str, CheckSpec] = {}
    for st in REGISTRY.values():
        for c in st.checks:
            out[c.code] = c
    return out


from ..policy import base_code  # noqa: E402,F401  (one definition, re-exported for stages)
