"""Near-duplicate groups on hard cases built from public photos: distinct but similar textures,
chains built on purpose, and mirrored, turned and cropped copies.

Every input is fixed before any code is computed (named photos, fixed tiles, fixed steps, fixed
seeds); nothing is redrawn until the codes keep pictures apart, so each check here can fail.
Photos: scikit-image `skimage.data` (brick, grass, gravel textures; astronaut, coffee, chelsea),
and the photo list of bench/photoset.py (scikit-image, scikit-learn and matplotlib sample photos).
"""
from __future__ import annotations

import random
import sys
from pathlib import Path

import numpy as np
import pytest

from curate import similarity as S
from curate.similarity import codes as C

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "bench"))
skdata = pytest.importorskip("skimage.data")
pytest.importorskip("sklearn")
from PIL import Image, ImageEnhance, ImageFilter  # noqa: E402

import photoset  # noqa: E402

# Every view turn on: the most view pairs per sample pair, so the most chances of a false match.
TURNS = S.CodeSettings(transforms=["mirror", "rot90", "rot180", "rot270"])


def _codes(images: list[Image.Image], settings: S.CodeSettings) -> tuple[np.ndarray, np.ndarray]:
    return C.split_codes(np.array([S.image_codes(im, settings) for im in images]), settings)


def _group(images: list[Image.Image], settings: S.CodeSettings, rank) -> tuple[S.Groups, np.ndarray, np.ndarray]:
    main, check = _codes(images, settings)
    sig = S.Signals(codes=main, identity=S.identity_count(settings), checks=check)
    return S.group(rank, sig), main, check


def _rule_distance(main: np.ndarray, check: np.ndarray, ident: int, a: int, b: int) -> int:
    """The sample distance by Python ints: closest view pair with an identity view whose check
    codes are within the check radius (65 when none)."""
    ma, mb, ca, cb = (x.tolist() for x in (main[a], main[b], check[a], check[b]))
    return min([(x ^ y).bit_count() for u, x in enumerate(ma) for v, y in enumerate(mb)
                if (u < ident or v < ident) and (ca[u] ^ cb[v]).bit_count() <= S.CHECK_RADIUS] or [65])


def _assert_diameter(g: S.Groups, main: np.ndarray, check: np.ndarray, settings: S.CodeSettings) -> int:
    """Every member within the radius of its own kept sample, recomputed by brute force; the largest."""
    ident = S.identity_count(settings)
    worst = 0
    for m in np.flatnonzero(g.leader != np.arange(g.leader.shape[0])).tolist():
        d = _rule_distance(main, check, ident, int(g.leader[m]), m)
        assert d <= S.RADIUS and d == g.distance[m], (m, int(g.leader[m]), d)
        worst = max(worst, d)
    return worst


def _pil(arr: np.ndarray) -> Image.Image:
    return Image.fromarray(arr).convert("RGB")


# --------------------------------------------------------------------------- similar textures


def test_distinct_tiles_of_one_texture_are_never_merged():
    # scikit-image's brick, grass and gravel textures (512 x 512), each cut into four 256 px tiles
    # that do not overlap: twelve distinct pictures of three similar textures. Each tile also comes
    # as a JPEG, blurred, brightened, mirrored and 8%-cropped copy, so chains could form.
    files, tile_of = [], []
    for name in ("brick", "grass", "gravel"):
        texture = _pil(getattr(skdata, name)())
        for qy in range(2):
            for qx in range(2):
                tile = texture.crop((qx * 256, qy * 256, qx * 256 + 256, qy * 256 + 256))
                copies = [tile, photoset.decode_like_inspect(photoset._encode(tile, "JPEG", quality=30)),
                          tile.filter(ImageFilter.GaussianBlur(1.5)), ImageEnhance.Brightness(tile).enhance(1.2),
                          tile.transpose(Image.Transpose.FLIP_LEFT_RIGHT), tile.crop((20, 0, 256, 256))]
                files += copies
                tile_of += [f"{name}{qy}{qx}"] * len(copies)
    rank = np.random.default_rng(0).permutation(len(files))
    g, main, check = _group(files, TURNS, rank)
    tiles = np.array(tile_of)
    for lead in np.unique(g.leader):
        assert len(set(tiles[g.leader == lead])) == 1, sorted(set(tiles[g.leader == lead]))
    _assert_diameter(g, main, check, TURNS)
    # The JPEG, blurred and brightened copies (positions 1-3 of each tile's six files) are found too.
    found = [g.leader[i] == g.leader[i - i % 6] for i in range(len(files)) if i % 6 in (1, 2, 3)]
    assert np.mean(found) >= 0.9


# --------------------------------------------------------------------------- chains


def _blend_chain() -> list[Image.Image]:
    """scikit-image astronaut fading into coffee in 5% steps: each step a near copy of the last."""
    a = _pil(skdata.astronaut()).resize((256, 256), Image.Resampling.LANCZOS)
    c = _pil(skdata.coffee()).resize((256, 256), Image.Resampling.LANCZOS)
    return [Image.blend(a, c, k / 20) for k in range(21)]


def _window_chain() -> list[Image.Image]:
    """A window of 60% of scikit-image's chelsea sliding right in steps of 5% of its width."""
    cat = _pil(skdata.chelsea())
    w, h = cat.size
    return [cat.crop((round(w * 0.05 * k), 0, round(w * (0.05 * k + 0.6)), h)) for k in range(9)]


@pytest.mark.parametrize("chain", [_blend_chain, _window_chain], ids=["blend", "window"])
@pytest.mark.parametrize("order", ["along", "against", "random"])
def test_chains_never_put_their_far_ends_together(chain, order):
    images = chain()
    n = len(images)
    rank = {"along": np.arange(n), "against": np.arange(n)[::-1],
            "random": np.random.default_rng(1).permutation(n)}[order]
    g, main, check = _group(images, TURNS, rank)
    ident = S.identity_count(TURNS)
    # The inputs really form a chain: neighbours linked all the way, ends far apart (so union-find
    # would put the two ends in one group).
    assert S.sample_components(main, S.RADIUS, ident, check)[n - 1] == 0
    assert _rule_distance(main, check, ident, 0, n - 1) > S.RADIUS
    assert g.leader[0] != g.leader[n - 1]
    _assert_diameter(g, main, check, TURNS)


# --------------------------------------------------------------------------- mirrored, turned, cropped


@pytest.fixture(scope="module")
def copies() -> list[dict]:
    """Each photo of bench/photoset.py as a JPEG original, plus its mirror image, its three turns,
    and crops of 10% (from one random side, and centred), decoded as the inspect stage decodes."""
    rows = []
    for name in photoset.PHOTOS:
        img = photoset.load_photo(name)
        rows.append({"photo": name, "edit": "original", "image": photoset.decode_like_inspect(photoset.original_bytes(img))})
        for turn, edit, data in photoset.hard_variants(name, img, turns=("identity", "mirror", "rot90", "rot180", "rot270"),
                                                       crops=("none", "crop_one_10", "crop_centre_10")):
            rows.append({"photo": name, "edit": edit, "turn": turn, "image": photoset.decode_like_inspect(data)})
    return rows


def _recall(rows: list[dict], settings: S.CodeSettings) -> tuple[dict, S.Groups, np.ndarray, np.ndarray]:
    """Share of each edit's copies in their original's group, with the transform it was found by;
    originals rank first (the best copy), the rest in a fixed shuffled order."""
    order = [i for i, r in enumerate(rows) if r["edit"] == "original"]
    rest = [i for i, r in enumerate(rows) if r["edit"] != "original"]
    random.Random(2).shuffle(rest)
    rank = np.empty(len(rows), np.int64)
    rank[order + rest] = np.arange(len(rows))
    g, main, check = _group([r["image"] for r in rows], settings, rank)
    orig = {r["photo"]: i for i, r in enumerate(rows) if r["edit"] == "original"}
    found = g.transforms(S.views(settings))
    out: dict[str, list] = {}
    for i, r in enumerate(rows):
        if r["edit"] != "original":
            out.setdefault(r["edit"], []).append((bool(g.leader[i] == orig[r["photo"]]), found[i]))
    return out, g, main, check


def test_mirrored_and_turned_copies_are_found_and_named(copies):
    # Target: recall >= 0.98 for mirror images and turns. The transform named is the one applied.
    hits, g, main, check = _recall(copies, TURNS)
    for edit in ("mirror", "rot90", "rot180", "rot270"):
        got = hits[edit]
        assert np.mean([h for h, _ in got]) >= 0.98, edit
        assert np.mean([t == edit for h, t in got if h]) >= 0.98, (edit, [t for _, t in got])
    photos = np.array([r["photo"] for r in copies])
    for lead in np.unique(g.leader):
        assert len(set(photos[g.leader == lead])) == 1, sorted(set(photos[g.leader == lead]))
    assert _assert_diameter(g, main, check, TURNS) <= S.RADIUS


def test_the_default_views_find_mirror_images_not_turns(copies):
    # The default code settings hold the mirror view only (mirrored copies are duplicates for
    # training: common practice); turned copies need the turn views.
    hits, g, main, check = _recall(copies, S.CodeSettings())
    assert np.mean([h for h, _ in hits["mirror"]]) >= 0.98
    assert np.mean([h for h, _ in hits["rot90"] + hits["rot270"]]) <= 0.1


def test_ten_percent_crops_are_found(copies):
    # Crops of 10% of one side, or 5% from each end, alone or after a mirror or turn: the crop views
    # (0.92 and 0.84 centred, 0.92 edge-anchored) cover them. Measured on these photos with the same
    # views in bench/neardup_quality.py: centred 1.000 for every turn, one side 0.90-1.00 (one or two
    # misses in 20 photos); this holds the stated level. 20% and 30% crops are mostly not found by
    # codes (the bench's table), which is what the stage states.
    hits, g, main, check = _recall(copies, TURNS)
    crops = {e: [h for h, _ in v] for e, v in hits.items() if "crop" in e}
    assert len(crops) == 10
    for edit, got in crops.items():
        assert np.mean(got) >= (0.95 if "centre" in edit else 0.85), edit
    assert np.mean([h for v in crops.values() for h in v]) >= 0.95
