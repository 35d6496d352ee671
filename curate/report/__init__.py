"""The filtering report: one self-contained HTML file (inline PNG charts and JPEG thumbnails, no
script, no outside CSS, fonts or links), readable offline.

Everything shown comes from the ledger, the summary, the resolved config and the run facts
passed in, so the same inputs give the same bytes. Every value from the data (captions,
sources, codes, metadata) is HTML-escaped. Work grows with the ledger only through vectorised
Arrow/numpy passes; thumbnails are sampled (smallest sample_ids, a spread over the corpus) and
capped, and charts are drawn from sampled points or binned counts, so the file stays small at
any corpus size.
"""
from __future__ import annotations

import base64
import dataclasses
from html import escape
from pathlib import Path
from typing import Any, Callable

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from .. import __version__, workdir
from ..checks import format_condition, format_number
from . import cards, images, plots, svg, whatif
from .cards import text

THUMBS_PER_CODE = 8  # thumbnails per reason and per flag (common practice: a glance, not an audit)
QUARANTINE_THUMBS = 16  # thumbnails of the quarantine set
GROUPS_SHOWN = 8  # largest near-duplicate groups drawn side by side
MEMBERS_PER_GROUP = 6  # members drawn per group (keeper first, then the closest copies)
MAX_THUMBS = 400  # thumbnails in the whole page: about 4-6 KB each, so under ~2.5 MB of pictures

CSS = """
body{margin:0;background:#faf7f2;color:#2b2b2b;font:15px/1.5 system-ui,-apple-system,"Segoe UI",Roboto,
"Noto Sans","Liberation Sans",Arial,sans-serif}
main{max-width:68rem;margin:0 auto;padding:1.5rem 1.25rem 3rem}
h1{font-size:1.6rem;margin:.2rem 0}h2{font-size:1.15rem;margin:2.2rem 0 .5rem;padding-bottom:.2rem;
border-bottom:2px solid #e4ddd2}h3{font-size:.98rem;margin:1.2rem 0 .2rem}
h3 code{background:#f1ece4;padding:0 .3rem;border-radius:3px}
.meta,.note{color:#6b645c;font-size:.9rem}
nav.toc{font-size:.88rem;margin:.6rem 0 0;display:flex;flex-wrap:wrap;gap:.2rem .9rem}
nav.toc a{color:#2f5f7f}
.stats{display:flex;flex-wrap:wrap;gap:.75rem;margin:1rem 0}
.stat{background:#fff;border:1px solid #e4ddd2;border-radius:6px;padding:.6rem 1rem;min-width:8rem}
.stat b{display:block;font-size:1.5rem}
.stat.kept b{color:#2f7f78}.stat.dropped b{color:#c0603a}
img{max-width:100%;height:auto;background:#fff;border:1px solid #e4ddd2;border-radius:4px}
table{border-collapse:collapse;background:#fff;font-size:.85rem;margin:.4rem 0 1rem}
th,td{border:1px solid #e4ddd2;padding:.22rem .5rem;text-align:left;vertical-align:top}
th{background:#f1ece4}td.n{text-align:right;font-variant-numeric:tabular-nums}
td.cap{max-width:24rem;overflow-wrap:anywhere}td.why{max-width:30rem;color:#4a4540}code{font-size:.85em}
td.changed{background:#fff6e8}
.caution{background:#fff6e8;border-left:4px solid #c0603a;padding:.6rem 1rem}
.whatif{display:grid;grid-template-columns:repeat(auto-fill,minmax(21rem,1fr));gap:1rem}
.whatif figure{margin:0;background:#fff;border:1px solid #e4ddd2;border-radius:6px;padding:.5rem}
.whatif figure svg{width:100%;height:auto;display:block}.whatif table{margin:.3rem 0 0;width:100%}
.whatif figcaption{font-size:.8rem;color:#6b645c}
.group{background:#fff;border:1px solid #e4ddd2;border-radius:6px;padding:.5rem .7rem;margin:.6rem 0 1rem}
.group .cards{grid-auto-flow:column;grid-auto-columns:10.5rem;grid-template-columns:none;overflow-x:auto}
.digest{font-family:ui-monospace,"DejaVu Sans Mono",monospace;font-size:.78rem;overflow-wrap:anywhere}
""" + cards.CSS

CAUTION = (
    "Flags (faces, personal data in captions, location metadata, unsafe concepts, watermarks) "
    "are screening aids that point a human reviewer at samples worth a look. They are not "
    "guarantees: a detector misses some cases and raises some false alarms, and a sample "
    "without a flag is not thereby cleared. Face detection in particular misses small, turned "
    "and partly hidden faces, and detectors fail more often for some groups of people than for "
    "others. Rules on privacy, consent, likeness and content differ from one jurisdiction to "
    "another. Defer to the law that applies to you, to the consent of the people shown and to "
    "the licences under which the images and captions were obtained."
)

ImageLoader = Callable[[list[str]], list["bytes | None"]]


def write_report(out: Path, ledger: pa.Table, summary: dict, cfg: Any, *, load_images: ImageLoader | None = None,
                 facts: dict | None = None) -> Path:
    """Write `out/report.html` atomically and return its path.

    load_images: sample_ids -> image bytes (None where unreadable), for thumbnails; without it the
    cards show no picture. facts: run facts (see `run_facts`)."""
    path = Path(out) / "report.html"
    workdir.write_bytes(path, render(ledger, summary, cfg, load_images=load_images, facts=facts).encode("utf-8"))
    return path


def run_facts(out: str | Path, manifest: dict | None = None) -> dict:
    """The facts a report shows about a run: each stage's identity (model, weights digest, library
    versions) and its time and work from `work/state.json`."""
    import json

    out = Path(out)
    if manifest is None:
        try:
            manifest = json.loads((out / "manifest.json").read_text(encoding="utf-8"))
        except (OSError, ValueError):
            manifest = {}
    try:
        state = json.loads((out / "work" / "state.json").read_text(encoding="utf-8"))
    except (OSError, ValueError):
        state = {}
    return {"stages": manifest.get("stages", {}), "state": state.get("stages", {}),
            "run_fingerprint": manifest.get("run_fingerprint")}


# --------------------------------------------------------------------------- page


def render(ledger: pa.Table, summary: dict, cfg: Any, *, load_images: ImageLoader | None = None,
           facts: dict | None = None) -> str:
    facts = facts or {}
    led = _Ledger(ledger)
    rec = whatif.flatten(ledger)
    n, k = summary.get("samples", ledger.num_rows), summary.get("kept", 0)
    picks = _Picks(led, summary)
    thumbs, thumb_note = images.thumbnails(load_images, picks.ids())
    body = [
        "<h1>Filtering report</h1>",
        f'<p class="meta">curate {text(__version__)} &middot; config <code>{text(_fp(cfg))}</code></p>',
        '<nav class="toc">' + "".join(f'<a href="#{a}">{escape(t)}</a>' for a, t in _TOC) + "</nav>",
        '<section class="stats">', _stat("samples", n, ""), _stat("kept", k, "kept"),
        _stat("dropped", summary.get("dropped", n - k), "dropped"),
        _stat("kept-pct", f"{100 * k / n:.1f}%" if n else "&mdash;", "", "kept %"), "</section>",
    ]
    if thumb_note:
        body.append(f'<p class="note">No thumbnails: {text(thumb_note)}.</p>')
    body += _facts_section(cfg, facts)
    body += _stages(n, summary)
    body += _section("Reasons for dropping", plots.counts(summary.get("by_reason", {}), plots.DROPPED, "samples"),
                     "Nothing was dropped.", "A sample can have more than one reason, so the bars can add up "
                     "to more than the dropped count.", anchor="reasons")
    body += _drops(picks, thumbs, summary)
    body += _section("Flags", plots.counts(summary.get("by_flag", {}), plots.KEPT, "samples"),
                     "No sample was flagged.", "Flags mark samples for review; on their own they drop nothing.",
                     anchor="flags")
    body += _flagged(picks, thumbs, summary)
    body += _quarantine(picks, thumbs)
    body += _groups(picks, thumbs, summary)
    body += _whatif(rec, ledger)
    agree_thr = thresholds(rec, "agreement_low")
    body += _section("Caption-image agreement", plots.agreement(led.floats("agreement"), led.kept, agree_thr),
                     "No agreement scores in this run (the agreement stage did not run or no sample reached it).",
                     anchor="agreement")
    insp = getattr(cfg, "inspect", None)
    body += _section("Image sizes", plots.sizes(led.floats("width"), led.floats("height"), led.kept,
                                                getattr(insp, "min_short_side", None),
                                                getattr(insp, "max_aspect", None)),
                     "No decoded image sizes.", "Width and height as displayed, log axes; dashed lines mark the "
                     "minimum short side, dotted lines the largest aspect ratio allowed."
                     + (f" {plots.SCATTER_MAX:,} points drawn, sampled evenly." if n > plots.SCATTER_MAX else ""),
                     anchor="sizes")
    body += _splits(summary.get("by_split", {}))
    body += _config_section(cfg)
    body += ['<h2 id="cautions-h">Cautions</h2>', f'<p class="caution" id="cautions">{escape(CAUTION)}</p>',
             f'<p class="meta">curate version {escape(__version__)}; resolved config fingerprint '
             f"<code>{text(_fp(cfg))}</code> (see config.resolved.toml beside this file).</p>"]
    return ("<!doctype html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            "<meta name=\"viewport\" content=\"width=device-width,initial-scale=1\">"
            f"<title>curate filtering report</title><style>{CSS}</style></head>\n<body><main>\n"
            + "\n".join(body) + "\n</main></body></html>\n")


_TOC = [("facts", "Run facts"), ("stopped", "Where samples stopped"), ("reasons", "Reasons"),
        ("drops", "Dropped samples"), ("flags", "Flags"), ("flagged", "Flagged samples"),
        ("quarantine", "Quarantine"), ("groups", "Near-duplicate groups"), ("whatif", "What-if curves"),
        ("agreement", "Agreement"), ("sizes", "Image sizes"), ("splits-h", "Splits"), ("config", "Config"),
        ("cautions-h", "Cautions")]


def thresholds(rec: whatif.Records, code: str) -> list[float]:
    """Distinct thresholds the records of one code carry (at most 3, smallest first)."""
    return sorted({float(t) for t in rec.threshold[(rec.code == code) & ~np.isnan(rec.threshold)]})[:3]


def _fp(cfg: Any) -> str:
    try:
        return cfg.fingerprint()
    except AttributeError:
        return "unknown"


def _stat(key: str, value: Any, cls: str, label: str | None = None) -> str:
    v = f"{value:,}" if isinstance(value, int) else str(value)
    return f'<div class="{("stat " + cls).strip()}" id="stat-{key}"><b>{v}</b>{escape(label or key)}</div>'


def _png(png: bytes, alt: str) -> str:
    return f'<img alt="{text(alt)}" src="data:image/png;base64,{base64.b64encode(png).decode("ascii")}">'


def _section(title: str, png: bytes | None, empty: str, note: str = "", anchor: str = "") -> list[str]:
    out = [(f'<h2 id="{anchor}">' if anchor else "<h2>") + f"{escape(title)}</h2>"]
    if png is None:
        return out + [f'<p class="note">{escape(empty)}</p>']
    return out + [_png(png, title)] + ([f'<p class="note">{escape(note)}</p>'] if note else [])


def _stages(n: int, summary: dict) -> list[str]:
    by_stage, stopped = summary.get("by_stage", {}), summary.get("stopped_at", {})
    order = list(by_stage) + sorted(s for s in stopped if s not in by_stage)
    out = _section("Where samples stopped", plots.funnel(n, order, stopped), "No samples in this run.",
                   "Each sample is counted once, at the first stage whose check dropped it.", anchor="stopped")
    if order:
        out.append("<table><tr><th>stage</th><th>checked</th><th>failed a check</th>"
                   "<th>dropped by its checks</th><th>stopped here</th></tr>")
        for st in order:
            d = by_stage.get(st, {})
            out.append(f"<tr><td>{text(st)}</td>" + "".join(
                f'<td class="n">{v:,}</td>' for v in (d.get("checked", 0), d.get("failed", 0),
                                                      d.get("dropped", 0), stopped.get(st, 0))) + "</tr>")
        out.append("</table>")
    return out


def _splits(by_split: dict) -> list[str]:
    out = ['<h2 id="splits-h">Splits</h2>']
    if not by_split:
        return out + ['<p class="note">No kept samples, so no splits.</p>']
    out.append('<table id="splits"><tr><th>split</th><th>kept samples</th></tr>')
    out += [f'<tr><td>{text(s)}</td><td class="n">{v:,}</td></tr>' for s, v in sorted(by_split.items())]
    return out + ["</table>"]


# --------------------------------------------------------------------------- ledger access


class _Ledger:
    """Vectorised views of the ledger columns the report needs (absent columns read as empty)."""

    def __init__(self, t: pa.Table):
        self.t, self.n = t, t.num_rows
        self.kept = self.bools("kept")
        sid = t.column("sample_id") if "sample_id" in t.column_names else pa.nulls(self.n, pa.string())
        self.rank = np.empty(self.n, np.int64)  # order of sample_id: sampling by it spreads over the corpus
        self.rank[pc.sort_indices(sid).to_numpy()] = np.arange(self.n)
        self._lists: dict[str, tuple[np.ndarray, whatif.Coded]] = {}

    def has(self, name: str) -> bool:
        return name in self.t.column_names

    def bools(self, name: str) -> np.ndarray:
        if not self.has(name):
            return np.zeros(self.n, bool)
        return pc.fill_null(self.t.column(name), False).to_numpy(zero_copy_only=False).astype(bool)

    def floats(self, name: str) -> np.ndarray:
        if not self.has(name):
            return np.full(self.n, np.nan)
        col = self.t.column(name).cast(pa.float64())
        return pc.fill_null(col, np.nan).to_numpy(zero_copy_only=False)

    def coded(self, name: str) -> whatif.Coded:
        if not self.has(name):
            return whatif.Coded(np.zeros(self.n, np.int32), [""])
        return whatif.coded(pc.fill_null(self.t.column(name), ""))

    def list_rows(self, name: str) -> tuple[np.ndarray, whatif.Coded]:
        """(row, value) for every entry of a list<string> column (reasons, flags)."""
        if name not in self._lists:
            rows, vals = [np.zeros(0, np.int64)], []
            offset = 0
            for chunk in (self.t.column(name).chunks if self.has(name) else []):
                lengths = pc.fill_null(pc.list_value_length(chunk), 0).to_numpy(zero_copy_only=False)
                rows.append(np.repeat(np.arange(offset, offset + len(chunk), dtype=np.int64), lengths))
                vals.append(pc.list_flatten(chunk))
                offset += len(chunk)
            self._lists[name] = (np.concatenate(rows), whatif.coded(pa.chunked_array(vals, pa.string())))
        return self._lists[name]

    def codes(self, name: str) -> list[str]:
        rows, vals = self.list_rows(name)
        return sorted({vals.words[i] for i in np.unique(vals.idx)})

    def with_code(self, name: str, code: str) -> np.ndarray:
        rows, vals = self.list_rows(name)
        return np.unique(rows[vals == code])

    def sample(self, rows: np.ndarray, k: int) -> np.ndarray:
        """Up to k rows: those with the smallest sample_ids, in that order."""
        rows = np.asarray(rows, np.int64)
        if k <= 0:
            return rows[:0]
        if rows.size > k:
            rows = rows[np.argpartition(self.rank[rows], k - 1)[:k]]
        return rows[np.argsort(self.rank[rows], kind="stable")]

    def rows(self, idx: np.ndarray) -> list[dict]:
        if len(idx) == 0:
            return []
        return self.t.take(pa.array(np.asarray(idx, np.int64))).to_pylist()


class _Picks:
    """Which samples get a card in each section, chosen once so one loader call reads them all."""

    def __init__(self, led: _Ledger, summary: dict):
        self.led = led
        self.drops: dict[str, tuple[np.ndarray, int]] = {}
        self.flags: dict[str, tuple[np.ndarray, int]] = {}
        reasons = list(summary.get("by_reason", {})) or led.codes("reasons")
        flags = list(summary.get("by_flag", {})) or led.codes("flags")
        # the page's picture budget: quarantine and groups first, the rest shared by the codes
        left = MAX_THUMBS - QUARANTINE_THUMBS - GROUPS_SHOWN * MEMBERS_PER_GROUP
        per = min(THUMBS_PER_CODE, max(2, left // max(len(reasons) + len(flags), 1)))
        for kind, codes, want_kept in (("reasons", reasons, False), ("flags", flags, True)):
            for code in codes:
                rows = led.with_code(kind, code)
                rows = rows[led.kept[rows] == want_kept]
                take = max(0, min(per, left))
                left -= min(take, rows.size)
                (self.drops if kind == "reasons" else self.flags)[code] = (led.sample(rows, take), int(rows.size))
        q = np.flatnonzero(led.coded("split") == "quarantine")
        self.quarantine = (led.sample(q, QUARANTINE_THUMBS), int(q.size))
        self.groups = self._groups()

    def _groups(self) -> list[tuple[str, int, np.ndarray]]:
        """The largest groups: (group_id, size, member rows with the keeper first, then closest copies)."""
        led = self.led
        if not led.has("group_id") or led.n == 0:
            return []
        gid = led.t.column("group_id")
        vc = pc.value_counts(gid.combine_chunks())
        vals, cnts = vc.field("values"), vc.field("counts").to_numpy()
        keep = (cnts > 1) & vals.is_valid().to_numpy(zero_copy_only=False)
        if not keep.any():
            return []
        names = np.array(vals.filter(pa.array(keep)).to_pylist(), dtype=object)
        sizes = cnts[keep]
        order = np.lexsort((names.astype(str), -sizes))[:GROUPS_SHOWN]
        chosen = names[order]
        hit = np.flatnonzero(pc.is_in(gid, value_set=pa.array(list(chosen), pa.string()))
                             .to_numpy(zero_copy_only=False))
        sub = led.t.take(pa.array(hit, pa.int64()))
        g_of = np.array(sub.column("group_id").to_pylist(), dtype=object)
        sid = np.array(sub.column("sample_id").to_pylist(), dtype=object)
        dist = (pc.fill_null(sub.column("dup_distance").cast(pa.float64()), np.nan).to_numpy(zero_copy_only=False)
                if "dup_distance" in sub.column_names else np.full(hit.size, np.nan))
        out = []
        for name, size in zip(chosen, sizes[order]):
            members = hit[g_of == name]
            is_keeper = sid[g_of == name] == name
            d = np.where(np.isnan(dist[g_of == name]), np.inf, dist[g_of == name])
            pos = np.lexsort((led.rank[members], d, ~is_keeper))[:MEMBERS_PER_GROUP]
            out.append((str(name), int(size), members[pos]))
        return out

    def ids(self) -> list[str]:
        rows = [r for r, _ in self.drops.values()] + [r for r, _ in self.flags.values()]
        rows += [self.quarantine[0]] + [m for _, _, m in self.groups]
        allrows = np.unique(np.concatenate(rows)) if rows else np.zeros(0, np.int64)
        sid = self.led.t.column("sample_id").take(pa.array(allrows, pa.int64())).to_pylist() if allrows.size else []
        return [s for s in sid if s is not None]


# --------------------------------------------------------------------------- picture sections


def check_text(c: dict) -> str:
    """A check record's value and pass condition, or its detail when it has no value."""
    if c.get("value") is not None:
        v = format_number(c["value"], c.get("unit"))
        cond = format_condition(c)
        return f"{v}, passes when {cond}" if cond else v
    return c.get("detail") or ""


def _failing(row: dict, code: str) -> dict:
    return next((c for c in row.get("checks") or () if c["code"] == code and c["status"] == "fail"), {})


def _base_facts(row: dict) -> list[tuple[str, Any]]:
    facts: list[tuple[str, Any]] = [("size", cards.size_text(row))]
    if row.get("agreement") is not None:
        facts.append(("agreement", cards.number(row["agreement"])))
    return facts + meta_facts(row)


META_CHARS = 80  # characters of a manifest metadata value shown on a card (licence, credit, URL)


def meta_facts(row: dict) -> list[tuple[str, Any]]:
    """The manifest's own columns (`meta.*`: licence, credit, source URL, ...) as plain text, never links."""
    return [(k[5:], cards.short(v, META_CHARS)) for k, v in sorted(row.items())
            if k.startswith("meta.") and v not in (None, "")]


def _cards_for(led: _Ledger, rows: np.ndarray, thumbs: dict, code: str, kind: str) -> str:
    out = []
    for row in led.rows(rows):
        c = _failing(row, code)
        facts = [(code, check_text(c))] + _base_facts(row)
        others = [r for r in (row.get("reasons") if kind == "drop" else row.get("flags")) or () if r != code]
        if others:
            facts.append(("also", ", ".join(others)))
        if kind == "flag" and row.get("split"):
            facts.append(("split", row["split"]))
        state = "dropped" if kind == "drop" else "kept"
        out.append(cards.card(row, thumbs.get(row.get("sample_id")), facts, badge=state, state=state))
    return '<div class="cards">' + "".join(out) + "</div>"


def _more(shown: int, total: int, option: str, code: str) -> str:
    if total <= shown:
        return ""
    return (f'<p class="note">{shown} of {total:,} shown. <code>curate review OUT {escape(option)} {text(code)} '
            f"--out review.csv</code> lists them all with a contact sheet.</p>")


def _drops(picks: _Picks, thumbs: dict, summary: dict) -> list[str]:
    out = ['<h2 id="drops">Dropped samples, by reason</h2>']
    if not picks.drops:
        return out + ['<p class="note">Nothing was dropped.</p>']
    out.append(f'<p class="note">Up to {THUMBS_PER_CODE} per reason, sampled by sample_id (a spread over the '
               "corpus, the same on every run). Each card gives the failing check's value and its pass "
               "condition. <code>curate explain OUT SAMPLE_ID</code> shows every check of one sample.</p>")
    for code, (rows, total) in picks.drops.items():
        out.append(f'<h3 data-code="{text(code)}"><code>{text(code)}</code> &middot; {total:,} dropped</h3>')
        out.append(_cards_for(picks.led, rows, thumbs, code, "drop") + _more(len(rows), total, "--reason", code))
    return out


def _flagged(picks: _Picks, thumbs: dict, summary: dict) -> list[str]:
    out = ['<h2 id="flagged">Kept samples, by flag</h2>']
    shown = {f: v for f, v in picks.flags.items() if v[1]}
    if not shown:
        return out + ['<p class="note">No kept sample carries a flag.</p>']
    out.append('<p class="note">Kept samples that carry a flag, for a human look. See the cautions below: a '
               "flag is a pointer, not a finding.</p>")
    for code, (rows, total) in shown.items():
        out.append(f'<h3 data-code="{text(code)}"><code>{text(code)}</code> &middot; {total:,} kept with it</h3>')
        out.append(_cards_for(picks.led, rows, thumbs, code, "flag") + _more(len(rows), total, "--flag", code))
    return out


def _quarantine(picks: _Picks, thumbs: dict) -> list[str]:
    rows, total = picks.quarantine
    out = ['<h2 id="quarantine">Quarantine</h2>']
    if not total:
        return out + ['<p class="note">No sample was quarantined.</p>']
    out.append(f'<p class="note">{total:,} samples go to <code>shards/quarantine/</code>, never to train or eval'
               + (f"; {len(rows)} shown" if total > len(rows) else "") + ".</p>")
    cs = []
    for row in picks.led.rows(rows):
        facts = [("flags", ", ".join(row.get("flags") or ()))] + _base_facts(row)
        cs.append(cards.card(row, thumbs.get(row.get("sample_id")), facts, badge="quarantine", state="quarantine"))
    return out + ['<div class="cards">' + "".join(cs) + "</div>"]


def _dup_text(row: dict) -> str:
    sig, d = row.get("dup_signal"), row.get("dup_distance")
    if sig is None:
        return ""
    if sig == "sha256":
        return "same bytes (sha256)"
    if sig == "embedding" and d is not None:
        return f"cosine {1.0 - float(d):.4f} (embedding)"
    how = row.get("dup_transform")
    sig_text = f"{sig}, {how}" if how and how != "identity" else str(sig)
    return f"{cards.number(d)} bits ({sig_text})" if d is not None else sig_text


def keeper_reason(keeper: dict, others: list[dict]) -> str:
    """Why the keeper beat the other copies: the criteria of the neardup stage's keeper priority on
    which it won (each copy's `keep_reason` in the ledger), most frequent first."""
    if not others:
        return ""
    counts: dict[str, int] = {}
    for r in others:
        reason = r.get("keep_reason") or "ranked first by the neardup stage"
        counts[reason] = counts.get(reason, 0) + 1
    ranked = sorted(counts.items(), key=lambda kv: (-kv[1], kv[0]))
    return "won on " + ", ".join(f"{k} ({n})" if len(ranked) > 1 else k for k, n in ranked)


def _groups(picks: _Picks, thumbs: dict, summary: dict) -> list[str]:
    out = _section("Near-duplicate groups", plots.group_sizes(picks.led.t.column("group_id")
                                                              if picks.led.has("group_id") else None),
                   "No near-duplicate groups: every decoded image stands alone.",
                   f"{summary.get('groups', 0):,} groups in all, counting single images.", anchor="groups")
    if not picks.groups:
        return out
    out.append(f'<p class="note">The {len(picks.groups)} largest groups, keeper first, then its copies by '
               "distance to it (Hamming bits of the perceptual codes, 0 for identical bytes, or embedding "
               "cosine). The keeper won on the first criterion of the neardup stage's keeper priority "
               "([neardup] keeper) that told the copies apart.</p>")
    for gid, size, rows in picks.groups:
        members = picks.led.rows(rows)
        keeper = next((m for m in members if m.get("sample_id") == gid), None)
        others = [m for m in members if m is not keeper]
        why = keeper_reason(keeper, others) if keeper else ""
        shown = "" if size <= len(members) else f", {len(members)} shown"
        out.append(f'<div class="group" data-group="{text(gid)}"><h3>group <code>{text(gid)}</code> &middot; '
                   f"{size} samples{shown}" + (f" &middot; kept: {text(why)}" if why else "") + "</h3>")
        cs = []
        for m in members:
            is_keeper = m is keeper
            facts = [("copy of", "" if is_keeper else m.get("dup_of")), ("distance", _dup_text(m))]
            facts += _base_facts(m)
            if is_keeper and why:
                facts.append(("why kept", why))
            if not m.get("kept"):
                facts.append(("reasons", ", ".join(m.get("reasons") or ())))
            state = "kept" if m.get("kept") else "dropped"
            badge = ("keeper, " if is_keeper else "") + state
            cs.append(cards.card(m, thumbs.get(m.get("sample_id")), facts, badge=badge, state=state))
        out.append('<div class="cards">' + "".join(cs) + "</div></div>")
    return out


# --------------------------------------------------------------------------- what-if


def _whatif(rec: whatif.Records, ledger: pa.Table) -> list[str]:
    out = ['<h2 id="whatif">What-if curves</h2>']
    cs = whatif.curves(ledger, rec=rec)
    if not cs:
        return out + ['<p class="note">No check with a numeric threshold ran.</p>']
    # drop checks first, those that drop most first; then flags the same way
    cs.sort(key=lambda c: (c.action != "drop", -c.failing, c.key))
    out.append('<p class="note">For each check with a numeric threshold: how many samples the run would keep '
               "(or, for a flag, how many it would flag) if only that threshold changed, computed from the "
               "values in the ledger with no re-run. The dot marks the threshold used. A sample another check "
               "drops stays dropped. Near-duplicate curves use each copy's distance to its keeper; chained "
               "links can differ.</p>")
    out.append('<div class="whatif">')
    for c in cs:
        what = "kept" if c.action == "drop" else ("flagged" if c.action == "flag" else c.action or "hit")
        rows = "".join(
            f'<tr><td class="n">{text(format_number(x, c.unit))}</td><td class="n">{y:,}</td>'
            f'<td class="n">{y - c.now:+,}</td></tr>'
            for x, y in whatif.table_points(c, svg.log_ticks(float(c.xs.min()), float(c.xs.max())) if c.log_x
                                            else svg.ticks(float(c.xs.min()), float(c.xs.max()), 7)))
        notes = "; ".join(c.notes)
        ylabel = "kept samples" if c.action == "drop" else f"samples {what}"
        chart = svg.line_chart(c.xs, c.upper, c.lower, c.current, c.now, log_x=c.log_x,
                               xlabel=f"{c.code} threshold" + (f" ({c.unit})" if c.unit else ""), ylabel=ylabel,
                               colour=plots.KEPT if c.action == "drop" else plots.GROUP, title=f"what-if {c.key}")
        out.append(f'<figure data-check="{text(c.key)}">' + chart
                   + f"<figcaption><b>{text(c.key)}</b>: passes when value {text(c.op)} threshold; now "
                   f"{text(format_number(c.current, c.unit))}, {c.now:,} {what}; {c.measured:,} samples measured"
                   + (f". {text(notes)}." if notes else ".") + "</figcaption>"
                   f"<table><tr><th>threshold</th><th>{what}</th><th>change</th></tr>{rows}</table></figure>")
    return out + ["</div>"]


# --------------------------------------------------------------------------- run facts and config


def _facts_section(cfg: Any, facts: dict) -> list[str]:
    out = ['<h2 id="facts">Run facts</h2>', '<table id="runfacts">']
    inp = getattr(getattr(cfg, "input", None), "path", None)
    rows = [("tool", f"curate {__version__}"), ("input", inp or "")]
    if facts.get("run_fingerprint"):
        rows.append(("run fingerprint", facts["run_fingerprint"]))
    rows.append(("config fingerprint", _fp(cfg)))
    out += [f"<tr><th>{text(k)}</th><td class=\"digest\">{text(v)}</td></tr>" for k, v in rows]
    out.append("</table>")
    stages, state = facts.get("stages") or {}, facts.get("state") or {}
    models = [(name, ident) for name, ident in stages.items() if isinstance(ident, dict) and "model" in ident]
    if models:
        out.append('<h3>Models</h3><table id="models"><tr><th>stage</th><th>model</th><th>pretrained</th>'
                   "<th>weights file</th><th>weights sha256</th><th>inference path</th></tr>")
        for name, ident in models:
            out.append(f"<tr><td>{text(name)}</td><td>{text(ident.get('model'))}</td>"
                       f"<td>{text(ident.get('pretrained'))}</td><td>{text(ident.get('weights_file'))}</td>"
                       f'<td class="digest">{text(ident.get("weights_sha256") or "not recorded")}</td>'
                       f'<td class="why">{text(_inference_path(ident))}</td></tr>')
        out.append("</table>")
    names = list(stages) + [s for s in state if s not in stages]
    if names:
        out.append('<h3>Stages</h3><table id="stagetimes"><tr><th>stage</th><th>version</th><th>seconds</th>'
                   "<th>samples computed</th><th>samples reused</th><th>identity</th></tr>")
        for name in names:
            ident = stages.get(name) or {}
            st = state.get(name) or {}
            extra = ", ".join(f"{k} {v}" for k, v in ident.items() if k not in ("version", "kind", "weights_sha256"))
            secs = st.get("seconds")
            out.append(f"<tr><td>{text(name)}</td><td>{text(ident.get('version', st.get('version', '')))}</td>"
                       f'<td class="n">{text("" if secs is None else f"{float(secs):.2f}")}</td>'
                       f'<td class="n">{text(st.get("samples_computed", ""))}</td>'
                       f'<td class="n">{text(st.get("samples_reused", ""))}</td><td class="why">{text(extra)}</td></tr>')
        out.append("</table>")
        out.append('<p class="note">Stages that run in one pass over a shard share that pass\'s time equally.</p>')
    return out


def _inference_path(ident: dict) -> str:
    """Which backend and precision ran each CLIP tower, and, when they were measured against torch
    fp32 (auto or int8), the speed and the largest change of an image-caption cosine."""
    paths = ident.get("paths")
    if not isinstance(paths, dict):
        if not ident.get("model"):
            return ""
        return "torch fp32, image tower dynamic int8 (quantize)" if ident.get("quantize") else "torch fp32 (reference)"
    said = f"image {paths.get('image', '?')}, text {paths.get('text', '?')}"
    m = ident.get("measured")
    if isinstance(m, dict):
        if m.get("fallback"):
            said += f"; auto fell back: {m['fallback']}"
        elif m.get("speedup") is not None:
            said += f"; measured {float(m['speedup']):.2f}x torch fp32"
            if m.get("max_agreement_diff") is not None:
                said += f", cosines moved by at most {float(m['max_agreement_diff']):.4f}"
            if m.get("tolerance") is not None:
                said += f" (tolerance {float(m['tolerance']):g})"
    return said


def _config_section(cfg: Any) -> list[str]:
    out = ['<h2 id="config">Config</h2>']
    try:
        names = cfg.names()
    except AttributeError:
        return out + ['<p class="note">No resolved config given.</p>']
    from ..config import field_comments

    out.append('<p class="note">Every entry this run used. <em>Where from</em> is the source the code gives '
               "for the default; a highlighted value was set for this run (pipeline file or --set).</p>")
    out.append('<table id="configtable"><tr><th>key</th><th>value</th><th>default</th><th>where from</th></tr>')
    changed = 0
    for name in names:
        sec = cfg.section(name)
        if not dataclasses.is_dataclass(sec):
            continue
        try:
            defaults = dataclasses.asdict(type(sec)())
        except TypeError:
            defaults = {}
        comments = field_comments(type(sec))
        for key, value in dataclasses.asdict(sec).items():
            dv = defaults.get(key, value)
            is_changed = dv != value
            changed += is_changed
            cls = ' class="changed"' if is_changed else ""
            out.append(f"<tr><td><code>{text(name)}.{text(key)}</code></td><td{cls}>{text(_short_value(value))}</td>"
                       f"<td>{text(_short_value(dv)) if is_changed else ''}</td>"
                       f'<td class="why">{text(comments.get(key, ""))}</td></tr>')
    out.append("</table>")
    out.append(f'<p class="note">{changed} entr{"y" if changed == 1 else "ies"} differ from the built-in '
               "defaults.</p>")
    return out


def _short_value(v: Any) -> str:
    s = str(v) if not isinstance(v, str) else f'"{v}"'
    return cards.short(s, 80)

