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
