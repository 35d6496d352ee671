"""Image-quality measurements and checks on one decoded picture.

`measure` turns an RGB array (as inspect decoded it: EXIF-oriented, maybe JPEG draft-decoded) and
the decoder's facts into plain numbers; `quality_checks` turns those numbers into check records
with the thresholds of a `QualityConfig`. Both are pure functions: no files, no printing.

Resolution. The measures of look (blur, flatness, exposure) are defined on a working image: the
picture inside its content box, shrunk with pixel-area averaging to a short side of
`WORK_SHORT_SIDE` px (never enlarged). A trainer resizes every picture to its training size, so
blur relative to the picture's size is what it learns from, and any decode at least that large
(full, or JPEG draft at 1/2, 1/4, 1/8 as inspect does it) gives nearly the same working image.
The measures of the encoding (band limit for upscaling, decoder fill and block seams for damage)
read the decoded pixels and report in the file's own pixels through `DecodeFacts.scale`. A draft
decode hides enlargements below 1/scale (`upscale_min_visible` says which), and block seams are
only looked for while a coding block spans 2 or more decoded pixels (scale 1/4 and up).
bench/quality_checks.py measures how far draft decoding changes the verdicts.
"""
from __future__ import annotations

import io
import math
import re
import threading
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..checks import check

# Short side, in px, of the working image for the measures of look (common practice: the
# smallest short side inspect keeps and decodes to; the hashes work at the same size).
WORK_SHORT_SIDE = 256

# --- band (letterbox / pillarbox / frame) detection, part of the measure's definition ---
# A line belongs to a band when this share of its pixels lies within BAND_TOL levels (every
# channel) of the band colour, taken from the outermost line (common practice).
BAND_LINE_SHARE = 0.98
BAND_TOL = 16
# The line just inside a band must differ from the band colour over at least this share: a band
# ends at a straight edge, unlike a subject standing on a plain background (common practice).
BAND_EDGE_SHARE = 0.5
# ... looking this many lines past the last band line (a JPEG block plus chroma blur).
BAND_EDGE_LINES = 10
# Bands wider than this share of a side are not looked for (the rest would be all band).
BAND_MAX_SHARE = 0.45

# --- band limit (upscaling) ---
# A band limit is reported when the whitened spectrum falls by at least this many dB across a
# cut-off (set on the tuning photos, bench/quality_checks.py: 0.7 dB above the highest clean value,
# 10.8 dB, a brick-wall texture decoded at 1/2 scale; bicubic 3x enlargements reach 12-17 dB).
CLIFF_DB = 11.5
_KS = np.exp(np.linspace(np.log(1.25), np.log(8.0), 60))

# --- decoder damage ---
# Colours a JPEG decoder leaves where scan data is missing: zeroed coefficients decode to mid
# grey (Pillow/libjpeg), a zeroed YCbCr buffer converts to green (other decoders; from memory).
FILL_COLOURS = ((128, 128, 128), (0, 135, 0))
# Below this JPEG quality (IJG scale) flat areas quantise to exactly one colour and edges snap to
# the block grid, so fill colours and seams alone are not read as damage (common practice: the
# IJG scale's low end, where blocking is plainly visible).
COARSE_JPEG_QUALITY = 30.0
# A block-boundary seam: a luma step at least SEAM_RATIO times the row steps beside it plus
# SEAM_MIN_STEP levels; its cover is the share of the width with such steps, beyond the typical
# boundary's (set on the tuning photos in bench/quality_checks.py).
SEAM_RATIO = 2.0
SEAM_MIN_STEP = 12.0
# Warnings that say the pixel data itself was damaged (not EXIF or ICC trouble).
_DAMAGE_WARNING = re.compile(r"truncat|premature|corrupt\w* (?:jpeg|image|data)|broken data|damaged", re.I)


@dataclass
class DecodeFacts:
    """What the decoder knew about one picture; inspect fills it."""

    format: str | None = None  # Pillow format, e.g. "JPEG"
    jpeg_qtables: dict | None = None  # Image.quantization (natural order)
    warnings: list[str] = field(default_factory=list)  # messages Pillow emitted while decoding
    truncated: bool = False  # the data ended early but decoded (LOAD_TRUNCATED_IMAGES path)
    scale: float = 1.0  # decoded width / true width (< 1 when JPEG draft mode decoded smaller)


_TRUNCATED_LOCK = threading.Lock()


def decode_with_facts(data: bytes, *, draft_short_side: int = 0, draft_scale: float | None = None
                      ) -> tuple[np.ndarray, DecodeFacts]:
    """Decode image bytes to RGB (EXIF-oriented, alpha on white) and say what the decoder knew.

    JPEGs may be decoded smaller with Pillow's draft mode: to a short side of at least
    `draft_short_side` when the picture is over twice that (as inspect does), or at `draft_scale`
    (1/2, 1/4, 1/8). Data that ends early is decoded as far as it goes and `truncated` is set.
    Raises what Pillow raises for anything else.
    """
    import warnings

    from PIL import Image, ImageFile, ImageOps

    def open_scaled() -> Any:
        img = Image.open(io.BytesIO(data))
        w, h = img.size
        if img.format == "JPEG":
            s = draft_scale
            if s is None and draft_short_side > 0 and min(w, h) > 2 * draft_short_side:
                s = draft_short_side / min(w, h)
            if s is not None and s < 1:
                img.draft("RGB", (max(1, math.ceil(w * s)), max(1, math.ceil(h * s))))
        return img, w

    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        img, true_w = open_scaled()
        fmt = img.format
        qtables = getattr(img, "quantization", None)
        truncated = False
        try:
            img.load()
        except OSError as e:
            if "truncat" not in str(e).lower():
                raise
            truncated = True
            img, true_w = open_scaled()
            # Pillow's switch is process-wide: hold it for this one load only.
            with _TRUNCATED_LOCK:
                old = ImageFile.LOAD_TRUNCATED_IMAGES
                ImageFile.LOAD_TRUNCATED_IMAGES = True
                try:
                    img.load()
                finally:
                    ImageFile.LOAD_TRUNCATED_IMAGES = old
        scale = img.size[0] / true_w
        img = ImageOps.exif_transpose(img)
        if img.mode in ("RGBA", "LA", "PA") or (img.mode == "P" and "transparency" in img.info):
            rgba = img.convert("RGBA")
            bg = Image.new("RGBA", rgba.size, (255, 255, 255, 255))
            img = Image.alpha_composite(bg, rgba)
        rgb = np.asarray(img.convert("RGB"))
    facts = DecodeFacts(format=fmt, jpeg_qtables={int(k): list(v) for k, v in qtables.items()} if qtables else None,
                        warnings=[str(w.message) for w in caught], truncated=truncated, scale=scale)
    return rgb, facts


# ----------------------------------------------------------------------------- helpers


def _chan_max(d: np.ndarray) -> np.ndarray:
    """Largest of the three channels of an (..., 3) array (faster than a reduction over a 3-long axis)."""
    return np.maximum(np.maximum(d[..., 0], d[..., 1]), d[..., 2])


def _luma(rgb: np.ndarray) -> np.ndarray:
    import cv2

    return cv2.cvtColor(np.ascontiguousarray(rgb), cv2.COLOR_RGB2GRAY)


def _working(grey: np.ndarray) -> np.ndarray:
    """Grey picture (uint8) resized with pixel-area averaging to the working short side."""
    import cv2

    h, w = grey.shape
    f = WORK_SHORT_SIDE / min(h, w)
    if f < 1.0:
        grey = cv2.resize(grey, (max(1, round(w * f)), max(1, round(h * f))), interpolation=cv2.INTER_AREA)
    return grey


def _percentiles(g: np.ndarray, qs: tuple[float, ...]) -> list[float]:
    """Lower percentiles (in %) of a uint8 picture from its histogram."""
    cum = np.cumsum(np.bincount(g.ravel(), minlength=256))
    return [float(np.searchsorted(cum, q / 100.0 * cum[-1], side="left")) for q in qs]


def _laplacian_var(g: np.ndarray) -> float:
    import cv2

    # 3x3 four-neighbour Laplacian (ksize=1), the operator of Pech-Pacheco et al. 2000.
    return float(cv2.Laplacian(g, cv2.CV_32F, ksize=1).var())


def _sharpness(g: np.ndarray) -> tuple[float, float]:
    """(variance of the Laplacian, its ratio to the same at half the size) of a working image.

    Natural images are close to scale invariant (Field 1987; Ruderman & Bialek 1994; from memory),
    so a sharp picture keeps about as much Laplacian energy at its own scale as at half of it;
    blur removes it at the finest scale first. The ratio cancels contrast and content.
    """
    import cv2

    h, w = g.shape
    fine = _laplacian_var(g)
    if min(h, w) < 16:
        return fine, float("nan")
    coarse = _laplacian_var(cv2.resize(g, (w // 2, h // 2), interpolation=cv2.INTER_AREA))
    return fine, fine / coarse if coarse > 1e-6 else float("nan")


def _spatial_information(g: np.ndarray) -> float:
    """ITU-T P.910 spatial information: standard deviation of the Sobel gradient magnitude."""
    import cv2

    gx = cv2.Sobel(g, cv2.CV_32F, 1, 0, ksize=3)
    gy = cv2.Sobel(g, cv2.CV_32F, 0, 1, ksize=3)
    return float(cv2.magnitude(gx, gy).std())


# ----------------------------------------------------------------------------- bands


def _band_width(lines: np.ndarray, limit: int) -> int:
    """How many leading lines of `lines` (N x L x 3, outermost first) form one near-constant band."""
    colour = np.median(lines[0], axis=0).astype(np.int16)

    def inside(block: np.ndarray) -> np.ndarray:  # share of each line within tol of the band colour
        d = _chan_max(np.abs(block.astype(np.int16) - colour))
        return (d <= BAND_TOL).mean(axis=-1)

    if inside(lines[:1])[0] < BAND_LINE_SHARE:
        return 0
    n, step = 1, 16
    while n < limit:
        share = inside(lines[n:min(n + step, limit)])
        bad = np.nonzero(share < BAND_LINE_SHARE)[0]
        if bad.size:
            n += int(bad[0])
            break
        n = min(n + step, limit)
        step *= 2
    else:
        return 0  # the band fills the searchable range: not a band around content
    # The band must end at a straight edge: within a few lines (JPEG ringing and chroma blur
    # spread an edge over up to a block) one line breaks from the band colour along most of it.
    ahead = inside(lines[n:min(n + BAND_EDGE_LINES, lines.shape[0])])
    edge = np.nonzero(1.0 - ahead >= BAND_EDGE_SHARE)[0]
    return n + int(edge[0]) if edge.size else 0


def content_box(rgb: np.ndarray) -> tuple[int, int, int, int]:
    """(x0, y0, x1, y1) of the picture inside letterbox, pillarbox or frame bands, in its pixels."""
    h, w = rgb.shape[:2]
    x0, y0, x1, y1 = 0, 0, w, h
    for _ in range(3):  # nested frames: look again inside what each round found
        before = (x0, y0, x1, y1)
        sub = rgb[y0:y1, x0:x1]
        hh, ww = sub.shape[:2]
        if hh < 8 or ww < 8:
            break
        lim_v, lim_h = int(hh * BAND_MAX_SHARE), int(ww * BAND_MAX_SHARE)
        # Lines are sampled every 3rd pixel along their length: the band test is a share.
        top = _band_width(sub[:lim_v, ::3], lim_v)
        bottom = _band_width(sub[::-1][:lim_v, ::3], lim_v)
        left = _band_width(sub[::3, :lim_h].transpose(1, 0, 2), lim_h)
        right = _band_width(sub[::3, ::-1][:, :lim_h].transpose(1, 0, 2), lim_h)
        x0, y0, x1, y1 = x0 + left, y0 + top, x1 - right, y1 - bottom
        if (x0, y0, x1, y1) == before:
            break
    return x0, y0, x1, y1


def crop_to_content(rgb: np.ndarray, box: tuple[int, int, int, int] | list[float]) -> np.ndarray:
    """The picture inside a content box (x0, y0, x1, y1) as measured; the whole picture if empty."""
    h, w = rgb.shape[:2]
    x0, y0, x1, y1 = (int(round(v)) for v in box)
    x0, y0 = min(max(x0, 0), w), min(max(y0, 0), h)
    x1, y1 = min(max(x1, x0), w), min(max(y1, y0), h)
    if x1 - x0 < 1 or y1 - y0 < 1:
        return rgb
    return rgb[y0:y1, x0:x1]


# ----------------------------------------------------------------------------- band limit


def _whitened_spectrum(grey: np.ndarray, period: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Mean power spectrum of first differences along rows and columns, and a mask of usable bins.

    First differences flatten a natural image's 1/f^2 power spectrum, so a band limit shows as a
    step down. Bins at the harmonics of the JPEG block grid (`period` px) are masked.
    """
    import scipy.fft

    n = 512
    h, w = grey.shape
    mw, mh = min(n, w), min(n, h)
    rows = np.unique(np.linspace(0, h - 1, min(256, h)).astype(int))
    cols = np.unique(np.linspace(0, w - 1, min(256, w)).astype(int))
    x0, y0 = (w - mw) // 2, (h - mh) // 2
    spectra = []
    for lines in (grey[rows, x0:x0 + mw], grey[y0:y0 + mh, cols].T):
        d = np.diff(lines.astype(np.float32), axis=1)
        d -= d.mean(axis=1, keepdims=True)
        d *= np.hanning(d.shape[1]).astype(np.float32)
        spec = scipy.fft.rfft(d, n=n, axis=1, workers=1)
        p = (spec.real ** 2 + spec.imag ** 2).mean(axis=0)
        spectra.append(p / max(float(p.sum()), 1e-12))
    f = np.fft.rfftfreq(n)
    keep = np.ones(f.shape, bool)
    if period >= 2:
        for j in range(1, int(period) + 1):
            keep &= np.abs(f - j / period) > 0.012
    return f, (spectra[0] + spectra[1]) / 2, keep


def _band_limit(grey: np.ndarray, block: float) -> tuple[float, float]:
    """(enlargement factor of the decoded pixels, drop in dB at the cut-off).

    The factor is 1.0 when no cut-off falls by CLIFF_DB. Sampling theorem (Shannon 1949): a
    picture enlarged k times from a sampled original has next to no energy above 0.5/k cycles/px.
    """
    if min(grey.shape) < 64:
        return 1.0, float("nan")
    f, p, keep = _whitened_spectrum(grey, block)
    # Band means from running sums over the usable bins, for every candidate cut-off at once.
    cs = np.concatenate([[0.0], np.cumsum(np.where(keep, p, 0.0))])
    cn = np.concatenate([[0], np.cumsum(keep)])

    def band(lo: np.ndarray, hi: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        a = np.searchsorted(f, lo, side="left")
        b = np.searchsorted(f, hi, side="right")
        cnt = cn[b] - cn[a]
        return (cs[b] - cs[a]) / np.maximum(cnt, 1), cnt

    fc = 0.5 / _KS
    low, n_low = band(0.5 * fc, 0.8 * fc)
    high, n_high = band(1.2 * fc, np.minimum(2.0 * fc, 0.5))
    ok = (n_low >= 2) & (n_high >= 2)
    drops = np.where(ok, 10 * np.log10(np.maximum(low, 1e-20) / np.maximum(high, 1e-20)), -np.inf)
    best = float(drops.max())
    if best < CLIFF_DB:
        return 1.0, best
    plateau = _KS[drops >= best - 1.0]  # the cut-off is the middle of the steepest stretch
    return float(np.exp(np.log(plateau).mean())), best


# ----------------------------------------------------------------------------- damage


def _decoder_fill(rgb: np.ndarray, truncated: bool, block: int) -> float:
    """Share of the picture in a trailing region a decoder filled for missing scan data.

    Looks from each side (inspect may have rotated the picture) for whole lines of one colour,
    plus at most one row of blocks filled from its far end, where the data stopped. Without the
    decoder's word that data was missing, only the fill colours with that stepped edge count.
    """
    h, w = rgb.shape[:2]
    blk = max(int(block), 1)
    best = 0.0
    for view in (rgb[::-1], rgb[:, ::-1].transpose(1, 0, 2), rgb, rgb.transpose(1, 0, 2)):
        # view[0] is the outermost line on that side; lines run along axis 1.
        n_lines, length = view.shape[:2]
        for end in (-1, 0):  # the partial line may be filled from either end (rotations)
            colour = view[0, end].astype(np.int16)
            if not truncated and not any(np.abs(colour - c).max() <= 2 for c in FILL_COLOURS):
                continue
            full, step = 0, 16
            while full < n_lines:
                chunk = view[full:min(full + step, n_lines)].astype(np.int16)
                same = (_chan_max(np.abs(chunk - colour)) <= 1).all(axis=1)
                bad = np.nonzero(~same)[0]
                if bad.size:
                    full += int(bad[0])
                    break
                full += chunk.shape[0]
            if full >= n_lines:
                return 1.0 if truncated else 0.0  # one colour throughout: no data at all, or a blank
            # Lines of the partial row of blocks: fill runs from the far end back to where data stopped.
            runs = []
            for r in range(full, min(full + 2 * blk + 1, n_lines)):
                line = _chan_max(np.abs(view[r].astype(np.int16) - colour)) <= 1
                line = line[::-1] if end == -1 else line
                not_fill = np.nonzero(~line)[0]
                run = int(not_fill[0]) if not_fill.size else length
                if run < blk:
                    break
                runs.append(run)
            if len(runs) > 2 * blk:
                continue  # fill-coloured along a whole side: a band of the picture's own
            # A decoder fills whole rows of blocks (8 or 16 lines at full scale, 4:4:4 or 4:2:0
            # sampling), all lines from the same point (a pixel of the picture may match the fill).
            stepped = len(runs) in (blk, 2 * blk) and max(runs) - min(runs) <= 2 and min(runs) < length
            if not stepped:
                runs = []
            if full == 0 and not runs:
                continue
            if not truncated and not stepped:
                continue  # a straight-edged grey band is as likely a picture's own
            best = max(best, (full * length + sum(runs)) / float(h * w))
    return best


def _line_steps(grey: np.ndarray, axis: int, c0: int, c1: int, seg: int = 16, stride: int = 4) -> np.ndarray:
    """Mean luma step between consecutive lines, in `seg`-px segments of each line.

    axis 0: steps between rows (row r+1 minus row r, at index r), segments along x in c0..c1;
    axis 1: the same between columns. Every `stride`-th pixel along a line is used.
    """
    nseg = (c1 - c0) // seg
    if axis == 0:
        sub = grey[:, c0:c0 + nseg * seg:stride].astype(np.int16)
        d = np.abs(sub[1:] - sub[:-1])  # (H-1, samples)
        return d.reshape(d.shape[0], nseg, seg // stride).mean(axis=2)
    sub = grey[c0:c0 + nseg * seg:stride].astype(np.int16)
    d = np.abs(sub[:, 1:] - sub[:, :-1])  # (samples, W-1)
    return d.reshape(nseg, seg // stride, d.shape[1]).mean(axis=1).T


def _seam(grey: np.ndarray, block: int, box: tuple[int, int, int, int] | None = None) -> tuple[float, float]:
    """(share of the picture after the strongest block-boundary seam, the seam's width share).

    A desynchronised entropy decoder shifts the colour or position of everything after the damage
    point, which shows as a step exactly on a block-row boundary, along much of the width, far
    above the row-to-row steps just before and after it. Low JPEG quality puts small steps on
    every boundary, so the typical boundary's share is subtracted. Tried along rows and columns,
    with the grid from either end (inspect may have rotated the picture), inside the content box.
    """
    b = int(block)
    best = (0.0, 0.0)
    if b < 2:
        return best
    H, W = grey.shape
    x0, y0, x1, y1 = box or (0, 0, W, H)
    # Keep two blocks clear of band edges: a band's own edge is a straight step, maybe on the grid.
    m = 2 * b
    x0, y0 = (x0 + m if x0 > 0 else 0), (y0 + m if y0 > 0 else 0)
    x1, y1 = (x1 - m if x1 < W else W), (y1 - m if y1 < H else H)
    for axis, (a0, a1), (c0, c1) in ((0, (y0, y1), (x0, x1)), (1, (x0, x1), (y0, y1))):
        h = grey.shape[axis]
        if (c1 - c0) // 16 < 4:
            continue
        steps = None
        for oy in sorted({b, b + h % b}):
            ys = np.arange(oy, h - 1, b)  # boundary between line y-1 and line y
            ys = ys[(ys >= a0 + 2) & (ys <= a1 - 2)]
            if ys.size < 3:
                continue
            if steps is None:
                steps = _line_steps(grey, axis, c0, c1)  # steps[i]: line i+1 minus line i
            before, at, after_ = steps[ys - 2], steps[ys - 1], steps[ys]
            cover = (at >= SEAM_RATIO * np.maximum(before, after_) + SEAM_MIN_STEP).mean(axis=1)
            # The seam of one damage point runs along two boundaries: above the row of blocks where
            # it happened (right of it) and below it (left of it).
            pair = cover[:-1] + cover[1:] - 2 * float(np.median(cover))
            j = int(np.argmax(pair))
            if pair[j] > best[1]:
                y = int(ys[j])
                after = (h - y) / h if oy == b else y / h  # grid from the far end: picture turned over
                best = (after, float(pair[j]))
    return best


# ----------------------------------------------------------------------------- measure


def measure(rgb: np.ndarray, facts: DecodeFacts | None = None) -> dict[str, float | None]:
    """Every quality measure of one picture (HxWx3 uint8, EXIF-oriented) as plain numbers.

    Sizes and boxes (`content_*`, `native_*`, `width`, `height`) are in the file's own pixels,
    decoded pixels divided by `facts.scale`. `sharpness` also ranks copies of one picture.
    """
    from .jpeg import estimate_quality

    facts = facts or DecodeFacts()
    if rgb.ndim != 3 or rgb.shape[2] < 3 or rgb.dtype != np.uint8:
        raise ValueError(f"measure needs an HxWx3 uint8 array, got {rgb.dtype} {rgb.shape}")
    rgb = rgb[..., :3]
    scale = float(facts.scale) if facts.scale and facts.scale > 0 else 1.0
    h, w = rgb.shape[:2]
    out: dict[str, float | None] = {}

    x0, y0, x1, y1 = content_box(rgb)
    out.update(content_x0=x0 / scale, content_y0=y0 / scale, content_x1=x1 / scale, content_y1=y1 / scale)
    out["border_share"] = 1.0 - (x1 - x0) * (y1 - y0) / float(w * h)

    grey_full = _luma(rgb)
    inner = grey_full[y0:y1, x0:x1]
    g8 = _working(inner)
    g = g8.astype(np.float32)
    out["laplacian_var"], out["sharpness"] = _sharpness(g)
    out["spatial_info"] = _spatial_information(g)
    out["luma_std"] = float(g.std())
    out["luma_mean"] = float(g.mean())
    out["luma_p1"], out["luma_p99"] = _percentiles(g8, (1, 99))
    hist = np.bincount(g8.ravel(), minlength=256) / g8.size
    out["clip_dark"] = float(hist[:5].sum())  # levels 0..4
    out["clip_bright"] = float(hist[251:].sum())  # levels 251..255

    jpeg = (facts.format or "").upper() in ("JPEG", "MPO")
    block = 8.0 * scale if jpeg else 8.0
    k_dec, drop = _band_limit(inner, block if jpeg else 0.0)
    # In a smaller decode only enlargements beyond 1/scale show; report the file's own factor.
    factor = k_dec / scale if k_dec > 1.0 else 1.0
    out["upscale_factor"] = factor
    out["upscale_drop_db"] = drop if np.isfinite(drop) else None
    out["upscale_min_visible"] = float(_KS[0] / scale)
    out["native_width"] = (x1 - x0) / scale / factor
    out["native_height"] = (y1 - y0) / scale / factor

    out["decoder_fill_share"] = _decoder_fill(rgb, bool(facts.truncated), max(1, int(round(block))))
    after, cover = _seam(grey_full, int(round(block)), (x0, y0, x1, y1)) if jpeg else (0.0, 0.0)
    out["seam_after_share"], out["seam_cover"] = after, cover
    out["truncated"] = 1.0 if facts.truncated else 0.0
    out["damage_warnings"] = float(sum(1 for m in facts.warnings if _DAMAGE_WARNING.search(m)))

    est = estimate_quality(facts.jpeg_qtables) if jpeg else None
    out["jpeg_quality"] = float(est.quality) if est else None
    out["jpeg_quality_exact"] = (1.0 if est.exact else 0.0) if est else None
    out["width"], out["height"] = w / scale, h / scale
    return out


# ----------------------------------------------------------------------------- checks

# Reason codes with their default action and meaning, for the stage that registers them.
CODES: dict[str, tuple[str, str]] = {
    "image_blurred": ("drop", "fine detail missing for the picture's size (out of focus or smoothed)"),
    "image_flat": ("drop", "near-blank picture: almost no spatial detail"),
    "image_underexposed": ("drop", "dark throughout with no highlights"),
    # Flag, not drop: large clipped whites are also how studio shots on white backgrounds look.
    "image_overexposed": ("flag", "washed out or large areas clipped to white"),
    "image_bordered": ("drop", "letterbox, pillarbox or frame bands of near-constant colour"),
    "image_upscaled": ("drop", "less detail than its pixel count: enlarged from a smaller original (or as blurred)"),
    "image_garbled": ("drop", "damaged image data that still decoded (decoder fill, shifted blocks)"),
    "image_overcompressed": ("drop", "JPEG quality below the configured minimum"),
}


@dataclass
class QualityConfig:
    enabled: bool = True
    # Blurred below this Laplacian-variance ratio, fine/half scale (Pech-Pacheco et al. 2000 operator;
    # ratio ours, set on the tuning photos: geometric mean of the lowest clean value, 0.350, and the
    # highest at blur sigma 3 px at 1 MP, 0.208; bench/quality_checks.py).
    min_sharpness: float = 0.27
    # Flat below this ITU-T P.910 spatial information at the working size (set on the tuning photos:
    # geometric mean of the lowest clean value, 30.9, and the highest at the clear levels, 2.5).
    min_spatial_info: float = 8.8
    # Underexposed when the mean luma (0..255) is at most this (a quarter of full scale; common practice) ...
    dark_max_mean: float = 64.0
    # ... and the 99th percentile is at most this (mid grey: 2 stops of unused headroom; common practice).
    dark_max_p99: float = 128.0
    # Overexposed when at least this share of pixels is clipped white, luma >= 251 (common practice) ...
    bright_min_clipped: float = 0.10
    # Also overexposed (washed out) when the mean is at least this ... (mirror of dark_max_mean).
    washed_min_mean: float = 191.0
    # ... and the 1st percentile is at least this (no shadows; mirror of dark_max_p99).
    washed_min_p1: float = 127.0
    # Bordered when bands cover more than this share of the area (common practice).
    max_border_share: float = 0.03
    # Upscaled when the estimated enlargement factor reaches this (common practice: 2x per side).
    max_upscale_factor: float = 2.0
    # Garbled when decoder fill, or what follows a block seam, covers more than this share (common practice).
    max_garbled_share: float = 0.01
    # A block seam counts when it covers this share of the width (set on the tuning photos, where no
    # undamaged file reached 0.38; bench/quality_checks.py).
    min_seam_cover: float = 0.4
    # JPEG quality minimum on the IJG scale (ITU-T T.81 Annex K tables); 0 = off (common practice).
    min_jpeg_quality: float = 0.0

    def validate(self) -> None:
        for k in ("min_sharpness", "min_spatial_info", "bright_min_clipped", "max_border_share",
                  "max_garbled_share", "min_seam_cover", "min_jpeg_quality"):
            if getattr(self, k) < 0:
                raise ValueError(f"{k} must be >= 0, got {getattr(self, k)}")
        for k in ("bright_min_clipped", "max_border_share", "max_garbled_share", "min_seam_cover"):
            if getattr(self, k) > 1:
                raise ValueError(f"{k} is a share and must be <= 1, got {getattr(self, k)}")
        if self.max_upscale_factor < 1:
            raise ValueError(f"max_upscale_factor must be >= 1, got {self.max_upscale_factor}")
        if not 0 <= self.min_jpeg_quality <= 100:
            raise ValueError(f"min_jpeg_quality must be within 0..100, got {self.min_jpeg_quality}")


def _f(m: dict, k: str) -> float | None:
    v = m.get(k)
    return None if v is None or not np.isfinite(v) else float(v)


def quality_checks(m: dict[str, Any], cfg: QualityConfig) -> list[dict]:
    """Check records for one picture's measures (from `measure`)."""
    out: list[dict] = []

    def rec(code: str, value: float | None, threshold: float, op: str, unit: str | None, detail: str) -> None:
        # A measure that could not be taken (picture too small, old cache) passes, value null.
        out.append(check(code, value=value, threshold=threshold, op=op, unit=unit, detail=detail,
                         failed=False if value is None else None))

    rec("image_blurred", _f(m, "sharpness"), cfg.min_sharpness, ">=", "ratio",
        f"Laplacian variance {_f(m, 'laplacian_var') or 0:.4g} at short side {WORK_SHORT_SIDE} px")
    rec("image_flat", _f(m, "spatial_info"), cfg.min_spatial_info, ">=", None,
        f"luma std {_f(m, 'luma_std') or 0:.3g}")

    # Exposure: each rule is a set of limits that must all be reached; the record's value is the
    # rule's weakest margin (value / limit, or limit / value for upper limits), failing at 1.
    mean, p1, p99 = _f(m, "luma_mean"), _f(m, "luma_p1"), _f(m, "luma_p99")
    if mean is None or p1 is None or p99 is None:
        rec("image_underexposed", None, 1.0, "<", "ratio", "no luma statistics")
        rec("image_overexposed", None, 1.0, "<", "ratio", "no luma statistics")
    else:
        dark = min(cfg.dark_max_mean / max(mean, 1e-6), cfg.dark_max_p99 / max(p99, 1e-6))
        rec("image_underexposed", dark, 1.0, "<", "ratio",
            f"mean luma {mean:.1f} (limit {cfg.dark_max_mean:g}), 99th percentile {p99:.0f} (limit {cfg.dark_max_p99:g})")
        clipped = _f(m, "clip_bright") or 0.0
        blown = clipped / cfg.bright_min_clipped if cfg.bright_min_clipped > 0 else 0.0
        washed = min(mean / cfg.washed_min_mean, p1 / cfg.washed_min_p1) if cfg.washed_min_p1 > 0 else 0.0
        rec("image_overexposed", max(blown, washed), 1.0, "<", "ratio",
            f"clipped white {clipped:.3f} (limit {cfg.bright_min_clipped:g}); washed out: mean {mean:.1f} "
            f"(limit {cfg.washed_min_mean:g}), 1st percentile {p1:.0f} (limit {cfg.washed_min_p1:g})")

    box = [_f(m, k) for k in ("content_x0", "content_y0", "content_x1", "content_y1")]
    rec("image_bordered", _f(m, "border_share"), cfg.max_border_share, "<=", "share",
        "content box " + ",".join(f"{v:.0f}" for v in box if v is not None))
    factor = _f(m, "upscale_factor")
    if factor is not None and factor > 1.0:
        up = (f"native about {m.get('native_width', 0):.0f}x{m.get('native_height', 0):.0f} "
              f"(spectrum falls {m.get('upscale_drop_db') or 0:.1f} dB at its band limit)")
    else:
        up = f"no band limit; enlargements under {m.get('upscale_min_visible') or 1.25:.3g}x not visible at this decode"
    rec("image_upscaled", factor, cfg.max_upscale_factor, "<", "x", up)

    fill = _f(m, "decoder_fill_share") or 0.0
    q = _f(m, "jpeg_quality")
    seam = (_f(m, "seam_after_share") or 0.0) if (_f(m, "seam_cover") or 0.0) >= cfg.min_seam_cover else 0.0
    # Heavy quantisation turns a plain backdrop into blocks of exactly one colour, the decoder's
    # fill colour among them, and snaps every object edge onto the block grid; without the
    # decoder's word that data was missing, neither is evidence of damage in such a file
    # (tests/test_quality_measures.py: a grey backdrop at quality 12). `min_jpeg_quality` is the
    # check for such files.
    quiet = not m.get("truncated") and not m.get("damage_warnings")
    coarse = quiet and q is not None and q < COARSE_JPEG_QUALITY
    if coarse:
        fill = seam = 0.0
    measured = m.get("decoder_fill_share") is not None or m.get("seam_cover") is not None
    share = max(fill, seam) if measured else None
    notes = []
    if m.get("truncated"):
        notes.append("data ended early")
    if m.get("damage_warnings"):
        notes.append(f"{int(m['damage_warnings'])} decoder warning(s)")
    notes.append(f"decoder fill {fill:.3f}" + f", after a block seam {seam:.3f}"
                 + (f" (neither counted at JPEG quality {q:.0f})" if coarse else ""))
    rec("image_garbled", share, cfg.max_garbled_share, "<=", "share", "; ".join(notes))

    if cfg.min_jpeg_quality > 0 and q is not None:
        rec("image_overcompressed", q, cfg.min_jpeg_quality, ">=", None,
            "IJG scale" + ("" if m.get("jpeg_quality_exact") else ", nearest; other encoder"))
    return out
