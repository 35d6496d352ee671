"""What the three readers share: row building and identity, the input-root scope
(links, special files, size cap), caption parsing, folder walks that never
follow linked folders, and the exact, streaming duplicate marking."""
from __future__ import annotations

import base64
import datetime
import errno
import itertools
import json
import logging
import math
import os
import stat
from dataclasses import dataclass, field
from typing import Any, Callable, Iterable, Iterator

import numpy as np
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

    # Resolved folders remembered while listing (our choice: manifests name images in a few
    # thousand folders at a time; a bounded cache keeps memory flat).
    DIR_CACHE = 4096

    def __init__(self, root: str, allow_outside: bool, max_bytes: int):
        self.real = os.path.realpath(root)
        self.allow_outside = allow_outside
        self.max_bytes = max_bytes
        self._dirs: dict[str, str] = {}

    def realpath(self, path: str) -> str:
        """os.path.realpath(path), with the folder part resolved once per folder: only the last part
        is checked per file (lstat), and resolved in full when it is a link."""
        head, tail = os.path.split(path)
        if tail in ("", ".", "..") or not head:
            return os.path.realpath(path)
        real_head = self._dirs.get(head)
        if real_head is None:
            if len(self._dirs) >= self.DIR_CACHE:
                self._dirs.clear()
            real_head = self._dirs[head] = os.path.realpath(head)
        joined = os.path.join(real_head, tail)
        try:
            linked = stat.S_ISLNK(os.lstat(joined).st_mode)
        except (OSError, ValueError):
            linked = False
        return os.path.realpath(joined) if linked else joined

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
                locator = self.realpath(path)
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


def id_number(sample_id: str) -> int:
    """The 64-bit number a sample_id's first 16 hex chars spell (a suffixed id gives its base)."""
    return int(sample_id[:16], 16)


class SeenIds:
    """An exact set of 64-bit ids kept as sorted numpy runs: 8 bytes per id, plus at most two
    runs of RUN_CAP ids while merging. Runs merge like a binary counter, so adding n ids costs
    O(n log n) and a batch is looked up in every run with one vectorised binary search."""

    # Ids per run before runs stop merging: 2**23 ids = 64 MiB (our choice: bounds the merge's
    # extra memory at 128 MiB and the runs looked up at 100M ids to about 20).
    RUN_CAP = 1 << 23

    def __init__(self) -> None:
        self.runs: list[np.ndarray] = []

    def __len__(self) -> int:
        return sum(int(r.size) for r in self.runs)

    @property
    def nbytes(self) -> int:
        return sum(int(r.nbytes) for r in self.runs)

    def add(self, ids: np.ndarray) -> np.ndarray:
        """Add ids; returns a mask, True where an id was already in the set or appears earlier in `ids`."""
        ids = np.asarray(ids, dtype=np.uint64)
        if ids.size == 0:
            return np.zeros(0, dtype=bool)
        uniq, first, inverse = np.unique(ids, return_index=True, return_inverse=True)
        known = np.zeros(uniq.size, dtype=bool)
        for run in self.runs:
            pos = np.searchsorted(run, uniq)
            np.minimum(pos, run.size - 1, out=pos)
            known |= run[pos] == uniq
        again = known[inverse.reshape(-1)]
        later = np.ones(ids.size, dtype=bool)
        later[first] = False
        again |= later
        new = uniq[~known]
        if new.size:
            self._push(new)
        return again

    def _push(self, run: np.ndarray) -> None:
        self.runs.append(run)
        while (len(self.runs) >= 2 and self.runs[-2].size <= self.runs[-1].size
               and self.runs[-2].size + self.runs[-1].size <= self.RUN_CAP):
            b = self.runs.pop()
            a = self.runs.pop()
            # two sorted runs: the stable sort (timsort for 64-bit ints) merges them in linear time
            self.runs.append(np.sort(np.concatenate([a, b]), kind="stable"))


def _numbered(unit: list[dict[str, Any]], base: str, start: int) -> None:
    """Give every row of `unit` the id `<base>-<n>` (n = start, start+1, ... in `_order`) and
    `source_duplicate`."""
    for n, r in enumerate(sorted(unit, key=lambda r: r["_order"]), start=start):
        r["sample_id"] = f"{base}-{n}"
        r["source_problem"] = "source_duplicate"


# Rows held as Python dicts before they become Arrow (our choice: a dict row costs about 1 KB,
# an Arrow row about its bytes, so a batch is built from parts of this many rows).
ARROW_PART = 4096


def to_batch(rows: list[dict[str, Any]]) -> pa.RecordBatch:
    for r in rows:
        r.pop("_order", None)
    return pa.RecordBatch.from_pylist(rows, schema=SOURCE_SCHEMA)


class _Batcher:
    """Collects Arrow parts and hands out batches of at least `batch_rows` rows (the last one smaller)."""

    def __init__(self, batch_rows: int):
        self.batch_rows = batch_rows
        self.parts: list[pa.RecordBatch] = []
        self.rows = 0

    def add(self, part: pa.RecordBatch) -> pa.RecordBatch | None:
        self.parts.append(part)
        self.rows += part.num_rows
        return self.take() if self.rows >= self.batch_rows else None

    def take(self) -> pa.RecordBatch | None:
        if not self.rows:
            return None
        parts, self.parts, self.rows = self.parts, [], 0
        if len(parts) == 1:
            return parts[0]
        return pa.Table.from_batches(parts, schema=SOURCE_SCHEMA).combine_chunks().to_batches()[0]


def sorted_batches(rows: Iterable[dict[str, Any]], batch_rows: int,
                   seen: SeenIds | None = None) -> Iterator[pa.RecordBatch]:
    """Batches of SOURCE_SCHEMA from rows that come in source order (folders, tar shards).

    Rows with one source are adjacent, so each run of rows that share an id is one set of
    inputs with one identity: all of them get `source_duplicate` and `<id>-1`, `<id>-2`, ... in
    their `_order`. An id that comes back later (two different sources whose 64-bit ids collide,
    chance about n**2 / 2**65 for n inputs) is found in `seen`: that later input gets
    `source_duplicate` and the next free suffix; the earlier one, already handed out, keeps
    its id. Memory: the batch, plus `seen` (8 bytes per input).
    """
    seen = SeenIds() if seen is None else seen
    last: dict[str, int] = {}  # id -> highest suffix handed out (only ids that were ever shared)
    out = _Batcher(batch_rows)
    units: list[list[dict[str, Any]]] = []
    count = 0
    for unit in _units(rows):
        if len(unit) > 1:
            base = unit[0]["sample_id"]
            log.warning("%d inputs share the source %s; each is dropped as source_duplicate", len(unit),
                        unit[0]["source"])
            _numbered(unit, base, 1)
            last[base] = len(unit)
        units.append(unit)
        count += len(unit)
        if count >= min(batch_rows, ARROW_PART):
            batch = out.add(_flush_units(units, seen, last))
            units, count = [], 0
            if batch is not None:
                yield batch
    if units:
        out.add(_flush_units(units, seen, last))
    batch = out.take()
    if batch is not None:
        yield batch


def _units(rows: Iterable[dict[str, Any]]) -> Iterator[list[dict[str, Any]]]:
    unit: list[dict[str, Any]] = []
    for r in rows:
        if unit and r["sample_id"] != unit[0]["sample_id"]:
            yield unit
            unit = []
        unit.append(r)
    if unit:
        yield unit


def _flush_units(units: list[list[dict[str, Any]]], seen: SeenIds, last: dict[str, int]) -> pa.RecordBatch:
    ids = np.fromiter((id_number(u[0]["sample_id"]) for u in units), dtype=np.uint64, count=len(units))
    for i in np.flatnonzero(seen.add(ids)):
        unit = units[i]
        base = unit[0]["sample_id"][:16]
        start = last.get(base, 1) + 1
        log.warning("the id of %s equals that of an earlier input with another source (a 64-bit collision); "
                    "this one is dropped as source_duplicate", unit[0]["source"])
        _numbered(unit, base, start)
        last[base] = start + len(unit) - 1
    rows = []
    for unit in units:
        if len(unit) > 1:
            unit.sort(key=lambda r: (r["source"], r["sample_id"]))
        rows.extend(unit)
    return to_batch(rows)


def marked_batches(rows: Iterable[dict[str, Any]], shared: set[int], batch_rows: int) -> Iterator[pa.RecordBatch]:
    """Batches from rows in any order, when the ids held by more than one input (`shared`, as
    64-bit numbers) are known beforehand: each of those inputs gets `source_duplicate` and
    `<id>-<n>`, n = 1, 2, ... in the order the rows come."""
    counter: dict[int, int] = {}
    out = _Batcher(batch_rows)
    batch: list[dict[str, Any]] = []
    warned: set[int] = set()
    for r in rows:
        if shared:
            num = id_number(r["sample_id"])
            if num in shared:
                n = counter.get(num, 0) + 1
                counter[num] = n
                if num not in warned:
                    warned.add(num)
                    log.warning("several inputs share the identity of %s; each is dropped as source_duplicate",
                                r["source"])
                r["sample_id"] = f"{r['sample_id']}-{n}"
                r["source_problem"] = "source_duplicate"
        batch.append(r)
        if len(batch) >= min(batch_rows, ARROW_PART):
            done = out.add(to_batch(batch))
            batch = []
            if done is not None:
                yield done
    if batch:
        out.add(to_batch(batch))
    done = out.take()
    if done is not None:
        yield done


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
        real = scope.realpath(path)
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


@dataclass(eq=False)
class Folder:
    """One real folder met by `sorted_walk`."""

    path: str  # where its lister reads it: an absolute local path or a store path
    rel: str  # path relative to the root as named on disk, '/' separators ('' for the root)
    # Its entries whose extension is a caption extension in any case (files and folders alike),
    # name -> the lister's detail for it: the sidecar candidates of its images.
    sidecars: dict[str, Any] = field(default_factory=dict)

    def child(self, name: str) -> str:
        return f"{self.rel}/{name}" if self.rel else name


# A lister: folder path -> (name, kind, detail) per entry; kind is "file" (anything that is not a
# folder: regular, special or a link to a file), "dir", or "linkdir" (a link to a folder).
Lister = Callable[[str], Iterable[tuple[str, str, Any]]]


def sorted_walk(root: str, lister: Lister, join: Callable[[str, str], str] = os.path.join, *,
                slash: Callable[[str], bool] | None = None,
                on_error: Callable[[str, OSError], None] | None = None,
                ) -> Iterator[list[tuple[Folder, str, Any]]]:
    """Every non-folder entry under `root`, as groups of (folder, name, detail) whose relative
    paths read alike after `clean_text`, in the order of that text.

    The order equals sorting the relative paths ('/' separators, code-point order) because each
    folder's entries are sorted by `name + '/'` for folders (and for files that `slash` says hold
    members named `<file>/<member>`, i.e. tar shards) and by `name` for files: comparing two paths
    comes down to comparing their first differing parts, and '/' then stands where the path goes
    on. Folders whose names read alike (a name that is not UTF-8 and its escaped spelling) are
    walked as one, so inputs with one source always come out next to each other.
    Depth first with an explicit stack: memory holds the entries of the folders on the current
    path (one folder's listing at a time per level), never the whole tree.
    Linked folders are never followed (logged). A sub-folder that cannot be listed goes to
    `on_error` (default: logged and skipped); the root itself raises OSError.
    """
    stack: list[Any] = [[Folder(root, "")]]
    while stack:
        item = stack.pop()
        if isinstance(item, tuple):
            yield item[1]
            continue
        children: dict[str, list[tuple[str, Folder, str, Any]]] = {}
        for folder in item:
            try:
                listing = list(lister(folder.path))
            except OSError as e:
                if not folder.rel:
                    raise
                if on_error is not None:
                    on_error(folder.path, e)
                else:
                    log.warning("cannot list folder %s (%s); its files are not included", folder.path,
                                e.strerror or e)
                continue
            for name, kind, detail in listing:
                if os.path.splitext(name)[1].lower() in CAPTION_EXTENSIONS:
                    folder.sidecars[name] = detail
                if kind == "linkdir":
                    log.warning("not following linked folder %s", join(folder.path, name))
                    continue
                text = clean_text(name)[0]
                key = text + "/" if kind == "dir" or (slash is not None and slash(name)) else text
                children.setdefault(key, []).append((kind, folder, name, detail))
        for key in sorted(children, reverse=True):
            group = children[key]
            dirs = [Folder(join(folder.path, name), folder.child(name)) for kind, folder, name, _ in group
                    if kind == "dir"]
            files = [(folder, name, detail) for kind, folder, name, detail in group if kind != "dir"]
            if dirs:
                stack.append(dirs)
            if files:
                stack.append(("files", files))
        del children


def local_lister(path: str) -> list[tuple[str, str, Any]]:
    """A folder's entries for `sorted_walk`; the detail is whether the entry is a link."""
    out = []
    with os.scandir(path) as it:
        for e in it:
            try:
                if e.is_dir(follow_symlinks=False):
                    kind = "dir"
                elif e.is_symlink() and e.is_dir():
                    kind = "linkdir"
                else:
                    kind = "file"
            except OSError:
                kind = "file"
            try:
                linked = e.is_symlink()
            except OSError:
                linked = True
            out.append((e.name, kind, linked))
    return out


def find_sidecar(sidecars: dict[str, Any], stem: str) -> tuple[str, str] | None:
    """(name, lower-case extension) of an image's caption sidecar among its folder's `sidecars`:
    `.txt` before `.json`; of several spellings of one extension the lower-case one, else the
    first in name order."""
    for ext in CAPTION_EXTENSIONS:
        if stem + ext in sidecars:
            return stem + ext, ext
        found = [stem + v for v in _spellings(ext) if stem + v in sidecars]
        if found:
            return min(found), ext
    return None


def _spellings(ext: str) -> list[str]:
    return ["".join(p) for p in itertools.product(*[(c.lower(), c.upper()) for c in ext])]


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
