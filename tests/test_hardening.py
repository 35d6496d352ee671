"""Nothing wrong reaches a shard: packed bytes are the inspected bytes, work files are checksummed,
settings are strict, and bad runs end with one line and exit 2."""
from __future__ import annotations

import errno
import io
import os
import subprocess
import sys
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from PIL import Image

from curate import api, cli, workdir
from curate.errors import ConfigError, InputError, OutputError
from curate.progress import NullProgress

from conftest import ROOT, make_small_corpus

FAST = ["embed.enabled=false", "agreement.enabled=false", "run.workers=1"]
DEMO = ['embed.model="demo"', 'embed.pretrained=""', "agreement.threshold=0.0", "run.workers=1"]


@pytest.fixture
def corpus(tmp_path) -> Path:
    return make_small_corpus(tmp_path / "in", n=12)


def _ledger(out: Path) -> dict[str, dict]:
    return {r["source"]: r for r in pq.read_table(out / "ledger.parquet").to_pylist()}


def _shard_images(out: Path) -> list[bytes]:
    return [r["image"] for p in sorted((out / "shards").rglob("*.parquet")) for r in pq.read_table(p).to_pylist()]


def _same_size_text(path: Path) -> None:
    """Overwrite a file with text of the same size and put its mtime back (the reuse check's blind spot)."""
    st = path.stat()
    path.write_bytes((b"not a picture " * (st.st_size // 14 + 1))[: st.st_size])
    os.utime(path, ns=(st.st_atime_ns, st.st_mtime_ns))


def _decodes(data: bytes) -> bool:
    try:
        Image.open(io.BytesIO(data)).load()
        return True
    except Exception:  # noqa: BLE001
        return False


# --------------------------------------------------------------------------- packed bytes


def test_bytes_changed_behind_the_reuse_check_never_reach_a_shard(corpus, tmp_path):
    out = tmp_path / "out"
    api.run(None, input=str(corpus), out=str(out), sets=FAST)
    victim = corpus / "a" / "item001.jpg"
    _same_size_text(victim)
    res = api.run(None, input=str(corpus), out=str(out), sets=FAST)
    assert sum(res.ran.values()) == 0  # size and mtime unchanged: every stage reused ...
    led = _ledger(out)
    assert led["a/item001.jpg"]["reasons"] == ["source_changed"]  # ... but packing checked the bytes
    assert any("changed on disk" in n for n in res.notes)
    assert all(_decodes(b) for b in _shard_images(out))
    # The next run inspects the file again and finds what it now is.
    api.run(None, input=str(corpus), out=str(out), sets=FAST)
    assert _ledger(out)["a/item001.jpg"]["reasons"] == ["not_image"]


class _RewriteAt(NullProgress):
    """A progress sink that rewrites a file when a given stage starts (a file changed mid-run)."""

    def __init__(self, stage: str, path: Path):
        self.stage, self.path, self.done = stage, path, False

    def start(self, name: str, total: int) -> None:
        if self.stage in name and not self.done:
            self.path.write_bytes(b"garbage " * 4000)
            self.done = True


def test_a_file_rewritten_mid_run_is_left_out_and_reported(corpus, tmp_path):
    out = tmp_path / "out"
    hook = _RewriteAt("neardup", corpus / "b" / "item002.jpg")  # after embedding
    res = api.run(None, input=str(corpus), out=str(out), sets=DEMO, progress=hook)
    assert hook.done
    led = _ledger(out)
    assert led["b/item002.jpg"]["kept"] is False and "source_changed" in led["b/item002.jpg"]["reasons"]
    assert any("source_changed" in n for n in res.notes)
    assert all(_decodes(b) for b in _shard_images(out))


# --------------------------------------------------------------------------- checksummed work files


def _flip_inside(path: Path) -> None:
    """Flip bytes in the middle of a Parquet file: the data pages, not the footer."""
    data = bytearray(path.read_bytes())
    footer = int.from_bytes(data[-8:-4], "little") + 8
    for k in range(12):
        data[(len(data) - footer) // 3 + 7 * k] ^= 0x5A
    path.write_bytes(bytes(data))


def test_damaged_embeddings_are_recomputed_not_trusted(corpus, tmp_path):
    out = tmp_path / "out"
    api.run(None, input=str(corpus), out=str(out), sets=DEMO)
    before = {s: r["agreement"] for s, r in _ledger(out).items()}
    for p in (out / "work" / "embed").glob("s*.parquet"):
        _flip_inside(p)
    res = api.run(None, input=str(corpus), out=str(out), sets=DEMO[:-2] + ["agreement.threshold=0.1", "run.workers=1"])
    assert res.repaired and any("damaged" in n for n in res.notes)
    after = {s: r["agreement"] for s, r in _ledger(out).items()}
    assert after == pytest.approx(before, abs=1e-6)


def test_damaged_inspect_output_is_recomputed_without_a_traceback(corpus, tmp_path):
    out = tmp_path / "out"
    api.run(None, input=str(corpus), out=str(out), sets=FAST)
    want = _ledger(out)
    for p in (out / "work" / "inspect").glob("s*.parquet"):
        _flip_inside(p)
    res = api.run(None, input=str(corpus), out=str(out), sets=FAST)
    assert res.repaired
    assert _ledger(out) == want


def test_a_rewritten_work_file_with_a_valid_fingerprint_is_not_trusted(corpus, tmp_path):
    out = tmp_path / "out"
    api.run(None, input=str(corpus), out=str(out), sets=FAST)
    path = sorted((out / "work" / "inspect").glob("s*.parquet"))[0]
    t = pq.read_table(path)
    widths = t.column("width").to_pylist()
    forged = t.set_column(t.schema.get_field_index("width"), t.schema.field("width"),
                          pa.array([w * 2 if w else w for w in widths], pa.int32()))
    pq.write_table(forged.replace_schema_metadata(t.schema.metadata), path)  # same fingerprint, other content
    assert workdir.stored_fingerprint(path) is not None
    res = api.run(None, input=str(corpus), out=str(out), sets=FAST)
    assert res.repaired
    led = _ledger(out)
    assert all(r["width"] in (320, 328, 336, 344, 352) for r in led.values())


# --------------------------------------------------------------------------- strict settings


@pytest.mark.parametrize("setting,words", [
    ("inspect.max_aspect=nan", "finite"),
    ("agreement.threshold=inf", "finite"),
    ("decide.actions.agreement_low=dorp", "dorp"),
    ("decide.actions.agrement_low=drop", "agreement_low"),
    ("input.shard_size=0", "shard_size"),
    ("input.shard_size=-5", "shard_size"),
    ("run.workers=-3", "workers"),
    ("pack.max_rows=0", "max_rows"),
    ("caption.min_tokens=-1", "min_tokens"),
])
def test_settings_that_would_switch_a_filter_off_are_refused(corpus, tmp_path, setting, words, capsys):
    rc = cli.main(["run", "--input", str(corpus), "--out", str(tmp_path / "out"), "--set", setting])
    err = capsys.readouterr().err.strip().splitlines()
    assert rc == 2 and len(err) == 1 and words in err[0]
    assert not (tmp_path / "out").exists()


# --------------------------------------------------------------------------- clean errors


def test_out_naming_a_file_is_one_line_exit_2(corpus, tmp_path, capsys):
    f = tmp_path / "file.txt"
    f.write_text("x")
    rc = cli.main(["run", "--input", str(corpus), "--out", str(f), *[a for s in FAST for a in ("--set", s)]])
    err = capsys.readouterr().err.strip().splitlines()
    assert rc == 2 and len(err) == 1 and "existing file" in err[0]


@pytest.mark.skipif(os.geteuid() == 0, reason="root writes into read-only folders")
def test_read_only_out_is_one_line_exit_2(corpus, tmp_path, capsys):
    ro = tmp_path / "ro"
    ro.mkdir()
    ro.chmod(0o555)
    rc = cli.main(["run", "--input", str(corpus), "--out", str(ro / "out"), *[a for s in FAST for a in ("--set", s)]])
    assert rc == 2 and len(capsys.readouterr().err.strip().splitlines()) == 1


def test_a_full_disk_is_one_line_exit_2(corpus, tmp_path, capsys, monkeypatch):
    real = workdir.write_table

    def full(path, *a, **kw):
        if "ledger" in str(path):
            raise OSError(errno.ENOSPC, "No space left on device", str(path))
        return real(path, *a, **kw)

    monkeypatch.setattr(workdir, "write_table", full)
    rc = cli.main(["run", "--input", str(corpus), "--out", str(tmp_path / "out"),
                   *[a for s in FAST for a in ("--set", s)]])
    err = capsys.readouterr().err.strip().splitlines()
    assert rc == 2 and len(err) == 1 and "No space left" in err[0]
    with pytest.raises(OutputError):
        api.run(None, input=str(corpus), out=str(tmp_path / "out2"), sets=FAST)


def test_a_corrupt_checkpoint_stops_the_run_before_any_stage(corpus, tmp_path):
    bad = tmp_path / "broken.safetensors"
    bad.write_bytes(b"\x10\x00\x00\x00\x00\x00\x00\x00{not json at all" + b"\x00" * 100)
    out = tmp_path / "out"
    with pytest.raises(Exception) as e:
        api.run(None, input=str(corpus), out=str(out), sets=['embed.model="demo"', f'embed.pretrained="{bad}"'])
    assert getattr(e.value, "exit_code", None) == 2, e.value
    assert not (out / "work").exists()  # nothing ran


def test_explain_into_a_closed_pipe_is_quiet(corpus, tmp_path):
    out = tmp_path / "out"
    api.run(None, input=str(corpus), out=str(out), sets=FAST)
    r = subprocess.run(f"{sys.executable} -m curate.cli explain {out} a/item001.jpg | head -1", shell=True,
                       cwd=ROOT, capture_output=True, text=True)
    assert r.returncode == 0 and r.stderr == "" and r.stdout.startswith("sample")


def test_empty_inputs_are_exit_2(tmp_path):
    empty = tmp_path / "empty"
    empty.mkdir()
    (empty / "notes.txt").write_text("no images here")
    with pytest.raises(InputError, match="no samples"):
        api.run(None, input=str(empty), out=str(tmp_path / "out"), sets=FAST)
    full = make_small_corpus(tmp_path / "full", n=2)
    with pytest.raises(InputError, match="no images"):
        api.leakcheck(full, empty)


def test_config_refusals_name_the_key(corpus, tmp_path):
    with pytest.raises(ConfigError, match="decide.actions"):
        api.run(None, input=str(corpus), out=str(tmp_path / "o"), sets=FAST + ['decide.actions={"nonsense"="drop"}'])
