"""curate.similarity against outside references: imagehash (the hash library itself), Python's own
integer popcount, scipy's connected components, scikit-learn's cosine similarity, brute force, and
a plain Python transcription of the greedy leader rule."""
from __future__ import annotations

import io
import itertools

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from curate import similarity as S
from curate.similarity import codes as C
from curate.similarity import cosine, groups, mih
from curate.similarity import hamming as H

imagehash = pytest.importorskip("imagehash")
PIL = pytest.importorskip("PIL")
from PIL import Image, ImageFilter  # noqa: E402

PLAIN = dict(scales=[1.0], side_scale=0.0, corner_mask=0.0, transforms=[], check="", work_size=0)


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
    codes = np.array([C.code_of(h) for h in hs], dtype=np.uint64)
    for h, c in zip(hs, codes):
        assert C.code_hex(c) == str(h)
    m = H.hamming(codes[:, None], codes[None, :])
    for a, b in itertools.combinations(range(len(hs)), 2):
        assert int(H.hamming(codes[a], codes[b])) == m[a, b] == hs[a] - hs[b]


def test_plain_image_codes_are_imagehash_phash_and_dhash(photos):
    # Reference: imagehash.phash / imagehash.dhash on the same image.
    for im in photos[:3]:
        assert C.code_hex(S.image_codes(im, S.CodeSettings(**PLAIN))[0]) == str(imagehash.phash(im))
        assert C.code_hex(S.image_codes(im, S.CodeSettings(kind="dhash", **PLAIN))[0]) == str(imagehash.dhash(im))


def _pixel_box(img: Image.Image, box: tuple[float, ...]) -> tuple[int, int, int, int]:
    w, h = img.size
    return (round(box[0] * w), round(box[1] * h), round(box[2] * w), round(box[3] * h))


def test_every_crop_view_is_imagehash_of_that_crop(photos):
    # Reference: imagehash.phash of the crop cut independently with Pillow (no mask, no work size).
    s = S.CodeSettings(**{**PLAIN, "scales": [1.0, 0.92, 0.84], "side_scale": 0.92})
    for im in photos[:2]:
        codes = S.image_codes(im, s)
        for k, v in enumerate(S.views(s)):
            assert C.code_hex(codes[k]) == str(imagehash.phash(im.crop(_pixel_box(im, v.box))))


def test_mirror_and_half_turn_views_are_imagehash_of_the_turned_picture(photos):
    # Reference: imagehash.phash of the picture flipped / turned by Pillow. A mirror or half turn of
    # the 32 px DCT input equals the input of the flipped picture exactly; a quarter turn swaps
    # Pillow's two resampling passes, so a few grey levels move (measured: at most 2 bits apart).
    exact = ["mirror", "rot180", "mirror_rot180"]
    s = S.CodeSettings(**{**PLAIN, "transforms": list(C.TRANSFORMS)})
    for im in photos:
        codes = S.image_codes(im, s)
        for k, t in enumerate(s.transforms, start=1):
            ref = C.code_of(imagehash.phash(im.transpose(getattr(Image.Transpose, C.TRANSFORMS[t]))))
            d = int(H.hamming(codes[k], ref))
            assert d == 0 if t in exact else d <= 4, (t, d)
    sd = S.CodeSettings(**{**PLAIN, "kind": "dhash", "transforms": ["rot90", "mirror"]})
    codes = S.image_codes(photos[0], sd)
    for k, t in enumerate(sd.transforms, start=1):  # dhash turns the crop itself: exact
        assert codes[k] == C.code_of(imagehash.dhash(photos[0].transpose(getattr(Image.Transpose, C.TRANSFORMS[t]))))


def test_mirrored_picture_has_the_originals_mirror_views(photos):
    # With the default views (masked corners, work square): the mirrored picture's identity views
    # are the original's mirror views, the left and right edge crops trading places.
    from PIL import ImageOps

    s = S.CodeSettings()
    ident = S.identity_count(s)
    for im in photos[:4]:
        (c, chk), (cm, chkm) = C.split_codes(S.image_codes(im, s), s), C.split_codes(S.image_codes(ImageOps.mirror(im), s), s)
        assert np.array_equal(cm[:ident], c[ident:][[0, 1, 2, 4, 3, 5, 6]])
        assert np.array_equal(chkm[:ident], chk[ident:][[0, 1, 2, 4, 3, 5, 6]])
        assert S.min_distance(c, cm, ident, chk, chkm, 0) == 0


def test_check_codes_are_imagehash_dhash_of_each_views_thumbnail(photos):
    # Reference: imagehash.dhash of the 32 px thumbnail of each view (the pHash input), and of the
    # whole picture's thumbnail turned by Pillow.
    s = S.CodeSettings(**{**PLAIN, "transforms": ["mirror", "rot180"], "check": "dhash"})
    for im in photos[:3]:
        main, check = C.split_codes(S.image_codes(im, s), s)
        thumb = im.convert("L").resize((32, 32), Image.Resampling.LANCZOS)
        assert main[0] == C.code_of(imagehash.phash(im))
        assert check[0] == C.code_of(imagehash.dhash(thumb))
        assert check[1] == C.code_of(imagehash.dhash(thumb.transpose(Image.Transpose.FLIP_LEFT_RIGHT)))
        assert check[2] == C.code_of(imagehash.dhash(thumb.transpose(Image.Transpose.ROTATE_180)))
    assert C.split_codes(np.zeros((5, 6), np.uint64), s)[1].shape == (5, 3)
    with pytest.raises(ValueError):
        C.split_codes(np.zeros(4, np.uint64), s)


def test_views_layout_and_counts(photos):
    s = S.CodeSettings()
    assert S.identity_count(s) == 7 and C.view_count(s) == 14 and S.code_count(s) == 28
    vs = S.views(s)
    assert [v.transform for v in vs] == ["identity"] * 7 + ["mirror"] * 7
    assert vs[0].box == (0.0, 0.0, 1.0, 1.0) and vs[7].box == vs[0].box
    whole = S.CodeSettings(scales=[0.92], transforms=["mirror", "rot90"], transform_boxes="whole", check="")
    assert [(v.transform, v.box) for v in S.views(whole)][-2:] == [("mirror", (0.0, 0.0, 1.0, 1.0)),
                                                                    ("rot90", (0.0, 0.0, 1.0, 1.0))]
    c = S.image_codes(photos[0], whole)
    assert c.dtype == np.uint64 and c.shape == (S.code_count(whole),) == (8,)
    assert S.image_codes(photos[0], S.CodeSettings(transforms=[], check="")).shape == (7,)


def test_matched_transform_names_the_kept_to_member_transform():
    vs = S.views(S.CodeSettings(scales=[1.0], side_scale=0, transforms=["mirror", "rot90", "rot270"]))
    assert S.matched_transform(vs, 0, 0) == "identity"
    assert S.matched_transform(vs, 1, 0) == "mirror" and S.matched_transform(vs, 0, 1) == "mirror"
    # The kept sample turned by 90 matched the member: the member is the kept picture turned by 90.
    assert S.matched_transform(vs, 2, 0) == "rot90"
    # The member turned by 90 matched the kept picture: the member is turned by 270.
    assert S.matched_transform(vs, 0, 2) == "rot270"


@pytest.mark.parametrize("bad", [dict(kind="ahash"), dict(transforms=["flip"]), dict(transforms=["mirror", "mirror"]),
                                 dict(check="ahash"), dict(check="phash"),
                                 dict(scales=[]), dict(scales=[0.3]), dict(side_scale=1.0), dict(corner_mask=0.5),
                                 dict(work_size=16), dict(transform_boxes="some")])
def test_bad_settings_are_refused(bad, photos):
    with pytest.raises(ValueError):
        S.image_codes(photos[0], S.CodeSettings(**bad))


def test_crop_boxes():
    boxes = C.crop_boxes((1.0, 0.92, 0.84), 0.92)
    assert boxes[0] == (0.0, 0.0, 1.0, 1.0)
    assert boxes[2] == pytest.approx((0.08, 0.08, 0.92, 0.92))
    assert boxes[3] == pytest.approx((0.0, 0.04, 0.92, 0.96))  # touches the left edge
    assert len(C.crop_boxes((1.0,), 0.0)) == 1


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
    s = S.CodeSettings()
    (a, ca), (b, cb) = C.split_codes(S.image_codes(full, s), s), C.split_codes(S.image_codes(draft, s), s)
    assert S.min_distance(a, b, S.identity_count(s), ca, cb, 8) <= 2


# ----------------------------------------------------------------------------- distances


def test_min_distance_is_the_closest_allowed_view_pair():
    a = np.array([0b1111, 0], dtype=np.uint64)
    b = np.array([0b0111_0000_0000, 0b0011], dtype=np.uint64)
    # |0b1111 ^ 0b0011| = 2 and |0 ^ 0b0011| = 2; the others are larger.
    assert S.min_distance(a, b) == 2
    assert S.min_distances(np.stack([a, a]), np.stack([b, a])).tolist() == [2, 0]
    # One identity view, one transformed: transformed views are never compared with each other.
    x = np.array([0, 0xFF], dtype=np.uint64)
    y = np.array([0xFFFF, 0xFF], dtype=np.uint64)
    assert S.min_distance(x, y) == 0 and S.min_distance(x, y, identity=1) == 8
    d, va, vb = S.view_distances(x[None], y[None], identity=1)
    assert (d[0], va[0], vb[0]) == (8, 0, 1)


def test_ties_go_to_the_identity_pair():
    x = np.array([0, 0b1], dtype=np.uint64)
    y = np.array([0b1, 0], dtype=np.uint64)
    d, va, vb = S.view_distances(x[None], y[None], identity=1)
    assert (d[0], va[0], vb[0]) == (0, 0, 1)  # only (0, 1) and (1, 0) reach 0; first allowed one
    d, va, vb = S.view_distances(y[None], y[None], identity=1)
    assert (d[0], va[0], vb[0]) == (0, 0, 0)


# ----------------------------------------------------------------------------- exact search


def _python_pairs(codes, radius):
    """Reference written with Python ints and int.bit_count, independent of numpy."""
    vals = [int(c) for c in codes]
    return {(i, j, (vals[i] ^ vals[j]).bit_count()) for i in range(len(vals)) for j in range(i + 1, len(vals))
            if (vals[i] ^ vals[j]).bit_count() <= radius}


def _as_set(p) -> set:
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
        got = S.range_pairs(codes, radius, substrings=substrings)
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
    got = S.cross_pairs(a, b, radius, substrings=substrings)
    assert all(np.array_equal(x, y) for x, y in zip(got, ref))


def test_mih_paths_with_tiny_blocks(monkeypatch):
    # Force the chunked and general (crowded bucket) paths with small work blocks.
    monkeypatch.setattr(mih, "BLOCK_PAIRS", 64)
    monkeypatch.setattr(mih, "_DENSE_SLOTS", 16)
    monkeypatch.setattr(mih, "_DENSE_HITS", 5)
    monkeypatch.setattr(mih, "_SOURCE_BUCKETS", 3)
    monkeypatch.setattr(mih, "_PAD_MAX", 2)
    codes = _clustered_codes(11, 1500, 4, 5)
    for m in (2, 3, 4):
        got = S.range_pairs(codes, 6, substrings=m)
        ref = H.brute_pairs(codes, 6)
        assert all(np.array_equal(x, y) for x, y in zip(got, ref))
        got = S.cross_pairs(codes[:700], codes[700:], 6, substrings=m, threads=2)
        ref = H.brute_cross_pairs(codes[:700], codes[700:], 6)
        assert all(np.array_equal(x, y) for x, y in zip(got, ref))


def test_threads_split_tables_into_blocks_and_keep_the_exact_pairs_in_one_order(monkeypatch):
    # Tables cut into many source blocks, searched by 1, 2 or 3 threads (more units than threads,
    # and a table count that does not divide among them): the same pairs in the same order, and
    # those of the quadratic scan.
    monkeypatch.setattr(mih, "_SOURCE_BUCKETS", 7)
    u = np.unique(_clustered_codes(8, 1500, 5, 6))
    i, j, d = mih.brute_join(u, None, 7)
    want = sorted(zip(i.tolist(), j.tolist(), d.tolist()))
    for m in (3, 4):
        one = mih.unique_join(u, None, 7, m, threads=1)
        assert sorted(zip(*(x.tolist() for x in one))) == want
        for threads in (2, 3):
            got = mih.unique_join(u, None, 7, m, threads=threads)
            assert all(np.array_equal(x, y) for x, y in zip(got, one))
        cross = [mih.unique_join(u[:600], u[600:], 7, m, threads=t) for t in (1, 2)]
        assert all(np.array_equal(x, y) for x, y in zip(*cross))


@pytest.mark.parametrize("substrings", [0, 3, 4])
def test_tagged_join_leaves_out_exactly_the_pairs_of_one_tag(monkeypatch, substrings):
    # Reference: the quadratic scan without tags, filtered afterwards.
    monkeypatch.setattr(mih, "_SOURCE_BUCKETS", 64)
    monkeypatch.setattr(mih, "_DENSE_HITS", 5)
    u = np.unique(_clustered_codes(4, 1200, 6, 6))
    tags = np.random.default_rng(4).integers(-1, 40, u.shape[0])
    i, j, d = mih.brute_join(u, None, 7)
    apart = (tags[i] != tags[j]) | (tags[i] < 0)
    want = sorted(zip(i[apart].tolist(), j[apart].tolist(), d[apart].tolist()))
    got = mih.unique_join(u, None, 7, substrings, threads=2, tags=tags)
    assert sorted(zip(*(x.tolist() for x in got))) == want
    assert len(want) < len(i)  # some pairs were left out
    with pytest.raises(ValueError):
        mih.unique_join(u, u, 7, substrings, tags=tags)


def test_code_graph_with_near_views_on_the_multi_index_path(monkeypatch):
    # Each sample's views are near each other (as crops of one picture are); some samples are near
    # copies of others, and some share one view exactly with a sample whose other view another
    # sample shares (t holds s's view 0, u holds s's view 1: t and u are within the radius only
    # through s's two views). Components and leaders through the code graph (multi-index search,
    # tiny blocks) equal those of the sample pairs the quadratic scan finds.
    monkeypatch.setattr(mih, "_SOURCE_BUCKETS", 64)
    monkeypatch.setattr(mih, "_DENSE_HITS", 64)
    monkeypatch.setattr(mih, "BLOCK_PAIRS", 500)
    rng = np.random.default_rng(9)
    n, k = 600, 5
    base = rng.integers(0, 2**63, (n, 1), dtype=np.int64).astype(np.uint64)
    codes = base ^ rng.integers(0, 2**6, (n, k), dtype=np.int64).astype(np.uint64)
    copy = rng.integers(0, n, 60)
    codes[rng.integers(0, n, 60)] = codes[copy] ^ (np.uint64(1) << rng.integers(0, 64, (60, 1)).astype(np.uint64))
    s, t, u = rng.permutation(n)[:120].reshape(3, 40)
    codes[t, 0], codes[u, 0] = codes[s, 0], codes[s, 1]
    ref = S.sample_pairs(codes, 6, identity=3, substrings=0)
    rank = rng.integers(0, n, n)
    adj: dict[int, set] = {a: set() for a in range(n)}
    for a, b in zip(ref.i.tolist(), ref.j.tolist()):
        adj[a].add(b)
        adj[b].add(a)
    want = _sequential_leaders(rank.tolist(), adj)
    for m in (0, 2, 3):
        comp = S.sample_components(codes, 6, identity=3, substrings=m, threads=2)
        assert np.array_equal(comp, S.components(n, ref.i, ref.j))
        g = S.group(rank, S.Signals(codes=codes, identity=3, radius=6), substrings=m, threads=2)
        assert g.leader.tolist() == want


def test_random_codes_at_scale_use_mih_and_stay_exact():
    # 60k uniform codes with planted copies: the cost model picks multi-index hashing.
    rng = np.random.default_rng(5)
    codes = rng.integers(0, np.iinfo(np.uint64).max, size=60_000, dtype=np.uint64, endpoint=True)
    src, dst = rng.integers(0, 60_000, 6000), rng.integers(0, 60_000, 6000)
    codes[dst] = codes[src] ^ (np.uint64(1) << rng.integers(0, 64, 6000).astype(np.uint64))
    assert mih._plan(60_000, 60_000, 8, True) > 0
    got = S.range_pairs(codes, 8, threads=2)
    for q in rng.choice(60_000, 300, replace=False):
        d = H.hamming(codes, codes[q])
        expect = {(min(q, j), max(q, j)) for j in np.flatnonzero(d <= 8) if j != q}
        have = {(i, j) for i, j in zip(got.i.tolist(), got.j.tolist()) if q in (i, j)}
        assert have == expect


def test_radius_and_substring_validation():
    with pytest.raises(ValueError):
        S.range_pairs(np.zeros(3, np.uint64), -1)
    with pytest.raises(ValueError):
        S.range_pairs(np.arange(10, dtype=np.uint64), 8, substrings=1)  # 64-bit table within 8 bits
    with pytest.raises(ValueError):
        S.sample_pairs(np.zeros((3, 2), np.uint64), 4, identity=3)


def _python_sample_distance(x: list[int], y: list[int], ident: int, cx: list[int] | None = None,
                            cy: list[int] | None = None, cr: int = 64) -> tuple[int, int, int]:
    """Closest allowed view pair by Python ints: (distance, view of x, view of y); 65 when none."""
    return min([((a ^ b).bit_count(), i, j) for i, a in enumerate(x) for j, b in enumerate(y)
                if (i < ident or j < ident) and (cx is None or (cx[i] ^ cy[j]).bit_count() <= cr)] or [(65, -1, -1)])


@settings(max_examples=40, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), n=st.integers(1, 70), k=st.integers(1, 4), t=st.integers(0, 3),
       radius=st.integers(0, 10), checked=st.booleans(), cr=st.integers(0, 12))
def test_sample_search_matches_python_reference(seed, n, k, t, radius, checked, cr):
    # Reference: every allowed view pair of every sample pair, by Python's int.bit_count.
    codes = _clustered_codes(seed, n * (k + t), 8, 8).reshape(n, k + t)
    chk = _clustered_codes(seed + 1, n * (k + t), 4, 6).reshape(n, k + t) if checked else None
    cr = cr if checked else 64
    rows = [[int(v) for v in r] for r in codes]
    crow = [[int(v) for v in r] for r in chk] if checked else [None] * n
    ref = {}
    for i in range(n):
        for j in range(i + 1, n):
            d = _python_sample_distance(rows[i], rows[j], k, crow[i], crow[j], cr)
            if d[0] <= radius:
                ref[(i, j)] = d[0]
    got = S.sample_pairs(codes, radius, identity=k, checks=chk, check_radius=cr)
    assert dict(zip(zip(got.i.tolist(), got.j.tolist()), got.distance.tolist())) == ref
    for i, j, d, vi, vj in zip(*(x.tolist() for x in got)):
        assert (vi < k or vj < k) and (rows[i][vi] ^ rows[j][vj]).bit_count() == d
        assert not checked or (crow[i][vi] ^ crow[j][vj]).bit_count() <= cr
    half = n // 2
    cross = S.sample_cross_pairs(codes[:half], codes[half:], radius, identity=k,
                                 checks_a=None if chk is None else chk[:half],
                                 checks_b=None if chk is None else chk[half:], check_radius=cr)
    expect = {(i, j - half): d for (i, j), d in ref.items() if i < half <= j}
    assert dict(zip(zip(cross.i.tolist(), cross.j.tolist()), cross.distance.tolist())) == expect
    for i, j, d, vi, vj in zip(*(x.tolist() for x in cross)):
        assert (vi < k or vj < k) and (rows[i][vi] ^ rows[half + j][vj]).bit_count() == d
    # Components through the code graph are the components of those pairs.
    ii = np.array([p[0] for p in ref] or [], dtype=np.int64)
    jj = np.array([p[1] for p in ref] or [], dtype=np.int64)
    comp = S.sample_components(codes, radius, identity=k, checks=chk, check_radius=cr)
    assert np.array_equal(comp, S.components(n, ii, jj))
    # The set-to-set form with masks gives the same pairs in full-array indices.
    ok = np.random.default_rng(seed).random(n) < 0.8
    both = S.cross_set_pairs(codes, codes, radius, k, ok, ok, chk, chk, cr)
    want = {(i, j) for (i, j) in ref if ok[i] and ok[j]} | {(j, i) for (i, j) in ref if ok[i] and ok[j]}
    assert {(i, j) for i, j in zip(both.i.tolist(), both.j.tolist()) if i != j} == want


# ----------------------------------------------------------------------------- union-find


@settings(max_examples=40, deadline=None)
@given(n=st.integers(1, 300), edges=st.lists(st.tuples(st.integers(0, 299), st.integers(0, 299)), max_size=400))
def test_components_match_scipy(n, edges):
    # Reference: scipy.sparse.csgraph.connected_components.
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    e = np.array([(a % n, b % n) for a, b in edges], dtype=np.int64).reshape(-1, 2)
    lab = S.components(n, e[:, 0], e[:, 1])
    g = coo_matrix((np.ones(len(e)), (e[:, 0], e[:, 1])), shape=(n, n))
    _, ref = connected_components(g, directed=False)
    # Same partition, and each label is the smallest member of its set.
    for a in range(n):
        assert lab[a] == np.flatnonzero(ref == ref[a]).min()
    uf = S.UnionFind(n)
    for a, b in e[: len(e) // 2]:
        uf.union(int(a), int(b))
    uf.union(e[len(e) // 2 :, 0], e[len(e) // 2 :, 1])
    assert np.array_equal(uf.labels(), lab)
    assert uf.find(0) == lab[0]


def test_components_long_chain():
    n = 5000
    lab = S.components(n, np.arange(n - 1)[::-1], np.arange(1, n)[::-1])
    assert (lab == 0).all()


# ----------------------------------------------------------------------------- leader groups


def _sequential_leaders(rank: list, adj: dict[int, set]) -> list[int]:
    """The rule as written: visit by (rank, index); an unclaimed sample leads and claims its
    unclaimed neighbours."""
    leader = [-1] * len(rank)
    for s in sorted(range(len(rank)), key=lambda x: (rank[x], x)):
        if leader[s] < 0:
            leader[s] = s
            for t in adj[s]:
                if leader[t] < 0:
                    leader[t] = s
    return leader


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(seed=st.integers(0, 2**32 - 1), n=st.integers(1, 60), k=st.integers(1, 3), t=st.integers(0, 2),
       radius=st.integers(0, 10), keys=st.integers(1, 80), emb_links=st.integers(0, 30),
       max_rounds=st.sampled_from([0, 1, 2, 64]), checked=st.booleans())
def test_leader_groups_follow_the_sequential_rule(seed, n, k, t, radius, keys, emb_links, max_rounds, checked):
    rng = np.random.default_rng(seed)
    codes = _clustered_codes(seed, n * (k + t), 5, 7).reshape(n, k + t)
    chk = _clustered_codes(seed + 1, n * (k + t), 3, 6).reshape(n, k + t) if checked else None
    cr = 6 if checked else 64
    crow = [[int(v) for v in r] for r in chk] if checked else [None] * n
    has = rng.random(n) < 0.9
    same = np.where(rng.random(n) < 0.7, rng.integers(0, keys, n), -1)
    ei, ej = rng.integers(0, n, emb_links), rng.integers(0, n, emb_links)
    cos = rng.uniform(0.99, 1.0, emb_links)
    rank = rng.integers(0, max(1, n // 3), n)  # ties on purpose: the index breaks them
    rows = [[int(v) for v in r] for r in codes]
    adj: dict[int, set] = {s: set() for s in range(n)}
    for a in range(n):
        for b in range(n):
            if a == b:
                continue
            if same[a] >= 0 and same[a] == same[b]:
                adj[a].add(b)
            if has[a] and has[b] and _python_sample_distance(rows[a], rows[b], k, crow[a], crow[b], cr)[0] <= radius:
                adj[a].add(b)
    for a, b in zip(ei.tolist(), ej.tolist()):
        if a != b:
            adj[a].add(b)
            adj[b].add(a)
    want = _sequential_leaders(rank.tolist(), adj)
    sig = S.Signals(same_key=same, codes=codes, has_codes=has, identity=k, radius=radius, checks=chk, check_radius=cr,
                    emb_pairs=(ei, ej, cos))
    g = S.group(rank, sig, max_rounds=max_rounds)
    assert g.leader.tolist() == want
    # Each member's reported link is its strongest one to its leader, at the right distance.
    for m in np.flatnonzero(g.leader != np.arange(n)).tolist():
        lead = int(g.leader[m])
        if same[m] >= 0 and same[m] == same[lead]:
            assert (g.signal[m], g.distance[m]) == (groups.SAME_BYTES, 0)
        elif has[m] and has[lead] and _python_sample_distance(rows[lead], rows[m], k, crow[lead], crow[m], cr)[0] <= radius:
            d, vk, vm = _python_sample_distance(rows[lead], rows[m], k, crow[lead], crow[m], cr)
            assert (g.signal[m], g.distance[m]) == (groups.CODES, d)
            assert (rows[lead][g.view_kept[m]] ^ rows[m][g.view_member[m]]).bit_count() == d
        else:
            assert g.signal[m] == groups.EMBEDDING and 0 <= g.distance[m] <= 0.01 + 1e-6
    assert (g.signal[g.leader == np.arange(n)] == -1).all()


def test_a_rank_ordered_chain_never_joins_its_ends():
    # A chain a0 - a1 - ... with each link within the radius and ranks in chain order: union-find
    # joins all of it; the leader rule keeps every member next to its own kept sample. Long enough
    # that the parallel rounds hand over to the sequential visit.
    n = 3000
    ii = np.arange(n - 1)
    pairs = (ii, ii + 1, np.full(n - 1, 0.995))
    g = S.group(np.arange(n), S.Signals(emb_pairs=pairs), max_rounds=5)
    assert g.leader.tolist() == [s - (s % 2) for s in range(n)]
    assert g.rounds == 5
    assert (S.components(n, ii, ii + 1) == 0).all()


def test_group_reports_signal_distance_and_transform():
    # 0 and 1: same bytes. 2: 3 bits from 0. 3: linked to 0 by embedding only. 4: its picture is
    # 0's mirror view. 5: alone. Views: one identity view, one mirror view.
    codes = np.array([[0x0, 0xFFFF_0000], [0x0, 0xFFFF_0000], [0b111, 0xABCD], [0xFFFF_FFFF_FFFF_FFFF, 0xFFFF_FFFF_0000_0000],
                      [0xFFFF_0000, 0x5], [0x00FF_00FF_00FF_00FF, 0x0F0F_0F0F_0F0F_0F0F]], dtype=np.uint64)
    emb = np.eye(6, dtype=np.float32)
    emb[3] = emb[0] * 0.995 + np.eye(6, dtype=np.float32)[5] * np.sqrt(1 - 0.995**2)
    sig = S.Signals(same_key=[7, 7, -1, -1, -1, -1], codes=codes, identity=1, radius=8, emb=emb,
                    emb_pairs=(np.array([0]), np.array([3]), np.array([0.995])))
    g = S.group([0, 1, 2, 3, 4, 5], sig)
    assert g.leader.tolist() == [0, 0, 0, 0, 0, 5]
    assert [S.SIGNALS[x] if x >= 0 else None for x in g.signal] == [None, "same_bytes", "codes", "embedding", "codes", None]
    assert g.distance[2] == 3 and g.distance[4] == 0 and g.distance[3] == pytest.approx(0.005, abs=1e-5)
    assert g.sizes().tolist() == [5, 5, 5, 5, 5, 1]
    vs = S.views(S.CodeSettings(scales=[1.0], side_scale=0, transforms=["mirror"]))
    assert g.transforms(vs) == [None, None, "identity", None, "mirror", None]


def test_group_of_nothing_and_of_strangers():
    g = S.group(np.zeros(0), S.Signals(codes=np.zeros((0, 3), np.uint64)))
    assert g.leader.shape == (0,)
    codes = np.array([[1], [1 << 40], [1 << 20]], dtype=np.uint64) * np.uint64(0xFFFF)
    g = S.group([2, 1, 0], S.Signals(codes=codes, radius=4))
    assert g.leader.tolist() == [0, 1, 2] and g.rounds == 0


# ----------------------------------------------------------------------------- cosine


def _unit(rng, n, d):
    x = rng.standard_normal((n, d)).astype(np.float32)
    return x / np.linalg.norm(x, axis=1, keepdims=True)


@pytest.mark.parametrize("backend", ["numpy", "faiss"])
def test_cosine_pairs_exact_mode_matches_scikit_learn(backend):
    # Reference library: scikit-learn's cosine_similarity over every pair (both engines).
    from sklearn.metrics.pairwise import cosine_similarity

    rng = np.random.default_rng(0)
    base = _unit(rng, 40, 16)
    noisy = base + 0.05 * rng.standard_normal(base.shape).astype(np.float32)
    x = np.concatenate([base, noisy / np.linalg.norm(noisy, axis=1, keepdims=True)])
    s = cosine_similarity(x)
    assert not np.any(np.abs(s - 0.97) < 1e-5)  # no pair within float rounding of the threshold
    ref = {(i, j) for i in range(len(x)) for j in range(i + 1, len(x)) if s[i, j] >= 0.97}
    p = S.cosine_pairs(x, 0.97, backend=backend)
    assert set(zip(p.i.tolist(), p.j.tolist())) == ref and len(ref) >= 30
    assert np.allclose(p.distance, s[p.i, p.j], atol=1e-5)


@pytest.mark.parametrize("backend", ["numpy", "faiss"])
def test_cosine_pairs_clustered_mode(backend):
    # SemDeDup-style search within k-means clusters: every pair it reports is real; with every
    # cluster probed it finds them all.
    rng = np.random.default_rng(1)
    centres = _unit(rng, 30, 24)
    x = centres[rng.integers(0, 30, 1500)] + 0.03 * rng.standard_normal((1500, 24)).astype(np.float32)
    x /= np.linalg.norm(x, axis=1, keepdims=True)
    s = x @ x.T
    ref = {(i, j) for i, j in zip(*np.nonzero(np.triu(s >= 0.98, 1)))}
    part = S.cosine_pairs(x, 0.98, clusters=30, probes=2, exact_max=100, backend=backend)
    got = set(zip(part.i.tolist(), part.j.tolist()))
    assert got <= ref and len(got) >= 0.95 * len(ref)
    full = S.cosine_pairs(x, 0.98, clusters=8, probes=8, exact_max=100, backend=backend)
    assert set(zip(full.i.tolist(), full.j.tolist())) == ref
    again = S.cosine_pairs(x, 0.98, clusters=30, probes=2, exact_max=100, backend=backend)
    assert all(np.array_equal(a, b) for a, b in zip(part, again))  # deterministic


@pytest.mark.parametrize("backend", ["numpy", "faiss"])
def test_cross_cosine_equals_scikit_learn(backend):
    # Reference library: scikit-learn's cosine_similarity over every pair.
    from sklearn.metrics.pairwise import cosine_similarity

    rng = np.random.default_rng(3)
    a = rng.normal(size=(300, 16)).astype(np.float32)
    b = np.r_[a[:20] + 0.05 * rng.normal(size=(20, 16)), rng.normal(size=(80, 16))].astype(np.float32)
    a /= np.linalg.norm(a, axis=1, keepdims=True)
    b /= np.linalg.norm(b, axis=1, keepdims=True)
    ref = cosine_similarity(a, b)
    want = set(zip(*np.nonzero(ref >= 0.97)))
    p = cosine.cross_cosine(a, b, 0.97, block=64, backend=backend)
    assert not np.any(np.abs(ref - 0.97) < 1e-5)
    assert set(zip(p.i.tolist(), p.j.tolist())) == want and len(want) >= 20
    assert np.allclose(p.distance, ref[p.i, p.j], atol=1e-5)
