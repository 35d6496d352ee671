"""What the three readers share: row building, the sorted table, caption
parsing, locator parsing and a folder walk that never follows linked folders."""
from __future__ import annotations

import base64
import datetime
import json
import logging
import math
import os
import stat
from typing import Any, Iterator

import pyarrow as pa

from .base import IMAGE_EXTENSIONS, SOURCE_SCHEMA, TAR_SEP, stable_id

log = logging.getLogger(__name__)

# Largest caption we read (sidecar file or tar member). Our own bound, so a
# hostile multi-gigabyte "caption" cannot exhaust memory; real captions are
# a few hundred bytes (common practice).
MAX_CAPTION_BYTES = 1 << 20

CAPTION_EXTENSIONS = (".txt", ".json")


def is_image_name(name: str) -> bool:
    """True for a file name with one of the image extensions, in any case."""
    return os.path.splitext(name)[1].lower() in IMAGE_EXTENSIONS


def is_tar_name(name: str) -> bool:
    return name.lower().endswith(".tar")


def clean_text(s: str) -> tuple[str, bool]:
    """(s, True) when s is valid Unicode; otherwise a printable escaped form and False.

    File and member names that are not valid UTF-8 arrive from the OS as
    surrogate escapes, which Arrow strings cannot hold.
    """
    try:
        s.encode("utf-8")
        return s, True
    except UnicodeEncodeError:
        pass
    try:
        raw = s.encode("utf-8", "surrogateescape")
        return raw.decode("utf-8", "backslashreplace"), False
    except UnicodeEncodeError:
        return s.encode("utf-8", "backslashreplace").decode("utf-8"), False


def raw_caption(text: str) -> bytes:
    """A decoded caption string back to its bytes (undoing surrogate escapes), never failing."""
    try:
        return text.encode("utf-8", "surrogateescape")
    except UnicodeEncodeError:
        return text.encode("utf-8", "surrogatepass")


def make_row(
    source: str,
    locator: str,
    *,
    sample_id: str | None = None,
    caption_raw: bytes | None = None,
    caption_problem: str | None = None,
    source_problem: str | None = None,
    file_size: int | None = None,
    mtime_ns: int | None = None,
    meta: str | None = None,
) -> dict[str, Any]:
    return {
        "sample_id": stable_id(source) if sample_id is None else sample_id,
        "source": source,
        "locator": locator,
        "caption_raw": caption_raw,
        "caption_problem": caption_problem,
        "source_problem": source_problem,
        "file_size": file_size,
        "mtime_ns": mtime_ns,
        "meta": meta,
    }


def to_table(rows: list[dict[str, Any]]) -> pa.Table:
    """Rows -> a table with exactly SOURCE_SCHEMA, sorted by source (then sample_id)."""
    rows.sort(key=lambda r: (r["source"], r["sample_id"]))
    return pa.Table.from_pylist(rows, schema=SOURCE_SCHEMA)


def caption_from_json(data: bytes) -> tuple[bytes | None, str | None]:
    """The `caption` field of a JSON object as raw bytes, or a problem code.

    Not JSON, not an object, or a `caption` that is not a string ->
    `caption_unreadable`; no `caption` field (or null) -> `caption_missing`.
    """
    if data.startswith(b"\xef\xbb\xbf"):
        data = data[3:]
    try:
        obj = json.loads(data.decode("utf-8", "surrogateescape"))
    except (ValueError, RecursionError):
        return None, "caption_unreadable"
    if not isinstance(obj, dict):
        return None, "caption_unreadable"
    cap = obj.get("caption")
    if cap is None:
        return None, "caption_missing"
    if not isinstance(cap, str):
        return None, "caption_unreadable"
    return raw_caption(cap), None


def caption_from_member(ext: str, data: bytes) -> tuple[bytes | None, str | None]:
    """Caption bytes from a `.txt` (raw, as is) or `.json` payload."""
    if ext == ".txt":
        return data, None
    return caption_from_json(data)


def read_caption_file(path: str, ext: str) -> tuple[bytes | None, str | None]:
    """Read a sidecar file; any failure to read it is `caption_unreadable`."""
    try:
        st = os.stat(path)
        if not stat.S_ISREG(st.st_mode) or st.st_size > MAX_CAPTION_BYTES:
            return None, "caption_unreadable"
        with open(path, "rb") as f:
            data = f.read(MAX_CAPTION_BYTES + 1)
    except OSError:
        return None, "caption_unreadable"
    if len(data) > MAX_CAPTION_BYTES:
        return None, "caption_unreadable"
    return caption_from_member(ext, data)


def split_locator(locator: str) -> tuple[str, str] | None:
    """`<tar path>::<member>` -> (tar path, member); None for a plain file path.

    The tar path is the part before the first `::` that follows a `.tar` name,
    so member names may themselves contain `::`.
    """
    start = 0
    while True:
        i = locator.find(TAR_SEP, start)
        if i < 0:
            return None
        if is_tar_name(locator[:i]):
            return locator[:i], locator[i + len(TAR_SEP):]
        start = i + 1


def walk(root: str) -> Iterator[tuple[str, list[os.DirEntry], list[str]]]:
    """Yield (folder relative to root with `/` separators, '' for the root; its
    non-folder entries; the names of its sub-folders, linked ones too), depth
    first in name order.

    Linked folders are never followed (inside or outside the root: following
    them could leave the root or list the same files twice); each is logged.
    A sub-folder that cannot be listed is logged and skipped; the root itself
    raises OSError.
    """
    stack = [""]
    while stack:
        rel = stack.pop()
        absdir = os.path.join(root, rel) if rel else root
        try:
            with os.scandir(absdir) as it:
                entries = sorted(it, key=lambda e: e.name)
        except OSError as e:
            if not rel:
                raise
            log.warning("cannot list folder %s (%s); its files are not included", absdir, e.strerror or e)
            continue
        files: list[os.DirEntry] = []
        subdirs: list[str] = []
        dirnames: list[str] = []
        for entry in entries:
            try:
                if entry.is_dir(follow_symlinks=False):
                    subdirs.append(f"{rel}/{entry.name}" if rel else entry.name)
                    dirnames.append(entry.name)
                    continue
                if entry.is_symlink() and entry.is_dir():
                    log.warning("not following linked folder %s", entry.path)
                    dirnames.append(entry.name)
                    continue
            except OSError:
                pass
            files.append(entry)
        yield rel, files, dirnames
        stack.extend(reversed(subdirs))


def meta_json(values: dict[str, Any]) -> str:
    """Extra manifest columns as JSON object text (bytes as base64, dates as ISO 8601)."""
    obj = {str(k): _jsonable(v) for k, v in values.items()}
    text = json.dumps(obj, ensure_ascii=False, allow_nan=False)
    try:
        text.encode("utf-8")
    except UnicodeEncodeError:
        text = json.dumps(obj, ensure_ascii=True, allow_nan=False)
    return text


def _jsonable(v: Any) -> Any:
    if v is None or isinstance(v, (bool, int, str)):
        return v
    if isinstance(v, float):
        return v if math.isfinite(v) else None
    if isinstance(v, (bytes, bytearray, memoryview)):
        return base64.b64encode(bytes(v)).decode("ascii")
    if isinstance(v, (datetime.date, datetime.time)):
        return v.isoformat()
    if isinstance(v, dict):
        return {str(k): _jsonable(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [_jsonable(x) for x in v]
    return str(v)
