"""The report's charts: each function returns PNG bytes, or None when there is nothing to draw.

matplotlib is imported inside `_figure`, so importing curate never pays for it. Figures are
built with the Agg canvas directly (no pyplot state), and PNGs are saved without a Software
tag, so the same numbers always give the same bytes.
"""
from __future__ import annotations

import io
from collections import Counter
from typing import Any

import numpy as np

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


SCATTER_MAX = 20_000  # points drawn in a scatter plot; more are sampled evenly (the counts stay exact)


def _arr(values: Any) -> np.ndarray:
    """Floats as a numpy array, None -> NaN."""
    a = np.asarray([np.nan if v is None else v for v in values] if isinstance(values, list) else values,
                   dtype=np.float64)
    return a


def agreement(values: Any, kept: Any, thresholds: list[float]) -> bytes | None:
    """Histogram of caption-image agreement, kept vs dropped, with the threshold(s) used."""
    v, k = _arr(values), np.asarray(kept, dtype=bool)
    ok = np.isfinite(v)
    if not ok.any():
        return None
    v, k = v[ok], k[ok]
    lo = float(min(v.min(), *thresholds)) if thresholds else float(v.min())
    hi = float(max(v.max(), *thresholds)) if thresholds else float(v.max())
    if hi - lo < 1e-6:
        lo, hi = lo - 0.05, hi + 0.05
    bins = np.linspace(lo, hi, 41)
    fig, ax = _figure()
    for flag, colour, name in ((True, KEPT, "kept"), (False, DROPPED, "dropped")):
        vs = v[k == flag]
        if vs.size:
            # bin first, then draw the 40 bars: the figure costs the same at any corpus size
            counts, _ = np.histogram(vs, bins=bins)
            ax.stairs(counts, bins, fill=True, color=colour, alpha=0.75, label=f"{name} ({vs.size:,})")
    for t in thresholds:
        ax.axvline(t, color=INK, ls="--", lw=1)
        ax.text(t, ax.get_ylim()[1], f" threshold {t:g}", va="top", fontsize=8, color=INK)
    ax.set_xlabel("agreement (caption-image cosine)", fontsize=9)
    ax.set_ylabel("samples", fontsize=9)
    ax.legend(fontsize=8, frameon=False)
    _whole(ax.yaxis)
    return _png(fig)


def _even(idx: np.ndarray, k: int) -> np.ndarray:
    """At most k of these indices, evenly spaced (deterministic sampling)."""
    if idx.size <= k:
        return idx
    return idx[np.linspace(0, idx.size - 1, k).astype(np.int64)]


def sizes(widths: Any, heights: Any, kept: Any, min_short: float | None, max_aspect: float | None) -> bytes | None:
    """Width x height on log axes, kept vs dropped, with the short-side and aspect limits."""
    w, h, k = _arr(widths), _arr(heights), np.asarray(kept, dtype=bool)
    ok = np.isfinite(w) & np.isfinite(h) & (w > 0) & (h > 0)
    if not ok.any():
        return None
    fig, ax = _figure(6.0, 4.6)
    for flag, colour, name, mark in ((False, DROPPED, "dropped", "x"), (True, KEPT, "kept", "o")):
        sel = np.flatnonzero(ok & (k == flag))
        if sel.size:
            drawn = _even(sel, SCATTER_MAX // 2)
            ax.scatter(w[drawn], h[drawn], s=10, c=colour, marker=mark, alpha=0.6, linewidths=0.8,
                       label=f"{name} ({sel.size:,})")
    ws, hs = w[ok], h[ok]
    lo = float(min(np.minimum(ws, hs).min(), *([min_short] if min_short else []))) / 1.5
    hi = float(np.maximum(ws, hs).max()) * 1.5
    ax.set_xscale("log")
    ax.set_yscale("log")
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


def group_sizes(group_ids: Any) -> bytes | None:
    """How many near-duplicate groups there are of each size (groups of one left out)."""
    if group_ids is None:
        return None
    if isinstance(group_ids, list):
        per_size = Counter(n for n in Counter(g for g in group_ids if g is not None).values() if n > 1)
    else:
        import pyarrow.compute as pc

        col = group_ids.combine_chunks() if hasattr(group_ids, "combine_chunks") else group_ids
        vc = pc.value_counts(col.drop_null() if hasattr(col, "drop_null") else col)
        counts = vc.field("counts").to_numpy() if len(vc) else np.zeros(0, np.int64)
        per_size = Counter({int(s): int(c) for s, c in zip(*np.unique(counts[counts > 1], return_counts=True))})
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

