"""bench/scale_plan.py: the corpus-wide stages and the verdict keep their results on its synthetic
corpus (caption repeats, agreement, near-duplicate groups and keepers, the split, every decision)."""
from __future__ import annotations

import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "bench"))

import scale_plan  # noqa: E402


def test_results_equal_the_row_wise_implementation():
    # Reference: the digest the row-wise Python stages (commit 100e024 on main) gave for the same
    # 20,000 synthetic rows. The rows come from numpy's random streams (recorded with numpy 2.4.6):
    # if numpy changes those, re-record it with this digest() over that commit's stages.
    run = scale_plan.one(20_000, with_digest=True)
    assert run["digest"] == scale_plan.REFERENCE_DIGESTS[20_000]
    assert run["same_as_reference"]
    assert 0 < run["kept"] < 20_000
