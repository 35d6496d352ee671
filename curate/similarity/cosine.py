"""Cosine search over L2-normalised embeddings: pairs within one set and across two sets.

Up to ``exact_max`` rows every pair is compared (blocked matrix products). Beyond that the rows
are partitioned by spherical k-means and compared within clusters, each row joining its
``probes`` nearest clusters (SemDeDup, Abbas et al. 2023, arXiv 2303.09540, compares within one
cluster; extra probes recover pairs split by a cluster border): every pair reported is real, a
pair split across clusters none of its rows probes is missed.

The exact comparisons run on FAISS (``IndexFlatIP`` range search) when it is installed, else on
NumPy; both give the same pairs. Measured with bench/cosine_search.py (20k and 200k CLIP-like
512-d rows, cosine >= 0.99, one run on 2 shared cores): FAISS's flat search took about half the
time of the NumPy matrix products, its k-means about half the time of ours with the same
objective. ``backend`` names the engine ("numpy", "faiss" or "auto": FAISS when importable).
"""
from __future__ import annotations

from typing import Any

import numpy as np

from .hamming import Pairs, _empty_pairs, _sorted_pairs

# Similarities computed per block (bounds memory: 4 bytes each).
BLOCK = 8_000_000


BACKENDS = ("auto", "numpy", "faiss")


def _faiss(backend: str) -> Any:
    """The faiss module for this backend, or None for NumPy."""
    if backend not in BACKENDS:
        raise ValueError(f"backend must be one of {', '.join(BACKENDS)}, got {backend!r}")
    if backend == "numpy":
        return None
    try:
        import faiss
    except ImportError:
        if backend == "faiss":
            raise
        return None
    return faiss


def _faiss_range(faiss: Any, q: np.ndarray, x: np.ndarray, threshold: float) -> tuple[np.ndarray, np.ndarray,
                                                                                     np.ndarray]:
    """(row of q, row of x, cosine) of every pair with cosine >= threshold, by a flat FAISS index."""
    index = faiss.IndexFlatIP(x.shape[1])
    index.add(x)
    # FAISS keeps results strictly above the radius: ask from just below, then apply >=.
    lims, sims, ids = index.range_search(q, float(np.nextafter(np.float32(threshold), np.float32(-2))))
    qi = np.repeat(np.arange(q.shape[0], dtype=np.int64), np.diff(lims).astype(np.int64))
    keep = sims >= threshold
    return qi[keep], ids[keep].astype(np.int64), sims[keep].astype(np.float32)


def _block_pairs(x: np.ndarray, ids: np.ndarray, threshold: float, faiss: Any = None) -> Pairs:
    """All pairs of rows of x (named by ids) with x_a . x_b >= threshold, ids[a] < ids[b]."""
    n = x.shape[0]
    if faiss is not None and n:
        a, b, sims = _faiss_range(faiss, x, x, threshold)
        keep = b > a
        ia, ib = ids[a[keep]], ids[b[keep]]
        return _sorted_pairs(np.minimum(ia, ib), np.maximum(ia, ib), sims[keep])
    step = max(1, BLOCK // max(n, 1))
    out_i, out_j, out_d = [], [], []
    for s in range(0, n, step):
        sims = x[s : s + step] @ x.T
        a, b = np.nonzero(sims >= threshold)
        a_abs = a + s
        keep = b > a_abs
        ia, ib = ids[a_abs[keep]], ids[b[keep]]
        out_i.append(np.minimum(ia, ib))
        out_j.append(np.maximum(ia, ib))
        out_d.append(sims[a[keep], b[keep]].astype(np.float32))
    if not out_i:
        return _empty_pairs(np.float32)
    return _sorted_pairs(np.concatenate(out_i), np.concatenate(out_j), np.concatenate(out_d))


def spherical_kmeans(x: np.ndarray, k: int, seed: int = 0, iters: int = 12, per_centroid: int = 64) -> np.ndarray:
    """k unit centroids (cosine k-means, Lloyd iterations) trained on at most per_centroid*k rows."""
    rng = np.random.default_rng(seed)
    n = x.shape[0]
    train = x[rng.choice(n, size=min(n, per_centroid * k), replace=False)] if n > per_centroid * k else x
    cent = train[rng.choice(train.shape[0], size=k, replace=False)].copy()
    for _ in range(iters):
        lab = nearest_centroids(train, cent, 1)[:, 0]
        sums = np.zeros_like(cent)
        np.add.at(sums, lab, train)
        norms = np.linalg.norm(sums, axis=1, keepdims=True)
        empty = norms[:, 0] == 0
        cent = np.where(empty[:, None], cent, sums / np.where(norms == 0, 1, norms))
    return cent


def nearest_centroids(x: np.ndarray, cent: np.ndarray, p: int) -> np.ndarray:
    """(n, p) indices of each row's p most similar centroids."""
    out = np.empty((x.shape[0], p), dtype=np.int64)
    step = max(1, BLOCK // max(cent.shape[0], 1))
    for s in range(0, x.shape[0], step):
        sims = x[s : s + step] @ cent.T
        if p == 1:
            out[s : s + step, 0] = sims.argmax(axis=1)
        else:
            out[s : s + step] = np.argpartition(-sims, p - 1, axis=1)[:, :p]
    return out


def _cluster_members(near: np.ndarray) -> list[np.ndarray]:
    """Rows of each cluster, from each row's probed clusters."""
    n = near.shape[0]
    rows = np.repeat(np.arange(n), near.shape[1])
    lab = near.ravel()
    order = np.argsort(lab, kind="stable")
    bounds = np.flatnonzero(np.diff(lab[order])) + 1
    return np.split(rows[order], bounds)


def cosine_pairs(emb: Any, threshold: float, clusters: int | None = None, probes: int = 2,
                 exact_max: int = 20_000, seed: int = 0, backend: str = "auto") -> Pairs:
    """Pairs i < j of L2-normalised rows with cosine >= threshold (distance column = cosine).

    Exact up to ``exact_max`` rows; beyond, searched within k-means clusters (``clusters``
    centroids, default sqrt(n)), each row in its ``probes`` nearest. Deterministic for a seed.
    """
    x = np.ascontiguousarray(emb, dtype=np.float32)
    n = x.shape[0]
    fx = _faiss(backend)
    if n < 2:
        return _empty_pairs(np.float32)
    if n <= exact_max:
        return _block_pairs(x, np.arange(n), threshold, fx)
    k = int(clusters or max(2, round(np.sqrt(n))))
    cent = spherical_kmeans(x, k, seed)
    parts = [_block_pairs(x[m], m, threshold, fx) for m in _cluster_members(nearest_centroids(x, cent, min(probes, k)))
             if m.shape[0] >= 2]
    parts = [p for p in parts if len(p)]
    if not parts:
        return _empty_pairs(np.float32)
    i, j, d = (np.concatenate(v) for v in zip(*parts))
    _, first = np.unique(i * n + j, return_index=True)
    return _sorted_pairs(i[first], j[first], d[first])


def cross_cosine(a: Any, b: Any, threshold: float, block: int | None = None, backend: str = "auto") -> Pairs:
    """Every (i in a, j in b) with cosine(a_i, b_j) >= threshold, exactly (FAISS flat search, or
    blocked matrix products of ``block`` rows of a at a time, default BLOCK similarities per block)."""
    a = np.ascontiguousarray(a, dtype=np.float32)
    b = np.ascontiguousarray(b, dtype=np.float32)
    fx = _faiss(backend)
    if fx is not None and a.shape[0] and b.shape[0]:
        return _sorted_pairs(*_faiss_range(fx, a, b, threshold))
    block = block or max(1, BLOCK // max(b.shape[0], 1))
    ii, jj, ss = [], [], []
    for s in range(0, a.shape[0], block):
        sim = a[s : s + block] @ b.T
        i, j = np.nonzero(sim >= threshold)
        ii.append(i + s)
        jj.append(j)
        ss.append(sim[i, j].astype(np.float32))
    if not ii:
        return _empty_pairs(np.float32)
    return _sorted_pairs(np.concatenate(ii), np.concatenate(jj), np.concatenate(ss))
