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

    The lock file holds host, pid and start time. A lock whose process is gone
    (same host, pid not alive) is stale: it is cleared and taken.
    """

    def __init__(self, out_dir: str | Path):
        self.path = Path(out_dir) / ".curate.lock"
        self.cleared_stale = False

    def acquire(self) -> "RunLock":
        self.path.parent.mkdir(parents=True, exist_ok=True)
        for _ in range(2):
            try:
                fd = os.open(self.path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
            except FileExistsError:
                holder = self._holder()
                if holder is not None and self._alive(holder):
                    raise LockedError(
                        f"{self.path.parent} is in use by a running curate (pid {holder.get('pid')} on "
                        f"{holder.get('host')}); wait for it or use another --out"
                    ) from None
                try:
                    self.path.unlink()
                    self.cleared_stale = True
                except FileNotFoundError:
                    pass
                continue
            with os.fdopen(fd, "w") as f:
                json.dump({"host": socket.gethostname(), "pid": os.getpid(), "started": time.time()}, f)
            return self
        raise LockedError(f"could not take the lock {self.path}")

    def release(self) -> None:
        try:
            holder = self._holder()
            if holder and holder.get("pid") == os.getpid():
                self.path.unlink()
        except FileNotFoundError:
            pass

    def held(self) -> bool:
        """True when a live run holds this lock now."""
        holder = self._holder() if self.path.exists() else None
        return bool(holder and self._alive(holder))

    def __enter__(self) -> "RunLock":
        return self.acquire()

    def __exit__(self, *exc: Any) -> None:
        self.release()

    def _holder(self) -> dict | None:
        try:
            return json.loads(self.path.read_text())
        except (OSError, ValueError):
            return None

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
