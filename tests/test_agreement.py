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


def _through(table, *sets):
    """The per-shard pairs step, then the corpus-wide agreement stage, as the runner runs them."""
    from curate.layout import hstack

    pairs = stage_call("agreement_pairs", table, *sets)
    both = hstack([pairs, stage_call("agreement", hstack([table, pairs], "test"), *sets)], "test")
    return both


def _run(cosines, *sets):
    """The stage's rows, with only the agreement_low records in the checks column (the fit check
    is tested on its own below; min_fit_auc 0 keeps it out of the way here)."""
    rows = _through(_table(cosines), "agreement.min_fit_auc=0", *sets).to_pylist()
    for r in rows:
        r[checks_column("agreement")] = [c for c in r[checks_column("agreement")] if c["code"] == "agreement_low"]
    return rows


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
    assert st.kind == "global" and st.alive_only and set(st.needs) == {"agreement", "shuffled_agreement"}
    pairs = REGISTRY["agreement_pairs"]
    assert pairs.kind == "shard" and set(pairs.needs) == {"image_emb", "text_emb"}
    spec = {c.code: c for c in st.checks}["agreement_low"]
    assert spec.action == "drop"


def test_config_validation():
    with pytest.raises(ConfigError):
        pipeline_config("agreement.keep_percent=0")
    with pytest.raises(ConfigError):
        pipeline_config("agreement.threshold=1.5")


# --------------------------------------------------------------------------- model fit on this corpus


def test_fit_auc_is_mann_whitney():
    # ROC AUC = Mann-Whitney U / (n1 * n2) with ties counted half (Hanley & McNeil, Radiology 1982).
    assert agreement.fit_auc(np.array([0.9, 0.8]), np.array([0.1, 0.2])) == 1.0
    assert agreement.fit_auc(np.array([0.1]), np.array([0.9])) == 0.0
    assert agreement.fit_auc(np.array([0.5, 0.9]), np.array([0.5, 0.1])) == pytest.approx(0.875)
    from sklearn.metrics import roc_auc_score  # a reference implementation (scikit-learn)

    rng = np.random.default_rng(0)
    t, f = rng.normal(0.3, 0.1, 200), rng.normal(0.1, 0.1, 300)
    ref = roc_auc_score(np.r_[np.ones(200), np.zeros(300)], np.r_[t, f])
    assert agreement.fit_auc(t, f) == pytest.approx(ref, abs=1e-12)


def test_shuffled_pairs_never_keep_a_caption():
    rng = np.random.default_rng(1)
    img = rng.normal(size=(50, DIM))
    txt = img + 0.01 * rng.normal(size=(50, DIM))  # every true pair nearly identical
    sh = agreement.shuffled_pairs(img, txt, seed=3)
    assert len(sh) == 50 and np.nanmax(sh) < 0.9  # no sample met its own caption
    assert np.array_equal(sh, agreement.shuffled_pairs(img, txt, seed=3))  # the seed fixes the permutation
    assert np.isnan(agreement.shuffled_pairs(img[:1], txt[:1], seed=0)).all()


def _random_pairs(n: int, seed: int) -> list[float]:
    rng = np.random.default_rng(seed)
    return list(rng.uniform(-0.2, 0.2, n))


def test_a_model_that_does_not_know_the_corpus_drops_nothing():
    # Captions no closer to their own images than to others' (cosines near 0 throughout): the fit
    # AUC sits near chance, so agreement_low is not applied and every scored sample is flagged.
    table = _table(_random_pairs(60, 2))
    rows = _through(table, "agreement.threshold=0.1").to_pylist()
    for r in rows:
        recs = {c["code"]: c for c in r[checks_column("agreement")]}
        assert set(recs) == {"agreement_unreliable"} and recs["agreement_unreliable"]["failed"]
        assert recs["agreement_unreliable"]["value"] < 0.85


def test_a_model_that_knows_the_corpus_is_applied_and_its_fit_recorded():
    rows = _through(_table([0.6 + 0.3 * k / 40 for k in range(40)] + [0.05]), "agreement.threshold=0.3").to_pylist()
    recs = [{c["code"]: c for c in r[checks_column("agreement")]} for r in rows]
    assert all(not r["agreement_unreliable"]["failed"] and r["agreement_unreliable"]["value"] > 0.85 for r in recs)
    assert [r["agreement_low"]["failed"] for r in recs] == [False] * 40 + [True]


def test_shuffled_mode_threshold_passes_the_chosen_share_of_shuffled_pairs():
    cos = [0.6 + 0.3 * k / 99 for k in range(100)]
    out = _through(_table(cos), "agreement.mode=shuffled", "agreement.shuffled_pass_percent=5")
    rows = out.to_pylist()
    rec = [c for c in rows[0][checks_column("agreement")] if c["code"] == "agreement_low"][0]
    sh = np.array([r["shuffled_agreement"] for r in rows if r["shuffled_agreement"] is not None])
    assert rec["threshold"] == pytest.approx(np.quantile(sh, 0.95))
    assert (sh >= rec["threshold"]).mean() == pytest.approx(0.05, abs=0.02)
    assert "shuffled" in rec["detail"]


def test_percentile_never_goes_below_the_shuffled_median():
    # Keep the top 100% of a corpus of poor pairs: the cut-off would be the worst true pair, which
    # random captions beat half the time; the shuffled pairs' median is used instead.
    rows = _through(_table(_random_pairs(60, 4)), "agreement.mode=percentile", "agreement.keep_percent=100",
                    "agreement.min_fit_auc=0").to_pylist()
    rec = [c for c in rows[0][checks_column("agreement")] if c["code"] == "agreement_low"][0]
    assert "shuffled pairs' median" in rec["detail"]
    assert sum(c["failed"] for r in rows for c in r[checks_column("agreement")] if c["code"] == "agreement_low") > 0


def test_the_demo_model_on_public_photos_drops_nothing_and_says_why(tmp_path):
    # Public photos (scikit-image and scikit-learn sample images) with true captions: the demo model
    # knows only one invented pottery workshop, so it cannot tell these captions from shuffled ones.
    import json

    from PIL import Image
    from skimage import data
    from sklearn.datasets import load_sample_image

    from curate import api

    photos = {
        "astronaut": (data.astronaut(), "an astronaut in a white spacesuit in front of a flag"),
        "coffee": (data.coffee(), "a cup of coffee on a saucer with a spoon"),
        "chelsea": (data.chelsea(), "a tabby cat looking to the side"),
        "rocket": (data.rocket(), "a rocket on its launch pad under a blue sky"),
        "camera": (data.camera(), "a man with a camera on a tripod in a field"),
        "china": (load_sample_image("china.jpg"), "a temple roof among trees in China"),
        "flower": (load_sample_image("flower.jpg"), "a pink flower with a yellow centre"),
        "hubble": (data.hubble_deep_field(), "distant galaxies in a deep space telescope image"),
        "immuno": (data.immunohistochemistry(), "a stained tissue sample under a microscope"),
        "retina": (data.retina(), "a photograph of the back of a human eye"),
        "motorcycle": (data.stereo_motorcycle()[0], "a red motorcycle parked in a garage"),
        "text": (data.text(), "printed text on a sign photographed at an angle"),
    }
    root = tmp_path / "photos"
    root.mkdir()
    for name, (arr, caption) in photos.items():
        Image.fromarray(arr).convert("RGB").save(root / f"{name}.jpg", quality=92)
        (root / f"{name}.txt").write_text(caption, encoding="utf-8")
    out = tmp_path / "out"
    res = api.run(None, input=str(root), out=str(out), sets=['embed.model="demo"', 'embed.pretrained=""',
                                                            "neardup.enabled=false", "run.workers=1"])
    summary = json.loads((out / "summary.json").read_text())
    assert summary["agreement"]["reliable"] is False and summary["agreement"]["fit_auc"] < 0.85
    assert "agreement_low" not in summary["by_reason"]
    import pyarrow.parquet as pq

    scored = [r for r in pq.read_table(out / "ledger.parquet").to_pylist() if r["agreement"] is not None]
    assert len(scored) >= 10 and all("agreement_unreliable" in r["flags"] and r["kept"] for r in scored)
    assert any("does not know this corpus" in n for n in res.notes)
