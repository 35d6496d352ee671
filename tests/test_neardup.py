"""hashes + neardup stages: public photos and their edited copies, the keeper rule, edge cases."""
from __future__ import annotations

import collections
import hashlib
import random
import sys
from pathlib import Path

import numpy as np
import pyarrow as pa
import pytest

from curate import similarity
from curate.errors import ConfigError
from curate.stages import REGISTRY, neardup
from curate.stages import hashes as hashes_mod

from conftest import pipeline_config, stage_call

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "bench"))
pytest.importorskip("skimage")
pytest.importorskip("sklearn")
import photoset  # noqa: E402


def _run(table: pa.Table, *sets: str) -> pa.Table:
    return stage_call("neardup", table, *sets)


def _table(rows: list[dict], emb: np.ndarray | None = None, hashes: str | None = None) -> pa.Table:
    """A neardup input table: rows with sample_id, bytes or sha, image or codes, size, flags...
    ``hashes``: a --set of the [hashes] section the codes are made with."""
    hcfg = pipeline_config(*([hashes] if hashes else [])).hashes
    col = hashes_mod.CODES
    cols = collections.defaultdict(list)
    for r in rows:
        cols["sample_id"].append(r["id"])
        cols["source"].append(r["id"] + ".jpg")
        cols["decoded"].append(r.get("decoded", True))
        img = r.get("image")
        cols["width"].append(r.get("width", img.width if img is not None else 100))
        cols["height"].append(r.get("height", img.height if img is not None else 100))
        cols["sha256"].append(r.get("sha") or (hashlib.sha256(r["bytes"]).hexdigest() if "bytes" in r else None))
        if "codes" in r:
            cols[col].append(r["codes"])
        else:
            cols[col].append(hashes_mod.image_codes(img, hcfg) if img is not None else None)
        cols["agreement"].append(r.get("agreement"))
        cols["flags_before"].append(r.get("flags", []))
    (codes_col,) = hashes_mod.columns(REGISTRY["hashes"].view(pipeline_config(*([hashes] if hashes else []))))
    fields = [pa.field("sample_id", pa.string()), pa.field("source", pa.string()), pa.field("decoded", pa.bool_()),
              pa.field("width", pa.int32()), pa.field("height", pa.int32()), pa.field("sha256", pa.string()),
              pa.field(codes_col.name, codes_col.type), pa.field("agreement", pa.float32()),
              pa.field("flags_before", pa.list_(pa.string()))]
    t = pa.Table.from_arrays([pa.array(cols[f.name], type=f.type) for f in fields], schema=pa.schema(fields))
    if emb is not None:
        t = t.append_column("image_emb", pa.FixedSizeListArray.from_arrays(pa.array(emb.astype(np.float16).ravel()), emb.shape[1]))
    return t


def _by_id(out: pa.Table) -> dict[str, dict]:
    return {r["sample_id"]: r for r in out.to_pylist()}


# ----------------------------------------------------------------------------- public photos

# Photos whose every edit is checked here (the full set runs in bench/neardup_quality.py).
EDITED = ("astronaut", "coffee", "china", "grace_hopper", "camera")


@pytest.fixture(scope="module")
def photo_rows() -> list[dict]:
    rows = []
    for name in photoset.PHOTOS:
        img = photoset.load_photo(name)
        data = photoset.original_bytes(img)
        rows.append({"id": f"{name}/original", "photo": name, "family": "original", "bytes": data,
                     "image": photoset.decode_like_inspect(data)})
        if name in EDITED:
            for fam, edit, data in photoset.variants(name, img):
                rows.append({"id": f"{name}/{edit}", "photo": name, "family": fam, "bytes": data,
                             "image": photoset.decode_like_inspect(data)})
    return rows


@pytest.fixture(scope="module")
def photo_groups(photo_rows) -> dict[str, dict]:
    return _by_id(_run(_table(photo_rows)))


def test_distinct_public_photos_are_never_grouped(photo_rows, photo_groups):
    # Public photos from scikit-image, scikit-learn and matplotlib: different pictures, so no group
    # may hold two of them (the quality target: zero merges), edited copies included.
    photos_of = collections.defaultdict(set)
    for r in photo_rows:
        photos_of[photo_groups[r["id"]]["group_id"]].add(r["photo"])
    assert all(len(p) == 1 for p in photos_of.values()), [p for p in photos_of.values() if len(p) > 1]
    originals = [photo_groups[f"{n}/original"]["group_id"] for n in photoset.PHOTOS]
    assert len(set(originals)) == len(photoset.PHOTOS)


@pytest.mark.parametrize("family", list(photoset.TRANSFORMS))
def test_every_edit_lands_in_its_originals_group(photo_rows, photo_groups, family):
    # Each transform of the quality target (JPEG quality, rescale, blur, brightness, contrast,
    # format, border crops up to 8% per side, corner stamps): the copy joins its original's group.
    for r in photo_rows:
        if r["family"] == family:
            g = photo_groups[r["id"]]
            assert g["group_id"] == photo_groups[f"{r['photo']}/original"]["group_id"], r["id"]


def test_plain_phash_misses_crops_and_stamps(photo_rows):
    # Why the views exist: one whole-picture pHash puts 8% crops and corner stamps far from the
    # original (Zauner 2010 measured pHash under compression and scaling, not crops).
    plain = similarity.CodeSettings(scales=[1.0], side_scale=0.0, corner_mask=0.0, transforms=[], check="",
                                    work_size=0)
    by = {r["id"]: r for r in photo_rows}
    crop, orig = by["astronaut/crop_even_8"]["image"], by["astronaut/original"]["image"]
    d = similarity.min_distance(similarity.image_codes(crop, plain), similarity.image_codes(orig, plain))
    assert d > neardup.NeardupConfig().radius
    s = hashes_mod.code_settings(hashes_mod.HashesConfig())
    (mc, cc), (mo, co) = (similarity.split_codes(similarity.image_codes(x, s), s) for x in (crop, orig))
    d_views = similarity.min_distance(mc, mo, similarity.identity_count(s), cc, co)
    assert d_views <= neardup.NeardupConfig().radius


def test_keeper_is_the_largest_copy_and_others_point_to_it(photo_groups):
    g = photo_groups["astronaut/original"]
    members = [r for r in photo_groups.values() if r["group_id"] == g["group_id"]]
    keepers = [r for r in members if r["dup_of"] is None]
    assert len(keepers) == 1
    # scale_1.6 is the only copy with more pixels than the original.
    assert keepers[0]["sample_id"] == "astronaut/scale_1.6" == g["group_id"]
    for r in members:
        assert r["group_size"] == len(members)
        (c,) = r["neardup.checks"]
        assert c["code"] == "duplicate" and c["failed"] == (r["dup_of"] is not None)
        if r["dup_of"] is not None:
            assert r["dup_of"] == keepers[0]["sample_id"] and r["dup_signal"] in ("phash", "sha256")
            assert keepers[0]["sample_id"] in c["detail"]


def test_copies_name_how_they_relate_to_the_keeper(photo_rows, photo_groups):
    # Photometric edits keep the geometry: the same view of both matched. An 8% crop per side is
    # matched by the kept picture's 84% crop (Zauner 2010 measured pHash under compression and
    # scaling; crops need the crop views).
    for r in photo_rows:
        g = photo_groups[r["id"]]
        if r["family"] in ("jpeg", "blur", "brightness", "contrast") and g["dup_of"] is not None:
            assert g["dup_transform"] in ("identity", "crop") and g["dup_signal"] in ("phash", "sha256"), r["id"]
            assert g["dup_transform"] == "identity" or g["dup_signal"] == "phash"
    assert photo_groups["astronaut/crop_even_8"]["dup_transform"] == "crop"
    assert "crop" in photo_groups["astronaut/crop_even_8"]["neardup.checks"][0]["detail"]


@pytest.mark.parametrize("transpose,name", [("FLIP_LEFT_RIGHT", "mirror"), ("ROTATE_180", "rot180"),
                                            ("ROTATE_90", "rot90"), ("FLIP_TOP_BOTTOM", None)])
def test_mirrored_and_turned_copies_are_found_and_named(transpose, name):
    # No perceptual hash survives a flip (Zauner 2010): the transformed views find the copy, and the
    # ledger names the transform. A flip upside down is not among the configured transforms.
    from PIL import Image

    orig = photoset.decode_like_inspect(photoset.original_bytes(photoset.load_photo("coffee")))
    copy = orig.transpose(getattr(Image.Transpose, transpose)).resize((orig.width * 3 // 4, orig.height * 3 // 4)
                                                                       if transpose != "ROTATE_90" else
                                                                       (orig.height * 3 // 4, orig.width * 3 // 4))
    rows = [{"id": "orig", "image": orig}, {"id": "copy", "image": copy}]
    out = _by_id(_run(_table(rows, hashes='hashes.transforms=["mirror", "rot90", "rot180", "rot270"]'),
                      'hashes.transforms=["mirror", "rot90", "rot180", "rot270"]'))
    if name is None:
        assert out["copy"]["dup_of"] is None
        return
    assert out["copy"]["dup_of"] == "orig" and out["copy"]["dup_transform"] == name
    assert out["copy"]["dup_distance"] <= neardup.NeardupConfig().radius


# ----------------------------------------------------------------------------- keeper rule


def _codes(seed: int, flips: int = 0, base: int | None = None) -> list[int]:
    rng = random.Random(seed)
    b = base if base is not None else rng.getrandbits(64)
    for _ in range(flips):
        b ^= 1 << rng.randrange(64)
    return [b] * hashes_mod.variants(hashes_mod.HashesConfig())


def _rule_rows() -> list[dict]:
    base = 0x0123456789ABCDEF
    return [
        {"id": "e", "codes": _codes(1, 2, base), "width": 2000, "height": 2000, "agreement": 0.2,
         "flags": ["watermark"]},
        {"id": "b", "codes": _codes(2, 3, base), "width": 800, "height": 600, "agreement": 0.25},
        {"id": "d", "codes": _codes(3, 1, base), "width": 800, "height": 600, "agreement": 0.31},
        {"id": "c", "codes": _codes(4, 0, base), "width": 800, "height": 600, "agreement": 0.31},
        {"id": "a", "codes": _codes(5, 4, base), "width": 640, "height": 480, "agreement": 0.9},
        {"id": "z", "codes": _codes(99), "width": 10, "height": 10},
        {"id": "x", "codes": None, "decoded": False, "width": None, "height": None},
    ]


def test_keeper_rule_order_and_determinism():
    # Rule (documented in neardup), here with agreement in the keeper list: no flags, most pixels,
    # highest agreement, smallest id.
    rows = _rule_rows()
    order = 'neardup.keeper=["unflagged", "pixels", "agreement"]'
    out = _by_id(_run(_table(rows), order))
    # e has the most pixels but carries a flag; b, c, d tie on pixels; c and d tie on
    # agreement; c has the smaller id.
    for sid in "abde":
        assert out[sid]["group_id"] == "c" and out[sid]["dup_of"] == "c"
    assert out["c"]["dup_of"] is None and out["c"]["group_size"] == 5
    assert out["z"]["group_id"] == "z" and out["z"]["group_size"] == 1 and out["z"]["dup_of"] is None
    assert out["x"]["group_id"] is None and out["x"]["neardup.checks"] == []
    assert out["a"]["dup_signal"] == "phash" and out["a"]["dup_distance"] == 4
    # Same answer whatever the row order.
    for seed in range(3):
        shuffled = rows[:]
        random.Random(seed).shuffle(shuffled)
        again = _by_id(_run(_table(shuffled), order))
        assert again == out
    # Without the flag, e (most pixels) keeps the group.
    rows[0]["flags"] = []
    out2 = _by_id(_run(_table(rows), order))
    assert out2["c"]["dup_of"] == "e" and out2["e"]["dup_of"] is None


def test_exact_bytes_group_without_codes():
    rows = [{"id": "p", "sha": "aa" * 32, "codes": None}, {"id": "q", "sha": "aa" * 32, "codes": None},
            {"id": "r", "sha": "bb" * 32, "codes": None}]
    out = _by_id(_run(_table(rows)))
    assert out["q"]["dup_of"] == "p" and out["q"]["dup_signal"] == "sha256" and out["q"]["dup_distance"] == 0
    assert out["r"]["group_size"] == 1


def test_chained_copies_do_not_share_one_group():
    # a-b and b-c within the radius, a-c beyond it. Union of pairs would put all three together
    # (the chaining a transitive closure gives); the leader rule keeps every member within the
    # radius of its own kept sample: a (most pixels) keeps b, and c, 16 bits from a, is kept alone.
    a = 0
    b = (1 << 8) - 1  # 8 bits from a
    c = b | (((1 << 8) - 1) << 8)  # 8 bits from b, 16 from a
    k = hashes_mod.variants(hashes_mod.HashesConfig())
    rows = [{"id": i, "codes": [v] * k, "width": w, "height": w} for i, v, w in (("a", a, 500), ("b", b, 400), ("c", c, 300))]
    out = _by_id(_run(_table(rows)))
    assert out["b"]["group_id"] == "a" and out["b"]["dup_distance"] == 8
    assert out["c"]["group_id"] == "c" and out["c"]["dup_of"] is None and out["a"]["group_size"] == 2


def test_the_keeper_claims_first_even_against_a_closer_chain():
    # c is 8 bits from b and 16 from a; b (best rank) is within 8 of both a and c. The leader rule
    # visits b first: it claims a and c, so the group is whole and every member is near b.
    b = (1 << 8) - 1
    a, c = 0, b | (((1 << 8) - 1) << 8)
    k = hashes_mod.variants(hashes_mod.HashesConfig())
    rows = [{"id": i, "codes": [v] * k, "width": w, "height": w} for i, v, w in (("a", a, 400), ("b", b, 500), ("c", c, 300))]
    out = _by_id(_run(_table(rows)))
    assert {out[i]["group_id"] for i in "abc"} == {"b"} and out["b"]["group_size"] == 3
    assert out["a"]["dup_distance"] == 8 and out["c"]["dup_distance"] == 8


def test_semantic_links_need_embeddings_and_the_threshold():
    rng = np.random.default_rng(0)
    e = rng.standard_normal((3, 32)).astype(np.float32)
    e[1] = e[0] + 0.01 * rng.standard_normal(32)
    e /= np.linalg.norm(e, axis=1, keepdims=True)
    rows = [{"id": s, "codes": _codes(i)} for i, s in enumerate("uvw")]
    out = _by_id(_run(_table(rows, emb=e)))
    assert out["v"]["dup_of"] == "u" and out["v"]["dup_signal"] == "embedding"
    assert 0 <= out["v"]["dup_distance"] < 1 - neardup.NeardupConfig().cosine + 1e-3
    assert out["w"]["group_size"] == 1
    out = _by_id(_run(_table(rows, emb=e), "neardup.semantic=false"))
    assert out["v"]["group_size"] == 1


def test_semantic_links_reach_every_copy_of_the_same_file():
    # p and q are the same file (same bytes, same embedding); r is a larger copy by embedding only.
    # The search runs once per file, but the leader rule needs r linked to both: r (most pixels)
    # claims p and q, so no copy is left as a keeper of its own.
    rng = np.random.default_rng(1)
    e = rng.standard_normal((3, 32)).astype(np.float32)
    e[1] = e[0]
    e[2] = e[0] + 0.01 * rng.standard_normal(32)
    e /= np.linalg.norm(e, axis=1, keepdims=True)
    rows = [{"id": "p", "sha": "aa" * 32, "codes": _codes(1), "width": 100, "height": 100},
            {"id": "q", "sha": "aa" * 32, "codes": _codes(1), "width": 100, "height": 100},
            {"id": "r", "sha": "bb" * 32, "codes": _codes(2), "width": 200, "height": 200}]
    out = _by_id(_run(_table(rows, emb=e)))
    assert out["p"]["dup_of"] == "r" and out["q"]["dup_of"] == "r" and out["r"]["group_size"] == 3
    assert out["p"]["dup_signal"] == out["q"]["dup_signal"] == "embedding"
    assert out["q"]["dup_transform"] is None


def test_empty_and_all_undecoded():
    out = _run(_table([]))
    assert out.num_rows == 0 and out.schema == neardup.OUTPUT_SCHEMA
    rows = [{"id": "x", "codes": None, "decoded": False}]
    out = _run(_table(rows)).to_pylist()
    assert out[0]["group_id"] is None


# ----------------------------------------------------------------------------- contracts


def test_registration_and_config():
    st = REGISTRY["neardup"]
    assert st.kind == "global" and st.checks[0].code == "duplicate" and st.checks[0].action == "drop"
    assert "hashes" in st.sections and st.alive_only
    # 3 centred + 4 edge crops = 7 identity views; each transform adds 7 views; a check code per view.
    cfg = pipeline_config("neardup.radius=6", "hashes.transforms=[]", 'hashes.check=""')
    assert cfg.neardup.radius == 6 and hashes_mod.variants(cfg.hashes) == 7
    cfg = pipeline_config('hashes.transforms=["mirror", "rot180"]', 'hashes.transform_boxes="all"')
    assert hashes_mod.variants(cfg.hashes) == 2 * 21
    cfg = pipeline_config('hashes.transforms=["mirror", "rot180"]', 'hashes.transform_boxes="whole"')
    assert hashes_mod.variants(cfg.hashes) == 2 * 9
    for bad in ("neardup.radius=40", "neardup.cosine=1.5", "hashes.scales=[]", "hashes.corner_mask=0.6",
                'hashes.transforms=["sideways"]', 'hashes.check="phash"', "neardup.check_radius=70"):
        with pytest.raises(ConfigError):
            pipeline_config(bad)


def test_codes_matrix_handles_nulls_and_slices():
    hcfg = hashes_mod.HashesConfig()
    k = hashes_mod.variants(hcfg)
    (field,) = hashes_mod.columns(REGISTRY["hashes"].view(pipeline_config()))
    vals = [[i] * k if i % 3 else None for i in range(10)]
    arr = pa.array(vals, type=field.type)
    codes, valid = hashes_mod.codes_matrix(arr.slice(2, 6), k)
    assert valid.tolist() == [v is not None for v in vals[2:8]]
    for row, v in zip(codes, vals[2:8]):
        assert row.tolist() == (v if v is not None else [0] * k)
    chunked = pa.chunked_array([arr.slice(0, 4), arr.slice(4)])
    codes2, valid2 = hashes_mod.codes_matrix(chunked, k)
    assert valid2.sum() == sum(v is not None for v in vals) and codes2[5].tolist() == vals[5]


# ----------------------------------------------------------------------------- the best copy is kept


def _pair(**diff) -> pa.Table:
    """Two copies of one picture (same codes) that differ in exactly the given columns."""
    base = {"width": 800, "height": 600, "format": "JPEG", "jpeg_quality": 90.0, "sharpness": 0.5,
            "border_share": 0.0, "overlay_share": 0.0, "flags": []}
    rows = []
    for sid, which in (("a", 0), ("b", 1)):
        r = dict(base)
        for k, (va, vb) in diff.items():
            r[k] = (va, vb)[which]
        rows.append(r | {"id": sid})
    t = _table([{"id": r["id"], "codes": _codes(1), "width": r["width"], "height": r["height"],
                 "flags": r["flags"]} for r in rows])
    for col, typ in (("format", pa.string()), ("jpeg_quality", pa.float32()), ("sharpness", pa.float32()),
                     ("border_share", pa.float32()), ("overlay_share", pa.float32())):
        t = t.append_column(col, pa.array([r[col] for r in rows], typ))
    return t


@pytest.mark.parametrize("diff,winner,reason", [
    # Each pair differs in exactly one criterion; the default priority picks the better copy ("a" would
    # win every tie on sample_id, so "b" winning shows the criterion decided).
    ({"flags": (["watermark"], [])}, "b", "unflagged"),
    ({"width": (640, 800), "height": (480, 600)}, "b", "pixels"),
    ({"jpeg_quality": (70.0, 95.0)}, "b", "fidelity"),
    ({"format": ("JPEG", "PNG"), "jpeg_quality": (95.0, None)}, "b", "fidelity"),
    ({"sharpness": (0.3, 0.6)}, "b", "sharpness"),
    ({"overlay_share": (0.05, 0.0)}, "b", "clean"),
    ({"border_share": (0.12, 0.0)}, "b", "clean"),
    ({}, "a", "sample_id"),
])
def test_the_best_copy_is_kept(diff, winner, reason):
    out = _by_id(_run(_pair(**diff)))
    loser = "a" if winner == "b" else "b"
    assert out[winner]["dup_of"] is None and out[loser]["dup_of"] == winner
    assert out[loser]["keep_reason"] == reason
    assert f"wins on {reason}" in out[loser]["neardup.checks"][0]["detail"]


def test_keeper_order_is_configurable():
    t = _pair(width=(1000, 800), sharpness=(0.2, 0.9))
    assert _by_id(_run(t))["b"]["dup_of"] == "a"  # pixels first by default
    out = _by_id(_run(t, 'neardup.keeper=["sharpness", "pixels"]'))
    assert out["a"]["dup_of"] == "b" and out["a"]["keep_reason"] == "sharpness"
    with pytest.raises(ConfigError):
        pipeline_config('neardup.keeper=["prettiest"]')


# ----------------------------------------------------------------------------- end to end


def test_explain_names_the_transform_of_a_mirrored_copy(tmp_path, capsys):
    # A public photo (scikit-image's astronaut) and its mirror image: no perceptual hash survives a
    # flip (Zauner 2010), the mirror views (on by default) find it, and explain says so for the
    # dropped copy.
    from PIL import Image

    from curate import api
    from curate.cli import main

    img = photoset.load_photo("astronaut")
    root = tmp_path / "in"
    root.mkdir()
    img.save(root / "a.jpg", quality=95)
    img.transpose(Image.Transpose.FLIP_LEFT_RIGHT).resize((400, 400)).save(root / "b.jpg", quality=90)
    for stem in "ab":
        (root / f"{stem}.txt").write_text("an astronaut in a white suit beside a flag", encoding="utf-8")
    out = tmp_path / "out"
    assert main(["run", "--input", str(root), "--out", str(out), "--quiet", "--set", "run.workers=1",
                 "--set", "embed.enabled=false", "--set", "agreement.enabled=false"]) == 0
    info = api.explain(out, "b.jpg")
    assert info["reasons"] == ["duplicate"] and info["dup_transform"] == "mirror"
    (dup,) = [c for c in info["checks"] if c["code"] == "duplicate"]
    assert dup["failed"] and "mirror" in dup["detail"] and dup["value"] <= neardup.NeardupConfig().radius
    assert [m["dup_transform"] for m in info["group"] if m["source"] == "b.jpg"] == ["mirror"]
    capsys.readouterr()
    assert main(["explain", str(out), "b.jpg"]) == 0
    text = capsys.readouterr().out
    assert "(mirror)" in text and "duplicate" in text


@pytest.mark.parametrize("workers", [1, 3, 16])
def test_the_code_search_runs_on_every_worker_of_the_run(monkeypatch, workers):
    # A large machine's cores all serve the corpus-wide search: the thread count is the run's
    # workers, not a fixed cap (the search's results do not depend on it; see test_similarity).
    seen = []
    real = neardup.group_samples

    def spy(*args):
        seen.append(args[-1])
        return real(*args)

    monkeypatch.setattr(neardup, "group_samples", spy)
    out = stage_call("neardup", _table(_rule_rows()), workers=workers)
    assert out.num_rows == len(_rule_rows())
    assert seen == [workers]
