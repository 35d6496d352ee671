"""The runner: the one place that knows ordering, caching, resume and error routing.

It lists the input, cuts it into shards, and walks the plan's passes. Before a stage
that sees only live samples it asks curate.decide which samples are alive. Every
output carries the fingerprint that made it (stage version, the config sections it
reads, its inputs' fingerprints, the live rows it saw); an output whose fingerprint
matches is reused, so changing one threshold re-runs only what depends on it, and a
killed run resumes where it stopped. A damaged work file is recomputed.
"""
from __future__ import annotations

import bisect
import hashlib
import logging
import os
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa

from . import decide, layout, workdir
from .checks import CHECKS_TYPE
from .config import PipelineConfig
from .engines import make_engine
from .errors import InputError, StageError
from .execute import StageRun, Task, execute
from .layout import InputRef, output_path
from .plan import SOURCE, Pass, Plan, PlannedStage, build_plan, shard_fingerprint
from .progress import NullProgress, Progress
from .sources import iter_samples, shared_across_processes
from .writers import write_outputs

log = logging.getLogger("curate")

# How often one run recomputes damaged work files before it gives up.
MAX_REPAIRS = 8


@dataclass
class RunResult:
    out_dir: str
    samples: int
    shards: int
    ran: dict[str, int] = field(default_factory=dict)  # stage -> shards (or 1 for a global stage) computed
    reused: dict[str, int] = field(default_factory=dict)  # stage -> shards taken from the work dir
    computed_samples: dict[str, int] = field(default_factory=dict)
    reused_samples: dict[str, int] = field(default_factory=dict)
    seconds: dict[str, float] = field(default_factory=dict)  # per stage (a fused pass's time is shared)
    passes: list[tuple[list[str], str, float]] = field(default_factory=list)  # (stages, kind, seconds)
    cleared_stale_lock: bool = False
    repaired: list[str] = field(default_factory=list)  # damaged work files that were recomputed
    changed_rows: list[int] = field(default_factory=list)  # samples whose bytes changed after inspection
    notes: list[str] = field(default_factory=list)


class _Work:
    """The run's view of the work dir: shard names, source fingerprints, and each stage's fingerprints."""

    def __init__(self, work: Path, plan: Plan, shards: list[str], source: _Source, actions: decide.Actions):
        self.work, self.plan, self.shards = work, plan, shards
        self.src_fp, self.offsets, self.actions = source.fp, source.offsets, actions
        self.src_columns = source.columns
        self.fps: dict[str, Any] = {}  # stage -> {shard: fingerprint} or fingerprint
        self.content: dict[str, Any] = {}  # stage -> {shard: content digest} or content digest
        self.pass_of: dict[str, int] = {n: i for i, p in enumerate(plan.passes) for n in p.names}
        self.kind = {ps.name: ps.stage.kind for ps in plan.stages}
        self.done: list[str] = []  # stages finished so far, in plan order

    def path(self, stage: str, shard: str | None) -> Path:
        return output_path(self.work, stage, None if self.kind.get(stage) == "global" else shard)

    def ref(self, stage: str, shard: str, columns: tuple[str, ...] | None) -> InputRef:
        if stage == SOURCE:
            return InputRef(str(output_path(self.work, SOURCE, shard)), columns=columns)
        if self.kind[stage] == "global":
            off, n = self.offsets[shard]
            return InputRef(str(output_path(self.work, stage)), off, n, columns)
        return InputRef(str(output_path(self.work, stage, shard)), columns=columns)

    def refs(self, shard: str, needs: tuple[str, ...], skip: set[str] = frozenset()) -> list[InputRef]:
        """The source shard (always first) and the providers' files of the needed columns."""
        by_stage: dict[str, list[str]] = {SOURCE: []}
        for col in needs:
            prov = self.plan.providers.get(col)
            if prov is None or prov in skip:
                continue
            by_stage.setdefault(prov, []).append(col)
        return [self.ref(s, shard, tuple(cols)) for s, cols in by_stage.items()]

    def source_fp(self, ps: PlannedStage, shard: str | None) -> list[Any]:
        """The digests of the source columns a stage reads (a file's size and mtime stand for its
        bytes wherever the stage reads the file), and the row set."""
        cols = [c for c in ps.needs if self.plan.providers.get(c) == SOURCE]
        if "locator" in cols:
            cols += ["file_size", "mtime_ns"]
        cols = sorted(set(cols) | {"sample_id"})
        shards = [shard] if shard else self.shards
        return [[self.src_columns[s].get(c) for c in cols] for s in shards]

    def input_fp(self, ps: PlannedStage, shard: str | None) -> list[Any]:
        """What a stage's output depends on: for inputs computed in the same pass, their fingerprints
        (they are recomputed together); for earlier passes, the content digests of their outputs, so
        an input recomputed with different content is never paired with a stale consumer."""
        out: list[Any] = []
        for name in ps.inputs:
            if name == SOURCE:
                continue
            src = self.fps if self.pass_of[name] == self.pass_of[ps.name] else self.content
            fp = src[name]
            out.append(fp if isinstance(fp, str) else (fp[shard] if shard else [fp[s] for s in self.shards]))
        return out

    def record_content(self, stage: str) -> None:
        """Read the content digests of a finished stage's outputs (from the files' footers)."""
        if self.kind[stage] == "global":
            self.content[stage] = workdir.content_digest(self.path(stage, None))
        else:
            self.content[stage] = {s: workdir.content_digest(self.path(stage, s)) for s in self.shards}

    def check_columns(self, shard: str, stages: list[str]) -> list[pa.ChunkedArray]:
        cols = []
        for s in stages:
            name = f"{s}.checks"
            cols.append(layout.read_ref(self.ref(s, shard, (name,))).column(name))
        return cols


def run_pipeline(cfg: PipelineConfig, out_dir: str | Path, *, progress: Progress | None = None,
                 engine: Any = None) -> RunResult:
    progress = progress or NullProgress()
    actions = decide.actions_for(cfg)
    plan = build_plan(cfg)  # a config that cannot run is refused here, before any work
    out = Path(out_dir)
    lock = workdir.RunLock(out).acquire()
    notes = _Notes()
    log.addHandler(notes)
    try:
        workdir.clean_temp_files(out)
        result = _run_locked(cfg, plan, actions, out, progress, engine, lock.cleared_stale, notes.lines)
        return result
    finally:
        log.removeHandler(notes)
        progress.finish()
        lock.release()


class _Notes(logging.Handler):
    """Collects the run's warnings (from any stage) for the summary and the CLI: nothing silent."""

    def __init__(self) -> None:
        super().__init__(logging.WARNING)
        self.lines: list[str] = []

    def emit(self, record: logging.LogRecord) -> None:
        msg = record.getMessage()
        if msg not in self.lines:
            self.lines.append(msg)


def _run_locked(cfg: PipelineConfig, plan: Plan, actions: decide.Actions, out: Path, progress: Progress,
                engine: Any, cleared: bool, notes: list[str]) -> RunResult:
    work = out / "work"
    t0 = time.perf_counter()
    source = _list_source(cfg, work)
    shards = list(source.fp)
    total = sum(n for _, n in source.offsets.values())
    result = RunResult(out_dir=str(out), samples=total, shards=len(shards), cleared_stale_lock=cleared,
                       notes=notes)
    result.seconds["list"] = time.perf_counter() - t0
    eng = engine or make_engine(cfg)
    state: dict[str, Any] = {"shards": len(shards), "samples": total, "stages": {}, "finished": False}
    try:
        for attempt in range(MAX_REPAIRS + 1):
            if attempt:
                source = _list_source(cfg, work)  # a damaged source part is written again
            w = _Work(work, plan, shards, source, actions)
            try:
                for p in plan.passes:
                    _run_pass(p, w, cfg, eng, progress, result, state)
                break
            except workdir.DamagedWorkFile as e:
                if attempt == MAX_REPAIRS:
                    raise StageError(f"work files keep failing their checksums ({e}); is the disk failing?",
                                     stage="runner") from e
                _repair(e, result, out)
        t2 = time.perf_counter()
        for attempt in range(MAX_REPAIRS + 1):
            try:
                write_outputs(cfg, out, work, plan, w.shards, w.fps, w.src_fp, actions, result)
                break
            except workdir.DamagedWorkFile as e:
                if attempt == MAX_REPAIRS:
                    raise StageError(f"work files keep failing their checksums ({e})", stage="outputs") from e
                _repair(e, result, out)
                w = _Work(work, plan, shards, _list_source(cfg, work), actions)
                for p in plan.passes:
                    _run_pass(p, w, cfg, eng, progress, result, state)
        result.seconds["pack"] = time.perf_counter() - t2
        _forget_changed(w, result.changed_rows)
    finally:
        if engine is None:
            eng.close()
    state["finished"] = True
    workdir.write_json(work / "state.json", state)
    return result


def _forget_changed(w: _Work, rows: list[int]) -> None:
    """Samples whose bytes changed after they were inspected: drop their shards' per-shard outputs,
    so the next run inspects them again (their size and mtime may not show the change)."""
    starts = [w.offsets[s][0] for s in w.shards]
    for shard in {w.shards[bisect.bisect_right(starts, r) - 1] for r in rows}:
        for ps in w.plan.stages:
            if ps.stage.kind == "shard":
                w.path(ps.name, shard).unlink(missing_ok=True)


def _repair(e: workdir.DamagedWorkFile, result: RunResult, out: Path) -> None:
    log.warning("work file %s is damaged (%s); recomputing it", os.path.relpath(e.path, out), e.why)
    result.repaired.append(e.path)
    try:
        os.unlink(e.path)
    except FileNotFoundError:
        pass


@dataclass
class _Source:
    fp: dict[str, str]  # shard -> digest of its whole source table
    columns: dict[str, dict[str, str]]  # shard -> column -> digest
    offsets: dict[str, tuple[int, int]]  # shard -> (first row in the corpus, rows)


def _list_source(cfg: PipelineConfig, work: Path) -> _Source:
    """List the input as it streams and write it in shards (content-defined cuts, curate.layout), each
    with per-column content digests (a stage's fingerprint covers only the source columns it reads).
    Memory holds one listing batch and one shard."""
    out = _Source({}, {}, {})
    cutter = layout.ShardCutter(cfg.input.shard_size)
    pending: list[pa.RecordBatch] = []
    start = rows = 0

    def flush() -> None:
        nonlocal start, pending
        part = pa.Table.from_batches(pending)
        if part.num_rows == 0:
            return
        name = layout.shard_name(part.column("sample_id")[0].as_py())
        digests = workdir.column_digests(part)
        fp = workdir.fingerprint(digests)
        path = output_path(work, SOURCE, name)
        if workdir.stored_fingerprint(path) != fp:
            workdir.write_table(path, part, fp=fp)
        out.fp[name], out.columns[name], out.offsets[name] = fp, digests, (start, part.num_rows)
        start += part.num_rows
        pending = []

    for batch in iter_samples(cfg.input):
        ids = batch.column(batch.schema.get_field_index("sample_id")).to_pylist()
        begin = 0
        for i, sid in enumerate(ids):
            if cutter.push(sid):
                pending.append(batch.slice(begin, i + 1 - begin))
                flush()
                begin = i + 1
        if begin < batch.num_rows:
            pending.append(batch.slice(begin))
        rows += batch.num_rows
    if pending:
        flush()
    if rows == 0:
        raise InputError(f"input {cfg.input.path} holds no samples (no image files, manifest rows or archive "
                         "members); check --input")
    _remove_stale(work / SOURCE, set(out.fp))
    return out


def _remove_stale(folder: Path, keep: set[str]) -> None:
    """Drop shard files of an earlier, larger listing so they are never read as current."""
    if not folder.exists():
        return
    for p in folder.glob("s*.parquet"):  # shard outputs only (global outputs are all.parquet)
        if p.stem not in keep:
            p.unlink()


def _alive_rows(w: _Work, ps: PlannedStage, shard: str | None) -> tuple[list[int], list | None, str]:
    """Rows a live-only stage sees (indices within the shard, or within the corpus for a global stage),
    the flags raised so far on them when the stage asked for them, and a digest of both."""
    shards = [shard] if shard else w.shards
    n = sum(w.offsets[s][1] for s in shards)
    merged = []
    for stage in w.done:
        if shard is None and w.kind[stage] == "global":
            name = f"{stage}.checks"
            merged.append(layout.read_ref(InputRef(str(w.path(stage, None)), columns=(name,))).column(name))
            continue
        chunks = [chunk for s in shards for chunk in w.check_columns(s, [stage])[0].chunks]
        merged.append(pa.chunked_array(chunks, type=CHECKS_TYPE))
    alive = decide.alive(merged, w.actions, n)
    rows = np.flatnonzero(alive)
    flags = None
    if "flags_before" in ps.needs:
        allflags = decide.flags_so_far(merged, w.actions, n)
        flags = [allflags[i] for i in rows.tolist()]
    digest = hashlib.sha256(rows.astype(np.int64).tobytes()).hexdigest()
    return rows.tolist(), flags, workdir.fingerprint(digest, flags)


def _run_pass(p: Pass, w: _Work, cfg: PipelineConfig, eng: Any, progress: Progress, result: RunResult,
              state: dict) -> None:
    t = time.perf_counter()
    if p.kind == "global":
        _run_global(p.stages[0], w, cfg, progress, result)
    else:
        _run_shard_pass(p, w, cfg, eng, progress, result)
    for name in p.names:
        w.record_content(name)
    secs = time.perf_counter() - t
    result.passes.append((p.names, p.kind, secs))
    for ps in p.stages:
        result.seconds[ps.name] = result.seconds.get(ps.name, 0.0) + secs / len(p.stages)
        state["stages"][ps.name] = {
            "kind": ps.stage.kind, "version": ps.stage.version,
            "ran": result.ran.get(ps.name, 0), "reused": result.reused.get(ps.name, 0),
            "samples_computed": result.computed_samples.get(ps.name, 0),
            "samples_reused": result.reused_samples.get(ps.name, 0),
            "seconds": round(result.seconds[ps.name], 3), "identity": ps.identity,
        }
        w.done.append(ps.name)
    workdir.write_json(w.work / "state.json", state)


def _count(result: RunResult, name: str, computed: bool, samples: int) -> None:
    shards, rows = (result.ran, result.computed_samples) if computed else (result.reused, result.reused_samples)
    shards[name] = shards.get(name, 0) + 1
    rows[name] = rows.get(name, 0) + samples


def _run_shard_pass(p: Pass, w: _Work, cfg: PipelineConfig, eng: Any, progress: Progress,
                    result: RunResult) -> None:
    tasks: list[Task] = []
    stale = {ps.name: _stale_files(w.work / ps.name, set(w.shards)) for ps in p.stages if ps.stage.cache_key}
    for shard in w.shards:
        runs: list[StageRun] = []
        for ps in p.stages:
            rows = flags = None
            extra: list[Any] = []
            if ps.stage.alive_only:
                rows, flags, digest = _alive_rows(w, ps, shard)
                extra = [digest]
            fp = shard_fingerprint(ps, [w.source_fp(ps, shard), w.input_fp(ps, shard), extra])
            w.fps.setdefault(ps.name, {})[shard] = fp
            path = str(w.path(ps.name, shard))
            runs.append(StageRun(ps.name, fp, path, ps.needs, rows, flags, config_fp=ps.config_fp,
                                 cache_from=[path, *stale.get(ps.name, [])] if ps.stage.cache_key else []))
        todo = _stale_runs(p, runs)
        n = w.offsets[shard][1]
        written = {r.name for r in todo if r.write}
        for r in runs:
            if r.name not in written:
                _count(result, r.name, False, n if r.rows is None else len(r.rows))
        if todo:
            own = {r.name for r in todo}
            needs = tuple(dict.fromkeys(c for r in todo for c in r.needs))
            tasks.append(Task(shard, [w.refs(shard, needs, skip=own)], todo, cfg, _workers(cfg), str(w.work), n))
    if tasks:
        progress.start("+".join(p.names), sum(t.rows for t in tasks))
        if not shared_across_processes(cfg.input.path):  # an in-process store: worker processes cannot see it
            done = [execute(t, progress) for t in tasks]
        elif p.inline and hasattr(eng, "map_model_tasks"):  # a model pass on an engine with model workers
            done = []
            for n, stats in eng.map_model_tasks(tasks, [t.rows for t in tasks]):
                progress.advance(n)
                done.append(stats)
        elif p.inline or len(tasks) == 1:
            done = [execute(t, progress) for t in tasks]
        else:
            done = []
            for n, stats in eng.map_tasks(tasks, [t.rows for t in tasks]):
                progress.advance(n)
                done.append(stats)
        progress.finish()
        by_shard = {t.shard: t for t in tasks}
        for stats in done:
            for r in by_shard[stats["shard"]].runs:
                if r.write:
                    _count(result, r.name, True, stats["computed"].get(r.name, 0))
                    result.reused_samples[r.name] = result.reused_samples.get(r.name, 0) + stats["reused"].get(r.name, 0)
    for ps in p.stages:
        _remove_stale(w.work / ps.name, set(w.shards))


def _stale_files(folder: Path, keep: set[str]) -> list[str]:
    """Outputs of shards that no longer exist (their rows may have moved to other shards)."""
    return [str(p) for p in sorted(folder.glob("s*.parquet")) if p.stem not in keep] if folder.exists() else []


def _stale_runs(p: Pass, runs: list[StageRun]) -> list[StageRun]:
    """The runs whose output is missing or outdated, plus (without writing) the providers of the
    transient columns they need."""
    stale = [r for r in runs if workdir.stored_fingerprint(r.out_path) != r.fp]
    if not stale:
        return []
    by_name = {ps.name: ps for ps in p.stages}
    keep = {r.name for r in stale}
    changed = True
    while changed:
        changed = False
        for r in runs:
            if r.name not in keep:
                continue
            for col in by_name[r.name].needs:
                prov = next((ps for ps in p.stages if any(c.name == col and c.transient for c in ps.columns)), None)
                if prov is not None and prov.name not in keep:
                    keep.add(prov.name)
                    changed = True
    stale_names = {r.name for r in stale}
    out = []
    for r in runs:
        if r.name in keep:
            r.write = r.name in stale_names
            out.append(r)
    return out


def _run_global(ps: PlannedStage, w: _Work, cfg: PipelineConfig, progress: Progress, result: RunResult) -> None:
    rows = flags = None
    extra: list[Any] = []
    if ps.stage.alive_only:
        rows, flags, digest = _alive_rows(w, ps, None)
        extra = [digest]
    fp = shard_fingerprint(ps, [w.source_fp(ps, None), w.input_fp(ps, None), extra])
    w.fps[ps.name] = fp
    path = w.path(ps.name, None)
    seen = result.samples if rows is None else len(rows)
    if workdir.stored_fingerprint(path) == fp:
        _count(result, ps.name, False, seen)
        return
    parts = [w.refs(s, ps.needs) for s in w.shards]
    progress.start(ps.name, result.samples)
    execute(Task("all", parts, [StageRun(ps.name, fp, str(path), ps.needs, rows, flags)], cfg, _workers(cfg),
                 str(w.work), result.samples), progress)
    progress.finish()
    _count(result, ps.name, True, seen)


def _workers(cfg: PipelineConfig) -> int:
    return cfg.run.workers if cfg.run.workers > 0 else (os.cpu_count() or 1)
