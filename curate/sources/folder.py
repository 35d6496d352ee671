"""Folder input: every image file under the root is one sample, captioned by
a sidecar with the same stem.

Choices:
- Source: the path relative to the root, `/` separators, extension kept, so
  two files never share a source unless their names are not valid UTF-8
  (then both get `source_duplicate`; see base.py).
- Sidecar: `<stem>.txt` (raw bytes, as is) is preferred over `<stem>.json`
  (its `caption` string field). The extension may be in any case; the
  lower-case spelling wins when both exist. Two images with one stem
  (`mug.jpg`, `mug.png`) share the sidecar.
- No sidecar, or a JSON object without a `caption` field (or null) ->
  `caption_missing`. A sidecar that cannot be read (permissions, a folder or
  other non-file, a dangling link, over MAX_CAPTION_BYTES), JSON that does not
  parse, or a `caption` that is not a string -> `caption_unreadable`.
  An empty `.txt` is an empty caption (b""), judged by the caption stage.
- Links: linked folders are never followed (see common.walk). A linked image
  or sidecar is followed while it resolves inside the root; one that resolves
  outside is `outside_root` / `caption_outside_root` and never opened, unless
  `input.allow_outside_root` is set. A dangling link or a file we may not read
  is `unreadable`; a FIFO, device or socket is `special_file` and is never
  opened; a file over `input.max_file_bytes` is `file_too_large`. A name that
  is not valid UTF-8 is listed with an escaped source and `name_not_utf8`.
- `.tar` files in a folder that also holds images are ignored here (logged).
- Order: rows come in source order (see common.sorted_walk), one folder's
  listing in memory at a time.
- On an object store (fsspec URL) there are no links: every object under the
  root prefix is inside it. An entry the store calls neither a file nor a
  directory (or a link) is `special_file`; size and stamp come from the listing
  entry (stores.stamp). A sub-folder that cannot be listed stops the listing
  with an InputError, so a network fault never drops samples quietly.
"""
from __future__ import annotations

import logging
import os
from typing import Any, Iterator

from ..errors import InputError
from . import stores
from .common import (
    MAX_CAPTION_BYTES,
    Folder,
    Scope,
    caption_from_member,
    clean_text,
    find_sidecar,
    is_image_name,
    is_tar_name,
    local_lister,
    make_row,
    read_caption_file,
    sorted_walk,
)

log = logging.getLogger(__name__)

# Sidecars fetched from a store in one concurrent request set (our choice: enough to hide
# per-request latency; the fetched captions are at most this many times MAX_CAPTION_BYTES).
FETCH_GROUP = 64


def iter_folder(root: str, scope: Scope) -> Iterator[dict]:
    """One row per image file under `root` (an absolute local folder), in source order."""
    tars = 0
    for group in sorted_walk(root, local_lister):
        for folder, name, linked in group:
            if is_image_name(name):
                yield _sample(folder, name, linked, scope)
            elif is_tar_name(name):
                tars += 1
    if tars:
        log.warning("%d .tar file(s) under %s are ignored: the folder also holds images", tars, root)


def _sample(folder: Folder, name: str, linked: bool, scope: Scope) -> dict:
    rel = folder.child(name)
    source, ok = clean_text(rel)
    order = (os.fsencode(rel), 0)
    if not ok:
        problem, size, mtime, locator = "name_not_utf8", None, None, ""
    else:
        problem, size, mtime, locator = scope.check_file(os.path.join(folder.path, name), resolve=linked)
    caption, cproblem = None, "caption_missing"
    found = find_sidecar(folder.sidecars, os.path.splitext(name)[0])
    if found is not None:
        caption, cproblem = read_caption_file(os.path.join(folder.path, found[0]), found[1], scope)
    return make_row(
        source,
        locator,
        order=order,
        caption_raw=caption,
        caption_problem=cproblem,
        source_problem=problem,
        file_size=size,
        mtime_ns=mtime,
    )


def store_lister(store: stores.Store):
    """A `sorted_walk` lister over a store; the detail is the store's entry (name, type, size, stamps)."""

    def lister(path: str) -> list[tuple[str, str, Any]]:
        out = []
        for info in store.listdir(path):
            full = stores.clean_path(str(info.get("name", "")))
            if not full or full == path:
                continue  # some stores list a folder's own marker object
            kind = stores.kind_of(info)
            out.append((stores.base_name(full), "dir" if kind == "dir" else "file", info))
        return out

    return lister


def walk_error(url: str):
    def on_error(path: str, e: OSError) -> None:
        raise InputError(f"input {url}: folder {path} cannot be listed ({e}); nothing was skipped, the "
                         "listing stopped: check the store and run again") from e

    return on_error


def iter_store_folder(store: stores.Store, root: str, url: str, max_bytes: int) -> Iterator[dict]:
    """One row per image object under store path `root`, in source order."""
    tars = 0
    pending: list[tuple[Folder, str, dict]] = []
    for group in sorted_walk(root, store_lister(store), stores.join, on_error=walk_error(url)):
        for folder, name, info in group:
            if is_image_name(name):
                pending.append((folder, name, info))
            elif is_tar_name(name):
                tars += 1
        if len(pending) >= FETCH_GROUP:
            yield from _store_samples(store, pending, max_bytes)
            pending = []
    yield from _store_samples(store, pending, max_bytes)
    if tars:
        log.warning("%d .tar file(s) under %s are ignored: the folder also holds images", tars, url)


def _store_samples(store: stores.Store, entries: list[tuple[Folder, str, dict]], max_bytes: int) -> Iterator[dict]:
    """Rows for image objects, their sidecars fetched together (a ranged read of at most
    MAX_CAPTION_BYTES + 1 bytes each)."""
    sidecar: list[tuple[str, str] | None] = []
    fetch: list[str] = []
    for folder, name, _info in entries:
        found = find_sidecar(folder.sidecars, os.path.splitext(name)[0])
        sidecar.append(found)
        if found is not None and _fetchable(folder.sidecars[found[0]]):
            fetch.append(stores.join(folder.path, found[0]))
    got = dict(zip(fetch, store.cat_ranges(fetch, MAX_CAPTION_BYTES + 1)))
    for (folder, name, info), found in zip(entries, sidecar):
        caption, cproblem = None, "caption_missing"
        if found is not None:
            data = got.get(stores.join(folder.path, found[0]))
            if not isinstance(data, bytes) or len(data) > MAX_CAPTION_BYTES:
                caption, cproblem = None, "caption_unreadable"
            else:
                caption, cproblem = caption_from_member(found[1], data)
        yield _store_sample(store, folder, name, info, max_bytes, caption, cproblem)


def _fetchable(info: dict) -> bool:
    size = info.get("size")
    return stores.kind_of(info) == "file" and not (isinstance(size, int) and size > MAX_CAPTION_BYTES)


def _store_sample(store: stores.Store, folder: Folder, name: str, info: dict, max_bytes: int,
                  caption: bytes | None, cproblem: str | None) -> dict:
    rel = folder.child(name)
    source, ok = clean_text(rel)
    path = stores.join(folder.path, name)
    size, mtime = stores.stamp(info)
    problem, locator = None, store.url(path)
    if not ok:
        problem, locator, size, mtime = "name_not_utf8", "", None, None
    elif stores.kind_of(info) != "file":
        problem, locator, size, mtime = "special_file", "", None, None
    elif size is not None and size > max_bytes:
        problem = "file_too_large"
    return make_row(source, locator, order=(rel.encode("utf-8", "surrogatepass"), 0), caption_raw=caption,
                    caption_problem=cproblem, source_problem=problem, file_size=size, mtime_ns=mtime)
