"""Turn check records into verdicts: which failed checks drop a sample, which only flag it.

Every registered stage declares its reason codes with a default action; the
`[decide] actions` table overrides them per code. The ledger gets all reasons
of a sample, not just the first.
"""
from __future__ import annotations

from typing import TYPE_CHECKING, Iterable

if TYPE_CHECKING:  # stages import this module, so nothing from stages is imported at load time
    from .stages.base import CheckSpec


def base_code(code: str) -> str:
    """Reason codes may carry a detail after ':' (e.g. 'agreement_low:absolute<0.28')."""
    return code.split(":", 1)[0]


def action_for(code: str, specs: "dict[str, CheckSpec]", overrides: dict[str, str]) -> str:
    b = base_code(code)
    if b in overrides:
        return overrides[b]
    spec = specs.get(b)
    return spec.action if spec is not None else "drop"


def verdict(
    check_lists: Iterable[list[dict] | None],
    specs: "dict[str, CheckSpec]",
    overrides: dict[str, str],
    *,
    skip_codes: frozenset[str] = frozenset(),
) -> tuple[list[str], list[str]]:
    """(reasons, flags) from a sample's check lists, in stage order, without repeats."""
    reasons: list[str] = []
    flags: list[str] = []
    for checks in check_lists:
        for c in checks or ():
            if not c["failed"] or base_code(c["code"]) in skip_codes:
                continue
            act = action_for(c["code"], specs, overrides)
            target = reasons if act == "drop" else flags if act == "flag" else None
            if target is not None and c["code"] not in target:
                target.append(c["code"])
    return reasons, flags
