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
    values are scalars or arrays of length n (value/threshold floats, failed bools, detail strings,
    numpy or Arrow); as in check(), non-finite numbers become null and long details are cut."""
    import numpy as np

    present = np.asarray(present, dtype=bool)
    rows = np.flatnonzero(present)
    m, k = len(rows), len(records)
    fields = []
    for name, typ in ((f.name, f.type) for f in CHECK_TYPE):
        parts = [_field(rec.get(name), typ, rows) for rec in records]
        stacked = pa.concat_arrays(parts) if parts else pa.array([], typ)
        if name == "detail":
            stacked = _cut_details(stacked)
        if k > 1:  # interleave: row r's records are consecutive
            order = (np.arange(k)[None, :] * m + np.arange(m)[:, None]).reshape(-1)
            stacked = stacked.take(pa.array(order, pa.int64()))
        fields.append(stacked)
    values = pa.StructArray.from_arrays(fields, fields=list(CHECK_TYPE))
    counts = present.astype(np.int64) * k
    offsets = np.concatenate([[0], np.cumsum(counts)]).astype(np.int32)
    return pa.ListArray.from_arrays(pa.array(offsets, pa.int32()), values)


def _field(v: Any, typ: pa.DataType, rows: Any) -> pa.Array:
    """One field of one record at the given rows: from an array of n values, or a scalar repeated."""
    import numpy as np

    if isinstance(v, pa.ChunkedArray):
        v = v.combine_chunks()
    if isinstance(v, pa.Array) and not pa.types.is_floating(typ):
        return v.take(pa.array(rows, pa.int64())).cast(typ)
    if isinstance(v, (np.ndarray, list, pa.Array)):
        arr = np.asarray(v, dtype=object if pa.types.is_string(typ) else None)[rows]
        if pa.types.is_floating(typ):
            arr = arr.astype(np.float64)
            return pa.array(arr, typ, mask=~np.isfinite(arr))
        return pa.array(arr, typ)
    if pa.types.is_floating(typ) and v is not None and not math.isfinite(float(v)):
        v = None
    return pa.nulls(len(rows), typ) if v is None else pa.repeat(pa.scalar(v, typ), len(rows))


def _cut_details(details: pa.Array) -> pa.Array:
    """Details longer than DETAIL_MAX characters cut as check() cuts them."""
    import pyarrow.compute as pc

    long = pc.fill_null(pc.greater(pc.utf8_length(details), DETAIL_MAX), False)
    if not pc.any(long).as_py():
        return details
    cut = pc.binary_join_element_wise(pc.utf8_slice_codeunits(details, 0, DETAIL_MAX - 1), "…", "")
    return pc.if_else(long, cut, details)
