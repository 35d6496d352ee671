"""The work-dir layout, in one place for the runner, the task executor and the output writer.

Under `<out>/work/`:
  source/<shard>.parquet      the source table, cut into shards of `input.shard_size`
  <stage>/<shard>.parquet     a per-shard stage's output for one shard (every row of the shard)
  <stage>/all.parquet         a global stage's output (every sample, in shard order)
  state.json                  what the last run did, for `curate status`
Every file carries the fingerprint that made it and a checksum of its content (curate.workdir).
"""
from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Sequence

import pyarrow as pa

from . import workdir
from .errors import StageError

SOURCE = "source"


@dataclass(frozen=True)
class InputRef:
    """One table a task reads: a file, optionally a row range of it (a shard's slice of a global output),
    and the columns wanted from it (None: all)."""

    path: str
    offset: int | None = None
    length: int | None = None
    columns: tuple[str, ...] | None = None


def output_path(work: Path, stage: str, shard: str | None = None) -> Path:
    """`<stage>/<shard>.parquet`, or `<stage>/all.parquet` for a global stage (shard None)."""
    return Path(work) / stage / f"{shard or 'all'}.parquet"


def shard_names(n: int) -> list[str]:
    return [f"s{i:05d}" for i in range(n)]


def read_ref(ref: InputRef) -> pa.Table:
    cols = None if ref.columns is None else ["sample_id", *[c for c in ref.columns if c != "sample_id"]]
    t = workdir.read_table(ref.path, columns=cols)
    if ref.offset is not None:
        t = t.slice(ref.offset, ref.length)
    return t


def hstack(tables: Sequence[pa.Table], where: str) -> pa.Table:
    """Columns of several tables of the same rows side by side (checked by sample_id)."""
    base = tables[0]
    ids = base.column("sample_id")
    for t in tables[1:]:
        if t.num_rows != base.num_rows or not t.column("sample_id").equals(ids):
            raise StageError("inputs are not aligned by sample_id (a work file is stale or damaged)", stage=where)
        for name in t.column_names:
            if name != "sample_id" and name not in base.column_names:
                base = base.append_column(t.schema.field(name), t.column(name))
    return base


def assemble(parts: Sequence[Sequence[InputRef]], where: str) -> pa.Table:
    """One table from per-shard reference lists (each: the source shard first, then its inputs)."""
    tables = [hstack([read_ref(r) for r in part], where) for part in parts]
    if not tables:
        raise StageError("no input shards", stage=where)
    return pa.concat_tables(tables, promote_options="permissive") if len(tables) > 1 else tables[0]
