"""End to end on the demo corpus: every planted case in sample_corpus/expected.csv gets its outcome."""
from __future__ import annotations

import csv
import json
from collections import defaultdict

import numpy as np
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


# Codes that come from statistical detectors (a cascade, a stroke signal, a spectrum, a seam
# measure, perceptual codes): held to a rate, each miss printed. Every other planted code comes from
# a rule on the file or the caption and is held exactly.
DETECTORS = {"face", "watermark", "duplicate"}


def _rate(hits: list[bool]) -> float:
    return sum(hits) / len(hits) if hits else 1.0


def test_planted_drops_have_their_reason(demo_run):
    _, rows, expected = demo_run
    planted = [e for e in expected if e["expect"] == "dropped"]
    kept = [e["source"] for e in planted if rows[e["source"]]["kept"]]
    assert not kept, kept  # a planted fault never reaches a shard, whatever check caught it
    rule = [(e["source"], e["reason"], rows[e["source"]]["reasons"]) for e in planted
            if e["reason"] not in DETECTORS and e["reason"] not in rows[e["source"]]["reasons"]]
    assert not rule, rule
    det = [e for e in planted if e["reason"] in DETECTORS]
    hits = [e["reason"] in rows[e["source"]]["reasons"] for e in det]
    print(f"\ndetector drops with their planted reason: {sum(hits)}/{len(hits)}; others: "
          f"{[(e['source'], rows[e['source']]['reasons']) for e, h in zip(det, hits) if not h]}")
    assert _rate(hits) >= 0.9


def test_planted_flags_are_raised(demo_run):
    _, rows, expected = demo_run
    planted = [e for e in expected if e["expect"] in ("flagged", "quarantined")]
    codes = {e["source"]: (rows[e["source"]]["flags"] or []) + (rows[e["source"]]["reasons"] or []) for e in planted}
    rule = [(e["source"], e["reason"], codes[e["source"]]) for e in planted
            if e["reason"] not in DETECTORS and e["reason"] not in codes[e["source"]]]
    assert not rule, rule
    for code in sorted({e["reason"] for e in planted} & DETECTORS):
        hits = [code in codes[e["source"]] for e in planted if e["reason"] == code]
        print(f"\nplanted {code}: raised on {sum(hits)}/{len(hits)}")
        # The bar is below the public-photo figures (bench/faces.py, bench/watermark.py): the demo's
        # drawn scenes are not what the detectors were measured on.
        assert _rate(hits) >= 0.6, code


def test_quarantined_samples_go_to_the_quarantine_shards_only(demo_run):
    out, rows, expected = demo_run
    planted = {e["source"] for e in expected if e["expect"] == "quarantined"}
    assert planted
    quarantined = {s for s, r in rows.items() if r["split"] == "quarantine"}
    got = planted & quarantined
    print(f"\nplanted watermarks quarantined: {len(got)}/{len(planted)}; "
          f"other samples quarantined: {len(quarantined - planted)}")
    assert len(got) >= 0.6 * len(planted)
    by_split = defaultdict(set)
    for part in (out / "shards").glob("*/part-*.parquet"):
        by_split[part.parent.name] |= set(pq.read_table(part, columns=["source"]).column("source").to_pylist())
    assert quarantined == by_split["quarantine"]
    assert not quarantined & (by_split["train"] | by_split["eval"])
    # Screening false alarms on the rest of the corpus stay a small share of it.
    good = [e["source"] for e in expected if e["expect"] in ("kept", "flagged")]
    assert sum(s in quarantined for s in good) <= 0.05 * len(good)


def test_good_samples_are_kept(demo_run):
    _, rows, expected = demo_run
    # Pictures meant for training (quarantined ones are held back anyway: see the next tests).
    good = [e for e in expected if e["expect"] in ("kept", "flagged")]
    lost = [(e["source"], rows[e["source"]]["reasons"]) for e in good if not rows[e["source"]]["kept"]]
    print(f"\ngood samples lost: {len(lost)}/{len(good)} {lost}")
    # Only statistical checks may cost a good picture, and rarely. The caption-image agreement is a
    # model's score too: the demo model scores the 110-tag caption low.
    assert all(set(r) <= DETECTORS | {"image_garbled", "image_upscaled", "image_blurred", "image_bordered",
                                      "agreement_low"} for _, r in lost), lost
    assert len(lost) <= 0.02 * len(good)


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


def test_a_probe_trained_on_part_of_the_planted_watermarks_finds_the_rest(demo_run, sample_corpus, tmp_path):
    # The reviewer's loop on the demo: label half of the planted shop watermarks (expected.csv) and
    # a share of the clean photos, train `probe:stamp` on the run's cached image embeddings, apply it,
    # and measure it on the samples nobody labelled against expected.csv. Near-duplicate copies
    # (a small corner stamp on some) are left out of both classes.
    import shutil

    from scipy.stats import binomtest

    from curate import cli

    out, rows, expected = demo_run
    run = tmp_path / "out"
    shutil.copytree(out, run)
    embedded = {s for s, r in rows.items() if r["kept"] or r["split"] == "quarantine"}
    stamped = sorted(e["source"] for e in expected if e["reason"] == "watermark" and e["source"] in embedded)
    clean = sorted(e["source"] for e in expected if e["expect"] == "kept" and not e["group"]
                   and e["source"] in embedded)
    assert len(stamped) >= 24 and len(clean) >= 150
    rng = np.random.default_rng(0)
    lab_pos = set(rng.choice(stamped, len(stamped) // 2, replace=False))
    lab_neg = set(rng.choice(clean, len(clean) // 3, replace=False))
    labels = tmp_path / "labels.csv"
    with open(labels, "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(["source", "label"])
        w.writerows([s, 1] for s in sorted(lab_pos))
        w.writerows([s, 0] for s in sorted(lab_neg))
    # A stated target precision of 0.8: with a dozen positives the 95% interval of any measured
    # precision is wide, and the probe's threshold is picked for the target (curate.probes).
    assert cli.main(["probe", "train", str(run), "--labels", str(labels), "--name", "stamp",
                     "--target-precision", "0.8"]) == 0
    probe = run / "probes" / "stamp.safetensors"
    meta = json.loads(probe.with_suffix(".json").read_text())
    api.run(ROOT / "sample_corpus" / "curate.toml", input=str(sample_corpus), out=str(run),
            sets=[f'probes.apply.stamp={{path="{probe}", action="flag"}}'])
    after = {r["source"]: r for r in pq.read_table(run / "ledger.parquet", columns=["source", "flags"]).to_pylist()}
    held_pos = [s for s in stamped if s not in lab_pos]
    held_neg = [s for s in clean if s not in lab_neg]
    hit_pos = sum("probe:stamp" in (after[s]["flags"] or []) for s in held_pos)
    hit_neg = sum("probe:stamp" in (after[s]["flags"] or []) for s in held_neg)
    m = meta["metrics"]
    print(f"\nprobe:stamp cross-validated on {len(lab_pos)} + {len(lab_neg)} labels: precision {m['precision']:.3f} "
          f"(95% {m['precision_ci95']}), recall {m['recall']:.3f}, ROC AUC {m['roc_auc']:.3f}; held out: "
          f"{hit_pos}/{len(held_pos)} stamped and {hit_neg}/{len(held_neg)} clean photos flagged")
    flagged = hit_pos + hit_neg
    assert flagged >= 5
    held = binomtest(hit_pos, flagged).proportion_ci(0.95, method="exact")
    # The held-out precision agrees with the reported one (their 95% intervals overlap). Measured: 6 of
    # 13 held-out stamps and 5 of 126 clean photos flagged (cross-validated recall 0.92 on 13 labelled
    # stamps was optimistic: the threshold is picked on the same few scores, as the probe's metrics
    # say). The bars sit below those figures; a probe that flags at random fails the second.
    assert m["precision_ci95"][0] <= held.high and held.low <= m["precision_ci95"][1]
    assert hit_pos / len(held_pos) >= 0.4 and hit_neg / len(held_neg) <= 0.1
