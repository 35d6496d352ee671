"""risk: screening flags for human review (personal data in captions, location metadata, term lists).

Flags never drop a sample by default; the `[decide] actions` table can turn any
of them into a drop. They are screening aids, not guarantees: a regex finds
what looks like an e-mail or a valid card number, and misses what is written
some other way. Privacy rules differ by jurisdiction.
"""
from __future__ import annotations

import re
from dataclasses import dataclass, field

import pyarrow as pa

from ..checks import CHECKS_TYPE, check
from .base import CheckSpec, StageContext, checks_column, stage

NAME = "risk"
VERSION = "2"


@dataclass
class RiskConfig:
    enabled: bool = True
    # Personal-data patterns looked for in captions: email, phone, card, iban, url.
    pii: list[str] = field(default_factory=lambda: ["email", "phone", "card", "iban", "url"])
    # Flag images whose metadata carries GPS coordinates or a place name.
    location: bool = True
    # Named caption term lists: {list name = [words]}; a whole-word hit flags `term:<list name>`.
    terms: dict[str, list[str]] = field(default_factory=dict)

    def validate(self) -> None:
        bad = set(self.pii) - set(PII_KINDS)
        if bad:
            raise ValueError(f"unknown pii kinds {sorted(bad)}; choose from {', '.join(PII_KINDS)}")


CHECKS = (
    CheckSpec("pii", "flag", "caption contains what looks like personal data (pii:<kind>)"),
    CheckSpec("location", "flag", "image metadata carries GPS coordinates or a place name"),
    CheckSpec("term", "flag", "caption contains a word from a configured term list (term:<list>)"),
)

_EMAIL = re.compile(r"(?<![\w.+-])[\w.+-]{1,64}@[A-Za-z0-9-]{1,63}(?:\.[A-Za-z0-9-]{1,63})*\.[A-Za-z]{2,24}\b")
# International or national numbers with 7-15 digits in groups (ITU-T E.164 allows at most 15 digits).
_PHONE = re.compile(r"(?<![\w+])(?:\+\d{1,3}[\s.-]?)?(?:\(\d{1,4}\)[\s.-]?)?\d{2,4}(?:[\s.-]\d{2,4}){1,4}(?!\w)")
_CARD = re.compile(r"(?<!\d)(?:\d[ -]?){12,18}\d(?!\d)")
_IBAN = re.compile(r"\b[A-Z]{2}\d{2}(?: ?[A-Z0-9]{1,4}){3,8}\b")
_URL = re.compile(r"\b(?:https?://|www\.)[^\s<>\"]+", re.I)


def luhn_valid(digits: str) -> bool:
    """Luhn check (ISO/IEC 7812-1 Annex B)."""
    total = 0
    for i, ch in enumerate(reversed(digits)):
        d = ord(ch) - 48
        if i % 2 == 1:
            d *= 2
            if d > 9:
                d -= 9
        total += d
    return total % 10 == 0


def iban_valid(text: str) -> bool:
    """IBAN check digits: ISO 13616 with MOD 97-10 of ISO/IEC 7064."""
    s = re.sub(r"\s+", "", text).upper()
    if not re.fullmatch(r"[A-Z]{2}\d{2}[A-Z0-9]{11,30}", s):
        return False
    moved = s[4:] + s[:4]
    num = "".join(str(int(c, 36)) for c in moved)
    return int(num) % 97 == 1


def find_pii(text: str, kinds: list[str]) -> list[tuple[str, str]]:
    """(kind, matched text) for each personal-data pattern found."""
    hits: list[tuple[str, str]] = []
    if "email" in kinds:
        hits += [("email", m.group()) for m in _EMAIL.finditer(text)]
    card_spans: list[tuple[int, int]] = []  # card and IBAN spans: their digit groups are not phones
    if "card" in kinds:
        for m in _CARD.finditer(text):
            digits = re.sub(r"\D", "", m.group())
            if 13 <= len(digits) <= 19 and luhn_valid(digits):
                hits.append(("card", m.group()))
                card_spans.append(m.span())
    if "iban" in kinds:
        for m in _IBAN.finditer(text):
            if iban_valid(m.group()):
                hits.append(("iban", m.group()))
                card_spans.append(m.span())
    if "phone" in kinds:
        for m in _PHONE.finditer(text):
            digits = re.sub(r"\D", "", m.group())
            inside_card = any(a <= m.start() < b for a, b in card_spans)
            if 7 <= len(digits) <= 15 and not inside_card and not re.fullmatch(r"(19|20)\d{2}", digits):
                hits.append(("phone", m.group()))
    if "url" in kinds:
        hits += [("url", m.group()) for m in _URL.finditer(text)]
    return hits


PII_KINDS = ("email", "phone", "card", "iban", "url")


@stage(name=NAME, version=VERSION, config=RiskConfig, kind="shard", phase="check",
       wants=("caption", "gps", "place"), checks=CHECKS)
def run(table: pa.Table, cfg: RiskConfig, ctx: StageContext) -> pa.Table:
    """Screening flags: personal data in captions, location metadata, caption term lists."""
    captions = table.column("caption").to_pylist() if "caption" in table.column_names else [None] * table.num_rows
    gps = table.column("gps").to_pylist() if "gps" in table.column_names else [None] * table.num_rows
    place = table.column("place").to_pylist() if "place" in table.column_names else [None] * table.num_rows
    term_res = {name: re.compile(r"\b(?:" + "|".join(re.escape(w) for w in words) + r")\b", re.I)
                for name, words in cfg.terms.items() if words}
    out = []
    for cap, g, pl in zip(captions, gps, place):
        chks: list[dict] = []
        if cap:
            found: dict[str, str] = {}
            for kind, text in find_pii(cap, cfg.pii):
                found.setdefault(kind, text)
            for kind in cfg.pii:
                chks.append(check(f"pii:{kind}", failed=kind in found, detail=_mask(found.get(kind))))
            for name, rx in term_res.items():
                m = rx.search(cap)
                chks.append(check(f"term:{name}", failed=m is not None, detail=m.group() if m else None))
        if cfg.location and g is not None:
            where = "GPS coordinates" if g else (pl or None)
            chks.append(check("location", failed=bool(g or pl), detail=where))
        out.append(chks)
        if ctx.progress is not None:
            ctx.progress.advance(1)
    return pa.table({"sample_id": table.column("sample_id"), checks_column(NAME): pa.array(out, type=CHECKS_TYPE)})


def _mask(text: str | None) -> str | None:
    """Show enough of a hit for a reviewer to find it, not the whole value."""
    if text is None:
        return None
    t = text.strip()
    return t if len(t) <= 6 else t[:3] + "…" + t[-2:]
