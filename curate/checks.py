"""Typed check records: what every stage writes for every check it makes.

A record says which reason code was checked, the measured value and the
threshold as numbers (or null), the operator and unit of the pass condition,
a free-text detail (mode, matched text, the sample a copy belongs to), and
whether the check failed. The pass condition reads `value op threshold`: a
short side of 552 with op ">=" and threshold 256 passes. The reason code never
carries threshold text; reports and `curate explain` format the numbers.
"""
from __future__ import annotations

import math
import operator
from typing import Any

import pyarrow as pa

CHECK_TYPE = pa.struct(
    [
        ("code", pa.string()),
        ("detail", pa.string()),
        ("value", pa.float64()),
        ("threshold", pa.float64()),
        ("op", pa.string()),
        ("unit", pa.string()),
        ("failed", pa.bool_()),
    ]
)
CHECKS_TYPE = pa.list_(CHECK_TYPE)

# What a failed check can do to its sample (curate.decide): drop it, flag it for review, ignore it,
# send it to the quarantine shards, or redact what it found in the output.
ACTIONS = ("drop", "flag", "keep", "quarantine", "redact")

# Pass conditions a record may state.
OPS = {">=": operator.ge, "<=": operator.le, ">": operator.gt, "<": operator.lt, "==": operator.eq,
       "!=": operator.ne}

DETAIL_MAX = 200


def _num(v: Any) -> float | None:
    if v is None:
        return None
    f = float(v)
    return f if math.isfinite(f) else None


def check(code: str, *, failed: bool | None = None, value: Any = None, threshold: Any = None,
          op: str | None = None, unit: str | None = None, detail: Any = None) -> dict:
    """One check record. `failed` may be left out when value, threshold and op decide it."""
    if op is not None and op not in OPS:
        raise ValueError(f"unknown operator {op!r}; use one of {', '.join(OPS)}")
    v, t = _num(value), _num(threshold)
    if failed is None:
        if op is None or v is None or t is None:
            raise ValueError(f"check {code!r}: give failed=, or value, threshold and op")
        failed = not OPS[op](v, t)
    d = None if detail is None else str(detail)
    if d is not None and len(d) > DETAIL_MAX:
        d = d[: DETAIL_MAX - 1] + "…"
    return {"code": code, "detail": d, "value": v, "threshold": t, "op": op, "unit": unit,
            "failed": bool(failed)}


def family(code: str) -> str:
    """The registered family of a code: 'pii' for 'pii:email', the code itself otherwise."""
    return code.split(":", 1)[0]


def format_number(v: float | None, unit: str | None = None) -> str:
    """A check's value or threshold for people: integers without decimals, others to 4 digits."""
    if v is None:
        return ""
    s = str(int(v)) if float(v).is_integer() and abs(v) < 1e15 else f"{v:.4g}"
    return f"{s} {unit}" if unit else s


def format_condition(rec: dict) -> str:
    """The pass condition of a record, e.g. '>= 256 px', or '' when it has none."""
    if rec.get("op") is None or rec.get("threshold") is None:
        return ""
    return f"{rec['op']} {format_number(rec['threshold'], rec.get('unit'))}"


def columnar(n: int, present: Any, records: list[dict]) -> pa.ListArray:
    """A check column built without one Python dict per row: every row where `present` is true gets
    the same records, in order; the others get none. Each record is a dict of check() fields whose
    values are scalars or arrays of length n (value/threshold floats, failed bools, detail strings)."""
    import numpy as np

    present = np.asarray(present, dtype=bool)
    rows = np.flatnonzero(present)
    k = len(records)
    fields = []
    for name, typ in ((f.name, f.type) for f in CHECK_TYPE):
        parts = []
        for rec in records:
            v = rec.get(name)
            if isinstance(v, (np.ndarray, list, pa.Array)):
                arr = np.asarray(v, dtype=object if pa.types.is_string(typ) else None)[rows]
                if pa.types.is_floating(typ):
                    arr = arr.astype(np.float64)
                    part = pa.array(arr, typ, mask=~np.isfinite(arr))
                else:
                    part = pa.array(arr, typ)
            else:
                if pa.types.is_floating(typ) and v is not None and not math.isfinite(float(v)):
                    v = None
                part = pa.array([v] * len(rows), typ)
            parts.append(part)
        # interleave: row r's records are consecutive
        stacked = pa.concat_arrays(parts) if parts else pa.array([], typ)
        order = (np.arange(k)[None, :] * len(rows) + np.arange(len(rows))[:, None]).reshape(-1)
        fields.append(stacked.take(pa.array(order, pa.int64())) if len(order) else stacked)
    values = pa.StructArray.from_arrays(fields, fields=list(CHECK_TYPE))
    counts = present.astype(np.int64) * k
    offsets = np.concatenate([[0], np.cumsum(counts)]).astype(np.int32)
    return pa.ListArray.from_arrays(pa.array(offsets, pa.int32()), values)
