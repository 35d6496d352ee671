"""Image-quality checks on public photos, clean and degraded by known amounts.

Prints, per check and degradation level, the share of degraded files on which the check fired
(recall on the diagonal, cross-firing elsewhere), the false alarms on the clean originals, how JPEG
draft decoding changes the verdicts, and milliseconds per image per measure.

    .venv/bin/python bench/quality_checks.py [--quick] [--json]

Photos (nobody here made them): scikit-image `skimage.data`, scikit-learn's sample images and
matplotlib's sample data. Thresholds were set on TUNING only; HELD_OUT never set a threshold.
Every file is encoded the way a corpus holds it (JPEG quality 90 unless said) and decoded with
`decode_with_facts`, as inspect decodes. Also imported by tests/test_quality_measures.py.
"""
from __future__ import annotations

import argparse
import io
import json
import math
import random
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Iterator

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

from curate.imaging.quality import (  # noqa: E402
    QualityConfig,
    decode_with_facts,
    measure,
    quality_checks,
)

# ----------------------------------------------------------------------------- photos


def _skimage(name: str) -> Callable[[], np.ndarray]:
    def load() -> np.ndarray:
        from skimage import data

        if name == "motorcycle_left":
            return data.stereo_motorcycle()[0]
        return getattr(data, name)()

    return load


def _sklearn(name: str) -> Callable[[], np.ndarray]:
    def load() -> np.ndarray:
        # The file load_sample_image reads (sklearn/datasets/images/), found without importing
        # scikit-learn (seconds) and decoded with Pillow as it does.
        import importlib.util

        from PIL import Image

        spec = importlib.util.find_spec("sklearn")
        if spec is None or not spec.submodule_search_locations:
            raise FileNotFoundError("scikit-learn is not installed")
        path = Path(list(spec.submodule_search_locations)[0]) / "datasets" / "images" / name
        with Image.open(path) as im:
            return np.asarray(im.convert("RGB"))

    return load


def _matplotlib(name: str) -> Callable[[], np.ndarray]:
    def load() -> np.ndarray:
        import matplotlib
        from PIL import Image

        with Image.open(Path(matplotlib.get_data_path()) / "sample_data" / name) as im:
            return np.asarray(im.convert("RGB"))

    return load


# name -> (loader, where it comes from). Colour and greyscale photographs only.
PHOTOS: dict[str, tuple[Callable[[], np.ndarray], str]] = {
    "astronaut": (_skimage("astronaut"), "skimage.data.astronaut (NASA portrait)"),
    "camera": (_skimage("camera"), "skimage.data.camera (cameraman, greyscale)"),
    "coffee": (_skimage("coffee"), "skimage.data.coffee"),
    "rocket": (_skimage("rocket"), "skimage.data.rocket"),
    "coins": (_skimage("coins"), "skimage.data.coins (greyscale)"),
    "moon": (_skimage("moon"), "skimage.data.moon (greyscale, low contrast)"),
    "brick": (_skimage("brick"), "skimage.data.brick (greyscale texture photo)"),
    "immunohistochemistry": (_skimage("immunohistochemistry"), "skimage.data.immunohistochemistry"),
    "motorcycle_left": (_skimage("motorcycle_left"), "skimage.data.stereo_motorcycle()[0]"),
    "chelsea": (_skimage("chelsea"), "skimage.data.chelsea (cat)"),
    "china": (_sklearn("china.jpg"), "sklearn.datasets.load_sample_image('china.jpg')"),
    "flower": (_sklearn("flower.jpg"), "sklearn.datasets.load_sample_image('flower.jpg')"),
    "grace_hopper": (_matplotlib("grace_hopper.jpg"), "matplotlib sample_data/grace_hopper.jpg"),
    "hubble_deep_field": (_skimage("hubble_deep_field"), "skimage.data.hubble_deep_field (0.87 MP)"),
    "retina": (_skimage("retina"), "skimage.data.retina (2 MP fundus photo)"),
    "grass": (_skimage("grass"), "skimage.data.grass (greyscale texture photo)"),
    "gravel": (_skimage("gravel"), "skimage.data.gravel (greyscale texture photo)"),
    "page": (_skimage("page"), "skimage.data.page (photo of a printed page)"),
    "text": (_skimage("text"), "skimage.data.text (photo of text)"),
    # Soft by eye before any threshold was set: reported apart, never counted as clean.
    "cell": (_skimage("cell"), "skimage.data.cell (out-of-focus microscope image)"),
    "clock": (_skimage("clock"), "skimage.data.clock (motion-blurred photo)"),
}
TUNING = ("astronaut", "camera", "coffee", "rocket", "coins", "moon", "brick", "immunohistochemistry",
          "motorcycle_left")
HELD_OUT = ("chelsea", "china", "flower", "grace_hopper", "hubble_deep_field", "retina", "grass", "gravel",
            "page", "text")
SOFT = ("cell", "clock")
_CACHE: dict[str, np.ndarray] = {}


def photo(name: str) -> np.ndarray:
    """One public photo as HxWx3 uint8 RGB."""
    if name not in _CACHE:
        a = np.asarray(PHOTOS[name][0]())
        if a.dtype == bool:
            a = a.astype(np.uint8) * 255
        if a.ndim == 2:
            a = np.stack([a] * 3, axis=-1)
        _CACHE[name] = np.ascontiguousarray(a[..., :3].astype(np.uint8))
    return _CACHE[name]


def encode(rgb: np.ndarray, fmt: str = "JPEG", quality: int = 90, **kw) -> bytes:
    """Bytes as a corpus holds them (JPEG quality 90 by default: common practice for web photos)."""
    from PIL import Image

    buf = io.BytesIO()
    if fmt == "JPEG":
        kw.setdefault("quality", quality)
    Image.fromarray(rgb).save(buf, format=fmt, **kw)
    return buf.getvalue()


# ----------------------------------------------------------------------------- degradations


def blur(rgb: np.ndarray, sigma_at_1mp: float) -> np.ndarray:
    """Gaussian blur whose sigma is `sigma_at_1mp` px at one megapixel, scaled to this picture's size."""
    import cv2

    h, w = rgb.shape[:2]
    return cv2.GaussianBlur(rgb, (0, 0), sigma_at_1mp * math.sqrt(h * w / 1e6))


def upscale(rgb: np.ndarray, factor: float, method: str = "cubic") -> np.ndarray:
    """Shrink by `factor` (pixel-area averaging) and enlarge back to the same size."""
    import cv2

    interp = {"cubic": cv2.INTER_CUBIC, "linear": cv2.INTER_LINEAR, "lanczos": cv2.INTER_LANCZOS4}[method]
    h, w = rgb.shape[:2]
    small = cv2.resize(rgb, (max(8, round(w / factor)), max(8, round(h / factor))), interpolation=cv2.INTER_AREA)
    return cv2.resize(small, (w, h), interpolation=interp)


BAND_COLOURS = {"black": (0, 0, 0), "white": (255, 255, 255), "grey": (128, 128, 128), "navy": (20, 30, 70)}


def add_bands(rgb: np.ndarray, kind: str, share: float, colour: tuple[int, int, int]) -> tuple[np.ndarray, tuple]:
    """Pad with bands so each band is `share` of its side. Returns (picture, true content box)."""
    h, w = rgb.shape[:2]
    top = bottom = left = right = 0
    if kind in ("letterbox", "frame"):
        top = bottom = round(h * share / (1 - 2 * share))
    if kind in ("pillarbox", "frame"):
        left = right = round(w * share / (1 - 2 * share))
    out = np.empty((h + top + bottom, w + left + right, 3), np.uint8)
    out[:] = colour
    out[top:top + h, left:left + w] = rgb
    return out, (left, top, left + w, top + h)


def _srgb_to_linear(x: np.ndarray) -> np.ndarray:
    x = x / 255.0
    return np.where(x <= 0.04045, x / 12.92, ((x + 0.055) / 1.055) ** 2.4)


def _linear_to_srgb(y: np.ndarray) -> np.ndarray:
    y = np.clip(y, 0.0, 1.0)
    return np.round(255 * np.where(y <= 0.0031308, 12.92 * y, 1.055 * y ** (1 / 2.4) - 0.055)).astype(np.uint8)


def exposure(rgb: np.ndarray, stops: float) -> np.ndarray:
    """Exposure change in photographic stops: linear light times 2**stops, clipped (IEC 61966-2-1 sRGB curve)."""
    lut = _linear_to_srgb(_srgb_to_linear(np.arange(256, dtype=np.float64)) * 2.0 ** stops)
    return lut[rgb]


def gamma(rgb: np.ndarray, g: float) -> np.ndarray:
    """Tone curve out = in**g on 0..1 (g > 1 darkens, g < 1 washes out)."""
    lut = np.round(255 * (np.arange(256) / 255.0) ** g).astype(np.uint8)
    return lut[rgb]


def flatten(rgb: np.ndarray, level: str) -> np.ndarray:
    """Low-information versions: 'fog' (blur 2% of the short side, contrast x0.25), 'haze' (blur 5%,
    contrast x0.1), 'blank' (the mean colour plus noise of 2 levels). The wide blurs run on a copy
    shrunk 4x and are enlarged back: the result has no detail at that scale either way."""
    import cv2

    h, w = rgb.shape[:2]
    x = rgb.astype(np.float32)
    mean = x.mean(axis=(0, 1))
    if level == "blank":
        rng = np.random.default_rng(h * w)
        out = mean + rng.normal(0, 2.0, x.shape)
    else:
        sigma, contrast = {"fog": (0.02, 0.25), "haze": (0.05, 0.1)}[level]
        small = cv2.resize(x, (max(1, w // 4), max(1, h // 4)), interpolation=cv2.INTER_AREA)
        small = cv2.GaussianBlur(small, (0, 0), sigma * min(h, w) / 4)
        out = mean + (cv2.resize(small, (w, h), interpolation=cv2.INTER_LINEAR) - mean) * contrast
    return np.clip(np.round(out), 0, 255).astype(np.uint8)


def scan_range(jpeg: bytes) -> tuple[int, int]:
    """(start, end) of the entropy-coded data of a baseline JPEG: after the SOS header, before EOI."""
    sos = jpeg.find(b"\xff\xda")
    if sos < 0:
        raise ValueError("no start-of-scan marker")
    start = sos + 2 + int.from_bytes(jpeg[sos + 2:sos + 4], "big")
    end = jpeg.rfind(b"\xff\xd9")
    return start, end if end > start else len(jpeg)


def corrupt(jpeg: bytes, kind: str, amount: float, rng: random.Random) -> bytes:
    """Damage the scan data: 'flip' XORs `amount` bytes, 'zero' zeroes a run of `amount` bytes,
    'truncate' keeps the first `amount` share of the scan data (no EOI)."""
    s, e = scan_range(jpeg)
    d = bytearray(jpeg)
    if kind == "flip":
        for _ in range(int(amount)):
            p = rng.randrange(s, e)
            d[p] ^= rng.randrange(1, 256)
    elif kind == "zero":
        p = rng.randrange(s, max(s + 1, e - int(amount)))
        d[p:p + int(amount)] = bytes(len(d[p:p + int(amount)]))
    elif kind == "truncate":
        return bytes(d[: s + int((e - s) * amount)])
    else:
        raise ValueError(kind)
    return bytes(d)


def damaged_share(clean: np.ndarray, damaged: np.ndarray, block: int = 8, tol: float = 10.0) -> float:
    """Ground truth for garbling: share of 8x8 blocks whose mean absolute difference exceeds `tol`."""
    h, w = (min(clean.shape[0], damaged.shape[0]) // block * block, min(clean.shape[1], damaged.shape[1]) // block * block)
    diff = np.abs(clean[:h, :w].astype(np.float32) - damaged[:h, :w].astype(np.float32)).max(axis=-1)
    per_block = diff.reshape(h // block, block, w // block, block).mean(axis=(1, 3))
    return float((per_block > tol).mean())


def damage_level(share: float) -> str:
    return "<1%" if share < 0.01 else "1-10%" if share < 0.10 else "10-50%" if share < 0.5 else ">=50%"


# ----------------------------------------------------------------------------- cases


@dataclass
class Case:
    photo: str
    family: str  # degradation family ('clean' for the original)
    level: str  # degradation level as printed
    data: bytes  # file bytes as a corpus would hold them
    expect: str | None  # the check this degradation should fire (None for clean)
    clear: bool = False  # a level at which the tests require recall
    truth: dict = field(default_factory=dict)  # e.g. the true content box or damaged share


# Degradation families: (check expected, [(level label, function, clear?)]).
BLUR_LEVELS = (1.0, 2.0, 3.0, 5.0)
UPSCALE_LEVELS = (1.5, 2.0, 3.0, 4.0)
BAND_SHARES = (0.02, 0.04, 0.08, 0.15)
UNDER_STOPS = (-1.0, -2.0, -3.0, -4.0)
OVER_STOPS = (1.0, 2.0, 3.0)


def cases(names: tuple[str, ...] | list[str], *, quick: bool = False, seed: int = 0) -> Iterator[Case]:
    """Every clean and degraded file for these photos (quick: fewer variants per family)."""
    for name in names:
        a = photo(name)
        yield Case(name, "clean", "jpeg q90", encode(a), None)
        if not quick:
            yield Case(name, "clean", "jpeg q75", encode(a, quality=75), None)
            yield Case(name, "clean", "png", encode(a, "PNG"), None)
        for s in BLUR_LEVELS:
            yield Case(name, "blur", f"sigma {s:g} px @1MP", encode(blur(a, s)), "image_blurred", s >= 3)
        for k in UPSCALE_LEVELS:
            yield Case(name, "upscale bicubic", f"{k:g}x", encode(upscale(a, k)), "image_upscaled", k >= 3)
        if not quick:
            for method in ("linear", "lanczos"):
                for k in (2.0, 3.0, 4.0):
                    yield Case(name, f"upscale {method}", f"{k:g}x", encode(upscale(a, k, method)),
                               "image_upscaled", False)
        colours = list(BAND_COLOURS.items())
        for i, kind in enumerate(("letterbox", "pillarbox", "frame")):
            for j, share in enumerate(BAND_SHARES):
                cname, col = colours[(i + j) % len(colours)] if quick else colours[(i + j) % len(colours)]
                img, box = add_bands(a, kind, share, col)
                yield Case(name, kind, f"{share:.0%} {cname}", encode(img), "image_bordered", share >= 0.08,
                           {"box": box})
        for s in UNDER_STOPS:
            yield Case(name, "darken", f"{s:+g} stops", encode(exposure(a, s)), "image_underexposed", s <= -3)
        for s in OVER_STOPS:
            yield Case(name, "brighten", f"{s:+g} stops", encode(exposure(a, s)), "image_overexposed", s >= 3)
        if not quick:
            for g in (2.0, 3.0):
                yield Case(name, "gamma dark", f"gamma {g:g}", encode(gamma(a, g)), "image_underexposed", False)
            for g in (0.5, 0.33):
                yield Case(name, "gamma bright", f"gamma {g:g}", encode(gamma(a, g)), "image_overexposed", False)
        for lv in ("fog", "haze", "blank"):
            yield Case(name, "flatten", lv, encode(flatten(a, lv)), "image_flat", lv != "fog")
        clean_jpeg = encode(a)
        clean_rgb = decode_with_facts(clean_jpeg)[0]
        rng = random.Random(f"{seed}:{name}")
        plans = [("flip", n) for n in (1, 4, 16)] + [("zero", n) for n in (32, 256)]
        reps = 1 if quick else 3
        for kind, amount in plans:
            for _ in range(reps):
                data = corrupt(clean_jpeg, kind, amount, rng)
                try:
                    rgb, _ = decode_with_facts(data)
                except Exception:  # noqa: BLE001 - damage that raises is the decoder's business, not ours
                    continue
                share = damaged_share(clean_rgb, rgb)
                yield Case(name, "scan damage", damage_level(share), data, "image_garbled", share >= 0.10,
                           {"damaged": share})
        for keep in ((0.5, 0.9) if quick else (0.3, 0.6, 0.9, 0.98)):
            data = corrupt(clean_jpeg, "truncate", keep, rng)
            rgb, _ = decode_with_facts(data)
            share = damaged_share(clean_rgb, rgb)
            yield Case(name, "truncated", damage_level(share), data, "image_garbled", share >= 0.10,
                       {"damaged": share})


def fired(data: bytes, cfg: QualityConfig, **decode_kw) -> tuple[set[str], dict]:
    """Codes that fail for one file, and its measures."""
    rgb, facts = decode_with_facts(data, **decode_kw)
    m = measure(rgb, facts)
    return {c["code"] for c in quality_checks(m, cfg) if c["failed"]}, m


# ----------------------------------------------------------------------------- report

CODES = ("image_blurred", "image_flat", "image_underexposed", "image_overexposed", "image_bordered",
         "image_upscaled", "image_garbled")
SHORT = {c: c.replace("image_", "")[:7] for c in CODES}


def _table(rows: dict[tuple[str, str], list[set[str]]], title: str) -> list[str]:
    out = [title, f"{'family':18s} {'level':20s} {'n':>4s} " + " ".join(f"{SHORT[c]:>7s}" for c in CODES)]
    for (fam, lv), hits in rows.items():
        n = len(hits)
        cells = [f"{sum(c in h for h in hits) / n:7.2f}" for c in CODES]
        out.append(f"{fam:18s} {lv:20s} {n:4d} " + " ".join(cells))
    return out


def _timings(cfg: QualityConfig, repeats: int) -> list[str]:
    """CPU milliseconds per image for each measure, on two photos near 1 MP, full decode, one thread."""
    import cv2

    from curate.imaging import quality as q
    from curate.imaging.jpeg import estimate_quality

    cv2.setNumThreads(1)
    pics = {
        "hubble_deep_field 1000x872": photo("hubble_deep_field"),
        "retina resized 1000x1000": cv2.resize(photo("retina"), (1000, 1000), interpolation=cv2.INTER_AREA),
    }
    # CPU time of this process, not wall time: on a shared machine the wall clock counts other work.
    lines = ["CPU ms per image (median of %d, one thread; measure() does not include the decode)" % repeats]
    for label, a in pics.items():
        rgb, facts = decode_with_facts(encode(a))
        box = q.content_box(rgb)
        grey = q._luma(rgb)
        inner = grey[box[1]:box[3], box[0]:box[2]]
        g8 = q._working(inner)
        g = g8.astype(np.float32)
        parts: dict[str, Callable[[], object]] = {
            "bordered (content box)": lambda: q.content_box(rgb),
            "luma + working image": lambda: q._working(q._luma(rgb)),
            "blurred (sharpness)": lambda: q._sharpness(g),
            "flat (spatial info)": lambda: q._spatial_information(g),
            "exposure (percentiles)": lambda: (q._percentiles(g8, (1, 99)), np.bincount(g8.ravel(), minlength=256)),
            "upscaled (band limit)": lambda: q._band_limit(inner, 8.0),
            "garbled (fill)": lambda: q._decoder_fill(rgb, False, 8),
            "garbled (seam)": lambda: q._seam(grey, 8),
            "jpeg quality": lambda: estimate_quality(facts.jpeg_qtables),
            "measure() total": lambda: q.measure(rgb, facts),
            "measure() + quality_checks()": lambda: q.quality_checks(q.measure(rgb, facts), cfg),
        }
        data = encode(a)
        parts["(reference) JPEG decode, full"] = lambda: decode_with_facts(data)
        parts["(reference) JPEG decode, draft"] = lambda: decode_with_facts(data, draft_short_side=256)
        lines.append(f"  {label}")
        for name, fn in parts.items():
            ts = []
            for _ in range(repeats):
                t = time.process_time()
                fn()
                ts.append(time.process_time() - t)
            lines.append(f"    {name:32s} {1e3 * float(np.median(ts)):7.2f}")
    return lines


def _draft(cfg: QualityConfig) -> list[str]:
    """Verdicts at full decode against JPEG draft decodes (quick cases of every photo)."""
    lines = []
    for label, names, kw in (
        ("JPEG draft 1/2, all photos", TUNING + HELD_OUT, {"draft_scale": 0.5}),
        ("inspect's draft (short side >= 256): retina at 1/4, hubble at 1/2", ("retina", "hubble_deep_field"),
         {"draft_short_side": 256}),
    ):
        same = {c: 0 for c in CODES}
        hit = {c: [0, 0, 0] for c in CODES}  # clear-level files of the check's own family: n, full, draft
        clean_alarms = [0, 0]
        total = 0
        for c in cases(names, quick=True):
            full, _ = fired(c.data, cfg)
            draft, _ = fired(c.data, cfg, **kw)
            total += 1
            for code in CODES:
                same[code] += (code in full) == (code in draft)
            if c.expect is None:
                clean_alarms[0] += bool(full)
                clean_alarms[1] += bool(draft)
            elif c.clear:
                hit[c.expect][0] += 1
                hit[c.expect][1] += c.expect in full
                hit[c.expect][2] += c.expect in draft
        lines.append(f"== full decode against {label}: {total} files")
        lines.append(f"{'check':12s} {'same verdict':>12s} {'recall full':>12s} {'recall draft':>12s}")
        for code in CODES:
            n, a, b = hit[code]
            rf = f"{a / n:.2f}" if n else "-"
            rd = f"{b / n:.2f}" if n else "-"
            lines.append(f"{SHORT[code]:12s} {same[code] / total:12.3f} {rf:>12s} {rd:>12s}")
        lines.append(f"clean files with any alarm: full {clean_alarms[0]}, draft {clean_alarms[1]}")
        lines.append("")
    return lines


def run(quick: bool = False, repeats: int = 15) -> dict:
    cfg = QualityConfig()
    report: dict = {"clean": {}, "soft": {}, "tables": {}, "draft": {}}
    lines: list[str] = []
    for group, names in (("tuning", TUNING), ("held out", HELD_OUT)):
        rows: dict[tuple[str, str], list[set[str]]] = {}
        box_err: list[float] = []
        false_alarms: list[str] = []
        ks: dict[str, list[float]] = {}
        for c in cases(names, quick=quick):
            codes, m = fired(c.data, cfg)
            if c.expect is None:
                false_alarms += [f"{c.photo} ({c.level}): {code}" for code in sorted(codes)]
                rows.setdefault(("clean", c.level), []).append(codes)
                continue
            rows.setdefault((c.family, c.level), []).append(codes)
            if "box" in c.truth and "image_bordered" in codes:
                x0, y0, x1, y1 = c.truth["box"]
                got = (m["content_x0"], m["content_y0"], m["content_x1"], m["content_y1"])
                box_err.append(max(abs(a - b) for a, b in zip(got, (x0, y0, x1, y1))))
            if c.family.startswith("upscale") and "image_upscaled" in codes:
                ks.setdefault(f"{c.family} {c.level}", []).append(m["upscale_factor"])
        # Families in the order made; damage levels from least to most damaged.
        fam_order = {f: i for i, f in enumerate(dict.fromkeys(f for f, _ in rows))}
        dmg = {"<1%": 0, "1-10%": 1, "10-50%": 2, ">=50%": 3}
        keys = sorted(rows, key=lambda k: (fam_order[k[0]], dmg.get(k[1], 0)))
        lines += _table({k: rows[k] for k in keys}, f"== {group} photos: {', '.join(names)}")
        lines.append(f"false alarms on clean {group} photos: {len(false_alarms)}"
                     + (": " + "; ".join(false_alarms) if false_alarms else ""))
        if box_err:
            near = sum(e <= 8 for e in box_err)
            lines.append(f"content box where bordered fired: every side within 8 px of the truth in {near}/"
                         f"{len(box_err)}; worst side off by {max(box_err):.0f} px (a band not found)")
        if ks:
            lines.append("estimated upscale factor where upscaled fired (median): "
                         + ", ".join(f"{k} -> {float(np.median(v)):.2f}" for k, v in sorted(ks.items())))
        lines.append("")
        report["clean"][group] = false_alarms
        report["tables"][group] = {f"{f} | {lv}": {c: sum(c in h for h in hits) / len(hits) for c in CODES}
                                   for (f, lv), hits in rows.items()}
    soft = []
    for name in SOFT:
        codes, m = fired(encode(photo(name)), cfg)
        soft.append(f"{name}: {sorted(codes)} (sharpness {m['sharpness']:.3f})")
    lines += ["soft-by-eye photos (not counted as clean): " + "; ".join(soft), ""]
    report["soft"] = soft

    # Draft decoding: the same files decoded at 1/2 scale, and the big photos as inspect decodes them.
    draft = _draft(cfg)
    lines += draft
    report["draft"] = draft
    lines += _timings(cfg, repeats)
    report["lines"] = lines
    return report


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="fewer variants per family")
    ap.add_argument("--json", action="store_true", help="print one JSON object instead of tables")
    args = ap.parse_args()
    rep = run(quick=args.quick)
    if args.json:
        print(json.dumps({k: v for k, v in rep.items() if k != "lines"}))
    else:
        print("\n".join(rep["lines"]))


if __name__ == "__main__":
    main()
