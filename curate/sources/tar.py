"""Tar shard input: a `.tar` file, or a folder of them (searched recursively).

Members are grouped by key (member name without its extension, `.` and empty
path parts dropped): an image member plus an optional `.txt` or `.json`
caption member (`.txt` preferred). `source` is `<tar path relative to the
root>/<key>`; when one key carries several images each source keeps the
image's extension (`<tar>/<key>.<ext>`). Archives are read with `tarfile`,
streaming, and nothing is ever extracted: bytes are read into memory.

Safety: a member whose name is absolute or has a `..` part, or that is a
link, device or FIFO, is `unsafe_path` (its data is never read). A caption
member like that is `caption_unreadable`. A name repeated in one archive is
the last one, as tar itself has it. A tar that cannot be read (or is cut off)
keeps the samples listed before the fault and adds one row for the archive
itself (source = its path, `unreadable`); when the input root is one .tar
that yields no sample at all, that is an InputError. Only uncompressed `.tar`
is read.
"""
from __future__ import annotations

import logging
import os
import re
import tarfile
from typing import Any

from ..errors import InputError
from .base import TAR_SEP
from .common import (
    CAPTION_EXTENSIONS,
    MAX_CAPTION_BYTES,
    caption_from_member,
    clean_text,
    is_image_name,
    is_tar_name,
    make_row,
    walk,
)

log = logging.getLogger(__name__)

_DRIVE = re.compile(r"^[A-Za-z]:")


def list_tar(root: str) -> list[dict]:
    """One row per image member of `root` (a .tar file) or of every .tar under it (a folder)."""
    if os.path.isdir(root):
        tars = [
            (f"{rel}/{e.name}" if rel else e.name, e.path)
            for rel, entries, _dirs in walk(root)
            for e in entries
            if is_tar_name(e.name)
        ]
    else:
        rows, fault = _scan(os.path.basename(root), root)
        if fault is not None and not rows:
            raise InputError(f"input {root}: not a readable tar archive ({fault}); give an uncompressed .tar")
        return rows + _fault_rows(os.path.basename(root), root, fault, len(rows))
    rows = []
    for rel, path in tars:
        rows.extend(list_one_tar(rel, path))
    return rows


def is_unsafe_name(name: str) -> bool:
    """True for a member name that would land outside an extraction folder."""
    if name.startswith(("/", "\\")) or _DRIVE.match(name):
        return True
    return any(part == ".." for part in re.split(r"[/\\]", name))


def _key_name(name: str) -> str:
    """The member name with `.`/empty parts dropped (unsafe names are kept as they are)."""
    if is_unsafe_name(name):
        return name
    return "/".join(p for p in name.split("/") if p not in ("", "."))


def list_one_tar(rel: str, path: str) -> list[dict]:
    """Rows for one archive; `rel` is its name relative to the input root."""
    rows, fault = _scan(rel, path)
    return rows + _fault_rows(rel, path, fault, len(rows))


def _fault_rows(rel: str, path: str, fault: Exception | None, listed: int) -> list[dict]:
    if fault is None:
        return []
    log.warning("tar %s cannot be read past %d sample(s): %s", path, listed, fault)
    return [make_row(clean_text(rel)[0], clean_text(path)[0], source_problem="unreadable")]


def _scan(rel: str, path: str) -> tuple[list[dict], Exception | None]:
    # key -> {normalised image name -> TarInfo}; key -> {".txt"/".json" -> (raw, problem)}
    images: dict[str, dict[str, tarfile.TarInfo]] = {}
    captions: dict[str, dict[str, tuple[bytes | None, str | None]]] = {}
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
                    _take(tf, m, images, captions)
                end = tf.offset
            if fault is None:
                # tarfile ends a streamed listing quietly at a bad header; tell that
                # apart from the real end (zero blocks or the end of the file).
                f.seek(end)
                if f.read(tarfile.BLOCKSIZE).strip(b"\0"):
                    fault = tarfile.ReadError(f"no valid member header at byte {end}")
    except (tarfile.TarError, OSError, EOFError) as e:
        fault = e
    rows: list[dict] = []
    for key, members in images.items():
        cap = captions.get(key, {})
        caption, cproblem = cap.get(".txt") or cap.get(".json") or (None, "caption_missing")
        for norm, m in members.items():
            rows.append(_sample(rel, path, key if len(members) == 1 else norm, m, caption, cproblem))
    return rows, fault


def _take(
    tf: tarfile.TarFile,
    m: tarfile.TarInfo,
    images: dict[str, dict[str, tarfile.TarInfo]],
    captions: dict[str, dict[str, tuple[bytes | None, str | None]]],
) -> None:
    """File one streamed member under its key: an image, a caption (read now) or neither."""
    if m.isdir():
        return
    norm = _key_name(m.name)
    key, ext = os.path.splitext(norm)
    low = ext.lower()
    if is_image_name(norm):
        images.setdefault(key, {})[norm] = m
    elif low in CAPTION_EXTENSIONS:
        safe = not is_unsafe_name(m.name) and m.isfile()
        if not safe or m.size > MAX_CAPTION_BYTES:
            got: tuple[bytes | None, str | None] = (None, "caption_unreadable")
        else:
            fh = tf.extractfile(m)
            got = caption_from_member(low, fh.read() if fh is not None else b"")
        slot = captions.setdefault(key, {})
        if low not in slot or ext == low:
            slot[low] = got


def _sample(
    rel: str, path: str, name: str, m: tarfile.TarInfo, caption: bytes | None, cproblem: str | None
) -> dict:
    source, ok_source = clean_text(f"{rel}/{name}")
    locator, ok_locator = clean_text(f"{path}{TAR_SEP}{m.name}")
    problem = None
    if is_unsafe_name(m.name) or not m.isfile():
        problem = "unsafe_path"
    elif not (ok_source and ok_locator):
        problem = "unreadable"
    mtime: Any = m.mtime
    return make_row(
        source,
        locator,
        caption_raw=caption,
        caption_problem=cproblem,
        source_problem=problem,
        file_size=int(m.size),
        mtime_ns=int(round(float(mtime) * 1_000_000_000)),
    )


def open_members(path: str) -> tuple[tarfile.TarFile, dict[str, tarfile.TarInfo]]:
    """Open an archive for reading members by name (the last of a repeated name wins)."""
    tf = tarfile.open(path, mode="r:")
    index: dict[str, tarfile.TarInfo] = {}
    try:
        while True:
            m = tf.next()
            if m is None:
                break
            index[m.name] = m
    except tarfile.ReadError:
        pass  # a cut-off or damaged archive: the members before the fault are still readable
    except BaseException:
        tf.close()
        raise
    return tf, index


def read_member(tf: tarfile.TarFile, index: dict[str, tarfile.TarInfo], name: str) -> bytes:
    """A regular member's bytes, read from the archive into memory (never to disk)."""
    m = index.get(name)
    if m is None:
        raise KeyError(f"no member {name!r} in {tf.name}")
    if is_unsafe_name(m.name) or not m.isfile():
        raise ValueError(f"member {name!r} of {tf.name} is a link, device or unsafe path; not read")
    fh = tf.extractfile(m)
    if fh is None:
        raise ValueError(f"member {name!r} of {tf.name} has no data")
    with fh:
        return fh.read()
