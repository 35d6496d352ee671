"""Image preprocessing for CLIP towers, fast enough to keep a compiled model busy.

Three pieces, in pipeline order:
- `decode_for_model`: image bytes -> uint8 HxWx3 after open_clip's eval resize and crop. JPEGs are
  decoded at a reduced DCT scale (Pillow draft) chosen from the side that the resize keys on, so a
  1024x768 photo bound for a 224 px model decodes at 512x384 instead of full size.
- `Normaliser`: uint8 NHWC batch -> float32 NCHW, (x / 255 - mean) / std done as one multiply and
  one subtract per channel into a reused buffer (the arithmetic of open_clip's ToTensor + Normalize).
- `prefetch`: runs an iterator (decode-worker output, batch assembly) one or more items ahead in a
  thread, so the next batch is ready when the model returns.

Pillow, numpy and threading only; torch is not needed here.
"""
from __future__ import annotations

import io
import math
import queue
import threading
from collections.abc import Callable, Iterable, Iterator
from typing import Any

import numpy as np

# JPEG draft: the decoded image keeps the side that the resize keys on (the shorter side for
# open_clip's default "shortest" mode) at >= this many times the model input, so the bicubic
# resize after it still averages over >= 1.5 source pixels. Measured by bench/throughput.py on
# public photos cut to 1024x768: ViT-B-32 (224 px) decodes at 1/2 scale, 2.2x faster decode +
# resize, image-caption cosines moved by <= 0.0008; margin 2 (the earlier rule) gives no
# reduction there. See curate/models/BACKENDS.md.
DRAFT_MARGIN = 1.5
# Smallest DCT scale used is 1/4: at 1/8 libjpeg keeps only each 8x8 block's DC coefficient (a
# box average), which moved the demo model's (64 px) cosines by 0.039 vs 0.0074 at 1/4
# (bench/throughput.py, 1024x768 photos).
MAX_DRAFT_REDUCTION = 4


def draft_request(size_wh: tuple[int, int], model_hw: tuple[int, int], resize_mode: str = "shortest",
                  margin: float = DRAFT_MARGIN) -> tuple[int, int] | None:
    """Size to pass to PIL's Image.draft so the resize after it still has >= `margin` x input pixels.

    Pillow picks the largest DCT reduction (1/2, 1/4, 1/8) that keeps both sides >= the request;
    asking for the image's own aspect ratio lets the longer side shrink along with the shorter.
    None when no reduction is possible or margin <= 0.
    """
    if margin <= 0:
        return None
    w, h = size_wh
    th, tw = model_hw
    if w <= 0 or h <= 0:
        return None
    if resize_mode == "squash":  # each side resized to its own target
        need = max(tw / w, th / h)
    elif resize_mode == "longest":  # longer side to the target, then padded
        need = max(th, tw) / max(w, h)
    else:  # "shortest": shorter side to the target, then centre crop (open_clip's default)
        need = max(th, tw) / min(w, h)
    need *= margin
    if need >= 0.5:  # not even a 1/2 reduction keeps enough pixels
        return None
    # Pillow's scale is the largest of 8, 4, 2, 1 <= min(w // req_w, h // req_h): keeping
    # w // req_w below 2 * MAX_DRAFT_REDUCTION caps the reduction.
    floor_w = w // (2 * MAX_DRAFT_REDUCTION) + 1
    return (max(1, math.ceil(w * need), floor_w), max(1, math.ceil(h * need)))


def open_for_model(data: bytes, model_hw: tuple[int, int], rgb: Callable[[Any], Any],
                   resize_mode: str = "shortest", margin: float = DRAFT_MARGIN) -> Any:
    """Image bytes -> upright 8-bit RGB PIL image, JPEG decoded in draft mode where it helps.

    `rgb` converts any Pillow mode to RGB (the project's one rule for alpha and 16-bit images).
    """
    import warnings

    from PIL import Image, ImageOps

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # odd EXIF/ICC blocks: the inspect stage judges those
        img = Image.open(io.BytesIO(data))
        if img.format == "JPEG":
            req = draft_request(img.size, model_hw, resize_mode, margin)
            if req is not None:
                img.draft(img.mode, req)
        img = rgb(ImageOps.exif_transpose(img))
    return img


def decode_for_model(data: bytes | BaseException, steps: list, model_hw: tuple[int, int],
                     rgb: Callable[[Any], Any], resize_mode: str = "shortest",
                     margin: float = DRAFT_MARGIN) -> np.ndarray:
    """Image bytes -> uint8 HxWx3 after `steps` (open_clip's eval resize and crop, PIL -> PIL).

    A read error passed in as `data` is raised here, so a decode worker reports it per image.
    """
    if isinstance(data, BaseException):
        raise data
    img = open_for_model(data, model_hw, rgb, resize_mode, margin)
    for step in steps:
        img = step(img)
    arr = np.asarray(img, dtype=np.uint8)
    if arr.shape != (model_hw[0], model_hw[1], 3):
        raise ValueError(f"preprocessed to {arr.shape}, expected {(model_hw[0], model_hw[1], 3)}")
    return arr


class Normaliser:
    """uint8 [N, H, W, 3] -> float32 [N, 3, H, W] = (x / 255 - mean) / std, per channel.

    Computed as x * (1 / (255 std)) - mean / std straight into the output (no float NHWC
    temporary, no separate transpose); agrees with open_clip's ToTensor + Normalize to ~1e-6.
    `reuse=True` writes into one buffer per batch shape (the caller must not keep the result).
    """

    def __init__(self, mean: Iterable[float], std: Iterable[float], reuse: bool = False):
        mean = np.asarray(list(mean), dtype=np.float64)
        std = np.asarray(list(std), dtype=np.float64)
        if mean.shape != (3,) or std.shape != (3,) or np.any(std <= 0):
            raise ValueError("mean and std need 3 values each, std > 0")
        self.scale = (1.0 / (255.0 * std)).astype(np.float32)
        self.offset = (mean / std).astype(np.float32)
        self.reuse = reuse
        self._buf: np.ndarray | None = None

    def __call__(self, pixels: Any, out: np.ndarray | None = None) -> np.ndarray:
        u8 = np.asarray(pixels)
        if u8.dtype != np.uint8 or u8.ndim != 4 or u8.shape[-1] != 3:
            raise ValueError(f"expected uint8 [N, H, W, 3], got {u8.dtype} {list(u8.shape)}")
        n, h, w, _ = u8.shape
        if out is None:
            if self.reuse and self._buf is not None and self._buf.shape == (n, 3, h, w):
                out = self._buf
            else:
                out = np.empty((n, 3, h, w), dtype=np.float32)
                if self.reuse:
                    self._buf = out
        for c in range(3):
            dst = out[:, c]
            np.multiply(u8[..., c], self.scale[c], out=dst, dtype=np.float32, casting="unsafe")
            np.subtract(dst, self.offset[c], out=dst)
        return out


def normalise(pixels: Any, mean: Iterable[float], std: Iterable[float]) -> np.ndarray:
    """One-off form of Normaliser: uint8 NHWC -> normalised float32 NCHW."""
    return Normaliser(mean, std)(pixels)


_DONE = object()


def prefetch(items: Iterable, depth: int = 2) -> Iterator:
    """Yield `items` in order while a thread computes up to `depth` of them ahead.

    An exception in the producer is re-raised in the consumer at the same position. Closing the
    generator early stops the producer at its next item.
    """
    if depth <= 0:
        yield from items
        return
    q: queue.Queue = queue.Queue(maxsize=depth)
    stop = threading.Event()

    def produce() -> None:
        try:
            for item in items:
                while not stop.is_set():
                    try:
                        q.put((item, None), timeout=0.1)
                        break
                    except queue.Full:
                        continue
                if stop.is_set():
                    return
            q.put((_DONE, None))
        except BaseException as e:  # noqa: BLE001 - handed to the consumer
            q.put((_DONE, e))

    t = threading.Thread(target=produce, name="curate-prefetch", daemon=True)
    t.start()
    try:
        while True:
            item, err = q.get()
            if item is _DONE:
                if err is not None:
                    raise err
                return
            yield item
    finally:
        stop.set()
        while t.is_alive():  # unblock a producer waiting on a full queue
            try:
                q.get_nowait()
            except queue.Empty:
                t.join(timeout=0.05)


def batches(pixels_iter: Iterable[tuple[Any, np.ndarray]], batch_size: int,
            prepare: Callable[[np.ndarray], Any] | None = None) -> Iterator[tuple[list, Any]]:
    """Group (key, uint8 HxWx3) items into (keys, prepared batch) of `batch_size` (last one shorter).

    `prepare` maps the stacked uint8 batch (e.g. a Normaliser); run under `prefetch` so batch
    assembly overlaps the model.
    """
    if batch_size < 1:
        raise ValueError("batch_size must be >= 1")
    keys: list = []
    rows: list[np.ndarray] = []
    for key, arr in pixels_iter:
        keys.append(key)
        rows.append(arr)
        if len(rows) == batch_size:
            stacked = np.stack(rows)
            yield keys, (prepare(stacked) if prepare else stacked)
            keys, rows = [], []
    if rows:
        stacked = np.stack(rows)
        yield keys, (prepare(stacked) if prepare else stacked)
