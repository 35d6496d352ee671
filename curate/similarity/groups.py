"""Grouping: connected components (union-find) and near-duplicate groups with a kept sample.

``group`` forms groups that do not chain. Samples are visited in the caller's keeper order
(``rank``, lower = better copy); a sample no earlier leader has claimed becomes a leader (a kept
sample), and every unclaimed sample linked directly to it joins its group. So every member is
linked to its own kept sample by one of the signals (same bytes; a view pair within the radius
whose check codes pass, see ``hamming``; cosine at or above the threshold), never only through
other members. The result equals that sequential
visit exactly; it is computed in parallel rounds (a sample is decided once every better-ranked
neighbour is), with the sequential visit finishing what long chains leave after ``max_rounds``.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Sequence

import numpy as np

from .hamming import (
    CHECK_RADIUS,
    RADIUS,
    CodeGraph,
    code_graph,
    valid_radius,
    view_distances,
)

INF = np.iinfo(np.int64).max
# Signal codes, strongest first: a member is reported under the strongest signal linking it to its leader.
SAME_BYTES, CODES, EMBEDDING = 0, 1, 2
SIGNALS = ("same_bytes", "codes", "embedding")
# Parallel rounds before the sequential visit takes over (each round costs one pass over the links;
# the greedy order needs about as many rounds as its longest chain of rank-ordered links).
MAX_ROUNDS = 64


# --------------------------------------------------------------------------- union-find


def components(n: int, i: Any, j: Any) -> np.ndarray:
    """Union-find over n elements joined by edges (i[k], j[k]): each element's label is the
    smallest element of its set. Vectorised hook-and-compress; rounds grow with log(n)."""
    parent = np.arange(n, dtype=np.int64)
    i = np.asarray(i, dtype=np.int64).ravel()
    j = np.asarray(j, dtype=np.int64).ravel()
    while i.shape[0]:
        ri, rj = parent[i], parent[j]
        live = ri != rj
        if not live.any():
            break
        i, j, ri, rj = i[live], j[live], ri[live], rj[live]
        # Hook the larger root under the smaller one; a root only ever moves to a smaller index,
        # so the final root of a set is its smallest element.
        np.minimum.at(parent, np.maximum(ri, rj), np.minimum(ri, rj))
        _compress(parent)
    return parent


def _compress(parent: np.ndarray) -> None:
    while True:
        grand = parent[parent]
        if np.array_equal(grand, parent):
            return
        parent[:] = grand


class UnionFind:
    """Union-find over n elements; ``union`` takes scalars or equal-length arrays."""

    def __init__(self, n: int):
        self.n = int(n)
        self._parent = np.arange(self.n, dtype=np.int64)

    def union(self, i: Any, j: Any) -> None:
        i = np.atleast_1d(np.asarray(i, dtype=np.int64))
        j = np.atleast_1d(np.asarray(j, dtype=np.int64))
        # Existing sets are edges from each element to its root; add the new edges and recompute.
        self._parent = components(self.n, np.concatenate([np.arange(self.n), i]), np.concatenate([self._parent, j]))

    def find(self, i: Any) -> Any:
        r = self._parent[np.asarray(i, dtype=np.int64)]
        return int(r) if np.ndim(r) == 0 else r

    def labels(self) -> np.ndarray:
        """Each element's set, named by the set's smallest element."""
        return self._parent.copy()


def graph_components(n: int, graph: CodeGraph) -> np.ndarray:
    """Component label (smallest member) of each of n samples linked by a ``CodeGraph``.

    Only tokens that can link two samples take part (several owners, an edge or a reach); a token
    of one sample alone would join nothing. They are numbered n, n+1, ... after the samples.
    """
    useful = np.bincount(graph.own_u, minlength=graph.tokens) >= 2
    useful[graph.edge_u] = True
    useful[graph.edge_v] = True
    useful[graph.reach_u] = True
    node = np.cumsum(useful) - 1 + n  # the node number of each useful token
    own = useful[graph.own_u]
    i = np.concatenate([graph.own_s[own], graph.reach_s, node[graph.edge_u]])
    j = np.concatenate([node[graph.own_u[own]], node[graph.reach_u], node[graph.edge_v]])
    return components(n + int(useful.sum()), i, j)[:n]


def sample_components(codes2d: Any, radius: int, identity: int | None = None, checks: Any = None,
                      check_radius: int = CHECK_RADIUS, substrings: int | None = None, threads: int = 1) -> np.ndarray:
    """Component label of each row: rows are linked when their sample distance is within ``radius``.

    Works on distinct codes, so a picture held by many rows costs no more than a single one.
    """
    c = np.asarray(codes2d)
    return graph_components(c.shape[0], code_graph(c, radius, identity, checks, check_radius, substrings, threads))


# --------------------------------------------------------------------------- adjacency


class _Csr:
    """values grouped by key (0..size-1): ``rows`` and per-key minimum of a gathered array."""

    def __init__(self, keys: np.ndarray, values: np.ndarray, size: int):
        keys = np.asarray(keys, dtype=np.int64)
        order = np.argsort(keys, kind="stable")
        self.values = np.asarray(values, dtype=np.int64)[order]
        counts = np.bincount(keys, minlength=size)
        self.indptr = np.concatenate(([0], np.cumsum(counts))).astype(np.int64)
        self.present = np.flatnonzero(counts)
        self.size = size

    def min_by_key(self, gathered: np.ndarray) -> np.ndarray:
        """Per key, the minimum of ``gathered`` (aligned with ``values``); INF for empty keys."""
        out = np.full(self.size, INF, dtype=np.int64)
        if self.present.shape[0]:
            out[self.present] = np.minimum.reduceat(gathered, self.indptr[self.present])
        return out

    def rows(self, keys: np.ndarray) -> np.ndarray:
        """The values of the given keys, concatenated."""
        keys = np.asarray(keys, dtype=np.int64)
        lo, hi = self.indptr[keys], self.indptr[keys + 1]
        per = hi - lo
        if not per.sum():
            return np.empty(0, np.int64)
        pos = np.repeat(lo - (np.cumsum(per) - per), per) + np.arange(int(per.sum()))
        return self.values[pos]


class _TokenLinks:
    """Neighbours through tokens: co-owners, owners of nearby tokens, and reaches (see CodeGraph)."""

    def __init__(self, n: int, tokens: int, own_s, own_u, reach_s, reach_u, edge_u, edge_v):
        both_u = np.concatenate([edge_u, edge_v])
        both_v = np.concatenate([edge_v, edge_u])
        self.own_by_u = _Csr(own_u, own_s, tokens)
        self.reach_by_u = _Csr(reach_u, reach_s, tokens)
        self.edges = _Csr(both_u, both_v, tokens)
        self.own_by_s = _Csr(own_s, own_u, n)
        self.reach_by_s = _Csr(reach_s, reach_u, n)

    def neighbour_min(self, val: np.ndarray) -> np.ndarray:
        tok_own = self.own_by_u.min_by_key(val[self.own_by_u.values])
        tok_reach = self.reach_by_u.min_by_key(val[self.reach_by_u.values])
        near = np.minimum(tok_own, self.edges.min_by_key(tok_own[self.edges.values]))
        via_own = self.own_by_s.min_by_key(np.minimum(near, tok_reach)[self.own_by_s.values])
        via_reach = self.reach_by_s.min_by_key(tok_own[self.reach_by_s.values])
        return np.minimum(via_own, via_reach)

    def neighbours(self, s: int) -> np.ndarray:
        own = self.own_by_s.rows(np.array([s]))
        toks = np.concatenate([own, self.edges.rows(own), self.reach_by_s.rows(np.array([s]))])
        return np.concatenate([self.own_by_u.rows(toks), self.reach_by_u.rows(own)])


class _PairLinks:
    """Neighbours through explicit pairs (both directions)."""

    def __init__(self, n: int, i: np.ndarray, j: np.ndarray):
        self.csr = _Csr(np.concatenate([i, j]), np.concatenate([j, i]), n)

    def neighbour_min(self, val: np.ndarray) -> np.ndarray:
        return self.csr.min_by_key(val[self.csr.values])

    def neighbours(self, s: int) -> np.ndarray:
        return self.csr.rows(np.array([s]))


@dataclass
class Links:
    """Links between n samples: token sources (codes, same bytes) and explicit pairs (embeddings)."""

    n: int
    graphs: list[CodeGraph]
    pairs: list[tuple[np.ndarray, np.ndarray]]

    def involved(self) -> np.ndarray:
        """Samples that may have a neighbour other than themselves."""
        mark = np.zeros(self.n, dtype=bool)
        for g in self.graphs:
            owners = np.bincount(g.own_u, minlength=g.tokens)
            useful = owners >= 2
            useful[g.edge_u] = True
            useful[g.edge_v] = True
            useful[g.reach_u] = True
            mark[g.own_s[useful[g.own_u]]] = True
            mark[g.reach_s] = True
        for i, j in self.pairs:
            diff = i != j
            mark[i[diff]] = True
            mark[j[diff]] = True
        return np.flatnonzero(mark)


def _compact(links: Links, keep: np.ndarray) -> list[Any]:
    """Link sources over the samples ``keep`` only, renumbered 0..len(keep)-1."""
    new = np.full(links.n, -1, dtype=np.int64)
    new[keep] = np.arange(keep.shape[0])
    m = keep.shape[0]
    out: list[Any] = []
    for g in links.graphs:
        o = new[g.own_s] >= 0
        r = new[g.reach_s] >= 0
        out.append(_TokenLinks(m, g.tokens, new[g.own_s[o]], g.own_u[o], new[g.reach_s[r]], g.reach_u[r],
                               g.edge_u, g.edge_v))
    for i, j in links.pairs:
        ok = (new[i] >= 0) & (new[j] >= 0) & (i != j)
        out.append(_PairLinks(m, new[i[ok]], new[j[ok]]))
    return out


# --------------------------------------------------------------------------- greedy leaders


_UNDECIDED, _LEADER, _MEMBER = 0, 1, 2


def _neighbour_min(sources: Sequence[Any], val: np.ndarray) -> np.ndarray:
    out = np.full(val.shape[0], INF, dtype=np.int64)
    for src in sources:
        np.minimum(out, src.neighbour_min(val), out=out)
    return out


def _rounds(sources: Sequence[Any], pos: np.ndarray, max_rounds: int) -> tuple[np.ndarray, int]:
    """Decide leaders and members round by round; returns the states and the rounds used."""
    state = np.zeros(pos.shape[0], dtype=np.int8)
    done = 0
    while done < max_rounds and (state == _UNDECIDED).any():
        done += 1
        lead = _neighbour_min(sources, np.where(state == _LEADER, pos, INF))
        state[(state == _UNDECIDED) & (lead < pos)] = _MEMBER
        und = state == _UNDECIDED
        low = _neighbour_min(sources, np.where(und, pos, INF))
        # No better-ranked neighbour left undecided, and none is a leader (those were just made
        # members): this sample is the first of its neighbourhood the sequential visit reaches.
        state[und & (low >= pos)] = _LEADER
    return state, done


def _sequential(sources: Sequence[Any], pos: np.ndarray, state: np.ndarray) -> None:
    """Finish the undecided samples by the sequential visit itself, in rank order."""
    # Leaders of the last round have not claimed their neighbours yet.
    lead = _neighbour_min(sources, np.where(state == _LEADER, pos, INF))
    state[(state == _UNDECIDED) & (lead < pos)] = _MEMBER
    for s in np.flatnonzero(state == _UNDECIDED)[np.argsort(pos[state == _UNDECIDED])].tolist():
        if state[s] != _UNDECIDED:
            continue
        state[s] = _LEADER
        nb = np.concatenate([src.neighbours(s) for src in sources])
        nb = nb[state[nb] == _UNDECIDED]
        state[nb] = _MEMBER


def greedy_leaders(rank: Any, links: Links, max_rounds: int = MAX_ROUNDS) -> tuple[np.ndarray, int]:
    """Each sample's leader by the sequential rule (module docstring) and the parallel rounds used.

    ``rank``: keeper priority per sample, lower first; ties go to the lower index.
    """
    rank = np.asarray(rank)
    n = rank.shape[0]
    if n != links.n:
        raise ValueError(f"rank has {n} entries, the links cover {links.n} samples")
    leader = np.arange(n, dtype=np.int64)
    keep = links.involved()
    if not keep.shape[0]:
        return leader, 0
    order = np.lexsort((keep, rank[keep]))
    pos = np.empty(keep.shape[0], dtype=np.int64)
    pos[order] = np.arange(keep.shape[0])
    sources = _compact(links, keep)
    state, used = _rounds(sources, pos, max_rounds)
    if (state == _UNDECIDED).any():
        _sequential(sources, pos, state)
    # A member's leader is its best-ranked neighbouring leader: the first to claim it.
    best = _neighbour_min(sources, np.where(state == _LEADER, pos, INF))
    members = np.flatnonzero(state == _MEMBER)
    leader[keep[members]] = keep[order[best[members]]]
    return leader, used


# --------------------------------------------------------------------------- near-duplicate groups


@dataclass
class Groups:
    """Near-duplicate groups: per sample its kept sample and how it is linked to it."""

    leader: np.ndarray  # int64[n]: the kept sample of the sample's group (itself when it is kept)
    signal: np.ndarray  # int8[n]: SIGNALS index of the strongest link to the leader; -1 for leaders
    distance: np.ndarray  # float32[n]: in the signal's unit (bits; 0 for same bytes; 1 - cosine); 0 for leaders
    view_kept: np.ndarray  # int16[n]: the leader's view that matched (codes signal), else -1
    view_member: np.ndarray  # int16[n]: the member's view that matched (codes signal), else -1
    rounds: int  # parallel rounds the grouping took (diagnostic)
    # int64[n]: each sample's component in the graph of code links alone (its smallest member), -1
    # without codes; every pair within the radius lies inside one component (None: codes not used)
    code_component: np.ndarray | None = None

    def sizes(self) -> np.ndarray:
        """Size of each sample's group."""
        return np.bincount(self.leader, minlength=self.leader.shape[0])[self.leader]

    def transforms(self, view_list: Sequence[Any]) -> list[str | None]:
        """Per sample, the transform that takes its kept picture to it (codes signal), else None."""
        from .codes import matched_transform

        return [matched_transform(view_list, k, m) if k >= 0 else None
                for k, m in zip(self.view_kept.tolist(), self.view_member.tolist())]


def same_key_graph(key: Any) -> CodeGraph:
    """A CodeGraph linking samples with equal non-negative keys (same bytes); -1 links nothing."""
    key = np.asarray(key, dtype=np.int64)
    rows = np.flatnonzero(key >= 0)
    _, inv = np.unique(key[rows], return_inverse=True)
    e = np.empty(0, np.int64)
    return CodeGraph(int(inv.max(initial=-1)) + 1, rows.astype(np.int64), inv.ravel().astype(np.int64), e, e, e, e)


def _rows_graph(graph: CodeGraph, rows: np.ndarray) -> CodeGraph:
    """A CodeGraph over a subset ``rows`` of the samples, renumbered to the full index."""
    return graph._replace(own_s=rows[graph.own_s], reach_s=rows[graph.reach_s])


@dataclass
class Signals:
    """The inputs of ``group`` for n samples; any signal may be missing (None)."""

    same_key: Any = None  # int[n]: equal non-negative values for equal bytes, -1 unknown
    codes: Any = None  # uint64[n, K]: perceptual codes, identity views first
    has_codes: Any = None  # bool[n]: rows whose codes are valid (None: all)
    identity: int | None = None  # leading identity views per row (None: every view)
    radius: int = RADIUS  # Hamming radius of the codes signal (bits)
    checks: Any = None  # uint64[n, K]: a check code per view (None: none)
    check_radius: int = CHECK_RADIUS  # a view pair counts only when its check codes are this close (bits)
    emb_pairs: Any = None  # (i, j, cosine) arrays: embedding links, e.g. from cosine.cosine_pairs
    emb: Any = None  # float32[n, D]: L2-normalised embeddings, to report the distance of an embedding link


def group(rank: Any, signals: Signals, *, substrings: int | None = None, threads: int = 1,
          max_rounds: int = MAX_ROUNDS) -> Groups:
    """Near-duplicate groups of n samples by the leader rule, with each member's link to its leader."""
    rank = np.asarray(rank)
    n = rank.shape[0]
    graphs: list[CodeGraph] = []
    pairs: list[tuple[np.ndarray, np.ndarray]] = []
    if signals.same_key is not None:
        graphs.append(same_key_graph(signals.same_key))
    codes = rows = code_component = None
    if signals.codes is not None:
        codes = np.asarray(signals.codes, dtype=np.uint64)
        codes = codes[:, None] if codes.ndim == 1 else codes
        rows = np.arange(n) if signals.has_codes is None else np.flatnonzero(np.asarray(signals.has_codes, bool))
        if rows.shape[0]:
            pick = (lambda a: a if rows.shape[0] == n else a[rows])  # noqa: E731  (no copy when all are valid)
            chk = None if signals.checks is None else pick(np.asarray(signals.checks, dtype=np.uint64).reshape(codes.shape))
            g = code_graph(pick(codes), valid_radius(signals.radius), signals.identity, chk, signals.check_radius,
                           substrings, threads)
            graphs.append(_rows_graph(g, rows))
            code_component = np.full(n, -1, np.int64)
            code_component[rows] = rows[graph_components(rows.shape[0], g)]
    if signals.emb_pairs is not None:
        pi, pj = (np.asarray(x, dtype=np.int64) for x in signals.emb_pairs[:2])
        pairs.append((pi, pj))
    leader, used = greedy_leaders(rank, Links(n, graphs, pairs), max_rounds)
    out = _annotate(leader, used, signals, codes, rows)
    out.code_component = code_component
    return out


def _annotate(leader: np.ndarray, used: int, signals: Signals, codes: np.ndarray | None,
              rows: np.ndarray | None) -> Groups:
    """Each member's strongest link to its leader, with the distance and matched views."""
    n = leader.shape[0]
    signal = np.full(n, -1, np.int8)
    dist = np.zeros(n, np.float32)
    vk = np.full(n, -1, np.int16)
    vm = np.full(n, -1, np.int16)
    todo = np.flatnonzero(leader != np.arange(n))
    if signals.same_key is not None and todo.shape[0]:
        key = np.asarray(signals.same_key, dtype=np.int64)
        same = (key[todo] >= 0) & (key[todo] == key[leader[todo]])
        signal[todo[same]] = SAME_BYTES
        todo = todo[~same]
    if codes is not None and todo.shape[0]:
        has = np.zeros(n, bool)
        has[rows] = True
        both = todo[has[todo] & has[leader[todo]]]
        chk = None if signals.checks is None else np.asarray(signals.checks, dtype=np.uint64).reshape(codes.shape)
        d, va, vb = _chunked_view_distances(codes, chk, leader[both], both, signals.identity, signals.check_radius)
        near = d <= signals.radius
        sel = both[near]
        signal[sel], dist[sel], vk[sel], vm[sel] = CODES, d[near], va[near], vb[near]
        todo = np.setdiff1d(todo, sel)
    if todo.shape[0]:
        if signals.emb_pairs is None:
            raise RuntimeError("a member has no link to its leader")  # cannot happen: links are exact
        signal[todo] = EMBEDDING
        if signals.emb is not None:
            e = np.asarray(signals.emb, dtype=np.float32)
            dist[todo] = np.maximum(0.0, 1.0 - np.einsum("ij,ij->i", e[todo], e[leader[todo]]))
        else:
            dist[todo] = _pair_distance(signals.emb_pairs, todo, leader[todo])
    return Groups(leader, signal, dist, vk, vm, used)


def _chunked_view_distances(codes: np.ndarray, checks: np.ndarray | None, a: np.ndarray, b: np.ndarray,
                            identity: int | None, check_radius: int,
                            chunk: int = 65536) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``view_distances`` of rows a[k] and b[k], in chunks (the K x K temporaries stay small)."""
    pick = (lambda rows: None if checks is None else checks[rows])  # noqa: E731
    parts = [view_distances(codes[a[s : s + chunk]], codes[b[s : s + chunk]], identity, pick(a[s : s + chunk]),
                            pick(b[s : s + chunk]), check_radius) for s in range(0, a.shape[0], chunk)]
    if not parts:
        e = np.empty(0, np.int16)
        return e, e, e
    return tuple(np.concatenate(x) for x in zip(*parts))  # type: ignore[return-value]


def _pair_distance(emb_pairs: Any, a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """1 - cosine of the listed embedding pairs (a[k], b[k]), looked up in (i, j, cosine)."""
    pi, pj, cos = (np.asarray(x) for x in emb_pairs[:3])
    lut = {(int(x), int(y)): float(c) for x, y, c in zip(np.minimum(pi, pj), np.maximum(pi, pj), cos)}
    return np.array([1.0 - lut[(min(x, y), max(x, y))] for x, y in zip(a.tolist(), b.tolist())], np.float32)
