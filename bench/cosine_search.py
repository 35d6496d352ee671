"""Cosine search for semantic duplicates: NumPy (curate.similarity.cosine) against FAISS.

Synthetic CLIP-like embeddings (512-d float32, L2-normalised): a shared mean direction (image
embeddings of one model are far from isotropic; common practice puts unrelated pairs at cosine
0.4-0.6), topic clusters around it, and planted near-copies at cosine 0.985-0.9995 around the
neardup default of 0.99. Each method runs in a forked child, so its peak memory is its own.

Exact search (every pair): NumPy blocked matrix products vs faiss.IndexFlatIP.range_search.
Clustered search (SemDeDup-style, n > exact_max): NumPy spherical k-means + probes vs
faiss.Kmeans + IndexIVFFlat (nprobe) range search; and the k-means step alone.
Ground truth is exact search (on a sample of rows when --sample is given: pairs touching them).

    .venv/bin/python bench/cosine_search.py --n 20000 200000 [--json]
"""
from __future__ import annotations

import argparse
import json
import multiprocessing as mp
import resource
import sys
import time
from pathlib import Path
from typing import Any, Callable

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from curate.similarity import cosine  # noqa: E402

DIM = 512


def make_embeddings(n: int, seed: int, copies: float = 0.05) -> np.ndarray:
    """Clusters around a shared direction, plus planted near-copies of a share of the rows."""
    rng = np.random.default_rng(seed)
    mean = rng.standard_normal(DIM).astype(np.float32)
    mean /= np.linalg.norm(mean)
    topics = rng.standard_normal((max(2, n // 50), DIM)).astype(np.float32)
    topics /= np.linalg.norm(topics, axis=1, keepdims=True)
    lab = rng.integers(0, topics.shape[0], n)
    noise = rng.standard_normal((n, DIM)).astype(np.float32)
    noise /= np.linalg.norm(noise, axis=1, keepdims=True)
    x = 0.7 * mean + 0.45 * topics[lab] + 0.55 * noise
    x /= np.linalg.norm(x, axis=1, keepdims=True)
    k = int(n * copies)
    src, dst = rng.choice(n, k, replace=False), rng.choice(n, k, replace=False)
    # Copy noise scale s gives cosine about 1 / sqrt(1 + s^2): 0.03..0.17 -> 0.9995..0.985.
    s = rng.uniform(0.03, 0.17, k).astype(np.float32)[:, None]
    eps = rng.standard_normal((k, DIM)).astype(np.float32)
    eps /= np.linalg.norm(eps, axis=1, keepdims=True)
    x[dst] = x[src] + s * eps
    x[dst] /= np.linalg.norm(x[dst], axis=1, keepdims=True)
    return np.ascontiguousarray(x, dtype=np.float32)


def _rss_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def _child(fn: Callable, args: tuple, q: Any) -> None:
    start = _rss_mb()
    t = time.perf_counter()
    out = fn(*args)
    q.put((time.perf_counter() - t, _rss_mb() - start, out))


def measured(fn: Callable, *args: Any) -> tuple[float, float, Any]:
    """(seconds, peak memory growth in MB, result) of fn(*args) run in a forked child."""
    ctx = mp.get_context("fork")
    q = ctx.Queue()
    p = ctx.Process(target=_child, args=(fn, args, q))
    p.start()
    res = q.get()
    p.join()
    return res


# --------------------------------------------------------------------------- methods -> set of pairs


def _as_set(i: np.ndarray, j: np.ndarray) -> set:
    a, b = np.minimum(i, j), np.maximum(i, j)
    keep = a != b
    return set(zip(a[keep].tolist(), b[keep].tolist()))


def numpy_exact(x: np.ndarray, t: float, rows: np.ndarray | None) -> set:
    if rows is None:
        p = cosine.cosine_pairs(x, t, exact_max=x.shape[0])
        return _as_set(p.i, p.j)
    p = cosine.cross_cosine(x[rows], x, t)
    return _as_set(rows[p.i], p.j)


def faiss_exact(x: np.ndarray, t: float, rows: np.ndarray | None) -> set:
    import faiss

    index = faiss.IndexFlatIP(x.shape[1])
    index.add(x)
    q = x if rows is None else x[rows]
    lims, sims, ids = index.range_search(q, float(np.nextafter(np.float32(t), np.float32(-1))))
    qi = np.repeat(np.arange(q.shape[0]) if rows is None else rows, np.diff(lims).astype(np.int64))
    keep = sims >= t
    return _as_set(qi[keep], ids[keep])


def numpy_clustered(x: np.ndarray, t: float, k: int, probes: int) -> set:
    p = cosine.cosine_pairs(x, t, clusters=k, probes=probes, exact_max=0)
    return _as_set(p.i, p.j)


def faiss_ivf(x: np.ndarray, t: float, k: int, probes: int) -> set:
    import faiss

    km = faiss.Kmeans(x.shape[1], k, niter=12, spherical=True, seed=1, max_points_per_centroid=64, verbose=False)
    km.train(x)
    quant = faiss.IndexFlatIP(x.shape[1])
    quant.add(km.centroids)
    ivf = faiss.IndexIVFFlat(quant, x.shape[1], k, faiss.METRIC_INNER_PRODUCT)
    ivf.is_trained = True
    ivf.add(x)
    ivf.nprobe = probes
    lims, sims, ids = ivf.range_search(x, float(np.nextafter(np.float32(t), np.float32(-1))))
    qi = np.repeat(np.arange(x.shape[0]), np.diff(lims).astype(np.int64))
    keep = sims >= t
    return _as_set(qi[keep], ids[keep])


def numpy_kmeans(x: np.ndarray, k: int) -> float:
    cent = cosine.spherical_kmeans(x, k, seed=0)
    return _objective(x, cent)


def faiss_kmeans(x: np.ndarray, k: int) -> float:
    import faiss

    km = faiss.Kmeans(x.shape[1], k, niter=12, spherical=True, seed=1, max_points_per_centroid=64, verbose=False)
    km.train(x)
    return _objective(x, km.centroids)


def _objective(x: np.ndarray, cent: np.ndarray) -> float:
    """Mean cosine of each row to its nearest centroid (higher = tighter clusters)."""
    best = np.empty(x.shape[0], np.float32)
    for s in range(0, x.shape[0], 8192):
        best[s : s + 8192] = (x[s : s + 8192] @ cent.T).max(axis=1)
    return float(best.mean())


# --------------------------------------------------------------------------- report


def run(n: int, t: float, probes: int, sample: int, seed: int) -> dict:
    x = make_embeddings(n, seed)
    k = max(2, round(np.sqrt(n)))
    rows = None
    if sample and sample < n:
        rows = np.sort(np.random.default_rng(seed + 1).choice(n, sample, replace=False))
    out: dict[str, Any] = {"n": n, "threshold": t, "clusters": k, "probes": probes,
                           "truth_rows": n if rows is None else int(rows.shape[0])}
    s_np, m_np, truth = measured(numpy_exact, x, t, rows)
    s_fx, m_fx, got_fx = measured(faiss_exact, x, t, rows)
    scale = 1.0 if rows is None else n / rows.shape[0]
    out["exact"] = {"numpy_s": round(s_np * scale, 2), "numpy_peak_mb": round(m_np, 1),
                    "faiss_s": round(s_fx * scale, 2), "faiss_peak_mb": round(m_fx, 1),
                    "estimated_from_sample": rows is not None, "pairs": len(truth), "same_pairs": got_fx == truth}

    def touching(p: set) -> set:
        if rows is None:
            return p
        rs = set(rows.tolist())
        return {q for q in p if q[0] in rs or q[1] in rs}

    for name, fn in (("numpy_clustered", numpy_clustered), ("faiss_ivf", faiss_ivf)):
        s, m, got = measured(fn, x, t, k, probes)
        sub = touching(got)
        out[name] = {"s": round(s, 2), "peak_mb": round(m, 1), "pairs": len(got),
                     "recall": round(len(sub & truth) / max(1, len(truth)), 4), "false": len(sub - truth)}
    for name, fn in (("numpy_kmeans", numpy_kmeans), ("faiss_kmeans", faiss_kmeans)):
        s, m, obj = measured(fn, x, k)
        out[name] = {"s": round(s, 2), "peak_mb": round(m, 1), "mean_cos_to_centroid": round(obj, 4)}
    return out


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, nargs="+", default=[20_000, 200_000], help="rows per run")
    ap.add_argument("--threshold", type=float, default=0.99, help="cosine (neardup's default)")
    ap.add_argument("--probes", type=int, default=2, help="clusters searched per row (neardup's default)")
    ap.add_argument("--sample", type=int, default=5000,
                    help="exact ground truth from this many rows when n is larger (0: all rows)")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--json", action="store_true", help="one JSON line per n")
    args = ap.parse_args(argv)
    for n in args.n:
        r = run(n, args.threshold, args.probes, args.sample if n > args.sample * 4 else 0, args.seed)
        if args.json:
            print(json.dumps(r))
            continue
        e = r["exact"]
        est = " (estimated from a row sample)" if e["estimated_from_sample"] else ""
        print(f"n={n:,} cosine>={r['threshold']} k={r['clusters']} probes={r['probes']}: {e['pairs']:,} true pairs"
              f" on {r['truth_rows']:,} rows")
        print(f"  exact      numpy {e['numpy_s']:8.2f} s {e['numpy_peak_mb']:7.1f} MB | faiss flat {e['faiss_s']:8.2f} s "
              f"{e['faiss_peak_mb']:7.1f} MB | same pairs: {e['same_pairs']}{est}")
        for name in ("numpy_clustered", "faiss_ivf"):
            c = r[name]
            print(f"  {name:16s} {c['s']:8.2f} s {c['peak_mb']:7.1f} MB  recall {c['recall']:.4f}  false {c['false']}")
        for name in ("numpy_kmeans", "faiss_kmeans"):
            c = r[name]
            print(f"  {name:16s} {c['s']:8.2f} s {c['peak_mb']:7.1f} MB  mean cosine to centroid {c['mean_cos_to_centroid']}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
