"""Near-duplicate search shared by neardup, split and leakcheck.

- ``codes``:   perceptual codes of one picture, one per view (crop box x transform).
- ``hamming``: exact Hamming range search over codes and over samples with several views.
- ``groups``:  union-find components, and near-duplicate groups with a kept sample (no chaining).
- ``cosine``:  pairs of embeddings at or above a cosine, within one set or across two.
- ``mih``:     the multi-index hashing engine behind ``hamming`` (internal).

Only numpy is imported here; Pillow and imagehash are imported by the functions that need them.
"""
from __future__ import annotations

from .codes import (
    TRANSFORMS,
    CodeSettings,
    View,
    code_count,
    identity_count,
    image_codes,
    match_name,
    matched_transform,
    split_codes,
    view_count,
    views,
)
from .cosine import cosine_pairs, cross_cosine
from .groups import (
    SIGNALS,
    Groups,
    Signals,
    UnionFind,
    components,
    greedy_leaders,
    group,
    sample_components,
)
from .hamming import (
    CHECK_RADIUS,
    RADIUS,
    CodeGraph,
    Pairs,
    ViewPairs,
    closest,
    code_graph,
    cross_pairs,
    cross_set_pairs,
    min_distance,
    min_distances,
    range_pairs,
    sample_cross_pairs,
    sample_pairs,
    view_distances,
)

__all__ = [
    "TRANSFORMS", "CodeSettings", "View", "code_count", "identity_count", "image_codes", "match_name", "matched_transform",
    "split_codes", "view_count", "views",
    "cosine_pairs", "cross_cosine",
    "SIGNALS", "Groups", "Signals", "UnionFind", "components", "greedy_leaders", "group", "sample_components",
    "CHECK_RADIUS", "RADIUS", "CodeGraph", "Pairs", "ViewPairs", "closest", "code_graph", "cross_pairs",
    "cross_set_pairs", "min_distance", "min_distances", "range_pairs", "sample_cross_pairs", "sample_pairs",
    "view_distances",
]
