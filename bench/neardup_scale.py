"""Near-duplicate grouping at scale: exact code search + leader groups on synthetic 64-bit codes.

N samples with V identity views and T transformed views each (default 1 and 0: N codes), and a
check code per view (as the default code settings make; --no-check: none). Views of one sample
differ by about 14 bits (the median between crop views of the public photos in bench/photoset.py);
a tenth of the samples are replaced by copies of others with 0..radius+2 bits flipped per view
(some just past the radius, so the boundary is tested) and 0..check_radius+4 per check code, and
with T > 0 half of those copies are "mirrored": their identity views are the source's transformed
views and back. Every sample gets a random keeper rank.

Timed: ``curate.similarity.group`` (code graph by multi-index search, then greedy leaders).
``exact`` checks the groups against brute force for a sample of rows: every distance from the row
to all N samples is computed (closest allowed view pair), and the row must be a leader exactly
when no better-ranked leader is within the radius, else belong to the best-ranked such leader,
at the reported distance. ``brute_force_seconds`` is the brute-force pair scan over all samples,
estimated from the rate of that check (or of FAISS's flat binary scan, whichever is faster).
With ``--compare``, the same run also times the pair search alone (``range_pairs``, what this
bench timed before groups had a diameter; ``--components`` adds union-find components).
With ``--faiss``, FAISS's IndexBinaryMultiHash range search is timed on the identity codes.

    .venv/bin/python bench/neardup_scale.py --n 1000000 --json
prints one JSON line: seconds, exact, brute_force_seconds, pairs..., peak_rss_mb, ...
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

from curate import similarity  # noqa: E402
from curate.similarity import hamming  # noqa: E402

RADIUS = 8  # neardup's default radius (bits of 64)
CHECK_RADIUS = similarity.CHECK_RADIUS  # the default check radius (bits of 64)
VIEW_FLIPS = 14  # bits between two views of one sample (median over the public photos' crop views)


def _flip(codes: np.ndarray, nbits: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Each code with up to nbits random bits flipped (repeats cancel, so sometimes fewer)."""
    flips = np.zeros(codes.shape, np.uint64)
    for step in range(int(nbits.max(initial=0))):
        bit = rng.integers(0, 64, codes.shape).astype(np.uint64)
        flips ^= np.where(nbits > step, np.uint64(1) << bit, np.uint64(0))
    return codes ^ flips


def synthetic_codes(n: int, views: int, transformed: int, radius: int, check_radius: int | None,
                    seed: int) -> tuple[np.ndarray, np.ndarray | None]:
    """(n, views + transformed) codes and check codes with planted copies (see the module docstring)."""
    rng = np.random.default_rng(seed)
    base = rng.integers(0, np.iinfo(np.uint64).max, size=(n, 1), dtype=np.uint64, endpoint=True)
    ident = np.repeat(base, views, axis=1)
    if views > 1:
        ident[:, 1:] = _flip(ident[:, 1:], np.full((n, views - 1), VIEW_FLIPS), rng)
    trans = rng.integers(0, np.iinfo(np.uint64).max, size=(n, transformed), dtype=np.uint64, endpoint=True)
    codes = np.concatenate([ident, trans], axis=1)
    checks = None
    if check_radius is not None:
        checks = rng.integers(0, np.iinfo(np.uint64).max, size=codes.shape, dtype=np.uint64, endpoint=True)
    k = n // 10
    src, dst = rng.integers(0, n, k), rng.integers(0, n, k)
    perm = np.arange(codes.shape[1])
    mirrored = np.zeros(k, bool)
    if transformed:
        mirrored = rng.random(k) < 0.5
        t = min(views, transformed)
        perm[:t], perm[views : views + t] = np.arange(views, views + t), np.arange(t)
    copy = np.where(mirrored[:, None], codes[src][:, perm], codes[src])
    codes[dst] = _flip(copy, np.broadcast_to(rng.integers(0, radius + 3, (k, 1)), copy.shape), rng)
    if checks is not None:
        ccopy = np.where(mirrored[:, None], checks[src][:, perm], checks[src])
        checks[dst] = _flip(ccopy, np.broadcast_to(rng.integers(0, check_radius + 5, (k, 1)), ccopy.shape), rng)
    return codes, checks


def peak_rss_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def check_groups(codes: np.ndarray, checks: np.ndarray | None, cr: int, ident: int | None, rank: np.ndarray,
                 g: similarity.Groups, radius: int, queries: np.ndarray) -> tuple[bool, float]:
    """The leader rule checked by brute force at each query row; (all hold, seconds)."""
    t = time.perf_counter()
    ok = True
    pos = np.empty(rank.shape[0], np.int64)
    pos[np.lexsort((np.arange(rank.shape[0]), rank))] = np.arange(rank.shape[0])
    is_leader = g.leader == np.arange(rank.shape[0])
    for q in queries.tolist():
        d = np.concatenate([
            hamming.min_distances(np.broadcast_to(codes[q], codes[s : s + (1 << 20)].shape), codes[s : s + (1 << 20)], ident,
                                  None if checks is None else np.broadcast_to(checks[q], checks[s : s + (1 << 20)].shape),
                                  None if checks is None else checks[s : s + (1 << 20)], cr)
            for s in range(0, codes.shape[0], 1 << 20)])
        near = np.flatnonzero(d <= radius)
        near = near[near != q]
        lower = near[is_leader[near] & (pos[near] < pos[q])]
        if g.leader[q] == q:
            ok &= lower.shape[0] == 0
        else:
            best = lower[np.argmin(pos[lower])] if lower.shape[0] else -1
            ok &= bool(best == g.leader[q]) and int(d[g.leader[q]]) == int(g.distance[q])
    return bool(ok), time.perf_counter() - t


def faiss_flat_rate(codes: np.ndarray, radius: int, nq: int) -> float | None:
    """Code comparisons per second of FAISS's flat binary range search (None if unavailable)."""
    try:
        import faiss
    except ImportError:
        return None
    db = np.ascontiguousarray(codes).view(np.uint8).reshape(-1, 8)
    index = faiss.IndexBinaryFlat(64)
    index.add(db)
    t = time.perf_counter()
    index.range_search(db[:nq], radius + 1)  # FAISS keeps distances < its radius argument
    return nq * codes.shape[0] / max(time.perf_counter() - t, 1e-9)


def faiss_multihash(codes: np.ndarray, radius: int, nhash: int, nflip: int) -> tuple[float, set]:
    """(seconds, pairs i < j) of FAISS IndexBinaryMultiHash range search over all codes."""
    import faiss

    db = np.ascontiguousarray(codes).view(np.uint8).reshape(-1, 8)
    t = time.perf_counter()
    index = faiss.IndexBinaryMultiHash(64, nhash, 64 // nhash)
    index.nflip = nflip
    index.add(db)
    lims, _, ids = index.range_search(db, radius + 1)
    seconds = time.perf_counter() - t
    qi = np.repeat(np.arange(db.shape[0]), np.diff(lims).astype(np.int64))
    keep = ids > qi
    return seconds, set(zip(qi[keep].tolist(), ids[keep].tolist()))


def compare(codes: np.ndarray, checks: np.ndarray | None, cr: int, ident: int | None, radius: int,
            threads: int, components: bool) -> dict:
    """Pair search alone (and union-find components) over the same codes, timed in this run."""
    t = time.perf_counter()
    if codes.shape[1] == 1 and checks is None:
        p = similarity.range_pairs(codes[:, 0], radius, threads=threads)
    else:
        p = similarity.sample_pairs(codes, radius, ident, checks, cr, threads=threads)
    out = {"search_only_seconds": round(time.perf_counter() - t, 2), "sample_pairs": len(p)}
    if components:
        t = time.perf_counter()
        similarity.sample_components(codes, radius, ident, checks, cr, threads=threads)
        out["components_seconds"] = round(time.perf_counter() - t, 2)
    return out


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=1_000_000, help="number of samples")
    ap.add_argument("--views", type=int, default=1, help="identity views (codes) per sample")
    ap.add_argument("--transformed", type=int, default=0, help="transformed views per sample")
    ap.add_argument("--all-pairs", action="store_true", help="compare every view pair (no identity side)")
    ap.add_argument("--radius", type=int, default=RADIUS, help="Hamming radius (default: neardup's)")
    ap.add_argument("--check-radius", type=int, default=CHECK_RADIUS, help="radius of the check codes")
    ap.add_argument("--no-check", action="store_true", help="no check codes")
    ap.add_argument("--threads", type=int, default=2, help="substring tables searched side by side")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--check", type=int, default=0, help="rows checked against brute force (0: auto)")
    ap.add_argument("--compare", action="store_true", help="also time the pair search alone")
    ap.add_argument("--components", action="store_true", help="with --compare: also union-find components")
    ap.add_argument("--faiss", action="store_true", help="also time FAISS IndexBinaryMultiHash (views=1 only)")
    ap.add_argument("--json", action="store_true", help="print one JSON line")
    args = ap.parse_args(argv)

    n, r = args.n, args.radius
    cr = 64 if args.no_check else args.check_radius
    codes, checks = synthetic_codes(n, args.views, args.transformed, r, None if args.no_check else cr, args.seed)
    ident = None if args.all_pairs or not args.transformed else args.views
    rank = np.random.default_rng(args.seed + 2).permutation(n)
    rss_before = peak_rss_mb()
    t = time.perf_counter()
    sig = similarity.Signals(codes=codes, identity=ident, radius=r, checks=checks, check_radius=cr)
    g = similarity.group(rank, sig, threads=args.threads)
    seconds = time.perf_counter() - t
    rss_search = peak_rss_mb()

    rng = np.random.default_rng(args.seed + 1)
    k = codes.shape[1]
    allowed = k * k if ident is None else k * k - (k - ident) ** 2
    nq = args.check or int(max(50, min(2000, 3e9 / (n * allowed))))
    grouped = np.flatnonzero(g.sizes() > 1)
    queries = np.unique(np.concatenate([rng.choice(n, min(n, nq // 2), replace=False),
                                        rng.choice(grouped, min(nq - nq // 2, grouped.shape[0]), replace=False)]))
    exact, check_s = check_groups(codes, checks, cr, ident, rank, g, r, queries)
    numpy_rate = queries.shape[0] * n * allowed / check_s
    faiss_rate = faiss_flat_rate(codes.reshape(-1), r, max(10, min(200, int(2e9 / (n * k)))))
    brute_s = n * (n - 1) / 2 * allowed / max(numpy_rate, faiss_rate or 0.0)
    members = g.leader != np.arange(n)
    result = {
        "n": n, "codes_per_sample": k, "identity_views": ident if ident is not None else k, "codes": n * k,
        "check_codes": checks is not None, "radius": r, "check_radius": cr, "threads": args.threads, "seconds": round(seconds, 2), "exact": bool(exact),
        "checked_rows": int(queries.shape[0]), "brute_force_seconds": round(brute_s, 1),
        "brute_force_estimated": True, "speedup": round(brute_s / max(seconds, 1e-9), 1),
        "groups_of_2_plus": int(np.unique(g.leader[members]).shape[0]), "members": int(members.sum()),
        "max_member_distance": int(g.distance[members].max(initial=0)), "rounds": g.rounds,
        "peak_rss_mb": round(rss_search, 1), "rss_before_search_mb": round(rss_before, 1),
    }
    if args.compare:
        result.update(compare(codes, checks, cr, ident, r, args.threads, args.components))
    if args.faiss and k == 1:
        ref = similarity.range_pairs(codes[:, 0], r, threads=args.threads)
        want = set(zip(ref.i.tolist(), ref.j.tolist()))
        for nhash, nflip in ((4, r // 4),):  # pigeonhole: within r bits, some 16-bit part within r // 4
            s, got = faiss_multihash(codes[:, 0], r, nhash, nflip)
            result[f"faiss_multihash_{nhash}x{64 // nhash}_seconds"] = round(s, 2)
            result[f"faiss_multihash_{nhash}x{64 // nhash}_same_pairs"] = got == want
    if args.json:
        print(json.dumps(result))
    else:
        print(f"{n:,} samples x {k} codes ({result['identity_views']} identity, check codes: {checks is not None}), "
              f"radius {r}: {seconds:.1f} s for "
              f"groups on {args.threads} threads, {result['members']:,} members in {result['groups_of_2_plus']:,} groups, "
              f"{g.rounds} rounds; exact vs brute force on {result['checked_rows']:,} rows: {exact}")
        print(f"brute force (estimated) {brute_s:,.0f} s -> {result['speedup']}x faster; peak RSS {rss_search:,.0f} MB")
        for key in ("search_only_seconds", "components_seconds"):
            if key in result:
                print(f"{key}: {result[key]}")
        for key, v in result.items():
            if key.startswith("faiss_"):
                print(f"{key}: {v}")
    return 0 if exact else 1


if __name__ == "__main__":
    sys.exit(main())
