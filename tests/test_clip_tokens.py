"""Our torch-free CLIP token counter against open_clip's own tokenizer (the reference library)."""
from __future__ import annotations

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from curate.clip_tokens import count_tokens


@pytest.fixture(scope="module")
def reference():
    from open_clip.tokenizer import SimpleTokenizer

    return SimpleTokenizer()


TEXTS = [
    "a hand-thrown blue speckled mug on a slate tile, studio light",
    "Teapot No. 4 — celadon glaze, 1.2 L, £45 (sold out!)",
    "IMG_4032.JPG",
    "café crème brûlée ramekins &amp; saucers",
    "日本の陶器の茶碗 with a 😀 emoji",
    "it's what we'd've done; they're OK",
    "   lots   of\twhitespace\n\nhere  ",
    "",
]


@pytest.mark.parametrize("text", TEXTS)
def test_counts_equal_open_clip(reference, text):
    assert count_tokens(text) == len(reference.encode(text))


@given(st.text(max_size=120))
@settings(max_examples=300, deadline=None)
def test_counts_equal_open_clip_on_any_text(text):
    from open_clip.tokenizer import SimpleTokenizer

    ref = _REF.setdefault("t", SimpleTokenizer())
    assert count_tokens(text) == len(ref.encode(text))


_REF: dict = {}
