"""pack: how kept samples go into training shards (the writing itself is in curate/writers.py).

The image bytes are the original file's by default; options re-encode them or
resize so the short side is N pixels.
"""
from __future__ import annotations

import io
from dataclasses import dataclass
from typing import Literal

from .base import register_section

# Columns the shard writer reads; a config whose active stages do not provide them is refused.
NEEDS = ("caption", "decoded", "sha256", "width", "height", "format")


@dataclass
class PackConfig:
    enabled: bool = True
    # original: the file's own bytes; jpeg | webp | png: re-encode.
    encode: Literal["original", "jpeg", "webp", "png"] = "original"
    # Quality for jpeg/webp re-encoding (common practice: 90-95 keeps artefacts invisible).
    quality: int = 95
    # Resize so the short side is this many pixels (never upscales); 0 keeps the size.
    resize_short_side: int = 0
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
            raise ValueError("resize_short_side needs encode = jpeg, webp or png")


def encode_image(data: bytes, cfg: PackConfig) -> tuple[bytes, str | None, int | None, int | None]:
    """(bytes, format, width, height) for a shard row. width/height are None when unchanged."""
    if cfg.encode == "original":
        return data, None, None, None
    from PIL import Image, ImageOps

    from .inspect import to_rgb

    img = Image.open(io.BytesIO(data))
    img = ImageOps.exif_transpose(img)
    keep_alpha = cfg.encode in ("png", "webp") and ("A" in img.mode or "transparency" in img.info)
    img = img.convert("RGBA") if keep_alpha else to_rgb(img)
    w, h = img.size
    if cfg.resize_short_side and min(w, h) > cfg.resize_short_side:
        s = cfg.resize_short_side / min(w, h)
        img = img.resize((max(1, round(w * s)), max(1, round(h * s))), Image.Resampling.LANCZOS)
    buf = io.BytesIO()
    fmt = {"jpeg": "JPEG", "webp": "WEBP", "png": "PNG"}[cfg.encode]
    kw = {"quality": cfg.quality} if fmt in ("JPEG", "WEBP") else {"optimize": False}
    img.save(buf, format=fmt, **kw)
    return buf.getvalue(), fmt, img.size[0], img.size[1]


register_section("pack", PackConfig)
