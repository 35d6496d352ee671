"""Model loading and encoding, checked against open_clip itself (the reference library).

open_clip's own preprocess + encode_image / encode_text on one sample at a time is the reference
for curate's batched, worker-decoded, length-sorted and trimmed path.
"""
from __future__ import annotations

import hashlib
import io
import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from curate.errors import ModelError
from curate.models import clip as clipmod
from curate.stages.embed import decode_for_model

ROOT = Path(__file__).resolve().parents[1]

# A small CLIP in open_clip's model-config format (test fixture, random weights).
TINY = {
    "embed_dim": 32,
    "vision_cfg": {"image_size": 32, "patch_size": 8, "width": 64, "layers": 2, "head_width": 32},
    "text_cfg": {"context_length": 77, "vocab_size": 49408, "width": 64, "heads": 2, "layers": 2},
}
# Captions of many token lengths, one past the 77-token context (open_clip truncates it).
CAPTIONS = [
    "a mug",
    "",
    "a hand-thrown blue speckled mug on a slate tile, studio light",
    "Teapot No. 4 — celadon glaze, 1.2 L (sold out!)",
    "bowl " * 90,
    "close-up of a wheel-thrown jug, striped turquoise glaze, a linen cloth behind it",
    "日本の陶器 with an emoji 😀",
    "a",
]


def _save_tiny(tmp: Path, cfg: dict, fmt: str = "safetensors", seed: int = 0) -> tuple[Path, Path, object]:
    import torch

    torch.manual_seed(seed)
    net = clipmod.build_from_config({"model_cfg": cfg})
    cfg_path = tmp / "tiny.json"
    cfg_path.write_text(json.dumps({"model_cfg": cfg}), encoding="utf-8")
    sd = {k: v.contiguous() for k, v in net.state_dict().items()}
    if fmt == "safetensors":
        from safetensors.torch import save_file

        weights = tmp / "tiny.safetensors"
        save_file(sd, str(weights))
    else:
        weights = tmp / f"tiny.{fmt}"
        torch.save(sd, weights)
    return cfg_path, weights, net.eval()


def _reference_text(net, tokenizer, texts) -> np.ndarray:
    import torch
    import torch.nn.functional as F

    with torch.inference_mode():
        return np.concatenate([F.normalize(net.encode_text(tokenizer([t])), dim=-1).numpy() for t in texts])


def _reference_image(net, preprocess_cfg, img) -> np.ndarray:
    import open_clip
    import torch
    import torch.nn.functional as F
    from open_clip.transform import PreprocessCfg

    tf = open_clip.transform.image_transform_v2(PreprocessCfg(**preprocess_cfg), is_train=False)
    with torch.inference_mode():
        return F.normalize(net.encode_image(tf(img).unsqueeze(0)), dim=-1).numpy()[0]


def _photo(size=(96, 72), seed=0):
    from PIL import Image

    rng = np.random.default_rng(seed)
    base = rng.integers(0, 255, (6, 8, 3)).astype(np.uint8)
    return Image.fromarray(base).resize(size, Image.Resampling.BICUBIC)


def _png(img) -> bytes:
    buf = io.BytesIO()
    img.save(buf, "PNG")
    return buf.getvalue()


@pytest.fixture(scope="module")
def vit_b32(tmp_path_factory):
    """open_clip ViT-B-32 at random initialisation, loaded back through curate's checkpoint path."""
    import open_clip
    import torch
    from safetensors.torch import save_file

    tmp = tmp_path_factory.mktemp("vitb32")
    torch.manual_seed(0)
    net = open_clip.create_model("ViT-B-32", pretrained=None).eval()
    weights = tmp / "vit_b_32.safetensors"
    save_file({k: v.contiguous() for k, v in net.state_dict().items()}, str(weights))
    lm = clipmod.load_model("ViT-B-32", str(weights), device="cpu")
    return lm, net


# ------------------------------------------------------------------ resolving names


def test_resolve_errors_are_model_errors(tmp_path):
    with pytest.raises(ModelError, match="unknown model"):
        clipmod.resolve("ViT-Q-99", "openai")
    with pytest.raises(ModelError, match="pretrained is empty"):
        clipmod.resolve("ViT-B-32", "")
    with pytest.raises(ModelError, match="neither a pretrained tag"):
        clipmod.resolve("ViT-B-32", "no_such_tag")
    with pytest.raises(ModelError, match="not found"):
        clipmod.resolve("ViT-B-32", str(tmp_path / "missing.safetensors"))
    (tmp_path / "weights.ckpt").write_bytes(b"x")
    with pytest.raises(ModelError, match="safetensors preferred"):
        clipmod.resolve("ViT-B-32", str(tmp_path / "weights.ckpt"))
    assert clipmod.resolve("ViT-B-32", "openai").kind == "tag"
    assert clipmod.resolve("demo").kind == "demo"
    # A tag (the config default "openai") does not apply to the demo; a checkpoint path replaces its weights.
    assert clipmod.resolve("demo", "openai").weights_path == str(clipmod.DEMO_WEIGHTS)
    with pytest.raises(ModelError, match="not found"):
        clipmod.resolve("demo", str(tmp_path / "retrained.safetensors"))


def test_offline_and_not_cached_gives_one_clear_error(tmp_path):
    # huggingface_hub's documented switches: HF_HUB_OFFLINE=1 forbids network calls, HF_HOME moves
    # the cache (here to an empty folder, so nothing is cached).
    env = dict(os.environ, HF_HUB_OFFLINE="1", HF_HOME=str(tmp_path / "hf"), XDG_CACHE_HOME=str(tmp_path / "xdg"))
    code = (
        "from curate.models import clip\n"
        "from curate.errors import ModelError\n"
        "try:\n"
        "    clip.identity('ViT-B-32', 'laion2b_s34b_b79k')\n"
        "except ModelError as e:\n"
        "    print('MODELERROR', e)\n"
    )
    out = subprocess.run([sys.executable, "-c", code], env=env, cwd=ROOT, capture_output=True, text=True,
                         timeout=120)
    msg = out.stdout
    assert "MODELERROR" in msg, out.stderr[-2000:]
    for needle in ("HF_HUB_OFFLINE", "HF_HOME", "HF_HUB_CACHE", "embed.pretrained", ".safetensors",
                   "ViT-B-32/laion2b_s34b_b79k"):
        assert needle in msg
    assert msg.count("\n") == 1  # one line


# ------------------------------------------------------------------ local checkpoints


def test_safetensors_checkpoint_with_config_json(tmp_path):
    cfg_path, weights, net = _save_tiny(tmp_path, TINY)
    lm = clipmod.load_model(str(cfg_path), str(weights), device="cpu")
    ref = _reference_text(net, lm.tokenizer, CAPTIONS)
    assert np.max(np.abs(lm.encode_texts(CAPTIONS, batch_size=3) - ref)) < 1e-5
    ident = clipmod.identity(str(cfg_path), str(weights))
    assert ident["weights_sha256"] == hashlib.sha256(weights.read_bytes()).hexdigest()


@pytest.mark.parametrize("suffix", ["pt", "bin"])
def test_pickle_checkpoints_load_with_weights_only(tmp_path, suffix):
    cfg_path, weights, net = _save_tiny(tmp_path, TINY, fmt=suffix)
    lm = clipmod.load_model(str(cfg_path), str(weights), device="cpu")
    ref = _reference_text(net, lm.tokenizer, CAPTIONS[:3])
    assert np.max(np.abs(lm.encode_texts(CAPTIONS[:3], batch_size=8) - ref)) < 1e-5


class _Payload:
    """Unpickling this would create a marker file: the attack torch.load(weights_only=True) refuses."""

    def __init__(self, path: str):
        self.path = path

    def __reduce__(self):
        return (open, (self.path, "w"))


def test_pickled_objects_are_refused(tmp_path):
    import torch

    cfg_path, _, _ = _save_tiny(tmp_path, TINY)
    marker = tmp_path / "pwned"
    bad = tmp_path / "evil.pt"
    torch.save({"state_dict": {"x": _Payload(str(marker))}}, bad)
    with pytest.raises(ModelError, match="weights_only=True"):
        clipmod.load_model(str(cfg_path), str(bad), device="cpu")
    assert not marker.exists()


def test_checkpoint_that_does_not_fit(tmp_path):
    other = json.loads(json.dumps(TINY))
    other["vision_cfg"]["layers"] = 3
    _, weights, _ = _save_tiny(tmp_path, other)
    cfg_path = tmp_path / "cfg2.json"
    cfg_path.write_text(json.dumps(TINY), encoding="utf-8")
    with pytest.raises(ModelError, match="does not fit"):
        clipmod.load_model(str(cfg_path), str(weights), device="cpu")


# ------------------------------------------------------------------ trimmed text == open_clip


@pytest.mark.parametrize("custom_text", [False, True], ids=["CLIP", "CustomTextCLIP"])
def test_trimmed_batches_equal_open_clip_single_samples(tmp_path, custom_text):
    cfg = dict(TINY, custom_text=custom_text)
    cfg_path, weights, net = _save_tiny(tmp_path, cfg, seed=3)
    lm = clipmod.load_model(str(cfg_path), str(weights), device="cpu")
    assert lm.trim_text  # causal mask + end-token pooling: trimming is exact
    ours = lm.encode_texts(CAPTIONS, batch_size=3)
    ref = _reference_text(net, lm.tokenizer, CAPTIONS)
    # cosine between our vector and open_clip's, per caption, within 1e-4 of 1
    assert np.min(np.sum(ours * ref, axis=1)) > 1 - 1e-4
    assert np.max(np.abs(ours - ref)) < 1e-4


def test_bidirectional_text_tower_falls_back_to_full_padding(tmp_path):
    cfg = json.loads(json.dumps(TINY))
    cfg["custom_text"] = True
    cfg["text_cfg"].update(no_causal_mask=True, pool_type="last")  # padding is attended to: not exact
    cfg_path, weights, net = _save_tiny(tmp_path, cfg, seed=4)
    lm = clipmod.load_model(str(cfg_path), str(weights), device="cpu")
    assert not lm.trim_text
    ref = _reference_text(net, lm.tokenizer, CAPTIONS)
    assert np.max(np.abs(lm.encode_texts(CAPTIONS, batch_size=3) - ref)) < 1e-5


def test_vit_b32_random_init_shapes_and_trimming(vit_b32):
    lm, net = vit_b32
    assert lm.embed_dim() == 512 and lm.image_size == (224, 224)  # open_clip's ViT-B-32 config
    assert lm.trim_text
    ours = lm.encode_texts(CAPTIONS, batch_size=4)
    ref = _reference_text(net, lm.tokenizer, CAPTIONS)
    assert ours.shape == (len(CAPTIONS), 512)
    assert np.max(np.abs(ours - ref)) < 1e-4


def test_vit_b32_images_equal_open_clip_preprocess(vit_b32):
    import torch

    lm, net = vit_b32
    imgs = [_photo((300, 200), 1), _photo((200, 300), 2), _photo((224, 224), 3)]
    pixels = torch.from_numpy(np.stack([decode_for_model(_png(im), lm.pil_steps(), lm.image_size) for im in imgs]))
    ours = lm.encode_images(pixels)
    ref = np.stack([_reference_image(net, lm.preprocess_cfg, im) for im in imgs])
    assert ours.shape == (3, 512)
    assert np.max(np.abs(ours - ref)) < 1e-4


def test_tokenizer_bpe_ships_with_open_clip():
    # open_clip's SimpleTokenizer reads bpe_simple_vocab_16e6.txt.gz from its own package folder:
    # no download, so the demo works offline.
    import open_clip
    from open_clip.tokenizer import default_bpe

    assert Path(default_bpe()).is_file()
    assert Path(default_bpe()).parent == Path(open_clip.__file__).parent
    tok = open_clip.SimpleTokenizer()
    # CLIP's start and end tokens are the last two ids of its 49,408-token vocabulary (Radford et al. 2021).
    ids = tok(["a blue mug"])[0]
    assert int(ids[0]) == 49406 and 49407 in ids.tolist()
