"""A hostile corpus made here: every defect and odd-but-valid format. Every file gets a ledger row."""
from __future__ import annotations

import io
import json
import os
import struct
import tarfile
import zlib
from pathlib import Path

import numpy as np
import pyarrow.parquet as pq
from PIL import Image

from curate import api

from conftest import jpeg_bytes


def _png_header_only(w: int, h: int) -> bytes:
    """A PNG whose IHDR (PNG spec, W3C/ISO 15948) claims w x h pixels, followed by a tiny IDAT."""
    def chunk(kind: bytes, data: bytes) -> bytes:
        return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data))

    ihdr = struct.pack(">IIBBBBB", w, h, 8, 0, 0, 0, 0)
    return b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", ihdr) + chunk(b"IDAT", zlib.compress(b"\x00" * 64)) + chunk(b"IEND", b"")


def _save(img, fmt, **kw) -> bytes:
    buf = io.BytesIO()
    img.save(buf, fmt, **kw)
    return buf.getvalue()


def build(root: Path) -> dict[str, str | None]:
    """Write the corpus; returns {source: expected reason code or None for a valid image}."""
    root.mkdir(parents=True)
    rng = np.random.default_rng(7)
    noisy = Image.fromarray(rng.integers(0, 255, (300, 400, 3), dtype=np.uint8))
    files: dict[str, tuple[bytes, str | bytes | None]] = {
        "ok/plain.jpg": (jpeg_bytes((400, 300)), "a red glazed bowl on a wooden table"),
        "ok/UPPER.JPG": (jpeg_bytes((400, 300), (10, 90, 200)), "a blue glazed bowl on a wooden table"),
        "ok/café ☕ mug.jpg": (jpeg_bytes((400, 300), (90, 90, 20)), "an olive mug with a ☕ stamp on its side"),
        "ok/rgba.png": (_save(noisy.convert("RGBA"), "PNG"), "a noisy test card with an alpha channel"),
        "ok/la.png": (_save(noisy.convert("LA"), "PNG"), "a grey noisy test card with alpha"),
        "ok/palette.gif": (_save(noisy.convert("P"), "GIF"), "a palette test card saved as a gif"),
        "ok/anim.gif": (_save(noisy.convert("P"), "GIF", save_all=True,
                              append_images=[noisy.rotate(90).convert("P")], duration=40), "an animated test card"),
        "ok/sixteen.png": (_save(Image.fromarray((np.asarray(noisy.convert("L"), np.uint16) * 257)), "PNG"),
                           "a sixteen bit grey test card"),
        "ok/cmyk.jpg": (_save(noisy.convert("CMYK"), "JPEG", quality=90), "a cmyk test card from a print shop"),
        "ok/card.webp": (_save(noisy, "WEBP", quality=90), "a webp test card with random noise"),
        "ok/card.bmp": (_save(noisy, "BMP"), "a bitmap test card with random noise"),
        "ok/card.tiff": (_save(noisy, "TIFF"), "a tiff test card with random noise"),
        "ok/card.tif": (_save(noisy, "TIFF", compression="tiff_deflate"), "a deflated tiff test card here"),
        "bad/empty.jpg": (b"", "an empty file that claims to be a jpeg"),
        "bad/truncated.jpg": (jpeg_bytes((800, 600))[:4000], "a jpeg cut off half way through"),
        "bad/truncated.png": (_save(noisy, "PNG")[:5000], "a png cut off half way through"),
        "bad/random.jpg": (rng.integers(0, 255, 9000, dtype=np.uint8).tobytes(), "random bytes named jpg"),
        "bad/text.png": (b"hello, I am a text file\n" * 400, "a text file with a png name"),
        "bad/bomb.png": (_png_header_only(60000, 60000), "a png header that claims a huge image"),
        "cap/missing.jpg": (jpeg_bytes((400, 300), (1, 2, 3)), None),
        "cap/badutf8.jpg": (jpeg_bytes((400, 300), (4, 5, 6)), b"\xff\xfe a caf\xe9 mug with \x80 bytes"),
        "cap/json.jpg": (jpeg_bytes((400, 300), (7, 8, 9)), json.dumps({"caption": "a jug from a json sidecar"})),
        "cap/badjson.jpg": (jpeg_bytes((400, 300), (10, 11, 12)), "{not json"),
        "cap/numjson.jpg": (jpeg_bytes((400, 300), (13, 14, 15)), json.dumps({"caption": 42})),
    }
    expect = {
        "bad/empty.jpg": "file_empty", "bad/truncated.jpg": "truncated", "bad/truncated.png": None,
        "bad/random.jpg": "not_image", "bad/text.png": "not_image", "bad/bomb.png": "too_many_pixels",
        "cap/missing.jpg": "caption_missing", "cap/badjson.jpg": "caption_unreadable",
        "cap/numjson.jpg": "caption_unreadable",
    }
    for rel, (data, cap) in files.items():
        p = root / rel
        p.parent.mkdir(parents=True, exist_ok=True)
        p.write_bytes(data)
        if cap is None:
            continue
        ext = ".json" if rel.startswith("cap/") and "json" in rel else ".txt"
        side = p.with_suffix(ext)
        side.write_bytes(cap if isinstance(cap, bytes) else cap.encode("utf-8"))
    # Not samples: a folder with an image extension, a stray sidecar, a link pointing outside the root.
    (root / "dir.jpg").mkdir()
    (root / "orphan.txt").write_text("a caption with no image")
    outside = root.parent / "outside"
    outside.mkdir()
    (outside / "secret.jpg").write_bytes(jpeg_bytes((400, 300)))
    (root / "link_out").symlink_to(outside, target_is_directory=True)
    return {rel: expect.get(rel, "ok") for rel in files}


def test_every_file_gets_a_row_and_nothing_crashes(tmp_path):
    expect = build(tmp_path / "hostile")
    out = tmp_path / "out"
    api.run(None, input=str(tmp_path / "hostile"), out=str(out),
            sets=["run.workers=1", "inspect.min_file_bytes=0", "inspect.max_pixels=50000000",
                  "embed.model='demo'", "embed.pretrained=''", "decide.actions.agreement_low='keep'",
                  # the cards are drawn, not photographed; picture quality is tested on public photos
                  "quality.enabled=false"])
    rows = {r["source"]: r for r in pq.read_table(out / "ledger.parquet").to_pylist()}
    assert set(rows) == set(expect), set(rows) ^ set(expect)
    for src, want in expect.items():
        r = rows[src]
        if want == "ok":
            # the test cards are one picture in many formats: near duplicates of each other, and that is all
            assert set(r["reasons"]) <= {"duplicate"}, (src, r["reasons"])
            assert r["width"] and r["height"] and r["group_id"]
        elif want is not None:
            assert want in r["reasons"], (src, r["reasons"])
            assert not r["kept"]
    # a truncated PNG is a reason too (which one depends on where zlib stops)
    assert not rows["bad/truncated.png"]["kept"]
    assert rows["cap/json.jpg"]["caption"] == "a jug from a json sidecar"
    assert "café" in rows["cap/badutf8.jpg"]["caption"]
    assert rows["ok/anim.gif"]["frames"] == 2
    cards = [r for s, r in rows.items() if s.startswith("ok/") and s not in ("ok/plain.jpg", "ok/UPPER.JPG",
                                                                           "ok/café ☕ mug.jpg")]
    # one picture saved in ten formats (incl. 16-bit, CMYK, palette, alpha): one group, one copy kept
    assert len({r["group_id"] for r in cards}) == 1
    assert sum(r["kept"] for r in cards) == 1


def test_tar_with_traversal_members_writes_nothing_outside(tmp_path):
    root = tmp_path / "tars"
    root.mkdir()
    tar_path = root / "shard-000.tar"
    with tarfile.open(tar_path, "w") as tf:
        def add(name: str, data: bytes) -> None:
            info = tarfile.TarInfo(name)
            info.size = len(data)
            tf.addfile(info, io.BytesIO(data))

        add("good.jpg", jpeg_bytes((400, 300)))
        add("good.txt", b"a speckled vase photographed on linen")
        add("../evil.jpg", jpeg_bytes((400, 300), (0, 0, 250)))
        add("../evil.txt", b"a caption that tries to climb out")
        add("/abs/evil2.jpg", jpeg_bytes((400, 300), (0, 250, 0)))
    before = set(tmp_path.rglob("*"))
    out = tmp_path / "out"
    api.run(None, input=str(root), out=str(out), sets=["run.workers=1", "embed.enabled=false", "agreement.enabled=false"])
    rows = pq.read_table(out / "ledger.parquet").to_pylist()
    by_reason = {r["source"]: r["reasons"] for r in rows}
    assert by_reason["shard-000.tar/good"] == []
    unsafe = [s for s, r in by_reason.items() if "unsafe_path" in r]
    assert len(unsafe) == 2
    created = {p for p in set(tmp_path.rglob("*")) - before if out not in p.parents and p != out}
    assert not created, created
    assert not (tmp_path / "evil.jpg").exists() and not Path("/abs/evil2.jpg").exists()


def _shard_images(out: Path) -> dict[str, bytes]:
    """source -> image bytes of every kept sample, read back from the shards with plain pyarrow."""
    got: dict[str, bytes] = {}
    for part in sorted((out / "shards").rglob("*.parquet")):
        for r in pq.read_table(part, columns=["sample_id", "image"]).to_pylist():
            got[r["sample_id"]] = r["image"]
    return got


# Identity and byte tests on flat drawn pictures: picture quality (which reads them as blank) is
# tested on public photos elsewhere.
_FAST = ["run.workers=1", "embed.enabled=false", "agreement.enabled=false", "quality.enabled=false"]


def test_folder_names_links_and_sizes_cannot_smuggle_bytes(tmp_path):
    # Names with syntax in them, links out of the root, a huge sparse file, a FIFO and two
    # names that escape alike: every input gets its own row, and every shard image is the
    # very file the ledger row names.
    root, outside = tmp_path / "corpus", tmp_path / "outside"
    root.mkdir()
    outside.mkdir()
    (outside / "account-file").write_text("root:x:0:0:root:/root:/bin/sh\nsecret-line\n")
    (outside / "secret.jpg").write_bytes(jpeg_bytes((400, 300), (0, 0, 0)))
    files = {
        "a.tar::b.jpg": jpeg_bytes((400, 300), (200, 10, 10)),
        "mug.jpg": jpeg_bytes((400, 300), (10, 200, 10)),
        "inv\\xffname.jpg": jpeg_bytes((400, 300), (10, 10, 200)),
        "fine.jpg": jpeg_bytes((400, 300), (120, 120, 20)),
    }
    for name, data in files.items():
        (root / name).write_bytes(data)
        if name != "mug.jpg":
            (root / name).with_suffix(".txt").write_text(f"a glazed bowl photographed on linen {len(name)}")
    with tarfile.open(root / "a.tar", "w") as tf:  # the sibling archive a forged name would point into
        data = jpeg_bytes((400, 300), (250, 250, 250))
        info = tarfile.TarInfo("b.jpg")
        info.size = len(data)
        tf.addfile(info, io.BytesIO(data))
    (root / "mug.txt").symlink_to(outside / "account-file")
    (root / "out.jpg").symlink_to(outside / "secret.jpg")
    (root / "out.txt").write_text("a caption for a linked picture")
    (root / os.fsdecode(b"inv\xffname.jpg")).write_bytes(jpeg_bytes((400, 300), (60, 60, 60)))
    with open(root / "huge.jpg", "wb") as f:
        f.truncate(3 << 30)  # sparse: no disk, but 3 GiB if read whole
    os.mkfifo(root / "pipe.jpg")
    out = tmp_path / "out"
    api.run(None, input=str(root), out=str(out), sets=_FAST)
    ledger = pq.read_table(out / "ledger.parquet").to_pylist()
    assert len(ledger) == 8
    by = {}
    for r in ledger:
        by.setdefault(r["source"], []).append(r)
    assert by["a.tar::b.jpg"][0]["kept"] and by["fine.jpg"][0]["kept"]
    assert "caption_outside_root" in by["mug.jpg"][0]["reasons"] and by["mug.jpg"][0]["caption"] is None
    assert "outside_root" in by["out.jpg"][0]["reasons"]
    assert "file_too_large" in by["huge.jpg"][0]["reasons"]
    assert "special_file" in by["pipe.jpg"][0]["reasons"]
    twins = by["inv\\xffname.jpg"]
    assert len(twins) == 2 and all("source_duplicate" in r["reasons"] for r in twins)
    assert len({r["sample_id"] for r in ledger}) == len(ledger)
    # nothing from outside the root reached the ledger
    assert b"secret-line" not in (out / "ledger.parquet").read_bytes()
    shards = _shard_images(out)
    kept = {r["sample_id"]: r["source"] for r in ledger if r["kept"]}
    assert set(shards) == set(kept) == {by["a.tar::b.jpg"][0]["sample_id"], by["fine.jpg"][0]["sample_id"]}
    for sid, source in kept.items():
        assert shards[sid] == files[source]  # the file itself, not a member of a.tar


def test_tar_members_that_collide_never_reach_a_shard(tmp_path):
    root = tmp_path / "tars"
    root.mkdir()
    members = [
        ("k.jpg.png", _save(Image.new("RGB", (400, 300), (200, 30, 30)), "PNG")),
        ("k.jpg", b"this member is text named like a picture\n" * 20),
        ("k.png", _save(Image.new("RGB", (400, 300), (30, 200, 30)), "PNG")),
        ("./x.jpg", jpeg_bytes((400, 300), (30, 30, 200))),
        ("x.jpg", jpeg_bytes((400, 300), (200, 200, 30))),
        ("ok.jpg", jpeg_bytes((400, 300), (90, 20, 160))),
    ]
    captions = [(f"{key}.txt", f"a glazed bowl on linen, key {i}".encode())
                for i, key in enumerate(["k.jpg", "k", "x", "ok"])]
    with tarfile.open(root / "shard-000.tar", "w") as tf:
        for name, data in members + captions:
            info = tarfile.TarInfo(name)
            info.size = len(data)
            tf.addfile(info, io.BytesIO(data))
    out = tmp_path / "out"
    api.run(None, input=str(root), out=str(out), sets=_FAST + ["inspect.min_file_bytes=0"])
    ledger = pq.read_table(out / "ledger.parquet").to_pylist()
    assert len(ledger) == len(members)  # one row per image member: none merged, none lost
    assert len({r["sample_id"] for r in ledger}) == len(ledger)
    dups = sorted(r["source"] for r in ledger if "source_duplicate" in r["reasons"])
    assert dups == ["shard-000.tar/k.jpg", "shard-000.tar/k.jpg", "shard-000.tar/x.jpg", "shard-000.tar/x.jpg"]
    kept = {r["source"]: r["sample_id"] for r in ledger if r["kept"]}
    assert set(kept) == {"shard-000.tar/k.png", "shard-000.tar/ok"}
    shards = _shard_images(out)
    assert shards[kept["shard-000.tar/k.png"]] == members[2][1]
    assert shards[kept["shard-000.tar/ok"]] == members[5][1]
