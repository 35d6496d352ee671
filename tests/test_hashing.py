"""curate.hashing against outside references: imagehash (the hash library itself), Python's own
integer popcount, scipy's connected components, and brute force."""
from __future__ import annotations

import io
import itertools

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from curate import hashing as H

imagehash = pytest.importorskip("imagehash")
PIL = pytest.importorskip("PIL")
from PIL import Image, ImageFilter  # noqa: E402


def _public_photos() -> list[Image.Image]:
    """Public photos shipped with scikit-image and scikit-learn (not made here)."""
    skdata = pytest.importorskip("skimage.data")
    from sklearn.datasets import load_sample_image

    arrs = [skdata.astronaut(), skdata.camera(), skdata.coffee(), skdata.chelsea(), skdata.rocket(),
            load_sample_image("china.jpg"), load_sample_image("flower.jpg")]
    return [Image.fromarray(a).convert("RGB") for a in arrs]


@pytest.fixture(scope="module")
def photos() -> list[Image.Image]:
    return _public_photos()


@pytest.fixture(scope="module")
def hash_set(photos) -> list[Image.Image]:
    """Photos plus a few edits of each, so the set has near and far pairs."""
    out = []
    for p in photos:
        out += [p, p.filter(ImageFilter.GaussianBlur(2)), p.resize((p.width // 3, p.height // 3))]
    return out


# ----------------------------------------------------------------------------- codes vs imagehash


def test_codes_match_imagehash_hex_and_hamming_on_every_pair(hash_set):
    # Reference: imagehash's own ImageHash (its str() hex and its `-` Hamming distance).
    hs = [imagehash.phash(im) for im in hash_set]
    codes = np.array([H.code_of(h) for h in hs], dtype=np.uint64)
    for h, c in zip(hs, codes):
        assert H.code_hex(c) == str(h)
    for a, b in itertools.combinations(range(len(hs)), 2):
        assert int(H.hamming(codes[a], codes[b])) == hs[a] - hs[b]
    # The matrix form gives the same numbers.
    m = H.hamming(codes[:, None], codes[None, :])
    for a, b in itertools.combinations(range(len(hs)), 2):
        assert m[a, b] == hs[a] - hs[b]


def test_plain_image_codes_are_imagehash_phash_and_dhash(photos):
    # Reference: imagehash.phash / imagehash.dhash on the same image.
    for im in photos[:3]:
        plain = dict(scales=(1.0,), side_scale=0.0, corner_mask=0.0, work_size=0)
        assert H.code_hex(H.image_codes(im, **plain)[0]) == str(imagehash.phash(im))
        assert H.code_hex(H.image_codes(im, kind="dhash", **plain)[0]) == str(imagehash.dhash(im))


def test_image_codes_shape_order_and_flip(photos):
    im = photos[0]
    c = H.image_codes(im)
    assert c.dtype == np.uint64 and c.shape == (H.variant_count(),) == (7,)
    cf = H.image_codes(im, flip=True)
    assert cf.shape == (14,) and np.array_equal(cf[:7], c)
    # The mirrored picture's plain views are the mirrored views of the picture.
    from PIL import ImageOps

    assert np.array_equal(H.image_codes(ImageOps.mirror(im), flip=True)[:7], cf[7:])
    with pytest.raises(ValueError):
        H.image_codes(im, kind="ahash")


def test_crop_boxes():
    boxes = H.crop_boxes((1.0, 0.92, 0.84), 0.92)
    assert boxes[0] == (0.0, 0.0, 1.0, 1.0)
    assert boxes[2] == pytest.approx((0.08, 0.08, 0.92, 0.92))
    assert boxes[3] == pytest.approx((0.0, 0.04, 0.92, 0.96))  # touches the left edge
    assert len(H.crop_boxes((1.0,), 0.0)) == 1


def test_codes_survive_jpeg_draft_decoding(photos):
    # The inspect stage may decode JPEGs in draft mode (DCT scaling). Same picture, two decodes:
    # the closest views must stay well inside the default radius.
    big = photos[0].resize((1536, 1536), Image.Resampling.BICUBIC)
    buf = io.BytesIO()
    big.save(buf, "JPEG", quality=92)
    full = Image.open(io.BytesIO(buf.getvalue())).convert("RGB")
    draft = Image.open(io.BytesIO(buf.getvalue()))
    draft.draft("RGB", (300, 300))
    draft = draft.convert("RGB")
    assert draft.size[0] < 1536  # draft mode really decoded at a reduced scale
    assert H.min_distance(H.image_codes(full), H.image_codes(draft)) <= 2


def test_min_distance_is_the_closest_view_pair():
    a = np.array([0b1111, 0], dtype=np.uint64)
    b = np.array([0b0111_0000_0000, 0b0011], dtype=np.uint64)
    # |0b1111 ^ 0b0011| = 2 and |0 ^ 0b0011| = 2; the others are larger.
    assert H.min_distance(a, b) == 2
    assert H.min_distances(np.stack([a, a]), np.stack([b, a])).tolist() == [2, 0]


# ----------------------------------------------------------------------------- exact search


def _python_pairs(codes, radius):
    """Reference written with Python ints and int.bit_count, independent of numpy."""
    vals = [int(c) for c in codes]
    return {(i, j, (vals[i] ^ vals[j]).bit_count()) for i in range(len(vals)) for j in range(i + 1, len(vals))
            if (vals[i] ^ vals[j]).bit_count() <= radius}


def _as_set(p: H.Pairs) -> set:
    return set(zip(p.i.tolist(), p.j.tolist(), p.distance.tolist()))


def _clustered_codes(draw_seed: int, n: int, bases: int, max_flips: int) -> np.ndarray:
    """Codes near a few base codes (so substring buckets are crowded), some exact repeats."""
    rng = np.random.default_rng(draw_seed)
    base = rng.integers(0, np.iinfo(np.uint64).max, size=bases, dtype=np.uint64, endpoint=True)
    codes = base[rng.integers(0, bases, n)]
    for _ in range(max_flips):
        bit = rng.integers(0, 64, n).astype(np.uint64)
        on = rng.random(n) < 0.5
        codes = codes ^ np.where(on, np.uint64(1) << bit, np.uint64(0))
    return codes


def test_brute_pairs_matches_python_reference():
    rng = np.random.default_rng(3)
    codes = _clustered_codes(3, 120, 6, 6)
    codes[:5] = rng.integers(0, 2**63, 5, dtype=np.int64).astype(np.uint64)
    for r in (0, 3, 8, 20):
        assert _as_set(H.brute_pairs(codes, r)) == _python_pairs(codes, r)


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    seed=st.integers(0, 2**32 - 1),
    n=st.integers(0, 400),
    bases=st.integers(1, 60),
    flips=st.integers(0, 12),
    radius=st.integers(0, 12),
    substrings=st.sampled_from([None, 0, 2, 3, 4, 5, 6, 8]),
)
def test_range_pairs_equals_brute_force(seed, n, bases, flips, radius, substrings):
    # Multi-index hashing must return exactly the brute-force pair set (Norouzi et al. 2012 claim
    # exactness; brute force is the reference), for every number of substring tables.
    codes = _clustered_codes(seed, n, bases, flips)
    ref = H.brute_pairs(codes, radius)
    try:
        got = H.range_pairs(codes, radius, substrings=substrings)
    except ValueError:
        assert substrings is not None  # that many tables at this radius is refused, never wrong
        return
    assert all(np.array_equal(x, y) for x, y in zip(got, ref))


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    seed=st.integers(0, 2**32 - 1),
    na=st.integers(0, 200),
    nb=st.integers(0, 300),
    radius=st.integers(0, 10),
    substrings=st.sampled_from([None, 0, 2, 3, 4, 6]),
)
def test_cross_pairs_equals_brute_force(seed, na, nb, radius, substrings):
    both = _clustered_codes(seed, na + nb, 20, 8)
    a, b = both[:na], both[na:]
    ref = H.brute_cross_pairs(a, b, radius)
    got = H.cross_pairs(a, b, radius, substrings=substrings)
    assert all(np.array_equal(x, y) for x, y in zip(got, ref))


def test_mih_paths_with_tiny_blocks(monkeypatch):
    # Force the chunked and general (crowded bucket) paths with small work blocks.
    monkeypatch.setattr(H, "BLOCK_PAIRS", 64)
    monkeypatch.setattr(H, "_DENSE_SLOTS", 16)
    monkeypatch.setattr(H, "_PAD_MAX", 2)
    codes = _clustered_codes(11, 1500, 4, 5)
    for m in (2, 3, 4):
        got = H.range_pairs(codes, 6, substrings=m)
        ref = H.brute_pairs(codes, 6)
        assert all(np.array_equal(x, y) for x, y in zip(got, ref))
        got = H.cross_pairs(codes[:700], codes[700:], 6, substrings=m, threads=2)
        ref = H.brute_cross_pairs(codes[:700], codes[700:], 6)
        assert all(np.array_equal(x, y) for x, y in zip(got, ref))


def test_random_codes_at_scale_use_mih_and_stay_exact():
    # 60k uniform codes with planted copies: the cost model picks multi-index hashing.
    rng = np.random.default_rng(5)
    codes = rng.integers(0, np.iinfo(np.uint64).max, size=60_000, dtype=np.uint64, endpoint=True)
    src, dst = rng.integers(0, 60_000, 6000), rng.integers(0, 60_000, 6000)
    codes[dst] = codes[src] ^ (np.uint64(1) << rng.integers(0, 64, 6000).astype(np.uint64))
    assert H._plan(60_000, 60_000, 8, True) > 0
    got = H.range_pairs(codes, 8, threads=2)
    sample = rng.choice(60_000, 300, replace=False)
    for q in sample:
        d = H.hamming(codes, codes[q])
        expect = {(min(q, j), max(q, j)) for j in np.flatnonzero(d <= 8) if j != q}
        have = {(i, j) for i, j in zip(got.i.tolist(), got.j.tolist()) if q in (i, j)}
        assert have == expect


def test_radius_and_substring_validation():
    with pytest.raises(ValueError):
        H.range_pairs(np.zeros(3, np.uint64), -1)
    with pytest.raises(ValueError):
        H.range_pairs(np.arange(10, dtype=np.uint64), 8, substrings=1)  # 64-bit table within 8 bits


@settings(max_examples=25, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), n=st.integers(1, 80), k=st.integers(1, 4), radius=st.integers(0, 10))
def test_sample_pairs_and_components_match_brute_force(seed, n, k, radius):
    codes = _clustered_codes(seed, n * k, 8, 8).reshape(n, k)
    ref = {}
    for i in range(n):
        for j in range(i + 1, n):
            d = H.min_distance(codes[i], codes[j])
            if d <= radius:
                ref[(i, j)] = d
    got = H.sample_pairs(codes, radius)
    assert dict(zip(zip(got.i.tolist(), got.j.tolist()), got.distance.tolist())) == ref
    lab = H.sample_components(codes, radius)
    ii = np.array([p[0] for p in ref] or [], dtype=np.int64)
    jj = np.array([p[1] for p in ref] or [], dtype=np.int64)
    assert np.array_equal(lab, H.components(n, ii, jj))
    half = n // 2
    cross = H.sample_cross_pairs(codes[:half], codes[half:], radius)
    expect = {(i, j - half): d for (i, j), d in ref.items() if i < half <= j}
    assert dict(zip(zip(cross.i.tolist(), cross.j.tolist()), cross.distance.tolist())) == expect


# ----------------------------------------------------------------------------- union-find


@settings(max_examples=40, deadline=None)
@given(n=st.integers(1, 300), edges=st.lists(st.tuples(st.integers(0, 299), st.integers(0, 299)), max_size=400))
def test_components_match_scipy(n, edges):
    # Reference: scipy.sparse.csgraph.connected_components.
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    e = np.array([(a % n, b % n) for a, b in edges], dtype=np.int64).reshape(-1, 2)
    lab = H.components(n, e[:, 0], e[:, 1])
    g = coo_matrix((np.ones(len(e)), (e[:, 0], e[:, 1])), shape=(n, n))
    _, ref = connected_components(g, directed=False)
    # Same partition, and each label is the smallest member of its set.
    for a in range(n):
        assert lab[a] == np.flatnonzero(ref == ref[a]).min()
    uf = H.UnionFind(n)
    for a, b in e[: len(e) // 2]:
        uf.union(int(a), int(b))
    uf.union(e[len(e) // 2 :, 0], e[len(e) // 2 :, 1])
    assert np.array_equal(uf.labels(), lab)
    assert uf.find(0) == lab[0]


def test_components_long_chain():
    n = 5000
    lab = H.components(n, np.arange(n - 1)[::-1], np.arange(1, n)[::-1])
    assert (lab == 0).all()


# ----------------------------------------------------------------------------- semantic


def _unit(rng, n, d):
    x = rng.standard_normal((n, d)).astype(np.float32)
    return x / np.linalg.norm(x, axis=1, keepdims=True)


def test_cosine_pairs_exact_mode_matches_matrix():
    rng = np.random.default_rng(0)
    base = _unit(rng, 40, 16)
    noisy = base + 0.05 * rng.standard_normal(base.shape).astype(np.float32)
    x = np.concatenate([base, noisy / np.linalg.norm(noisy, axis=1, keepdims=True)])
    s = x @ x.T
    ref = {(i, j) for i in range(len(x)) for j in range(i + 1, len(x)) if s[i, j] >= 0.97}
    p = H.cosine_pairs(x, 0.97)
    assert set(zip(p.i.tolist(), p.j.tolist())) == ref and len(ref) >= 30
    assert np.allclose(p.distance, s[p.i, p.j], atol=1e-5)


def test_cosine_pairs_clustered_mode():
    # SemDeDup-style search within k-means clusters: every pair it reports is real; with every
    # cluster probed it finds them all.
    rng = np.random.default_rng(1)
    centres = _unit(rng, 30, 24)
    x = centres[rng.integers(0, 30, 1500)] + 0.03 * rng.standard_normal((1500, 24)).astype(np.float32)
    x /= np.linalg.norm(x, axis=1, keepdims=True)
    s = x @ x.T
    ref = {(i, j) for i, j in zip(*np.nonzero(np.triu(s >= 0.98, 1)))}
    part = H.cosine_pairs(x, 0.98, clusters=30, probes=2, cosine_exact_max=100)
    got = set(zip(part.i.tolist(), part.j.tolist()))
    assert got <= ref and len(got) >= 0.95 * len(ref)
    full = H.cosine_pairs(x, 0.98, clusters=8, probes=8, cosine_exact_max=100)
    assert set(zip(full.i.tolist(), full.j.tolist())) == ref
    again = H.cosine_pairs(x, 0.98, clusters=30, probes=2, cosine_exact_max=100)
    assert all(np.array_equal(a, b) for a, b in zip(part, again))  # deterministic
