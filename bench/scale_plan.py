"""Scale: a synthetic run of N samples through the corpus-wide stages and the verdict.

No images: the per-shard work (decoding, hashing, CLIP) scales with the number of images and the
machines given to it; what must hold on one machine is the corpus-wide part. This builds the
compact columns those stages read for N samples (caption keys with repeats, sha256, perceptual
codes with planted near-copies, sizes, image quality, the true and shuffled agreement cosines) and
runs, in one process per N: caption_repeats, agreement, neardup (perceptual codes and bytes; the
semantic search over embeddings is measured in bench/cosine_search.py), split, and the verdict
over every check. It prints seconds and peak RSS per step, and extrapolates to 100M and 1B.
With --digest it adds a sha256 of every stage output and the verdict, and whether it equals the
digest the row-wise implementation gave (REFERENCE_DIGESTS), so a rewrite shows it kept the results.

    .venv/bin/python bench/scale_plan.py --rows 1000000 --json
    .venv/bin/python bench/scale_plan.py --rows 100000 --json --digest
    .venv/bin/python bench/scale_plan.py                      # 100k and 1M, then the extrapolation
"""
from __future__ import annotations

import argparse
import hashlib
import json
import math
import os
import resource
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

ROOT = Path(__file__).resolve().parents[1]


def _rss_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # Linux: kilobytes


def _hex(values: np.ndarray, width: int) -> pa.Array:
    """Strings of non-negative int64 values as lower-case hex, zero-padded to ``width`` (>= 16)
    digits, built as one Arrow buffer (no Python string per row)."""
    n = values.shape[0]
    chars = np.full((n, width), ord("0"), np.uint8)
    digits = np.frombuffer(b"0123456789abcdef", np.uint8)
    shifts = np.arange(60, -4, -4, dtype=np.uint64)
    for lo in range(0, n, 1 << 20):
        v = values[lo : lo + (1 << 20)].view(np.uint64)
        chars[lo : lo + v.shape[0], width - 16 :] = digits[(v[:, None] >> shifts) & np.uint64(15)]
    offsets = np.arange(0, (n + 1) * width, width, dtype=np.int32)
    return pa.StringArray.from_buffers(n, pa.py_buffer(offsets), pa.py_buffer(chars))


def _views(rng: np.random.Generator, out: np.ndarray) -> None:
    """Codes of each sample's views into ``out`` (n, views): one random odd code per sample with up
    to 10 low bits changed per view."""
    n, k = out.shape
    out[:] = rng.integers(0, 2**63, (n, 1), dtype=np.int64).view(np.uint64) * np.uint64(2) + np.uint64(1)
    out ^= rng.integers(0, 2**10, (n, k), dtype=np.int64).view(np.uint64)


def synth(n: int, seed: int = 0) -> pa.Table:
    """The compact columns of n samples: ids, caption keys (2% on a template caption), sha256 (1%
    exact copies), 7 perceptual codes and 7 check codes per sample (5% near copies within 4 bits), sizes, quality,
    true and shuffled agreement cosines. Built column by column in Arrow buffers."""
    rng = np.random.default_rng(seed)
    ids = _hex(rng.integers(0, 2**62, n, dtype=np.int64), 16)
    num = pc.cast(pa.array(rng.integers(0, n, n)), pa.string())
    keys = pc.binary_join_element_wise("a glazed pot number ", num, " on a table", "")
    keys = pc.if_else(pa.array(rng.random(n) < 0.02), "product image", keys)
    del num
    sha_int = rng.integers(0, 2**62, n, dtype=np.int64)
    dup = rng.random(n) < 0.01
    sha_int[dup] = sha_int[rng.integers(0, n, int(dup.sum()))]
    sha = _hex(sha_int, 64)
    del sha_int, dup
    k = 14
    codes = np.empty((n, k), np.uint64)
    _views(rng, codes[:, :7])
    near = np.flatnonzero(rng.random(n) < 0.05)
    src = rng.integers(0, n, len(near))
    flips = np.zeros(len(near), np.uint64)
    for _ in range(4):
        flips |= np.uint64(1) << rng.integers(0, 64, len(near)).astype(np.uint64)
    codes[near, :7] = codes[src, :7] ^ flips[:, None]
    # Check codes (a second hash family per view, [hashes] check): near copies keep theirs within
    # a few bits too, so they pass the check radius.
    _views(rng, codes[:, 7:])
    codes[near, 7:] = codes[src, 7:] ^ flips[:, None]
    code_col = pa.FixedSizeListArray.from_arrays(pa.array(codes.reshape(-1), pa.uint64()), k)
    agree = np.clip(rng.normal(0.31, 0.06, n), -1, 1).astype(np.float32)
    shuffled = np.clip(rng.normal(0.12, 0.05, n), -1, 1).astype(np.float32)
    return pa.table({
        "sample_id": ids, "source": ids, "caption_key": keys, "sha256": sha,
        "hash_codes": code_col, "decoded": pa.array(np.ones(n, bool)),
        "width": pa.array(rng.integers(256, 2048, n).astype(np.int32)),
        "height": pa.array(rng.integers(256, 2048, n).astype(np.int32)),
        "format": pa.repeat(pa.scalar("JPEG"), n),
        "jpeg_quality": pa.array(rng.uniform(60, 98, n).astype(np.float32)),
        "sharpness": pa.array(rng.uniform(0.2, 1.2, n).astype(np.float32)),
        "border_share": pa.array(np.zeros(n, np.float32)), "overlay_share": pa.array(np.zeros(n, np.float32)),
        "agreement": pa.array(agree), "shuffled_agreement": pa.array(shuffled),
    })


# ``digest`` of the implementation before the columnar rewrite (row-wise Python; commit 100e024,
# numpy 2.4.6 drawing the synthetic rows), by rows: a change that keeps every result keeps these.
REFERENCE_DIGESTS = {
    20_000: "b2ce3d845e5e9666153efcb550fbe76ae49d3f3e40ecf41caf2ef0299491a612",
    100_000: "e452ced1e6c19119487fd99ac289b73672af79bdf61585fd7678088007487283",
    1_000_000: "c255c45717c51658caf8e5e3116cbf301a4647961184dc0cce00243e53069858",
}

# Stage output columns the digest covers, in this order (the verdict's fields follow).
OUTPUTS = ("caption_images", "caption_repeats.checks", "clip_score", "agreement.checks", "group_id", "group_size",
           "dup_of", "dup_signal", "dup_distance", "dup_transform", "keep_reason", "neardup.checks", "split",
           "split.checks")


def digest(table: pa.Table, v) -> str:
    """sha256 of every output value and the verdict, read as Python values in row blocks (so equal
    results give equal digests whatever the Arrow types, chunks or buffer layouts)."""
    h = hashlib.sha256()
    cols = [(name, table.column(name)) for name in OUTPUTS]
    cols += [(name, pa.array(getattr(v, name))) for name in ("kept", "quarantined")]
    cols += [(name, getattr(v, name)) for name in ("reasons", "flags", "redacted", "stopped_at", "records")]
    for name, col in cols:
        h.update(name.encode())
        for lo in range(0, len(col), 65536):
            h.update(json.dumps(col.slice(lo, 65536).to_pylist(), sort_keys=True).encode())
    return h.hexdigest()


def one(n: int, with_digest: bool = False, workers: int = 2) -> dict:
    """Run the corpus-wide steps on n synthetic samples in this process (``workers``: the search
    threads of neardup and split, as the run's `run.workers`)."""
    sys.path.insert(0, str(ROOT))
    from curate import decide
    from curate.config import load_config
    from curate.execute import call_stage
    from curate.layout import hstack
    from curate.plan import config_sections
    from curate.stages import REGISTRY, all_checks

    # The synthetic codes have the layout of the default views without the mirror (7 identity views,
    # each with a check code), the layout REFERENCE_DIGESTS were taken with; the default mirror view
    # adds one transformed view per sample (8 views instead of 7).
    cfg = load_config(None, ["agreement.threshold=0.28", "split.eval_fraction=0.05", "neardup.semantic=false",
                             "hashes.transforms=[]"], config_sections())
    actions = decide.Actions(all_checks(), {})
    # Imports and planning (the default embed model's size is read through open_clip, so torch is
    # loaded): a fixed cost, whatever the rows.
    steps: dict[str, dict] = {"setup": {"seconds": 0.0, "peak_rss_mb": round(_rss_mb())}}
    t = time.perf_counter()
    table = synth(n)
    steps["synthesise"] = {"seconds": round(time.perf_counter() - t, 2), "peak_rss_mb": round(_rss_mb())}
    checks = []
    for name in ("caption_repeats", "agreement", "neardup", "split"):
        t = time.perf_counter()
        rows = None
        if REGISTRY[name].alive_only:
            rows = np.flatnonzero(decide.alive(checks, actions, n))
        flags = [[]] * len(rows) if rows is not None and name == "neardup" else None
        out = call_stage(name, table, cfg, rows, flags, workers=workers)
        table = hstack([table, out], name)
        checks.append(table.column(f"{name}.checks"))
        steps[name] = {"seconds": round(time.perf_counter() - t, 2), "peak_rss_mb": round(_rss_mb())}
    t = time.perf_counter()
    # The check columns as the runner hands them over (writers.run_verdict): Arrow, not Python rows.
    stage_checks = [(s, table.column(f"{s}.checks")) for s in ("caption_repeats", "agreement", "neardup", "split")]
    v = decide.verdict(stage_checks, {}, {}, actions, n)
    steps["verdict"] = {"seconds": round(time.perf_counter() - t, 2), "peak_rss_mb": round(_rss_mb())}
    kept = int(decide.alive(checks, actions, n).sum())
    total = round(sum(s["seconds"] for k, s in steps.items() if k not in ("setup", "synthesise")), 2)
    out = {"rows": n, "workers": workers, "steps": steps, "seconds": total, "peak_rss_mb": round(_rss_mb()), "kept": kept}
    if with_digest:
        out["digest"] = digest(table, v)
        if n in REFERENCE_DIGESTS:
            out["same_as_reference"] = out["digest"] == REFERENCE_DIGESTS[n]
    return out


def _powers(results: list[dict]) -> dict[str, float]:
    """Per step, the exponent b of seconds = a * rows**b through the two largest runs (at least 1;
    1 with a single run)."""
    steps = [k for k in results[-1]["steps"] if k not in ("setup", "synthesise")]
    if len(results) < 2:
        return {k: 1.0 for k in steps}
    a, b = results[-2], results[-1]
    out = {}
    for k in steps:
        sa, sb = a["steps"][k]["seconds"], b["steps"][k]["seconds"]
        out[k] = max(1.0, math.log(sb / sa) / math.log(b["rows"] / a["rows"])) if sa > 0 and sb > 0 else 1.0
    return out


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--rows", type=int, action="append", help="rows to run (repeatable); default 100k and 1M")
    ap.add_argument("--json", action="store_true", help="print one JSON line")
    ap.add_argument("--digest", action="store_true", help="add a sha256 of every output and the verdict per run, "
                    "and whether it equals the recorded reference for that many rows")
    ap.add_argument("--workers", type=int, default=0, help="search threads of neardup and split (run.workers); "
                    "0 = every CPU core")
    ap.add_argument("--child", type=int, help=argparse.SUPPRESS)
    a = ap.parse_args()
    if a.workers < 0:
        ap.error(f"--workers must be >= 0, got {a.workers}")
    workers = a.workers or os.cpu_count() or 1
    if a.child:
        print(json.dumps(one(a.child, a.digest, workers)))
        return 0
    results = []
    for n in a.rows or [100_000, 1_000_000]:
        r = subprocess.run([sys.executable, __file__, "--child", str(n), "--workers", str(workers)] + (["--digest"] if a.digest else []),
                           capture_output=True, text=True)
        if r.returncode != 0:
            print(r.stderr[-2000:], file=sys.stderr)
            return r.returncode
        results.append(json.loads(r.stdout.strip().splitlines()[-1]))
    extra, assumes = extrapolate(results)
    out = {"runs": results, **extra, "assumes": assumes}
    if a.json:
        print(json.dumps(out))
    else:
        for r in results:
            print(f"{r['rows']:>12,} rows, {r['workers']} workers: {r['seconds']:8.2f} s, peak RSS {r['peak_rss_mb']:,} MB  "
                  + "  ".join(f"{k} {v['seconds']}s" for k, v in r["steps"].items()))
        for k, v in extra.items():
            print(f"{k}: about {v['seconds']:,} s and {v['peak_rss_gb']} GB on one machine ({assumes})")
    return 0


def extrapolate(results: list[dict]) -> tuple[dict, str]:
    """Estimates for 100M and 1B rows from the runs, and what they assume."""
    results.sort(key=lambda r: r["rows"])
    big = results[-1]
    fixed_mb = big["steps"]["setup"]["peak_rss_mb"]
    per_row_mb = (big["peak_rss_mb"] - fixed_mb) / big["rows"]
    powers = _powers(results)
    extra = {f"{label}_estimate": {"seconds": round(sum(s["seconds"] * (rows / big["rows"]) ** powers[k]
                                                        for k, s in big["steps"].items() if k in powers)),
                                   "peak_rss_gb": round((fixed_mb + per_row_mb * rows) / 1024, 1)}
             for label, rows in (("100M", 100_000_000), ("1B", 1_000_000_000))}
    square = ("neardup's exact code search grows faster than rows, up to rows squared: its substring buckets "
              "fill as the corpus grows; split searches only inside neardup's code components")
    if len(results) < 2:
        grow = f"each step's seconds linear in rows (one run: give two --rows to fit how each grows; {square})"
    else:
        grow = ("each step's seconds grow as rows to the power fitted to the two largest runs, at least 1 ("
                + ", ".join(f"{k} {p:.2f}" for k, p in powers.items()) + f"; {square})")
    threads = f"; on one machine with the runs' {big.get('workers', 2)} search threads"
    assumes = (f"{grow}{threads}; memory is the setup's fixed part plus {round(per_row_mb * 2**20)} bytes per row (peak "
               "less setup, over rows of the largest run)")
    return extra, assumes


if __name__ == "__main__":
    raise SystemExit(main())
