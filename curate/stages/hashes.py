"""hashes: perceptual hash codes of every decoded image, in the same pass as inspect.

It reads the image inspect has already decoded (RGB, EXIF orientation applied, alpha on white,
maybe JPEG draft-decoded), so nothing is decoded twice. The codes are 64-bit imagehash codes of
several views (centred and edge-anchored crops, corners masked, optionally mirrored), one list per
sample; `neardup`, `split` and `leakcheck` compare two samples by the closest pair of their views.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Literal

import numpy as np
import pyarrow as pa

from .. import hashing
from ..checks import CHECKS_TYPE
from ..imaging import decoded
from .base import Column, ConfigView, StageContext, checks_column, stage

NAME = "hashes"
# Bump when the codes for the same settings change (image_codes' processing).
VERSION = "2"
CODES = "hash_codes"


@dataclass
class HashesConfig:
    enabled: bool = True
    # imagehash function: "phash" (DCT hash: robust to compression and scaling, Zauner 2010) or "dhash".
    kind: Literal["phash", "dhash"] = "phash"
    # Centred crops, as a share of each side (1.0 = whole picture). 0.92/0.84 undo border crops of
    # 4%/8% per side (measured in bench/neardup_quality.py: plain pHash misses 8% crops entirely).
    scales: list[float] = field(default_factory=lambda: [1.0, 0.92, 0.84])
    # Four more crops of this share touching each edge: undo crops taken mostly from one side
    # (one-sided 8% crops: 14 bits plain, 8 bits with them; bench/neardup_quality.py). 0 = off.
    side_scale: float = 0.92
    # Share of each side masked (set to the picture's mean) in every corner of every crop, so small
    # corner stamps and watermarks do not count (measured: stamps 20+ bits plain, <= 8 masked). 0 = off.
    corner_mask: float = 0.2
    # Also hash the mirrored picture (no perceptual hash survives a flip: Zauner 2010). Doubles codes.
    flip: bool = False
    # The grey picture is resized to this square before cropping, so every source size and JPEG draft
    # decode hashes on the same grid (common practice; 8x imagehash's 32 px DCT input). 0 = off.
    work_size: int = 256

    def validate(self) -> None:
        if not self.scales:
            raise ValueError("scales must list at least one crop share")
        for s in self.scales:
            if not 0.5 <= s <= 1.0:
                raise ValueError(f"scales must be within 0.5..1.0, got {s}")
        if self.side_scale and not 0.5 <= self.side_scale < 1.0:
            raise ValueError(f"side_scale must be 0 (off) or within 0.5..1.0 (exclusive), got {self.side_scale}")
        if not 0.0 <= self.corner_mask < 0.5:
            raise ValueError(f"corner_mask must be within 0..0.5, got {self.corner_mask}")
        if self.work_size < 0 or 0 < self.work_size < 32:
            raise ValueError(f"work_size must be 0 (off) or at least 32, got {self.work_size}")


def variants(cfg: HashesConfig) -> int:
    """Codes per sample."""
    return hashing.variant_count(cfg.scales, cfg.side_scale, cfg.flip)


def columns(view: ConfigView) -> tuple[Column, ...]:
    """One fixed-size list of uint64 codes per sample (null when not decoded)."""
    k = variants(view.section(NAME))
    return (Column(CODES, pa.list_(pa.uint64(), k), "perceptual codes of the image's views", ledger=False),)


def image_codes(img: Any, cfg: HashesConfig) -> list[int]:
    """The codes of one decoded image (RGB Pillow image or HxWx3 uint8 array)."""
    if isinstance(img, np.ndarray):
        from PIL import Image

        img = Image.fromarray(img, "RGB")
    codes = hashing.image_codes(
        img,
        kind=cfg.kind,
        scales=cfg.scales,
        side_scale=cfg.side_scale,
        corner_mask=cfg.corner_mask,
        flip=cfg.flip,
        work_size=cfg.work_size,
    )
    return [int(c) for c in codes]


@stage(name=NAME, version=VERSION, config=HashesConfig, kind="shard", phase="check", needs=("image", "sha256"),
       sections=("inspect",), provides=columns, cache_key=("sha256",), identity=lambda view: identity())
def run(table: pa.Table, cfg: HashesConfig, ctx: StageContext) -> pa.Table:
    """Perceptual codes of every decoded image's views."""
    out: list[list[int] | None] = []
    for item in decoded.images(table.column("image")):
        out.append(None if item is None else image_codes(item[0], cfg))
        if ctx.progress is not None:
            ctx.progress.advance(1)
    col = columns(ctx.config)[0]
    return pa.Table.from_arrays(
        [table.column("sample_id"), pa.array(out, type=col.type), pa.array([[]] * len(out), type=CHECKS_TYPE)],
        names=["sample_id", CODES, checks_column(NAME)])


def identity() -> dict:
    import imagehash

    return {"imagehash": imagehash.__version__}


def codes_matrix(column: pa.ChunkedArray | pa.Array, k: int) -> tuple[np.ndarray, np.ndarray]:
    """A hash column -> (codes uint64 (n, k), valid bool (n,)); rows of null entries are zeros."""
    arr = column.combine_chunks() if isinstance(column, pa.ChunkedArray) else column
    n = len(arr)
    valid = np.asarray(arr.is_valid().to_numpy(zero_copy_only=False), dtype=bool) if n else np.zeros(0, bool)
    codes = np.zeros((n, k), dtype=np.uint64)
    if n == 0 or not valid.any():
        return codes, valid
    if pa.types.is_fixed_size_list(arr.type):
        if arr.type.list_size != k:
            raise ValueError(f"hash column holds {arr.type.list_size} codes per sample, config expects {k}")
        # Null rows may leave null child slots; fill them first, or numpy goes through float64 and
        # silently drops the low bits of every 64-bit code.
        import pyarrow.compute as pc

        child = pc.fill_null(arr.values, 0).to_numpy(zero_copy_only=False)
        flat = child[arr.offset * k : (arr.offset + n) * k].astype(np.uint64, copy=False)
        codes[:] = flat.reshape(n, k)
    else:  # variable-size lists (e.g. read back from another writer)
        for i, v in enumerate(arr.to_pylist()):
            if v is not None:
                if len(v) != k:
                    raise ValueError(f"row {i}: {len(v)} hash codes, config expects {k}")
                codes[i] = np.asarray(v, dtype=np.uint64)
    codes[~valid] = 0
    return codes, valid
