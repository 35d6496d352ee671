"""The stage graph: declared columns, one verdict, cheap checks first, groups that keep a member,
contract tests over every registered stage, a stage from one module outside the package, and
every allowed config either running or being refused before any work."""
from __future__ import annotations

import json
import re
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from PIL import Image

from curate import api, decide, plugins
from curate.errors import ConfigError, CurateError
from curate.execute import call_stage
from curate.layout import hstack
from curate.plan import build_plan
from curate.sources import list_samples
from curate.stages import REGISTRY, all_checks
from curate.stages.base import unregister

from conftest import ROOT, make_small_corpus, pipeline_config, textured

DEMO = ['embed.model="demo"', 'embed.pretrained=""']
NO_MODEL = ["embed.enabled=false", "agreement.enabled=false"]


def _photo(seed: int, size: tuple[int, int]) -> Image.Image:
    """A random picture with grain (a test fixture, not the demo corpus)."""
    rng = np.random.default_rng(seed)
    return textured(rng.integers(0, 255, (6, 8, 3)).astype(np.uint8), size, rng)


def _sample(root: Path, name: str, img: Image.Image | None, caption: str | None, data: bytes | None = None) -> None:
    path = root / name
    if data is not None:
        path.write_bytes(data)
    else:
        img.save(path, quality=92)
    if caption is not None:
        path.with_suffix(".txt").write_text(caption, encoding="utf-8")


@pytest.fixture(scope="module")
def corpus(tmp_path_factory) -> Path:
    """Good photos, a big photo whose caption carries an e-mail address and its clean resize, an
    exact copy, a thumbnail, a broken file, a sample without caption, and a greyscale photo."""
    root = make_small_corpus(tmp_path_factory.mktemp("graph") / "in", n=8)
    big = _photo(101, (800, 600))
    _sample(root, "big.jpg", big, "a large stoneware jar, questions to jo.potter@example.org")
    _sample(root, "small.jpg", big.resize((640, 480), Image.Resampling.LANCZOS), "a large stoneware jar")
    _sample(root, "copy.jpg", None, "the same red mug again", data=(root / "b" / "item000.jpg").read_bytes())
    _sample(root, "thumb.jpg", _photo(102, (100, 80)), "a small thumbnail of a bowl")
    _sample(root, "broken.jpg", None, "a picture that is not one", data=b"this is not an image at all" * 200)
    _sample(root, "nocap.jpg", _photo(103, (400, 300)), None)
    _sample(root, "grey.jpg", _photo(104, (400, 300)).convert("L").convert("RGB"), "a plain grey vase on a table")
    return root


def _ledger(out: Path) -> dict[str, dict]:
    return {r["source"]: r for r in pq.read_table(out / "ledger.parquet").to_pylist()}


# --------------------------------------------------------------------------- reproducers


def test_a_dropped_keeper_never_takes_its_group_with_it(corpus, tmp_path):
    # big.jpg (800x600, caption with an e-mail address) and its 640x480 resize small.jpg; personal
    # data set to drop. big.jpg has more pixels, but it is dropped before groups form, so the clean
    # copy stays.
    out = tmp_path / "out"
    api.run(None, input=str(corpus), out=str(out), sets=NO_MODEL + ['decide.actions={pii="drop"}'])
    led = _ledger(out)
    assert led["big.jpg"]["kept"] is False and led["big.jpg"]["reasons"] == ["pii:email"]
    assert led["small.jpg"]["kept"] is True, led["small.jpg"]["reasons"]
    skipped = [c for c in led["big.jpg"]["checks"] if c["stage"] == "neardup"]
    assert [c["status"] for c in skipped] == ["skipped"] and "pii:email" in skipped[0]["detail"]


def test_every_duplicate_points_at_a_kept_sample(corpus, tmp_path):
    out = tmp_path / "out"
    api.run(None, input=str(corpus), out=str(out), sets=NO_MODEL)
    led = _ledger(out)
    by_id = {r["sample_id"]: r for r in led.values()}
    dups = [r for r in led.values() if "duplicate" in r["reasons"]]
    # The flagged big.jpg (personal data in its caption) loses its group to the clean resize.
    assert {r["source"] for r in dups} == {"big.jpg", "copy.jpg"}
    assert all(by_id[r["dup_of"]]["kept"] for r in dups)


def _cli(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "curate.cli", *args], capture_output=True, text=True, cwd=ROOT)


@pytest.mark.parametrize("sets,key", [
    (["inspect.enabled=false"] + NO_MODEL, "inspect.enabled"),
    (["caption.enabled=false"] + DEMO, "caption.enabled"),
    (["embed.enabled=false"], "embed.enabled"),
])
def test_a_config_that_cannot_run_is_refused_before_any_work(corpus, tmp_path, sets, key):
    out = tmp_path / "out"
    r = _cli("run", "--input", str(corpus), "--out", str(out), *[a for s in sets for a in ("--set", s)])
    assert r.returncode == 2, r.stderr
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and key in lines[0] and "Traceback" not in r.stderr
    assert not out.exists()  # refused before the lock, the listing or any stage


def test_a_caption_audit_without_images_runs(corpus, tmp_path):
    # No image stage and no shards: the plan has nothing that needs pixels, so it runs.
    out = tmp_path / "out"
    sets = NO_MODEL + [f"{s}.enabled=false" for s in ("inspect", "hashes", "neardup", "pack")]
    api.run(None, input=str(corpus), out=str(out), sets=sets)
    led = _ledger(out)
    assert len(led) == 15 and led["nocap.jpg"]["reasons"] == ["caption_missing"]
    assert led["big.jpg"]["flags"] == ["pii:email"] and led["big.jpg"]["width"] is None


def test_dropped_samples_are_not_embedded(corpus, tmp_path):
    out = tmp_path / "out"
    api.run(None, input=str(corpus), out=str(out), sets=DEMO + ["agreement.threshold=-1"])
    led = _ledger(out)
    early = [r for r in led.values() if r["stopped_at"] in ("inspect", "caption", "caption_repeats")]
    assert early and all(r["agreement"] is None for r in early)
    for r in early:
        embed = [c for c in r["checks"] if c["stage"] == "embed"]
        assert embed and all(c["status"] == "skipped" for c in embed)
    status = api.status(out)["stages"]
    alive = sum(1 for r in led.values() if r["stopped_at"] not in ("inspect", "caption", "caption_repeats"))
    assert status["embed"]["samples_computed"] == alive < len(led)


def test_an_action_change_reruns_only_what_depends_on_it(corpus, tmp_path):
    out = tmp_path / "out"
    api.run(None, input=str(corpus), out=str(out), sets=NO_MODEL)
    res = api.run(None, input=str(corpus), out=str(out), sets=NO_MODEL + ['decide.actions={pii="drop"}'])
    # The per-sample checks and the corpus-wide caption check do not read [decide]: all reused.
    for name in ("inspect", "hashes", "caption", "risk", "caption_repeats"):
        assert res.ran.get(name, 0) == 0 and res.reused.get(name, 0) > 0, name
    assert res.ran.get("neardup") == 1  # it sees one sample fewer now
    again = api.run(None, input=str(corpus), out=str(out), sets=NO_MODEL + ['decide.actions={pii="drop"}'])
    assert sum(again.ran.values()) == 0


# --------------------------------------------------------------------------- contract tests


def _through(cfg, table: pa.Table) -> tuple[pa.Table, dict[str, tuple[pa.Table, pa.Table]]]:
    """Every active stage in plan order on one table, live rows as the runner computes them.
    Returns the joined table and, per stage, (its input, its output)."""
    plan = build_plan(cfg)
    actions = decide.actions_for(cfg)
    seen: dict[str, tuple[pa.Table, pa.Table]] = {}
    checks: list = []
    for ps in plan.stages:
        rows = None
        if ps.stage.alive_only:
            rows = np.flatnonzero(decide.alive(checks, actions, table.num_rows)).tolist()
        flags = [[] for _ in rows] if rows is not None and "flags_before" in ps.needs else None
        out = call_stage(ps.name, table, cfg, rows, flags)
        seen[ps.name] = (table, out)
        table = hstack([table, out], ps.name)
        checks.append(table.column(ps.stage.checks_column))
    return table, seen


@pytest.fixture(scope="module")
def through(corpus, tmp_path_factory):
    bench = tmp_path_factory.mktemp("bench")
    shutil.copy(corpus / "a" / "item001.jpg", bench / "leak.jpg")
    # A probe on the demo model's embeddings, so the probes stage is in the contract run too (its weights are
    # arbitrary numbers: a fixture, not a trained filter).
    from curate import probes as probelib
    from curate.models import clip as clipmod

    probe = probelib.new_probe(np.random.default_rng(0).normal(size=128), 0.0, name="contract", features="image",
                               model=clipmod.identity("demo", ""), threshold=0.5)
    probe_path, _ = probelib.save_probe(probe, bench.parent / "contract.safetensors")
    cfg = pipeline_config(*DEMO, "agreement.threshold=0.0", f'split.eval_sets=["{bench}"]', "split.eval_fraction=0.3",
                          f'input.path="{corpus}"', f'probes.apply.contract={{path="{probe_path}"}}')
    src = list_samples(cfg.input)
    return cfg, src, _through(cfg, src)[1]


def test_every_registered_stage_ran_in_the_contract_run(through):
    _, _, seen = through
    assert set(seen) == set(REGISTRY), set(REGISTRY) - set(seen)


@pytest.mark.parametrize("name", sorted(REGISTRY))
def test_stage_contract(through, name):
    cfg, src, seen = through
    st = REGISTRY[name]
    inp, out = seen[name]
    view = st.view(cfg)
    declared = st.columns(view)
    # It declares what it provides, with Arrow types, and its reason codes.
    assert all(isinstance(c.type, pa.DataType) for c in declared)
    assert len({c.name for c in declared}) == len(declared)
    assert all(c.action in c.allowed for c in st.checks)
    # One row per input row, in order, with exactly the declared columns and its checks.
    assert out.column("sample_id").equals(src.column("sample_id"))
    assert out.column_names == ["sample_id", *[c.name for c in declared], st.checks_column]
    for c in declared:
        assert out.schema.field(c.name).type == c.type, c.name
    # Check records are typed and name only the stage's own codes.
    own = {c.code for c in st.checks}
    for recs in out.column(st.checks_column).to_pylist():
        for r in recs:
            assert r["code"] in own or r["code"].split(":", 1)[0] in own, r["code"]
            assert r["value"] is None or isinstance(r["value"], float)
    # A per-shard stage is a pure function of its rows: reversed order, same answer per sample.
    if st.kind == "shard" and not st.alive_only:
        rev = inp.take(pa.array(np.arange(inp.num_rows)[::-1]))
        again = call_stage(name, rev, cfg)
        transient = {c.name for c in declared if c.transient}
        keep = [c for c in out.column_names if c not in transient]
        want = {r["sample_id"]: r for r in out.select(keep).to_pylist()}
        assert {r["sample_id"]: r for r in again.select(keep).to_pylist()} == want


def test_contract_run_covers_bad_samples(through):
    _, src, seen = through
    checks = seen["inspect"][1].column("inspect.checks").to_pylist()
    failed = {c["code"] for recs in checks for c in recs if c["failed"]}
    assert {"not_image", "short_side_small"} <= failed  # the stages above met broken and small inputs


def test_every_stage_and_code_is_in_the_readme():
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    table = readme.split("## Stages", 1)[1].split("\n## ", 1)[0]
    for name in REGISTRY:
        assert f"| `{name}` |" in table, f"README's stage table lacks {name}"
    for code in all_checks():
        assert f"`{code}" in readme, f"README's reason table lacks {code}"


# --------------------------------------------------------------------------- a stage from outside


def _docs_example() -> str:
    text = (ROOT / "docs" / "stages.md").read_text(encoding="utf-8")
    part = text.split("## A complete example", 1)[1]
    return re.findall(r"```python\n(.*?)```", part, re.S)[0]


@pytest.fixture
def colour_plugin(tmp_path):
    folder = tmp_path / "plugin"
    folder.mkdir()
    (folder / "colour.py").write_text(_docs_example(), encoding="utf-8")
    (folder / "curate.toml").write_text('[run]\nplugins = ["colour.py"]\n\n[colour]\nmin_colourfulness = 3.0\n',
                                        encoding="utf-8")
    yield folder
    unregister("colour")
    plugins._LOADED.pop(str(folder / "colour.py"), None)


def test_the_documented_example_stage_runs_end_to_end(corpus, colour_plugin, tmp_path):
    out = tmp_path / "out"
    api.run(colour_plugin / "curate.toml", input=str(corpus), out=str(out), sets=NO_MODEL)
    led = _ledger(out)
    assert "image_greyscale" in led["grey.jpg"]["flags"]
    assert led["grey.jpg"]["colourfulness"] < 3.0 < led["big.jpg"]["colourfulness"]
    assert led["broken.jpg"]["colourfulness"] is None
    rec = [c for c in api.explain(out, "grey.jpg")["checks"] if c["code"] == "image_greyscale"][0]
    assert rec["stage"] == "colour" and rec["status"] == "fail" and rec["threshold"] == 3.0 and rec["op"] == ">="
    # The stage's work is cached like any other: a second run reuses it.
    again = api.run(colour_plugin / "curate.toml", input=str(corpus), out=str(out), sets=NO_MODEL)
    assert again.ran.get("colour", 0) == 0 and again.reused["colour"] > 0


def test_the_example_stage_runs_in_worker_processes_from_the_cli(corpus, colour_plugin, tmp_path):
    out = tmp_path / "out"
    r = _cli("run", str(colour_plugin / "curate.toml"), "--input", str(corpus), "--out", str(out),
             "--set", "run.workers=2", "--set", "input.shard_size=5", *[a for s in NO_MODEL for a in ("--set", s)])
    assert r.returncode == 0, r.stderr
    assert "image_greyscale" in _ledger(out)["grey.jpg"]["flags"]


def test_a_plugin_that_fails_to_import_is_a_config_error(corpus, tmp_path):
    (tmp_path / "bad.py").write_text("raise RuntimeError('kiln too hot')\n", encoding="utf-8")
    with pytest.raises(ConfigError, match="kiln too hot"):
        api.run(None, input=str(corpus), out=str(tmp_path / "out"), sets=[f'run.plugins=["{tmp_path / "bad.py"}"]'])


# --------------------------------------------------------------------------- every allowed config


STAGE_SECTIONS = ("inspect", "caption", "hashes", "risk", "embed", "agreement", "neardup", "split", "pack")
ACTION_CODES = {"pii": ("drop", "flag", "keep"), "short_side_small": ("drop", "flag", "keep"),
                "caption_missing": ("drop", "flag", "keep"), "duplicate": ("drop", "flag", "keep"),
                "agreement_low": ("drop", "flag", "keep"), "caption_repeated": ("drop", "keep"),
                "file_small": ("flag", "keep")}


@st.composite
def _configs(draw):
    sets = [f"{s}.enabled={str(draw(st.booleans())).lower()}" for s in STAGE_SECTIONS]
    acts = draw(st.dictionaries(st.sampled_from(sorted(ACTION_CODES)), st.just(None), max_size=3))
    if acts:
        sets.append("decide.actions={" + ", ".join(f'"{c}"="{draw(st.sampled_from(ACTION_CODES[c]))}"'
                                                   for c in sorted(acts)) + "}")
    sets.append(f"split.eval_fraction={draw(st.sampled_from([0.0, 0.3]))}")
    return sets


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow,
                                                                 HealthCheck.function_scoped_fixture])
@given(sets=_configs())
def test_every_allowed_config_runs_or_is_refused_at_plan_time(corpus, tmp_path_factory, sets):
    out = tmp_path_factory.mktemp("combo") / "out"
    sets = sets + DEMO + ["agreement.threshold=0.2", "run.workers=1", "inspect.min_file_bytes=0"]
    try:
        api.run(None, input=str(corpus), out=str(out), sets=sets)
    except CurateError as e:
        assert isinstance(e, ConfigError) and e.exit_code == 2, e
        assert not out.exists(), "refused after work had started"
        return
    led = _ledger(out)
    assert len(led) == 15  # every input has a ledger row
    by_id = {r["sample_id"]: r for r in led.values()}
    for r in led.values():
        assert r["kept"] == (not r["reasons"])
        if "duplicate" in r["reasons"]:
            # A group loses a member to `duplicate` only while its kept sample stays.
            assert by_id[r["dup_of"]]["kept"], (r["source"], by_id[r["dup_of"]]["reasons"])
    summary = json.loads((out / "summary.json").read_text())
    assert summary["samples"] == 15 and summary["kept"] == sum(r["kept"] for r in led.values())
