"""The ledger: one row per input sample, kept or not, with every check and the verdict.

Written by curate.writers; read back here for `curate explain`, `curate ledger` queries and the report.
"""
from __future__ import annotations

import json
import os
import posixpath
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from .checks import family, format_condition, format_number
from .errors import InputError, NotFoundError


def read_ledger(out_dir: str | Path, columns: list[str] | None = None) -> pa.Table:
    p = Path(out_dir) / "ledger.parquet"
    if not p.exists():
        raise InputError(f"no ledger at {p}: is {out_dir} the --out of a finished `curate run`?")
    try:
        return pq.read_table(p, columns=columns).replace_schema_metadata(None)
    except (OSError, pa.ArrowException) as e:
        raise InputError(f"the ledger {p} cannot be read ({type(e).__name__}); re-run `curate run`") from e


_HEX_ID = re.compile(r"^[0-9a-fA-F]{4,16}(-[0-9]+)?$")  # a sample_id or a prefix of one (see sources.base)
_HEX_SHORT = re.compile(r"^[0-9a-fA-F]{1,3}$")
MIN_PREFIX = 4  # shortest id prefix accepted (common practice for abbreviated hex ids, e.g. git's minimum)


def find(ledger: pa.Table, key: str, *, input_root: str | None = None, id_column: str | None = None) -> dict:
    """One ledger row for what a user typed: a sample_id (any case), a unique prefix of one, the
    manifest's own id (`meta.<id_column>`), a source as recorded, a `./` or absolute path under
    the input root, or a unique ending of a source. Several rows for one source is an error
    that asks for the sample_id."""
    key = key.strip()
    sid = ledger.column("sample_id")
    tries: list[tuple[str, str]] = [("sample_id", key)]
    if _HEX_ID.match(key) and key.lower() != key:
        tries.append(("sample_id", key.lower()))
    meta = f"meta.{id_column}" if id_column else None
    if meta and meta in ledger.column_names:
        tries.append((meta, key))
    forms = _source_forms(key, input_root)
    tries += [("source", p) for p in forms]
    for col, value in tries:
        column = ledger.column(col)
        if not pa.types.is_string(column.type) and not pa.types.is_large_string(column.type):
            column = pc.cast(column, pa.string())
        hit = ledger.filter(pc.equal(column, value))
        if hit.num_rows == 1:
            return hit.to_pylist()[0]
        if hit.num_rows > 1:
            raise NotFoundError(f"{key!r} matches {hit.num_rows} samples; give the sample_id (one of "
                                f"{', '.join(hit.column('sample_id').to_pylist()[:5])})")
    hit = ledger.filter(pc.ends_with(ledger.column("source"), "/" + forms[-1].lstrip("/")))
    if hit.num_rows == 1:
        return hit.to_pylist()[0]
    if hit.num_rows > 1:
        raise NotFoundError(f"{key!r} matches {hit.num_rows} samples; give the sample_id or the full source")
    if _HEX_ID.match(key) and len(key) >= MIN_PREFIX:
        hit = ledger.filter(pc.starts_with(sid, key.lower()))
        if hit.num_rows == 1:
            return hit.to_pylist()[0]
        if hit.num_rows > 1:
            raise NotFoundError(f"{key!r} is the start of {hit.num_rows} sample ids; give more characters")
    hint = f" (an id prefix needs at least {MIN_PREFIX} characters)" if _HEX_SHORT.match(key) else ""
    raise NotFoundError(f"no sample with id or source {key!r} in the ledger{hint}")


def _source_forms(key: str, input_root: str | None) -> list[str]:
    """Ways a typed path may be written in `source`: as given, `/` separators, `./` dropped, and
    relative to the input root (or the folder of a manifest or tar file) when it is absolute."""
    forms = [key]
    p = key.replace("\\", "/")
    while p.startswith("./"):
        p = p[2:]
    forms.append(p)
    q = posixpath.normpath(p) if p and not os.path.isabs(p) else p
    if q and q != "." and not q.startswith("../"):
        forms.append(q)
    if os.path.isabs(key) and input_root:
        root = os.path.normpath(input_root)
        bases = [root, os.path.dirname(root)]
        for path in (os.path.normpath(key), os.path.realpath(key)):
            for base in bases + [os.path.realpath(b) for b in bases]:
                if path.startswith(base.rstrip("/") + "/"):
                    forms.append(os.path.relpath(path, base).replace(os.sep, "/"))
    out: list[str] = []
    for f in forms:
        if f and f not in out:
            out.append(f)
    return out


def run_input(out_dir: str | Path) -> tuple[str | None, str | None]:
    """The input root and manifest id column a finished run recorded in config.resolved.toml."""
    import tomllib

    try:
        cfg = tomllib.loads((Path(out_dir) / "config.resolved.toml").read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None, None
    inp = cfg.get("input", {}) if isinstance(cfg.get("input"), dict) else {}
    root, idc = inp.get("path"), inp.get("id_column")
    return (root if isinstance(root, str) and root else None), (idc if isinstance(idc, str) and idc else None)


def explain(out_dir: str | Path, key: str, helps: dict[str, str] | None = None) -> dict[str, Any]:
    """Every check of one sample, its value, threshold and verdict, and its near-duplicate group.

    helps: reason code (or family) -> one-line meaning, shown beside each check."""
    helps = helps or {}
    ledger = read_ledger(out_dir)
    root, id_column = run_input(out_dir)
    row = find(ledger, key, input_root=root, id_column=id_column)
    checks = []
    for c in row["checks"]:
        shown = dict(c)
        shown["help"] = helps.get(c["code"]) or helps.get(family(c["code"])) or ""
        shown["value_text"] = format_number(c["value"], c["unit"]) if c["value"] is not None else (c["detail"] or "")
        shown["condition"] = format_condition(c)
        checks.append(shown)
    group = []
    if row.get("group_id") is not None:
        g = ledger.filter(pc.equal(ledger.column("group_id"), row["group_id"]))
        cols = [c for c in ("sample_id", "source", "kept", "width", "height", "agreement", "dup_of", "dup_distance",
                            "dup_signal", "dup_transform", "keep_reason") if c in ledger.column_names]
        group = g.select(cols).to_pylist() if g.num_rows > 1 else []
    out = {k: row[k] for k in row if k != "checks"}
    out["checks"] = checks
    out["group"] = group
    return out


# --------------------------------------------------------------------------- queries

DEFAULT_COLUMNS = ("sample_id", "source", "kept", "split", "reasons", "flags")
FORMATS = ("table", "csv", "json")
TABLE_LIMIT = 50  # rows a terminal table shows unless --limit says otherwise (csv and json: all)
CELL_CHARS = 48  # characters per cell in the terminal table


@dataclass
class Query:
    """The rows of a ledger query (at most `limit`), how many matched, and the ledger's size."""

    table: pa.Table
    matched: int
    total: int


def query(out_dir: str | Path, *, reason: str | None = None, flag: str | None = None, kept: bool | None = None,
          split: str | None = None, columns: list[str] | None = None, limit: int | None = None) -> Query:
    """Ledger rows matching every filter given, in ledger order, with the chosen columns.

    reason: a drop reason code; flag: a flag code, or a family such as `pii` for every `pii:*`;
    kept: True for kept samples, False for dropped; split: train, eval, quarantine or `none`.
    Reads only the columns it needs and filters with Arrow kernels (no loop per row)."""
    path = Path(out_dir) / "ledger.parquet"
    if not path.exists():
        raise InputError(f"no ledger at {path}: is {out_dir} the --out of a finished `curate run`?")
    if limit is not None and limit < 0:
        raise InputError(f"--limit must be 0 or more, got {limit}")
    if split is not None and not split:
        raise InputError("--split needs a value: train, eval, quarantine or none")
    try:
        pf = pq.ParquetFile(path)
        cols = _columns(columns, pf.schema_arrow.names)
        filters = [c for c, on in (("reasons", reason), ("flags", flag), ("kept", kept is not None),
                                   ("split", split)) if on]
        total = pf.metadata.num_rows
        t = pf.read(columns=filters) if filters else None
        mask = np.ones(total, bool)
        if reason is not None:
            mask &= list_has(t.column("reasons"), reason, prefix=False)
        if flag is not None:
            mask &= list_has(t.column("flags"), flag, prefix=":" not in flag)
        if kept is not None:
            k = pc.fill_null(t.column("kept"), False).to_numpy(zero_copy_only=False).astype(bool)
            mask &= k if kept else ~k
        if split is not None:
            col = t.column("split")
            hit = col.is_null() if split.lower() == "none" else pc.fill_null(pc.equal(col, split), False)
            mask &= hit.to_numpy(zero_copy_only=False).astype(bool)
        rows = np.flatnonzero(mask)
        matched = int(rows.size)
        if limit is not None:
            rows = rows[:limit]
        return Query(take_rows(pf, cols, rows), matched, total)
    except (OSError, pa.ArrowException) as e:
        raise InputError(f"the ledger {path} cannot be read ({type(e).__name__}); re-run `curate run`") from e


def take_rows(pf: pq.ParquetFile, cols: list[str], rows: np.ndarray) -> pa.Table:
    """The chosen columns of these rows, reading only the row groups that hold them."""
    sizes = np.array([pf.metadata.row_group(i).num_rows for i in range(pf.num_row_groups)], np.int64)
    starts = np.r_[0, np.cumsum(sizes)]
    group_of = np.searchsorted(starts, rows, side="right") - 1
    groups = np.unique(group_of)
    if not groups.size:
        return pf.schema_arrow.empty_table().select(cols)
    part = pf.read_row_groups([int(g) for g in groups], columns=cols).replace_schema_metadata(None)
    # in `part` the groups read follow one another: a row sits at its group's offset there plus its
    # position inside the group
    offset_in_part = np.r_[0, np.cumsum(sizes[groups])][:-1]
    local = offset_in_part[np.searchsorted(groups, group_of)] + rows - starts[group_of]
    return part.take(pa.array(local, pa.int64()))


def _columns(columns: list[str] | None, names: list[str]) -> list[str]:
    if not columns:
        return [c for c in DEFAULT_COLUMNS if c in names]
    out: list[str] = []
    for c in columns:
        for part in str(c).split(","):
            part = part.strip()
            if part and part not in out:
                out.append(part)
    unknown = [c for c in out if c not in names]
    if unknown:
        raise InputError(f"no column {unknown[0]!r} in the ledger; columns are: {', '.join(names)}")
    return out


def list_has(col: pa.ChunkedArray, value: str, *, prefix: bool) -> np.ndarray:
    """Rows whose list holds `value` (or, with prefix, `value` or any `value:...`): Arrow kernels only."""
    mask = np.zeros(len(col), bool)
    offset = 0
    for chunk in col.chunks:
        flat = pc.list_flatten(chunk)
        parents = pc.list_parent_indices(chunk)
        hit = pc.equal(flat, value)
        if prefix:
            hit = pc.or_(hit, pc.starts_with(flat, value + ":"))
        idx = parents.filter(pc.fill_null(hit, False)).to_numpy(zero_copy_only=False)
        mask[offset + idx] = True
        offset += len(chunk)
    return mask


def format_query(q: Query, fmt: str = "table") -> str:
    """A query's rows as an aligned terminal table (with a count line), CSV, or JSON Lines."""
    if fmt not in FORMATS:
        raise InputError(f"unknown format {fmt!r}; use one of {', '.join(FORMATS)}")
    if fmt == "json":
        return "".join(json.dumps(r, ensure_ascii=False, default=str) + "\n" for r in q.table.to_pylist())
    if fmt == "csv":
        import csv
        import io

        buf = io.StringIO()
        w = csv.writer(buf, lineterminator="\n")
        w.writerow(q.table.column_names)
        for r in q.table.to_pylist():
            w.writerow([_cell(v) for v in r.values()])
        return buf.getvalue()
    from .terminal import escape

    heads = q.table.column_names
    body = [[_short(escape(_cell(v))) for v in r.values()] for r in q.table.to_pylist()]
    widths = [max([len(h)] + [len(row[i]) for row in body]) for i, h in enumerate(heads)]
    lines = ["  ".join(h.ljust(w) for h, w in zip(heads, widths)).rstrip()]
    lines += ["  ".join(c.ljust(w) for c, w in zip(row, widths)).rstrip() for row in body]
    shown = q.table.num_rows
    more = f"; showing {shown} (--limit N to change)" if shown < q.matched else ""
    lines.append(f"{q.matched:,} of {q.total:,} samples match{more}")
    return "\n".join(lines) + "\n"


def _cell(v: Any) -> str:
    if v is None:
        return ""
    if isinstance(v, list):
        return ";".join(_cell(x) if not isinstance(x, dict) else json.dumps(x, default=str) for x in v)
    if isinstance(v, float):
        return format_number(v)
    return str(v).lower() if isinstance(v, bool) else str(v)


def _short(s: str) -> str:
    return s if len(s) <= CELL_CHARS else s[: CELL_CHARS - 1] + "…"
