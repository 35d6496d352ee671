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
"""
from __future__ import annotations

import logging
import os

from .common import (
    Scope,
    clean_text,
    is_image_name,
    is_tar_name,
    make_row,
    read_caption_file,
    walk,
)

log = logging.getLogger(__name__)


def list_folder(root: str, scope: Scope) -> list[dict]:
    """One row per image file under `root` (an absolute folder path)."""
    rows: list[dict] = []
    tars = 0
    for rel_dir, entries, dirnames in walk(root):
        # A sub-folder named like a sidecar counts as one, and reads as unreadable.
        sidecars: dict[tuple[str, str], str] = {}
        for name in [e.name for e in entries] + dirnames:
            stem, ext = os.path.splitext(name)
            low = ext.lower()
            if low in (".txt", ".json"):
                key = (stem, low)
                if key not in sidecars or ext == low:
                    sidecars[key] = name
        for e in entries:
            if is_image_name(e.name):
                rows.append(_sample(root, rel_dir, e, sidecars, scope))
            elif is_tar_name(e.name):
                tars += 1
    if tars:
        log.warning("%d .tar file(s) under %s are ignored: the folder also holds images", tars, root)
    return rows


def _sample(root: str, rel_dir: str, entry: os.DirEntry, sidecars: dict[tuple[str, str], str],
            scope: Scope) -> dict:
    rel = f"{rel_dir}/{entry.name}" if rel_dir else entry.name
    source, ok = clean_text(rel)
    order = (os.fsencode(rel), 0)
    if not ok:
        problem, size, mtime, locator = "name_not_utf8", None, None, ""
    else:
        try:
            linked = entry.is_symlink()
        except OSError:
            linked = True
        problem, size, mtime, locator = scope.check_file(entry.path, resolve=linked)
    stem = os.path.splitext(entry.name)[0]
    caption, cproblem = None, "caption_missing"
    for ext in (".txt", ".json"):
        name = sidecars.get((stem, ext))
        if name is not None:
            caption, cproblem = read_caption_file(os.path.join(root, rel_dir, name), ext, scope)
            break
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
