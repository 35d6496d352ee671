"""What-if curves: how many samples a run would keep if one numeric threshold were different.

Everything comes from the ledger's check records (value, threshold, operator), so no stage runs
again. For one check (code, operator, unit) a sample counts at threshold t when no other check
drops it and its own value passes `value op t`. Samples that an earlier check dropped were never
seen by later stages; loosening a threshold that let them through counts them as kept (the upper
line) and the lower line leaves them out, so the truth lies between the two. Where only failing
records carry a value (near-duplicate distances are stored only within the radius), the curve
covers the loosening side alone. All work is vectorised: no Python loop per sample.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

POINTS = 160  # threshold values evaluated per curve (the plot is sampled, never per sample)
# Operators a threshold can be swept for: the pass condition `value op threshold` (curate.checks.OPS).
SWEEPABLE = (">=", ">", "<=", "<")


class Coded:
    """A string column as integer codes into a word list: `col == "word"` is an integer compare."""

    __hash__ = None  # type: ignore[assignment]

    def __init__(self, idx: np.ndarray, words: list[str]):
        self.idx, self.words = idx, words
        self._pos_map: dict[str, int] | None = None

    @property
    def _pos(self) -> dict[str, int]:
        if self._pos_map is None:
            self._pos_map = {}
            for i, w in enumerate(self.words):
                self._pos_map.setdefault(w, i)
        return self._pos_map

    def __eq__(self, word: object) -> np.ndarray:  # type: ignore[override]
        i = self._pos.get(word)  # type: ignore[arg-type]
        return np.zeros(self.idx.size, bool) if i is None else self.idx == i

    def isin(self, words: tuple[str, ...]) -> np.ndarray:
        return np.isin(self.idx, [self._pos[w] for w in words if w in self._pos])

    def __getitem__(self, mask: np.ndarray) -> np.ndarray:
        return np.array(self.words, dtype=object)[self.idx[mask]] if self.words else np.zeros(0, object)


@dataclass
class Records:
    """The ledger's check records flattened into numpy arrays (one entry per record)."""

    n: int  # ledger rows
    row: np.ndarray  # int64: the ledger row of each record
    code: Coded  # reason code
    op: Coded  # pass-condition operator ("" when none)
    unit: Coded  # "" when none
    action: Coded  # "" when skipped
    value: np.ndarray  # float64, NaN when null
    threshold: np.ndarray  # float64, NaN when null
    failed: np.ndarray  # bool
    status: Coded  # pass | fail | skipped


class Counter:
    """Counts at any threshold from one check's sorted margins (margin = value - threshold)."""

    def __init__(self, op: str, action: str, current: float, margins: np.ndarray, base: int, fixed_fail: int):
        self.op, self.action, self.current = op, action, current
        self.margins, self.base, self.fixed_fail = margins, base, fixed_fail

    def __call__(self, ts: np.ndarray) -> np.ndarray:
        """`value op t` passes iff `margin op (t - current)`: one searchsorted per threshold."""
        m, d = self.margins, np.asarray(ts, dtype=np.float64) - self.current
        if self.op == ">=":
            passing = m.size - np.searchsorted(m, d, "left")
        elif self.op == ">":
            passing = m.size - np.searchsorted(m, d, "right")
        elif self.op == "<=":
            passing = np.searchsorted(m, d, "right")
        else:
            passing = np.searchsorted(m, d, "left")
        if self.action == "drop":
            return (self.base + passing).astype(np.int64)
        return (m.size - passing + self.fixed_fail).astype(np.int64)


@dataclass
class Curve:
    """Samples counted (kept, or hit for non-drop actions) against one check's threshold."""

    code: str
    op: str
    unit: str
    action: str  # the code's action in this run: drop -> counts kept samples; otherwise samples it hits
    current: float  # the threshold used (the most common one when records differ)
    thresholds: list[float]  # distinct thresholds the records carry (most common first, at most 3)
    xs: np.ndarray
    upper: np.ndarray  # counting samples that later stages never saw as kept
    lower: np.ndarray  # leaving those samples out
    now: int  # the count at the current threshold
    measured: int  # samples with a value for this check
    failing: int  # samples whose value fails it now
    one_sided: bool  # only the loosening side is known
    log_x: bool
    count: Counter
    notes: list[str] = field(default_factory=list)

    @property
    def key(self) -> str:
        return f"{self.code} ({self.unit})" if self.unit else self.code

    def count_at(self, t: float) -> int:
        """The count at threshold t, evaluated exactly (not read off the sampled curve)."""
        return int(self.count(np.array([t]))[0])


def flatten(ledger: pa.Table) -> Records:
    """Every check record of the ledger as flat arrays; chunk by chunk, no per-row Python.

    Strings are dictionary-encoded once (null -> ""), numbers null -> NaN."""
    n = ledger.num_rows
    rows, nums, text = [], {"value": [], "threshold": [], "failed": []}, {k: [] for k in _TEXT}
    offset = 0
    for chunk in (ledger.column("checks").chunks if "checks" in ledger.column_names else []):
        lengths = pc.fill_null(pc.list_value_length(chunk), 0).to_numpy(zero_copy_only=False)
        rows.append(np.repeat(np.arange(offset, offset + len(chunk), dtype=np.int64), lengths))
        flat = pc.list_flatten(chunk)
        for k in _TEXT:
            text[k].append(flat.field(k))
        for k in ("value", "threshold"):
            nums[k].append(pc.fill_null(flat.field(k).cast(pa.float64()), np.nan).to_numpy(zero_copy_only=False))
        nums["failed"].append(pc.fill_null(flat.field("failed"), False).to_numpy(zero_copy_only=False))
        offset += len(chunk)

    def cat(parts: list, dtype: type) -> np.ndarray:
        return np.concatenate(parts).astype(dtype) if parts else np.zeros(0, dtype)

    return Records(n=n, row=cat(rows, np.int64), value=cat(nums["value"], np.float64),
                   threshold=cat(nums["threshold"], np.float64), failed=cat(nums["failed"], bool),
                   **{k: coded(pa.chunked_array(v, pa.string())) for k, v in text.items()})


_TEXT = ("code", "op", "unit", "action", "status")


def coded(arr: pa.ChunkedArray | pa.Array) -> Coded:
    """Dictionary-encode a string array into a Coded column (null reads as "")."""
    if isinstance(arr, pa.ChunkedArray):
        arr = arr.combine_chunks() if arr.num_chunks else pa.array([], pa.string())
    enc = pc.dictionary_encode(arr, null_encoding="encode")
    words = ["" if w is None else w for w in enc.dictionary.to_pylist()]
    idx = enc.indices.to_numpy(zero_copy_only=False).astype(np.int32)
    if "" in words and words.count("") > 1:  # both null and "" present: one code for both
        first = words.index("")
        idx = np.where(np.isin(idx, [i for i, w in enumerate(words) if w == ""]), first, idx).astype(np.int32)
    return Coded(idx, words)


def _strings(arr: pa.Array) -> np.ndarray:
    """A string array as an object array (null -> ""), each distinct value decoded once."""
    c = coded(arr)
    return np.array(c.words, dtype=object)[c.idx] if c.words else np.zeros(len(arr), dtype=object)


def curves(ledger: pa.Table, points: int = POINTS, rec: Records | None = None) -> list[Curve]:
    """One curve per (code, op, unit) whose records carry a numeric value and threshold."""
    rec = rec if rec is not None else flatten(ledger)
    if rec.row.size == 0:
        return []
    n = rec.n
    drop_fail = (rec.status == "fail") & (rec.action == "drop")
    per_row_drops = np.bincount(rec.row[drop_fail], minlength=n)
    skipped_rows = np.bincount(rec.row[rec.status == "skipped"], minlength=n) > 0
    numeric = np.flatnonzero(~np.isnan(rec.value) & ~np.isnan(rec.threshold) & rec.op.isin(SWEEPABLE))
    n_op, n_unit = len(rec.op.words) or 1, len(rec.unit.words) or 1
    key = (rec.code.idx[numeric].astype(np.int64) * n_op + rec.op.idx[numeric]) * n_unit + rec.unit.idx[numeric]
    order = np.argsort(key, kind="stable")  # records of one check together, still in ledger order
    bounds = np.flatnonzero(np.r_[True, key[order][1:] != key[order][:-1], True])
    out = []
    for start, end in zip(bounds[:-1], bounds[1:]):
        k = int(key[order[start]])
        code, op, unit = (rec.code.words[k // (n_op * n_unit)], rec.op.words[k // n_unit % n_op],
                          rec.unit.words[k % n_unit])
        mine = numeric[order[start:end]]
        out.append(_curve(rec, n, code, op, unit, mine, drop_fail, per_row_drops, skipped_rows, points))
    out.sort(key=lambda c: (c.code, c.op, c.unit))
    return [c for c in out if c.xs.size > 1]  # a structural check (e.g. "empty": > 0) has nothing to sweep


def _worst(rows: np.ndarray, margin: np.ndarray, lowest: bool) -> tuple[np.ndarray, np.ndarray]:
    """Per row, its worst margin (the lowest for >=/>, the highest for <=/<): (rows, margins)."""
    if rows.size < 2 or bool(np.all(rows[1:] > rows[:-1])):  # the usual case: one record per row, in order
        return rows, margin
    order = np.lexsort((margin if lowest else -margin, rows))
    r, m = rows[order], margin[order]
    first = np.flatnonzero(np.r_[True, r[1:] != r[:-1]])
    return r[first], m[first]


def _curve(rec: Records, n: int, code: str, op: str, unit: str, mine: np.ndarray, drop_fail: np.ndarray,
           per_row_drops: np.ndarray, skipped_rows: np.ndarray, points: int) -> Curve:
    """mine: indices of this check's numeric records, in ledger order."""
    act_i, act_n = np.unique(rec.action.idx[mine], return_counts=True)
    action = rec.action.words[int(act_i[np.argmax(act_n)])] or "drop"
    thr = rec.threshold[mine]
    values, counts = np.unique(thr, return_counts=True)
    current = float(values[np.argmax(counts)])
    # Per record, the margin to its own threshold: `value op threshold` passes iff `margin op 0`, and
    # at threshold current+d iff `margin op d`. A row with several such records keeps its worst one.
    rows, worst = _worst(rec.row[mine], rec.value[mine] - thr, op in (">=", ">"))
    has = np.zeros(n, bool)
    has[rows] = True
    if action == "drop":
        # dropped whatever this threshold is: some other record drops the row
        other = (per_row_drops - np.bincount(rec.row[mine[drop_fail[mine]]], minlength=n)) > 0
        cand = ~other[rows]
        unseen = skipped_rows[rows]
        base = ~other & ~has
        upper = Counter(op, action, current, np.sort(worst[cand]), int(base.sum()), 0)
        lower = Counter(op, action, current, np.sort(worst[cand & ~unseen]), int((base & ~skipped_rows).sum()), 0)
    else:
        # samples this check hits at t: a failing value, or a failing record of the code without a value
        fixed = (rec.code == code) & (rec.status == "fail")
        fixed[mine] = False
        fixed_rows = np.zeros(n, bool)
        fixed_rows[rec.row[fixed]] = True
        upper = lower = Counter(op, action, current, np.sort(worst), 0, int((fixed_rows & ~has).sum()))
    one_sided = not bool((~rec.failed[mine]).any())
    vals = rec.value[mine]
    xs, log_x = _grid(current + float(worst.min()), current + float(worst.max()), current, op, one_sided, points,
                      float(vals.min()), whole=bool(np.all(vals == np.round(vals)) and current == round(current)))
    notes = []
    if len(values) > 1:
        notes.append(f"records carry {len(values)} different thresholds; the curve moves them together and the "
                     "axis shows the most common one")
    if one_sided:
        notes.append("only failing samples carry a value here, so only the loosening side is known")
    up, low = upper(xs), lower(xs)
    if action == "drop" and (up != low).any():
        notes.append("the dashed line leaves out samples that later stages never checked")
    return Curve(code=code, op=op, unit=unit, action=action, current=current,
                 thresholds=[float(v) for v in values[np.argsort(-counts, kind="stable")][:3]], xs=xs, upper=up,
                 lower=low, now=int(upper(np.array([current]))[0]), measured=int(has.sum()),
                 failing=int(np.unique(rows[~_passes(worst, op)]).size), one_sided=one_sided,
                 log_x=log_x, count=upper, notes=notes)


def _passes(margin: np.ndarray, op: str) -> np.ndarray:
    return {">=": margin >= 0, ">": margin > 0, "<=": margin <= 0, "<": margin < 0}[op]


def _grid(lo: float, hi: float, current: float, op: str, one_sided: bool, points: int,
          vmin: float, whole: bool = False) -> tuple[np.ndarray, bool]:
    """Threshold values to evaluate: the data's range and the current value, a little padded (never
    below zero for values that are never negative); whole numbers only for whole-number checks."""
    lo, hi = min(lo, current), max(hi, current)
    stop_hi = one_sided and op in (">=", ">")  # loosening a lower bound means lowering it
    stop_lo = one_sided and op in ("<=", "<")
    if stop_hi:
        hi = current
    if stop_lo:
        lo = current
    log_x = lo > 0 and vmin > 0 and hi / lo > 50
    if log_x:
        xs = np.geomspace(lo if stop_lo else lo / 1.1, hi if stop_hi else hi * 1.1, points)
    else:
        pad = 0.04 * ((hi - lo) or max(abs(current), 1.0))
        a = lo if stop_lo else lo - pad
        if vmin >= 0 and lo >= 0:
            a = max(a, 0.0)
        xs = np.linspace(a, hi if stop_hi else hi + pad, points)
    if whole:
        xs = np.round(xs)
    return np.unique(np.append(xs, current)), log_x


def table_points(c: Curve, ticks: list[float]) -> list[tuple[float, int]]:
    """(threshold, count) at round values inside the curve's range, and at the current threshold,
    each evaluated exactly."""
    lo, hi = float(c.xs.min()), float(c.xs.max())
    pts = {float(t): c.count_at(float(t)) for t in ticks if lo <= t <= hi}
    pts[c.current] = c.now
    return sorted(pts.items())
