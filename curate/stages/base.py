"""The one contract every stage follows, and the registry the plan reads.

A stage is one module that registers itself with the `@stage(...)` decorator on
its function. The declaration says:

- `name`, `version`, `config` (a dataclass; its config section is the stage's
  name unless `section=` says otherwise) and `sections`: the other config
  sections it may read. The stage sees a view of exactly those sections, and
  its fingerprint covers exactly them.
- `needs` / `wants`: the columns it reads (`wants`: only when an active stage
  provides them). `provides`: the columns it adds, with Arrow types, and
  whether each reaches the ledger and the output shards. A column can be
  `transient` (the decoded image): it lives only inside one per-shard pass.
- `checks`: the reason codes it can emit, with default actions.
- `actions`: per-code default actions its own config sets (a probe entry's
  action); `[decide] actions` still overrides them.
- `kind`: "shard" (a pure function of one shard's rows, any subset of them) or
  "global" (sees every sample at once); `phase`: where it sits in the run
  (`PHASES`); `alive_only`: it sees only samples that no earlier check
  dropped (the runner filters and fills the rest with nulls).

A stage maps a table of samples to a table of its provided columns plus
`sample_id` and its `<name>.checks` column, one row per input row in the same
order. It never raises for one bad sample: it records a failed check.
"""
from __future__ import annotations

import dataclasses
import os
from dataclasses import dataclass, field
from typing import Any, Callable, Iterable, Literal

import pyarrow as pa

from ..checks import ACTIONS, CHECKS_TYPE, family

# Where a stage sits in a run, in order. "check": cheap per-sample checks and corpus-wide checks on
# small columns; "model": embeddings and the checks that read them; "group": decontamination and
# near-duplicate groups; "assign": the train/eval split. A stage never needs a column from a later phase.
PHASES = ("check", "model", "group", "assign")


@dataclass(frozen=True)
class Column:
    """A column a stage provides."""

    name: str
    type: pa.DataType
    help: str = ""
    ledger: bool = True  # written to ledger.parquet
    shard: bool = False  # written to the output shards
    transient: bool = False  # lives only inside one per-shard pass (never written)


@dataclass(frozen=True)
class CheckSpec:
    """A reason code (or a family like `pii`, whose codes are `pii:<kind>`), its default action,
    the actions a user may choose for it, and what it means."""

    code: str
    action: str
    help: str
    allowed: tuple[str, ...] = ("drop", "flag", "keep")
    # Screening flags (faces, personal data, watermarks...) set to drop are recorded as `risk:<code>`.
    risk: bool = False

    def __post_init__(self) -> None:
        if self.action not in self.allowed or not set(self.allowed) <= set(ACTIONS):
            raise ValueError(f"check {self.code}: default {self.action!r} not among allowed {self.allowed}")


class ConfigView:
    """The sections of the resolved config one stage may read; anything else is a bug in the stage."""

    def __init__(self, config: Any, sections: Iterable[str], stage: str):
        self._config = config
        self._sections = tuple(dict.fromkeys(sections))
        self._stage = stage
        self.origin = getattr(config, "origin", None)

    def section(self, name: str) -> Any:
        if name not in self._sections:
            raise KeyError(f"stage {self._stage} reads config section [{name}] without declaring it "
                           f"(declared: {', '.join(self._sections)})")
        return self._config.section(name)

    def __getattr__(self, name: str) -> Any:
        if name.startswith("_"):
            raise AttributeError(name)
        try:
            return self.section(name)
        except KeyError as e:
            raise AttributeError(str(e)) from None

    def sections(self) -> tuple[str, ...]:
        return self._sections

    def to_dict(self) -> dict[str, dict]:
        return {s: dataclasses.asdict(self._config.section(s)) for s in self._sections}


@dataclass
class StageContext:
    """What the runner hands a stage besides its table and its own config section."""

    config: ConfigView
    shard: str | None = None
    workers: int = 1
    progress: Any = None  # curate.progress.Progress or None
    work_dir: str | None = None
    extra: dict = field(default_factory=dict)

    @property
    def search_threads(self) -> int:
        """Threads for a corpus-wide search: the run's workers (every CPU core when 0 or unset).
        Each thread adds a few tens of MB of work buffers beside the search's shared tables."""
        return max(1, int(self.workers or 0) or os.cpu_count() or 1)


ColumnsArg = tuple[Column, ...] | Callable[[ConfigView], Iterable[Column]]
NamesArg = tuple[str, ...] | Callable[[ConfigView], Iterable[str]]


@dataclass(frozen=True)
class Stage:
    name: str
    version: str
    config_cls: type
    fn: Callable[[pa.Table, Any, StageContext], pa.Table]
    kind: Literal["shard", "global"]
    phase: str
    needs: NamesArg = ()
    wants: NamesArg = ()
    provides: ColumnsArg = ()
    checks: tuple[CheckSpec, ...] = ()
    sections: tuple[str, ...] = ()
    section: str | None = None
    alive_only: bool = False
    after: tuple[str, ...] = ()
    # "process": shards may fan out to worker processes; "inline": runs in the main process
    # (it manages its own threads and workers, e.g. a model).
    parallel: Literal["process", "inline"] = "process"
    # Extra identity (model name, weights digest, library versions) for the fingerprint and manifest.
    identity: Callable[[ConfigView], dict] | None = None
    # Input columns that, with the stage's config, determine a row's output: rows whose key an earlier
    # output of the stage holds are copied from it instead of computed (expensive per-sample stages).
    cache_key: tuple[str, ...] = ()
    # Extra activity condition beyond the section's `enabled` flag.
    active_if: Callable[[ConfigView], bool] | None = None
    # Per-code default actions the stage's own config sets (e.g. `probe:<name>` -> its entry's action);
    # `[decide] actions` still overrides them (curate.decide.actions_for).
    actions: Callable[[ConfigView], dict[str, str]] | None = None
    doc: str = ""

    @property
    def config_section(self) -> str:
        return self.section or self.name

    @property
    def checks_column(self) -> str:
        return checks_column(self.name)

    def view(self, config: Any) -> ConfigView:
        return ConfigView(config, (self.config_section, *self.sections), self.name)

    def columns(self, view: ConfigView) -> tuple[Column, ...]:
        cols = self.provides(view) if callable(self.provides) else self.provides
        return tuple(cols)

    def needed(self, view: ConfigView) -> tuple[str, ...]:
        return tuple(self.needs(view) if callable(self.needs) else self.needs)

    def wanted(self, view: ConfigView) -> tuple[str, ...]:
        return tuple(self.wants(view) if callable(self.wants) else self.wants)


REGISTRY: dict[str, Stage] = {}
# Config sections that belong to no stage (e.g. `pack`, read by the shard writer): name -> dataclass.
SECTIONS: dict[str, type] = {}


def checks_column(name: str) -> str:
    """Column that holds a stage's list of check records."""
    return f"{name}.checks"


def register_section(name: str, config_cls: type) -> type:
    SECTIONS[name] = config_cls
    return config_cls


def stage(*, name: str, version: str, config: type, kind: Literal["shard", "global"], phase: str,
          **kw: Any) -> Callable[[Callable], Callable]:
    """Register the decorated function as a stage (see the module docstring for the fields)."""

    def deco(fn: Callable) -> Callable:
        register(Stage(name=name, version=version, config_cls=config, fn=fn, kind=kind, phase=phase,
                       doc=(fn.__doc__ or "").strip().split("\n")[0], **kw))
        return fn

    return deco


def register(st: Stage) -> Stage:
    if st.name in REGISTRY:
        raise ValueError(f"stage {st.name!r} registered twice")
    if not dataclasses.is_dataclass(st.config_cls):
        raise TypeError(f"stage {st.name!r}: config must be a dataclass")
    if st.phase not in PHASES:
        raise ValueError(f"stage {st.name!r}: phase must be one of {PHASES}, got {st.phase!r}")
    if st.kind not in ("shard", "global"):
        raise ValueError(f"stage {st.name!r}: kind must be 'shard' or 'global'")
    codes = [c.code for c in st.checks]
    taken = {c.code for s in REGISTRY.values() for c in s.checks}
    if len(set(codes)) != len(codes) or taken & set(codes):
        raise ValueError(f"stage {st.name!r}: reason codes {sorted(taken & set(codes))} are already registered")
    REGISTRY[st.name] = st
    return st


def unregister(name: str) -> None:
    """Remove a stage (tests that register a stage of their own clean up with this)."""
    REGISTRY.pop(name, None)


def all_checks() -> dict[str, CheckSpec]:
    """Every reason code or code family any registered stage can emit, by code."""
    out: dict[str, CheckSpec] = {}
    for st in REGISTRY.values():
        for c in st.checks:
            out[c.code] = c
    return out


def spec_for(code: str, specs: dict[str, CheckSpec]) -> CheckSpec | None:
    """The spec of a code: its own, or its family's (`pii` for `pii:email`)."""
    return specs.get(code) or specs.get(family(code))


def empty_checks(n: int) -> pa.Array:
    """A check column of n rows that hold no check (built without a Python list per row)."""
    return pa.ListArray.from_arrays(pa.repeat(pa.scalar(0, pa.int32()), n + 1), pa.array([], CHECKS_TYPE.value_type),
                                    type=CHECKS_TYPE)
