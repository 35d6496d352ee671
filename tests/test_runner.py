"""Runner: outputs, caching by fingerprint, resume after SIGKILL, the lock, engines agree."""
from __future__ import annotations

import json
import os
import signal
import subprocess
import time
from pathlib import Path

import pyarrow.parquet as pq
import pytest

from curate import api
from curate.errors import LockedError

from conftest import ROOT, make_small_corpus

FAST = ["embed.enabled=false", "agreement.enabled=false"]


def _sets(*extra):
    from curate.stages import REGISTRY

    # Skip the model stages on this CPU-bound test (when they are installed); keep everything else.
    return [s for s in FAST if s.split(".")[0] in REGISTRY] + list(extra)


def _run(corpus, out, *sets, **kw):
    return api.run(None, input=str(corpus), out=str(out), sets=_sets("run.workers=1", "input.shard_size=8", *sets), **kw)


def _snapshot(out: Path):
    ledger = pq.read_table(out / "ledger.parquet")
    manifest = json.loads((out / "manifest.json").read_text())
    return ledger, [(s["path"], s["rows"], s["sha256"]) for s in manifest["shards"]]


def test_outputs_and_contract_columns(tmp_path):
    corpus = make_small_corpus(tmp_path / "c", 20)
    res = _run(corpus, tmp_path / "out")
    out = tmp_path / "out"
    ledger = pq.read_table(out / "ledger.parquet")
    assert ledger.num_rows == 20 == res.samples
    for col in ("sample_id", "source", "caption", "kept", "reasons", "width", "height", "agreement",
                "group_id", "flags", "split"):
        assert col in ledger.column_names
    import pyarrow as pa

    assert pa.types.is_list(ledger.schema.field("reasons").type)
    assert ledger.schema.field("reasons").type.value_type == pa.string()
    rows = ledger.to_pylist()
    assert all(r["kept"] and r["reasons"] == [] and r["split"] == "train" and r["group_id"] for r in rows)
    assert {r["source"] for r in rows} == {p.relative_to(corpus).as_posix() for p in corpus.rglob("*.jpg")}
    manifest = json.loads((out / "manifest.json").read_text())
    assert sum(s["rows"] for s in manifest["shards"]) == 20
    import hashlib

    for s in manifest["shards"]:
        assert hashlib.sha256((out / s["path"]).read_bytes()).hexdigest() == s["sha256"]
    assert (out / "config.resolved.toml").exists() and (out / "report.html").exists()
    summary = json.loads((out / "summary.json").read_text())
    assert summary["samples"] == 20 and summary["kept"] == 20


def test_shards_read_back_with_pyarrow_pandas_duckdb(tmp_path):
    corpus = make_small_corpus(tmp_path / "c", 12)
    _run(corpus, tmp_path / "out", "pack.max_rows=5")
    files = sorted((tmp_path / "out" / "shards" / "train").glob("part-*.parquet"))
    assert len(files) == 3  # 12 rows, shards close at 5 rows
    import io

    import duckdb
    import pandas as pd
    from PIL import Image

    t = pq.read_table(files[0])
    img = Image.open(io.BytesIO(t.column("image")[0].as_py()))
    assert img.size == (t.column("width")[0].as_py(), t.column("height")[0].as_py())
    df = pd.concat(pd.read_parquet(f) for f in files)
    assert len(df) == 12 and df["caption"].str.contains("on a table").all()
    glob = str(tmp_path / "out" / "shards" / "*" / "*.parquet")
    n, w = duckdb.sql(f"select count(*), min(width) from read_parquet('{glob}')").fetchall()[0]
    assert n == 12 and w >= 320
    # the original bytes are kept by default
    src = (tmp_path / "c" / df.iloc[0]["source"]).read_bytes()
    assert df.iloc[0]["image"] == src


def test_reencode_and_resize(tmp_path):
    corpus = make_small_corpus(tmp_path / "c", 4)
    _run(corpus, tmp_path / "out", "pack.encode='webp'", "pack.resize_short_side=128", "pack.quality=80")
    t = pq.read_table(next((tmp_path / "out" / "shards" / "train").glob("*.parquet")))
    assert set(t.column("image_format").to_pylist()) == {"WEBP"}
    assert min(t.column("width")[0].as_py(), t.column("height")[0].as_py()) == 128


def test_changing_one_threshold_reruns_only_what_depends_on_it(tmp_path):
    corpus = make_small_corpus(tmp_path / "c", 24)
    first = _run(corpus, tmp_path / "out")
    k = first.shards  # content-defined cuts of about input.shard_size samples (curate.layout)
    assert k >= 2 and first.ran["inspect"] == k and not first.reused.get("inspect")
    again = _run(corpus, tmp_path / "out")
    assert not again.ran and again.reused["inspect"] == k
    changed = _run(corpus, tmp_path / "out", "caption.min_chars=30")
    assert "inspect" not in changed.ran and changed.ran["caption"] == k
    ledger = pq.read_table(tmp_path / "out" / "ledger.parquet").to_pylist()
    assert any("caption_short" in r["reasons"] for r in ledger)


def test_a_changed_file_reruns_its_shard_only(tmp_path):
    corpus = make_small_corpus(tmp_path / "c", 24)
    _run(corpus, tmp_path / "out")
    victim = sorted(corpus.rglob("*.txt"))[0]
    victim.write_text("IMG_4032.JPG", encoding="utf-8")
    res = _run(corpus, tmp_path / "out")
    assert res.ran["caption"] == 1 and res.reused["caption"] == res.shards - 1
    rows = pq.read_table(tmp_path / "out" / "ledger.parquet").to_pylist()
    assert [r["reasons"] for r in rows if r["source"] == victim.with_suffix(".jpg").relative_to(corpus).as_posix()] \
        == [["caption_filename"]]


def test_lock_blocks_a_second_live_run_and_clears_a_stale_one(tmp_path):
    corpus = make_small_corpus(tmp_path / "c", 4)
    out = tmp_path / "out"
    out.mkdir()
    import socket

    # A live holder: this very process (another run on this host that is still going).
    (out / ".curate.lock").write_text(json.dumps({"host": socket.gethostname(), "pid": os.getpid()}))
    with pytest.raises(LockedError):
        _run(corpus, out)
    # A dead holder: a process that has exited and been reaped, as a SIGKILLed run leaves it.
    gone = subprocess.Popen(["true"])
    gone.wait()
    (out / ".curate.lock").write_text(json.dumps({"host": socket.gethostname(), "pid": gone.pid}))
    # the holder is gone: the lock is stale, cleared, and the run goes on
    res = _run(corpus, out)
    assert res.cleared_stale_lock and not (out / ".curate.lock").exists()


def _cli(*args, **kw):
    return subprocess.Popen([str(ROOT / ".venv" / "bin" / "curate"), *args], **kw)


def _orphan_workers() -> list[int]:
    """Our forkservers/workers whose run is gone (re-parented to init)."""
    found = []
    for d in Path("/proc").iterdir():
        if not d.name.isdigit():
            continue
        try:
            cmd = (d / "cmdline").read_bytes()
            ppid = int((d / "stat").read_text().rsplit(")", 1)[1].split()[1])
        except (OSError, ValueError, IndexError):
            continue
        if b"multiprocessing.forkserver" in cmd and b"curate" in cmd and ppid == 1:
            found.append(int(d.name))
    return found


def test_sigkill_at_any_moment_then_resume_gives_the_same_outputs(tmp_path):
    corpus = make_small_corpus(tmp_path / "c", 60)
    sets = []
    for s in _sets("run.workers=2", "input.shard_size=6", "pack.max_rows=7"):
        sets += ["--set", s]
    ref = tmp_path / "ref"
    assert _cli("run", "--input", str(corpus), "--out", str(ref), "--quiet", *sets).wait() == 0
    want = _snapshot(ref)
    # Kill at several moments (listing, stages, packing), each time resuming the same output dir.
    out = tmp_path / "out"
    for delay in (0.3, 1.0, 1.8, 2.6, 3.5, 4.5):
        p = _cli("run", "--input", str(corpus), "--out", str(out), "--quiet", *sets,
                 stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        time.sleep(delay)
        os.kill(p.pid, signal.SIGKILL)
        p.wait()
    time.sleep(1.0)
    assert not _orphan_workers(), "a killed run left worker processes behind"
    assert _cli("run", "--input", str(corpus), "--out", str(out), "--quiet", *sets).wait() == 0
    got = _snapshot(out)
    assert got[0].equals(want[0])
    assert got[1] == want[1]
    assert not list(out.rglob(".*.tmp-*"))


def test_process_pool_and_inline_give_the_same_ledger(tmp_path):
    corpus = make_small_corpus(tmp_path / "c", 30)
    _run(corpus, tmp_path / "one")
    api.run(None, input=str(corpus), out=str(tmp_path / "two"), sets=_sets("run.workers=2", "input.shard_size=8"))
    a = pq.read_table(tmp_path / "one" / "ledger.parquet")
    b = pq.read_table(tmp_path / "two" / "ledger.parquet")
    assert a.equals(b)
