"""Engine parity: the Ray engine and the local engine write the same ledger and shards."""
from __future__ import annotations

import json

import pyarrow.parquet as pq
import pytest

from curate import api

from conftest import make_small_corpus

ray = pytest.importorskip("ray")


def test_ray_and_local_give_identical_outputs(tmp_path):
    corpus = make_small_corpus(tmp_path / "c", 24)
    sets = ["input.shard_size=6", "run.workers=1", "run.ray_task_cpus=0.5"]
    sets += ["embed.enabled=false", "agreement.enabled=false"]  # CPU-light here; the model stages have their own tests
    api.run(None, input=str(corpus), out=str(tmp_path / "local"), sets=sets, engine="local")
    res = api.run(None, input=str(corpus), out=str(tmp_path / "ray"), sets=sets, engine="ray")
    assert res.ran["inspect"] == 4
    a = pq.read_table(tmp_path / "local" / "ledger.parquet")
    b = pq.read_table(tmp_path / "ray" / "ledger.parquet")
    assert a.equals(b)
    ma = json.loads((tmp_path / "local" / "manifest.json").read_text())["shards"]
    mb = json.loads((tmp_path / "ray" / "manifest.json").read_text())["shards"]
    assert [s["sha256"] for s in ma] == [s["sha256"] for s in mb]
