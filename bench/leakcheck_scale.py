"""Cross-set near-duplicate search at scale: A (default 100k) vs B (default 10k) synthetic samples.

Each sample has K perceptual codes, one per view, the first I of them identity views, as the
default code settings make (curate.similarity.views); a pair's distance is the minimum over view
pairs with at least one identity view. Some B samples are planted copies of A samples with a few
bits flipped. Times the exact search leakcheck uses (curate.similarity.cross_set_pairs), checks it
against brute force (every allowed view pair, blocked numpy popcount) on a random subset of B, and
estimates the full brute-force time from that subset. Prints one JSON line.

    .venv/bin/python bench/leakcheck_scale.py --json
"""
from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from curate import similarity  # noqa: E402
from curate.similarity.hamming import brute_cross_pairs  # noqa: E402


def flip_bits(codes: np.ndarray, nbits: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Each code with `nbits[i]` distinct random bits flipped."""
    out = codes.copy()
    for i, k in enumerate(nbits.tolist()):
        pos = rng.choice(64, size=k, replace=False)
        mask = np.uint64(0)
        for p in pos.tolist():
            mask |= np.uint64(1) << np.uint64(p)
        out[i] ^= mask
    return out


def make_sets(n_a: int, n_b: int, k: int, planted: int, radius: int, seed: int):
    rng = np.random.default_rng(seed)
    a = rng.integers(0, 2**63, size=(n_a, k), dtype=np.uint64) | (
        rng.integers(0, 2, size=(n_a, k), dtype=np.uint64) << np.uint64(63))
    b = rng.integers(0, 2**63, size=(n_b, k), dtype=np.uint64)
    src = rng.choice(n_a, size=planted, replace=False)
    dst = rng.choice(n_b, size=planted, replace=False)
    for v in range(k):
        b[dst, v] = flip_bits(a[src, v], rng.integers(0, radius + 1, planted), rng)
    return a, b, set(zip(src.tolist(), dst.tolist()))


def brute(a: np.ndarray, b: np.ndarray, rows: np.ndarray, radius: int, ident: int) -> set:
    """Every (i in a, j in rows of b) within radius, by computing every view distance (blocked numpy)
    and keeping view pairs with an identity view."""
    k = a.shape[1]
    p = brute_cross_pairs(a.ravel(), b[rows].ravel(), radius)
    va, vb = p.i % k, p.j % k
    ok = (va < ident) | (vb < ident)
    return {(int(i) // k, int(rows[int(j) // k])) for i, j in zip(p.i[ok].tolist(), p.j[ok].tolist())}


def default_views() -> tuple[int, int]:
    s = similarity.CodeSettings()
    return len(similarity.views(s)), similarity.identity_count(s)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--a", type=int, default=100_000, help="samples in A (training side)")
    ap.add_argument("--b", type=int, default=10_000, help="samples in B (eval side)")
    ap.add_argument("--variants", type=int, default=default_views()[0],
                    help="views per sample (default: the default code settings' views)")
    ap.add_argument("--identity", type=int, default=default_views()[1], help="identity views among them")
    ap.add_argument("--radius", type=int, default=8, help="Hamming radius in bits")
    ap.add_argument("--planted", type=int, default=200, help="planted near-duplicate pairs")
    ap.add_argument("--check", type=int, default=100, help="B samples checked by brute force")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--json", action="store_true", help="print one JSON line (the default output)")
    a_ = ap.parse_args()
    a, b, planted = make_sets(a_.a, a_.b, a_.variants, a_.planted, a_.radius, a_.seed)
    t = time.perf_counter()
    p = similarity.cross_set_pairs(a, b, a_.radius, a_.identity)
    seconds = time.perf_counter() - t
    found = set(zip(np.asarray(p[0]).tolist(), np.asarray(p[1]).tolist()))
    rng = np.random.default_rng(a_.seed + 1)
    planted_b = sorted({j for _, j in planted})
    rows = np.unique(np.r_[rng.choice(a_.b, size=min(a_.check, a_.b), replace=False), planted_b[:20]])
    t = time.perf_counter()
    ref = brute(a, b, rows, a_.radius, a_.identity)
    brute_s = time.perf_counter() - t
    sub = {(i, j) for i, j in found if j in set(rows.tolist())}
    print(json.dumps({
        "n_a": a_.a,
        "n_b": a_.b,
        "variants": a_.variants,
        "identity_views": a_.identity,
        "radius": a_.radius,
        "seconds": round(seconds, 4),
        "pairs": len(found),
        "planted": len(planted),
        "planted_found": len(planted & found),
        "exact": sub == ref,
        "checked_b_rows": int(rows.size),
        "brute_force_seconds": round(brute_s * a_.b / rows.size, 2),
        "brute_force_estimated": True,
        "speedup": round(brute_s * a_.b / rows.size / max(seconds, 1e-9), 1),
    }))


if __name__ == "__main__":
    main()
