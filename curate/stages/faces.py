"""faces: people's faces in the picture, flagged for review (`face`), and their boxes for blurring.

Reads the image inspect has already decoded, in the same pass. The detector is OpenCV's frontal
face Haar cascade, chosen by measurement (curate.imaging.faces; bench/faces.py: recall 0.98 and
no false positive on scikit-image's lfw_subset). With `[risk] face_blur = true` the shards carry
every detected face blurred (Yang et al., ICML 2022: blurring faces costs ImageNet models under one
point of accuracy). A screening aid for human review, not a guarantee: the detector misses small,
turned and occluded faces, and face detectors fail more often for some groups of people.
"""
from __future__ import annotations

import pyarrow as pa

from ..checks import CHECKS_TYPE
from ..imaging import decoded
from ..imaging.faces import CODE, FacesConfig, detect_faces, face_check
from .base import CheckSpec, Column, StageContext, checks_column, stage

NAME = "faces"
VERSION = "1"

BOX = pa.list_(pa.int32(), 4)
COLUMNS = (
    Column("face_count", pa.int32(), "frontal faces found"),
    Column("face_boxes", pa.list_(BOX), "each face as x, y, width, height in the file's displayed pixels"),
    Column("face_share", pa.float32(), "the largest face's share of the image area"),
)
CHECKS = (
    CheckSpec(CODE, "flag", "a person's face was found (a screening aid: small, turned and occluded faces are "
              "missed)", ("drop", "flag", "keep", "quarantine"), risk=True),
)


@stage(name=NAME, version=VERSION, config=FacesConfig, kind="shard", phase="check", sections=("inspect",),
       needs=("image", "sha256"), provides=COLUMNS, checks=CHECKS, cache_key=("sha256",))
def run(table: pa.Table, cfg: FacesConfig, ctx: StageContext) -> pa.Table:
    """Frontal faces in every decoded picture."""
    counts, boxes, shares, checks = [], [], [], []
    for item in decoded.images(table.column("image")):
        if item is None:
            counts.append(None), boxes.append(None), shares.append(None), checks.append([])
        else:
            rgb, scale = item
            res = detect_faces(rgb, cfg)
            s = scale if scale > 0 else 1.0
            counts.append(res.count)
            boxes.append([[int(round(v / s)) for v in b] for b in res.boxes])
            shares.append(res.largest_share)
            checks.append([face_check(res, cfg)])
        if ctx.progress is not None:
            ctx.progress.advance(1)
    return pa.Table.from_arrays(
        [table.column("sample_id"), pa.array(counts, pa.int32()), pa.array(boxes, pa.list_(BOX)),
         pa.array(shares, pa.float32()), pa.array(checks, CHECKS_TYPE)],
        names=["sample_id", *[c.name for c in COLUMNS], checks_column(NAME)])
