"""Personal data in caption text: find it, redact it, and mask it for reviewers.

Phone numbers come from `phonenumbers` (valid numbers only), card numbers are
checked with the Luhn algorithm and IBANs with their MOD 97-10 check digits and
country formats from `python-stdnum`; e-mail addresses and URLs are found with
regular expressions. Hits are screening aids for human review, not guarantees:
personal data written some other way is missed.
"""
from __future__ import annotations

import re
from collections.abc import Sequence
from dataclasses import dataclass

KINDS = ("email", "phone", "card", "iban", "url")
PLACEHOLDERS = {kind: f"[{kind}]" for kind in KINDS}
# Without a default region only numbers written with "+" and a country code are found. Each
# added region turns many digit runs into valid numbers: on random 6-12 digit runs 6% were
# valid US numbers and 19% valid in one of US, GB, DE, FR or IN (measured with phonenumbers 9).
DEFAULT_REGIONS: tuple[str, ...] = ()

# E-mail: a dot-atom local part (RFC 5322 sec. 3.2.3) narrowed to letters, digits and "%+-_"
# as common practice (the rarer atom characters such as "/" and "=" mostly join words in
# captions) and widened to Unicode letters as RFC 6531 allows; then a dotted host name whose
# last label is alphabetic or an A-label. Length limits: RFC 5321 sec. 4.5.3.1.
_ATOM = r"[\w%+-]"
_LABEL = r"[^\W_](?:[\w-]{0,61}[^\W_])?"
_LOCAL = re.compile(rf"{_ATOM}+(?:\.{_ATOM}+)*\Z")
_HOST = re.compile(rf"(?:{_LABEL}\.)+(?:[^\W\d_]{{2,63}}|xn--[a-z0-9-]{{1,59}})(?![\w-]|\.[^\W_])", re.IGNORECASE)
_LOCAL_MAX, _HOST_MAX = 64, 253
# Scheme or "www." then anything up to white space or a quote/angle bracket (RFC 3986
# appendix C: those delimit URLs in running text); trailing punctuation is trimmed below.
_URL = re.compile(r"(?<![\w@.-])(?:https?://|ftp://|www\.)[^\s<>\"'`]+", re.IGNORECASE)
# Digit runs of 13 to 19 digits, single spaces or hyphens allowed between digits.
_CARD = re.compile(r"(?<!\d)\d(?:[ -]?\d){12,18}(?!\d)")
# Country code and check digits, then alphanumeric groups split by single spaces (the paper
# format of ISO 13616-1 prints groups of four).
_IBAN_START = re.compile(r"(?<![A-Za-z0-9])[A-Za-z]{2}\d{2}")
_IBAN_GROUP = re.compile(r"[A-Za-z0-9]{1,34}")
# A plus sign (ASCII or full width, both read by phonenumbers), a digit, then digits and the
# separators phone numbers are written with; E.164 numbers have at most 15 digits, so 40
# characters hold one with generous separators.
_PLUS_RUN = re.compile(r"[+\uff0b]\d[\d \t().\-/]{0,38}")
_TRAILING = ".,;:!?'\"*"
_PAIRS = {")": "(", "]": "[", "}": "{"}
# Order of preference when two hits of different kinds start at the same place and end at
# the same place (the longer hit wins otherwise): the more specific kind first.
_PRIORITY = {"email": 0, "url": 1, "iban": 2, "card": 3, "phone": 4}


@dataclass(frozen=True)
class PiiHit:
    """One span of personal data: its kind, its [start, end) offsets in the text and the text."""

    kind: str
    start: int
    end: int
    text: str


def check_kinds(kinds: Sequence[str]) -> None:
    """Raise ValueError naming any kind that is not one of KINDS."""
    bad = sorted(set(kinds) - set(KINDS))
    if bad:
        raise ValueError(f"unknown personal-data kinds {bad}; choose from {', '.join(KINDS)}")


def check_regions(regions: Sequence[str]) -> None:
    """Raise ValueError naming any region that phonenumbers does not know (ISO 3166-1 alpha-2)."""
    import phonenumbers

    bad = sorted(r for r in regions if r not in phonenumbers.SUPPORTED_REGIONS)
    if bad:
        raise ValueError(f"unknown phone regions {bad}; use ISO 3166-1 alpha-2 codes such as GB or US")


def is_card_number(digits: str) -> bool:
    """13 to 19 digits passing the Luhn check of ISO/IEC 7812-1 (payment card numbers)."""
    from stdnum import luhn

    return digits.isascii() and digits.isdigit() and 13 <= len(digits) <= 19 and luhn.is_valid(digits)


def is_iban(text: str) -> bool:
    """An IBAN with valid MOD 97-10 check digits and its country's format (ISO 13616), spaces allowed."""
    from stdnum import iban

    compact = text.replace(" ", "")
    return compact.isascii() and compact.isalnum() and 15 <= len(compact) <= 34 and iban.is_valid(compact)


def find_pii(text: str, kinds: Sequence[str] = KINDS, regions: Sequence[str] = DEFAULT_REGIONS) -> list[PiiHit]:
    """Non-overlapping personal-data hits in text order.

    `regions` are the ISO 3166-1 codes whose national formats count for numbers written
    without a country code; a number written with "+" and a country code is found whatever
    they are. Digit groups of a card number or IBAN never also count as a phone number.
    """
    check_kinds(kinds)
    check_regions(regions)
    if not text:
        return []
    found: list[PiiHit] = []
    if "email" in kinds and "@" in text:
        found += list(_emails(text))
    if "url" in kinds:
        found += list(_urls(text))
    numbers: list[PiiHit] = []
    if "card" in kinds:
        numbers += list(_cards(text))
    if "iban" in kinds:
        numbers += list(_ibans(text))
    found += numbers
    if "phone" in kinds:
        found += [h for h in _phones(text, regions)
                  if not any(h.start < n.end and n.start < h.end for n in numbers)]
    return _leftmost_longest(found)


def redact(text: str, hits: Sequence[PiiHit]) -> str:
    """Replace each hit with its placeholder ("[email]", "[phone]", ...); overlapping hits merge."""
    spans: list[list] = []
    for h in sorted(hits, key=lambda h: (h.start, -h.end)):
        if not (0 <= h.start <= h.end <= len(text)) or text[h.start:h.end] != h.text:
            raise ValueError(f"hit {h.kind} at {h.start}:{h.end} does not match the text")
        if h.kind not in PLACEHOLDERS:
            raise ValueError(f"unknown personal-data kind {h.kind!r}")
        if spans and h.start < spans[-1][1]:
            spans[-1][1] = max(spans[-1][1], h.end)
        else:
            spans.append([h.start, h.end, h.kind])
    out, pos = [], 0
    for start, end, kind in spans:
        out += [text[pos:start], PLACEHOLDERS[kind]]
        pos = end
    out.append(text[pos:])
    return "".join(out)


def mask(text: str) -> str:
    """Keep a fifth of the characters at each end (at most three) so a reviewer can find the value."""
    t = text.strip()
    keep = min(3, len(t) // 5)
    return t[:keep] + "…" + (t[-keep:] if keep else "")


def _emails(text: str):
    # Anchored on each "@" with both sides bounded by their length limits, so the work stays
    # linear in the text length whatever the text is.
    at = text.find("@")
    while at >= 0:
        lo = max(0, at - _LOCAL_MAX)
        local = _LOCAL.search(text, lo, at)
        host = _HOST.match(text, at + 1, min(len(text), at + 2 + _HOST_MAX))
        if local and host and len(host.group()) <= _HOST_MAX:
            start = local.start()
            if not (start == lo and lo > 0 and re.match(r"[\w%+.-]", text[lo - 1])):  # local part too long
                yield PiiHit("email", start, host.end(), text[start:host.end()])
                at = text.find("@", host.end())
                continue
        at = text.find("@", at + 1)


def _urls(text: str):
    for m in _URL.finditer(text):
        s = m.group()
        while s:
            if s[-1] in _TRAILING:
                s = s[:-1]
            elif s[-1] in _PAIRS and s.count(s[-1]) > s.count(_PAIRS[s[-1]]):
                s = s[:-1]  # a closing bracket with no opening one belongs to the sentence
            else:
                break
        if _URL.fullmatch(s):
            yield PiiHit("url", m.start(), m.start() + len(s), s)


def _ibans(text: str):
    for m in _IBAN_START.finditer(text):
        ends, n, pos = [], 0, m.start()
        # Collect the groups that could still belong to one IBAN (34 characters at most), then
        # try the longest first: the run may have taken the words after the IBAN.
        while (g := _IBAN_GROUP.match(text, pos)) is not None and n + len(g.group()) <= 34:
            if g.end() < len(text) and text[g.end()].isalnum():
                break  # a group longer than an IBAN can hold
            n += len(g.group())
            ends.append((g.end(), n))
            if text[g.end():g.end() + 1] != " ":
                break
            pos = g.end() + 1
        for end, count in reversed(ends):
            if count < 15:
                break
            if is_iban(text[m.start():end]):
                yield PiiHit("iban", m.start(), end, text[m.start():end])
                break


def _cards(text: str):
    for m in _CARD.finditer(text):
        s = m.group()
        # Try the whole run, then shorter runs ending at a separator: a card number may be
        # followed by another group of digits.
        cuts = [len(s)] + [i for i in range(len(s) - 1, 0, -1) if s[i] in " -"]
        for cut in cuts:
            digits = re.sub(r"[ -]", "", s[:cut])
            if len(digits) < 13:
                break
            if is_card_number(digits):
                yield PiiHit("card", m.start(), m.start() + cut, s[:cut])
                break


def _phones(text: str, regions: Sequence[str]):
    import phonenumbers

    if sum(c.isdigit() for c in text) < 4:  # the shortest national numbers have 4 digits (ITU-T E.164)
        return
    found: list[PiiHit] = []
    valid = phonenumbers.Leniency.VALID  # the number must be valid for its region, not only possible
    for region in tuple(regions) or (None,):
        found += [_phone_hit(m) for m in phonenumbers.PhoneNumberMatcher(text, region, leniency=valid)
                  if phonenumbers.is_valid_number(m.number)]
    # The matcher misses a "+" number that it reads as one candidate with text around it, e.g.
    # "(X +1 ..." or a number followed by another digit group: look again from each "+" that no
    # hit covers, at every white-space boundary of the digits and separators after it.
    for m in _PLUS_RUN.finditer(text):
        if any(h.start <= m.start() < h.end for h in found):
            continue
        run = m.group()
        cuts = [i for i in range(len(run), 1, -1) if (i == len(run) or run[i].isspace()) and run[i - 1].isdigit()]
        for cut in cuts:
            try:
                number = phonenumbers.parse(run[:cut], None)
            except phonenumbers.NumberParseException:
                continue
            if phonenumbers.is_valid_number(number):
                found.append(PiiHit("phone", m.start(), m.start() + cut, run[:cut]))
                break
    yield from found


def _phone_hit(m) -> PiiHit:
    raw, start = m.raw_string, m.start
    if raw.startswith("(") and ")" not in raw:  # an opening bracket of the sentence, not an area code
        cut = len(raw) - len(raw[1:].lstrip())
        raw, start = raw[cut:], start + cut
    return PiiHit("phone", start, start + len(raw), raw)


def _leftmost_longest(hits: list[PiiHit]) -> list[PiiHit]:
    out: list[PiiHit] = []
    for h in sorted(hits, key=lambda h: (h.start, -h.end, _PRIORITY[h.kind])):
        if not out or h.start >= out[-1].end:
            out.append(h)
    return out
