"""Embed-stage throughput: does decoding keep the CLIP model busy, and what does text trimming buy?

    .venv/bin/python bench/throughput.py --json

Generates ~500 Kilnworks JPEGs of 1024x768 with 8-20 word captions (sample_corpus/workshop.py),
runs open_clip ViT-B-32 at random initialisation (same FLOPs as trained weights; saved to a
temporary .safetensors and loaded through curate's local-checkpoint path) with the same threads
and batch size for:
- model_only_per_s: image + caption encoding on pre-decoded, preprocessed pixels and captions;
- pipeline_per_s: the whole embed stage (read bytes, decode in worker processes, preprocess,
  tokenise, encode, assemble the output table);
- ratio = pipeline / model-only (target >= 0.8 on 2 cores);
- text trimming: captions/s trimmed to each batch's longest caption vs padded to 77 tokens
  (target >= 3x), and the largest difference between the two embeddings.
--quantize adds dynamic int8 (torch.ao) speed on ViT-B-32 and, with --corpus, the largest
agreement change against fp32 for the demo model on the sample corpus.
Prints one JSON line with --json, else a small table. Compare ratios within one run: the
machine is shared and absolute figures move between runs.
"""
from __future__ import annotations

import argparse
import hashlib
import json
import random
import sys
import tempfile
import time
from multiprocessing import get_context
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "sample_corpus"))

SEED = 40_000  # scenes for this benchmark: disjoint from the corpus's and the demo model's seeds


def _make_one(args: tuple[int, str]) -> tuple[str, str]:
    import workshop

    i, folder = args
    rng = random.Random(SEED + i)
    spec = workshop.random_spec(rng)
    caption = workshop.describe(spec, rng)
    while not 8 <= len(caption.split()) <= 20:
        caption = workshop.describe(spec, rng)
    img = workshop.render(spec, (1024, 768), rng)
    path = Path(folder) / f"bench{i:04d}.jpg"
    img.save(path, "JPEG", quality=90)
    return str(path), caption


def make_images(folder: Path, n: int, procs: int) -> list[tuple[str, str]]:
    with get_context("fork").Pool(procs) as pool:
        return pool.map(_make_one, [(i, str(folder)) for i in range(n)], chunksize=8)


def source_table(items: list[tuple[str, str]]):
    import pyarrow as pa

    shas = [hashlib.sha256(Path(p).read_bytes()).hexdigest() for p, _ in items]
    return pa.table({
        "sample_id": [f"s{i:05d}" for i in range(len(items))],
        "locator": [p for p, _ in items],
        "decoded": [True] * len(items),
        "sha256": shas,
        "caption": [c for _, c in items],
    })


def timed(fn) -> float:
    t = time.perf_counter()
    fn()
    return time.perf_counter() - t


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description="embed-stage throughput benchmark")
    ap.add_argument("--json", action="store_true", help="print one JSON line")
    ap.add_argument("--n", type=int, default=500, help="images to generate")
    ap.add_argument("--batch", type=int, default=64, help="batch size (model-only and pipeline)")
    ap.add_argument("--threads", type=int, default=0, help="torch threads; 0 = all cores")
    ap.add_argument("--decode-workers", type=int, default=0, help="embed.decode_workers; 0 = auto")
    ap.add_argument("--repeats", type=int, default=2, help="alternating runs of each measurement; best kept")
    ap.add_argument("--quantize", action="store_true", help="also measure dynamic int8 quantisation")
    ap.add_argument("--corpus", default="", help="sample corpus folder for the int8 agreement check")
    args = ap.parse_args(argv)

    import numpy as np
    import open_clip
    import torch
    from safetensors.torch import save_file

    from curate.config import load_config
    from curate.models import clip as clipmod
    from curate.stages import embed
    from curate.stages.base import StageContext

    threads = args.threads or embed.available_cores()
    torch.set_num_threads(threads)
    out: dict = {"n": args.n, "batch": args.batch, "threads": threads, "model": "ViT-B-32 (random init)"}
    with tempfile.TemporaryDirectory(prefix="curate-bench-") as tmp:
        tmp_path = Path(tmp)
        (tmp_path / "img").mkdir()
        t0 = time.perf_counter()
        items = make_images(tmp_path / "img", args.n, max(1, embed.available_cores()))
        out["generate_s"] = round(time.perf_counter() - t0, 1)
        table = source_table(items)
        captions = [c for _, c in items]

        torch.manual_seed(0)
        net = open_clip.create_model("ViT-B-32", pretrained=None)
        weights = tmp_path / "vit_b_32_random.safetensors"
        save_file({k: v.contiguous() for k, v in net.state_dict().items()}, str(weights))
        del net

        cfg = embed.EmbedConfig(model="ViT-B-32", pretrained=str(weights), batch_size=args.batch,
                                threads=threads, device="cpu", decode_workers=args.decode_workers)
        lm = clipmod.load_model(cfg.model, cfg.pretrained, device="cpu")
        out["decode_workers"] = embed.decode_worker_count(cfg, "cpu")
        draft = embed.DRAFT_MARGIN * max(lm.image_size)
        ds = embed.ImageChunks([p for p, _ in items], lm.pil_steps(), lm.image_size, draft)
        pixels = torch.from_numpy(np.concatenate([ds[i][1] for i in range(len(ds))]))

        def model_only() -> None:
            for i in range(0, len(pixels), args.batch):
                lm.encode_images(pixels[i:i + args.batch])
            lm.encode_texts(captions, args.batch)

        ctx = StageContext(config=load_config(None, sections={"embed": embed.EmbedConfig}))

        def pipeline() -> None:
            res = embed.run(table, cfg, ctx)
            assert res.column("image_emb").null_count == 0

        model_only()  # warm-up: allocator, thread pool, first-call costs
        t_model, t_pipe = [], []
        for _ in range(args.repeats):
            t_pipe.append(timed(pipeline))
            t_model.append(timed(model_only))
        out["model_only_per_s"] = round(args.n / min(t_model), 2)
        out["pipeline_per_s"] = round(args.n / min(t_pipe), 2)
        out["ratio"] = round(min(t_model) / min(t_pipe), 3)

        t_img = timed(lambda: [lm.encode_images(pixels[i:i + args.batch]) for i in range(0, len(pixels), args.batch)])
        out["image_only_per_s"] = round(args.n / t_img, 2)
        trimmed = full = None

        def run_trim() -> None:
            nonlocal trimmed
            trimmed = lm.encode_texts(captions, args.batch)

        def run_full() -> None:
            nonlocal full
            full = lm.encode_texts(captions, args.batch, trim=False)

        t_trim = min(timed(run_trim) for _ in range(args.repeats))
        t_full = min(timed(run_full) for _ in range(args.repeats))
        lengths = clipmod.token_lengths(lm.tokenize(captions)).numpy()
        out["text_trimmed_per_s"] = round(args.n / t_trim, 1)
        out["text_full_per_s"] = round(args.n / t_full, 1)
        out["trim_speedup"] = round(t_full / t_trim, 2)
        out["trim_max_abs_diff"] = float(np.max(np.abs(trimmed - full)))
        out["caption_tokens_median"] = int(np.median(lengths))
        out["caption_tokens_max"] = int(lengths.max())
        out["text_trimming_enabled"] = bool(lm.trim_text)

        if args.quantize:
            q = clipmod.load_model(cfg.model, cfg.pretrained, device="cpu", quantize=True)
            t_q = timed(lambda: [q.encode_images(pixels[i:i + args.batch]) for i in range(0, len(pixels), args.batch)])
            t_f = timed(lambda: [lm.encode_images(pixels[i:i + args.batch]) for i in range(0, len(pixels), args.batch)])
            out["int8_image_per_s"] = round(args.n / t_q, 2)
            out["fp32_image_per_s_same_run"] = round(args.n / t_f, 2)
            if args.corpus:
                out.update(int8_agreement_check(Path(args.corpus), threads))
    if args.json:
        print(json.dumps(out))
    else:
        for k, v in out.items():
            print(f"{k:28s} {v}")
    return 0


def int8_agreement_check(corpus: Path, threads: int) -> dict:
    """Largest |agreement(int8) - agreement(fp32)| for the demo model over the corpus's images."""
    import numpy as np

    from curate.config import load_config
    from curate.stages import agreement, embed
    from curate.stages.base import StageContext

    exts = {".jpg", ".jpeg", ".png", ".webp"}
    items = []
    for p in sorted(corpus.rglob("*")):
        cap = p.with_suffix(".txt")
        if p.suffix.lower() in exts and cap.is_file():
            try:
                items.append((str(p), cap.read_text(encoding="utf-8").strip()))
            except UnicodeDecodeError:
                continue
    table = source_table(items)
    ctx = StageContext(config=load_config(None, sections={"embed": embed.EmbedConfig}))
    res = {}
    for quant in (False, True):
        cfg = embed.EmbedConfig(model="demo", pretrained="", threads=threads, device="cpu", quantize=quant)
        emb = embed.run(table, cfg, ctx)
        img, ok = agreement.embedding_matrix(emb.column("image_emb"))
        txt, _ = agreement.embedding_matrix(emb.column("text_emb"))
        res[quant] = np.where(ok, agreement.cosines(img, txt), np.nan)
    diff = np.abs(res[True] - res[False])
    return {"int8_demo_samples": int(np.isfinite(diff).sum()),
            "int8_demo_agreement_max_abs_diff": round(float(np.nanmax(diff)), 5)}


if __name__ == "__main__":
    raise SystemExit(main())
