"""Atomic outputs, fingerprints stored with them, and the run lock.

Every stage output is one Parquet file written to a temporary name in the
same folder and renamed into place, so a run killed at any moment leaves
either the old file, the new file, or a temporary file that the next run
ignores and removes. The fingerprint that produced a file is stored in its
Parquet metadata, so "is this output current?" needs only the file's footer.
"""
from __future__ import annotations

import hashlib
import json
import os
import socket
import time
from pathlib import Path
from typing import Any

import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from .errors import LockedError

FP_KEY = b"curate.fingerprint"
DIGEST_KEY = b"curate.column_sha256"


class DamagedWorkFile(OSError):
    """A work file whose content does not match the checksum stored with it, or that cannot be parsed."""

    def __init__(self, path: str | Path, why: str):
        super().__init__(f"{path}: {why}")
        self.path = str(path)
        self.why = why

    def __reduce__(self) -> tuple:
        return (DamagedWorkFile, (self.path, self.why))


def fingerprint(*parts: Any) -> str:
    """sha256 over a JSON rendering of the parts (dicts sorted by key)."""
    h = hashlib.sha256()
    for p in parts:
        h.update(json.dumps(p, sort_keys=True, default=str).encode())
        h.update(b"\x00")
    return h.hexdigest()


def table_digest(table: pa.Table) -> str:
    """sha256 of a table's content (schema and values), independent of chunking, slicing and metadata."""
    h = hashlib.sha256()
    h.update(str(table.schema.remove_metadata()).encode())
    for col in table.columns:
        h.update(_array_digest(col.combine_chunks()).encode())
    return h.hexdigest()


def _array_digest(arr: pa.Array) -> str:
    """A digest of an array's logical values: flat numbers and bytes are hashed from NumPy views
    (with null slots zeroed); nested types from a plain Parquet encoding, which holds no padding
    or bytes outside a slice."""
    import numpy as np

    h = hashlib.sha256()
    n = len(arr)
    h.update(f"{arr.type}|{n}|".encode())
    valid = np.asarray(arr.is_valid().to_numpy(zero_copy_only=False), dtype=bool) if n else np.zeros(0, bool)
    h.update(np.packbits(valid).tobytes())
    t = arr.type
    if pa.types.is_fixed_size_list(t) and (pa.types.is_integer(t.value_type) or pa.types.is_floating(t.value_type)):
        k = t.list_size
        vals = arr.values.slice(arr.offset * k, n * k)
        flat = np.array(pc.fill_null(vals, 0).to_numpy(zero_copy_only=False)).reshape(n, k)
        flat[~valid] = 0
        h.update(flat.tobytes())
    elif pa.types.is_integer(t) or pa.types.is_floating(t) or pa.types.is_boolean(t):
        h.update(np.asarray(pc.fill_null(arr, False if pa.types.is_boolean(t) else 0)
                            .to_numpy(zero_copy_only=False)).tobytes())
    elif pa.types.is_binary(t) or pa.types.is_string(t) or pa.types.is_large_binary(t) or pa.types.is_large_string(t):
        filled = pc.fill_null(arr, b"" if "binary" in str(t) else "")
        lengths = pc.binary_length(filled).to_numpy(zero_copy_only=False)
        h.update(np.asarray(lengths, dtype=np.int64).tobytes())
        offs = np.frombuffer(filled.buffers()[1], dtype=np.int64 if t in (pa.large_binary(), pa.large_string())
                             else np.int32)[filled.offset: filled.offset + n + 1]
        if n:
            h.update(memoryview(filled.buffers()[2])[int(offs[0]):int(offs[-1])] if filled.buffers()[2] else b"")
    else:
        sink = pa.BufferOutputStream()
        pq.write_table(pa.table({"v": arr}), sink, compression="none", use_dictionary=False,
                       write_statistics=False, row_group_size=max(1, n))
        h.update(sink.getvalue())
    return h.hexdigest()


def column_digests(table: pa.Table) -> dict[str, str]:
    """One content checksum per column, so a reader of some columns can verify what it read."""
    return {name: table_digest(table.select([i])) for i, name in enumerate(table.column_names)}


def _tmp_name(path: Path) -> Path:
    return path.with_name(f".{path.name}.tmp-{os.getpid()}")


def write_table(path: str | Path, table: pa.Table, fp: str | None = None, **kw: Any) -> None:
    """Write `table` to `path` atomically, with the fingerprint and per-column checksums in its metadata."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    meta = dict(table.schema.metadata or {})
    if fp is not None:
        meta[FP_KEY] = fp.encode()
    meta[DIGEST_KEY] = json.dumps(column_digests(table.replace_schema_metadata(None))).encode()
    table = table.replace_schema_metadata(meta)
    tmp = _tmp_name(path)
    kw.setdefault("use_compliant_nested_type", False)  # list items read back as "item", as written
    try:
        pq.write_table(table, tmp, **kw)
        _fsync_file(tmp)
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise


def write_bytes(path: str | Path, data: bytes) -> None:
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = _tmp_name(path)
    try:
        with open(tmp, "wb") as f:
            f.write(data)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise


def write_json(path: str | Path, obj: Any) -> None:
    write_bytes(path, (json.dumps(obj, indent=2, sort_keys=False, default=str) + "\n").encode())


def _fsync_file(p: Path) -> None:
    fd = os.open(p, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def stored_fingerprint(path: str | Path) -> str | None:
    """The fingerprint stored in a Parquet output, or None if absent/unreadable."""
    try:
        meta = pq.read_schema(path).metadata or {}
    except (OSError, pa.ArrowException, ValueError):
        return None
    v = meta.get(FP_KEY)
    return v.decode(errors="replace") if v else None


def content_digest(path: str | Path) -> str | None:
    """A digest of a work file's content, from the column checksums stored in its footer (None if absent)."""
    try:
        meta = pq.read_schema(path).metadata or {}
    except (OSError, pa.ArrowException, ValueError):
        return None
    raw = meta.get(DIGEST_KEY)
    return hashlib.sha256(raw).hexdigest() if raw else None


def read_table(path: str | Path, columns: list[str] | None = None) -> pa.Table:
    """Read a work file (or some of its columns) and verify each column against its stored checksum.

    Raises DamagedWorkFile when the file cannot be parsed or a checksum does not match."""
    try:
        # Memory-mapped: only the pages of the asked columns are read from disk.
        pf = pq.ParquetFile(path, memory_map=True)
        meta = pf.schema_arrow.metadata or {}
        names = pf.schema_arrow.names
        cols = names if columns is None else [c for c in columns if c in names]
        t = pf.read(columns=cols)
    except FileNotFoundError:
        raise
    except (OSError, pa.ArrowException, ValueError) as e:
        raise DamagedWorkFile(path, f"unreadable ({type(e).__name__})") from e
    raw = meta.get(DIGEST_KEY)
    if raw is None:
        raise DamagedWorkFile(path, "no content checksum")
    try:
        digests = json.loads(raw)
    except ValueError as e:
        raise DamagedWorkFile(path, "content checksum unreadable") from e
    t = t.replace_schema_metadata(None)
    for i, name in enumerate(t.column_names):
        if digests.get(name) != table_digest(t.select([i])):
            raise DamagedWorkFile(path, f"column {name!r} does not match its checksum")
    return t


def clean_temp_files(root: str | Path) -> int:
    """Remove temporary files left by a killed run. Returns how many were removed."""
    n = 0
    for p in Path(root).rglob(".*.tmp-*"):
        try:
            p.unlink()
            n += 1
        except OSError:
            pass
    return n


class RunLock:
    """An exclusive lock on an output directory: one live run at a time.

    The holder keeps an advisory lock (flock) on `DIR/.curate.lock` for the
    whole run, so taking it is atomic and the kernel drops it when the holder
    dies, however it dies. The file also names the holder (host, pid, start
    time) for the "in use" message. A clean release deletes the file while
    still locked; a file left behind by a killed run is stale and is taken
    over (`cleared_stale`). A file naming a live holder that holds no lock
    (another host's run, where locks may not be shared) is respected.
    """

    # How long to wait for a holder that has the lock but has not yet written its name (seconds;
    # writing it takes microseconds, so this only matters on a stalled machine).
    NAME_WAIT_S = 2.0

    def __init__(self, out_dir: str | Path):
        self.path = Path(out_dir) / ".curate.lock"
        self.cleared_stale = False
        self._fd: int | None = None

    def acquire(self) -> "RunLock":
        import fcntl

        if self._fd is not None:
            return self
        self.path.parent.mkdir(parents=True, exist_ok=True)
        deadline = time.monotonic() + self.NAME_WAIT_S
        while True:
            fd = os.open(self.path, os.O_RDWR | os.O_CREAT | os.O_CLOEXEC, 0o644)
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except BlockingIOError:
                os.close(fd)
                holder = self._holder()
                if (holder is not None and self._alive(holder)) or time.monotonic() > deadline:
                    raise LockedError(self._in_use(holder)) from None
                time.sleep(0.01)  # taken a moment ago and not yet named, or a status probe: look again
                continue
            except OSError as e:
                os.close(fd)
                raise LockedError(f"cannot lock {self.path} ({e.strerror or e}); the output folder's file "
                                  "system must support file locks") from e
            if not self._is_current(fd):  # released (deleted) between our open and our lock: start over
                os.close(fd)
                continue
            holder = _parse_holder(_read_fd(fd))
            if holder is not None and self._alive(holder):
                fcntl.flock(fd, fcntl.LOCK_UN)
                os.close(fd)
                raise LockedError(self._in_use(holder))
            self.cleared_stale = holder is not None or self.cleared_stale
            me = json.dumps({"host": socket.gethostname(), "pid": os.getpid(), "started": time.time()}).encode()
            os.ftruncate(fd, 0)
            os.pwrite(fd, me, 0)
            os.fsync(fd)
            self._fd = fd
            return self

    def release(self) -> None:
        import fcntl

        fd, self._fd = self._fd, None
        if fd is None:
            return
        try:
            if self._is_current(fd):
                self.path.unlink()  # while still locked, so no one can take a file on its way out
        except OSError:
            pass
        finally:
            fcntl.flock(fd, fcntl.LOCK_UN)
            os.close(fd)

    def held(self) -> bool:
        """True when a live run holds this lock now."""
        import fcntl

        try:
            fd = os.open(self.path, os.O_RDONLY | os.O_CLOEXEC)
        except OSError:
            return False
        try:
            try:
                fcntl.flock(fd, fcntl.LOCK_SH | fcntl.LOCK_NB)
            except BlockingIOError:
                return True
            except OSError:
                pass
            else:
                fcntl.flock(fd, fcntl.LOCK_UN)
            holder = _parse_holder(_read_fd(fd))
            return bool(holder and self._alive(holder))
        finally:
            os.close(fd)

    def __enter__(self) -> "RunLock":
        return self.acquire()

    def __exit__(self, *exc: Any) -> None:
        self.release()

    def _is_current(self, fd: int) -> bool:
        try:
            return os.path.samestat(os.fstat(fd), os.stat(self.path))
        except OSError:
            return False

    def _holder(self) -> dict | None:
        try:
            return _parse_holder(self.path.read_bytes())
        except OSError:
            return None

    def _in_use(self, holder: dict | None) -> str:
        if holder is None:
            return f"{self.path.parent} is in use by another curate run; wait for it or use another --out"
        return (f"{self.path.parent} is in use by a running curate (pid {holder.get('pid')} on {holder.get('host')}); "
                f"wait for it or use another --out (if no such run is alive, delete {self.path})")

    @staticmethod
    def _alive(holder: dict) -> bool:
        if holder.get("host") != socket.gethostname():
            return True  # another machine's lock: we cannot tell, so respect it
        pid = holder.get("pid")
        if not isinstance(pid, int):
            return False
        try:
            os.kill(pid, 0)
        except ProcessLookupError:
            return False
        except PermissionError:
            return True
        # A zombie or a recycled pid of a non-curate process: check the command line where we can.
        try:
            cmd = Path(f"/proc/{pid}/cmdline").read_bytes()
            stat = Path(f"/proc/{pid}/stat").read_text()
            if ") Z" in stat:
                return False
            return b"curate" in cmd or b"python" in cmd or b"pytest" in cmd
        except OSError:
            return True


def _read_fd(fd: int) -> bytes:
    return os.pread(fd, 4096, 0)


def _parse_holder(data: bytes) -> dict | None:
    """The holder named in a lock file, or None when it names none (empty, partly written, not ours)."""
    try:
        obj = json.loads(data.decode("utf-8"))
    except (UnicodeDecodeError, ValueError):
        return None
    return obj if isinstance(obj, dict) and "host" in obj and "pid" in obj else None
