"""End to end on the demo corpus: every planted case in sample_corpus/expected.csv gets its outcome."""
from __future__ import annotations

import csv
import json
from collections import defaultdict

import pyarrow.parquet as pq
import pytest

from curate import api

from conftest import ROOT


@pytest.fixture(scope="module")
def demo_run(sample_corpus, tmp_path_factory):
    out = tmp_path_factory.mktemp("demo") / "out"
    api.run(ROOT / "sample_corpus" / "curate.toml", input=str(sample_corpus), out=str(out))
    rows = {r["source"]: r for r in pq.read_table(out / "ledger.parquet").to_pylist()}
    with open(ROOT / "sample_corpus" / "expected.csv", newline="", encoding="utf-8") as f:
        expected = list(csv.DictReader(f))
    return out, rows, expected


def test_every_file_has_a_ledger_row(demo_run, sample_corpus):
    _, rows, expected = demo_run
    assert set(rows) == {e["source"] for e in expected}


def test_planted_drops_have_their_reason(demo_run):
    _, rows, expected = demo_run
    misses = []
    for e in expected:
        if e["expect"] != "dropped":
            continue
        r = rows[e["source"]]
        if r["kept"] or e["reason"] not in r["reasons"]:
            misses.append((e["source"], e["reason"], r["reasons"]))
    assert not misses, misses


def test_planted_flags_are_raised(demo_run):
    _, rows, expected = demo_run
    misses = [(e["source"], e["reason"], rows[e["source"]]["flags"]) for e in expected
              if e["expect"] in ("flagged", "quarantined") and e["reason"] not in rows[e["source"]]["flags"]]
    assert not misses, misses


def test_quarantined_samples_go_to_the_quarantine_shards_only(demo_run):
    out, rows, expected = demo_run
    planted = {e["source"] for e in expected if e["expect"] == "quarantined"}
    assert planted
    wrong = [(s, rows[s]["split"]) for s in planted if rows[s]["split"] != "quarantine"]
    assert not wrong, wrong
    by_split = defaultdict(set)
    for part in (out / "shards").glob("*/part-*.parquet"):
        by_split[part.parent.name] |= set(pq.read_table(part, columns=["source"]).column("source").to_pylist())
    assert planted <= by_split["quarantine"]
    assert not planted & (by_split["train"] | by_split["eval"])
    # Nothing else is quarantined: the built-in real-world concepts stay quiet on the demo model.
    others = sorted(s for s, r in rows.items() if r["split"] == "quarantine" and s not in planted)
    assert not others, [(s, rows[s]["flags"]) for s in others]


def test_good_samples_are_kept(demo_run):
    _, rows, expected = demo_run
    lost = [(e["source"], rows[e["source"]]["reasons"]) for e in expected
            if e["expect"] in ("kept", "flagged", "quarantined") and not rows[e["source"]]["kept"]]
    assert not lost, lost


def test_duplicate_groups(demo_run):
    _, rows, expected = demo_run
    groups = defaultdict(list)
    for e in expected:
        if e["group"]:
            groups[e["group"]].append(e)
    assert groups
    for label, members in groups.items():
        # Copies another check dropped are not grouped (they never take a group's place); every
        # copy that reached the near-duplicate stage lands in one group, and one of them is kept.
        live = [m for m in members if set(rows[m["source"]]["reasons"]) <= {"duplicate"}]
        ids = {rows[m["source"]]["group_id"] for m in live}
        assert len(ids) == 1, (label, ids)
        kept = [m for m in live if rows[m["source"]]["kept"]]
        assert len(kept) == 1, (label, [m["source"] for m in kept])
        for m in members:
            if m["expect"] == "kept":
                assert rows[m["source"]]["kept"], (label, m["source"])


def test_summary_counts_match_the_ledger(demo_run):
    out, rows, _ = demo_run
    summary = json.loads((out / "summary.json").read_text())
    assert summary["samples"] == len(rows)
    assert summary["kept"] == sum(r["kept"] for r in rows.values())
    for code, n in summary["by_reason"].items():
        assert n == sum(code in r["reasons"] for r in rows.values())
