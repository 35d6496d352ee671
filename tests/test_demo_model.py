"""The shipped demo model: its files, and that it tells true captions from mismatched ones.

The sample corpus (sample_corpus/make_corpus.py) plants captions that name another item in a
clearly different glaze (expected.csv reason `agreement_low`); the demo model must rank the true
captions above them: ROC AUC >= 0.95, computed with scikit-learn (the reference implementation).
"""
from __future__ import annotations

import csv
import hashlib
import json
import subprocess
import sys
import tomllib
from pathlib import Path

import numpy as np
import pyarrow as pa
import pytest

from curate.config import load_config
from curate.models import clip as clipmod
from curate.stages import agreement, embed
from curate.stages.base import StageContext
from curate.stages.caption import decode_caption, normalize

ROOT = Path(__file__).resolve().parents[1]


def test_checkpoint_files():
    meta = json.loads(clipmod.DEMO_CONFIG.read_text(encoding="utf-8"))
    data = clipmod.DEMO_WEIGHTS.read_bytes()
    assert len(data) <= 20 * 1024 * 1024
    assert hashlib.sha256(data).hexdigest() == meta["weights_sha256"]
    # safetensors layout (huggingface/safetensors format spec): 8-byte little-endian header length,
    # then a JSON header naming each tensor's dtype.
    n = int.from_bytes(data[:8], "little")
    header = json.loads(data[8:8 + n])
    assert {v["dtype"] for k, v in header.items() if k != "__metadata__"} == {"F16"}
    lm = clipmod.load_model("demo", device="cpu")  # every key must fit the JSON's architecture
    assert lm.trim_text and lm.embed_dim() == meta["model_cfg"]["embed_dim"]
    assert clipmod.identity("demo")["weights_sha256"] == meta["weights_sha256"]


def _corpus_table(root: Path) -> tuple[pa.Table, np.ndarray]:
    """Ordinary samples (label 1) and planted mismatches (label 0) with their sidecar captions."""
    rows, labels = [], []
    with open(ROOT / "sample_corpus" / "expected.csv", encoding="utf-8") as f:
        for r in csv.DictReader(f):
            if r["expect"] == "kept" and not r["reason"]:
                label = 1
            elif r["reason"] == "agreement_low":
                label = 0
            else:
                continue
            img = root / r["source"]
            txt, js = img.with_suffix(".txt"), img.with_suffix(".json")
            if txt.is_file():
                cap, _ = decode_caption(txt.read_bytes())  # the caption stage's own decoding
            else:
                cap = json.loads(js.read_text("utf-8"))["caption"]
            rows.append((r["source"], str(img), hashlib.sha256(img.read_bytes()).hexdigest(), normalize(cap)))
            labels.append(label)
    table = pa.table({"sample_id": [r[0] for r in rows], "locator": [r[1] for r in rows],
                      "decoded": [True] * len(rows), "sha256": [r[2] for r in rows],
                      "caption": [r[3] for r in rows]})
    return table, np.array(labels)


def _agreement(table: pa.Table, **kw) -> np.ndarray:
    conf = load_config(None, sets=['embed.model="demo"', 'embed.pretrained=""', 'embed.device="cpu"'] +
                       [f"embed.{k}={json.dumps(v)}" for k, v in kw.items()], sections={"embed": embed.EmbedConfig})
    out = embed.run(table, conf.embed, StageContext(config=conf))
    img, ok = agreement.embedding_matrix(out.column("image_emb"))
    txt, _ = agreement.embedding_matrix(out.column("text_emb"))
    assert ok.all()
    return agreement.cosines(img, txt)


@pytest.fixture(scope="module")
def corpus_scores(sample_corpus):
    table, labels = _corpus_table(sample_corpus)
    return table, labels, _agreement(table)


def test_demo_auc_on_sample_corpus(corpus_scores):
    from sklearn.metrics import roc_auc_score

    _, labels, cos = corpus_scores
    assert labels.sum() >= 150 and (labels == 0).sum() >= 25  # the corpus plants 30 mismatches
    auc = roc_auc_score(labels, cos)
    print(f"\ndemo model agreement ROC AUC on the sample corpus: {auc:.4f} ({len(labels)} pairs)")
    assert auc >= 0.95


def test_calibrated_threshold_transfers_to_the_corpus(corpus_scores):
    # The threshold was calibrated on other rendered scenes (tools/train_demo_model.py); on the
    # corpus it should still keep most true pairs and drop most mismatches (our demo target:
    # balanced accuracy >= 0.9).
    _, labels, cos = corpus_scores
    thr = clipmod.demo_calibration()["threshold"]
    tpr = float(np.mean(cos[labels == 1] >= thr))
    tnr = float(np.mean(cos[labels == 0] < thr))
    assert (tpr + tnr) / 2 >= 0.9, (tpr, tnr)


def test_int8_quantisation_stays_within_001_of_fp32(corpus_scores):
    # The quantize option is offered only because this holds on the demo corpus (our target: 0.01).
    table, _, cos = corpus_scores
    q = _agreement(table, quantize=True)
    assert np.max(np.abs(q - cos)) <= 0.01


def test_jpeg_draft_decoding_barely_moves_agreement(corpus_scores):
    # Draft mode (reduced DCT scale, down to 1/4 for this 64 px model) vs full decode. Bound: 0.03, the
    # 0.0226 this test measured on the sample corpus rounded up (the 64 px demo model is the most
    # sensitive case, more so since it learned the thin strokes of the shop watermark: ViT-B-32 at
    # 224 px moved by 0.0008, curate/models/BACKENDS.md). What matters is that no pair crosses the
    # demo's thresholds (sample_corpus/curate.toml's and the calibrated one).
    table, _, cos = corpus_scores
    full = _agreement(table, jpeg_draft=False)
    assert np.max(np.abs(full - cos)) <= 0.03
    with open(ROOT / "sample_corpus" / "curate.toml", "rb") as f:
        demo_threshold = tomllib.load(f)["agreement"]["threshold"]
    for thr in (demo_threshold, clipmod.demo_calibration()["threshold"]):
        assert np.array_equal(full >= thr, cos >= thr), thr


@pytest.mark.slow
def test_training_script_is_deterministic(tmp_path):
    args = ["--scenes", "48", "--steps", "3", "--batch", "16", "--stamp-scenes", "48", "--stamp-steps", "3",
            "--calib-scenes", "24", "--concept-scenes", "24", "--threads", "1"]
    shas = []
    for run in ("a", "b"):
        out = tmp_path / run
        subprocess.run([sys.executable, str(ROOT / "tools" / "train_demo_model.py"), "--out", str(out), *args],
                       check=True, cwd=ROOT, capture_output=True, timeout=600)
        shas.append(json.loads((out / clipmod.DEMO_CONFIG.name).read_text())["weights_sha256"])
    assert shas[0] == shas[1]
