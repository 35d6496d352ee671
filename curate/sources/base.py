"""The source table every reader produces, one row per sample.

Columns (SOURCE_SCHEMA):
- sample_id: stable id: first 16 hex chars of sha256 of `source` (or of the
  manifest id column when one is configured). Same input -> same id anywhere.
- source: path relative to the input root with `/` separators; for tar
  shards `<shard.tar>/<member key>`; for manifests the image path as written.
- locator: how to read the image bytes back: an absolute file path, or
  `<absolute tar path>::<member name>`.
- caption_raw: the caption's raw UTF-8 bytes (sidecar text, JSON `caption`
  field, or manifest cell), null when there is none.
- caption_problem: null, or a reason code when the caption could not be read
  (`caption_missing`, `caption_unreadable`).
- source_problem: null, or a reason code when the image entry itself is unusable
  before decoding (`unsafe_path`, `unreadable`).
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
TAR_SEP = "::"


def stable_id(key: str) -> str:
    """16 hex chars of sha256(key): stable across runs, machines and Python versions."""
    return hashlib.sha256(key.encode("utf-8", "surrogatepass")).hexdigest()[:16]
