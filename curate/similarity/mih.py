"""Multi-index hashing: the engine behind the exact Hamming range search of ``hamming``.

Norouzi, Punjani & Fleet, CVPR 2012: the 64 bits are cut into m substrings; if two codes are within
r = m*q + a bits, then one of the first a+1 substrings is within q bits or one of the others is
within q-1 bits (pigeonhole). Each substring table is a sorted array addressed directly by the
substring value; every table's neighbours are enumerated bucket against bucket with numpy,
verified with popcount, and a pair is kept only by the first table that can find it, so no pair is
reported twice. Works on distinct codes; ``hamming`` maps them back to positions.
"""
from __future__ import annotations

import copy
import itertools
from typing import Iterator

import numpy as np

BITS = 64
# Below this many candidate pairs a quadratic scan is cheaper than building tables (common practice).
BRUTE_MAX_PAIRS = 4_000_000
# Pairs checked per block in quadratic scans and candidate expansion (bounds memory: about 60 bytes
# per candidate expanded).
BLOCK_PAIRS = 1_000_000
# Widest substring addressed by a direct table (2**24 int32 entries = 64 MiB).
MAX_TABLE_BITS = 24

Join = tuple[np.ndarray, np.ndarray, np.ndarray]


def _empty_join() -> Join:
    return np.empty(0, np.int64), np.empty(0, np.int64), np.empty(0, np.int16)


def popcount_distance(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Element-wise Hamming distance of uint64 arrays (numpy broadcasting), int16."""
    return np.bitwise_count(np.bitwise_xor(a, b)).astype(np.int16)


def _apart(tags: np.ndarray | None, i: np.ndarray, j: np.ndarray) -> np.ndarray | slice:
    """Which pairs (i, j) to report: those whose tags differ or are negative (every pair without tags)."""
    if tags is None:
        return slice(None)
    ti = tags[i]
    return (ti != tags[j]) | (ti < 0)


def brute_join(a: np.ndarray, b: np.ndarray | None, radius: int, tags: np.ndarray | None = None) -> Join:
    """Quadratic scan in blocks: every (i, j) within radius (b None: pairs i < j within a, leaving out
    pairs of two codes with the same non-negative ``tags``)."""
    other = a if b is None else b
    out_i, out_j, out_d = [], [], []
    step = max(1, BLOCK_PAIRS // max(other.shape[0], 1))
    for s in range(0, a.shape[0], step):
        d = popcount_distance(a[s : s + step, None], other[None, :])
        ii, jj = np.nonzero(d <= radius)
        if b is None:
            keep = jj > ii + s
            ii, jj = ii[keep], jj[keep]
            keep = _apart(tags, ii + s, jj)
            ii, jj = ii[keep], jj[keep]
        out_i.append(ii + s)
        out_j.append(jj)
        out_d.append(d[ii, jj])
    if not out_i:
        return _empty_join()
    return np.concatenate(out_i).astype(np.int64), np.concatenate(out_j).astype(np.int64), np.concatenate(out_d)


def _popcount(x: np.ndarray) -> np.ndarray:
    return np.bitwise_count(x)


def _blocks(m: int) -> list[tuple[int, int]]:
    """m substrings (shift, width) covering the 64 bits, most significant first, widest first."""
    base, extra = divmod(BITS, m)
    out, shift = [], BITS
    for k in range(m):
        w = base + (1 if k < extra else 0)
        shift -= w
        out.append((shift, w))
    return out


def _radii(m: int, radius: int) -> list[int]:
    """Per-substring radius (Norouzi et al. 2012, Prop. 2): radius = m*q + a; the first a+1
    substrings are searched within q bits and the others within q-1 (-1: table not needed)."""
    q, a = divmod(radius, m)
    return [q if k <= a else q - 1 for k in range(m)]


def _ball_size(width: int, r: int) -> int:
    from math import comb

    return sum(comb(width, j) for j in range(0, max(r, -1) + 1))


def _patterns(width: int, r: int) -> np.ndarray:
    """Every width-bit mask with 0..r bits set (the XOR patterns a substring may differ by)."""
    out = [0]
    for j in range(1, r + 1):
        for bits in itertools.combinations(range(width), j):
            v = 0
            for b in bits:
                v |= 1 << b
            out.append(v)
    return np.array(out, dtype=np.int64)


# Relative costs per unit, measured on this project's 2-core machine (see bench/neardup_scale.py).
_COST_PAIR_SCAN = 1.0  # one pair in a quadratic scan
_COST_PROBE = 6.0  # one (bucket, pattern) lookup
_COST_CANDIDATE = 12.0  # one candidate pair expanded and verified
_COST_SORT = 60.0  # one code sorted into one table


def _plan(n_a: int, n_b: int, radius: int, self_join: bool) -> int:
    """Number of substrings m with the lowest estimated cost; 0 means a quadratic scan is cheaper."""
    pairs = n_a * n_b / (2.0 if self_join else 1.0)
    best_m, best = 0, pairs * _COST_PAIR_SCAN
    if pairs <= BRUTE_MAX_PAIRS:
        return 0
    for m in range(1, 17):
        blocks, radii = _blocks(m), _radii(m, radius)
        if blocks[0][1] > 62 and radii[0] > 0:
            continue
        if any(r > 4 for r in radii):
            continue  # pattern lists past 4 flipped bits are never the cheap choice at 64 bits
        cost = 0.0
        for (_, w), r in zip(blocks, radii):
            if r < 0:
                continue
            ball = _ball_size(w, r)
            buckets = min(float(n_a), 2.0**w)
            probe = _COST_PROBE * (1.0 if w <= MAX_TABLE_BITS else 4.0)
            cost += buckets * ball * probe / (2.0 if self_join else 1.0)
            cost += pairs * ball / 2.0**w * _COST_CANDIDATE
            cost += (n_a + (0 if self_join else n_b)) * _COST_SORT
        if cost < best:
            best_m, best = m, cost
    return best_m


class _Table:
    """One substring of a set of codes: the order that sorts them by substring, with bucket
    boundaries (positions below are in that order; ``code`` reads the codes there)."""

    def __init__(self, codes: np.ndarray, shift: int, width: int, direct: bool):
        if width >= BITS:
            sub = codes.view(np.int64)
        else:
            sub = ((codes >> np.uint64(shift)) & np.uint64((1 << width) - 1)).astype(np.int64)
        self.order = np.argsort(sub, kind="stable")
        ss = sub[self.order]
        if codes.shape[0] < 2**31:
            self.order = self.order.astype(np.int32)
        self.source = codes
        n = ss.shape[0]
        if n:
            self.starts = np.flatnonzero(np.concatenate(([True], ss[1:] != ss[:-1])))
        else:
            self.starts = np.empty(0, np.int64)
        self.counts = np.diff(np.append(self.starts, n))
        self.values = ss[self.starts]
        self.width = width
        self.index: np.ndarray | None = None
        if direct:
            self.index = np.full(1 << width, -1, dtype=np.int32)
            self.index[self.values] = np.arange(self.values.shape[0], dtype=np.int32)

    def code(self, pos: np.ndarray) -> np.ndarray:
        """The codes at sorted positions."""
        return self.source[self.order[pos]]

    def lookup(self, keys: np.ndarray) -> np.ndarray:
        """Bucket number of each substring value, -1 where no code has it."""
        if self.index is not None:
            return self.index[keys]
        pos = np.searchsorted(self.values, keys)
        pos = np.minimum(pos, max(self.values.shape[0] - 1, 0))
        found = self.values.shape[0] > 0
        return np.where(found & (self.values[pos] == keys), pos, -1) if found else np.full(keys.shape, -1)


# Bucket pairs with at most this many candidates are expanded level by level (no index arithmetic).
_SMALL_PAIR = 16


def _expand(a_start: np.ndarray, a_count: np.ndarray, b_start: np.ndarray, b_count: np.ndarray, triangle: bool = False) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Every (x, y) in the cross product of matched bucket pairs (positions in sorted order), and
    the number of the bucket pair each came from. ``triangle``: a bucket against itself, x < y only."""
    sizes = a_count * b_count
    small = sizes <= _SMALL_PAIR
    xs, ys, ids = [], [], []
    # Small pairs: one pass per (member of a, member of b) level, over the pairs that still have one.
    pa = np.flatnonzero(small)
    la = 0
    while pa.shape[0]:
        lb = 0
        pb = pa
        while pb.shape[0]:
            x, y = a_start[pb] + la, b_start[pb] + lb
            if triangle:  # positions, not levels: a split bucket pairs a slice with the whole
                keep = x < y
                x, y, sel = x[keep], y[keep], pb[keep]
            else:
                sel = pb
            xs.append(x)
            ys.append(y)
            ids.append(sel)
            lb += 1
            pb = pb[b_count[pb] > lb]
        la += 1
        pa = pa[a_count[pa] > la]
    big = np.flatnonzero(~small)
    if big.shape[0]:
        s = sizes[big]
        rep = np.repeat(np.arange(s.shape[0]), s)
        off = np.arange(rep.shape[0], dtype=np.int64) - np.repeat(np.cumsum(s) - s, s)
        src = big[rep]
        cb = b_count[src]
        x = a_start[src] + off // cb
        y = b_start[src] + off % cb
        if triangle:
            keep = x < y
            x, y, src = x[keep], y[keep], src[keep]
        xs.append(x)
        ys.append(y)
        ids.append(src)
    if not xs:
        e = np.empty(0, np.int64)
        return e, e, e
    return np.concatenate(xs), np.concatenate(ys), np.concatenate(ids)


def _chunks(a_start, a_count, b_start, b_count) -> Iterator[tuple[np.ndarray, ...]]:
    """Split matched bucket pairs into pieces of at most about BLOCK_PAIRS candidates."""
    sizes = a_count * b_count
    big = sizes > BLOCK_PAIRS
    if big.any():
        # A pair of huge buckets: split its first side into single codes.
        reps = a_count[big]
        bs = np.repeat(a_start[big], reps) + (np.arange(reps.sum()) - np.repeat(np.cumsum(reps) - reps, reps))
        a_start = np.concatenate([a_start[~big], bs])
        a_count = np.concatenate([a_count[~big], np.ones(bs.shape[0], np.int64)])
        b_start = np.concatenate([b_start[~big], np.repeat(b_start[big], reps)])
        b_count = np.concatenate([b_count[~big], np.repeat(b_count[big], reps)])
        sizes = a_count * b_count
    csum = np.cumsum(sizes)
    lo = 0
    while lo < sizes.shape[0]:
        base = csum[lo - 1] if lo else 0
        hi = int(np.searchsorted(csum, base + BLOCK_PAIRS, side="right"))
        hi = max(hi, lo + 1)
        yield a_start[lo:hi], a_count[lo:hi], b_start[lo:hi], b_count[lo:hi]
        lo = hi


def _pattern_groups(width: int, r: int) -> list[tuple[int, np.ndarray]]:
    """Patterns grouped by their highest set bit (0 for the empty pattern)."""
    pats = _patterns(width, r)
    hb = np.zeros(pats.shape[0], np.int64)
    nz = pats > 0
    hb[nz] = 1 << (np.floor(np.log2(pats[nz].astype(np.float64))).astype(np.int64))
    return [(int(h), pats[hb == h]) for h in np.unique(hb)]


# Bucket members are laid out level by level (member 0 of every bucket, then member 1, ...) in P
# levels, so a bucket pair is checked in one dense P x P step of contiguous numpy operations.
# Buckets with more than P members take the general path. P is picked per table by this cost model
# (nanoseconds, measured on the project's 2-core machine): gathering one level of one pair, one
# slot of a dense step, and one candidate on the general path.
_PAD_MAX = 12
_NS_TAKE, _NS_SLOT, _NS_GENERAL = 8.0, 2.5, 45.0
# Empty slots: a-side levels hold _FILL and b-side levels its complement, so two empty slots never
# match; an empty slot against a real code may, and is then discarded by its bucket's count.
_FILL = np.uint64(0x5555555555555555)
# Slots of a dense step, P*P per bucket pair (bounds its temporaries to about 16 MiB).
_DENSE_SLOTS = 1 << 21
# Source buckets looked up at once, for every pattern (bounds the lookup temporaries).
_SOURCE_BUCKETS = 1 << 19
# Hits of a dense step resolved at once (bounds the index arrays: about 60 bytes per hit).
_DENSE_HITS = 1 << 18


def _pad_width(counts_a: np.ndarray, counts_b: np.ndarray) -> int:
    """Levels P that minimise the estimated cost of checking random bucket pairs of the two tables."""
    if counts_a.shape[0] == 0 or counts_b.shape[0] == 0:
        return 1
    top = _PAD_MAX + 1
    ha = np.bincount(np.minimum(counts_a, top), minlength=top + 1) / counts_a.shape[0]
    hb = np.bincount(np.minimum(counts_b, top), minlength=top + 1) / counts_b.shape[0]
    # Mean size of the buckets beyond the cap, so the general path's cost is not underestimated.
    big_a = counts_a[counts_a >= top].mean() if ha[top] else top
    big_b = counts_b[counts_b >= top].mean() if hb[top] else top
    size_a = np.arange(top + 1, dtype=np.float64)
    size_b = size_a.copy()
    size_a[top], size_b[top] = big_a, big_b
    joint = ha[:, None] * hb[None, :]
    cands = size_a[:, None] * size_b[None, :]
    best_p, best = 1, np.inf
    for p in range(1, _PAD_MAX + 1):
        fit = joint[: p + 1, : p + 1].sum()
        over = (joint * cands).sum() - (joint[: p + 1, : p + 1] * cands[: p + 1, : p + 1]).sum()
        cost = fit * (2 * p * _NS_TAKE + p * p * _NS_SLOT) + over * _NS_GENERAL
        if cost < best:
            best_p, best = p, cost
    return best_p


def _levels(t: "_Table", p: int, fill: np.uint64) -> np.ndarray:
    """(p, buckets) array: row l holds member l of every bucket, or ``fill`` where it has none."""
    nb = t.values.shape[0]
    out = np.full((p, nb), fill, dtype=np.uint64)
    for lvl in range(p):
        has = np.flatnonzero(t.counts > lvl)
        out[lvl, has] = t.code(t.starts[has] + lvl)
    return out


class _TableJoin:
    """Pairs found by substring table k that no earlier table would find (so each pair once).

    Bucket members are laid out level by level (``_levels``) so a bucket pair whose members fit in
    the P levels is checked in one dense P x P step; larger buckets take the general path.
    """

    def __init__(self, a: np.ndarray, b: np.ndarray | None, k: int, blocks: list[tuple[int, int]],
                 radii: list[int], radius: int, tags: np.ndarray | None = None):
        self.self_join = b is None
        self.tags = tags
        shift, width = blocks[k]
        self.width, self.rk, self.radius = width, radii[k], radius
        n_b = a.shape[0] if self.self_join else b.shape[0]
        direct = width <= 22 or (width <= MAX_TABLE_BITS and (1 << width) <= 16 * n_b)  # index: <= 64 MiB
        self.ta = _Table(a, shift, width, direct and self.self_join)
        self.tb = self.ta if self.self_join else _Table(b, shift, width, direct)
        self.pw = pw = _pad_width(self.ta.counts, self.tb.counts)
        self.lev_a = _levels(self.ta, pw, _FILL)
        # A self-join reads its b side from the same levels and refills the empty slots (``dense``).
        self.lev_b = None if self.self_join else _levels(self.tb, pw, ~_FILL)
        self.fits_a, self.fits_b = self.ta.counts <= pw, self.tb.counts <= pw
        self.earlier = [(np.uint64(s), np.uint64((1 << w) - 1), r) for (s, w), r in zip(blocks[:k], radii[:k]) if r >= 0]
        self.out_i: list[np.ndarray] = []
        self.out_j: list[np.ndarray] = []
        self.out_d: list[np.ndarray] = []
        self.step = step = max(1, _DENSE_SLOTS // (pw * pw))
        # Work buffers reused by every dense step (fresh multi-MiB arrays cost page faults each time).
        self.buf_a = np.empty((pw, step), np.uint64)
        self.buf_b = np.empty((pw, step), np.uint64)
        self.buf_x = np.empty(pw * pw * step, np.uint64)
        self.buf_d = np.empty(pw * pw * step, np.uint8)
        self.buf_m = np.empty(pw * pw * step, np.bool_)

    def blocks(self) -> list[int]:
        """Starts of the source blocks ``run`` takes one at a time (fixed, whatever the threads)."""
        return list(range(0, self.ta.values.shape[0], _SOURCE_BUCKETS))

    def part(self) -> "_TableJoin":
        """A copy sharing the tables, with its own work buffers and results (one per thread)."""
        c = copy.copy(self)
        c.out_i, c.out_j, c.out_d = [], [], []
        c.buf_a, c.buf_b = np.empty_like(self.buf_a), np.empty_like(self.buf_b)
        c.buf_x, c.buf_d, c.buf_m = np.empty_like(self.buf_x), np.empty_like(self.buf_d), np.empty_like(self.buf_m)
        return c

    def run(self, block: int | None = None) -> Join:
        """Pairs from every source block, or from the one starting at ``block``."""
        ta, tb = self.ta, self.tb
        groups = _pattern_groups(self.width, self.rk)
        for lo in self.blocks() if block is None else [block]:  # in blocks: temporaries stay small
            for hb, pats in groups:
                values = ta.values[lo : lo + _SOURCE_BUCKETS]
                if self.self_join and hb:
                    # Each unordered bucket pair once: from the bucket whose highest differing bit is 0.
                    src_all = lo + np.flatnonzero((values & hb) == 0)
                else:
                    src_all = lo + np.arange(values.shape[0])
                vals = ta.values[src_all]
                for f in pats.tolist():
                    if self.self_join and not f:
                        src = src_all[ta.counts[src_all] >= 2]
                        self.check(src, src, triangle=True)
                        continue
                    dst = tb.lookup(vals ^ f if f else vals)
                    hit = np.flatnonzero(dst >= 0)
                    if hit.shape[0]:
                        self.check(src_all[hit], dst[hit])
        if not self.out_i:
            return _empty_join()
        return np.concatenate(self.out_i), np.concatenate(self.out_j), np.concatenate(self.out_d)

    def check(self, src: np.ndarray, dst: np.ndarray, triangle: bool = False) -> None:
        """Check bucket pairs (src in table a, dst in table b)."""
        fit = self.fits_a[src] & self.fits_b[dst]
        if fit.all():
            self.dense(src, dst, triangle)
            return
        sel = np.flatnonzero(fit)
        self.dense(src[sel], dst[sel], triangle)
        sel = np.flatnonzero(~fit)
        self.general(src[sel], dst[sel], triangle)

    def keep(self, x: np.ndarray, y: np.ndarray, xor: np.ndarray | None = None, d: np.ndarray | None = None) -> None:
        """Record candidate positions x (in ta) and y (in tb) within radius, unless an earlier
        substring finds them too."""
        if xor is None:
            xor = self.ta.code(x) ^ self.tb.code(y)
            d = _popcount(xor)
            ok = np.flatnonzero(d <= self.radius)
            x, y, xor, d = x[ok], y[ok], xor[ok], d[ok]
        ok = np.arange(x.shape[0])
        for s, mask, r in self.earlier:
            if not ok.shape[0]:
                return
            ok = ok[_popcount((xor[ok] >> s) & mask) > r]
        if ok.shape[0]:
            i, j, d = self.ta.order[x[ok]], self.tb.order[y[ok]], d[ok]
            keep = _apart(self.tags, i, j)
            self.out_i.append(i[keep])
            self.out_j.append(j[keep])
            self.out_d.append(d[keep].astype(np.int16))

    def dense(self, src: np.ndarray, dst: np.ndarray, triangle: bool) -> None:
        """Bucket pairs whose members fit in the P levels: all P x P member pairs at once."""
        pw, ta, tb = self.pw, self.ta, self.tb
        for lo in range(0, src.shape[0], self.step):
            s_, d_ = src[lo : lo + self.step], dst[lo : lo + self.step]
            n = s_.shape[0]
            va, vb = self.buf_a[:, :n], self.buf_b[:, :n]
            np.take(self.lev_a, s_, axis=1, out=va)
            if self.lev_b is None:
                np.take(self.lev_a, d_, axis=1, out=vb)
                count = tb.counts[d_]
                for lvl in range(1, pw):  # level 0 is never empty
                    vb[lvl, count <= lvl] = ~_FILL
            else:
                np.take(self.lev_b, d_, axis=1, out=vb)
            xr = self.buf_x[: pw * pw * n].reshape(pw, pw, n)
            np.bitwise_xor(va[:, None, :], vb[None, :, :], out=xr)
            dist = self.buf_d[: pw * pw * n].reshape(pw, pw, n)
            np.bitwise_count(xr, out=dist)
            hit = self.buf_m[: pw * pw * n]
            np.less_equal(dist.reshape(-1), self.radius, out=hit)
            flat = np.flatnonzero(hit)
            # Buckets of near codes (one picture's crops) hit in most slots: resolve them in slices.
            for h in range(0, flat.shape[0], _DENSE_HITS):
                la, rest = np.divmod(flat[h : h + _DENSE_HITS], pw * n)
                lb, pi = np.divmod(rest, n)
                ok = (la < ta.counts[s_[pi]]) & (lb < tb.counts[d_[pi]])
                if triangle:
                    ok &= la < lb
                pi, la, lb = pi[ok], la[ok], lb[ok]
                self.keep(ta.starts[s_[pi]] + la, tb.starts[d_[pi]] + lb, xr[la, lb, pi], dist[la, lb, pi])

    def general(self, src: np.ndarray, dst: np.ndarray, triangle: bool) -> None:
        """Bucket pairs with a bucket too big for the levels: list the candidates and check them."""
        ta, tb = self.ta, self.tb
        for a_s, a_c, b_s, b_c in _chunks(ta.starts[src], ta.counts[src], tb.starts[dst], tb.counts[dst]):
            x, y, _ = _expand(a_s, a_c, b_s, b_c, triangle)
            self.keep(x, y)


def _join(a: np.ndarray, b: np.ndarray | None, radius: int, m: int, threads: int = 1,
          tags: np.ndarray | None = None) -> Join:
    """Exact pairs within radius between distinct codes a and b (b None: within a, i < j, leaving out
    pairs with the same non-negative ``tags``).

    Returns indices into a and b (or a, a) and distances; each pair exactly once, in the same order
    whatever ``threads``. The m substring tables and the source blocks of each are independent, so
    ``threads`` > 1 builds the tables side by side, then searches all (table, block) units side by
    side (numpy releases the GIL): no core idles while one large table finishes alone.
    """
    blocks, radii = _blocks(m), _radii(m, radius)
    for (_, w), r in zip(blocks, radii):
        if (w > 62 and r > 0) or _ball_size(w, r) > 2_000_000:
            raise ValueError(f"{m} substrings at radius {radius}: {w}-bit tables searched within {r} bits; use more substrings")
    ks = [k for k in range(m) if radii[k] >= 0]
    if threads > 1:
        from concurrent.futures import ThreadPoolExecutor

        with ThreadPoolExecutor(max_workers=threads) as ex:
            tables = list(ex.map(lambda k: _TableJoin(a, b, k, blocks, radii, radius, tags), ks))
            units = [(t, lo) for t in tables for lo in t.blocks()]
            parts = list(ex.map(lambda u: u[0].part().run(u[1]), units))
    else:
        parts = [_TableJoin(a, b, k, blocks, radii, radius, tags).run() for k in ks]
    if not parts:
        return _empty_join()
    i = np.concatenate([p[0] for p in parts]).astype(np.int64)
    j = np.concatenate([p[1] for p in parts]).astype(np.int64)
    d = np.concatenate([p[2] for p in parts])
    if b is None:
        i, j = np.minimum(i, j), np.maximum(i, j)
    return i, j, d


def unique_join(a: np.ndarray, b: np.ndarray | None, radius: int, substrings: int | None = None,
               threads: int = 1, tags: np.ndarray | None = None) -> Join:
    """Exact join of distinct codes: multi-index hashing with ``substrings`` tables, or a quadratic
    scan when 0; None picks whichever the cost model says is cheaper.

    ``tags`` (a self-join only): an integer per code of a; a pair of two codes with the same
    non-negative tag is left out (the caller knows it links nothing new), so it takes no memory.
    """
    if tags is not None and b is not None:
        raise ValueError("tags apply to a self-join only")
    n_a = a.shape[0]
    n_b = n_a if b is None else b.shape[0]
    if n_a == 0 or n_b == 0:
        return _empty_join()
    m = _plan(n_a, n_b, radius, b is None) if substrings is None else int(substrings)
    if m < 0 or m > BITS:
        raise ValueError(f"substrings must be within 0..{BITS}, got {substrings}")
    if m == 0:
        return brute_join(a, b, radius, tags)
    return _join(a, b, radius, m, threads, tags)
