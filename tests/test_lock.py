"""RunLock: one holder at a time under contention, stale locks of killed runs, the in-use message.

Mutual exclusion is the property every lock must have (common practice; the
kernel's flock(2) semantics are the outside reference: an exclusive lock has
one holder, and it is dropped when the holder's process dies). The checks
count events in order; none depends on timing, so a loaded machine only makes
the test slower.
"""
from __future__ import annotations

import json
import os
import signal
import socket
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import pytest

from curate.errors import LockedError
from curate.workdir import RunLock

ROOT = Path(__file__).resolve().parents[1]

_WORKER = textwrap.dedent(
    """
    import os, random, sys, time
    from curate.errors import LockedError
    from curate.workdir import RunLock

    out, log, start, rounds = sys.argv[1], sys.argv[2], sys.argv[3], int(sys.argv[4])
    fd = os.open(log, os.O_WRONLY | os.O_APPEND)
    while not os.path.exists(start):
        time.sleep(0.001)
    done = refused = 0
    while done < rounds:
        lock = RunLock(out)
        try:
            lock.acquire()
        except LockedError as e:
            refused += 1
            if "in use" not in str(e):
                raise
            time.sleep(random.uniform(0, 0.002))
            continue
        os.write(fd, f"enter {os.getpid()}\\n".encode())
        time.sleep(random.uniform(0, 0.003))  # hold it a moment, so an overlap has time to show
        os.write(fd, f"exit {os.getpid()}\\n".encode())
        lock.release()
        done += 1
    os.write(fd, f"refused {os.getpid()} {refused}\\n".encode())
    """
)


def _env() -> dict:
    return {**os.environ, "PYTHONPATH": str(ROOT)}


def test_many_processes_never_hold_the_lock_together(tmp_path):
    # 8 processes x 30 rounds all start together on one output folder. Each appends
    # "enter" after taking the lock and "exit" before giving it back (O_APPEND writes
    # are atomic and ordered), so the log must read enter/exit pairs of one process.
    procs, rounds = 8, 30
    script = tmp_path / "worker.py"
    script.write_text(_WORKER)
    log = tmp_path / "events.log"
    log.write_bytes(b"")
    start = tmp_path / "go"
    out = tmp_path / "out"
    workers = [
        subprocess.Popen([sys.executable, str(script), str(out), str(log), str(start), str(rounds)], env=_env())
        for _ in range(procs)
    ]
    time.sleep(0.5)  # let them all reach the start line; a late one only lowers contention
    start.write_text("go")
    for w in workers:
        assert w.wait(timeout=600) == 0  # a guard against a hang, not a speed check
    events = [line.split() for line in log.read_text().splitlines()]
    pairs = [e for e in events if e[0] != "refused"]
    assert len(pairs) == 2 * procs * rounds
    holder = None
    for kind, pid in pairs:
        if kind == "enter":
            assert holder is None, f"process {pid} entered while {holder} held the lock"
            holder = pid
        else:
            assert holder == pid
            holder = None
    # the processes did contend: some attempts were refused with the in-use message
    assert sum(int(e[2]) for e in events if e[0] == "refused") > 0
    assert not (out / ".curate.lock").exists()  # the last release leaves no lock file


def test_in_use_message_names_the_live_holder_and_held_sees_it(tmp_path):
    out = tmp_path / "out"
    child = subprocess.Popen(
        [sys.executable, "-c", "import sys, time\nfrom curate.workdir import RunLock\n"
         f"RunLock({str(out)!r}).acquire()\nprint('held', flush=True)\ntime.sleep(120)"],
        env=_env(), stdout=subprocess.PIPE, text=True,
    )
    try:
        assert child.stdout.readline().strip() == "held"
        lock = RunLock(out)
        assert lock.held()
        with pytest.raises(LockedError) as e:
            lock.acquire()
        msg = str(e.value)
        assert f"pid {child.pid}" in msg and socket.gethostname() in msg and "\n" not in msg
        assert lock.held()  # a refused attempt leaves the holder alone
    finally:
        child.kill()
        child.wait()


def test_a_killed_holder_leaves_a_stale_lock_that_is_cleared(tmp_path):
    # SIGKILL gives the holder no chance to clean up: the file stays, naming a dead pid.
    out = tmp_path / "out"
    child = subprocess.Popen(
        [sys.executable, "-c", "import time\nfrom curate.workdir import RunLock\n"
         f"RunLock({str(out)!r}).acquire()\nprint('held', flush=True)\ntime.sleep(120)"],
        env=_env(), stdout=subprocess.PIPE, text=True,
    )
    assert child.stdout.readline().strip() == "held"
    os.kill(child.pid, signal.SIGKILL)
    child.wait()
    assert json.loads((out / ".curate.lock").read_text())["pid"] == child.pid
    lock = RunLock(out)
    assert not lock.held()
    with lock:
        assert lock.cleared_stale
        assert json.loads((out / ".curate.lock").read_text())["pid"] == os.getpid()
        assert RunLock(out).held()
        with pytest.raises(LockedError):
            RunLock(out).acquire()  # a second taker in this same process is refused too
    assert not (out / ".curate.lock").exists() and not RunLock(out).held()


def test_a_lock_file_naming_a_live_process_is_respected(tmp_path):
    # A holder that named itself but holds no file lock (another host's run, where locks
    # may not be shared, or an older curate): respected while its process lives.
    out = tmp_path / "out"
    out.mkdir()
    (out / ".curate.lock").write_text(json.dumps({"host": socket.gethostname(), "pid": os.getpid()}))
    assert RunLock(out).held()
    with pytest.raises(LockedError, match=f"pid {os.getpid()}"):
        RunLock(out).acquire()
    (out / ".curate.lock").write_text(json.dumps({"host": "another-host.invalid", "pid": 1}))
    with pytest.raises(LockedError, match="another-host.invalid"):
        RunLock(out).acquire()
    (out / ".curate.lock").write_text("")  # empty: names no one, so it is free
    with RunLock(out) as lock:
        assert not lock.cleared_stale
