"""CLIP image throughput on a GPU, and where the time goes: decoding or the model.

    .venv/bin/python bench/gpu_throughput.py [--n 4096] [--json]

On a machine where torch sees CUDA it loads the model with backend/precision "auto" (torch fp16
on the GPU), sizes the batch to the GPU's free memory (curate.models.backends.fit_batch_size)
and decodes JPEGs in worker processes (all cores but one). Without CUDA it runs the same steps
on the CPU with torch fp32 and a smaller default n (degraded, for checking the script).

Model: open_clip ViT-B-32 at random initialisation unless --model/--pretrained name weights
that are already local (same FLOPs either way). Images: 1024x768 JPEGs cut from public photos
(bench/throughput.py make_images).

Prints images/s for three runs over the same files:
- decode_only: worker processes decode, resize and crop; nothing is encoded;
- model_only: pre-decoded uint8 pixels are encoded (transfer + normalise + forward pass);
- pipeline: both together, as the embed stage runs them; its time split into waiting for
  decoded batches (decode-bound) and inside the model (model-bound).
"""
from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "bench"))


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description="GPU (or degraded CPU) CLIP image throughput")
    ap.add_argument("--json", action="store_true", help="print one JSON line")
    ap.add_argument("--n", type=int, default=0, help="images (0 = 4096 on CUDA, 64 on CPU)")
    ap.add_argument("--batch", type=int, default=0, help="batch size (0 = sized to GPU memory; 32 on CPU)")
    ap.add_argument("--workers", type=int, default=0, help="decode processes (0 = all cores but one)")
    ap.add_argument("--model", default="ViT-B-32", help="open_clip architecture")
    ap.add_argument("--pretrained", default="", help="local checkpoint or cached tag (default: random init)")
    ap.add_argument("--margin", type=float, default=None, help="JPEG draft margin (default: curate's)")
    args = ap.parse_args(argv)

    import numpy as np
    import torch
    from throughput import Chunks, make_images, random_vit_b32
    from torch.utils.data import DataLoader

    from curate.models import backends, clip
    from curate.models.preprocess import DRAFT_MARGIN, prefetch

    cuda = torch.cuda.is_available()
    cores = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)
    workers = args.workers or max(1, cores - 1)
    n = args.n or (4096 if cuda else 64)
    margin = DRAFT_MARGIN if args.margin is None else args.margin
    out: dict = {"device": torch.cuda.get_device_name(0) if cuda else "cpu (no CUDA: degraded run)",
                 "n": n, "decode_workers": workers, "cores": cores, "draft_margin": margin}
    with tempfile.TemporaryDirectory(prefix="curate-gpu-bench-") as tmp:
        tmp_path = Path(tmp)
        (tmp_path / "img").mkdir()
        t0 = time.perf_counter()
        items = make_images(tmp_path / "img", n, max(1, cores))
        out["generate_s"] = round(time.perf_counter() - t0, 1)
        paths = [p for p, _ in items]
        pretrained = args.pretrained or (random_vit_b32(tmp_path) if args.model == "ViT-B-32" else "")
        if cuda:
            lm = clip.load_model(args.model, pretrained, device="cuda", backend="auto", precision="auto")
        else:
            lm = clip.load_model(args.model, pretrained, device="cpu")
        tower = lm.towers["image"] if lm.towers else None
        out["path"] = lm.backend
        out["dtype"] = str(getattr(tower, "dtype", "torch.float32"))
        batch = args.batch or (backends.fit_batch_size(lm, 64) if cuda else 32)
        out["batch"] = batch
        ds = Chunks(paths, lm.pil_steps(), lm.image_size, margin)

        def loader():
            return DataLoader(ds, batch_size=None, shuffle=False, num_workers=workers, prefetch_factor=4,
                              pin_memory=cuda, persistent_workers=False)

        def batched(chunks):
            rows = []
            for _, px in chunks:
                rows.append(np.asarray(px))
                while sum(len(r) for r in rows) >= batch:
                    cat = np.concatenate(rows)
                    yield cat[:batch]
                    rows = [cat[batch:]] if len(cat) > batch else []
            if rows and sum(len(r) for r in rows):
                yield np.concatenate(rows)

        # 1. decode only
        t0 = time.perf_counter()
        pixels = np.concatenate([np.asarray(px) for _, px in loader()])
        t_decode = time.perf_counter() - t0
        out["decode_only_per_s"] = round(n / t_decode, 1)

        # 2. model only (warm-up first: kernel selection, allocator)
        lm.encode_images(pixels[:batch])
        if cuda:
            torch.cuda.synchronize()
        t0 = time.perf_counter()
        for i in range(0, n, batch):
            lm.encode_images(pixels[i:i + batch])
        t_model = time.perf_counter() - t0
        out["model_only_per_s"] = round(n / t_model, 1)

        # 3. pipeline, with the time split
        wait = inside = 0.0
        t0 = time.perf_counter()
        it = prefetch(batched(loader()), depth=2)
        while True:
            a = time.perf_counter()
            x = next(it, None)
            b = time.perf_counter()
            wait += b - a
            if x is None:
                break
            lm.encode_images(x)
            inside += time.perf_counter() - b
        t_pipe = time.perf_counter() - t0
        out["pipeline_per_s"] = round(n / t_pipe, 1)
        out["ratio"] = round(t_model / t_pipe, 3)
        out["split"] = {"waiting_for_decode": round(wait / t_pipe, 3), "in_model": round(inside / t_pipe, 3)}
        out["bound"] = "decode" if wait > inside else "model"
        if cuda:
            out["max_memory_gib"] = round(torch.cuda.max_memory_allocated() / 2**30, 2)
    if args.json:
        print(json.dumps(out))
    else:
        for k, v in out.items():
            print(f"{k:22s} {v}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
