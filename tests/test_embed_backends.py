"""embed on a compiled backend: config refusals, calibration from the run, the whole pipeline against torch fp32.

Photos: scikit-image's `skimage.data` samples and scikit-learn's sample images (they ship inside
those packages), with plain captions written for this test. Model: the demo model shipped in
curate/models/demo (small, so a pipeline run takes seconds). The reference for every score is the
same pipeline on torch fp32, open_clip's own forward pass.
"""
from __future__ import annotations

import json
import logging
from pathlib import Path

import pyarrow.parquet as pq
import pytest

from curate import api
from curate.cli import main
from curate.errors import ConfigError, ModelError
from curate.models import backends
from curate.stages import embed
from curate.stages.base import REGISTRY

from conftest import pipeline_config

# Agreement scores are cosines of embeddings stored as float16 (11-bit significand, IEEE 754):
# each stored entry is within a relative 2**-11 of the float32 value, which bounds the change of a
# stored cosine by about 2 * 2**-11 = 1e-3 (tests/test_agreement.py checks the same bound).
FP16_STORAGE = 1e-3
# fp32 on another runtime differs from torch only in the order of float32 additions: 1e-5 in
# cosine, the bound tests/test_backends.py uses (FACTS.md measured 1e-7 for OpenVINO fp32).
FP32_RUNTIME = 1e-5
BASE = ['embed.model="demo"', 'embed.pretrained=""', "neardup.enabled=false", "run.workers=1"]

PHOTOS = {
    "astronaut": "an astronaut in a white spacesuit in front of a flag",
    "coffee": "a cup of coffee on a saucer with a spoon",
    "chelsea": "a tabby cat looking to the side",
    "rocket": "a rocket on its launch pad under a blue sky",
    "camera": "a man with a camera on a tripod in a field",
    "china.jpg": "a temple roof among trees in China",
    "flower.jpg": "a pink flower with a yellow centre",
    "hubble_deep_field": "distant galaxies in a deep space telescope image",
    "immunohistochemistry": "a stained tissue sample under a microscope",
    "retina": "a photograph of the back of a human eye",
    "coins": "old coins on a dark background",
    "text": "printed text on a sign photographed at an angle",
}


def photo_corpus(root: Path, names=tuple(PHOTOS)) -> Path:
    """Public photos as JPEGs with .txt caption sidecars."""
    import numpy as np
    from PIL import Image
    from skimage import data
    from sklearn.datasets import load_sample_image

    root.mkdir(parents=True, exist_ok=True)
    for name in names:
        arr = load_sample_image(name) if name.endswith(".jpg") else getattr(data, name)()
        if arr.ndim == 2:
            arr = np.stack([arr] * 3, axis=-1)
        stem = name.removesuffix(".jpg")
        Image.fromarray(arr[..., :3]).convert("RGB").save(root / f"{stem}.jpg", quality=92)
        (root / f"{stem}.txt").write_text(PHOTOS[name], encoding="utf-8")
    return root


@pytest.fixture(scope="module")
def corpus(tmp_path_factory) -> Path:
    return photo_corpus(tmp_path_factory.mktemp("photos") / "in")


@pytest.fixture(scope="module")
def cache(tmp_path_factory) -> str:
    """One export cache for this module: each graph is exported once."""
    return str(tmp_path_factory.mktemp("exports"))


def _run(corpus: Path, out: Path, cache: str, backend: str, precision: str):
    sets = [*BASE, f'embed.backend="{backend}"', f'embed.precision="{precision}"', f'embed.cache_dir="{cache}"']
    res = api.run(None, input=str(corpus), out=str(out), sets=sets)
    rows = {r["sample_id"]: r for r in pq.read_table(out / "ledger.parquet").to_pylist()}
    manifest = json.loads((out / "manifest.json").read_text())
    return res, rows, manifest["stages"]["embed"]


def _agreement_gap(rows: dict, ref: dict) -> float:
    scored = [s for s in ref if ref[s]["agreement"] is not None]
    assert len(scored) >= 10 and all(rows[s]["agreement"] is not None for s in scored)
    return max(abs(rows[s]["agreement"] - ref[s]["agreement"]) for s in scored)


def _decisions(rows: dict) -> dict:
    return {s: (r["kept"], r["reasons"], r["flags"]) for s, r in rows.items()}


# ------------------------------------------------------------------ config and plan-time refusals


def test_typos_and_impossible_combinations_are_refused_by_the_config():
    with pytest.raises(ConfigError, match="embed.backend"):
        pipeline_config("embed.backend=onnx")
    with pytest.raises(ConfigError, match="embed.precision"):
        pipeline_config("embed.precision=int4")
    for sets, why in [(("embed.backend=torch", "embed.precision=int8"), "no static int8"),
                      (("embed.backend=onnxruntime", "embed.precision=bf16"), "no bf16"),
                      (("embed.backend=openvino", "embed.device=cuda"), "CPU only"),
                      (("embed.precision=fp16", "embed.device=cpu"), "CUDA only"),
                      (("embed.backend=onnxruntime", "embed.quantize=true"), "quantize"),
                      (("embed.backend=auto", "embed.tolerance=0"), "tolerance"),
                      (("embed.precision=int8", "embed.backend=openvino", "embed.calibration_samples=2"),
                       "calibration_samples")]:
        with pytest.raises(ConfigError, match=why):
            pipeline_config(*sets)
    cfg = pipeline_config()
    assert (cfg.embed.backend, cfg.embed.precision) == ("torch", "fp32") and cfg.embed.reference


def test_cli_refuses_a_bad_backend_with_one_line_and_exit_2(tmp_path, capsys):
    corpus = photo_corpus(tmp_path / "c", ("coffee",))
    for bad in ("embed.backend=tensorrt", "embed.precision=int8"):  # a typo; torch has no int8
        code = main(["run", "--input", str(corpus), "--out", str(tmp_path / "out"), "--quiet", "--set", bad])
        err = capsys.readouterr().err.strip()
        assert code == 2 and len(err.splitlines()) == 1 and "embed" in err, err


def test_a_path_this_machine_cannot_run_stops_at_plan_time(tmp_path, monkeypatch):
    # Whether bf16 runs is the runtime's own report; pretend torch reports none, whatever this CPU is.
    real = backends.cpu_precisions
    monkeypatch.setattr(backends, "cpu_precisions",
                        lambda b: {**real(b), "bf16": "no bf16 here"} if b == "torch" else real(b))
    corpus = photo_corpus(tmp_path / "c", ("coffee", "chelsea"))
    with pytest.raises(ModelError, match="no bf16 here"):
        api.run(None, input=str(corpus), out=str(tmp_path / "out"),
                sets=[*BASE, "embed.backend=torch", "embed.precision=bf16", "embed.device=cpu"])
    assert not (tmp_path / "out" / "ledger.parquet").exists()


# ------------------------------------------------------------------ calibration from the run


def test_calibration_takes_the_first_decodable_images_of_the_input(tmp_path):
    from curate.models import clip

    corpus = photo_corpus(tmp_path / "c")
    (corpus / "aaa_broken.jpg").write_bytes(b"\xff\xd8\xff not a jpeg")  # first in source order
    (corpus / "aaa_broken.txt").write_text("a broken file", encoding="utf-8")
    cfg = pipeline_config(*BASE, f'input.path="{corpus}"', "embed.calibration_samples=8")
    view = REGISTRY["embed"].view(cfg)
    cal = embed.calibration(view, clip.load_model("demo", device="cpu"))
    # the broken file is skipped; the 8 photos that follow it in name order are taken, with their captions
    assert len(cal.images) == 8 and "a broken file" not in cal.captions
    assert list(cal.captions) == [PHOTOS[n] for n in sorted(PHOTOS, key=lambda n: n.removesuffix(".jpg"))][:8]
    # the same input gives the same batch (int8 scales do not change on a re-run), whatever the shard size
    again = embed.calibration(REGISTRY["embed"].view(pipeline_config(*BASE, f'input.path="{corpus}"',
                                                                     "embed.calibration_samples=8",
                                                                     "input.shard_size=2")), clip.load_model("demo"))
    assert again.digest() == cal.digest()


def test_too_few_images_refuses_int8_and_auto_falls_back_to_torch_fp32_saying_so(tmp_path, caplog):
    corpus = photo_corpus(tmp_path / "c", ("coffee", "chelsea", "rocket"))
    with pytest.raises(ModelError, match="fewer than"):
        api.run(None, input=str(corpus), out=str(tmp_path / "o1"),
                sets=[*BASE, "embed.backend=onnxruntime", "embed.precision=int8"])
    with caplog.at_level(logging.WARNING):
        res = api.run(None, input=str(corpus), out=str(tmp_path / "o2"),
                      sets=[*BASE, "embed.backend=auto", "embed.precision=auto", "embed.device=cpu"])
    assert any("fell back to torch fp32" in n for n in res.notes)
    ident = json.loads((tmp_path / "o2" / "manifest.json").read_text())["stages"]["embed"]
    assert ident["paths"] == {"image": "torch-fp32", "text": "torch-fp32"} and "fewer" in ident["measured"]["fallback"]


# ------------------------------------------------------------------ the pipeline against torch fp32


@pytest.mark.skipif(not backends.installed("onnxruntime"), reason="onnxruntime extra not installed")
def test_pipeline_on_onnxruntime_matches_torch_fp32_and_reruns_only_embed(corpus, cache, tmp_path):
    out = tmp_path / "out"
    _, ref, ref_ident = _run(corpus, out, cache, "torch", "fp32")
    assert "paths" not in ref_ident  # the reference path keeps the fingerprints of earlier versions
    res, rows, ident = _run(corpus, out, cache, "onnxruntime", "fp32")
    assert ident["paths"] == {"image": "onnxruntime-fp32", "text": "onnxruntime-fp32"}
    # switching the backend re-runs embed and what reads embeddings, not the checks before it
    assert res.ran.get("embed") and res.ran.get("agreement") and "inspect" not in res.ran
    assert _agreement_gap(rows, ref) <= FP32_RUNTIME + FP16_STORAGE
    assert _decisions(rows) == _decisions(ref)


@pytest.mark.skipif(not (backends.installed("onnxruntime") or backends.installed("openvino")),
                    reason="no compiled runtime installed")
def test_pipeline_on_auto_keeps_the_demo_decisions_and_records_its_pick(corpus, cache, tmp_path):
    _, ref, _ = _run(corpus, tmp_path / "ref", cache, "torch", "fp32")
    out = tmp_path / "out"
    _, rows, ident = _run(corpus, out, cache, "auto", "auto")
    offered = {backends.path_name(*p) for p in backends.plan("cpu")}
    assert ident["paths"]["image"] in offered and ident["paths"]["text"] in offered
    m = ident["measured"]
    assert m["measured"] and m["max_agreement_diff"] <= ident["tolerance"] == backends.DEFAULT_TOLERANCE
    assert m["calibration"]["images"] == len(PHOTOS)  # fewer photos than calibration_samples: all of them
    # auto may only pick paths within its tolerance of torch fp32 (on the calibration batch, which here
    # is the whole corpus), so every score stays within it plus float16 storage, and no decision changes
    assert _agreement_gap(rows, ref) <= backends.DEFAULT_TOLERANCE + FP16_STORAGE
    assert _decisions(rows) == _decisions(ref)
    # a re-run picks the same paths (remembered for this calibration batch and machine), so the
    # fingerprint holds and nothing re-runs, although the measured figures are recorded again
    res, _, again = _run(corpus, out, cache, "auto", "auto")
    assert again["paths"] == ident["paths"]
    assert not res.ran, res.ran


def test_decode_threads_give_the_inline_result_in_order(corpus):
    """With a compiled runtime loaded the stage decodes in threads (no fork); same pixels, same order."""
    import numpy as np

    from curate.models import clip

    lm = clip.load_model("demo", device="cpu")
    locs = [str(p) for p in sorted(corpus.glob("*.jpg"))] + [str(corpus / "missing.jpg")]
    ds = embed.ImageChunks(locs, lm.pil_steps(), lm.image_size, embed.DRAFT_MARGIN * max(lm.image_size), chunk=3)
    inline = list(embed.iter_chunks(ds, 0))
    threaded = list(embed.iter_chunks(ds, 2, threads=True))
    assert [c[0] for c in threaded] == list(range(len(ds)))
    for (i, px, err), (j, px2, err2) in zip(inline, threaded):
        assert i == j and err == err2 and np.array_equal(px, px2)
    assert inline[-1][2][-1] is not None  # the missing file is an error for its item, not a crash
