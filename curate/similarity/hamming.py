"""Exact Hamming search over 64-bit codes, for single codes and for samples with several views.

Every search here returns exactly what a brute-force scan returns (``brute_pairs``); the engine is
multi-index hashing (``mih``). Samples hold K codes, identity views first (``codes.views``). Two
samples' distance is the smallest distance over view pairs in which at least one view is an
identity view: a transformed view is compared with the other sample's untransformed views, never
with its transformed ones. Every mirrored or turned copy is still found (its identity views meet
the original's transformed views, or the reverse), at a fraction of the all-pairs cost. With
check codes (a second hash family per view), a view pair counts only when its check codes are
within ``check_radius`` too.
"""
from __future__ import annotations

from typing import Any, NamedTuple

import numpy as np

from ..memory import trim_heap
from . import mih

BITS = mih.BITS
# Default radius of the main codes: copies of a picture are within 8 bits of 64 at the closest view
# pair, different photos 12 or more apart (bench/neardup_quality.py); common practice puts likely
# variants at up to about 10 bits of a 64-bit hash.
RADIUS = 8
# Default radius of the check codes: codes of unrelated pictures differ by 32 +- 4 bits (64 fair
# bits, simple arithmetic); 16 is four standard deviations below. Measured on the public photos
# (bench/neardup_quality.py): different photos whose main codes match come within 18 bits, so 20
# (three deviations) let one pair through; at 16 none, and one more 8-10% one-sided crop in 20 is missed.
CHECK_RADIUS = 16


class Pairs(NamedTuple):
    """Index pairs and their distances, sorted by (i, j)."""

    i: np.ndarray
    j: np.ndarray
    distance: np.ndarray

    def __len__(self) -> int:  # type: ignore[override]
        return int(self.i.shape[0])


class ViewPairs(NamedTuple):
    """Sample pairs, their distance and the two views (code positions) that gave it; by (i, j).

    ``len()`` is the number of pairs, so build new ones with the constructor, not ``_replace``.
    """

    i: np.ndarray
    j: np.ndarray
    distance: np.ndarray
    view_i: np.ndarray
    view_j: np.ndarray

    def __len__(self) -> int:  # type: ignore[override]
        return int(self.i.shape[0])


def _empty_pairs(dist_dtype: Any = np.int16) -> Pairs:
    return Pairs(np.empty(0, np.int64), np.empty(0, np.int64), np.empty(0, dist_dtype))


def _sorted_pairs(i: np.ndarray, j: np.ndarray, d: np.ndarray) -> Pairs:
    order = np.lexsort((j, i))
    return Pairs(i[order].astype(np.int64), j[order].astype(np.int64), d[order])


def valid_radius(radius: int) -> int:
    """The radius as an int; ValueError outside 0..64."""
    r = int(radius)
    if r < 0 or r > BITS:
        raise ValueError(f"radius must be within 0..{BITS}, got {radius}")
    return r


def as_codes(codes: Any) -> np.ndarray:
    """A flat contiguous uint64 array (signed int64 input is reinterpreted bit for bit)."""
    c = np.ascontiguousarray(np.asarray(codes).ravel())
    if c.dtype != np.uint64:
        if c.dtype.kind == "i" and c.size and c.min() < 0:
            c = c.view(np.uint64) if c.dtype.itemsize == 8 else c.astype(np.int64).view(np.uint64)
        else:
            c = c.astype(np.uint64)
    return c


# --------------------------------------------------------------------------- distances


def hamming(a: Any, b: Any) -> np.ndarray:
    """Element-wise Hamming distance of uint64 codes (numpy broadcasting)."""
    return mih.popcount_distance(np.asarray(a, dtype=np.uint64), np.asarray(b, dtype=np.uint64))


def _rows(x: Any) -> np.ndarray:
    x = np.asarray(x, dtype=np.uint64)
    return x[:, None] if x.ndim == 1 else x


def _allowed(k_a: int, k_b: int, identity: int | None) -> np.ndarray:
    """(k_a, k_b) mask of the view pairs the distance is taken over."""
    if identity is None:
        return np.ones((k_a, k_b), dtype=bool)
    return (np.arange(k_a)[:, None] < identity) | (np.arange(k_b)[None, :] < identity)


def view_distances(a2d: Any, b2d: Any, identity: int | None = None, checks_a: Any = None, checks_b: Any = None,
                   check_radius: int = CHECK_RADIUS) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Row-wise sample distance of two (n, K) arrays, and the views of a and b that gave it.

    ``identity``: how many leading views are untransformed (None: all). With check codes, only view
    pairs whose check codes are within ``check_radius`` count; a row with none gets BITS + 1. Of
    equally close view pairs the first identity pair wins, else the first pair (row-major order).
    """
    a, b = _rows(a2d), _rows(b2d)
    ka, kb = a.shape[1], b.shape[1]
    allowed = _allowed(ka, kb, identity).ravel()
    ident_a = np.arange(ka) < (ka if identity is None else identity)
    ident_b = np.arange(kb) < (kb if identity is None else identity)
    both_identity = (ident_a[:, None] & ident_b[None, :]).ravel()
    d = hamming(a[:, :, None], b[:, None, :]).reshape(a.shape[0], ka * kb)
    ok = np.broadcast_to(allowed, d.shape)
    if checks_a is not None and checks_b is not None:
        ca, cb = _rows(checks_a), _rows(checks_b)
        ok = ok & (hamming(ca[:, :, None], cb[:, None, :]).reshape(d.shape) <= check_radius)
    key = np.where(ok, 2 * d + (~both_identity), 4 * BITS)
    best = np.argmin(key, axis=1)
    rows = np.arange(d.shape[0])
    va, vb = np.divmod(best, kb)
    dist = np.where(key[rows, best] >= 4 * BITS, BITS + 1, d[rows, best]).astype(np.int16)
    return dist, va.astype(np.int16), vb.astype(np.int16)


def min_distance(a: Any, b: Any, identity: int | None = None, checks_a: Any = None, checks_b: Any = None,
                 check_radius: int = CHECK_RADIUS) -> int:
    """Distance of two samples' codes (1-D arrays): the closest allowed view pair."""
    row = (lambda x: None if x is None else np.asarray(x).ravel()[None, :])  # noqa: E731
    return int(view_distances(row(a), row(b), identity, row(checks_a), row(checks_b), check_radius)[0][0])


def min_distances(a2d: Any, b2d: Any, identity: int | None = None, checks_a: Any = None, checks_b: Any = None,
                  check_radius: int = CHECK_RADIUS) -> np.ndarray:
    """Row-wise ``min_distance`` of two (n, K) code arrays."""
    return view_distances(a2d, b2d, identity, checks_a, checks_b, check_radius)[0]


# --------------------------------------------------------------------------- single codes


def brute_pairs(codes: Any, radius: int) -> Pairs:
    """Quadratic reference: every pair i < j with distance <= radius."""
    c = as_codes(codes)
    return _sorted_pairs(*mih.brute_join(c, None, valid_radius(radius)))


def brute_cross_pairs(codes_a: Any, codes_b: Any, radius: int) -> Pairs:
    """Quadratic reference: every (i in a, j in b) with distance <= radius."""
    return _sorted_pairs(*mih.brute_join(as_codes(codes_a), as_codes(codes_b), valid_radius(radius)))


def _members(inv: np.ndarray, n_unique: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Original positions grouped by unique code: (order, starts, counts)."""
    order = np.argsort(inv, kind="stable")
    counts = np.bincount(inv, minlength=n_unique).astype(np.int64)
    starts = np.cumsum(counts) - counts
    return order, starts, counts


def _expand_members(ua, ub, d, mem_a, mem_b) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Unique-code pairs -> pairs of original positions (every member of one x every member of the other)."""
    oa, sa, ca = mem_a
    ob, sb, cb = mem_b
    x, y, src = mih._expand(sa[ua], ca[ua], sb[ub], cb[ub])
    return oa[x], ob[y], d[src]


def _same_code_pairs(mem) -> tuple[np.ndarray, np.ndarray]:
    """Every pair i < j of original positions that hold the same code."""
    order, starts, counts = mem
    multi = np.flatnonzero(counts >= 2)
    if multi.shape[0] == 0:
        return np.empty(0, np.int64), np.empty(0, np.int64)
    x, y, _ = mih._expand(starts[multi], counts[multi], starts[multi], counts[multi])
    keep = x < y
    a, b = order[x[keep]], order[y[keep]]
    return np.minimum(a, b), np.maximum(a, b)


def range_pairs(codes: Any, radius: int, substrings: int | None = None, threads: int = 1) -> Pairs:
    """Every pair i < j of ``codes`` within ``radius`` bits; exact (equals ``brute_pairs``).

    ``substrings``: multi-index tables (None: chosen by cost; 0: quadratic scan). ``threads``: tables
    searched side by side.
    """
    c = as_codes(codes)
    r = valid_radius(radius)
    u, inv = np.unique(c, return_inverse=True)
    mem = _members(inv.ravel(), u.shape[0])
    ui, uj, ud = mih.unique_join(u, None, r, substrings, threads)
    i1, j1, d1 = _expand_members(ui, uj, ud, mem, mem)
    i0, j0 = _same_code_pairs(mem)
    i = np.concatenate([np.minimum(i1, j1), i0])
    j = np.concatenate([np.maximum(i1, j1), j0])
    d = np.concatenate([d1, np.zeros(i0.shape[0], np.int16)])
    return _sorted_pairs(i, j, d)


def unique_cross(ua: np.ndarray, ub: np.ndarray, radius: int, substrings: int | None = None,
                 threads: int = 1) -> mih.Join:
    """Exact pairs of two arrays of distinct codes; the larger one is indexed."""
    if ua.shape[0] <= ub.shape[0]:
        return mih.unique_join(ua, ub, radius, substrings, threads)
    j, i, d = mih.unique_join(ub, ua, radius, substrings, threads)
    return i, j, d


def cross_pairs(codes_a: Any, codes_b: Any, radius: int, substrings: int | None = None, threads: int = 1) -> Pairs:
    """Every (i, j), i indexing ``codes_a`` and j ``codes_b``, within ``radius`` bits; exact."""
    a, b = as_codes(codes_a), as_codes(codes_b)
    r = valid_radius(radius)
    ua, inv_a = np.unique(a, return_inverse=True)
    ub, inv_b = np.unique(b, return_inverse=True)
    mem_a, mem_b = _members(inv_a.ravel(), ua.shape[0]), _members(inv_b.ravel(), ub.shape[0])
    pi, pj, d = unique_cross(ua, ub, r, substrings, threads)
    i, j, d = _expand_members(pi, pj, d, mem_a, mem_b)
    return _sorted_pairs(i, j, d)


# --------------------------------------------------------------------------- samples


def _flatten(codes2d: np.ndarray, first_view: int = 0) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(flat codes, owning row, view number) of an (n, k) block whose first column is view first_view."""
    n, k = codes2d.shape
    flat = as_codes(codes2d.reshape(-1))
    owner = np.repeat(np.arange(n, dtype=np.int64), k)
    view = np.tile(np.arange(first_view, first_view + k, dtype=np.int16), n)
    return flat, owner, view


def _split_views(codes2d: Any, identity: int | None) -> tuple[np.ndarray, np.ndarray, int]:
    c = _rows(codes2d)
    k = c.shape[1]
    ident = k if identity is None else int(identity)
    if not 1 <= ident <= k:
        raise ValueError(f"identity views must be within 1..{k}, got {identity}")
    return c[:, :ident], c[:, ident:], ident


def _checks_like(checks: Any, codes2d: Any) -> np.ndarray | None:
    if checks is None:
        return None
    c = _rows(checks)
    if c.shape != _rows(codes2d).shape:
        raise ValueError(f"check codes have shape {c.shape}, the codes {_rows(codes2d).shape}")
    return c


def _best_per_pair(i, j, d, vi, vj, ident: int) -> ViewPairs:
    """One row per (i, j): the smallest distance; ties to an identity pair, then the first views."""
    if i.shape[0] == 0:
        e = np.empty(0, np.int64)
        return ViewPairs(e, e, np.empty(0, np.int16), np.empty(0, np.int16), np.empty(0, np.int16))
    transformed = (vi >= ident) | (vj >= ident)
    order = np.lexsort((vj, vi, transformed, d, j, i))
    i, j, d, vi, vj = i[order], j[order], d[order], vi[order], vj[order]
    first = np.concatenate(([True], (i[1:] != i[:-1]) | (j[1:] != j[:-1])))
    return ViewPairs(i[first].astype(np.int64), j[first].astype(np.int64), d[first].astype(np.int16),
                     vi[first].astype(np.int16), vj[first].astype(np.int16))


def _checked(parts: list[tuple], check_radius: int) -> list[tuple]:
    """Keep the view pairs whose check codes (last two fields) are within check_radius."""
    out = []
    for a, b, d, va, vb, ca, cb in parts:
        if ca is not None:
            ok = hamming(ca, cb) <= check_radius
            a, b, d, va, vb = a[ok], b[ok], d[ok], va[ok], vb[ok]
        out.append((a, b, d, va, vb))
    return out


def sample_pairs(codes2d: Any, radius: int, identity: int | None = None, checks: Any = None,
                 check_radius: int = CHECK_RADIUS, substrings: int | None = None, threads: int = 1) -> ViewPairs:
    """Every pair of rows i < j within ``radius`` by the sample distance (see the module); exact.

    ``identity``: how many leading columns are untransformed views (None: all of them).
    ``checks``: a second code per view; a view pair counts only when those are within ``check_radius``.
    One search over every view's code, then the pairs of two transformed views are dropped: on this
    engine that costs less than a search of the identity views plus one of them against the rest.
    """
    r = valid_radius(radius)
    c = _rows(codes2d)
    _, _, ident = _split_views(c, identity)
    chk = _checks_like(checks, c)
    flat, owner, view = _flatten(c)
    p = range_pairs(flat, r, substrings, threads)
    ok = ((view[p.i] < ident) | (view[p.j] < ident)) & (owner[p.i] != owner[p.j])
    if chk is not None:
        cf = as_codes(chk.reshape(-1))
        ok &= hamming(cf[p.i], cf[p.j]) <= check_radius
    i, j, d = p.i[ok], p.j[ok], p.distance[ok]
    a, b, va, vb = owner[i], owner[j], view[i], view[j]
    swap = a > b
    return _best_per_pair(np.where(swap, b, a), np.where(swap, a, b), d, np.where(swap, vb, va),
                          np.where(swap, va, vb), ident)


def sample_cross_pairs(codes2d_a: Any, codes2d_b: Any, radius: int, identity: int | None = None,
                       checks_a: Any = None, checks_b: Any = None, check_radius: int = CHECK_RADIUS,
                       substrings: int | None = None, threads: int = 1) -> ViewPairs:
    """Every (row of a, row of b) within ``radius`` by the sample distance; exact."""
    r = valid_radius(radius)
    a_id, a_tr, ident = _split_views(codes2d_a, identity)
    b_id, b_tr, ident_b = _split_views(codes2d_b, identity)
    if ident_b != ident or a_tr.shape[1] != b_tr.shape[1]:
        raise ValueError("both sets must hold the same views")
    ca, cb = _checks_like(checks_a, codes2d_a), _checks_like(checks_b, codes2d_b)
    if (ca is None) != (cb is None):
        raise ValueError("give check codes for both sets or for neither")
    flat = (lambda c, lo, hi: None if c is None else as_codes(c[:, lo:hi].reshape(-1)))  # noqa: E731
    fa, oa, va = _flatten(a_id)
    fb_all, ob_all, vb_all = _flatten(_rows(codes2d_b))
    p = cross_pairs(fa, fb_all, r, substrings, threads)
    x, y = flat(ca, 0, ident), flat(cb, 0, None)
    parts = [(oa[p.i], ob_all[p.j], p.distance, va[p.i], vb_all[p.j], *((x[p.i], y[p.j]) if x is not None else (None, None)))]
    if a_tr.shape[1]:
        ft, ot, vt = _flatten(a_tr, ident)
        fb, ob, vb = _flatten(b_id)
        q = cross_pairs(ft, fb, r, substrings, threads)
        x, y = flat(ca, ident, None), flat(cb, 0, ident)
        parts.append((ot[q.i], ob[q.j], q.distance, vt[q.i], vb[q.j], *((x[q.i], y[q.j]) if x is not None else (None, None))))
    a, b, d, u, v = (np.concatenate(z) for z in zip(*_checked(parts, check_radius)))
    return _best_per_pair(a, b, d, u, v, ident)


# --------------------------------------------------------------------------- code graph


class CodeGraph(NamedTuple):
    """Links between samples through their distinct views ("tokens": a main code with its check
    code).

    Samples s and t are within the radius exactly when one of them owns a token that the other
    owns, or that is within the radius of one the other owns (an edge), or when a transformed view
    of one is within the radius of a token the other owns (a reach); "within" includes the check
    codes passing. Built without listing sample pairs, so a picture held by many samples costs one
    token, not a quadratic number of pairs. Edges and reaches between tokens that one sample alone
    holds are left out: they would link that sample only to itself.
    """

    tokens: int  # number of distinct tokens
    own_s: np.ndarray  # sample s owns token own_u (unique pairs)
    own_u: np.ndarray
    reach_s: np.ndarray  # a transformed view of sample reach_s is within the radius of token reach_u
    reach_u: np.ndarray
    edge_u: np.ndarray  # distinct tokens within the radius of each other, edge_u < edge_v
    edge_v: np.ndarray


def _index_type(n: int) -> type:
    """The integer type for positions below n: int32 when it fits (half the memory), else int64."""
    return np.int32 if n < 2**31 else np.int64


def _unique_pairs(s: np.ndarray, u: np.ndarray, n_u: int) -> tuple[np.ndarray, np.ndarray]:
    key = np.unique(s.astype(np.int64) * max(n_u, 1) + u.astype(np.int64))
    return key // max(n_u, 1), key % max(n_u, 1)


def _tokens(main: np.ndarray, check: np.ndarray | None) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Distinct (main, check) pairs ("tokens"), sorted: (the distinct main codes, each token's main
    code as an index into them, each token's check code (zeros without check codes), the token of
    each input)."""
    idx = _index_type(main.shape[0] + 1)
    order = np.argsort(main, kind="stable") if check is None else np.lexsort((check, main))
    m = main[order]
    new_main = np.ones(m.shape[0], bool)
    new_main[1:] = m[1:] != m[:-1]
    new_token = new_main.copy()
    c = None if check is None else check[order]
    if c is not None:
        new_token[1:] |= c[1:] != c[:-1]
    token = np.cumsum(new_token, dtype=idx) - 1
    inv = np.empty_like(token)
    inv[order] = token
    del order, token
    token_main = (np.cumsum(new_main, dtype=idx) - 1)[new_token]
    token_check = np.zeros(token_main.shape[0], np.uint64) if c is None else c[new_token]
    return m[new_main], token_main, token_check, inv


def _common(values: np.ndarray, group: np.ndarray, n_groups: int) -> np.ndarray:
    """Per group (0..n_groups-1), the value all its members share, or -1 where they differ."""
    lo = np.full(n_groups, np.iinfo(values.dtype).max, values.dtype)
    hi = np.full(n_groups, -1, values.dtype)
    np.minimum.at(lo, group, values)
    np.maximum.at(hi, group, values)
    return np.where(lo == hi, lo, -1).astype(values.dtype)


def _token_pairs(main: np.ndarray, token_main: np.ndarray, token_check: np.ndarray, holder: np.ndarray,
                 radius: int, check_radius: int, substrings: int | None, threads: int) -> tuple[np.ndarray, np.ndarray]:
    """Token pairs a < b (``_tokens`` order) whose main codes are within ``radius`` and check codes
    within ``check_radius``, leaving out pairs of two tokens with the same non-negative ``holder``."""
    n_main = main.shape[0]
    ui, uj, _ = mih.unique_join(main, None, radius, substrings, threads, _common(holder, token_main, n_main))
    counts = np.bincount(token_main, minlength=n_main)
    members = (np.arange(token_main.shape[0], dtype=token_main.dtype), np.cumsum(counts) - counts, counts)
    x, y, _ = _expand_members(ui, uj, np.zeros(ui.shape[0], np.int16), members, members)
    x0, y0 = _same_code_pairs(members)
    x, y = np.concatenate([x, x0]), np.concatenate([y, y0])
    ok = (hamming(token_check[x], token_check[y]) <= check_radius) & ((holder[x] != holder[y]) | (holder[x] < 0))
    return x[ok].astype(np.int64), y[ok].astype(np.int64)


def _reaches(x: np.ndarray, y: np.ndarray, has_id: np.ndarray, has_t: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(transformed token, identity token) links from token pairs x-y, and from tokens that are both."""
    both = np.flatnonzero(has_id & has_t)
    a = has_t[x] & has_id[y]
    b = has_t[y] & has_id[x]
    return np.concatenate([x[a], y[b], both]), np.concatenate([y[a], x[b], both])


def code_graph(codes2d: Any, radius: int, identity: int | None = None, checks: Any = None,
               check_radius: int = CHECK_RADIUS, substrings: int | None = None, threads: int = 1) -> CodeGraph:
    """The ``CodeGraph`` of (n, K) sample codes at ``radius``; exact (multi-index search).

    Tokens are the distinct views of every kind; one search over all of them, then pairs of two
    identity tokens become edges and pairs of a transformed with an identity token become reaches.
    Code k of the flattened (n, K) array is view k % K of sample k // K.
    """
    r = valid_radius(radius)
    c = _rows(codes2d)
    n, k = c.shape
    _, _, ident = _split_views(c, identity)
    chk = _checks_like(checks, c)
    main, token_main, token_check, inv = _tokens(as_codes(c.reshape(-1)),
                                                 None if chk is None else as_codes(chk.reshape(-1)))
    t = token_main.shape[0]
    owner = np.arange(n * k, dtype=inv.dtype) // k
    is_id = np.arange(n * k) % k < ident
    has_id = np.zeros(t, bool)
    has_id[inv[is_id]] = True
    has_t = np.zeros(t, bool)
    has_t[inv[~is_id]] = True
    # Tokens of one picture's crops are close to each other (about K*(K-1)/2 pairs per sample); a
    # pair of tokens that only one sample holds links that sample to itself, so it is not listed.
    holder = _common(owner, inv, t)
    del owner
    x, y = _token_pairs(main, token_main, token_check, holder, r, check_radius, substrings, threads)
    del main, token_main, token_check, holder
    trim_heap()  # the search's temporaries, kept in its threads' heaps
    owner = np.arange(n * k, dtype=inv.dtype) // k  # again: not held during the search
    own_s, own_u = _unique_pairs(owner[is_id], inv[is_id], t)
    e = has_id[x] & has_id[y]
    eu, ev = np.minimum(x[e], y[e]), np.maximum(x[e], y[e])
    rt, ru = _reaches(x, y, has_id, has_t)
    # Every sample holding a transformed token reaches the identity tokens linked to it.
    order, starts, counts = _members(inv[~is_id], t)
    per = counts[rt]
    src = np.repeat(np.arange(rt.shape[0]), per)
    pos = np.repeat(starts[rt], per) + (np.arange(src.shape[0]) - np.repeat(np.cumsum(per) - per, per))
    reach_s, reach_u = _unique_pairs(owner[~is_id][order[pos]], ru[src], t)
    return CodeGraph(int(t), own_s, own_u, reach_s, reach_u, eu.astype(np.int64), ev.astype(np.int64))


# --------------------------------------------------------------------------- two sets


def cross_set_pairs(codes_a: Any, codes_b: Any, radius: int, identity: int | None = None, ok_a: Any = None,
                    ok_b: Any = None, checks_a: Any = None, checks_b: Any = None, check_radius: int = CHECK_RADIUS,
                    substrings: int | None = None, threads: int = 1) -> ViewPairs:
    """Every (row of a, row of b) within ``radius`` among rows whose codes are valid (``ok_*``,
    None: all); indices into the full arrays. Leak checks and eval-set decontamination use this."""
    a, b = _rows(codes_a), _rows(codes_b)
    ra = np.arange(a.shape[0]) if ok_a is None else np.flatnonzero(np.asarray(ok_a, dtype=bool))
    rb = np.arange(b.shape[0]) if ok_b is None else np.flatnonzero(np.asarray(ok_b, dtype=bool))
    if not ra.shape[0] or not rb.shape[0]:
        return _best_per_pair(*(np.empty(0, np.int64),) * 5, 0)
    sub = (lambda c, rows: None if c is None else _rows(c)[rows])  # noqa: E731
    p = sample_cross_pairs(a[ra], b[rb], radius, identity, sub(checks_a, ra), sub(checks_b, rb), check_radius,
                           substrings, threads)
    return ViewPairs(ra[p.i], rb[p.j], p.distance, p.view_i, p.view_j)


def closest(pairs: ViewPairs, n: int) -> ViewPairs:
    """For each of n rows of the first set, its closest partner (ties: the lower index); rows
    without one are left out. Sorted by row."""
    if not len(pairs):
        return pairs
    order = np.lexsort((pairs.j, pairs.distance, pairs.i))
    first = order[np.concatenate(([True], pairs.i[order][1:] != pairs.i[order][:-1]))]
    if pairs.i[first].max() >= n:
        raise ValueError(f"pairs name rows beyond {n}")
    return ViewPairs(*(x[first] for x in pairs))
