"""Smoke tests for the demo corpus tools (sample_corpus/workshop.py, make_corpus.py).

The renderer makes invented demo data, so these checks are about its own promises
(determinism, caption content), not an outside reference; the Luhn and IBAN checks
at the end use the ISO worked examples.
"""

import hashlib
import random
import sys
from pathlib import Path

import numpy as np
import pytest

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "sample_corpus"))
import make_corpus  # noqa: E402  (its Luhn and IBAN checks guard the planted numbers)

import workshop  # noqa: E402


def _render_digest(seed: int, size=(200, 160)) -> tuple[str, dict]:
    rng = random.Random(seed)
    spec = workshop.random_spec(rng)
    img = workshop.render(spec, size, rng)
    return hashlib.sha256(img.tobytes()).hexdigest(), spec


def test_same_seed_same_pixels_and_different_seed_differs():
    a, spec_a = _render_digest(7)
    b, spec_b = _render_digest(7)
    c, _ = _render_digest(8)
    assert spec_a == spec_b
    assert a == b
    assert a != c


def test_render_size_and_mode():
    rng = random.Random(3)
    img = workshop.render(workshop.random_spec(rng), (321, 123), rng)
    assert img.mode == "RGB"
    assert img.size == (321, 123)


@pytest.mark.parametrize("item", workshop.ITEMS)
def test_item_is_drawn_in_its_glaze(item):
    # Rendering the same scene in two far-apart glazes changes many pixels: the piece is visible.
    spec = workshop.random_spec(random.Random(11))
    spec.update(item=item, pattern="plain", backdrop="white backdrop")
    blue = np.asarray(workshop.render(dict(spec, glaze="blue"), (160, 160), random.Random(1)), float)
    yellow = np.asarray(workshop.render(dict(spec, glaze="yellow"), (160, 160), random.Random(1)), float)
    changed = (np.abs(blue - yellow).sum(axis=2) > 60).mean()
    assert changed > 0.03


def test_captions_name_item_and_glaze_and_are_6_to_20_words():
    for seed in range(300):
        rng = random.Random(seed)
        spec = workshop.random_spec(rng)
        caption = workshop.describe(spec, rng)
        assert spec["item"] in caption.lower()
        assert spec["glaze"] in caption.lower()
        assert 6 <= len(caption.split()) <= 20
    rng_a, rng_b = random.Random(5), random.Random(5)
    spec = workshop.random_spec(rng_a)
    workshop.random_spec(rng_b)
    assert workshop.describe(spec, rng_a) == workshop.describe(spec, rng_b)


def test_mismatch_changes_item_and_glaze():
    for seed in range(100):
        rng = random.Random(seed)
        spec = workshop.random_spec(rng)
        other = workshop.mismatch(spec, rng)
        assert other["item"] != spec["item"]
        assert other["glaze"] != spec["glaze"]
        assert other["backdrop"] == spec["backdrop"]


def test_watermark_is_deterministic_and_stamped_across_the_photo():
    base = workshop.render(workshop.random_spec(random.Random(4)), (480, 360), random.Random(4))
    before = np.asarray(base).copy()
    a = workshop.watermark(base, random.Random(9))
    b = workshop.watermark(base, random.Random(9))
    c = workshop.watermark(base, random.Random(10))
    assert np.array_equal(np.asarray(base), before)  # the input photo is left as it was
    assert a.size == base.size and a.mode == "RGB"
    assert np.array_equal(np.asarray(a), np.asarray(b))
    assert not np.array_equal(np.asarray(a), np.asarray(c))
    for img in (a, c):
        changed = np.abs(np.asarray(img, float) - before).sum(axis=2) > 30
        cols = np.flatnonzero(changed.any(axis=0))
        assert cols[-1] - cols[0] >= 0.5 * base.width  # across the photo, not a corner
        assert 0.01 < changed.mean() < 0.4  # a band of marks, not a new picture


def test_watermark_phrases_name_the_shop():
    assert workshop.WATERMARK_PHRASES
    for phrase in workshop.WATERMARK_PHRASES:
        assert "Kilnworks" in phrase and "watermark" in phrase


def test_luhn_check_matches_iso_7812_worked_examples():
    # ISO/IEC 7812-1 Luhn worked example: 79927398713 is valid (see shared FACTS).
    assert make_corpus.luhn_ok("79927398713")
    assert not make_corpus.luhn_ok("79927398710")
    # 4111 1111 1111 1111 is valid; changing one digit breaks it (see shared FACTS).
    assert make_corpus.luhn_ok("4111 1111 1111 1111")
    assert not make_corpus.luhn_ok("4111 1111 1111 1112")


def test_iban_check_matches_iso_13616_examples():
    # ISO 13616 / MOD 97-10 examples (see shared FACTS): valid, and invalid with the last digit changed.
    assert make_corpus.iban_ok("GB82 WEST 1234 5698 7654 32")
    assert make_corpus.iban_ok("DE89 3704 0044 0532 0130 00")
    assert not make_corpus.iban_ok("GB82 WEST 1234 5698 7654 33")
    assert not make_corpus.iban_ok("DE89 3704 0044 0532 0130 01")
