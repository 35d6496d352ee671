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
import io
import logging
import math
import os
from dataclasses import dataclass, field

import numpy as np
import pyarrow as pa

from ..checks import CHECKS_TYPE, check
from .base import CheckSpec, Column, ConfigView, StageContext, checks_column, stage

NAME = "embed"
VERSION = "2"
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
    # Decode JPEGs at a reduced DCT scale (Pillow draft: 1/2, 1/4 or 1/8) that keeps both sides
    # >= 2x the model input, so the bicubic resize after it still averages over >= 2 source pixels.
    # Measured on the demo corpus: agreement moves by at most 0.0064 vs full decoding (0.028 when
    # drafting down to 1x the input size).
    jpeg_draft: bool = True
    # Dynamic int8 quantisation of the image tower's Linear layers (torch.ao), CPU only. Faster;
    # agreement moves by less than 0.01 on the demo corpus (bench/throughput.py --quantize).
    quantize: bool = False
    # Download cache for pretrained tags; empty = open_clip's standard cache (see README).
    cache_dir: str = ""

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


CHECKS = (
    CheckSpec("embed_error", "drop",
              "the image could not be read or decoded for the CLIP model although inspect decoded it"),
)

# Images per work item of a decode worker (common practice: a few per item keeps pipes busy).
CHUNK = 8
# JPEG draft decoding keeps both sides >= this many times the model input (see jpeg_draft).
DRAFT_MARGIN = 2


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


def decode_for_model(data: bytes | BaseException, steps: list, draft_px: int) -> np.ndarray:
    """Image bytes -> uint8 HxWx3 pixels after open_clip's eval resize and crop."""
    import warnings

    from PIL import Image, ImageOps

    from .inspect import to_rgb

    if isinstance(data, BaseException):
        raise data
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # odd EXIF/ICC blocks: inspect already judged this image
        img = Image.open(io.BytesIO(data))
        if draft_px and img.format == "JPEG":
            # Draft picks the smallest DCT scale (1/2, 1/4, 1/8) keeping both sides >= draft_px.
            img.draft(img.mode, (draft_px, draft_px))
        img = to_rgb(ImageOps.exif_transpose(img))
    for step in steps:
        img = step(img)
    return np.asarray(img, dtype=np.uint8)


class ImageChunks:
    """Work items for decode workers: item i = (i, pixels [n, H, W, 3] uint8, errors [n])."""

    def __init__(self, locators: list[str], steps: list, size_hw: tuple[int, int], draft_px: int,
                 chunk: int = CHUNK, max_bytes: int | None = None):
        self.locators = locators
        self.max_bytes = max_bytes
        self.steps = steps
        self.size_hw = size_hw
        self.draft_px = draft_px
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
                arr = decode_for_model(data, self.steps, self.draft_px)
                if arr.shape != pixels.shape[1:]:
                    raise ValueError(f"preprocessed to {arr.shape}, expected {pixels.shape[1:]}")
                pixels[j] = arr
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


def iter_chunks(dataset: ImageChunks, workers: int):
    """Yield the dataset's items in order, from worker processes when workers > 0."""
    if workers <= 0:
        for i in range(len(dataset)):
            yield dataset[i]
        return
    from torch.utils.data import DataLoader

    loader = DataLoader(dataset, batch_size=None, shuffle=False, num_workers=workers,
                        prefetch_factor=4, persistent_workers=False)
    for i, pixels, errors in loader:
        yield int(i), np.asarray(pixels), list(errors)


@stage(name=NAME, version=VERSION, config=EmbedConfig, kind="shard", phase="model", alive_only=True, sections=("input",),
       needs=("locator", "caption", "decoded", "sha256"), provides=columns, checks=CHECKS,
       parallel="inline", cache_key=("sha256", "caption"), identity=lambda view: identity(view))
def run(table: pa.Table, cfg: EmbedConfig, ctx: StageContext) -> pa.Table:
    """CLIP image and caption embeddings of every live sample."""
    import torch

    from ..models import clip as clipmod

    lm = clipmod.load_model(cfg.model, cfg.pretrained, device=cfg.device, cache_dir=cfg.cache_dir or None,
                            quantize=cfg.quantize)
    dim = lm.embed_dim()
    n = table.num_rows
    decoded = table.column("decoded").to_pylist()
    captions = table.column("caption").to_pylist()
    shas = table.column("sha256").to_pylist() if "sha256" in table.column_names else [None] * n
    locators = table.column("locator").to_pylist()
    eligible = [i for i in range(n) if decoded[i] is True and captions[i] is not None]

    # Distinct images (by content hash) and distinct captions, each encoded once.
    image_key: dict[str, int] = {}
    image_locs: list[str] = []
    row_image = np.full(n, -1, dtype=np.int64)
    text_key: dict[str, int] = {}
    row_text = np.full(n, -1, dtype=np.int64)
    for i in eligible:
        key = shas[i] or f"locator:{locators[i]}"
        if key not in image_key:
            image_key[key] = len(image_locs)
            image_locs.append(locators[i])
        row_image[i] = image_key[key]
        row_text[i] = text_key.setdefault(captions[i], len(text_key))
    rows_per_image = np.bincount(row_image[row_image >= 0], minlength=len(image_locs))
    if ctx.progress is not None and n - len(eligible):
        ctx.progress.advance(n - len(eligible))

    img_vecs = np.zeros((len(image_locs), dim), dtype=np.float32)
    img_err: list[str | None] = [None] * len(image_locs)
    threads_before = torch.get_num_threads()
    torch.set_num_threads(cfg.threads or available_cores())
    try:
        draft_px = DRAFT_MARGIN * max(lm.image_size) if cfg.jpeg_draft else 0
        dataset = ImageChunks(image_locs, lm.pil_steps(), lm.image_size, draft_px,
                              max_bytes=ctx.config.section("input").max_file_bytes)
        workers = decode_worker_count(cfg, lm.device) if len(image_locs) > cfg.batch_size else 0
        chunks = iter_chunks(dataset, workers)  # workers start decoding on the first next()
        first = next(chunks, None)
        txt_vecs = lm.encode_texts(list(text_key), cfg.batch_size)  # overlaps with decoding
        pending: list[tuple[int, np.ndarray]] = []  # (image index, pixels) waiting for a batch

        def flush() -> None:
            idx = np.array([p[0] for p in pending], dtype=np.int64)
            batch = torch.from_numpy(np.stack([p[1] for p in pending]))
            img_vecs[idx] = lm.encode_images(batch)
            if ctx.progress is not None:
                ctx.progress.advance(int(rows_per_image[idx].sum()))
            pending.clear()

        def consume(item: tuple[int, np.ndarray, list]) -> None:
            ci, pixels, errors = item
            for j, err in enumerate(errors):
                k = ci * dataset.chunk + j
                if err is None:
                    pending.append((k, pixels[j]))
                else:
                    img_err[k] = err
                    if ctx.progress is not None:
                        ctx.progress.advance(int(rows_per_image[k]))
                if len(pending) >= cfg.batch_size:
                    flush()

        if first is not None:
            consume(first)
        for item in chunks:
            consume(item)
        if pending:
            flush()
    finally:
        torch.set_num_threads(threads_before)

    return _assemble(table, dim, row_image, row_text, img_vecs, img_err, txt_vecs)


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
    """Model name, tag or path and weights checksum (downloads tagged weights on first use)."""
    from ..models import clip as clipmod

    cfg = view.section(NAME)
    out = clipmod.identity(cfg.model, cfg.pretrained, cfg.cache_dir or None)
    out["quantize"] = bool(cfg.quantize)
    ref = clipmod.resolve(cfg.model, cfg.pretrained)
    if ref.weights_path:
        check_checkpoint(ref.weights_path)
    return out


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
