"""embed: CLIP image and caption embeddings for every decoded sample with a caption.

Runs in the main process (parallel="inline"): decode/preprocess worker processes read and
decode images (Pillow, EXIF orientation, alpha on white, JPEG draft mode) and run open_clip's
own eval resize and crop, while the model encodes in torch threads. Identical image bytes
(same sha256) and identical captions are encoded once. Caption batches are sorted by token
length and cut to their longest caption where that is exact for the model (see
curate.models.clip.LoadedModel.encode_texts). Embeddings are L2-normalised float16.
"""
from __future__ import annotations

import functools
import json
import logging
import math
import os
import sys
from dataclasses import asdict, dataclass, field, replace
from typing import Any, Literal

import numpy as np
import pyarrow as pa

from ..checks import CHECKS_TYPE, check
from ..models import backends, preprocess
from .base import CheckSpec, Column, ConfigView, StageContext, checks_column, stage

NAME = "embed"
VERSION = "3"  # 3: JPEG draft keyed on the resize side (curate.models.preprocess)
log = logging.getLogger(__name__)


@dataclass
class EmbedConfig:
    enabled: bool = True
    # open_clip architecture name (e.g. ViT-B-32), "demo" (the small model shipped with curate),
    # or the path of an open_clip model config .json. ViT-B/32 is the model LAION-400M/5B filtered with.
    model: str = "ViT-B-32"
    # A pretrained tag of `model` (downloaded once into the standard cache; "openai" = OpenAI's
    # CLIP weights, the ones LAION's thresholds were set with) or a local checkpoint path. With
    # model = "demo" only a checkpoint path counts (it replaces the shipped demo weights).
    pretrained: str = field(default="openai", metadata={"path": True})
    # Images or captions per forward pass (common practice; 32-64 measured best on 2 CPU cores).
    batch_size: int = 64
    # torch threads for the model; 0 = all CPU cores of this process.
    threads: int = 0
    # "auto" (CUDA when torch sees a GPU), "cpu", or "cuda" / "cuda:N".
    device: str = "auto"
    # Decode/preprocess worker processes; 0 = auto (1 per 4 cores on CPU, all cores but one with CUDA).
    # Shards with at most one batch of distinct images are decoded in the main process.
    decode_workers: int = 0
    # Decode JPEGs at a reduced DCT scale (Pillow draft: 1/2 or 1/4) that keeps the side the resize
    # keys on >= 1.5x the model input, so the bicubic resize after it still averages over >= 1.5
    # source pixels (curate/models/preprocess.py). Measured by bench/throughput.py on public photos
    # cut to 1024x768: ViT-B-32 decodes at 1/2 scale, decode + resize 2.2x faster, image-caption
    # cosines moved by <= 0.0008 vs full decoding (0.028 when drafting down to 1x the input size).
    jpeg_draft: bool = True
    # Dynamic int8 quantisation of the image tower's Linear layers (torch.ao), CPU only. Faster;
    # agreement moves by less than 0.01 on the demo corpus. Results depend on batch-mates; precision =
    # "int8" (static scales) does not.
    quantize: bool = False
    # Download cache for pretrained tags; empty = open_clip's standard cache (see README).
    cache_dir: str = ""
    # torch (the reference: open_clip's own forward pass), onnxruntime or openvino (a graph exported once
    # per weights digest), or auto: the fastest path measured here within `tolerance` (models/BACKENDS.md).
    backend: Literal["auto", "torch", "onnxruntime", "openvino"] = "torch"
    # fp32 (the reference), bf16 (where the runtime reports CPU support), fp16 (CUDA), int8 (onnxruntime,
    # openvino; static scales fitted on the run's first images, so batch-mates never matter), or auto.
    precision: Literal["auto", "fp32", "bf16", "fp16", "int8"] = "fp32"
    # auto: largest change of any image-caption cosine vs torch fp32 a path may make; 0.005 is a quarter
    # of the 0.02 between LAION-5B's and LAION-400M's thresholds (0.28, 0.30).
    tolerance: float = backends.DEFAULT_TOLERANCE
    # auto, int8: images with captions from the start of the input (source order); half fit int8
    # scales, half measure each path (64: what bench/throughput.py calibrates with).
    calibration_samples: int = 64

    def validate(self) -> None:
        if self.batch_size < 1:
            raise ValueError("batch_size must be >= 1")
        if self.threads < 0 or self.decode_workers < 0:
            raise ValueError("threads and decode_workers must be >= 0 (0 = automatic)")
        if not (self.device in ("auto", "cpu") or self.device.startswith("cuda")):
            raise ValueError(f"device must be auto, cpu or cuda[:N], got {self.device!r}")
        if self.quantize and self.device.startswith("cuda"):
            raise ValueError("quantize works on CPU only; set device = 'cpu' or 'auto'")
        if not self.model.strip():
            raise ValueError("model is empty: give an open_clip architecture name, 'demo' or a config .json")
        why = backends.refusal(self.backend, self.precision, self.device)
        if why:
            raise ValueError(f"backend = {self.backend!r}, precision = {self.precision!r}: {why}")
        if self.quantize and (self.backend, self.precision) != ("torch", "fp32"):
            raise ValueError("quantize is torch's dynamic int8 of the fp32 image tower; with another backend or "
                             "precision set quantize = false (precision = 'int8' is the static int8)")
        if not 0 < self.tolerance <= 2:
            raise ValueError(f"tolerance must be in (0, 2] (a cosine change), got {self.tolerance}")
        if self.calibration_samples < backends.MIN_CALIBRATION:
            raise ValueError(f"calibration_samples must be >= {backends.MIN_CALIBRATION}, "
                             f"got {self.calibration_samples}")

    @property
    def reference(self) -> bool:
        """True for the reference path (torch fp32), which needs no export, calibration or measuring."""
        return (self.backend, self.precision) == ("torch", "fp32")


CHECKS = (
    CheckSpec("embed_error", "drop",
              "the image could not be read or decoded for the CLIP model although inspect decoded it"),
)

# Images per work item of a decode worker (common practice: a few per item keeps pipes busy).
CHUNK = 8
# JPEG draft decoding keeps the side the resize keys on >= this many times the model input (jpeg_draft).
DRAFT_MARGIN = preprocess.DRAFT_MARGIN


def output_schema(dim: int) -> pa.Schema:
    vec = pa.list_(pa.float16(), dim)
    return pa.schema([("sample_id", pa.string()), ("image_emb", vec), ("text_emb", vec),
                      (checks_column(NAME), CHECKS_TYPE)])


@functools.lru_cache(maxsize=8)
def embed_dim(model: str, pretrained: str) -> int:
    """The model's embedding size, read from its config without building it (ModelError when unknown)."""
    from ..models import clip as clipmod

    ref = clipmod.resolve(model, pretrained)
    if ref.config_path is not None:
        data = clipmod.read_json_config(ref.config_path)
        model_cfg = data.get("model_cfg", data)
    else:
        import open_clip

        model_cfg = open_clip.get_model_config(ref.arch)
    return int(model_cfg["embed_dim"])


def columns(view: ConfigView) -> tuple[Column, ...]:
    """Image and caption embeddings; their width is the model's embedding size."""
    cfg = view.section(NAME)
    vec = pa.list_(pa.float16(), embed_dim(cfg.model, cfg.pretrained))
    return (Column("image_emb", vec, "CLIP image embedding (L2-normalised)", ledger=False),
            Column("text_emb", vec, "CLIP caption embedding (L2-normalised)", ledger=False))


@dataclass(frozen=True)
class ModelDecoder:
    """Image bytes -> uint8 HxWx3 pixels after open_clip's eval resize and crop, JPEGs decoded at the
    draft scale of curate.models.preprocess. The one rule of every image a model embeds: the stage,
    its calibration batch and outside sets (curate.imagesets.set_embeddings)."""

    steps: tuple
    size_hw: tuple[int, int]
    resize_mode: str = "shortest"
    margin: float = DRAFT_MARGIN  # 0 = decode in full

    def __call__(self, data: bytes | BaseException) -> np.ndarray:
        from .inspect import to_rgb

        return preprocess.decode_for_model(data, list(self.steps), self.size_hw, to_rgb, self.resize_mode,
                                           self.margin)

    def key(self) -> dict:
        """What the decoded pixels depend on besides the bytes (for cache keys)."""
        return {"draft_margin": self.margin, "max_reduction": preprocess.MAX_DRAFT_REDUCTION,
                "resize_mode": self.resize_mode}


def decode_for_model(data: bytes | BaseException, steps: list, size_hw: tuple[int, int], margin: float = 0.0,
                     resize_mode: str = "shortest") -> np.ndarray:
    """One image through a ModelDecoder (margin 0 = full decode)."""
    return ModelDecoder(tuple(steps), tuple(size_hw), resize_mode, margin)(data)


def model_decoder(lm: Any, cfg: EmbedConfig) -> ModelDecoder:
    """The decoder for `lm` under `cfg` (jpeg_draft on: preprocess's draft margin; off: full decode)."""
    return ModelDecoder(tuple(lm.pil_steps()), tuple(lm.image_size),
                        lm.preprocess_cfg.get("resize_mode", "shortest") or "shortest",
                        DRAFT_MARGIN if cfg.jpeg_draft else 0.0)


class ImageChunks:
    """Work items for decode workers: item i = (i, pixels [n, H, W, 3] uint8, errors [n])."""

    def __init__(self, locators: list[str], decoder: ModelDecoder, chunk: int = CHUNK, max_bytes: int | None = None):
        self.locators = locators
        self.max_bytes = max_bytes
        self.decoder = decoder
        self.size_hw = decoder.size_hw
        self.chunk = chunk

    def __len__(self) -> int:
        return math.ceil(len(self.locators) / self.chunk)

    def __getitem__(self, i: int) -> tuple[int, np.ndarray, list]:
        from ..sources import read_bytes

        locs = self.locators[i * self.chunk:(i + 1) * self.chunk]
        pixels = np.zeros((len(locs), self.size_hw[0], self.size_hw[1], 3), dtype=np.uint8)
        errors: list[str | None] = [None] * len(locs)
        for j, data in enumerate(read_bytes(locs, max_bytes=self.max_bytes)):
            try:
                pixels[j] = self.decoder(data)  # raises on a wrong shape
            except Exception as e:  # noqa: BLE001 - one bad image is this sample's reason
                errors[j] = f"{type(e).__name__}: {e}"[:160]
        return i, pixels, errors


def available_cores() -> int:
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # not on Linux
        return os.cpu_count() or 1


def decode_worker_count(cfg: EmbedConfig, device: str) -> int:
    if cfg.decode_workers > 0:
        return cfg.decode_workers
    cores = available_cores()
    return max(1, cores - 1) if device.startswith("cuda") else max(1, cores // 4)


def iter_chunks(dataset: ImageChunks, workers: int, threads: bool = False):
    """Yield the dataset's items in order, from `workers` worker processes (threads with `threads`)."""
    if workers <= 0:
        for i in range(len(dataset)):
            yield dataset[i]
        return
    if threads:
        yield from _thread_chunks(dataset, workers)
        return
    from torch.utils.data import DataLoader

    loader = DataLoader(dataset, batch_size=None, shuffle=False, num_workers=workers,
                        prefetch_factor=4, persistent_workers=False)
    for i, pixels, errors in loader:
        yield int(i), np.asarray(pixels), list(errors)


def _thread_chunks(dataset: ImageChunks, workers: int):
    """Items decoded by a thread pool, in order, at most 4 per thread ahead (Pillow's decode and
    resize release the GIL, so threads decode in parallel with each other and with the model)."""
    from collections import deque
    from concurrent.futures import ThreadPoolExecutor

    with ThreadPoolExecutor(workers, thread_name_prefix="curate-decode") as pool:
        ahead: deque = deque()
        for i in range(len(dataset)):
            ahead.append(pool.submit(dataset.__getitem__, i))
            if len(ahead) > 4 * workers:
                yield ahead.popleft().result()
        while ahead:
            yield ahead.popleft().result()


@stage(name=NAME, version=VERSION, config=EmbedConfig, kind="shard", phase="model", alive_only=True, sections=("input",),
       needs=("locator", "caption", "decoded", "sha256"), provides=columns, checks=CHECKS,
       parallel="inline", cache_key=("sha256", "caption"), identity=lambda view: identity(view))
def run(table: pa.Table, cfg: EmbedConfig, ctx: StageContext) -> pa.Table:
    """CLIP image and caption embeddings of every live sample."""
    import torch

    lm = load(ctx.config)
    if "fallback" in lm.choice and not lm.choice.get("told"):
        lm.choice["told"] = True  # once per loaded model, in the run (the plan runs before its notes are kept)
        log.warning("embed: backend/precision auto fell back to torch fp32: %s", lm.choice["fallback"])
    dim = lm.embed_dim()
    d = Distinct(table)
    if ctx.progress is not None and table.num_rows - d.eligible:
        ctx.progress.advance(table.num_rows - d.eligible)
    img_vecs = np.zeros((len(d.image_locs), dim), dtype=np.float32)
    img_err: list[str | None] = [None] * len(d.image_locs)
    threads_before = torch.get_num_threads()
    torch.set_num_threads(cfg.threads or available_cores())
    try:
        dataset = ImageChunks(d.image_locs, model_decoder(lm, cfg), max_bytes=ctx.config.section("input").max_file_bytes)
        workers = decode_worker_count(cfg, lm.device) if len(d.image_locs) > cfg.batch_size else 0
        # A process that has run ONNX Runtime or OpenVINO (their own thread pools) is not forked: a forked
        # decode worker crashed the process once in three tries after an auto pick. Threads decode there.
        compiled = any(m in sys.modules for m in ("onnxruntime", "openvino"))
        chunks = iter_chunks(dataset, workers, threads=compiled)  # workers start on the first next()
        first = next(chunks, None)
        txt_vecs = lm.encode_texts(d.texts, cfg.batch_size)  # overlaps with decoding
        pending: list[tuple[int, np.ndarray]] = []  # (image index, pixels) waiting for a batch

        def flush() -> None:
            idx = np.array([p[0] for p in pending], dtype=np.int64)
            img_vecs[idx] = lm.encode_images(torch.from_numpy(np.stack([p[1] for p in pending])))
            if ctx.progress is not None:
                ctx.progress.advance(int(d.rows_per_image[idx].sum()))
            pending.clear()

        for ci, pixels, errors in _chain(first, chunks):
            for j, err in enumerate(errors):
                k = ci * dataset.chunk + j
                if err is None:
                    pending.append((k, pixels[j]))
                else:
                    img_err[k] = err
                    if ctx.progress is not None:
                        ctx.progress.advance(int(d.rows_per_image[k]))
                if len(pending) >= cfg.batch_size:
                    flush()
        if pending:
            flush()
    finally:
        torch.set_num_threads(threads_before)
    return _assemble(table, dim, d.row_image, d.row_text, img_vecs, img_err, txt_vecs)


def _chain(first: Any, rest: Any):
    """`first` (when not None) followed by the items of `rest`."""
    if first is not None:
        yield first
    yield from rest


class Distinct:
    """The live rows' distinct images (by content hash) and captions, each encoded once."""

    def __init__(self, table: pa.Table):
        n = table.num_rows
        decoded = table.column("decoded").to_pylist()
        captions = table.column("caption").to_pylist()
        shas = table.column("sha256").to_pylist() if "sha256" in table.column_names else [None] * n
        locators = table.column("locator").to_pylist()
        image_key: dict[str, int] = {}
        text_key: dict[str, int] = {}
        self.image_locs: list[str] = []
        self.row_image = np.full(n, -1, dtype=np.int64)  # row -> index into image_locs, -1 = not embedded
        self.row_text = np.full(n, -1, dtype=np.int64)  # row -> index into texts
        self.eligible = 0
        for i in range(n):
            if decoded[i] is not True or captions[i] is None:
                continue
            self.eligible += 1
            key = shas[i] or f"locator:{locators[i]}"
            if key not in image_key:
                image_key[key] = len(self.image_locs)
                self.image_locs.append(locators[i])
            self.row_image[i] = image_key[key]
            self.row_text[i] = text_key.setdefault(captions[i], len(text_key))
        self.texts = list(text_key)
        self.rows_per_image = np.bincount(self.row_image[self.row_image >= 0], minlength=len(self.image_locs))


def _assemble(table: pa.Table, dim: int, row_image: np.ndarray, row_text: np.ndarray, img_vecs: np.ndarray,
              img_err: list, txt_vecs: np.ndarray) -> pa.Table:
    n = table.num_rows
    ok = np.array([row_image[i] >= 0 and img_err[row_image[i]] is None for i in range(n)], dtype=bool)
    img_rows = np.zeros((n, dim), dtype=np.float16)
    txt_rows = np.zeros((n, dim), dtype=np.float16)
    if ok.any():
        img_rows[ok] = img_vecs[row_image[ok]].astype(np.float16)
        txt_rows[ok] = txt_vecs[row_text[ok]].astype(np.float16)
    vec_type = pa.list_(pa.float16(), dim)
    mask = pa.array(~ok)

    def column(rows: np.ndarray) -> pa.Array:
        return pa.FixedSizeListArray.from_arrays(pa.array(rows.reshape(-1), type=pa.float16()), type=vec_type,
                                                 mask=mask)

    checks = []
    for i in range(n):
        k = row_image[i]
        checks.append([check("embed_error", failed=True, detail=img_err[k])] if k >= 0 and img_err[k] is not None
                      else [])
    return pa.Table.from_arrays(
        [table.column("sample_id"), column(img_rows), column(txt_rows), pa.array(checks, type=CHECKS_TYPE)],
        schema=output_schema(dim),
    )


def identity(view: ConfigView) -> dict:
    """Model name, tag or path, weights checksum and, off the reference path, the inference path each
    tower actually uses (downloads tagged weights on first use; measures `auto` paths here, at plan
    time, so an unsupported setting stops the run before any work)."""
    from ..models import clip as clipmod

    cfg = view.section(NAME)
    out = clipmod.identity(cfg.model, cfg.pretrained, cfg.cache_dir or None, backend=cfg.backend,
                           precision=cfg.precision, tolerance=cfg.tolerance)
    out["quantize"] = bool(cfg.quantize)
    ref = clipmod.resolve(cfg.model, cfg.pretrained)
    if ref.weights_path:
        check_checkpoint(ref.weights_path)
    if not cfg.reference:
        lm = load(view)
        choice = lm.choice
        path = inference_path(lm)
        out["paths"] = {"image": path["image"], "text": path["text"]}
        if "calibration_sha256" in path:
            out["calibration_sha256"] = path["calibration_sha256"]  # int8 scales come from it
        # Speeds and errors: recorded in the manifest, left out of the fingerprint (curate.plan).
        out["measured"] = {**backends.summary(choice), **({"fallback": choice["fallback"]} if "fallback" in choice
                                                           else {})}
    return out


def inference_path(lm: Any) -> dict:
    """The path each tower of a loaded model runs on ("onnxruntime-fp32", ...) and, when either is int8, the
    digest of the calibration batch its scales were fitted on: with the weights, what decides the numbers."""
    out = {k: (lm.towers[k].name if lm.towers else "torch-fp32") for k in ("image", "text")}
    if any(v.endswith("-int8") for v in out.values()):
        out["calibration_sha256"] = lm.choice["calibration"]["sha256"]
    return out


def tower_identity(view: ConfigView, kind: str) -> dict:
    """For the fingerprint of a stage that encodes with the run's model (`load`): the path of its tower `kind`
    ("image" or "text"), with the calibration digest when int8. Empty on the reference path (torch fp32),
    which leaves those fingerprints as they were."""
    if view.section(NAME).reference:
        return {}
    path = inference_path(load(view))
    out = {f"{kind}_path": path[kind]}
    if path[kind].endswith("-int8"):
        out["calibration_sha256"] = path["calibration_sha256"]
    return out


# The model `load` resolved last, by the embed and input config it was resolved for: identity()
# resolves it at plan time, and the run in the same process (embed, and the stages that encode with
# the same model: concepts, the eval-set check) reuses it (same paths, no re-measuring).
_LOADED: dict[str, Any] = {}
# The sections `load` reads: every stage that calls it declares both.
LOAD_SECTIONS = (NAME, "input")


def load(view: ConfigView) -> Any:
    """The model on the configured inference path (clip.LoadedModel); `auto` and int8 calibrate on the
    run's own first images (`calibration`). A path that cannot run here raises ModelError.

    The one way the run loads its CLIP model: the embed stage, the concept prompts and the eval-set
    embeddings (curate.imagesets.set_embeddings) all encode on the path it returns. `view` needs the
    [embed] and [input] sections; the result depends on nothing else, so every stage's view of the same
    config gets the same model."""
    from ..errors import ModelError
    from ..models import clip as clipmod

    cfg = view.section(NAME)
    key = json.dumps({s: asdict(view.section(s)) for s in LOAD_SECTIONS}, sort_keys=True, default=str)
    if key in _LOADED:
        return _LOADED[key]
    kw = {"device": cfg.device, "cache_dir": cfg.cache_dir or None, "quantize": cfg.quantize}
    lm = clipmod.load_model(cfg.model, cfg.pretrained, **kw)
    if not cfg.reference:
        backends.plan(lm.device, cfg.backend, cfg.precision)  # the machine-specific refusals, named
        auto = "auto" in (cfg.backend, cfg.precision)
        cal = calibration(view, lm) if auto or cfg.precision == "int8" else None
        if cal is None and (cfg.precision == "int8" or (auto and not lm.device.startswith("cuda"))):
            why = (f"the input has fewer than {backends.MIN_CALIBRATION} decodable images with captions to "
                   "calibrate on")
            if not auto:
                raise ModelError(f"embed.precision = 'int8' needs calibration images: {why}")
            lm = replace(lm, choice={"image": "torch-fp32", "text": "torch-fp32", "measured": False, "fallback": why})
        else:
            lm = clipmod.load_model(cfg.model, cfg.pretrained, **kw, backend=cfg.backend, precision=cfg.precision,
                                    calibration=cal, tolerance=cfg.tolerance,
                                    threads=cfg.threads or available_cores(), batch_size=cfg.batch_size)
    _LOADED.clear()
    _LOADED[key] = lm
    return lm


def calibration(view: ConfigView, lm: Any) -> Any:
    """The first `calibration_samples` images of the input (source order) that decode for the model,
    with their captions, as a backends.Calibration; None when fewer than the minimum exist.

    Source order is the same on every run and for any shard size, so int8 scales fitted on it do
    not change when a run is resumed or re-sharded."""
    from ..sources import iter_samples, read_bytes

    cfg, inp = view.section(NAME), view.section("input")
    decode, want = model_decoder(lm, cfg), cfg.calibration_samples
    images: list[np.ndarray] = []
    captions: list[str] = []
    for batch in iter_samples(inp, batch_rows=max(want, 64)):
        rows = [r for r in batch.to_pylist() if r["locator"] and r["caption_raw"] is not None
                and not r["source_problem"] and not r["caption_problem"]]
        for r, data in zip(rows, read_bytes([r["locator"] for r in rows], max_bytes=inp.max_file_bytes)):
            text = r["caption_raw"].decode("utf-8", "replace").strip()
            try:
                px = decode(data)
            except Exception:  # noqa: BLE001 - an image that does not decode is simply not used
                continue
            if text:
                images.append(px)
                captions.append(text)
            if len(images) >= want:
                break
        if len(images) >= want:
            break
    if len(images) < backends.MIN_CALIBRATION:
        return None
    return backends.Calibration(np.stack(images), tuple(captions))


def check_checkpoint(path: str) -> None:
    """Read a local checkpoint's tensor index (all of a pickle), so a damaged file stops the run before
    any stage starts rather than after the cheap checks (ModelError)."""
    from ..errors import ModelError
    from ..models import clip as clipmod

    if path.lower().endswith(".safetensors"):
        from safetensors import safe_open

        try:
            with safe_open(path, framework="numpy") as f:
                names = list(f.keys())
        except Exception as e:  # noqa: BLE001 - any parse failure means a damaged or foreign file
            raise ModelError(f"checkpoint {path} is damaged or not a safetensors file: {e}") from e
        if not names:
            raise ModelError(f"checkpoint {path} holds no tensors")
    else:
        clipmod.read_state_dict(path)
