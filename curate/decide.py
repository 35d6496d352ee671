"""The verdict, computed in one place: which failed checks drop a sample, flag it, quarantine it.

Every registered stage declares its reason codes with a default action; the
`[decide] actions` table overrides them, by exact code (`"pii:email"`) or by
family (`pii`). The runner asks this module which samples are still alive
before each stage that sees only live samples, and the ledger asks it for
each sample's reasons and flags. Nothing else decides.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable, Iterable, Sequence

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from .checks import ACTIONS, CHECKS_TYPE, family
from .errors import ConfigError
from .stages.base import CheckSpec, all_checks, spec_for

# Actions under which a failed check keeps the sample but marks it.
MARKING = ("flag", "quarantine", "redact")
# A reviewer's keep: it lifts every drop whose code may be kept (not the ones that make an image unusable).
OVERRIDE = "review_keep"


class Actions:
    """Each reason code's action: an override by exact code, else by family, else the default."""

    def __init__(self, specs: dict[str, CheckSpec], overrides: dict[str, str] | None = None,
                 defaults: dict[str, str] | None = None):
        self.specs = specs
        self.overrides = dict(overrides or {})
        # Per-code defaults a stage's own config sets (a probe entry's action): below any override.
        self.defaults = dict(defaults or {})
        for key, act in self.defaults.items():
            spec = spec_for(key, specs)
            if spec is None or act not in spec.allowed:
                raise ConfigError(f"action {act!r} is not one of {', '.join(spec.allowed if spec else ())} for "
                                  f"{key}", key=key)
        for key, act in self.overrides.items():
            spec = spec_for(key, specs)
            if spec is None:
                import difflib

                near = difflib.get_close_matches(key, list(specs), n=1)
                hint = f"did you mean {near[0]!r}? " if near else ""
                raise ConfigError(f"unknown reason code {key!r}; {hint}known codes: {', '.join(sorted(specs))}",
                                  key=f"decide.actions.{key}")
            if act not in spec.allowed:
                raise ConfigError(f"action {act!r} is not one of {', '.join(spec.allowed)} for {key}",
                                  key=f"decide.actions.{key}")
        self._cache: dict[str, str] = {}

    def action(self, code: str) -> str:
        act = self._cache.get(code)
        if act is None:
            act = self.overrides.get(code) or self.overrides.get(family(code)) or self.defaults.get(code)
            if act is None:
                spec = spec_for(code, self.specs)
                act = spec.action if spec is not None else "drop"
            self._cache[code] = act
        return act

    def codes_with(self, codes: Iterable[str], action: str) -> list[str]:
        return [c for c in codes if c is not None and self.action(c) == action]

    def reason(self, code: str) -> str:
        """The reason a dropping code records: `risk:<code>` for screening flags, the code otherwise."""
        spec = spec_for(code, self.specs)
        return f"risk:{code}" if spec is not None and spec.risk else code

    def overridable(self, code: str) -> bool:
        """Whether a reviewer's keep lifts a drop by this code."""
        spec = spec_for(code, self.specs)
        return spec is not None and "keep" in spec.allowed


def actions_for(config: Any) -> Actions:
    """The run's actions: registered defaults < each active stage's own per-code settings < `[decide] actions`."""
    from .stages.base import REGISTRY

    defaults: dict[str, str] = {}
    for st in REGISTRY.values():
        if st.actions is not None and getattr(config.section(st.config_section), "enabled", True):
            defaults.update(st.actions(st.view(config)))
    return Actions(all_checks(), config.decide.actions, defaults)


def _failed_rows(checks: pa.ChunkedArray | pa.Array, actions: Actions, action: str,
                 which: Callable[[str], bool] | None = None) -> np.ndarray:
    """Row indices with at least one failed check whose action is `action` (and whose code `which` accepts)."""
    arr = _array(checks) if isinstance(checks, pa.ChunkedArray) else checks
    if len(arr) == 0:
        return np.zeros(0, np.int64)
    flat = pc.list_flatten(arr)
    if len(flat) == 0:
        return np.zeros(0, np.int64)
    parents = pc.list_parent_indices(arr)
    codes = flat.field("code")
    wanted = [c for c in actions.codes_with(pc.unique(codes).to_pylist(), action) if which is None or which(c)]
    if not wanted:
        return np.zeros(0, np.int64)
    hit = pc.and_(pc.fill_null(flat.field("failed"), False), pc.is_in(codes, value_set=pa.array(wanted)))
    return np.unique(np.asarray(parents.filter(hit).to_numpy(zero_copy_only=False), dtype=np.int64))


def rows_with(check_columns: Sequence[pa.ChunkedArray | pa.Array], actions: Actions, action: str,
              n: int, which: Callable[[str], bool] | None = None) -> np.ndarray:
    """Boolean mask: rows with a failed check of the given action in any of the columns."""
    mask = np.zeros(n, dtype=bool)
    for col in check_columns:
        mask[_failed_rows(col, actions, action, which)] = True
    return mask


def alive(check_columns: Sequence[pa.ChunkedArray | pa.Array], actions: Actions, n: int) -> np.ndarray:
    """True for samples that no failed check drops (a reviewer's keep lifts the drops it may lift)."""
    kept = rows_with(check_columns, actions, "keep", n, lambda c: c == OVERRIDE)
    hard = rows_with(check_columns, actions, "drop", n, lambda c: not actions.overridable(c))
    soft = rows_with(check_columns, actions, "drop", n, actions.overridable)
    return ~(hard | (soft & ~kept))


def flags_so_far(check_columns: Sequence[pa.ChunkedArray | pa.Array], actions: Actions, n: int) -> list[list[str]]:
    """Per row: the codes of failed checks whose action marks the sample, in column order."""
    out: list[list[str]] = [[] for _ in range(n)]
    for col in check_columns:
        for i in np.flatnonzero(rows_with([col], actions, "flag", n) | rows_with([col], actions, "quarantine", n)
                                | rows_with([col], actions, "redact", n)):
            for c in col[int(i)].as_py() or ():
                if c["failed"] and actions.action(c["code"]) in MARKING and c["code"] not in out[i]:
                    out[i].append(c["code"])
    return out


@dataclass
class Verdict:
    """The outcome for every sample, from every stage's checks in plan order (columnar)."""

    kept: np.ndarray  # bool per row
    quarantined: np.ndarray  # bool per row (kept, and a failed check says quarantine)
    reasons: pa.ListArray  # drop reasons per row, in stage order, without repeats
    flags: pa.ListArray  # codes that mark the row (flag, quarantine, redact; a reviewer's keep)
    redacted: pa.ListArray  # codes whose finding is redacted in the output
    stopped_at: pa.Array  # the stage of the first drop, or null
    records: pa.ListArray  # every check: stage, status, action and the record's fields

    def flags_of(self, rows: Sequence[int]) -> list[list[str]]:
        return self.flags.take(pa.array(rows, pa.int64())).to_pylist()

    def redacted_of(self, rows: Sequence[int]) -> list[list[str]]:
        return self.redacted.take(pa.array(rows, pa.int64())).to_pylist()


def _lists(parents: np.ndarray, values: pa.Array, n: int) -> pa.ListArray:
    """A list per row from (row, value) pairs already in row order."""
    counts = np.bincount(parents, minlength=n) if len(parents) else np.zeros(n, np.int64)
    offsets = np.concatenate([[0], np.cumsum(counts)]).astype(np.int32)
    return pa.ListArray.from_arrays(pa.array(offsets, pa.int32()), values)


def _first_per_row(parents: np.ndarray, keys: np.ndarray) -> np.ndarray:
    """Positions of the first occurrence of each (row, key) pair, in their original order."""
    if not len(parents):
        return np.zeros(0, np.int64)
    pair = parents.astype(np.int64) * (int(keys.max()) + 1) + keys.astype(np.int64)
    _, first = np.unique(pair, return_index=True)
    return np.sort(first)


def _array(col: pa.ChunkedArray) -> pa.Array:
    """One array of a chunked one; a single chunk is used as it is (combine_chunks would copy it)."""
    return col.chunk(0) if col.num_chunks == 1 else col.combine_chunks()


def _typed(col: Any) -> pa.Array:
    """A check column as one array of CHECKS_TYPE (a column whose optional fields were all null was
    inferred with null-typed fields)."""
    if isinstance(col, pa.ChunkedArray):
        col = _array(col)
    elif not isinstance(col, pa.Array):  # Python rows (library callers)
        return pa.array(col, type=CHECKS_TYPE)
    return col if col.type == CHECKS_TYPE else col.cast(CHECKS_TYPE)


def verdict(stage_checks: Sequence[tuple[str, pa.ChunkedArray | pa.Array]], skipped: dict[str, np.ndarray],
            skip_codes: dict[str, list[str]], actions: Actions, n: int) -> Verdict:
    """`stage_checks`: (stage, its check column) in plan order. `skipped[stage]`: rows the stage did not see
    because an earlier check dropped them; `skip_codes[stage]`: that stage's codes, listed as skipped."""
    cols = [(stage, _typed(c)) for stage, c in stage_checks]
    reviewed_keep = rows_with([c for _, c in cols], actions, "keep", n, lambda code: code == OVERRIDE)
    first_reason = np.full(n, None, dtype=object)
    names = _Names()
    parts: list[_Part] = []
    for stage, col in cols:
        skip = skipped.get(stage)
        if skip is not None and skip.any() and skip_codes.get(stage):
            parts.append(_skipped_part(stage, np.flatnonzero(skip), skip_codes[stage], first_reason, names))
        if len(col) == 0:
            continue
        flat = pc.list_flatten(col)
        if len(flat) == 0:
            continue
        parents = np.asarray(pc.list_parent_indices(col).to_numpy(zero_copy_only=False), dtype=np.int64)
        part = _stage_part(stage, flat, parents, actions, reviewed_keep, names)
        parts.append(part)
        drop = np.flatnonzero(part.failed & (part.action == names.action("drop")))
        rows, pos = np.unique(parents[drop], return_index=True)
        fresh = np.equal(first_reason[rows], None)
        codes = part.fields["code"].take(pa.array(drop[pos[fresh]])).dictionary_encode()
        first_reason[rows[fresh]] = np.array([actions.reason(c) for c in codes.dictionary.to_pylist()] + [None],
                                             dtype=object)[_ids(codes)]
    parents, recs, act, failed = _records(parts, names)
    del parts
    return _outcome(parents, recs, act, failed, names, n, actions)


class _Names:
    """Numbers for the stage names and actions of the verdict's records."""

    def __init__(self) -> None:
        self.stages: list[str] = []
        self.actions: list[str] = []

    def stage(self, name: str) -> int:
        if name not in self.stages:
            self.stages.append(name)
        return self.stages.index(name)

    def action(self, name: str) -> int:
        if name not in self.actions:
            self.actions.append(name)
        return self.actions.index(name)


@dataclass
class _Part:
    """The records of one stage's checks (or of its skipped rows), one entry per record."""

    parents: np.ndarray  # int64: the row of each record
    stage: int  # _Names.stages
    status: np.ndarray  # int8: index into STATUS
    action: np.ndarray  # int16: _Names.actions, -1 for none
    failed: np.ndarray  # bool
    fields: dict[str, pa.Array]  # code, detail, value, threshold, op, unit


STATUS = ("pass", "fail", "skipped")


def _failed(rec: pa.StructArray) -> np.ndarray:
    return np.asarray(pc.fill_null(rec.field("failed"), False).to_numpy(zero_copy_only=False), dtype=bool)


def _equal(values: pa.Array, what: str) -> np.ndarray:
    """Boolean mask: values equal to `what` (null: False)."""
    return np.asarray(pc.fill_null(pc.equal(values, what), False).to_numpy(zero_copy_only=False), dtype=bool)


def _ids(enc: pa.DictionaryArray) -> np.ndarray:
    """The indices of a dictionary-encoded column as int64; a null row gets len(dictionary)."""
    return np.asarray(enc.indices.fill_null(len(enc.dictionary)).to_numpy(zero_copy_only=False), dtype=np.int64)


def _stage_part(stage: str, flat: pa.StructArray, parents: np.ndarray, actions: Actions,
                reviewed_keep: np.ndarray, names: _Names) -> _Part:
    codes = flat.field("code")
    enc = codes.dictionary_encode()
    uniq = enc.dictionary.to_pylist()
    act = np.array([names.action(actions.action(c)) for c in uniq] + [-1], np.int16)[_ids(enc)]
    failed = _failed(flat)
    can = np.array([actions.overridable(c) for c in uniq] + [False], bool)[_ids(enc)]
    over = failed & (act == names.action("drop")) & can & reviewed_keep[parents]
    act[over] = names.action("overridden")  # a reviewer kept the sample despite this check
    fields = {f: flat.field(f) for f in ("code", "detail", "value", "threshold", "op", "unit")}
    return _Part(parents, names.stage(stage), failed.astype(np.int8), act, failed, fields)


def _skipped_part(stage: str, rows: np.ndarray, codes: list[str], first_reason: np.ndarray, names: _Names) -> _Part:
    r = np.repeat(rows, len(codes))
    c = np.tile(np.asarray(codes, dtype=object), len(rows))
    because = pa.array(first_reason[r], pa.string())
    detail = pc.if_else(pc.is_null(because), "not checked: dropped earlier",
                        pc.binary_join_element_wise("not checked: dropped earlier (", because, ")", ""))
    m = len(r)
    none_f, none_s = pa.nulls(m, pa.float64()), pa.nulls(m, pa.string())
    fields = {"code": pa.array(c, pa.string()), "detail": detail, "value": none_f, "threshold": none_f,
              "op": none_s, "unit": none_s}
    return _Part(r, names.stage(stage), np.full(m, STATUS.index("skipped"), np.int8), np.full(m, -1, np.int16),
                 np.zeros(m, bool), fields)


def _records(parts: list[_Part], names: _Names) -> tuple[np.ndarray, pa.StructArray, np.ndarray, np.ndarray]:
    """(row, record, action number, failed) of every record, by row and in stage order within a row.
    Each field is gathered once into its final place (no per-stage copy of the records)."""
    if not parts:
        return np.zeros(0, np.int64), pa.array([], LEDGER_CHECK), np.zeros(0, np.int16), np.zeros(0, bool)
    order = np.argsort(np.concatenate([p.parents for p in parts]), kind="stable")  # stage order within each row
    at = pa.array(order)

    def gather(values: list[np.ndarray]) -> np.ndarray:
        return np.concatenate(values)[order]

    def field(name: str) -> pa.Array:
        return _array(pa.chunked_array([p.fields[name] for p in parts], LEDGER_CHECK.field(name).type).take(at))

    stage = gather([np.full(p.parents.shape[0], p.stage, np.int16) for p in parts])
    status = gather([p.status for p in parts])
    act = gather([p.action for p in parts])
    failed = gather([p.failed for p in parts])
    recs = pa.StructArray.from_arrays(
        [pa.array(names.stages, pa.string()).take(pa.array(stage)), field("code"),
         pa.array(STATUS, pa.string()).take(pa.array(status)),
         pa.array(names.actions, pa.string()).take(pa.array(act, mask=act < 0)), field("detail"), field("value"),
         field("threshold"), field("op"), field("unit"), pa.array(failed)], fields=list(LEDGER_CHECK))
    return gather([p.parents for p in parts]), recs, act, failed


def _outcome(parents: np.ndarray, recs: pa.StructArray, act: np.ndarray, failed: np.ndarray, names: _Names, n: int,
             actions: Actions) -> Verdict:
    codes = recs.field("code")
    enc = codes.dictionary_encode()
    code_id = _ids(enc)
    reason_of = pa.array([actions.reason(c) for c in enc.dictionary.to_pylist()], pa.string())

    def pick(mask: np.ndarray) -> np.ndarray:
        idx = np.flatnonzero(mask)
        return idx[_first_per_row(parents[idx], code_id[idx])]

    def acting(*which: str) -> np.ndarray:
        return np.isin(act, [names.actions.index(a) for a in which if a in names.actions])

    drop = pick(failed & acting("drop"))
    reasons = _lists(parents[drop], reason_of.take(pa.array(code_id[drop])), n)
    mark = pick(failed & (acting(*MARKING) | _equal(codes, OVERRIDE)))
    flags = _lists(parents[mark], codes.take(pa.array(mark)), n)
    red = pick(failed & acting("redact"))
    redacted = _lists(parents[red], codes.take(pa.array(red)), n)
    kept = np.ones(n, bool)
    kept[parents[drop]] = False
    quarantined = np.zeros(n, bool)
    quarantined[parents[failed & acting("quarantine")]] = True
    quarantined &= kept
    first = np.full(n, -1, np.int64)
    if len(drop):
        rows, pos = np.unique(parents[drop], return_index=True)
        first[rows] = drop[pos]
    stopped = recs.field("stage").take(pa.array(first, mask=first < 0))
    return Verdict(kept, quarantined, reasons, flags, redacted, stopped, _lists(parents, recs, n))


LEDGER_CHECK = pa.struct(
    [
        ("stage", pa.string()),
        ("code", pa.string()),
        ("status", pa.string()),  # pass | fail | skipped
        ("action", pa.string()),  # the code's action in this run (null when skipped)
        ("detail", pa.string()),
        ("value", pa.float64()),
        ("threshold", pa.float64()),
        ("op", pa.string()),
        ("unit", pa.string()),
        ("failed", pa.bool_()),
    ]
)

__all__ = ["ACTIONS", "Actions", "actions_for", "LEDGER_CHECK", "MARKING", "Verdict", "alive", "flags_so_far", "rows_with",
           "verdict"]
