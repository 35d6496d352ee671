"""embed stage on small in-memory tables: nulls, de-duplication, order, workers, decoding details.

The reference for every embedding is open_clip's own preprocess + encode_image / encode_text on
one sample at a time (the library the stage wraps).
"""
from __future__ import annotations

import hashlib
import io
import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pyarrow as pa
import pytest

from curate.config import load_config
from curate.models import clip as clipmod
from curate.stages import embed
from curate.stages.agreement import embedding_matrix
from curate.stages.base import REGISTRY, StageContext, checks_column

ROOT = Path(__file__).resolve().parents[1]

# A small CLIP in open_clip's model-config format (test fixture, random weights).
TINY = {
    "embed_dim": 32,
    "vision_cfg": {"image_size": 32, "patch_size": 8, "width": 64, "layers": 2, "head_width": 32},
    "text_cfg": {"context_length": 77, "vocab_size": 49408, "width": 64, "heads": 2, "layers": 2},
}


@pytest.fixture(scope="module")
def tiny(tmp_path_factory):
    import torch
    from safetensors.torch import save_file

    tmp = tmp_path_factory.mktemp("tiny")
    torch.manual_seed(7)
    net = clipmod.build_from_config({"model_cfg": TINY}).eval()
    (tmp / "tiny.json").write_text(json.dumps({"model_cfg": TINY}), encoding="utf-8")
    save_file({k: v.contiguous() for k, v in net.state_dict().items()}, str(tmp / "tiny.safetensors"))
    return str(tmp / "tiny.json"), str(tmp / "tiny.safetensors"), net


def _img(seed: int, size=(120, 90)):
    from PIL import Image

    rng = np.random.default_rng(seed)
    return Image.fromarray(rng.integers(0, 255, (6, 8, 3)).astype(np.uint8)).resize(size, Image.Resampling.BICUBIC)


def _write(path: Path, img, fmt="PNG", **kw) -> str:
    buf = io.BytesIO()
    img.save(buf, fmt, **kw)
    path.write_bytes(buf.getvalue())
    return str(path)


def _table(rows: list[dict]) -> pa.Table:
    shas = []
    for r in rows:
        p = Path(r["locator"])
        shas.append(hashlib.sha256(p.read_bytes()).hexdigest() if p.is_file() and r["decoded"] else None)
    return pa.table({
        "sample_id": [r["sample_id"] for r in rows],
        "locator": [r["locator"] for r in rows],
        "decoded": pa.array([r["decoded"] for r in rows], type=pa.bool_()),
        "sha256": pa.array(shas, type=pa.string()),
        "caption": pa.array([r["caption"] for r in rows], type=pa.string()),
    })


def _cfg(model: str, pretrained: str, **kw) -> tuple[embed.EmbedConfig, StageContext]:
    sets = [f"embed.model={json.dumps(model)}", f"embed.pretrained={json.dumps(pretrained)}", "embed.device=\"cpu\""]
    sets += [f"embed.{k}={json.dumps(v)}" for k, v in kw.items()]
    conf = load_config(None, sets=sets, sections={"embed": embed.EmbedConfig})
    return conf.embed, StageContext(config=conf)


def _ref_image(net, img) -> np.ndarray:
    import open_clip
    import torch
    import torch.nn.functional as F
    from open_clip.transform import PreprocessCfg

    pp = open_clip.get_model_preprocess_cfg(net)
    tf = open_clip.transform.image_transform_v2(PreprocessCfg(**pp), is_train=False)
    with torch.inference_mode():
        return F.normalize(net.encode_image(tf(img.convert("RGB")).unsqueeze(0)), dim=-1).numpy()[0]


def _ref_text(net, text) -> np.ndarray:
    import open_clip
    import torch
    import torch.nn.functional as F

    with torch.inference_mode():
        return F.normalize(net.encode_text(open_clip.SimpleTokenizer()([text])), dim=-1).numpy()[0]


def test_stage_outputs_nulls_dedup_and_reference_values(tiny, tmp_path):
    cfg_path, weights, net = tiny
    a = _write(tmp_path / "a.png", _img(1))
    a_copy = _write(tmp_path / "a_copy.png", _img(1))  # same bytes, other file
    b = _write(tmp_path / "b.png", _img(2, (90, 120)))
    broken = tmp_path / "broken.png"
    broken.write_bytes(b"\x89PNG\r\n\x1a\n not really")
    rows = [
        {"sample_id": "s0", "locator": a, "decoded": True, "caption": "a red mug"},
        {"sample_id": "s1", "locator": b, "decoded": False, "caption": "not decoded"},
        {"sample_id": "s2", "locator": a_copy, "decoded": True, "caption": "a red mug"},
        {"sample_id": "s3", "locator": b, "decoded": True, "caption": None},
        {"sample_id": "s4", "locator": b, "decoded": True, "caption": "a blue bowl on slate"},
        {"sample_id": "s5", "locator": str(broken), "decoded": True, "caption": "decoded by inspect, not here"},
    ]
    table = _table(rows)
    cfg, ctx = _cfg(cfg_path, weights)
    out = embed.run(table, cfg, ctx)
    assert out.schema == embed.output_schema(32)
    assert out.column("sample_id").to_pylist() == ["s0", "s1", "s2", "s3", "s4", "s5"]
    img, img_ok = embedding_matrix(out.column("image_emb"))
    txt, txt_ok = embedding_matrix(out.column("text_emb"))
    assert img_ok.tolist() == [True, False, True, False, True, False]
    assert txt_ok.tolist() == img_ok.tolist()
    assert np.array_equal(img[0], img[2]) and np.array_equal(txt[0], txt[2])
    # float16 storage: 11 significant bits (IEEE 754 binary16), so ~1e-3 per entry
    assert np.allclose(np.linalg.norm(img[img_ok], axis=1), 1.0, atol=2e-3)
    assert np.max(np.abs(img[0] - _ref_image(net, _img(1)))) < 2e-3
    assert np.max(np.abs(img[4] - _ref_image(net, _img(2, (90, 120))))) < 2e-3
    assert np.max(np.abs(txt[4] - _ref_text(net, "a blue bowl on slate"))) < 2e-3
    checks = out.column(checks_column("embed")).to_pylist()
    assert checks[:5] == [[], [], [], [], []]
    assert checks[5][0]["code"] == "embed_error" and checks[5][0]["failed"]


def test_worker_processes_give_the_inline_result(tiny, tmp_path):
    cfg_path, weights, _ = tiny
    rows = [{"sample_id": f"s{i}", "locator": _write(tmp_path / f"{i}.jpg", _img(10 + i, (160, 120)), "JPEG"),
             "decoded": True, "caption": f"caption number {i} " + "glaze " * (i % 5)} for i in range(20)]
    table = _table(rows)
    cfg_inline, ctx = _cfg(cfg_path, weights, batch_size=64)
    cfg_workers, _ = _cfg(cfg_path, weights, batch_size=4, decode_workers=2)
    assert embed.decode_worker_count(cfg_workers, "cpu") == 2
    a = embed.run(table, cfg_inline, ctx)
    b = embed.run(table, cfg_workers, ctx)
    for col in ("image_emb", "text_emb"):
        ma, _ = embedding_matrix(a.column(col))
        mb, _ = embedding_matrix(b.column(col))
        assert np.max(np.abs(ma - mb)) < 2e-3  # batch composition changes float sums, then float16


def test_exif_orientation_is_applied():
    from PIL import Image

    upright = _img(5, (90, 120))
    # Stored rotated, with EXIF orientation 6 ("rotate 90 CW to display", EXIF 2.32 / CIPA DC-008).
    stored = upright.transpose(Image.Transpose.ROTATE_90)
    exif = Image.Exif()
    exif[0x0112] = 6
    buf = io.BytesIO()
    stored.save(buf, "PNG", exif=exif)
    steps = clipmod.pil_steps({"size": 32})
    assert np.array_equal(embed.decode_for_model(buf.getvalue(), steps, (32, 32)),
                          embed.decode_for_model(_png_bytes(upright), steps, (32, 32)))


def _png_bytes(img) -> bytes:
    buf = io.BytesIO()
    img.save(buf, "PNG")
    return buf.getvalue()


def test_alpha_is_composited_on_white():
    from PIL import Image

    steps = clipmod.pil_steps({"size": 32})
    clear = Image.new("RGBA", (64, 48), (10, 200, 30, 0))  # fully transparent green
    assert np.all(embed.decode_for_model(_png_bytes(clear), steps, (32, 32)) == 255)
    half = Image.new("LA", (64, 48), (0, 128))  # black at alpha 128/255 over white
    px = embed.decode_for_model(_png_bytes(half), steps, (32, 32))
    assert np.all(np.abs(px.astype(int) - 127) <= 1)


def test_jpeg_draft_keeps_the_short_side_and_stops_at_a_quarter(monkeypatch):
    from PIL import JpegImagePlugin

    seen = {}
    real = JpegImagePlugin.JpegImageFile.draft

    def spy(self, mode, size):
        res = real(self, mode, size)
        seen["size"] = self.size
        return res

    monkeypatch.setattr(JpegImagePlugin.JpegImageFile, "draft", spy)
    buf = io.BytesIO()
    _img(9, (1600, 1200)).save(buf, "JPEG", quality=90)
    steps = clipmod.pil_steps({"size": 64})
    px = embed.decode_for_model(buf.getvalue(), steps, (64, 64), embed.DRAFT_MARGIN)
    assert px.shape == (64, 64, 3)
    # The short side may go down to 1.5 x 64 = 96 px, which would allow 1/8 (150 px); the rule stops
    # at 1/4 (curate.models.preprocess.MAX_DRAFT_REDUCTION): 1600x1200 -> 400x300.
    assert seen["size"] == (400, 300)
    full = embed.decode_for_model(buf.getvalue(), steps, (64, 64))
    assert np.mean(np.abs(px.astype(int) - full.astype(int))) < 3.0  # smooth image: nearly the same pixels


def test_empty_table(tiny):
    cfg_path, weights, _ = tiny
    cfg, ctx = _cfg(cfg_path, weights)
    empty = _table([])
    out = embed.run(empty, cfg, ctx)
    assert out.num_rows == 0 and out.schema == embed.output_schema(32)


def test_registration_and_identity(tiny):
    cfg_path, weights, _ = tiny
    st = REGISTRY["embed"]
    assert st.kind == "shard" and st.parallel == "inline" and st.alive_only and st.phase == "model"
    _, ctx = _cfg(cfg_path, weights)
    ident = st.identity(st.view(ctx.config))
    assert ident["weights_sha256"] == hashlib.sha256(Path(weights).read_bytes()).hexdigest()
    assert ident["model"] == cfg_path and ident["quantize"] is False


def test_stage_modules_import_without_torch():
    code = ("import sys, curate.stages.embed, curate.stages.agreement, curate.models.clip\n"
            "print('torch' in sys.modules, 'open_clip' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True, timeout=120)
    assert out.stdout.split() == ["False", "False"], out.stderr


def test_config_validation():
    from curate.errors import ConfigError

    with pytest.raises(ConfigError):
        load_config(None, sets=["embed.batch_size=0"], sections={"embed": embed.EmbedConfig})
    with pytest.raises(ConfigError):
        load_config(None, sets=["embed.device=tpu"], sections={"embed": embed.EmbedConfig})
    with pytest.raises(ConfigError):
        load_config(None, sets=["embed.device=cuda", "embed.quantize=true"], sections={"embed": embed.EmbedConfig})
