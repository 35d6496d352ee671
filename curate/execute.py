"""Run one task: the stages of one pass on one shard (or one global stage), and write their outputs.

The runner builds tasks; the engines run them in worker processes, on Ray, or
inline. A task reads only the columns its stages need, hands each stage only
the rows it should see (live samples for `alive_only` stages), checks what
the stage returns against its declaration, fills the rows it did not see with
nulls and empty check lists, and writes each output atomically with its
fingerprint. Per-shard passes that carry a transient column (the decoded
image) run in chunks of rows, so memory stays bounded per shard.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa

from . import layout, plugins, workdir
from .checks import CHECKS_TYPE
from .errors import CurateError, StageError
from .stages import REGISTRY, StageContext

# Rows per chunk in a pass that decodes images (bounded memory: a few full-size images at a time).
CHUNK_ROWS = 16


@dataclass
class StageRun:
    """One stage of a task: its fingerprint, where it writes, and which rows it sees."""

    name: str
    fp: str
    out_path: str
    needs: tuple[str, ...]
    rows: list[int] | None = None  # row indices it sees; None = every row
    flags_before: list[list[str]] | None = None  # per seen row, when the stage asked for it
    write: bool = True  # False: it runs only to provide a transient column to a later stage


@dataclass
class Task:
    shard: str  # "all" for a global stage
    parts: list[list[layout.InputRef]]
    runs: list[StageRun]
    config: Any  # curate.config.PipelineConfig
    workers: int = 1
    work_dir: str | None = None
    rows: int = 0
    extra: dict = field(default_factory=dict)


def execute(task: Task, progress: Any = None) -> int:
    """Run a task's stages in order; returns the rows processed."""
    plugins.load(task.config.run.plugins)  # a worker process registers plugin stages before it runs them
    where = "+".join(r.name for r in task.runs)
    base = layout.assemble(task.parts, where)
    transient = any(c.transient for r in task.runs for c in _columns(r, task.config))
    n = base.num_rows
    if transient and n > CHUNK_ROWS:
        outs = {r.name: [] for r in task.runs}
        for start in range(0, n, CHUNK_ROWS):
            part = base.slice(start, CHUNK_ROWS)
            for name, t in _run_stages(part, task, start, progress).items():
                outs[name].append(t)
        results = {name: pa.concat_tables(ts) for name, ts in outs.items()}
    else:
        results = _run_stages(base, task, 0, progress)
    for r in task.runs:
        if r.write:
            out = _persistent(results[r.name], r, task.config)
            workdir.write_table(r.out_path, out, fp=r.fp)
    return n


def _columns(run: StageRun, config: Any) -> tuple:
    st = REGISTRY[run.name]
    return st.columns(st.view(config))


def call_stage(name: str, table: pa.Table, config: Any, rows: list[int] | None = None,
               flags_before: list[list[str]] | None = None, **ctx_kw: Any) -> pa.Table:
    """Run one registered stage on a table as the runner does: only `rows` (all when None) are shown
    to it, its output is checked against its declaration, and the other rows get nulls and no checks."""
    st = REGISTRY[name]
    view = st.view(config)
    needs = st.needed(view) + st.wanted(view)
    sub = table.select([c for c in dict.fromkeys(("sample_id", *needs)) if c in table.column_names])
    if rows is not None:
        sub = sub.take(pa.array(rows, type=pa.int64()))
    if flags_before is not None:
        sub = sub.append_column("flags_before", pa.array(flags_before, pa.list_(pa.string())))
    ctx = StageContext(config=view, **ctx_kw)
    shard = ctx_kw.get("shard")
    try:
        res = st.fn(sub, view.section(st.config_section), ctx) if sub.num_rows else None
    except CurateError:
        raise  # a named error (a model that cannot load, a bad eval set) says what to do itself
    except Exception as e:
        raise StageError(f"{type(e).__name__}: {e}", stage=name, shard=shard) from e
    res = _conform(res, sub, st, view, shard or "")
    return _expand(res, table.column("sample_id"), rows)


def _run_stages(table: pa.Table, task: Task, offset: int, progress: Any) -> dict[str, pa.Table]:
    """Run every stage of the task on `table` (rows offset.. of the task's table); returns full-row outputs."""
    out: dict[str, pa.Table] = {}
    n = table.num_rows
    for run in task.runs:
        seen, flags = _seen_rows(run, offset, n)
        full = call_stage(run.name, table, task.config, seen, flags, shard=task.shard, workers=task.workers,
                          progress=progress, work_dir=task.work_dir, extra=task.extra)
        out[run.name] = full
        for name in full.column_names:
            if name != "sample_id" and name not in table.column_names:
                table = table.append_column(full.schema.field(name), full.column(name))
        if progress is not None and seen is not None and n - len(seen):
            progress.advance(n - len(seen))
    return out


def _seen_rows(run: StageRun, offset: int, n: int) -> tuple[list[int] | None, list | None]:
    if run.rows is None:
        return None, None
    rows = np.asarray(run.rows, dtype=np.int64)
    sel = np.flatnonzero((rows >= offset) & (rows < offset + n))
    seen = (rows[sel] - offset).tolist()
    flags = None if run.flags_before is None else [run.flags_before[i] for i in sel.tolist()]
    return seen, flags


def _conform(res: pa.Table | None, sub: pa.Table, st: Any, view: Any, shard: str) -> pa.Table:
    """The stage's output, checked against its declaration and cast to the declared types."""
    declared = st.columns(view)
    if res is None:
        arrays = [sub.column("sample_id")] + [pa.nulls(0, c.type) for c in declared]
        arrays.append(pa.array([], CHECKS_TYPE))
        return pa.Table.from_arrays(arrays, names=["sample_id", *[c.name for c in declared], st.checks_column])
    if "sample_id" not in res.column_names or not res.column("sample_id").equals(sub.column("sample_id")):
        raise StageError("output rows do not match input rows (sample_id order)", stage=st.name, shard=shard)
    arrays, names = [res.column("sample_id")], ["sample_id"]
    for c in declared:
        if c.name not in res.column_names:
            raise StageError(f"declared column {c.name!r} is missing from the output", stage=st.name, shard=shard)
        col = res.column(c.name)
        if col.type != c.type:
            try:
                col = col.cast(c.type)
            except (pa.ArrowInvalid, pa.ArrowNotImplementedError) as e:
                raise StageError(f"column {c.name!r} is {col.type}, declared {c.type}", stage=st.name,
                                 shard=shard) from e
        arrays.append(col)
        names.append(c.name)
    chk = res.column(st.checks_column) if st.checks_column in res.column_names else pa.array(
        [[] for _ in range(res.num_rows)], CHECKS_TYPE)
    if chk.type != CHECKS_TYPE:
        try:
            chk = chk.cast(CHECKS_TYPE)
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError) as e:
            raise StageError(f"{st.checks_column} is not a list of check records", stage=st.name,
                             shard=shard) from e
    extra = set(res.column_names) - {"sample_id", st.checks_column, *names}
    if extra:
        raise StageError(f"undeclared output columns {sorted(extra)}", stage=st.name, shard=shard)
    arrays.append(chk)
    names.append(st.checks_column)
    return pa.Table.from_arrays(arrays, names=names)


def _expand(res: pa.Table, ids: pa.ChunkedArray, seen: list[int] | None) -> pa.Table:
    """A stage output over the seen rows -> the same columns over every row (nulls and no checks elsewhere)."""
    if seen is None:
        return res
    n = len(ids)
    index = np.full(n, -1, dtype=np.int64)
    index[np.asarray(seen, dtype=np.int64)] = np.arange(len(seen))
    take = pa.array(index, mask=index < 0)
    cols, names = [ids], ["sample_id"]
    for name in res.column_names[1:]:
        col = res.column(name).take(take)
        if name.endswith(".checks"):
            col = col.fill_null(pa.scalar([], type=col.type))
        cols.append(col)
        names.append(name)
    return pa.Table.from_arrays(cols, names=names)


def _persistent(t: pa.Table, run: StageRun, config: Any) -> pa.Table:
    """Drop transient columns before writing."""
    drop = {c.name for c in _columns(run, config) if c.transient}
    return t.select([c for c in t.column_names if c not in drop]) if drop else t


def output_exists(path: str | Path, fp: str) -> bool:
    return workdir.stored_fingerprint(path) == fp
