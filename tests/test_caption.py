"""caption: normalisation and text checks, on small in-memory tables and with hypothesis."""
from __future__ import annotations

import unicodedata

import pyarrow as pa
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from curate.stages.base import StageContext
from curate.stages.caption import (
    CaptionConfig,
    caption_key,
    clip_token_count,
    decode_caption,
    looks_like_filename,
    normalize,
    run,
    run_repeats,
)

CFG = CaptionConfig()


def _run(raws, problems=None):
    n = len(raws)
    t = pa.table(
        {
            "sample_id": [str(i) for i in range(n)],
            "caption_raw": pa.array(raws, pa.binary()),
            "caption_problem": pa.array(problems or [None] * n, pa.string()),
        }
    )
    return run(t, CFG, StageContext(config=None))


def _failed(out, i):
    return [c["code"] for c in out.column("caption.checks").to_pylist()[i] if c["failed"]]


def test_good_caption_passes_every_check():
    out = _run(["a glossy blue mug on a wooden table".encode()])
    assert _failed(out, 0) == []
    assert out.column("caption").to_pylist() == ["a glossy blue mug on a wooden table"]


def test_each_reason():
    raws = [None, b"   ", b"mug", ("word " * 300).encode(), b"IMG_4032.JPG", b"DSC00123", b"Untitled",
            b"image.", b"cup"]
    problems = ["caption_missing"] + [None] * 8
    out = _run(raws, problems)
    assert _failed(out, 0) == ["caption_missing"]
    assert _failed(out, 1) == ["caption_empty"]
    assert "caption_short" in _failed(out, 2) and "caption_few_tokens" in _failed(out, 2)
    assert {"caption_long", "caption_many_tokens"} <= set(_failed(out, 3))
    assert "caption_filename" in _failed(out, 4)
    assert "caption_filename" in _failed(out, 5)
    assert "caption_boilerplate" in _failed(out, 6)
    assert "caption_boilerplate" in _failed(out, 7)


def test_invalid_utf8_and_mojibake_are_repaired_not_fatal():
    text, repaired = decode_caption(b"caf\xe9 mug with a \xff glaze")
    assert repaired and "café" in text
    # "Ã©" is the UTF-8 bytes of "é" read as Latin-1 (classic mojibake); ftfy repairs it.
    assert normalize("a crÃ¨me brÃ»lÃ©e ramekin") == "a crème brûlée ramekin"
    out = _run([b"\xff\xfe\xfa broken bytes around a mug \x80"])
    assert out.column("caption").to_pylist()[0]  # something readable came out


def test_nfc_and_whitespace():
    decomposed = "cafe\u0301  mug\t\nwith\u200bglaze"
    assert normalize(decomposed) == "café mug with glaze"
    assert unicodedata.is_normalized("NFC", normalize(decomposed))


def test_clip_token_count_matches_open_clip_tokenizer():
    # open_clip's tokenizer (reference library) pads to 77; the non-zero ids are what the model reads.
    import open_clip

    text = "a speckled stoneware teapot photographed on slate"
    ids = open_clip.tokenize([text])[0]
    assert clip_token_count(text) == int((ids != 0).sum())


def test_repeated_caption_counts_distinct_images():
    t = pa.table(
        {
            "sample_id": [str(i) for i in range(8)],
            "caption_key": ["best mug ever"] * 6 + ["a bowl", None],
            "sha256": ["h0", "h1", "h2", "h3", "h4", "h4", "h9", None],
        }
    )
    out = run_repeats(t, CaptionConfig(max_repeats=5), StageContext(config=None))
    checks = out.column("caption_repeats.checks").to_pylist()
    assert all(c[0]["failed"] for c in checks[:6])  # 5 distinct images share the caption
    assert not checks[6][0]["failed"] and checks[7] == []
    out = run_repeats(t, CaptionConfig(max_repeats=6), StageContext(config=None))
    assert not out.column("caption_repeats.checks").to_pylist()[0][0]["failed"]


@given(st.binary(max_size=300))
@settings(max_examples=200, deadline=None)
def test_any_bytes_never_crash(raw):
    text, _ = decode_caption(raw)
    n = normalize(text)
    assert "\x00" not in n and n == n.strip()
    caption_key(n)
    looks_like_filename(n)


@given(st.text(max_size=200))
@settings(max_examples=200, deadline=None)
def test_normalize_is_idempotent(s):
    once = normalize(s)
    assert normalize(once) == once


@pytest.mark.parametrize("name", ["IMG_4032.JPG", "DSC00123", "PXL_20230512_101112345", "photo.png",
                                  "20190501_123456", "Screenshot 2024-01-02 at 10.11.12"])
def test_camera_filenames(name):
    assert looks_like_filename(name)


@pytest.mark.parametrize("text", ["a blue mug", "Teapot No. 4 in celadon glaze", "2 bowls on linen"])
def test_real_captions_are_not_filenames(text):
    assert not looks_like_filename(text)


# ---------------------------------------------------------------- HTML character references
# Reference: the HTML Living Standard's named character references (Python's html.entities.html5
# is a copy of that table): &lt; = U+003C '<', &gt; = U+003E '>', &eacute; = U+00E9, &amp; = '&';
# &#60; and &#x3C; are '<' by code point (HTML, "numeric character reference").


@pytest.mark.parametrize(
    ("raw", "want"),
    [
        ("&lt;script&gt;alert(1)&lt;/script&gt; a mug", "&lt;script&gt;alert(1)&lt;/script&gt; a mug"),
        ("&#60;b&#62;bold&#x3C;/b&#X3e; bowl", "&#60;b&#62;bold&#x3C;/b&#X3e; bowl"),
        ("&LT;i&GT; &nvlt; vase", "&LT;i&GT; &nvlt; vase"),  # upper-case names; &nvlt; is '<' + U+20D2
        ("&amp;lt;script&amp;gt;", "&lt;script&gt;"),  # one escape level comes off; '<' never appears
        ("caf&eacute; cr&#232;me &#xE9;clair", "café crème éclair"),
        ("Tom &amp;amp; Jerry mug", "Tom & Jerry mug"),
        ("salt &amp pepper &notice", "salt &amp pepper &notice"),  # no ';': left as written
        ("a <b>bold</b> mug &amp; saucer", "a <b>bold</b> mug & saucer"),  # markup in the input stays
    ],
)
def test_entities_decode_to_text_but_never_to_markup(raw, want):
    assert normalize(raw) == want


def test_escaped_script_tag_reaches_the_caption_column_as_text():
    out = _run(["a mug &lt;script&gt;alert(1)&lt;/script&gt; on a table".encode()])
    (caption,) = out.column("caption").to_pylist()
    assert "<" not in caption and ">" not in caption and "&lt;script&gt;" in caption


_ENTITY_BITS = st.sampled_from(["&", "amp;", "lt;", "gt;", "#60;", "#x3c;", "#X3E;", "LT;", "nvgt;", "#", ";",
                                "eacute;", "quot;", "a", " ", "#38;", "x"])


@given(st.lists(st.one_of(_ENTITY_BITS, st.text(max_size=4)), max_size=30).map("".join))
@settings(max_examples=300, deadline=None)
def test_normalize_never_adds_angle_brackets(text):
    # Property: whatever the references, the normalised caption holds no more '<' or '>' than the input.
    out = normalize(text)
    assert out.count("<") <= text.count("<") and out.count(">") <= text.count(">")
    assert normalize(out) == out
