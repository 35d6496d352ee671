"""What a run writes: manifest metadata carried to the ledger and the shards under a prefix."""
from __future__ import annotations

import csv

import pandas as pd
import pyarrow.parquet as pq

from curate import api

from conftest import make_small_corpus

FAST = ["embed.enabled=false", "agreement.enabled=false", "run.workers=1"]


def test_manifest_columns_reach_ledger_and_shards_with_a_prefix(tmp_path):
    root = make_small_corpus(tmp_path / "in", n=6)
    rows = []
    for i, img in enumerate(sorted(root.rglob("*.jpg"))):
        rows.append({"image": str(img.relative_to(root)), "caption": img.with_suffix(".txt").read_text(),
                     "item_id": f"KW-{i:03d}", "licence": "CC-BY-4.0" if i % 2 else "in-house",
                     "credit": f"photo {i}", "caption.checks": "a name that collides with ours"})
    manifest = root / "manifest.csv"
    with open(manifest, "w", newline="", encoding="utf-8") as f:
        w = csv.DictWriter(f, fieldnames=list(rows[0]))
        w.writeheader()
        w.writerows(rows)
    out = tmp_path / "out"
    api.run(None, input=str(manifest), out=str(out), sets=FAST + ['input.id_column="item_id"'])
    led = pq.read_table(out / "ledger.parquet").to_pandas()
    assert {"meta.licence", "meta.credit", "meta.item_id", "meta.caption.checks"} <= set(led.columns)
    assert sorted(led["meta.item_id"]) == [r["item_id"] for r in rows]
    shards = pd.concat([pd.read_parquet(p) for p in sorted((out / "shards").rglob("*.parquet"))])
    assert len(shards) == 6 and set(shards["meta.licence"]) == {"CC-BY-4.0", "in-house"}
    assert (shards.set_index("meta.item_id")["meta.credit"].to_dict()
            == {r["item_id"]: r["credit"] for r in rows})
