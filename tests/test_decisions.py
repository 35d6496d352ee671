"""A reviewer's decisions: they override the pipeline, are recorded in the ledger with the note,
survive re-runs until the file changes, and a decision naming no sample is reported."""
from __future__ import annotations

import json

import pyarrow.parquet as pq
import pytest

from curate import api
from curate.errors import ConfigError

from conftest import make_small_corpus

FAST = ["embed.enabled=false", "agreement.enabled=false", "run.workers=1"]


@pytest.fixture
def corpus(tmp_path):
    root = make_small_corpus(tmp_path / "in", n=10)
    (root / "a" / "item001.txt").write_text("IMG_4032.JPG", encoding="utf-8")  # dropped: caption_filename
    return root


def _ledger(out):
    return {r["source"]: r for r in pq.read_table(out / "ledger.parquet").to_pylist()}


def test_keep_and_drop_decisions_override_and_stick(corpus, tmp_path):
    out = tmp_path / "out"
    api.run(None, input=str(corpus), out=str(out), sets=FAST)
    before = _ledger(out)
    assert before["a/item001.jpg"]["reasons"] == ["caption_filename"] and before["b/item000.jpg"]["kept"]
    dec = tmp_path / "decisions.csv"
    dec.write_text("sample_id,source,decision,note\n"
                   f"{before['a/item001.jpg']['sample_id']},,keep,the file name is the product code\n"
                   ",b/item000.jpg,drop,blurry in person\n", encoding="utf-8")
    res = api.run(None, input=str(corpus), out=str(out), sets=FAST, decisions=str(dec))
    led = _ledger(out)
    kept, dropped = led["a/item001.jpg"], led["b/item000.jpg"]
    assert kept["kept"] and kept["reasons"] == [] and "review_keep" in kept["flags"]
    rec = {c["code"]: c for c in kept["checks"]}
    assert rec["review_keep"]["detail"] == "the file name is the product code"
    assert rec["caption_filename"]["status"] == "fail" and rec["caption_filename"]["action"] == "overridden"
    assert dropped["kept"] is False and dropped["reasons"] == ["review_drop"]
    assert {c["code"]: c for c in dropped["checks"]}["review_drop"]["detail"] == "blurry in person"
    # The kept sample now goes on to the later stages: it has a group and a split.
    assert kept["group_id"] is not None and kept["split"] == "train"
    assert res.ran.get("review") == 1
    # Same file, same run: nothing recomputed, same decisions.
    again = api.run(None, input=str(corpus), out=str(out), sets=FAST, decisions=str(dec))
    assert sum(again.ran.values()) == 0 and _ledger(out) == led
    # Changed file: only what depends on the verdict re-runs.
    dec.write_text("sample_id,decision,note\n" f"{before['a/item001.jpg']['sample_id']},drop,changed my mind\n",
                   encoding="utf-8")
    third = api.run(None, input=str(corpus), out=str(out), sets=FAST, decisions=str(dec))
    assert third.ran.get("inspect", 0) == 0 and third.ran.get("review") == 1
    led = _ledger(out)
    assert led["b/item000.jpg"]["kept"] and led["a/item001.jpg"]["reasons"] == ["caption_filename", "review_drop"]


def test_a_keep_cannot_revive_an_unusable_image(corpus, tmp_path):
    (corpus / "a" / "item003.jpg").write_bytes(b"not an image" * 900)
    dec = tmp_path / "d.jsonl"
    dec.write_text(json.dumps({"source": "a/item003.jpg", "decision": "keep", "note": "please"}) + "\n",
                   encoding="utf-8")
    out = tmp_path / "out"
    api.run(None, input=str(corpus), out=str(out), sets=FAST, decisions=str(dec))
    r = _ledger(out)["a/item003.jpg"]
    assert r["kept"] is False and r["reasons"] == ["not_image"]


def test_unknown_samples_are_reported(corpus, tmp_path):
    dec = tmp_path / "d.csv"
    dec.write_text("sample_id,decision,note\nffffffffffffffff,drop,\n", encoding="utf-8")
    res = api.run(None, input=str(corpus), out=str(tmp_path / "out"), sets=FAST, decisions=str(dec))
    assert any("name no sample" in n and "ffffffffffffffff" in n for n in res.notes)
    summary = json.loads((tmp_path / "out" / "summary.json").read_text())
    assert any("ffffffffffffffff" in n for n in summary["notes"])


@pytest.mark.parametrize("text,words", [
    ("sample_id,decision\nabc,maybe\n", "keep or drop"),
    ("id,decision\nabc,keep\n", "sample_id or source"),
    ("sample_id,decision\n,keep\n", "line 2"),
])
def test_malformed_decisions_stop_the_run_before_any_work(corpus, tmp_path, text, words):
    dec = tmp_path / "d.csv"
    dec.write_text(text, encoding="utf-8")
    out = tmp_path / "out"
    with pytest.raises(ConfigError, match=words):
        api.run(None, input=str(corpus), out=str(out), sets=FAST, decisions=str(dec))
    assert not out.exists()
