"""WHAT to run: the active stages, their order from declared columns, passes and fingerprints.

The plan is built from the stage declarations alone (curate.stages.base): a stage runs after
the providers of the columns it needs, phases run in order (`PHASES`), and a stage that sees
only live samples runs after every check-emitting stage of an earlier phase. Consecutive
per-shard stages form one pass, so a shard is read (and each image decoded) once. A config
whose active stages need a column nobody active provides is refused here, before any work,
with the setting that would fix it. The engines decide HOW to run; nothing here touches files.
"""
from __future__ import annotations

import heapq
from dataclasses import dataclass, field
from typing import Any

import pyarrow as pa

from .config import PipelineConfig
from .errors import ConfigError
from .sources.base import SOURCE_SCHEMA
from .stages import REGISTRY, SECTIONS, Column, ConfigView, Stage
from .stages import pack as pack_section
from .stages.base import PHASES
from .workdir import fingerprint

SOURCE = "source"
# Columns the runner itself supplies to stages that see only live samples.
FLAGS_BEFORE = Column("flags_before", pa.list_(pa.string()),
                      "flags raised by earlier stages (for choosing which copy to keep)", ledger=False)


class PlanError(ConfigError):
    """The active stages cannot run together (a needed column has no active provider)."""


def config_sections() -> dict[str, type]:
    """Every config section a pipeline file may have: the stages' in run order, then the extra ones."""
    from .config import BUILTIN_SECTIONS

    raw: dict[str, type] = {st.config_section: st.config_cls for st in REGISTRY.values()}
    raw.update(SECTIONS)
    defaults = PipelineConfig({**{k: c() for k, c in BUILTIN_SECTIONS.items()}, **{k: c() for k, c in raw.items()}})
    stages = list(REGISTRY.values())
    try:
        providers = {c.name: st.name for st in stages for c in st.columns(st.view(defaults))}
        deps = {st.name: {providers[c] for c in st.needed(st.view(defaults)) if c in providers} - {st.name}
                for st in stages}
        stages = _order(stages, deps)
    except Exception:  # noqa: BLE001 - a stage that cannot describe itself at defaults: registry order
        pass
    out: dict[str, type] = {}
    for st in sorted(stages, key=lambda st: st.name != st.config_section):  # a section sits at its own stage
        out.setdefault(st.config_section, st.config_cls)
    order = [st.name for st in stages]
    out = dict(sorted(out.items(), key=lambda kv: order.index(kv[0]) if kv[0] in order else len(order)))
    out.update(SECTIONS)
    return out


def is_active(st: Stage, cfg: PipelineConfig) -> bool:
    if not getattr(cfg.section(st.config_section), "enabled", True):
        return False
    return st.active_if is None or bool(st.active_if(st.view(cfg)))


@dataclass(frozen=True)
class PlannedStage:
    stage: Stage
    view: ConfigView
    needs: tuple[str, ...]  # needed columns, plus wanted ones that an active stage provides
    inputs: tuple[str, ...]  # the stages (or "source") providing them, in plan order
    columns: tuple[Column, ...]
    config_fp: str
    identity: dict

    @property
    def name(self) -> str:
        return self.stage.name


@dataclass
class Pass:
    """Stages run together: per-shard stages in one task per shard, or one global stage."""

    kind: str
    stages: list[PlannedStage]
    inline: bool = False

    @property
    def names(self) -> list[str]:
        return [ps.name for ps in self.stages]


@dataclass
class Plan:
    stages: list[PlannedStage]
    passes: list[Pass]
    providers: dict[str, str]  # column -> stage name, or "source"
    columns: dict[str, Column]  # every column available in this run, by name
    extra: dict[str, Any] = field(default_factory=dict)

    def get(self, name: str) -> PlannedStage:
        for ps in self.stages:
            if ps.name == name:
                return ps
        raise KeyError(name)

    @property
    def names(self) -> list[str]:
        return [ps.name for ps in self.stages]


def source_columns() -> dict[str, Column]:
    return {f.name: Column(f.name, f.type, ledger=False) for f in SOURCE_SCHEMA}


def _fix_hint(provider: Stage, consumer_section: str) -> str:
    return f"set {provider.config_section}.enabled = true, or {consumer_section}.enabled = false"


def _providers(active: list[Stage], cfg: PipelineConfig) -> tuple[dict[str, str], dict[str, Column]]:
    providers = {name: SOURCE for name in source_columns()}
    columns = dict(source_columns())
    for st in active:
        for col in st.columns(st.view(cfg)):
            if col.name in providers:
                raise PlanError(f"column {col.name!r} is provided by both {providers[col.name]} and {st.name}",
                                key=f"{st.config_section}.enabled")
            providers[col.name] = st.name
            columns[col.name] = col
    return providers, columns


def _all_providers(cfg: PipelineConfig) -> dict[str, Stage]:
    out: dict[str, Stage] = {}
    for st in REGISTRY.values():
        for col in st.columns(st.view(cfg)):
            out.setdefault(col.name, st)
    return out


def _missing(consumer: str, section: str, column: str, cfg: PipelineConfig) -> PlanError:
    prov = _all_providers(cfg).get(column)
    if prov is None:
        return PlanError(f"{consumer} needs column {column!r}, which no registered stage provides")
    return PlanError(f"{consumer} needs column {column!r} from stage {prov.name}, which is off; "
                     f"{_fix_hint(prov, section)}", key=f"{prov.config_section}.enabled")


def _order(active: list[Stage], deps: dict[str, set[str]]) -> list[Stage]:
    """Topological order; ties broken by phase, then per-shard before global, then name."""
    by_name = {s.name: s for s in active}
    key = {s.name: (PHASES.index(s.phase), s.kind != "shard", s.name) for s in active}
    indeg = {s.name: len(deps[s.name]) for s in active}
    users: dict[str, list[str]] = {s.name: [] for s in active}
    for s, ds in deps.items():
        for d in ds:
            users[d].append(s)
    ready = [(key[s], s) for s, k in indeg.items() if k == 0]
    heapq.heapify(ready)
    out: list[Stage] = []
    while ready:
        _, s = heapq.heappop(ready)
        out.append(by_name[s])
        for u in users[s]:
            indeg[u] -= 1
            if indeg[u] == 0:
                heapq.heappush(ready, (key[u], u))
    if len(out) != len(active):
        stuck = sorted(set(by_name) - {s.name for s in out})
        raise PlanError(f"stages {', '.join(stuck)} depend on each other in a cycle (a bug in their declarations)")
    return out


def build_plan(cfg: PipelineConfig) -> Plan:
    active = [st for st in REGISTRY.values() if is_active(st, cfg)]
    providers, columns = _providers(active, cfg)
    names = {s.name for s in active}
    deps: dict[str, set[str]] = {}
    needs: dict[str, tuple[str, ...]] = {}
    for st in active:
        view = st.view(cfg)
        got: list[str] = []
        for col in st.needed(view):
            if col == FLAGS_BEFORE.name and st.alive_only:
                got.append(col)
                continue
            if col not in providers:
                raise _missing(f"stage {st.name}", st.config_section, col, cfg)
            got.append(col)
        got += [c for c in st.wanted(view) if c in providers or (c == FLAGS_BEFORE.name and st.alive_only)]
        needs[st.name] = tuple(dict.fromkeys(got))
        deps[st.name] = {providers[c] for c in needs[st.name] if providers.get(c, SOURCE) != SOURCE}
        deps[st.name] |= {a for a in st.after if a in names}
        for d in deps[st.name]:
            dst = next(s for s in active if s.name == d)
            if PHASES.index(dst.phase) > PHASES.index(st.phase):
                raise PlanError(f"stage {st.name} (phase {st.phase}) needs stage {d} of the later phase "
                                f"{dst.phase} (a bug in their declarations)")
        if st.alive_only:
            deps[st.name] |= {o.name for o in active if o.checks and PHASES.index(o.phase) < PHASES.index(st.phase)}
    pack_cfg = cfg.section("pack")
    if getattr(pack_cfg, "enabled", True):
        for col in pack_section.NEEDS:
            if col not in providers:
                raise _missing("pack (the output shards)", "pack", col, cfg)
        for setting, col, on in pack_section.OPTION_NEEDS:
            if on(cfg) and col not in providers:
                prov = _all_providers(cfg).get(col)
                raise PlanError(f"{setting} needs column {col!r} from stage {prov.name if prov else '?'}, which is "
                                f"off; set {prov.config_section if prov else '?'}.enabled = true, or "
                                f"{setting} = false", key=setting)
    columns[FLAGS_BEFORE.name] = FLAGS_BEFORE
    ordered = _order(active, deps)
    planned = [_planned(st, cfg, needs[st.name], providers, ordered) for st in ordered]
    passes = _passes(planned)
    _check_transients(passes, providers, columns)
    return Plan(planned, passes, providers, columns)


def _planned(st: Stage, cfg: PipelineConfig, needs: tuple[str, ...], providers: dict[str, str],
             ordered: list[Stage]) -> PlannedStage:
    view = st.view(cfg)
    ident = st.identity(view) if st.identity else {}
    cols = st.columns(view)
    order = {s.name: i for i, s in enumerate(ordered)}
    inputs = sorted({providers.get(c, SOURCE) for c in needs if c != FLAGS_BEFORE.name},
                    key=lambda s: -1 if s == SOURCE else order[s])
    fp = fingerprint(st.name, st.version, view.to_dict(), ident, [(c.name, str(c.type)) for c in cols],
                     list(needs), st.alive_only)
    return PlannedStage(st, view, needs, tuple(inputs), cols, fp, ident)


def _passes(planned: list[PlannedStage]) -> list[Pass]:
    passes: list[Pass] = []
    for ps in planned:
        st = ps.stage
        cur = passes[-1] if passes else None
        inline = st.parallel == "inline"
        joinable = (cur is not None and st.kind == "shard" and cur.kind == "shard" and cur.inline == inline
                    and not (st.alive_only and any(p.stage.checks for p in cur.stages)))
        if joinable:
            cur.stages.append(ps)
        else:
            passes.append(Pass(st.kind, [ps], inline))
    return passes


def _check_transients(passes: list[Pass], providers: dict[str, str], columns: dict[str, Column]) -> None:
    for p in passes:
        here = set(p.names)
        for ps in p.stages:
            for c in ps.needs:
                col = columns.get(c)
                if col is not None and col.transient and providers[c] not in here:
                    raise PlanError(f"stage {ps.name} needs the transient column {c!r} of stage {providers[c]}, "
                                    "which does not run in the same per-shard pass (a bug in their declarations)")


def shard_fingerprint(ps: PlannedStage, input_fps: list[Any]) -> str:
    return fingerprint(ps.config_fp, input_fps)
