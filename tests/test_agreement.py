"""agreement stage: CLIPScore, both threshold modes, nulls, the per-model default table."""
from __future__ import annotations

import math

import numpy as np
import pyarrow as pa
import pytest

from curate.errors import ConfigError
from curate.stages import agreement
from curate.stages.base import REGISTRY, checks_column

from conftest import pipeline_config, stage_call

DIM = 16


def _pair(cos: float) -> tuple[np.ndarray, np.ndarray]:
    """Two unit vectors with exactly this cosine (a rotation inside a random 2-D plane).

    The plane depends on the value only, so equal cosines give identical float16 vectors."""
    rng = np.random.default_rng(int(round((cos + 2.0) * 1e6)))
    q, _ = np.linalg.qr(rng.normal(size=(DIM, 2)))
    a, b = q[:, 0], q[:, 1]
    return a, cos * a + math.sqrt(1 - cos * cos) * b


def _table(cosines: list[float | None]) -> pa.Table:
    img, txt, valid = [], [], []
    for c in cosines:
        if c is None:
            img.append(np.zeros(DIM)), txt.append(np.zeros(DIM)), valid.append(False)
        else:
            a, b = _pair(c)
            img.append(a), txt.append(b), valid.append(True)
    vec = pa.list_(pa.float16(), DIM)
    mask = pa.array([not v for v in valid], type=pa.bool_())

    def col(rows):
        flat = pa.array(np.asarray(rows, dtype=np.float16).reshape(-1), type=pa.float16())
        return pa.FixedSizeListArray.from_arrays(flat, type=vec, mask=mask)

    return pa.table({"sample_id": [f"s{i}" for i in range(len(cosines))], "image_emb": col(img),
                     "text_emb": col(txt)})


def _view(*sets: str):
    return REGISTRY["agreement"].view(pipeline_config(*sets))


def _run(cosines, *sets):
    return stage_call("agreement", _table(cosines), *sets).to_pylist()


def test_clip_score_worked_values():
    # CLIPScore (Hessel et al., EMNLP 2021, arXiv 2104.08718, eq. 1): CLIP-S = 2.5 * max(cos, 0).
    # w = 2.5 was chosen so typical cosines (up to about 0.4) land in [0, 1]: cos 0.4 -> 1.0.
    cos = np.array([0.4, 0.3, 0.0, -0.2, 1.0])
    assert agreement.clip_score(cos) == pytest.approx([1.0, 0.75, 0.0, 0.0, 2.5])


def test_absolute_mode_laion_threshold():
    # LAION-5B (arXiv 2210.08402, sec. 3.1): OpenAI ViT-B/32 cosine < 0.28 dropped.
    rows = _run([0.9, 0.5, 0.27, 0.29, None], "embed.model=ViT-B-32", "embed.pretrained=openai")
    assert [r["sample_id"] for r in rows] == ["s0", "s1", "s2", "s3", "s4"]
    assert [r["agreement"] for r in rows[:4]] == pytest.approx([0.9, 0.5, 0.27, 0.29], abs=2e-3)
    assert [r["clip_score"] for r in rows[:4]] == pytest.approx([2.25, 1.25, 0.675, 0.725], abs=5e-3)
    failed = [[c["failed"] for c in r[checks_column("agreement")]] for r in rows]
    assert failed == [[False], [False], [True], [False], []]
    rec = rows[2][checks_column("agreement")][0]
    assert rec["code"] == "agreement_low" and rec["threshold"] == 0.28 and rec["op"] == ">="
    assert rec["detail"] == "absolute threshold" and rec["unit"] == "cosine"
    assert rows[4]["agreement"] is None and rows[4]["clip_score"] is None


def test_explicit_threshold_overrides_default():
    rows = _run([0.5, 0.6], "agreement.threshold=0.55")
    codes = [r[checks_column("agreement")][0] for r in rows]
    assert [c["failed"] for c in codes] == [True, False]
    assert codes[0]["code"] == "agreement_low" and codes[0]["threshold"] == 0.55


def test_percentile_mode_keeps_top_share():
    # DataComp's CLIP-score baseline keeps the top X% of the pool; here 30% of 10 samples = 3.
    cos = [0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9, 0.95]
    rows = _run(cos + [None], "agreement.mode=percentile", "agreement.keep_percent=30",
                "embed.model=RN50", "embed.pretrained=openai")  # no default needed in this mode
    kept = [r["sample_id"] for r in rows if r[checks_column("agreement")] and
            not r[checks_column("agreement")][0]["failed"]]
    assert kept == ["s7", "s8", "s9"]
    rec = rows[0][checks_column("agreement")][0]
    assert rec["code"] == "agreement_low" and rec["threshold"] == pytest.approx(0.8, abs=2e-3)
    assert "percentile" in rec["detail"] and "30%" in rec["detail"]


def test_percentile_rounds_share_up_and_keeps_ties():
    # 25% of 6 = 1.5 -> 2 kept; a tie with the 2nd best is kept too (common practice: never split ties).
    rows = _run([0.1, 0.5, 0.5, 0.7, 0.2, 0.3], "agreement.mode=percentile", "agreement.keep_percent=25")
    kept = [r["sample_id"] for r in rows if not r[checks_column("agreement")][0]["failed"]]
    assert kept == ["s1", "s2", "s3"]


def test_empty_and_all_null():
    assert _run([], "agreement.mode=percentile") == []
    rows = _run([None, None], "agreement.mode=percentile")
    assert [r[checks_column("agreement")] for r in rows] == [[], []]
    assert all(r["agreement"] is None for r in rows)


def test_float16_storage_keeps_cosine_to_1e3():
    # Stored vectors are float16 (11-bit significand: relative error <= 2**-11 per entry, IEEE 754).
    cos = list(np.linspace(-0.9, 0.95, 25))
    rows = _run(cos, "agreement.threshold=0.0")
    assert [r["agreement"] for r in rows] == pytest.approx(cos, abs=1e-3)


def test_unknown_model_needs_threshold_or_percentile():
    sets = ("embed.model=RN50", "embed.pretrained=openai")
    with pytest.raises(ConfigError, match="percentile"):
        agreement.identity(_view(*sets))
    with pytest.raises(ConfigError, match="agreement.threshold"):
        _run([0.3], *sets)


def test_default_table_and_demo_calibration():
    assert agreement.default_threshold("ViT-B-32", "openai")[0] == 0.28  # LAION-5B sec. 3.1
    thr, source = agreement.default_threshold("demo", "openai")  # a tag does not apply to the demo
    assert -1.0 < thr < 1.0 and "Youden" in source
    ident = agreement.identity(_view("embed.model=demo", "embed.pretrained="))
    assert ident["threshold"] == thr


def test_registered_contract():
    st = REGISTRY["agreement"]
    assert st.kind == "global" and st.alive_only and set(st.needs) == {"image_emb", "text_emb"}
    spec = {c.code: c for c in st.checks}["agreement_low"]
    assert spec.action == "drop"


def test_config_validation():
    with pytest.raises(ConfigError):
        pipeline_config("agreement.keep_percent=0")
    with pytest.raises(ConfigError):
        pipeline_config("agreement.threshold=1.5")
