"""Train curate's demo CLIP model on procedurally rendered Kilnworks photos and their captions.

    .venv/bin/python tools/train_demo_model.py            # writes curate/models/demo/clip_demo.*
    .venv/bin/python tools/train_demo_model.py --init curate/models/demo/clip_demo.safetensors
                                                          # the stamp phase only, from given weights

A small CLIP architecture (an open_clip model config: ViT image tower on 64x64 inputs, causal
text transformer with open_clip's default BPE tokenizer) trained from scratch with the CLIP
contrastive loss (open_clip.ClipLoss; Radford et al. 2021) on image-caption pairs drawn by
sample_corpus/workshop.py. Seeds are fixed and disjoint from the sample corpus's: training scenes
use random.Random(10_000 + i), calibration scenes random.Random(2_000_000 + i), caption wording
per step random.Random(5_000_000 + step * batch + j). Same torch version and thread count ->
same weights.

Two phases. The base phase learns the demo world from clean scenes. The stamp phase then teaches
one risk-like concept of that world, the shop watermark (workshop.watermark): half of its scenes
get a stamped twin (same pixels plus the stamp, captioned with the clean twin's caption plus a
watermark phrase, workshop.WATERMARK_PHRASES), and the two share a batch. In-batch contrast alone
does not teach the stamp: scenes are told apart by item, glaze, pattern and backdrop long before a
stamp matters, and a base-phase trial with a quarter of the scenes stamped left a held-out concept
ROC AUC near 0.5. So each twin pair also adds its own two-by-two CLIP loss (twin_terms), which only
the stamp can lower. Some stamped twins come alone with captions that do not mention the stamp, as
real captions mostly do not, so that a stamp does not cost a true caption its agreement. Stamp
phase scenes are drawn at both the base phase's small sizes and an archive's sizes, and decoded by
the embed stage's own decoder. Whether a scene gets a twin, and how it is stamped, comes from
random.Random(WATERMARK_SEED + seed); batches from numpy's default_rng(STAMP_BATCH_SEED).

After training, the agreement threshold is calibrated on held-out scenes: each scene gives one
true caption and one deliberately mismatched caption (workshop.mismatch: other item, clearly
different glaze); the threshold maximises Youden's J (true-positive rate minus false-positive
rate). It goes into the JSON with the measured AUC, for the agreement stage's default table.
The watermark concept probe configured in sample_corpus/curate.toml is measured the same way on
other held-out scenes, half of them watermarked (seeds CONCEPT_SEED + i), and recorded beside it.
"""
from __future__ import annotations

import argparse
import hashlib
import io
import json
import math
import random
import sys
import time
from multiprocessing import get_context
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "sample_corpus"))

from curate.models import clip as clipmod  # noqa: E402

import workshop  # noqa: E402

TRAIN_SEED = 10_000
CALIB_SEED = 2_000_000
CAPTION_SEED = 5_000_000
WATERMARK_SEED = 7_000_000
CONCEPT_SEED = 3_000_000
STAMP_SEED = 11_000_000  # stamp phase scenes: random.Random(STAMP_SEED + i)
STAMP_BATCH_SEED = 1
# The stamp phase (our demo choices, measured on held-out scenes; see the module docstring): share
# of its scenes with a stamped twin; per step, twin pairs, stamped twins alone with an unmentioning
# caption, and clean scenes; the weight of the twin term; share of captions that name only the item.
STAMP_SHARE = 0.5
STAMP_PAIRS, STAMP_ALONE, STAMP_CLEAN = 32, 16, 64
TWIN_WEIGHT = 2.0
SHORT_SHARE = 0.15
SHORT_TEMPLATES = ("product photo of a {item}", "a photo of a {item}", "our {item}", "a {item}",
                   "a {glaze} {item}", "product photo of a {glaze} {item}")
# Render sizes (width, height): landscape, portrait and square, 1.5-3x the model input, so the
# resize to 64 px averages pixels the way it does on full-size photos.
RENDER_SIZES = ((128, 96), (160, 120), (192, 144), (96, 128), (120, 160), (144, 144))
# Calibration photos have the sizes of a product archive (400-800 px) and go through JPEG and the
# embed stage's decoder (draft mode included), so the threshold fits what the stage will see.
CALIB_SIZES = ((640, 480), (480, 640), (512, 512), (600, 400), (400, 600), (576, 432), (768, 576), (448, 448))

MODEL_CFG = {
    "embed_dim": 128,
    "vision_cfg": {"image_size": 64, "patch_size": 16, "width": 128, "layers": 4, "head_width": 32,
                   "mlp_ratio": 4.0},
    "text_cfg": {"context_length": 77, "vocab_size": 49408, "width": 96, "heads": 3, "layers": 3},
}
# OpenAI CLIP's normalisation constants (open_clip.OPENAI_DATASET_MEAN / _STD), bicubic resize of
# the short side, centre crop: open_clip's defaults.
PREPROCESS_CFG = {"size": 64, "mean": [0.48145466, 0.4578275, 0.40821073],
                  "std": [0.26862954, 0.26130258, 0.27577711], "interpolation": "bicubic",
                  "resize_mode": "shortest"}


def render_photo(seed: int, stamp: bool = False) -> tuple[dict, np.ndarray]:
    """Calibration scene: a full-size JPEG photo decoded by the embed stage's own decoder."""
    from curate.stages import embed

    rng = random.Random(seed)
    spec = workshop.random_spec(rng)
    img = workshop.render(spec, rng.choice(CALIB_SIZES), rng)
    if stamp:
        img = workshop.watermark(img, rng)
        spec["watermark"] = True
    buf = io.BytesIO()
    img.save(buf, "JPEG", quality=rng.randint(84, 92))
    size = PREPROCESS_CFG["size"]
    return spec, embed.decode_for_model(buf.getvalue(), _STEPS, (size, size), embed.DRAFT_MARGIN,
                                        PREPROCESS_CFG["resize_mode"])


def render_one(seed: int) -> tuple[dict, np.ndarray]:
    """Scene seed -> (spec, uint8 64x64x3 pixels after open_clip's eval resize and crop)."""
    rng = random.Random(seed)
    spec = workshop.random_spec(rng)
    size = rng.choice(RENDER_SIZES)
    img = workshop.render(spec, size, rng)
    if rng.random() < 0.5:  # half go through JPEG, like most photo archives
        buf = io.BytesIO()
        img.save(buf, "JPEG", quality=rng.randint(70, 95))
        buf.seek(0)
        from PIL import Image

        img = Image.open(buf).convert("RGB")
    for step in _STEPS:
        img = step(img)
    return spec, np.asarray(img, dtype=np.uint8)


_STEPS: list = []


def _init_worker() -> None:
    import torch

    torch.set_num_threads(1)
    _STEPS[:] = clipmod.pil_steps(PREPROCESS_CFG)


def render_concept_photo(seed: int) -> tuple[dict, np.ndarray]:
    """Concept calibration scene: every other seed watermarked."""
    return render_photo(seed, stamp=seed % 2 == 1)


def training_caption(spec: dict, rng: random.Random) -> str:
    """A caption for a base phase training scene."""
    return workshop.describe(spec, rng)


def render_twins(seed: int) -> tuple[dict, np.ndarray, np.ndarray | None]:
    """Stamp phase scene seed -> (spec, clean pixels, stamped twin's pixels or None), uint8 64x64x3
    from the embed stage's decoder. Half the scenes are drawn at the base phase's sizes, half at an
    archive's; both twins come from one drawing and go through JPEG at one quality."""
    from curate.stages import embed

    rng = random.Random(seed)
    spec = workshop.random_spec(rng)
    img = workshop.render(spec, rng.choice(CALIB_SIZES if rng.random() < 0.5 else RENDER_SIZES), rng)
    wm = random.Random(WATERMARK_SEED + seed)
    versions = [img]
    if wm.random() < STAMP_SHARE:
        versions.append(workshop.watermark(img, wm))
    quality = rng.randint(70, 95)
    size = PREPROCESS_CFG["size"]
    out = []
    for v in versions:
        buf = io.BytesIO()
        v.save(buf, "JPEG", quality=quality)
        out.append(embed.decode_for_model(buf.getvalue(), _STEPS, (size, size), embed.DRAFT_MARGIN,
                                          PREPROCESS_CFG["resize_mode"]))
    return spec, out[0], (out[1] if len(out) > 1 else None)


def stamp_caption(spec: dict, rng: random.Random) -> tuple[str, str]:
    """A stamp phase caption (sometimes only the item, as short alt texts are) and its stamped twin's
    caption (the same words plus a watermark phrase)."""
    if rng.random() < SHORT_SHARE:
        text = rng.choice(SHORT_TEMPLATES).format(item=spec["item"], glaze=spec["glaze"])
    else:
        text = workshop.describe(spec, rng)
    return text, text + ", " + rng.choice(workshop.WATERMARK_PHRASES)


def twin_terms(img, txt, pairs: list[int], scale) -> tuple:
    """The twin term: for each stamped twin at row j (its clean twin at j - 1), the CLIP loss over
    the two images and their two captions; and the share of pairs whose two images both prefer their
    own caption. Rows of img and txt are L2-normalised."""
    import torch
    import torch.nn.functional as F

    s_idx = torch.tensor(pairs)
    c_idx = s_idx - 1
    ic, is_, tc, ts = img[c_idx], img[s_idx], txt[c_idx], txt[s_idx]
    logits = scale * torch.stack([torch.stack([(ic * tc).sum(-1), (ic * ts).sum(-1)], -1),
                                  torch.stack([(is_ * tc).sum(-1), (is_ * ts).sum(-1)], -1)], 1)  # [pair, img, txt]
    labels = torch.tensor([0, 1]).repeat(len(pairs))
    loss = (F.cross_entropy(logits.reshape(-1, 2), labels)
            + F.cross_entropy(logits.transpose(1, 2).reshape(-1, 2), labels)) / 2
    with torch.no_grad():
        acc = ((logits[:, 0, 0] > logits[:, 0, 1]) & (logits[:, 1, 1] > logits[:, 1, 0])).float().mean().item()
    return loss, acc


def stamp_phase(model, tokenizer, args: argparse.Namespace) -> dict:
    """Teach the shop watermark (module docstring). Returns the phase's facts for the JSON."""
    import open_clip
    import torch

    t0 = time.time()
    rendered = render_seeds(STAMP_SEED, args.stamp_scenes, args.threads, render_twins)
    specs = [r[0] for r in rendered]
    clean = np.stack([r[1] for r in rendered])
    twins = {i: r[2] for i, r in enumerate(rendered) if r[2] is not None}
    del rendered
    t_render = time.time() - t0
    print(f"stamp phase: rendered {len(specs)} scenes, {len(twins)} stamped twins, in {t_render:.0f} s", flush=True)
    twin_ids = np.array(sorted(twins))
    plain_ids = np.array([i for i in range(len(specs)) if i not in twins])
    # Per step (fewer when a small run has fewer scenes to draw from).
    n_pairs = min(STAMP_PAIRS, len(twin_ids) // 3)
    n_alone = min(STAMP_ALONE, len(twin_ids) - n_pairs)
    n_clean = min(STAMP_CLEAN, len(plain_ids))
    if n_pairs < 1:
        raise SystemExit(f"the stamp phase needs at least 3 stamped twins; {args.stamp_scenes} scenes gave "
                         f"{len(twin_ids)}: raise --stamp-scenes")
    opt = torch.optim.AdamW(model.parameters(), lr=args.stamp_lr, betas=(0.9, 0.98), eps=1e-6, weight_decay=0.0)
    loss_fn = open_clip.ClipLoss()
    rng = np.random.default_rng(STAMP_BATCH_SEED)
    warmup = 10
    model.train()
    t1 = time.time()
    for step in range(args.stamp_steps):
        for g in opt.param_groups:  # short linear warm-up, then cosine decay (common practice)
            g["lr"] = args.stamp_lr * min(1.0, (step + 1) / warmup) * 0.5 * (1 + math.cos(math.pi * step / args.stamp_steps))
        paired = rng.choice(twin_ids, n_pairs, replace=False)
        alone = rng.choice(np.setdiff1d(twin_ids, paired), n_alone, replace=False)
        plain = rng.choice(plain_ids, n_clean, replace=False)
        pix, caps, pairs = [], [], []
        base = CAPTION_SEED + 1_000_000 + step * 1000
        for j, i in enumerate(paired):
            c, s = stamp_caption(specs[i], random.Random(base + j))
            pix += [clean[i], twins[i]]
            caps += [c, s]
            pairs.append(len(pix) - 1)
        for j, i in enumerate(alone):
            pix.append(twins[i])
            caps.append(stamp_caption(specs[i], random.Random(base + 400 + j))[0])
        for j, i in enumerate(plain):
            pix.append(clean[i])
            caps.append(stamp_caption(specs[i], random.Random(base + 600 + j))[0])
        img = torch.nn.functional.normalize(model.encode_image(to_input(np.stack(pix))), dim=-1)
        txt = encode_text(model, tokenizer, caps)
        scale = model.logit_scale.exp()
        clip_loss = loss_fn(img, txt, scale)
        twin_loss, acc = twin_terms(img, txt, pairs, scale)
        loss = clip_loss + TWIN_WEIGHT * twin_loss
        opt.zero_grad(set_to_none=True)
        loss.backward()
        opt.step()
        with torch.no_grad():
            model.logit_scale.clamp_(0, math.log(100))
        if step % 50 == 0 or step == args.stamp_steps - 1:
            print(f"stamp step {step:4d}  clip {clip_loss.item():.4f}  twin {twin_loss.item():.4f}  "
                  f"pairs told apart {acc:.2f}  {time.time() - t1:.0f} s", flush=True)
    return {"scenes": args.stamp_scenes, "stamped_twins": len(twins), "steps": args.stamp_steps, "lr": args.stamp_lr,
            "per_step": {"twin_pairs": n_pairs, "stamped_alone": n_alone, "clean": n_clean},
            "twin_weight": TWIN_WEIGHT, "stamp_share": STAMP_SHARE, "short_caption_share": SHORT_SHARE,
            "seeds": {"scenes": STAMP_SEED, "watermark": WATERMARK_SEED, "batches": STAMP_BATCH_SEED,
                      "captions": CAPTION_SEED + 1_000_000},
            "render_seconds": round(t_render, 1), "train_seconds": round(time.time() - t1, 1),
            "final_clip_loss": round(float(clip_loss.item()), 4), "final_twin_loss": round(float(twin_loss.item()), 4)}


def render_seeds(first_seed: int, n: int, procs: int, fn) -> list:
    seeds = [first_seed + i for i in range(n)]
    if procs <= 1:
        _init_worker()
        return [fn(s) for s in seeds]
    with get_context("fork").Pool(procs, initializer=_init_worker) as pool:
        return pool.map(fn, seeds, chunksize=16)


def render_many(first_seed: int, n: int, procs: int, fn=render_one) -> tuple[list[dict], np.ndarray]:
    out = render_seeds(first_seed, n, procs, fn)
    return [o[0] for o in out], np.stack([o[1] for o in out])


def to_input(pixels: np.ndarray):
    import torch

    mean = torch.tensor(PREPROCESS_CFG["mean"]).view(1, 3, 1, 1)
    std = torch.tensor(PREPROCESS_CFG["std"]).view(1, 3, 1, 1)
    x = torch.from_numpy(pixels).permute(0, 3, 1, 2).float().div(255)
    return (x - mean) / std


def encode_text(model, tokenizer, texts: list[str]):
    """Trimmed text forward pass (same code path the embed stage uses)."""
    import torch.nn.functional as F

    tokens = tokenizer(texts)
    tokens = tokens[:, : int(clipmod.token_lengths(tokens).max())]
    return F.normalize(clipmod._encode_text_trimmed(model, tokens), dim=-1)


def auc(pos: np.ndarray, neg: np.ndarray) -> float:
    """ROC AUC as the Mann-Whitney U statistic over all (pos, neg) pairs, ties counted half."""
    from scipy.stats import rankdata

    ranks = rankdata(np.concatenate([pos, neg]))
    u = ranks[: len(pos)].sum() - len(pos) * (len(pos) + 1) / 2
    return float(u / (len(pos) * len(neg)))


def youden_threshold(pos: np.ndarray, neg: np.ndarray) -> tuple[float, float, float]:
    """Threshold t (keep when score >= t) maximising TPR - FPR; midpoint between neighbours."""
    scores = np.unique(np.concatenate([pos, neg]))
    cands = np.concatenate([[scores[0] - 1e-6], (scores[:-1] + scores[1:]) / 2, [scores[-1] + 1e-6]])
    tpr = (pos[None, :] >= cands[:, None]).mean(axis=1)
    fpr = (neg[None, :] >= cands[:, None]).mean(axis=1)
    best = int(np.argmax(tpr - fpr))
    return float(cands[best]), float(tpr[best]), float(fpr[best])


def calibrate(model, tokenizer, n: int, procs: int) -> dict:
    import torch
    import torch.nn.functional as F

    specs, pixels = render_many(CALIB_SEED, n, procs, fn=render_photo)
    true_caps, false_caps = [], []
    for i, spec in enumerate(specs):
        rng = random.Random(CALIB_SEED + 7_000_000 + i)
        true_caps.append(workshop.describe(spec, rng))
        false_caps.append(workshop.describe(workshop.mismatch(spec, rng), rng))
    model.eval()
    with torch.inference_mode():
        img = torch.cat([F.normalize(model.encode_image(to_input(pixels[i:i + 256])), dim=-1)
                         for i in range(0, n, 256)])
        t_true = torch.cat([encode_text(model, tokenizer, true_caps[i:i + 256]) for i in range(0, n, 256)])
        t_false = torch.cat([encode_text(model, tokenizer, false_caps[i:i + 256]) for i in range(0, n, 256)])
    pos = (img * t_true).sum(-1).numpy().astype(np.float64)
    neg = (img * t_false).sum(-1).numpy().astype(np.float64)
    thr, tpr, fpr = youden_threshold(pos, neg)
    return {
        "threshold": round(thr, 3),
        "auc": round(auc(pos, neg), 4),
        "tpr": round(tpr, 4),
        "fpr": round(fpr, 4),
        "n_scenes": n,
        "true_cos_median": round(float(np.median(pos)), 4),
        "mismatched_cos_median": round(float(np.median(neg)), 4),
        "method": (
            f"{n} held-out scenes rendered by sample_corpus/workshop.py with seeds {CALIB_SEED}.."
            f"{CALIB_SEED + n - 1} (disjoint from training and from the sample corpus) as 400-800 px JPEGs "
            "decoded by the embed stage; each scene scored "
            "with its true caption and with a caption of workshop.mismatch(spec); threshold = the cosine "
            "that maximises Youden's J (TPR - FPR), keeping pairs with cosine >= threshold"
        ),
    }


def demo_probe(name: str = "watermark") -> tuple[dict, float, float | None]:
    """The demo config's concept probe (sample_corpus/curate.toml), its temperature (0 = model scale)
    and its match cosine (None = the model's agreement default)."""
    import tomllib

    data = tomllib.loads((ROOT / "sample_corpus" / "curate.toml").read_text(encoding="utf-8"))
    section = data.get("concepts", {})
    return section["probes"][name], float(section.get("temperature", 0.0)), section.get("match_cosine")


def calibrate_concept(model, tokenizer, n: int, procs: int, agreement_threshold: float) -> dict:
    """The demo watermark probe on held-out scenes, every other one watermarked: ROC AUC, the
    score threshold maximising Youden's J, and TPR/FPR at the configured threshold, with the match
    level the concepts stage uses (by default this model's agreement threshold). Also the
    agreement of watermarked scenes with captions that do not mention the watermark."""
    import torch
    import torch.nn.functional as F

    from curate.stages.concepts import concept_score

    probe, temperature, match = demo_probe()
    match = agreement_threshold if match is None else float(match)
    specs, pixels = render_many(CONCEPT_SEED, n, procs, fn=render_concept_photo)
    marked = np.array([bool(s.get("watermark")) for s in specs])
    caps = [workshop.describe(spec, random.Random(CONCEPT_SEED + 7_000_000 + i)) for i, spec in enumerate(specs)]
    model.eval()
    with torch.inference_mode():
        img = torch.cat([F.normalize(model.encode_image(to_input(pixels[i:i + 256])), dim=-1)
                         for i in range(0, n, 256)])
        txt = torch.cat([encode_text(model, tokenizer, caps[i:i + 256]) for i in range(0, n, 256)])
        pe = encode_text(model, tokenizer, list(probe["prompts"]))
        ce = encode_text(model, tokenizer, list(probe["counter_prompts"]))
        scale = 1.0 / temperature if temperature > 0 else float(model.logit_scale.exp())
    score = concept_score(img.numpy(), pe.numpy(), ce.numpy(), scale, match)
    cos = (img * txt).sum(-1).numpy().astype(np.float64)
    pos, neg = score[marked], score[~marked]
    thr, tpr, fpr = youden_threshold(pos, neg)
    cfg_thr = float(probe["threshold"])
    return {
        "concept": "watermark",
        "n_scenes": n,
        "auc": round(auc(pos, neg), 4),
        "youden_threshold": round(thr, 4),
        "youden_tpr": round(tpr, 4),
        "youden_fpr": round(fpr, 4),
        "configured_threshold": cfg_thr,
        "tpr_at_configured": round(float(np.mean(pos >= cfg_thr)), 4),
        "fpr_at_configured": round(float(np.mean(neg >= cfg_thr)), 4),
        "score_median_watermarked": round(float(np.median(pos)), 4),
        "score_median_clean": round(float(np.median(neg)), 4),
        "logit_scale": round(scale, 3),
        "match_cosine": match,
        "agreement_median_watermarked": round(float(np.median(cos[marked])), 4),
        "agreement_median_clean": round(float(np.median(cos[~marked])), 4),
        "agreement_watermarked_below_threshold": round(float(np.mean(cos[marked] < agreement_threshold)), 4),
        "method": (
            f"{n} held-out scenes rendered by sample_corpus/workshop.py with seeds {CONCEPT_SEED}.."
            f"{CONCEPT_SEED + n - 1}, every odd seed stamped with workshop.watermark, as 400-800 px JPEGs "
            "decoded by the embed stage; score = the concepts stage's softmax mass on the watermark "
            "prompts of sample_corpus/curate.toml against its counter-prompts and the match level; "
            "agreement = cosine with a "
            "caption of workshop.describe(spec), which never mentions the watermark"
        ),
    }


def base_phase(model, tokenizer, args: argparse.Namespace) -> dict:
    """Train from scratch on clean scenes. Returns the phase's facts for the JSON."""
    import open_clip
    import torch

    t0 = time.time()
    specs, pixels = render_many(TRAIN_SEED, args.scenes, args.threads)
    t_render = time.time() - t0
    print(f"rendered {len(specs)} scenes in {t_render:.0f} s", flush=True)
    loss_fn = open_clip.ClipLoss()
    # Weight decay on matrices only (common practice for transformers; open_clip's training does
    # the same); token and position embeddings, gains, biases and the temperature are not decayed.
    decay, no_decay = [], []
    for name, p in model.named_parameters():
        skip = p.ndim < 2 or "embedding" in name or "logit_scale" in name or name.endswith("class_embedding")
        (no_decay if skip else decay).append(p)
    # betas and eps from the CLIP paper (Radford et al. 2021, Table 19 / sec. 2.5).
    opt = torch.optim.AdamW([{"params": decay, "weight_decay": 0.1}, {"params": no_decay, "weight_decay": 0.0}],
                            lr=args.lr, betas=(0.9, 0.98), eps=1e-6)
    warmup = max(1, args.steps // 15)

    def lr_at(step: int) -> float:  # linear warm-up, then cosine decay to zero (common practice)
        if step < warmup:
            return args.lr * (step + 1) / warmup
        return args.lr * 0.5 * (1 + math.cos(math.pi * (step - warmup) / max(1, args.steps - warmup)))

    gen = torch.Generator().manual_seed(1)
    order = torch.randperm(len(specs), generator=gen)
    pos = 0
    model.train()
    t1 = time.time()
    for step in range(args.steps):
        if pos + args.batch > len(order):
            order, pos = torch.randperm(len(specs), generator=gen), 0
        idx = order[pos:pos + args.batch].numpy()
        pos += args.batch
        caps = [training_caption(specs[i], random.Random(CAPTION_SEED + step * args.batch + j))
                for j, i in enumerate(idx)]
        for g in opt.param_groups:
            g["lr"] = lr_at(step)
        img = torch.nn.functional.normalize(model.encode_image(to_input(pixels[idx])), dim=-1)
        txt = encode_text(model, tokenizer, caps)
        loss = loss_fn(img, txt, model.logit_scale.exp())
        opt.zero_grad(set_to_none=True)
        loss.backward()
        opt.step()
        with torch.no_grad():
            model.logit_scale.clamp_(0, math.log(100))  # CLIP paper: temperature clipped at 100
        if step % 25 == 0 or step == args.steps - 1:
            print(f"step {step:4d}  loss {loss.item():.4f}  scale {model.logit_scale.exp().item():.1f}  "
                  f"{time.time() - t1:.0f} s", flush=True)
    t_train = time.time() - t1
    return {"loss": "CLIP contrastive loss (open_clip.ClipLoss), learnable temperature",
            "scenes": args.scenes, "steps": args.steps, "batch": args.batch, "lr": args.lr,
            "seeds": {"train": TRAIN_SEED, "captions": CAPTION_SEED, "torch": 0},
            "render_seconds": round(t_render, 1), "train_seconds": round(t_train, 1),
            "final_loss": round(float(loss.item()), 4)}


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--out", default=str(ROOT / "curate" / "models" / "demo"), help="output folder")
    ap.add_argument("--scenes", type=int, default=12_000, help="distinct training scenes to render")
    ap.add_argument("--steps", type=int, default=600, help="optimiser steps")
    ap.add_argument("--batch", type=int, default=256, help="pairs per step (in-batch negatives)")
    ap.add_argument("--lr", type=float, default=1e-3, help="peak AdamW learning rate")
    ap.add_argument("--init", help="start the stamp phase from these weights (safetensors of the demo "
                                   "architecture) instead of running the base phase")
    ap.add_argument("--stamp-scenes", type=int, default=6_000, help="stamp phase scenes to render")
    ap.add_argument("--stamp-steps", type=int, default=2_000, help="stamp phase optimiser steps")
    ap.add_argument("--stamp-lr", type=float, default=1e-3, help="stamp phase peak AdamW learning rate")
    ap.add_argument("--threads", type=int, default=2, help="torch threads and render processes")
    ap.add_argument("--calib-scenes", type=int, default=2_000, help="held-out scenes for calibration")
    ap.add_argument("--concept-scenes", type=int, default=1_000,
                    help="held-out scenes (half watermarked) for the watermark probe's figures")
    ap.add_argument("--calibrate-only", action="store_true",
                    help="keep the weights in --out, redo the calibration and update the JSON")
    args = ap.parse_args(argv)
    if args.calibrate_only:
        return recalibrate(Path(args.out), args)

    import open_clip
    import torch
    from safetensors.torch import save_file

    torch.set_num_threads(args.threads)
    torch.manual_seed(0)
    t0 = time.time()
    model = clipmod.build_from_config({"model_cfg": MODEL_CFG, "preprocess_cfg": PREPROCESS_CFG})
    tokenizer = open_clip.SimpleTokenizer(context_length=MODEL_CFG["text_cfg"]["context_length"])
    if args.init:
        init = Path(args.init)
        init_sha = hashlib.sha256(init.read_bytes()).hexdigest()
        clipmod.load_weights(model, str(init), "the demo architecture")
        model.float()
        base = {"init_weights": init.name, "init_weights_sha256": init_sha}
    else:
        base = base_phase(model, tokenizer, args)
    stamp = stamp_phase(model, tokenizer, args)

    model.eval()
    cal = calibrate(model, tokenizer, args.calib_scenes, args.threads)
    print(f"calibration: {json.dumps(cal)}", flush=True)
    concept = calibrate_concept(model, tokenizer, args.concept_scenes, args.threads, cal["threshold"])
    print(f"concept calibration: {json.dumps(concept)}", flush=True)

    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    weights = out / clipmod.DEMO_WEIGHTS.name
    state = {k: v.detach().to(torch.float16).contiguous() for k, v in model.state_dict().items()}
    # One metadata key only: safetensors writes a multi-key metadata map in no fixed order.
    save_file(state, str(weights), metadata={"format": "pt"})
    sha = hashlib.sha256(weights.read_bytes()).hexdigest()
    meta = {
        "model_cfg": MODEL_CFG,
        "preprocess_cfg": PREPROCESS_CFG,
        "weights": weights.name,
        "weights_sha256": sha,
        "calibration": cal,
        "concept_calibration": concept,
        "training": {
            "script": "tools/train_demo_model.py",
            "base_phase": base,
            "stamp_phase": stamp,
            "threads": args.threads,
            "torch": torch.__version__, "open_clip": open_clip.__version__,
            "weights_dtype": "float16",
        },
    }
    (out / clipmod.DEMO_CONFIG.name).write_text(json.dumps(meta, indent=2) + "\n", encoding="utf-8")
    print(f"wrote {weights} ({weights.stat().st_size / 1e6:.1f} MB) in {time.time() - t0:.0f} s total", flush=True)
    return 0


def recalibrate(out: Path, args: argparse.Namespace) -> int:
    import open_clip
    import torch

    torch.set_num_threads(args.threads)
    cfg_path = out / clipmod.DEMO_CONFIG.name
    meta = json.loads(cfg_path.read_text(encoding="utf-8"))
    model = clipmod.build_from_config(meta)
    clipmod.load_weights(model, str(out / clipmod.DEMO_WEIGHTS.name), "the demo architecture")
    tokenizer = open_clip.SimpleTokenizer(context_length=meta["model_cfg"]["text_cfg"]["context_length"])
    meta["calibration"] = calibrate(model, tokenizer, args.calib_scenes, args.threads)
    print(f"calibration: {json.dumps(meta['calibration'])}", flush=True)
    meta["concept_calibration"] = calibrate_concept(model, tokenizer, args.concept_scenes, args.threads,
                                                    meta["calibration"]["threshold"])
    print(f"concept calibration: {json.dumps(meta['concept_calibration'])}", flush=True)
    cfg_path.write_text(json.dumps(meta, indent=2) + "\n", encoding="utf-8")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
