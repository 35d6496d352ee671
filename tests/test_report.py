"""The HTML filtering report: counts, cautions, escaping, self-containment and determinism.

The page is read back with Python's own html.parser (an HTML tokenizer independent of how we
wrote it), and the inline charts are checked against the PNG specification (W3C, Portable
Network Graphics Specification, 2nd ed., 2003) and decoded with Pillow.
"""
import base64
import struct
import zlib
from html.parser import HTMLParser
from io import BytesIO
from types import SimpleNamespace

import pyarrow as pa
import pytest
from PIL import Image

from curate import __version__
from curate.config import load_config
from curate.decide import LEDGER_CHECK
from curate.plan import config_sections
from curate.report import _thresholds, write_report
from curate.writers import summarize

PLAN = SimpleNamespace(stages=[SimpleNamespace(name=s) for s in ("inspect", "caption", "agreement", "neardup")])
HOSTILE = '<script>alert("kiln")</script> teapot & "mug"'
COLUMNS = [
    ("sample_id", pa.string()), ("source", pa.string()), ("caption", pa.string()), ("kept", pa.bool_()),
    ("reasons", pa.list_(pa.string())), ("flags", pa.list_(pa.string())), ("width", pa.int32()),
    ("height", pa.int32()), ("agreement", pa.float32()), ("group_id", pa.string()), ("split", pa.string()),
    ("stopped_at", pa.string()), ("decoded", pa.bool_()), ("checks", pa.list_(LEDGER_CHECK)),
]


def _chk(stage, code, value, threshold, op, unit, failed, action="drop"):
    return {"stage": stage, "code": code, "status": "fail" if failed else "pass", "action": action,
            "detail": None, "value": value, "threshold": threshold, "op": op, "unit": unit, "failed": failed}


def _row(i, kept, *, reasons=(), flags=(), w=768, h=768, agreement=0.31, group=None, split=None, caption=None,
         checks=(), stopped=None):
    return {"sample_id": f"s{i:03d}", "source": f"kilnworks/item-{i:03d}.jpg",
            "caption": caption or f"celadon glazed bowl number {i} on a linen backdrop",
            "kept": kept, "reasons": list(reasons), "flags": list(flags), "width": w, "height": h,
            "agreement": agreement, "group_id": group or f"s{i:03d}", "split": split if kept else None,
            "stopped_at": stopped, "decoded": True,
            "checks": [_chk("inspect", "short_side_small", min(w, h), 256, ">=", "px", min(w, h) < 256)]
            + list(checks)}


def _ledger(rows):
    cols = {name: [r.get(name) for r in rows] for name, _ in COLUMNS}
    return pa.Table.from_arrays([pa.array(cols[n], type=t) for n, t in COLUMNS], names=[n for n, _ in COLUMNS])


def _mixed():
    agree = lambda v: _chk("agreement", "agreement_low", v, 0.28, ">=", "cosine", v < 0.28)  # noqa: E731
    rows = [
        _row(0, True, split="train", checks=[agree(0.31)], group="g1"),
        _row(1, True, split="train", checks=[agree(0.33)], flags=["face"], group="g2"),
        _row(2, True, split="eval", checks=[agree(0.35)], flags=["face", "pii:email"], group="g2"),
        _row(3, False, reasons=["short_side_small"], w=120, h=90, agreement=None, stopped="inspect"),
        _row(4, False, reasons=["agreement_low"], agreement=0.12, caption=HOSTILE, checks=[agree(0.12)],
             stopped="agreement"),
        _row(5, False, reasons=["duplicate"], checks=[agree(0.30), _chk("neardup", "duplicate", 3, 10, ">", "bits",
                                                                      True)],
             group="g1", stopped="neardup"),
        _row(6, False, reasons=["caption_short"], w=2000, h=300, agreement=None, stopped="caption",
             checks=[_chk("caption", "caption_short", 3, 5, ">=", "chars", True)]),
    ]
    # Many drops for one reason, to see the examples table stop at its limit.
    rows += [_row(10 + i, False, reasons=["caption_short"], agreement=None, stopped="caption",
                  checks=[_chk("caption", "caption_short", 2, 5, ">=", "chars", True)]) for i in range(25)]
    return _ledger(rows)


class _Page(HTMLParser):
    """Collects text by element id, every start tag, table rows (by table id) and img sources."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.tags, self.imgs, self.text_by_id, self.rows, self._open = [], [], {}, [], []
        self._table = None

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        self.tags.append((tag, a))
        if tag == "img":
            self.imgs.append(a["src"])
        elif tag != "meta":
            self._open.append((tag, a.get("id")))
            if tag == "table":
                self._table = a.get("id")
            elif tag == "tr":
                self.rows.append((self._table, []))
            elif tag == "td":
                self.rows[-1][1].append("")

    def handle_endtag(self, tag):
        while self._open:
            t, _ = self._open.pop()
            if t == tag:
                break

    def handle_data(self, data):
        for _, i in self._open:
            if i:
                self.text_by_id[i] = self.text_by_id.get(i, "") + data
        if self._open and self._open[-1][0] == "td":
            self.rows[-1][1][-1] += data

    def table(self, table_id):
        return [cells for t, cells in self.rows if t == table_id and cells]


def _write(tmp_path, ledger, name="out"):
    cfg = load_config(None, sections=config_sections())
    out = tmp_path / name
    path = write_report(out, ledger, summarize(ledger, PLAN), cfg)
    assert path == out / "report.html"
    page = _Page()
    page.feed(path.read_text(encoding="utf-8"))
    page.close()
    return path, page, cfg


def _png_chunks(data):
    # PNG spec sec. 5.2: an 8-byte signature; sec. 5.3: chunks are length, type, data, CRC-32.
    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    pos, out = 8, []
    while pos < len(data):
        (n,) = struct.unpack(">I", data[pos:pos + 4])
        kind, body = data[pos + 4:pos + 8], data[pos + 8:pos + 8 + n]
        assert struct.unpack(">I", data[pos + 8 + n:pos + 12 + n])[0] == zlib.crc32(kind + body)
        out.append((kind, body))
        pos += 12 + n
    return out


def test_counts_cautions_and_sections(tmp_path):
    path, page, cfg = _write(tmp_path, _mixed())
    t = page.text_by_id
    assert t["stat-samples"].startswith("32") and t["stat-kept"].startswith("3")
    assert t["stat-dropped"].startswith("29") and t["stat-kept-pct"].startswith("9.4%")  # 3/32 = 9.375%
    for words in ("screening aids", "not guarantees", "jurisdiction", "licences"):
        assert words in t["cautions"]
    html = path.read_text(encoding="utf-8")
    assert cfg.fingerprint() in html and f"curate version {__version__}" in html
    # funnel, reasons, flags, agreement, sizes, near-duplicate groups: six charts
    assert len(page.imgs) == 6
    assert "train" in t["splits"] and "eval" in t["splits"]


def test_charts_are_valid_pngs_without_time_or_software_text(tmp_path):
    _, page, _ = _write(tmp_path, _mixed())
    for src in page.imgs:
        assert src.startswith("data:image/png;base64,")
        data = base64.b64decode(src.split(",", 1)[1])
        kinds = [k for k, _ in _png_chunks(data)]
        # PNG spec sec. 11.3.6.1 (tIME) and 11.3.4 (tEXt/iTXt/zTXt): none of them may vary per run.
        assert b"tIME" not in kinds and not {b"tEXt", b"iTXt", b"zTXt"} & set(kinds)
        with Image.open(BytesIO(data)) as im:
            im.verify()


def test_captions_are_escaped_and_page_is_self_contained(tmp_path):
    path, page, _ = _write(tmp_path, _mixed())
    html = path.read_text(encoding="utf-8")
    assert "<script" not in html.lower() and "&lt;script&gt;" in html
    assert not any(tag in ("script", "link", "iframe", "object") for tag, _ in page.tags)
    assert HOSTILE in [r[1] for r in page.table("examples")]  # the parser gives the caption back as plain text, unchanged
    assert "http://" not in html and "https://" not in html
    assert all(a.get("src", "data:").startswith("data:") for _, a in page.tags)


def test_examples_show_value_and_threshold_and_stop_at_the_limit(tmp_path):
    _, page, _ = _write(tmp_path, _mixed())
    rows = page.table("examples")
    short = [r for r in rows if r[2] == "caption_short"]
    assert len(short) == 20  # 26 such drops in the ledger; the brief caps examples at 20 per reason
    assert ["kilnworks/item-003.jpg", "short_side_small", "90 px", ">= 256 px"] in [[r[0], *r[2:]] for r in rows]
    assert any(r[2:] == ["agreement_low", "0.12 cosine", ">= 0.28 cosine"] for r in rows)


def test_agreement_threshold_is_read_from_checks():
    led = _mixed()
    assert _thresholds(led.column("checks").to_pylist(), "agreement_low") == [0.28]
    assert _thresholds([[_chk("x", "agreement_low", 0.2, -0.05, ">=", "cosine", True)]], "agreement_low") == [-0.05]


def test_same_inputs_give_identical_bytes(tmp_path):
    led = _mixed()
    a, _, _ = _write(tmp_path, led, "a")
    b, _, _ = _write(tmp_path, led, "b")
    assert a.read_bytes() == b.read_bytes()


@pytest.mark.parametrize("case", ["empty", "all_dropped", "no_agreement"])
def test_edge_cases(tmp_path, case):
    if case == "empty":
        led = _ledger([])
    elif case == "all_dropped":
        led = _ledger([_row(i, False, reasons=["short_side_small"], w=100, h=100, stopped="inspect")
                       for i in range(4)])
    else:
        led = _ledger([_row(i, True, agreement=None, split="train") for i in range(3)])
    path, page, _ = _write(tmp_path, led)
    t = page.text_by_id
    n = led.num_rows
    kept = sum(led.column("kept").to_pylist())
    assert t["stat-samples"].startswith(str(n)) and t["stat-kept"].startswith(str(kept))
    assert "screening aids" in t["cautions"]
    html = path.read_text(encoding="utf-8")
    if case == "empty":
        assert page.imgs == [] and t["stat-kept-pct"].startswith("\u2014")
    if case == "all_dropped":
        assert "No kept samples, so no splits." in html and t["stat-kept-pct"].startswith("0.0%")
    if case == "no_agreement":
        assert "No agreement scores in this run" in html and "No near-duplicate groups" in html
        assert "Nothing was dropped." in html
