"""Probes: linear classifiers trained on a finished run's CLIP embeddings from a few hundred labels.

`train` reads the embeddings a run cached (`DIR/work/embed/`), fits a class-balanced logistic
regression (scikit-learn) on labelled samples, measures it by cross-validation that keeps each
near-duplicate group in one fold, picks a threshold for a target precision from the out-of-fold
scores, and saves the probe as two small files: safetensors weights (`coef`, `intercept`) and a
JSON sidecar (model identity, metrics, threshold, label counts). Nothing is pickled. Applying a
probe needs NumPy only (`Probe.scores`); the `probes` stage does that during a run.

Probe flags are screening aids for human review: a probe knows only what its labels showed it.
"""
from __future__ import annotations

import hashlib
import json
import math
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa

from . import __version__
from .errors import ConfigError, InputError, ModelError
from .rowfile import read_rows

FORMAT = "curate-probe"
FORMAT_VERSION = 1
FEATURES = ("image", "image+text")
# Probe names become reason codes (`probe:<name>`) and ledger field names.
NAME_RE = re.compile(r"^[a-z][a-z0-9_]{0,39}$")

# Cross-validation folds (common practice: 5). Each fold is held out once; near-duplicate groups
# never straddle two folds, so a copy of a training image cannot inflate the measured precision.
FOLDS = 5
# Fewest labels per class: 2 per class in each of the 5 held-out folds (common practice: fewer
# leaves folds with no positive, and precision and recall are then unmeasurable).
MIN_PER_CLASS = 2 * FOLDS
# Inverse L2 strengths tried, picked by cross-validated log loss. CLIP's linear-probe protocol
# swept the L2 strength over a wide log-spaced range with a validation set (Radford et al. 2021,
# arXiv 2103.00020, appendix A.3; range from memory); 1e-2..1e4 by decades here, since a few hundred
# labels cannot tell finer steps apart.
C_GRID = tuple(float(10.0 ** e) for e in range(-2, 5))
# Target precision when none is given (common practice for a screening flag: at most one false
# alarm in ten flagged samples).
TARGET_PRECISION = 0.9
SEED = 0
# A threshold counts only where it flags at least this many labelled positives: precision measured on
# one or two flags is noise (common practice), e.g. the top score of random labels is often a positive.
MIN_FLAGGED = 5
# Largest labels or probe file read (a labels file of a few hundred rows is a few KB).
MAX_FILE_BYTES = 64 << 20


# ------------------------------------------------------------------ features


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


def _unit(mat: np.ndarray) -> np.ndarray:
    norm = np.linalg.norm(mat, axis=1, keepdims=True)
    return np.divide(mat, norm, out=np.zeros_like(mat), where=norm > 0)


def features(image: np.ndarray, text: np.ndarray | None, kind: str) -> np.ndarray:
    """The probe's input: unit-length image embeddings, followed by unit-length caption embeddings for
    "image+text" (stored vectors are float16, unit length only to about 1e-3, so they are re-normalised)."""
    if kind not in FEATURES:
        raise ValueError(f"features must be one of {FEATURES}, got {kind!r}")
    parts = [_unit(np.asarray(image, np.float64))]
    if kind == "image+text":
        if text is None:
            raise ValueError("image+text features need caption embeddings")
        parts.append(_unit(np.asarray(text, np.float64)))
    return np.concatenate(parts, axis=1)


def sigmoid(z: np.ndarray) -> np.ndarray:
    """1 / (1 + exp(-z)) without overflow for large |z|."""
    z = np.asarray(z, np.float64)
    out = np.empty_like(z)
    pos = z >= 0
    out[pos] = 1.0 / (1.0 + np.exp(-z[pos]))
    ez = np.exp(z[~pos])
    out[~pos] = ez / (1.0 + ez)
    return out


# ------------------------------------------------------------------ the probe file


@dataclass
class Probe:
    """A trained probe: weights, threshold and everything its JSON sidecar records."""

    coef: np.ndarray  # float64 [n_features]
    intercept: float
    meta: dict[str, Any] = field(default_factory=dict)

    @property
    def name(self) -> str:
        return self.meta["name"]

    @property
    def threshold(self) -> float:
        return float(self.meta["threshold"])

    @property
    def kind(self) -> str:
        return self.meta["features"]

    @property
    def model(self) -> dict:
        return self.meta["model"]

    def scores_from_features(self, x: np.ndarray) -> np.ndarray:
        """Probability of the positive class: sigmoid(x . coef + intercept), as logistic regression has it."""
        return sigmoid(np.asarray(x, np.float64) @ self.coef + self.intercept)

    def scores(self, image: np.ndarray, text: np.ndarray | None = None) -> np.ndarray:
        """Probabilities for rows of image (and caption) embeddings."""
        return self.scores_from_features(features(image, text, self.kind))


def new_probe(coef: np.ndarray, intercept: float, *, name: str, features: str, model: dict, threshold: float,
              **extra: Any) -> Probe:
    """A Probe with the sidecar fields every probe file has (`extra`: metrics, label counts, provenance)."""
    coef = np.asarray(coef, np.float64).reshape(-1)
    per = 2 if features == "image+text" else 1
    meta = {"format": FORMAT, "format_version": FORMAT_VERSION, "name": name, "features": features,
            "dim": int(coef.shape[0] // per), "n_features": int(coef.shape[0]), "threshold": float(threshold),
            "model": {k: model.get(k) for k in ("model", "pretrained", "weights_file", "weights_sha256", "quantize")},
            **extra}
    return Probe(coef, float(intercept), meta)


def sidecar_path(path: str | Path) -> Path:
    """The JSON sidecar beside a probe's weights: `teapot.safetensors` -> `teapot.json`."""
    return Path(path).with_suffix(".json")


def _sha256(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def save_probe(probe: Probe, path: str | Path) -> tuple[Path, Path]:
    """Write the weights (safetensors, float64 `coef` and `intercept`) and the JSON sidecar, which records
    the weights file's sha256 so a damaged or swapped file is caught on load."""
    from safetensors.numpy import save

    from .workdir import write_bytes

    p = Path(path)
    if p.suffix != ".safetensors":
        raise ConfigError(f"probe file {p} must end in .safetensors (the JSON sidecar goes beside it)", key="--out")
    blob = save({"coef": np.ascontiguousarray(probe.coef, np.float64),
                 "intercept": np.array([probe.intercept], np.float64)}, metadata={"format": FORMAT})
    meta = dict(probe.meta)
    meta.pop("sidecar_sha256", None)  # known only once written; load_probe adds it
    meta["weights_file"] = p.name
    meta["weights_sha256"] = _sha256(blob)
    side = sidecar_path(p)
    try:
        p.parent.mkdir(parents=True, exist_ok=True)
        write_bytes(p, blob)
        write_bytes(side, (json.dumps(meta, indent=2, sort_keys=True) + "\n").encode("utf-8"))
    except OSError as e:
        from .errors import OutputError

        raise OutputError(f"cannot write probe {p}: {e.strerror or e}") from e
    probe.meta = meta
    return p, side


def _read_small(path: Path, what: str) -> bytes:
    try:
        if path.stat().st_size > MAX_FILE_BYTES:
            raise ModelError(f"{what} {path} is larger than {MAX_FILE_BYTES >> 20} MiB; not a probe file")
        return path.read_bytes()
    except FileNotFoundError:
        raise ModelError(f"{what} {path} not found") from None
    except OSError as e:
        raise ModelError(f"{what} {path} cannot be read ({e.strerror or e})") from e


def load_probe(path: str | Path) -> Probe:
    """Read a probe (weights + sidecar) with safetensors and json only; ModelError when either is missing,
    damaged or does not match the other."""
    from safetensors import SafetensorError
    from safetensors.numpy import load

    p = Path(path)
    side = sidecar_path(p)
    blob = _read_small(p, "probe file")
    raw_meta = _read_small(side, "probe sidecar")
    try:
        meta = json.loads(raw_meta.decode("utf-8"))
    except (UnicodeDecodeError, ValueError) as e:
        raise ModelError(f"probe sidecar {side} is not JSON ({e})") from e
    if not isinstance(meta, dict) or meta.get("format") != FORMAT:
        raise ModelError(f"{side} is not a curate probe sidecar (no \"format\": \"{FORMAT}\")")
    if meta.get("format_version") != FORMAT_VERSION:
        raise ModelError(f"probe {side} has format version {meta.get('format_version')!r}; this curate reads "
                         f"{FORMAT_VERSION}")
    if _sha256(blob) != meta.get("weights_sha256"):
        raise ModelError(f"probe weights {p} do not match the sha256 its sidecar {side.name} records "
                         "(damaged, or from another training); train the probe again")
    try:
        tensors = load(blob)
    except (SafetensorError, ValueError, OSError) as e:
        raise ModelError(f"probe weights {p} are not a safetensors file ({e})") from e
    coef, icpt = tensors.get("coef"), tensors.get("intercept")
    n = meta.get("n_features")
    if coef is None or icpt is None or coef.ndim != 1 or icpt.shape != (1,) or coef.shape[0] != n:
        raise ModelError(f"probe weights {p}: expected coef [{n}] and intercept [1]")
    for key in ("name", "threshold", "features", "model", "dim"):
        if key not in meta:
            raise ModelError(f"probe sidecar {side} lacks {key!r}")
    if not isinstance(meta["dim"], int) or isinstance(meta["dim"], bool) or meta["dim"] < 1:
        raise ModelError(f"probe sidecar {side}: dim must be a positive integer, got {meta['dim']!r}")
    if meta["features"] not in FEATURES or n != meta["dim"] * (2 if meta["features"] == "image+text" else 1):
        raise ModelError(f"probe sidecar {side}: features {meta['features']!r} do not fit {n} weights")
    if not (np.all(np.isfinite(coef)) and np.isfinite(icpt[0]) and isinstance(meta["threshold"], (int, float))
            and not isinstance(meta["threshold"], bool)
            and 0.0 <= meta["threshold"] <= 1.0):
        raise ModelError(f"probe {p}: weights or threshold are not finite numbers in range")
    if not isinstance(meta["model"], dict) or not meta["model"].get("weights_sha256"):
        raise ModelError(f"probe sidecar {side}: the CLIP model's weights sha256 is missing")
    meta["sidecar_sha256"] = _sha256(raw_meta)  # the probe's identity is both files' digests
    return Probe(np.asarray(coef, np.float64), float(icpt[0]), meta)


# ------------------------------------------------------------------ labels


@dataclass(frozen=True)
class Label:
    key: str  # sample_id or source
    by: str  # "sample_id" | "source"
    label: int
    line: int


def read_labels(path: str | Path) -> list[Label]:
    """Parse a labels file (CSV, or JSONL by its extension): `sample_id` or `source`, and `label` 0 or 1.
    ConfigError naming the line for anything else."""
    p = Path(path)
    try:
        raw = _read_small(p, "labels file")
    except ModelError as e:
        raise ConfigError(str(e), key="--labels") from e
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as e:
        raise ConfigError(f"labels file {p} is not UTF-8 text", key="--labels") from e
    rows = read_rows(text, p, "labels", "label", "--labels")
    out: list[Label] = []
    for line, row in rows:
        key_by = next(((str(row[k]).strip(), k) for k in ("sample_id", "source")
                       if row.get(k) is not None and str(row[k]).strip()), None)
        if key_by is None:
            raise ConfigError(f"labels file {p}, line {line}: needs a sample_id or a source", key="--labels")
        out.append(Label(key_by[0], key_by[1], _label_value(row.get("label"), p, line), line))
    if not out:
        raise ConfigError(f"labels file {p} holds no labels", key="--labels")
    return out


def _label_value(v: Any, p: Path, line: int) -> int:
    if isinstance(v, str) and v.strip() in ("0", "1"):
        return int(v.strip())
    if isinstance(v, int) and not isinstance(v, bool) and v in (0, 1):
        return int(v)
    raise ConfigError(f"labels file {p}, line {line}: label must be 0 or 1, got {v!r}", key="--labels")


@dataclass
class RunEmbeddings:
    """The labelled samples' embeddings from one finished run, in label order."""

    sample_ids: list[str]
    labels: np.ndarray  # int64 0/1
    image: np.ndarray
    text: np.ndarray
    groups: list[str]
    model: dict


def _shown(items: list[str], n: int = 5) -> str:
    return ", ".join(items[:n]) + (f" and {len(items) - n} more" if len(items) > n else "")


def run_embeddings(run_dir: str | Path, labels: list[Label], labels_path: str | Path = "labels") -> RunEmbeddings:
    """Match labels to the run's ledger and read their cached embeddings (checksums verified).
    ConfigError for labels naming unknown samples, samples twice or samples without embeddings."""
    from .ledger import read_ledger
    from .workdir import DamagedWorkFile, read_table

    d = Path(run_dir)
    state_path = d / "work" / "state.json"
    try:
        state = json.loads(state_path.read_text(encoding="utf-8"))
        manifest = json.loads((d / "manifest.json").read_text(encoding="utf-8"))
    except (OSError, ValueError) as e:
        raise InputError(f"{d} is not the --out of a finished `curate run` ({e.__class__.__name__} reading "
                         "work/state.json or manifest.json)") from e
    if not state.get("finished"):
        raise InputError(f"the last run in {d} did not finish; re-run `curate run` with the same --out first")
    model = (manifest.get("stages") or {}).get("embed")
    if not isinstance(model, dict) or not model.get("weights_sha256"):
        raise InputError(f"the run in {d} did not compute CLIP embeddings ([embed] was off); probes need them")
    ledger = read_ledger(d, ["sample_id", "source", "group_id"])
    ids = ledger.column("sample_id").to_pylist()
    by_source = dict(zip(ledger.column("source").to_pylist(), ids))
    # Each group is named by its smallest sample_id, not by its keeper, so the folds (and the probe) do not
    # change when a later run keeps another copy of a group.
    group_of: dict[str, str] = {}
    first: dict[str, str] = {}
    for sid, g in zip(ids, ledger.column("group_id").to_pylist()):
        key = g or sid
        group_of[sid] = key
        first[key] = min(first.get(key, sid), sid)
    known = set(ids)

    resolved: list[str] = []
    values: list[int] = []
    unknown: list[str] = []
    seen: dict[str, int] = {}
    written: dict[str, str] = {}
    for lab in labels:
        if lab.by == "sample_id":
            sid = lab.key if lab.key in known else None
        else:
            sid = by_source.get(lab.key)
        if sid is None:
            unknown.append(f"{lab.key} (line {lab.line})")
            continue
        if sid in seen:
            raise ConfigError(f"labels file {labels_path}: lines {seen[sid]} and {lab.line} name the same sample "
                              f"{sid}; give each sample one label", key="--labels")
        seen[sid] = lab.line
        written[sid] = lab.key
        resolved.append(sid)
        values.append(lab.label)
    if unknown:
        raise ConfigError(f"labels file {labels_path}: {len(unknown)} label(s) name no sample of the run in {d}: "
                          f"{_shown(unknown)}", key="--labels")

    wanted = set(resolved)
    img: dict[str, np.ndarray] = {}
    txt: dict[str, np.ndarray] = {}
    shards = sorted(p.stem for p in (d / "work" / "source").glob("s*.parquet"))
    for shard in shards:
        path = d / "work" / "embed" / f"{shard}.parquet"
        if not path.exists():
            continue  # a shard with no live sample at embed time may have no file
        try:
            t = read_table(path, ["sample_id", "image_emb", "text_emb"])
        except DamagedWorkFile as e:
            raise InputError(f"cached embeddings {path} are damaged ({e.why}); re-run `curate run` with the same "
                             "--out to recompute them") from e
        sids = t.column("sample_id").to_pylist()
        rows = [i for i, s in enumerate(sids) if s in wanted]
        if not rows:
            continue
        t = t.take(pa.array(rows, pa.int64()))
        im, im_ok = embedding_matrix(t.column("image_emb"))
        tx, tx_ok = embedding_matrix(t.column("text_emb"))
        for j, i in enumerate(rows):
            if im_ok[j] and tx_ok[j]:
                img[sids[i]] = im[j]
                txt[sids[i]] = tx[j]
    missing = [f"{written[s]} (line {seen[s]})" for s in resolved if s not in img]
    if missing:
        raise ConfigError(f"labels file {labels_path}: {len(missing)} labelled sample(s) have no CLIP embedding in "
                          f"{d} (dropped before the embed stage, or unreadable by the model; `curate explain` "
                          f"says why): {_shown(missing)}", key="--labels")
    return RunEmbeddings(resolved, np.array(values, np.int64), np.stack([img[s] for s in resolved]), np.stack([txt[s] for s in resolved]),
                         [first[group_of[s]] for s in resolved], model)


# ------------------------------------------------------------------ fitting


@dataclass
class Fit:
    """What `fit` learned and measured."""

    coef: np.ndarray  # float64 [n_features]: the mean of the fold models' weights
    intercept: float
    models: list  # the fold models (sklearn LogisticRegression), one per fold
    C: float
    oof: np.ndarray  # out-of-fold probability per label
    threshold: float
    target_met: bool
    metrics: dict[str, Any]


def _need_sklearn() -> None:
    try:
        import sklearn  # noqa: F401
    except ImportError as e:
        raise ModelError("training a probe needs scikit-learn: pip install 'curate[probes]' "
                         "(applying one does not)") from e


def _logreg(C: float, seed: int) -> Any:
    from sklearn.linear_model import LogisticRegression

    return LogisticRegression(C=C, class_weight="balanced", max_iter=5000, random_state=seed)


def _splits(y: np.ndarray, groups: np.ndarray, k: int, seed: int) -> list[tuple[np.ndarray, np.ndarray]]:
    from sklearn.model_selection import StratifiedGroupKFold

    return list(StratifiedGroupKFold(n_splits=k, shuffle=True, random_state=seed).split(np.zeros(len(y)), y, groups))


def _oof(x: np.ndarray, y: np.ndarray, splits: list, C: float, seed: int) -> tuple[np.ndarray, list]:
    out = np.full(len(y), np.nan)
    models = []
    for tr, te in splits:
        m = _logreg(C, seed).fit(x[tr], y[tr])
        out[te] = m.predict_proba(x[te])[:, 1]
        models.append(m)
    return out, models


def _balanced_log_loss(y: np.ndarray, p: np.ndarray) -> float:
    """Log loss with each class weighted to half the total, matching class_weight="balanced"."""
    p = np.clip(p, 1e-12, 1 - 1e-12)
    return float(-0.5 * (np.mean(np.log(p[y == 1])) + np.mean(np.log(1 - p[y == 0]))))


def _both_classes(y: np.ndarray, splits: list) -> bool:
    return all(len(np.unique(y[tr])) == 2 and len(np.unique(y[te])) == 2 for tr, te in splits)


def pick_C(x: np.ndarray, y: np.ndarray, groups: np.ndarray, seed: int = SEED) -> float:
    """The C of C_GRID with the lowest balanced log loss across 3 group-aware folds (ties: the smaller C)."""
    k = int(min(3, np.sum(y == 1), np.sum(y == 0), len(np.unique(groups))))
    splits = _splits(y, groups, k, seed + 1) if k >= 2 else []
    if not splits or not _both_classes(y, splits):
        return 1.0  # too few to compare: scikit-learn's default
    losses = [_balanced_log_loss(y, _oof(x, y, splits, C, seed)[0]) for C in C_GRID]
    return float(C_GRID[int(np.argmin(losses))])


def pick_threshold(y: np.ndarray, scores: np.ndarray, target: float) -> tuple[float, bool, dict]:
    """From scores and labels: the threshold (flag when score >= it) with the highest recall whose precision
    reaches `target`; when none does, the one with the highest precision (then recall). Only thresholds that
    flag at least MIN_FLAGGED positives count. It lies midway between the lowest flagged score and the next
    lower one, which gives the same counts on these scores."""
    y = np.asarray(y, np.int64)
    order = np.argsort(-np.asarray(scores, np.float64), kind="stable")
    s, yy = np.asarray(scores, np.float64)[order], y[order]
    pos = int(yy.sum())
    if pos == 0 or len(s) == 0:
        raise ValueError("pick_threshold needs at least one positive label")
    # Candidate cuts: flag the first i + 1 scores, only where the next score is lower (ties stay together).
    last = np.r_[s[1:] < s[:-1], True]
    tp = np.cumsum(yy)[last]
    flagged = (np.arange(len(s)) + 1)[last]
    prec = tp / flagged
    rec = tp / pos
    enough = tp >= max(1, min(MIN_FLAGGED, pos))
    ok = (prec >= target) & enough
    met = bool(ok.any())
    idx = np.flatnonzero(ok if met else enough)
    # Highest recall reaching the target; or else highest precision, then recall.
    i = int(idx[np.lexsort((-prec[idx], -rec[idx]))[0]] if met else idx[np.lexsort((-rec[idx], -prec[idx]))[0]])
    cut = int(np.flatnonzero(last)[i])
    below = s[cut + 1] if cut + 1 < len(s) else 0.0
    thr = float((s[cut] + below) / 2.0)
    t, f = int(tp[i]), int(flagged[i] - tp[i])
    counts = {"tp": t, "fp": f, "fn": pos - t, "tn": int(len(s) - pos - f)}
    return thr, met, {"precision": float(prec[i]), "recall": float(rec[i]), **counts}


def clopper_pearson(k: int, n: int, level: float = 0.95) -> tuple[float, float]:
    """Exact binomial interval for k successes in n trials (Clopper & Pearson, Biometrika 26(4), 1934)."""
    from scipy.stats import beta

    if n <= 0:
        return 0.0, 1.0
    a = (1.0 - level) / 2.0
    lo = 0.0 if k == 0 else float(beta.ppf(a, k, n - k + 1))
    hi = 1.0 if k == n else float(beta.ppf(1.0 - a, k + 1, n - k))
    return lo, hi


def fit(x: np.ndarray, y: np.ndarray, groups: list[str] | np.ndarray | None = None, *,
        target_precision: float = TARGET_PRECISION, seed: int = SEED) -> Fit:
    """Class-balanced logistic regression, measured by group-aware stratified cross-validation.

    C is picked once by cross-validated log loss; each of the FOLDS fold models scores its held-out labels
    (out-of-fold scores give ROC AUC, and precision and recall at the threshold picked for the target).
    The probe is the mean of the fold models' weights, so its scores are on the scale of the scores the
    threshold was picked on (a model refitted on every label scores more confidently than they did)."""
    _need_sklearn()
    import warnings

    from sklearn.exceptions import ConvergenceWarning
    from sklearn.metrics import average_precision_score, roc_auc_score

    x = np.asarray(x, np.float64)
    y = np.asarray(y, np.int64)
    g = np.asarray(groups if groups is not None else np.arange(len(y)).astype(str))
    n_pos, n_neg = int(np.sum(y == 1)), int(np.sum(y == 0))
    if min(n_pos, n_neg) < MIN_PER_CLASS:
        which = "1" if n_pos < n_neg else "0"
        raise ConfigError(f"only {min(n_pos, n_neg)} label(s) of class {which} (need at least {MIN_PER_CLASS}: "
                          f"{FOLDS}-fold cross-validation needs 2 per class in each held-out fold to measure "
                          "precision and recall)", key="--labels")
    if len(np.unique(g)) < FOLDS:
        raise ConfigError(f"the labels cover only {len(np.unique(g))} near-duplicate group(s); cross-validation "
                          f"keeps each group in one fold and needs at least {FOLDS}", key="--labels")
    splits = _splits(y, g, FOLDS, seed)
    if not _both_classes(y, splits):
        raise ConfigError("the labelled near-duplicate groups are too uneven to give every fold both classes; "
                          "label samples from more groups", key="--labels")
    with warnings.catch_warnings():
        # Weak regularisation on separable labels can stop lbfgs short of full convergence; the log loss
        # still ranks those C values fairly (common practice).
        warnings.simplefilter("ignore", ConvergenceWarning)
        C = pick_C(x, y, g, seed)
        oof, models = _oof(x, y, splits, C, seed)
    thr, met, at = pick_threshold(y, oof, target_precision)
    # Few labels make wide intervals: 6 of 6 flagged right is precision 1.0, 95% interval 0.54-1.
    at["precision_ci95"] = list(clopper_pearson(at["tp"], at["tp"] + at["fp"]))
    at["recall_ci95"] = list(clopper_pearson(at["tp"], at["tp"] + at["fn"]))
    metrics = {
        "roc_auc": float(roc_auc_score(y, oof)),
        "average_precision": float(average_precision_score(y, oof)),
        **at,
        "target_precision": float(target_precision),
        "target_met": met,
        "folds": FOLDS,
        "method": f"out-of-fold scores of {FOLDS}-fold stratified cross-validation with near-duplicate groups kept "
                  "in one fold; the threshold is picked on the same scores, so precision and recall at it are "
                  "slightly optimistic",
    }
    coef = np.mean([m.coef_[0] for m in models], axis=0)
    icpt = float(np.mean([m.intercept_[0] for m in models]))
    return Fit(coef, icpt, models, C, oof, thr, met, metrics)


# ------------------------------------------------------------------ train: the whole task


def default_path(run_dir: str | Path, name: str) -> Path:
    """Where `train` writes a probe unless told: beside the run's outputs."""
    return Path(run_dir) / "probes" / f"{name}.safetensors"


def train(run_dir: str | Path, *, labels: str | Path, name: str, out: str | Path | None = None,
          target_precision: float = TARGET_PRECISION, text: bool = False) -> dict:
    """Train a probe on a finished run's embeddings from a labels file; write it; return its sidecar (with
    `path` and `sidecar`). `target_met` in its metrics says whether the target precision was reached."""
    if not NAME_RE.match(name or ""):
        raise ConfigError(f"probe name {name!r}: use 1-40 lowercase letters, digits or '_', starting with a letter "
                          "(it becomes the reason code probe:<name>)", key="--name")
    if not (isinstance(target_precision, (int, float)) and 0.0 < target_precision <= 1.0
            and math.isfinite(target_precision)):
        raise ConfigError(f"target precision must be in (0, 1], got {target_precision!r}", key="--target-precision")
    _need_sklearn()
    import sklearn

    labs = read_labels(labels)
    emb = run_embeddings(run_dir, labs, labels)
    kind = "image+text" if text else "image"
    x = features(emb.image, emb.text, kind)
    y = emb.labels
    f = fit(x, y, emb.groups, target_precision=target_precision)
    probe = new_probe(
        f.coef, f.intercept, name=name, features=kind, model=emb.model, threshold=f.threshold,
        metrics=f.metrics,
        labels={"positive": int(y.sum()), "negative": int(len(y) - y.sum()), "file": Path(labels).name,
                "sha256": _sha256(Path(labels).read_bytes())},
        classifier={"kind": "logistic regression (scikit-learn, lbfgs)", "class_weight": "balanced", "C": f.C,
                    "C_grid": list(C_GRID), "C_chosen_by": "balanced log loss, 3-fold group-aware cross-validation",
                    "weights": f"mean of the {FOLDS} cross-validation fold models"},
        trained_on=str(Path(run_dir).resolve()), curate_version=__version__, scikit_learn_version=sklearn.__version__)
    path, side = save_probe(probe, out if out is not None else default_path(run_dir, name))
    return {**probe.meta, "path": str(path), "sidecar": str(side)}


__all__ = ["FEATURES", "Fit", "Label", "Probe", "features", "fit", "load_probe", "new_probe", "pick_threshold",
           "read_labels", "run_embeddings", "save_probe", "sidecar_path", "train"]
