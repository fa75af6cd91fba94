"""Holdout preparation for link prediction: edges held out before the walks, no node left without an edge, and
sampled non-edges to score them against (:func:`holdout_edges`)."""

from __future__ import annotations

import warnings

import numpy as np

from ..checks import check_int as _check_int
from ..errors import ConfigError, GraphDataWarning
from ..graph import AdjacencyArrays
from .validate import _check_ratio, _check_seed

__all__ = ["EdgeHoldout", "holdout_edges"]

#: Largest batch of candidate pairs drawn per round when sampling non-edges.
_MAX_BATCH = 1 << 22


class EdgeHoldout(tuple):
    """Result of :func:`holdout_edges`: unpacks as ``(train_graph, positives, negatives)``.

    Attributes
    ----------
    train_graph : AdjacencyArrays
    positives : ndarray of int32, shape (n_held_out, 2)
    negatives : ndarray of int32, shape (n_negatives, 2)
    counts : dict of str to int
        ``n_edges`` (candidate edges: undirected edges, or arcs, without self-loops), ``n_requested``,
        ``n_held_out``, ``n_protected`` (edges kept so that no node loses all its edges), ``n_negatives`` and
        ``max_edges`` (the cap on the held-out count, None for none).
    """

    def __new__(cls, train_graph, positives, negatives, counts):
        self = super().__new__(cls, (train_graph, positives, negatives))
        self.counts = dict(counts)
        return self

    def __getnewargs__(self):
        return (*self, self.counts)

    train_graph = property(lambda self: self[0])
    positives = property(lambda self: self[1])
    negatives = property(lambda self: self[2])


def _edge_keys(graph) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Source (int64) of every CSR entry, destination (int64) and key ``src * n_nodes + dst`` (strictly increasing)."""
    n = graph.n_nodes
    indptr = np.asarray(graph.indptr, dtype=np.int64)
    dst = np.asarray(graph.indices, dtype=np.int64)
    src = np.repeat(np.arange(n, dtype=np.int64), np.diff(indptr))
    keys = src * np.int64(n) + dst
    # Membership tests below binary-search these keys; AdjacencyArrays.from_edges builds sorted, duplicate-free rows.
    if keys.size > 1 and not np.all(keys[1:] > keys[:-1]):
        raise ConfigError("graph rows must be sorted ascending without duplicates "
                          "(as AdjacencyArrays.from_edges builds them)")
    return src, dst, keys


def _spanning_forest(n, u, v, rng) -> np.ndarray:
    """Positions (into u, v) of the edges of a random spanning forest of the undirected graph {(u[i], v[i])}.

    Kruskal's algorithm over a uniformly random edge order, run by scipy's ``minimum_spanning_tree`` on distinct
    random ranks as weights (it treats the matrix as undirected, so one orientation per edge is enough).
    """
    from scipy.sparse import csr_matrix
    from scipy.sparse.csgraph import minimum_spanning_tree

    m = u.size
    if m == 0:
        return np.zeros(0, dtype=np.int64)
    perm = rng.permutation(m)
    rank = np.empty(m, dtype=np.float64)
    rank[perm] = np.arange(1, m + 1, dtype=np.float64)  # ranks >= 1: scipy reads a zero weight as "no edge"
    indptr = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(np.bincount(u, minlength=n), out=indptr[1:])
    upper = csr_matrix((rank, v, indptr), shape=(n, n))  # u is non-decreasing: entries already in row order
    tree = minimum_spanning_tree(upper)
    return perm[tree.data.astype(np.int64) - 1]


def _protect_arcs(n, src, dst, rng) -> np.ndarray:
    """Positions of the arcs kept in a directed graph: one random out-arc of every node that has one, and one random
    in-arc of every node that has in-arcs but no out-arc."""
    if src.size == 0:
        return np.zeros(0, dtype=np.int64)
    order = rng.permutation(src.size)
    _, first = np.unique(src[order], return_index=True)
    keep = [order[first]]
    sink = np.bincount(src, minlength=n) == 0
    into_sink = order[sink[dst[order]]]
    if into_sink.size:
        _, first = np.unique(dst[into_sink], return_index=True)
        keep.append(into_sink[first])
    return np.concatenate(keep)


def _sample_non_edges(graph, keys, active, n_free, want, rng) -> np.ndarray:
    """``want`` distinct node pairs among ``active`` that are not edges of ``graph`` (int64 keys ``a * n + b``).

    Undirected pairs come as ``a < b``; directed ones as ordered pairs. The caller guarantees that at least
    ``2 * want`` such pairs exist whenever rejection sampling is used, so every round accepts at least half its
    draws on average.
    """
    n = np.int64(graph.n_nodes)
    na = active.size
    chosen = np.zeros(0, dtype=np.int64)
    # Chance that one ordered draw (a, b) from active x active gives a non-edge not chosen yet (a lower bound).
    accept = (n_free - want / 2) / float(na * na) * (1 if graph.directed else 2)
    while chosen.size < want:
        need = want - chosen.size
        batch = int(min(max(1.25 * need / accept + 64, 1024), _MAX_BATCH))
        a = active[rng.integers(0, na, batch)]
        b = active[rng.integers(0, na, batch)]
        ok = a != b
        a, b = a[ok], b[ok]
        if not graph.directed:
            a, b = np.minimum(a, b), np.maximum(a, b)
        cand = a * n + b
        pos = np.minimum(np.searchsorted(keys, cand), max(keys.size - 1, 0))
        if keys.size:
            cand = cand[keys[pos] != cand]
        _, first = np.unique(cand, return_index=True)
        cand = cand[np.sort(first)]  # distinct, in draw order
        cand = cand[~np.isin(cand, chosen)]
        chosen = np.concatenate([chosen, cand[:need]])
    return chosen


def _all_non_edges(graph, keys, active) -> np.ndarray:
    """Every non-edge among ``active`` as int64 keys; used only when the graph is so dense that the number of node
    pairs is within a small factor of the number of edges, so this stays linear in the edges."""
    n = np.int64(graph.n_nodes)
    if graph.directed:
        a = np.repeat(active, active.size)
        b = np.tile(active, active.size)
        ok = a != b
        a, b = a[ok], b[ok]
    else:
        i, j = np.triu_indices(active.size, 1)
        a, b = active[i], active[j]
    cand = a * n + b
    if keys.size:
        pos = np.minimum(np.searchsorted(keys, cand), keys.size - 1)
        cand = cand[keys[pos] != cand]
    return cand


def holdout_edges(graph, fraction=0.1, *, seed=0, max_edges=None) -> EdgeHoldout:
    """Hold out a fraction of the edges for link prediction, without leaving any node with no edges.

    Undirected graphs: a random spanning forest (Kruskal over a random edge order) is protected, which keeps every
    connected component connected, and the held-out edges are drawn uniformly from the remaining edges.
    Directed graphs: arcs are held out; every node that has out-arcs keeps one (chosen at random) so that walks can
    still leave it, and every node with in-arcs but no out-arcs keeps one in-arc. Self-loops are never held out.

    When fewer edges than requested lie outside the protected set, all of them are held out and a
    :class:`~graphkit.errors.GraphDataWarning` gives both numbers (also in ``result.counts``).

    Non-edges are drawn uniformly among the pairs of distinct nodes that have at least one edge (isolated nodes have
    no walk context, so pairs with them would be trivially easy), rejecting pairs that are edges of ``graph``
    (held-out edges included) and repeated pairs. Undirected pairs are unordered, directed ones ordered. There are
    as many non-edges as held-out edges unless the graph has fewer non-edges than that (then all of them, and a
    warning).

    Parameters
    ----------
    graph : AdjacencyArrays
        Rows sorted ascending without duplicate entries; an undirected graph stores both directions of each edge.
    fraction : float, default 0.1
        Share of the candidate edges (undirected edges, or arcs, without self-loops) to hold out, in (0, 1);
        the count is rounded to the nearest integer.
    seed : int, default 0
        In ``[0, 2**64)``.
    max_edges : int, optional
        Hold out at most this many edges (``min(round(fraction * n_edges), max_edges)``): the standard error of the
        link AUC shrinks as one over the square root of the count (see :func:`auc_delong`), so a bounded sample
        measures a large graph as well as a share does while the model trained without it misses fewer edges.

    Returns
    -------
    EdgeHoldout
        Unpacks as ``(train_graph, positives, negatives)``:

        - ``train_graph`` : AdjacencyArrays without the held-out edges (both directions when undirected), same nodes,
          weights and ``directed`` flag;
        - ``positives`` : ndarray of int32, shape (n_held_out, 2): held-out edges, ``u < v`` when undirected, in
          CSR order;
        - ``negatives`` : ndarray of int32, shape (n_negatives, 2): sampled non-edges, in draw order.

        ``result.counts`` holds the counts described in :class:`EdgeHoldout`.

    Raises
    ------
    ConfigError
        ``graph`` is not an AdjacencyArrays, has unsorted rows or is not symmetric where it claims to be undirected;
        ``fraction`` or ``seed`` is out of range.
    """
    if not isinstance(graph, AdjacencyArrays):
        raise ConfigError(f"graph must be an AdjacencyArrays, got {type(graph).__name__}")
    fraction = _check_ratio("fraction", fraction)
    max_edges = None if max_edges is None else _check_int("max_edges", max_edges, 1)
    rng = np.random.default_rng(_check_seed(seed))
    n = graph.n_nodes
    src, dst, keys = _edge_keys(graph)

    cand = np.flatnonzero(src != dst) if graph.directed else np.flatnonzero(src < dst)
    cu, cv = src[cand], dst[cand]
    if graph.directed:
        protected = _protect_arcs(n, cu, cv, rng)
    else:
        protected = _spanning_forest(n, cu, cv, rng)
    free = np.ones(cand.size, dtype=bool)
    free[protected] = False
    free = np.flatnonzero(free)
    n_requested = int(round(fraction * cand.size))
    if max_edges is not None:
        n_requested = min(n_requested, max_edges)
    n_held = min(n_requested, free.size)
    if n_held < n_requested:
        warnings.warn(GraphDataWarning(
            f"held out {n_held} of the {n_requested} requested edges: the other {cand.size - free.size} edges are "
            "needed so that no node loses all its edges"), stacklevel=2)
    held = np.sort(rng.choice(free, size=n_held, replace=False)) if n_held else np.zeros(0, dtype=np.int64)
    hu, hv = cu[held], cv[held]

    # Drop the held-out CSR entries (and their reverse entries when undirected) from a copy of the arrays.
    drop = [cand[held]]
    if not graph.directed and held.size:
        rev = hv * np.int64(n) + hu
        pos = np.minimum(np.searchsorted(keys, rev), keys.size - 1)
        if not np.all(keys[pos] == rev):
            raise ConfigError("graph is marked undirected but some edges are stored in one direction only")
        drop.append(pos)
    keep = np.ones(keys.size, dtype=bool)
    keep[np.concatenate(drop)] = False
    removed = np.bincount(src[~keep], minlength=n)
    indptr = np.asarray(graph.indptr, dtype=np.int64).copy()
    indptr[1:] -= np.cumsum(removed)
    weights = None if graph.weights is None else np.asarray(graph.weights)[keep]
    train = AdjacencyArrays.from_arrays(indptr, np.asarray(graph.indices)[keep], weights, directed=graph.directed)

    degree = np.diff(np.asarray(graph.indptr, dtype=np.int64))
    if graph.directed:
        degree = degree + np.bincount(dst, minlength=n)
    active = np.flatnonzero(degree > 0).astype(np.int64)
    na = active.size
    n_pairs = na * (na - 1) // (1 if graph.directed else 2)
    n_free_pairs = max(n_pairs - cand.size, 0)
    want = min(n_held, n_free_pairs)
    if want < n_held:
        warnings.warn(GraphDataWarning(
            f"the graph has only {n_free_pairs} non-edges, fewer than the {n_held} held-out edges; using all of them"),
            stacklevel=2)
    if want == 0:
        neg = np.zeros(0, dtype=np.int64)
    elif n_free_pairs < 2 * want:
        # So dense that rejection would crawl; here the pair count is below 3 x the edge count, so listing is linear.
        pool = _all_non_edges(graph, keys, active)
        neg = pool[rng.choice(pool.size, size=want, replace=False)]
    else:
        neg = _sample_non_edges(graph, keys, active, n_free_pairs, want, rng)
    positives = np.stack([hu, hv], axis=1).astype(np.int32)
    negatives = np.stack([neg // n, neg % n], axis=1).astype(np.int32) if n else np.zeros((0, 2), np.int32)
    counts = {"n_edges": int(cand.size), "n_requested": n_requested, "n_held_out": int(n_held),
              "n_protected": int(protected.size), "n_negatives": int(want), "max_edges": max_edges}
    return EdgeHoldout(train, positives, negatives, counts)
