"""neardup: put every copy of a picture in one group and keep only the best copy.

A global stage: it sees every decoded sample at once. Three signals link two samples, strongest
first: the same file bytes (sha256, no search at all), perceptual codes within `radius` bits (the
closest pair of the two samples' views, found by exact multi-index Hamming search; same pairs as
brute force), and, when the embed stage ran and `semantic` is on, image embeddings with cosine >=
`cosine` (SemDeDup-style search within k-means clusters beyond `cosine_exact_max` samples). Linked
samples form groups (union-find, so links chain).

Only live samples are grouped (a sample another check already dropped never takes a group's
place). The keeper of a group follows `keeper`, a priority list (default: no risk or quality flags,
more pixels, a lossless file or a higher JPEG quality, sharper, less area under overlays or bands,
then the smallest sample_id). Every other member fails the `duplicate` check; its `keep_reason`
names the criterion on which the kept copy won, its `dup_of` names the keeper, `dup_signal` the strongest signal linking it to the keeper
("sha256" < "phash"/"dhash" < "embedding") and `dup_distance` its distance to the keeper in that
signal's unit: Hamming bits of the closest views for sha256 (0) and hash codes, 1 - cosine for
embeddings. `group_id` is the keeper's sample_id (a lone sample is its own group), so it is stable
while the keeper stays.
"""
from __future__ import annotations

import logging
import os
from dataclasses import dataclass, field

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from .. import hashing
from ..checks import CHECKS_TYPE, check
from . import hashes as hashes_mod
from .base import CheckSpec, Column, StageContext, checks_column, stage

log = logging.getLogger(__name__)

NAME = "neardup"
VERSION = "2"


@dataclass
class NeardupConfig:
    enabled: bool = True
    # Largest Hamming distance (bits of 64, closest views) for two samples to be copies. Measured in
    # bench/neardup_quality.py at the default [hashes]: edited copies <= 8, distinct photos >= 12.
    # pHash codes split 32/32 around their median, so distances are even: 8 and 9 act the same.
    radius: int = 8
    # Also link samples by image-embedding cosine when the embed stage ran (SemDeDup, Abbas et al. 2023).
    semantic: bool = True
    # Cosine at or above which two images are copies. High on purpose: it must not merge different
    # photos of one subject. Measured with the demo model: distinct photos up to 0.986
    # (bench/neardup_quality.py --semantic). SemDeDup's own thresholds are lower: they remove
    # different photos of one subject on purpose.
    cosine: float = 0.99
    # Up to this many samples every embedding pair is compared (exact); beyond, k-means clusters.
    cosine_exact_max: int = 20_000
    # k-means clusters for the semantic search beyond cosine_exact_max; 0 = sqrt(samples).
    clusters: int = 0
    # Nearest clusters each sample is searched in (1 = SemDeDup; more finds pairs split by a border).
    probes: int = 2
    # Seed of the k-means initialisation (same input and seed, same groups).
    seed: int = 0
    # Which copy of a group is kept, criteria in order (ties go to the next): unflagged (no risk or
    # quality flag), pixels (more), fidelity (a lossless file, else the higher JPEG quality), sharpness
    # (higher), clean (less area under overlays and bands), agreement (higher caption agreement);
    # the smallest sample_id breaks remaining ties. Common practice: train on the best copy.
    keeper: list[str] = field(default_factory=lambda: ["unflagged", "pixels", "fidelity", "sharpness", "clean"])

    def validate(self) -> None:
        if not 0 <= self.radius <= 32:
            raise ValueError(f"radius must be within 0..32 bits, got {self.radius}")
        if not 0.0 < self.cosine <= 1.0:
            raise ValueError(f"cosine must be within (0, 1], got {self.cosine}")
        if self.clusters < 0 or self.probes < 1 or self.cosine_exact_max < 0:
            raise ValueError("clusters must be >= 0, probes >= 1, cosine_exact_max >= 0")
        bad = [k for k in self.keeper if k not in KEEPER_CRITERIA]
        if bad or len(set(self.keeper)) != len(self.keeper):
            raise ValueError(f"keeper lists each of {', '.join(KEEPER_CRITERIA)} at most once; got {self.keeper}")


CHECKS = (
    CheckSpec("duplicate", "drop", "a copy (same bytes, near-identical picture or embedding) of the group's kept sample"),
)

LOSSLESS = ("PNG", "BMP", "TIFF", "GIF")


def _col(table: pa.Table, name: str, rows: np.ndarray, fill: float) -> np.ndarray:
    if name not in table.column_names:
        return np.full(len(rows), fill, np.float64)
    a = table.column(name).to_numpy(zero_copy_only=False)[rows].astype(np.float64)
    return np.where(np.isnan(a), fill, a)


def _fidelity(table: pa.Table, rows: np.ndarray) -> np.ndarray:
    """101 for a lossless file, the estimated JPEG quality (1-100) for a JPEG, 0 when unknown."""
    q = _col(table, "jpeg_quality", rows, 0.0)
    if "format" in table.column_names:
        fmt = table.column("format").to_pylist()
        q = np.where(np.array([fmt[i] in LOSSLESS for i in rows], dtype=bool), 101.0, q)
    return q


# name -> (what it prefers, score of each row: lower wins)
KEEPER_CRITERIA = {
    "unflagged": ("no risk or quality flag", lambda t, r: np.asarray(
        [bool(f) for f in t.column("flags_before").to_pylist()], np.float64)[r]
        if "flags_before" in t.column_names else np.zeros(len(r))),
    "pixels": ("more pixels", lambda t, r: -(_col(t, "width", r, 0.0) * _col(t, "height", r, 0.0))),
    "fidelity": ("a lossless file or a higher JPEG quality", lambda t, r: -_fidelity(t, r)),
    "sharpness": ("sharper", lambda t, r: -_col(t, "sharpness", r, -np.inf)),
    "clean": ("less area under overlays and bands", lambda t, r: _col(t, "overlay_share", r, 0.0)
              + _col(t, "border_share", r, 0.0)),
    "agreement": ("a caption that agrees better", lambda t, r: -_col(t, "agreement", r, -np.inf)),
}


def keeper_scores(table: pa.Table, rows: np.ndarray, order: list[str]) -> np.ndarray:
    """(len(order), len(rows)) scores, lower is better, rounded so measurement noise does not decide."""
    return np.stack([np.round(KEEPER_CRITERIA[k][1](table, rows), 6) for k in order]) if order else \
        np.zeros((0, len(rows)))


def why_kept(scores: np.ndarray, order: list[str], keeper: int, member: int) -> str:
    """The first criterion on which the kept copy beats a member (sample_id when all tie)."""
    for k, name in enumerate(order):
        if scores[k, keeper] < scores[k, member]:
            return name
    return "sample_id"


COLUMNS = (
    Column("group_id", pa.string(), "near-duplicate group: the kept sample's id", shard=True),
    Column("group_size", pa.int32(), "members of the group"),
    Column("dup_of", pa.string(), "the kept sample this one is a copy of"),
    Column("dup_signal", pa.string(), "what linked it: sha256, the hash kind, or embedding"),
    Column("dup_distance", pa.float32(), "distance to the kept sample in that signal's unit"),
    Column("keep_reason", pa.string(), "for a copy: the criterion on which the kept copy won"),
)
OUTPUT_SCHEMA = pa.schema([("sample_id", pa.string())] + [(c.name, c.type) for c in COLUMNS]
                          + [(checks_column(NAME), CHECKS_TYPE)])


def _embeddings(table: pa.Table, rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(float32 (len(rows), d), has) for the given rows of the image_emb column."""
    col = table.column("image_emb").combine_chunks()
    sub = col.take(pa.array(rows, type=pa.int64()))
    has = np.asarray(sub.is_valid().to_numpy(zero_copy_only=False), dtype=bool)
    if not has.any():
        return np.zeros((len(rows), 0), np.float32), has
    if pa.types.is_fixed_size_list(sub.type):
        d = sub.type.list_size
        child = sub.values.to_numpy(zero_copy_only=False)
        emb = np.asarray(child[sub.offset * d : (sub.offset + len(sub)) * d], dtype=np.float32).reshape(len(sub), d)
    else:
        vals = sub.to_pylist()
        d = len(next(v for v in vals if v is not None))
        emb = np.zeros((len(vals), d), np.float32)
        for i, v in enumerate(vals):
            if v is not None:
                emb[i] = v
    emb[~has] = 0
    return emb, has


def _keepers(labels: np.ndarray, rank: np.ndarray) -> np.ndarray:
    """For each element, the element of its group with the lowest rank."""
    order = np.lexsort((rank, labels))
    lab_sorted = labels[order]
    first = np.concatenate(([True], lab_sorted[1:] != lab_sorted[:-1]))
    group_first = order[first]
    group_of_sorted = np.cumsum(first) - 1
    keeper = np.empty_like(labels)
    keeper[order] = group_first[group_of_sorted]
    return keeper


def group_samples(
    sha_key: np.ndarray,
    codes: np.ndarray | None,
    has_codes: np.ndarray | None,
    emb: np.ndarray | None,
    has_emb: np.ndarray | None,
    radius: int,
    cosine: float,
    *,
    cosine_exact_max: int = 20_000,
    clusters: int = 0,
    probes: int = 2,
    seed: int = 0,
    threads: int = 1,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Group labels after each signal: (by sha256, + hash codes, + embeddings); a label is the
    smallest member index. ``sha_key``: equal non-negative numbers for equal bytes, -1 unknown.
    The searches run on one sample per distinct sha256 only."""
    n = sha_key.shape[0]
    key = np.where(sha_key >= 0, sha_key, -1 - np.arange(n))  # unknown bytes: a key of its own
    _, first_idx, inv = np.unique(key, return_index=True, return_inverse=True)
    rep_of = first_idx[inv.ravel()]  # each row's representative: the first row with its bytes
    lab_sha = hashing.components(n, np.arange(n), rep_of)
    reps = np.unique(rep_of)
    ei, ej = [np.arange(n)], [rep_of]
    if codes is not None and has_codes is not None:
        r = reps[has_codes[reps]]
        if r.shape[0] > 1:
            lab = hashing.sample_components(codes[r], radius, threads=threads)
            ei.append(r)
            ej.append(r[lab])
    lab_hash = hashing.components(n, np.concatenate(ei), np.concatenate(ej))
    lab_all = lab_hash
    if emb is not None and has_emb is not None and emb.shape[1] > 0:
        r = reps[has_emb[reps]]
        if r.shape[0] > 1:
            p = hashing.cosine_pairs(
                emb[r], cosine, clusters=clusters or None, probes=probes, cosine_exact_max=cosine_exact_max, seed=seed
            )
            if len(p):
                lab_all = hashing.components(n, np.concatenate([np.arange(n), r[p.i]]), np.concatenate([lab_hash, r[p.j]]))
    return lab_sha, lab_hash, lab_all


def _sha_keys(table: pa.Table, rows: np.ndarray) -> np.ndarray:
    """Equal numbers for equal sha256 values among the given rows, -1 where unknown."""
    if "sha256" not in table.column_names or not len(rows):
        return np.full(len(rows), -1, np.int64)
    col = table.column("sha256").take(pa.array(rows, type=pa.int64())).combine_chunks()
    enc = col.dictionary_encode().indices
    return np.asarray(enc.fill_null(-1).to_numpy(zero_copy_only=False), dtype=np.int64)


@stage(name=NAME, version=VERSION, config=NeardupConfig, kind="global", phase="group", alive_only=True,
       needs=("decoded", "width", "height"), wants=("sha256", hashes_mod.CODES, "image_emb", "agreement",
                                                    "flags_before", "format", "jpeg_quality", "sharpness",
                                                    "border_share", "overlay_share"),
       sections=("hashes",), provides=COLUMNS, checks=CHECKS, after=("decontaminate",), parallel="inline")
def run(table: pa.Table, cfg: NeardupConfig, ctx: StageContext) -> pa.Table:
    """Group copies of one picture and keep the best copy of each group."""
    n = table.num_rows
    sample_id = table.column("sample_id").to_pylist()
    decoded = np.asarray(table.column("decoded").fill_null(False).to_numpy(zero_copy_only=False), dtype=bool)
    rows = np.flatnonzero(decoded)
    m = rows.shape[0]

    hcfg = ctx.config.section("hashes")
    codes = has_codes = None
    signal_name = hcfg.kind
    if hashes_mod.CODES in table.column_names:
        all_codes, all_has = hashes_mod.codes_matrix(table.column(hashes_mod.CODES), hashes_mod.variants(hcfg))
        codes, has_codes = all_codes[rows], all_has[rows]
    emb = has_emb = None
    if cfg.semantic and "image_emb" in table.column_names and m:
        emb, has_emb = _embeddings(table, rows)

    threads = max(1, min(int(getattr(ctx, "workers", 0) or os.cpu_count() or 1), 4))
    lab_sha, lab_hash, lab_all = group_samples(
        _sha_keys(table, rows), codes, has_codes, emb, has_emb, cfg.radius, cfg.cosine,
        cosine_exact_max=cfg.cosine_exact_max, clusters=cfg.clusters, probes=cfg.probes, seed=cfg.seed,
        threads=threads,
    )

    sizes = np.bincount(lab_all, minlength=m) if m else np.zeros(0, np.int64)
    ids = [sample_id[i] for i in rows]
    # Rank by the keeper priority, the smallest sample_id last.
    id_rank = np.empty(m, np.int64)
    if m:
        by_id = pc.sort_indices(table.column("sample_id").take(pa.array(rows, type=pa.int64())))
        id_rank[by_id.to_numpy()] = np.arange(m)
    scores = keeper_scores(table, rows, cfg.keeper)
    rank_order = np.lexsort((id_rank, *scores[::-1]))
    rank = np.empty(m, np.int64)
    rank[rank_order] = np.arange(m)
    keeper = _keepers(lab_all, rank) if m else np.zeros(0, np.int64)

    group_id: list[str | None] = [None] * n
    group_size: list[int | None] = [None] * n
    dup_of: list[str | None] = [None] * n
    dup_signal: list[str | None] = [None] * n
    dup_distance: list[float | None] = [None] * n
    keep_reason: list[str | None] = [None] * n
    checks: list[list[dict]] = [[] for _ in range(n)]
    others = np.flatnonzero(keeper != np.arange(m))
    dist_hash = np.zeros(m, np.float64)
    if codes is not None and others.shape[0]:
        both = has_codes[others] & has_codes[keeper[others]]
        d = np.full(others.shape[0], np.nan)
        d[both] = hashing.min_distances(codes[others[both]], codes[keeper[others[both]]])
        dist_hash[others] = d
    dist_emb = np.zeros(m, np.float64)
    if emb is not None and emb.shape[1] and others.shape[0]:
        dist_emb[others] = 1.0 - np.einsum("ij,ij->i", emb[others], emb[keeper[others]])
    for k in range(m):
        i = rows[k]
        kk = keeper[k]
        gid = ids[kk]
        group_id[i] = gid
        group_size[i] = int(sizes[lab_all[k]])
        if kk == k:
            detail = "no copy" if group_size[i] == 1 else f"kept over {group_size[i] - 1} copies"
            checks[i] = [check("duplicate", failed=False, detail=detail)]
            continue
        if lab_sha[k] == lab_sha[kk]:
            sig, dist = "sha256", 0.0
            rec = check("duplicate", failed=True, detail=f"same bytes as {gid}")
        elif lab_hash[k] == lab_hash[kk]:
            sig, dist = signal_name, float(dist_hash[k])
            rec = check("duplicate", failed=True, value=dist, threshold=cfg.radius, op=">", unit="bits",
                        detail=f"copy of {gid} ({sig})")
        else:
            sig, dist = "embedding", float(max(dist_emb[k], 0.0))
            rec = check("duplicate", failed=True, value=1.0 - dist, threshold=cfg.cosine, op="<", unit="cosine",
                        detail=f"copy of {gid} (embedding)")
        dup_of[i], dup_signal[i], dup_distance[i] = gid, sig, dist
        keep_reason[i] = why_kept(scores, cfg.keeper, kk, k)
        rec["detail"] = f"{rec['detail']}; the kept copy wins on {keep_reason[i]}"
        checks[i] = [rec]
    return pa.Table.from_arrays(
        [
            table.column("sample_id"),
            pa.array(group_id, pa.string()),
            pa.array(group_size, pa.int32()),
            pa.array(dup_of, pa.string()),
            pa.array(dup_signal, pa.string()),
            pa.array(dup_distance, pa.float32()),
            pa.array(keep_reason, pa.string()),
            pa.array(checks, CHECKS_TYPE),
        ],
        schema=OUTPUT_SCHEMA,
    )
