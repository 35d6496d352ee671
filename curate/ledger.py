"""The ledger: one row per input sample, kept or not, with every check and the verdict.

Built from the work dir by `build_ledger`, written by curate.writers, and read
back here for `curate explain` and the report.
"""
from __future__ import annotations

from pathlib import Path
from typing import Any

import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from .errors import InputError, NotFoundError
from .policy import action_for
from .stages import REGISTRY, all_checks
from .stages.base import base_code, checks_column

LEDGER_CHECK = pa.struct(
    [
        ("stage", pa.string()),
        ("code", pa.string()),
        ("value", pa.string()),
        ("threshold", pa.string()),
        ("failed", pa.bool_()),
        ("action", pa.string()),
    ]
)

# Contract columns first, then the rest; any column a stage did not produce is null.
COLUMNS: list[tuple[str, pa.DataType]] = [
    ("sample_id", pa.string()),
    ("source", pa.string()),
    ("caption", pa.string()),
    ("kept", pa.bool_()),
    ("reasons", pa.list_(pa.string())),
    ("flags", pa.list_(pa.string())),
    ("width", pa.int32()),
    ("height", pa.int32()),
    ("agreement", pa.float32()),
    ("clip_score", pa.float32()),
    ("group_id", pa.string()),
    ("dup_of", pa.string()),
    ("dup_distance", pa.float64()),
    ("dup_signal", pa.string()),
    ("split", pa.string()),
    ("stopped_at", pa.string()),
    ("decoded", pa.bool_()),
    ("format", pa.string()),
    ("mode", pa.string()),
    ("file_bytes", pa.int64()),
    ("sha256", pa.string()),
    ("frames", pa.int32()),
    ("has_alpha", pa.bool_()),
    ("caption_chars", pa.int32()),
    ("caption_tokens", pa.int32()),
    ("caption_repaired", pa.bool_()),
    ("caption_images", pa.int32()),
    ("eval_match", pa.string()),
    ("checks", pa.list_(LEDGER_CHECK)),
]


def build_ledger(joined: pa.Table, stage_order: list[str], overrides: dict[str, str]) -> pa.Table:
    """joined: the source table with every stage's columns. Returns the ledger table."""
    specs = all_checks()
    n = joined.num_rows
    cols = {name: joined.column(name).to_pylist() if name in joined.column_names else [None] * n
            for name, _ in COLUMNS if name not in ("checks", "reasons", "flags", "kept", "stopped_at")}
    stage_checks = [(s, joined.column(checks_column(s)).to_pylist()) for s in stage_order
                    if checks_column(s) in joined.column_names]
    merged, reasons, flags, kept, stopped = [], [], [], [], []
    decoded = cols["decoded"]
    for i in range(n):
        rows: list[dict] = []
        r: list[str] = []
        f: list[str] = []
        first_stage = None
        for stage, lists in stage_checks:
            for c in lists[i] or ():
                act = action_for(c["code"], specs, overrides)
                rows.append({"stage": stage, **c, "action": act})
                if c["failed"]:
                    if act == "drop" and c["code"] not in r:
                        r.append(c["code"])
                        first_stage = first_stage or stage
                    elif act == "flag" and c["code"] not in f:
                        f.append(c["code"])
        ok = not r and bool(decoded[i])
        if not ok and not r:
            r.append("decode_error")
            first_stage = "inspect"
        merged.append(rows)
        reasons.append(r)
        flags.append(f)
        kept.append(ok)
        stopped.append(first_stage)
    cols["reasons"], cols["flags"], cols["kept"], cols["stopped_at"], cols["checks"] = reasons, flags, kept, stopped, merged
    # Every decoded sample has a group: its near-duplicate group, or itself when neardup did not run.
    cols["group_id"] = [g if g is not None else (sid if d else None)
                        for g, sid, d in zip(cols["group_id"], cols["sample_id"], decoded)]
    # Kept samples without a split stage all go to train; dropped samples have no split.
    cols["split"] = [(s or "train") if k else None for s, k in zip(cols["split"], kept)]
    arrays = [pa.array(cols[name], type=tp) for name, tp in COLUMNS]
    return pa.Table.from_arrays(arrays, names=[c for c, _ in COLUMNS])


def read_ledger(out_dir: str | Path, columns: list[str] | None = None) -> pa.Table:
    p = Path(out_dir) / "ledger.parquet"
    if not p.exists():
        raise InputError(f"no ledger at {p}: is {out_dir} the --out of a finished `curate run`?")
    return pq.read_table(p, columns=columns)


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


def explain(out_dir: str | Path, key: str) -> dict[str, Any]:
    """Every check of one sample, its value, threshold and verdict, and its near-duplicate group."""
    ledger = read_ledger(out_dir)
    row = find(ledger, key)
    specs = all_checks()
    checks = [
        {**c, "help": specs[base_code(c["code"])].help if base_code(c["code"]) in specs else ""}
        for c in row["checks"]
    ]
    group = []
    if row["group_id"] is not None:
        g = ledger.filter(pc.equal(ledger.column("group_id"), row["group_id"]))
        cols = ["sample_id", "source", "kept", "width", "height", "agreement", "dup_of", "dup_distance", "dup_signal"]
        group = g.select(cols).to_pylist() if g.num_rows > 1 else []
    out = {k: row[k] for k in row if k != "checks"}
    out["checks"] = checks
    out["group"] = group
    out["stages"] = [s for s in REGISTRY]
    return out
