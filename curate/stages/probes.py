"""probes: apply probes trained with `curate probe train` (curate.probes) to every live sample.

Each entry of `[probes] apply` names a probe file and what a hit does:

    [probes.apply]
    teapot = { path = "probes/teapot.safetensors", action = "flag" }   # or "drop", "quarantine", "keep"

A probe is a logistic regression on the run's CLIP image embeddings (and caption embeddings, for
probes trained with --text), applied with NumPy. A sample scoring at or above the probe's trained
threshold fails the check `probe:<name>` (value: the probability). Scores go to the ledger column
`probes`, a struct with one float32 field per probe (DuckDB: `probes.teapot`). The plan refuses,
before any work, a probe file that is missing or damaged, and one trained on another CLIP model
(its weights sha256 differs from this run's). The inference path ([embed] backend and precision) is
not part of that check: a probe trained on one path applies on any path of the same weights. fp32 on
ONNX Runtime or OpenVINO gives torch fp32's embeddings to float rounding, `auto` picks only paths within
its tolerance of torch fp32, and a path named outright (int8, bf16) is the user's choice, recorded in
the manifest; a changed path re-runs this stage (its input embeddings' fingerprint holds the path).
Relative paths are relative to the config file.
Flags are screening aids for human review: a probe knows only what its labels showed it.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pyarrow as pa

from .. import probes as probelib
from ..checks import CHECKS_TYPE, check
from ..errors import ConfigError, ModelError
from .base import CheckSpec, Column, ConfigView, StageContext, checks_column, stage

NAME = "probes"
VERSION = "1"
FAMILY = "probe"
COLUMN = "probes"
# What a probe's hit may do (the reason code's allowed actions).
ACTIONS = ("drop", "flag", "keep", "quarantine")
ENTRY_KEYS = ("path", "action")


@dataclass
class ProbesConfig:
    enabled: bool = True
    # Probes from `curate probe train`, one entry each, e.g. under [probes.apply]:
    # face = { path = "probes/face.safetensors", action = "flag" } (the .json sidecar beside it; relative
    # to this config file; action "flag", "quarantine", "drop" or "keep"). A sample scoring at or above the
    # probe's trained threshold fails `probe:<name>`; [decide] actions still overrides the entry's action.
    # Empty: no probe runs (common practice: no filter without labels). Flags are screening aids for review.
    apply: dict[str, dict[str, str]] = field(default_factory=dict)

    def validate(self) -> None:
        for name, entry in self.apply.items():
            if not probelib.NAME_RE.match(name):
                raise ValueError(f"probe name {name!r}: use 1-40 lowercase letters, digits or '_', starting with a "
                                 "letter")
            extra = set(entry) - set(ENTRY_KEYS)
            if extra:
                raise ValueError(f"probe {name}: unknown key(s) {', '.join(sorted(extra))}; an entry has "
                                 f"{', '.join(ENTRY_KEYS)}")
            if not entry.get("path", "").strip():
                raise ValueError(f"probe {name}: path is empty; give the probe's .safetensors file")
            if entry.get("action", "flag") not in ACTIONS:
                raise ValueError(f"probe {name}: action must be one of {', '.join(ACTIONS)}, got {entry['action']!r}")


CHECKS = (
    CheckSpec(FAMILY, "flag", "a probe trained from labelled samples (probe:<name>) scores the image at or above "
              "its threshold; the [probes] entry sets the action", ACTIONS, risk=True),
)


def code(name: str) -> str:
    return f"{FAMILY}:{name}"


def resolve_path(path: str, origin: str | None) -> Path:
    """A probe path as written: absolute as is; relative to the config file when it exists there
    (as other path settings), else to the working directory."""
    p = Path(path).expanduser()
    if p.is_absolute():
        return p
    if origin:
        there = Path(origin).parent / p
        if there.exists():
            return there.resolve()
    return p.resolve()


def entry_actions(view: ConfigView) -> dict[str, str]:
    """`probe:<name>` -> the action its `[probes] apply` entry asks for ([decide] actions still overrides it)."""
    cfg = view.section(NAME)
    return {code(name): entry.get("action", "flag") for name, entry in cfg.apply.items()}


def load(path: Path) -> probelib.Probe:
    """A probe file (ModelError when missing or damaged). Read afresh each time: a probe is a few KB, and
    a cache keyed on file times could miss a rewrite of either file."""
    return probelib.load_probe(path)


def columns(view: ConfigView) -> tuple[Column, ...]:
    cfg = view.section(NAME)
    if not cfg.apply:
        return ()
    return (Column(COLUMN, pa.struct([(n, pa.float32()) for n in cfg.apply]),
                   "each probe's probability for the sample (null without an embedding)"),)


def check_model(name: str, probe: probelib.Probe, run_model: dict, dim: int) -> str | None:
    """Why a probe cannot score this run's embeddings (another embedding size or CLIP model), or None.
    Same weights on another inference path is not a reason (see the module docstring)."""
    trained = probe.model
    if int(probe.meta["dim"]) != dim:
        return (f"probe {name} was trained on {probe.meta['dim']}-dimensional embeddings of {trained.get('model')}, "
                f"but this run's model {run_model['model']} gives {dim}; train the probe again on a run with "
                "this model")
    if trained.get("model") != run_model["model"] or trained.get("weights_sha256") != run_model["weights_sha256"]:
        return (f"probe {name} was trained on embeddings of {trained.get('model')} (weights sha256 "
                f"{str(trained.get('weights_sha256'))[:12]}), but this run embeds with {run_model['model']} "
                f"(weights sha256 {run_model['weights_sha256'][:12]}); embeddings of different models are not "
                "comparable: train the probe again on a run with this model")
    return None


def identity(view: ConfigView) -> dict:
    """Each probe's file digests, threshold and features (part of the fingerprint); refuses (ConfigError) a
    missing or damaged probe, or one trained on another CLIP model than [embed]'s, before any work."""
    from ..models import clip as clipmod
    from .embed import embed_dim

    cfg = view.section(NAME)
    embed = view.section("embed")
    run_model = clipmod.identity(embed.model, embed.pretrained, embed.cache_dir or None)
    dim = embed_dim(embed.model, embed.pretrained)
    out = {}
    for name, entry in cfg.apply.items():
        key = f"probes.apply.{name}"
        path = resolve_path(entry["path"], view.origin)
        try:
            probe = load(path)
        except ModelError as e:
            raise ConfigError(f"probe {name}: {e}", key=key) from e
        why = check_model(name, probe, run_model, dim)
        if why is not None:
            raise ConfigError(why, key=key)
        out[name] = {"path": str(path), "weights_sha256": probe.meta["weights_sha256"],
                     "sidecar_sha256": probe.meta.get("sidecar_sha256"), "threshold": probe.threshold,
                     "features": probe.kind, "action": entry.get("action", "flag")}
    return {"probes": out}


@stage(name=NAME, version=VERSION, config=ProbesConfig, kind="shard", phase="model", alive_only=True,
       sections=("embed",), needs=("image_emb", "text_emb"), provides=columns, checks=CHECKS, parallel="inline",
       active_if=lambda view: bool(view.section(NAME).apply), identity=identity, actions=entry_actions)
def run(table: pa.Table, cfg: ProbesConfig, ctx: StageContext) -> pa.Table:
    """Each configured probe's probability for every live sample, and a check against its threshold."""
    n = table.num_rows
    img, img_ok = probelib.embedding_matrix(table.column("image_emb"))
    txt, txt_ok = probelib.embedding_matrix(table.column("text_emb"))
    fields, checks = [], [[] for _ in range(n)]
    for name, entry in cfg.apply.items():
        path = resolve_path(entry["path"], ctx.config.origin)
        probe = load(path)
        ok = img_ok & (txt_ok if probe.kind == "image+text" else True)
        scores = np.zeros(n, np.float64)
        if ok.any():
            scores[ok] = probe.scores(img[ok], txt[ok])
        detail = f"{path.name} (sha256 {probe.meta['weights_sha256'][:12]})"
        for i in np.flatnonzero(ok):
            checks[i].append(check(code(name), value=float(scores[i]), threshold=probe.threshold, op="<",
                                   unit="probability", detail=detail))
        fields.append(pa.array(scores.astype(np.float32), pa.float32(), mask=~ok))
    if ctx.progress is not None:
        ctx.progress.advance(n)
    struct = pa.StructArray.from_arrays(fields, names=list(cfg.apply))
    return pa.Table.from_arrays([table.column("sample_id"), struct, pa.array(checks, CHECKS_TYPE)],
                                names=["sample_id", COLUMN, checks_column(NAME)])
