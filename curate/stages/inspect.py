"""inspect: decode every image once, measure it, and run the size and aspect checks.

Records format, mode, file bytes, sha256, frame count, alpha, and width/height
as displayed (after EXIF orientation). When the `hashes` section is enabled the
perceptual hashes are computed here on the already-decoded image, so no stage
decodes twice for hashing.
"""
from __future__ import annotations

import hashlib
import io
import re
import warnings
from dataclasses import dataclass
from typing import Any

import numpy as np
import pyarrow as pa

from .base import CHECKS_TYPE, CheckSpec, Stage, StageContext, check, checks_column, register

NAME = "inspect"
VERSION = "1"


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


CHECKS = (
    CheckSpec("unsafe_path", "drop", "archive member name is absolute or climbs out with '..'"),
    CheckSpec("unreadable", "drop", "the image file could not be read"),
    CheckSpec("file_empty", "drop", "the image file has zero bytes"),
    CheckSpec("not_image", "drop", "the bytes are not an image format Pillow knows"),
    CheckSpec("truncated", "drop", "the image data ends early"),
    CheckSpec("decode_error", "drop", "the image could not be decoded"),
    CheckSpec("too_many_pixels", "drop", "more pixels than the decompression-bomb guard allows"),
    CheckSpec("short_side_small", "drop", "short side below the minimum"),
    CheckSpec("pixels_small", "drop", "fewer pixels than the minimum"),
    CheckSpec("aspect_extreme", "drop", "long/short side ratio above the maximum"),
    CheckSpec("file_small", "drop", "file smaller than the minimum bytes"),
)

_BASE_FIELDS = [
    pa.field("decoded", pa.bool_()),
    pa.field("width", pa.int32()),
    pa.field("height", pa.int32()),
    pa.field("format", pa.string()),
    pa.field("mode", pa.string()),
    pa.field("file_bytes", pa.int64()),
    pa.field("sha256", pa.string()),
    pa.field("frames", pa.int32()),
    pa.field("has_alpha", pa.bool_()),
    # Location metadata: EXIF GPS coordinates or XMP/IPTC place fields (read for the risk stage).
    pa.field("gps", pa.bool_()),
    pa.field("place", pa.string()),
]

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


_XMP_PLACE = re.compile(
    rb"(photoshop:City|photoshop:State|photoshop:Country|Iptc4xmpCore:Location|exif:GPSLatitude)"
    rb"(?:>|=\")([^<\"]{1,80})"
)


def _location(img: Any) -> tuple[bool, str | None]:
    """(has GPS coordinates, place text) from EXIF GPS IFD 0x8825 and XMP place fields."""
    gps = False
    try:
        ifd = img.getexif().get_ifd(0x8825)
        # GPS IFD tags 2 (GPSLatitude) and 4 (GPSLongitude), EXIF 2.3 (CIPA DC-008).
        gps = bool(ifd.get(2)) and bool(ifd.get(4))
    except Exception:  # a broken EXIF block is not a broken image
        gps = False
    place = None
    xmp = img.info.get("xmp") or img.info.get("XML:com.adobe.xmp")
    if isinstance(xmp, str):
        xmp = xmp.encode("utf-8", "replace")
    if isinstance(xmp, bytes):
        m = _XMP_PLACE.search(xmp)
        if m:
            place = m.group(2).decode("utf-8", "replace").strip() or None
    return gps, place


def inspect_one(data: bytes | Exception, cfg: InspectConfig, hash_cfg: Any = None) -> tuple[dict, list[dict], Any]:
    """Decode one image. Returns (columns, checks, rgb image or None)."""
    from PIL import Image, ImageOps, UnidentifiedImageError

    cols: dict[str, Any] = {f.name: None for f in _BASE_FIELDS}
    cols["decoded"] = False
    if isinstance(data, Exception):
        return cols, [check("unreadable", type(data).__name__, None, True)], None
    cols["file_bytes"] = len(data)
    if len(data) == 0:
        return cols, [check("file_empty", 0, ">0 bytes", True)], None
    cols["sha256"] = hashlib.sha256(data).hexdigest()
    checks = [check("file_small", len(data), f">={cfg.min_file_bytes} bytes", len(data) < cfg.min_file_bytes)]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # Pillow warns on odd EXIF/ICC; the verdict comes from the decode itself
        try:
            img = Image.open(io.BytesIO(data))
        except UnidentifiedImageError:
            return cols, checks + [check("not_image", "unknown format", None, True)], None
        except Image.DecompressionBombError as e:
            return cols, checks + [check("too_many_pixels", str(e)[:60], f"<={cfg.max_pixels}", True)], None
        except Exception as e:  # noqa: BLE001 - any decoder failure is this sample's reason
            return cols, checks + [check("decode_error", f"{type(e).__name__}: {e}"[:120], None, True)], None
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
            checks.append(check("too_many_pixels", w * h, f"<={cfg.max_pixels}", True))
            cols["width"], cols["height"] = w, h
            return cols, checks, None
        if img.format == "JPEG" and cfg.draft_short_side > 0 and min(w, h) > 2 * cfg.draft_short_side:
            # Draft picks the smallest DCT scale (1/2, 1/4, 1/8) that keeps the requested size.
            s = cfg.draft_short_side / min(w, h)
            img.draft("RGB", (max(1, int(img.size[0] * s + 0.999)), max(1, int(img.size[1] * s + 0.999))))
        try:
            img.load()
        except OSError as e:
            msg = str(e)
            code = "truncated" if "truncat" in msg.lower() or "premature" in msg.lower() else "decode_error"
            return cols, checks + [check(code, msg[:120], None, True)], None
        except Image.DecompressionBombError as e:
            return cols, checks + [check("too_many_pixels", str(e)[:60], f"<={cfg.max_pixels}", True)], None
        except Exception as e:  # noqa: BLE001
            return cols, checks + [check("decode_error", f"{type(e).__name__}: {e}"[:120], None, True)], None
        try:
            img = ImageOps.exif_transpose(img)
            rgb = to_rgb(img)
        except Exception as e:  # noqa: BLE001
            return cols, checks + [check("decode_error", f"{type(e).__name__}: {e}"[:120], None, True)], None
    cols["decoded"] = True
    cols["width"], cols["height"] = int(w), int(h)
    short, long_ = min(w, h), max(w, h)
    aspect = long_ / max(short, 1)
    checks += [
        check("short_side_small", short, f">={cfg.min_short_side}", short < cfg.min_short_side),
        check("pixels_small", w * h, f">={cfg.min_pixels}", w * h < cfg.min_pixels),
        check("aspect_extreme", round(aspect, 3), f"<={cfg.max_aspect}", aspect > cfg.max_aspect),
    ]
    return cols, checks, rgb


def _hash_module(ctx: StageContext) -> tuple[Any, Any]:
    hcfg = getattr(ctx.config, "hashes", None)
    if hcfg is None or not getattr(hcfg, "enabled", False):
        return None, None
    from . import hashes

    return hashes, hcfg


def run(table: pa.Table, cfg: InspectConfig, ctx: StageContext) -> pa.Table:
    from ..sources import read_bytes

    hmod, hcfg = _hash_module(ctx)
    hash_fields = hmod.hash_fields(hcfg) if hmod else []
    rows: dict[str, list] = {f.name: [] for f in _BASE_FIELDS + hash_fields}
    all_checks: list[list[dict]] = []
    locators = table.column("locator").to_pylist()
    problems = table.column("source_problem").to_pylist()
    todo = [i for i, p in enumerate(problems) if p is None]
    datas: dict[int, bytes | Exception] = dict(zip(todo, read_bytes([locators[i] for i in todo])))
    for i in range(table.num_rows):
        if problems[i] is not None:
            cols: dict[str, Any] = {f.name: None for f in _BASE_FIELDS}
            cols["decoded"] = False
            chks, rgb = [check(problems[i], "source entry", None, True)], None
        else:
            cols, chks, rgb = inspect_one(datas[i], cfg, hcfg)
        hcols: dict[str, Any] = {}
        if hmod is not None and rgb is not None:
            try:
                hcols = hmod.hash_columns(rgb, hcfg)
            except Exception as e:  # noqa: BLE001 - a hashing failure is this sample's reason
                chks.append(check("decode_error", f"hashing: {type(e).__name__}: {e}"[:120], None, True))
                cols["decoded"] = False
        for f in _BASE_FIELDS:
            rows[f.name].append(cols[f.name])
        for f in hash_fields:
            rows[f.name].append(hcols.get(f.name))
        all_checks.append(chks)
        if ctx.progress is not None:
            ctx.progress.advance(1)
    arrays = [table.column("sample_id")]
    names = ["sample_id"]
    for f in _BASE_FIELDS + hash_fields:
        arrays.append(pa.array(rows[f.name], type=f.type))
        names.append(f.name)
    arrays.append(pa.array(all_checks, type=CHECKS_TYPE))
    names.append(checks_column(NAME))
    return pa.Table.from_arrays(arrays, names=names)


def identity(cfg: Any) -> dict:
    """Library versions that change this stage's output: the decoder and the hash code."""
    import PIL

    out = {"pillow": PIL.__version__}
    if getattr(cfg.hashes, "enabled", False):
        import imagehash

        from . import hashes

        out.update({"hashes_version": hashes.VERSION, "imagehash": imagehash.__version__})
    return out


register(
    Stage(
        name=NAME,
        version=VERSION,
        config_cls=InspectConfig,
        fn=run,
        kind="shard",
        inputs=(),
        reads_sections=("hashes",),
        checks=CHECKS,
        identity=identity,
    )
)
