"""Growing corpora: per-sample results are reused whatever the shard boundaries do, so adding or
editing k samples recomputes O(k) of the expensive work (decoding, hashing, embedding)."""
from __future__ import annotations

import shutil

import pyarrow.parquet as pq
import pytest

from curate import api
from curate.layout import cut_shards

from conftest import make_small_corpus

DEMO = ['embed.model="demo"', 'embed.pretrained=""', "agreement.threshold=0.0", "run.workers=1",
        "input.shard_size=8"]


def test_shard_cuts_move_locally():
    ids = [f"{i:016x}" for i in range(3000)]
    before = {name for name, _, _ in cut_shards(ids, 64)}
    after = {name for name, _, _ in cut_shards(ids[:1500] + ["0000000000000abc"] + ids[1500:], 64)}
    assert len(before - after) <= 2  # one shard changed (and at most one neighbour re-cut)
    lengths = [n for _, _, n in cut_shards(ids, 64)]
    assert sum(lengths) == 3000 and max(lengths) <= 4 * 64


@pytest.fixture
def grown(tmp_path):
    root = make_small_corpus(tmp_path / "in", n=40)
    out = tmp_path / "out"
    api.run(None, input=str(root), out=str(out), sets=DEMO)
    return root, out


def _status(out):
    return api.status(out)["stages"]


def test_appending_one_image_embeds_exactly_one(grown, tmp_path):
    root, out = grown
    extra = make_small_corpus(tmp_path / "extra", n=1, seed=77)
    shutil.copy(extra / "b" / "item000.jpg", root / "aaa-new.jpg")
    (root / "aaa-new.txt").write_text("a speckled jug with a new glaze", encoding="utf-8")
    api.run(None, input=str(root), out=str(out), sets=DEMO)
    st = _status(out)
    for stage in ("inspect", "hashes", "embed"):
        assert st[stage]["samples_computed"] == 1, (stage, st[stage])
        assert st[stage]["samples_reused"] == 40
    led = {r["source"]: r for r in pq.read_table(out / "ledger.parquet").to_pylist()}
    assert led["aaa-new.jpg"]["agreement"] is not None


def test_editing_one_caption_decodes_nothing_and_embeds_one(grown):
    root, out = grown
    (root / "a" / "item005.txt").write_text("a completely different caption about a teapot", encoding="utf-8")
    api.run(None, input=str(root), out=str(out), sets=DEMO)
    st = _status(out)
    assert st["inspect"]["samples_computed"] == 0 and st["hashes"]["samples_computed"] == 0
    assert st["embed"]["samples_computed"] == 1


def test_removing_samples_recomputes_nothing_expensive(grown):
    root, out = grown
    for p in list((root / "a").glob("item01*")):
        p.unlink()
    api.run(None, input=str(root), out=str(out), sets=DEMO)
    st = _status(out)
    assert all(st[s]["samples_computed"] == 0 for s in ("inspect", "hashes", "embed")), st
