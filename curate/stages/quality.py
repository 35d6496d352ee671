"""quality: is the picture worth training on? Blur, blank, exposure, bands, upscaling, damage.

Reads the image inspect has already decoded, and what its decoder knew (JPEG tables, warnings,
truncation), in the same pass; the measures are curate.imaging.quality's, each tested on public
photos degraded by known amounts (bench/quality_checks.py prints recall per level, and no clean
photo raises an alarm). The numbers go to the ledger: `sharpness`, `jpeg_quality` and
`border_share` also decide which copy of a near-duplicate group is kept, and the content box can
crop letterbox bands off in the shards (`[pack] crop_borders`).
"""
from __future__ import annotations

import pyarrow as pa

from ..checks import CHECKS_TYPE
from ..imaging import decoded
from ..imaging.quality import CODES, QualityConfig, measure, quality_checks
from .base import CheckSpec, Column, StageContext, checks_column, stage

NAME = "quality"
VERSION = "1"

CHECKS = tuple(CheckSpec(code, action, help) for code, (action, help) in CODES.items())

# Measures written to the ledger (all in the file's own pixels where they are sizes).
COLUMNS = (
    Column("sharpness", pa.float32(), "Laplacian variance at full over half scale (higher: sharper)"),
    Column("spatial_info", pa.float32(), "ITU-T P.910 spatial information at the working size"),
    Column("luma_mean", pa.float32(), "mean brightness, 0-255"),
    Column("clip_bright", pa.float32(), "share of pixels clipped to white"),
    Column("border_share", pa.float32(), "share of the area in letterbox, pillarbox or frame bands"),
    Column("content_box", pa.list_(pa.int32(), 4), "x0, y0, x1, y1 of the picture inside any bands"),
    Column("upscale_factor", pa.float32(), "estimated enlargement from the native size (1 = none)"),
    Column("native_width", pa.int32(), "estimated width before any enlargement"),
    Column("native_height", pa.int32(), "estimated height before any enlargement"),
    Column("garbled_share", pa.float32(), "share of the picture lost to damaged data (fill or block seam)"),
    Column("jpeg_quality", pa.float32(), "JPEG quality on the IJG scale, from the quantisation tables"),
)


def _int(v: float | None) -> int | None:
    return None if v is None else int(round(v))


def _row(m: dict) -> dict:
    box = [m.get(k) for k in ("content_x0", "content_y0", "content_x1", "content_y1")]
    garbled = max(m.get("decoder_fill_share") or 0.0, m.get("seam_after_share") or 0.0)
    return {
        "sharpness": m.get("sharpness"), "spatial_info": m.get("spatial_info"), "luma_mean": m.get("luma_mean"),
        "clip_bright": m.get("clip_bright"), "border_share": m.get("border_share"),
        "content_box": None if any(v is None for v in box) else [_int(v) for v in box],
        "upscale_factor": m.get("upscale_factor"), "native_width": _int(m.get("native_width")),
        "native_height": _int(m.get("native_height")), "garbled_share": garbled,
        "jpeg_quality": m.get("jpeg_quality"),
    }


@stage(name=NAME, version=VERSION, config=QualityConfig, kind="shard", phase="check", sections=("inspect",),
       needs=("image", "decode_facts", "sha256"), provides=COLUMNS, checks=CHECKS, cache_key=("sha256",))
def run(table: pa.Table, cfg: QualityConfig, ctx: StageContext) -> pa.Table:
    """Image-quality measures of every decoded picture, and their checks."""
    rows: dict[str, list] = {c.name: [] for c in COLUMNS}
    out_checks: list[list[dict]] = []
    facts = table.column("decode_facts").to_pylist()
    for item, f in zip(decoded.images(table.column("image")), facts):
        if item is None:
            for c in COLUMNS:
                rows[c.name].append(None)
            out_checks.append([])
        else:
            try:
                m = measure(item[0], decoded.unpack_facts(f))
            except Exception as e:  # noqa: BLE001 - a picture the measures cannot read is no verdict
                m = {"_error": f"{type(e).__name__}: {e}"}
            for k, v in _row(m).items():
                rows[k].append(v)
            out_checks.append(quality_checks(m, cfg) if "_error" not in m else [])
        if ctx.progress is not None:
            ctx.progress.advance(1)
    arrays = [table.column("sample_id")] + [pa.array(rows[c.name], c.type) for c in COLUMNS]
    arrays.append(pa.array(out_checks, CHECKS_TYPE))
    return pa.Table.from_arrays(arrays, names=["sample_id", *[c.name for c in COLUMNS], checks_column(NAME)])
