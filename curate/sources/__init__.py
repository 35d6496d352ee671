"""Input readers. Each lists samples as rows of the `source` table (see SOURCE_SCHEMA)
and reads image bytes back from a row's `locator`.

What is trusted: the input root as given. Inside it, links are followed only
while they resolve inside the root (unless `input.allow_outside_root`), and
only regular files of at most `input.max_file_bytes` are ever opened. File
and member names are data: no name can change which file or member is read.
"""
from __future__ import annotations

import os
import stat
from typing import Iterator

import pyarrow as pa

from ..config import InputConfig
from ..errors import ConfigError, InputError
from .base import (
    CAPTION_PROBLEMS,
    IMAGE_EXTENSIONS,
    PROBLEM_CODES,
    SOURCE_PROBLEMS,
    SOURCE_SCHEMA,
    member_locator,
    split_locator,
    stable_id,
)
from .common import Scope, is_image_name, is_tar_name, read_regular_file, to_table, walk
from .folder import list_folder
from .manifest import MANIFEST_EXTENSIONS, list_manifest
from .tar import list_tar, open_members, read_member

__all__ = [
    "CAPTION_PROBLEMS",
    "IMAGE_EXTENSIONS",
    "PROBLEM_CODES",
    "SOURCE_PROBLEMS",
    "SOURCE_SCHEMA",
    "detect_format",
    "list_samples",
    "member_locator",
    "read_bytes",
    "split_locator",
    "stable_id",
]


def list_samples(cfg: InputConfig) -> pa.Table:
    """All samples of the input as a SOURCE_SCHEMA table, sorted by `source`.

    Raises InputError when the input root is missing, unreadable or of no known kind.
    """
    root = _root(cfg.path)
    kind = detect_format(root, cfg.format)
    max_bytes = cfg.max_file_bytes
    if isinstance(max_bytes, bool) or not isinstance(max_bytes, int) or max_bytes < 1:
        raise ConfigError(f"expected a whole number of bytes >= 1, got {max_bytes!r}", key="input.max_file_bytes")
    try:
        if kind == "manifest":
            rows = list_manifest(root, cfg, Scope(os.path.dirname(root), cfg.allow_outside_root, max_bytes))
        elif kind == "tar":
            rows = list_tar(root, Scope(root, cfg.allow_outside_root, max_bytes))
        else:
            rows = list_folder(root, Scope(root, cfg.allow_outside_root, max_bytes))
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
    try:
        st = os.stat(root)
    except FileNotFoundError:
        raise InputError(f"input {root}: does not exist; check --input or input.path") from None
    except (OSError, ValueError) as e:
        raise InputError(f"input {root}: cannot be read ({getattr(e, 'strerror', None) or e})") from e
    if not (stat.S_ISDIR(st.st_mode) or stat.S_ISREG(st.st_mode)):
        raise InputError(f"input {root}: not a folder or a regular file (a FIFO or device?); give a folder, "
                         "a manifest or a .tar")
    return root


def read_bytes(locators: list[str], max_bytes: int | None = None) -> Iterator[bytes | Exception]:
    """The image bytes for each locator, in order, one result per locator.

    A failure is yielded as its exception object, never raised. Only regular
    files are opened, and nothing over `max_bytes` (default: the default of
    `input.max_file_bytes`) is read. Each tar archive is opened once per call
    and closed after its last locator.
    """
    cap = InputConfig.max_file_bytes if max_bytes is None else max_bytes
    parsed: list[tuple[str, int, str] | None | Exception] = []
    for loc in locators:
        try:
            parsed.append(split_locator(loc))
        except ValueError as e:
            parsed.append(e)
    last_use: dict[str, int] = {}
    for i, p in enumerate(parsed):
        if isinstance(p, tuple):
            last_use[p[0]] = i
    archives: dict[str, tuple | Exception] = {}
    try:
        for i, (loc, p) in enumerate(zip(locators, parsed)):
            result: bytes | Exception
            try:
                if isinstance(p, Exception):
                    raise p
                if p is None:
                    if not loc:
                        raise ValueError("this entry has no locator: it is never read")
                    result = read_regular_file(loc, cap)
                else:
                    tar_path, offset, member = p
                    if tar_path not in archives:
                        try:
                            _check_archive(tar_path)
                            archives[tar_path] = open_members(tar_path)
                        except Exception as e:  # noqa: BLE001 - reported for each of its members
                            archives[tar_path] = e
                    opened = archives[tar_path]
                    if isinstance(opened, Exception):
                        raise opened
                    result = read_member(opened[0], opened[1], offset, member, cap)
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


def _check_archive(path: str) -> None:
    """Raise OSError unless `path` is a regular file (an archive is never a FIFO or device)."""
    if not stat.S_ISREG(os.stat(path).st_mode):
        raise OSError(f"{path}: not a regular file; not opened")
