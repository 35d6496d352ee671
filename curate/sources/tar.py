"""Tar shard input: a `.tar` file, or a folder of them (searched recursively).

Grouping rule. Each member name is normalised once: `.` and empty path parts
are dropped (`./a//b.jpg` -> `a/b.jpg`); an unsafe name (below) is kept as
written. A member whose normalised name ends in an image extension (any case)
is one sample; its key is the normalised name without that last extension.
Its caption is the `.txt` member with the same key, else the `.json` member
(its `caption` field); of two spellings of one extension (`k.txt`, `k.TXT`)
the lower-case one is used. Everything else (folders, other extensions) is
ignored. `source` is `<tar path relative to the root>/<key>`; when several
images share one key, each source keeps its extension (`<tar>/<key>.<ext>`).

Every image member is its own input, so none is merged or lost: when two
members still end up with one source (`./x.jpg` and `x.jpg`; a name repeated
in the archive; `k.jpg.png` next to `k.jpg` and `k.png`), each of them gets
`source_duplicate` and its own id (see base.py). When one caption name is
held by several members, the caption is `caption_duplicate`. A member's
locator names its header's byte offset, so the bytes read back are that
member's and no other's.

Safety: a member whose name is absolute or has a `..` part, or that is a
link, device or FIFO, is `unsafe_path` (its data is never read). A caption
member like that is `caption_unreadable`. An image member over
`input.max_file_bytes` is `file_too_large`; a caption member over
MAX_CAPTION_BYTES is `caption_unreadable`. A name that is not valid UTF-8 is
`name_not_utf8`. In a folder of shards, a `.tar` that is a link resolving
outside the root is `outside_root`, and one that is a FIFO or device is
`special_file` (one row for the archive, never opened). A tar that cannot be
read (or is cut off) keeps the samples listed before the fault and adds one
row for the archive itself (source = its path, `unreadable`); when the input
root is one .tar that yields no sample at all, that is an InputError. Only
uncompressed `.tar` is read, streaming; nothing is ever extracted: bytes are
read into memory.

Listing holds one archive's members at a time (their rows are sorted by
source); archives come in the order of their paths with '/' appended. On an
object store an archive is listed by streaming it once through the store, and
a member is read back by seeking to its header offset (`Archive`), so reading a
shard's members fetches those members, not the archive.
"""
from __future__ import annotations

import logging
import os
import re
import tarfile
from dataclasses import dataclass, field
from typing import Any, Callable, Iterator

from ..errors import InputError
from . import stores
from .base import member_locator
from .common import (
    CAPTION_EXTENSIONS,
    MAX_CAPTION_BYTES,
    Scope,
    caption_from_member,
    clean_text,
    is_image_name,
    is_tar_name,
    local_lister,
    make_row,
    normalize_name,
    sorted_walk,
)

log = logging.getLogger(__name__)

_DRIVE = re.compile(r"^[A-Za-z]:")


def iter_tar(root: str, scope: Scope) -> Iterator[dict]:
    """Rows of `root` (a local .tar file) or of every .tar under it (a folder): archives in the
    order of their paths with '/' appended, each archive's rows sorted by source."""
    if not os.path.isdir(root):
        rel = os.path.basename(root)
        rows, fault = _scan(rel, root, lambda: open(root, "rb"), scope.max_bytes)
        if fault is not None and not rows:
            raise InputError(f"input {root}: not a readable tar archive ({fault}); give an uncompressed .tar")
        yield from _sorted(rows + _fault_rows(rel, root, fault, len(rows)))
        return
    for group in sorted_walk(root, local_lister, slash=is_tar_name):
        rows: list[dict] = []
        for folder, name, linked in group:
            if not is_tar_name(name):
                continue
            rel = folder.child(name)
            full = os.path.join(folder.path, name)
            problem, _size, _mtime, path = scope.check_file(full, resolve=linked)
            if problem in ("outside_root", "special_file"):
                rows.append(_archive_row(rel, problem))
                continue
            rows.extend(list_one_tar(rel, path or full, scope.max_bytes))
        yield from _sorted(rows)


def iter_store_tar(store: stores.Store, root: str, url: str, is_dir: bool, max_bytes: int) -> Iterator[dict]:
    """The same for a .tar object or a folder of them on a store; archives are read as streams."""
    if not is_dir:
        rel = stores.base_name(root)
        rows, fault = _scan(rel, store.url(root), lambda: store.open(root), max_bytes)
        if fault is not None and not rows:
            raise InputError(f"input {url}: not a readable tar archive ({fault}); give an uncompressed .tar")
        yield from _sorted(rows + _fault_rows(rel, url, fault, len(rows)))
        return
    from .folder import store_lister, walk_error

    for group in sorted_walk(root, store_lister(store), stores.join, slash=is_tar_name, on_error=walk_error(url)):
        rows = []
        for folder, name, info in group:
            if not is_tar_name(name):
                continue
            rel = folder.child(name)
            path = stores.join(folder.path, name)
            if stores.kind_of(info) != "file":
                rows.append(_archive_row(rel, "special_file"))
                continue
            found, fault = _scan(rel, store.url(path), lambda p=path: store.open(p), max_bytes)
            rows.extend(found + _fault_rows(rel, store.url(path), fault, len(found)))
        yield from _sorted(rows)


def _sorted(rows: list[dict]) -> list[dict]:
    """One archive's (or one group's) rows in source order; rows with one source stay in `_order`."""
    rows.sort(key=lambda r: (r["source"], r["_order"]))
    return rows


def is_unsafe_name(name: str) -> bool:
    """True for a member name that would land outside an extraction folder."""
    if name.startswith(("/", "\\")) or _DRIVE.match(name):
        return True
    return any(part == ".." for part in re.split(r"[/\\]", name))


def member_name(name: str) -> str:
    """A member's normalised name: `.`/empty parts dropped (an unsafe name is kept as written)."""
    return name if is_unsafe_name(name) else normalize_name(name)


def list_one_tar(rel: str, path: str, max_bytes: int) -> list[dict]:
    """Rows for one local archive; `rel` is its name relative to the input root."""
    rows, fault = _scan(rel, path, lambda: open(path, "rb"), max_bytes)
    return rows + _fault_rows(rel, path, fault, len(rows))


def _archive_row(rel: str, problem: str) -> dict:
    return make_row(clean_text(rel)[0], "", order=(os.fsencode(rel), -1), source_problem=problem)


def _fault_rows(rel: str, path: str, fault: Exception | None, listed: int) -> list[dict]:
    if fault is None:
        return []
    log.warning("tar %s cannot be read past %d sample(s): %s", path, listed, fault)
    return [_archive_row(rel, "unreadable")]


@dataclass
class _Listing:
    """One archive's members as the grouping rule sees them."""

    images: list[tuple[str, str, tarfile.TarInfo]] = field(default_factory=list)  # (key, normalised name, info)
    # key -> lower-case extension -> normalised name -> [(raw caption, problem), ...] (one per member)
    captions: dict[str, dict[str, dict[str, list[tuple[bytes | None, str | None]]]]] = field(default_factory=dict)

    def caption(self, key: str) -> tuple[bytes | None, str | None]:
        kinds = self.captions.get(key, {})
        for low in CAPTION_EXTENSIONS:
            spellings = kinds.get(low)
            if not spellings:
                continue
            name = key + low if key + low in spellings else sorted(spellings)[0]
            found = spellings[name]
            return (None, "caption_duplicate") if len(found) > 1 else found[0]
        return None, "caption_missing"


def _scan(rel: str, path: str, opener: Callable[[], Any], max_bytes: int) -> tuple[list[dict], Exception | None]:
    """The archive's image members as rows, streamed once from `opener()` (a binary file);
    `path` is what its member locators name (a local path or a URL)."""
    listing = _Listing()
    fault: Exception | None = None
    try:
        with opener() as f:
            total = f.seek(0, os.SEEK_END)
            f.seek(0)
            with tarfile.open(fileobj=f, mode="r|") as tf:
                while True:
                    m = tf.next()
                    if m is None:
                        break
                    tf.members.clear()  # stream mode: we never look members up again
                    if m.isreg() and not m.issparse() and m.offset_data + m.size > total:
                        fault = tarfile.ReadError(f"cut off inside member {m.name!r}")
                        break
                    _take(tf, m, listing)
                end = tf.offset
            if fault is None:
                # tarfile ends a streamed listing quietly at a bad header; tell that
                # apart from the real end (zero blocks or the end of the file).
                f.seek(end)
                if f.read(tarfile.BLOCKSIZE).strip(b"\0"):
                    fault = tarfile.ReadError(f"no valid member header at byte {end}")
    except (tarfile.TarError, OSError, EOFError) as e:
        fault = e
    per_key: dict[str, int] = {}
    for key, _norm, _m in listing.images:
        per_key[key] = per_key.get(key, 0) + 1
    rows = []
    for key, norm, m in listing.images:
        caption, cproblem = listing.caption(key)
        rows.append(_sample(rel, path, key if per_key[key] == 1 else norm, m, caption, cproblem, max_bytes))
    return rows, fault


def _take(tf: tarfile.TarFile, m: tarfile.TarInfo, listing: _Listing) -> None:
    """File one streamed member: an image, a caption (read now) or neither."""
    if m.isdir():
        return
    norm = member_name(m.name)
    key, ext = os.path.splitext(norm)
    low = ext.lower()
    if is_image_name(norm):
        listing.images.append((key, norm, m))
    elif low in CAPTION_EXTENSIONS:
        safe = not is_unsafe_name(m.name) and m.isfile()
        if not safe or m.size > MAX_CAPTION_BYTES:
            got: tuple[bytes | None, str | None] = (None, "caption_unreadable")
        else:
            fh = tf.extractfile(m)
            got = caption_from_member(low, fh.read() if fh is not None else b"")
        listing.captions.setdefault(key, {}).setdefault(low, {}).setdefault(norm, []).append(got)


def _sample(rel: str, path: str, name: str, m: tarfile.TarInfo, caption: bytes | None, cproblem: str | None,
            max_bytes: int) -> dict:
    source, ok_source = clean_text(f"{rel}/{name}")
    member, ok_member = clean_text(m.name)
    tar_path, ok_path = clean_text(path)
    locator = member_locator(tar_path, m.offset, member)
    problem = None
    if is_unsafe_name(m.name) or not m.isfile():
        problem = "unsafe_path"
    elif not (ok_source and ok_member and ok_path):
        problem, locator = "name_not_utf8", ""
    elif m.size > max_bytes:
        problem = "file_too_large"
    mtime: Any = m.mtime
    return make_row(
        source,
        locator,
        order=(os.fsencode(rel), int(m.offset)),
        caption_raw=caption,
        caption_problem=cproblem,
        source_problem=problem,
        file_size=int(m.size),
        mtime_ns=int(round(float(mtime) * 1_000_000_000)),
    )


class Archive:
    """An archive opened for reading members by header offset: a member is found by seeking to
    its header, never by scanning the archive, so a remote archive is read only where asked."""

    def __init__(self, path: str):
        self.name = path
        if stores.is_url(path) and stores.local_path(path) is None:
            store, inner = stores.open_url(path)
            self.file = store.open(inner)
        else:
            self.file = open(stores.local_path(path) or path, "rb")
        try:
            self.tf = tarfile.open(fileobj=self.file, mode="r:")
        except BaseException:
            self.file.close()
            raise

    def close(self) -> None:
        try:
            self.tf.close()
        finally:
            self.file.close()

    def member(self, offset: int) -> tarfile.TarInfo | None:
        """The member whose (first) header starts at byte `offset`; None when there is none."""
        self.file.seek(offset)
        try:
            return tarfile.TarInfo.fromtarfile(self.tf)
        except (tarfile.TarError, EOFError, ValueError):
            return None


def open_members(path: str) -> Archive:
    """Open an archive (a local path or a URL) for reading members by header offset."""
    return Archive(path)


def read_member(archive: Archive, offset: int, name: str, max_bytes: int) -> bytes:
    """The bytes of the regular member at `offset`, whose name must be `name`; read into memory, never to disk."""
    m = archive.member(offset)
    if m is None or m.offset != offset or clean_text(m.name)[0] != name:
        raise KeyError(f"no member {name!r} at byte {offset} of {archive.name} (the archive changed since it "
                       "was listed?)")
    if is_unsafe_name(m.name) or not m.isfile():
        raise ValueError(f"member {name!r} of {archive.name} is a link, device or unsafe path; not read")
    if m.size > max_bytes:
        raise ValueError(f"member {name!r} of {archive.name}: {m.size} bytes, over the {max_bytes}-byte limit "
                         "(input.max_file_bytes); not read")
    fh = archive.tf.extractfile(m)
    if fh is None:
        raise ValueError(f"member {name!r} of {archive.name} has no data")
    with fh:
        return fh.read()
