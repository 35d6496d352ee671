"""Small inline SVG line charts for the what-if curves: no plotting library, a few KB each.

Tick values follow the "nice numbers" method (1, 2 or 5 times a power of ten; Heckbert,
"Nice Numbers for Graph Labels", Graphics Gems, 1990). Every text in the SVG is escaped, and
the output depends only on the numbers given, so the same curve gives the same bytes.
"""
from __future__ import annotations

import math
from html import escape

import numpy as np

W, H = 420, 230  # viewBox size
LEFT, RIGHT, TOP, BOTTOM = 54, 12, 12, 42  # margins inside the viewBox
INK, GRID, MARK = "#2b2b2b", "#e4ddd2", "#c0603a"


def _nice(x: float, round_: bool) -> float:
    if x <= 0:
        return 1.0
    e = math.floor(math.log10(x))
    f = x / 10 ** e
    if round_:
        nf = 1 if f < 1.5 else 2 if f < 3 else 5 if f < 7 else 10
    else:
        nf = 1 if f <= 1 else 2 if f <= 2 else 5 if f <= 5 else 10
    return nf * 10 ** e


def ticks(lo: float, hi: float, n: int = 5) -> list[float]:
    """About n round tick values covering [lo, hi] (linear axis)."""
    if not (math.isfinite(lo) and math.isfinite(hi)):
        return []
    if hi <= lo:
        hi = lo + (abs(lo) or 1.0)
    step = _nice(_nice(hi - lo, False) / max(n - 1, 1), True)
    start = math.ceil(lo / step - 1e-9) * step
    out, v = [], start
    while v <= hi + 1e-9 * step:
        out.append(round(v, 12))
        v += step
    return out


def log_ticks(lo: float, hi: float) -> list[float]:
    """Powers of ten within [lo, hi] (with 2 and 5 between them when the range is short)."""
    a, b = math.floor(math.log10(lo)), math.ceil(math.log10(hi))
    mults = (1, 2, 5) if b - a <= 3 else (1,)
    out = [m * 10.0 ** e for e in range(a, b + 1) for m in mults if lo <= m * 10.0 ** e <= hi]
    return out or [lo, hi]


def label(v: float) -> str:
    """A tick label: whole numbers with thousands grouped as k/M/G, others to 3 significant digits."""
    a = abs(v)
    for div, suf in ((1e9, "G"), (1e6, "M"), (1e3, "k")):
        if a >= div:
            s = f"{v / div:.3g}"
            return s + suf
    return f"{v:.3g}"


def line_chart(xs: np.ndarray, upper: np.ndarray, lower: np.ndarray | None, current: float, now: int, *,
               log_x: bool, xlabel: str, ylabel: str, colour: str, title: str) -> str:
    """A step line of counts against thresholds, a dashed second line, the current threshold marked."""
    xs = np.asarray(xs, dtype=np.float64)
    x0, x1 = float(xs.min()), float(xs.max())
    if x1 <= x0:
        x0, x1 = x0 - 0.5, x1 + 0.5
    top = max(float(upper.max()), 1.0) * 1.1
    yt = ticks(0.0, top)
    top = max(top, yt[-1]) if yt else top
    pw, ph = W - LEFT - RIGHT, H - TOP - BOTTOM

    def fx(v: np.ndarray | float) -> np.ndarray:
        v = np.asarray(v, dtype=np.float64)
        if log_x:
            return LEFT + (np.log10(v) - math.log10(x0)) / (math.log10(x1) - math.log10(x0)) * pw
        return LEFT + (v - x0) / (x1 - x0) * pw

    def fy(v: np.ndarray | float) -> np.ndarray:
        return TOP + ph - np.asarray(v, dtype=np.float64) / top * ph

    def steps(ys: np.ndarray) -> str:
        px, py = fx(xs), fy(ys)
        pts = [f"{px[0]:.1f},{py[0]:.1f}"]
        for i in range(1, px.size):
            if py[i] != py[i - 1]:
                pts.append(f"{px[i]:.1f},{py[i - 1]:.1f}")
            pts.append(f"{px[i]:.1f},{py[i]:.1f}")
        return " ".join(pts)

    xt = log_ticks(x0, x1) if log_x else ticks(x0, x1)
    parts = [f'<svg viewBox="0 0 {W} {H}" role="img" '
             f'aria-label="{escape(title)}" font-family="sans-serif" font-size="10">',
             f"<title>{escape(title)}</title>"]
    for v in yt:
        y = float(fy(v))
        parts.append(f'<line x1="{LEFT}" x2="{W - RIGHT}" y1="{y:.1f}" y2="{y:.1f}" stroke="{GRID}"/>'
                     f'<text x="{LEFT - 4}" y="{y + 3:.1f}" text-anchor="end" fill="{INK}">{escape(label(v))}</text>')
    for v in xt:
        x = float(fx(v))
        if LEFT - 0.5 <= x <= W - RIGHT + 0.5:
            parts.append(f'<line x1="{x:.1f}" x2="{x:.1f}" y1="{TOP + ph}" y2="{TOP + ph + 4}" stroke="{INK}"/>'
                         f'<text x="{x:.1f}" y="{TOP + ph + 15}" text-anchor="middle" fill="{INK}">'
                         f"{escape(label(v))}</text>")
    parts.append(f'<line x1="{LEFT}" x2="{W - RIGHT}" y1="{TOP + ph}" y2="{TOP + ph}" stroke="{INK}"/>'
                 f'<line x1="{LEFT}" x2="{LEFT}" y1="{TOP}" y2="{TOP + ph}" stroke="{INK}"/>')
    if lower is not None and (np.asarray(lower) != np.asarray(upper)).any():
        parts.append(f'<polyline fill="none" stroke="{colour}" stroke-width="1.2" stroke-dasharray="4 3" '
                     f'points="{steps(np.asarray(lower))}"/>')
    parts.append(f'<polyline fill="none" stroke="{colour}" stroke-width="2" points="{steps(np.asarray(upper))}"/>')
    cx, cy = float(fx(current)), float(fy(now))
    anchor = "end" if cx > LEFT + 0.7 * pw else "start"
    dx = -6 if anchor == "end" else 6
    parts.append(f'<line x1="{cx:.1f}" x2="{cx:.1f}" y1="{TOP}" y2="{TOP + ph}" stroke="{INK}" '
                 f'stroke-dasharray="2 2"/><circle cx="{cx:.1f}" cy="{cy:.1f}" r="4" fill="{MARK}"/>'
                 f'<text x="{cx + dx:.1f}" y="{max(cy - 6, TOP + 9):.1f}" text-anchor="{anchor}" fill="{INK}">'
                 f"now {escape(label(current))}: {now:,}</text>")
    parts.append(f'<text x="{LEFT + pw / 2:.1f}" y="{H - 6}" text-anchor="middle" fill="{INK}">{escape(xlabel)}</text>'
                 f'<text transform="translate(12 {TOP + ph / 2:.1f}) rotate(-90)" text-anchor="middle" '
                 f'fill="{INK}">{escape(ylabel)}</text></svg>')
    return "".join(parts)
