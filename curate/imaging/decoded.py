"""The decoded image as it travels between the stages of one per-shard pass.

The inspect stage decodes each image once (EXIF orientation applied, 8-bit RGB,
alpha composited on white) and hands the pixels on in a transient column of
this type; hashes, quality and face checks read them from there. The column is
never written to disk. `scale` is decoded width / displayed width (below 1 when
a JPEG was decoded at a reduced DCT scale).
"""
from __future__ import annotations

from typing import Any

import numpy as np
import pyarrow as pa

IMAGE_TYPE = pa.struct(
    [
        ("pixels", pa.large_binary()),
        ("width", pa.int32()),
        ("height", pa.int32()),
        ("scale", pa.float32()),
    ]
)


def pack(rgb: np.ndarray, scale: float = 1.0) -> dict:
    """An HxWx3 uint8 array -> one value of the transient image column."""
    arr = np.ascontiguousarray(rgb, dtype=np.uint8)
    if arr.ndim != 3 or arr.shape[2] != 3:
        raise ValueError(f"expected HxWx3 pixels, got shape {arr.shape}")
    return {"pixels": arr.tobytes(), "width": int(arr.shape[1]), "height": int(arr.shape[0]), "scale": float(scale)}


def unpack(value: Any) -> tuple[np.ndarray, float] | None:
    """One value of the transient image column -> (HxWx3 uint8 array, scale), or None for no image."""
    if value is None:
        return None
    if isinstance(value, pa.StructScalar):
        value = value.as_py()
        if value is None:
            return None
    arr = np.frombuffer(value["pixels"], dtype=np.uint8).reshape(value["height"], value["width"], 3)
    return arr, float(value["scale"])


def images(column: pa.ChunkedArray | pa.Array) -> list[tuple[np.ndarray, float] | None]:
    """Every row of an image column as (pixels, scale) or None."""
    return [unpack(v) for v in column.to_pylist()]


# What the decoder knew about one picture (the image-quality checks read it): the format, the JPEG
# quantisation tables (JSON text), Pillow's warnings, whether the data ended early, and the scale.
FACTS_TYPE = pa.struct(
    [
        ("format", pa.string()),
        ("jpeg_qtables", pa.string()),
        ("warnings", pa.list_(pa.string())),
        ("truncated", pa.bool_()),
        ("scale", pa.float32()),
    ]
)


def pack_facts(fmt: str | None, qtables: Any, warnings: list[str], truncated: bool, scale: float) -> dict:
    import json

    tables = None if not qtables else json.dumps({str(int(k)): list(map(int, v)) for k, v in qtables.items()})
    return {"format": fmt, "jpeg_qtables": tables, "warnings": [str(w)[:200] for w in warnings][:20],
            "truncated": bool(truncated), "scale": float(scale)}


def unpack_facts(value: Any) -> Any:
    """One value of the facts column -> curate.imaging.quality.DecodeFacts (None for no value)."""
    import json

    from .quality import DecodeFacts

    if value is None:
        return None
    tables = json.loads(value["jpeg_qtables"]) if value.get("jpeg_qtables") else None
    return DecodeFacts(format=value.get("format"),
                       jpeg_qtables={int(k): v for k, v in tables.items()} if tables else None,
                       warnings=list(value.get("warnings") or []), truncated=bool(value.get("truncated")),
                       scale=float(value.get("scale") or 1.0))
