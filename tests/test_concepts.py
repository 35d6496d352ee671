"""The concepts stage: CLIP zero-shot concept probes (`concept:<name>`).

Scoring is checked against scipy's softmax (a reference implementation) and hand-computed
values; the demo watermark probe against sample_corpus/expected.csv; and the built-in real-world
concepts against public photos that ship with scikit-image, scikit-learn and matplotlib, on the
demo model (which knows only the invented Kilnworks pottery) and on a model at random
initialisation, neither of which knows any of them, so neither should flag them.
"""
from __future__ import annotations

import csv
import io
import json
import re
import warnings
from pathlib import Path

import numpy as np
import pyarrow as pa
import pytest

from curate.checks import CHECKS_TYPE
from curate.errors import ConfigError
from curate.stages import REGISTRY, concepts

from conftest import ROOT, pipeline_config, stage_call

DEMO_TOML = ROOT / "sample_corpus" / "curate.toml"
CPU = 'embed.device="cpu"'


# ----------------------------------------------------------------------------- scoring


def test_score_matches_a_hand_computed_softmax():
    # Softmax over scale * cosine (CLIP zero-shot, Radford et al. 2021, arXiv 2103.00020, sec. 3.1.2).
    # Image (1, 0); prompt (1, 0): cosine 1; counter-prompt (0, 1): cosine 0; scale 2:
    # e^2 / (e^2 + e^0) = 7.389056 / 8.389056 = 0.880797 (hand-computed).
    img = np.array([[1.0, 0.0]])
    s = concepts.concept_score(img, np.array([[1.0, 0.0]]), np.array([[0.0, 1.0]]), 2.0)
    assert s[0] == pytest.approx(0.880797, abs=1e-6)
    # With the none-of-these option at cosine 0.5: e^2 / (e^2 + e^0 + e^1) = 7.389056 / 11.107338 = 0.665241.
    s = concepts.concept_score(img, np.array([[1.0, 0.0]]), np.array([[0.0, 1.0]]), 2.0, match_cosine=0.5)
    assert s[0] == pytest.approx(0.665241, abs=1e-6)
    # Off (-1) is the same as no option.
    assert concepts.concept_score(img, np.array([[1.0, 0.0]]), np.array([[0.0, 1.0]]), 2.0, -1.0)[0] == \
        pytest.approx(0.880797, abs=1e-6)


def test_score_agrees_with_scipy_softmax():
    # Reference implementation: scipy.special.softmax; the score is the mass on the first k entries.
    from scipy.special import softmax

    rng = np.random.default_rng(0)
    img = rng.normal(size=(50, 16))
    pe, ce = rng.normal(size=(3, 16)), rng.normal(size=(5, 16))
    pe /= np.linalg.norm(pe, axis=1, keepdims=True)
    ce /= np.linalg.norm(ce, axis=1, keepdims=True)
    unit = img / np.linalg.norm(img, axis=1, keepdims=True)
    for scale, match in ((100.0, None), (14.3, 0.2), (1.0, -0.3)):
        logits = scale * np.concatenate([unit @ pe.T, unit @ ce.T] +
                                        ([np.full((50, 1), match)] if match is not None else []), axis=1)
        ref = softmax(logits, axis=1)[:, :3].sum(axis=1) if match is None else \
            softmax(np.concatenate([logits[:, :8], np.full((50, 1), scale * match)], axis=1), axis=1)[:, :3].sum(1)
        got = concepts.concept_score(img, pe, ce, scale, match)  # un-normalised rows are normalised first
        np.testing.assert_allclose(got, ref, rtol=1e-9, atol=1e-12)


def test_prompts_equal_to_counter_prompts_score_one_half():
    # A probe that cannot tell its prompts from its counter-prompts puts half the mass on each
    # (softmax of equal logits), whatever the image: it never reaches a threshold above 0.5.
    rng = np.random.default_rng(1)
    img = rng.normal(size=(200, 32))
    pe = rng.normal(size=(4, 32))
    s = concepts.concept_score(img, pe, pe.copy(), 100.0)
    np.testing.assert_allclose(s, 0.5, atol=1e-12)
    with_match = concepts.concept_score(img, pe, pe.copy(), 100.0, match_cosine=0.0)
    assert (with_match <= 0.5 + 1e-12).all() and (with_match < 0.49).any()
    # And the config refuses a threshold at or below the chance level k / (k + m).
    prompts = json.dumps(["a photo of a dog", "a photo of a cat"])
    with pytest.raises(ConfigError, match="chance level"):
        pipeline_config(f"concepts.probes.pets.prompts={prompts}", f"concepts.probes.pets.counter_prompts={prompts}",
                        "concepts.probes.pets.threshold=0.5")


def test_empty_and_zero_rows():
    assert concepts.concept_score(np.zeros((0, 8)), np.ones((2, 8)), np.ones((2, 8)), 10.0).shape == (0,)
    s = concepts.concept_score(np.zeros((2, 8)), np.eye(8)[:2], np.eye(8)[2:4], 10.0)
    assert np.isnan(s).all()  # no direction: no score


def _emb_table(rows: list[np.ndarray | None], dim: int) -> pa.Table:
    vec = pa.list_(pa.float16(), dim)
    flat = np.concatenate([(r if r is not None else np.zeros(dim)).astype(np.float16) for r in rows]) if rows else \
        np.zeros(0, np.float16)
    arr = pa.FixedSizeListArray.from_arrays(pa.array(flat, pa.float16()), type=vec,
                                            mask=pa.array([r is None for r in rows], pa.bool_()))
    return pa.table({"sample_id": [f"s{i}" for i in range(len(rows))], "image_emb": arr})


DEMO_DIM = 128


def test_stage_on_empty_input_and_on_rows_without_embeddings():
    cfg = pipeline_config(CPU, path=DEMO_TOML)
    names = [p.name for p in concepts.probes(cfg.concepts)]
    out = stage_call("concepts", _emb_table([], DEMO_DIM), cfg=cfg)
    assert out.num_rows == 0
    assert out.schema.field("concepts").type == pa.struct([pa.field(n, pa.float32()) for n in names])
    assert out.schema.field("concepts.checks").type == CHECKS_TYPE
    out = stage_call("concepts", _emb_table([None, None], DEMO_DIM), cfg=cfg)
    assert out.column("concepts").to_pylist() == [None, None]
    assert out.column("concepts.checks").to_pylist() == [[], []]


def test_stage_records_one_check_per_concept_with_score_and_threshold():
    cfg = pipeline_config(CPU, path=DEMO_TOML)
    rng = np.random.default_rng(2)
    out = stage_call("concepts", _emb_table([rng.normal(size=DEMO_DIM), None], DEMO_DIM), cfg=cfg)
    checks = out.column("concepts.checks").to_pylist()
    plist = concepts.probes(cfg.concepts)
    assert [c["code"] for c in checks[0]] == [f"concept:{p.name}" for p in plist]
    scores = out.column("concepts").to_pylist()[0]
    for c, p in zip(checks[0], plist):
        assert c["threshold"] == pytest.approx(p.threshold) and c["op"] == "<" and c["unit"] is None
        assert c["value"] == pytest.approx(scores[p.name], abs=1e-6)
        assert c["failed"] == (c["value"] >= p.threshold)
        assert c["detail"].startswith("closest prompt (cosine ")
    assert checks[1] == []


# ----------------------------------------------------------------------------- config and declaration


def test_family_defaults_to_quarantine_and_routes_there():
    from curate import decide
    from curate.stages import all_checks

    spec = all_checks()["concept"]
    assert spec.action == "quarantine" and "quarantine" in spec.allowed
    actions = decide.Actions(all_checks())
    assert actions.action("concept:watermark") == "quarantine"
    rec = {"code": "concept:weapons", "failed": True, "value": 0.9, "threshold": 0.8, "op": "<", "unit": "",
           "detail": None}
    v = decide.verdict([("concepts", pa.array([[rec]], type=CHECKS_TYPE))], {}, {}, actions, 1)
    assert list(v.kept) == [True] and list(v.quarantined) == [True] and v.flags.to_pylist() == [["concept:weapons"]]
    st = REGISTRY["concepts"]
    assert (st.kind, st.phase, st.alive_only, st.sections) == ("shard", "model", True, ("embed", "input"))


def test_entries_merge_by_name_over_the_built_in_list():
    cfg = pipeline_config("concepts.probes.weapons.threshold=0.9", "concepts.probes.medical.enabled=false")
    probes = cfg.concepts.probes
    assert list(probes) == list(concepts.DEFAULT_PROBES)
    assert probes["weapons"]["threshold"] == 0.9
    assert probes["weapons"]["prompts"] == concepts.DEFAULT_PROBES["weapons"]["prompts"]
    assert "medical" not in [p.name for p in concepts.probes(cfg.concepts)]
    demo = pipeline_config(path=DEMO_TOML).concepts.probes
    assert set(demo) == set(concepts.DEFAULT_PROBES)  # the demo replaces `watermark`, keeps the others
    assert demo["watermark"]["prompts"][0].startswith("product photo of a mug")


@pytest.mark.parametrize("setting, message", [
    ("concepts.probes.Bad-Name.threshold=0.9", "lower-case"),
    ("concepts.probes.weapons.colour=1", "unknown keys"),
    ("concepts.probes.newthing.threshold=0.9", "prompts must be a non-empty list"),
    ('concepts.probes.weapons.prompts=[]', "prompts must be a non-empty list"),
    ("concepts.probes.weapons.threshold=1.5", "must lie in"),
    ('concepts.probes.weapons.threshold="high"', "must be a number"),
    ("concepts.match_cosine=2", "match_cosine"),
    ("concepts.temperature=-1", "temperature"),
])
def test_bad_settings_are_refused(setting, message):
    with pytest.raises(ConfigError, match=message):
        pipeline_config(setting)


def test_a_model_without_a_match_level_is_refused_at_plan_time(tmp_path):
    # A model with no agreement default (here a tiny open_clip config at random initialisation) has no
    # known match level: the plan names the setting to give.
    from curate.plan import build_plan

    cfg_json, weights = _tiny_model(tmp_path)
    sets = [f"embed.model={json.dumps(cfg_json)}", f"embed.pretrained={json.dumps(weights)}", CPU,
            "agreement.mode=percentile"]
    with pytest.raises(ConfigError, match="concepts.match_cosine"):
        build_plan(pipeline_config(*sets))
    build_plan(pipeline_config(*sets, "concepts.match_cosine=0.3"))


def test_docs_table_lists_every_built_in_prompt():
    text = (ROOT / "docs" / "concepts.md").read_text(encoding="utf-8")
    for name, entry in concepts.DEFAULT_PROBES.items():
        assert f"`{name}`" in text
        for prompt in entry["prompts"] + entry["counter_prompts"]:
            assert prompt in text, (name, prompt)
        assert re.search(rf"`{name}`[^\n]*\| {entry['threshold']} \|", text), name


# ----------------------------------------------------------------------------- models


TINY = {  # an open_clip model config small enough to build in a test (as in tests/test_embed.py)
    "embed_dim": 32,
    "vision_cfg": {"image_size": 32, "patch_size": 8, "width": 64, "layers": 2, "head_width": 32},
    "text_cfg": {"context_length": 77, "vocab_size": 49408, "width": 64, "heads": 2, "layers": 2},
}


def _tiny_model(tmp: Path) -> tuple[str, str]:
    import torch
    from safetensors.torch import save_file

    from curate.models import clip as clipmod

    torch.manual_seed(7)
    net = clipmod.build_from_config({"model_cfg": TINY}).eval()
    (tmp / "tiny.json").write_text(json.dumps({"model_cfg": TINY}), encoding="utf-8")
    save_file({k: v.contiguous() for k, v in net.state_dict().items()}, str(tmp / "tiny.safetensors"))
    return str(tmp / "tiny.json"), str(tmp / "tiny.safetensors")


def public_photos() -> dict[str, np.ndarray]:
    """Real photos and pictures that ship inside general-purpose packages (no download)."""
    import matplotlib.cbook as cbook
    import skimage.data as data
    from PIL import Image
    from sklearn.datasets import load_sample_image

    out = {}
    for name in ("astronaut", "coffee", "chelsea", "rocket", "camera", "coins", "horse", "hubble_deep_field",
                 "immunohistochemistry", "page", "text", "retina", "brick", "grass", "gravel", "logo",
                 "colorwheel", "moon", "clock", "checkerboard"):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            a = getattr(data, name)()
        out[f"skimage.data.{name}"] = a
    for name in ("china.jpg", "flower.jpg"):
        out[f"sklearn {name}"] = load_sample_image(name)
    with cbook.get_sample_data("grace_hopper.jpg") as f:
        out["matplotlib grace_hopper.jpg"] = np.asarray(Image.open(f).convert("RGB"))
    return out


def _jpeg(a: np.ndarray) -> bytes:
    from PIL import Image

    if a.dtype == bool:
        a = a.astype(np.uint8) * 255
    buf = io.BytesIO()
    Image.fromarray(a).convert("RGB").save(buf, "JPEG", quality=95)
    return buf.getvalue()


def _embedded(paths_or_bytes: list, sets: list[str], tmp: Path | None = None) -> pa.Table:
    """Run the embed stage (the pipeline's own decoding) on files or image bytes."""
    import hashlib

    locs = []
    for i, item in enumerate(paths_or_bytes):
        if isinstance(item, bytes):
            p = tmp / f"img{i:03d}.jpg"
            p.write_bytes(item)
            item = p
        locs.append(str(item))
    table = pa.table({"sample_id": [f"s{i:04d}" for i in range(len(locs))], "locator": locs,
                      "decoded": [True] * len(locs),
                      "sha256": [hashlib.sha256(Path(p).read_bytes()).hexdigest() for p in locs],
                      "caption": ["a photo"] * len(locs)})
    emb = stage_call("embed", table, *sets)
    return emb.select(["sample_id", "image_emb"])


def _flags(out: pa.Table) -> dict[str, np.ndarray]:
    """concept name -> bool per row (failed check)."""
    res: dict[str, list[bool]] = {}
    for chks in out.column("concepts.checks").to_pylist():
        for c in chks:
            res.setdefault(c["code"].split(":", 1)[1], []).append(c["failed"])
    return {k: np.array(v) for k, v in res.items()}


def _corpus_rows() -> list[dict]:
    with open(ROOT / "sample_corpus" / "expected.csv", encoding="utf-8") as f:
        rows = list(csv.DictReader(f))
    # Images that decode, except the two 100+ megapixel bilevel PNGs (the pipeline drops them first).
    return [r for r in rows if r["width"] and int(r["width"]) * int(r["height"]) <= 50_000_000]


@pytest.fixture(scope="module")
def demo_corpus_scores(sample_corpus):
    rows = _corpus_rows()
    sets = [CPU]
    cfg = pipeline_config(*sets, path=DEMO_TOML)
    emb = _embedded([sample_corpus / r["source"] for r in rows], [CPU, 'embed.model="demo"', 'embed.pretrained=""'])
    out = stage_call("concepts", emb, cfg=cfg)
    return rows, out


def test_demo_watermark_probe_recall_and_false_alarms(demo_corpus_scores):
    # The demo world's own concept: expected.csv plants photos with the shop watermark stamped across
    # them (reason watermark, with a note that says so); every other photo carries none, except two
    # near-duplicate copies with a small "(c) KILNWORKS" corner stamp, which are left out of both counts.
    rows, out = demo_corpus_scores
    flagged = _flags(out)["watermark"]
    pos = np.array([r["reason"] == "watermark" and "stamped across" in r["note"] for r in rows])
    corner = np.array(["corner watermark" in r["note"] for r in rows])
    neg = ~pos & ~corner
    recall = flagged[pos].mean()
    false_alarm = flagged[neg].mean()
    scores = np.array([s["watermark"] for s in out.column("concepts").to_pylist()])
    print(f"\ndemo watermark probe: recall {flagged[pos].sum()}/{pos.sum()} = {recall:.3f}, false alarms "
          f"{flagged[neg].sum()}/{neg.sum()} = {false_alarm:.4f}; corner-stamp copies flagged "
          f"{flagged[corner].sum()}/{corner.sum()}; score median watermarked {np.median(scores[pos]):.3f}, "
          f"clean {np.median(scores[neg]):.4f}")
    assert pos.sum() >= 24 and neg.sum() >= 250
    assert recall >= RECALL_FLOOR
    assert false_alarm <= FALSE_ALARM_CEILING


# Bars below what the shipped demo model measured (docs/concepts.md): on the demo corpus 18 of 30
# stamped photos at 5 false alarms among about 300 clean ones; on 1,000 held-out scenes (half
# stamped; clip_demo.json's concept_calibration) 0.75 at 0.012. A probe that flags at random
# cannot pass both.
RECALL_FLOOR = 0.5
FALSE_ALARM_CEILING = 0.03


def test_built_in_concepts_stay_quiet_on_the_demo_corpus(demo_corpus_scores):
    # The demo model was trained only on invented pottery scenes: it knows none of the built-in
    # real-world concepts, and the demo corpus shows none of them.
    rows, out = demo_corpus_scores
    flags = _flags(out)
    counts = {k: int(v.sum()) for k, v in flags.items() if k != "watermark"}
    print(f"\nbuilt-in concepts on the demo corpus ({len(rows)} images), demo model: {counts}")
    assert sum(counts.values()) <= 0.01 * len(rows) * len(counts)


@pytest.fixture(scope="module")
def photo_files(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("photos")
    photos = public_photos()
    return list(photos), [_jpeg(a) for a in photos.values()], tmp


def _public_flags(photo_files, sets: list[str], match: str | None) -> tuple[dict[str, int], int]:
    names, blobs, tmp = photo_files
    model_sets = [s for s in sets if s.startswith("embed.")] + [CPU]
    emb = _embedded(blobs, model_sets, tmp)
    extra = [] if match is None else [f"concepts.match_cosine={match}"]
    out = stage_call("concepts", emb, *model_sets, *extra)
    return {k: int(v.sum()) for k, v in _flags(out).items()}, len(names)


def test_built_in_concepts_stay_quiet_on_public_photos_with_the_demo_model(photo_files):
    # Public photos (scikit-image, scikit-learn, matplotlib samples) are far from anything the demo
    # model saw. With the model's match level (its calibrated agreement threshold) the probes of
    # concepts it never learned stay quiet; without it (match_cosine = -1) arbitrary cosines of
    # unknown words and unfamiliar images turn into confident softmax scores. The watermark is the
    # one concept the demo model was taught (on its own drawn scenes): its built-in probe is held to
    # "not everything" (measured: 4 of 23, one of them scikit-image's photo of printed text).
    demo = ['embed.model="demo"', 'embed.pretrained=""']
    quiet, n = _public_flags(photo_files, demo, None)
    loud, _ = _public_flags(photo_files, demo, "-1")
    print(f"\npublic photos ({n}), demo model, built-in concepts flagged: with the match level {quiet}; "
          f"without it {loud}")
    assert sum(v for k, v in quiet.items() if k != "watermark") <= 1
    assert quiet["watermark"] <= n // 4 and sum(quiet.values()) < sum(loud.values())


def test_random_model_flags_nothing_with_a_match_level(photo_files, tmp_path):
    # A model at random initialisation knows nothing. It has no agreement default, so the plan asks
    # for concepts.match_cosine (previous test); given LAION's 0.28, nothing is flagged. Without a
    # match level its image embeddings are nearly parallel, so each concept's score is almost the
    # same on every image: a concept flags nearly all images or none (printed, not asserted).
    cfg_json, weights = _tiny_model(tmp_path)
    sets = [f"embed.model={json.dumps(cfg_json)}", f"embed.pretrained={json.dumps(weights)}"]
    quiet, n = _public_flags(photo_files, sets, "0.28")
    loud, _ = _public_flags(photo_files, sets, "-1")
    print(f"\npublic photos ({n}), random tiny model, built-in concepts flagged: match level 0.28 {quiet}; "
          f"without one {loud}")
    assert sum(quiet.values()) == 0
