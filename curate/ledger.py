"""The ledger: one row per input sample, kept or not, with every check and the verdict.

Written by curate.writers; read back here for `curate explain` and the report.
"""
from __future__ import annotations

from pathlib import Path
from typing import Any

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


def find(ledger: pa.Table, key: str) -> dict:
    """One ledger row by sample_id or by source (exact, then a unique suffix match)."""
    for col in ("sample_id", "source"):
        hit = ledger.filter(pc.equal(ledger.column(col), key))
        if hit.num_rows:
            return hit.slice(0, 1).to_pylist()[0]
    norm = key.replace("\\", "/")
    mask = pc.ends_with(ledger.column("source"), "/" + norm.lstrip("/"))
    hit = ledger.filter(mask)
    if hit.num_rows == 1:
        return hit.to_pylist()[0]
    if hit.num_rows > 1:
        raise NotFoundError(f"{key!r} matches {hit.num_rows} sources; give the full source or the sample_id")
    raise NotFoundError(f"no sample with id or source {key!r} in the ledger")


def explain(out_dir: str | Path, key: str, helps: dict[str, str] | None = None) -> dict[str, Any]:
    """Every check of one sample, its value, threshold and verdict, and its near-duplicate group.

    helps: reason code (or family) -> one-line meaning, shown beside each check."""
    helps = helps or {}
    ledger = read_ledger(out_dir)
    row = find(ledger, key)
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
                            "dup_signal", "keep_reason") if c in ledger.column_names]
        group = g.select(cols).to_pylist() if g.num_rows > 1 else []
    out = {k: row[k] for k in row if k != "checks"}
    out["checks"] = checks
    out["group"] = group
    return out
