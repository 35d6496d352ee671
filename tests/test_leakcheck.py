"""leakcheck: exact cross-set search (checked against brute force and imagehash), the five kinds of
set, the CLI contract (exit 1 on leaks, --json), the HTML page, and a run's own train/eval split."""
from __future__ import annotations

import json
import shutil
import sys
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import curate.stages  # noqa: F401  (registers the stages)
import curate.stages.embed  # noqa: F401
import curate.stages.hashes  # noqa: F401
import curate.stages.neardup  # noqa: F401
import curate.stages.split  # noqa: F401
from curate import imagesets, similarity
from curate.leakcheck import cross_set_pairs, leakcheck

from conftest import scene_photo, to_jpeg

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "sample_corpus"))


# --------------------------------------------------------------------------- oracle on random codes


def _set_codes(codes: np.ndarray, tag: str, settings: similarity.CodeSettings | None = None) -> imagesets.SetCodes:
    n = codes.shape[0]
    names = [f"{tag}{i}" for i in range(n)]
    s = imagesets.ImageSet(f"/{tag}", "folder", names, names, [(0, 0)] * n, [None] * n)
    return imagesets.SetCodes(s, codes, np.ones(n, bool), [None] * n, 0, settings)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_cross_search_equals_brute_force(seed):
    # Oracle: every pair's distance from Python's own int.bit_count (popcount of the XOR), min over
    # the K x K variant pairs; the search must return exactly the pairs within the radius.
    rng = np.random.default_rng(seed)
    k, radius = 3, 8
    a = rng.integers(0, 2**64 - 1, size=(180, k), dtype=np.uint64)
    b = rng.integers(0, 2**64 - 1, size=(120, k), dtype=np.uint64)
    for j in range(40):  # planted neighbours: a copy of an A sample with 0..12 bits flipped
        i = int(rng.integers(180))
        for v in range(k):
            flips = rng.choice(64, size=int(rng.integers(0, 13)), replace=False)
            b[j, v] = a[i, v] ^ np.uint64(sum(1 << int(f) for f in flips))
    got = {(p["a"], p["b"]): p["distance"] for p in cross_set_pairs(_set_codes(a, "a"), _set_codes(b, "b"), radius)}
    want = {}
    al, bl = a.tolist(), b.tolist()
    for i in range(len(al)):
        for j in range(len(bl)):
            d = min((x ^ y).bit_count() for x in al[i] for y in bl[j])
            if d <= radius:
                want[(f"a{i}", f"b{j}")] = d
    assert got == want
    assert len(want) >= 20  # the planted pairs within the radius are there to be found


def test_cross_search_with_transformed_views_equals_python_oracle():
    # Oracle as above, over the allowed view pairs only: two identity views and one mirror view per
    # image; a mirror view is compared with the other image's identity views, never with its mirror.
    rng = np.random.default_rng(7)
    # Two identity views (whole, 92% centre) and the whole picture's mirror view; no check codes.
    views = similarity.CodeSettings(scales=[1.0, 0.92], side_scale=0, transforms=["mirror"], transform_boxes="whole",
                                    check="")
    assert [v.transform for v in similarity.views(views)] == ["identity", "identity", "mirror"]
    a = rng.integers(0, 2**64 - 1, size=(150, 3), dtype=np.uint64)
    b = rng.integers(0, 2**64 - 1, size=(100, 3), dtype=np.uint64)
    for j in range(30):  # planted: b's identity views near a's mirror view, or the reverse
        i = int(rng.integers(150))
        src = a[i, 2] if j % 2 else a[i, 0]
        flips = rng.choice(64, size=int(rng.integers(0, 11)), replace=False)
        b[j, 0 if j % 2 else 2] = src ^ np.uint64(sum(1 << int(f) for f in flips))
    got = {(p["a"], p["b"]): (p["distance"], p["transform"])
           for p in cross_set_pairs(_set_codes(a, "a", views), _set_codes(b, "b", views), 8)}
    want = {}
    al, bl = a.tolist(), b.tolist()
    for i in range(len(al)):
        for j in range(len(bl)):
            d = min((x ^ y).bit_count() for u, x in enumerate(al[i]) for v, y in enumerate(bl[j]) if u < 2 or v < 2)
            d_id = min((x ^ y).bit_count() for x in al[i][:2] for y in bl[j][:2])
            if d <= 8:  # an identity pair as close as the mirror pair is the one named
                want[(f"a{i}", f"b{j}")] = (d, "identity" if d_id == d else "mirror")
    assert got == want and len(want) >= 20
    assert sum(t == "mirror" for _, t in got.values()) >= 10


def test_mirrored_and_turned_public_photos_are_found_with_their_transform(tmp_path):
    # Public photos (scikit-image astronaut and coffee, scikit-learn china.jpg) against their mirror
    # image and quarter turn: no perceptual hash survives a flip (Zauner 2010); the mirror and turn
    # views find them, and each pair names the transform that takes A's picture to B's.
    skdata = pytest.importorskip("skimage.data")
    from PIL import Image
    from sklearn.datasets import load_sample_image

    from curate.stages.inspect import InspectConfig

    a, b = tmp_path / "a", tmp_path / "b"
    a.mkdir()
    b.mkdir()
    photos = {"astronaut": skdata.astronaut(), "coffee": skdata.coffee(), "china": load_sample_image("china.jpg")}
    for name, arr in photos.items():
        Image.fromarray(arr).save(a / f"{name}.jpg", quality=92)
    Image.fromarray(photos["astronaut"]).transpose(Image.Transpose.FLIP_LEFT_RIGHT).save(b / "mirrored.png")
    Image.fromarray(photos["coffee"]).transpose(Image.Transpose.ROTATE_90).save(b / "turned.png")
    settings = imagesets.HashSettings(InspectConfig(), similarity.CodeSettings(transforms=["mirror", "rot90", "rot270"]))
    sa = imagesets.set_codes(imagesets.list_set(a), settings)
    sb = imagesets.set_codes(imagesets.list_set(b), settings)
    got = {(p["a"], p["b"]): p["transform"] for p in cross_set_pairs(sa, sb, 8)}
    assert got == {("astronaut.jpg", "mirrored.png"): "mirror", ("coffee.jpg", "turned.png"): "rot90"}
    plain = imagesets.HashSettings(InspectConfig(), similarity.CodeSettings(transforms=[]))
    pa_, pb = (imagesets.set_codes(imagesets.list_set(x), plain) for x in (a, b))
    assert cross_set_pairs(pa_, pb, 8) == []


# --------------------------------------------------------------------------- planted images


_photo = scene_photo
_jpeg = to_jpeg


def _centre(img, scale):
    w, h = img.size
    cw, ch = round(w * scale), round(h * scale)
    return img.crop(((w - cw) // 2, (h - ch) // 2, (w - cw) // 2 + cw, (h - ch) // 2 + ch))


@pytest.fixture(scope="module")
def sets(tmp_path_factory):
    """A: ten Kilnworks photos. B: a smaller recompressed copy of a/p02.jpg, a 92% centre crop of
    a/p05.jpg, and three photos not in A (invented demo data)."""
    root = tmp_path_factory.mktemp("leak")
    a, b = root / "a", root / "b"
    a.mkdir()
    b.mkdir()
    for i in range(10):
        (a / f"p{i:02d}.jpg").write_bytes(_jpeg(_photo(200 + i)))
    (b / "resized.jpg").write_bytes(_jpeg(_photo(202).resize((240, 180)), quality=75))
    (b / "cropped.jpg").write_bytes(_jpeg(_centre(_photo(205), 0.92)))
    for i in range(3):
        (b / f"new{i}.jpg").write_bytes(_jpeg(_photo(800 + i)))
    return root


PLANTED = {("p02.jpg", "resized.jpg"), ("p05.jpg", "cropped.jpg")}


def test_planted_pairs_are_found_and_agree_with_imagehash(sets):
    import imagehash
    from PIL import Image

    res = leakcheck(sets / "a", sets / "b")
    got = {(p["a"], p["b"]): p["distance"] for p in res["pairs"]}
    assert PLANTED <= set(got)
    assert res["a_count"] == 10 and res["b_count"] == 5
    # Reference library: imagehash's pHash of the full frames (ImageHash subtraction is the
    # Hamming distance). The full frame is one of the crop variants, so the multi-crop distance
    # is never larger, and every pair imagehash puts within the radius must be reported.
    ref = {}
    for pa_ in sorted((sets / "a").iterdir()):
        for pb in sorted((sets / "b").iterdir()):
            ref[(pa_.name, pb.name)] = imagehash.phash(Image.open(pa_)) - imagehash.phash(Image.open(pb))
    for key, d in got.items():
        assert d <= ref[key] and d <= res["radius"]
    assert {k for k, d in ref.items() if d <= res["radius"]} <= set(got)
    # The crop copy needs the multi-crop variants: its full-frame distance is what would be missed.
    assert got[("p05.jpg", "cropped.jpg")] <= res["radius"]


def test_semantic_matches_a_mirrored_copy(sets, tmp_path):
    # No perceptual hash survives a horizontal flip (Zauner 2010), so the mirrored copy is found
    # only by comparing CLIP embeddings; the demo model is shipped with curate.
    from curate.models import clip

    if not clip.DEMO_WEIGHTS.exists():
        pytest.skip("the demo CLIP weights are not built in this checkout")
    from PIL import ImageOps

    b = tmp_path / "b"
    b.mkdir()
    ImageOps.mirror(_photo(207)).save(b / "mirrored.jpg", quality=90)
    res = leakcheck(sets / "a", b, semantic=0.9, model="demo")
    sem = [p for p in res["pairs"] if p["signal"] == "semantic"]
    # The mirrored copy is found: by the hash's mirror view where the settings have one, else as
    # the closest pair by embedding (pairs come sorted by distance); other photos of a similar pot
    # may pass the threshold too, which is why it is a cosine, not bits.
    by_hash = [p for p in res["pairs"] if p["signal"] == "phash"]
    if by_hash:
        assert [(p["a"], p["b"], p["transform"]) for p in by_hash] == [("p07.jpg", "mirrored.jpg", "mirror")]
    else:
        assert (sem[0]["a"], sem[0]["b"]) == ("p07.jpg", "mirrored.jpg")
    assert all(p["cosine"] >= 0.9 and abs(p["distance"] - (1 - p["cosine"])) < 1e-6 for p in sem)


def test_clean_sets_have_no_pairs(sets, tmp_path):
    c = tmp_path / "c"
    c.mkdir()
    for name in ("new0.jpg", "new1.jpg"):
        shutil.copy(sets / "b" / name, c / name)
    res = leakcheck(sets / "a", c)
    assert res["pairs"] == []


def _shards(folder: Path, out: Path, names: list[str]) -> None:
    out.parent.mkdir(parents=True, exist_ok=True)
    t = pa.table({"source": names, "image": [(folder / n).read_bytes() for n in names]})
    pq.write_table(t, out)


def test_every_kind_of_set_gives_the_same_pairs(sets, tmp_path):
    names = sorted(p.name for p in (sets / "b").iterdir())
    # manifest: a CSV with an `image` column of paths relative to it (no captions needed)
    man = tmp_path / "bench.csv"
    for n in names:
        shutil.copy(sets / "b" / n, tmp_path / n)
    man.write_text("image\n" + "\n".join(names) + "\n", encoding="utf-8")
    # shard set: a folder of part-*.parquet with an `image` bytes column
    _shards(sets / "b", tmp_path / "shards" / "part-00000.parquet", names[:2])
    _shards(sets / "b", tmp_path / "shards" / "part-00001.parquet", names[2:])
    # curate output: manifest.json listing shards/<split>/part-*.parquet
    outdir = tmp_path / "out"
    _shards(sets / "b", outdir / "shards" / "eval" / "part-00000.parquet", names)
    (outdir / "manifest.json").write_text(json.dumps({"shards": [
        {"path": "shards/eval/part-00000.parquet", "split": "eval", "rows": len(names)}]}), encoding="utf-8")
    want = {(p["a"], p["b"], p["distance"]) for p in leakcheck(sets / "a", sets / "b")["pairs"]}
    for other, kind in ((man, "manifest"), (tmp_path / "shards", "shards"), (outdir, "output")):
        assert imagesets.list_set(other).kind == kind
        got = {(p["a"], p["b"], p["distance"]) for p in leakcheck(sets / "a", other)["pairs"]}
        assert got == want, kind


def test_cache_reads_nothing_the_second_time(sets, tmp_path):
    cache = tmp_path / "cache"
    first = leakcheck(sets / "a", sets / "b", cache_dir=cache)
    again = leakcheck(sets / "a", sets / "b", cache_dir=cache)
    assert first["hashed"] == 15 and again["hashed"] == 0
    assert again["pairs"] == first["pairs"]
    # A different radius is a search setting, not a hash setting: still cached.
    assert leakcheck(sets / "a", sets / "b", cache_dir=cache, radius=2)["hashed"] == 0


def test_worker_processes_give_the_same_codes(sets, monkeypatch):
    monkeypatch.setattr(imagesets, "PARALLEL_MIN", 0)
    monkeypatch.setattr(imagesets, "CHUNK", 2)
    s = imagesets.list_set(sets / "a")
    one = imagesets.set_codes(s, imagesets.default_settings(), workers=1)
    two = imagesets.set_codes(s, imagesets.default_settings(), workers=2)
    assert one.ok.all() and np.array_equal(one.codes, two.codes)


def test_html_page_escapes_names(sets, tmp_path):
    a = tmp_path / "a"
    shutil.copytree(sets / "a", a)
    (a / "p02.jpg").rename(a / "<b>mug&co.jpg")
    page = tmp_path / "pairs.html"
    res = leakcheck(a, sets / "b", html=page)
    assert any(p["a"] == "<b>mug&co.jpg" for p in res["pairs"])
    text = page.read_text(encoding="utf-8")
    assert "&lt;b&gt;mug&amp;co.jpg" in text and "<b>mug&co" not in text
    assert text.count("data:image/jpeg;base64,") >= 2 * len(PLANTED)


def test_cli_exit_codes_and_json(sets, tmp_path, capsys):
    from curate.cli import main

    rc = main(["leakcheck", str(sets / "a"), str(sets / "b"), "--json"])
    out = json.loads(capsys.readouterr().out)
    assert rc == 1
    assert PLANTED <= {(p["a"], p["b"]) for p in out["pairs"]}
    assert all(set(p) >= {"a", "b", "distance", "transform"} for p in out["pairs"])
    assert {p["transform"] for p in out["pairs"] if p["signal"] == "phash"} <= set(similarity.TRANSFORMS) | {"identity"}
    c = tmp_path / "c"
    c.mkdir()
    shutil.copy(sets / "b" / "new0.jpg", c / "new0.jpg")
    assert main(["leakcheck", str(sets / "a"), str(c), "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["pairs"] == []
    assert main(["leakcheck", str(sets / "a"), str(tmp_path / "missing")]) == 2


# --------------------------------------------------------------------------- a run's own split


@pytest.fixture(scope="module")
def small_run(tmp_path_factory):
    """A pipeline run over 40 Kilnworks photos, 8 of them with a resized near-duplicate, eval 30%."""
    from curate import api

    root = tmp_path_factory.mktemp("run")
    images = root / "images"
    images.mkdir()
    for i in range(40):
        img = _photo(500 + i, (400, 300))
        (images / f"k{i:02d}.jpg").write_bytes(_jpeg(img))
        (images / f"k{i:02d}.txt").write_text(f"a stoneware piece, photo {i}", encoding="utf-8")
        if i < 8:
            (images / f"k{i:02d}_small.jpg").write_bytes(_jpeg(img.resize((360, 270)), quality=80))
            (images / f"k{i:02d}_small.txt").write_text(f"a stoneware piece, photo {i}", encoding="utf-8")
    out = root / "out"
    sets_ = ["split.eval_fraction=0.3", "split.seed=4", "inspect.min_file_bytes=0", "embed.enabled=false", "agreement.enabled=false",
             "agreement.enabled=false"]
    from curate.plan import config_sections

    sets_ = [s for s in sets_ if s.split(".")[0] in config_sections() or s.split(".")[0] == "split"]
    api.run(None, input=str(images), out=str(out), sets=sets_)
    return images, out


def test_run_train_and_eval_do_not_leak(small_run, tmp_path):
    images, out = small_run
    led = pq.read_table(out / "ledger.parquet").to_pylist()
    splits = {r["split"] for r in led if r["kept"]}
    # Samples the watermark screen flags go to quarantine (its default action), never to train or eval.
    assert {"train", "eval"} <= splits <= {"train", "eval", "quarantine"}
    res = leakcheck(out / "shards" / "train", out / "shards" / "eval")
    assert res["pairs"] == []
    # Plant a leak: a recompressed copy of a training image among eval images is found.
    train_src = next(r["source"] for r in led if r["split"] == "train")
    bench = tmp_path / "bench"
    bench.mkdir()
    from PIL import Image

    Image.open(images / train_src).save(bench / "planted.jpg", quality=70)
    res = leakcheck(out / "shards" / "train", bench)
    assert (train_src, "planted.jpg") in {(p["a"], p["b"]) for p in res["pairs"]}


def test_undecodable_images_are_listed_not_fatal(sets, tmp_path):
    b = tmp_path / "b"
    shutil.copytree(sets / "b", b)
    (b / "broken.jpg").write_bytes((sets / "b" / "new0.jpg").read_bytes()[:300])
    (b / "empty.png").write_bytes(b"")
    res = leakcheck(sets / "a", b)
    assert {u["name"] for u in res["b_unreadable"]} == {"broken.jpg", "empty.png"}
    assert PLANTED <= {(p["a"], p["b"]) for p in res["pairs"]}


def test_the_configured_file_size_cap_holds_for_both_sets(sets, tmp_path):
    # input.max_file_bytes caps every image read, outside sets included (common practice: a size cap
    # before decoding keeps a huge or hostile file from being read whole).
    sizes = {p.name: p.stat().st_size for p in (sets / "b").iterdir()}
    cap = sorted(sizes.values())[-1] - 1  # the largest file of B is over it
    conf = tmp_path / "c.toml"
    conf.write_text(f"[input]\nmax_file_bytes = {cap}\n", encoding="utf-8")
    res = leakcheck(sets / "a", sets / "b", config=conf)
    over = {n for n, v in sizes.items() if v > cap}
    assert {u["name"] for u in res["b_unreadable"]} == over
    assert {u["reason"] for u in res["b_unreadable"]} == {"unreadable"}


@pytest.mark.slow
def test_demo_corpus_split_does_not_leak(sample_corpus, tmp_path):
    # Check on the Kilnworks demo: its own train and eval shards share no
    # near-duplicate, and a recompressed copy of a training image planted next to eval is found.
    from PIL import Image

    from curate import api

    out = tmp_path / "demo"
    api.run(ROOT / "sample_corpus" / "curate.toml", input=str(sample_corpus), out=str(out),
            sets=["split.eval_fraction=0.2", 'embed.model="demo"', 'embed.pretrained=""'])
    led = pq.read_table(out / "ledger.parquet").to_pylist()
    kept = [r for r in led if r["kept"]]
    share = sum(r["split"] == "eval" for r in kept) / len(kept)
    assert abs(share - 0.2) <= 0.02 + 1e-12
    assert leakcheck(out / "shards" / "train", out / "shards" / "eval")["pairs"] == []
    src = next(r["source"] for r in kept if r["split"] == "train")
    bench = tmp_path / "bench"
    bench.mkdir()
    img = Image.open(sample_corpus / src).convert("RGB")
    img.resize((img.width * 3 // 4, img.height * 3 // 4)).save(bench / "copy.jpg", quality=70)
    assert (src, "copy.jpg") in {(p["a"], p["b"]) for p in leakcheck(out / "shards" / "train", bench)["pairs"]}
