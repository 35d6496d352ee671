"""watermark: text and logo overlays stamped on the picture (`watermark`), with no model needed.

Reads the image inspect has already decoded, in the same pass. The signal looks for lines of
high-contrast, character-sized thin strokes against the rest of the picture
(curate.imaging.overlay; bench/watermark.py prints its precision/recall curve on stamped and
clean public photos). It works with any CLIP model, or none; where a CLIP concept probe for
watermarks is configured too (`[concepts]`), a sample either of them flags is held back. Flags are
screening aids for human review: faint or tiled stamps are missed, and real text in a scene
(signs, book pages) raises it too.
"""
from __future__ import annotations

import pyarrow as pa

from ..checks import CHECKS_TYPE
from ..imaging import decoded
from ..imaging.overlay import CODE, OverlayConfig, overlay_check, overlay_signal
from .base import CheckSpec, Column, StageContext, checks_column, stage

NAME = "watermark"
VERSION = "1"

COLUMNS = (
    Column("overlay_score", pa.float32(), "how strongly text-like overlay lines stand out (0-1)"),
    Column("overlay_share", pa.float32(), "share of the image covered by overlay lines"),
    Column("overlay_box", pa.list_(pa.int32(), 4), "x, y, width, height of the strongest overlay, displayed pixels"),
)
CHECKS = (
    # Quarantine by default: a stamped image is kept out of training until a reviewer decides (common
    # practice; a model trained on stamps learns to draw them).
    CheckSpec(CODE, "quarantine", "a text or logo overlay (watermark, stamp, caption burnt in) was found",
              ("drop", "flag", "keep", "quarantine"), risk=True),
)


@stage(name=NAME, version=VERSION, config=OverlayConfig, kind="shard", phase="check", sections=("inspect",),
       needs=("image", "sha256"), provides=COLUMNS, checks=CHECKS, cache_key=("sha256",))
def run(table: pa.Table, cfg: OverlayConfig, ctx: StageContext) -> pa.Table:
    """Text and logo overlays in every decoded picture."""
    scores, shares, boxes, checks = [], [], [], []
    for item in decoded.images(table.column("image")):
        if item is None:
            scores.append(None), shares.append(None), boxes.append(None), checks.append([])
        else:
            rgb, scale = item
            res = overlay_signal(rgb, cfg)
            s = scale if scale > 0 else 1.0
            scores.append(res.score)
            shares.append(res.area_share)
            boxes.append(None if res.box is None else [int(round(v / s)) for v in res.box])
            checks.append([overlay_check(res, cfg)])
        if ctx.progress is not None:
            ctx.progress.advance(1)
    return pa.Table.from_arrays(
        [table.column("sample_id"), pa.array(scores, pa.float32()), pa.array(shares, pa.float32()),
         pa.array(boxes, pa.list_(pa.int32(), 4)), pa.array(checks, CHECKS_TYPE)],
        names=["sample_id", *[c.name for c in COLUMNS], checks_column(NAME)])
