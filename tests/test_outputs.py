"""What a run writes: manifest metadata carried to the ledger and the shards under a prefix."""
from __future__ import annotations

import csv
import io

import pandas as pd
import pyarrow.parquet as pq
import pytest

from curate import api

from conftest import make_small_corpus

FAST = ["embed.enabled=false", "agreement.enabled=false", "run.workers=1"]


def test_manifest_columns_reach_ledger_and_shards_with_a_prefix(tmp_path):
    root = make_small_corpus(tmp_path / "in", n=6)
    rows = []
    for i, img in enumerate(sorted(root.rglob("*.jpg"))):
        rows.append({"image": str(img.relative_to(root)), "caption": img.with_suffix(".txt").read_text(),
                     "item_id": f"KW-{i:03d}", "licence": "CC-BY-4.0" if i % 2 else "in-house",
                     "credit": f"photo {i}", "caption.checks": "a name that collides with ours"})
    manifest = root / "manifest.csv"
    with open(manifest, "w", newline="", encoding="utf-8") as f:
        w = csv.DictWriter(f, fieldnames=list(rows[0]))
        w.writeheader()
        w.writerows(rows)
    out = tmp_path / "out"
    api.run(None, input=str(manifest), out=str(out), sets=FAST + ['input.id_column="item_id"'])
    led = pq.read_table(out / "ledger.parquet").to_pandas()
    assert {"meta.licence", "meta.credit", "meta.item_id", "meta.caption.checks"} <= set(led.columns)
    assert sorted(led["meta.item_id"]) == [r["item_id"] for r in rows]
    shards = pd.concat([pd.read_parquet(p) for p in sorted((out / "shards").rglob("*.parquet"))])
    assert len(shards) == 6 and set(shards["meta.licence"]) == {"CC-BY-4.0", "in-house"}
    assert (shards.set_index("meta.item_id")["meta.credit"].to_dict()
            == {r["item_id"]: r["credit"] for r in rows})


# --------------------------------------------------------------------------- training-ready shards

def _odd_formats(root):
    """One image of each kind a corpus holds that the usual training decoders do not read as is."""
    import numpy as np
    from PIL import Image

    from curate.imaging.metadata import read_location  # noqa: F401  (the module the writer cleans with)

    root.mkdir(parents=True)
    rng = np.random.default_rng(3)
    base = Image.fromarray(rng.integers(0, 255, (9, 12, 3)).astype(np.uint8)).resize((480, 360), Image.BICUBIC)
    items = {
        "cmyk.jpg": lambda p: base.convert("CMYK").save(p, quality=92),
        "grey.jpg": lambda p: base.convert("L").save(p, quality=92),
        "sixteen.png": lambda p: Image.fromarray((np.asarray(base.convert("L"), np.uint16) * 257)).save(p),
        "palette.png": lambda p: base.convert("P", palette=Image.Palette.ADAPTIVE).save(p),
        "alpha.png": lambda p: base.convert("RGBA").save(p),
        "plain.bmp": lambda p: base.save(p),
        "plain.tiff": lambda p: base.save(p),
        "anim.gif": lambda p: base.save(p, save_all=True, append_images=[base.rotate(90)]),
        "plain.webp": lambda p: base.save(p, quality=90),
        "plain.jpg": lambda p: base.save(p, quality=92),
    }
    for name, save in items.items():
        save(root / name)
    # EXIF orientation 6 (TIFF 6.0 / EXIF 2.3 tag 0x0112): stored landscape, displayed portrait;
    # plus a GPS position that must not reach a shard.
    exif = Image.Exif()
    exif[0x0112] = 6
    gps = exif.get_ifd(0x8825)
    gps.update({1: "N", 2: (52.0, 22.0, 0.0), 3: "E", 4: (4.0, 53.0, 0.0)})
    base.save(root / "rotated.jpg", quality=92, exif=exif.tobytes())
    base.save(root / "gps.jpg", quality=92, exif=_gps_only(base))
    for p in root.iterdir():
        p.with_suffix(".txt").write_text(f"a test picture saved as {p.suffix[1:]}", encoding="utf-8")
    return root


def _gps_only(base):
    from PIL import Image

    exif = Image.Exif()
    exif[0x010F] = "KilnCam"  # Make
    exif[0xA431] = "SN-0042-7731"  # BodySerialNumber (EXIF 2.3)
    gps = exif.get_ifd(0x8825)
    gps.update({1: "N", 2: (52.0, 22.0, 0.0), 3: "E", 4: (4.0, 53.0, 0.0)})
    return exif.tobytes()


def test_every_shard_image_decodes_as_stored(tmp_path):
    # Two independent decoders: Pillow, and torchvision.io.decode_image (libjpeg-turbo, libpng,
    # libwebp), as a training data loader would read the shard.
    import exifread
    import numpy as np
    import torch
    from PIL import Image
    from torchvision.io import decode_image

    root = _odd_formats(tmp_path / "in")
    out = tmp_path / "out"
    # One picture in many formats: near-duplicates of each other, so grouping is off here.
    api.run(None, input=str(root), out=str(out), sets=FAST + ["inspect.min_file_bytes=0", "neardup.enabled=false"])
    led = pq.read_table(out / "ledger.parquet").to_pandas().set_index("source")
    assert led["kept"].all(), led[~led["kept"]]["reasons"]
    shards = pd.concat([pd.read_parquet(p) for p in sorted((out / "shards").rglob("*.parquet"))]).set_index("source")
    assert len(shards) == len(led)
    for src, row in shards.iterrows():
        assert row["image_format"] in ("JPEG", "PNG", "WEBP"), src
        img = Image.open(io.BytesIO(row["image"]))
        assert img.format == row["image_format"] and img.mode == "RGB" and getattr(img, "n_frames", 1) == 1, src
        assert img.size == (row["width"], row["height"]) == (led.loc[src, "width"], led.loc[src, "height"]), src
        t = decode_image(torch.frombuffer(bytearray(row["image"]), dtype=torch.uint8))
        assert t.dtype == torch.uint8 and tuple(t.shape) == (3, row["height"], row["width"]), src
        assert np.array_equal(t.permute(1, 2, 0).numpy(), np.asarray(img.convert("RGB"))) or img.format == "JPEG"
        exif = img.getexif()
        assert 0x8825 not in exif and exif.get(0x0112, 1) == 1 and 0xA431 not in exif, src
        tags = exifread.process_file(io.BytesIO(row["image"]), details=False)
        assert not any(k.startswith("GPS") for k in tags) and "EXIF BodySerialNumber" not in tags, src
    # The rotated photo is stored upright: portrait, as displayed.
    assert (shards.loc["rotated.jpg", "width"], shards.loc["rotated.jpg", "height"]) == (360, 480)
    # A file that already is training-ready keeps its own compressed pixels (no re-encode).
    plain = (root / "plain.jpg").read_bytes()
    stored = shards.loc["plain.jpg", "image"]
    sos = plain.index(b"\xff\xda")
    assert stored[stored.index(b"\xff\xda"):] == plain[sos:]


def test_shard_columns_do_not_shadow_dataframe_attributes(tmp_path):
    root = make_small_corpus(tmp_path / "in", n=3)
    out = tmp_path / "out"
    api.run(None, input=str(root), out=str(out), sets=FAST)
    cols = pq.read_schema(next((out / "shards").rglob("*.parquet"))).names
    assert "split" in cols and "image" in cols
    clash = [c for c in cols if c in dir(pd.DataFrame)]
    assert not clash, clash


def test_buckets_are_generated_from_area_and_step():
    # SDXL (Podell et al. 2023, sec. 2.3): about 1024^2 pixels, sides multiples of 64.
    from curate.buckets import assign, make_buckets

    bl = make_buckets(1024 * 1024, 64, 4.0)
    assert (1024, 1024) in bl and all(w % 64 == 0 and h % 64 == 0 for w, h in bl)
    assert all(w * h <= 1024 * 1024 and w * h > 0.85 * 1024 * 1024 for w, h in bl)
    assert all(max(w, h) / min(w, h) <= 4.0 for w, h in bl)
    assert [b for b in bl if b[0] == b[1]] == [(1024, 1024)]
    assert {(w, h) for w, h in bl} == {(h, w) for w, h in bl}  # landscape and portrait alike
    (b, loss) = assign(1920, 1080, bl)
    assert abs(b[0] / b[1] - 16 / 9) < 0.1 and 0 <= loss < 0.05
    assert assign(1000, 1000, bl) == ((1024, 1024), 0.0)
    # A 3:1 panorama centre-cropped to a 2:1 bucket loses a third of its width.
    assert assign(3000, 1000, [(1408, 704)]) == ((1408, 704), pytest.approx(1 / 3, abs=1e-6))


def test_kept_images_get_a_bucket_in_ledger_and_shards(tmp_path):
    root = make_small_corpus(tmp_path / "in", n=5)
    out = tmp_path / "out"
    api.run(None, input=str(root), out=str(out), sets=FAST + ["pack.bucket_area=262144"])
    led = pq.read_table(out / "ledger.parquet").to_pandas()
    kept = led[led["kept"]]
    assert kept["bucket"].notna().all() and (kept["bucket_crop"] >= 0).all()
    shards = pd.concat([pd.read_parquet(p) for p in sorted((out / "shards").rglob("*.parquet"))])
    assert set(shards["bucket"]) == set(kept["bucket"])
    summary = __import__("json").loads((out / "summary.json").read_text())
    assert sum(summary["by_bucket"].values()) == len(kept)
