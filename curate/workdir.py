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
import pyarrow.parquet as pq

from .errors import LockedError

FP_KEY = b"curate.fingerprint"


def fingerprint(*parts: Any) -> str:
    """sha256 over a JSON rendering of the parts (dicts sorted by key)."""
    h = hashlib.sha256()
    for p in parts:
        h.update(json.dumps(p, sort_keys=True, default=str).encode())
        h.update(b"\x00")
    return h.hexdigest()


def table_digest(table: pa.Table) -> str:
    """sha256 of a table's content (schema and values), independent of chunking."""
    sink = pa.BufferOutputStream()
    t = table.combine_chunks()
    with pa.ipc.new_stream(sink, t.schema) as w:
        w.write_table(t)
    return hashlib.sha256(sink.getvalue().to_pybytes()).hexdigest()


def _tmp_name(path: Path) -> Path:
    return path.with_name(f".{path.name}.tmp-{os.getpid()}")


def write_table(path: str | Path, table: pa.Table, fp: str | None = None, **kw: Any) -> None:
    """Write `table` to `path` atomically, with the fingerprint in the file's metadata."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    if fp is not None:
        meta = dict(table.schema.metadata or {})
        meta[FP_KEY] = fp.encode()
        table = table.replace_schema_metadata(meta)
    tmp = _tmp_name(path)
    pq.write_table(table, tmp, **kw)
    _fsync_file(tmp)
    os.replace(tmp, path)


def write_bytes(path: str | Path, data: bytes) -> None:
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = _tmp_name(path)
    with open(tmp, "wb") as f:
        f.write(data)
        f.flush()
        os.fsync(f.fileno())
    os.replace(tmp, path)


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
    except (OSError, pa.ArrowInvalid):
        return None
    v = meta.get(FP_KEY)
    return v.decode() if v else None


def read_table(path: str | Path, columns: list[str] | None = None) -> pa.Table:
    t = pq.read_table(path, columns=columns)
    return t.replace_schema_metadata(None)


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
