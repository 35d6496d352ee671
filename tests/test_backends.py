"""Inference backends (curate.models.backends) against torch fp32, and the fast preprocessing.

Every installed (backend, precision) path is run on the same public photos and captions and
compared with open_clip's torch fp32 forward pass, the reference. Photos: scikit-image's
`skimage.data` samples, scikit-learn's sample images and matplotlib's grace_hopper.jpg (all ship
inside those packages). Captions are plain descriptions of those photos, written for this test.

Tolerances, per precision (1 - cos of embeddings; largest change of any image-caption cosine):
- fp32 on another runtime: 1e-5 / 1e-5. Only the order of float32 additions differs; the
  measurement table in /work/shared/FACTS.md found 1e-7 for OpenVINO fp32 (100x headroom).
- bf16: 5e-4 / 0.005. FACTS.md measured 4.9e-5..9.1e-5 (OpenVINO bf16, ViT-B-32) and an agreement
  change <= 0.0021 for bf16; bounds rounded up about 2-10x. The demo model's agreement bound is
  0.015 instead: its 64 px, 128-wide towers stored in float16 moved cosines by 0.0073 (torch bf16)
  and 0.0079 (OpenVINO bf16) on a Zen 4 CPU with AVX-512 BF16 (measured by this test), rounded up
  about 2x. `auto`'s default tolerance (0.005) therefore keeps the demo model off bf16.
- int8 (static, calibrated): 1 - cos <= 0.01 per tower (FACTS.md: 7.9e-3 for static int8 of the
  image tower, rounded up); agreement with the int8 image tower and the fp32 text tower <= 0.02
  (0.017 measured for static int8 on the image tower, same source, rounded up).
Batch independence: an item's embedding with different batch-mates may differ only by float
reassociation: 1e-5 for float paths; 1e-4 for int8, where a one-ulp float difference before a
requantisation can move one int8 step (common practice).
"""
from __future__ import annotations

import io
import json
import os
from pathlib import Path

import numpy as np
import pytest

from curate.errors import ModelError
from curate.models import backends, clip, export, preprocess

TOL = {  # precision -> (max 1 - cos per tower, max agreement change); sources in the module docstring
    "fp32": (1e-5, 1e-5),
    "bf16": (5e-4, 0.005),
    "int8": (0.01, 0.02),
}
BATCH_TOL = {"fp32": 1e-5, "bf16": 1e-5, "int8": 1e-4}
DEMO_AGREEMENT_TOL = {"bf16": 0.015}  # the demo model's own bound (module docstring)

# name -> caption, for the public photos below
PHOTOS = {
    "astronaut": "an astronaut in a white spacesuit in front of a flag",
    "coffee": "a cup of coffee with latte art on a saucer",
    "chelsea": "a tabby cat looking to the side",
    "rocket": "a rocket standing on a launch pad",
    "hubble_deep_field": "many small galaxies in deep space",
    "immunohistochemistry": "a microscope image of stained tissue",
    "retina": "a photograph of the retina of an eye",
    "colorwheel": "a colour wheel",
    "camera": "a man with a camera on a tripod, black and white",
    "coins": "old coins on a dark background",
    "moon": "the surface of the moon",
    "clock": "a clock on a wall",
    "brick": "a brick wall",
    "grass": "grass seen from above",
    "gravel": "grey gravel",
    "page": "a printed page of text",
    "china.jpg": "a chinese temple with a pagoda roof",
    "flower.jpg": "a flower with pink petals",
    "grace_hopper.jpg": "a portrait of a woman in a naval uniform",
}
EXTRA_CAPTIONS = ["a blue mug on a wooden table", "two dogs playing in the snow", "a bowl of lemons",
                  "a lighthouse on a cliff at dusk", "a bicycle leaning on a fence"]
ALL_PATHS = [(b, p) for b in backends.BACKENDS for p in ("fp32", "bf16", "int8")]


def public_photos() -> dict:
    """The named public photos as RGB PIL images."""
    import matplotlib.cbook as cbook
    import skimage.data as data
    from PIL import Image
    from sklearn.datasets import load_sample_image

    out = {}
    for name in PHOTOS:
        if name.endswith(".jpg") and name != "grace_hopper.jpg":
            arr = load_sample_image(name)
        elif name == "grace_hopper.jpg":
            with cbook.get_sample_data("grace_hopper.jpg") as f:
                arr = np.asarray(Image.open(f).convert("RGB"))
        else:
            arr = getattr(data, name)()
        if arr.ndim == 2:
            arr = np.stack([arr] * 3, axis=-1)
        out[name] = Image.fromarray(np.ascontiguousarray(arr[..., :3]))
    return out


def model_pixels(lm, photos: dict, crops_per_photo: int = 1, seed: int = 0) -> np.ndarray:
    """uint8 [N, H, W, 3] through open_clip's eval resize/crop: each photo whole, then random crops."""
    rng = np.random.default_rng(seed)
    steps = lm.pil_steps()
    rows = []
    for k in range(crops_per_photo):
        for img in photos.values():
            if k:
                w, h = img.size
                s = int(min(w, h) * rng.uniform(0.5, 0.9))
                x, y = int(rng.integers(0, w - s + 1)), int(rng.integers(0, h - s + 1))
                img = img.crop((x, y, x + s, y + s))
            for step in steps:
                img = step(img)
            rows.append(np.asarray(img, dtype=np.uint8))
    return np.stack(rows)


@pytest.fixture(scope="session")
def export_cache(tmp_path_factory) -> str:
    """One export cache for the whole test session: each graph is exported once."""
    return str(tmp_path_factory.mktemp("exports"))


@pytest.fixture(scope="session")
def photos() -> dict:
    return public_photos()


class Setup:
    """A loaded model, its calibration batch and every offered path's towers, built once."""

    def __init__(self, lm, photos, cache_dir, crops_per_photo, agreement_tol=None):
        self.lm = lm
        self.agreement_tol = agreement_tol or {}
        self.cache_dir = cache_dir
        imgs = model_pixels(lm, photos, crops_per_photo)
        caps = list(PHOTOS.values()) + EXTRA_CAPTIONS
        n = min(len(imgs), len(caps) * crops_per_photo)
        self.calibration = backends.Calibration(imgs[:n], tuple((caps * crops_per_photo)[:n]))
        self.images, self.captions = self.calibration.check()
        self.offered = backends.plan("cpu")
        self._towers: dict = {}

    def towers(self, backend, precision):
        key = (backend, precision)
        if key not in self._towers:
            self._towers[key] = {k: backends.build_tower(self.lm, k, backend, precision, cache_dir=self.cache_dir,
                                                         calibration=self.calibration, threads=2)
                                 for k in ("image", "text")}
        return self._towers[key]

    def embed(self, backend, precision, images=None, captions=None, batch=8):
        """Normalised (image, text) embeddings of the check half on one path."""
        t = self.towers(backend, precision)
        x = preprocess.Normaliser(self.lm.preprocess_cfg["mean"], self.lm.preprocess_cfg["std"])(
            self.images if images is None else images)
        img = backends.normalised(backends.run_tower(self.lm, t["image"], x, batch))
        txt = backends.normalised(backends.run_tower(self.lm, t["text"],
                                                     self.captions if captions is None else captions, batch))
        return img, txt


@pytest.fixture(scope="module")
def demo(photos, export_cache):
    return Setup(clip.load_model("demo", device="cpu"), photos, export_cache, crops_per_photo=2,
                 agreement_tol=DEMO_AGREEMENT_TOL)


@pytest.fixture(scope="module")
def vit_b32(photos, export_cache, tmp_path_factory):
    """open_clip ViT-B-32 at random initialisation (same graph and FLOPs as trained weights)."""
    import open_clip
    import torch
    from safetensors.torch import save_file

    torch.manual_seed(0)
    net = open_clip.create_model("ViT-B-32", pretrained=None)
    weights = tmp_path_factory.mktemp("vitb32") / "vit_b_32_random.safetensors"
    save_file({k: v.contiguous() for k, v in net.state_dict().items()}, str(weights))
    del net
    return Setup(clip.load_model("ViT-B-32", str(weights), device="cpu"), photos, export_cache, crops_per_photo=1)


def _require_path(setup, backend, precision):
    if (backend, precision) not in setup.offered:
        reasons = backends.cpu_precisions(backend) if backends.installed(backend) else {}
        pytest.skip(f"{backend}-{precision} not offered here: {reasons.get(precision) or 'not installed'}")


def _check_accuracy(setup, backend, precision):
    """Per-tower 1 - cos and the agreement change against torch fp32, within TOL[precision]."""
    ref_i, ref_t = setup.embed("torch", "fp32")
    img, txt = setup.embed(backend, precision)
    cos_tol, agree_tol = TOL[precision]
    agree_tol = setup.agreement_tol.get(precision, agree_tol)
    gaps = backends.max_cosine_gap(img, ref_i), backends.max_cosine_gap(txt, ref_t)
    assert max(gaps) <= cos_tol, f"{backend}-{precision}: 1 - cos (image, text) = {gaps}"
    # int8 agreement is judged with the fp32 text tower, the combination auto may pick (module docstring)
    text_for_agreement = ref_t if precision == "int8" else txt
    agree = backends.agreement_diff(img, text_for_agreement, ref_i, ref_t)
    assert agree <= agree_tol, f"{backend}-{precision}: agreement change {agree:.5f} > {agree_tol}"
    return gaps, agree


def _check_batch_independence(setup, backend, precision):
    """Item 0 embedded with two different sets of batch-mates (and batch sizes) gives one answer."""
    t = setup.towers(backend, precision)
    norm = preprocess.Normaliser(setup.lm.preprocess_cfg["mean"], setup.lm.preprocess_cfg["std"])
    x = norm(setup.images)
    a = backends.normalised(t["image"](x[[0, 1, 2]]))[0]
    b = backends.normalised(t["image"](x[[0, 5, 6, 7, 3]]))[0]
    tol = BATCH_TOL[precision]
    assert np.max(np.abs(a - b)) <= tol, f"{backend}-{precision} image: {np.max(np.abs(a - b))}"
    # Text: the same caption with short mates (batch trimmed short) and with a long one.
    cap = setup.captions[0]
    ra = backends.normalised(backends.run_tower(setup.lm, t["text"], [cap, "a", "a cat"], 8))[0]
    rb = backends.normalised(backends.run_tower(setup.lm, t["text"], [cap, "kiln " * 40, setup.captions[1]], 8))[0]
    assert np.max(np.abs(ra - rb)) <= tol, f"{backend}-{precision} text: {np.max(np.abs(ra - rb))}"


# ------------------------------------------------------------------ accuracy, demo model (fast)


@pytest.mark.parametrize("backend,precision", ALL_PATHS, ids=[f"{b}-{p}" for b, p in ALL_PATHS])
def test_demo_path_matches_torch_fp32(demo, backend, precision):
    _require_path(demo, backend, precision)
    _check_accuracy(demo, backend, precision)


@pytest.mark.parametrize("backend,precision", ALL_PATHS, ids=[f"{b}-{p}" for b, p in ALL_PATHS])
def test_demo_path_is_batch_independent(demo, backend, precision):
    _require_path(demo, backend, precision)
    _check_batch_independence(demo, backend, precision)


def test_batch_check_catches_dynamic_quantisation(demo):
    """The batch-independence check is not vacuous: torch's dynamic int8 (per-batch scales) fails it."""
    q = clip.load_model("demo", device="cpu", quantize=True)
    x = demo.images
    a = q.encode_images(x[[0, 1, 2]])[0]
    b = q.encode_images(x[[0, 5, 6, 7, 3]])[0]
    assert np.max(np.abs(a - b)) > BATCH_TOL["int8"]
    clip.load_model("demo", device="cpu")  # leave the fp32 model cached for the next tests


# ------------------------------------------------------------------ accuracy, ViT-B-32 (slow)


@pytest.mark.slow
@pytest.mark.parametrize("backend,precision", ALL_PATHS, ids=[f"{b}-{p}" for b, p in ALL_PATHS])
def test_vit_b32_path_matches_torch_fp32_and_is_batch_independent(vit_b32, backend, precision):
    _require_path(vit_b32, backend, precision)
    _check_accuracy(vit_b32, backend, precision)
    _check_batch_independence(vit_b32, backend, precision)


# ------------------------------------------------------------------ choosing, caching, identity


def test_auto_picks_the_fastest_path_within_tolerance_and_remembers_it(demo):
    cache = demo.cache_dir  # the session's exports; no pick is remembered there yet
    lm = clip.load_model("demo", device="cpu", backend="auto", precision="auto", calibration=demo.calibration,
                         cache_dir=cache, threads=2)
    ch = lm.choice
    offered = {backends.path_name(*p) for p in demo.offered}
    assert ch["measured"] and not ch["reused"]
    assert ch["image"] in offered and ch["text"] in offered
    assert ch["max_agreement_diff"] <= backends.DEFAULT_TOLERANCE
    assert set(ch["paths"]) == offered
    # torch fp32 is itself a candidate (error 0), so the pick is never slower than it as measured
    assert ch["per_s"] >= ch["reference_per_s"]
    # Every path measured against torch fp32 with an error figure; fp32 paths agree within TOL.
    for name, figures in ch["paths"].items():
        if name.endswith("fp32"):
            assert figures["max_agreement_diff"] <= TOL["fp32"][1]
    # The encoder uses the picked towers and returns normalised vectors.
    emb = lm.encode_images(demo.images)
    assert np.allclose(np.linalg.norm(emb, axis=1), 1, atol=1e-5)
    # A re-run with the same calibration batch reuses the pick: same paths, no new measurement.
    clip._PATH_CACHE.clear()
    again = clip.load_model("demo", device="cpu", backend="auto", precision="auto", calibration=demo.calibration,
                            cache_dir=cache, threads=2)
    assert again.choice["reused"] and (again.choice["image"], again.choice["text"]) == (ch["image"], ch["text"])
    assert np.allclose(again.encode_images(demo.images), emb, atol=1e-6)


def test_export_is_cached_atomically_and_reused(demo, tmp_path):
    cache = str(tmp_path / "cache")
    t1 = backends.build_tower(demo.lm, "image", "onnxruntime", "fp32", cache_dir=cache)
    assert t1.meta["reused"] is False and t1.meta["bytes"] > 0
    folder = Path(t1.meta["folder"])
    stamp = (folder / export.MODEL_FILE).stat().st_mtime_ns
    t2 = backends.build_tower(demo.lm, "image", "openvino", "fp32", cache_dir=cache)
    assert t2.meta["reused"] is True and Path(t2.meta["folder"]) == folder  # one graph for both runtimes
    assert (folder / export.MODEL_FILE).stat().st_mtime_ns == stamp
    # keyed by the weights digest, beside the weights cache, no temporary folders left behind
    assert folder.parent == Path(cache) / export.CACHE_FOLDER / demo.lm.weights_sha256[:16]
    assert not [p for p in folder.parent.iterdir() if p.name.startswith(".tmp")]
    meta = json.loads((folder / "meta.json").read_text())
    assert meta["parts"]["weights"] == demo.lm.weights_sha256 and meta["parts"]["opset"] == export.OPSET


def test_a_failed_export_leaves_no_entry(demo, tmp_path, monkeypatch):
    def boom(*a, **k):
        raise ModelError("simulated exporter failure")

    monkeypatch.setattr(export, "export_onnx", boom)
    with pytest.raises(ModelError, match="simulated"):
        backends.build_tower(demo.lm, "image", "onnxruntime", "fp32", cache_dir=str(tmp_path))
    root = tmp_path / export.CACHE_FOLDER / demo.lm.weights_sha256[:16]
    assert root.is_dir() and not list(root.iterdir())


def test_int8_needs_a_calibration_batch(demo, tmp_path):
    with pytest.raises(ModelError, match="calibration"):
        clip.load_model("demo", device="cpu", backend="onnxruntime", precision="int8", cache_dir=str(tmp_path))
    with pytest.raises(ModelError, match="calibration"):
        clip.load_model("demo", device="cpu", backend="auto", precision="auto", cache_dir=str(tmp_path))
    with pytest.raises(ModelError, match="at least"):
        backends.Calibration(demo.images[:3], ("a",) * 3)
    with pytest.raises(ModelError, match="uint8"):
        backends.Calibration(demo.images.astype(np.float32), ("a",) * len(demo.images))


def test_identity_names_the_path_only_where_it_changes_the_numbers():
    ref = clip.identity("demo")
    assert "backend" not in ref  # torch fp32: the fingerprint of earlier versions
    ov = clip.identity("demo", backend="openvino", precision="int8")
    assert (ov["backend"], ov["precision"]) == ("openvino", "int8") and ov["weights_sha256"] == ref["weights_sha256"]
    assert clip.identity("demo", backend="onnxruntime", precision="int8") != ov
    auto = clip.identity("demo", backend="auto", precision="auto", tolerance=0.01)
    assert auto["tolerance"] == 0.01


# ------------------------------------------------------------------ capabilities and devices


def test_plan_offers_what_the_runtimes_report(monkeypatch):
    names = {backends.path_name(*p) for p in backends.plan("cpu")}
    assert "torch-fp32" in names
    for b in ("onnxruntime", "openvino"):
        if backends.installed(b):
            assert f"{b}-fp32" in names
    # bf16 exactly where the runtime says the CPU has it (torch: oneDNN's check; openvino: its
    # OPTIMIZATION_CAPABILITIES), never assumed.
    import torch

    assert ("torch-bf16" in names) == bool(torch.ops.mkldnn._is_mkldnn_bf16_supported())
    if backends.installed("openvino"):
        import openvino as ov

        caps = ov.Core().get_property("CPU", "OPTIMIZATION_CAPABILITIES")
        assert ("openvino-bf16" in names) == ("BF16" in caps)
    with pytest.raises(ModelError, match="unknown backend"):
        backends.plan("cpu", "tensorrt")
    with pytest.raises(ModelError, match="unknown precision"):
        backends.plan("cpu", "torch", "fp8")
    with pytest.raises(ModelError, match="torch has no static int8"):
        backends.plan("cpu", "torch", "int8")


def test_missing_runtime_is_a_named_error(monkeypatch):
    import builtins
    import importlib.util

    real_find, real_import = importlib.util.find_spec, builtins.__import__
    monkeypatch.setattr(importlib.util, "find_spec", lambda n, *a: None if n == "openvino" else real_find(n, *a))

    def no_openvino(name, *a, **k):
        if name == "openvino" or name.startswith("openvino."):
            raise ImportError("No module named 'openvino'")
        return real_import(name, *a, **k)

    monkeypatch.setattr(builtins, "__import__", no_openvino)
    monkeypatch.delitem(__import__("sys").modules, "openvino", raising=False)
    with pytest.raises(ModelError, match=r"curate\[openvino\]"):
        backends.plan("cpu", "openvino", "fp32")
    names = {backends.path_name(*p) for p in backends.plan("cpu", "auto", "fp32")}
    assert "openvino-fp32" not in names and "torch-fp32" in names


def test_cuda_auto_uses_torch_fp16(demo, monkeypatch):
    import torch

    monkeypatch.setattr(torch.cuda, "is_available", lambda: True)
    monkeypatch.setattr(torch.cuda, "is_bf16_supported", lambda *a, **k: False)
    assert clip.pick_device("auto") == "cuda"
    assert backends.plan("cuda") == [("torch", "fp16"), ("torch", "fp32")]
    with pytest.raises(ModelError, match="CPU only"):
        backends.plan("cuda", "openvino")
    with pytest.raises(ModelError, match="no bf16"):
        backends.plan("cuda", "torch", "bf16")
    # Without a calibration batch auto takes fp16 unmeasured; the towers carry the fp16 dtype
    # and the CUDA device (nothing runs here: no GPU).
    towers, choice = backends.choose(demo.lm, device="cuda", backend="auto", precision="auto", calibration=None,
                                     tolerance=0.005, cache_dir=None, threads=1)
    assert (choice["image"], choice["text"], choice["measured"]) == ("torch-fp16", "torch-fp16", False)
    for t in towers.values():
        assert t.device == "cuda" and t.dtype == torch.float16
        assert next(t.net.parameters()).dtype == torch.float16
    assert next(demo.lm.model.parameters()).dtype == torch.float32  # the reference stays fp32


def test_half_precision_plumbing_runs_on_cpu(demo):
    """The fp16 tower and its on-device normalisation, run on CPU (torch computes fp16 there too)."""
    import torch

    tower = backends.TorchTower(backends._torch_copy(demo.lm, "fp16"), "image", "cpu", "fp16", demo.lm.trim_text)
    ref = demo.lm.encode_images(demo.images)
    got = backends.normalised(tower.from_uint8(torch.from_numpy(demo.images), demo.lm.preprocess_cfg["mean"],
                                               demo.lm.preprocess_cfg["std"]))
    # fp16 keeps 11 significant bits (IEEE 754 binary16): a relative error of ~5e-4 per value
    assert backends.max_cosine_gap(got, ref) < 1e-3


# ------------------------------------------------------------------ preprocessing


def _jpeg(img, quality=95) -> bytes:
    buf = io.BytesIO()
    img.save(buf, "JPEG", quality=quality)
    return buf.getvalue()


def test_normaliser_equals_open_clip_preprocess_on_public_photos(demo, vit_b32_cfg, photos):
    """decode_for_model (no draft) + Normaliser == open_clip's own eval transform, per pixel."""
    import open_clip
    import torch
    from open_clip.transform import PreprocessCfg
    from PIL import Image

    from curate.stages.inspect import to_rgb

    for cfg in (demo.lm.preprocess_cfg, vit_b32_cfg):
        tf = open_clip.transform.image_transform_v2(PreprocessCfg(**cfg), is_train=False)
        steps = clip.pil_steps(cfg)
        size = (cfg["size"], cfg["size"]) if isinstance(cfg["size"], int) else tuple(cfg["size"])
        norm = preprocess.Normaliser(cfg["mean"], cfg["std"])
        for name, img in photos.items():
            data = _jpeg(img)
            ours = norm(preprocess.decode_for_model(data, steps, size, to_rgb, margin=0)[None])[0]
            ref = tf(Image.open(io.BytesIO(data))).numpy()
            assert ours.shape == ref.shape
            assert np.max(np.abs(ours - ref)) < 1e-5, name
    with pytest.raises(ValueError, match="uint8"):
        norm(np.zeros((1, 4, 4, 3), np.float32))
    assert torch.is_tensor(torch.as_tensor(norm(np.zeros((2, 4, 4, 3), np.uint8))))


@pytest.fixture(scope="module")
def vit_b32_cfg():
    """open_clip's preprocess config for ViT-B-32 (no weights needed)."""
    import open_clip

    net = open_clip.create_model("ViT-B-32", pretrained=None)
    return dict(open_clip.get_model_preprocess_cfg(net))


def test_draft_request_follows_pillow_scale_rule():
    from PIL import Image

    # Pillow's JPEG draft picks scale = largest of 8, 4, 2, 1 not above
    # min(width // req_w, height // req_h) (PIL/JpegImagePlugin.py, JpegImageFile.draft).
    # Expected scales worked out by hand from that rule; 1/8 is never used (MAX_DRAFT_REDUCTION).
    for (w, h), margin, scale in [((1024, 768), 1.0, 2), ((1024, 768), 1.5, 2), ((1024, 768), 2.0, 1),
                                  ((4000, 3000), 1.0, 4), ((2000, 1500), 1.0, 4), ((2000, 1500), 2.0, 2),
                                  ((1600, 1200), 1.5, 2), ((300, 200), 1.0, 1)]:
        img = Image.new("RGB", (w, h), (90, 120, 150))
        data = _jpeg(img, 85)
        got = Image.open(io.BytesIO(data))
        req = preprocess.draft_request((w, h), (224, 224), "shortest", margin)
        if req is not None:
            got.draft(got.mode, req)
        assert got.size == (-(-w // scale), -(-h // scale)), (w, h, margin)
        assert min(got.size) >= margin * 224 or scale == 1


def test_draft_decode_keeps_the_model_input_and_stays_close(photos):
    """Draft-decoded then resized pixels stay close to full decoding (same crop, softer detail)."""
    from curate.stages.inspect import to_rgb

    steps = clip.pil_steps({"size": 224})
    big = photos["retina"]  # 1411 x 1411: large enough for a 1/4 DCT scale at margin 1
    data = _jpeg(big)
    full = preprocess.decode_for_model(data, steps, (224, 224), to_rgb, margin=0).astype(float)
    drafted = preprocess.decode_for_model(data, steps, (224, 224), to_rgb, margin=1.0).astype(float)
    assert drafted.shape == full.shape == (224, 224, 3)
    # mean absolute difference under 2 of 255 levels: JPEG's DCT scaling is itself a low-pass
    # resampling of the same block data (ITU-T T.81 sec. A.3.3), so only fine detail differs
    assert np.mean(np.abs(drafted - full)) < 2.0
    with pytest.raises(OSError):
        preprocess.decode_for_model(OSError("unreadable"), steps, (224, 224), to_rgb)


def test_prefetch_keeps_order_and_passes_errors():
    def gen():
        for i in range(20):
            if i == 15:
                raise KeyError("item 15")
            yield i

    got = []
    with pytest.raises(KeyError, match="item 15"):
        for v in preprocess.prefetch(gen(), depth=3):
            got.append(v)
    assert got == list(range(15))
    it = preprocess.prefetch(iter(range(1000)), depth=2)
    assert [next(it) for _ in range(3)] == [0, 1, 2]
    it.close()  # the producer stops instead of running to the end
    assert list(preprocess.prefetch(range(5), depth=0)) == [0, 1, 2, 3, 4]


def test_batches_group_in_order():
    items = [(i, np.full((2, 2, 3), i, np.uint8)) for i in range(7)]
    out = list(preprocess.batches(items, 3, prepare=lambda b: b.sum()))
    assert [k for k, _ in out] == [[0, 1, 2], [3, 4, 5], [6]]
    assert [int(v) for _, v in out] == [3 * 12, 12 * 12, 6 * 12]


def test_encode_images_accepts_uint8_and_normalised_float(demo):
    a = demo.lm.encode_images(demo.images)
    x = preprocess.Normaliser(demo.lm.preprocess_cfg["mean"], demo.lm.preprocess_cfg["std"])(demo.images)
    b = demo.lm.encode_images(x)
    assert np.max(np.abs(a - b)) == 0.0


def test_cache_root_follows_cache_dir_and_xdg(tmp_path, monkeypatch):
    assert export.cache_root(str(tmp_path)) == tmp_path / export.CACHE_FOLDER
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "xdg"))
    assert export.cache_root(None) == tmp_path / "xdg" / export.CACHE_FOLDER
    assert os.fspath(export.cache_root(None)).endswith("curate-exports")


@pytest.mark.skipif(not backends.installed("openvino"), reason="openvino not installed")
def test_openvino_towers_leave_a_usable_signal_stack(tmp_path):
    """OpenVINO's CPU plugin swaps the thread's alternate signal stack while it lives. Towers built,
    then dropped in creation order, once left the main thread on a freed stack, and the next child
    process to end under a SIGCHLD handler (torch's DataLoader installs one) killed the process with
    SIGSEGV (exit -11). Reproduced in a fresh process, as a run with several towers would be."""
    import subprocess
    import sys

    code = (
        "import gc, signal, subprocess, sys\n"
        "signal.signal(signal.SIGCHLD, lambda *a: None)\n"
        "from curate.models import backends, clip\n"
        "lm = clip.load_model('demo', device='cpu')\n"
        "backends._openvino_caps()\n"
        "a = backends.build_tower(lm, 'image', 'openvino', 'fp32', cache_dir=sys.argv[1], threads=1)\n"
        "b = backends.build_tower(lm, 'text', 'openvino', 'fp32', cache_dir=sys.argv[1], threads=1)\n"
        "del a; gc.collect(); del b; gc.collect()\n"
        "for _ in range(5):\n"
        "    subprocess.run([sys.executable, '-c', 'pass'], check=True)\n"
        "print('survived')\n"
    )
    root = Path(__file__).resolve().parents[1]
    env = {**os.environ, "PYTHONPATH": str(root)}
    out = subprocess.run([sys.executable, "-c", code, str(tmp_path)], cwd=root, env=env, capture_output=True,
                         text=True, timeout=300)
    assert out.returncode == 0 and "survived" in out.stdout, (out.returncode, out.stderr[-2000:])
