"""`curate review`: the decisions file (CSV / JSON Lines) and its contact sheet.

The files are read back with Python's csv module (RFC 4180 quoting) and json module, and the
sheet with html.parser; pictures are real photos from scikit-image and scikit-learn.
"""
from __future__ import annotations

import csv
import io
import json
from html.parser import HTMLParser
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from PIL import Image

from curate import api
from curate.cli import main
from curate.decide import LEDGER_CHECK
from curate.errors import InputError
from curate.report.review import COLUMNS, read_decisions, review

from conftest import make_small_corpus

HOSTILE_SOURCE = 'odd/na,me "quoted"\nline.jpg'


def _chk(code, failed, action="drop", value=None, threshold=None, op=None, unit=None):
    return {"stage": "x", "code": code, "status": "fail" if failed else "pass", "action": action, "detail": None,
            "value": value, "threshold": threshold, "op": op, "unit": unit, "failed": failed}


def _photo_files(folder: Path) -> list[Path]:
    from skimage import data
    from sklearn.datasets import load_sample_image

    folder.mkdir(parents=True, exist_ok=True)
    out = []
    for i, arr in enumerate((data.astronaut(), data.coffee(), data.chelsea(), load_sample_image("china.jpg"))):
        p = folder / f"photo{i}.jpg"
        Image.fromarray(arr).save(p, "JPEG", quality=85)
        out.append(p)
    return out


def make_run(tmp: Path, rows: list[dict] | None = None, *, extra: dict | None = None) -> Path:
    """A finished run's output folder written by hand: ledger.parquet, config.resolved.toml and the
    source table with locators to real photos (a test fixture: no pipeline run needed)."""
    inp = tmp / "input"
    _photo_files(inp / "pics")
    if rows is None:
        rows = [
            dict(sample_id="a000000000000001", source="pics/photo0.jpg", kept=True, reasons=[], flags=["face"],
                 split="train", group_id="a000000000000001", checks=[_chk("face", True, "flag")]),
            dict(sample_id="b000000000000002", source="pics/photo1.jpg", kept=False, reasons=["agreement_low"],
                 flags=[], split=None, group_id="b000000000000002",
                 checks=[_chk("agreement_low", True, value=0.1, threshold=0.28, op=">=", unit="cosine")]),
            dict(sample_id="c000000000000003", source="pics/photo2.jpg", kept=True, reasons=[], flags=[],
                 split="train", group_id="c000000000000003", checks=[]),
            dict(sample_id="d000000000000004", source="pics/photo3.jpg", kept=False, reasons=["duplicate"],
                 flags=["pii:email"], split=None, group_id="c000000000000003", dup_of="c000000000000003",
                 dup_signal="phash", dup_distance=2.0,
                 checks=[_chk("duplicate", True, value=2, threshold=8, op=">", unit="bits"),
                         _chk("pii:email", True, "flag")]),
            dict(sample_id="e000000000000005", source=HOSTILE_SOURCE, kept=True, reasons=[], flags=["face"],
                 split="quarantine", group_id="e000000000000005", checks=[_chk("face", True, "quarantine")],
                 caption='<img src=x onerror="document.title=1">'),
        ]
    cols = {"sample_id": pa.string(), "source": pa.string(), "caption": pa.string(), "kept": pa.bool_(),
            "reasons": pa.list_(pa.string()), "flags": pa.list_(pa.string()), "split": pa.string(),
            "width": pa.int32(), "height": pa.int32(), "agreement": pa.float32(), "group_id": pa.string(),
            "dup_of": pa.string(), "dup_signal": pa.string(), "dup_distance": pa.float32(),
            "checks": pa.list_(LEDGER_CHECK)}
    cols.update(extra or {})
    for r in rows:
        r.setdefault("caption", f"a photo of sample {r['sample_id'][:4]}")
        r.setdefault("width", 640)
        r.setdefault("height", 480)
    table = pa.table({c: pa.array([r.get(c) for r in rows], t) for c, t in cols.items()})
    out = tmp / "out"
    (out / "work" / "source").mkdir(parents=True)
    pq.write_table(table, out / "ledger.parquet")
    (out / "config.resolved.toml").write_text(f'[input]\npath = "{inp}"\nid_column = "key"\n', encoding="utf-8")
    locs = [str(inp / r["source"]) if (inp / r["source"]).exists() else "" for r in rows]
    pq.write_table(pa.table({"sample_id": [r["sample_id"] for r in rows], "locator": locs}),
                   out / "work" / "source" / "00000.parquet")
    return out


class _Sheet(HTMLParser):
    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.samples, self.tags, self.imgs, self.badges, self._badge = [], [], [], [], False

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        self.tags.append((tag, a))
        if tag == "figure":
            self.samples.append(a.get("data-sample"))
        if tag == "img":
            self.imgs.append(a.get("src", ""))
        self._badge = tag == "span" and a.get("class") == "badge"

    def handle_data(self, data):
        if self._badge:
            self.badges.append(data)
            self._badge = False


def _sheet(path: Path) -> _Sheet:
    s = _Sheet()
    s.feed(path.read_text(encoding="utf-8"))
    return s


def test_default_set_is_everything_dropped_flagged_or_quarantined(tmp_path):
    run = make_run(tmp_path)
    res = review(run, out=tmp_path / "r" / "decisions.csv")
    rows = read_decisions(res["decisions"])
    assert [r["sample_id"] for r in rows] == ["a000000000000001", "b000000000000002", "d000000000000004",
                                              "e000000000000005"]  # c...3 is kept and unflagged
    # pre-filled with today's verdict; a note column left for the reviewer
    assert [r["decision"] for r in rows] == ["keep", "drop", "drop", "keep"] and all(r["note"] == "" for r in rows)
    # RFC 4180 (csv module): the header is exactly the decisions columns, and a source with a comma,
    # quotes and a newline reads back unchanged
    with open(res["decisions"], newline="", encoding="utf-8") as f:
        reader = csv.reader(f)
        assert next(reader) == list(COLUMNS)
    assert rows[-1]["source"] == HOSTILE_SOURCE
    sheet = _sheet(Path(res["sheet"]))
    assert res["sheet"].endswith("decisions.html")
    assert sheet.samples == [r["sample_id"] for r in rows]  # same samples, same order
    assert sheet.badges == ["#1 kept", "#2 dropped", "#3 dropped", "#4 quarantine"]


def test_jsonl_and_filters(tmp_path):
    run = make_run(tmp_path)
    res = review(run, reason="agreement_low", out=tmp_path / "a.jsonl")
    lines = Path(res["decisions"]).read_text(encoding="utf-8").splitlines()
    assert [json.loads(x) for x in lines] == [{"sample_id": "b000000000000002", "source": "pics/photo1.jpg",
                                               "decision": "drop", "note": ""}]
    assert res["format"] == "jsonl" and res["rows"] == res["matched"] == 1
    flagged = read_decisions(review(run, flag="face", out=tmp_path / "f.csv")["decisions"])
    assert [r["sample_id"] for r in flagged] == ["a000000000000001", "e000000000000005"]
    family = read_decisions(review(run, flag="pii", out=tmp_path / "p.csv")["decisions"])
    assert [r["sample_id"] for r in family] == ["d000000000000004"]
    both = review(run, reason="duplicate", flag="face", out=tmp_path / "none.csv")
    assert both["rows"] == 0 and read_decisions(both["decisions"]) == []
    assert "No sample matches." in Path(both["sheet"]).read_text()


def test_group_mode_lists_whole_groups_keeper_first(tmp_path):
    run = make_run(tmp_path)
    res = review(run, group=True, out=tmp_path / "g.csv")
    rows = read_decisions(res["decisions"])
    assert [r["sample_id"] for r in rows] == ["c000000000000003", "d000000000000004"]
    assert [r["decision"] for r in rows] == ["keep", "drop"]
    sheet = Path(res["sheet"]).read_text(encoding="utf-8")
    assert 'data-group="c000000000000003"' in sheet and "phash, 2" in sheet


def test_limit_and_thumbnails(tmp_path):
    run = make_run(tmp_path)
    res = review(run, limit=2, out=tmp_path / "l.csv")
    assert res["rows"] == 2 and res["matched"] == 4
    sheet = _sheet(Path(res["sheet"]))
    # both samples have a real photo behind their locator: two JPEG thumbnails
    assert len(sheet.imgs) == 2 and all(s.startswith("data:image/jpeg;base64,") for s in sheet.imgs)


def test_hostile_text_stays_text(tmp_path):
    run = make_run(tmp_path)
    res = review(run, out=tmp_path / "h.csv")
    sheet = _sheet(Path(res["sheet"]))
    html = Path(res["sheet"]).read_text(encoding="utf-8")
    assert "onerror" not in {k for _, a in sheet.tags for k in a}
    assert all(t in ("html", "head", "meta", "title", "style", "body", "main", "h1", "h3", "p", "code", "div", "figure",
                     "img", "span", "figcaption", "dl", "dt", "dd", "em") for t, _ in sheet.tags), \
        {t for t, _ in sheet.tags}
    assert "&lt;img src=x onerror=&quot;document.title=1&quot;&gt;" in html


@pytest.mark.parametrize("name", ["decisions.txt", "decisions.html", "decisions"])
def test_out_must_be_csv_or_jsonl(tmp_path, name):
    run = make_run(tmp_path)
    with pytest.raises(InputError, match=r"\.csv or \.jsonl"):
        review(run, out=tmp_path / name)


def test_cli_review_and_library_agree(tmp_path, capsys):
    run = make_run(tmp_path)
    out = tmp_path / "cli.csv"
    assert main(["review", str(run), "--flag", "face", "--limit", "5", "--out", str(out)]) == 0
    assert "2 of 2 sample(s) to review" in capsys.readouterr().out
    lib = api.review(run, flag="face", limit=5, out=tmp_path / "lib.csv")
    assert out.read_bytes() == Path(lib["decisions"]).read_bytes()
    assert main(["review", str(tmp_path / "missing"), "--out", str(out)]) == 2
    assert main(["review", str(run), "--limit", "0", "--out", str(out)]) == 2


def test_a_real_run_reviews_with_pictures_and_its_report_has_thumbnails(tmp_path):
    corpus = make_small_corpus(tmp_path / "c", 8)
    (corpus / "b" / "item000.txt").write_text("DSC00123", encoding="utf-8")  # a file-name caption: dropped
    out = tmp_path / "run"
    fast = ["--set", "run.workers=1", "--set", "embed.enabled=false", "--set", "agreement.enabled=false"]
    assert main(["run", "--input", str(corpus), "--out", str(out), "--quiet", *fast]) == 0
    report = (out / "report.html").read_text(encoding="utf-8")
    assert "data:image/jpeg;base64," in report  # the writer passes a loader: the drop has its thumbnail
    res = review(out, out=tmp_path / "rv.csv")
    rows = read_decisions(res["decisions"])
    assert [r["source"] for r in rows] == ["b/item000.jpg"] and rows[0]["decision"] == "drop"
    assert len(_sheet(Path(res["sheet"])).imgs) == 1
    data = io.StringIO(Path(res["decisions"]).read_text(encoding="utf-8"))
    assert list(csv.DictReader(data))[0]["sample_id"] == rows[0]["sample_id"]
