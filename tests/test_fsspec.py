"""Object-store paths: fsspec URLs for inputs, manifests, tar shards, image sets and --out.

Outside references used below: RFC 8089 (the `file` URI scheme: `file:///abs/path` names the
local absolute path); fsspec's in-memory filesystem and its `cat`/`info` (the reference reader of
what a store holds); Python's tarfile (writes the archives and extracts the reference bytes);
RFC 3339 / ISO 8601 timestamps and `calendar.timegm` (the reference epoch arithmetic); the AWS
instance metadata address 169.254.169.254 (AWS EC2 user guide: a URL that must never be fetched
on a manifest's say-so).
"""
from __future__ import annotations

import calendar
import datetime
import io
import json
import os
import tarfile
import uuid
from pathlib import Path

import fsspec
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from PIL import Image

from curate import api
from curate.config import InputConfig
from curate.errors import InputError, OutputError
from curate.sources import (
    iter_samples,
    list_samples,
    read_bytes,
    shared_across_processes,
    split_locator,
    stable_id,
    stores,
)


def _png(color=(40, 90, 140), size=(6, 4)) -> bytes:
    buf = io.BytesIO()
    Image.new("RGB", size, color).save(buf, format="PNG")
    return buf.getvalue()


@pytest.fixture()
def mem():
    """fsspec's in-memory filesystem (process-wide), under a fresh prefix removed afterwards."""
    fs = fsspec.filesystem("memory")
    prefix = f"/t{uuid.uuid4().hex[:12]}"
    yield fs, prefix
    if fs.exists(prefix):
        fs.rm(prefix, recursive=True)


def _tree() -> dict[str, bytes]:
    """A small corpus: images, sidecars of both kinds, an image without caption, nested folders,
    and names whose order hinges on '/' (`a-c.png` sorts before `a/b.png`: '-' < '/')."""
    return {
        "a/b.png": _png((1, 2, 3)),
        "a/b.txt": b"a blue bowl",
        "a-c.png": _png((4, 5, 6)),
        "a-c.json": json.dumps({"caption": "a clay cup"}).encode(),
        "a.png": _png((7, 8, 9)),
        "deep/er/x.JPG": _png((10, 11, 12)),
        "deep/er/x.TXT": b"upper sidecar",
        "notes.md": b"not an image",
    }


def _write_local(root: Path, files: dict[str, bytes]) -> None:
    for rel, data in files.items():
        (root / rel).parent.mkdir(parents=True, exist_ok=True)
        (root / rel).write_bytes(data)


def _write_mem(fs, prefix: str, files: dict[str, bytes]) -> None:
    for rel, data in files.items():
        fs.pipe(f"{prefix}/{rel}", data)


_SAME = ["sample_id", "source", "caption_raw", "caption_problem", "source_problem", "file_size"]


# ---------------------------------------------------------------- file:// and memory:// folders


def test_file_url_lists_exactly_the_local_path(tmp_path):
    # RFC 8089: file:///abs/path is the local absolute path.
    _write_local(tmp_path / "c", _tree())
    assert stores.local_path(f"file://{tmp_path}/c") == f"{tmp_path}/c"
    assert list_samples(InputConfig(path=f"file://{tmp_path}/c")).equals(list_samples(InputConfig(path=str(tmp_path / "c"))))
    assert shared_across_processes(f"file://{tmp_path}") and shared_across_processes(str(tmp_path))


def test_memory_folder_lists_like_the_same_tree_on_disk(tmp_path, mem):
    fs, prefix = mem
    files = _tree()
    _write_local(tmp_path / "c", files)
    _write_mem(fs, f"{prefix}/c", files)
    local = list_samples(InputConfig(path=str(tmp_path / "c")))
    remote = list_samples(InputConfig(path=f"memory://{prefix}/c"))
    assert remote.select(_SAME).equals(local.select(_SAME))
    assert remote.column("source").to_pylist() == ["a-c.png", "a.png", "a/b.png", "deep/er/x.JPG"]
    locs = remote.column("locator").to_pylist()
    assert all(loc.startswith("memory://") for loc in locs)
    # fsspec's own cat is the reference for what the store holds
    assert list(read_bytes(locs)) == [fs.cat(stores.open_url(loc)[1]) for loc in locs]
    assert all(m is not None for m in remote.column("mtime_ns").to_pylist())
    assert not shared_across_processes(f"memory://{prefix}/c")
    # the stream hands out the same rows in the same (source) order, in batches
    batches = list(iter_samples(InputConfig(path=f"memory://{prefix}/c"), batch_rows=3))
    assert [b.num_rows for b in batches] == [3, 1]
    assert pa.Table.from_batches(batches).equals(remote)


def test_memory_folder_entries_that_are_not_files_are_never_read(mem, monkeypatch):
    fs, prefix = mem
    _write_mem(fs, f"{prefix}/c", {"ok.png": _png(), "big.png": b"x" * 5000})
    real_ls = type(fs).ls

    def ls(self, path, detail=True, **kw):
        out = real_ls(self, path, detail=detail, **kw)
        if path == f"{prefix}/c":  # a store that reports a link (SFTP, SMB do)
            out = out + [{"name": f"{prefix}/c/link.png", "type": "link", "size": 10}]
        return out

    monkeypatch.setattr(type(fs), "ls", ls)
    rows = {r["source"]: r for r in list_samples(InputConfig(path=f"memory://{prefix}/c", max_file_bytes=1000))
            .to_pylist()}
    assert rows["link.png"]["source_problem"] == "special_file" and rows["link.png"]["locator"] == ""
    assert rows["big.png"]["source_problem"] == "file_too_large" and rows["big.png"]["file_size"] == 5000
    assert rows["ok.png"]["source_problem"] is None
    (data,) = read_bytes([rows["big.png"]["locator"]], max_bytes=1000)
    assert isinstance(data, OSError) and "limit" in str(data)


def test_a_store_folder_that_cannot_be_listed_stops_the_listing(mem, monkeypatch):
    fs, prefix = mem
    _write_mem(fs, f"{prefix}/c", {"a/x.png": _png(), "b/y.png": _png()})
    real_ls = type(fs).ls

    def ls(self, path, detail=True, **kw):
        if path == f"{prefix}/c/b":
            raise ConnectionError("store went away")
        return real_ls(self, path, detail=detail, **kw)

    monkeypatch.setattr(type(fs), "ls", ls)
    with pytest.raises(InputError, match="cannot be listed"):
        list_samples(InputConfig(path=f"memory://{prefix}/c"))


def test_a_missing_url_or_unknown_store_is_an_input_error(mem):
    fs, prefix = mem
    with pytest.raises(InputError, match="does not exist"):
        list_samples(InputConfig(path=f"memory://{prefix}/nothing"))
    with pytest.raises(InputError, match="chained"):
        list_samples(InputConfig(path=f"simplecache::memory://{prefix}/x"))
    with pytest.raises(InputError, match="nosuchstore"):
        list_samples(InputConfig(path="nosuchstore://bucket/x"))


# ---------------------------------------------------------------- manifests on a store


def _manifest_files(fs, base: str) -> None:
    fs.pipe(f"{base}/data/imgs/a.png", _png((1, 1, 1)))
    fs.pipe(f"{base}/data/imgs/b.png", _png((2, 2, 2)))
    fs.pipe(f"{base}/data/imgs/c.png", _png((3, 3, 3)))
    fs.pipe(f"{base}/data/imgs/big.png", b"\0" * 4096)
    fs.mkdir(f"{base}/data/imgs/folder.png")
    fs.pipe(f"{base}/secret.png", _png((9, 9, 9)))


def _manifest_rows(base: str) -> list[dict]:
    return [
        {"image": "imgs/a.png", "caption": "relative to the manifest"},
        {"image": "./imgs//b.png", "caption": "dot and empty parts"},
        {"image": f"{base}/data/imgs/c.png", "caption": "absolute on the same store"},
        {"image": f"memory://{base}/data/imgs/a.png", "caption": "a URL of the same store"},
        {"image": "imgs/missing.png", "caption": "not there"},
        {"image": "imgs/big.png", "caption": "too large"},
        {"image": "imgs/folder.png", "caption": "a folder"},
    ]


def _put_manifests(fs, base: str, rows: list[dict]) -> list[str]:
    csv_text = "image,caption\n" + "".join(f"{r['image']},{r['caption']}\n" for r in rows)
    fs.pipe(f"{base}/data/m.csv", csv_text.encode())
    fs.pipe(f"{base}/data/m.jsonl", "".join(json.dumps(r) + "\n" for r in rows).encode())
    sink = io.BytesIO()
    pq.write_table(pa.Table.from_pylist(rows), sink)
    fs.pipe(f"{base}/data/m.parquet", sink.getvalue())
    return [f"memory://{base}/data/m.{ext}" for ext in ("csv", "jsonl", "parquet")]


def test_store_manifest_paths_resolve_on_the_same_store(mem):
    fs, prefix = mem
    _manifest_files(fs, prefix)
    urls = _put_manifests(fs, prefix, _manifest_rows(prefix))
    tables = [list_samples(InputConfig(path=u, max_file_bytes=1000)) for u in urls]
    assert tables[0].equals(tables[1]) and tables[0].equals(tables[2])
    rows = {r["caption_raw"].decode(): r for r in tables[0].to_pylist()}
    for cap, path in [("relative to the manifest", "imgs/a.png"), ("dot and empty parts", "imgs/b.png"),
                      ("absolute on the same store", "imgs/c.png"), ("a URL of the same store", "imgs/a.png")]:
        r = rows[cap]
        assert r["source_problem"] is None, cap
        assert r["file_size"] == fs.info(f"{prefix}/data/{path}")["size"]
        assert list(read_bytes([r["locator"]])) == [fs.cat(f"{prefix}/data/{path}")]
    assert rows["dot and empty parts"]["source"] == "imgs/b.png"
    assert rows["a URL of the same store"]["source"] == f"memory://{prefix}/data/imgs/a.png"
    assert rows["not there"]["source_problem"] == "unreadable"
    assert rows["too large"]["source_problem"] == "file_too_large"
    assert rows["a folder"]["source_problem"] == "unreadable" and rows["a folder"]["locator"] == ""


def test_store_manifest_cannot_point_out_of_its_folder_or_at_another_store(mem, monkeypatch):
    fs, prefix = mem
    _manifest_files(fs, prefix)
    hostile = [
        {"image": "../secret.png", "caption": "up"},
        {"image": f"{prefix}/secret.png", "caption": "absolute out"},
        {"image": "imgs/../../secret.png", "caption": "in and up"},
        {"image": f"memory://{prefix}/secret.png", "caption": "same store URL out"},
        {"image": "file:///etc/passwd", "caption": "local file"},
        {"image": "http://169.254.169.254/latest/meta-data/iam/", "caption": "metadata service"},
        {"image": "s3://bucket/x.png", "caption": "another store"},
        {"image": "imgs/a.png", "caption": "fine"},
    ]
    url = _put_manifests(fs, prefix, hostile)[1]
    touched: list[str] = []
    real_info = type(fs).info

    def info(self, path, **kw):
        touched.append(path)
        return real_info(self, path, **kw)

    monkeypatch.setattr(type(fs), "info", info)
    rows = {r["caption_raw"].decode(): r for r in list_samples(InputConfig(path=url)).to_pylist()}
    for cap in ("up", "absolute out", "in and up", "same store URL out", "local file", "metadata service",
                "another store"):
        assert rows[cap]["source_problem"] == "outside_root" and rows[cap]["locator"] == "", cap
        assert rows[cap]["file_size"] is None
    assert rows["fine"]["source_problem"] is None
    assert not [p for p in touched if "secret" in p]  # not even asked about
    # allow_outside_root lets paths leave the folder on the same store, never onto another store
    rows = {r["caption_raw"].decode(): r for r in
            list_samples(InputConfig(path=url, allow_outside_root=True)).to_pylist()}
    assert list(read_bytes([rows["up"]["locator"]])) == [fs.cat(f"{prefix}/secret.png")]
    for cap in ("local file", "metadata service", "another store"):
        assert rows[cap]["source_problem"] == "outside_root", cap


def test_local_manifest_reads_file_urls_and_refuses_other_stores(tmp_path, mem):
    fs, prefix = mem
    fs.pipe(f"{prefix}/x.png", _png())
    Image.new("RGB", (4, 4)).save(tmp_path / "in.png")
    lines = [{"image": f"file://{tmp_path}/in.png", "caption": "file url"},
             {"image": f"memory://{prefix}/x.png", "caption": "memory"}]
    (tmp_path / "m.jsonl").write_text("".join(json.dumps(r) + "\n" for r in lines))
    for allow in (False, True):
        rows = {r["caption_raw"].decode(): r for r in
                list_samples(InputConfig(path=str(tmp_path / "m.jsonl"), allow_outside_root=allow)).to_pylist()}
        assert rows["file url"]["locator"] == str(tmp_path / "in.png")
        assert rows["memory"]["source_problem"] == "outside_root" and rows["memory"]["locator"] == ""


def test_store_manifest_duplicates_are_marked_across_batches(mem):
    fs, prefix = mem
    fs.pipe(f"{prefix}/a.png", _png())
    fs.pipe(f"{prefix}/b.png", _png((5, 5, 5)))
    fs.pipe(f"{prefix}/m.csv", b"image,caption\na.png,one\nb.png,two\n./a.png,three\n")
    batches = list(iter_samples(InputConfig(path=f"memory://{prefix}/m.csv"), batch_rows=1))
    rows = [r for b in batches for r in b.to_pylist()]
    base = stable_id("a.png")
    assert [(r["sample_id"], r["source_problem"]) for r in rows] == [
        (f"{base}-1", "source_duplicate"), (stable_id("b.png"), None), (f"{base}-2", "source_duplicate")]


# ---------------------------------------------------------------- tar shards on a store


def _tar_bytes(members: list[tuple[str, bytes]]) -> bytes:
    buf = io.BytesIO()
    with tarfile.open(fileobj=buf, mode="w", format=tarfile.PAX_FORMAT) as tf:
        for i, (name, data) in enumerate(members):
            info = tarfile.TarInfo(name)
            info.size = len(data)
            info.mtime = 1_700_000_000 + i
            tf.addfile(info, io.BytesIO(data))
    return buf.getvalue()


def _members(data: bytes) -> dict[str, bytes]:
    """Each regular member's bytes, extracted by Python's tarfile (the reference reader)."""
    with tarfile.open(fileobj=io.BytesIO(data)) as tf:
        return {m.name: tf.extractfile(m).read() for m in tf.getmembers() if m.isfile()}


def test_store_tar_shards_list_and_read_like_local_ones(tmp_path, mem):
    fs, prefix = mem
    shards = {
        "s-000.tar": _tar_bytes([("k1.png", _png((1, 0, 0))), ("k1.txt", b"first"), ("k2.png", _png((0, 1, 0)))]),
        "sub/s-001.tar": _tar_bytes([("./k3.png", _png((0, 0, 1))), ("k3.json", b'{"caption": "third"}'),
                                     ("../evil.png", _png())]),
    }
    _write_local(tmp_path / "t", shards)
    _write_mem(fs, f"{prefix}/t", shards)
    local = list_samples(InputConfig(path=str(tmp_path / "t")))
    remote = list_samples(InputConfig(path=f"memory://{prefix}/t"))
    assert remote.select(_SAME + ["mtime_ns"]).equals(local.select(_SAME + ["mtime_ns"]))
    rows = {r["source"]: r for r in remote.to_pylist()}
    assert rows["sub/s-001.tar/../evil"]["source_problem"] == "unsafe_path"
    assert rows["s-000.tar/k1"]["caption_raw"] == b"first" and rows["sub/s-001.tar/k3"]["caption_raw"] == b"third"
    tar_url, _offset, member = split_locator(rows["sub/s-001.tar/k3"]["locator"])
    assert tar_url == f"memory://{prefix}/t/sub/s-001.tar" and member == "./k3.png"
    out = list(read_bytes(remote.column("locator").to_pylist()))
    for source, data in zip(remote.column("source").to_pylist(), out):
        if source.endswith("evil"):
            assert isinstance(data, Exception)
            continue
        tar_rel, key = source.split(".tar/")
        ref = _members(shards[tar_rel + ".tar"])
        assert data == next(v for n, v in ref.items() if n.lstrip("./").startswith(key + "."))
    # one archive as the root
    one = list_samples(InputConfig(path=f"memory://{prefix}/t/s-000.tar"))
    assert one.column("source").to_pylist() == ["s-000.tar/k1", "s-000.tar/k2"]


def test_a_store_member_is_read_by_offset_not_by_copying_the_archive(mem, monkeypatch):
    fs, prefix = mem
    filler = os.urandom(1 << 20)
    members = [(f"f{i}.bin", filler) for i in range(16)] + [("last.png", _png())]
    data = _tar_bytes(members)
    fs.pipe(f"{prefix}/big.tar", data)
    with tarfile.open(fileobj=io.BytesIO(data)) as tf:
        offset = next(m.offset for m in tf.getmembers() if m.name == "last.png")
    from fsspec.implementations.memory import MemoryFile

    read = [0]
    real_read = MemoryFile.read

    def counting(self, *a):
        got = real_read(self, *a)
        read[0] += len(got)
        return got

    monkeypatch.setattr(MemoryFile, "read", counting)
    from curate.sources import member_locator

    (got,) = read_bytes([member_locator(f"memory://{prefix}/big.tar", offset, "last.png")])
    assert got == _members(data)["last.png"]
    assert read[0] < 64 * 1024 < len(data)  # the header and the member, not 16 MiB of archive


# ---------------------------------------------------------------- image sets, stamps, --out


def test_an_eval_set_on_a_store_lists_and_reads(mem):
    from curate import imagesets

    fs, prefix = mem
    files = {"x.png": _png((1, 2, 3)), "d/y.png": _png((3, 2, 1))}
    _write_mem(fs, f"{prefix}/bench", files)
    s = imagesets.list_set(f"memory://{prefix}/bench")
    assert s.kind == "folder" and s.names == ["d/y.png", "x.png"]
    assert list(s.read([0, 1])) == [files["d/y.png"], files["x.png"]]
    fs.pipe(f"{prefix}/tars/a.tar", _tar_bytes([("k.png", files["x.png"])]))
    s = imagesets.list_set(f"memory://{prefix}/tars")
    assert s.kind == "tar" and list(s.read([0])) == [files["x.png"]]
    sink = io.BytesIO()
    pq.write_table(pa.table({"source": ["p"], "image": [files["x.png"]]}), sink)
    fs.pipe(f"{prefix}/shards/part-00000.parquet", sink.getvalue())
    s = imagesets.list_set(f"memory://{prefix}/shards")
    assert s.kind == "shards" and s.names == ["p"] and list(s.read([0])) == [files["x.png"]]


def test_stamps_from_store_entries():
    # calendar.timegm is the reference for seconds since the epoch of a UTC time.
    when = datetime.datetime(2024, 1, 2, 3, 4, 5, 678000, tzinfo=datetime.timezone.utc)
    ns = calendar.timegm(when.utctimetuple()) * 10**9 + 678_000_000
    assert stores.stamp({"size": 7, "LastModified": when}) == (7, ns)  # s3fs
    assert stores.stamp({"size": 7, "updated": "2024-01-02T03:04:05.678Z"}) == (7, ns)  # gcsfs, RFC 3339
    assert stores.stamp({"size": 7, "mtime": ns / 1e9})[1] == pytest.approx(ns, abs=1000)  # local, SFTP
    tag1 = stores.stamp({"size": 7, "ETag": '"9b2cf535f27731c974343645a3985328"'})[1]
    tag2 = stores.stamp({"size": 7, "ETag": '"0d599f0ec05c3bda8c3b8a68c32a1b47"'})[1]
    assert tag1 is not None and tag2 is not None and tag1 != tag2 and 0 <= tag1 < 2**63
    assert stores.stamp({"size": 7}) == (7, None)


def test_out_must_be_local(tmp_path, capsys):
    with pytest.raises(OutputError, match="local folder") as e:
        api.output_path("s3://bucket/out")
    assert "\n" not in str(e.value)
    assert api.output_path(f"file://{tmp_path}/out") == tmp_path / "out"  # RFC 8089
    from curate import cli

    (tmp_path / "c").mkdir()
    rc = cli.main(["run", "--input", str(tmp_path / "c"), "--out", "memory://out"])
    err = capsys.readouterr().err.strip()
    assert rc == 2 and len(err.splitlines()) == 1 and "local folder" in err


def test_a_memory_input_runs_end_to_end_in_process(tmp_path, mem):
    import sys

    sys.path.insert(0, str(Path(__file__).parent))
    from conftest import make_small_corpus

    fs, prefix = mem
    corpus = make_small_corpus(tmp_path / "c", n=12)
    for p in sorted(corpus.rglob("*")):
        if p.is_file():
            fs.pipe(f"{prefix}/c/{p.relative_to(corpus).as_posix()}", p.read_bytes())
    api.run(None, input=f"memory://{prefix}/c", out=str(tmp_path / "out"),
            sets=["embed.enabled=false", "agreement.enabled=false", "run.workers=1"])
    ledger = pq.read_table(tmp_path / "out" / "ledger.parquet").to_pylist()
    local = list_samples(InputConfig(path=str(corpus)))
    assert sorted(r["source"] for r in ledger) == local.column("source").to_pylist()
    assert all(r["width"] for r in ledger)  # every image was read back from the store and decoded


def test_cli_runs_with_file_urls(tmp_path):
    import sys

    sys.path.insert(0, str(Path(__file__).parent))
    from curate import cli

    from conftest import make_small_corpus

    corpus = make_small_corpus(tmp_path / "c", n=12)
    rc = cli.main(["run", "--input", f"file://{corpus}", "--out", f"file://{tmp_path}/out",
                   "--set", "embed.enabled=false", "--set", "agreement.enabled=false", "--set", "run.workers=1"])
    assert rc == 0
    ledger = pq.read_table(tmp_path / "out" / "ledger.parquet")
    assert sorted(ledger.column("source").to_pylist()) == list_samples(InputConfig(path=str(corpus))).column(
        "source").to_pylist()


def test_what_counts_as_a_url_and_what_stays_inside():
    # RFC 3986 sec. 3.1: a scheme is a letter followed by letters, digits, '+', '-' or '.'.
    assert stores.is_url("s3://b/k") and stores.is_url("git+ssh://h/x") and stores.is_url("memory://x")
    assert not stores.is_url("a.tar::b.jpg") and not stores.is_url("/data/s3://x") and not stores.is_url("3d://x")
    assert stores.is_url("simplecache::s3://b/k") and stores.scheme("simplecache::s3://b/k") == "simplecache"
    # paths on a store compare by name after '.' and '..' are resolved (POSIX pathname resolution)
    assert stores.inside("bucket/dir", "bucket/dir/x.png") and stores.inside("bucket/dir", "bucket/dir/a/../x")
    assert not stores.inside("bucket/dir", "bucket/dir/../x") and not stores.inside("bucket/dir", "bucket/dirx/y")
    assert not stores.inside("bucket/dir", "bucket/dir/../../etc/passwd")
    assert stores.inside("/", "/any/thing") and not stores.inside("/", "../x")
