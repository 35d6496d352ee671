"""split: hold out an eval set with no near-duplicate leaks, and drop training candidates that
near-duplicate an outside evaluation set.

Two stages share the `[split]` section, both on live samples only:
1. `decontaminate` (before near-duplicate grouping): every sample whose perceptual codes come within `radius` bits of an
   image of a `split.eval_sets` entry (a benchmark folder, manifest, tar or shard set) fails the
   `eval_overlap` check (a drop by default); `eval_match` names the outside image. Outside codes
   are cached under the work dir (curate.imagesets). Barz & Denzler 2020 (J. Imaging 6(6):41)
   found near-duplicates of 3.3% of CIFAR-10 and 10% of CIFAR-100 test images in training.
2. `split`, last: samples are grouped (near-duplicate groups from `neardup`, or this stage's own
   Hamming components when neardup is off, plus semantic groups when embeddings exist), and a
   whole group goes to eval when u(seed, key) < eval_fraction, where u is a uniform number from
   sha256 of the seed and the group's key (its smallest sample_id). A group never straddles, and
   a group keeps its side when other samples come and go. When the eval share of kept samples
   misses the target by more than `share_tolerance`, the fewest groups whose u lies nearest the
   target move across, so the share lands within tolerance while nearly every group stays put.
"""
from __future__ import annotations

import hashlib
import json
import logging
import math
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Sequence

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from ..checks import CHECKS_TYPE, check
from .base import CheckSpec, Column, StageContext, checks_column, empty_checks, stage

log = logging.getLogger(__name__)

NAME = "split"
VERSION = "2"


@dataclass
class SplitConfig:
    enabled: bool = True
    # Share of kept samples held out for eval; 0 = no eval split (every kept sample is train).
    eval_fraction: float = 0.0
    # Seed of the per-group draw; the same input and seed always give the same split.
    seed: int = 0
    # Largest allowed |eval share - eval_fraction| (common practice: within 2 percentage points).
    share_tolerance: float = 0.02
    # Optional key of the source table's `meta` JSON (manifest column) to split each value apart.
    stratify: str = ""
    # Outside evaluation sets (folders, manifests, tar or shard sets) to keep out of training.
    eval_sets: list[str] = field(default_factory=list, metadata={"path": True})
    # Hamming radius (bits of 64) for the eval-set search and the split's own groups when neardup
    # is off; -1 = neardup's radius. Common practice: <= 10 bits is a likely variant.
    radius: int = -1
    # Cosine at or above which a sample matches an outside image semantically (needs embed);
    # 0 = perceptual codes only. SemDeDup (Abbas et al. 2023) uses 1 - eps on CLIP embeddings.
    eval_semantic_cosine: float = 0.0
    # Cosine for the split's own semantic groups when neardup did not group semantically; 0 = off.
    group_semantic_cosine: float = 0.0

    def validate(self) -> None:
        if not 0.0 <= self.eval_fraction < 1.0:
            raise ValueError(f"eval_fraction must be in [0, 1), got {self.eval_fraction}")
        if not 0.0 <= self.share_tolerance <= 1.0:
            raise ValueError(f"share_tolerance must be in [0, 1], got {self.share_tolerance}")
        if self.radius < -1 or self.radius > 64:
            raise ValueError(f"radius must be -1 (neardup's) or 0..64, got {self.radius}")
        for k in ("eval_semantic_cosine", "group_semantic_cosine"):
            v = getattr(self, k)
            if not 0.0 <= v <= 1.0:
                raise ValueError(f"{k} must be in [0, 1] (0 = off), got {v}")


CHECKS = (
    CheckSpec("eval_overlap", "drop", "near-duplicate of an image in an outside evaluation set (split.eval_sets)"),
)


# --------------------------------------------------------------------------- the draw


def unit_hash(seed: int, key: str) -> float:
    """A uniform number in [0, 1) from sha256 of (seed, key): stable across runs and machines."""
    h = hashlib.sha256(f"{int(seed)}\x00{key}".encode("utf-8", "surrogatepass")).digest()
    return int.from_bytes(h[:8], "big") / 2.0**64


def unit_hashes(seed: int, keys: Sequence[str] | pa.Array) -> np.ndarray:
    """``unit_hash`` of each key; an Arrow array is read in blocks (no Python string per key held)."""
    if not isinstance(keys, (pa.Array, pa.ChunkedArray)):
        return np.array([unit_hash(seed, k) for k in keys], dtype=np.float64)
    out = np.empty(len(keys), np.float64)
    for lo in range(0, len(keys), 65536):
        out[lo : lo + 65536] = [unit_hash(seed, k) for k in keys.slice(lo, 65536).to_pylist()]
    return out


def assign_groups(keys: Sequence[str] | pa.Array, weights: Sequence[int], fraction: float, seed: int,
                  tolerance: float = 0.02, strata: Sequence[str] | None = None) -> np.ndarray:
    """Per group: True for eval. `weights` are the groups' kept sizes (0: no kept sample).

    Each group's side is u(seed, key) < fraction; then, per stratum, when the weighted eval share
    misses `fraction` by more than `tolerance`, the groups whose u lies nearest the threshold on
    the short side cross over (largest moves that do not overshoot the far bound), until the share
    is within tolerance. A group heavier than the whole band (2 * tolerance * total) can leave the
    share outside it; that is logged.
    """
    n = len(keys)
    w = np.asarray(weights, dtype=np.int64)
    u = unit_hashes(seed, keys)
    is_eval = u < fraction
    if fraction <= 0.0 or n == 0:
        return np.zeros(n, dtype=bool)
    if strata is None:
        _balance(np.arange(n), u, w, is_eval, fraction, tolerance, "")
        return is_eval
    names, first, which = np.unique(np.array([s or "" for s in strata], dtype=object), return_index=True,
                                    return_inverse=True)
    order = np.argsort(which, kind="stable")
    bounds = np.searchsorted(which[order], np.arange(len(names) + 1))
    for g in np.argsort(first):  # strata in order of first appearance
        _balance(order[bounds[g] : bounds[g + 1]], u, w, is_eval, fraction, tolerance, str(names[g]))
    return is_eval


def _balance(idx: np.ndarray, u: np.ndarray, w: np.ndarray, is_eval: np.ndarray, fraction: float,
             tolerance: float, stratum: str) -> None:
    total = int(w[idx].sum())
    if total == 0:
        return
    lo, hi = (fraction - tolerance) * total, (fraction + tolerance) * total
    # A small corpus may have no whole count inside the band: then the nearest counts are allowed.
    lo, hi = min(lo, math.floor(fraction * total)), max(hi, math.ceil(fraction * total))
    e = int(w[idx][is_eval[idx]].sum())
    if e < lo:
        # Too few in eval: train groups with the smallest u (just above the threshold) cross first.
        cand = idx[(~is_eval[idx]) & (w[idx] > 0)]
        for i in cand[np.argsort(u[cand], kind="stable")]:
            if e + w[i] <= hi:
                is_eval[i] = True
                e += int(w[i])
                if e >= lo:
                    break
    elif e > hi:
        cand = idx[is_eval[idx] & (w[idx] > 0)]
        for i in cand[np.argsort(-u[cand], kind="stable")]:
            if e - w[i] >= lo:
                is_eval[i] = False
                e -= int(w[i])
                if e <= hi:
                    break
    if not lo <= e <= hi:
        log.warning("split: eval share %.4f of stratum %r is outside %.4f +- %.4f (groups too large to balance)",
                    e / total, stratum, fraction, tolerance)


# --------------------------------------------------------------------------- groups


def group_keys(sample_ids: pa.Array | pa.ChunkedArray, labels: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Each row's group, and each group's key row: groups are the distinct keys (the smallest
    sample_id among rows with the row's label), numbered in key order; a group's key row is the
    first row whose sample_id is the key."""
    n = labels.shape[0]
    rank = np.asarray(pc.rank(sample_ids, sort_keys="ascending", tiebreaker="dense").to_numpy(), np.int64)
    key_rank = np.full(n, np.iinfo(np.int64).max, np.int64)
    np.minimum.at(key_rank, labels, rank)
    key_rank = key_rank[labels]
    _, group = np.unique(key_rank, return_inverse=True)
    is_key = np.flatnonzero(rank == key_rank)
    _, first = np.unique(key_rank[is_key], return_index=True)
    return group.ravel(), is_key[first]


def _labels(table: pa.Table, members: np.ndarray, codes: Any, radius: int, check_radius: int,
            cfg: SplitConfig, threads: int = 1, same_radius: bool = False) -> np.ndarray:
    """Group label per row: neardup's groups, joined with this stage's own Hamming components
    (so two samples within `radius` share a side whatever neardup did: a leak is any such pair,
    so here links do chain) and, when asked, with semantic pairs. Rows outside `members` keep
    their own index."""
    from .. import similarity

    n = table.num_rows
    ei: list[np.ndarray] = []
    ej: list[np.ndarray] = []
    if "group_id" in table.column_names:
        gi, gj = _group_links(table.column("group_id"), members)
        ei.append(gi)
        ej.append(gj)
    if codes is not None:
        rows = _searched(table, np.nonzero(members & codes.valid)[0], radius, same_radius)
        if rows.size:
            pick = (lambda a: a if rows.size == n else a[rows])  # noqa: E731  (no copy when all rows take part)
            chk = None if codes.checks is None else pick(codes.checks)
            lab = similarity.sample_components(pick(codes.main), radius, codes.identity, chk, check_radius,
                                               threads=threads)
            ei.append(rows)
            ej.append(rows[lab])
    if cfg.group_semantic_cosine > 0 and "image_emb" in table.column_names:
        emb, has = _embeddings(table)
        rows = np.nonzero(members & has)[0]
        if rows.size > 1:
            p = similarity.cosine_pairs(emb[rows], cfg.group_semantic_cosine)
            ei.append(rows[np.asarray(p.i, dtype=np.int64)])
            ej.append(rows[np.asarray(p.j, dtype=np.int64)])
    if not ei:
        return np.arange(n, dtype=np.int64)
    return similarity.components(n, np.concatenate(ei), np.concatenate(ej))


def _searched(table: pa.Table, rows: np.ndarray, radius: int, same_radius: bool) -> np.ndarray:
    """The rows whose codes the split's own search must take: all of ``rows``, or, when neardup
    linked codes at this same radius and saw every one of them, only those that share neardup's
    code component with another of them. A pair within the radius is a pair neardup linked too
    (the rows here are a subset of those it saw), so it lies inside one component; a row alone in
    its component among these rows links to none of them. Same result, a search over far fewer rows."""
    if not same_radius or "code_component" not in table.column_names or not rows.size:
        return rows
    col = table.column("code_component")
    if isinstance(col, pa.ChunkedArray):
        col = col.combine_chunks()
    comp = col.take(pa.array(rows))
    if comp.null_count:
        return rows  # neardup did not see some of them
    comp = comp.to_numpy(zero_copy_only=False)
    linked = np.flatnonzero(comp >= 0)  # -1: neardup linked the row to no other
    _, inv, count = np.unique(comp[linked], return_inverse=True, return_counts=True)
    return rows[linked[count[inv.ravel()] >= 2]]


def _group_links(group_ids: pa.ChunkedArray | pa.Array, members: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Links from each member to the first member row of its group_id."""
    if isinstance(group_ids, pa.ChunkedArray):
        group_ids = group_ids.combine_chunks()
    enc = group_ids.dictionary_encode()
    rows = np.flatnonzero(members & np.asarray(enc.is_valid().to_numpy(zero_copy_only=False), dtype=bool))
    group = np.asarray(enc.indices.fill_null(0).to_numpy(zero_copy_only=False), dtype=np.int64)[rows]
    first = np.zeros(len(enc.dictionary), np.int64)
    present, at = np.unique(group, return_index=True)
    first[present] = rows[at]
    return first[group], rows


def _embeddings(table: pa.Table) -> tuple[np.ndarray, np.ndarray]:
    col = table.column("image_emb").to_pylist()
    dim = next((len(v) for v in col if v is not None), 0)
    emb = np.zeros((len(col), dim), dtype=np.float32)
    has = np.zeros(len(col), dtype=bool)
    for i, v in enumerate(col):
        if v is not None and len(v) == dim:
            emb[i] = v
            has[i] = True
    norms = np.linalg.norm(emb, axis=1, keepdims=True)
    emb = emb / np.where(norms > 0, norms, 1.0)
    return emb, has


def _strata(table: pa.Table, key: str) -> list[str]:
    if "meta" not in table.column_names:
        return [""] * table.num_rows
    out = []
    for m in table.column("meta").to_pylist():
        v = None
        if m:
            try:
                v = json.loads(m).get(key)
            except (ValueError, AttributeError):
                v = None
        out.append("" if v is None else str(v))
    return out


# --------------------------------------------------------------------------- decontamination


def resolve_eval_sets(cfg: SplitConfig, config: Any) -> list[str]:
    """Absolute paths of `eval_sets`; relative ones are relative to the pipeline file."""
    base = Path(config.origin).parent if getattr(config, "origin", None) else Path.cwd()
    return [p if "://" in p else str((base / os.path.expanduser(p)).resolve()) for p in cfg.eval_sets]


def effective_radius(cfg: SplitConfig, config: Any) -> int:
    if cfg.radius >= 0:
        return cfg.radius
    nd = getattr(config, "neardup", None)
    r = getattr(nd, "radius", None)
    return int(r) if r is not None else 8


def check_radius(config: Any) -> int:
    """The check codes' radius: neardup's."""
    from .. import similarity

    return int(getattr(getattr(config, "neardup", None), "check_radius", similarity.CHECK_RADIUS))


def _decontaminate(table: pa.Table, codes: Any, cfg: SplitConfig,
                   ctx: StageContext) -> tuple[list[str | None], list[list[dict]]]:
    """Per row: the matched outside image (or None) and the eval_overlap check (or none)."""
    from .. import imagesets

    n = table.num_rows
    has_codes = np.zeros(n, dtype=bool) if codes is None else codes.valid
    match: list[str | None] = [None] * n
    best: list[tuple[float, str] | None] = [None] * n
    checks: list[list[dict]] = [[] for _ in range(n)]
    paths = resolve_eval_sets(cfg, ctx.config)
    if not paths:
        return match, checks
    radius = effective_radius(cfg, ctx.config)
    settings = imagesets.default_settings(ctx.config)
    cache = os.path.join(ctx.work_dir, "evalsets") if ctx.work_dir else None
    semantic = cfg.eval_semantic_cosine > 0 and "image_emb" in table.column_names
    emb, has_emb = _embeddings(table) if semantic else (None, None)
    for path in paths:
        images = imagesets.list_set(path, ctx.config.section("input").max_file_bytes)
        sc = imagesets.set_codes(images, settings, cache_dir=cache, workers=max(1, ctx.workers))
        bad = int((~sc.ok).sum())
        if bad:
            log.warning("split: %d of %d images of eval set %s could not be hashed", bad, len(images), path)
        if codes is not None:
            _code_matches(codes, sc, radius, check_radius(ctx.config), best)
        if semantic and emb is not None:
            _semantic_matches(images, emb, has_emb, cfg, ctx, cache, best)
    for i in range(n):
        if not has_codes[i] and best[i] is None:
            continue
        if best[i] is None:
            checks[i].append(check("eval_overlap", failed=False, threshold=radius, op=">", unit="bits",
                                   detail="no outside image within reach"))
        else:
            d, ref = best[i]
            match[i] = ref
            if d < 0:
                checks[i].append(check("eval_overlap", value=-d, threshold=cfg.eval_semantic_cosine, op="<",
                                       unit="cosine", detail=f"matches {ref}"))
            else:
                checks[i].append(check("eval_overlap", value=d, threshold=radius, op=">", unit="bits",
                                       detail=f"matches {ref}"))
    return match, checks


def _code_matches(codes: Any, sc: Any, radius: int, check_r: int, best: list) -> None:
    """Adds the closest outside image within ``radius`` of each row to `best` (distance, ref)."""
    from .. import similarity

    p = similarity.cross_set_pairs(codes.main, sc.main, radius, codes.identity, codes.valid, sc.ok, codes.checks,
                                   sc.checks, check_r)
    refs = sc.images.refs
    for i, j, d in zip(p.i.tolist(), p.j.tolist(), p.distance.tolist()):
        cand = (float(d), refs[j])
        if best[i] is None or cand < best[i]:
            best[i] = cand


def _semantic_matches(images: Any, emb: np.ndarray, has_emb: np.ndarray, cfg: SplitConfig, ctx: StageContext,
                      cache: str | None, best: list) -> None:
    """Adds cosine matches to `best` as negative distances (so a perceptual match, >= 0, wins ties)."""
    from .. import imagesets

    se = imagesets.set_embeddings(images, ctx.config, cache_dir=cache)  # the run's model and inference path
    rows = np.nonzero(has_emb)[0]
    orows = np.nonzero(se.ok)[0]
    if not rows.size or not orows.size:
        return
    ii, jj, ss = imagesets.cross_cosine(emb[rows], se.emb[orows], cfg.eval_semantic_cosine)
    for a, b, s in zip(ii.tolist(), jj.tolist(), ss.tolist()):
        i = int(rows[a])
        if best[i] is None or best[i][0] < 0:
            cand = (-float(s), images.refs[int(orows[b])])
            if best[i] is None or cand < best[i]:
                best[i] = cand


# --------------------------------------------------------------------------- the stages


def _codes(table: pa.Table, ctx: StageContext) -> Any:
    """The perceptual codes from the hashes stage (curate.stages.hashes.Codes), or None."""
    from . import hashes as hmod

    return hmod.read_codes(table, ctx.config.section("hashes"))


def _has_eval_sets(view: Any) -> bool:
    return bool(view.section(NAME).eval_sets)


@stage(name="decontaminate", section=NAME, version=VERSION, config=SplitConfig, kind="global", phase="group",
       alive_only=True, needs=("hash_codes",), wants=("image_emb",),
       sections=("neardup", "hashes", "inspect", "embed", "input"),
       provides=(Column("eval_match", pa.string(), "the outside evaluation image this sample near-duplicates"),),
       checks=CHECKS, active_if=_has_eval_sets, parallel="inline", identity=lambda view: _identity(view))
def run_decontaminate(table: pa.Table, cfg: SplitConfig, ctx: StageContext) -> pa.Table:
    """Drop training candidates that near-duplicate an image of an outside evaluation set."""
    match, checks = _decontaminate(table, _codes(table, ctx), cfg, ctx)
    if ctx.progress is not None:
        ctx.progress.advance(table.num_rows)
    return pa.Table.from_arrays([table.column("sample_id"), pa.array(match, pa.string()),
                                 pa.array(checks, type=CHECKS_TYPE)],
                                names=["sample_id", "eval_match", checks_column("decontaminate")])


@stage(name=NAME, version=VERSION, config=SplitConfig, kind="global", phase="assign", alive_only=True,
       needs=(), wants=("group_id", "code_component", "hash_codes", "image_emb", "meta"),
       sections=("neardup", "hashes"),
       provides=(Column("split", pa.string(), "train, eval or quarantine; null for dropped samples", shard=True),),
       parallel="inline")
def run(table: pa.Table, cfg: SplitConfig, ctx: StageContext) -> pa.Table:
    """Assign whole near-duplicate groups of live samples to train or eval."""
    n = table.num_rows
    ids = table.column("sample_id")
    codes = _codes(table, ctx)
    is_eval = np.zeros(n, dtype=bool)
    if cfg.eval_fraction > 0 and n:
        members = np.ones(n, dtype=bool)
        # The code search's tables run side by side, as neardup's do.
        threads = ctx.search_threads
        radius = effective_radius(cfg, ctx.config)
        same = getattr(getattr(ctx.config, "neardup", None), "radius", None) == radius
        labels = _labels(table, members, codes, radius, check_radius(ctx.config), cfg, threads, same)
        group, key_row = group_keys(ids, labels)
        weight = np.bincount(group, minlength=key_row.shape[0])
        strata = None
        if cfg.stratify:
            # A group's stratum: that of its smallest sample_id (its key's row).
            row_strata = _strata(table, cfg.stratify)
            strata = [row_strata[r] for r in key_row.tolist()]
        keys = ids.take(pa.array(key_row)).combine_chunks()
        is_eval = assign_groups(keys, weight, cfg.eval_fraction, cfg.seed, cfg.share_tolerance, strata)[group]
    if ctx.progress is not None:
        ctx.progress.advance(n)
    split = pa.array(["train", "eval"], pa.string()).take(pa.array(is_eval.view(np.int8)))
    return pa.Table.from_arrays([ids, split, empty_checks(n)], names=["sample_id", "split", checks_column(NAME)])


def _identity(config: Any) -> dict:
    """The outside sets' listing (paths, sizes, mtimes) so a changed benchmark re-runs this stage, and with
    semantic matching off the reference path, the image tower's path their embeddings are made on."""
    cfg = config.section(NAME)
    paths = resolve_eval_sets(cfg, config)
    if not paths:
        return {}
    from .. import imagesets
    from ..errors import ConfigError, CurateError
    from ..workdir import fingerprint

    out = {}
    for p in paths:
        try:
            s = imagesets.list_set(p)
        except CurateError as e:  # a bad benchmark path stops the run before any work, as bad config
            raise ConfigError(f"eval set {p}: {e}", file=getattr(config, "origin", None),
                              key="split.eval_sets") from e
        out[p] = fingerprint(s.refs, s.stamps)
    ident = {"eval_sets": out}
    if cfg.eval_semantic_cosine > 0 and getattr(config.section("embed"), "enabled", True):
        from .embed import tower_identity

        ident.update(tower_identity(config, "image"))
    return ident
