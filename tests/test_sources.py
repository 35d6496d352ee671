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
from curate.sources import SOURCE_SCHEMA, detect_format, list_samples, read_bytes, stable_id

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
    _img(root / "inner/plate.jpg")
    os.symlink(outside, root / "out_link")  # linked folder outside the root
    os.symlink(root / "inner", root / "inner_alias")  # linked folder inside the root
    os.symlink(outside / "target.png", root / "linked.png")  # linked file: followed
    os.symlink(tmp_path / "gone.jpg", root / "dangling.jpg")
    os.mkfifo(root / "pipe.jpg")
    rows = _by_source(_list(root))
    assert set(rows) == {"inner/plate.jpg", "linked.png", "dangling.jpg", "pipe.jpg"}
    assert rows["linked.png"]["source_problem"] is None
    assert rows["linked.png"]["file_size"] == len(target)
    assert rows["dangling.jpg"]["source_problem"] == "unreadable"
    assert rows["pipe.jpg"]["source_problem"] == "unreadable"
    out = list(read_bytes([rows["pipe.jpg"]["locator"], rows["linked.png"]["locator"]]))
    assert isinstance(out[0], OSError)  # a FIFO is refused, not waited on
    assert out[1] == target


def test_folder_dangling_sidecar_is_unreadable(tmp_path):
    _img(tmp_path / "bowl.jpg")
    os.symlink(tmp_path / "nowhere.txt", tmp_path / "bowl.txt")
    (r,) = _list(tmp_path).to_pylist()
    assert r["caption_problem"] == "caption_unreadable"


def test_folder_name_not_utf8_is_listed_as_unreadable(tmp_path):
    name = os.fsdecode(b"glaze-\xff.png")
    (tmp_path / name).write_bytes(_png_bytes())
    (r,) = _list(tmp_path).to_pylist()
    assert r["source"] == "glaze-\\xff.png" and r["source_problem"] == "unreadable"


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
        assert "id" not in json.loads(rows["imgs/mug.jpg"]["meta"])


def test_manifest_custom_column_names(tmp_path):
    _img(tmp_path / "a.png")
    (tmp_path / "m.jsonl").write_text(json.dumps({"file": "a.png", "alt": "bowl"}) + "\n")
    (r,) = _list(tmp_path / "m.jsonl", image_column="file", caption_column="alt").to_pylist()
    assert r["source"] == "a.png" and r["caption_raw"] == b"bowl" and r["meta"] is None


def test_manifest_duplicate_id_is_an_error(tmp_path):
    _img(tmp_path / "a.png")
    _img(tmp_path / "b.png")
    lines = [{"image": "a.png", "caption": "x", "id": "kw-7"}, {"image": "b.png", "caption": "y", "id": "kw-7"}]
    (tmp_path / "m.jsonl").write_text("".join(json.dumps(r) + "\n" for r in lines))
    with pytest.raises(InputError, match="kw-7"):
        _list(tmp_path / "m.jsonl", id_column="id")


def test_manifest_duplicate_image_without_id_is_an_error(tmp_path):
    _img(tmp_path / "a.png")
    (tmp_path / "m.csv").write_text("image,caption\na.png,one\na.png,two\n")
    with pytest.raises(InputError, match="a.png.*id_column"):
        _list(tmp_path / "m.csv")


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
    assert r["source_problem"] == "unreadable" and "row 1" in r["source"]


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
    assert r1["locator"] == f"{tmp_path / 'shard-000.tar'}::kw/0001.jpg"
    assert r1["file_size"] == len(a) and r1["mtime_ns"] == 1_700_000_000 * 10**9
    assert rows["shard-000.tar/kw/0002"]["caption_raw"] == b"black bowl"
    assert rows["shard-000.tar/kw/0003"]["caption_problem"] == "caption_missing"
    assert rows["shard-000.tar/kw/0004"]["locator"].endswith("::./kw/0004.jpg")
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
    locs = [
        f"{a}::p.png",
        f"{b}::q.png",
        str(plain),
        f"{a}::q.png",
        f"{a}::nope.png",
        str(tmp_path / "gone.png"),
        f"{tmp_path / 'gone.tar'}::x.png",
        f"{a}::p.png",
    ]
    out = list(read_bytes(locs))
    assert len(out) == len(locs)
    assert out[:4] == [p, q, p, q] and out[7] == p
    assert isinstance(out[4], KeyError)
    assert isinstance(out[5], FileNotFoundError)
    assert isinstance(out[6], FileNotFoundError)
    assert sorted(opened) == sorted([str(a), str(b), str(tmp_path / "gone.tar")])
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
