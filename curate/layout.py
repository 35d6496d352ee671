"""The work-dir layout, in one place for the runner, the task executor and the output writer.

Under `<out>/work/`:
  source/<shard>.parquet      the source table, cut into shards of `input.shard_size`
  <stage>/<shard>.parquet     a per-shard stage's output for one shard (every row of the shard)
  <stage>/all.parquet         a global stage's output (every sample, in shard order)
  state.json                  what the last run did, for `curate status`
Every file carries the fingerprint that made it and a checksum of its content (curate.workdir).
"""
from __future__ import annotations

import hashlib
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


class ShardCutter:
    """The cut rule of `cut_shards`, one sample at a time (for a listing that streams)."""

    def __init__(self, size: int):
        self.size, self.length = size, 0

    def push(self, sample_id: str) -> bool:
        """Add a sample; True when the shard ends after it."""
        self.length += 1
        h = int.from_bytes(hashlib.sha256(sample_id.encode("utf-8", "surrogatepass")).digest()[:8], "big")
        if (h % self.size == 0 and self.length >= max(1, self.size // 4)) or self.length >= 4 * self.size:
            self.length = 0
            return True
        return False


def cut_shards(sample_ids: Sequence[str], size: int) -> list[tuple[str, int, int]]:
    """Shards of about `size` rows, as (name, start, length), cut where the content says so.

    A cut falls after a sample whose id hashes to 0 modulo `size` (once the shard holds at least a
    quarter of `size`), or at four times `size`. The cuts depend on the samples near them only, so
    adding or removing k samples changes about k shards, not every shard after the first change.
    A shard is named after its first sample, so an unchanged shard keeps its name (and its work)."""
    out: list[tuple[str, int, int]] = []
    start = 0
    n = len(sample_ids)
    cutter = ShardCutter(size)
    for i, sid in enumerate(sample_ids):
        if cutter.push(sid) or i == n - 1:
            out.append((shard_name(sample_ids[start]), start, i - start + 1))
            start = i + 1
    return out


def shard_name(sample_id: str) -> str:
    safe = "".join(ch if ch.isalnum() or ch in "-_" else "_" for ch in sample_id)[:48]
    return f"s{safe}"


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
