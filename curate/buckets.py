"""Aspect buckets for multi-aspect diffusion training: a (width, height) per kept image.

SDXL (Podell et al. 2023, arXiv 2307.01952, sec. 2.3) trains on buckets of about 1024^2 pixels
with sides in multiples of 64, each image going to the bucket whose aspect ratio is nearest. The
list here is generated from the target area and the step rather than copied from the paper's table:
for every height that is a multiple of the step, the widest width (a multiple of the step) that
keeps width * height within the area, the same turned upright, and none that another bucket of
the same width or height covers, up to a largest aspect ratio.
"""
from __future__ import annotations

import math


def make_buckets(area: int, step: int = 64, max_aspect: float = 4.0) -> list[tuple[int, int]]:
    """Buckets (width, height) of at most `area` pixels, sides multiples of `step`, aspect <= max_aspect."""
    if area <= 0 or step <= 0:
        return []
    pairs = set()
    h = step
    while h * step <= area:
        w = (area // h) // step * step
        if w >= step and max(w, h) / min(w, h) <= max_aspect:
            pairs.update({(w, h), (h, w)})  # landscape and portrait alike
        h += step
    # A bucket is dropped when another of the same width is taller (or the same height is wider)
    # within the area: it would only waste pixels.
    out = {(w, h) for w, h in pairs
           if not any((w2 == w and h2 > h) or (h2 == h and w2 > w) for w2, h2 in pairs)}
    return sorted(out, key=lambda b: (b[0] / b[1], b))


def assign(width: int, height: int, buckets: list[tuple[int, int]]) -> tuple[tuple[int, int], float] | None:
    """The bucket nearest in log aspect ratio, and the share of the image a centre crop to its aspect
    loses (after resizing to cover the bucket). None without buckets or a size."""
    if not buckets or not width or not height:
        return None
    r = math.log(width / height)
    best = min(buckets, key=lambda b: (abs(math.log(b[0] / b[1]) - r), -b[0] * b[1]))
    target = best[0] / best[1]
    aspect = width / height
    kept = target / aspect if aspect > target else aspect / target
    return best, round(1.0 - kept, 6)
