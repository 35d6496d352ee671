"""Object-store paths: fsspec URLs (`s3://`, `gs://`, `memory://`, ...) for inputs and image sets.

- A path with a scheme (`<scheme>://...`) is a URL; anything else is a local path.
  `file://` (and `local://`) URLs are local paths, read as fsspec reads them
  (`file:///data/x` is `/data/x`; no percent-decoding).
- Chained URLs (`a::b://...`) are refused: each locator must reopen its object on
  its own, in any process, from the URL alone. Credentials, endpoints and other
  store options come from fsspec's own configuration and the store library's
  usual variables (e.g. AWS_PROFILE for s3fs), never from curate.
- Size and modification stamp come from the store's `info()` / listing entry
  (see `stamp`, TIME_FIELDS, CHECKSUM_FIELDS). Trusted: that the store's size
  and time (or ETag/checksum) change when the object's bytes do; they only
  decide what is re-read (fingerprints, caches), never what is safe to read.
  The size cap is enforced on the bytes actually read (a ranged read of at most
  the cap + 1 bytes), not on the reported size alone.
- Paths on a store are checked by name (`inside`): object stores have no links.
  A store that reports an entry as a link or as neither file nor directory
  (SFTP, SMB) gets `special_file` for it; a link its server resolves silently
  cannot be seen from here.
"""
from __future__ import annotations

import datetime
import hashlib
import posixpath
import re
from typing import Any

from ..errors import InputError

_SCHEME = re.compile(r"^([A-Za-z][A-Za-z0-9+.\-]*)://")
_CHAINED = re.compile(r"^(?:[A-Za-z][A-Za-z0-9+.\-]*::)+[A-Za-z][A-Za-z0-9+.\-]*://")
_LOCAL = ("file", "local")
# Bytes fetched per request when a store object is read as a stream (manifests, tar shards):
# our choice, large enough to amortise request latency, small enough that reading one member
# or one header fetches little (some stores default to 50 MiB).
STREAM_BLOCK = 4 << 20

# Fields that hold a modification time, in the order they are tried. Who reports which
# (from the fsspec backends' info() output, from memory): mtime: local disk, SFTP, HDFS;
# LastModified: s3fs; last_modified: adlfs (Azure); updated: gcsfs; modified: some WebDAV and
# SMB backends; created: fsspec's in-memory store (an object there is replaced, never edited).
TIME_FIELDS = ("mtime", "LastModified", "last_modified", "updated", "modified", "created")
# Fields that change whenever the object's content does, tried when no time field is there:
# ETag (S3, HTTP, Azure), md5Hash and crc32c (GCS), checksum (some others), generation (GCS).
CHECKSUM_FIELDS = ("ETag", "etag", "md5Hash", "crc32c", "checksum", "Content-MD5", "generation", "VersionId")


def is_url(path: str) -> bool:
    """True for `<scheme>://...` (any scheme, `file://` too) and chained `<a>::<b>://...`."""
    return bool(_SCHEME.match(path or "") or _CHAINED.match(path or ""))


def scheme(path: str) -> str | None:
    """The scheme of a URL (the first link of a chained one); None for a plain path."""
    m = _SCHEME.match(path or "") or _CHAINED.match(path or "")
    return re.split(r"::|://", m.group(0))[0].lower() if m else None


def local_path(path: str) -> str | None:
    """The local path a `file://` or `local://` URL names; None for other URLs. A plain path is returned as is."""
    s = scheme(path)
    if s is None:
        return path
    if s not in _LOCAL:
        return None
    if "::" in path:
        raise InputError(f"{path}: chained URLs (with ::) are not supported; give one URL per object")
    from fsspec.implementations.local import LocalFileSystem

    return LocalFileSystem._strip_protocol(path)


class Store:
    """One fsspec filesystem; paths inside it are fsspec paths (no protocol)."""

    def __init__(self, fs: Any):
        self.fs = fs

    @property
    def shared(self) -> bool:
        """False for a filesystem that lives inside this process (other processes cannot see it)."""
        from fsspec.implementations.memory import MemoryFileSystem

        return not isinstance(self.fs, MemoryFileSystem)

    def same_store(self, other: "Store") -> bool:
        return type(self.fs) is type(other.fs)

    def url(self, path: str) -> str:
        """The URL that reopens `path` (round trip: `open_url(store.url(p))` gives this store and p)."""
        return self.fs.unstrip_protocol(path)

    def info(self, path: str) -> dict:
        return self.fs.info(path)

    def listdir(self, path: str) -> list[dict]:
        """One directory's entries with their details, listed fresh; nothing is kept in fsspec's
        listing cache afterwards (so a walk holds one directory at a time)."""
        try:
            return self.fs.ls(path, detail=True, refresh=True)
        finally:
            self.fs.invalidate_cache(path)

    def open(self, path: str):
        """A seekable binary file that fetches STREAM_BLOCK bytes per request and keeps the last block."""
        return self.fs.open(path, "rb", block_size=STREAM_BLOCK)

    def cat_ranges(self, paths: list[str], limit: int) -> list[bytes | Exception]:
        """The first `limit` bytes of each path (concurrently on stores that can); failures as exceptions."""
        if not paths:
            return []
        got = self.fs.cat_ranges(list(paths), [0] * len(paths), [limit] * len(paths), on_error="return")
        return [g if isinstance(g, (bytes, Exception)) else OSError(f"unexpected result {type(g).__name__}")
                for g in got]


def open_url(url: str) -> tuple[Store, str]:
    """(store, path inside it) for a URL that is not local. Raises InputError for an unknown
    scheme, a chained URL or a store library that is not installed."""
    if "::" in url:
        raise InputError(f"{url}: chained URLs (with ::) are not supported; give one URL per object")
    import fsspec

    s = scheme(url) or ""
    try:
        fs, path = fsspec.core.url_to_fs(url)
    except ImportError as e:
        extra = {"s3": "s3", "s3a": "s3", "gs": "gcs", "gcs": "gcs"}.get(s)
        hint = f"; install curate[{extra}]" if extra else f"; install the fsspec backend for {s}://"
        raise InputError(f"{url}: the {s}:// store library is not installed ({e}){hint}") from e
    except (ValueError, TypeError) as e:
        raise InputError(f"{url}: not a URL fsspec can open ({e})") from e
    return Store(fs), clean_path(path)


def clean_path(path: str) -> str:
    """A store path without a trailing `/` (the store's root `/` is kept)."""
    return path.rstrip("/") or ("/" if path.startswith("/") else path)


def shared_across_processes(path: str) -> bool:
    """False when `path` is on a filesystem that lives inside this process (fsspec's `memory://`):
    worker processes cannot read it, so per-shard work on it must run in this process."""
    if local_path(path) is not None:
        return True
    store, _ = open_url(path)
    return store.shared


def stamp(info: dict) -> tuple[int | None, int | None]:
    """(size, mtime_ns) from a store's info or listing entry.

    mtime_ns is the first of TIME_FIELDS found, in nanoseconds since the epoch; when the store
    reports none, a 63-bit digest of the first of CHECKSUM_FIELDS (not a time: a stamp that changes
    with the content); else None.
    """
    size = info.get("size")
    size = int(size) if isinstance(size, (int, float)) and not isinstance(size, bool) else None
    for f in TIME_FIELDS:
        ns = _time_ns(info.get(f))
        if ns is not None:
            return size, ns
    for f in CHECKSUM_FIELDS:
        v = info.get(f)
        if v not in (None, ""):
            digest = hashlib.sha256(f"{f}={v}".encode("utf-8", "surrogatepass")).digest()
            return size, int.from_bytes(digest[:8], "big") >> 1
    return size, None


def _time_ns(v: Any) -> int | None:
    if v is None or isinstance(v, bool):
        return None
    if isinstance(v, datetime.datetime):
        if v.tzinfo is None:
            v = v.replace(tzinfo=datetime.timezone.utc)
        delta = v - datetime.datetime(1970, 1, 1, tzinfo=datetime.timezone.utc)
        return (delta.days * 86_400 + delta.seconds) * 1_000_000_000 + delta.microseconds * 1000
    if isinstance(v, (int, float)):
        return int(round(float(v) * 1_000_000_000))
    if isinstance(v, str):
        try:
            return _time_ns(datetime.datetime.fromisoformat(v.replace("Z", "+00:00")))
        except ValueError:
            return None
    return None


def kind_of(info: dict) -> str:
    """`file`, `dir` or `other` (a link or anything the store calls neither a file nor a directory)."""
    t = info.get("type")
    if info.get("islink"):
        return "other"
    if t == "file":
        return "file"
    if t == "directory":
        return "dir"
    return "other"


def base_name(path: str) -> str:
    return path.rstrip("/").rsplit("/", 1)[-1]


def join(base: str, name: str) -> str:
    return f"{base.rstrip('/')}/{name}" if base not in ("", "/") else f"{base}{name}"


def inside(root: str, path: str) -> bool:
    """True when store path `path` is `root` or below it, compared after `.` and `..` are resolved
    by name (object stores have no links to follow)."""
    path = posixpath.normpath(path)
    if path == ".." or path.startswith("../"):
        return False
    if root in ("", "/"):
        return root == "" or path.startswith("/")
    root = posixpath.normpath(root)
    return path == root or path.startswith(root + "/")
