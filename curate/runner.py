"""The runner: the one place that knows ordering, caching, resume and error routing.

Work layout under `<out>/work/`:
  source/<shard>.parquet      the source table, cut into shards of `input.shard_size`
  <stage>/<shard>.parquet     a per-shard stage's output for one shard
  <stage>/all.parquet         a global stage's output for every sample
  state.json                  what the last run did, for `curate status`
Each output carries the fingerprint that made it; an output whose
fingerprint matches is reused, so changing one threshold re-runs only the
stages that depend on it, and a killed run resumes where it stopped.
"""
from __future__ import annotations

import logging
import os
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pyarrow as pa

from . import workdir
from .config import PipelineConfig
from .errors import StageError
from .plan import PlannedStage, build_plan, shard_fingerprint
from .progress import NullProgress, Progress
from .stages import REGISTRY, StageContext, section_of

log = logging.getLogger("curate")


@dataclass
class InputRef:
    """One table a task reads: a file, optionally a row range of it (a slice of a global output)."""

    path: str
    offset: int | None = None
    length: int | None = None


@dataclass
class Task:
    stage: str
    shard: str  # "all" for a global stage
    parts: list[list[InputRef]]  # one list per shard: the source table then each input
    extra_inputs: list[InputRef]  # global inputs of a global stage (whole tables)
    out_path: str
    fp: str
    config: PipelineConfig
    workers: int
    work_dir: str
    input_root: str


@dataclass
class RunResult:
    out_dir: str
    samples: int
    shards: int
    ran: dict[str, int] = field(default_factory=dict)  # stage -> shards computed this run
    reused: dict[str, int] = field(default_factory=dict)  # stage -> shards taken from cache
    seconds: dict[str, float] = field(default_factory=dict)
    cleared_stale_lock: bool = False


def output_path(work: Path, stage: str, shard: str | None = None) -> Path:
    """Where a stage's output lives: `<stage>/<shard>.parquet`, or `<stage>/all.parquet` for a global
    stage (shard None). The source table is stage "source"."""
    return work / stage / f"{shard or 'all'}.parquet"


def shard_refs(work: Path, shard: str, stages: list[str] | tuple[str, ...]) -> list[InputRef]:
    """The source table of one shard, then the given per-shard stages' outputs for it."""
    return [InputRef(str(output_path(work, "source", shard)))] + [
        InputRef(str(output_path(work, name, shard))) for name in stages
    ]


def _read(ref: InputRef) -> pa.Table:
    t = workdir.read_table(ref.path)
    if ref.offset is not None:
        t = t.slice(ref.offset, ref.length)
    return t


def _hstack(tables: list[pa.Table], where: str) -> pa.Table:
    base = tables[0]
    ids = base.column("sample_id")
    for t in tables[1:]:
        if t.num_rows != base.num_rows or not t.column("sample_id").equals(ids):
            raise StageError(f"inputs are not aligned by sample_id ({where})", stage=where)
        for name in t.column_names:
            if name != "sample_id" and name not in base.column_names:
                base = base.append_column(t.schema.field(name), t.column(name))
    return base


def assemble(parts: list[list[InputRef]], extra: list[InputRef], where: str) -> pa.Table:
    tables = [_hstack([_read(r) for r in part], where) for part in parts]
    if not tables:
        raise StageError("no input shards", stage=where)
    t = pa.concat_tables(tables, promote_options="permissive") if len(tables) > 1 else tables[0]
    if extra:
        t = _hstack([t] + [_read(r) for r in extra], where)
    return t


def execute(task: Task, progress: Progress | None = None) -> int:
    """Run one stage on one shard (or globally) and write its output. Returns rows written."""
    stage = REGISTRY[task.stage]
    table = assemble(task.parts, task.extra_inputs, task.stage)
    ctx = StageContext(
        config=task.config,
        shard=task.shard,
        workers=task.workers,
        progress=progress,
        work_dir=task.work_dir,
        input_root=task.input_root,
    )
    try:
        out = stage.fn(table, task.config.section(section_of(stage)), ctx)
    except Exception as e:
        raise StageError(f"{type(e).__name__}: {e}", stage=task.stage, shard=task.shard) from e
    if "sample_id" not in out.column_names or not out.column("sample_id").equals(table.column("sample_id")):
        raise StageError("output rows do not match input rows (sample_id order)", stage=task.stage, shard=task.shard)
    workdir.write_table(task.out_path, out, fp=task.fp)
    return out.num_rows


def _shard_names(n: int) -> list[str]:
    return [f"s{i:05d}" for i in range(n)]


def run_pipeline(
    cfg: PipelineConfig,
    out_dir: str | Path,
    *,
    progress: Progress | None = None,
    engine: Any = None,
) -> RunResult:
    from .engines import make_engine
    from .sources import list_samples
    from .writers import write_outputs

    progress = progress or NullProgress()
    out = Path(out_dir)
    work = out / "work"
    lock = workdir.RunLock(out).acquire()
    try:
        workdir.clean_temp_files(out)
        t0 = time.perf_counter()
        src = list_samples(cfg.input)
        size = max(1, cfg.input.shard_size)
        n_shards = max(1, -(-src.num_rows // size))
        shards = _shard_names(n_shards)
        result = RunResult(out_dir=str(out), samples=src.num_rows, shards=n_shards,
                           cleared_stale_lock=lock.cleared_stale)
        # The source table, cut into shards; each shard's fingerprint is its content digest.
        src_fp: dict[str, str] = {}
        offsets: dict[str, tuple[int, int]] = {}
        for i, name in enumerate(shards):
            part = src.slice(i * size, size)
            offsets[name] = (i * size, part.num_rows)
            fp = workdir.table_digest(part)
            path = output_path(work, "source", name)
            if workdir.stored_fingerprint(path) != fp:
                workdir.write_table(path, part, fp=fp)
            src_fp[name] = fp
        _remove_stale(work / "source", set(shards))
        result.seconds["list"] = time.perf_counter() - t0

        plan = build_plan(cfg)
        eng = engine or make_engine(cfg)
        fps: dict[str, dict[str, str] | str] = {}
        state: dict[str, Any] = {"shards": n_shards, "samples": src.num_rows, "stages": {}, "finished": False}
        try:
            for ps in plan:
                t1 = time.perf_counter()
                st = ps.stage
                if st.kind == "shard":
                    fps[st.name] = _run_shard_stage(ps, cfg, work, shards, src_fp, fps, offsets, eng, progress,
                                                    result, src.num_rows, str(out))
                else:
                    fps[st.name] = _run_global_stage(ps, cfg, work, shards, src_fp, fps, progress, result,
                                                     src.num_rows, str(out))
                result.seconds[st.name] = time.perf_counter() - t1
                state["stages"][st.name] = {
                    "kind": st.kind,
                    "version": st.version,
                    "ran": result.ran.get(st.name, 0),
                    "reused": result.reused.get(st.name, 0),
                    "seconds": round(result.seconds[st.name], 3),
                    "identity": ps.identity,
                }
                workdir.write_json(work / "state.json", state)
        finally:
            if engine is None:
                eng.close()
        t2 = time.perf_counter()
        write_outputs(cfg, out, work, plan, shards, fps, src_fp)
        result.seconds["pack"] = time.perf_counter() - t2
        state["finished"] = True
        workdir.write_json(work / "state.json", state)
        return result
    finally:
        progress.finish()
        lock.release()


def _remove_stale(folder: Path, keep: set[str]) -> None:
    """Drop shard files of an earlier, larger listing so they are never read as current."""
    if not folder.exists():
        return
    for p in folder.glob("s*.parquet"):
        if p.stem not in keep:
            p.unlink()


def _input_refs(ps: PlannedStage, work: Path, shard: str, fps: dict, offsets: dict) -> tuple[list[InputRef], list]:
    refs = [InputRef(str(output_path(work, "source", shard)))]
    in_fps: list[Any] = []
    for name in ps.inputs:
        if REGISTRY[name].kind == "shard":
            refs.append(InputRef(str(output_path(work, name, shard))))
            in_fps.append(fps[name][shard])
        else:
            off, n = offsets[shard]
            refs.append(InputRef(str(output_path(work, name)), off, n))
            in_fps.append(fps[name])
    return refs, in_fps


def _run_shard_stage(ps, cfg, work, shards, src_fp, fps, offsets, eng, progress, result, total, input_root):
    st = ps.stage
    out_fps: dict[str, str] = {}
    todo: list[tuple[Task, int]] = []
    for shard in shards:
        refs, in_fps = _input_refs(ps, work, shard, fps, offsets)
        fp = shard_fingerprint(ps, [src_fp[shard], in_fps])
        out_fps[shard] = fp
        path = output_path(work, st.name, shard)
        if workdir.stored_fingerprint(path) == fp:
            result.reused[st.name] = result.reused.get(st.name, 0) + 1
            continue
        todo.append((Task(st.name, shard, [refs], [], str(path), fp, cfg, _workers(cfg), str(work),
                          cfg.input.path), offsets[shard][1]))
    _remove_stale(work / st.name, set(shards))
    if todo:
        progress.start(st.name, sum(n for _, n in todo))
        if st.parallel == "inline" or len(todo) == 1:
            for task, _ in todo:
                execute(task, progress)
        else:
            for n in eng.map_tasks([t for t, _ in todo], [n for _, n in todo]):
                progress.advance(n)
        progress.finish()
        result.ran[st.name] = len(todo)
    return out_fps


def _run_global_stage(ps, cfg, work, shards, src_fp, fps, progress, result, total, input_root):
    st = ps.stage
    parts: list[list[InputRef]] = []
    in_fps: list[Any] = []
    extra: list[InputRef] = []
    per_shard = [n for n in ps.inputs if REGISTRY[n].kind == "shard"]
    for shard in shards:
        parts.append(shard_refs(work, shard, per_shard))
        in_fps.append([src_fp[shard]] + [fps[name][shard] for name in per_shard])
    for name in ps.inputs:
        if REGISTRY[name].kind == "global":
            extra.append(InputRef(str(output_path(work, name))))
            in_fps.append(fps[name])
    fp = shard_fingerprint(ps, in_fps)
    path = output_path(work, st.name)
    if workdir.stored_fingerprint(path) == fp:
        result.reused[st.name] = 1
        return fp
    progress.start(st.name, total)
    execute(Task(st.name, "all", parts, extra, str(path), fp, cfg, _workers(cfg), str(work), input_root), progress)
    progress.finish()
    result.ran[st.name] = 1
    return fp


def _workers(cfg: PipelineConfig) -> int:
    return cfg.run.workers if cfg.run.workers > 0 else (os.cpu_count() or 1)
