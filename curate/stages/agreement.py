"""agreement: does the caption describe the image? CLIP cosine of the two embeddings.

A global stage: percentile mode ranks the whole corpus. Columns: `agreement` (cosine of the
image and caption embeddings), `clip_score` (CLIPScore, Hessel et al., EMNLP 2021,
arXiv 2104.08718: 2.5 * max(cos, 0)) and one `agreement_low` check per sample with embeddings
(value, threshold and mode). It sees only live samples; the others are listed as skipped.

Thresholds are model-specific (a ViT-B/32 cosine is not comparable with a ViT-L/14 one), so
absolute mode takes its default from a per-model table with sources; percentile mode needs no
calibration.
"""
from __future__ import annotations

import hashlib
import logging
import math
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
import pyarrow as pa

from ..checks import check, columnar
from ..errors import ConfigError
from .base import CheckSpec, Column, ConfigView, StageContext, checks_column, empty_checks, stage

log = logging.getLogger(__name__)

NAME = "agreement"
VERSION = "3"

# CLIPScore weight w (Hessel et al. 2021, sec. 3): CLIP-S(c, v) = w * max(cos(c, v), 0), w = 2.5.
CLIPSCORE_WEIGHT = 2.5

_LAION5B = ("LAION-5B (Schuhmann et al., NeurIPS 2022, arXiv 2210.08402, sec. 3.1): English pairs with "
            "OpenAI CLIP ViT-B/32 cosine below 0.28 removed. LAION-400M (arXiv 2111.02114) used 0.30.")
# (embed.model, embed.pretrained) -> (cosine threshold, where it comes from). The demo model's entry
# is read from its own JSON (calibrated by tools/train_demo_model.py), see default_threshold().
DEFAULT_THRESHOLDS: dict[tuple[str, str], tuple[float, str]] = {
    ("ViT-B-32", "openai"): (0.28, _LAION5B),
    ("ViT-B-32-quickgelu", "openai"): (0.28, _LAION5B),
}


@dataclass
class AgreementConfig:
    enabled: bool = True
    # "absolute": drop pairs whose cosine is below `threshold`; "percentile": keep the top
    # `keep_percent` % of this corpus by cosine (DataComp's CLIP-score baseline, Gadre et al. 2023);
    # "shuffled": keep pairs that beat all but `shuffled_pass_percent` % of shuffled pairs (captions
    # permuted among this run's images), a threshold that needs no labels and no per-model table.
    mode: Literal["absolute", "percentile", "shuffled"] = "absolute"
    # Cosine threshold for absolute mode; unset = the default for embed.model/embed.pretrained
    # (LAION-5B's 0.28 for OpenAI ViT-B/32; the demo model's calibrated value).
    threshold: float | None = None
    # Percentile mode: share of samples with embeddings to keep. DataComp's baseline kept the top
    # 30% by OpenAI ViT-L/14 cosine (Gadre et al., NeurIPS 2023, arXiv 2304.14108; from memory).
    keep_percent: float = 30.0
    # Shuffled mode: share (%) of shuffled, mismatched pairs the threshold lets through (common
    # practice: 1% false acceptance).
    shuffled_pass_percent: float = 1.0
    # Below this ROC AUC of true against shuffled pairs the model does not know this corpus: nothing
    # is dropped for agreement_low and every scored sample is flagged agreement_unreliable. 0.5 is
    # chance; at 0.85 about one shuffled pair in seven still outranks a true one (common practice).
    min_fit_auc: float = 0.85
    # Seed of the caption permutation that makes the shuffled pairs (recorded in each check's detail).
    shuffle_seed: int = 0

    def validate(self) -> None:
        if self.threshold is not None and not -1.0 <= self.threshold <= 1.0:
            raise ValueError(f"threshold is a cosine and must lie in [-1, 1], got {self.threshold}")
        if not 0.0 < self.keep_percent <= 100.0:
            raise ValueError(f"keep_percent must be in (0, 100], got {self.keep_percent}")
        if not 0.0 < self.shuffled_pass_percent < 100.0:
            raise ValueError(f"shuffled_pass_percent must be in (0, 100), got {self.shuffled_pass_percent}")
        if not 0.0 <= self.min_fit_auc <= 1.0:
            raise ValueError(f"min_fit_auc must be in [0, 1], got {self.min_fit_auc}")


CHECKS = (
    CheckSpec("agreement_low", "drop",
              "the caption does not describe the image: CLIP image-caption cosine below the threshold "
              "(absolute, the percentile mode's cut-off, or the shuffled pairs' cut-off)"),
    CheckSpec("agreement_unreliable", "flag",
              "the model separates true from shuffled captions too poorly on this corpus (ROC AUC below "
              "agreement.min_fit_auc), so agreement drops nothing"),
)


def clip_score(cos: np.ndarray) -> np.ndarray:
    """CLIPScore (Hessel et al. 2021): 2.5 * max(cos, 0)."""
    return CLIPSCORE_WEIGHT * np.maximum(cos, 0.0)


def default_threshold(model: str, pretrained: str) -> tuple[float, str]:
    """The absolute-mode default for a model, with its source; ConfigError when there is none."""
    from ..models import clip as clipmod

    if model == clipmod.DEMO_NAME and clipmod.resolve(model, pretrained).weights_path == str(clipmod.DEMO_WEIGHTS):
        cal = clipmod.demo_calibration()
        return float(cal["threshold"]), "demo model calibration (curate/models/demo/clip_demo.json): " + cal["method"]
    if (model, pretrained) in DEFAULT_THRESHOLDS:
        return DEFAULT_THRESHOLDS[(model, pretrained)]
    known = ", ".join(f"{m}/{p}" for m, p in DEFAULT_THRESHOLDS)
    raise ConfigError(
        f"no default agreement threshold for embed.model={model!r} embed.pretrained={pretrained!r} (known: "
        f"{known}, demo); cosines are model-specific: set agreement.threshold, or use agreement.mode = "
        "'percentile'",
        key="agreement.threshold",
    )


def resolve_threshold(cfg: AgreementConfig, config: Any) -> tuple[float, str]:
    if cfg.threshold is not None:
        return float(cfg.threshold), "agreement.threshold in the pipeline config"
    embed = config.section("embed")
    return default_threshold(embed.model, embed.pretrained)


def embedding_matrix(column: pa.ChunkedArray | pa.Array) -> tuple[np.ndarray, np.ndarray]:
    """A fixed-size-list embedding column -> (float32 [n, d] matrix, bool [n] valid mask)."""
    arr = column.combine_chunks() if isinstance(column, pa.ChunkedArray) else column
    if not pa.types.is_fixed_size_list(arr.type):
        raise TypeError(f"expected a fixed-size list column, got {arr.type}")
    dim = arr.type.list_size
    n = len(arr)
    values = np.asarray(arr.values.to_numpy(zero_copy_only=False))[arr.offset * dim:(arr.offset + n) * dim]
    mat = values.astype(np.float32).reshape(n, dim)
    valid = ~np.asarray(arr.is_null().to_numpy(zero_copy_only=False), dtype=bool)
    return mat, valid


def cosines(image: np.ndarray, text: np.ndarray) -> np.ndarray:
    """Row-wise cosine, re-normalised (stored vectors are float16, unit length only to ~1e-3)."""
    num = np.einsum("ij,ij->i", image, text)
    den = np.linalg.norm(image, axis=1) * np.linalg.norm(text, axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(den > 0, num / np.where(den > 0, den, 1.0), np.nan).astype(np.float32)


def percentile_threshold(cos: np.ndarray, keep_percent: float) -> float:
    """The cosine of the k-th best sample, k = ceil(n * keep_percent / 100): keep cos >= it."""
    k = max(1, math.ceil(len(cos) * keep_percent / 100.0 - 1e-9))
    return float(np.sort(cos)[::-1][k - 1])


COLUMNS = (
    Column("clip_score", pa.float32(), "CLIPScore: 2.5 * max(cosine, 0) (Hessel et al. 2021)", shard=True),
)


def shuffled_pairs(img: np.ndarray, txt: np.ndarray, seed: int) -> np.ndarray:
    """Per row, the cosine of its image with another row's caption: a random permutation that is one
    cycle through every row (seeded), so no row keeps its own caption. NaN where the other caption
    embeds identically (that pair would be a true one) and for fewer than two rows."""
    n = img.shape[0]
    if n < 2:
        return np.full(n, np.nan, np.float32)
    order = np.random.default_rng(seed).permutation(n)
    perm = np.empty(n, dtype=np.int64)
    perm[order] = np.roll(order, -1)
    same = np.all(txt == txt[perm], axis=1)
    return np.where(same, np.nan, cosines(img, txt[perm])).astype(np.float32)


def fit_auc(true: np.ndarray, shuffled: np.ndarray) -> float | None:
    """ROC AUC of true against shuffled cosines (Mann-Whitney U / (n1 n2), ties counted half)."""
    if len(true) == 0 or len(shuffled) == 0:
        return None
    from scipy.stats import rankdata

    ranks = rankdata(np.concatenate([true, shuffled]))
    u = ranks[: len(true)].sum() - len(true) * (len(true) + 1) / 2.0
    return float(u / (len(true) * len(shuffled)))


def _threshold(cfg: AgreementConfig, ctx: StageContext, cos: np.ndarray, shuffled: np.ndarray) -> tuple[float | None, str]:
    if cfg.mode == "absolute":
        thr, _ = resolve_threshold(cfg, ctx.config)
        return thr, "absolute threshold"
    if cfg.mode == "shuffled":
        if not len(shuffled):
            return None, "shuffled pairs (too few samples)"
        thr = float(np.quantile(shuffled, 1.0 - cfg.shuffled_pass_percent / 100.0))
        return thr, f"passes {cfg.shuffled_pass_percent:g}% of shuffled pairs"
    thr = percentile_threshold(cos, cfg.keep_percent) if len(cos) else None
    detail = f"percentile: keep the top {cfg.keep_percent:g}%"
    floor = float(np.median(shuffled)) if len(shuffled) else None
    if thr is not None and floor is not None and thr < floor:
        log.warning("agreement: the top %g%% cut-off (cosine %.3f) lies below the shuffled pairs' median (%.3f); "
                    "using the median instead, so no sample is kept that a random caption would match as well",
                    cfg.keep_percent, thr, floor)
        return floor, detail + ", raised to the shuffled pairs' median"
    return thr, detail


PAIR_COLUMNS = (
    Column("agreement", pa.float32(), "cosine of the CLIP image and caption embeddings", shard=True),
    Column("shuffled_agreement", pa.float32(),
           "cosine of the image with another sample's caption (a mismatched pair, for the model-fit check)",
           ledger=False),
)


@stage(name="agreement_pairs", section=NAME, version=VERSION, config=AgreementConfig, kind="shard",
       phase="model", alive_only=True, needs=("image_emb", "text_emb"), provides=PAIR_COLUMNS)
def run_pairs(table: pa.Table, cfg: AgreementConfig, ctx: StageContext) -> pa.Table:
    """Per shard: each sample's image-caption cosine, and one mismatched pair's (captions permuted
    among the shard's live samples), so the corpus-wide step reads two numbers per sample."""
    n = table.num_rows
    img, img_ok = embedding_matrix(table.column("image_emb"))
    txt, txt_ok = embedding_matrix(table.column("text_emb"))
    cos = cosines(img, txt)
    valid = img_ok & txt_ok & np.isfinite(cos)
    shuffled = np.full(n, np.nan, np.float32)
    idx = np.flatnonzero(valid)
    if len(idx):
        # Seeded by the configured seed and the shard's first live sample: the same shard, the same pairs.
        first = table.column("sample_id")[int(idx[0])].as_py()
        seed = int.from_bytes(hashlib.sha256(f"{cfg.shuffle_seed}:{first}".encode()).digest()[:8], "big")
        shuffled[idx] = shuffled_pairs(img[idx], txt[idx], seed)
    return pa.Table.from_arrays(
        [table.column("sample_id"), pa.array(np.where(valid, cos, 0.0).astype(np.float32), mask=~valid),
         pa.array(shuffled, mask=np.isnan(shuffled)), empty_checks(n)],
        names=["sample_id", "agreement", "shuffled_agreement", checks_column("agreement_pairs")])


@stage(name=NAME, version=VERSION, config=AgreementConfig, kind="global", phase="model", alive_only=True,
       needs=("agreement", "shuffled_agreement"), sections=("embed",), provides=COLUMNS, checks=CHECKS,
       identity=lambda view: identity(view))
def run(table: pa.Table, cfg: AgreementConfig, ctx: StageContext) -> pa.Table:
    """Does the caption describe the image? CLIP cosine against a threshold, if the model knows the corpus."""
    n = table.num_rows
    raw = table.column("agreement").to_numpy(zero_copy_only=False)
    cos = np.asarray(raw, dtype=np.float64)
    valid = np.isfinite(cos)
    sh = np.asarray(table.column("shuffled_agreement").to_numpy(zero_copy_only=False), dtype=np.float64)
    shuffled = sh[np.isfinite(sh)]
    auc = fit_auc(cos[valid], shuffled)
    thr, detail = _threshold(cfg, ctx, cos[valid], shuffled)
    reliable = auc is None or auc >= cfg.min_fit_auc
    fit = check("agreement_unreliable", failed=not reliable, value=auc, threshold=cfg.min_fit_auc, op=">=",
                unit="ROC AUC", detail=f"true vs shuffled captions (seed {cfg.shuffle_seed}), "
                                        f"{len(shuffled)} shuffled pairs")
    if not reliable:
        log.warning("agreement: the model tells true captions from shuffled ones with ROC AUC %.3f (< %g): it "
                    "does not know this corpus, so agreement drops nothing; scored samples are flagged "
                    "agreement_unreliable", auc, cfg.min_fit_auc)
    records = [fit]
    if reliable and thr is not None:
        records.append({"code": "agreement_low", "value": cos, "threshold": thr, "op": ">=", "unit": "cosine",
                        "detail": detail, "failed": ~(cos >= thr)})
    checks = columnar(n, valid, records)
    score = pa.array(clip_score(np.where(valid, cos, 0.0)).astype(np.float32), mask=~valid)
    if ctx.progress is not None:
        ctx.progress.advance(n)
    return pa.Table.from_arrays([table.column("sample_id"), score, checks],
                                names=["sample_id", "clip_score", checks_column(NAME)])


def identity(config: ConfigView) -> dict:
    """The threshold this run will use and where it comes from (fails early when there is none)."""
    cfg = config.section(NAME)
    if cfg.mode == "percentile":
        return {"mode": "percentile", "keep_percent": cfg.keep_percent}
    if cfg.mode == "shuffled":
        return {"mode": "shuffled", "shuffled_pass_percent": cfg.shuffled_pass_percent,
                "threshold_source": "this run's shuffled caption pairs"}
    thr, source = resolve_threshold(cfg, config)
    return {"mode": "absolute", "threshold": thr, "threshold_source": source}
