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
    ds = embed.ImageChunks(locs, embed.ModelDecoder(tuple(lm.pil_steps()), lm.image_size), chunk=3)
    inline = list(embed.iter_chunks(ds, 0))
    threaded = list(embed.iter_chunks(ds, 2, threads=True))
    assert [c[0] for c in threaded] == list(range(len(ds)))
    for (i, px, err), (j, px2, err2) in zip(inline, threaded):
        assert i == j and err == err2 and np.array_equal(px, px2)
    assert inline[-1][2][-1] is not None  # the missing file is an error for its item, not a crash


# ------------------------------------------------------------------ other users of the model: one inference path

# float16 keeps 10 fraction bits (IEEE 754 binary16): a stored entry below 1 in magnitude is within half
# an ulp, 2**-12, of its float32 value.
FP16_HALF_ULP = 2.0 ** -12
# An item's embedding with other batch-mates (tests/test_backends.py BATCH_TOL, common practice).
BATCH = {"fp32": 1e-5, "int8": 1e-4}
ORT = pytest.mark.skipif(not backends.installed("onnxruntime"), reason="onnxruntime extra not installed")


def _config(corpus: Path, cache: str, backend: str, precision: str, *more: str):
    return pipeline_config(*BASE, f'input.path="{corpus}"', f'embed.backend="{backend}"',
                           f'embed.precision="{precision}"', f'embed.cache_dir="{cache}"', *more)


def _stage_embeddings(corpus: Path, cfg, captions: list[str] | None = None) -> tuple[dict, dict]:
    """The embed stage's stored image and caption embeddings of the corpus photos, by file name."""
    import hashlib

    import numpy as np
    import pyarrow as pa

    from conftest import stage_call

    files = sorted(corpus.glob("*.jpg"))
    if captions is None:
        caps = [f.with_suffix(".txt").read_text(encoding="utf-8") for f in files]
    else:  # each given caption beside one of the photos, in turn
        caps, files = captions, [files[i % len(files)] for i in range(len(captions))]
    table = pa.table({"sample_id": [f"s{i:03d}" for i in range(len(caps))], "locator": [str(f) for f in files],
                      "decoded": [True] * len(caps), "sha256": [hashlib.sha256(f.read_bytes()).hexdigest() for f in files],
                      "caption": caps})
    out = stage_call("embed", table, cfg=cfg)
    img = {f.name: np.asarray(v, np.float32) for f, v in zip(files, out.column("image_emb").to_pylist())}
    txt = {c: np.asarray(v, np.float32) for c, v in zip(caps, out.column("text_emb").to_pylist())}
    return img, txt


def _set_embeddings(corpus: Path, cfg, cache_dir: str | None = None):
    """curate.imagesets.set_embeddings of the corpus folder through the eval-set check's own config view."""
    from curate import imagesets

    return imagesets.set_embeddings(imagesets.list_set(corpus), REGISTRY["decontaminate"].view(cfg),
                                    cache_dir=cache_dir)


def _by_name(se) -> dict:
    return {Path(r).name: se.emb[i] for i, r in enumerate(se.images.refs) if se.ok[i]}


@ORT
@pytest.mark.parametrize("precision", ["fp32", "int8"])
def test_eval_set_embeddings_are_the_embed_stages_on_the_runs_path(corpus, cache, precision):
    """The eval-set check and leakcheck embed outside images exactly as the embed stage embeds the run's:
    same model, inference path (int8: the same scales, fitted on the run's input) and decode."""
    import numpy as np

    cfg = _config(corpus, cache, "onnxruntime", precision)
    stage, _ = _stage_embeddings(corpus, cfg)
    se = _set_embeddings(corpus, cfg)
    assert se.path["image"] == f"onnxruntime-{precision}"
    if precision == "int8":  # the run's calibration batch, as the manifest records it
        assert se.path["calibration_sha256"] == embed.identity(REGISTRY["embed"].view(cfg))["calibration_sha256"]
    got = _by_name(se)
    assert set(got) == set(stage) and len(got) == len(PHOTOS)
    bound = BATCH[precision] + FP16_HALF_ULP  # the stage stores float16
    assert max(float(np.abs(got[n] - stage[n]).max()) for n in stage) <= bound
    if precision == "int8":
        # the torch fp32 reference is measurably elsewhere, so the check above tells the paths apart
        ref = _by_name(_set_embeddings(corpus, _config(corpus, cache, "torch", "fp32")))
        assert max(float(np.abs(ref[n] - stage[n]).max()) for n in stage) > 5 * bound


@ORT
def test_the_eval_set_check_fingerprints_the_image_path(corpus, cache):
    st = REGISTRY["decontaminate"]
    check = [f'split.eval_sets=["{corpus}"]', "split.eval_semantic_cosine=0.9"]
    ident = st.identity(st.view(_config(corpus, cache, "onnxruntime", "fp32", *check)))
    assert ident["image_path"] == "onnxruntime-fp32" and set(ident["eval_sets"]) == {str(corpus)}
    assert "image_path" not in st.identity(st.view(_config(corpus, cache, "torch", "fp32", *check)))


@ORT
def test_eval_set_embedding_cache_is_kept_per_inference_path(corpus, cache, tmp_path):
    store = str(tmp_path / "sets")
    n = len(PHOTOS)
    first = _set_embeddings(corpus, _config(corpus, cache, "torch", "fp32"), store)
    assert first.computed == n and first.path["image"] == "torch-fp32"
    assert _set_embeddings(corpus, _config(corpus, cache, "torch", "fp32"), store).computed == 0
    # another backend is another path: recomputed, not read from the torch entries
    ort = _set_embeddings(corpus, _config(corpus, cache, "onnxruntime", "fp32"), store)
    assert ort.computed == n and ort.path["image"] == "onnxruntime-fp32"
    assert _set_embeddings(corpus, _config(corpus, cache, "onnxruntime", "fp32"), store).computed == 0
    # int8 scales fitted on another calibration batch (fewer samples) are other numbers: recomputed
    a = _set_embeddings(corpus, _config(corpus, cache, "onnxruntime", "int8"), store)
    b = _set_embeddings(corpus, _config(corpus, cache, "onnxruntime", "int8", "embed.calibration_samples=8"), store)
    assert a.path["calibration_sha256"] != b.path["calibration_sha256"]
    assert a.computed == n and b.computed == n
    assert _set_embeddings(corpus, _config(corpus, cache, "onnxruntime", "int8"), store).computed == 0


@ORT
def test_concept_prompts_go_through_the_captions_text_tower(corpus, cache):
    """Concept prompts are encoded on the run's text path, so their cosines compare like the captions'."""
    import numpy as np

    from curate.stages import StageContext, concepts

    cfg = _config(corpus, cache, "onnxruntime", "int8")
    texts = tuple(dict.fromkeys(t for p in concepts.probes(cfg.concepts) for t in (*p.prompts, *p.counter_prompts)))
    lm = concepts._model(StageContext(config=REGISTRY["concepts"].view(cfg)))
    assert embed.inference_path(lm)["text"] == "onnxruntime-int8"
    prompts = dict(zip(texts, concepts.prompt_embeddings(lm, texts, cfg.embed.batch_size)))
    _, captions = _stage_embeddings(corpus, cfg, list(texts))  # the same texts, as captions of the run
    bound = BATCH["int8"] + FP16_HALF_ULP
    assert max(float(np.abs(prompts[t] - captions[t]).max()) for t in texts) <= bound
    # on torch fp32 they would be measurably elsewhere
    ref = embed.load(REGISTRY["embed"].view(_config(corpus, cache, "torch", "fp32"))).encode_texts(list(texts), 64)
    assert max(float(np.abs(r - captions[t]).max()) for t, r in zip(texts, ref)) > 5 * bound
    # the text path is in the stage's fingerprint; the reference path adds nothing
    st = REGISTRY["concepts"]
    ident = st.identity(st.view(cfg))
    assert (ident["text_path"], ident["calibration_sha256"]) == ("onnxruntime-int8",
                                                                  embed.inference_path(lm)["calibration_sha256"])
    assert "text_path" not in st.identity(st.view(_config(corpus, cache, "torch", "fp32")))


def _leak_config(tmp_path: Path, cache: str, backend: str, precision: str, input_path: Path | None) -> Path:
    lines = ["[embed]", 'model = "demo"', 'pretrained = ""', f'backend = "{backend}"', f'precision = "{precision}"',
             f'cache_dir = "{cache}"']
    if input_path is not None:
        lines += ["[input]", f'path = "{input_path}"']
    p = tmp_path / f"{backend}-{precision}-{input_path is not None}.toml"
    p.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return p


@ORT
def test_leakcheck_embeds_on_the_configs_path(corpus, cache, tmp_path):
    from curate.leakcheck import leakcheck

    b = photo_corpus(tmp_path / "b", ("coffee", "chelsea"))
    # a path that needs no calibration is used as named
    res = leakcheck(corpus, b, semantic=0.99, config=_leak_config(tmp_path, cache, "onnxruntime", "fp32", None))
    assert res["semantic_path"] == {"image": "onnxruntime-fp32", "text": "onnxruntime-fp32"} and not res["notes"]
    # the same photos in both sets match themselves on the semantic signal too
    assert {(p["a"], p["b"]) for p in res["pairs"]} >= {("coffee.jpg", "coffee.jpg"), ("chelsea.jpg", "chelsea.jpg")}
    # int8 calibrates on the config's input, as the run does: the run's scales
    cfg_file = _leak_config(tmp_path, cache, "onnxruntime", "int8", corpus)
    res = leakcheck(corpus, b, semantic=0.99, config=cfg_file)
    run_view = REGISTRY["embed"].view(_config(corpus, cache, "onnxruntime", "int8"))
    assert res["semantic_path"]["image"] == "onnxruntime-int8"
    assert res["semantic_path"]["calibration_sha256"] == embed.identity(run_view)["calibration_sha256"]
    # without an input to calibrate on: int8 is refused, auto uses the reference and says so
    with pytest.raises(ConfigError, match="embed.precision"):
        leakcheck(corpus, b, semantic=0.99, config=_leak_config(tmp_path, cache, "onnxruntime", "int8", None))
    res = leakcheck(corpus, b, semantic=0.99, config=_leak_config(tmp_path, cache, "auto", "auto", None))
    assert res["semantic_path"] == {"image": "torch-fp32", "text": "torch-fp32"}
    assert any("torch fp32" in n for n in res["notes"])


def test_stages_that_encode_declare_what_the_model_loader_reads():
    """concepts and the eval-set check load the run's model (embed.load reads [embed] and [input])."""
    for name in ("embed", "concepts", "decontaminate"):
        assert set(embed.LOAD_SECTIONS) <= set(REGISTRY[name].view(pipeline_config()).sections()), name
