"""The verdict, computed in one place: which failed checks drop a sample, flag it, quarantine it.

Every registered stage declares its reason codes with a default action; the
`[decide] actions` table overrides them, by exact code (`"pii:email"`) or by
family (`pii`). The runner asks this module which samples are still alive
before each stage that sees only live samples, and the ledger asks it for
each sample's reasons and flags. Nothing else decides.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, Iterable, Sequence

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from .checks import ACTIONS, family
from .errors import ConfigError
from .stages.base import CheckSpec, spec_for

# Actions under which a failed check keeps the sample but marks it.
MARKING = ("flag", "quarantine", "redact")
# A reviewer's keep: it lifts every drop whose code may be kept (not the ones that make an image unusable).
OVERRIDE = "review_keep"


class Actions:
    """Each reason code's action: an override by exact code, else by family, else the default."""

    def __init__(self, specs: dict[str, CheckSpec], overrides: dict[str, str] | None = None):
        self.specs = specs
        self.overrides = dict(overrides or {})
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
            act = self.overrides.get(code) or self.overrides.get(family(code))
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


def _failed_rows(checks: pa.ChunkedArray | pa.Array, actions: Actions, action: str,
                 which: Callable[[str], bool] | None = None) -> np.ndarray:
    """Row indices with at least one failed check whose action is `action` (and whose code `which` accepts)."""
    arr = checks.combine_chunks() if isinstance(checks, pa.ChunkedArray) else checks
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
    """The outcome for every sample, from every stage's checks in plan order."""

    kept: list[bool]
    reasons: list[list[str]]
    flags: list[list[str]]
    quarantined: list[bool]
    redacted: list[list[str]]
    stopped_at: list[str | None]
    records: list[list[dict]]  # every check: stage, status, action and the record's fields


def verdict(stage_checks: Sequence[tuple[str, list]], skipped: dict[str, np.ndarray], skip_codes: dict[str, list[str]],
            actions: Actions, n: int) -> Verdict:
    """`stage_checks`: (stage, per-row check lists) in plan order. `skipped[stage]`: rows the stage did not
    see because an earlier check dropped them; `skip_codes[stage]`: that stage's codes, listed as skipped."""
    v = Verdict([True] * n, [[] for _ in range(n)], [[] for _ in range(n)], [False] * n, [[] for _ in range(n)],
                [None] * n, [[] for _ in range(n)])
    reviewed_keep = [any(c["failed"] and c["code"] == OVERRIDE for _, lists in stage_checks for c in lists[i] or ())
                     for i in range(n)]
    for stage, lists in stage_checks:
        skip = skipped.get(stage)
        for i in range(n):
            if skip is not None and skip[i]:
                first = v.reasons[i][0] if v.reasons[i] else None
                for code in skip_codes.get(stage, ()):
                    v.records[i].append(_skipped(stage, code, first))
                continue
            for c in lists[i] or ():
                act = actions.action(c["code"])
                if c["failed"] and act == "drop" and reviewed_keep[i] and actions.overridable(c["code"]):
                    act = "overridden"  # a reviewer kept the sample despite this check
                v.records[i].append({"stage": stage, **c, "status": "fail" if c["failed"] else "pass",
                                     "action": act})
                if c["failed"] and c["code"] == OVERRIDE and OVERRIDE not in v.flags[i]:
                    v.flags[i].append(OVERRIDE)
                if not c["failed"] or act in ("keep", "overridden"):
                    continue
                if act == "drop":
                    reason = actions.reason(c["code"])
                    if reason not in v.reasons[i]:
                        v.reasons[i].append(reason)
                    v.kept[i] = False
                    v.stopped_at[i] = v.stopped_at[i] or stage
                elif c["code"] not in v.flags[i]:
                    v.flags[i].append(c["code"])
                    if act == "quarantine":
                        v.quarantined[i] = True
                    elif act == "redact":
                        v.redacted[i].append(c["code"])
    for i in range(n):
        if not v.kept[i]:
            v.quarantined[i] = False
    return v


def _skipped(stage: str, code: str, because: str | None) -> dict:
    return {"stage": stage, "code": code, "detail": f"not checked: dropped earlier ({because})" if because else
            "not checked: dropped earlier", "value": None, "threshold": None, "op": None, "unit": None,
            "failed": False, "status": "skipped", "action": None}


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

__all__ = ["ACTIONS", "Actions", "LEDGER_CHECK", "MARKING", "Verdict", "alive", "flags_so_far", "rows_with",
           "verdict"]
