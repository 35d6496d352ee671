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

import hashlib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from . import layout, memory, plugins, workdir
from .checks import CHECKS_TYPE
from .errors import CurateError, StageError
from .stages import REGISTRY, StageContext
from .stages.base import empty_checks

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
    config_fp: str = ""  # the stage's config fingerprint: cached rows must have been made with the same
    cache_from: list[str] = field(default_factory=list)  # earlier outputs of this stage to take rows from


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


# The hidden column that holds each row's cache key in the outputs of stages that declare one.
KEY = "_cache_key"
CONFIG_FP_KEY = b"curate.config_fingerprint"


def execute(task: Task, progress: Any = None) -> dict:
    """Run a task's stages in order. Returns {"shard", "rows": n, "computed": {stage: rows}, "reused": {stage: rows}}
    (reused: rows taken from an earlier output by their cache key)."""
    plugins.load(task.config.run.plugins)  # a worker process registers plugin stages before it runs them
    where = "+".join(r.name for r in task.runs)
    base = layout.assemble(task.parts, where)
    stats: dict[str, dict[str, int]] = {"computed": {}, "reused": {}}
    caches = {r.name: _Cache.load(r, task.config) for r in task.runs if REGISTRY[r.name].cache_key}
    transient = any(c.transient for r in task.runs for c in _columns(r, task.config))
    n = base.num_rows
    if transient and n > CHUNK_ROWS:
        outs = {r.name: [] for r in task.runs}
        for start in range(0, n, CHUNK_ROWS):
            part = base.slice(start, CHUNK_ROWS)
            for name, t in _run_stages(part, task, start, progress, caches, stats).items():
                outs[name].append(t)
        results = {name: pa.concat_tables(ts) for name, ts in outs.items()}
    else:
        results = _run_stages(base, task, 0, progress, caches, stats)
    for r in task.runs:
        if r.write:
            out = _persistent(results[r.name], r, task.config)
            meta = dict(out.schema.metadata or {})
            meta[CONFIG_FP_KEY] = r.config_fp.encode()
            workdir.write_table(r.out_path, out.replace_schema_metadata(meta), fp=r.fp)
    return {"shard": task.shard, "rows": n, **stats}


class _Cache:
    """Rows of a stage's earlier outputs, found by their cache key (a digest of the key columns)."""

    def __init__(self, index: dict[str, tuple[int, int]], tables: list[pa.Table]):
        self.index, self.tables = index, tables

    @classmethod
    def load(cls, run: StageRun, config: Any) -> "_Cache":
        index: dict[str, tuple[int, int]] = {}
        tables: list[pa.Table] = []
        for path in run.cache_from:
            try:
                meta = pq.read_schema(path).metadata or {}
                if meta.get(CONFIG_FP_KEY) != run.config_fp.encode() or KEY not in pq.read_schema(path).names:
                    continue
                t = workdir.read_table(path)
            except (OSError, pa.ArrowException, ValueError):
                continue  # a missing or damaged earlier output is no cache: compute
            for i, k in enumerate(t.column(KEY).to_pylist()):
                if k is not None:
                    index.setdefault(k, (len(tables), i))
            tables.append(t)
        return cls(index, tables)

    def take(self, hits: list[tuple[int, int]], names: list[str]) -> pa.Table:
        parts = [self.tables[f].select(names).slice(i, 1) for f, i in hits]
        return pa.concat_tables(parts) if parts else None


def row_keys(table: pa.Table, columns: tuple[str, ...]) -> list[str]:
    """One digest per row of the values of the key columns."""
    cols = [table.column(c).to_pylist() if c in table.column_names else [None] * table.num_rows for c in columns]
    out = []
    for values in zip(*cols):
        h = hashlib.sha256()
        for v in values:
            h.update(repr(v).encode("utf-8", "surrogatepass"))
            h.update(b"\x00")
        out.append(h.hexdigest())
    return out


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
    out = _expand(res, table.column("sample_id"), rows)
    if st.kind == "global":  # its temporaries, kept by the allocators, would sit under the next stage
        del sub, res
        memory.release()
    return out


def _run_stages(table: pa.Table, task: Task, offset: int, progress: Any, caches: dict[str, _Cache],
                stats: dict) -> dict[str, pa.Table]:
    """Run every stage of the task on `table` (rows offset.. of the task's table); returns full-row outputs."""
    out: dict[str, pa.Table] = {}
    n = table.num_rows
    hits = _plan_hits(table, task, offset, caches) if caches else {}
    for run in task.runs:
        seen, flags = _seen_rows(run, offset, n)
        kw = dict(shard=task.shard, workers=task.workers, progress=progress, work_dir=task.work_dir,
                  extra=task.extra)
        if run.name in caches:
            full = _cached_call(run, table, task.config, seen, flags, caches[run.name], hits[run.name], kw)
            reused = len(hits[run.name])
        else:
            full, reused = call_stage(run.name, table, task.config, seen, flags, **kw), 0
        done = n if seen is None else len(seen)
        stats["computed"][run.name] = stats["computed"].get(run.name, 0) + done - reused
        stats["reused"][run.name] = stats["reused"].get(run.name, 0) + reused
        out[run.name] = full
        for name in full.column_names:
            if name != "sample_id" and name != KEY and name not in table.column_names:
                table = table.append_column(full.schema.field(name), full.column(name))
        if progress is not None and seen is not None and n - len(seen):
            progress.advance(n - len(seen))
    return out


def _plan_hits(table: pa.Table, task: Task, offset: int, caches: dict[str, _Cache]) -> dict[str, dict[int, tuple]]:
    """For each stage with a cache, the rows it copies from earlier outputs (row -> where). A row's key
    must be known: its key columns are inputs, or outputs of earlier stages of the task that copy that
    row too. A stage that provides a transient column (the decoded image) copies only the rows that
    every stage reading that column copies as well; the others it computes, to feed them."""
    n = table.num_rows
    prov = table
    unknown: dict[str, set[int]] = {}  # column -> rows whose value this task has yet to compute
    hits: dict[str, dict[int, tuple]] = {}
    seen_of: dict[str, list[int]] = {}
    declared: dict[str, tuple] = {}
    for run in task.runs:
        st = REGISTRY[run.name]
        declared[run.name] = st.columns(st.view(task.config))
        seen, _ = _seen_rows(run, offset, n)
        rows = list(range(n)) if seen is None else seen
        seen_of[run.name] = rows
        found: dict[int, tuple] = {}
        if run.name in caches:
            cache = caches[run.name]
            blocked = set().union(*(unknown.get(c, set()) for c in st.cache_key))
            keys = row_keys(prov, st.cache_key)
            found = {r: cache.index[keys[r]] for r in rows if r not in blocked and keys[r] in cache.index}
            names = [c.name for c in declared[run.name] if not c.transient and c.name not in prov.column_names]
            if found and names:
                got = cache.take(list(found.values()), names)
                index = np.full(n, -1, dtype=np.int64)
                index[np.asarray(list(found), dtype=np.int64)] = np.arange(len(found))
                for name in names:
                    prov = prov.append_column(name, got.column(name).take(pa.array(index, mask=index < 0)))
        hits[run.name] = found
        for c in declared[run.name]:
            unknown[c.name] = set(rows) - set(found)
    for run in task.runs:  # a provider of a transient column computes every row a reader of it computes
        transient = {c.name for c in declared[run.name] if c.transient}
        if not transient or run.name not in hits:
            continue
        for other in task.runs:
            if transient & set(other.needs):
                computed = set(seen_of[other.name]) - set(hits.get(other.name, {}))
                for r in computed:
                    hits[run.name].pop(r, None)
    return hits


def _cached_call(run: StageRun, table: pa.Table, config: Any, seen: list[int] | None, flags: list | None,
                 cache: _Cache, hit_at: dict[int, tuple], kw: dict) -> pa.Table:
    """call_stage on the rows not in `hit_at`; the others are copied from earlier outputs."""
    st = REGISTRY[run.name]
    keys = row_keys(table, st.cache_key)
    rows = list(range(table.num_rows)) if seen is None else seen
    pos = {r: j for j, r in enumerate(rows)}
    miss = [r for r in rows if r not in hit_at]
    miss_flags = None if flags is None else [flags[pos[r]] for r in miss]
    computed = call_stage(run.name, table, config, miss, miss_flags, **kw)
    names = [c.name for c in st.columns(st.view(config)) if not c.transient] + [st.checks_column]
    hit = list(hit_at)
    if hit:
        cached = cache.take([hit_at[r] for r in hit], names)
        index = np.arange(table.num_rows)
        index[np.asarray(hit, dtype=np.int64)] = table.num_rows + np.arange(len(hit))
        merged = []
        for name in computed.column_names:
            col = computed.column(name)
            if name in names:
                col = pa.concat_arrays([col.combine_chunks(), cached.column(name).combine_chunks().cast(col.type)])
                col = col.take(pa.array(index))
            merged.append(col)
        computed = pa.Table.from_arrays(merged, names=computed.column_names)
    seen_set = set(rows)
    key_col = pa.array([keys[i] if i in seen_set else None for i in range(table.num_rows)], pa.string())
    return computed.append_column(KEY, key_col)


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
    chk = res.column(st.checks_column) if st.checks_column in res.column_names else empty_checks(res.num_rows)
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
