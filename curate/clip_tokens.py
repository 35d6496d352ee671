"""Count CLIP BPE tokens without importing torch.

The caption checks need "how many tokens will the CLIP text encoder see" for
every caption; open_clip's tokenizer gives that but importing it loads torch
(seconds per worker process). This is a small byte-pair-encoding counter over
the same merge table that open_clip ships (bpe_simple_vocab_16e6.txt.gz, the
table of Radford et al. 2021), checked against open_clip's own tokenizer in
the tests.
"""
from __future__ import annotations

import gzip
import html
import importlib.util
from functools import lru_cache
from pathlib import Path

# Pieces the text is cut into before byte-pair merging: contractions, letter runs,
# single digits, and runs of other non-space characters.
_PIECES = r"""<\|startoftext\|>|<\|endoftext\|>|'s|'t|'re|'ve|'m|'ll|'d|[\p{L}]+|[\p{N}]|[^\s\p{L}\p{N}]+"""
# CLIP's vocabulary keeps the first 48,894 merges of the table (49,152 tokens less bytes and specials).
_N_MERGES = 49152 - 256 - 2


def _vocab_file() -> Path:
    spec = importlib.util.find_spec("open_clip")
    if spec is None or not spec.submodule_search_locations:
        raise FileNotFoundError("open_clip is not installed: its BPE table is needed to count CLIP tokens")
    return Path(list(spec.submodule_search_locations)[0]) / "bpe_simple_vocab_16e6.txt.gz"


@lru_cache(maxsize=1)
def _tables():
    import regex

    lines = gzip.open(_vocab_file()).read().decode("utf-8").split("\n")
    merges = [tuple(m.split()) for m in lines[1 : _N_MERGES + 1]]
    ranks = {pair: i for i, pair in enumerate(merges)}
    # Bytes map to printable unicode characters so every byte string is a string of symbols.
    keep = list(range(ord("!"), ord("~") + 1)) + list(range(ord("¡"), ord("¬") + 1)) + list(range(ord("®"), ord("ÿ") + 1))
    byte_char = {}
    extra = 0
    for b in range(256):
        if b in keep:
            byte_char[b] = chr(b)
        else:
            byte_char[b] = chr(256 + extra)
            extra += 1
    return regex.compile(_PIECES, regex.IGNORECASE), ranks, byte_char


def _clean(text: str) -> str:
    import ftfy
    import regex

    text = ftfy.fix_text(text)
    text = html.unescape(html.unescape(text)).strip()
    return regex.sub(r"\s+", " ", text).strip().lower()


@lru_cache(maxsize=65536)
def _word_tokens(word: str) -> int:
    _, ranks, _ = _tables()
    symbols = list(word[:-1]) + [word[-1] + "</w>"]
    while len(symbols) > 1:
        best = None
        best_rank = None
        for a, b in zip(symbols, symbols[1:]):
            r = ranks.get((a, b))
            if r is not None and (best_rank is None or r < best_rank):
                best, best_rank = (a, b), r
        if best is None:
            break
        merged: list[str] = []
        i = 0
        while i < len(symbols):
            if i < len(symbols) - 1 and (symbols[i], symbols[i + 1]) == best:
                merged.append(symbols[i] + symbols[i + 1])
                i += 2
            else:
                merged.append(symbols[i])
                i += 1
        symbols = merged
    return len(symbols)


def count_tokens(text: str) -> int:
    """BPE tokens of `text`, without the start and end tokens."""
    pat, _, byte_char = _tables()
    n = 0
    for piece in pat.findall(_clean(text)):
        word = "".join(byte_char[b] for b in piece.encode("utf-8"))
        n += _word_tokens(word)
    return n
