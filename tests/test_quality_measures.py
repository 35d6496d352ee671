"""Image-quality measures and checks (curate.imaging.quality, curate.imaging.jpeg).

Photos are public ones shipped inside packages (scikit-image `skimage.data`, scikit-learn's sample
images, matplotlib's sample data), each named in bench/quality_checks.py. Thresholds were set on
bench.quality_checks.TUNING; recall below is asserted on HELD_OUT photos only. The full recall
table per check and level is printed by bench/quality_checks.py.
"""
from __future__ import annotations

import io
import random
import sys
from pathlib import Path

import numpy as np
import pytest

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "bench"))

import quality_checks as qb  # noqa: E402

from curate.imaging.jpeg import (  # noqa: E402
    ANNEX_K_CHROMA,
    ANNEX_K_LUMA,
    estimate_quality,
    ijg_table,
)
from curate.imaging.quality import (  # noqa: E402
    CODES,
    DecodeFacts,
    QualityConfig,
    content_box,
    crop_to_content,
    decode_with_facts,
    measure,
    quality_checks,
)

CFG = QualityConfig()
# Held-out photos for recall (none of them set a threshold); a mix of colour, grey and textures.
RECALL_SET = ("chelsea", "china", "flower", "grace_hopper", "gravel", "page")


def failed(data: bytes, **kw) -> set[str]:
    rgb, facts = decode_with_facts(data, **kw)
    return {c["code"] for c in quality_checks(measure(rgb, facts), CFG) if c["failed"]}


def recall(files: list[bytes], code: str) -> float:
    return sum(code in failed(d) for d in files) / len(files)


@pytest.fixture(scope="module")
def photos() -> dict[str, np.ndarray]:
    return {n: qb.photo(n) for n in qb.TUNING + qb.HELD_OUT}


# ----------------------------------------------------------------------------- JPEG quality


def test_annex_k_tables_are_what_libjpeg_writes_at_quality_50(photos):
    # ITU-T T.81 Annex K tables K.1/K.2 at IJG quality 50 (scale 100%) are used unscaled; Pillow
    # writes through libjpeg, and `quantization` reports natural order.
    from PIL import Image

    buf = io.BytesIO()
    Image.fromarray(photos["astronaut"]).save(buf, "JPEG", quality=50)
    q = Image.open(buf).quantization
    assert tuple(q[0]) == ANNEX_K_LUMA
    assert tuple(q[1]) == ANNEX_K_CHROMA


@pytest.mark.parametrize("quality", [5, 10, 25, 49, 50, 51, 75, 85, 90, 95, 99, 100])
def test_quality_estimate_matches_the_quality_pillow_was_given(photos, quality):
    # IJG scaling (libjpeg jpeg_quality_scaling) of the Annex K tables: files saved by Pillow at a
    # known `quality=` must read back as that quality, exactly.
    data = qb.encode(photos["coffee"], quality=quality)
    _, facts = decode_with_facts(data)
    est = estimate_quality(facts.jpeg_qtables)
    assert est is not None and est.quality == quality and est.exact


def test_quality_estimate_of_other_tables_is_near_but_not_exact(photos):
    # Pillow's "web_low" preset uses tables of its own, not the IJG scaling (Pillow docs, JPEG presets).
    from PIL import Image

    buf = io.BytesIO()
    Image.fromarray(photos["coffee"]).save(buf, "JPEG", quality="web_low")
    est = estimate_quality(Image.open(buf).quantization)
    assert est is not None and not est.exact and 40 <= est.quality <= 90
    assert estimate_quality(None) is None


def test_ijg_scaling_rule():
    # libjpeg: quality 75 -> scale 50% -> (16*50+50)//100 = 8 for the first K.1 entry; quality 100 -> all 1.
    assert ijg_table(ANNEX_K_LUMA, 75)[0] == 8
    assert set(ijg_table(ANNEX_K_LUMA, 100)) == {1}
    assert max(ijg_table(ANNEX_K_LUMA, 1)) == 255  # baseline clamp


# ----------------------------------------------------------------------------- clean photos


def test_no_check_fires_on_clean_photos(photos):
    # Every tuning and held-out photo, stored as a corpus would (JPEG quality 90, and PNG).
    alarms = []
    for name, a in photos.items():
        for data in (qb.encode(a), qb.encode(a, "PNG", compress_level=1)):
            got = failed(data)
            if got:
                alarms.append((name, sorted(got)))
    assert alarms == []


def test_clean_photo_measures_are_plausible(photos):
    rgb, facts = decode_with_facts(qb.encode(photos["astronaut"], quality=90))
    m = measure(rgb, facts)
    assert m["jpeg_quality"] == 90 and m["jpeg_quality_exact"] == 1.0
    assert (m["content_x0"], m["content_y0"], m["content_x1"], m["content_y1"]) == (0, 0, 512, 512)
    assert m["upscale_factor"] == 1.0 and (m["native_width"], m["native_height"]) == (512, 512)
    assert m["border_share"] == 0.0 and m["decoder_fill_share"] == 0.0


# ----------------------------------------------------------------------------- degradations


def test_blur_recall_at_3px_and_more(photos):
    files = [qb.encode(qb.blur(photos[n], s)) for n in RECALL_SET for s in (3.0, 5.0)]
    assert recall(files, "image_blurred") >= 0.9


def test_sharpness_ranks_copies_of_one_photo(photos):
    # The sharper of two copies (less blur) must score higher, for every pair of blur levels.
    for n in ("chelsea", "flower"):
        scores = []
        for s in (0.0, 1.0, 2.0, 4.0):
            a = photos[n] if s == 0 else qb.blur(photos[n], s)
            rgb, facts = decode_with_facts(qb.encode(a))
            scores.append(measure(rgb, facts)["sharpness"])
        assert scores == sorted(scores, reverse=True)


def test_upscale_recall_at_3x_and_more_with_native_size(photos):
    hits = 0
    n_files = 0
    for n in RECALL_SET:
        for k in (3.0, 4.0):
            rgb, facts = decode_with_facts(qb.encode(qb.upscale(photos[n], k)))
            m = measure(rgb, facts)
            n_files += 1
            if m["upscale_factor"] >= CFG.max_upscale_factor:
                hits += 1
                # The enlargement is read from where the spectrum stops (sampling theorem, Shannon
                # 1949); on the tuning photos it came out 0.74..0.96 of the true factor.
                assert 0.7 <= m["upscale_factor"] / k <= 1.1, (n, k, m["upscale_factor"])
                assert m["native_width"] == pytest.approx(rgb.shape[1] / m["upscale_factor"])
    assert hits / n_files >= 0.8


@pytest.mark.parametrize("kind", ["letterbox", "pillarbox", "frame"])
def test_bands_of_8_percent_and_more_are_found_with_their_box(photos, kind):
    hits, n_files = 0, 0
    for i, n in enumerate(RECALL_SET):
        for share in (0.08, 0.15):
            colour = list(qb.BAND_COLOURS.values())[(i + int(share * 100)) % len(qb.BAND_COLOURS)]
            img, box = qb.add_bands(photos[n], kind, share, colour)
            rgb, facts = decode_with_facts(qb.encode(img))
            m = measure(rgb, facts)
            codes = {c["code"] for c in quality_checks(m, CFG) if c["failed"]}
            n_files += 1
            if "image_bordered" in codes:
                hits += 1
                got = (m["content_x0"], m["content_y0"], m["content_x1"], m["content_y1"])
                # JPEG ringing spreads a band's edge over at most one 8-px block.
                assert max(abs(a - b) for a, b in zip(got, box)) <= 8, (n, kind, share, got, box)
    assert hits / n_files >= 0.85


def test_crop_to_content_returns_the_picture_inside_the_bands(photos):
    a = photos["coffee"]
    img, box = qb.add_bands(a, "frame", 0.1, (255, 255, 255))
    measured = content_box(img)  # exact bands (no JPEG): the box is exact
    assert measured == box
    assert np.array_equal(crop_to_content(img, measured), a)
    assert crop_to_content(img, (5, 5, 5, 5)).shape == img.shape  # an empty box keeps the picture


def test_underexposure_recall_at_minus_3_stops(photos):
    files = [qb.encode(qb.exposure(photos[n], s)) for n in RECALL_SET for s in (-3.0, -4.0)]
    assert recall(files, "image_underexposed") >= 0.9


def test_overexposure_recall_at_plus_3_stops(photos):
    files = [qb.encode(qb.exposure(photos[n], 3.0)) for n in RECALL_SET]
    assert recall(files, "image_overexposed") >= 0.8


def test_flat_pictures_are_found(photos):
    files = [qb.encode(qb.flatten(photos[n], lv)) for n in RECALL_SET for lv in ("haze", "blank")]
    assert recall(files, "image_flat") == 1.0


def test_truncated_jpeg_decodes_and_is_garbled(photos):
    from PIL import Image

    rng = random.Random(0)
    for n in RECALL_SET[:3]:
        data = qb.corrupt(qb.encode(photos[n]), "truncate", 0.5, rng)
        with pytest.raises(OSError):  # plain Pillow refuses it ...
            Image.open(io.BytesIO(data)).load()
        rgb, facts = decode_with_facts(data)  # ... the truncated-image path decodes it
        assert facts.truncated and rgb.shape == photos[n].shape
        m = measure(rgb, facts)
        assert m["decoder_fill_share"] >= 0.3  # half the scan data missing: a large grey fill
        assert "image_garbled" in {c["code"] for c in quality_checks(m, CFG) if c["failed"]}


def test_grey_fill_is_found_without_the_decoders_word(photos):
    # A truncated JPEG re-saved losslessly keeps libjpeg's mid-grey fill but loses the truncated fact.
    rgb, _ = decode_with_facts(qb.corrupt(qb.encode(photos["china"]), "truncate", 0.6, random.Random(1)))
    m = measure(rgb, DecodeFacts(format="PNG"))
    assert m["decoder_fill_share"] >= 0.2


def test_scan_damage_recall_where_a_tenth_or_more_is_damaged(photos):
    rng = random.Random(7)
    files, raised = [], 0
    for n in RECALL_SET:
        clean = qb.encode(photos[n])
        clean_rgb = decode_with_facts(clean)[0]
        for kind, amount in (("flip", 4), ("flip", 16), ("zero", 256)) * 2:
            data = qb.corrupt(clean, kind, amount, rng)
            try:
                rgb, facts = decode_with_facts(data)
            except OSError:
                raised += 1
                continue
            assert not facts.truncated  # the damage decodes quietly: nothing but the pixels tells
            if qb.damaged_share(clean_rgb, rgb) >= 0.10:
                files.append(data)
    assert len(files) >= 15 and raised <= len(files)
    assert recall(files, "image_garbled") >= 0.75


# ----------------------------------------------------------------------------- records and config


def test_records_are_typed_and_codes_bare(photos):
    rgb, facts = decode_with_facts(qb.encode(photos["rocket"]))
    recs = quality_checks(measure(rgb, facts), QualityConfig(min_jpeg_quality=95))
    codes = [r["code"] for r in recs]
    assert set(codes) <= set(CODES) and len(codes) == len(set(codes))
    assert {"image_blurred", "image_flat", "image_underexposed", "image_overexposed", "image_bordered",
            "image_upscaled", "image_garbled", "image_overcompressed"} == set(codes)
    for r in recs:
        assert ":" not in r["code"] and not any(ch.isdigit() for ch in r["code"])
    q = {r["code"]: r for r in recs}["image_overcompressed"]
    assert q["value"] == 90 and q["threshold"] == 95 and q["op"] == ">=" and q["failed"]
    # The JPEG minimum is off by default.
    assert "image_overcompressed" not in {r["code"] for r in quality_checks(measure(rgb, facts), CFG)}


def test_tiny_and_uniform_pictures_do_not_crash():
    for shape in ((1, 1, 3), (7, 300, 3), (40, 40, 3)):
        m = measure(np.full(shape, 90, np.uint8), DecodeFacts())
        recs = quality_checks(m, CFG)
        assert {r["code"] for r in recs if r["failed"]} == {"image_flat"}
    with pytest.raises(ValueError):
        measure(np.zeros((10, 10), np.uint8), DecodeFacts())


def test_config_validation():
    QualityConfig().validate()
    for bad in (dict(max_border_share=1.5), dict(min_sharpness=-1), dict(max_upscale_factor=0.5),
                dict(min_jpeg_quality=101)):
        with pytest.raises(ValueError):
            QualityConfig(**bad).validate()


# ----------------------------------------------------------------------------- decoding paths


def _with_orientation(data: bytes, orientation: int) -> bytes:
    """The same JPEG re-saved with an EXIF orientation tag (EXIF 2.3, tag 0x0112)."""
    from PIL import Image

    img = Image.open(io.BytesIO(data))
    exif = Image.Exif()
    exif[0x0112] = orientation
    buf = io.BytesIO()
    img.save(buf, "JPEG", quality=90, exif=exif.tobytes())
    return buf.getvalue()


@pytest.mark.parametrize("orientation", [3, 6, 8])
def test_damage_is_found_in_pictures_turned_by_exif(photos, orientation):
    # EXIF orientation 3 turns the picture over, 6 and 8 turn it a quarter (EXIF 2.3, tag 0x0112):
    # the grey fill of a truncated file then sits at the top or on a side, not at the bottom.
    data = _with_orientation(qb.encode(photos["chelsea"]), orientation)
    cut = qb.corrupt(data, "truncate", 0.5, random.Random(0))
    rgb, facts = decode_with_facts(cut)
    assert facts.truncated
    assert (rgb.shape[1] < rgb.shape[0]) == (orientation in (6, 8))
    m = measure(rgb, facts)
    assert m["decoder_fill_share"] >= 0.3
    # Without the decoder's word the stepped grey fill still tells (libjpeg fills mid grey).
    assert measure(rgb, DecodeFacts(format="JPEG"))["decoder_fill_share"] >= 0.3


def test_the_decoders_word_decides_for_a_plain_band():
    # The same pixels, a plain straight band of one colour at the bottom: a picture's own band,
    # unless the decoder said the data ended early.
    rng = np.random.default_rng(0)
    rgb = rng.integers(0, 255, (240, 320, 3)).astype(np.uint8)
    rgb[160:] = (30, 60, 90)
    plain = measure(rgb, DecodeFacts(format="JPEG"))
    cut = measure(rgb, DecodeFacts(format="JPEG", truncated=True))
    assert plain["decoder_fill_share"] == 0.0
    assert cut["decoder_fill_share"] == pytest.approx(80 / 240)
    fails = {c["code"] for c in quality_checks(cut, CFG) if c["failed"]}
    assert "image_garbled" in fails


def test_draft_decoding_keeps_the_verdicts_on_clean_photos(photos):
    # Inspect may decode big JPEGs at 1/2, 1/4 or 1/8 scale (Pillow draft mode); the measures say
    # where they stand in the file's own pixels.
    for n in ("grace_hopper", "hubble_deep_field", "retina"):
        assert failed(qb.encode(photos[n]), draft_scale=0.5) == set()
    for n in ("hubble_deep_field", "retina"):  # short side over 512: inspect's default drafts them
        data = qb.encode(photos[n])
        assert failed(data, draft_short_side=256) == set()
        rgb, facts = decode_with_facts(data, draft_short_side=256)
        assert facts.scale < 1
        m = measure(rgb, facts)
        h, w = photos[n].shape[:2]
        assert (m["width"], m["height"]) == pytest.approx((w, h), rel=0.01)
        assert (m["content_x1"], m["content_y1"]) == pytest.approx((w, h), rel=0.01)


def test_missing_measures_pass_with_null_values():
    # A record for every check even when a measure is missing (e.g. a cache from an older version).
    recs = quality_checks({}, CFG)
    assert [r["code"] for r in recs] == ["image_blurred", "image_flat", "image_underexposed", "image_overexposed",
                                         "image_bordered", "image_upscaled", "image_garbled"]
    assert all(r["value"] is None for r in recs)
    assert not any(r["failed"] for r in recs)


def test_a_plain_grey_backdrop_at_low_quality_is_not_decoder_fill(photos):
    # Product photos are often shot on grey seamless paper. At low JPEG quality the backdrop's
    # sensor noise quantises away and it decodes to blocks of exactly mid grey, the colour libjpeg
    # gives missing data (zeroed DCT coefficients decode to level 128; common practice), with the
    # object's outline snapped to the block grid. Without a decoder warning or truncation that is
    # not damage. Public photo: scikit-image's coffee under a noisy grey backdrop with a notch.
    from PIL import Image

    rng = np.random.default_rng(0)
    img = photos["coffee"].copy()
    grey = np.clip(128 + rng.normal(0, 1.5, img.shape), 0, 255).astype(np.uint8)
    img[:128] = grey[:128]
    img[128:144, :344] = grey[128:144, :344]  # the cup's rim reaches into the next row of blocks
    buf = io.BytesIO()
    Image.fromarray(img).save(buf, "JPEG", quality=12)
    rgb, facts = decode_with_facts(buf.getvalue())
    m = measure(rgb, facts)
    assert m["jpeg_quality"] < 30 and m["decoder_fill_share"] > 0.01  # it does look like fill
    assert "image_garbled" not in failed(buf.getvalue())
