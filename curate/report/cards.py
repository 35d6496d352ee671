"""Sample cards: a thumbnail with its caption, key values and sample_id, as escaped HTML.

Shared by the report and the review sheet. Every value from the data goes through `text`,
which HTML-escapes it (quotes included, so it is safe inside attributes too) and replaces
control characters and unpaired surrogates, so no caption, file name or metadata can add
markup to the page.
"""
from __future__ import annotations

import base64
import re
from html import escape
from typing import Any, Iterable

CAPTION_CHARS = 140  # caption characters shown on a card; the full caption is in its tooltip
# C0/C1 controls (ECMA-48) and the bidirectional embedding, override and isolate controls, which
# reorder how text is shown (Unicode UAX #9); tab and newline stay.
_CONTROL = re.compile("[\x00-\x08\x0b-\x1f\x7f-\x9f\u202a-\u202e\u2066-\u2069]")

CSS = """
.cards{display:grid;grid-template-columns:repeat(auto-fill,minmax(10.5rem,1fr));gap:.7rem;margin:.5rem 0 1rem}
.card{margin:0;background:#fff;border:1px solid #e4ddd2;border-radius:6px;overflow:hidden;font-size:.78rem;
line-height:1.35;display:flex;flex-direction:column}
.card .pic{height:148px;display:flex;align-items:center;justify-content:center;background:#f1ece4}
.card .pic img{max-width:100%;max-height:148px;border:0;border-radius:0;background:none}
.card .nopic{color:#8a8278;font-style:italic}
.card figcaption{padding:.35rem .5rem .5rem}
.card .cap{margin:0 0 .3rem;overflow-wrap:anywhere}.card .cap.none{color:#8a8278;font-style:italic}
.card dl{margin:0}.card dl div{margin:0 0 .1rem;overflow-wrap:anywhere}
.card dt{display:inline;color:#6b645c}.card dt::after{content:": "}
.card dd{display:inline;margin:0;font-variant-numeric:tabular-nums}
.card .sid{margin:.3rem 0 0;font-family:ui-monospace,"DejaVu Sans Mono",monospace;font-size:.72rem;
color:#4a4540;overflow-wrap:anywhere}
.card .src{margin:0;color:#6b645c;font-size:.72rem;overflow-wrap:anywhere}
.badge{display:inline-block;font-size:.68rem;font-weight:600;letter-spacing:.02em;padding:0 .35rem;
border-radius:3px;margin-bottom:.25rem}
.card.kept{border-top:4px solid #2f7f78}.card.kept .badge{background:#dcefed;color:#1f5e58}
.card.dropped{border-top:4px solid #c0603a}.card.dropped .badge{background:#f6e1d8;color:#8f3f1f}
.card.quarantine{border-top:4px solid #8a6d1f}.card.quarantine .badge{background:#f3ead0;color:#6b5514}
"""


def text(v: Any) -> str:
    """Any value as HTML text: escaped (quotes too); control and bidi-override characters and lone
    surrogates replaced by U+FFFD."""
    s = "" if v is None else str(v)
    s = s.encode("utf-8", "replace").decode("utf-8")
    return escape(_CONTROL.sub("\ufffd", s), quote=True)


def short(v: Any, n: int) -> str:
    s = "" if v is None else str(v)
    return s if len(s) <= n else s[: n - 1] + "\u2026"


def jpeg_src(data: bytes) -> str:
    return "data:image/jpeg;base64," + base64.b64encode(data).decode("ascii")


def card(row: dict, thumb: bytes | None, facts: Iterable[tuple[str, Any]] = (), *, badge: str = "",
         state: str = "") -> str:
    """One sample: picture, badge, caption, (label, value) facts, sample_id and source."""
    sid, cap = row.get("sample_id"), row.get("caption")
    pic = (f'<img alt="sample {text(sid)}" src="{jpeg_src(thumb)}">' if thumb
           else '<span class="nopic">no preview</span>')
    if cap is None or cap == "":
        capline = '<p class="cap none">(no caption)</p>'
    else:
        capline = f'<p class="cap" title="{text(short(cap, 1000))}">{text(short(cap, CAPTION_CHARS))}</p>'
    dl = "".join(f"<div><dt>{text(k)}</dt><dd>{text(v)}</dd></div>" for k, v in facts if v not in (None, ""))
    return (f'<figure class="card {text(state)}" data-sample="{text(sid)}"><div class="pic">{pic}</div><figcaption>'
            + (f'<span class="badge">{text(badge)}</span>' if badge else "")
            + capline + (f"<dl>{dl}</dl>" if dl else "")
            + f'<p class="sid">{text(sid)}</p><p class="src">{text(row.get("source"))}</p></figcaption></figure>')


def size_text(row: dict) -> str:
    w, h = row.get("width"), row.get("height")
    return f"{w}\u00d7{h}" if w and h else ""


def number(v: Any, digits: int = 3) -> str:
    if v is None:
        return ""
    f = float(v)
    if f != f:
        return ""
    return str(int(f)) if f.is_integer() and abs(f) < 1e15 else f"{f:.{digits}f}"
