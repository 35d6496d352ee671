"""Input readers. Each lists samples as rows of the `source` table (see SOURCE_SCHEMA)
and reads image bytes back from a row's `locator`."""
from __future__ import annotations

import os
import stat
from typing import Iterator

import pyarrow as pa

from ..config import InputConfig
from ..errors import InputError
from .base import IMAGE_EXTENSIONS, SOURCE_SCHEMA, TAR_SEP, stable_id
from .common import is_image_name, is_tar_name, split_locator, to_table, walk
from .folder import list_folder
from .manifest import MANIFEST_EXTENSIONS, list_manifest
from .tar import list_tar, open_members, read_member

__all__ = [
    "IMAGE_EXTENSIONS",
    "SOURCE_SCHEMA",
    "TAR_SEP",
    "detect_format",
    "list_samples",
    "read_bytes",
    "stable_id",
]


def list_samples(cfg: InputConfig) -> pa.Table:
    """All samples of the input as a SOURCE_SCHEMA table, sorted by `source`.

    Raises InputError when the input root is missing, unreadable or of no known kind.
    """
    root = _root(cfg.path)
    kind = detect_format(root, cfg.format)
    try:
        if kind == "manifest":
            rows = list_manifest(root, cfg)
        elif kind == "tar":
            rows = list_tar(root)
        else:
            rows = list_folder(root)
    except OSError as e:  # the root itself; per-sample faults never get here
        raise InputError(f"input {root}: cannot be read ({e.strerror or e}); check it exists and its permissions") from e
    return to_table(rows)


def detect_format(root: str, fmt: str = "auto") -> str:
    """`folder`, `manifest` or `tar` for an existing absolute input root.

    auto: a .csv/.jsonl/.parquet file is a manifest, a .tar file is tar, a
    folder whose image-bearing files are all .tar is tar, any other folder is
    a folder. An explicit format must fit the root's kind.
    """
    is_dir = os.path.isdir(root)
    name = os.path.basename(root)
    ext = os.path.splitext(name)[1].lower()
    if fmt == "auto":
        if not is_dir:
            if ext in MANIFEST_EXTENSIONS:
                return "manifest"
            if is_tar_name(name):
                return "tar"
            raise InputError(
                f"input {root}: unknown kind of file; give a folder, a manifest (.csv, .jsonl, .parquet) or a .tar"
            )
        return "tar" if _only_tars(root) else "folder"
    if fmt == "folder" and not is_dir:
        raise InputError(f"input {root}: input.format is folder but this is not a folder")
    if fmt == "manifest" and (is_dir or ext not in MANIFEST_EXTENSIONS):
        raise InputError(f"input {root}: input.format is manifest; give a .csv, .jsonl or .parquet file")
    if fmt == "tar" and not (is_dir or is_tar_name(name)):
        raise InputError(f"input {root}: input.format is tar; give a .tar file or a folder of .tar files")
    if fmt not in ("folder", "manifest", "tar"):
        raise InputError(f"input {root}: unknown input.format {fmt!r}; use auto, folder, manifest or tar")
    return fmt


def _only_tars(root: str) -> bool:
    """True when the folder holds .tar files and no image files (stops at the first image)."""
    tars = False
    try:
        for _rel, entries, _dirs in walk(root):
            for e in entries:
                if is_image_name(e.name):
                    return False
                tars = tars or is_tar_name(e.name)
    except OSError as e:
        raise InputError(f"input {root}: cannot be read ({e.strerror or e}); check its permissions") from e
    return tars


def _root(path: str) -> str:
    if not path:
        raise InputError("no input given; pass --input PATH or set input.path in the config")
    root = os.path.abspath(os.path.expanduser(path))
    if not os.path.exists(root):
        raise InputError(f"input {root}: does not exist; check --input or input.path")
    return root


def read_bytes(locators: list[str]) -> Iterator[bytes | Exception]:
    """The image bytes for each locator, in order, one result per locator.

    A failure is yielded as its exception object, never raised. Each tar
    archive is opened once per call and closed after its last locator.
    """
    parsed = [split_locator(loc) for loc in locators]
    last_use: dict[str, int] = {}
    for i, p in enumerate(parsed):
        if p is not None:
            last_use[p[0]] = i
    archives: dict[str, tuple | Exception] = {}
    try:
        for i, (loc, p) in enumerate(zip(locators, parsed)):
            result: bytes | Exception
            try:
                if p is None:
                    result = _read_file(loc)
                else:
                    tar_path, member = p
                    if tar_path not in archives:
                        try:
                            archives[tar_path] = open_members(tar_path)
                        except Exception as e:  # noqa: BLE001 - reported for each of its members
                            archives[tar_path] = e
                    opened = archives[tar_path]
                    if isinstance(opened, Exception):
                        raise opened
                    result = read_member(opened[0], opened[1], member)
                    if last_use[tar_path] == i:
                        opened[0].close()
                        archives[tar_path] = OSError(f"{tar_path}: closed")
            except Exception as e:  # noqa: BLE001 - one locator's failure is its result
                result = e
            yield result
    finally:
        for opened in archives.values():
            if isinstance(opened, tuple):
                opened[0].close()


def _read_file(path: str) -> bytes:
    with open(path, "rb", opener=_open_nonblocking) as f:
        st = os.fstat(f.fileno())
        if not stat.S_ISREG(st.st_mode):
            raise OSError(f"{path}: not a regular file")
        return f.read()


def _open_nonblocking(path: str, flags: int) -> int:
    # O_NONBLOCK so a FIFO named like an image cannot hang the reader; it is then refused above.
    return os.open(path, flags | getattr(os, "O_NONBLOCK", 0))
