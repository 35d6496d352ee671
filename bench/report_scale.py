"""The HTML report at scale: build time and file size of report.html for a synthetic N-row ledger.

The ledger is invented for this benchmark (not a measurement of any corpus): sizes, caption
lengths, agreement scores, a blur score (an image-quality check with a numeric threshold),
near-duplicate groups, personal-data flags and a quarantine share drawn from fixed random
distributions, with check records built the way the stages write them (typed value, threshold,
operator; later checks "skipped" for samples an earlier check dropped). Thumbnails come from a
pool of 48 small generated JPEGs, so decoding and encoding them is part of the time.

    .venv/bin/python bench/report_scale.py --n 1000000 --json
prints one JSON line: rows, seconds (write_report only), build_ledger_seconds, bytes, thumbnails,
whatif_curves, peak_rss_mb.
"""
from __future__ import annotations

import argparse
import io
import json
import resource
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pyarrow as pa

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from curate.decide import LEDGER_CHECK  # noqa: E402

# (stage, code, op, unit, threshold, action); value columns are filled in synthetic_ledger.
CHECKS = [
    ("inspect", "short_side_small", ">=", "px", 256.0, "drop"),
    ("inspect", "pixels_small", ">=", "pixels", 65536.0, "drop"),
    ("inspect", "aspect_extreme", "<=", ":1", 4.0, "drop"),
    ("inspect", "image_blurred", ">=", "laplacian var", 60.0, "drop"),
    ("caption", "caption_short", ">=", "chars", 5.0, "drop"),
    ("caption", "caption_many_tokens", "<=", "tokens", 77.0, "flag"),
    ("risk", "pii:email", None, None, None, "flag"),
    ("risk", "face", None, None, None, "quarantine"),
    ("agreement", "agreement_low", ">=", "cosine", 0.28, "drop"),
    ("neardup", "duplicate", ">", "bits", 8.0, "drop"),
]
LATE = {"agreement", "neardup"}  # stages that see only samples no earlier check dropped
WORDS = np.array("glazed bowl teapot mug vase plate jug speckled dotted striped blue green white red on a "
                 "linen concrete slate wooden table backdrop shot in soft light".split(), dtype=object)


def synthetic_ledger(n: int, seed: int = 0) -> pa.Table:
    """An invented N-row ledger with the columns and check records the report reads."""
    rng = np.random.default_rng(seed)
    ids = np.array([f"{v:016x}" for v in rng.integers(0, 2**63, n, dtype=np.int64)], dtype=object)
    source = np.array([f"part{i // 1000:04d}/img{i:07d}.jpg" for i in range(n)], dtype=object)
    short = np.round(rng.lognormal(6.1, 0.45, n)).clip(16, 8000)
    aspect = np.exp(np.abs(rng.normal(0, 0.45, n)))
    w = np.round(short * aspect).astype(np.int32)
    h = short.astype(np.int32)
    swap = rng.random(n) < 0.5
    w, h = np.where(swap, h, w), np.where(swap, w, h)
    chars = np.round(rng.lognormal(3.6, 0.7, n)).clip(0, 2000)
    tokens = np.round(chars / 4.2)
    blur = rng.lognormal(5.5, 0.9, n)
    agreement = rng.normal(0.31, 0.045, n).astype(np.float32)
    dup = rng.random(n) < 0.06
    dist = rng.integers(0, 5, n) * 2.0
    email = rng.random(n) < 0.002
    face = rng.random(n) < 0.01
    n_words = np.maximum(1, np.round(chars / 6)).astype(int).clip(1, 12)
    caption = np.array([" ".join(WORDS[(i * 7 + np.arange(k)) % WORDS.size]) for i, k in enumerate(n_words)],
                       dtype=object)
    values = {"short_side_small": np.minimum(w, h).astype(float), "pixels_small": (w.astype(float) * h),
              "aspect_extreme": np.maximum(w, h) / np.minimum(w, h), "image_blurred": blur,
              "caption_short": chars, "caption_many_tokens": tokens, "agreement_low": agreement.astype(float),
              "duplicate": np.where(dup, dist, np.nan)}
    k = len(CHECKS)
    status = np.empty((n, k), dtype=object)
    value = np.full((n, k), np.nan)
    thr = np.full((n, k), np.nan)
    failed = np.zeros((n, k), bool)
    dropped = np.zeros(n, bool)
    for j, (stage, code, op, _unit, t, action) in enumerate(CHECKS):
        if code == "pii:email":
            f = email
        elif code == "face":
            f = face
        elif code == "duplicate":
            f = dup.copy()
        else:
            v = values[code]
            f = ~(v >= t if op == ">=" else v <= t)
        if code in values:
            value[:, j], thr[:, j] = values[code], t
            if code == "duplicate":
                thr[:, j] = np.where(dup, t, np.nan)
        skip = dropped if stage in LATE else np.zeros(n, bool)
        status[:, j] = np.where(skip, "skipped", np.where(f, "fail", "pass"))
        value[skip, j] = np.nan
        thr[skip, j] = np.nan
        failed[:, j] = f & ~skip
        if action == "drop" and stage not in LATE:
            dropped |= f
        if stage in LATE and action == "drop":
            dropped |= f & ~skip
    codes = np.array([c[1] for c in CHECKS], dtype=object)
    acts = np.array([c[5] for c in CHECKS], dtype=object)
    ops = np.array([c[2] for c in CHECKS], dtype=object)
    units = np.array([c[3] for c in CHECKS], dtype=object)
    stages = np.array([c[0] for c in CHECKS], dtype=object)
    skipped = status == "skipped"
    flat = lambda a: a.reshape(-1)  # noqa: E731
    tile = lambda a: np.tile(a, n)  # noqa: E731
    rec = pa.StructArray.from_arrays(
        [pa.array(tile(stages), pa.string()), pa.array(tile(codes), pa.string()), pa.array(flat(status), pa.string()),
         pa.array(np.where(flat(skipped), None, tile(acts)), pa.string()), pa.nulls(n * k, pa.string()),
         pa.array(flat(value), pa.float64(), from_pandas=True), pa.array(flat(thr), pa.float64(), from_pandas=True),
         pa.array(np.where(flat(skipped), None, tile(ops)), pa.string()),
         pa.array(np.where(flat(skipped), None, tile(units)), pa.string()), pa.array(flat(failed))],
        fields=list(LEDGER_CHECK))
    checks = pa.ListArray.from_arrays(pa.array(np.arange(0, n * k + 1, k, dtype=np.int32)), rec)
    drop_fail = failed & (acts == "drop")
    hit = failed & (acts != "drop")
    kept = ~drop_fail.any(1)
    reasons = _lists(drop_fail, codes)
    flags = _lists(hit, codes)
    quarantine = kept & face
    split = np.where(~kept, None, np.where(quarantine, "quarantine", np.where(rng.random(n) < 0.05, "eval", "train")))
    group = np.where(dup, ids[(np.arange(n) + 1) % n], ids)
    group_size = np.ones(n, np.int32)
    dup_of = np.where(dup, group, None)
    stopped = np.where(kept, None, np.where(drop_fail[:, :4].any(1), "inspect",
                                            np.where(drop_fail[:, 4:6].any(1), "caption", "agreement")))
    return pa.table({
        "sample_id": pa.array(ids, pa.string()), "source": pa.array(source, pa.string()), "kept": pa.array(kept),
        "reasons": reasons, "flags": flags, "split": pa.array(split, pa.string()),
        "stopped_at": pa.array(stopped, pa.string()), "agreement": pa.array(agreement),
        "caption": pa.array(caption, pa.string()), "width": pa.array(w), "height": pa.array(h),
        "group_id": pa.array(group, pa.string()), "group_size": pa.array(group_size),
        "dup_of": pa.array(dup_of, pa.string()),
        "dup_signal": pa.array(np.where(dup, "phash", None), pa.string()),
        "dup_distance": pa.array(np.where(dup, dist, np.nan), pa.float32(), from_pandas=True),
        "checks": checks,
    })


def _lists(mask: np.ndarray, codes: np.ndarray) -> pa.ListArray:
    offsets = np.r_[0, np.cumsum(mask.sum(1))].astype(np.int32)
    return pa.ListArray.from_arrays(pa.array(offsets), pa.array(np.tile(codes, mask.shape[0])[mask.reshape(-1)],
                                                                pa.string()))


def quick_summary(t: pa.Table) -> dict:
    """The summary fields the report reads, computed with Arrow (writers.summarize loops per row)."""
    import pyarrow.compute as pc

    def counts(col: str) -> dict:
        vc = pc.value_counts(pc.list_flatten(t.column(col)))
        d = dict(zip(vc.field("values").to_pylist(), vc.field("counts").to_pylist()))
        return dict(sorted(d.items(), key=lambda kv: (-kv[1], kv[0])))

    kept = int(pc.sum(t.column("kept")).as_py())
    stopped = pc.value_counts(t.column("stopped_at").drop_null())
    split = pc.value_counts(t.column("split").drop_null())
    return {"samples": t.num_rows, "kept": kept, "dropped": t.num_rows - kept,
            "by_reason": counts("reasons"), "by_flag": counts("flags"),
            "stopped_at": dict(zip(stopped.field("values").to_pylist(), stopped.field("counts").to_pylist())),
            "by_split": dict(zip(split.field("values").to_pylist(), split.field("counts").to_pylist())),
            "groups": len(pc.unique(t.column("group_id")))}


def picture_pool(k: int = 48, seed: int = 1) -> list[bytes]:
    """k small invented JPEGs (colour gradients with a disc), to make thumbnails from."""
    from PIL import Image, ImageDraw

    rng = np.random.default_rng(seed)
    out = []
    for _ in range(k):
        wid, hei = int(rng.integers(320, 900)), int(rng.integers(320, 900))
        a, b = rng.integers(0, 255, 3), rng.integers(0, 255, 3)
        ramp = np.linspace(0, 1, wid)[None, :, None]
        px = (a * (1 - ramp) + b * ramp).astype(np.uint8).repeat(hei, 0)
        im = Image.fromarray(px, "RGB")
        r = int(min(wid, hei) * rng.uniform(0.15, 0.4))
        cx, cy = int(rng.integers(r, wid - r)), int(rng.integers(r, hei - r))
        ImageDraw.Draw(im).ellipse((cx - r, cy - r, cx + r, cy + r), fill=tuple(int(v) for v in rng.integers(0, 255, 3)))
        buf = io.BytesIO()
        im.save(buf, "JPEG", quality=85)
        out.append(buf.getvalue())
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=1_000_000)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--json", action="store_true")
    a = ap.parse_args()

    from curate.config import load_config
    from curate.plan import config_sections
    from curate.report import whatif, write_report

    t0 = time.perf_counter()
    ledger = synthetic_ledger(a.n, a.seed)
    summary = quick_summary(ledger)
    build = time.perf_counter() - t0
    pool = picture_pool()
    asked: list[str] = []

    def load(ids: list[str]) -> list[bytes | None]:
        asked.extend(ids)
        return [pool[int(s[:8], 16) % len(pool)] for s in ids]

    cfg = load_config(None, sections=config_sections())
    facts = {"stages": {"embed": {"version": "2", "kind": "shard", "model": "ViT-B-32", "pretrained": "synthetic",
                                  "weights_sha256": "0" * 64}}, "state": {}}
    with tempfile.TemporaryDirectory() as d:
        t1 = time.perf_counter()
        path = write_report(Path(d), ledger, summary, cfg, load_images=load, facts=facts)
        secs = time.perf_counter() - t1
        size = path.stat().st_size
    res = {"rows": a.n, "seconds": round(secs, 2), "build_ledger_seconds": round(build, 2), "bytes": size,
           "megabytes": round(size / 1e6, 2), "thumbnails": len(set(asked)),
           "whatif_curves": len(whatif.curves(ledger)),
           "peak_rss_mb": round(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024)}
    print(json.dumps(res) if a.json else "\n".join(f"{k}: {v}" for k, v in res.items()))


if __name__ == "__main__":
    main()
