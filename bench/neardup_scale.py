"""Exact Hamming range search at scale: curate.hashing.range_pairs on synthetic 64-bit codes.

N uniform random codes, a tenth of them replaced by copies of other codes with 0..radius+2 bits
flipped (planted near-duplicates, some just past the radius so the boundary is tested). The search
is timed; then `exact` compares its pairs against brute force for a random sample of codes (every
pair that touches a sampled code, against all N codes; the whole set when N is small), and
`brute_force_seconds` is measured on that sample and scaled to all N*(N-1)/2 pairs, for numpy's
and FAISS's flat (quadratic) scans, the faster one reported.

    .venv/bin/python bench/neardup_scale.py --n 1000000 --json
prints one JSON line: seconds, exact, brute_force_seconds, speedup, pairs, peak_rss_mb, ...
"""
from __future__ import annotations

import argparse
import json
import resource
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from curate import hashing  # noqa: E402
from curate.stages.neardup import NeardupConfig  # noqa: E402


def synthetic_codes(n: int, radius: int, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    codes = rng.integers(0, np.iinfo(np.uint64).max, size=n, dtype=np.uint64, endpoint=True)
    k = n // 10
    src = rng.integers(0, n, k)
    dst = rng.integers(0, n, k)
    flips = np.zeros(k, np.uint64)
    want = rng.integers(0, radius + 3, k)  # bits to flip per copy (repeats may cancel: fewer)
    for step in range(int(want.max(initial=0))):
        bit = rng.integers(0, 64, k).astype(np.uint64)
        flips ^= np.where(want > step, np.uint64(1) << bit, np.uint64(0))
    codes[dst] = codes[src] ^ flips
    return codes


def peak_rss_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # Linux: KiB


def brute_sample(codes: np.ndarray, queries: np.ndarray, radius: int) -> tuple[set, float]:
    """Pairs (min, max) within radius for each query index against all codes, and the seconds."""
    t = time.perf_counter()
    found = set()
    for q in queries:
        d = hashing.hamming(codes, codes[q])
        for j in np.flatnonzero(d <= radius):
            if j != q:
                found.add((int(min(q, j)), int(max(q, j))))
    return found, time.perf_counter() - t


def faiss_flat_rate(codes: np.ndarray, radius: int, nq: int) -> float | None:
    """Pair comparisons per second of FAISS's flat binary range search (None if unavailable)."""
    try:
        import faiss
    except ImportError:
        return None
    db = codes.view(np.uint8).reshape(-1, 8)
    index = faiss.IndexBinaryFlat(64)
    index.add(db)
    q = db[:nq]
    t = time.perf_counter()
    index.range_search(q, radius + 1)  # FAISS keeps distances < radius argument
    return nq * codes.shape[0] / max(time.perf_counter() - t, 1e-9)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=1_000_000, help="number of codes")
    ap.add_argument("--radius", type=int, default=NeardupConfig().radius, help="Hamming radius (default: neardup's)")
    ap.add_argument("--threads", type=int, default=2, help="substring tables searched side by side")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--check", type=int, default=0, help="codes checked against brute force (0: auto)")
    ap.add_argument("--json", action="store_true", help="print one JSON line")
    args = ap.parse_args(argv)

    codes = synthetic_codes(args.n, args.radius, args.seed)
    rss_before = peak_rss_mb()
    t = time.perf_counter()
    pairs = hashing.range_pairs(codes, args.radius, threads=args.threads)
    seconds = time.perf_counter() - t
    rss_search = peak_rss_mb()
    m = hashing._plan(np.unique(codes).shape[0], np.unique(codes).shape[0], args.radius, True)

    n = args.n
    total_pairs = n * (n - 1) / 2
    if n <= 20_000:
        t = time.perf_counter()
        ref = hashing.brute_pairs(codes, args.radius)
        brute_s, estimated = time.perf_counter() - t, False
        exact = all(np.array_equal(x, y) for x, y in zip(pairs, ref))
        checked = n
    else:
        rng = np.random.default_rng(args.seed + 1)
        nq = args.check or int(max(50, min(2000, 3e9 / n)))
        # Half random codes, half codes that take part in a pair (so the check sees real matches).
        with_pair = np.unique(np.concatenate([pairs.i, pairs.j]))
        queries = np.unique(np.concatenate([rng.choice(n, nq // 2, replace=False),
                                            rng.choice(with_pair, min(nq - nq // 2, with_pair.shape[0]), replace=False)]))
        ref, sample_s = brute_sample(codes, queries, args.radius)
        qs = set(queries.tolist())
        got = {(int(a), int(b)) for a, b in zip(pairs.i, pairs.j) if int(a) in qs or int(b) in qs}
        exact = got == ref
        checked = int(queries.shape[0])
        numpy_rate = queries.shape[0] * n / sample_s
        faiss_rate = faiss_flat_rate(codes, args.radius, max(10, min(200, int(2e9 / n))))
        rate = max(numpy_rate, faiss_rate or 0.0)
        brute_s, estimated = total_pairs / rate, True
    result = {
        "n": n,
        "radius": args.radius,
        "threads": args.threads,
        "substrings": m,
        "seconds": round(seconds, 2),
        "pairs": len(pairs),
        "exact": bool(exact),
        "checked_codes": checked,
        "brute_force_seconds": round(brute_s, 1),
        "brute_force_estimated": estimated,
        "speedup": round(brute_s / max(seconds, 1e-9), 1),
        "peak_rss_mb": round(rss_search, 1),
        "rss_before_search_mb": round(rss_before, 1),
    }
    if args.json:
        print(json.dumps(result))
    else:
        print(f"{n:,} codes, radius {args.radius}: {seconds:.1f} s with {m} substring tables on {args.threads} threads, "
              f"{len(pairs):,} pairs; exact vs brute force on {checked:,} codes: {exact}")
        print(f"brute force {'(estimated) ' if estimated else ''}{brute_s:,.0f} s -> {result['speedup']}x faster; "
              f"peak RSS {rss_search:,.0f} MB")
    return 0 if exact else 1


if __name__ == "__main__":
    sys.exit(main())
