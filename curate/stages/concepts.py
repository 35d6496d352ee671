"""concepts: CLIP zero-shot concept probes, one screening flag `concept:<name>` per named concept.

A concept is a set of prompts plus neutral counter-prompts. Its score for an image is the
probability mass that a softmax over the image's cosines with all of those prompts (times the
model's logit scale, or 1 / `temperature`) puts on the concept's own prompts: zero-shot
classification as in the CLIP paper (Radford et al. 2021, arXiv 2103.00020, sec. 3.1.2) with
two classes made of several prompts each. The threshold is relative to the counter-prompts, and
must lie above the chance level k / (k + m) (k prompts, m counter-prompts).

That alone does not keep a probe quiet when the model does not know the concept: unknown words
and unfamiliar images give arbitrary cosines, and the softmax turns a small systematic gap into
a confident score (measured: tests/test_concepts.py). So one more option joins every softmax, a
"none of these prompts" entry whose cosine is the model's match level (`match_cosine`: by
default the cosine at which the agreement stage counts a caption as describing its image). An
image scores high only when a concept prompt matches it about as well as a describing caption
would, and better than the counter-prompts. Flags are screening aids for human review, not
verdicts on the content.

Prompts are encoded by the run's own model on the run's inference path (curate.stages.embed.load):
the same text tower, backend and precision as the captions, so a prompt's cosine with an image means
what a caption's does.

Scores go to the ledger column `concepts`, a struct with one float32 field per concept (pandas:
a dict per row; DuckDB: `concepts.watermark`); null for samples without an image embedding.
"""
from __future__ import annotations

import copy
import re
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pyarrow as pa

from ..checks import CHECKS_TYPE, check
from .agreement import embedding_matrix
from .base import CheckSpec, Column, ConfigView, StageContext, checks_column, stage

NAME = "concepts"
VERSION = "1"
FAMILY = "concept"
COLUMN = "concepts"

# Fields a concept entry may have.
PROBE_KEYS = ("prompts", "counter_prompts", "threshold", "enabled")
# Concept names become reason codes (`concept:<name>`) and struct field names.
_NAME_RE = re.compile(r"^[a-z][a-z0-9_]{0,39}$")

# The built-in concepts, written for real CLIP weights (e.g. OpenAI ViT-B/32). Each prompt is paired
# with a counter-prompt of the same form that names something harmless, so a model that does not
# know the risky words scores near 0.5. Thresholds: a clear majority of the probability mass (common
# practice for a two-way zero-shot decision); they are starting points, not calibrated on real CLIP
# weights here (none can be downloaded): review the flags on your own data and adjust them.
# docs/concepts.md lists these prompts in a table (a test keeps the two in step).
DEFAULT_PROBES: dict[str, dict[str, Any]] = {
    "sexual": {
        "prompts": ["a sexually explicit photo", "a photo of a naked person", "a pornographic picture",
                    "a photo of people having sex"],
        "counter_prompts": ["a family photo", "a photo of a person wearing clothes", "a fashion catalogue picture",
                            "a photo of people having dinner"],
        "threshold": 0.8,
    },
    "violence": {
        "prompts": ["a photo of graphic violence", "a photo of a bloody injured body", "a photo of a gory wound",
                    "a photo of a violent attack on a person"],
        "counter_prompts": ["a photo of a peaceful scene", "a photo of a healthy person resting",
                            "a photo of a clean bandage", "a photo of a friendly greeting between people"],
        "threshold": 0.8,
    },
    "weapons": {
        "prompts": ["a photo of a gun", "a photo of a rifle", "a photo of a knife used as a weapon",
                    "a photo of a person holding a weapon"],
        "counter_prompts": ["a photo of a camera", "a photo of a broom", "a photo of a spoon used for cooking",
                            "a photo of a person holding a phone"],
        "threshold": 0.8,
    },
    "hate_symbols": {
        "prompts": ["a photo of a swastika", "a photo of a hate symbol", "a photo of a racist flag",
                    "a photo of extremist propaganda graffiti"],
        "counter_prompts": ["a photo of a geometric pattern", "a photo of a road sign", "a photo of a national flag",
                            "a photo of colourful street art graffiti"],
        "threshold": 0.8,
    },
    "watermark": {
        "prompts": ["a photo with a watermark across it", "a stock photo with a watermark",
                    "an image with text overlaid on it", "a photo with a logo stamped in the corner"],
        "counter_prompts": ["a photo", "a stock photo", "an image", "a photo of a scene"],
        "threshold": 0.8,
    },
    "medical": {
        "prompts": ["an x-ray image", "a medical scan of a body", "a photo of a surgical operation",
                    "a close-up photo of a skin disease"],
        "counter_prompts": ["a black and white photo", "a technical drawing of a machine",
                            "a photo of people working in an office", "a close-up photo of a fabric"],
        "threshold": 0.8,
    },
}


def default_probes() -> dict[str, dict[str, Any]]:
    return copy.deepcopy(DEFAULT_PROBES)


@dataclass
class ConceptsConfig:
    # Runs with the embed stage (it reads its image embeddings and its model); off when [embed] is off.
    enabled: bool = True
    # Concept name -> {prompts, counter_prompts, threshold, enabled}. Entries merge by name over the
    # built-in list (docs/concepts.md): give only the fields you change; `enabled = false` turns one
    # off. A sample is flagged `concept:<name>` when the concept's score is >= its threshold, which
    # must lie above the chance level k / (k + m). Built-in thresholds (0.8, a clear majority; common
    # practice) are not calibrated on real CLIP weights. Flags are screening aids for human review.
    probes: dict[str, dict[str, Any]] = field(default_factory=default_probes)
    # Softmax temperature: logits = cosine / temperature. 0 = the model's own learned logit scale
    # (OpenAI CLIP: 100, the cap set in training; Radford et al. 2021, sec. 2.5).
    temperature: float = 0.0
    # Cosine of the "none of these prompts" option in every concept's softmax: an image must match a
    # concept prompt about this well to score high. Unset = the model's default agreement threshold
    # (LAION-5B's 0.28 for OpenAI ViT-B/32; the demo model's calibrated value); -1 = no such option.
    match_cosine: float | None = None

    def __post_init__(self) -> None:
        merged = default_probes()
        for name, entry in (self.probes or {}).items():
            base = merged.get(name, {})
            merged[name] = {**base, **(entry if isinstance(entry, dict) else {"_bad": entry})}
        self.probes = merged

    def validate(self) -> None:
        if not self.temperature >= 0 or not np.isfinite(self.temperature):
            raise ValueError(f"temperature must be >= 0 (0 = the model's logit scale), got {self.temperature}")
        if self.match_cosine is not None and not -1.0 <= self.match_cosine <= 1.0:
            raise ValueError(f"match_cosine is a cosine and must lie in [-1, 1] (-1 = off), got {self.match_cosine}")
        for name, entry in self.probes.items():
            where = f"probes.{name}"
            if not _NAME_RE.match(name):
                raise ValueError(f"{where}: a concept name is lower-case letters, digits and _ (at most 40), "
                                 "starting with a letter")
            if "_bad" in entry:
                raise ValueError(f"{where}: expected a table with {', '.join(PROBE_KEYS)}")
            unknown = sorted(set(entry) - set(PROBE_KEYS))
            if unknown:
                raise ValueError(f"{where}: unknown keys {unknown}; a concept has {', '.join(PROBE_KEYS)}")
            if not isinstance(entry.get("enabled", True), bool):
                raise ValueError(f"{where}.enabled must be true or false")
            for key in ("prompts", "counter_prompts"):
                v = entry.get(key)
                if not isinstance(v, list) or not v or not all(isinstance(s, str) and s.strip() for s in v):
                    raise ValueError(f"{where}.{key} must be a non-empty list of non-empty strings")
            thr = entry.get("threshold")
            if isinstance(thr, bool) or not isinstance(thr, (int, float)):
                raise ValueError(f"{where}.threshold must be a number")
            chance = chance_level(len(entry["prompts"]), len(entry["counter_prompts"]))
            if not chance < thr <= 1.0:
                raise ValueError(
                    f"{where}.threshold = {thr} must lie in ({chance:.3g}, 1]: at or below the chance level "
                    f"{len(entry['prompts'])}/({len(entry['prompts'])}+{len(entry['counter_prompts'])}) a model "
                    "that does not know the concept would flag every image")


@dataclass(frozen=True)
class Probe:
    """One enabled concept, ready to score."""

    name: str
    prompts: tuple[str, ...]
    counter_prompts: tuple[str, ...]
    threshold: float

    @property
    def chance(self) -> float:
        return chance_level(len(self.prompts), len(self.counter_prompts))


def chance_level(k: int, m: int) -> float:
    """The score of a model that cannot tell the k prompts from the m counter-prompts."""
    return k / (k + m)


def probes(cfg: ConceptsConfig) -> list[Probe]:
    """The enabled concepts, in config order."""
    return [Probe(name, tuple(e["prompts"]), tuple(e["counter_prompts"]), float(e["threshold"]))
            for name, e in cfg.probes.items() if e.get("enabled", True)]


def concept_score(image: np.ndarray, prompt_emb: np.ndarray, counter_emb: np.ndarray, scale: float,
                  match_cosine: float | None = None) -> np.ndarray:
    """Per image row: the softmax mass on the prompts over [prompts, counter-prompts, none-of-these]
    of scale * cosine, where none-of-these has cosine `match_cosine` (left out when None or <= -1).
    Every row is re-normalised (stored embeddings are float16); a zero image row gives NaN."""
    img, pe, ce = (_unit(a) for a in (image, prompt_emb, counter_emb))
    logits_p = scale * img @ pe.T
    logits_c = scale * img @ ce.T
    parts = [logits_p, logits_c]
    if match_cosine is not None and match_cosine > -1.0:
        parts.append(np.full((img.shape[0], 1), scale * float(match_cosine)))
    both = np.concatenate(parts, axis=1)
    if both.shape[0] == 0:
        return np.zeros(0, dtype=np.float64)
    top = both.max(axis=1, keepdims=True)
    with np.errstate(invalid="ignore"):
        num = np.exp(logits_p - top).sum(axis=1)
        den = np.exp(both - top).sum(axis=1)
        return num / den


def _unit(a: np.ndarray) -> np.ndarray:
    a = np.asarray(a, dtype=np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        return a / np.linalg.norm(a, axis=1, keepdims=True)


def _model(ctx: StageContext) -> Any:
    """The run's CLIP model on the run's inference path (curate.stages.embed.load): prompts go through
    the same text tower as the captions, so their cosines with the images compare like agreement's."""
    from . import embed

    return embed.load(ctx.config)


# (weights digest, model name, device, text-tower path, prompts) -> prompt embeddings: each shard of a
# run reuses them.
_PROMPT_CACHE: dict[tuple, np.ndarray] = {}


def prompt_embeddings(lm: Any, texts: tuple[str, ...], batch_size: int) -> np.ndarray:
    """L2-normalised embeddings of `texts`, encoded once per model, text path and prompt list in this process."""
    from .embed import inference_path

    path = inference_path(lm)
    tower = (path["text"], path.get("calibration_sha256") if path["text"].endswith("-int8") else None)
    key = (lm.weights_sha256, lm.ref.model, lm.device, tower, texts)
    if key not in _PROMPT_CACHE:
        _PROMPT_CACHE.clear()
        _PROMPT_CACHE[key] = lm.encode_texts(list(texts), batch_size)
    return _PROMPT_CACHE[key]


def match_level(cfg: ConceptsConfig, view: ConfigView) -> tuple[float | None, str]:
    """The none-of-these cosine and where it comes from; ConfigError when the model has no default."""
    from ..errors import ConfigError
    from .agreement import default_threshold

    if cfg.match_cosine is not None:
        return (None if cfg.match_cosine <= -1.0 else float(cfg.match_cosine)), "concepts.match_cosine"
    e = view.section("embed")
    try:
        value, source = default_threshold(e.model, e.pretrained)
    except ConfigError:
        raise ConfigError(
            f"no default match cosine for embed.model={e.model!r} embed.pretrained={e.pretrained!r}: set "
            "concepts.match_cosine (the cosine at which this model's prompts describe an image; -1 = none), "
            "or concepts.enabled = false", key="concepts.match_cosine") from None
    return float(value), "the model's agreement default: " + source


def logit_scale(lm: Any) -> float:
    """The model's learned softmax scale (exp of its logit_scale parameter)."""
    return float(lm.model.logit_scale.exp().item())


def columns(view: ConfigView) -> tuple[Column, ...]:
    """One float32 score per enabled concept, as a struct; no column when none is enabled."""
    fields = [pa.field(p.name, pa.float32()) for p in probes(view.section(NAME))]
    if not fields:
        return ()
    return (Column(COLUMN, pa.struct(fields),
                   "concept probe scores: softmax mass on each concept's prompts against its counter-prompts"),)


CHECKS = (
    CheckSpec(FAMILY, "quarantine",
              "a CLIP concept probe scored the image at or above its threshold (concept:<name>); a screening "
              "aid for human review",
              allowed=("drop", "flag", "keep", "quarantine"), risk=True),
)


@stage(name=NAME, version=VERSION, config=ConceptsConfig, kind="shard", phase="model", alive_only=True,
       needs=("image_emb",), sections=("embed", "input"), provides=columns, checks=CHECKS, parallel="inline",
       active_if=lambda view: active(view),
       identity=lambda view: identity(view))
def run(table: pa.Table, cfg: ConceptsConfig, ctx: StageContext) -> pa.Table:
    """Score every live image against each concept's prompts and counter-prompts."""
    plist = probes(cfg)
    n = table.num_rows
    img, ok = embedding_matrix(table.column("image_emb"))
    scores = np.full((n, len(plist)), np.nan)
    best = np.zeros((n, len(plist)), dtype=np.int64)  # the concept prompt closest to each image
    best_cos = np.full((n, len(plist)), np.nan)
    match, _ = match_level(cfg, ctx.config)
    if ok.any():
        lm = _model(ctx)
        scale = 1.0 / cfg.temperature if cfg.temperature > 0 else logit_scale(lm)
        texts = tuple(dict.fromkeys(t for p in plist for t in (*p.prompts, *p.counter_prompts)))
        emb = prompt_embeddings(lm, texts, ctx.config.section("embed").batch_size)
        row = {t: i for i, t in enumerate(texts)}
        for j, p in enumerate(plist):
            pe = emb[[row[t] for t in p.prompts]]
            ce = emb[[row[t] for t in p.counter_prompts]]
            scores[ok, j] = concept_score(img[ok], pe, ce, scale, match)
            cos = img[ok] @ pe.T
            best[ok, j] = cos.argmax(axis=1)
            best_cos[ok, j] = cos.max(axis=1) / np.maximum(np.linalg.norm(img[ok], axis=1), 1e-12)
    valid = ok[:, None] & np.isfinite(scores)
    checks = []
    for i in range(n):
        chks = []
        for j, p in enumerate(plist):
            if valid[i, j]:
                detail = f"closest prompt (cosine {best_cos[i, j]:.3f}): {p.prompts[best[i, j]]}"
                chks.append(check(f"{FAMILY}:{p.name}", value=float(scores[i, j]), threshold=p.threshold, op="<",
                                  detail=detail))
        checks.append(chks)
    if ctx.progress is not None:
        ctx.progress.advance(n)
    cols = columns(ctx.config)
    arrays = [table.column("sample_id")]
    names = ["sample_id"]
    if cols:
        fields = [pa.array(np.where(valid[:, j], scores[:, j], 0.0).astype(np.float32), mask=~valid[:, j])
                  for j in range(len(plist))]
        arrays.append(pa.StructArray.from_arrays(fields, fields=list(cols[0].type), mask=pa.array(~ok)))
        names.append(COLUMN)
    arrays.append(pa.array(checks, type=CHECKS_TYPE))
    names.append(checks_column(NAME))
    return pa.Table.from_arrays(arrays, names=names)


def active(view: ConfigView) -> bool:
    """The probes read the embed stage's image embeddings: they run when it runs and a concept is on."""
    return bool(getattr(view.section("embed"), "enabled", True)) and bool(probes(view.section(NAME)))


def identity(view: ConfigView) -> dict:
    """The concepts, the softmax scale, the match level with its source (fails early when unknown) and,
    off the reference path, the text tower's path the prompts are encoded on."""
    from .embed import tower_identity

    cfg = view.section(NAME)
    match, source = match_level(cfg, view)
    return {"concepts": [p.name for p in probes(cfg)], "temperature": cfg.temperature or "model logit scale",
            "match_cosine": match, "match_cosine_source": source, **tower_identity(view, "text")}
