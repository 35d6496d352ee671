"""Public photos shipped inside packages, and the edits a web corpus applies to them.

The photos come from scikit-image (`skimage.data`), scikit-learn (`load_sample_images`) and
matplotlib's sample data, so the near-duplicate quality checks run offline on pictures nobody here
made. Every variant is written to bytes and decoded back exactly as the pipeline's inspect stage
decodes (JPEG draft mode included), so the hashes seen here are the hashes a run would see.
Used by bench/neardup_quality.py, tests/test_neardup.py and tests/test_neardup_adversarial.py.
"""
from __future__ import annotations

import io
import random
from pathlib import Path
from typing import Callable

import numpy as np
from PIL import Image, ImageDraw, ImageEnhance, ImageFilter


def _skimage(name: str) -> Callable[[], np.ndarray]:
    def load() -> np.ndarray:
        from skimage import data

        if name in ("motorcycle_left", "motorcycle_right"):
            left, right, _ = data.stereo_motorcycle()
            return left if name == "motorcycle_left" else right
        return getattr(data, name)()

    return load


def _sklearn(name: str) -> Callable[[], np.ndarray]:
    def load() -> np.ndarray:
        from sklearn.datasets import load_sample_image

        return load_sample_image(name)

    return load


def _matplotlib(name: str) -> Callable[[], np.ndarray]:
    def load() -> np.ndarray:
        import matplotlib

        with Image.open(Path(matplotlib.get_data_path()) / "sample_data" / name) as im:
            return np.asarray(im.convert("RGB"))

    return load


# Photographs only (no drawings, logos or synthetic patterns), at least 170 px on the short side.
PHOTOS: dict[str, Callable[[], np.ndarray]] = {
    **{
        n: _skimage(n)
        for n in (
            "astronaut", "camera", "cell", "chelsea", "coffee", "coins", "hubble_deep_field",
            "immunohistochemistry", "moon", "retina", "rocket", "brick", "grass", "gravel", "clock",
            "page", "text",
        )
    },
    "china": _sklearn("china.jpg"),
    "flower": _sklearn("flower.jpg"),
    "grace_hopper": _matplotlib("grace_hopper.jpg"),
}
# Two photographs of one scene from two cameras side by side (a stereo pair): distinct files, nearly
# the same picture. Reported on their own: whether they should group is a policy question.
STEREO_PAIR = {"motorcycle_left": _skimage("motorcycle_left"), "motorcycle_right": _skimage("motorcycle_right")}


def load_photo(name: str) -> Image.Image:
    """One public photo as an RGB Pillow image."""
    fn = PHOTOS.get(name) or STEREO_PAIR[name]
    arr = fn()
    if arr.dtype == bool:
        arr = arr.astype(np.uint8) * 255
    img = Image.fromarray(arr)
    return img.convert("RGB")


# --------------------------------------------------------------------------- edits


def _encode(img: Image.Image, fmt: str, **kw) -> bytes:
    buf = io.BytesIO()
    img.save(buf, format=fmt, **kw)
    return buf.getvalue()


def _jpeg(q: int) -> Callable[[Image.Image, random.Random], bytes]:
    return lambda img, rng: _encode(img, "JPEG", quality=q)


def _rescale(f: float) -> Callable[[Image.Image, random.Random], bytes]:
    def edit(img: Image.Image, rng: random.Random) -> bytes:
        w, h = img.size
        return _encode(img.resize((max(8, round(w * f)), max(8, round(h * f))), Image.Resampling.BICUBIC), "PNG")

    return edit


def _blur(radius: float) -> Callable[[Image.Image, random.Random], bytes]:
    return lambda img, rng: _encode(img.filter(ImageFilter.GaussianBlur(radius)), "PNG")


def _brightness(f: float) -> Callable[[Image.Image, random.Random], bytes]:
    return lambda img, rng: _encode(ImageEnhance.Brightness(img).enhance(f), "PNG")


def _contrast(f: float) -> Callable[[Image.Image, random.Random], bytes]:
    return lambda img, rng: _encode(ImageEnhance.Contrast(img).enhance(f), "PNG")


def _crop(max_frac: float, mode: str) -> Callable[[Image.Image, random.Random], bytes]:
    """Border crop: 'even' takes max_frac from every side; 'random' 0..max_frac per side; 'one' one side."""

    def edit(img: Image.Image, rng: random.Random) -> bytes:
        w, h = img.size
        if mode == "even":
            fr = [max_frac] * 4
        elif mode == "one":
            fr = [0.0] * 4
            fr[rng.randrange(4)] = max_frac
        else:
            fr = [rng.uniform(0, max_frac) for _ in range(4)]
        box = (round(w * fr[0]), round(h * fr[1]), w - round(w * fr[2]), h - round(h * fr[3]))
        return _encode(img.crop(box), "PNG")

    return edit


def _stamp(kind: str, size: float) -> Callable[[Image.Image, random.Random], bytes]:
    """A small mark in a random corner: an opaque box with text, or a semi-transparent text watermark."""

    def edit(img: Image.Image, rng: random.Random) -> bytes:
        w, h = img.size
        sw, sh = max(6, round(w * size)), max(4, round(h * size * 0.5))
        corner = rng.randrange(4)
        margin = round(min(w, h) * 0.02)
        x = margin if corner in (0, 2) else w - sw - margin
        y = margin if corner in (0, 1) else h - sh - margin
        out = img.convert("RGBA")
        layer = Image.new("RGBA", out.size, (0, 0, 0, 0))
        d = ImageDraw.Draw(layer)
        if kind == "box":
            d.rectangle((x, y, x + sw, y + sh), fill=(250, 250, 245, 255), outline=(20, 20, 20, 255))
            d.text((x + 3, y + 2), "(c) Kilnworks", fill=(20, 20, 20, 255))
        else:
            d.text((x, y), "KILNWORKS", fill=(255, 255, 255, 140))
            d.text((x, y + sh // 2), "kilnworks.example", fill=(255, 255, 255, 140))
        return _encode(Image.alpha_composite(out, layer).convert("RGB"), "PNG")

    return edit


def _format(fmt: str) -> Callable[[Image.Image, random.Random], bytes]:
    if fmt == "GIF":
        return lambda img, rng: _encode(img.convert("P", palette=Image.Palette.ADAPTIVE, colors=256), "GIF")
    if fmt == "WEBP":
        return lambda img, rng: _encode(img, "WEBP", quality=80)
    return lambda img, rng: _encode(img, fmt)


# Transform family -> named edits. Strength follows the quality target: low JPEG quality, rescale,
# blur, brightness/contrast, format change, border crops up to 8% per side, small corner stamps.
TRANSFORMS: dict[str, dict[str, Callable[[Image.Image, random.Random], bytes]]] = {
    "jpeg": {"jpeg_q10": _jpeg(10), "jpeg_q20": _jpeg(20), "jpeg_q40": _jpeg(40)},
    "rescale": {"scale_0.25": _rescale(0.25), "scale_0.5": _rescale(0.5), "scale_1.6": _rescale(1.6)},
    "blur": {"blur_1": _blur(1.0), "blur_2": _blur(2.0), "blur_3": _blur(3.0)},
    "brightness": {"bright_0.7": _brightness(0.7), "bright_1.3": _brightness(1.3)},
    "contrast": {"contrast_0.6": _contrast(0.6), "contrast_1.5": _contrast(1.5)},
    "format": {"png": _format("PNG"), "webp": _format("WEBP"), "gif": _format("GIF"), "bmp": _format("BMP")},
    "crop": {
        "crop_even_4": _crop(0.04, "even"),
        "crop_even_8": _crop(0.08, "even"),
        "crop_one_8": _crop(0.08, "one"),
        "crop_random_8a": _crop(0.08, "random"),
        "crop_random_8b": _crop(0.08, "random"),
    },
    "stamp": {"stamp_box_12": _stamp("box", 0.12), "stamp_box_18": _stamp("box", 0.18), "watermark_text": _stamp("text", 0.2)},
}


def _crop_share(img: Image.Image, share: float, mode: str, rng: random.Random) -> Image.Image:
    """Cut ``share`` of each side: 'centre' half from each end, 'one' all from one random edge."""
    w, h = img.size
    if mode == "centre":
        fr = [share / 2] * 4
    else:
        fr = [0.0] * 4
        fr[rng.randrange(4)] = share
    return img.crop((round(w * fr[0]), round(h * fr[1]), w - round(w * fr[2]), h - round(h * fr[3])))


# Mirror images and turns (Pillow's Image.transpose; turns are counter-clockwise) and crops of 10-30%
# of a side, alone and combined: the copies the default views were not built for, measured on their
# own (bench/neardup_quality.py). Kept apart from TRANSFORMS, whose every edit the defaults are held to.
HARD_TURNS = {"identity": None, "mirror": "FLIP_LEFT_RIGHT", "rot90": "ROTATE_90", "rot180": "ROTATE_180",
              "rot270": "ROTATE_270"}
HARD_CROPS = {"none": None, **{f"crop_{m}_{p}": (p / 100, m) for p in (10, 20, 30) for m in ("one", "centre")}}


def _hard_edit(turn: str, crop: str) -> Callable[[Image.Image, random.Random], bytes]:
    def edit(img: Image.Image, rng: random.Random) -> bytes:
        out = img if HARD_CROPS[crop] is None else _crop_share(img, *HARD_CROPS[crop], rng)
        if HARD_TURNS[turn]:
            out = out.transpose(getattr(Image.Transpose, HARD_TURNS[turn]))
        return _encode(out, "PNG")

    return edit


def hard_edit_name(turn: str, crop: str) -> str:
    """The edit's name: the turn, the crop, or both joined by '+'."""
    return "+".join(x for x in (turn if turn != "identity" else "", crop if crop != "none" else "") if x)


HARD_EDITS: dict[str, dict[str, Callable[[Image.Image, random.Random], bytes]]] = {
    turn: {hard_edit_name(turn, crop): _hard_edit(turn, crop) for crop in HARD_CROPS if (turn, crop) != ("identity", "none")}
    for turn in HARD_TURNS
}


def hard_variants(name: str, img: Image.Image, seed: int = 0, turns: tuple[str, ...] | None = None,
                  crops: tuple[str, ...] | None = None) -> list[tuple[str, str, bytes]]:
    """(turn, edit, bytes) for the HARD_EDITS of the given turns and crops (default: all);
    deterministic per photo name and seed."""
    out = []
    for turn in turns or tuple(HARD_TURNS):
        for crop in crops or tuple(HARD_CROPS):
            if (turn, crop) == ("identity", "none"):
                continue
            ename = hard_edit_name(turn, crop)
            rng = random.Random(f"{seed}:{name}:{ename}")
            out.append((turn, ename, HARD_EDITS[turn][ename](img, rng)))
    return out


def original_bytes(img: Image.Image) -> bytes:
    """How an original is stored in the test corpus: JPEG quality 95 (common practice for archives)."""
    return _encode(img, "JPEG", quality=95)


def variants(name: str, img: Image.Image, seed: int = 0) -> list[tuple[str, str, bytes]]:
    """(family, edit, bytes) for every edit of one photo; deterministic per photo name and seed."""
    out = []
    for fam, edits in TRANSFORMS.items():
        for ename, fn in edits.items():
            rng = random.Random(f"{seed}:{name}:{ename}")
            out.append((fam, ename, fn(img, rng)))
    return out


def decode_like_inspect(data: bytes) -> Image.Image:
    """Decode bytes the way the inspect stage does (draft mode, EXIF orientation, RGB on white)."""
    from curate.stages.inspect import InspectConfig, inspect_one

    cols, checks, rgb = inspect_one(data, InspectConfig())
    if rgb is None:
        raise ValueError(f"inspect could not decode the test image: {checks}")
    return rgb
