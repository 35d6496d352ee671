"""risk: personal-data patterns in captions and location metadata, checked against standards' worked examples."""
from __future__ import annotations

import io

import pyarrow as pa
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from PIL import Image

from curate.stages.base import StageContext
from curate.stages.inspect import InspectConfig, inspect_one
from curate.stages.risk import PII_KINDS, RiskConfig, find_pii, iban_valid, luhn_valid, run


def test_luhn_worked_examples():
    # ISO/IEC 7812-1 Luhn check: 79927398713 is valid (check digit 3 for 7992739871).
    assert luhn_valid("79927398713")
    assert not any(luhn_valid("7992739871" + str(d)) for d in range(10) if d != 3)
    assert luhn_valid("4111111111111111") and not luhn_valid("4111111111111112")


def test_iban_worked_examples():
    # ISO 13616 / ISO/IEC 7064 MOD 97-10 worked examples; change the last digit and they fail.
    assert iban_valid("GB82 WEST 1234 5698 7654 32") and not iban_valid("GB82 WEST 1234 5698 7654 33")
    assert iban_valid("DE89 3704 0044 0532 0130 00") and not iban_valid("DE89 3704 0044 0532 0130 01")


@pytest.mark.parametrize(
    "text,kinds",
    [
        ("orders to jo.potter@kilnworks.example please", {"email"}),
        ("call +44 20 7946 0958 today", {"phone"}),
        ("paid with 4111 1111 1111 1111", {"card"}),
        ("paid with 4111 1111 1111 1112", set()),  # Luhn fails: not a card, and too long for a phone
        ("transfer to GB82 WEST 1234 5698 7654 32", {"iban"}),
        ("see https://kilnworks.example/shop", {"url"}),
        ("a 12 cm mug made in 2024, glaze no. 7", set()),
        ("a blue speckled mug on slate", set()),
    ],
)
def test_pii_kinds(text, kinds):
    assert {k for k, _ in find_pii(text, list(PII_KINDS))} == kinds


@given(st.text(max_size=200))
@settings(max_examples=200, deadline=None)
def test_pii_never_crashes(text):
    find_pii(text, list(PII_KINDS))


def test_gps_exif_sets_the_location_flag():
    img = Image.new("RGB", (300, 300), (9, 9, 9))
    exif = Image.Exif()
    gps = exif.get_ifd(0x8825)
    # EXIF 2.3 GPS IFD: 1/2 latitude ref/value, 3/4 longitude ref/value.
    gps[1], gps[2], gps[3], gps[4] = "N", (51.0, 30.0, 0.0), "W", (0.0, 7.0, 0.0)
    buf = io.BytesIO()
    img.save(buf, "JPEG", exif=exif.tobytes())
    cols, _, _ = inspect_one(buf.getvalue(), InspectConfig(min_file_bytes=0))
    assert cols["gps"] is True
    t = pa.table({"sample_id": ["a", "b"], "caption": ["a mug", "a bowl by jo@kilnworks.example"],
                  "gps": [True, False], "place": [None, None]})
    out = run(t, RiskConfig(terms={"brand": ["kilnworks"]}), StageContext(config=None))
    failed = [[c["code"] for c in cl if c["failed"]] for cl in out.column("risk.checks").to_pylist()]
    assert failed == [["location"], ["pii:email", "term:brand"]]
