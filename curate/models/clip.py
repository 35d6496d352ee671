"""Load CLIP models through open_clip and encode images and captions with them.

Three ways to name a model (the `embed.model` and `embed.pretrained` config keys):
- an open_clip architecture name plus a pretrained tag (`ViT-B-32` + `openai`): open_clip downloads
  the weights into its standard cache on first use;
- an architecture name, or a model config JSON path, plus a local checkpoint: `.safetensors`
  preferred; `.pt`/`.pth`/`.bin` are read only with torch.load(weights_only=True), which refuses
  to unpickle anything but tensors and plain containers;
- `demo`: the small model shipped in curate/models/demo/ (tools/train_demo_model.py made it).

torch and open_clip are imported inside the functions that need them.
"""
from __future__ import annotations

import copy
import hashlib
import json
import logging
import os
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

from ..errors import ModelError
from .text import _encode_text_trimmed, _text_parts, token_batches, token_lengths  # noqa: F401

log = logging.getLogger(__name__)

DEMO_NAME = "demo"
DEMO_DIR = Path(__file__).parent / "demo"
DEMO_CONFIG = DEMO_DIR / "clip_demo.json"
DEMO_WEIGHTS = DEMO_DIR / "clip_demo.safetensors"
PICKLE_SUFFIXES = (".pt", ".pth", ".bin")
CHECKPOINT_SUFFIXES = (".safetensors",) + PICKLE_SUFFIXES
# The standard cache/offline variables of huggingface_hub, which open_clip downloads through.
CACHE_ENV_VARS = ("HF_HUB_OFFLINE", "HF_HOME", "HF_HUB_CACHE", "XDG_CACHE_HOME")
# open_clip keeps weights fetched by URL (not from the Hugging Face hub) here.
URL_CACHE = "~/.cache/clip"
# Captions used to check, once per loaded model, that trimmed text batches encode exactly.
_PROBE_CAPTIONS = ("a", "a blue striped mug on a wooden table", "kiln " * 30)


@dataclass(frozen=True)
class ModelRef:
    """What to load, resolved from (model, pretrained) without building anything."""

    model: str  # as configured: architecture name, "demo" or a config JSON path
    pretrained: str  # as configured: tag, checkpoint path, or "" for the demo
    kind: str  # "tag" | "file" | "demo"
    arch: str | None  # open_clip built-in architecture; None when a config JSON describes it
    config_path: str | None  # model config JSON (demo and JSON configs)
    weights_path: str | None  # local checkpoint; tags find theirs in the download cache


def resolve(model: str, pretrained: str = "") -> ModelRef:
    """Check the (model, pretrained) pair and say what it means. Raises ModelError."""
    model = (model or "").strip()
    pretrained = (pretrained or "").strip()
    if not model:
        raise ModelError("embed.model is empty: give an open_clip architecture name (e.g. ViT-B-32), "
                         "'demo', or a model config .json path")
    if model == DEMO_NAME:
        # The demo has one set of weights; a checkpoint path replaces them (e.g. a retrained demo),
        # a tag such as the default "openai" does not apply to it.
        own = Path(pretrained).suffix.lower() in CHECKPOINT_SUFFIXES
        weights = pretrained if own else str(DEMO_WEIGHTS)
        _require_checkpoint(weights)
        return ModelRef(model, pretrained if own else DEMO_NAME, "demo", None, str(DEMO_CONFIG), weights)
    if model.lower().endswith(".json"):
        if not Path(model).is_file():
            raise ModelError(f"model config file not found: {model}")
        if not pretrained:
            raise ModelError(f"model config {model} needs embed.pretrained set to a local checkpoint "
                             f"({', '.join(CHECKPOINT_SUFFIXES)})")
        _require_checkpoint(pretrained)
        return ModelRef(model, pretrained, "file", None, model, pretrained)

    import open_clip

    arch = model
    if arch not in open_clip.list_models():
        raise ModelError(
            f"unknown model {model!r}: expected an open_clip architecture name (open_clip.list_models(), "
            "e.g. ViT-B-32), 'demo', or a model config .json path"
        )
    if not pretrained:
        tags = open_clip.list_pretrained_tags_by_model(arch)
        raise ModelError(
            f"embed.pretrained is empty for {arch}: give a pretrained tag ({', '.join(tags) or 'none known'}) "
            "or a local checkpoint path"
        )
    if open_clip.get_pretrained_cfg(arch, pretrained):
        return ModelRef(model, pretrained, "tag", arch, None, None)
    if Path(pretrained).is_file() or Path(pretrained).suffix.lower() in CHECKPOINT_SUFFIXES:
        _require_checkpoint(pretrained)
        return ModelRef(model, pretrained, "file", arch, None, pretrained)
    tags = open_clip.list_pretrained_tags_by_model(arch)
    raise ModelError(
        f"{pretrained!r} is neither a pretrained tag of {arch} ({', '.join(tags) or 'none known'}) "
        "nor an existing checkpoint file"
    )


def _require_checkpoint(path: str) -> None:
    p = Path(path)
    if p.suffix.lower() not in CHECKPOINT_SUFFIXES:
        raise ModelError(f"checkpoint {path}: expected one of {', '.join(CHECKPOINT_SUFFIXES)} "
                         "(.safetensors preferred)")
    if not p.is_file():
        raise ModelError(f"checkpoint file not found: {path}")


def offline_message(ref: ModelRef, cause: BaseException | str, cache_dir: str | None) -> str:
    """The one message for 'cannot fetch pretrained weights' (usually: offline and not cached)."""
    where = cache_dir or ("the Hugging Face hub cache ($HF_HUB_CACHE, default $HF_HOME/hub, default "
                          f"~/.cache/huggingface/hub; weights fetched by URL go to {URL_CACHE})")
    text = str(cause).strip()
    why = text.splitlines()[0][:200] if text else type(cause).__name__
    return (
        f"cannot get pretrained weights {ref.arch}/{ref.pretrained}: they are not in the local cache and "
        f"the download failed ({why}). "
        f"open_clip downloads them once into {where}. Either run once with internet access "
        f"(the cache location follows {', '.join(CACHE_ENV_VARS[1:])}; set HF_HUB_OFFLINE=1 afterwards to "
        "stay offline), or download the checkpoint elsewhere and set embed.pretrained to its local path "
        "(.safetensors preferred; .pt/.bin are read with torch.load(weights_only=True))."
    )


def weights_file(ref: ModelRef, cache_dir: str | None = None) -> str:
    """Path of the weights for `ref`, downloading a tag's weights into the cache on first use."""
    if ref.kind != "tag":
        return str(ref.weights_path)
    import open_clip

    cfg = open_clip.get_pretrained_cfg(ref.arch, ref.pretrained)
    try:
        path = open_clip.download_pretrained(cfg, cache_dir=cache_dir or None)
    except Exception as e:  # noqa: BLE001 - network, cache and hub errors all mean the same to the user
        raise ModelError(offline_message(ref, e, cache_dir)) from e
    if not path or not Path(path).is_file():
        raise ModelError(offline_message(ref, "no file was returned", cache_dir))
    return str(path)


_SHA_CACHE: dict[tuple[str, int, int], str] = {}


def file_sha256(path: str) -> str:
    """sha256 of a weights file, remembered per (path, size, mtime) within this process."""
    st = os.stat(path)
    key = (str(Path(path).resolve()), st.st_size, st.st_mtime_ns)
    if key not in _SHA_CACHE:
        h = hashlib.sha256()
        with open(path, "rb") as f:
            for block in iter(lambda: f.read(1 << 20), b""):
                h.update(block)
        _SHA_CACHE[key] = h.hexdigest()
    return _SHA_CACHE[key]


def identity(model: str, pretrained: str = "", cache_dir: str | None = None, *, backend: str = "torch",
             precision: str = "fp32", tolerance: float | None = None) -> dict:
    """Model name, tag or path, weights checksum, and the inference path where it changes the numbers.

    torch fp32 (the reference) adds nothing, so its fingerprints are those of earlier versions;
    any other path adds backend and precision ("auto" adds the tolerance it picks within).
    """
    ref = resolve(model, pretrained)
    path = weights_file(ref, cache_dir)
    out = {
        "model": ref.model,
        "pretrained": ref.pretrained,
        "weights_file": Path(path).name,
        "weights_sha256": file_sha256(path),
    }
    if (backend, precision) != ("torch", "fp32"):
        out["backend"] = backend
        out["precision"] = precision
        if "auto" in (backend, precision):
            from .backends import DEFAULT_TOLERANCE

            out["tolerance"] = DEFAULT_TOLERANCE if tolerance is None else float(tolerance)
    return out


def read_json_config(path: str | Path) -> dict:
    """A model config JSON: either open_clip's model config, or {"model_cfg": ..., "preprocess_cfg": ...}."""
    try:
        data = json.loads(Path(path).read_text(encoding="utf-8"))
    except (OSError, ValueError) as e:
        raise ModelError(f"cannot read model config {path}: {e}") from e
    if not isinstance(data, dict):
        raise ModelError(f"model config {path}: expected a JSON object")
    model_cfg = data.get("model_cfg", data)
    if not isinstance(model_cfg, dict) or "vision_cfg" not in model_cfg or "text_cfg" not in model_cfg:
        raise ModelError(f"model config {path}: expected open_clip keys embed_dim, vision_cfg, text_cfg")
    return data


def demo_calibration() -> dict:
    """The demo model's calibrated agreement threshold and how it was measured (from its JSON)."""
    cal = read_json_config(DEMO_CONFIG).get("calibration")
    if not isinstance(cal, dict) or "threshold" not in cal:
        raise ModelError(f"{DEMO_CONFIG} has no calibration.threshold; re-run tools/train_demo_model.py")
    return cal


def build_from_config(data: dict) -> Any:
    """An open_clip CLIP (or CustomTextCLIP) from a config dict, random weights, preprocess cfg set."""
    import open_clip
    from open_clip.transform import PreprocessCfg, merge_preprocess_dict

    mc = copy.deepcopy(data.get("model_cfg", data))
    if "multimodal_cfg" in mc:
        raise ModelError("CoCa model configs are not supported by the embed stage")
    vision_cfg, text_cfg = mc["vision_cfg"], mc["text_cfg"]
    if "timm_model_name" in vision_cfg:
        vision_cfg["timm_model_pretrained"] = False  # the checkpoint provides every weight
    hf_text = "hf_model_name" in text_cfg
    if hf_text:
        text_cfg["hf_model_pretrained"] = False
    custom = bool(mc.pop("custom_text", False)) or hf_text
    cls = open_clip.CustomTextCLIP if custom else open_clip.CLIP
    try:
        model = cls(**mc)
    except Exception as e:  # noqa: BLE001 - a bad config is one clear error
        raise ModelError(f"cannot build a model from this config: {type(e).__name__}: {e}") from e
    pp = merge_preprocess_dict(PreprocessCfg(), data.get("preprocess_cfg", {}))
    pp["size"] = model.visual.image_size
    open_clip.set_model_preprocess_cfg(model, pp)
    return model


def read_state_dict(path: str) -> dict:
    """Tensors from a checkpoint: safetensors, or torch.load(weights_only=True) for .pt/.pth/.bin."""
    import torch

    suffix = Path(path).suffix.lower()
    if suffix == ".safetensors":
        from safetensors.torch import load_file

        try:
            sd: Any = load_file(path, device="cpu")
        except Exception as e:  # noqa: BLE001
            raise ModelError(f"cannot read safetensors checkpoint {path}: {e}") from e
    elif suffix in PICKLE_SUFFIXES:
        try:
            sd = torch.load(path, map_location="cpu", weights_only=True)
        except Exception as e:  # noqa: BLE001 - includes UnpicklingError for disallowed objects
            raise ModelError(
                f"cannot read checkpoint {path} with torch.load(weights_only=True): {type(e).__name__}: "
                f"{str(e).splitlines()[0][:200] if str(e) else ''}. curate never unpickles arbitrary "
                "objects; convert the checkpoint to .safetensors"
            ) from e
        if isinstance(sd, dict) and isinstance(sd.get("state_dict"), dict):
            sd = sd["state_dict"]
    else:
        raise ModelError(f"checkpoint {path}: expected one of {', '.join(CHECKPOINT_SUFFIXES)}")
    if not isinstance(sd, dict) or not sd or not all(isinstance(v, torch.Tensor) for v in sd.values()):
        raise ModelError(f"checkpoint {path} does not hold a state dict of tensors")
    if all(k.startswith("module.") for k in sd):
        sd = {k[len("module."):]: v for k, v in sd.items()}  # saved from DistributedDataParallel
    return sd


def load_weights(model: Any, path: str, what: str) -> None:
    """Load a checkpoint into `model`, every key accounted for; mismatches raise ModelError."""
    sd = read_state_dict(path)
    try:
        missing, unexpected = model.load_state_dict(sd, strict=False)
    except RuntimeError as e:  # shape mismatch
        raise ModelError(f"checkpoint {path} does not fit {what}: {str(e).splitlines()[0][:300]}") from e
    if missing or unexpected:
        raise ModelError(
            f"checkpoint {path} does not fit {what}: {len(missing)} missing keys "
            f"({', '.join(missing[:3])}), {len(unexpected)} unexpected keys ({', '.join(unexpected[:3])})"
        )


def _tokenizer_for_config(data: dict) -> Any:
    from open_clip.tokenizer import HFTokenizer, SimpleTokenizer

    text_cfg = data.get("model_cfg", data)["text_cfg"]
    ctx = int(text_cfg.get("context_length", 77))
    kwargs = dict(text_cfg.get("tokenizer_kwargs") or {})
    if text_cfg.get("hf_tokenizer_name"):
        return HFTokenizer(text_cfg["hf_tokenizer_name"], context_length=ctx, **kwargs)
    return SimpleTokenizer(context_length=ctx, **kwargs)


@dataclass
class LoadedModel:
    """A model ready to encode, with its tokenizer and open_clip preprocessing."""

    ref: ModelRef
    model: Any
    tokenizer: Any
    preprocess_cfg: dict
    weights_sha256: str
    device: str
    quantized: bool
    trim_text: bool = False  # set by load_model after checking trimming is exact for this model
    dim: int = 0  # embedding size, found on first use
    towers: dict | None = None  # {"image": Tower, "text": Tower}; None = eager torch fp32 (self.model)
    choice: dict = field(default_factory=dict)  # the inference path per tower and how it was chosen

    @property
    def image_size(self) -> tuple[int, int]:
        s = self.preprocess_cfg["size"]
        return (int(s), int(s)) if isinstance(s, int) else (int(s[0]), int(s[1]))

    def pil_steps(self) -> list:
        """open_clip's eval transform up to (not including) the tensor conversion: PIL -> PIL."""
        return pil_steps(self.preprocess_cfg)

    @property
    def backend(self) -> str:
        """Inference path of each tower, e.g. "openvino-int8" (one name when both towers share it)."""
        if not self.towers:
            return "torch-fp32"
        names = {self.towers["image"].name, self.towers["text"].name}
        return names.pop() if len(names) == 1 else f"image:{self.towers['image'].name},text:{self.towers['text'].name}"

    def _tower(self, kind: str) -> Any:
        if not self.towers:  # the eager fp32 model itself
            from .backends import TorchTower

            return TorchTower(self.model, kind, self.device, "fp32", self.trim_text)
        return self.towers[kind]

    def encode_images(self, batch: Any) -> Any:
        """Pixels -> float32 numpy [N, D], L2-normalised.

        `batch`: uint8 [N, H, W, 3] (output of pil_steps; normalised here with the arithmetic of
        open_clip's ToTensor + Normalize), or float32 [N, 3, H, W] already normalised
        (preprocess.Normaliser). numpy arrays or torch tensors.
        """
        import numpy as np

        from .backends import TorchTower, normalised
        from .preprocess import Normaliser

        tower = self._tower("image")
        arr = batch
        on_host = str(getattr(batch, "device", "cpu")) == "cpu"  # a tensor on a GPU stays there
        if on_host and hasattr(batch, "numpy") and not hasattr(batch, "__array_interface__"):
            arr = batch.numpy()  # a CPU torch tensor: view it as numpy
        dtype = str(getattr(arr, "dtype", ""))
        if dtype.endswith("uint8"):
            if isinstance(tower, TorchTower) and tower.device != "cpu":
                return normalised(tower.from_uint8(arr, self.preprocess_cfg["mean"], self.preprocess_cfg["std"]))
            x = Normaliser(self.preprocess_cfg["mean"], self.preprocess_cfg["std"])(np.asarray(arr))
        else:
            x = arr if isinstance(tower, TorchTower) else np.asarray(arr, dtype=np.float32)
        return normalised(tower(x))

    def tokenize(self, texts: list[str]) -> Any:
        return self.tokenizer(list(texts))

    def encode_texts(self, texts: list[str], batch_size: int, trim: bool | None = None) -> Any:
        """Captions -> float32 numpy [N, D], L2-normalised.

        Captions are sorted by token length (text.token_batches). When trimming is exact for this
        model (causal mask, pooled at the end token: padding after it never reaches the pooled
        output), each caption is encoded cut to its own length rounded up to a step, so its
        embedding does not depend on its batch-mates; else batches are padded to the full context.
        """
        import numpy as np

        from .backends import normalised

        trim = self.trim_text if trim is None else (trim and self.trim_text)
        n = len(texts)
        if n == 0:
            return np.zeros((0, self.embed_dim()), dtype=np.float32)
        tower = self._tower("text")
        out = np.empty((n, self.embed_dim()), dtype=np.float32)
        for idx, sub in token_batches(self.tokenize(texts), batch_size, trim):
            if tower.backend == "torch":
                feats = tower.encode(sub, trim)
            else:
                feats = tower(sub.numpy().astype(np.int64))
            out[idx] = normalised(feats)
        return out

    def embed_dim(self) -> int:
        if not self.dim:
            # Any tower layout (ViT, ResNet, timm): ask the model with one blank image.
            import torch

            h, w = self.image_size
            with torch.inference_mode():
                out = self.model.encode_image(torch.zeros(1, 3, h, w, device=self.device))
            self.dim = int(out.shape[-1])
        return self.dim


def pil_steps(preprocess_cfg: dict) -> list:
    """open_clip's eval image transform for `preprocess_cfg`, minus ToTensor and Normalize.

    Worker processes run these PIL steps and send uint8 pixels; LoadedModel.encode_images does
    the tensor conversion and normalisation with the same arithmetic.
    """
    from open_clip.transform import PreprocessCfg, image_transform_v2

    cfg = PreprocessCfg(**{k: v for k, v in preprocess_cfg.items() if k in PreprocessCfg.__annotations__})
    steps = list(image_transform_v2(cfg, is_train=False).transforms)
    names = [type(t).__name__ for t in steps]
    cut = next((i for i, n in enumerate(names) if n in ("ToTensor", "MaybeToTensor")), None)
    if cut is None or names[cut + 1:] != ["Normalize"]:
        raise ModelError(f"unexpected open_clip eval transform {names}; cannot split it for workers")
    return steps[:cut]


def trimming_is_exact(lm: LoadedModel, tol: float = 1e-4) -> bool:
    """Layout check plus a numeric probe: trimmed and fully padded encodings agree within `tol`."""
    import numpy as np
    from open_clip.tokenizer import SimpleTokenizer

    if not isinstance(lm.tokenizer, SimpleTokenizer) or _text_parts(lm.model) is None:
        return False
    saved = lm.trim_text
    try:
        lm.trim_text = True
        trimmed = lm.encode_texts(list(_PROBE_CAPTIONS), batch_size=len(_PROBE_CAPTIONS))
        full = lm.encode_texts(list(_PROBE_CAPTIONS), batch_size=len(_PROBE_CAPTIONS), trim=False)
    except Exception as e:  # noqa: BLE001 - a tower we cannot trim is padded instead
        log.info("text trimming disabled for %s: %s", lm.ref.model, e)
        return False
    finally:
        lm.trim_text = saved
    return bool(np.max(np.abs(trimmed - full)) <= tol)


def pick_device(device: str) -> str:
    import torch

    if device == "auto":
        return "cuda" if torch.cuda.is_available() else "cpu"
    if device.startswith("cuda") and not torch.cuda.is_available():
        raise ModelError(f"embed.device = {device!r} but torch sees no CUDA device; use 'auto' or 'cpu'")
    return device


_MODEL_CACHE: dict[tuple, LoadedModel] = {}
_PATH_CACHE: dict[tuple, LoadedModel] = {}


def load_model(model: str, pretrained: str = "", *, device: str = "auto", cache_dir: str | None = None,
               quantize: bool = False, backend: str = "torch", precision: str = "fp32",
               calibration: Any = None, tolerance: float | None = None, threads: int = 0,
               batch_size: int = 32) -> LoadedModel:
    """Build, load and ready a model for inference. The last one loaded is kept for the next shard.

    backend: "torch" | "onnxruntime" | "openvino" | "auto"; precision: "fp32" | "bf16" | "fp16"
    (CUDA) | "int8" | "auto". "auto" measures the candidate paths on `calibration` and takes the
    fastest whose image-caption cosines stay within `tolerance` of torch fp32 (see
    curate.models.backends). `calibration`: a backends.Calibration of images and captions from
    the run, or a callable (LoadedModel -> Calibration) called with the fp32 model, so it can
    decode images with the model's own preprocessing; needed for int8 and for choosing.
    `threads`: CPU threads of the compiled runtimes (0 = torch's current setting).
    `quantize` is the older dynamic int8 of the torch image tower (its results depend on batch
    composition); prefer precision = "int8".
    """
    dev = pick_device(device)
    base = _load_base(model, pretrained, dev, cache_dir, quantize)
    if (backend, precision) == ("torch", "fp32") and calibration is None:
        return base
    if quantize and backend != "torch":
        raise ModelError("quantize applies to the torch backend only; use precision = 'int8' with another backend")
    import torch

    from . import backends

    cal = calibration(base) if callable(calibration) else calibration
    if cal is not None and not isinstance(cal, backends.Calibration):
        images, captions = cal
        cal = backends.Calibration(images, tuple(captions))
    tol = backends.DEFAULT_TOLERANCE if tolerance is None else float(tolerance)
    n_threads = int(threads) or torch.get_num_threads()
    key = (model, pretrained, dev, cache_dir or "", bool(quantize), backend, precision,
           cal.digest() if cal is not None else "", tol, n_threads, int(batch_size))
    if key in _PATH_CACHE:
        return _PATH_CACHE[key]
    before = torch.get_num_threads()
    torch.set_num_threads(n_threads)  # the torch paths are measured with the same threads as the others
    try:
        towers, choice = backends.choose(base, device=dev, backend=backend, precision=precision, calibration=cal,
                                         tolerance=tol, cache_dir=cache_dir, threads=n_threads,
                                         batch=int(batch_size))
    finally:
        torch.set_num_threads(before)
    lm = replace(base, towers=towers, choice=choice)
    _PATH_CACHE.clear()
    _PATH_CACHE[key] = lm
    return lm


def _load_base(model: str, pretrained: str, dev: str, cache_dir: str | None, quantize: bool) -> LoadedModel:
    """The eager torch fp32 model (dynamic int8 image tower with quantize), cached for the next shard."""
    key = (model, pretrained, dev, cache_dir or "", bool(quantize))
    if key in _MODEL_CACHE:
        return _MODEL_CACHE[key]
    ref = resolve(model, pretrained)
    path = weights_file(ref, cache_dir)
    sha = file_sha256(path)
    net, tokenizer = _build(ref, path, cache_dir)
    import open_clip
    import torch

    net.eval()
    for p in net.parameters():
        p.requires_grad_(False)
    if quantize:
        if dev != "cpu":
            raise ModelError("embed.quantize applies to CPU inference only; set embed.device = 'cpu'")
        import warnings

        from torch.ao.quantization import per_channel_dynamic_qconfig, quantize_dynamic

        # Image tower only: dynamic quantisation scales activations per batch, so in the text tower
        # padding tokens would change the result and exact trimming would be lost. Per-channel
        # weight scales: on the demo corpus agreement moved by at most 0.0079 (per-tensor: 0.0125).
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # torch 2.x marks quantized tensor creation deprecated
            net.visual = quantize_dynamic(net.visual, {torch.nn.Linear: per_channel_dynamic_qconfig},
                                          dtype=torch.qint8)
        for mod in net.modules():
            if type(mod).__module__.startswith("torch.ao.nn.quantized"):
                # open_clip asks a block's first MLP layer for the activation dtype; it reads this
                # attribute for int8 layers (their `weight` is a method, not a tensor).
                mod.int8_original_dtype = torch.float32
    net = net.to(dev)
    lm = LoadedModel(ref=ref, model=net, tokenizer=tokenizer,
                     preprocess_cfg=dict(open_clip.get_model_preprocess_cfg(net)),
                     weights_sha256=sha, device=dev, quantized=bool(quantize))
    lm.trim_text = trimming_is_exact(lm)
    _MODEL_CACHE.clear()
    _PATH_CACHE.clear()  # compiled towers of the previous model
    _MODEL_CACHE[key] = lm
    return lm


def _build(ref: ModelRef, path: str, cache_dir: str | None) -> tuple[Any, Any]:
    import open_clip

    if ref.config_path is not None:
        data = read_json_config(ref.config_path)
        net = build_from_config(data)
        load_weights(net, path, f"the architecture in {ref.config_path}")
        try:
            tok = _tokenizer_for_config(data)
        except Exception as e:  # noqa: BLE001
            raise ModelError(f"cannot build the tokenizer for {ref.config_path}: {e}") from e
        return net, tok
    try:
        if ref.kind == "tag":
            tag_cfg = open_clip.get_pretrained_cfg(ref.arch, ref.pretrained)
            net = open_clip.create_model(ref.arch, pretrained=ref.pretrained, cache_dir=cache_dir or None,
                                         force_quick_gelu=bool(tag_cfg.get("quick_gelu", False)))
        else:  # built from open_clip's own config for the architecture; weights loaded below
            net = build_from_config({"model_cfg": open_clip.get_model_config(ref.arch)})
    except ModelError:
        raise
    except Exception as e:  # noqa: BLE001
        if ref.kind == "tag":
            raise ModelError(offline_message(ref, e, cache_dir)) from e
        raise ModelError(f"cannot build open_clip model {ref.arch}: {type(e).__name__}: {e}") from e
    if ref.kind == "file":
        load_weights(net, path, f"open_clip architecture {ref.arch}")
    try:
        tok = open_clip.get_tokenizer(ref.arch, cache_dir=cache_dir or None)
    except Exception as e:  # noqa: BLE001
        raise ModelError(f"cannot build the tokenizer for {ref.arch} (offline?): {e}") from e
    return net, tok
