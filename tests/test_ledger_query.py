"""`curate ledger` queries and what `curate explain` accepts as a sample.

Query results are compared with a plain Python filter over the same rows (the definition, one
row at a time), on hypothesis-generated ledgers written with several row groups; CSV output is
read back with the csv module (RFC 4180) and JSON output with the json module.
"""
from __future__ import annotations

import csv
import io
import json
import os

import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from hypothesis import given
from hypothesis import strategies as st
from test_review import make_run

from curate import api
from curate.cli import main
from curate.errors import InputError, NotFoundError
from curate.ledger import explain, find, query

CODES = ["agreement_low", "duplicate", "caption_short"]
FLAGS = ["face", "pii:email", "pii:phone", "location"]
SPLITS = [None, "train", "eval", "quarantine"]


def _write(folder, rows, group=7):
    table = pa.table({
        "sample_id": pa.array([r["sample_id"] for r in rows], pa.string()),
        "source": pa.array([r["source"] for r in rows], pa.string()),
        "kept": pa.array([r["kept"] for r in rows], pa.bool_()),
        "reasons": pa.array([r["reasons"] for r in rows], pa.list_(pa.string())),
        "flags": pa.array([r["flags"] for r in rows], pa.list_(pa.string())),
        "split": pa.array([r["split"] for r in rows], pa.string()),
        "agreement": pa.array([r.get("agreement") for r in rows], pa.float32()),
    })
    folder.mkdir(parents=True, exist_ok=True)
    pq.write_table(table, folder / "ledger.parquet", row_group_size=group)
    return folder


row_st = st.fixed_dictionaries({
    "reasons": st.lists(st.sampled_from(CODES), max_size=2, unique=True),
    "flags": st.lists(st.sampled_from(FLAGS), max_size=2, unique=True),
    "split": st.sampled_from(SPLITS),
})


def _plain(rows, reason=None, flag=None, kept=None, split=None):
    out = []
    for r in rows:
        if reason is not None and reason not in r["reasons"]:
            continue
        if flag is not None and not any(f == flag or (":" not in flag and f.startswith(flag + ":"))
                                        for f in r["flags"]):
            continue
        if kept is not None and r["kept"] != kept:
            continue
        if split is not None and (r["split"] is not None if split == "none" else r["split"] != split):
            continue
        out.append(r["sample_id"])
    return out


@given(rows=st.lists(row_st, max_size=40), reason=st.sampled_from([None] + CODES),
       flag=st.sampled_from([None, "pii"] + FLAGS), kept=st.sampled_from([None, True, False]),
       split=st.sampled_from([None, "none", "train", "eval", "quarantine"]), limit=st.sampled_from([None, 0, 3]))
def test_query_matches_a_plain_filter(tmp_path_factory, rows, reason, flag, kept, split, limit):
    for i, r in enumerate(rows):
        r.update(sample_id=f"{i:016x}", source=f"d/{i}.jpg", kept=not r["reasons"])
        if r["reasons"]:
            r["split"] = None
    folder = _write(tmp_path_factory.mktemp("q"), rows)
    q = query(folder, reason=reason, flag=flag, kept=kept, split=split, limit=limit)
    want = _plain(rows, reason, flag, kept, split)
    assert q.matched == len(want) and q.total == len(rows)
    assert q.table.column("sample_id").to_pylist() == (want if limit is None else want[:limit])


def _demo_rows():
    return [
        dict(sample_id="aa00000000000001", source="x/one.jpg", kept=True, reasons=[], flags=["pii:email"],
             split="train", agreement=0.31),
        dict(sample_id="bb00000000000002", source='x/t,w"o.jpg', kept=False, reasons=["agreement_low"], flags=[],
             split=None, agreement=0.12),
        dict(sample_id="bb10000000000003", source="y/three.jpg", kept=True, reasons=[], flags=[], split="eval",
             agreement=0.5),
    ]


def test_formats_and_columns(tmp_path):
    folder = _write(tmp_path / "o", _demo_rows())
    text = api.ledger(folder, columns=["sample_id,source", "agreement"], format="csv")
    got = list(csv.DictReader(io.StringIO(text)))
    assert [r["source"] for r in got] == ["x/one.jpg", 'x/t,w"o.jpg', "y/three.jpg"]
    assert list(got[0]) == ["sample_id", "source", "agreement"] and float(got[1]["agreement"]) == pytest.approx(0.12)
    lines = [json.loads(x) for x in api.ledger(folder, kept=False, format="json").splitlines()]
    assert lines == [{"sample_id": "bb00000000000002", "source": 'x/t,w"o.jpg', "kept": False, "split": None,
                      "reasons": ["agreement_low"], "flags": []}]
    table = api.ledger(folder, flag="pii", format="table")
    assert "aa00000000000001" in table and table.rstrip().endswith("1 of 3 samples match")
    assert api.ledger(folder, limit=1, format="table").rstrip().endswith("3 of 3 samples match; showing 1 "
                                                                         "(--limit N to change)")
    with pytest.raises(InputError, match="no column 'nope'"):
        api.ledger(folder, columns=["nope"])
    with pytest.raises(InputError, match="format"):
        api.ledger(folder, format="xml")


def test_cli_ledger(tmp_path, capsys):
    folder = _write(tmp_path / "o", _demo_rows())
    assert main(["ledger", str(folder), "--split", "eval", "--format", "json", "--columns", "sample_id"]) == 0
    assert [json.loads(x) for x in capsys.readouterr().out.splitlines()] == [{"sample_id": "bb10000000000003"}]
    assert main(["ledger", str(folder), "--dropped", "--format", "csv"]) == 0
    assert list(csv.DictReader(io.StringIO(capsys.readouterr().out)))[0]["sample_id"] == "bb00000000000002"
    assert main(["ledger", str(tmp_path / "none")]) == 2
    assert main(["ledger", str(folder), "--columns", "nope"]) == 2
    with pytest.raises(SystemExit) as e:
        main(["ledger", str(folder), "--kept", "--dropped"])
    assert e.value.code == 2


def test_terminal_table_escapes_control_characters(tmp_path):
    rows = _demo_rows()
    rows[0]["source"] = "x/\x1b]0;owned\x07.jpg"
    folder = _write(tmp_path / "o", rows)
    out = api.ledger(folder, format="table")
    assert "\x1b" not in out and "\x07" not in out and "\\x1b" in out


# --------------------------------------------------------------------------- explain finds what users type


def test_explain_finds_ids_in_any_case_and_unique_prefixes(tmp_path):
    run = make_run(tmp_path)
    assert explain(run, "A000000000000001")["sample_id"] == "a000000000000001"
    assert explain(run, "c000")["sample_id"] == "c000000000000003"
    with pytest.raises(NotFoundError, match="at least 4 characters"):
        explain(run, "c0")
    led = pq.read_table(run / "ledger.parquet")
    twins = led.set_column(0, "sample_id", pa.array(["abcd000000000001", "abcd000000000002", "c000000000000003",
                                                     "d000000000000004", "e000000000000005"]))
    with pytest.raises(NotFoundError, match="start of 2 sample ids"):
        find(twins, "abcd")


def test_explain_finds_relative_dot_and_absolute_paths(tmp_path):
    run = make_run(tmp_path)
    root = tmp_path / "input"
    assert explain(run, "./pics/photo1.jpg")["sample_id"] == "b000000000000002"
    assert explain(run, "pics/../pics/photo1.jpg")["sample_id"] == "b000000000000002"
    assert explain(run, str(root / "pics" / "photo1.jpg"))["sample_id"] == "b000000000000002"
    link = tmp_path / "elsewhere"
    os.symlink(root, link)  # the same file reached through a link resolves to the same source
    assert explain(run, str(link / "pics" / "photo1.jpg"))["sample_id"] == "b000000000000002"
    assert explain(run, "photo1.jpg")["sample_id"] == "b000000000000002"  # a unique ending
    with pytest.raises(NotFoundError):
        explain(run, str(tmp_path / "not-the-input" / "pics" / "photo1.jpg"))


def test_explain_finds_the_manifest_id_and_refuses_an_ambiguous_source(tmp_path):
    rows = [dict(sample_id=f"{i}000000000000000", source=src, kept=True, reasons=[], flags=[], split="train",
                 group_id=f"{i}000000000000000", checks=[], **{"meta.key": key})
            for i, (src, key) in enumerate([("m/a.jpg", "SKU-17"), ("m/b.jpg", "SKU-18"), ("m/b.jpg", "SKU-19")],
                                           start=1)]
    run = make_run(tmp_path, rows, extra={"meta.key": pa.string()})
    # config.resolved.toml of make_run records [input] id_column = "key"
    assert explain(run, "SKU-18")["sample_id"] == "2000000000000000"
    with pytest.raises(NotFoundError, match="matches 2 samples; give the sample_id"):
        explain(run, "m/b.jpg")
    assert main(["explain", str(run), "m/b.jpg"]) == 2
