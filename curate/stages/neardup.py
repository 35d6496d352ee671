"""neardup: put every copy of a picture in one group and keep only the best copy.

A global stage: it sees every decoded sample at once. Three signals link two samples, strongest
first: the same file bytes (sha256, no search at all), perceptual codes within `radius` bits (the
closest allowed pair of the two samples' views whose check codes are also within `check_radius`,
found by exact multi-index Hamming search; same links as brute force), and, when the embed stage
ran and `semantic` is on, image embeddings with cosine >= `cosine` (SemDeDup-style search within
k-means clusters beyond `cosine_exact_max` samples).

Groups do not chain: samples are visited in keeper order (`keeper`, a priority list; default: no
risk or quality flags, more pixels, a lossless file or a higher JPEG quality, sharper, less area
under overlays or bands, then the smallest sample_id); a sample no earlier keeper has claimed
becomes a keeper, and claims every unclaimed sample linked directly to it
(curate.similarity.group). So every copy is linked to its own keeper, never only through other
copies, and the keeper is the best-ranked member of its group. Only live samples are grouped (a
sample another check already dropped never takes a group's place).

Every other member fails the `duplicate` check; `keep_reason` names the criterion on which the
kept copy won, `dup_of` the keeper, `dup_signal` the strongest signal linking it to the keeper
("sha256" < "phash"/"dhash" < "embedding"), `dup_distance` its distance to the keeper in that
signal's unit (Hamming bits of the matched views; 0 for sha256; 1 - cosine for embeddings), and
`dup_transform` how the copy relates to the keeper (identity, mirror, rot90, rot180, ..., with
"+crop" when different crop views matched). `group_id` is the keeper's sample_id (a lone sample is
its own group), so it is stable while the keeper stays.
"""
from __future__ import annotations

import logging
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from .. import similarity
from ..checks import CHECKS_TYPE, columnar
from . import hashes as hashes_mod
from .base import CheckSpec, Column, StageContext, checks_column, stage

log = logging.getLogger(__name__)

NAME = "neardup"
VERSION = "4"


@dataclass
class NeardupConfig:
    enabled: bool = True
    # Largest Hamming distance (bits of 64, closest allowed views) for two samples to be copies.
    # Measured in bench/neardup_quality.py at the default [hashes]: everyday edited copies <= 8;
    # different photos >= 10 even among 10-30% crops and turns of them (check codes passing).
    # pHash codes split 32/32 around their median, so distances are even: 8 and 9 act the same.
    radius: int = 8
    # Largest Hamming distance of the check codes ([hashes] check) of the matched views. Unrelated
    # codes differ by 32 +- 4 bits (64 fair bits, simple arithmetic): 16 is four deviations below;
    # measured on public photos, no pair of different photos passed at 16 (bench/neardup_quality.py).
    check_radius: int = similarity.CHECK_RADIUS
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
        if not 0 <= self.check_radius <= 64:
            raise ValueError(f"check_radius must be within 0..64 bits, got {self.check_radius}")
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


def _at(table: pa.Table, name: str, rows: np.ndarray) -> pa.Array:
    """A column at the given rows (increasing) as one array; at every row: the column itself, no copy."""
    col = table.column(name)
    if len(rows) != table.num_rows:
        col = col.take(pa.array(rows, type=pa.int64()))
    return col.chunk(0) if col.num_chunks == 1 else col.combine_chunks()


def _col(table: pa.Table, name: str, rows: np.ndarray, fill: float) -> np.ndarray:
    if name not in table.column_names:
        return np.full(len(rows), fill, np.float64)
    a = table.column(name).to_numpy(zero_copy_only=False)[rows].astype(np.float64)
    return np.where(np.isnan(a), fill, a)


def _fidelity(table: pa.Table, rows: np.ndarray) -> np.ndarray:
    """101 for a lossless file, the estimated JPEG quality (1-100) for a JPEG, 0 when unknown."""
    q = _col(table, "jpeg_quality", rows, 0.0)
    if "format" in table.column_names:
        lossless = pc.is_in(_at(table, "format", rows), value_set=pa.array(LOSSLESS))
        q = np.where(np.asarray(pc.fill_null(lossless, False).to_numpy(zero_copy_only=False), dtype=bool), 101.0, q)
    return q


def _flagged(table: pa.Table, rows: np.ndarray) -> np.ndarray:
    """1 for a row with a risk or quality flag before this stage, else 0."""
    if "flags_before" not in table.column_names:
        return np.zeros(len(rows))
    count = pc.list_value_length(_at(table, "flags_before", rows))
    return (np.asarray(pc.fill_null(count, 0).to_numpy(zero_copy_only=False)) > 0).astype(np.float64)


# name -> (what it prefers, score of each row: lower wins)
KEEPER_CRITERIA = {
    "unflagged": ("no risk or quality flag", _flagged),
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


def why_kept(scores: np.ndarray, order: list[str], keeper: np.ndarray, member: np.ndarray) -> pa.Array:
    """Per (keeper[k], member[k]): the first criterion on which the kept copy beats the member
    (sample_id when all tie)."""
    wins = scores[:, keeper] < scores[:, member]  # (criteria, pairs)
    first = np.where(wins.any(axis=0), wins.argmax(axis=0), len(order)) if len(order) else \
        np.zeros(len(keeper), np.int64)
    return pa.array([*order, "sample_id"], pa.string()).take(pa.array(first, pa.int64()))


COLUMNS = (
    Column("group_id", pa.string(), "near-duplicate group: the kept sample's id", shard=True),
    Column("group_size", pa.int32(), "members of the group"),
    Column("dup_of", pa.string(), "the kept sample this one is a copy of"),
    Column("dup_signal", pa.string(), "what linked it: sha256, the hash kind, or embedding"),
    Column("dup_distance", pa.float32(), "distance to the kept sample in that signal's unit"),
    Column("dup_transform", pa.string(), "how the copy relates to the kept sample: identity, mirror, rot90, "
           "rot180, rot270, ... with +crop when different crops matched (null for embedding links)"),
    Column("keep_reason", pa.string(), "for a copy: the criterion on which the kept copy won"),
    # Every pair of samples within the radius by perceptual codes lies inside one component, so the
    # split stage, which must keep such pairs on one side, searches only components of two or more.
    Column("code_component", pa.int64(), "component of the sample among links by perceptual codes alone at the "
           "stage's radius (a number shared by linked samples; -1 when none links to it; null without codes)",
           ledger=False),
)
OUTPUT_SCHEMA = pa.schema([("sample_id", pa.string())] + [(c.name, c.type) for c in COLUMNS]
                          + [(checks_column(NAME), CHECKS_TYPE)])


def _embeddings(table: pa.Table, rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(float32 (len(rows), d), has) for the given rows of the image_emb column."""
    sub = _at(table, "image_emb", rows)
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


def _sha_keys(table: pa.Table, rows: np.ndarray) -> np.ndarray:
    """Equal numbers for equal sha256 values among the given rows, -1 where unknown."""
    if "sha256" not in table.column_names or not len(rows):
        return np.full(len(rows), -1, np.int64)
    enc = _at(table, "sha256", rows).dictionary_encode().indices
    return np.asarray(enc.fill_null(-1).to_numpy(zero_copy_only=False), dtype=np.int64)


def _rank(table: pa.Table, rows: np.ndarray, keeper: list[str]) -> tuple[np.ndarray, np.ndarray]:
    """(rank, scores) of the given rows: rank 0 is the best copy by the keeper priority, the
    smallest sample_id last."""
    m = rows.shape[0]
    id_rank = np.empty(m, np.int64)
    if m:
        by_id = pc.sort_indices(_at(table, "sample_id", rows))
        id_rank[by_id.to_numpy()] = np.arange(m)
    scores = keeper_scores(table, rows, keeper)
    rank = np.empty(m, np.int64)
    rank[np.lexsort((id_rank, *scores[::-1]))] = np.arange(m)
    return rank, scores


def _expand_classes(cls: np.ndarray, ok: np.ndarray, ca: np.ndarray, cb: np.ndarray) -> tuple[np.ndarray, np.ndarray,
                                                                                                np.ndarray]:
    """Every (row of class ca[k], row of class cb[k]) among rows with ``ok``, and its k."""
    members = np.flatnonzero(ok)
    order = members[np.argsort(cls[members], kind="stable")]
    counts = np.bincount(cls[members], minlength=int(cls.max(initial=-1)) + 1)
    starts = np.cumsum(counts) - counts
    per = counts[ca] * counts[cb]
    src = np.repeat(np.arange(ca.shape[0]), per)
    off = np.arange(int(per.sum())) - np.repeat(np.cumsum(per) - per, per)
    nb = np.repeat(counts[cb], per)
    return order[np.repeat(starts[ca], per) + off // nb], order[np.repeat(starts[cb], per) + off % nb], src


def embedding_links(emb: np.ndarray, has_emb: np.ndarray, sha_key: np.ndarray, cfg: NeardupConfig
                    ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(i, j, cosine) of every pair of rows whose embeddings reach ``cfg.cosine``. The search runs
    on one row per distinct file (same bytes, same embedding); its pairs reach every copy."""
    n = sha_key.shape[0]
    key = np.where(sha_key >= 0, sha_key, -1 - np.arange(n))  # unknown bytes: a key of its own
    cls = np.unique(key, return_inverse=True)[1].ravel()
    with_emb = np.flatnonzero(has_emb)
    reps = with_emb[np.unique(cls[with_emb], return_index=True)[1]]  # first row with an embedding per file
    empty = (np.empty(0, np.int64), np.empty(0, np.int64), np.empty(0, np.float32))
    if reps.shape[0] < 2:
        return empty
    p = similarity.cosine_pairs(emb[reps], cfg.cosine, clusters=cfg.clusters or None, probes=cfg.probes,
                                exact_max=cfg.cosine_exact_max, seed=cfg.seed)
    if not len(p):
        return empty
    i, j, src = _expand_classes(cls, has_emb, cls[reps[p.i]], cls[reps[p.j]])
    return i, j, np.asarray(p.distance, np.float32)[src]


def group_samples(sha_key: np.ndarray, codes: hashes_mod.Codes | None, emb: np.ndarray | None,
                  has_emb: np.ndarray | None, rank: np.ndarray, cfg: NeardupConfig,
                  threads: int = 1) -> similarity.Groups:
    """Leader groups of the given samples (module docstring) from their sha256 keys (equal
    non-negative numbers for equal bytes, -1 unknown), codes and embeddings (any may be None)."""
    sig = similarity.Signals(same_key=sha_key, radius=cfg.radius, check_radius=cfg.check_radius)
    if codes is not None:
        sig.codes, sig.has_codes, sig.checks, sig.identity = codes.main, codes.valid, codes.checks, codes.identity
    if emb is not None and has_emb is not None and emb.shape[1] > 0:
        sig.emb_pairs = embedding_links(emb, has_emb, sha_key, cfg)
        sig.emb = emb
    return similarity.group(rank, sig, threads=threads)


def _inputs(table: pa.Table, rows: np.ndarray, cfg: NeardupConfig, ctx: StageContext):
    """(sha keys, codes, embeddings, has embedding) of the given rows; absent signals are None."""
    codes = hashes_mod.read_codes(table, ctx.config.section("hashes"))
    emb = has_emb = None
    if cfg.semantic and "image_emb" in table.column_names and rows.shape[0]:
        emb, has_emb = _embeddings(table, rows)
    return _sha_keys(table, rows), None if codes is None else codes.rows(rows), emb, has_emb


@stage(name=NAME, version=VERSION, config=NeardupConfig, kind="global", phase="group", alive_only=True,
       needs=("decoded", "width", "height"), wants=("sha256", hashes_mod.CODES, "image_emb", "agreement",
                                                    "flags_before", "format", "jpeg_quality", "sharpness",
                                                    "border_share", "overlay_share"),
       sections=("hashes",), provides=COLUMNS, checks=CHECKS, after=("decontaminate",), parallel="inline")
def run(table: pa.Table, cfg: NeardupConfig, ctx: StageContext) -> pa.Table:
    """Group copies of one picture and keep the best copy of each group."""
    decoded = np.asarray(table.column("decoded").fill_null(False).to_numpy(zero_copy_only=False), dtype=bool)
    rows = np.flatnonzero(decoded)
    sha_key, codes, emb, has_emb = _inputs(table, rows, cfg, ctx)
    rank, scores = _rank(table, rows, cfg.keeper)
    threads = ctx.search_threads
    groups = group_samples(sha_key, codes, emb, has_emb, rank, cfg, threads)
    log.debug("neardup: %d samples grouped in %d parallel rounds", rows.shape[0], groups.rounds)
    kind = ctx.config.section("hashes").kind
    return _output(table, rows, groups, scores, cfg, kind, None if codes is None else codes.views)


def _output(table: pa.Table, rows: np.ndarray, groups: similarity.Groups, scores: np.ndarray, cfg: NeardupConfig,
            kind: str, views: list[similarity.View] | None) -> pa.Table:
    """The stage's columns for every input row (rows outside ``rows`` stay null), built column-wise."""
    n, m = table.num_rows, rows.shape[0]
    leader = groups.leader
    sizes = groups.sizes()
    gid = table.column("sample_id").take(pa.array(rows[leader])).combine_chunks()
    copy = np.flatnonzero(leader != np.arange(m))  # positions in ``rows`` of the copies (not kept)
    lead = np.flatnonzero(leader == np.arange(m))
    signal = groups.signal[copy]
    dist = groups.distance[copy]
    keeper_id = gid.take(pa.array(copy))
    sig = _pick(["sha256", kind, "embedding"], signal)
    how = _how(groups, copy, views)
    reason = why_kept(scores, cfg.keeper, leader[copy], copy)
    emb, codes = signal == similarity.groups.EMBEDDING, signal == similarity.groups.CODES
    # The duplicate check of each seen row; a copy's value and threshold are in its signal's unit.
    unit = np.where(emb, 0, np.where(codes, 1, -1))
    value, threshold = np.full(m, np.nan), np.full(m, np.nan)
    value[copy] = np.where(emb, 1.0 - dist.astype(np.float64), np.where(codes, dist, np.nan))
    threshold[copy] = np.where(emb, cfg.cosine, np.where(codes, cfg.radius, np.nan))
    failed = np.zeros(m, bool)
    failed[copy] = True
    fields = {"failed": failed, "value": value, "threshold": threshold,
              "detail": _details(lead, sizes[lead], copy, signal, keeper_id, sig, how, reason),
              "op": _spread(_pick(["<", ">"], unit), copy, m), "unit": _spread(_pick(["cosine", "bits"], unit), copy, m)}
    seen = np.zeros(n, bool)
    seen[rows] = True
    checks = columnar(n, seen, [{"code": "duplicate", **{k: _spread(v, rows, n) if isinstance(v, pa.Array)
                                                         else _scatter(v, rows, n) for k, v in fields.items()}}])
    cols = {"group_id": gid, "group_size": pa.array(sizes.astype(np.int32)),
            "dup_of": _spread(keeper_id, copy, m), "dup_signal": _spread(sig, copy, m),
            "dup_distance": _spread(pa.array(dist, pa.float32()), copy, m), "dup_transform": _spread(how, copy, m),
            "keep_reason": _spread(reason, copy, m),
            "code_component": _components(groups.code_component, rows, m, table.column("sample_id"))}
    arrays = [table.column("sample_id")] + [_spread(cols[c.name], rows, n).cast(c.type) for c in COLUMNS]
    return pa.Table.from_arrays(arrays + [checks], schema=OUTPUT_SCHEMA)


def _details(lead: np.ndarray, lead_sizes: np.ndarray, copy: np.ndarray, signal: np.ndarray,
             keeper_id: pa.Array, sig: pa.Array, how: pa.Array, reason: pa.Array) -> pa.Array:
    """The duplicate check's detail of each seen row (kept ones at ``lead``, copies at ``copy``): a
    kept sample says how many copies it won over; a copy names its keeper, the signal and the
    criterion its keeper won on."""
    def at(values: pa.Array, sel: np.ndarray) -> pa.Array:
        return values.take(pa.array(sel, pa.int64()))

    def join(*parts: Any) -> pa.Array:
        return pc.binary_join_element_wise(*parts, "")

    won = "; the kept copy wins on "
    same, near, emb = (np.flatnonzero(signal == code) for code in (similarity.groups.SAME_BYTES,
                                                                   similarity.groups.CODES,
                                                                   similarity.groups.EMBEDDING))
    alone = lead_sizes == 1
    parts = [
        (lead[alone], pa.repeat(pa.scalar("no copy", pa.string()), int(alone.sum()))),
        (lead[~alone], join("kept over ", pc.cast(pa.array(lead_sizes[~alone] - 1), pa.string()), " copies")),
        (copy[same], join("same bytes as ", at(keeper_id, same), won, at(reason, same))),
        (copy[near], join("copy of ", at(keeper_id, near), " (", at(sig, near), ", ", at(how, near), ")", won,
                          at(reason, near))),
        (copy[emb], join("copy of ", at(keeper_id, emb), " (embedding)", won, at(reason, emb))),
    ]
    order = np.argsort(np.concatenate([p for p, _ in parts]), kind="stable")
    return pa.concat_arrays([t.cast(pa.string()) for _, t in parts]).take(pa.array(order))


def _pick(names: list[str], index: np.ndarray) -> pa.Array:
    """names[index[k]] per entry, null where the index is negative."""
    index = np.asarray(index, np.int64)
    return pa.array(names, pa.string()).take(pa.array(index, mask=index < 0))


def _components(comp: np.ndarray | None, rows: np.ndarray, m: int, ids: pa.Array) -> pa.Array:
    """Code components of the seen rows: -1 for a row no other links to, else the rank by sample_id
    of the component's smallest sample_id among the linked rows (so the same rows in any order give
    the same numbers); null without codes."""
    if comp is None:
        return pa.nulls(m, pa.int64())
    out = np.full(m, -1, np.int64)
    valid = comp >= 0
    size = np.bincount(comp[valid], minlength=m)
    linked = np.flatnonzero(valid & (size[np.maximum(comp, 0)] >= 2))
    if linked.shape[0]:
        rank = np.empty(linked.shape[0], np.int64)
        rank[np.asarray(pc.sort_indices(ids.take(pa.array(rows[linked]))))] = np.arange(linked.shape[0])
        best = np.full(m, np.iinfo(np.int64).max, np.int64)
        np.minimum.at(best, comp[linked], rank)
        out[linked] = best[comp[linked]]
    return pa.array(out, pa.int64(), mask=~valid)


def _spread(values: pa.Array, at: np.ndarray, m: int) -> pa.Array:
    """An array of m entries: values[k] at position at[k], null elsewhere."""
    index = np.full(m, -1, np.int64)
    index[at] = np.arange(at.shape[0])
    return values.take(pa.array(index, mask=index < 0))


def _scatter(values: np.ndarray, at: np.ndarray, m: int) -> np.ndarray:
    """A numpy array of m entries: values[k] at position at[k], NaN (or False) elsewhere."""
    out = np.zeros(m, bool) if values.dtype == bool else np.full(m, np.nan)
    out[at] = values
    return out


def _how(groups: similarity.Groups, copy: np.ndarray, views: list[similarity.View] | None) -> pa.Array:
    """How each copy relates to its keeper: same bytes are identical, codes name the matched views
    (similarity.match_name), an embedding link says nothing (null)."""
    signal = groups.signal[copy]
    index = np.full(copy.shape[0], -1, np.int64)
    names = ["identity"]
    index[signal == similarity.groups.SAME_BYTES] = 0
    near = np.flatnonzero(signal == similarity.groups.CODES)
    if views is not None and near.shape[0]:
        k = len(views)
        pair = groups.view_kept[copy[near]].astype(np.int64) * k + groups.view_member[copy[near]]
        uniq, inv = np.unique(pair, return_inverse=True)
        names += [similarity.match_name(views, int(p) // k, int(p) % k) for p in uniq]
        index[near] = 1 + inv.ravel()
    return _pick(names, index)
