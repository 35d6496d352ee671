"""The HTML filtering report: counts, pictures, what-if curves, run facts, escaping, size and determinism.

The page is read back with Python's own html.parser (an HTML tokenizer independent of how we
wrote it), the inline charts are checked against the PNG specification (W3C, Portable Network
Graphics Specification, 2nd ed., 2003) and decoded with Pillow, thumbnails are decoded with
Pillow, and the what-if counts are checked against a plain re-count written here from the
definition (every check record re-evaluated with Python's `operator` functions).
"""
import base64
import io
import operator
import struct
import zlib
from html.parser import HTMLParser
from io import BytesIO
from types import SimpleNamespace

import numpy as np
import pyarrow as pa
import pytest
from PIL import Image

from curate import __version__
from curate.config import load_config
from curate.decide import LEDGER_CHECK
from curate.plan import config_sections
from curate.report import MAX_THUMBS, THUMBS_PER_CODE, keeper_reason, svg, thresholds, whatif, write_report
from curate.report.images import THUMB, thumbnail
from curate.writers import summarize

PLAN = SimpleNamespace(stages=[SimpleNamespace(name=s) for s in ("inspect", "caption", "agreement", "neardup")])
HOSTILE = '<script>alert("kiln")</script> teapot & "mug"'
COLUMNS = [
    ("sample_id", pa.string()), ("source", pa.string()), ("caption", pa.string()), ("kept", pa.bool_()),
    ("reasons", pa.list_(pa.string())), ("flags", pa.list_(pa.string())), ("width", pa.int32()),
    ("height", pa.int32()), ("agreement", pa.float32()), ("group_id", pa.string()), ("split", pa.string()),
    ("stopped_at", pa.string()), ("decoded", pa.bool_()), ("dup_of", pa.string()), ("dup_signal", pa.string()),
    ("dup_distance", pa.float32()), ("keep_reason", pa.string()), ("checks", pa.list_(LEDGER_CHECK)),
]


def _chk(stage, code, value, threshold, op, unit, failed, action="drop", status=None):
    return {"stage": stage, "code": code, "status": status or ("fail" if failed else "pass"), "action": action,
            "detail": None, "value": value, "threshold": threshold, "op": op, "unit": unit, "failed": failed}


def _row(i, kept, *, reasons=(), flags=(), w=768, h=768, agreement=0.31, group=None, split=None, caption=None,
         checks=(), stopped=None, dup=None, source=None):
    return {"sample_id": f"s{i:03d}", "source": source or f"kilnworks/item-{i:03d}.jpg",
            "caption": caption or f"celadon glazed bowl number {i} on a linen backdrop",
            "kept": kept, "reasons": list(reasons), "flags": list(flags), "width": w, "height": h,
            "agreement": agreement, "group_id": group or f"s{i:03d}", "split": split if kept else None,
            "stopped_at": stopped, "decoded": True,
            "dup_of": dup[0] if dup else None, "dup_signal": dup[1] if dup else None,
            "dup_distance": dup[2] if dup else None, "keep_reason": dup[3] if dup and len(dup) > 3 else None,
            "checks": [_chk("inspect", "short_side_small", min(w, h), 256, ">=", "px", min(w, h) < 256)]
            + list(checks)}


def _ledger(rows):
    cols = {name: [r.get(name) for r in rows] for name, _ in COLUMNS}
    return pa.Table.from_arrays([pa.array(cols[n], type=t) for n, t in COLUMNS], names=[n for n, _ in COLUMNS])


def _agree(v):
    return _chk("agreement", "agreement_low", v, 0.28, ">=", "cosine", v < 0.28)


def _mixed():
    rows = [
        _row(0, True, split="train", checks=[_agree(0.31)], group="s000"),
        _row(1, True, split="train", checks=[_agree(0.33)], flags=["face"], group="s001"),
        _row(2, True, split="eval", checks=[_agree(0.35)], flags=["face", "pii:email"], group="s001",
             dup=None),
        _row(3, False, reasons=["short_side_small"], w=120, h=90, agreement=None, stopped="inspect"),
        _row(4, False, reasons=["agreement_low"], agreement=0.12, caption=HOSTILE, checks=[_agree(0.12)],
             stopped="agreement"),
        _row(5, False, reasons=["duplicate"], w=640, h=640,
             checks=[_agree(0.30), _chk("neardup", "duplicate", 4, 10, ">", "bits", True)],
             group="s000", stopped="neardup", dup=("s000", "phash", 4.0, "pixels")),
        _row(6, False, reasons=["caption_short"], w=2000, h=300, agreement=None, stopped="caption",
             checks=[_chk("caption", "caption_short", 3, 5, ">=", "chars", True)]),
        _row(7, True, split="quarantine", flags=["face"], checks=[_agree(0.4)]),
    ]
    # Many drops for one reason, to see the cards stop at their limit.
    rows += [_row(10 + i, False, reasons=["caption_short"], agreement=None, stopped="caption",
                  checks=[_chk("caption", "caption_short", 2, 5, ">=", "chars", True)]) for i in range(25)]
    return _ledger(rows)


class _Page(HTMLParser):
    """Collects text by element id, every start tag, table rows (by table id), img sources, and
    every card: its sample, caption, fact text, picture and the h3 heading it sits under."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.tags, self.imgs, self.text_by_id, self.rows, self._open = [], [], {}, [], []
        self._table = None
        self.cards, self.h3 = [], None

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        self.tags.append((tag, a))
        if tag == "img":
            self.imgs.append(a["src"])
            if self._in("figure") and self.cards:
                self.cards[-1]["img"] = a["src"]
            return
        if tag == "meta":
            return
        self._open.append((tag, a.get("id"), (a.get("class") or "").split()))
        if tag == "figure" and "card" in (a.get("class") or "").split():
            self.cards.append({"sample": a.get("data-sample"), "cap": "", "facts": [], "img": None,
                               "section": self.h3, "class": a.get("class")})
        elif tag == "h3":
            self.h3 = ""
        elif tag == "table":
            self._table = a.get("id")
        elif tag == "tr":
            self.rows.append((self._table, []))
        elif tag == "td":
            self.rows[-1][1].append("")
        elif tag == "dt" and self.cards and self._in("figure"):
            self.cards[-1]["facts"].append(["", ""])

    def _in(self, tag):
        return any(t == tag for t, _, _ in self._open)

    def handle_endtag(self, tag):
        while self._open:
            t, _, _ = self._open.pop()
            if t == tag:
                break

    def handle_data(self, data):
        for _, i, _ in self._open:
            if i:
                self.text_by_id[i] = self.text_by_id.get(i, "") + data
        if self._open and self._open[-1][0] == "h3" or (self._in("h3") and self.h3 is not None):
            self.h3 += data
        if self._in("figure") and self.cards:
            tag, _, cls = self._open[-1]
            if tag == "p" and "cap" in cls:
                self.cards[-1]["cap"] += data
            elif tag in ("dt", "dd") and self.cards[-1]["facts"]:
                self.cards[-1]["facts"][-1][0 if tag == "dt" else 1] += data
        if self._in("td") and self.rows and self.rows[-1][1]:
            self.rows[-1][1][-1] += data

    def table(self, table_id):
        return [cells for t, cells in self.rows if t == table_id and cells]


def _write(tmp_path, ledger, name="out", **kw):
    cfg = load_config(None, sections=config_sections())
    out = tmp_path / name
    path = write_report(out, ledger, summarize(ledger, PLAN), cfg, **kw)
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


def _photos():
    """Real photos shipped with scikit-image and scikit-learn, as JPEG bytes."""
    from skimage import data
    from sklearn.datasets import load_sample_image

    out = []
    for arr in (data.astronaut(), data.coffee(), data.chelsea(), data.rocket(), load_sample_image("china.jpg"),
                load_sample_image("flower.jpg")):
        buf = io.BytesIO()
        Image.fromarray(arr).save(buf, "JPEG", quality=90)
        out.append(buf.getvalue())
    return out


def _loader(photos, log=None):
    def load(ids):
        if log is not None:
            log.append(list(ids))
        return [photos[int(s[1:]) % len(photos)] for s in ids]
    return load


def test_counts_cautions_and_sections(tmp_path):
    path, page, cfg = _write(tmp_path, _mixed())
    t = page.text_by_id
    assert t["stat-samples"].startswith("33") and t["stat-kept"].startswith("4")
    assert t["stat-dropped"].startswith("29") and t["stat-kept-pct"].startswith("12.1%")  # 4/33 = 12.12%
    for words in ("screening aids", "not guarantees", "jurisdiction", "licences", "small, turned",
                  "some groups of people", "consent"):
        assert words in t["cautions"]
    html = path.read_text(encoding="utf-8")
    assert cfg.fingerprint() in html and f"curate version {__version__}" in html
    # funnel, reasons, flags, agreement, sizes, near-duplicate groups: six PNG charts, no picture without a loader
    assert len(page.imgs) == 6 and all(src.startswith("data:image/png") for src in page.imgs)
    assert "train" in t["splits"] and "eval" in t["splits"]
    for anchor in ("facts", "drops", "flagged", "quarantine", "groups", "whatif", "config"):
        assert anchor in t, anchor


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
    path, page, _ = _write(tmp_path, _mixed(), load_images=_loader(_photos()))
    html = path.read_text(encoding="utf-8")
    assert "<script" not in html.lower() and "&lt;script&gt;" in html
    assert not any(tag in ("script", "link", "iframe", "object", "embed", "base") for tag, _ in page.tags)
    assert HOSTILE in [c["cap"] for c in page.cards]  # the parser gives the caption back as plain text, unchanged
    assert "http://" not in html and "https://" not in html
    assert all(a.get("src", "data:").startswith("data:") for _, a in page.tags)
    assert not any(k.startswith("on") for _, a in page.tags for k in a)  # no event handler attributes at all


def test_drop_cards_show_value_and_condition_and_stop_at_the_limit(tmp_path):
    _, page, _ = _write(tmp_path, _mixed())
    short = [c for c in page.cards if c["section"] and c["section"].startswith("caption_short")]
    assert len(short) == THUMBS_PER_CODE  # 26 such drops in the ledger; cards are capped per reason
    # sampled by sample_id: the smallest ids, in order
    assert [c["sample"] for c in short] == sorted(["s006"] + [f"s{10 + i:03d}" for i in range(25)])[:THUMBS_PER_CODE]
    small = next(c for c in page.cards if c["sample"] == "s003")
    assert ["short_side_small", "90 px, passes when >= 256 px"] in small["facts"]
    low = next(c for c in page.cards if c["sample"] == "s004")
    assert ["agreement_low", "0.12 cosine, passes when >= 0.28 cosine"] in low["facts"]


def test_flag_quarantine_and_group_sections(tmp_path):
    _, page, _ = _write(tmp_path, _mixed())
    face = [c["sample"] for c in page.cards if c["section"] and c["section"].startswith("face")]
    assert face == ["s001", "s002", "s007"]  # kept samples with the flag (s007 is kept, in quarantine)
    quarantine = [c["sample"] for c in page.cards if "quarantine" in c["class"]]
    assert "s007" in quarantine
    group = [c for c in page.cards if c["section"] and c["section"].startswith("group s000")]
    assert [c["sample"] for c in group] == ["s000", "s005"]  # keeper first
    assert ["distance", "4 bits (phash)"] in group[1]["facts"] and ["copy of", "s000"] in group[1]["facts"]
    # s005 (640x640) lost to s000 (768x768) on pixels, as its ledger row says
    assert "won on pixels" in group[0]["section"]


def test_thumbnails_are_sampled_capped_and_read_in_one_call(tmp_path):
    photos = _photos()
    calls = []
    path, page, _ = _write(tmp_path, _mixed(), load_images=_loader(photos, calls))
    assert len(calls) == 1  # one loader call for the whole page
    pics = [c for c in page.cards if c["img"]]
    assert pics and all(c["img"].startswith("data:image/jpeg;base64,") for c in pics)
    for c in pics[:5]:
        with Image.open(BytesIO(base64.b64decode(c["img"].split(",", 1)[1]))) as im:
            assert im.format == "JPEG" and max(im.size) <= THUMB
    assert len(set(calls[0])) == len(calls[0]) <= MAX_THUMBS


@pytest.mark.parametrize("codes", [90, 300])
def test_many_codes_stay_under_the_page_cap(tmp_path, codes):
    rows = [_row(i, False, reasons=[f"code_{i % codes:03d}"], agreement=None, stopped="inspect")
            for i in range(3 * codes)]
    calls = []
    path, page, _ = _write(tmp_path, _ledger(rows), load_images=_loader(_photos(), calls))
    assert len(calls[0]) <= MAX_THUMBS and len([c for c in page.cards if c["img"]]) <= MAX_THUMBS
    assert len(page.cards) <= MAX_THUMBS and path.stat().st_size < 4_000_000
    # every reason still has its heading with its count, pictures or not
    heads = [h for tag, h in page.tags if tag == "h3" and h.get("data-code")]
    assert len(heads) == codes


def test_a_failing_loader_leaves_a_note_not_a_crash(tmp_path):
    def broken(ids):
        raise OSError("disk gone")

    path, page, _ = _write(tmp_path, _mixed(), load_images=broken)
    assert "No thumbnails: the images could not be read back (OSError: disk gone)" in path.read_text()
    assert page.cards and not any(c["img"] for c in page.cards)


def test_thumbnail_rejects_what_does_not_decode_and_keeps_orientation():
    assert thumbnail(None) is None and thumbnail(b"not an image") is None
    # EXIF orientation 6 (CIPA DC-008, Exif 2.32 sec. 4.6.4: rotate 90 CW to display): a 300x100 stored
    # image is shown 100 wide and 300 high, so its thumbnail is taller than wide.
    im = Image.new("RGB", (300, 100), (200, 30, 30))
    exif = Image.Exif()
    exif[0x0112] = 6
    buf = io.BytesIO()
    im.save(buf, "JPEG", exif=exif.tobytes())
    with Image.open(BytesIO(thumbnail(buf.getvalue()))) as t:
        assert t.size[1] > t.size[0] and max(t.size) == THUMB


def test_run_facts_model_digest_stage_times_and_config_sources(tmp_path):
    facts = {"stages": {"embed": {"version": "2", "kind": "shard", "model": "ViT-B-32", "pretrained": "laion2b",
                                  "weights_file": "open_clip_model.safetensors", "weights_sha256": "ab" * 32}},
             "state": {"embed": {"seconds": 12.5, "samples_computed": 30, "samples_reused": 3}},
             "run_fingerprint": "f" * 64}
    path, page, cfg = _write(tmp_path, _mixed(), facts=facts)
    models = page.table("models")
    assert models == [["embed", "ViT-B-32", "laion2b", "open_clip_model.safetensors", "ab" * 32,
                       "torch fp32 (reference)"]]
    times = page.table("stagetimes")
    assert times[0][:5] == ["embed", "2", "12.50", "30", "3"]
    assert cfg.input.path in page.text_by_id["runfacts"] or cfg.input.path == ""
    # an auto pick: the paths, the measured speed-up and cosine change against torch fp32, the tolerance
    facts["stages"]["embed"].update(paths={"image": "openvino-int8", "text": "openvino-bf16"},
                                    measured={"speedup": 4.632, "max_agreement_diff": 0.0033990, "tolerance": 0.005})
    _, page, _ = _write(tmp_path, _mixed(), "auto", facts=facts)
    assert page.table("models")[0][5] == ("image openvino-int8, text openvino-bf16; measured 4.63x torch fp32, "
                                          "cosines moved by at most 0.0034 (tolerance 0.005)")
    conf = {r[0]: r for r in page.table("configtable")}
    # the source the code gives for a default is shown beside it (curate.config.field_comments)
    from curate.config import field_comments
    from curate.stages.agreement import AgreementConfig

    assert conf["agreement.threshold"][3] == field_comments(AgreementConfig)["threshold"]


def test_agreement_threshold_is_read_from_checks():
    assert thresholds(whatif.flatten(_mixed()), "agreement_low") == [0.28]
    one = _ledger([_row(0, False, checks=[_chk("x", "agreement_low", 0.2, -0.05, ">=", "cosine", True)])])
    assert thresholds(whatif.flatten(one), "agreement_low") == [-0.05]
    assert thresholds(whatif.flatten(_ledger([])), "agreement_low") == []


def test_same_inputs_give_identical_bytes(tmp_path):
    led = _mixed()
    photos = _photos()
    facts = {"stages": {"embed": {"model": "demo", "weights_sha256": "c" * 64}}, "state": {}}
    a, _, _ = _write(tmp_path, led, "a", load_images=_loader(photos), facts=facts)
    b, _, _ = _write(tmp_path, led, "b", load_images=_loader(photos), facts=facts)
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
    path, page, _ = _write(tmp_path, led, load_images=_loader(_photos()))
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


# --------------------------------------------------------------------------- what-if curves

OPS = {">=": operator.ge, ">": operator.gt, "<=": operator.le, "<": operator.lt}


def _random_ledger(n=400, seed=3):
    """Rows with inspect, caption, agreement (skipped after an earlier drop), duplicate (value only on
    failing copies) and a flag check, decided by the run's rule: kept = no failing drop check."""
    rng = np.random.default_rng(seed)
    rows = []
    for i in range(n):
        w, h = int(rng.integers(100, 900)), int(rng.integers(100, 900))
        ch = int(rng.integers(0, 40))
        recs = [_chk("inspect", "short_side_small", min(w, h), 256, ">=", "px", min(w, h) < 256),
                _chk("inspect", "aspect_extreme", max(w, h) / min(w, h), 4.0, "<=", ":1", max(w, h) / min(w, h) > 4),
                _chk("caption", "caption_short", ch, 5, ">=", "chars", ch < 5),
                _chk("caption", "caption_many_tokens", ch / 2, 15, "<=", "tokens", ch / 2 > 15, action="flag")]
        early = any(r["failed"] and r["action"] == "drop" for r in recs)
        if early:
            recs += [_chk("agreement", "agreement_low", None, None, None, None, False, action=None, status="skipped"),
                     _chk("neardup", "duplicate", None, None, None, None, False, action=None, status="skipped")]
        else:
            a = float(rng.normal(0.3, 0.05))
            recs.append(_chk("agreement", "agreement_low", a, 0.28, ">=", "cosine", a < 0.28))
            if rng.random() < 0.15:
                d = float(rng.integers(0, 5) * 2)
                recs.append(_chk("neardup", "duplicate", d, 8, ">", "bits", True))
            else:
                recs.append(_chk("neardup", "duplicate", None, None, None, None, False))
        kept = not any(r["status"] == "fail" and r["action"] == "drop" for r in recs)
        flags = [r["code"] for r in recs if r["status"] == "fail" and r["action"] == "flag"]
        rows.append(_row(i, kept, flags=flags, w=w, h=h, checks=[]) | {"checks": recs})
    return _ledger(rows)


def _recount(ledger, code, t, lower=False):
    """The definition, one sample at a time: would it be kept (drop checks) or hit (flag checks) if
    only this code's threshold were t? Skipped checks count as passed (upper line); lower leaves out
    samples with any skipped check."""
    kept = hit = 0
    for recs in ledger.column("checks").to_pylist():
        drops, mine_fail = False, False
        for r in recs:
            if r["code"] == code and r["value"] is not None and r["threshold"] is not None:
                fails = not OPS[r["op"]](r["value"], t)
                mine_fail |= fails
                drops |= fails and r["action"] == "drop"
            elif r["status"] == "fail" and r["action"] == "drop":
                drops = True
        if lower and any(r["status"] == "skipped" for r in recs):
            continue
        kept += not drops
        hit += mine_fail
    return kept, hit


def test_whatif_counts_match_a_plain_recount_at_every_point():
    led = _random_ledger()
    cs = {c.code: c for c in whatif.curves(led, points=25)}
    assert set(cs) == {"short_side_small", "aspect_extreme", "caption_short", "caption_many_tokens",
                       "agreement_low", "duplicate"}
    for code, c in cs.items():
        for x, up, low in zip(c.xs, c.upper, c.lower):
            k, hit = _recount(led, code, float(x))
            if c.action == "drop":
                assert up == k, (code, x)
                assert low == _recount(led, code, float(x), lower=True)[0], (code, x)
            else:
                assert up == hit, (code, x)
    # at the thresholds used, every drop curve gives the run's own kept count
    kept = sum(led.column("kept").to_pylist())
    assert all(c.now == kept for c in cs.values() if c.action == "drop")
    assert cs["caption_many_tokens"].now == sum("caption_many_tokens" in f for f in led.column("flags").to_pylist())


def test_whatif_duplicate_radius_is_one_sided_and_reads_stored_distances():
    led = _random_ledger()
    c = next(c for c in whatif.curves(led) if c.code == "duplicate")
    # only failing copies carry a distance, so only smaller radii (more kept) are known
    assert c.one_sided and c.xs.max() == 8 and c.xs.min() >= 0
    assert c.count_at(-1) >= c.now  # a negative radius keeps every copy
    assert c.count_at(-1) == _recount(led, "duplicate", -1)[0]


def test_whatif_answers_how_many_at_another_threshold(tmp_path):
    led = _random_ledger()
    c = next(c for c in whatif.curves(led) if c.code == "agreement_low")
    assert c.count_at(0.25) == _recount(led, "agreement_low", 0.25)[0]
    _, page, _ = _write(tmp_path, led)
    figs = [a for tag, a in page.tags if tag == "figure" and a.get("data-check")]
    assert {"agreement_low (cosine)", "duplicate (bits)", "short_side_small (px)"} <= {a["data-check"] for a in figs}
    assert any(tag == "svg" for tag, _ in page.tags) and any(tag == "polyline" for tag, _ in page.tags)


def test_nice_ticks_are_one_two_or_five_times_a_power_of_ten():
    # Heckbert, "Nice Numbers for Graph Labels", Graphics Gems (1990): steps of 1, 2 or 5 x 10^k.
    for lo, hi in ((0, 1), (0, 310), (-0.43, 1.02), (3, 1235), (0.72, 8.28), (5000, 5001)):
        ts = svg.ticks(lo, hi)
        step = ts[1] - ts[0]
        mant = step / 10 ** np.floor(np.log10(step))
        assert min(abs(mant - m) for m in (1, 2, 5, 10)) < 1e-6, (lo, hi, ts)
        assert ts[0] >= lo - 1e-9 and ts[-1] <= hi + 1e-9 and ts[0] - step < lo and ts[-1] + step > hi
    assert svg.ticks(0, 310) == [0, 100, 200, 300]
    assert svg.log_ticks(40, 700000) == [100, 1000, 10000, 100000]


def test_keeper_reason_follows_the_ledger():
    # Each copy's keep_reason (written by the neardup stage) says on which criterion the keeper won.
    k = {"width": 800, "height": 600}
    assert keeper_reason(k, [{"keep_reason": "unflagged"}]) == "won on unflagged"
    assert keeper_reason(k, [{"keep_reason": "pixels"}, {"keep_reason": "pixels"}, {"keep_reason": "sharpness"}]) \
        == "won on pixels (2), sharpness (1)"
    assert keeper_reason(k, []) == ""
