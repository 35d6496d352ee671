"""The filtering report: one self-contained HTML file (inline PNG charts, no outside CSS/JS/fonts).

Everything shown comes from the ledger, the summary and the resolved config, and nothing
varies between runs (no clock, no paths of this machine), so the same inputs give the same
bytes. Every value from the data (captions, sources, codes) is HTML-escaped.
"""
from __future__ import annotations

import base64
from html import escape
from pathlib import Path
from typing import Any

import pyarrow as pa

from .. import __version__, workdir
from ..checks import format_condition, format_number
from . import plots

EXAMPLES_PER_REASON = 20
CAPTION_CHARS = 120
_CAP = ' class="cap"'

CSS = """
body{margin:0;background:#faf7f2;color:#2b2b2b;font:15px/1.5 system-ui,-apple-system,"Segoe UI",Roboto,
"Noto Sans","Liberation Sans",Arial,sans-serif}
main{max-width:60rem;margin:0 auto;padding:1.5rem 1.25rem 3rem}
h1{font-size:1.6rem;margin:.2rem 0}h2{font-size:1.15rem;margin:2.2rem 0 .5rem;padding-bottom:.2rem;
border-bottom:2px solid #e4ddd2}
.meta,.note{color:#6b645c;font-size:.9rem}
.stats{display:flex;flex-wrap:wrap;gap:.75rem;margin:1rem 0}
.stat{background:#fff;border:1px solid #e4ddd2;border-radius:6px;padding:.6rem 1rem;min-width:8rem}
.stat b{display:block;font-size:1.5rem}
.stat.kept b{color:#2f7f78}.stat.dropped b{color:#c0603a}
img{max-width:100%;height:auto;background:#fff;border:1px solid #e4ddd2;border-radius:4px}
table{border-collapse:collapse;background:#fff;font-size:.88rem;margin:.4rem 0 1rem}
th,td{border:1px solid #e4ddd2;padding:.25rem .55rem;text-align:left;vertical-align:top}
th{background:#f1ece4}td.n{text-align:right;font-variant-numeric:tabular-nums}
td.cap{max-width:24rem;overflow-wrap:anywhere}code{font-size:.85em}
.caution{background:#fff6e8;border-left:4px solid #c0603a;padding:.6rem 1rem}
"""

CAUTION = (
    "Flags (faces, personal data in captions, location metadata, unsafe concepts, watermarks) "
    "are screening aids that point a human reviewer at samples worth a look. They are not "
    "guarantees: a detector misses some cases and raises some false alarms, and a sample "
    "without a flag is not thereby cleared. Rules on privacy, likeness and content differ "
    "from one jurisdiction to another. Defer to the law that applies to you and to the "
    "licences under which the images and captions were obtained."
)


def write_report(out: Path, ledger: pa.Table, summary: dict, cfg: Any) -> Path:
    """Write `out/report.html` atomically and return its path."""
    path = Path(out) / "report.html"
    workdir.write_bytes(path, render(ledger, summary, cfg).encode("utf-8"))
    return path


def render(ledger: pa.Table, summary: dict, cfg: Any) -> str:
    col = {c: ledger.column(c).to_pylist() for c in ("source", "caption", "kept", "reasons", "width", "height",
                                                     "agreement", "group_id", "checks")}
    n, k = summary.get("samples", 0), summary.get("kept", 0)
    body = [
        "<h1>Filtering report</h1>",
        f'<p class="meta">curate {escape(__version__)} &middot; config <code>{escape(_fp(cfg))}</code></p>',
        '<section class="stats">', _stat("samples", n, ""), _stat("kept", k, "kept"),
        _stat("dropped", summary.get("dropped", n - k), "dropped"),
        _stat("kept-pct", f"{100 * k / n:.1f}%" if n else "&mdash;", "", "kept %"), "</section>",
    ]
    body += _stages(n, summary)
    body += _section("Reasons for dropping", plots.counts(summary.get("by_reason", {}), plots.DROPPED, "samples"),
                     "Nothing was dropped.", "A sample can have more than one reason, so the bars can add up "
                     "to more than the dropped count.")
    body += _section("Flags", plots.counts(summary.get("by_flag", {}), plots.KEPT, "samples"),
                     "No sample was flagged.", "Flags mark samples for review; on their own they drop nothing.")
    body += _section("Caption-image agreement", plots.agreement(col["agreement"], col["kept"],
                                                                _thresholds(col["checks"], "agreement_low")),
                     "No agreement scores in this run (the agreement stage did not run or no sample reached it).")
    insp = getattr(cfg, "inspect", None)
    body += _section("Image sizes", plots.sizes(col["width"], col["height"], col["kept"],
                                                getattr(insp, "min_short_side", None),
                                                getattr(insp, "max_aspect", None)),
                     "No decoded image sizes.", "Width and height as displayed, log axes; dashed lines mark the "
                     "minimum short side, dotted lines the largest aspect ratio allowed.")
    body += _section("Near-duplicate groups", plots.group_sizes(col["group_id"]),
                     "No near-duplicate groups: every decoded image stands alone.",
                     f"{summary.get('groups', 0):,} groups in all, counting single images.")
    body += _splits(summary.get("by_split", {}))
    body += _examples(col, summary.get("by_reason", {}))
    body += ["<h2>Cautions</h2>", f'<p class="caution" id="cautions">{escape(CAUTION)}</p>',
             f'<p class="meta">curate version {escape(__version__)}; resolved config fingerprint '
             f"<code>{escape(_fp(cfg))}</code> (see config.resolved.toml beside this file).</p>"]
    return ("<!doctype html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            "<meta name=\"viewport\" content=\"width=device-width,initial-scale=1\">"
            f"<title>curate filtering report</title><style>{CSS}</style></head>\n<body><main>\n"
            + "\n".join(body) + "\n</main></body></html>\n")


def _fp(cfg: Any) -> str:
    try:
        return cfg.fingerprint()
    except AttributeError:
        return "unknown"


def _stat(key: str, value: Any, cls: str, label: str | None = None) -> str:
    v = f"{value:,}" if isinstance(value, int) else str(value)
    return f'<div class="{("stat " + cls).strip()}" id="stat-{key}"><b>{v}</b>{escape(label or key)}</div>'


def _img(png: bytes, alt: str) -> str:
    return f'<img alt="{escape(alt)}" src="data:image/png;base64,{base64.b64encode(png).decode("ascii")}">'


def _section(title: str, png: bytes | None, empty: str, note: str = "") -> list[str]:
    out = [f"<h2>{escape(title)}</h2>"]
    if png is None:
        return out + [f'<p class="note">{escape(empty)}</p>']
    return out + [_img(png, title)] + ([f'<p class="note">{escape(note)}</p>'] if note else [])


def _stages(n: int, summary: dict) -> list[str]:
    by_stage, stopped = summary.get("by_stage", {}), summary.get("stopped_at", {})
    order = list(by_stage) + sorted(s for s in stopped if s not in by_stage)
    out = _section("Where samples stopped", plots.funnel(n, order, stopped), "No samples in this run.",
                   "Each sample is counted once, at the first stage whose check dropped it.")
    if order:
        out.append("<table><tr><th>stage</th><th>checked</th><th>failed a check</th>"
                   "<th>dropped by its checks</th><th>stopped here</th></tr>")
        for st in order:
            d = by_stage.get(st, {})
            out.append(f"<tr><td>{escape(st)}</td>" + "".join(
                f'<td class="n">{v:,}</td>' for v in (d.get("checked", 0), d.get("failed", 0),
                                                      d.get("dropped", 0), stopped.get(st, 0))) + "</tr>")
        out.append("</table>")
    return out


def _splits(by_split: dict) -> list[str]:
    out = ["<h2>Splits</h2>"]
    if not by_split:
        return out + ['<p class="note">No kept samples, so no splits.</p>']
    out.append('<table id="splits"><tr><th>split</th><th>kept samples</th></tr>')
    out += [f'<tr><td>{escape(str(s))}</td><td class="n">{v:,}</td></tr>' for s, v in sorted(by_split.items())]
    return out + ["</table>"]


def _examples(col: dict, by_reason: dict) -> list[str]:
    out = ["<h2>Example drops</h2>"]
    if not by_reason:
        return out + ['<p class="note">Nothing was dropped.</p>']
    out.append(f'<p class="note">Up to {EXAMPLES_PER_REASON} per reason, in ledger order. '
               "<code>curate explain OUT SOURCE</code> shows every check of one sample.</p>")
    out.append('<table id="examples"><tr><th>source</th><th>caption</th><th>reason</th>'
               "<th>value</th><th>passes when</th></tr>")
    for reason in by_reason:
        shown = 0
        for i, kept in enumerate(col["kept"]):
            if shown >= EXAMPLES_PER_REASON:
                break
            if kept or reason not in (col["reasons"][i] or ()):
                continue
            c = next((c for c in col["checks"][i] or () if c["status"] == "fail" and c["code"] == reason), {})
            cap = col["caption"][i]
            cap = "" if cap is None else (cap if len(cap) <= CAPTION_CHARS else cap[: CAPTION_CHARS - 1] + "\u2026")
            value = format_number(c.get("value"), c.get("unit")) if c.get("value") is not None else c.get("detail")
            cells = (col["source"][i], cap, reason, value, format_condition(c) if c else "")
            out.append("<tr>" + "".join(f"<td{_CAP if j == 1 else ''}>{escape('' if v is None else str(v))}</td>"
                                        for j, v in enumerate(cells)) + "</tr>")
            shown += 1
    return out + ["</table>"]


def _thresholds(checks: list, code: str) -> list[float]:
    """Distinct thresholds of the checks with this code (at most 3)."""
    found: set[float] = set()
    for cl in checks:
        for c in cl or ():
            if c["code"] == code and c["threshold"] is not None:
                found.add(float(c["threshold"]))
    return sorted(found)[:3]
