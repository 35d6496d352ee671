"""Input readers: folder with sidecars, manifests, tar shards, dispatch and read_bytes.

Outside references used below: SHA-256 test vector (FIPS 180-2, appendix B.1);
GNU tar builds and lists archives independently of our reader; the unsafe
member kinds come from PEP 706 (tarfile extraction filters: absolute names,
`..` parts, links, devices) and the tar path-traversal flaw CVE-2007-4559;
Pillow writes and decodes the images; pyarrow/csv/json write the manifests.
"""
from __future__ import annotations

import csv
import hashlib
import io
import json
import os
import shutil
import subprocess
import tarfile
import tempfile
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from PIL import Image

from curate.config import InputConfig
from curate.errors import InputError
from curate.sources import (
    PROBLEM_CODES,
    SOURCE_SCHEMA,
    detect_format,
    list_samples,
    member_locator,
    read_bytes,
    split_locator,
    stable_id,
)

IS_ROOT = hasattr(os, "geteuid") and os.geteuid() == 0


def _img(path: Path, color=(176, 92, 48), size=(12, 8)) -> bytes:
    """A small Kilnworks-coloured image written by Pillow; returns its bytes."""
    path.parent.mkdir(parents=True, exist_ok=True)
    Image.new("RGB", size, color).save(path)
    return path.read_bytes()


def _png_bytes(color=(40, 90, 140), size=(6, 4)) -> bytes:
    buf = io.BytesIO()
    Image.new("RGB", size, color).save(buf, format="PNG")
    return buf.getvalue()


def _list(path, **kw) -> pa.Table:
    return list_samples(InputConfig(path=str(path), **kw))


def _by_source(table: pa.Table) -> dict[str, dict]:
    return {r["source"]: r for r in table.to_pylist()}


def _check_table(table: pa.Table) -> None:
    assert table.schema == SOURCE_SCHEMA
    sources = table.column("source").to_pylist()
    assert sources == sorted(sources)
    ids = table.column("sample_id").to_pylist()
    assert len(set(ids)) == len(ids)
    for col in ("source_problem", "caption_problem"):
        assert set(table.column(col).drop_null().to_pylist()) <= set(PROBLEM_CODES)


# ---------------------------------------------------------------- ids


def test_stable_id_matches_sha256_vector():
    # FIPS 180-2 appendix B.1: SHA-256("abc") = ba7816bf 8f01cfea 414140de ...
    assert stable_id("abc") == "ba7816bf8f01cfea"


# ---------------------------------------------------------------- folder


def _kilnworks_folder(root: Path) -> dict[str, bytes]:
    files = {
        "mugs/blue-mug.jpg": _img(root / "mugs/blue-mug.jpg", (40, 70, 160)),
        "mugs/teapot.PNG": _img(root / "mugs/teapot.PNG", (120, 160, 130)),
        "bowls/both.webp": _img(root / "bowls/both.webp"),
        "bowls/nocap.gif": _img(root / "bowls/nocap.gif"),
        "bowls/badjson.bmp": _img(root / "bowls/badjson.bmp"),
        "bowls/nofield.tif": _img(root / "bowls/nofield.tif"),
        "bowls/numcap.tiff": _img(root / "bowls/numcap.tiff"),
        "plates/latin1.jpeg": _img(root / "plates/latin1.jpeg"),
        "plates/dirsidecar.jpg": _img(root / "plates/dirsidecar.jpg"),
        "vases/UPPER.JPG": _img(root / "vases/UPPER.JPG"),
        "top.png": _img(root / "top.png"),
    }
    (root / "mugs/blue-mug.txt").write_text("a blue mug on linen", encoding="utf-8")
    (root / "mugs/teapot.json").write_text(json.dumps({"caption": "celadon teapot", "glaze": "celadon"}))
    (root / "bowls/both.txt").write_text("from the txt", encoding="utf-8")
    (root / "bowls/both.json").write_text(json.dumps({"caption": "from the json"}))
    (root / "bowls/badjson.json").write_text("{not json")
    (root / "bowls/nofield.json").write_text(json.dumps({"title": "speckled bowl"}))
    (root / "bowls/numcap.json").write_text(json.dumps({"caption": 5}))
    (root / "plates/latin1.txt").write_bytes(b"caf\xe9 plate")  # Latin-1, not valid UTF-8
    (root / "plates/dirsidecar.txt").mkdir()
    (root / "vases/UPPER.TXT").write_bytes("tall vase, tenmoku glaze".encode())
    (root / "top.txt").write_bytes(b"")
    (root / "notes.md").write_text("not an image")
    (root / "orphan.txt").write_text("a caption with no image")
    return files


def test_folder_lists_every_image_with_its_sidecar(tmp_path):
    root = tmp_path / "kilnworks"
    files = _kilnworks_folder(root)
    table = _list(root)
    _check_table(table)
    rows = _by_source(table)
    assert set(rows) == set(files)
    got = {s: (r["caption_raw"], r["caption_problem"]) for s, r in rows.items()}
    assert got == {
        "mugs/blue-mug.jpg": (b"a blue mug on linen", None),
        "mugs/teapot.PNG": (b"celadon teapot", None),
        "bowls/both.webp": (b"from the txt", None),  # .txt preferred over .json
        "bowls/nocap.gif": (None, "caption_missing"),
        "bowls/badjson.bmp": (None, "caption_unreadable"),
        "bowls/nofield.tif": (None, "caption_missing"),
        "bowls/numcap.tiff": (None, "caption_unreadable"),
        "plates/latin1.jpeg": (b"caf\xe9 plate", None),  # raw bytes kept, not decoded
        "plates/dirsidecar.jpg": (None, "caption_unreadable"),
        "vases/UPPER.JPG": ("tall vase, tenmoku glaze".encode(), None),
        "top.png": (b"", None),
    }
    for source, r in rows.items():
        path = root / source
        st_ = os.stat(path)
        assert r["locator"] == str(path) and os.path.isabs(r["locator"])
        assert r["file_size"] == st_.st_size and r["mtime_ns"] == st_.st_mtime_ns
        assert r["source_problem"] is None and r["meta"] is None
        assert r["sample_id"] == hashlib.sha256(source.encode()).hexdigest()[:16]
    # read_bytes gives back the exact bytes on disk, and Pillow decodes them
    locs = [rows[s]["locator"] for s in sorted(files)]
    datas = list(read_bytes(locs))
    assert datas == [files[s] for s in sorted(files)]
    assert Image.open(io.BytesIO(datas[0])).size == (12, 8)


def test_folder_json_with_non_utf8_bytes_keeps_them(tmp_path):
    _img(tmp_path / "jug.png")
    (tmp_path / "jug.json").write_bytes(b'{"caption": "jug \xff glaze"}')
    (r,) = _list(tmp_path).to_pylist()
    assert r["caption_raw"] == b"jug \xff glaze" and r["caption_problem"] is None


def test_folder_links(tmp_path):
    root, outside = tmp_path / "root", tmp_path / "outside"
    _img(outside / "secret.jpg")
    target = _img(outside / "target.png", size=(20, 10))
    plate = _img(root / "inner/plate.jpg")
    os.symlink(outside, root / "out_link")  # linked folder outside the root: never followed
    os.symlink(root / "inner", root / "inner_alias")  # linked folder inside the root: never followed
    os.symlink(outside / "target.png", root / "linked.png")  # linked file out of the root: refused
    os.symlink("inner/plate.jpg", root / "alias.jpg")  # linked file inside the root: followed
    os.symlink(root / "gone.jpg", root / "dangling.jpg")
    os.mkfifo(root / "pipe.jpg")
    table = _list(root)
    _check_table(table)
    rows = _by_source(table)
    assert set(rows) == {"inner/plate.jpg", "alias.jpg", "linked.png", "dangling.jpg", "pipe.jpg"}
    assert rows["linked.png"]["source_problem"] == "outside_root" and rows["linked.png"]["locator"] == ""
    assert rows["alias.jpg"]["source_problem"] is None
    assert rows["alias.jpg"]["locator"] == str(root / "inner/plate.jpg")  # the resolved path
    assert rows["dangling.jpg"]["source_problem"] == "unreadable"
    assert rows["pipe.jpg"]["source_problem"] == "special_file"
    out = list(read_bytes([rows["pipe.jpg"]["locator"], rows["linked.png"]["locator"],
                           rows["alias.jpg"]["locator"], str(root / "pipe.jpg")]))
    assert isinstance(out[0], Exception) and isinstance(out[1], Exception)
    assert out[2] == plate
    assert isinstance(out[3], OSError)  # a FIFO is refused, not opened or waited on
    # a user who means it may follow links out of the root
    rows = _by_source(_list(root, allow_outside_root=True))
    assert rows["linked.png"]["source_problem"] is None
    assert rows["linked.png"]["file_size"] == len(target)
    assert list(read_bytes([rows["linked.png"]["locator"]])) == [target]
    assert rows["pipe.jpg"]["source_problem"] == "special_file"  # never opened, allowed or not


def test_folder_dangling_sidecar_is_unreadable(tmp_path):
    _img(tmp_path / "bowl.jpg")
    os.symlink(tmp_path / "nowhere.txt", tmp_path / "bowl.txt")
    (r,) = _list(tmp_path).to_pylist()
    assert r["caption_problem"] == "caption_unreadable"


def test_folder_name_not_utf8_is_listed_as_name_not_utf8(tmp_path):
    name = os.fsdecode(b"glaze-\xff.png")
    (tmp_path / name).write_bytes(_png_bytes())
    (r,) = _list(tmp_path).to_pylist()
    assert r["source"] == "glaze-\\xff.png" and r["source_problem"] == "name_not_utf8"
    assert r["locator"] == ""


@pytest.mark.skipif(IS_ROOT, reason="root ignores file permissions")
def test_folder_permissions(tmp_path):
    root = tmp_path / "root"
    _img(root / "a.jpg")
    (root / "a.txt").write_text("plate")
    _img(root / "b.jpg")
    os.chmod(root / "a.txt", 0)
    os.chmod(root / "b.jpg", 0)
    try:
        rows = _by_source(_list(root))
        assert rows["a.jpg"]["caption_problem"] == "caption_unreadable"
        assert rows["b.jpg"]["source_problem"] == "unreadable"
        os.chmod(root, 0)
        with pytest.raises(InputError, match=str(root)):
            _list(root)
    finally:
        os.chmod(root, 0o755)
        os.chmod(root / "a.txt", 0o644)
        os.chmod(root / "b.jpg", 0o644)


# ---------------------------------------------------------------- manifests


def _manifest_rows(tmp_path: Path) -> list[dict]:
    _img(tmp_path / "imgs/mug.jpg")
    _img(tmp_path / "imgs/vase.png")
    absolute = tmp_path / "elsewhere/plate.jpg"
    _img(absolute)
    return [
        {"image": "imgs/mug.jpg", "caption": "speckled mug", "glaze": "speckle", "id": "kw-1"},
        {"image": "imgs/vase.png", "caption": "", "glaze": "shino", "id": "kw-2"},
        {"image": str(absolute), "caption": "white plate", "glaze": "", "id": "kw-3"},
        {"image": "imgs/missing.jpg", "caption": "lost teapot", "glaze": "ash", "id": "kw-4"},
    ]


def _write_manifests(tmp_path: Path, rows: list[dict]) -> dict[str, Path]:
    cols = list(rows[0])
    with open(tmp_path / "m.csv", "w", newline="", encoding="utf-8") as f:
        w = csv.DictWriter(f, fieldnames=cols)
        w.writeheader()
        w.writerows(rows)
    nulled = [{k: (v if v != "" else None) for k, v in r.items()} for r in rows]
    (tmp_path / "m.jsonl").write_text("".join(json.dumps(r) + "\n" for r in nulled))
    pq.write_table(pa.Table.from_pylist(nulled), tmp_path / "m.parquet")
    return {ext: tmp_path / f"m.{ext}" for ext in ("csv", "jsonl", "parquet")}


def test_manifest_three_formats_agree(tmp_path):
    paths = _write_manifests(tmp_path, _manifest_rows(tmp_path))
    tables = {ext: _list(p) for ext, p in paths.items()}
    for t in tables.values():
        _check_table(t)
    assert tables["csv"].equals(tables["jsonl"]) and tables["csv"].equals(tables["parquet"])
    rows = _by_source(tables["csv"])
    absolute = str(tmp_path / "elsewhere/plate.jpg")
    assert set(rows) == {"imgs/mug.jpg", "imgs/vase.png", absolute, "imgs/missing.jpg"}
    mug = rows["imgs/mug.jpg"]
    assert mug["locator"] == str(tmp_path / "imgs/mug.jpg")
    assert mug["caption_raw"] == b"speckled mug" and mug["caption_problem"] is None
    assert json.loads(mug["meta"]) == {"glaze": "speckle", "id": "kw-1"}
    assert mug["file_size"] == os.stat(tmp_path / "imgs/mug.jpg").st_size
    assert mug["sample_id"] == stable_id("imgs/mug.jpg")
    assert rows["imgs/vase.png"]["caption_raw"] is None
    assert rows["imgs/vase.png"]["caption_problem"] == "caption_missing"
    assert rows[absolute]["locator"] == absolute and rows[absolute]["source_problem"] is None
    assert json.loads(rows[absolute]["meta"])["glaze"] is None
    assert rows["imgs/missing.jpg"]["source_problem"] == "unreadable"
    assert rows["imgs/missing.jpg"]["file_size"] is None
    datas = list(read_bytes([mug["locator"], rows["imgs/missing.jpg"]["locator"]]))
    assert datas[0] == (tmp_path / "imgs/mug.jpg").read_bytes()
    assert isinstance(datas[1], FileNotFoundError)


def test_manifest_id_column(tmp_path):
    paths = _write_manifests(tmp_path, _manifest_rows(tmp_path))
    for p in paths.values():
        rows = _by_source(_list(p, id_column="id"))
        assert rows["imgs/mug.jpg"]["sample_id"] == hashlib.sha256(b"kw-1").hexdigest()[:16]
        # every column but the image and caption columns is kept as metadata, the id column too
        assert json.loads(rows["imgs/mug.jpg"]["meta"])["id"] == "kw-1"


def test_manifest_custom_column_names(tmp_path):
    _img(tmp_path / "a.png")
    (tmp_path / "m.jsonl").write_text(json.dumps({"file": "a.png", "alt": "bowl"}) + "\n")
    (r,) = _list(tmp_path / "m.jsonl", image_column="file", caption_column="alt").to_pylist()
    assert r["source"] == "a.png" and r["caption_raw"] == b"bowl" and r["meta"] is None


def test_manifest_duplicate_id_marks_every_row(tmp_path):
    _img(tmp_path / "a.png")
    _img(tmp_path / "b.png")
    _img(tmp_path / "c.png")
    lines = [{"image": "a.png", "caption": "x", "id": "kw-7"}, {"image": "b.png", "caption": "y", "id": "kw-7"},
             {"image": "c.png", "caption": "z", "id": "kw-8"}]
    (tmp_path / "m.jsonl").write_text("".join(json.dumps(r) + "\n" for r in lines))
    table = _list(tmp_path / "m.jsonl", id_column="id")
    _check_table(table)
    rows = _by_source(table)
    base = stable_id("kw-7")
    assert {s: (r["sample_id"], r["source_problem"]) for s, r in rows.items()} == {
        "a.png": (f"{base}-1", "source_duplicate"),  # in manifest row order
        "b.png": (f"{base}-2", "source_duplicate"),
        "c.png": (stable_id("kw-8"), None),
    }


def test_manifest_duplicate_image_without_id_marks_every_row(tmp_path):
    _img(tmp_path / "a.png")
    _img(tmp_path / "b.png")
    (tmp_path / "m.csv").write_text("image,caption\na.png,one\n./a.png,two\nb.png,three\n")
    table = _list(tmp_path / "m.csv")
    _check_table(table)
    got = [(r["source"], r["caption_raw"], r["source_problem"]) for r in table.to_pylist()]
    assert got == [("a.png", b"one", "source_duplicate"), ("a.png", b"two", "source_duplicate"),
                   ("b.png", b"three", None)]


def test_manifest_missing_column_names_it_and_the_columns(tmp_path):
    (tmp_path / "m.csv").write_text("path,text\na.png,bowl\n")
    with pytest.raises(InputError) as e:
        _list(tmp_path / "m.csv")
    msg = str(e.value)
    assert "'image'" in msg and "'path'" in msg and "'text'" in msg and "\n" not in msg


def test_manifest_csv_keeps_invalid_utf8_caption_bytes(tmp_path):
    _img(tmp_path / "a.png")
    (tmp_path / "m.csv").write_bytes(b"image,caption\na.png,caf\xe9 bowl\n")
    (r,) = _list(tmp_path / "m.csv").to_pylist()
    assert r["caption_raw"] == b"caf\xe9 bowl"


def test_manifest_bad_jsonl_line_names_it(tmp_path):
    (tmp_path / "m.jsonl").write_text('{"image": "a.png", "caption": "x"}\n\n{oops\n')
    with pytest.raises(InputError, match="line 3"):
        _list(tmp_path / "m.jsonl")


def test_manifest_row_without_image_path(tmp_path):
    (tmp_path / "m.jsonl").write_text(json.dumps({"image": None, "caption": "x"}) + "\n")
    (r,) = _list(tmp_path / "m.jsonl").to_pylist()
    assert r["source_problem"] == "image_path_missing" and "row 1" in r["source"] and r["locator"] == ""


# ---------------------------------------------------------------- tar


def _add(tf: tarfile.TarFile, name: str, data: bytes, mtime: int = 1_700_000_000, **kw) -> None:
    info = tarfile.TarInfo(name)
    info.size = len(data)
    info.mtime = mtime
    for k, v in kw.items():
        setattr(info, k, v)
    tf.addfile(info, io.BytesIO(data))


def _shard(path: Path, members: list[tuple[str, bytes]]) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    with tarfile.open(path, "w", format=tarfile.PAX_FORMAT) as tf:
        for i, (name, data) in enumerate(members):
            _add(tf, name, data, mtime=1_700_000_000 + i)


def test_tar_groups_members_by_key(tmp_path):
    a, b, c = _png_bytes((200, 60, 40)), _png_bytes((30, 30, 30)), _png_bytes((240, 240, 230))
    _shard(
        tmp_path / "shard-000.tar",
        [
            ("kw/0001.jpg", a),
            ("kw/0001.txt", b"rust glaze mug"),
            ("kw/0002.json", json.dumps({"caption": "black bowl"}).encode()),
            ("kw/0002.png", b),
            ("kw/0003.webp", c),
            ("./kw/0004.jpg", a),
            ("kw/0005.jpg", a),
            ("kw/0005.png", b),
            ("kw/0005.txt", b"two views"),
            ("kw/lonely.txt", b"no image"),
        ],
    )
    table = _list(tmp_path / "shard-000.tar")
    _check_table(table)
    rows = _by_source(table)
    assert set(rows) == {
        "shard-000.tar/kw/0001",
        "shard-000.tar/kw/0002",
        "shard-000.tar/kw/0003",
        "shard-000.tar/kw/0004",
        "shard-000.tar/kw/0005.jpg",
        "shard-000.tar/kw/0005.png",
    }
    r1 = rows["shard-000.tar/kw/0001"]
    assert r1["caption_raw"] == b"rust glaze mug" and r1["source_problem"] is None
    with tarfile.open(tmp_path / "shard-000.tar") as tf:
        offsets = {m.name: m.offset for m in tf.getmembers()}
    assert r1["locator"] == member_locator(str(tmp_path / "shard-000.tar"), offsets["kw/0001.jpg"], "kw/0001.jpg")
    assert split_locator(r1["locator"]) == (str(tmp_path / "shard-000.tar"), offsets["kw/0001.jpg"], "kw/0001.jpg")
    assert r1["file_size"] == len(a) and r1["mtime_ns"] == 1_700_000_000 * 10**9
    assert rows["shard-000.tar/kw/0002"]["caption_raw"] == b"black bowl"
    assert rows["shard-000.tar/kw/0003"]["caption_problem"] == "caption_missing"
    assert rows["shard-000.tar/kw/0004"]["locator"].endswith("\0./kw/0004.jpg")
    assert rows["shard-000.tar/kw/0005.png"]["caption_raw"] == b"two views"
    got = list(read_bytes([rows[s]["locator"] for s in sorted(rows)]))
    assert got == [a, b, c, a, a, b]


def test_tar_folder_of_shards(tmp_path):
    root = tmp_path / "shards"
    _shard(root / "a.tar", [("x.png", _png_bytes()), ("x.txt", b"plate")])
    _shard(root / "sub/b.tar", [("y.png", _png_bytes()), ("y.json", b'{"caption": "vase"}')])
    assert detect_format(str(root)) == "tar"
    rows = _by_source(_list(root))
    assert set(rows) == {"a.tar/x", "sub/b.tar/y"}
    assert rows["sub/b.tar/y"]["caption_raw"] == b"vase"


def test_tar_unreadable_archives_get_a_row(tmp_path):
    root = tmp_path / "shards"
    root.mkdir()
    (root / "bad.tar").write_bytes(b"this is not a tar archive" * 40)
    big = os.urandom(20000)
    _shard(root / "cut.tar", [("a.png", _png_bytes()), ("b.png", big), ("c.png", big)])
    data = (root / "cut.tar").read_bytes()
    (root / "cut.tar").write_bytes(data[: len(data) // 2])
    _shard(root / "mid.tar", [("a.png", _png_bytes()), ("b.png", _png_bytes()), ("c.png", _png_bytes())])
    with tarfile.open(root / "mid.tar") as tf:
        second = tf.getmembers()[1].offset
    with open(root / "mid.tar", "r+b") as f:  # overwrite the second member's header
        f.seek(second)
        f.write(b"kilnworks damaged header " * 20)
    rows = _by_source(_list(root, format="tar"))
    assert rows["bad.tar"]["source_problem"] == "unreadable"
    assert rows["mid.tar"]["source_problem"] == "unreadable"
    assert rows["mid.tar/a"]["source_problem"] is None and "mid.tar/b" not in rows
    assert rows["cut.tar"]["source_problem"] == "unreadable"
    assert rows["cut.tar/a"]["source_problem"] is None
    assert list(read_bytes([rows["cut.tar/a"]["locator"]])) == [_png_bytes()]
    with pytest.raises(InputError, match="bad.tar"):
        _list(root / "bad.tar")


def _tree(path: Path) -> set[str]:
    return {str(p.relative_to(path)) for p in path.rglob("*")}


def test_tar_path_traversal_is_never_extracted(tmp_path, monkeypatch):
    # PEP 706 / CVE-2007-4559: absolute names, `..` parts, links and devices
    # in a tar can write outside the extraction folder. We list them as
    # unsafe_path rows and never read or write them.
    sandbox = tmp_path / "sandbox"
    work = sandbox / "work"
    work.mkdir(parents=True)
    shard = work / "evil.tar"
    good = _png_bytes()
    with tarfile.open(shard, "w", format=tarfile.PAX_FORMAT) as tf:
        _add(tf, "../evil.jpg", good)
        _add(tf, "../evil.txt", b"caption of evil")
        _add(tf, "/abs.jpg", good)
        _add(tf, "kw/../../up.png", good)
        _add(tf, "link.jpg", b"", type=tarfile.SYMTYPE, linkname="/etc/passwd")
        _add(tf, "hard.jpg", b"", type=tarfile.LNKTYPE, linkname="../evil.jpg")
        _add(tf, "dev.jpg", b"", type=tarfile.CHRTYPE, devmajor=1, devminor=3)
        _add(tf, "safe.png", good)
    abs_existed = os.path.exists("/abs.jpg")
    before = _tree(tmp_path)
    monkeypatch.chdir(work)
    table = _list(shard)
    rows = _by_source(table)
    unsafe = {s for s, r in rows.items() if r["source_problem"] == "unsafe_path"}
    assert unsafe == {
        "evil.tar/../evil",
        "evil.tar//abs",
        "evil.tar/kw/../../up",
        "evil.tar/link",
        "evil.tar/hard",
        "evil.tar/dev",
    }
    assert rows["evil.tar/safe"]["source_problem"] is None
    assert rows["evil.tar/../evil"]["caption_raw"] is None  # its caption member is never read
    out = list(read_bytes(table.column("locator").to_pylist()))
    for source, data in zip(table.column("source").to_pylist(), out):
        if source in unsafe:
            assert isinstance(data, Exception)
        else:
            assert data == good
    assert _tree(tmp_path) == before
    assert not (sandbox / "evil.jpg").exists() and not (tmp_path / "up.png").exists()
    assert os.path.exists("/abs.jpg") == abs_existed


@pytest.mark.skipif(shutil.which("tar") is None, reason="needs the tar command")
def test_tar_made_by_gnu_tar_matches_the_folder_listing(tmp_path):
    # GNU tar writes the archive (./-prefixed names); our tar reader must
    # list the same samples and captions as our folder reader on the tree.
    root = tmp_path / "kilnworks"
    _kilnworks_folder(root)
    (root / "plates/dirsidecar.txt").rmdir()
    (root / "bowls/both.webp").unlink()  # one image per key: drop stem clashes
    shard = tmp_path / "out/shard.tar"
    shard.parent.mkdir()
    subprocess.run(["tar", "-cf", str(shard), "-C", str(root), "."], check=True)
    names = subprocess.run(["tar", "-tf", str(shard)], check=True, capture_output=True, text=True).stdout.split()
    folder = _by_source(_list(root))
    tar = _by_source(_list(shard))
    image_exts = (".jpg", ".jpeg", ".png", ".gif", ".bmp", ".tif", ".tiff", ".webp")
    assert len(tar) == sum(1 for n in names if os.path.splitext(n)[1].lower() in image_exts)
    assert set(tar) == {"shard.tar/" + os.path.splitext(s)[0] for s in folder}
    for s, r in folder.items():
        t = tar["shard.tar/" + os.path.splitext(s)[0]]
        assert (t["caption_raw"], t["caption_problem"]) == (r["caption_raw"], r["caption_problem"])
        assert t["file_size"] == r["file_size"]
        assert list(read_bytes([t["locator"]])) == list(read_bytes([r["locator"]]))


# ---------------------------------------------------------------- dispatch


def test_detect_format(tmp_path):
    mixed = tmp_path / "mixed"
    _img(mixed / "a.png")
    _shard(mixed / "s.tar", [("b.png", _png_bytes())])
    assert detect_format(str(mixed)) == "folder"
    assert set(_by_source(_list(mixed))) == {"a.png"}  # the .tar is not a sample of a folder
    (tmp_path / "empty").mkdir()
    assert detect_format(str(tmp_path / "empty")) == "folder"
    assert _list(tmp_path / "empty").num_rows == 0
    (tmp_path / "m.parquet").write_bytes(b"")
    assert detect_format(str(tmp_path / "m.parquet")) == "manifest"
    assert detect_format(str(mixed / "s.tar")) == "tar"


@pytest.mark.parametrize(
    ("make", "kw", "pattern"),
    [
        (None, {}, "does not exist"),
        ("x.jpg", {}, "unknown kind"),
        ("x.txt", {"format": "manifest"}, "manifest"),
        ("x.csv", {"format": "folder"}, "not a folder"),
        ("x.csv", {"format": "tar"}, "tar"),
    ],
)
def test_bad_roots_are_input_errors(tmp_path, make, kw, pattern):
    path = tmp_path / (make or "missing")
    if make:
        path.write_bytes(b"x")
    with pytest.raises(InputError, match=pattern) as e:
        _list(path, **kw)
    assert str(path) in str(e.value) and "\n" not in str(e.value)


def test_empty_input_path_is_an_error():
    with pytest.raises(InputError, match="input.path"):
        list_samples(InputConfig(path=""))


def test_bad_parquet_is_an_input_error(tmp_path):
    (tmp_path / "m.parquet").write_bytes(b"PAR1 broken")
    with pytest.raises(InputError, match="m.parquet"):
        _list(tmp_path / "m.parquet")


# ---------------------------------------------------------------- read_bytes


def test_read_bytes_order_errors_and_one_open_per_archive(tmp_path, monkeypatch):
    import curate.sources as sources

    p, q = _png_bytes((1, 2, 3)), _png_bytes((9, 8, 7))
    _shard(tmp_path / "a.tar", [("p.png", p), ("q.png", q)])
    _shard(tmp_path / "b.tar", [("q.png", q)])
    plain = tmp_path / "plain.png"
    plain.write_bytes(p)
    opened: list[str] = []
    real = sources.open_members

    def counting(path):
        opened.append(path)
        return real(path)

    monkeypatch.setattr(sources, "open_members", counting)
    a, b = tmp_path / "a.tar", tmp_path / "b.tar"
    with tarfile.open(a) as tf:
        at = {m.name: m.offset for m in tf.getmembers()}
    with tarfile.open(b) as tf:
        bt = {m.name: m.offset for m in tf.getmembers()}
    locs = [
        member_locator(str(a), at["p.png"], "p.png"),
        member_locator(str(b), bt["q.png"], "q.png"),
        str(plain),
        member_locator(str(a), at["q.png"], "q.png"),
        member_locator(str(a), at["q.png"], "p.png"),  # the name must match the member at that offset
        str(tmp_path / "gone.png"),
        member_locator(str(tmp_path / "gone.tar"), 0, "x.png"),
        member_locator(str(a), at["p.png"], "p.png"),
        f"{a}\0x\0p.png",  # a malformed member locator
        "",  # an entry that is never read
    ]
    out = list(read_bytes(locs))
    assert len(out) == len(locs)
    assert out[:4] == [p, q, p, q] and out[7] == p
    assert isinstance(out[4], KeyError)
    assert isinstance(out[5], FileNotFoundError)
    assert isinstance(out[6], FileNotFoundError)
    assert isinstance(out[8], ValueError) and isinstance(out[9], ValueError)
    assert sorted(opened) == sorted([str(a), str(b)])  # each archive opened once; a missing one never
    assert list(read_bytes([])) == []


# ---------------------------------------------------------------- stability


def test_ids_stable_across_listings_and_root_locations(tmp_path):
    first = tmp_path / "first"
    _kilnworks_folder(first)
    _shard(first / "shards/s.tar", [("k.png", _png_bytes()), ("k.txt", b"mug")])
    man = tmp_path / "man"
    _write_manifests(man, _manifest_rows(man))
    for src in (first, man):
        dst = tmp_path / "moved" / "deeper" / src.name
        shutil.copytree(src, dst, symlinks=True)
        for rel in (".", "shards", "m.csv", "m.jsonl"):
            if not (src / rel).exists():
                continue
            t1, t2, moved = _list(src / rel), _list(src / rel), _list(dst / rel)
            assert t1.equals(t2)
            keep = ["sample_id", "source", "caption_raw", "caption_problem", "file_size"]
            if rel.startswith("m."):  # the manifest's absolute path moves with it
                keep = ["sample_id", "caption_raw", "caption_problem"]
            assert t1.select(keep).equals(moved.select(keep)), rel


_SEGMENT = st.text(alphabet="abcXYZ019 -_éü中", min_size=1, max_size=6)


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    paths=st.lists(
        st.tuples(
            st.lists(_SEGMENT, min_size=0, max_size=2),
            _SEGMENT,
            st.sampled_from([".jpg", ".JPG", ".png", ".Webp", ".tiff", ".gif", ".txt"]),
        ),
        max_size=12,
    )
)
def test_listing_is_sorted_with_unique_ids(paths):
    # Property (common practice for deterministic listings): any tree lists in
    # source order, one row per image file, with unique ids equal to stable_id(source).
    data = _PNG
    with tempfile.TemporaryDirectory() as d:
        root = Path(d)
        images = set()
        for parts, stem, ext in paths:
            rel = "/".join([*parts, stem + ext])
            try:
                (root / rel).parent.mkdir(parents=True, exist_ok=True)
                if (root / rel).exists():
                    continue
                (root / rel).write_bytes(data)
            except (FileExistsError, NotADirectoryError, IsADirectoryError):
                continue
            if ext != ".txt":
                images.add(rel)
        table = list_samples(InputConfig(path=d, format="folder"))
        _check_table(table)
        sources = table.column("source").to_pylist()
        assert sorted(sources) == sorted(images)
        assert table.column("sample_id").to_pylist() == [stable_id(s) for s in sources]


_PNG = _png_bytes()


# ---------------------------------------------------------------- one input, one identity


def _member_bytes(path: Path) -> dict[int, bytes]:
    """Every regular member's bytes by header offset, read by Python's tarfile (the reference reader)."""
    with tarfile.open(path) as tf:
        return {m.offset: tf.extractfile(m).read() for m in tf.getmembers() if m.isfile()}


def _own_bytes_read_back(table: pa.Table, path: Path) -> None:
    """Each row's locator reads back the bytes of the very member it was listed from."""
    members = _member_bytes(path)
    locs = table.column("locator").to_pylist()
    for loc, data in zip(locs, read_bytes(locs)):
        assert data == members[split_locator(loc)[1]]


def test_tar_members_that_share_a_source_each_get_a_row_and_a_reason(tmp_path):
    # k.jpg.png has key "k.jpg"; k.jpg and k.png share key "k", so they are named
    # k.jpg and k.png: two inputs end up named "t.tar/k.jpg".
    png, other, text = _png_bytes((10, 20, 30)), _png_bytes((200, 100, 0)), b"plain text, not a picture"
    _shard(tmp_path / "t.tar", [("k.jpg.png", png), ("k.jpg", text), ("k.png", other), ("k.txt", b"a mug")])
    table = _list(tmp_path / "t.tar")
    _check_table(table)
    rows = table.to_pylist()
    assert len(rows) == 3  # one row per image member
    got = sorted((r["source"], r["source_problem"]) for r in rows)
    assert got == [("t.tar/k.jpg", "source_duplicate"), ("t.tar/k.jpg", "source_duplicate"), ("t.tar/k.png", None)]
    base = stable_id("t.tar/k.jpg")
    assert sorted(r["sample_id"] for r in rows if r["source_problem"]) == [f"{base}-1", f"{base}-2"]
    assert _by_source(table)["t.tar/k.png"]["sample_id"] == stable_id("t.tar/k.png")
    _own_bytes_read_back(table, tmp_path / "t.tar")
    # k.jpg.png is listed first in the archive, so it is -1; its locator reads the PNG, not the text
    first = next(r for r in rows if r["sample_id"] == f"{base}-1")
    assert list(read_bytes([first["locator"]])) == [png]


@pytest.mark.parametrize("names", [("./x.jpg", "x.jpg"), ("a//b.jpg", "a/b.jpg"), ("r.jpg", "r.jpg")])
def test_tar_names_that_normalise_alike_are_all_kept_and_marked(tmp_path, names):
    one, two = _png_bytes((1, 1, 1)), _png_bytes((250, 250, 250))
    _shard(tmp_path / "t.tar", [(names[0], one), (names[1], two), ("keep.png", one)])
    table = _list(tmp_path / "t.tar")
    _check_table(table)
    rows = table.to_pylist()
    assert len(rows) == 3
    dups = [r for r in rows if r["source_problem"] == "source_duplicate"]
    assert len(dups) == 2 and len({r["source"] for r in dups}) == 1
    assert _by_source(table)["t.tar/keep"]["source_problem"] is None
    assert sorted(d for d in read_bytes([r["locator"] for r in dups])) == sorted([one, two])
    _own_bytes_read_back(table, tmp_path / "t.tar")


def test_tar_caption_held_by_two_members_is_ambiguous(tmp_path):
    _shard(tmp_path / "t.tar", [("c.png", _png_bytes()), ("./c.txt", b"one"), ("c.txt", b"two"),
                                ("d.png", _png_bytes()), ("d.TXT", b"upper"), ("d.txt", b"lower")])
    rows = _by_source(_list(tmp_path / "t.tar"))
    assert (rows["t.tar/c"]["caption_raw"], rows["t.tar/c"]["caption_problem"]) == (None, "caption_duplicate")
    assert rows["t.tar/d"]["caption_raw"] == b"lower"  # two spellings: the lower-case one, as in folders


def test_folder_names_that_escape_alike_are_both_marked(tmp_path):
    raw = os.fsdecode(b"inv\xffname.jpg")  # a byte that is not UTF-8
    (tmp_path / raw).write_bytes(_png_bytes((9, 9, 9)))
    literal = _png_bytes((99, 99, 99))
    (tmp_path / "inv\\xffname.jpg").write_bytes(literal)  # the same text, spelled with a backslash
    (tmp_path / "other.jpg").write_bytes(literal)
    table = _list(tmp_path)
    _check_table(table)
    rows = table.to_pylist()
    assert len(rows) == 3
    dups = [r for r in rows if r["source_problem"] == "source_duplicate"]
    assert [r["source"] for r in dups] == ["inv\\xffname.jpg"] * 2
    base = stable_id("inv\\xffname.jpg")
    # numbered by the raw name bytes: the backslash (0x5c) sorts before 0xff
    by_id = {r["sample_id"]: r for r in dups}
    assert set(by_id) == {f"{base}-1", f"{base}-2"}
    assert list(read_bytes([by_id[f"{base}-1"]["locator"]])) == [literal]
    assert by_id[f"{base}-2"]["locator"] == ""


_MEMBER_NAMES = st.lists(
    st.tuples(
        st.sampled_from(["", "./", "a/", "a//", "./a/", "b/./"]),
        st.sampled_from(["k", "k.jpg", "k.png", "m", "x.y"]),
        st.sampled_from([".jpg", ".png", ".PNG", ".txt", ".json", ".bin"]),
    ),
    min_size=1,
    max_size=10,
)


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(members=_MEMBER_NAMES)
def test_every_tar_image_member_is_one_row_that_reads_its_own_bytes(members):
    # Property (one input, one identity): whatever the names, every image
    # member gets exactly one row, ids are unique, rows that share a source are all marked,
    # and each row reads back its own member's bytes (Python's tarfile is the reference).
    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "t.tar"
        entries = [(f"{p}{stem}{ext}", f"member {i}".encode()) for i, (p, stem, ext) in enumerate(members)]
        _shard(path, entries)
        table = _list(path)
        _check_table(table)
        image_members = [n for n, _ in entries if os.path.splitext(n)[1].lower() in (".jpg", ".png")]
        assert table.num_rows == len(image_members)
        sources = table.column("source").to_pylist()
        for r in table.to_pylist():
            shared = sources.count(r["source"]) > 1
            assert (r["source_problem"] == "source_duplicate") == shared
        _own_bytes_read_back(table, path)


# ---------------------------------------------------------------- names carry no syntax


def test_a_file_named_like_an_archive_member_is_read_as_itself(tmp_path):
    inside, itself = _png_bytes((5, 5, 5)), _png_bytes((250, 5, 5))
    _shard(tmp_path / "a.tar", [("b.jpg", inside)])
    (tmp_path / "a.tar::b.jpg").write_bytes(itself)
    (r,) = _list(tmp_path).to_pylist()  # a folder with images: the .tar is not listed
    assert r["source"] == "a.tar::b.jpg" and r["source_problem"] is None
    assert split_locator(r["locator"]) is None
    assert list(read_bytes([r["locator"]])) == [itself]


def test_a_manifest_path_cannot_forge_a_member_locator(tmp_path):
    _shard(tmp_path / "a.tar", [("b.jpg", _png_bytes())])
    forged = member_locator(str(tmp_path / "a.tar"), 0, "b.jpg")
    (tmp_path / "m.jsonl").write_text(json.dumps({"image": forged, "caption": "x"}) + "\n")
    (r,) = _list(tmp_path / "m.jsonl").to_pylist()
    assert r["source_problem"] == "unreadable" and r["locator"] == ""
    assert isinstance(next(read_bytes([r["locator"]])), Exception)


# ---------------------------------------------------------------- manifest rows and file sizes


def test_csv_ragged_rows_get_a_reason_and_the_rest_is_read(tmp_path):
    _img(tmp_path / "a.png")
    _img(tmp_path / "b.png")
    _img(tmp_path / "c.png")
    (tmp_path / "m.csv").write_text(
        "image,caption\n"
        "a.png,a mug, glazed blue\n"  # an unquoted comma: three cells for two columns
        "b.png,\"a bowl, glazed green\"\n"  # quoted (RFC 4180 sec. 2.6): one cell
        "c.png\n"  # one cell
    )
    table = _list(tmp_path / "m.csv")
    _check_table(table)
    rows = table.to_pylist()
    assert len(rows) == 3
    by = {r["source"]: r for r in rows}
    assert by["b.png"]["caption_raw"] == b"a bowl, glazed green" and by["b.png"]["source_problem"] is None
    ragged = [r for r in rows if r["source_problem"] == "row_ragged"]
    assert [r["source"] for r in ragged] == ["(row 1: 3 cells, header has 2)", "(row 3: 1 cells, header has 2)"]
    assert json.loads(ragged[0]["meta"]) == {"cells": ["a.png", "a mug", " glazed blue"]}
    assert all(r["locator"] == "" and r["caption_raw"] is None for r in ragged)


@pytest.mark.parametrize(
    ("text", "pattern"),
    [
        ("image,caption,image\na.png,x,y\n", "column 'image' twice"),
        ("image,caption\na.png,\"never closed\nb.png,x\n", "line"),  # RFC 4180: a quoted cell must close
    ],
)
def test_csv_whose_structure_is_broken_is_an_input_error(tmp_path, text, pattern):
    (tmp_path / "m.csv").write_text(text)
    with pytest.raises(InputError, match=pattern) as e:
        _list(tmp_path / "m.csv")
    assert "m.csv" in str(e.value) and "\n" not in str(e.value)


def test_a_huge_sparse_file_is_never_read(tmp_path):
    # A 3 GiB sparse file costs no disk; reading it whole would cost 3 GiB of memory.
    huge = tmp_path / "huge.jpg"
    with open(huge, "wb") as f:
        f.truncate(3 << 30)
    _img(tmp_path / "small.png")
    rows = _by_source(_list(tmp_path))
    r = rows["huge.jpg"]
    assert r["source_problem"] == "file_too_large" and r["file_size"] == 3 << 30
    assert rows["small.png"]["source_problem"] is None
    for out in (read_bytes([r["locator"]]), read_bytes([r["locator"]], max_bytes=1 << 20)):
        (data,) = list(out)
        assert isinstance(data, OSError) and "limit" in str(data)


def test_max_file_bytes_applies_to_every_input_kind(tmp_path):
    big = _img(tmp_path / "big.png", size=(64, 64))
    small = _img(tmp_path / "small.png", size=(1, 1))
    cap = (len(big) + len(small)) // 2
    assert len(small) <= cap < len(big)
    rows = _by_source(_list(tmp_path, max_file_bytes=cap))
    assert rows["big.png"]["source_problem"] == "file_too_large" and rows["small.png"]["source_problem"] is None
    (tmp_path / "m.jsonl").write_text("".join(json.dumps({"image": n, "caption": "x"}) + "\n"
                                              for n in ("big.png", "small.png")))
    rows = _by_source(_list(tmp_path / "m.jsonl", max_file_bytes=cap))
    assert rows["big.png"]["source_problem"] == "file_too_large" and rows["small.png"]["source_problem"] is None
    _shard(tmp_path / "s/t.tar", [("big.png", big), ("small.png", small)])
    table = _list(tmp_path / "s/t.tar", max_file_bytes=cap)
    rows = _by_source(table)
    assert rows["t.tar/big"]["source_problem"] == "file_too_large" and rows["t.tar/small"]["source_problem"] is None
    out = list(read_bytes(table.column("locator").to_pylist(), max_bytes=cap))
    assert isinstance(out[0], ValueError) and out[1] == small
    with pytest.raises(Exception, match="max_file_bytes"):
        _list(tmp_path, max_file_bytes=0)


# ---------------------------------------------------------------- the input root


def test_caption_sidecar_linked_out_of_the_root_is_not_read(tmp_path):
    root, outside = tmp_path / "root", tmp_path / "outside"
    outside.mkdir()
    (outside / "passwd").write_text("root:x:0:0:root:/root:/bin/sh\n")  # stands in for a system file
    _img(root / "mug.jpg")
    os.symlink(outside / "passwd", root / "mug.txt")
    _img(root / "bowl.jpg")
    (root / "captions").mkdir()
    (root / "captions/bowl.txt").write_text("a blue bowl")
    os.symlink("captions/bowl.txt", root / "bowl.txt")  # a link that stays inside the root
    table = _list(root)
    _check_table(table)
    rows = _by_source(table)
    assert (rows["mug.jpg"]["caption_raw"], rows["mug.jpg"]["caption_problem"]) == (None, "caption_outside_root")
    assert rows["bowl.jpg"]["caption_raw"] == b"a blue bowl"
    rows = _by_source(_list(root, allow_outside_root=True))
    assert rows["mug.jpg"]["caption_raw"].startswith(b"root:x:0")


def test_manifest_paths_out_of_the_root_are_refused(tmp_path):
    root = tmp_path / "root"
    inside = _img(root / "imgs/in.png")
    outside = _img(tmp_path / "elsewhere/out.png")
    entries = {
        "abs_out": str(tmp_path / "elsewhere/out.png"),
        "up": "../elsewhere/out.png",
        "proc": "/proc/self/environ",  # a process environment file
        "abs_in": str(root / "imgs/in.png"),
        "in_and_up": "imgs/../imgs/in.png",
    }
    os.symlink(tmp_path / "elsewhere/out.png", root / "imgs/link_out.png")
    entries["link_out"] = "imgs/link_out.png"
    (root / "m.jsonl").write_text("".join(json.dumps({"image": p, "caption": k, "id": k}) + "\n"
                                          for k, p in entries.items()))
    table = _list(root / "m.jsonl", id_column="id")
    _check_table(table)
    rows = {r["caption_raw"].decode(): r for r in table.to_pylist()}
    for k in ("abs_out", "up", "proc", "link_out"):
        assert rows[k]["source_problem"] == "outside_root" and rows[k]["locator"] == "", k
        assert rows[k]["file_size"] is None
    for k in ("abs_in", "in_and_up"):
        assert rows[k]["source_problem"] is None, k
        assert list(read_bytes([rows[k]["locator"]])) == [inside]
    rows = {r["caption_raw"].decode(): r for r in _list(root / "m.jsonl", id_column="id",
                                                         allow_outside_root=True).to_pylist()}
    assert list(read_bytes([rows["up"]["locator"], rows["link_out"]["locator"]])) == [outside, outside]


def test_tar_shards_linked_out_of_the_root_are_refused(tmp_path):
    root = tmp_path / "shards"
    _shard(root / "a.tar", [("x.png", _png_bytes())])
    _shard(tmp_path / "elsewhere/b.tar", [("y.png", _png_bytes())])
    os.symlink(tmp_path / "elsewhere/b.tar", root / "b.tar")
    os.mkfifo(root / "c.tar")
    rows = _by_source(_list(root, format="tar"))
    assert rows["a.tar/x"]["source_problem"] is None
    assert rows["b.tar"]["source_problem"] == "outside_root" and "b.tar/y" not in rows
    assert rows["c.tar"]["source_problem"] == "special_file"
    rows = _by_source(_list(root, format="tar", allow_outside_root=True))
    assert rows["b.tar/y"]["source_problem"] is None


def test_special_files_are_never_opened(tmp_path, monkeypatch):
    # A FIFO would block a reader and a device can act on open (common practice:
    # never open what is not a regular file). Every open is recorded and checked.
    root = tmp_path / "root"
    _img(root / "ok.png")
    os.mkfifo(root / "pipe.jpg")
    os.mkfifo(root / "ok.txt")  # a FIFO sidecar
    os.mkfifo(root / "cap.jsonl")
    os.symlink("/dev/zero", root / "zero.jpg")
    (root / "m.jsonl").write_text("".join(json.dumps({"image": n, "caption": "x"}) + "\n"
                                          for n in ("pipe.jpg", "zero.jpg", "ok.png")))
    opened: list[str] = []
    real_open = os.open

    def spy(path, flags, *a, **kw):
        opened.append(os.path.realpath(path))
        return real_open(path, flags, *a, **kw)

    monkeypatch.setattr(os, "open", spy)
    special = {os.path.realpath(root / n) for n in ("pipe.jpg", "ok.txt", "cap.jsonl")} | {"/dev/zero"}
    for kw in ({}, {"allow_outside_root": True}):
        rows = _by_source(_list(root, **kw))
        assert rows["pipe.jpg"]["source_problem"] == "special_file"
        assert rows["zero.jpg"]["source_problem"] == ("special_file" if kw else "outside_root")
        assert rows["ok.png"]["caption_problem"] == "caption_unreadable"
        list(read_bytes([r["locator"] for r in rows.values()] + [str(root / "pipe.jpg"), "/dev/zero"]))
        rows = _by_source(_list(root / "m.jsonl", **kw))
        assert rows["pipe.jpg"]["source_problem"] == "special_file"
        assert rows["zero.jpg"]["source_problem"] == ("special_file" if kw else "outside_root")
    assert not special & set(opened), special & set(opened)
    with pytest.raises(InputError, match="not a folder or a regular file"):
        _list(root / "cap.jsonl")


# ---------------------------------------------------------------- streaming: order, batches, exact duplicates


def _streamed(path, batch_rows=2, **kw) -> list[dict]:
    from curate.sources import iter_samples

    batches = list(iter_samples(InputConfig(path=str(path), **kw), batch_rows=batch_rows))
    assert all(b.schema == SOURCE_SCHEMA and 0 < b.num_rows for b in batches)
    return [r for b in batches for r in b.to_pylist()]


def test_stream_order_is_source_order_where_a_plain_walk_is_not(tmp_path):
    # ASCII: '-' (0x2d) < '.' (0x2e) < '/' (0x2f). A walk that lists a folder's entries by bare
    # name would visit `a/` before `a-c.png`; sorted paths put `a-c.png` and `a.png` first.
    for rel in ("a/b.png", "a-c.png", "a.png", "a/b/c.png", "a/b-d.png", "a0.png"):
        _img(tmp_path / "c" / rel)
    rows = _streamed(tmp_path / "c", batch_rows=2)
    assert [r["source"] for r in rows] == ["a-c.png", "a.png", "a/b-d.png", "a/b.png", "a/b/c.png", "a0.png"]
    assert rows == _list(tmp_path / "c").to_pylist()
    # tar shards: members' sources are `<tar>/<key>`, so a shard sorts like a folder
    _shard(tmp_path / "t/a.tar", [("z.png", _png_bytes()), ("b.png", _png_bytes())])
    _shard(tmp_path / "t/a-c.tar", [("k.png", _png_bytes())])
    _shard(tmp_path / "t/a/x.tar", [("k.png", _png_bytes())])
    rows = _streamed(tmp_path / "t", batch_rows=1)
    assert [r["source"] for r in rows] == ["a-c.tar/k", "a.tar/b", "a.tar/z", "a/x.tar/k"]


_NAME = st.text(alphabet="ab-. _Z09é", min_size=1, max_size=4).filter(lambda s: s not in (".", ".."))


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(paths=st.lists(st.lists(_NAME, min_size=1, max_size=3), min_size=1, max_size=12),
       batch=st.integers(1, 5))
def test_stream_is_sorted_by_source_for_any_tree(paths, batch):
    # Property (Python's sorted() on the relative paths is the reference order): however names
    # mix characters below and above '/', the stream comes out sorted, in batches of `batch`,
    # with the same rows as list_samples.
    with tempfile.TemporaryDirectory() as d:
        root = Path(d)
        for parts in paths:
            rel = "/".join(parts[:-1] + [parts[-1] + ".png"])
            try:
                (root / rel).parent.mkdir(parents=True, exist_ok=True)
                (root / rel).write_bytes(_PNG)
            except (FileExistsError, NotADirectoryError, IsADirectoryError):
                continue
        rows = _streamed(root, batch_rows=batch, format="folder")
        sources = [r["source"] for r in rows]
        assert sources == sorted(sources)
        assert rows == list_samples(InputConfig(path=d, format="folder")).to_pylist()


def test_folders_whose_names_escape_alike_are_walked_as_one(tmp_path):
    raw = os.fsdecode(b"d\xff")  # a byte that is not UTF-8: its source spells it `d\xff`
    (tmp_path / raw).mkdir()
    (tmp_path / "d\\xff").mkdir()  # the same text, spelled with a backslash
    (tmp_path / raw / "x.png").write_bytes(_png_bytes((1, 1, 1)))
    (tmp_path / "d\\xff" / "x.png").write_bytes(_png_bytes((2, 2, 2)))
    (tmp_path / "d\\xff" / "y.png").write_bytes(_png_bytes((3, 3, 3)))
    rows = _streamed(tmp_path, batch_rows=1)
    base = stable_id("d\\xff/x.png")
    assert [(r["source"], r["sample_id"], r["source_problem"]) for r in rows] == [
        ("d\\xff/x.png", f"{base}-1", "source_duplicate"),  # by raw name bytes: '\\' (0x5c) < 0xff
        ("d\\xff/x.png", f"{base}-2", "source_duplicate"),
        ("d\\xff/y.png", stable_id("d\\xff/y.png"), None),
    ]


def test_manifest_duplicates_far_apart_are_all_marked_in_row_order(tmp_path):
    for n in "abc":
        _img(tmp_path / f"{n}.png")
    lines = ["a.png", "b.png", "c.png", "./b.png", "c.png", "c.png"]
    (tmp_path / "m.csv").write_text("image,caption\n" + "".join(f"{p},row {i}\n" for i, p in enumerate(lines, 1)))
    rows = _streamed(tmp_path / "m.csv", batch_rows=2)
    b, c = stable_id("b.png"), stable_id("c.png")
    assert [(r["caption_raw"], r["sample_id"]) for r in rows] == [
        (b"row 1", stable_id("a.png")), (b"row 2", f"{b}-1"), (b"row 3", f"{c}-1"), (b"row 4", f"{b}-2"),
        (b"row 5", f"{c}-2"), (b"row 6", f"{c}-3")]
    assert [r["source_problem"] for r in rows] == [None] + ["source_duplicate"] * 5


def test_a_malformed_manifest_fails_before_any_batch(tmp_path):
    from curate.sources import iter_samples

    _img(tmp_path / "a.png")
    (tmp_path / "m.jsonl").write_text(json.dumps({"image": "a.png", "caption": "x"}) + "\n" + "[1, 2]\n")
    with pytest.raises(InputError, match="line 2"):
        iter_samples(InputConfig(path=str(tmp_path / "m.jsonl")))  # raised by the call itself


def test_seen_ids_agree_with_a_python_set():
    # Reference: Python's built-in set, on random 64-bit ids with repeats inside and across batches.
    import numpy as np

    from curate.sources.common import SeenIds

    rng = np.random.default_rng(3)
    pool = rng.integers(0, 2**63, 3000, dtype=np.uint64) * np.uint64(2)
    seen = SeenIds()
    seen.RUN_CAP = 256  # small runs: merging and capped runs both happen
    ref: set[int] = set()
    for size in rng.integers(1, 200, 60):
        batch = rng.choice(pool, size)
        want = []
        for v in batch.tolist():
            want.append(v in ref)
            ref.add(v)
        assert seen.add(batch).tolist() == want
    assert len(seen) == len(ref) and seen.nbytes == 8 * len(ref)
    assert all(np.all(r[:-1] < r[1:]) for r in seen.runs)


def test_a_64_bit_id_collision_between_sources_keeps_ids_unique(tmp_path, monkeypatch):
    # Two different sources whose ids collide (forced here; by chance about n**2 / 2**65):
    # the later one, found by the exact seen-id set, gets the next suffix and source_duplicate.
    import curate.sources.common as common

    real = common.stable_id
    monkeypatch.setattr(common, "stable_id", lambda key: real("a.png") if key == "z.png" else real(key))
    for n in ("a.png", "m.png", "z.png"):
        _img(tmp_path / n)
    rows = _streamed(tmp_path, batch_rows=1)
    base = real("a.png")
    assert [(r["source"], r["sample_id"], r["source_problem"]) for r in rows] == [
        ("a.png", base, None), ("m.png", real("m.png"), None), ("z.png", f"{base}-2", "source_duplicate")]


def test_scope_realpath_matches_os_realpath(tmp_path):
    # Reference: os.path.realpath (POSIX path resolution), on paths through linked folders and files.
    from curate.sources.common import Scope

    (tmp_path / "real/sub").mkdir(parents=True)
    (tmp_path / "real/sub/f.png").write_bytes(b"x")
    os.symlink(tmp_path / "real", tmp_path / "lnk")
    os.symlink("sub/f.png", tmp_path / "real/rel.png")
    os.symlink(tmp_path / "nowhere", tmp_path / "real/dangling.png")
    scope = Scope(str(tmp_path), False, 1 << 20)
    for rel in ("lnk/sub/f.png", "lnk/rel.png", "real/../lnk/sub/../rel.png", "lnk/dangling.png", "lnk/missing.png",
                "lnk/sub/..", "lnk/sub/.", "lnk"):
        p = str(tmp_path / rel)
        assert scope.realpath(p) == os.path.realpath(p), rel
        assert scope.realpath(p) == os.path.realpath(p), rel  # again, from the folder cache
