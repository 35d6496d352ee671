"""Perceptual hashes and exact Hamming-space search (shared by neardup, split and leakcheck).

API (all codes are 64-bit perceptual hashes held as numpy ``uint64``):

Codes
  ``image_codes(img, kind="phash", scales=(1.0, 0.92, 0.84), side_scale=0.92, corner_mask=0.2,
      flip=False, work_size=256) -> uint64[K]``: one code per view of a Pillow image: each box of
      ``crop_boxes(scales, side_scale)`` (centred crops, then four edge-anchored crops), corners
      masked; then the same for the mirrored image when ``flip``. ``K = variant_count(...)``.
  ``code_of(imagehash.ImageHash) -> int`` and ``code_hex(code) -> str`` convert to and from
      imagehash's own bit order, so ``code_hex(code_of(h)) == str(h)``.
Distances
  ``hamming(a, b)``: element-wise popcount(a ^ b), numpy broadcasting.
  ``min_distance(a, b)``: smallest distance over every variant pair of two samples (1-D arrays).
  ``min_distances(A, B)``: the same, row by row, for two (n, K) arrays.
Exact range search (the result always equals brute force; see ``brute_pairs``)
  ``range_pairs(codes, radius) -> Pairs``: every pair i < j of one set with distance <= radius.
  ``cross_pairs(codes_a, codes_b, radius) -> Pairs``: every (i in a, j in b) with distance <= radius.
  ``sample_pairs(codes2d, radius)`` / ``sample_cross_pairs(a2d, b2d, radius)``: the same over
      samples with K variant codes each (rows), distance = ``min_distances`` across variants.
  ``sample_components(codes2d, radius) -> int64[n]``: connected components of "some variant within
      radius" without listing every pair (label = smallest row index in the component).
  ``Pairs`` is a NamedTuple ``(i, j, distance)`` of numpy arrays, sorted by (i, j).
Groups
  ``UnionFind(n)``: ``union(i, j)`` takes scalars or arrays; ``labels()`` gives each element the
      smallest index in its set.  ``components(n, i, j)`` is the one-call form.
Semantic duplicates
  ``cosine_pairs(emb, threshold, clusters=None)``: pairs of L2-normalised rows with cosine >=
      threshold; exact below ``cosine_exact_max`` rows, else searched within k-means clusters
      (SemDeDup, Abbas et al. 2023, arXiv 2303.09540), each row in its ``probes`` nearest clusters.

The Hamming search is multi-index hashing (Norouzi, Punjani & Fleet, CVPR 2012): the 64 bits are
cut into m substrings; if two codes are within r = m*q + a bits, then one of the first a+1
substrings is within q bits or one of the others is within q-1 bits (pigeonhole). Each substring
table is a sorted array addressed directly by the substring value; every table's neighbours are
enumerated bucket against bucket with numpy, verified with popcount, and a pair is kept only by the
first table that can find it, so no pair is reported twice.
"""
from __future__ import annotations

import itertools
from typing import Any, Iterator, NamedTuple, Sequence

import numpy as np

BITS = 64
# Below this many candidate pairs a quadratic scan is cheaper than building tables (common practice).
BRUTE_MAX_PAIRS = 4_000_000
# Pairs checked per block in quadratic scans and candidate expansion (bounds memory: ~16 bytes/pair).
BLOCK_PAIRS = 8_000_000
# Widest substring addressed by a direct table (2**24 int32 entries = 64 MiB).
MAX_TABLE_BITS = 24


class Pairs(NamedTuple):
    """Index pairs and their distances, sorted by (i, j)."""

    i: np.ndarray
    j: np.ndarray
    distance: np.ndarray

    def __len__(self) -> int:  # type: ignore[override]
        return int(self.i.shape[0])


def _empty_pairs(dist_dtype: Any = np.int16) -> Pairs:
    return Pairs(np.empty(0, np.int64), np.empty(0, np.int64), np.empty(0, dist_dtype))


def _sorted_pairs(i: np.ndarray, j: np.ndarray, d: np.ndarray) -> Pairs:
    order = np.lexsort((j, i))
    return Pairs(i[order].astype(np.int64), j[order].astype(np.int64), d[order])


# --------------------------------------------------------------------------- codes


def crop_boxes(scales: Sequence[float] = (1.0, 0.92, 0.84), side_scale: float = 0.92) -> list[tuple[float, float, float, float]]:
    """Crop boxes (left, top, right, bottom as shares of each side): one centred box per scale,
    then, when side_scale is set, four boxes of that scale touching the left, right, top and bottom
    edge (centred along the other axis), which recover pictures cropped more on one side."""
    out = []
    for sc in scales:
        m = (1.0 - float(sc)) / 2
        out.append((m, m, 1.0 - m, 1.0 - m))
    if side_scale and side_scale < 1.0:
        s_, m = float(side_scale), (1.0 - float(side_scale)) / 2
        out += [(0.0, m, s_, 1.0 - m), (1.0 - s_, m, 1.0, 1.0 - m), (m, 0.0, 1.0 - m, s_), (m, 1.0 - s_, 1.0 - m, 1.0)]
    return out


def variant_count(scales: Sequence[float] = (1.0, 0.92, 0.84), side_scale: float = 0.92, flip: bool = False) -> int:
    """How many codes ``image_codes`` makes per image."""
    return len(crop_boxes(scales, side_scale)) * (2 if flip else 1)


def code_of(h: Any) -> int:
    """imagehash.ImageHash -> int, first bit of its flattened array as the most significant bit."""
    bits = np.asarray(h.hash, dtype=bool).ravel()
    if bits.size != BITS:
        raise ValueError(f"expected a {BITS}-bit hash, got {bits.size} bits")
    return int.from_bytes(np.packbits(bits).tobytes(), "big")


def code_hex(code: int) -> str:
    """The hex string imagehash prints for the same hash."""
    return f"{int(code):016x}"


def _mask_corners(arr: np.ndarray, share: float) -> np.ndarray:
    """Set the four corner rectangles (share of each side) to the mean of the rest of the picture."""
    h, w = arr.shape
    mh, mw = int(round(h * share)), int(round(w * share))
    if mh <= 0 or mw <= 0 or 2 * mh >= h or 2 * mw >= w:
        return arr
    out = arr.astype(np.float32)
    total = out.sum()
    corners = [(slice(0, mh), slice(0, mw)), (slice(0, mh), slice(w - mw, w)),
               (slice(h - mh, h), slice(0, mw)), (slice(h - mh, h), slice(w - mw, w))]
    corner_sum = sum(float(out[c].sum()) for c in corners)
    fill = (total - corner_sum) / (h * w - 4 * mh * mw)
    for c in corners:
        out[c] = fill
    return out


def image_codes(
    img: Any,
    kind: str = "phash",
    scales: Sequence[float] = (1.0, 0.92, 0.84),
    side_scale: float = 0.92,
    corner_mask: float = 0.2,
    flip: bool = False,
    work_size: int = 256,
) -> np.ndarray:
    """64-bit imagehash codes of several views of one Pillow image, in a fixed order.

    The image goes to grey and (``work_size`` > 0) to a work_size square, so every input size, and
    JPEG draft decoding, lands on the same grid. Each crop of ``crop_boxes(scales, side_scale)`` is
    cut, its corners are masked (``corner_mask`` of each side, 0 = off) so small corner stamps do
    not count, and hashed with imagehash (``kind`` phash or dhash). With ``flip`` the mirrored
    image's views follow. With scales=(1.0,), side_scale=0, corner_mask=0, work_size=0 the one code
    is exactly imagehash's own hash of the image.
    """
    import imagehash
    from PIL import Image, ImageOps

    fn = {"phash": imagehash.phash, "dhash": imagehash.dhash}.get(kind)
    if fn is None:
        raise ValueError(f"unknown hash kind {kind!r}; expected phash or dhash")
    grey = img if img.mode == "L" else img.convert("L")
    if work_size and work_size > 0 and grey.size != (work_size, work_size):
        grey = grey.resize((work_size, work_size), Image.Resampling.LANCZOS)
    boxes = crop_boxes(scales, side_scale)
    views = [grey, ImageOps.mirror(grey)] if flip else [grey]
    out = np.empty(len(views) * len(boxes), dtype=np.uint64)
    k = 0
    for view in views:
        w, h = view.size
        arr = np.asarray(view) if corner_mask else None
        for x0, y0, x1, y1 in boxes:
            px = (int(round(x0 * w)), int(round(y0 * h)), max(int(round(x1 * w)), int(round(x0 * w)) + 1),
                  max(int(round(y1 * h)), int(round(y0 * h)) + 1))
            if arr is not None:
                part = _mask_corners(arr[px[1] : px[3], px[0] : px[2]], corner_mask)
                crop = Image.fromarray(np.clip(part + 0.5, 0, 255).astype(np.uint8), "L")
            else:
                crop = view if px == (0, 0, w, h) else view.crop(px)
            out[k] = code_of(fn(crop))
            k += 1
    return out


# --------------------------------------------------------------------------- distances


def hamming(a: Any, b: Any) -> np.ndarray:
    """Element-wise Hamming distance of uint64 codes (numpy broadcasting)."""
    x = np.bitwise_xor(np.asarray(a, dtype=np.uint64), np.asarray(b, dtype=np.uint64))
    return np.bitwise_count(x).astype(np.int16)


def min_distance(a: Any, b: Any) -> int:
    """Smallest Hamming distance over every variant pair of two samples' codes."""
    a = np.asarray(a, dtype=np.uint64).ravel()
    b = np.asarray(b, dtype=np.uint64).ravel()
    return int(hamming(a[:, None], b[None, :]).min())


def min_distances(a2d: Any, b2d: Any) -> np.ndarray:
    """Row-wise ``min_distance`` of two (n, K) code arrays."""
    a2d = np.asarray(a2d, dtype=np.uint64)
    b2d = np.asarray(b2d, dtype=np.uint64)
    if a2d.ndim == 1:
        a2d = a2d[:, None]
    if b2d.ndim == 1:
        b2d = b2d[:, None]
    return hamming(a2d[:, :, None], b2d[:, None, :]).min(axis=(1, 2))


# --------------------------------------------------------------------------- reference search


def _check_radius(radius: int) -> int:
    r = int(radius)
    if r < 0 or r > BITS:
        raise ValueError(f"radius must be within 0..{BITS}, got {radius}")
    return r


def _as_codes(codes: Any) -> np.ndarray:
    c = np.ascontiguousarray(np.asarray(codes).ravel())
    if c.dtype != np.uint64:
        if c.dtype.kind == "i" and c.size and c.min() < 0:
            c = c.view(np.uint64) if c.dtype.itemsize == 8 else c.astype(np.int64).view(np.uint64)
        else:
            c = c.astype(np.uint64)
    return c


def brute_pairs(codes: Any, radius: int) -> Pairs:
    """Quadratic reference: every pair i < j with distance <= radius."""
    c = _as_codes(codes)
    r = _check_radius(radius)
    n = c.shape[0]
    out_i, out_j, out_d = [], [], []
    step = max(1, BLOCK_PAIRS // max(n, 1))
    for s in range(0, n, step):
        block = c[s : s + step]
        d = hamming(block[:, None], c[None, :])
        ii, jj = np.nonzero(d <= r)
        ii = ii + s
        keep = jj > ii
        out_i.append(ii[keep])
        out_j.append(jj[keep])
        out_d.append(d[ii[keep] - s, jj[keep]])
    if not out_i:
        return _empty_pairs()
    return _sorted_pairs(np.concatenate(out_i), np.concatenate(out_j), np.concatenate(out_d))


def brute_cross_pairs(codes_a: Any, codes_b: Any, radius: int) -> Pairs:
    """Quadratic reference: every (i in a, j in b) with distance <= radius."""
    a, b = _as_codes(codes_a), _as_codes(codes_b)
    r = _check_radius(radius)
    out_i, out_j, out_d = [], [], []
    step = max(1, BLOCK_PAIRS // max(b.shape[0], 1))
    for s in range(0, a.shape[0], step):
        d = hamming(a[s : s + step, None], b[None, :])
        ii, jj = np.nonzero(d <= r)
        out_i.append(ii + s)
        out_j.append(jj)
        out_d.append(d[ii, jj])
    if not out_i:
        return _empty_pairs()
    return _sorted_pairs(np.concatenate(out_i), np.concatenate(out_j), np.concatenate(out_d))


# --------------------------------------------------------------------------- multi-index hashing


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
    """One substring of a set of codes: codes sorted by substring, with bucket boundaries."""

    def __init__(self, codes: np.ndarray, shift: int, width: int, direct: bool):
        if width >= BITS:
            sub = codes.view(np.int64)
        else:
            sub = ((codes >> np.uint64(shift)) & np.uint64((1 << width) - 1)).astype(np.int64)
        self.order = np.argsort(sub, kind="stable")
        ss = sub[self.order]
        self.codes = codes[self.order]
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

    def lookup(self, keys: np.ndarray) -> np.ndarray:
        """Bucket number of each substring value, -1 where no code has it."""
        if self.index is not None:
            return self.index[keys].astype(np.int64)
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
# Bucket pairs per dense step (bounds the P*P temporaries to about 64 MiB).
_DENSE_SLOTS = 1 << 23


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
        out[lvl, has] = t.codes[t.starts[has] + lvl]
    return out


def _join_table(a, b, k, blocks, radii, radius) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Pairs found by substring k that no earlier substring would find (so each pair once)."""
    self_join = b is None
    shift, width = blocks[k]
    rk = radii[k]
    n_b = a.shape[0] if self_join else b.shape[0]
    direct = width <= 22 or (width <= MAX_TABLE_BITS and (1 << width) <= 16 * n_b)  # index: <= 64 MiB
    ta = _Table(a, shift, width, direct and self_join)
    tb = ta if self_join else _Table(b, shift, width, direct)
    pw = _pad_width(ta.counts, tb.counts)
    lev_a = _levels(ta, pw, _FILL)
    lev_b = _levels(tb, pw, ~_FILL)
    fits_a, fits_b = ta.counts <= pw, tb.counts <= pw
    earlier = [(np.uint64(s), np.uint64((1 << w) - 1), r) for (s, w), r in zip(blocks[:k], radii[:k]) if r >= 0]
    out_i, out_j, out_d = [], [], []

    def keep(x: np.ndarray, y: np.ndarray, xor: np.ndarray | None = None, d: np.ndarray | None = None) -> None:
        """Record candidate positions x (in ta) and y (in tb) within radius, unless an earlier
        substring finds them too."""
        if xor is None:
            xor = ta.codes[x] ^ tb.codes[y]
            d = _popcount(xor)
            ok = np.flatnonzero(d <= radius)
            x, y, xor, d = x[ok], y[ok], xor[ok], d[ok]
        ok = np.arange(x.shape[0])
        for s, mask, r in earlier:
            if not ok.shape[0]:
                return
            ok = ok[_popcount((xor[ok] >> s) & mask) > r]
        if ok.shape[0]:
            out_i.append(ta.order[x[ok]])
            out_j.append(tb.order[y[ok]])
            out_d.append(d[ok].astype(np.int16))

    step = max(1, _DENSE_SLOTS // (pw * pw))
    # Work buffers reused by every dense step (fresh multi-MiB arrays cost page faults each time).
    buf_a = np.empty((pw, step), np.uint64)
    buf_b = np.empty((pw, step), np.uint64)
    buf_x = np.empty(pw * pw * step, np.uint64)
    buf_d = np.empty(pw * pw * step, np.uint8)
    buf_m = np.empty(pw * pw * step, np.bool_)

    def dense(src: np.ndarray, dst: np.ndarray, triangle: bool) -> None:
        """Check bucket pairs whose members fit in the P levels: all P x P member pairs at once."""
        for lo in range(0, src.shape[0], step):
            s_, d_ = src[lo : lo + step], dst[lo : lo + step]
            n = s_.shape[0]
            va, vb = buf_a[:, :n], buf_b[:, :n]
            np.take(lev_a, s_, axis=1, out=va)
            np.take(lev_b, d_, axis=1, out=vb)
            xr = buf_x[: pw * pw * n].reshape(pw, pw, n)
            np.bitwise_xor(va[:, None, :], vb[None, :, :], out=xr)
            dist = buf_d[: pw * pw * n].reshape(pw, pw, n)
            np.bitwise_count(xr, out=dist)
            hit = buf_m[: pw * pw * n]
            np.less_equal(dist.reshape(-1), radius, out=hit)
            flat = np.flatnonzero(hit)
            if not flat.shape[0]:
                continue
            la, rest = np.divmod(flat, pw * n)
            lb, pi = np.divmod(rest, n)
            ok = (la < ta.counts[s_[pi]]) & (lb < tb.counts[d_[pi]])
            if triangle:
                ok &= la < lb
            pi, la, lb = pi[ok], la[ok], lb[ok]
            keep(ta.starts[s_[pi]] + la, tb.starts[d_[pi]] + lb, xr[la, lb, pi].copy(), dist[la, lb, pi].copy())

    def general(src: np.ndarray, dst: np.ndarray, triangle: bool) -> None:
        """Bucket pairs with a bucket too big for the rows: list the candidates and check them."""
        for a_s, a_c, b_s, b_c in _chunks(ta.starts[src], ta.counts[src], tb.starts[dst], tb.counts[dst]):
            x, y, _ = _expand(a_s, a_c, b_s, b_c, triangle)
            keep(x, y)

    def check(src: np.ndarray, dst: np.ndarray, triangle: bool = False) -> None:
        fit = fits_a[src] & fits_b[dst]
        if fit.all():
            dense(src, dst, triangle)
            return
        sel = np.flatnonzero(fit)
        dense(src[sel], dst[sel], triangle)
        sel = np.flatnonzero(~fit)
        general(src[sel], dst[sel], triangle)

    for hb, pats in _pattern_groups(width, rk):
        if self_join and hb:
            # Each unordered bucket pair once: from the bucket whose highest differing bit is 0.
            src_all = np.flatnonzero((ta.values & hb) == 0)
        else:
            src_all = np.arange(ta.values.shape[0])
        vals = ta.values[src_all]
        for f in pats.tolist():
            if self_join and not f:
                src = src_all[ta.counts[src_all] >= 2]
                check(src, src, triangle=True)
                continue
            dst = tb.lookup(vals ^ f if f else vals)
            hit = np.flatnonzero(dst >= 0)
            if hit.shape[0]:
                check(src_all[hit], dst[hit])
    if not out_i:
        return np.empty(0, np.int64), np.empty(0, np.int64), np.empty(0, np.int16)
    return np.concatenate(out_i), np.concatenate(out_j), np.concatenate(out_d)


def _join(a: np.ndarray, b: np.ndarray | None, radius: int, m: int, threads: int = 1) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Exact pairs within radius between distinct codes a and b (b None: within a, i < j).

    Returns indices into a and b (or a, a) and distances; each pair exactly once. The m substring
    tables are independent, so ``threads`` > 1 runs them side by side (numpy releases the GIL).
    """
    blocks, radii = _blocks(m), _radii(m, radius)
    for (_, w), r in zip(blocks, radii):
        if (w > 62 and r > 0) or _ball_size(w, r) > 2_000_000:
            raise ValueError(f"{m} substrings at radius {radius}: {w}-bit tables searched within {r} bits; use more substrings")
    ks = [k for k in range(m) if radii[k] >= 0]
    if threads > 1 and len(ks) > 1:
        from concurrent.futures import ThreadPoolExecutor

        with ThreadPoolExecutor(max_workers=threads) as ex:
            parts = list(ex.map(lambda k: _join_table(a, b, k, blocks, radii, radius), ks))
    else:
        parts = [_join_table(a, b, k, blocks, radii, radius) for k in ks]
    i = np.concatenate([p[0] for p in parts])
    j = np.concatenate([p[1] for p in parts])
    d = np.concatenate([p[2] for p in parts])
    if b is None:
        i, j = np.minimum(i, j), np.maximum(i, j)
    return i, j, d


def _brute_join(a: np.ndarray, b: np.ndarray | None, radius: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    p = brute_pairs(a, radius) if b is None else brute_cross_pairs(a, b, radius)
    return p.i, p.j, p.distance


def _unique_join(a: np.ndarray, b: np.ndarray | None, radius: int, substrings: int | None = None,
                 threads: int = 1) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Exact join of distinct codes: multi-index hashing with ``substrings`` tables, or a quadratic
    scan when 0; None picks whichever the cost model says is cheaper."""
    n_a = a.shape[0]
    n_b = n_a if b is None else b.shape[0]
    if n_a == 0 or n_b == 0:
        return np.empty(0, np.int64), np.empty(0, np.int64), np.empty(0, np.int16)
    m = _plan(n_a, n_b, radius, b is None) if substrings is None else int(substrings)
    if m < 0 or m > BITS:
        raise ValueError(f"substrings must be within 0..{BITS}, got {substrings}")
    if m == 0:
        return _brute_join(a, b, radius)
    return _join(a, b, radius, m, threads)


# --------------------------------------------------------------------------- public search


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
    x, y, src = _expand(sa[ua], ca[ua], sb[ub], cb[ub])
    return oa[x], ob[y], d[src]


def _same_code_pairs(mem) -> tuple[np.ndarray, np.ndarray]:
    """Every pair i < j of original positions that hold the same code."""
    order, starts, counts = mem
    multi = np.flatnonzero(counts >= 2)
    if multi.shape[0] == 0:
        return np.empty(0, np.int64), np.empty(0, np.int64)
    x, y, _ = _expand(starts[multi], counts[multi], starts[multi], counts[multi])
    keep = x < y
    a, b = order[x[keep]], order[y[keep]]
    return np.minimum(a, b), np.maximum(a, b)


def range_pairs(codes: Any, radius: int, substrings: int | None = None, threads: int = 1) -> Pairs:
    """Every pair i < j of ``codes`` within ``radius`` bits; exact (equals ``brute_pairs``).

    ``substrings``: multi-index tables (None: chosen by cost; 0: quadratic scan). ``threads``: tables
    searched side by side.
    """
    c = _as_codes(codes)
    r = _check_radius(radius)
    u, inv = np.unique(c, return_inverse=True)
    inv = inv.ravel()
    mem = _members(inv, u.shape[0])
    ui, uj, ud = _unique_join(u, None, r, substrings, threads)
    i1, j1, d1 = _expand_members(ui, uj, ud, mem, mem)
    i0, j0 = _same_code_pairs(mem)
    i = np.concatenate([np.minimum(i1, j1), i0])
    j = np.concatenate([np.maximum(i1, j1), j0])
    d = np.concatenate([d1, np.zeros(i0.shape[0], np.int16)])
    return _sorted_pairs(i, j, d)


def cross_pairs(codes_a: Any, codes_b: Any, radius: int, substrings: int | None = None, threads: int = 1) -> Pairs:
    """Every (i, j), i indexing ``codes_a`` and j ``codes_b``, within ``radius`` bits; exact."""
    a, b = _as_codes(codes_a), _as_codes(codes_b)
    r = _check_radius(radius)
    ua, inv_a = np.unique(a, return_inverse=True)
    ub, inv_b = np.unique(b, return_inverse=True)
    mem_a, mem_b = _members(inv_a.ravel(), ua.shape[0]), _members(inv_b.ravel(), ub.shape[0])
    # Index the larger set, probe with the smaller one.
    if ua.shape[0] <= ub.shape[0]:
        pi, pj, d = _unique_join(ua, ub, r, substrings, threads)
    else:
        pj, pi, d = _unique_join(ub, ua, r, substrings, threads)
    i, j, d = _expand_members(pi, pj, d, mem_a, mem_b)
    return _sorted_pairs(i, j, d)


def _flatten(codes2d: Any) -> tuple[np.ndarray, np.ndarray, int]:
    c = np.asarray(codes2d)
    if c.ndim == 1:
        c = c[:, None]
    n, k = c.shape
    flat = _as_codes(c.reshape(-1))
    owner = np.repeat(np.arange(n, dtype=np.int64), k)
    return flat, owner, n


def _min_per_pair(i: np.ndarray, j: np.ndarray, d: np.ndarray) -> Pairs:
    if i.shape[0] == 0:
        return _empty_pairs()
    order = np.lexsort((d, j, i))
    i, j, d = i[order], j[order], d[order]
    first = np.concatenate(([True], (i[1:] != i[:-1]) | (j[1:] != j[:-1])))
    return Pairs(i[first].astype(np.int64), j[first].astype(np.int64), d[first])


def sample_pairs(codes2d: Any, radius: int, substrings: int | None = None, threads: int = 1) -> Pairs:
    """Pairs of rows (samples, K variant codes each) whose closest variants are within ``radius``.

    The distance is ``min_distances`` of the two rows; exact.
    """
    flat, owner, _ = _flatten(codes2d)
    p = range_pairs(flat, radius, substrings, threads)
    a, b = owner[p.i], owner[p.j]
    keep = a != b
    a, b, d = a[keep], b[keep], p.distance[keep]
    return _min_per_pair(np.minimum(a, b), np.maximum(a, b), d)


def sample_cross_pairs(codes2d_a: Any, codes2d_b: Any, radius: int, substrings: int | None = None,
                       threads: int = 1) -> Pairs:
    """Pairs (row of a, row of b) whose closest variants are within ``radius``; exact."""
    fa, oa, _ = _flatten(codes2d_a)
    fb, ob, _ = _flatten(codes2d_b)
    p = cross_pairs(fa, fb, radius, substrings, threads)
    return _min_per_pair(oa[p.i], ob[p.j], p.distance)


def sample_components(codes2d: Any, radius: int, substrings: int | None = None, threads: int = 1) -> np.ndarray:
    """Component label of each row: rows are linked when some variants are within ``radius``.

    Works on distinct codes only (a code shared by many rows links them without listing every
    pair), so a heavily duplicated picture costs no more than a single one.
    """
    flat, owner, n = _flatten(codes2d)
    u, inv = np.unique(flat, return_inverse=True)
    inv = inv.ravel()
    ui, uj, _ = _unique_join(u, None, _check_radius(radius), substrings, threads)
    # Nodes: rows 0..n-1, then distinct codes n..n+len(u)-1.
    i = np.concatenate([owner, n + ui])
    j = np.concatenate([n + inv, n + uj])
    return components(n + u.shape[0], i, j)[:n]


# --------------------------------------------------------------------------- groups


def components(n: int, i: Any, j: Any) -> np.ndarray:
    """Union-find over n elements joined by edges (i[k], j[k]): each element's label is the
    smallest element of its set. Vectorised hook-and-compress; rounds grow with log(n)."""
    parent = np.arange(n, dtype=np.int64)
    i = np.asarray(i, dtype=np.int64).ravel()
    j = np.asarray(j, dtype=np.int64).ravel()
    while i.shape[0]:
        ri, rj = parent[i], parent[j]
        live = ri != rj
        if not live.any():
            break
        i, j, ri, rj = i[live], j[live], ri[live], rj[live]
        # Hook the larger root under the smaller one; a root only ever moves to a smaller index,
        # so the final root of a set is its smallest element.
        np.minimum.at(parent, np.maximum(ri, rj), np.minimum(ri, rj))
        _compress(parent)
    return parent


def _compress(parent: np.ndarray) -> None:
    while True:
        grand = parent[parent]
        if np.array_equal(grand, parent):
            return
        parent[:] = grand


class UnionFind:
    """Union-find over n elements; ``union`` takes scalars or equal-length arrays."""

    def __init__(self, n: int):
        self.n = int(n)
        self._parent = np.arange(self.n, dtype=np.int64)

    def union(self, i: Any, j: Any) -> None:
        self._parent = _union_into(self._parent, i, j)

    def find(self, i: Any) -> Any:
        r = self._parent[np.asarray(i, dtype=np.int64)]
        return int(r) if np.ndim(r) == 0 else r

    def labels(self) -> np.ndarray:
        """Each element's set, named by the set's smallest element."""
        return self._parent.copy()


def _union_into(parent: np.ndarray, i: Any, j: Any) -> np.ndarray:
    i = np.atleast_1d(np.asarray(i, dtype=np.int64))
    j = np.atleast_1d(np.asarray(j, dtype=np.int64))
    n = parent.shape[0]
    # Existing sets are edges from each element to its root; add the new edges and recompute.
    return components(n, np.concatenate([np.arange(n), i]), np.concatenate([parent, j]))


# --------------------------------------------------------------------------- semantic duplicates


def cosine_pairs(
    emb: Any,
    threshold: float,
    clusters: int | None = None,
    probes: int = 2,
    cosine_exact_max: int = 20_000,
    seed: int = 0,
) -> Pairs:
    """Pairs i < j of L2-normalised rows with cosine >= threshold (distance column = cosine).

    Up to ``cosine_exact_max`` rows every pair is compared. Beyond that the rows are partitioned by
    spherical k-means (``clusters`` centroids, default sqrt(n)) and compared within clusters, each
    row joining its ``probes`` nearest clusters (SemDeDup, Abbas et al. 2023, compares within one
    cluster; the extra probes recover pairs split by a cluster border). Deterministic for a seed.
    """
    x = np.asarray(emb, dtype=np.float32)
    n = x.shape[0]
    if n < 2:
        return _empty_pairs(np.float32)
    if n <= cosine_exact_max:
        return _cosine_block_pairs(x, np.arange(n), threshold)
    k = int(clusters or max(2, round(np.sqrt(n))))
    cent = _spherical_kmeans(x, k, seed)
    near = _nearest_centroids(x, cent, min(probes, k))
    out_i, out_j, out_d = [], [], []
    rows = np.repeat(np.arange(n), near.shape[1])
    lab = near.ravel()
    order = np.argsort(lab, kind="stable")
    lab_sorted, rows_sorted = lab[order], rows[order]
    bounds = np.flatnonzero(np.diff(lab_sorted)) + 1
    for members in np.split(rows_sorted, bounds):
        if members.shape[0] >= 2:
            p = _cosine_block_pairs(x[members], members, threshold)
            out_i.append(p.i)
            out_j.append(p.j)
            out_d.append(p.distance)
    if not out_i:
        return _empty_pairs(np.float32)
    i, j, d = np.concatenate(out_i), np.concatenate(out_j), np.concatenate(out_d)
    key = i * n + j
    _, first = np.unique(key, return_index=True)
    return _sorted_pairs(i[first], j[first], d[first])


def _cosine_block_pairs(x: np.ndarray, ids: np.ndarray, threshold: float) -> Pairs:
    """All pairs of rows of x (named by ids) with x_a . x_b >= threshold, ids[a] < ids[b]."""
    n = x.shape[0]
    step = max(1, BLOCK_PAIRS // max(n, 1))
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
    return _sorted_pairs(np.concatenate(out_i), np.concatenate(out_j), np.concatenate(out_d))


def _spherical_kmeans(x: np.ndarray, k: int, seed: int, iters: int = 12, per_centroid: int = 64) -> np.ndarray:
    """k unit centroids (cosine k-means) trained on at most per_centroid*k rows."""
    rng = np.random.default_rng(seed)
    n = x.shape[0]
    train = x[rng.choice(n, size=min(n, per_centroid * k), replace=False)] if n > per_centroid * k else x
    cent = train[rng.choice(train.shape[0], size=k, replace=False)].copy()
    for _ in range(iters):
        lab = _nearest_centroids(train, cent, 1)[:, 0]
        sums = np.zeros_like(cent)
        np.add.at(sums, lab, train)
        norms = np.linalg.norm(sums, axis=1, keepdims=True)
        empty = norms[:, 0] == 0
        cent = np.where(empty[:, None], cent, sums / np.where(norms == 0, 1, norms))
    return cent


def _nearest_centroids(x: np.ndarray, cent: np.ndarray, p: int) -> np.ndarray:
    out = np.empty((x.shape[0], p), dtype=np.int64)
    step = max(1, BLOCK_PAIRS // max(cent.shape[0], 1))
    for s in range(0, x.shape[0], step):
        sims = x[s : s + step] @ cent.T
        if p == 1:
            out[s : s + step, 0] = sims.argmax(axis=1)
        else:
            top = np.argpartition(-sims, p - 1, axis=1)[:, :p]
            out[s : s + step] = top
    return out
