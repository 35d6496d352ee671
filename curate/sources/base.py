"""The source table every reader produces, one row per input, and the codes it may carry.

Columns (SOURCE_SCHEMA):
- sample_id: the identity of one input, unique in the table by construction.
  Normally the first 16 hex chars of sha256 of `source` (or of the manifest
  id when `input.id_column` is set): the same input gets the same id on every
  run and machine. When several inputs share that identity (see
  `source_duplicate`), every one of them gets `<16 hex>-<n>` instead (n = 1,
  2, ... in a fixed order: member position in the archive, raw file-name
  bytes, or manifest row), and none keeps the plain id.
- source: path relative to the input root with `/` separators; for tar shards
  `<shard.tar>/<member key>`; for manifests the image path as written, with
  `.` and empty parts dropped.
- locator: how to read the image bytes back (see `member_locator` and
  `split_locator`): an absolute file path, or an archive member written as
  `<absolute tar path> NUL <header offset> NUL <member name>`. No file name can
  hold a NUL, so no file name can pass for an archive member. Empty when the
  entry must never be opened (outside the root, a special file, a name that
  is not UTF-8, a ragged manifest row).
- caption_raw: the caption's raw bytes (sidecar text, JSON `caption` field,
  or manifest cell), null when there is none.
- caption_problem: null, or a code of CAPTION_PROBLEMS.
- source_problem: null, or a code of SOURCE_PROBLEMS (the entry is unusable
  before decoding; it is never read).
- file_size, mtime_ns: for fingerprints (a changed file re-runs its shard).
- meta: JSON object text with extra manifest columns, or null.
"""
from __future__ import annotations

import hashlib

import pyarrow as pa

SOURCE_SCHEMA = pa.schema(
    [
        ("sample_id", pa.string()),
        ("source", pa.string()),
        ("locator", pa.string()),
        ("caption_raw", pa.binary()),
        ("caption_problem", pa.string()),
        ("source_problem", pa.string()),
        ("file_size", pa.int64()),
        ("mtime_ns", pa.int64()),
        ("meta", pa.string()),
    ]
)

IMAGE_EXTENSIONS = (".jpg", ".jpeg", ".png", ".webp", ".gif", ".bmp", ".tif", ".tiff")

# Every code a reader may put in `source_problem`, with its help text. The inspect
# stage turns the code into a failed check (default action: drop).
SOURCE_PROBLEMS: dict[str, str] = {
    "unreadable": "the image file or archive could not be read (missing, no permission, or a damaged archive)",
    "unsafe_path": "archive member is absolute, climbs out with '..', or is a link or device; never read",
    "source_duplicate": "another input has the same source name or id (e.g. ./x.jpg and x.jpg in one archive, "
                        "or one manifest row listed twice); every one of them is dropped",
    "outside_root": "a link or manifest path that resolves outside the input root; not read "
                    "(input.allow_outside_root = true allows it)",
    "special_file": "not a regular file (a FIFO, device or socket); never opened",
    "file_too_large": "the file is larger than input.max_file_bytes; not read",
    "name_not_utf8": "the file or member name is not valid UTF-8, so it cannot be stored or read back; rename it",
    "row_ragged": "the manifest row has more or fewer cells than the header (often an unquoted comma)",
    "image_path_missing": "the manifest row has no image path",
}

# Every code a reader may put in `caption_problem`, with its help text. The caption
# stage turns the code into a failed check (default action: drop).
CAPTION_PROBLEMS: dict[str, str] = {
    "caption_missing": "no caption sidecar, field or cell",
    "caption_unreadable": "the caption file could not be read or parsed",
    "caption_outside_root": "the caption sidecar is a link that resolves outside the input root; not read "
                            "(input.allow_outside_root = true allows it)",
    "caption_duplicate": "one archive holds several caption members with this name; which one is meant is unknown",
}

# All reader codes in one table: the codes to register as reason codes.
PROBLEM_CODES: dict[str, str] = {**SOURCE_PROBLEMS, **CAPTION_PROBLEMS}

MEMBER_SEP = "\0"  # separates the fields of an archive member's locator; never part of a path


def stable_id(key: str) -> str:
    """16 hex chars of sha256(key): stable across runs, machines and Python versions."""
    return hashlib.sha256(key.encode("utf-8", "surrogatepass")).hexdigest()[:16]


def member_locator(tar_path: str, offset: int, name: str) -> str:
    """The locator of the archive member whose header starts at byte `offset` of `tar_path`."""
    return f"{tar_path}{MEMBER_SEP}{int(offset)}{MEMBER_SEP}{name}"


def split_locator(locator: str) -> tuple[str, int, str] | None:
    """(tar path, header offset, member name) for a member locator; None for a plain file path.

    Raises ValueError for a locator that holds a NUL but is not a member locator.
    """
    if MEMBER_SEP not in locator:
        return None
    tar_path, offset, name = locator.split(MEMBER_SEP, 2)
    if not tar_path or not offset.isdigit():
        raise ValueError(f"not a member locator: {locator!r}")
    return tar_path, int(offset), name
