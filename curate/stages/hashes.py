"""hashes: perceptual hash codes of every decoded image, in the same pass as inspect.

It reads the image inspect has already decoded (RGB, EXIF orientation applied, alpha on white,
maybe JPEG draft-decoded), so nothing is decoded twice. The codes are 64-bit imagehash codes of
several views (centred and edge-anchored crops, corners masked, then each listed transform such as
the mirror image), plus a check code of another hash family per view, one list per sample
(curate.similarity.image_codes); `neardup`, `split` and `leakcheck` compare two samples by the
closest allowed pair of their views.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Literal

import numpy as np
import pyarrow as pa

from .. import similarity
from ..checks import CHECKS_TYPE
from ..imaging import decoded
from .base import Column, ConfigView, StageContext, checks_column, stage

NAME = "hashes"
# Bump when the codes for the same settings change (curate.similarity.codes.VERSION covers the
# code maker itself and is part of the identity below).
VERSION = "3"
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
    # Transformed views, any of mirror, rot90, rot180, rot270, mirror_rot90, mirror_rot180,
    # mirror_rot270. No perceptual hash survives a flip (Zauner 2010); mirrored copies count as
    # copies for training (common practice), so the mirror is on by default. Each transform adds as
    # many views as transform_boxes. Measured: mirrored copies of public photos found at recall 1.0
    # with no false merge (bench/neardup_quality.py). Caution for archives of symmetric objects on
    # plain backdrops: a mirrored whole picture can land within the radius of a crop of a different
    # shot of the same layout (2 false merges among the sample corpus's 344 synthetic product
    # shots); such archives set [] (a false merge loses a picture, a missed mirror keeps one extra).
    transforms: list[str] = field(default_factory=lambda: ["mirror"])
    # Crops hashed for each transform: "all" (every crop above) or "whole" (the whole picture only).
    # Measured on public photos (bench/neardup_quality.py, mirror): "whole" makes 16 codes instead
    # of 28 and keeps different photos 12 bits apart instead of 10; mirrored copies are found at
    # recall 1.0 either way, mirrored copies also cropped 10% on one side at 0.80 instead of 0.95.
    transform_boxes: Literal["all", "whole"] = "whole"
    # The grey picture is resized to this square before cropping, so every source size and JPEG draft
    # decode hashes on the same grid (common practice; 8x imagehash's 32 px DCT input). 0 = off.
    work_size: int = 256
    # A check code per view of another hash family ("dhash", "phash" or "" for none): a view pair
    # matches only when its check codes are within neardup.check_radius too. Different photos whose
    # pHash views collide differ by 18+ bits in dHash on those views (bench/neardup_quality.py).
    check: str = "dhash"

    def validate(self) -> None:
        code_settings(self).validate()


def code_settings(cfg: HashesConfig) -> similarity.CodeSettings:
    """The curate.similarity code settings of a [hashes] section."""
    return similarity.CodeSettings(kind=cfg.kind, scales=list(cfg.scales), side_scale=cfg.side_scale,
                                   corner_mask=cfg.corner_mask, transforms=list(cfg.transforms),
                                   transform_boxes=cfg.transform_boxes, work_size=cfg.work_size, check=cfg.check)


def variants(cfg: HashesConfig) -> int:
    """Codes per sample (main codes of every view, then their check codes)."""
    return similarity.code_count(code_settings(cfg))


def columns(view: ConfigView) -> tuple[Column, ...]:
    """One fixed-size list of uint64 codes per sample (null when not decoded)."""
    k = variants(view.section(NAME))
    return (Column(CODES, pa.list_(pa.uint64(), k), "perceptual codes of the image's views", ledger=False),)


def image_codes(img: Any, cfg: HashesConfig) -> list[int]:
    """The codes of one decoded image (RGB Pillow image or HxWx3 uint8 array)."""
    if isinstance(img, np.ndarray):
        from PIL import Image

        img = Image.fromarray(img, "RGB")
    return [int(c) for c in similarity.image_codes(img, code_settings(cfg))]


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

    from ..similarity import codes

    return {"imagehash": imagehash.__version__, "codes": codes.VERSION}


def codes_matrix(column: pa.ChunkedArray | pa.Array, k: int) -> tuple[np.ndarray, np.ndarray]:
    """A hash column -> (codes uint64 (n, k), valid bool (n,)); rows of null entries are zeros. When
    every row holds codes, the codes are a read-only view of the column's buffer (no copy)."""
    if isinstance(column, pa.ChunkedArray):
        arr = column.chunk(0) if column.num_chunks == 1 else column.combine_chunks()
    else:
        arr = column
    n = len(arr)
    valid = np.asarray(arr.is_valid().to_numpy(zero_copy_only=False), dtype=bool) if n else np.zeros(0, bool)
    fixed = pa.types.is_fixed_size_list(arr.type)
    if n and valid.all() and fixed and arr.type.list_size == k and pa.types.is_uint64(arr.type.value_type) \
            and arr.values.null_count == 0:
        return arr.values.to_numpy()[arr.offset * k : (arr.offset + n) * k].reshape(n, k), valid
    codes = np.zeros((n, k), dtype=np.uint64)
    if n == 0 or not valid.any():
        return codes, valid
    if fixed:
        if arr.type.list_size != k:
            raise ValueError(f"hash column holds {arr.type.list_size} codes per sample, config expects {k}")
        # Null rows may leave null child slots; fill them first, or numpy goes through float64 and
        # silently drops the low bits of every 64-bit code.
        import pyarrow.compute as pc

        child = (arr.values if arr.values.null_count == 0 else pc.fill_null(arr.values, 0)).to_numpy(
            zero_copy_only=False)
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


@dataclass
class Codes:
    """A table's hash column laid out for curate.similarity."""

    main: np.ndarray  # uint64 (n, views): one main code per view, identity views first
    checks: np.ndarray | None  # uint64 (n, views): the check code of each view, or None
    valid: np.ndarray  # bool (n,): rows whose codes exist (decoded images)
    identity: int  # leading identity views
    views: list[similarity.View]  # what each column of `main` is

    def rows(self, rows: np.ndarray) -> Codes:
        """The same codes for a subset of rows (increasing row numbers); all rows: these codes, not a copy."""
        if len(rows) == self.valid.shape[0]:
            return self
        return Codes(self.main[rows], None if self.checks is None else self.checks[rows], self.valid[rows],
                     self.identity, self.views)


def read_codes(table: pa.Table, cfg: HashesConfig) -> Codes | None:
    """The hash column of a table as ``Codes`` (None when the table has no hash column)."""
    if CODES not in table.column_names:
        return None
    s = code_settings(cfg)
    c, valid = codes_matrix(table.column(CODES), similarity.code_count(s))
    main, checks = similarity.split_codes(c, s)
    return Codes(main, checks, valid, similarity.identity_count(s), similarity.views(s))
