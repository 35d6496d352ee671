"""inspect: decode every image once, measure it, and run the size and aspect checks.

Records format, mode, file bytes, sha256, frame count, alpha, location metadata,
and width/height as displayed (after EXIF orientation). The decoded pixels (8-bit
RGB, upright, alpha on white) go on to the other stages of the same per-shard
pass in the transient `image` column, so no stage decodes an image twice.
"""
from __future__ import annotations

import hashlib
import io
import threading
import warnings
from dataclasses import dataclass
from typing import Any

import numpy as np
import pyarrow as pa

from ..checks import CHECKS_TYPE, check
from ..imaging import decoded
from ..sources.base import SOURCE_PROBLEMS
from .base import CheckSpec, Column, StageContext, checks_column, stage

NAME = "inspect"
VERSION = "3"


@dataclass
class InspectConfig:
    enabled: bool = True
    # Decompression-bomb guard: images with more pixels are not decoded (Pillow's default
    # Image.MAX_IMAGE_PIXELS, 89,478,485, is the value used here).
    max_pixels: int = 89_478_485
    # Minimum short side in pixels (SDXL, Podell et al. 2023 sec. 2.2, discusses a 256 px floor).
    min_short_side: int = 256
    # Minimum width*height (256*256, same source as min_short_side).
    min_pixels: int = 65_536
    # Maximum long/short side ratio (common practice: multi-aspect buckets rarely go past 4:1).
    max_aspect: float = 4.0
    # Minimum file size in bytes (LAION-400M, Schuhmann et al. 2021: images under 5 KB dropped).
    min_file_bytes: int = 5_000
    # Decode JPEGs at a reduced DCT scale when the short side stays >= this (Pillow draft mode;
    # about 4x faster here). 0 turns draft mode off.
    draft_short_side: int = 256

    def validate(self) -> None:
        if self.max_aspect < 1:
            raise ValueError(f"max_aspect must be >= 1, got {self.max_aspect}")
        for k in ("max_pixels", "min_short_side", "min_pixels", "min_file_bytes", "draft_short_side"):
            if getattr(self, k) < 0:
                raise ValueError(f"{k} must be >= 0")


# An image that cannot be decoded cannot be trained on: these codes can only drop.
_DROP = ("drop",)
CHECKS = (
    *(CheckSpec(code, "drop", help, _DROP) for code, help in SOURCE_PROBLEMS.items()),
    CheckSpec("file_empty", "drop", "the image file has zero bytes", _DROP),
    CheckSpec("not_image", "drop", "the bytes are not an image format Pillow knows", _DROP),
    # Data that ends early still decodes as far as it goes (the rest is filled); image_garbled can judge
    # how much is lost, so a reviewer may keep such files.
    CheckSpec("truncated", "drop", "the image data ends early"),
    CheckSpec("decode_error", "drop", "the image could not be decoded", _DROP),
    CheckSpec("too_many_pixels", "drop", "more pixels than the decompression-bomb guard allows", _DROP),
    CheckSpec("short_side_small", "drop", "short side below the minimum"),
    CheckSpec("pixels_small", "drop", "fewer pixels than the minimum"),
    CheckSpec("aspect_extreme", "drop", "long/short side ratio above the maximum"),
    CheckSpec("file_small", "drop", "file smaller than the minimum bytes"),
    CheckSpec("source_changed", "drop", "the image's bytes changed after it was inspected, so it was not packed",
              _DROP),
)
# The code the shard writer records when the bytes it re-reads are not the bytes inspected.
CHANGED = "source_changed"

COLUMNS = (
    Column("decoded", pa.bool_(), "the image decoded"),
    Column("width", pa.int32(), "width as displayed (after EXIF orientation)", shard=True),
    Column("height", pa.int32(), "height as displayed (after EXIF orientation)", shard=True),
    Column("format", pa.string(), "the file's image format (Pillow's name)"),
    Column("mode", pa.string(), "the file's pixel mode (Pillow's name)"),
    Column("file_bytes", pa.int64(), "size of the image file"),
    Column("sha256", pa.string(), "SHA-256 of the image file's bytes", shard=True),
    Column("frames", pa.int32(), "frames in the file (animations: the first is used)"),
    Column("has_alpha", pa.bool_(), "the image has transparency"),
    Column("gps", pa.bool_(), "EXIF GPS coordinates present"),
    Column("place", pa.string(), "a place name from XMP/IPTC metadata"),
    Column("image", decoded.IMAGE_TYPE, "decoded pixels for the other stages of this pass", ledger=False,
           transient=True),
    Column("decode_facts", decoded.FACTS_TYPE, "what the decoder knew (JPEG tables, warnings, truncation)",
           ledger=False, transient=True),
)
_BASE_FIELDS = [c for c in COLUMNS if not c.transient]

# EXIF orientations 5-8 rotate by 90 degrees: displayed width and height swap.
_SWAPS_SIDES = {5, 6, 7, 8}


def to_rgb(img: Any) -> Any:
    """Any Pillow image -> 8-bit RGB, alpha composited on white, 16-bit scaled (not clipped)."""
    from PIL import Image

    mode = img.mode
    if mode in ("I;16", "I;16B", "I;16L", "I;16N", "I", "F"):
        arr = np.asarray(img, dtype=np.float64)
        top = 65535.0 if mode != "F" else max(float(arr.max()), 1e-12)
        if mode == "I" and arr.max() > 65535:
            top = float(arr.max())
        arr8 = np.clip(arr / top * 255.0 + 0.5, 0, 255).astype(np.uint8)
        return Image.fromarray(arr8, "L").convert("RGB")
    if mode == "P":
        img = img.convert("RGBA" if "transparency" in img.info else "RGB")
        mode = img.mode
    if mode in ("RGBA", "LA", "PA", "RGBa", "La"):
        rgba = img.convert("RGBA")
        bg = Image.new("RGBA", rgba.size, (255, 255, 255, 255))
        return Image.alpha_composite(bg, rgba).convert("RGB")
    if mode != "RGB":
        return img.convert("RGB")
    return img


def _has_alpha(img: Any) -> bool:
    return img.mode in ("RGBA", "LA", "PA", "RGBa", "La") or "transparency" in img.info


def _orientation(img: Any) -> int:
    try:
        return int(img.getexif().get(0x0112, 1) or 1)
    except Exception:  # a broken EXIF block is not a broken image
        return 1


def _location(img: Any) -> tuple[bool, str | None]:
    """(has GPS coordinates, place text) from EXIF GPS, XMP and IPTC (curate.imaging.metadata)."""
    from ..imaging.metadata import read_location

    try:
        return read_location(img)
    except Exception:  # noqa: BLE001 - unreadable metadata is no location, and never a failed decode
        return False, None


def _failed(code: str, detail: str) -> dict:
    return check(code, failed=True, detail=detail[:120])


def _too_many(pixels: Any, cfg: InspectConfig) -> dict:
    if isinstance(pixels, int):
        return check("too_many_pixels", value=pixels, threshold=cfg.max_pixels, op="<=", unit="pixels")
    return check("too_many_pixels", failed=True, threshold=cfg.max_pixels, op="<=", unit="pixels",
                 detail=str(pixels)[:120])


def inspect_one(data: bytes | Exception, cfg: InspectConfig) -> tuple[dict, list[dict], Any]:
    """Decode one image. Returns (columns, checks, upright 8-bit RGB Pillow image or None)."""
    from PIL import Image, UnidentifiedImageError

    cols: dict[str, Any] = {c.name: None for c in _BASE_FIELDS}
    cols["decoded"] = False
    if isinstance(data, Exception):
        return cols, [_failed("unreadable", type(data).__name__)], None
    cols["file_bytes"] = len(data)
    if len(data) == 0:
        return cols, [check("file_empty", value=0, threshold=0, op=">", unit="bytes")], None
    cols["sha256"] = hashlib.sha256(data).hexdigest()
    checks = [check("file_small", value=len(data), threshold=cfg.min_file_bytes, op=">=", unit="bytes")]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # Pillow warns on odd EXIF/ICC; the verdict comes from the decode itself
        try:
            img = Image.open(io.BytesIO(data))
        except UnidentifiedImageError:
            return cols, checks + [_failed("not_image", "unknown format")], None
        except Image.DecompressionBombError as e:
            return cols, checks + [_too_many(str(e), cfg)], None
        except Exception as e:  # noqa: BLE001 - any decoder failure is this sample's reason
            return cols, checks + [_failed("decode_error", f"{type(e).__name__}: {e}")], None
        return _decode(img, cols, checks, cfg)


def _decode(img: Any, cols: dict, checks: list[dict], cfg: InspectConfig) -> tuple[dict, list[dict], Any]:
    """Decode an opened image; cols gains what it is, and `_facts` what the decoder knew."""
    from PIL import Image

    w, h = img.size
    cols["format"] = img.format
    cols["mode"] = img.mode
    cols["frames"] = int(getattr(img, "n_frames", 1) or 1)
    cols["has_alpha"] = _has_alpha(img)
    orient = _orientation(img)
    cols["gps"], cols["place"] = _location(img)
    if orient in _SWAPS_SIDES:
        w, h = h, w
    if w * h > cfg.max_pixels:
        cols["width"], cols["height"] = w, h
        return cols, checks + [_too_many(w * h, cfg)], None
    qtables = getattr(img, "quantization", None)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            rgb, scale, truncated = _load(img, cfg)
        except OSError as e:
            return cols, checks + [_failed("decode_error", str(e))], None
        except Image.DecompressionBombError as e:
            return cols, checks + [_too_many(str(e), cfg)], None
        except Exception as e:  # noqa: BLE001
            return cols, checks + [_failed("decode_error", f"{type(e).__name__}: {e}")], None
    cols["decoded"] = True
    cols["width"], cols["height"] = int(w), int(h)
    cols["_facts"] = decoded.pack_facts(img.format, qtables, [str(c.message) for c in caught], truncated, scale)
    short, long_ = min(w, h), max(w, h)
    aspect = long_ / max(short, 1)
    checks += [
        check("truncated", failed=truncated, detail="the data ends early; the rest was filled" if truncated else None),
        check("short_side_small", value=short, threshold=cfg.min_short_side, op=">=", unit="px"),
        check("pixels_small", value=w * h, threshold=cfg.min_pixels, op=">=", unit="pixels"),
        check("aspect_extreme", value=round(aspect, 3), threshold=cfg.max_aspect, op="<=", unit=":1"),
    ]
    return cols, checks, rgb


_TRUNCATED_LOCK = threading.Lock()


def _load(img: Any, cfg: InspectConfig) -> tuple[Any, float, bool]:
    """(upright 8-bit RGB image, decoded/true width, whether the data ended early). A JPEG over twice
    `draft_short_side` is decoded at a reduced DCT scale; data that ends early is decoded as far as
    it goes (Pillow's LOAD_TRUNCATED_IMAGES, switched on for that one load)."""
    from PIL import ImageFile, ImageOps

    true_w = img.size[0]
    if img.format == "JPEG" and cfg.draft_short_side > 0 and min(img.size) > 2 * cfg.draft_short_side:
        # Draft picks the smallest DCT scale (1/2, 1/4, 1/8) that keeps the requested size.
        s = cfg.draft_short_side / min(img.size)
        img.draft("RGB", (max(1, int(img.size[0] * s + 0.999)), max(1, int(img.size[1] * s + 0.999))))
    truncated = False
    try:
        img.load()
    except OSError as e:
        if "truncat" not in str(e).lower() and "premature" not in str(e).lower():
            raise
        truncated = True
        with _TRUNCATED_LOCK:  # the switch is process-wide
            old = ImageFile.LOAD_TRUNCATED_IMAGES
            ImageFile.LOAD_TRUNCATED_IMAGES = True
            try:
                img.load()
            finally:
                ImageFile.LOAD_TRUNCATED_IMAGES = old
    scale = img.size[0] / true_w
    return to_rgb(ImageOps.exif_transpose(img)), scale, truncated


@stage(name=NAME, version=VERSION, config=InspectConfig, kind="shard", phase="check", sections=("input",),
       needs=("locator", "source_problem", "file_size", "mtime_ns"), provides=COLUMNS, checks=CHECKS,
       cache_key=("locator", "file_size", "mtime_ns", "source_problem"),
       identity=lambda view: identity())
def run(table: pa.Table, cfg: InspectConfig, ctx: StageContext) -> pa.Table:
    """Decode every image once, record what it is, and check its size and shape."""
    from ..sources import read_bytes

    rows: dict[str, list] = {c.name: [] for c in COLUMNS}
    all_checks: list[list[dict]] = []
    locators = table.column("locator").to_pylist()
    problems = table.column("source_problem").to_pylist()
    todo = [i for i, p in enumerate(problems) if p is None]
    cap = ctx.config.section("input").max_file_bytes
    datas: dict[int, bytes | Exception] = dict(zip(todo, read_bytes([locators[i] for i in todo], max_bytes=cap)))
    for i in range(table.num_rows):
        if problems[i] is not None:
            cols: dict[str, Any] = {c.name: None for c in _BASE_FIELDS}
            cols["decoded"] = False
            chks, rgb = [_failed(problems[i], "source entry")], None
        else:
            cols, chks, rgb = inspect_one(datas.pop(i), cfg)
        for c in _BASE_FIELDS:
            rows[c.name].append(cols[c.name])
        rows["image"].append(None if rgb is None else decoded.pack(np.asarray(rgb), rgb.size[0] / cols["width"]))
        rows["decode_facts"].append(cols.get("_facts"))
        all_checks.append(chks)
        if ctx.progress is not None:
            ctx.progress.advance(1)
    arrays = [table.column("sample_id")] + [pa.array(rows[c.name], type=c.type) for c in COLUMNS]
    arrays.append(pa.array(all_checks, type=CHECKS_TYPE))
    return pa.Table.from_arrays(arrays, names=["sample_id", *[c.name for c in COLUMNS], checks_column(NAME)])


def identity() -> dict:
    """The decoder's version changes this stage's output."""
    import PIL

    return {"pillow": PIL.__version__}
