"""CLIP throughput on this CPU: every inference backend, and whether decoding keeps up.

    .venv/bin/python bench/throughput.py --json

Model: open_clip ViT-B-32 at random initialisation (same graph and FLOPs as trained weights;
saved to a temporary .safetensors and loaded through curate's local-checkpoint path). Images:
public photos (scikit-image, scikit-learn, matplotlib samples; bench/photoset.py), each cut and
resized to 1024x768 with a different crop and saved as JPEG, so every file is distinct. Captions:
plain descriptions of those photos.

Prints (one JSON line with --json):
- backends: for each offered path "backend-precision" (torch-fp32 included): per_s (image and
  trimmed caption together, samples/s), image_per_s, text_per_s, speedup vs torch fp32,
  max_agreement_diff (largest change of any image-caption cosine vs torch fp32, all pairs),
  per-tower max 1 - cos, export seconds and cache bytes per tower. Medians of interleaved rounds.
- chosen: the pick of `auto` (fastest per-tower combination within --tolerance) and its figures;
- model_only_per_s and pipeline_per_s at the chosen path, and their ratio: model-only encodes
  pre-decoded pixels and captions; the pipeline reads JPEG bytes from disk, decodes and resizes
  in worker processes (draft mode), normalises, batches with prefetch and encodes;
- preprocess: ms per image for decode + resize at each JPEG draft margin, the old and the
  in-place normalisation, and the agreement shift each margin causes (ViT-B-32 random and the
  demo model) against full decoding.
The machine may be shared: compare ratios within one run, not absolute figures across runs.
"""
from __future__ import annotations

import argparse
import dataclasses
import json
import os
import random
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "bench"))

CAPTIONS = {
    "astronaut": "an astronaut in a white spacesuit in front of a flag",
    "camera": "a man with a camera on a tripod, black and white",
    "cell": "a microscope image of a cell",
    "chelsea": "a tabby cat looking to the side",
    "coffee": "a cup of coffee with latte art on a saucer",
    "coins": "old coins on a dark background",
    "hubble_deep_field": "many small galaxies in deep space",
    "immunohistochemistry": "a microscope image of stained tissue",
    "moon": "the surface of the moon",
    "retina": "a photograph of the retina of an eye",
    "rocket": "a rocket standing on a launch pad",
    "brick": "a brick wall",
    "grass": "grass seen from above",
    "gravel": "grey gravel",
    "clock": "a clock on a wall",
    "page": "a printed page of text",
    "text": "letters and words printed on a sign",
    "china": "a chinese temple with a pagoda roof",
    "flower": "a flower with pink petals",
    "grace_hopper": "a portrait of a woman in a naval uniform",
}
SEED = 40_000
SIZE = (1024, 768)
# JPEG draft margins compared (0 = full decode; "old" = the previous rule: both sides >= 2 x 224).
MARGINS = (0.0, 1.0, 1.5, 2.0)


def make_one(i: int, folder: str, photos: dict | None = None) -> tuple[str, str]:
    """Image i: a 4:3 window (60-100% of the photo's width or height) of one public photo,
    resized to 1024x768, mirrored half the time, saved as JPEG quality 90."""
    from PIL import Image

    import photoset

    rng = random.Random(SEED + i)
    names = list(CAPTIONS)
    name = names[i % len(names)]
    img = photos[name] if photos else photoset.load_photo(name)
    w, h = img.size
    f = rng.uniform(0.6, 1.0)
    cw = min(w, int(h * 4 / 3)) * f
    ch = cw * 3 / 4
    x, y = rng.uniform(0, w - cw), rng.uniform(0, h - ch)
    crop = img.crop((int(x), int(y), int(x + cw), int(y + ch))).resize(SIZE, Image.Resampling.LANCZOS)
    if rng.random() < 0.5:
        crop = crop.transpose(Image.Transpose.FLIP_LEFT_RIGHT)
    path = Path(folder) / f"img{i:05d}.jpg"
    crop.save(path, "JPEG", quality=90)
    return str(path), CAPTIONS[name]


def _make_range(args: tuple[int, int, str]) -> list[tuple[str, str]]:
    import photoset

    start, stop, folder = args
    photos = {name: photoset.load_photo(name) for name in CAPTIONS}
    return [make_one(i, folder, photos) for i in range(start, stop)]


def make_images(folder: Path, n: int, procs: int = 1) -> list[tuple[str, str]]:
    """n distinct 1024x768 JPEGs cut from the public photos, with their photo's caption."""
    step = max(1, -(-n // max(1, procs)))
    ranges = [(a, min(n, a + step), str(folder)) for a in range(0, n, step)]
    if procs <= 1 or len(ranges) == 1:
        return [item for r in ranges for item in _make_range(r)]
    from multiprocessing import get_context

    with get_context("fork").Pool(procs) as pool:
        return [item for part in pool.map(_make_range, ranges) for item in part]


def random_vit_b32(folder: Path) -> str:
    import open_clip
    import torch
    from safetensors.torch import save_file

    torch.manual_seed(0)
    net = open_clip.create_model("ViT-B-32", pretrained=None)
    path = folder / "vit_b_32_random.safetensors"
    save_file({k: v.contiguous() for k, v in net.state_dict().items()}, str(path))
    return str(path)


def rgb(img):
    from curate.stages.inspect import to_rgb

    return to_rgb(img)


class Chunks:
    """Decode-worker work items: item i = (i, uint8 pixels [k, H, W, 3]) for `chunk` files."""

    def __init__(self, paths: list[str], steps: list, hw: tuple[int, int], margin: float, chunk: int = 8):
        self.paths, self.steps, self.hw, self.margin, self.chunk = paths, steps, hw, margin, chunk

    def __len__(self) -> int:
        return -(-len(self.paths) // self.chunk)

    def __getitem__(self, i: int):
        import numpy as np

        from curate.models.preprocess import decode_for_model

        paths = self.paths[i * self.chunk:(i + 1) * self.chunk]
        return i, np.stack([decode_for_model(Path(p).read_bytes(), self.steps, self.hw, rgb, margin=self.margin)
                            for p in paths])


def pipeline(lm, paths: list[str], captions: list[str], batch: int, workers: int, margin: float):
    """Bytes on disk -> embeddings, the way the embed stage should run: workers, prefetch, one model."""
    import numpy as np
    from torch.utils.data import DataLoader

    from curate.models.preprocess import Normaliser, batches, prefetch

    ds = Chunks(paths, lm.pil_steps(), lm.image_size, margin)
    loader = DataLoader(ds, batch_size=None, shuffle=False, num_workers=workers,
                        prefetch_factor=4 if workers > 0 else None)
    norm = Normaliser(lm.preprocess_cfg["mean"], lm.preprocess_cfg["std"])

    def rows():
        for i, px in loader:
            arr = np.asarray(px)
            for j in range(len(arr)):
                yield i * ds.chunk + j, arr[j]

    out = np.zeros((len(paths), lm.embed_dim()), np.float32)
    it = prefetch(batches(rows(), batch, norm), depth=2)
    first = next(it, None)  # workers start; captions are encoded while they decode
    txt = lm.encode_texts(captions, batch)
    for keys, x in ([first] if first is not None else []):
        out[keys] = lm.encode_images(x)
    for keys, x in it:
        out[keys] = lm.encode_images(x)
    return out, txt


def decode_old(data: bytes, steps: list, hw: tuple[int, int]):
    """The previous decode rule: JPEG draft only while both sides stay >= 2 x the model input."""
    import io

    import numpy as np
    from PIL import Image, ImageOps

    img = Image.open(io.BytesIO(data))
    img.draft(img.mode, (2 * max(hw), 2 * max(hw)))
    img = rgb(ImageOps.exif_transpose(img))
    for step in steps:
        img = step(img)
    return np.asarray(img, np.uint8)


def preprocess_figures(items, base_vit, demo, label: str, reps: int = 1) -> dict:
    """Decode+resize ms per image at each draft margin, normalisation ms, and agreement shifts."""
    import numpy as np
    import torch

    from curate.models.backends import agreement_diff
    from curate.models.preprocess import Normaliser, decode_for_model

    data = [Path(p).read_bytes() for p, _ in items]
    caps = [c for _, c in items]
    res: dict = {"decode_resize_ms": {}, "agreement_shift": {}}
    for name, lm in ((label, base_vit), ("demo", demo)):
        steps, hw = lm.pil_steps(), lm.image_size
        pix = {}
        for m in MARGINS + ("old",):
            t0 = time.perf_counter()
            for _ in range(reps):
                arr = np.stack([decode_old(d, steps, hw) if m == "old"
                                else decode_for_model(d, steps, hw, rgb, margin=m) for d in data])
            ms = (time.perf_counter() - t0) / (reps * len(data)) * 1e3
            pix[m] = arr
            if name == label:
                res["decode_resize_ms"][str(m)] = round(ms, 2)
        img0, txt = lm.encode_images(pix[0.0]), lm.encode_texts(caps, 32)
        res["agreement_shift"][name] = {str(m): round(agreement_diff(lm.encode_images(pix[m]), txt, img0, txt), 5)
                                        for m in MARGINS[1:] + ("old",)}
        if name == label:
            x = pix[0.0]
    # normalisation at the ViT-B-32 input size: the previous torch arithmetic (the embed stage's
    # encode_images before this change) vs the in-place Normaliser, per image
    mean, std = base_vit.preprocess_cfg["mean"], base_vit.preprocess_cfg["std"]
    m_t, s_t = torch.tensor(mean), torch.tensor(std)

    def old_norm():
        t = torch.from_numpy(x).permute(0, 3, 1, 2).float().div(255)
        return (t - m_t[:, None, None]) / s_t[:, None, None]

    norm = Normaliser(mean, std, reuse=True)
    times = {"old": [], "new": []}
    for _ in range(5):
        t0 = time.perf_counter()
        old_norm()
        times["old"].append(time.perf_counter() - t0)
        t0 = time.perf_counter()
        norm(x)
        times["new"].append(time.perf_counter() - t0)
    res["normalise_ms"] = {k: round(float(np.median(v)) / len(x) * 1e3, 3) for k, v in times.items()}
    res["normalise_max_abs_diff"] = float(np.max(np.abs(old_norm().numpy() - norm(x))))
    return res


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description="CLIP backend and pipeline throughput benchmark")
    ap.add_argument("--json", action="store_true", help="print one JSON line")
    ap.add_argument("--n", type=int, default=128, help="images for the pipeline / model-only comparison")
    ap.add_argument("--items", type=int, default=32, help="images and captions per timed backend round")
    ap.add_argument("--rounds", type=int, default=3, help="interleaved timed rounds per backend (median)")
    ap.add_argument("--batch", type=int, default=32, help="batch size")
    ap.add_argument("--threads", type=int, default=0, help="model threads; 0 = all cores")
    ap.add_argument("--decode-workers", type=int, default=0, help="decode processes; 0 = max(1, cores // 4)")
    ap.add_argument("--calibration", type=int, default=64, help="calibration images and captions (int8, auto)")
    ap.add_argument("--tolerance", type=float, default=None, help="auto's agreement tolerance (default 0.005)")
    ap.add_argument("--margin", type=float, default=None, help="JPEG draft margin for the pipeline")
    ap.add_argument("--cache-dir", default="", help="export cache to reuse (default: a fresh temporary one)")
    ap.add_argument("--model", default="ViT-B-32", choices=["ViT-B-32", "demo"],
                    help="ViT-B-32 at random init (default) or the small demo model (a quick smoke run)")
    ap.add_argument("--skip-preprocess", action="store_true", help="skip the draft / normalisation figures")
    ap.add_argument("--only-preprocess", action="store_true", help="only the draft / normalisation figures")
    args = ap.parse_args(argv)

    import numpy as np
    import torch

    from curate.models import backends, clip, export
    from curate.models.preprocess import DRAFT_MARGIN, Normaliser, decode_for_model

    cores = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)
    threads = args.threads or cores
    workers = args.decode_workers or max(1, cores // 4)
    margin = DRAFT_MARGIN if args.margin is None else args.margin
    tol = backends.DEFAULT_TOLERANCE if args.tolerance is None else args.tolerance
    torch.set_num_threads(threads)
    out: dict = {"model": "ViT-B-32 (random init)" if args.model == "ViT-B-32" else "demo", "n": args.n, "items": args.items, "rounds": args.rounds,
                 "batch": args.batch, "threads": threads, "decode_workers": workers, "draft_margin": margin,
                 "cpu": backends.machine_signature()}
    with tempfile.TemporaryDirectory(prefix="curate-bench-") as tmp:
        tmp_path = Path(tmp)
        (tmp_path / "img").mkdir()
        cache = args.cache_dir or str(tmp_path / "cache")
        t0 = time.perf_counter()
        items = make_images(tmp_path / "img", max(args.n, args.items + args.calibration), cores)
        out["generate_s"] = round(time.perf_counter() - t0, 1)
        if args.model == "demo":
            base = clip.load_model("demo", device="cpu")
        else:
            base = clip.load_model("ViT-B-32", random_vit_b32(tmp_path), device="cpu")
        steps, hw = base.pil_steps(), base.image_size

        def decode(paths):
            return np.stack([decode_for_model(Path(p).read_bytes(), steps, hw, rgb, margin=margin) for p in paths])

        if not args.only_preprocess:
            # Calibration from the run's own images, disjoint from the timed items.
            cal_items = items[args.items:args.items + args.calibration]
            cal = backends.Calibration(decode([p for p, _ in cal_items]), tuple(c for _, c in cal_items))
            timed = items[:args.items]
            x = Normaliser(base.preprocess_cfg["mean"], base.preprocess_cfg["std"])(decode([p for p, _ in timed]))
            caps = [c for _, c in timed]

            paths = backends.plan("cpu")
            names = [backends.path_name(*p) for p in paths]
            out["not_offered"] = {f"{b}-{p}": why for b in backends.BACKENDS if backends.installed(b)
                                  for p, why in backends.cpu_precisions(b).items() if why and p != "fp16"}
            towers, exports = {}, {}
            for b, p in paths:
                name = backends.path_name(b, p)
                towers[name] = {}
                exports[name] = {}
                for kind in ("image", "text"):
                    t0 = time.perf_counter()
                    t = backends.build_tower(base, kind, b, p, cache_dir=cache, calibration=cal, threads=threads)
                    towers[name][kind] = t
                    exports[name][kind] = {"build_s": round(time.perf_counter() - t0, 1),
                                           "export_s": t.meta.get("export_s"), "bytes": t.meta.get("bytes"),
                                           "reused": t.meta.get("reused"), "compile_s": t.meta.get("compile_s")}
            # Interleaved rounds: features from the warm-up pass, then timed passes.
            inputs = {"image": x, "text": caps}
            measured = {n: {k: {"features": backends.run_tower(base, towers[n][k], inputs[k], args.batch), "times": []}
                            for k in ("image", "text")} for n in names}
            for _ in range(args.rounds):
                for n in names:
                    for k in ("image", "text"):
                        t0 = time.perf_counter()
                        backends.run_tower(base, towers[n][k], inputs[k], args.batch)
                        measured[n][k]["times"].append((time.perf_counter() - t0) / len(inputs[k]))
            for n in names:
                for k in ("image", "text"):
                    measured[n][k]["s_per_item"] = float(np.median(measured[n][k].pop("times")))
            choice = backends.pick(measured, "torch-fp32", tol, names)
            ref = choice["paths"]["torch-fp32"]
            out["backends"] = {}
            for n in names:
                f = choice["paths"][n]
                out["backends"][n] = {
                    "per_s": f["per_s"], "image_per_s": f["image_per_s"], "text_per_s": f["text_per_s"],
                    "speedup": round(f["per_s"] / ref["per_s"], 2),
                    "image_speedup": round(f["image_per_s"] / ref["image_per_s"], 2),
                    "text_speedup": round(f["text_per_s"] / ref["text_per_s"], 2),
                    "max_agreement_diff": round(f["max_agreement_diff"], 6),
                    "image_max_1_minus_cos": float(f"{f['image_max_1_minus_cos']:.3g}"),
                    "text_max_1_minus_cos": float(f"{f['text_max_1_minus_cos']:.3g}"),
                    "export": exports[n],
                }
            out["chosen"] = {k: choice[k] for k in ("image", "text", "per_s", "speedup", "max_agreement_diff", "tolerance")}
            out["caption_tokens_median"] = int(np.median(clip.token_lengths(base.tokenize(caps)).numpy()))
            # this model's entries only (a reused --cache-dir may hold other models' graphs too)
            cache_root = export.cache_root(cache) / base.weights_sha256[:16]
            out["export_cache_bytes"] = sum(p.stat().st_size for p in cache_root.rglob("*") if p.is_file())

            # Model-only vs pipeline at the chosen path (one loaded model with the picked towers).
            lm = dataclasses.replace(base, towers={"image": towers[choice["image"]]["image"],
                                            "text": towers[choice["text"]]["text"]}, choice=choice)
            paths_n = [p for p, _ in items[:args.n]]
            caps_n = [c for _, c in items[:args.n]]
            pixels = decode(paths_n)

            def model_only():
                for i in range(0, len(pixels), args.batch):
                    lm.encode_images(pixels[i:i + args.batch])
                lm.encode_texts(caps_n, args.batch)

            model_only()  # warm-up
            t_model, t_pipe = [], []
            for _ in range(2):
                t0 = time.perf_counter()
                pipeline(lm, paths_n, caps_n, args.batch, workers, margin)
                t_pipe.append(time.perf_counter() - t0)
                t0 = time.perf_counter()
                model_only()
                t_model.append(time.perf_counter() - t0)
            out["model_only_per_s"] = round(args.n / min(t_model), 2)
            out["pipeline_per_s"] = round(args.n / min(t_pipe), 2)
            out["ratio"] = round(min(t_model) / min(t_pipe), 3)
            emb, _ = pipeline(lm, paths_n[:8], caps_n[:8], args.batch, 0, margin)
            out["pipeline_matches_model_only"] = bool(np.max(np.abs(emb - lm.encode_images(pixels[:8]))) < 1e-5)

        if not args.skip_preprocess:
            demo = clip.load_model("demo", device="cpu")
            label = "vit_b32_random" if args.model == "ViT-B-32" else "demo_as_bench_model"
            out["preprocess"] = preprocess_figures(items[:min(len(items), 48)], base, demo, label)
    if args.json:
        print(json.dumps(out))
    else:
        for k, v in out.items():
            if k == "backends":
                print(f"{'path':18s} {'per_s':>7s} {'x fp32':>7s} {'img x':>6s} {'txt x':>6s} {'agree diff':>10s}"
                      f" {'img 1-cos':>9s} {'txt 1-cos':>9s} {'export s (img/txt)':>18s} {'MB (img/txt)':>13s}")
                for n, f in v.items():
                    e = f["export"]
                    ex = "/".join(str(e[k]["export_s"]) for k in ("image", "text"))
                    mb = "/".join(f"{(e[k]['bytes'] or 0) / 1e6:.0f}" for k in ("image", "text"))
                    print(f"{n:18s} {f['per_s']:7.2f} {f['speedup']:7.2f} {f['image_speedup']:6.2f} "
                          f"{f['text_speedup']:6.2f} {f['max_agreement_diff']:10.2e} "
                          f"{f['image_max_1_minus_cos']:9.2e} {f['text_max_1_minus_cos']:9.2e} {ex:>18s} {mb:>13s}")
            else:
                print(f"{k:28s} {v}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
