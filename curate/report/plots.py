"""The report's charts: each function returns PNG bytes, or None when there is nothing to draw.

matplotlib is imported inside `_figure`, so importing curate never pays for it. Figures are
built with the Agg canvas directly (no pyplot state), and PNGs are saved without a Software
tag, so the same numbers always give the same bytes.
"""
from __future__ import annotations

import io
from collections import Counter
from typing import Any

KEPT, DROPPED, GROUP, INK, GRID = "#2f7f78", "#c0603a", "#5b6b8c", "#2b2b2b", "#d9d4cc"


def _figure(w: float = 7.0, h: float = 3.2) -> tuple[Any, Any]:
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(w, h), dpi=100)
    FigureCanvasAgg(fig)
    ax = fig.add_subplot()
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    ax.tick_params(colors=INK, labelsize=9)
    return fig, ax


def _whole(axis: Any) -> None:
    from matplotlib.ticker import MaxNLocator

    axis.set_major_locator(MaxNLocator(integer=True))


def _png(fig: Any) -> bytes:
    import matplotlib

    buf = io.BytesIO()
    with matplotlib.rc_context({"svg.hashsalt": "curate", "path.simplify": True}):
        fig.tight_layout()
        # No Software tag: PNGs from Agg then carry no version or time text (PNG spec, tEXt/tIME).
        fig.savefig(buf, format="png", dpi=100, metadata={"Software": None}, facecolor="white")
    return buf.getvalue()


def _label(s: str) -> str:
    return str(s).replace("$", r"\$")  # a '$' pair would switch matplotlib into math text


def funnel(samples: int, stages: list[str], stopped: dict[str, int]) -> bytes | None:
    """Waterfall: samples in, how many each stage stopped (first dropping stage), samples kept."""
    if samples == 0:
        return None
    fig, ax = _figure(7.0, 3.0 + 0.1 * len(stages))
    labels, left = ["input"], samples
    ax.bar(0, samples, color=KEPT)
    ax.text(0, samples, f"{samples:,}", ha="center", va="bottom", fontsize=8, color=INK)
    for i, st in enumerate(stages, start=1):
        d = stopped.get(st, 0)
        ax.bar(i, d, bottom=left - d, color=DROPPED)
        ax.text(i, left, f"-{d:,}", ha="center", va="bottom", fontsize=8, color=INK)
        if i > 1:
            ax.plot([i - 1.4, i + 0.4], [left, left], color=GRID, lw=0.8, zorder=0)
        left -= d
        labels.append(_label(st))
    ax.bar(len(labels), left, color=KEPT)
    ax.text(len(labels), left, f"{left:,}", ha="center", va="bottom", fontsize=8, color=INK)
    labels.append("kept")
    ax.set_xticks(range(len(labels)), labels, rotation=30, ha="right")
    ax.set_ylabel("samples", fontsize=9)
    ax.set_ylim(0, samples * 1.12)
    _whole(ax.yaxis)
    return _png(fig)


def counts(data: dict[str, int], colour: str, what: str) -> bytes | None:
    """Horizontal bars, largest first (the summary's dicts are already sorted)."""
    if not data:
        return None
    items = list(data.items())[::-1]
    fig, ax = _figure(7.0, 0.9 + 0.28 * len(items))
    ax.barh(range(len(items)), [v for _, v in items], color=colour)
    ax.set_yticks(range(len(items)), [_label(k) for k, _ in items])
    for y, (_, v) in enumerate(items):
        ax.text(v, y, f" {v:,}", va="center", fontsize=8, color=INK)
    ax.set_xlabel(what, fontsize=9)
    ax.margins(x=0.12)
    _whole(ax.xaxis)
    return _png(fig)


def agreement(values: list, kept: list, thresholds: list[float]) -> bytes | None:
    """Histogram of caption-image agreement, kept vs dropped, with the threshold(s) used."""
    pairs = [(float(v), k) for v, k in zip(values, kept) if v is not None and v == v]
    if not pairs:
        return None
    lo = min([v for v, _ in pairs] + thresholds)
    hi = max([v for v, _ in pairs] + thresholds)
    if hi - lo < 1e-6:
        lo, hi = lo - 0.05, hi + 0.05
    bins = [lo + (hi - lo) * i / 40 for i in range(41)]
    fig, ax = _figure()
    for flag, colour, name in ((True, KEPT, "kept"), (False, DROPPED, "dropped")):
        vs = [v for v, k in pairs if bool(k) is flag]
        if vs:
            ax.hist(vs, bins=bins, color=colour, alpha=0.75, label=f"{name} ({len(vs):,})")
    for t in thresholds:
        ax.axvline(t, color=INK, ls="--", lw=1)
        ax.text(t, ax.get_ylim()[1], f" threshold {t:g}", va="top", fontsize=8, color=INK)
    ax.set_xlabel("agreement (caption-image cosine)", fontsize=9)
    ax.set_ylabel("samples", fontsize=9)
    ax.legend(fontsize=8, frameon=False)
    _whole(ax.yaxis)
    return _png(fig)


def sizes(widths: list, heights: list, kept: list, min_short: float | None, max_aspect: float | None) -> bytes | None:
    """Width x height on log axes, kept vs dropped, with the short-side and aspect limits."""
    pts = [(w, h, k) for w, h, k in zip(widths, heights, kept) if w and h and w > 0 and h > 0]
    if not pts:
        return None
    fig, ax = _figure(6.0, 4.6)
    for flag, colour, name, mark in ((False, DROPPED, "dropped", "x"), (True, KEPT, "kept", "o")):
        sel = [(w, h) for w, h, k in pts if bool(k) is flag]
        if sel:
            ax.scatter([w for w, _ in sel], [h for _, h in sel], s=10, c=colour, marker=mark,
                       alpha=0.6, linewidths=0.8, label=f"{name} ({len(sel):,})")
    ax.set_xscale("log")
    ax.set_yscale("log")
    lo = min([min(w, h) for w, h, _ in pts] + ([min_short] if min_short else [])) / 1.5
    hi = max(max(w, h) for w, h, _ in pts) * 1.5
    ax.set_xlim(lo, hi)
    ax.set_ylim(lo, hi)
    if min_short:
        ax.axvline(min_short, color=INK, ls="--", lw=1)
        ax.axhline(min_short, color=INK, ls="--", lw=1, label=f"short side {min_short:g} px")
    if max_aspect:
        for a, lab in ((max_aspect, f"aspect {max_aspect:g}:1"), (1 / max_aspect, None)):
            ax.plot([lo, hi], [lo * a, hi * a], color=INK, ls=":", lw=1, label=lab)
    ax.set_xlabel("width (px)", fontsize=9)
    ax.set_ylabel("height (px)", fontsize=9)
    ax.legend(fontsize=8, frameon=False, loc="upper left")
    return _png(fig)


def group_sizes(group_ids: list) -> bytes | None:
    """How many near-duplicate groups there are of each size (groups of one left out)."""
    per_size = Counter(n for n in Counter(g for g in group_ids if g is not None).values() if n > 1)
    if not per_size:
        return None
    xs = sorted(per_size)
    fig, ax = _figure(7.0, 2.8)
    ax.bar(range(len(xs)), [per_size[x] for x in xs], color=GROUP, width=0.6)
    ax.set_xlim(-0.5 - max(0, 4 - len(xs)) / 2, len(xs) - 0.5 + max(0, 4 - len(xs)) / 2)
    _whole(ax.yaxis)
    ax.set_xticks(range(len(xs)), [str(x) for x in xs])
    for i, x in enumerate(xs):
        ax.text(i, per_size[x], f"{per_size[x]:,}", ha="center", va="bottom", fontsize=8, color=INK)
    ax.set_xlabel("samples in the group", fontsize=9)
    ax.set_ylabel("groups", fontsize=9)
    return _png(fig)
