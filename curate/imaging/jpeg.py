"""JPEG quality estimated from the quantisation tables a file carries.

The reference is ITU-T T.81 (ISO/IEC 10918-1) Annex K, tables K.1 (luminance) and K.2
(chrominance), scaled by the Independent JPEG Group's quality rule (libjpeg's
`jpeg_quality_scaling`, which Pillow, browsers and most tools use). Tables from other encoders
(cameras, some editors) get the nearest quality on that scale and `exact=False`.
"""
from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache
from typing import Mapping, Sequence

import numpy as np

# ITU-T T.81 Annex K, table K.1: luminance quantisation table, natural (row-major) order.
ANNEX_K_LUMA: tuple[int, ...] = (
    16, 11, 10, 16, 24, 40, 51, 61,
    12, 12, 14, 19, 26, 58, 60, 55,
    14, 13, 16, 24, 40, 57, 69, 56,
    14, 17, 22, 29, 51, 87, 80, 62,
    18, 22, 37, 56, 68, 109, 103, 77,
    24, 35, 55, 64, 81, 104, 113, 92,
    49, 64, 78, 87, 103, 121, 120, 101,
    72, 92, 95, 98, 112, 100, 103, 99,
)
# ITU-T T.81 Annex K, table K.2: chrominance quantisation table, natural order.
ANNEX_K_CHROMA: tuple[int, ...] = (
    17, 18, 24, 47, 99, 99, 99, 99,
    18, 21, 26, 66, 99, 99, 99, 99,
    24, 26, 56, 99, 99, 99, 99, 99,
    47, 66, 99, 99, 99, 99, 99, 99,
    *([99] * 32),
)


def ijg_scale(quality: int) -> int:
    """IJG quality (1..100) to the percentage the Annex K tables are scaled by (libjpeg's rule)."""
    q = min(max(int(quality), 1), 100)
    return 5000 // q if q < 50 else 200 - 2 * q


def ijg_table(base: Sequence[int], quality: int) -> tuple[int, ...]:
    """One Annex K table scaled to an IJG quality, entries clamped to 1..255 (baseline JPEG)."""
    s = ijg_scale(quality)
    return tuple(min(max((b * s + 50) // 100, 1), 255) for b in base)


# Every quality's pair of tables, computed once: row q-1 holds quality q.
_LUMA = np.array([ijg_table(ANNEX_K_LUMA, q) for q in range(1, 101)], dtype=np.float64)
_CHROMA = np.array([ijg_table(ANNEX_K_CHROMA, q) for q in range(1, 101)], dtype=np.float64)


@dataclass(frozen=True)
class QualityEstimate:
    quality: int  # nearest IJG quality, 1..100
    exact: bool  # the file's tables are exactly the IJG tables at that quality
    error: float  # mean absolute log2 ratio between the file's tables and the IJG ones (0 = exact)


def estimate_quality(qtables: Mapping[int, Sequence[int]] | None) -> QualityEstimate | None:
    """Nearest IJG quality for the tables Pillow reports as `Image.quantization` (natural order).

    Table 0 is compared with K.1 and table 1 (when present) with K.2; the distance is the mean
    absolute log ratio, so every entry counts by proportion. None when there is no usable table.
    """
    if not qtables or 0 not in qtables or len(qtables[0]) != 64:
        return None
    chroma = qtables.get(1)
    return _estimate(tuple(int(v) for v in qtables[0]),
                     tuple(int(v) for v in chroma) if chroma is not None and len(chroma) == 64 else None)


@lru_cache(maxsize=256)
def _estimate(luma: tuple[int, ...], chroma: tuple[int, ...] | None) -> QualityEstimate:
    tl = np.maximum(np.array(luma, dtype=np.float64), 1)
    diff = np.abs(np.log2(tl) - np.log2(_LUMA)).sum(axis=1)
    exact = (_LUMA == tl).all(axis=1)
    n = 64
    if chroma is not None:
        tc = np.maximum(np.array(chroma, dtype=np.float64), 1)
        diff += np.abs(np.log2(tc) - np.log2(_CHROMA)).sum(axis=1)
        exact &= (_CHROMA == tc).all(axis=1)
        n += 128 - 64
    err = diff / n
    # Ties (only at the clamped ends) go to the higher quality.
    i = int(len(err) - 1 - np.argmin(err[::-1]))
    return QualityEstimate(quality=i + 1, exact=bool(exact[i]), error=round(float(err[i]), 6))
