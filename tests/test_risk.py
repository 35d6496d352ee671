"""Content-risk screening end to end: personal data redacted in the output caption (the ledger keeps
the original), location metadata, term lists, faces (flagged, and blurred in the shards on request),
watermarks quarantined, and a risk flag set to drop recorded as `risk:<flag>`. The detectors'
own accuracy is measured in tests/test_pii.py, test_faces.py and test_overlay.py."""
from __future__ import annotations

import io

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from PIL import Image

from curate import api
from curate.stages.inspect import InspectConfig, inspect_one

from conftest import make_small_corpus, stage_call

FAST = ["embed.enabled=false", "agreement.enabled=false", "run.workers=1", "neardup.enabled=false"]


def test_gps_exif_sets_the_location_flag():
    img = Image.new("RGB", (300, 300), (9, 9, 9))
    exif = Image.Exif()
    gps = exif.get_ifd(0x8825)
    # EXIF 2.3 (CIPA DC-008) GPS IFD: 1/2 latitude ref/value, 3/4 longitude ref/value.
    gps[1], gps[2], gps[3], gps[4] = "N", (51.0, 30.0, 0.0), "W", (0.0, 7.0, 0.0)
    buf = io.BytesIO()
    img.save(buf, "JPEG", exif=exif.tobytes())
    cols, _, _ = inspect_one(buf.getvalue(), InspectConfig(min_file_bytes=0))
    assert cols["gps"] is True
    t = pa.table({"sample_id": ["a", "b"], "caption": ["a mug", "a bowl by jo@kilnworks.example"],
                  "gps": [True, False], "place": [None, None]})
    out = stage_call("risk", t, 'risk.terms={brand = ["kilnworks"]}')
    failed = [[c["code"] for c in cl if c["failed"]] for cl in out.column("risk.checks").to_pylist()]
    assert failed == [["location"], ["pii:email", "term:brand"]]


@pytest.fixture
def captioned(tmp_path):
    root = make_small_corpus(tmp_path / "in", n=6)
    (root / "a" / "item001.txt").write_text("a mug; orders to jo.potter@example.org or +44 20 7946 0958",
                                            encoding="utf-8")
    # ISO 13616 worked example IBAN (MOD 97-10 valid).
    (root / "b" / "item002.txt").write_text("a bowl, pay to GB82 WEST 1234 5698 7654 32", encoding="utf-8")
    return root


def _shards(out):
    rows = []
    for p in sorted((out / "shards").rglob("*.parquet")):
        rows += pq.read_table(p).to_pylist()
    return {r["source"]: r for r in rows}


def test_personal_data_is_redacted_in_the_shards_and_kept_in_the_ledger(captioned, tmp_path):
    out = tmp_path / "out"
    api.run(None, input=str(captioned), out=str(out), sets=FAST)
    led = {r["source"]: r for r in pq.read_table(out / "ledger.parquet").to_pylist()}
    shards = _shards(out)
    assert set(led["a/item001.jpg"]["flags"]) == {"pii:email", "pii:phone"}
    assert led["a/item001.jpg"]["caption"] == "a mug; orders to jo.potter@example.org or +44 20 7946 0958"
    assert shards["a/item001.jpg"]["caption"] == "a mug; orders to [email] or [phone]"
    assert shards["b/item002.jpg"]["caption"] == "a bowl, pay to [iban]"
    assert shards["b/item000.jpg"]["caption"] == led["b/item000.jpg"]["caption"]  # nothing to redact


def test_a_risk_flag_set_to_drop_is_recorded_as_risk_reason(captioned, tmp_path):
    out = tmp_path / "out"
    api.run(None, input=str(captioned), out=str(out), sets=FAST + ['decide.actions={"pii:email"="drop"}'])
    led = {r["source"]: r for r in pq.read_table(out / "ledger.parquet").to_pylist()}
    assert led["a/item001.jpg"]["reasons"] == ["risk:pii:email"] and not led["a/item001.jpg"]["kept"]
    assert led["b/item002.jpg"]["kept"]  # its IBAN is still redacted, not dropped


def _portrait_corpus(root):
    # Public photos: scikit-image's astronaut (a portrait) and coffee cup (no face).
    from skimage import data

    root.mkdir(parents=True)
    Image.fromarray(data.astronaut()).save(root / "astronaut.jpg", quality=92)
    Image.fromarray(data.coffee()).save(root / "coffee.jpg", quality=92)
    (root / "astronaut.txt").write_text("an astronaut in a white suit in front of a flag", encoding="utf-8")
    (root / "coffee.txt").write_text("a cup of coffee on a saucer", encoding="utf-8")
    return root


def test_faces_are_flagged_and_blurred_in_the_shards_on_request(tmp_path):
    root = _portrait_corpus(tmp_path / "in")
    out = tmp_path / "out"
    api.run(None, input=str(root), out=str(out), sets=FAST + ["risk.face_blur=true", "watermark.enabled=false"])
    led = {r["source"]: r for r in pq.read_table(out / "ledger.parquet").to_pylist()}
    assert "face" in led["astronaut.jpg"]["flags"] and led["astronaut.jpg"]["face_count"] == 1
    assert led["coffee.jpg"]["face_count"] == 0 and "face" not in led["coffee.jpg"]["flags"]
    x, y, w, h = led["astronaut.jpg"]["face_boxes"][0]
    stored = np.asarray(Image.open(io.BytesIO(_shards(out)["astronaut.jpg"]["image"])).convert("L"), np.float64)
    orig = np.asarray(Image.open(root / "astronaut.jpg").convert("L"), np.float64)

    def detail(a):  # variance of a discrete Laplacian: fine detail
        return np.var(a[1:-1, 1:-1] * 4 - a[:-2, 1:-1] - a[2:, 1:-1] - a[1:-1, :-2] - a[1:-1, 2:])

    assert detail(stored[y:y + h, x:x + w]) < 0.1 * detail(orig[y:y + h, x:x + w])
    assert abs(detail(stored[-100:, :100]) - detail(orig[-100:, :100])) < 0.5 * detail(orig[-100:, :100])


def test_face_blur_without_the_faces_stage_is_refused(tmp_path):
    from curate.errors import ConfigError

    root = _portrait_corpus(tmp_path / "in")
    with pytest.raises(ConfigError, match="risk.face_blur"):
        api.run(None, input=str(root), out=str(tmp_path / "out"),
                sets=FAST + ["risk.face_blur=true", "faces.enabled=false"])


def test_a_stamped_photo_is_quarantined(tmp_path):
    # scikit-image's rocket with a large white text stamp in a corner (drawn here with Pillow).
    from PIL import ImageDraw, ImageFont
    from skimage import data

    root = tmp_path / "in"
    root.mkdir()
    clean = Image.fromarray(data.rocket())
    stamped = clean.copy()
    draw = ImageDraw.Draw(stamped)
    font = ImageFont.load_default(size=int(stamped.height * 0.09))
    draw.text((int(stamped.width * 0.55), int(stamped.height * 0.82)), "KILNWORKS", fill=(255, 255, 255), font=font)
    clean.save(root / "rocket.jpg", quality=92)
    stamped.save(root / "rocket_stamped.jpg", quality=92)
    for n in ("rocket", "rocket_stamped"):
        (root / f"{n}.txt").write_text("a rocket on its launch pad", encoding="utf-8")
    out = tmp_path / "out"
    api.run(None, input=str(root), out=str(out), sets=FAST)
    led = {r["source"]: r for r in pq.read_table(out / "ledger.parquet").to_pylist()}
    assert led["rocket_stamped.jpg"]["split"] == "quarantine" and "watermark" in led["rocket_stamped.jpg"]["flags"]
    assert led["rocket.jpg"]["split"] == "train"
    assert (out / "shards" / "quarantine").is_dir()
    assert set(_shards(out)) == {"rocket.jpg", "rocket_stamped.jpg"}  # both kept, in different places
