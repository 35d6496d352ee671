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
"""
from __future__ import annotations

import logging
import os
import re
import tarfile
from dataclasses import dataclass, field
from typing import Any

from ..errors import InputError
from .base import member_locator
from .common import (
    CAPTION_EXTENSIONS,
    MAX_CAPTION_BYTES,
    Scope,
    caption_from_member,
    clean_text,
    is_image_name,
    is_tar_name,
    make_row,
    normalize_name,
    walk,
)

log = logging.getLogger(__name__)

_DRIVE = re.compile(r"^[A-Za-z]:")


def list_tar(root: str, scope: Scope) -> list[dict]:
    """One row per image member of `root` (a .tar file) or of every .tar under it (a folder)."""
    if not os.path.isdir(root):
        rel = os.path.basename(root)
        rows, fault = _scan(rel, root, scope.max_bytes)
        if fault is not None and not rows:
            raise InputError(f"input {root}: not a readable tar archive ({fault}); give an uncompressed .tar")
        return rows + _fault_rows(rel, root, fault, len(rows))
    rows = []
    for rel_dir, entries, _dirs in walk(root):
        for e in entries:
            if not is_tar_name(e.name):
                continue
            rel = f"{rel_dir}/{e.name}" if rel_dir else e.name
            try:
                linked = e.is_symlink()
            except OSError:
                linked = True
            problem, _size, _mtime, path = scope.check_file(e.path, resolve=linked)
            if problem in ("outside_root", "special_file"):
                rows.append(_archive_row(rel, problem))
                continue
            rows.extend(list_one_tar(rel, path or e.path, scope.max_bytes))
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
    """Rows for one archive; `rel` is its name relative to the input root."""
    rows, fault = _scan(rel, path, max_bytes)
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


def _scan(rel: str, path: str, max_bytes: int) -> tuple[list[dict], Exception | None]:
    listing = _Listing()
    fault: Exception | None = None
    try:
        with open(path, "rb") as f:
            total = os.fstat(f.fileno()).st_size
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


def open_members(path: str) -> tuple[tarfile.TarFile, dict[int, tarfile.TarInfo]]:
    """Open an archive for reading members by header offset."""
    tf = tarfile.open(path, mode="r:")
    index: dict[int, tarfile.TarInfo] = {}
    try:
        while True:
            m = tf.next()
            if m is None:
                break
            index[m.offset] = m
    except tarfile.ReadError:
        pass  # a cut-off or damaged archive: the members before the fault are still readable
    except BaseException:
        tf.close()
        raise
    return tf, index


def read_member(tf: tarfile.TarFile, index: dict[int, tarfile.TarInfo], offset: int, name: str,
                max_bytes: int) -> bytes:
    """The bytes of the regular member at `offset`, whose name must be `name`; read into memory, never to disk."""
    m = index.get(offset)
    if m is None or clean_text(m.name)[0] != name:
        raise KeyError(f"no member {name!r} at byte {offset} of {tf.name} (the archive changed since it was listed?)")
    if is_unsafe_name(m.name) or not m.isfile():
        raise ValueError(f"member {name!r} of {tf.name} is a link, device or unsafe path; not read")
    if m.size > max_bytes:
        raise ValueError(f"member {name!r} of {tf.name}: {m.size} bytes, over the {max_bytes}-byte limit "
                         "(input.max_file_bytes); not read")
    fh = tf.extractfile(m)
    if fh is None:
        raise ValueError(f"member {name!r} of {tf.name} has no data")
    with fh:
        return fh.read()
