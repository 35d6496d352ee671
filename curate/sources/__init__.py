"""Input readers. Each lists samples as rows of the `source` table (see SOURCE_SCHEMA)
and reads image bytes back from a row's `locator`.

What is trusted: the input root as given. Inside it, links are followed only
while they resolve inside the root (unless `input.allow_outside_root`), and
only regular files of at most `input.max_file_bytes` are ever opened. File
and member names are data: no name can change which file or member is read.

The root may be a local path or an fsspec URL (see stores.py): `file://` is
the local disk; on any other store, reads stream from the store and nothing is
copied to local disk. A row read from a store has a URL locator (an archive
member: `<tar URL> NUL <offset> NUL <member>`).

Listing streams (`iter_samples`): folders and tar shards come in source order
from a depth-first walk that holds one folder's listing per level; manifests
come in row order after a first pass that checks them. Memory: the batch, one
folder's listing (or one archive's members), and the exact duplicate check's
8 bytes per input (SeenIds): 80 MB at 10M inputs, 800 MB at 100M, plus up to
128 MB while two of its runs merge. For a manifest that set lives only during
the first pass; for folders and tar shards, during the whole listing.
`list_samples` gathers everything into one table sorted by source, as before.
"""
from __future__ import annotations

import os
import stat
from dataclasses import dataclass
from typing import Iterator

import pyarrow as pa

from ..config import InputConfig
from ..errors import ConfigError, InputError
from . import stores
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
from .common import (
    Scope,
    is_image_name,
    is_tar_name,
    local_lister,
    read_regular_file,
    sorted_batches,
    sorted_walk,
)
from .folder import iter_folder, iter_store_folder, store_lister
from .manifest import MANIFEST_EXTENSIONS, local_checker, manifest_batches, store_checker
from .stores import is_url, shared_across_processes
from .tar import iter_store_tar, iter_tar, open_members, read_member

__all__ = [
    "CAPTION_PROBLEMS",
    "IMAGE_EXTENSIONS",
    "PROBLEM_CODES",
    "SOURCE_PROBLEMS",
    "SOURCE_SCHEMA",
    "detect_format",
    "is_url",
    "iter_samples",
    "list_samples",
    "member_locator",
    "read_bytes",
    "shared_across_processes",
    "split_locator",
    "stable_id",
]

# Rows per batch `iter_samples` hands out by default (our choice: about 10-30 MB of rows with
# captions; large enough that per-batch costs vanish).
BATCH_ROWS = 65536
# Remote plain-file locators `read_bytes` fetches together (our choice: hides request latency on
# object stores; at most this many images of `max_bytes` are held at once).
FETCH_WINDOW = 32


@dataclass(frozen=True)
class _Root:
    """The input root: a local absolute path (store None), or a path on a store."""

    path: str
    name: str  # as messages show it: the local path or the URL
    is_dir: bool
    store: stores.Store | None = None


def list_samples(cfg: InputConfig) -> pa.Table:
    """All samples of the input as a SOURCE_SCHEMA table, sorted by `source` (then `sample_id`).

    Raises InputError when the input root is missing, unreadable or of no known kind.
    """
    table = pa.Table.from_batches(list(iter_samples(cfg)), schema=SOURCE_SCHEMA)
    if table.num_rows < 2:
        return table
    return table.sort_by([("source", "ascending"), ("sample_id", "ascending")])


def iter_samples(cfg: InputConfig, batch_rows: int = BATCH_ROWS) -> Iterator[pa.RecordBatch]:
    """The samples of the input as SOURCE_SCHEMA record batches of at most about `batch_rows` rows,
    in memory bounded by the batch (plus what the module docstring lists).

    Order, the same on every run: folders and tar shards in source order (a tar shard's own
    row, e.g. `unreadable`, first among its members'); manifests in row order. Ids are unique over
    the whole listing. Raises InputError when the input root is missing, unreadable or of no
    known kind, and for a malformed manifest, before the first batch.
    """
    if isinstance(batch_rows, bool) or not isinstance(batch_rows, int) or batch_rows < 1:
        raise ValueError(f"batch_rows must be a whole number >= 1, got {batch_rows!r}")
    max_bytes = cfg.max_file_bytes
    if isinstance(max_bytes, bool) or not isinstance(max_bytes, int) or max_bytes < 1:
        raise ConfigError(f"expected a whole number of bytes >= 1, got {max_bytes!r}", key="input.max_file_bytes")
    root = _root(cfg.path)
    kind = _detect(root, cfg.format)
    with _root_errors(root):
        if kind == "manifest":
            if root.store is None:
                check = local_checker(root.path, Scope(os.path.dirname(root.path), cfg.allow_outside_root, max_bytes))
                opener = lambda: open(root.path, "rb")  # noqa: E731
            else:
                check = store_checker(root.store, root.path, cfg.allow_outside_root, max_bytes)
                opener = lambda: root.store.open(root.path)  # noqa: E731
            return _guarded(manifest_batches(root.name, opener, cfg, check, batch_rows), root)
    if root.store is None:
        scope = Scope(root.path, cfg.allow_outside_root, max_bytes)
        rows = iter_tar(root.path, scope) if kind == "tar" else iter_folder(root.path, scope)
    elif kind == "tar":
        rows = iter_store_tar(root.store, root.path, root.name, root.is_dir, max_bytes)
    else:
        rows = iter_store_folder(root.store, root.path, root.name, max_bytes)
    return _guarded(sorted_batches(rows, batch_rows), root)


class _root_errors:
    """Turns an OSError (the root itself or the store; per-sample faults never get here) into an InputError."""

    def __init__(self, root: _Root):
        self.root = root

    def __enter__(self) -> None:
        return None

    def __exit__(self, kind, e, tb) -> bool:
        if e is not None and isinstance(e, OSError):
            raise InputError(f"input {self.root.name}: cannot be read ({e.strerror or e}); check it exists and "
                             "its permissions") from e
        return False


def _guarded(batches: Iterator[pa.RecordBatch], root: _Root) -> Iterator[pa.RecordBatch]:
    with _root_errors(root):
        yield from batches


def detect_format(root: str, fmt: str = "auto") -> str:
    """`folder`, `manifest` or `tar` for an existing input root (an absolute path or a URL).

    auto: a .csv/.jsonl/.parquet file is a manifest, a .tar file is tar, a
    folder whose image-bearing files are all .tar is tar, any other folder is
    a folder. An explicit format must fit the root's kind.
    """
    return _detect(_root(root), fmt)


def _detect(root: _Root, fmt: str) -> str:
    name = stores.base_name(root.path) if root.store is not None else os.path.basename(root.path)
    ext = os.path.splitext(name)[1].lower()
    shown = root.name
    if fmt == "auto":
        if not root.is_dir:
            if ext in MANIFEST_EXTENSIONS:
                return "manifest"
            if is_tar_name(name):
                return "tar"
            raise InputError(
                f"input {shown}: unknown kind of file; give a folder, a manifest (.csv, .jsonl, .parquet) or a .tar"
            )
        return "tar" if _only_tars(root) else "folder"
    if fmt == "folder" and not root.is_dir:
        raise InputError(f"input {shown}: input.format is folder but this is not a folder")
    if fmt == "manifest" and (root.is_dir or ext not in MANIFEST_EXTENSIONS):
        raise InputError(f"input {shown}: input.format is manifest; give a .csv, .jsonl or .parquet file")
    if fmt == "tar" and not (root.is_dir or is_tar_name(name)):
        raise InputError(f"input {shown}: input.format is tar; give a .tar file or a folder of .tar files")
    if fmt not in ("folder", "manifest", "tar"):
        raise InputError(f"input {shown}: unknown input.format {fmt!r}; use auto, folder, manifest or tar")
    return fmt


def _only_tars(root: _Root) -> bool:
    """True when the folder holds .tar files and no image files (stops at the first image)."""
    if root.store is None:
        walk = sorted_walk(root.path, local_lister)
    else:
        walk = sorted_walk(root.path, store_lister(root.store), stores.join)
    tars = False
    try:
        for group in walk:
            for _folder, name, _detail in group:
                if is_image_name(name):
                    return False
                tars = tars or is_tar_name(name)
    except OSError as e:
        raise InputError(f"input {root.name}: cannot be read ({e.strerror or e}); check its permissions") from e
    return tars


def _root(path: str) -> _Root:
    if not path:
        raise InputError("no input given; pass --input PATH or set input.path in the config")
    local = stores.local_path(path)
    if local is None:
        return _store_root(path)
    root = os.path.abspath(os.path.expanduser(local))
    try:
        st = os.stat(root)
    except FileNotFoundError:
        raise InputError(f"input {root}: does not exist; check --input or input.path") from None
    except (OSError, ValueError) as e:
        raise InputError(f"input {root}: cannot be read ({getattr(e, 'strerror', None) or e})") from e
    if not (stat.S_ISDIR(st.st_mode) or stat.S_ISREG(st.st_mode)):
        raise InputError(f"input {root}: not a folder or a regular file (a FIFO or device?); give a folder, "
                         "a manifest or a .tar")
    return _Root(root, root, stat.S_ISDIR(st.st_mode))


def _store_root(url: str) -> _Root:
    store, path = stores.open_url(url)
    try:
        info = store.info(path)
    except FileNotFoundError:
        raise InputError(f"input {url}: does not exist; check --input or input.path") from None
    except Exception as e:  # noqa: BLE001 - a store raises its own kinds (permissions, network)
        raise InputError(f"input {url}: cannot be read ({e})") from e
    kind = stores.kind_of(info)
    if kind == "other":
        raise InputError(f"input {url}: neither a folder nor a file on its store; give a folder, a manifest or a .tar")
    return _Root(path, url, kind == "dir", store)


def read_bytes(locators: list[str], max_bytes: int | None = None) -> Iterator[bytes | Exception]:
    """The image bytes for each locator, in order, one result per locator.

    A failure is yielded as its exception object, never raised. Only regular
    files are opened, and nothing over `max_bytes` (default: the default of
    `input.max_file_bytes`) is read. Each tar archive is opened once per call
    and closed after its last locator. A URL locator is read from its store:
    plain objects FETCH_WINDOW at a time (a ranged read of at most max_bytes + 1
    bytes), archive members by seeking to their header.
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
    archives: dict[str, object] = {}
    try:
        for start in range(0, len(locators), FETCH_WINDOW):
            window = range(start, min(start + FETCH_WINDOW, len(locators)))
            fetched = _fetch_remote([(i, locators[i]) for i in window if parsed[i] is None], cap)
            for i in window:
                loc, p = locators[i], parsed[i]
                result: bytes | Exception
                try:
                    if isinstance(p, Exception):
                        raise p
                    if p is None:
                        if not loc:
                            raise ValueError("this entry has no locator: it is never read")
                        result = fetched[i] if i in fetched else read_regular_file(_local(loc), cap)
                        if isinstance(result, Exception):
                            raise result
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
                        result = read_member(opened, offset, member, cap)
                        if last_use[tar_path] == i:
                            opened.close()
                            archives[tar_path] = OSError(f"{tar_path}: closed")
                except Exception as e:  # noqa: BLE001 - one locator's failure is its result
                    result = e
                yield result
    finally:
        for opened in archives.values():
            if not isinstance(opened, Exception):
                opened.close()


def _local(loc: str) -> str:
    """A locator's local path (a `file://` URL as its path); a plain path as is."""
    local = stores.local_path(loc)
    if local is None:
        raise ValueError(f"{loc}: not a local path")
    return local


def _fetch_remote(items: list[tuple[int, str]], cap: int) -> dict[int, bytes | Exception]:
    """Bytes of the remote (non-local URL) plain-file locators among `items`, fetched per store together."""
    by_store: dict[int, tuple[stores.Store, list[tuple[int, str]]]] = {}
    out: dict[int, bytes | Exception] = {}
    for i, loc in items:
        if not stores.is_url(loc):
            continue
        try:
            if stores.local_path(loc) is not None:
                continue
            store, path = stores.open_url(loc)
        except Exception as e:  # noqa: BLE001 - this locator's result
            out[i] = e
            continue
        by_store.setdefault(id(store.fs), (store, []))[1].append((i, path))
    for store, todo in by_store.values():
        try:
            got = store.cat_ranges([p for _, p in todo], cap + 1)
        except Exception as e:  # noqa: BLE001 - the whole request failed: each of them failed
            got = [e] * len(todo)
        for (i, path), data in zip(todo, got):
            if isinstance(data, bytes) and len(data) > cap:
                data = OSError(f"{store.url(path)}: over the {cap}-byte limit (input.max_file_bytes); not read")
            out[i] = data
    return out


def _check_archive(path: str) -> None:
    """Raise OSError unless `path` is a regular file (an archive is never a FIFO or device)."""
    local = stores.local_path(path) if stores.is_url(path) else path
    if local is None:
        store, inner = stores.open_url(path)
        if stores.kind_of(store.info(inner)) != "file":
            raise OSError(f"{path}: not a file; not opened")
        return
    if not stat.S_ISREG(os.stat(local).st_mode):
        raise OSError(f"{path}: not a regular file; not opened")
