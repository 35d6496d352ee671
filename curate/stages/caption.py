"""caption: normalise caption text and check it.

Normalisation: strip a BOM, decode UTF-8 (invalid bytes: decoded as cp1252 /
Latin-1 and repaired with ftfy, never a crash), repair mojibake with ftfy,
Unicode NFC, control characters removed, runs of whitespace collapsed.
Checks: empty, too short/long in characters and in CLIP tokens, file-name-like
or boilerplate text. The repeated-caption check needs the whole corpus and
runs in the global `caption_repeats` stage below.
"""
from __future__ import annotations

import html
import re
import unicodedata
from dataclasses import dataclass, field

import pyarrow as pa

from ..checks import CHECKS_TYPE, check, columnar
from ..sources.base import CAPTION_PROBLEMS
from .base import CheckSpec, Column, StageContext, checks_column, stage

NAME = "caption"
VERSION = "2"

# Common placeholder captions of scraped and exported archives (common practice).
DEFAULT_BOILERPLATE = [
    "image", "img", "picture", "pic", "photo", "photograph", "untitled", "untitled image", "no title",
    "no description", "no caption", "description", "caption", "placeholder", "thumbnail", "default",
    "null", "none", "n/a", "na", "undefined", "click to enlarge", "image not found", "stock photo",
    "stock image", "product image", "main image", "featured image", "alt", "alt text", "logo", "banner",
    "screenshot", "untitled-1", "new image", "download", "test",
]


@dataclass
class CaptionConfig:
    enabled: bool = True
    # Minimum characters after normalisation (LAION-400M, Schuhmann et al. 2021: alt-text under 5 chars dropped).
    min_chars: int = 5
    # Maximum characters (common practice: longer text is usually scraped page text, not a caption).
    max_chars: int = 1000
    # Minimum CLIP BPE tokens, start/end tokens excluded (common practice: one- or two-word captions say little).
    min_tokens: int = 3
    # Maximum CLIP tokens incl. start/end; CLIP's text context is 77 tokens (Radford et al. 2021), longer text is cut.
    max_tokens: int = 77
    # Captions seen on at least this many distinct images are template or spam captions (common practice).
    max_repeats: int = 5
    # Lower-cased captions (punctuation stripped) treated as boilerplate.
    boilerplate: list[str] = field(default_factory=lambda: list(DEFAULT_BOILERPLATE))

    def validate(self) -> None:
        for k in ("min_chars", "max_chars", "min_tokens", "max_tokens"):
            if getattr(self, k) < 0:
                raise ValueError(f"{k} must be >= 0, got {getattr(self, k)}")
        if self.min_chars > self.max_chars:
            raise ValueError("min_chars must be <= max_chars")
        if self.max_repeats < 2:
            raise ValueError("max_repeats must be >= 2")


COLUMNS = (
    Column("caption", pa.string(), "the caption after repair and normalisation", shard=True),
    Column("caption_chars", pa.int32(), "characters in the caption"),
    Column("caption_tokens", pa.int32(), "CLIP tokens, start and end tokens included", shard=True),
    Column("caption_repaired", pa.bool_(), "the text was changed by repair or normalisation"),
    Column("caption_key", pa.string(), "the caption folded for counting repeats", ledger=False),
)

CHECKS = (
    *(CheckSpec(code, "drop", help) for code, help in CAPTION_PROBLEMS.items()),
    CheckSpec("caption_empty", "drop", "the caption is empty after normalisation"),
    CheckSpec("caption_short", "drop", "fewer characters than the minimum"),
    CheckSpec("caption_long", "drop", "more characters than the maximum"),
    CheckSpec("caption_few_tokens", "drop", "fewer CLIP tokens than the minimum"),
    CheckSpec("caption_many_tokens", "flag", "more CLIP tokens than the text encoder reads; the rest is cut"),
    CheckSpec("caption_filename", "drop", "the caption looks like a file or camera name"),
    CheckSpec("caption_boilerplate", "drop", "a placeholder caption such as 'image' or 'untitled'"),
)
REPEAT_CHECKS = (
    CheckSpec("caption_repeated", "drop", "the same caption text on many different images"),
)

_CONTROL = re.compile(r"[\u0000-\u0008\u000b\u000c\u000e-\u001f\u007f-\u009f\u200b\ufeff]")
_SPACE = re.compile(r"\s+")
_IMG_EXT = r"(jpe?g|png|gif|webp|bmp|tiff?|heic|heif|raw|cr2|nef|arw|dng)"
# Camera and phone file-name patterns (common practice: DCF-style prefixes such as IMG_, DSC, PXL_).
_FILENAME = [
    re.compile(rf"^[\w\-. ()\[\]]+\.{_IMG_EXT}$", re.I),
    re.compile(r"^(img|dsc|dscn|dscf|dcim|pxl|mvimg|gopr|gp|dji|sam|cimg|pict|p|_mg|wp|vid|photo|image|pic|screenshot|scan)"
               r"[ _\-]?\d[\d_\- ]{2,}[a-z]?$", re.I),
    re.compile(r"^[0-9a-f]{16,}$", re.I),
    re.compile(r"^[\d_\-. ]{6,}$"),
    re.compile(r"^screenshot[ _\-]?\d{4}[\-_]?\d{2}[\-_]?\d{2}.*$", re.I),
]
_PUNCT = re.compile(r"[^\w\s/]+", re.UNICODE)


def decode_caption(raw: bytes) -> tuple[str, bool]:
    """Raw caption bytes -> (text, repaired). Invalid UTF-8 never raises."""
    if raw.startswith(b"\xef\xbb\xbf"):
        raw = raw[3:]
    try:
        return raw.decode("utf-8"), False
    except UnicodeDecodeError:
        pass
    try:
        return raw.decode("cp1252"), True
    except UnicodeDecodeError:
        return raw.decode("latin-1"), True


# An HTML character reference with its closing ';' (HTML Living Standard, "character references"):
# named (&eacute;), decimal (&#233;) or hexadecimal (&#xE9;). Without the ';' it is left as text.
_CHAR_REF = re.compile(r"&(?:#[0-9]{1,7}|#[xX][0-9a-fA-F]{1,6}|[A-Za-z][A-Za-z0-9]{1,31});")
_MARKUP = re.compile(r"[<>]")


def _decode_ref(m: re.Match) -> str:
    ref = m.group()
    text = html.unescape(ref)
    return ref if _MARKUP.search(text) else text


def decode_entities(text: str) -> str:
    """HTML character references -> the characters they name, except any that would give `<` or `>`
    (`&lt;`, `&#60;`, `&GT;`, ...): those stay as written, so decoding never creates markup.

    Repeated until nothing changes, so double-escaped text (`&amp;amp;`) reads `&`; each pass
    shortens the text, so this ends.
    """
    while True:
        decoded = _CHAR_REF.sub(_decode_ref, text)
        if decoded == text:
            return text
        text = decoded


def normalize(text: str) -> str:
    """Entity decoding (decode_entities), ftfy repair, NFC, control characters removed, whitespace collapsed.

    ftfy's own entity decoding is off: it would turn `&lt;script&gt;` into `<script>`.
    """
    import ftfy

    for _ in range(3):  # ftfy repairs one layer of mojibake at a time; stop at a fixed point
        before = text
        text = decode_entities(_CONTROL.sub(" ", text))
        text = ftfy.fix_text(text, normalization="NFC", unescape_html=False)
        text = unicodedata.normalize("NFC", _CONTROL.sub(" ", text))
        text = _SPACE.sub(" ", text).strip()
        if text == before:
            break
    return text


def caption_key(text: str) -> str:
    """Key used to count repeats: case-folded, punctuation and spacing ignored."""
    return _SPACE.sub(" ", _PUNCT.sub(" ", text.casefold())).strip()


def looks_like_filename(text: str) -> bool:
    t = text.strip()
    return any(p.match(t) for p in _FILENAME)


def clip_token_count(text: str) -> int:
    """Tokens the CLIP text encoder sees, including its start and end tokens."""
    from ..clip_tokens import count_tokens

    return count_tokens(text) + 2


def caption_checks(text: str, tokens: int, key: str, cfg: CaptionConfig, boiler: set[str]) -> list[dict]:
    """The per-caption checks of one normalised, non-empty caption."""
    chars = len(text)
    return [
        check("caption_short", value=chars, threshold=cfg.min_chars, op=">=", unit="chars"),
        check("caption_long", value=chars, threshold=cfg.max_chars, op="<=", unit="chars"),
        check("caption_few_tokens", value=tokens - 2, threshold=cfg.min_tokens, op=">=", unit="tokens"),
        check("caption_many_tokens", value=tokens, threshold=cfg.max_tokens, op="<=", unit="tokens"),
        check("caption_filename", failed=looks_like_filename(text), detail=text[:40]),
        check("caption_boilerplate", failed=key in boiler, detail=text[:40]),
    ]


@stage(name=NAME, version=VERSION, config=CaptionConfig, kind="shard", phase="check",
       needs=("caption_raw", "caption_problem"), provides=COLUMNS, checks=CHECKS)
def run(table: pa.Table, cfg: CaptionConfig, ctx: StageContext) -> pa.Table:
    """Repair and normalise each caption, then check its length, tokens and kind."""
    boiler = {caption_key(b) for b in cfg.boilerplate}
    raws = table.column("caption_raw").to_pylist()
    problems = table.column("caption_problem").to_pylist()
    out: dict[str, list] = {c.name: [] for c in COLUMNS}
    out_checks = []
    for raw, problem in zip(raws, problems):
        text = chars = tokens = key = None
        repaired = False
        if problem is not None or raw is None:
            chks = [check(problem or "caption_missing", failed=True, detail="no caption")]
        else:
            decoded, repaired = decode_caption(raw)
            text = normalize(decoded)
            repaired = repaired or text != _SPACE.sub(" ", decoded).strip()
            chars = len(text)
            if not text:
                chks = [check("caption_empty", value=0, threshold=0, op=">", unit="chars")]
                text = None
            else:
                tokens = clip_token_count(text)
                key = caption_key(text)
                chks = caption_checks(text, tokens, key, cfg, boiler)
        for name, v in (("caption", text), ("caption_chars", chars), ("caption_tokens", tokens),
                        ("caption_repaired", repaired), ("caption_key", key)):
            out[name].append(v)
        out_checks.append(chks)
        if ctx.progress is not None:
            ctx.progress.advance(1)
    arrays = [table.column("sample_id")] + [pa.array(out[c.name], c.type) for c in COLUMNS]
    arrays.append(pa.array(out_checks, type=CHECKS_TYPE))
    return pa.Table.from_arrays(arrays, names=["sample_id", *[c.name for c in COLUMNS], checks_column(NAME)])


@stage(name="caption_repeats", section=NAME, version=VERSION, config=CaptionConfig, kind="global", phase="check",
       needs=("caption_key",), wants=("sha256",), checks=REPEAT_CHECKS, parallel="inline",
       provides=(Column("caption_images", pa.int32(), "distinct images that carry this caption"),))
def run_repeats(table: pa.Table, cfg: CaptionConfig, ctx: StageContext) -> pa.Table:
    """A caption on >= max_repeats distinct images (by sha256, else by sample) fails for all of them."""
    import numpy as np
    import pyarrow.compute as pc

    key = table.column("caption_key")
    img = table.column("sample_id")
    if "sha256" in table.column_names and table.column("sha256").null_count < table.num_rows:
        img = pc.coalesce(table.column("sha256"), img)
    has_key = pc.is_valid(key)
    per_key = pa.table({"key": key, "img": img}).filter(has_key).group_by("key").aggregate(
        [("img", "count_distinct")])
    images = per_key.column("img_count_distinct").take(pc.index_in(key, value_set=per_key.column("key")))
    cnt = np.asarray(images.to_numpy(zero_copy_only=False), dtype=np.float64)  # NaN where no key
    checks = columnar(table.num_rows, np.asarray(has_key.to_numpy(zero_copy_only=False), dtype=bool), [
        {"code": "caption_repeated", "value": cnt, "threshold": cfg.max_repeats, "op": "<", "unit": "images",
         "failed": ~(cnt < cfg.max_repeats)}])
    return pa.table(
        {
            "sample_id": table.column("sample_id"),
            "caption_images": images.cast(pa.int32()),
            checks_column("caption_repeats"): checks,
        }
    )
