"""What the three readers share: row building and identity, the input-root scope
(links, special files, size cap), caption parsing and a folder walk that never
follows linked folders."""
from __future__ import annotations

import base64
import datetime
import errno
import json
import logging
import math
import os
import stat
from typing import Any, Iterator

import pyarrow as pa

from .base import (
    CAPTION_PROBLEMS,
    IMAGE_EXTENSIONS,
    SOURCE_PROBLEMS,
    SOURCE_SCHEMA,
    stable_id,
)

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


def normalize_name(name: str) -> str:
    """A relative `/`-separated name with its `.` and empty parts dropped (`./a//b.jpg` -> `a/b.jpg`).

    `..` parts are kept as they are; an absolute name stays absolute.
    """
    parts = [p for p in name.split("/") if p not in ("", ".")]
    return ("/" if name.startswith("/") else "") + "/".join(parts)


class Scope:
    """The input root as the readers enforce it: links and paths may not leave it unless allowed."""

    def __init__(self, root: str, allow_outside: bool, max_bytes: int):
        self.real = os.path.realpath(root)
        self.allow_outside = allow_outside
        self.max_bytes = max_bytes

    def inside(self, real: str) -> bool:
        base = self.real.rstrip(os.sep) + os.sep
        return real == self.real or real.startswith(base)

    def check_file(self, path: str, *, resolve: bool) -> tuple[str | None, int | None, int | None, str]:
        """(problem, size, mtime_ns, locator) for an image file, never opening it.

        resolve: the path may hold links (a linked file, a manifest path); the
        locator is then the resolved path, which must lie inside the root.
        """
        locator = path
        if resolve:
            try:
                locator = os.path.realpath(path)
            except (OSError, ValueError):
                return "unreadable", None, None, ""
            if not self.allow_outside and not self.inside(locator):
                return "outside_root", None, None, ""
        try:
            st = os.stat(locator)
        except (OSError, ValueError):
            return "unreadable", None, None, locator
        if stat.S_ISDIR(st.st_mode):
            return "unreadable", None, None, ""
        if not stat.S_ISREG(st.st_mode):
            return "special_file", None, None, ""
        if st.st_size > self.max_bytes:
            return "file_too_large", st.st_size, st.st_mtime_ns, locator
        problem = None if os.access(locator, os.R_OK) else "unreadable"
        return problem, st.st_size, st.st_mtime_ns, locator


def make_row(
    source: str,
    locator: str,
    *,
    key: str | None = None,
    order: tuple[bytes, int] = (b"", 0),
    caption_raw: bytes | None = None,
    caption_problem: str | None = None,
    source_problem: str | None = None,
    file_size: int | None = None,
    mtime_ns: int | None = None,
    meta: str | None = None,
) -> dict[str, Any]:
    """One source row. `key` is the identity the sample_id is made from (default: the source);
    `order` places the row among inputs that share that identity."""
    if source_problem is not None and source_problem not in SOURCE_PROBLEMS:
        raise ValueError(f"unknown source problem code {source_problem!r}")
    if caption_problem is not None and caption_problem not in CAPTION_PROBLEMS:
        raise ValueError(f"unknown caption problem code {caption_problem!r}")
    return {
        "sample_id": stable_id(source if key is None else key),
        "source": source,
        "locator": locator,
        "caption_raw": caption_raw,
        "caption_problem": caption_problem,
        "source_problem": source_problem,
        "file_size": file_size,
        "mtime_ns": mtime_ns,
        "meta": meta,
        "_order": order,
    }


def to_table(rows: list[dict[str, Any]]) -> pa.Table:
    """Rows -> a table with exactly SOURCE_SCHEMA, sorted by source (then sample_id).

    Inputs that share one identity all get `source_duplicate` and the ids
    `<id>-1`, `<id>-2`, ... in their `order`; a plain id is 16 hex chars, so
    the suffixed ids can equal no other id.
    """
    groups: dict[str, list[dict[str, Any]]] = {}
    for r in rows:
        groups.setdefault(r["sample_id"], []).append(r)
    for sid, group in groups.items():
        if len(group) < 2:
            continue
        log.warning("%d inputs share the source %s; each is dropped as source_duplicate", len(group),
                    group[0]["source"])
        for n, r in enumerate(sorted(group, key=lambda r: r["_order"]), start=1):
            r["sample_id"] = f"{sid}-{n}"
            r["source_problem"] = "source_duplicate"
    for r in rows:
        r.pop("_order", None)
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


def read_caption_file(path: str, ext: str, scope: Scope) -> tuple[bytes | None, str | None]:
    """Read a sidecar file: a link out of the root is `caption_outside_root` (unless allowed); a
    special file, a file over MAX_CAPTION_BYTES or any failure to read is `caption_unreadable`."""
    try:
        real = os.path.realpath(path)
        if not scope.allow_outside and not scope.inside(real):
            return None, "caption_outside_root"
        st = os.stat(real)
        if not stat.S_ISREG(st.st_mode) or st.st_size > MAX_CAPTION_BYTES:
            return None, "caption_unreadable"
        data = read_regular_file(real, MAX_CAPTION_BYTES)
    except (OSError, ValueError):
        return None, "caption_unreadable"
    return caption_from_member(ext, data)


def read_regular_file(path: str, max_bytes: int) -> bytes:
    """The bytes of a regular file of at most `max_bytes`. Raises OSError for anything else.

    A special file (FIFO, device) is never opened, and the last path part may not
    be a link (the readers hand out resolved paths), so a file swapped for a
    link after listing is refused.
    """
    st = os.stat(path)
    if not stat.S_ISREG(st.st_mode):
        raise OSError(f"{path}: not a regular file; not opened")
    if st.st_size > max_bytes:
        raise OSError(f"{path}: {st.st_size} bytes, over the {max_bytes}-byte limit (input.max_file_bytes)")
    flags = os.O_RDONLY | getattr(os, "O_NONBLOCK", 0) | getattr(os, "O_NOFOLLOW", 0) | getattr(os, "O_CLOEXEC", 0)
    try:
        fd = os.open(path, flags)
    except OSError as e:
        if e.errno == errno.ELOOP:
            raise OSError(f"{path}: is a link now (changed since it was listed); not read") from e
        raise
    with os.fdopen(fd, "rb") as f:
        if not stat.S_ISREG(os.fstat(f.fileno()).st_mode):
            raise OSError(f"{path}: not a regular file; not read")
        data = f.read(max_bytes + 1)
    if len(data) > max_bytes:
        raise OSError(f"{path}: over the {max_bytes}-byte limit (input.max_file_bytes); not read")
    return data


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
