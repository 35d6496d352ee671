"""Inference backends for CLIP towers: torch (the reference), ONNX Runtime and OpenVINO.

A path is a (backend, precision) pair, written "backend-precision" (e.g. "openvino-int8"). Each
tower (image, text) runs on one path. `plan` lists the paths this machine offers; `build_tower`
makes one; `choose` measures every offered path on a calibration batch from the run and picks,
per tower, the fastest combination whose image-caption cosines stay within a tolerance of torch
fp32. No path quantises activations per batch: int8 uses static scales fitted on the calibration
batch, so an item's embedding never depends on its batch-mates.

onnxruntime and openvino are optional extras, imported only when a path needs them.
"""
from __future__ import annotations

import functools
import hashlib
import json
import logging
import platform
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import ModelError
from . import export
from .preprocess import Normaliser

log = logging.getLogger(__name__)

BACKENDS = ("torch", "onnxruntime", "openvino")
PRECISIONS = ("fp32", "bf16", "fp16", "int8")
# Largest change of any image-caption cosine against torch fp32 that `auto` accepts. 0.005 is a
# small fraction of the gap between LAION's thresholds (0.28 / 0.30, see FACTS) and typical scores.
DEFAULT_TOLERANCE = 0.005
# Fewest calibration images and captions: each half (fit / check) needs a few batches' worth.
MIN_CALIBRATION = 8
# Timed repeats per path when choosing (medians; rounds interleave the paths), and how many
# check items each timed repeat runs (common practice: a batch or two is enough to rank paths).
ROUNDS = 3
TIMING_ITEMS = 16
# Calibration images per int8 calibration feed (common practice: small batches).
FEED_BATCH = 8


def path_name(backend: str, precision: str) -> str:
    return f"{backend}-{precision}"


# ----------------------------------------------------------------------------- capabilities


def _cpu_flags() -> set[str]:
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("flags"):
                return set(line.split(":", 1)[1].split())
    except OSError:
        pass
    return set()


def cpu_has_vnni() -> bool:
    """x86 int8 dot-product instructions (AVX512-VNNI, AVX-VNNI or AMX); False where unknown."""
    flags = _cpu_flags()
    return bool(flags & {"avx512_vnni", "avx_vnni", "amx_int8"})


# What each compiled path imports: the runtime, plus the exporter (onnx, onnxscript); OpenVINO's
# int8 graph is made by ONNX Runtime's static quantiser.
NEEDS = {
    "onnxruntime": (("onnxruntime", "onnx"), ("onnx", "onnx"), ("onnxscript", "onnx")),
    "openvino": (("openvino", "openvino"), ("onnx", "onnx"), ("onnxscript", "onnx")),
}
INT8_NEEDS = (("onnxruntime", "onnx"),)


def missing(backend: str, precision: str = "fp32") -> list[tuple[str, str]]:
    """(module, pip extra) pairs a path needs that are not installed."""
    import importlib.util

    if backend == "torch":
        return []
    need = NEEDS[backend] + (INT8_NEEDS if precision == "int8" else ())
    return [(m, e) for m, e in need if importlib.util.find_spec(m) is None]


def installed(backend: str) -> bool:
    return backend == "torch" or not missing(backend)


@functools.lru_cache(maxsize=1)
def _openvino_core() -> Any:
    """The process's one OpenVINO Core, kept for the life of the process.

    OpenVINO's CPU plugin installs its own alternate signal stack on the thread that creates it and
    puts the previous one back when it is destroyed. With two Cores whose plugins are destroyed out
    of order, the thread was left with an alternate stack that had been freed, and the next signal
    with a handler (a child process ending, under a SIGCHLD handler such as torch's DataLoader
    installs) killed the process with SIGSEGV (seen with openvino 2026 on Linux: si_code SI_KERNEL
    while waiting for a child). One Core, created once and never destroyed, cannot do that."""
    ov = export.require("openvino", "openvino")
    return ov.Core()


def _openvino_caps() -> set[str]:
    return set(_openvino_core().get_property("CPU", "OPTIMIZATION_CAPABILITIES"))


def cpu_precisions(backend: str) -> dict[str, str]:
    """precision -> "" when `backend` runs it on this CPU, else the reason it does not."""
    out = {"fp32": ""}
    if backend == "torch":
        import torch

        ok = torch.backends.mkldnn.is_available() and torch.ops.mkldnn._is_mkldnn_bf16_supported()
        out["bf16"] = "" if ok else "torch (oneDNN) reports no native bf16 on this CPU"
        out["fp16"] = "fp16 is offered on CUDA only"
        out["int8"] = "torch has no static int8 path here; use onnxruntime or openvino"
    elif backend == "onnxruntime":
        out["bf16"] = "onnxruntime's CPU provider has no bf16 matrix kernels"
        out["fp16"] = "fp16 is offered on CUDA only"
        out["int8"] = ""
    elif backend == "openvino":
        caps = _openvino_caps()
        out["bf16"] = "" if "BF16" in caps else "openvino reports no BF16 in the CPU's OPTIMIZATION_CAPABILITIES"
        out["fp16"] = "fp16 is offered on CUDA only"
        out["int8"] = "" if "INT8" in caps else "openvino reports no INT8 in the CPU's OPTIMIZATION_CAPABILITIES"
    else:
        raise ModelError(f"unknown backend {backend!r}: expected auto, {', '.join(BACKENDS)}")
    return out


def cuda_precisions() -> dict[str, str]:
    import torch

    bf16 = bool(torch.cuda.is_bf16_supported()) if torch.cuda.is_available() else False
    return {"fp32": "", "fp16": "", "bf16": "" if bf16 else "this GPU reports no bf16 support",
            "int8": "int8 is offered on CPU only"}


def refusal(backend: str, precision: str, device: str = "auto") -> str:
    """Why a configured (backend, precision, device) can never run, on any machine; "" when it may.

    What depends on the machine (bf16 support, installed runtimes, a GPU) is checked by `plan`.
    """
    if backend not in ("auto", *BACKENDS):
        return f"unknown backend {backend!r}: expected auto, {', '.join(BACKENDS)}"
    if precision not in ("auto", *PRECISIONS):
        return f"unknown precision {precision!r}: expected auto, {', '.join(PRECISIONS)}"
    cuda, cpu = device.startswith("cuda"), device == "cpu"
    if backend in ("onnxruntime", "openvino") and cuda:
        return f"backend {backend} runs on CPU only; on CUDA use backend torch or auto"
    if precision == "int8" and backend == "torch":
        return ("torch has no static int8 path; use backend onnxruntime or openvino (embed.quantize is torch's "
                "dynamic int8, whose results depend on batch composition)")
    if precision == "int8" and cuda:
        return "int8 is offered on CPU only"
    if precision == "fp16" and (cpu or backend in ("onnxruntime", "openvino")):
        return "fp16 is offered on CUDA only, with backend torch or auto"
    if precision == "bf16" and backend == "onnxruntime":
        return "onnxruntime's CPU provider has no bf16 matrix kernels"
    return ""


def plan(device: str, backend: str = "auto", precision: str = "auto") -> list[tuple[str, str]]:
    """The (backend, precision) paths to consider, torch fp32 first where it is one of them.

    device: "cpu" or "cuda[:N]" (already resolved). "auto" in either argument means any; a path
    that was asked for explicitly but cannot run raises ModelError with the reason.
    """
    if backend != "auto" and backend not in BACKENDS:
        raise ModelError(f"unknown backend {backend!r}: expected auto, {', '.join(BACKENDS)}")
    if precision != "auto" and precision not in PRECISIONS:
        raise ModelError(f"unknown precision {precision!r}: expected auto, {', '.join(PRECISIONS)}")
    if device.startswith("cuda"):
        if backend not in ("auto", "torch"):
            raise ModelError(f"backend {backend!r} runs on CPU only; on CUDA use 'torch' or 'auto'")
        reasons = cuda_precisions()
        if precision == "auto":
            # On a GPU, fp16 tensor cores are the fast path (common practice); fp32 is the fallback
            # should fp16 move agreement beyond the tolerance.
            return [("torch", "fp16"), ("torch", "fp32")]
        if reasons[precision]:
            raise ModelError(f"precision {precision!r} on {device}: {reasons[precision]}")
        return [("torch", precision)]
    names = BACKENDS if backend == "auto" else (backend,)
    out: list[tuple[str, str]] = []
    why: list[str] = []
    for b in names:
        if not installed(b):
            if backend != "auto":
                module, extra = missing(b)[0]
                export.require(module, extra)  # raises the named error
            continue
        for p, reason in cpu_precisions(b).items():
            if precision not in ("auto", p):
                continue
            gone = missing(b, p)
            if reason or gone:
                why.append(f"{b}-{p}: {reason or gone[0][0] + ' is not installed'}")
                if gone and not reason and backend != "auto" and precision != "auto":
                    export.require(*gone[0])
            else:
                out.append((b, p))
    if not out:
        raise ModelError(f"no inference path for backend={backend!r}, precision={precision!r} on this CPU: "
                         + "; ".join(why or ["nothing installed"]))
    return out


# ----------------------------------------------------------------------------- calibration


@dataclass(frozen=True)
class Calibration:
    """Images and captions from the run, for int8 scales and for measuring each path's error.

    images: uint8 [N, H, W, 3] at the model's input size (the output of the decode step);
    captions: any N' captions. Even positions fit int8 scales, odd positions measure the error,
    so a path is never judged on the data that calibrated it.
    """

    images: Any
    captions: tuple[str, ...]

    def __post_init__(self) -> None:
        imgs = np.ascontiguousarray(np.asarray(self.images))
        if imgs.dtype != np.uint8 or imgs.ndim != 4 or imgs.shape[-1] != 3:
            raise ModelError(f"calibration images must be uint8 [N, H, W, 3], got {imgs.dtype} {list(imgs.shape)}")
        if len(imgs) < MIN_CALIBRATION or len(self.captions) < MIN_CALIBRATION:
            raise ModelError(f"a calibration batch needs at least {MIN_CALIBRATION} images and captions, "
                             f"got {len(imgs)} and {len(self.captions)}")
        object.__setattr__(self, "images", imgs)
        object.__setattr__(self, "captions", tuple(str(c) for c in self.captions))

    def fit(self) -> tuple[np.ndarray, list[str]]:
        return self.images[0::2], list(self.captions[0::2])

    def check(self) -> tuple[np.ndarray, list[str]]:
        return self.images[1::2], list(self.captions[1::2])

    def image_digest(self) -> str:
        h = hashlib.sha256(str(self.images.shape).encode())
        h.update(self.images.tobytes())
        return h.hexdigest()

    def text_digest(self) -> str:
        return hashlib.sha256(json.dumps(list(self.captions)).encode()).hexdigest()

    def digest(self) -> str:
        return hashlib.sha256((self.image_digest() + self.text_digest()).encode()).hexdigest()


# ----------------------------------------------------------------------------- towers


class Tower:
    """One tower on one path: `__call__(inputs) -> float32 features [N, D]` (not normalised).

    Image towers take float32 [N, 3, H, W] normalised pixels; text towers take int64 tokens.
    """

    kind: str = "image"
    backend: str = "torch"
    precision: str = "fp32"
    meta: dict = {}

    @property
    def name(self) -> str:
        return path_name(self.backend, self.precision)

    def __call__(self, x: np.ndarray) -> np.ndarray:  # pragma: no cover - overridden
        raise NotImplementedError


# Rows per forward pass of a reduced-precision torch tower. A bf16 matrix product's rounding depends
# on the kernel oneDNN picks for the product's shape: one caption's text embedding moved by up to
# 2.2e-3 per component between a batch of one and a batch of two (measured on a Zen 4 CPU with
# AVX-512 BF16, torch 2.14). Every pass therefore runs this many rows, padded with copies of the
# last row, so an item's embedding never depends on its batch-mates.
FIXED_ROWS = 16


def _fixed_rows(x: Any, forward: Any) -> Any:
    """forward(x) computed FIXED_ROWS rows at a time, the last pass padded; padding rows dropped."""
    import torch

    outs = []
    for start in range(0, x.shape[0], FIXED_ROWS):
        part = x[start:start + FIXED_ROWS]
        k = part.shape[0]
        if k < FIXED_ROWS:
            part = torch.cat([part, part[-1:].expand(FIXED_ROWS - k, *part.shape[1:])])
        outs.append(forward(part)[:k])
    return torch.cat(outs)


class TorchTower(Tower):
    """Eager open_clip tower on a torch device and dtype (fp32 reference, bf16, fp16 on CUDA).
    Reduced precision runs fixed shapes (FIXED_ROWS) so results do not depend on batch composition."""

    def __init__(self, net: Any, kind: str, device: str, precision: str, trim_text: bool):
        import torch

        self.kind, self.backend, self.precision = kind, "torch", precision
        self.device = device
        self.dtype = {"fp32": torch.float32, "bf16": torch.bfloat16, "fp16": torch.float16}[precision]
        self.net = net
        self.trim_text = trim_text
        self.meta = {}
        self._mean = self._std = None

    def __call__(self, x: Any) -> np.ndarray:
        if self.kind == "text":
            return self.encode(x, self.trim_text)
        import torch

        with torch.inference_mode():
            t = torch.as_tensor(x).to(self.device, self.dtype)
            return self._forward(t, self.net.encode_image).float().cpu().numpy()

    def _forward(self, x: Any, forward: Any) -> Any:
        return forward(x) if self.precision == "fp32" else _fixed_rows(x, forward)

    def encode(self, tokens: Any, trim: bool) -> np.ndarray:
        """Text features; `trim` runs the forward pass on tokens cut to the batch's longest caption."""
        import torch

        from .text import _encode_text_trimmed

        with torch.inference_mode():
            t = torch.as_tensor(tokens).to(self.device)
            out = self._forward(t, (lambda b: _encode_text_trimmed(self.net, b)) if trim else self.net.encode_text)
            return out.float().cpu().numpy()

    def from_uint8(self, pixels: Any, mean: Any, std: Any) -> np.ndarray:
        """uint8 NHWC -> features, normalised on the device (less to copy to a GPU)."""
        import torch

        u8 = torch.as_tensor(pixels).to(self.device, non_blocking=True)
        if self._mean is None:
            self._mean = torch.tensor(mean, dtype=torch.float32, device=self.device).view(1, 3, 1, 1)
            self._std = torch.tensor(std, dtype=torch.float32, device=self.device).view(1, 3, 1, 1)
        with torch.inference_mode():
            x = u8.permute(0, 3, 1, 2).float().div_(255).sub_(self._mean).div_(self._std)
            return self._forward(x.to(self.dtype), self.net.encode_image).float().cpu().numpy()


class OrtTower(Tower):
    def __init__(self, model_path: Path, kind: str, precision: str, threads: int, meta: dict):
        ort = export.require("onnxruntime", "onnx")
        so = ort.SessionOptions()
        so.intra_op_num_threads = max(1, threads)
        so.inter_op_num_threads = 1
        so.graph_optimization_level = ort.GraphOptimizationLevel.ORT_ENABLE_ALL
        so.log_severity_level = 3
        self.session = ort.InferenceSession(str(model_path), so, providers=["CPUExecutionProvider"])
        self.input = self.session.get_inputs()[0].name
        self.kind, self.backend, self.precision, self.meta = kind, "onnxruntime", precision, meta

    def __call__(self, x: np.ndarray) -> np.ndarray:
        return np.asarray(self.session.run(None, {self.input: np.ascontiguousarray(x)})[0], dtype=np.float32)


class OvTower(Tower):
    def __init__(self, model_path: Path, kind: str, precision: str, threads: int, meta: dict):
        core = _openvino_core()
        cfg = {
            "INFERENCE_NUM_THREADS": max(1, threads),
            # Explicit: on CPUs with bf16 the plugin would otherwise pick bf16 for "fp32" graphs.
            "INFERENCE_PRECISION_HINT": "bf16" if precision == "bf16" else "f32",
            "PERFORMANCE_HINT": "LATENCY",
        }
        if "DYNAMIC_QUANTIZATION_GROUP_SIZE" in core.get_property("CPU", "SUPPORTED_PROPERTIES"):
            # 0 = never quantise activations per group at run time (batch-independent results).
            cfg["DYNAMIC_QUANTIZATION_GROUP_SIZE"] = 0
        t0 = time.perf_counter()
        self.compiled = core.compile_model(core.read_model(str(model_path)), "CPU", cfg)
        self.request = self.compiled.create_infer_request()
        self.kind, self.backend, self.precision = kind, "openvino", precision
        self.meta = dict(meta, compile_s=round(time.perf_counter() - t0, 2))

    def __call__(self, x: np.ndarray) -> np.ndarray:
        self.request.infer({0: np.ascontiguousarray(x)})
        return np.array(self.request.get_output_tensor(0).data, dtype=np.float32)


def _export_entry(lm: Any, kind: str, fmt: str, cache_dir: str | None, calibration: Calibration | None,
                  threads: int) -> tuple[Path, dict]:
    """The cached ONNX graph of one tower ("fp32" or "int8"), exported on first use."""
    import torch

    parts = {"weights": lm.weights_sha256, "tower": kind, "format": "fp32", "opset": export.OPSET,
             "recipe": export.RECIPE, "trim": bool(lm.trim_text), "image_size": list(lm.image_size),
             **export.versions("torch", "onnx", "onnxscript", "open_clip")}
    root = export.cache_root(cache_dir) / lm.weights_sha256[:16]
    ctx = int(getattr(lm.tokenizer, "context_length", 77))
    fp32_name = f"{kind}-fp32-{export.entry_key(parts)}"

    def build_fp32(tmp: Path) -> dict:
        net = lm.model
        if next(net.parameters()).device.type != "cpu" or next(net.parameters()).dtype != torch.float32:
            raise ModelError("export needs the fp32 model on CPU")
        export.export_onnx(net, kind, tmp / export.MODEL_FILE, lm.image_size, ctx, lm.trim_text)
        return {"parts": parts}

    folder, meta = export.cached_entry(root, fp32_name, build_fp32)
    if fmt == "fp32":
        return folder, meta
    if calibration is None:
        raise ModelError("precision int8 needs a calibration batch of images and captions from the run")
    reduce_range = not cpu_has_vnni()
    fit_images, fit_captions = calibration.fit()
    if kind == "image":
        digest = hashlib.sha256(fit_images.tobytes() + str(fit_images.shape).encode()).hexdigest()
    else:
        digest = hashlib.sha256(json.dumps(fit_captions).encode()).hexdigest()
    qparts = dict(parts, format="int8", calibration=digest, reduce_range=reduce_range,
                  **export.versions("onnxruntime"))
    src = folder / export.MODEL_FILE

    def build_int8(tmp: Path) -> dict:
        if kind == "image":
            x = Normaliser(lm.preprocess_cfg["mean"], lm.preprocess_cfg["std"])(fit_images)
            feeds = [{"pixels": x[i:i + FEED_BATCH]} for i in range(0, len(x), FEED_BATCH)]
        else:
            tokens = lm.tokenize(fit_captions)
            from .text import token_lengths

            lengths = token_lengths(tokens).numpy()
            # One caption per feed at its own length: padding never widens the fitted ranges.
            feeds = [{"tokens": tokens[i:i + 1, : (max(2, int(lengths[i])) if lm.trim_text else tokens.shape[1])]
                      .numpy().astype(np.int64)} for i in range(len(fit_captions))]
        info = export.quantize_static_int8(src, tmp / export.MODEL_FILE, feeds, reduce_range)
        return {"parts": qparts, **info}

    return export.cached_entry(root, f"{kind}-int8-{export.entry_key(qparts)}", build_int8)


def build_tower(lm: Any, kind: str, backend: str, precision: str, *, device: str = "cpu",
                cache_dir: str | None = None, calibration: Calibration | None = None,
                threads: int = 1) -> Tower:
    """One tower of loaded model `lm` on one path; compiled paths export (or reuse) the ONNX graph."""
    if backend == "torch":
        if precision == "fp32":
            net = lm.model
        else:
            net = _torch_copy(lm, precision)
        return TorchTower(net, kind, device, precision, lm.trim_text)
    fmt = "int8" if precision == "int8" else "fp32"
    folder, meta = _export_entry(lm, kind, fmt, cache_dir, calibration, threads)
    path = folder / export.MODEL_FILE
    info = {"export_s": meta.get("build_s"), "bytes": meta.get("bytes"), "reused": meta.get("reused"),
            "folder": str(folder)}
    if backend == "onnxruntime":
        if precision not in ("fp32", "int8"):
            raise ModelError(f"onnxruntime runs fp32 and int8 here, not {precision}")
        return OrtTower(path, kind, precision, threads, info)
    if backend == "openvino":
        return OvTower(path, kind, precision, threads, info)
    raise ModelError(f"unknown backend {backend!r}")


def _torch_copy(lm: Any, precision: str) -> Any:
    """The model in bf16/fp16 (a copy; the fp32 model stays the reference and the export source)."""
    import copy

    import torch

    copies = lm.__dict__.setdefault("_copies", {})  # kept with the loaded model, one per precision
    if precision not in copies:
        dtype = {"bf16": torch.bfloat16, "fp16": torch.float16}[precision]
        copies[precision] = copy.deepcopy(lm.model).to(dtype)
    return copies[precision]


# ----------------------------------------------------------------------------- measuring


def normalised(x: np.ndarray) -> np.ndarray:
    x = np.asarray(x, dtype=np.float32)
    return x / np.maximum(np.linalg.norm(x, axis=1, keepdims=True), 1e-12)


def agreement_diff(img: np.ndarray, txt: np.ndarray, ref_img: np.ndarray, ref_txt: np.ndarray) -> float:
    """Largest change of any image-caption cosine (all pairs) against the reference embeddings."""
    a = normalised(img) @ normalised(txt).T
    b = normalised(ref_img) @ normalised(ref_txt).T
    return float(np.max(np.abs(a - b)))


def max_cosine_gap(a: np.ndarray, b: np.ndarray) -> float:
    """Largest 1 - cos between matching rows."""
    return float(np.max(1.0 - np.sum(normalised(a) * normalised(b), axis=1)))


def _text_batches(lm: Any, captions: list[str], batch: int) -> list[tuple[np.ndarray, np.ndarray]]:
    """Token batches exactly as encode_texts forms them (text.token_batches)."""
    from .text import token_batches

    return [(idx, sub.numpy().astype(np.int64)) for idx, sub in token_batches(lm.tokenize(captions), batch,
                                                                              lm.trim_text)]


def run_tower(lm: Any, tower: Tower, inputs: Any, batch: int) -> np.ndarray:
    """Features for a whole input set (image: float32 NCHW; text: list of captions)."""
    if tower.kind == "image":
        return np.concatenate([tower(inputs[i:i + batch]) for i in range(0, len(inputs), batch)])
    parts = _text_batches(lm, inputs, batch)
    out = None
    for idx, toks in parts:
        f = tower(toks)
        if out is None:
            out = np.zeros((len(inputs), f.shape[1]), dtype=np.float32)
        out[idx] = f
    return out


def measure(lm: Any, towers: dict[str, dict[str, Tower]], calibration: Calibration, batch: int,
            rounds: int = ROUNDS, timing_items: int = TIMING_ITEMS) -> dict:
    """Per path and tower: features of the check half, and seconds per item.

    The features pass over the whole check half doubles as warm-up; timing is the median of
    `rounds` passes over its first `timing_items` items, the paths interleaved within each round
    so load from other processes falls on all of them alike.
    """
    images, captions = calibration.check()
    x = Normaliser(lm.preprocess_cfg["mean"], lm.preprocess_cfg["std"])(images)
    inputs = {"image": x, "text": captions}
    timed = {"image": x[:timing_items], "text": captions[:timing_items]}
    res: dict = {name: {} for name in towers}
    for name, pair in towers.items():
        for kind, tower in pair.items():
            res[name][kind] = {"features": run_tower(lm, tower, inputs[kind], batch), "times": []}
    for _ in range(max(1, rounds)):
        for name, pair in towers.items():
            for kind, tower in pair.items():
                t0 = time.perf_counter()
                run_tower(lm, tower, timed[kind], batch)
                res[name][kind]["times"].append((time.perf_counter() - t0) / len(timed[kind]))
    for name in res:
        for kind in res[name]:
            res[name][kind]["s_per_item"] = float(np.median(res[name][kind].pop("times")))
    return res


def pick(measured: dict, reference: str, tolerance: float, allowed: list[str] | None = None) -> dict:
    """Fastest (image path, text path) among `allowed` whose agreement stays within `tolerance`.

    Agreement error: the largest change of any image-caption cosine against `reference` (torch
    fp32). Raises ModelError when no combination is within tolerance.
    """
    ref_i = measured[reference]["image"]["features"]
    ref_t = measured[reference]["text"]["features"]
    allowed = list(allowed or measured)

    def secs(ni: str, nt: str) -> float:
        return measured[ni]["image"]["s_per_item"] + measured[nt]["text"]["s_per_item"]

    def err(ni: str, nt: str) -> float:
        return agreement_diff(measured[ni]["image"]["features"], measured[nt]["text"]["features"], ref_i, ref_t)

    per_path = {}
    for n in measured:
        per_path[n] = {
            "image_per_s": round(1.0 / measured[n]["image"]["s_per_item"], 2),
            "text_per_s": round(1.0 / measured[n]["text"]["s_per_item"], 2),
            "per_s": round(1.0 / secs(n, n), 2),
            "image_max_1_minus_cos": max_cosine_gap(measured[n]["image"]["features"], ref_i),
            "text_max_1_minus_cos": max_cosine_gap(measured[n]["text"]["features"], ref_t),
            "max_agreement_diff": err(n, n),
        }
    fits = [(secs(ni, nt), ni, nt) for ni in allowed for nt in allowed if err(ni, nt) <= tolerance]
    if not fits:
        raise ModelError(
            f"no inference path among {', '.join(allowed)} keeps image-caption agreement within {tolerance} "
            "of torch fp32 on the calibration batch (largest changes: "
            + ", ".join(f"{n} {per_path[n]['max_agreement_diff']:.4f}" for n in allowed)
            + "); raise the tolerance or choose a backend and precision explicitly")
    s, ni, nt = min(fits)
    ref_s = secs(reference, reference)
    return {"image": ni, "text": nt, "per_s": round(1.0 / s, 2), "max_agreement_diff": err(ni, nt),
            "reference": reference, "reference_per_s": round(1.0 / ref_s, 2), "speedup": round(ref_s / s, 3),
            "tolerance": tolerance, "paths": per_path}


def machine_signature() -> dict:
    """What makes a speed measurement specific to this machine."""
    model = ""
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                model = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    flags = sorted(f for f in _cpu_flags() if f.startswith(("avx", "amx", "fma", "f16c")))
    return {"machine": platform.machine(), "cpu": model or platform.processor(), "flags": flags}


def choose(lm: Any, *, device: str, backend: str, precision: str, calibration: Calibration | None,
           tolerance: float, cache_dir: str | None, threads: int, batch: int = 32) -> tuple[dict, dict]:
    """Build the towers for (backend, precision), measuring and picking when more than one path fits.

    Returns ({"image": Tower, "text": Tower}, choice). With a calibration batch every candidate
    path and torch fp32 are measured on it, and choice holds the pick, its speed and agreement
    error, and every path's figures. One explicit path is used whatever its error (the figures
    say it); among several, the fastest within `tolerance` wins. A pick is remembered in the
    export cache under the calibration digest and this machine's signature, so a re-run with the
    same calibration batch on the same machine reuses it (same numbers) without measuring again.
    """
    paths = plan(device, backend, precision)
    names = [path_name(*p) for p in paths]
    kw = dict(device=device, cache_dir=cache_dir, calibration=calibration, threads=threads)
    if calibration is None:
        first = paths[0]
        if (len(paths) > 1 and not device.startswith("cuda")) or first[1] == "int8":
            raise ModelError(f"backend={backend!r}, precision={precision!r} needs a calibration batch of images "
                             f"and captions from the run (to fit int8 scales and to measure "
                             f"{', '.join(names)} against torch fp32); none was given")
        towers = {k: build_tower(lm, k, *first, **kw) for k in ("image", "text")}
        return towers, {"image": names[0], "text": names[0], "measured": False, "tolerance": tolerance,
                        "exports": _exports(towers)}
    ref_name = path_name("torch", "fp32")
    all_names = names if ref_name in names else [ref_name] + names
    key = export.entry_key({"weights": lm.weights_sha256, "calibration": calibration.digest(), "paths": all_names,
                            "tolerance": tolerance, "threads": threads, "batch": batch,
                            "device": device.split(":")[0], "recipe": export.RECIPE, **machine_signature(),
                            **export.versions("torch", "onnxruntime", "openvino")})
    memo = export.cache_root(cache_dir) / lm.weights_sha256[:16] / f"choice-{key}.json"
    if memo.is_file():
        try:
            choice = json.loads(memo.read_text(encoding="utf-8"))
            towers = {k: build_tower(lm, k, *choice[k].split("-", 1), **kw) for k in ("image", "text")}
            choice.update(reused=True, exports=_exports(towers))
            return towers, choice
        except (ValueError, KeyError):
            memo.unlink(missing_ok=True)
    built = {n: {k: build_tower(lm, k, *n.split("-", 1), **kw) for k in ("image", "text")} for n in all_names}
    measured = measure(lm, built, calibration, batch)
    explicit = len(names) == 1
    choice = pick(measured, ref_name, float("inf") if explicit else tolerance, names)
    choice.update(tolerance=tolerance, within_tolerance=choice["max_agreement_diff"] <= tolerance, measured=True,
                  calibration={"images": int(len(calibration.images)), "captions": len(calibration.captions),
                               "sha256": calibration.digest()})
    towers = {"image": built[choice["image"]]["image"], "text": built[choice["text"]]["text"]}
    memo.parent.mkdir(parents=True, exist_ok=True)
    tmp = memo.with_name(memo.name + f".tmp{time.time_ns()}")
    tmp.write_text(json.dumps(choice, indent=1, sort_keys=True), encoding="utf-8")
    tmp.replace(memo)
    choice.update(reused=False, exports=_exports(towers))
    return towers, choice


def _exports(towers: dict[str, Tower]) -> dict:
    return {k: dict(path=t.name, **{m: v for m, v in t.meta.items() if m != "folder"}) for k, t in towers.items()}


def fit_batch_size(lm: Any, default: int, *, cap: int = 1024, headroom: float = 0.7) -> int:
    """Largest image batch that fits the GPU's free memory (a multiple of 8, <= cap).

    One probe batch of `default` measures the peak activation memory per image; the batch is
    sized to `headroom` of the free memory after that. On CPU `default` is returned unchanged.
    """
    import torch

    tower = lm.towers["image"] if lm.towers else None
    device = getattr(tower, "device", lm.device)
    if not str(device).startswith("cuda") or not torch.cuda.is_available():
        return default
    h, w = lm.image_size
    probe = np.zeros((default, h, w, 3), dtype=np.uint8)
    torch.cuda.synchronize(device)
    torch.cuda.reset_peak_memory_stats(device)
    before = torch.cuda.memory_allocated(device)
    lm.encode_images(probe)
    torch.cuda.synchronize(device)
    per_image = max(1, (torch.cuda.max_memory_allocated(device) - before) // default)
    free, _ = torch.cuda.mem_get_info(device)
    fit = int(free * headroom // per_image)
    return int(max(8, min(cap, fit) // 8 * 8))


def summary(choice: dict) -> dict:
    """The few figures of a choice worth keeping in a manifest or report."""
    keys = ("image", "text", "per_s", "reference_per_s", "speedup", "max_agreement_diff", "tolerance",
            "within_tolerance", "measured", "reused", "calibration")
    return {k: choice[k] for k in keys if k in choice}
