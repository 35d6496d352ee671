"""pack: how kept samples' images go into the training shards (the writing itself is in curate/writers.py).

By default (`encode = "auto"`) a shard holds only what the usual training decoders read: JPEG,
PNG or WebP, 8-bit RGB (RGBA when alpha is kept), upright, one frame. A file that already is
exactly that keeps its own bytes, with privacy-relevant metadata (EXIF GPS, serial numbers, XMP,
IPTC) removed from its container without touching the compressed pixels; anything else (CMYK,
16-bit, palette, greyscale, BMP, TIFF, GIF, an EXIF-rotated photo, a file whose container cannot
be cleaned) is decoded and re-encoded. The stored width and height are always what a decoder
returns.
"""
from __future__ import annotations

import io
import warnings
from dataclasses import dataclass, field
from typing import Any, Literal

from .base import register_section

# Columns the shard writer reads; a config whose active stages do not provide them is refused.
NEEDS = ("caption", "decoded", "sha256", "width", "height", "format")
# Settings of the shard writer that need a column: (setting, column it needs, is the setting on?).
OPTION_NEEDS = (
    ("risk.face_blur", "face_boxes", lambda cfg: bool(getattr(cfg.risk, "face_blur", False))),
    ("pack.crop_borders", "content_box", lambda cfg: bool(cfg.pack.crop_borders)),
)
# Formats kept as they are (common practice: what PIL, torchvision.io and the usual data loaders
# decode without extra codecs).
TRAINING_FORMATS = ("JPEG", "PNG", "WEBP")
_SAVE = {"jpeg": "JPEG", "png": "PNG", "webp": "WEBP"}


@dataclass
class PackConfig:
    enabled: bool = True
    # auto: a file's own bytes when it already is 8-bit RGB JPEG/PNG/WebP, upright, one frame (its
    # metadata cleaned), otherwise re-encoded as `reencode`; jpeg | webp | png: re-encode everything;
    # original: the file's own bytes whatever they are (metadata cleaned where the format allows).
    encode: Literal["auto", "original", "jpeg", "webp", "png"] = "auto"
    # Format for images that auto mode must re-encode (common practice: JPEG at quality 95 is
    # visually lossless for photos and the smallest the usual loaders read).
    reencode: Literal["jpeg", "webp", "png"] = "jpeg"
    # Quality for jpeg/webp re-encoding (common practice: 90-95 keeps artefacts invisible).
    quality: int = 95
    # Keep transparency (RGBA, stored as PNG or WebP); off: composite on white, as the checks saw it.
    keep_alpha: bool = False
    # Keep the files' metadata (EXIF, XMP, IPTC: GPS positions, camera serial numbers, names) in the
    # shards. Off by default: training needs none of it and it can identify people and places.
    keep_metadata: bool = False
    # Crop letterbox, pillarbox and frame bands off (the quality stage's content box), so a sample the
    # image_bordered check lets through (e.g. its action set to flag) is stored without its bands.
    crop_borders: bool = False
    # Resize so the short side is this many pixels (never upscales); 0 keeps the size.
    resize_short_side: int = 0
    # Aspect buckets for multi-aspect training (SDXL, Podell et al. 2023, sec. 2.3): a target area in
    # pixels (e.g. 1048576 for 1024^2) to generate them from, sides multiples of bucket_step; 0 = off.
    bucket_area: int = 0
    # Side step of generated buckets (SDXL: 64).
    bucket_step: int = 64
    # Largest aspect ratio of a generated bucket (common practice: 4:1, as inspect.max_aspect).
    bucket_max_aspect: float = 4.0
    # Or an explicit list of [width, height] buckets (used instead of generating them when given).
    buckets: list[list[int]] = field(default_factory=list)
    # A shard closes at this many rows ...
    max_rows: int = 10_000
    # ... or at this many bytes of image data (common practice: shards of 100 MB - 1 GB stream well).
    max_bytes: int = 512 * 1024 * 1024
    # Parquet compression for shards and ledger.
    compression: Literal["zstd", "snappy", "gzip", "none"] = "zstd"

    def validate(self) -> None:
        if not 1 <= self.quality <= 100:
            raise ValueError(f"quality must be 1-100, got {self.quality}")
        if self.max_rows < 1 or self.max_bytes < 1:
            raise ValueError("max_rows and max_bytes must be >= 1")
        if self.resize_short_side < 0:
            raise ValueError("resize_short_side must be >= 0")
        if self.encode == "original" and self.resize_short_side:
            raise ValueError("resize_short_side needs encode = auto, jpeg, webp or png")
        if self.bucket_area < 0 or self.bucket_step < 1 or self.bucket_max_aspect < 1:
            raise ValueError("bucket_area must be >= 0, bucket_step >= 1 and bucket_max_aspect >= 1")
        if any(len(b) != 2 or min(b) < 1 for b in self.buckets):
            raise ValueError("buckets must be [width, height] pairs of positive integers")
        if self.keep_alpha and "jpeg" in (self.encode, self.reencode):
            raise ValueError("keep_alpha needs png or webp output (encode, or reencode in auto mode)")


def bucket_list(cfg: PackConfig) -> list[tuple[int, int]]:
    """The configured buckets: the explicit list, else generated from bucket_area (empty: off)."""
    from ..buckets import make_buckets

    if cfg.buckets:
        return [(int(w), int(h)) for w, h in cfg.buckets]
    return make_buckets(cfg.bucket_area, cfg.bucket_step, cfg.bucket_max_aspect)


@dataclass(frozen=True)
class Packed:
    data: bytes
    format: str
    width: int
    height: int
    reencoded: bool


def _header(data: bytes) -> tuple[Any, int]:
    """The opened image (pixels not decoded) and its EXIF orientation."""
    from PIL import Image

    img = Image.open(io.BytesIO(data))
    try:
        orientation = int(img.getexif().get(0x0112, 1) or 1) if img.format in ("JPEG", "WEBP", "MPO") else 1
    except Exception:  # noqa: BLE001 - a broken EXIF block: decode and re-encode to be sure
        orientation = 0
    return img, orientation


def ready_as_is(img: Any, orientation: int, cfg: PackConfig) -> bool:
    """Whether a file's own bytes already decode to what a shard promises."""
    modes = ("RGB", "RGBA") if cfg.keep_alpha else ("RGB",)
    return (img.format in TRAINING_FORMATS and img.mode in modes and orientation == 1
            and int(getattr(img, "n_frames", 1) or 1) == 1 and not (img.mode == "RGB" and "transparency" in img.info))


def pack_image(data: bytes, cfg: PackConfig, *, edit: Any = None) -> Packed:
    """The bytes a shard stores for one image. `edit(rgb_pillow_image) -> image`, when given (face
    blurring, border cropping), forces a decode and re-encode."""
    from ..imaging.metadata import MetadataError, strip_metadata

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        img, orientation = _header(data)
        keep = cfg.encode == "original" or (cfg.encode == "auto" and ready_as_is(img, orientation, cfg))
        if keep and edit is None and not cfg.resize_short_side:
            out, fmt = data, img.format
            if not cfg.keep_metadata:
                try:
                    out = strip_metadata(data, img.format, keep_orientation=cfg.encode == "original")
                    fmt = "JPEG" if img.format == "MPO" else img.format
                except MetadataError:
                    if cfg.encode == "auto":
                        return _reencode(img, cfg, edit, _SAVE[cfg.reencode])
            w, h = img.size  # what a decoder returns (original mode may keep an EXIF orientation)
            return Packed(out, fmt, w, h, False)
        target = _SAVE[cfg.encode] if cfg.encode in _SAVE else _SAVE[cfg.reencode]
        return _reencode(img, cfg, edit, target)


def _reencode(img: Any, cfg: PackConfig, edit: Any, fmt: str) -> Packed:
    from PIL import Image, ImageOps

    from .inspect import to_rgb

    img.load()
    img = ImageOps.exif_transpose(img)
    alpha = cfg.keep_alpha and fmt in ("PNG", "WEBP") and (img.mode in ("RGBA", "LA", "PA") or
                                                           "transparency" in img.info)
    img = img.convert("RGBA") if alpha else to_rgb(img)
    if edit is not None:
        img = edit(img)
    w, h = img.size
    if cfg.resize_short_side and min(w, h) > cfg.resize_short_side:
        s = cfg.resize_short_side / min(w, h)
        img = img.resize((max(1, round(w * s)), max(1, round(h * s))), Image.Resampling.LANCZOS)
    buf = io.BytesIO()
    kw = {"quality": cfg.quality} if fmt in ("JPEG", "WEBP") else {"optimize": False}
    img.save(buf, format=fmt, **kw)  # no exif=...: nothing of the source's metadata is carried over
    return Packed(buf.getvalue(), fmt, img.size[0], img.size[1], True)


register_section("pack", PackConfig)
