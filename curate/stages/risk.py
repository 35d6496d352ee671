"""risk: screening flags from captions and metadata: personal data, location, caption term lists.

Personal data (curate.pii): e-mail addresses and URLs by pattern, phone numbers with
`phonenumbers` (valid numbers only), card numbers with the Luhn check and IBANs with their
MOD 97-10 check digits (`python-stdnum`). By default personal data is redacted in the output
caption (`[email]`, `[phone]`, ...) while the ledger keeps the original for the reviewer;
location metadata is flagged and, like all other metadata, never reaches the shards. The other
risk flags (faces, watermarks, concept probes) come from their own stages.

Flags are screening aids for human review, not guarantees: a pattern finds what looks like an
e-mail or a valid card number and misses what is written some other way. What counts as personal
data, and what you may do with it, differs by jurisdiction: defer to local law and the data's
licences.
"""
from __future__ import annotations

import re
from dataclasses import dataclass, field

import pyarrow as pa

from .. import pii
from ..checks import CHECKS_TYPE, check
from .base import CheckSpec, StageContext, checks_column, stage

NAME = "risk"
VERSION = "3"

RISK_ACTIONS = ("drop", "flag", "keep", "quarantine")


@dataclass
class RiskConfig:
    enabled: bool = True
    # Personal-data kinds looked for in captions: email, phone, card, iban, url.
    pii: list[str] = field(default_factory=lambda: list(pii.KINDS))
    # Regions (ISO 3166-1 alpha-2, e.g. ["GB", "US"]) whose national phone formats count; empty: only
    # numbers written with + and a country code. Each region turns ordinary digit runs into valid
    # numbers (measured with phonenumbers on random 6-12 digit runs: 6% for US, 19% for five regions).
    phone_regions: list[str] = field(default_factory=list)
    # Flag images whose metadata carries GPS coordinates or a place name.
    location: bool = True
    # Named caption term lists: {list name = [words]}; a whole-word hit flags `term:<list name>`.
    terms: dict[str, list[str]] = field(default_factory=dict)
    # Blur every face the faces stage finds in the output shards (Yang et al., ICML 2022: blurring
    # faces costs ImageNet models under one point of accuracy); the ledger keeps the boxes.
    face_blur: bool = False

    def validate(self) -> None:
        pii.check_kinds(self.pii)
        pii.check_regions(self.phone_regions)
        for name, words in self.terms.items():
            if not re.fullmatch(r"[\w.-]+", name):
                raise ValueError(f"term list name {name!r}: use letters, digits, '.', '_' or '-'")
            if not all(isinstance(w, str) and w.strip() for w in words):
                raise ValueError(f"term list {name!r} holds an empty word")


CHECKS = (
    # Redact by default: the sample stays, the output caption loses the personal data (common
    # practice: the picture is usually fine; the text should not teach a model someone's e-mail).
    CheckSpec("pii", "redact", "caption contains what looks like personal data (pii:<kind>); redacted in the "
              "output caption by default", ("drop", "flag", "keep", "quarantine", "redact"), risk=True),
    CheckSpec("location", "flag", "image metadata carries GPS coordinates or a place name (never copied to the "
              "shards)", RISK_ACTIONS, risk=True),
    CheckSpec("term", "flag", "caption contains a word from a configured term list (term:<list>)", RISK_ACTIONS,
              risk=True),
)


@stage(name=NAME, version=VERSION, config=RiskConfig, kind="shard", phase="check",
       wants=("caption", "gps", "place"), checks=CHECKS)
def run(table: pa.Table, cfg: RiskConfig, ctx: StageContext) -> pa.Table:
    """Screening flags: personal data in captions, location metadata, caption term lists."""
    n = table.num_rows
    captions = table.column("caption").to_pylist() if "caption" in table.column_names else [None] * n
    gps = table.column("gps").to_pylist() if "gps" in table.column_names else [None] * n
    place = table.column("place").to_pylist() if "place" in table.column_names else [None] * n
    term_res = {name: re.compile(r"\b(?:" + "|".join(re.escape(w) for w in words) + r")\b", re.I)
                for name, words in cfg.terms.items() if words}
    out = []
    for cap, g, pl in zip(captions, gps, place):
        chks: list[dict] = []
        if cap:
            found: dict[str, str] = {}
            for hit in pii.find_pii(cap, cfg.pii, cfg.phone_regions):
                found.setdefault(hit.kind, hit.text)
            for kind in cfg.pii:
                chks.append(check(f"pii:{kind}", failed=kind in found,
                                  detail=pii.mask(found[kind]) if kind in found else None))
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


def redacted_caption(caption: str, codes: list[str], cfg: RiskConfig) -> str:
    """The output caption with the personal data of the given `pii:<kind>` codes replaced."""
    kinds = [c.split(":", 1)[1] for c in codes if c.startswith("pii:")]
    if not kinds or not caption:
        return caption
    return pii.redact(caption, pii.find_pii(caption, kinds, cfg.phone_regions))
