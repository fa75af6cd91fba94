"""Walk drivers: validate the options, build what the kernels need and run them (exact definition of the walks in
:mod:`graphkit.walks.kernels`)."""

from __future__ import annotations

import numbers
from typing import NamedTuple

import numba
import numpy as np

from ..alias import alias_table_kernel
from ..checks import LENGTH_MIN, P_Q_RANGE, PER_NODE_MIN, SEED_MAX, THREADS_MIN, max_threads
from ..checks import check_int as _check_int
from ..errors import ConfigError
from ..graph import AdjacencyArrays
from .kernels import (MIN_PERM_BITS, _count_restarts_kernel, _count_visits_kernel, _first_unsorted_kernel,
                      _walks_parallel_kernel, _walks_serial_kernel)

__all__ = ["random_walks", "walk_range", "count_visits", "count_restarts", "alias_table", "check_walk_options",
           "check_walk_params", "acceptance_thresholds", "prepare_walker", "run_walks", "Walker", "DEAD_ENDS",
           "P_Q_RANGE"]

_MAX_SEED = SEED_MAX
#: Accepted values of ``dead_end``.
DEAD_ENDS = ("stop", "restart")
#: Range of p and q (``graphkit.checks.P_Q_RANGE``). A step costs up to max(1/p, 1, 1/q) / min(1/p, 1, 1/q)
#: proposals where the likeliest class of neighbour is missing, so the range keeps that at most 10**6.
_NO_ALIAS = np.empty(0, dtype=np.uint64)
_NO_ALIAS.flags.writeable = False


# ---------------------------------------------------------------------------------------------------- checks
def check_walk_params(per_node, length, seed):
    """Validate the corpus parameters shared by every walk entry point; returns them as Python ints."""
    return (_check_int("per_node", per_node, PER_NODE_MIN), _check_int("length", length, LENGTH_MIN),
            _check_int("seed", seed, 0, _MAX_SEED))


def check_walk_options(weighted, p, q, dead_end):
    """Validate the walk-kind options; returns ``(weighted, p, q, dead_end)`` as bool, float, float, str."""
    if not isinstance(weighted, (bool, np.bool_)):
        raise ConfigError(f"weighted must be true or false, got {weighted!r}")
    values = []
    for name, value in (("p", p), ("q", q)):
        if isinstance(value, (bool, np.bool_)) or not isinstance(value, numbers.Real):
            raise ConfigError(f"{name} must be a number, got {value!r}")
        value = float(value)
        if not (P_Q_RANGE[0] <= value <= P_Q_RANGE[1]):  # also rejects NaN
            raise ConfigError(f"{name} must lie in [{P_Q_RANGE[0]:g}, {P_Q_RANGE[1]:g}], got {value!r}")
        values.append(value)
    if dead_end not in DEAD_ENDS:
        raise ConfigError(f"dead_end must be one of {', '.join(map(repr, DEAD_ENDS))}, got {dead_end!r}")
    return bool(weighted), values[0], values[1], str(dead_end)


def _check_threads(threads):
    if threads is None:
        return numba.get_num_threads()
    return _check_int("threads", threads, THREADS_MIN, max_threads())


def _check_graph(graph):
    if not isinstance(graph, AdjacencyArrays):
        raise ConfigError(f"graph must be an AdjacencyArrays, got {type(graph).__name__}")


def _readonly(a):
    """A read-only view of ``a``: the kernels then see one array type whether the graph is in memory or
    memory-mapped, so numba compiles (and caches) one version instead of several."""
    v = a.view(np.ndarray)
    v.flags.writeable = False
    return v


def _csr_arrays(graph):
    """The kernel's view of ``graph``: read-only C-contiguous int64 indptr and int32 indices (no copy when already
    so)."""
    _check_graph(graph)
    indptr = _readonly(np.ascontiguousarray(np.asarray(graph.indptr), dtype=np.int64))
    indices = _readonly(np.ascontiguousarray(np.asarray(graph.indices), dtype=np.int32))
    # The 32-bit multiply-high draw needs every degree below 2**32; only a graph this large can break it.
    if indices.shape[0] >= 1 << 32 and int(np.diff(indptr).max()) >= 1 << 32:
        raise ConfigError("graph has a node with 2**32 or more out-edges; the walk sampler supports fewer")
    return indptr, indices


def _perm_bits(n_nodes):
    return 0 if n_nodes <= 1 else max(MIN_PERM_BITS, int(n_nodes - 1).bit_length())


def acceptance_thresholds(p, q) -> np.ndarray:
    """The second-order coins ``T_return, T_neighbour, T_other`` (uint64 [3], ``2**63`` = always; module doc)."""
    f = (1.0 / p, 1.0, 1.0 / q)
    top = max(f)
    return np.array([min(int((x / top) * 2.0 ** 63), 1 << 63) for x in f], dtype=np.uint64)


# ---------------------------------------------------------------------------------------------------- drivers
def alias_table(graph, *, out=None) -> np.ndarray:
    """Alias tables of every node of a weighted graph, for weight-proportional edge draws in O(1).

    One uint64 per adjacency entry (8 bytes per edge, as much as ``indices`` and ``weights`` together): the high
    32 bits are the probability of keeping the column's own edge in units of 2**-32, the low 32 bits the position of
    its alias edge within the node's range. Built in O(n_edges) with Vose's method (exact definition in the module
    docstring); pass the result to :func:`walk_range` to avoid rebuilding it on every call.

    Parameters
    ----------
    graph : AdjacencyArrays
        With ``weights`` (finite and > 0).
    out : ndarray of uint64, shape (n_edges,), optional
        Where to write the table (for example a memory-mapped ``.npy`` file); allocated when omitted.

    Returns
    -------
    ndarray of uint64, shape (n_edges,)

    Raises
    ------
    ConfigError
        The graph has no weights, a weight is not finite and positive, or ``out`` has the wrong shape or dtype.
    """
    indptr, _ = _csr_arrays(graph)
    if graph.weights is None:
        raise ConfigError("graph has no edge weights: alias tables are for weighted walks")
    weights = _readonly(np.ascontiguousarray(np.asarray(graph.weights), dtype=np.float32))
    m = weights.shape[0]
    if weights.shape != graph.indices.shape:
        raise ConfigError(f"weights must have shape {graph.indices.shape}, got {weights.shape}")
    if m and not (np.isfinite(weights).all() and weights.min() > 0):
        raise ConfigError("weights must be finite and > 0")
    if out is None:
        out = np.empty(m, dtype=np.uint64)
    elif not (isinstance(out, np.ndarray) and out.dtype == np.uint64 and out.shape == (m,)
              and out.flags.c_contiguous and out.flags.writeable):
        raise ConfigError(f"out must be a writeable C-contiguous uint64 array of shape ({m},), got "
                          f"{getattr(out, 'dtype', type(out).__name__)} {getattr(out, 'shape', '')}")
    dmax = int(np.diff(indptr).max(initial=0))
    alias_table_kernel(indptr, weights, out, np.empty(dmax, np.float64), np.empty(dmax, np.int64),
                       np.empty(dmax, np.int64))
    return out


class Walker(NamedTuple):
    """Validated kernel arguments for one kind of walk over one graph."""

    indptr: np.ndarray
    indices: np.ndarray
    alias: np.ndarray  # uint64 [n_edges], or [0] for unweighted walks
    thr: np.ndarray  # uint64 [3]
    second: bool
    restart: bool


def prepare_walker(graph, *, weighted, p, q, dead_end, alias=None, check=True) -> Walker:
    """Validate the options and build what the kernels need (also for the corpus's shard tasks). ``check=False`` skips the O(n_edges) sortedness check
    (for shard tasks whose driver already ran it on the same graph files)."""
    weighted, p, q, dead_end = check_walk_options(weighted, p, q, dead_end)
    indptr, indices = _csr_arrays(graph)
    second = not (p == 1.0 and q == 1.0)
    if weighted and graph.weights is not None:
        if alias is None:
            alias = alias_table(graph)
        elif not (isinstance(alias, np.ndarray) and alias.dtype == np.uint64 and alias.shape == indices.shape):
            raise ConfigError(f"alias must be alias_table(graph): uint64 of shape {indices.shape}, got "
                              f"{getattr(alias, 'dtype', type(alias).__name__)} {getattr(alias, 'shape', '')}")
        alias = _readonly(np.ascontiguousarray(alias))
    elif alias is not None:
        raise ConfigError("alias was given but the walks are unweighted (weighted=False or a graph without weights)")
    else:
        alias = _NO_ALIAS
    if second and check:
        bad = int(_first_unsorted_kernel(indptr, indices))
        if bad >= 0:
            raise ConfigError(f"second-order walks (p, q not 1) need every node's out-neighbours sorted ascending; "
                              f"node {bad} is not (build the graph with AdjacencyArrays.from_edges)")
    return Walker(indptr, indices, alias, acceptance_thresholds(p, q), second, dead_end == "restart")


def run_walks(walker: Walker, start, stop, length, seed, threads) -> np.ndarray:
    """Walks ``[start, stop)`` (already validated) with ``threads`` numba threads."""
    out = np.empty((stop - start, length), dtype=np.int32)
    if stop == start:
        return out
    n_nodes = walker.indptr.shape[0] - 1
    args = (walker.indptr, walker.indices, walker.alias, walker.thr, walker.second, walker.restart,
            _perm_bits(n_nodes), np.uint64(seed), np.int64(start), out)
    if threads == 1:
        # A serial kernel, not prange with one thread: callers like Dask workers run many of these concurrently and
        # never enter numba's thread pool.
        _walks_serial_kernel(*args)
    else:
        previous = numba.get_num_threads()
        numba.set_num_threads(threads)
        try:
            _walks_parallel_kernel(*args)
        finally:
            numba.set_num_threads(previous)
    return out


def walk_range(graph, start, stop, *, per_node, length, seed, threads=None, weighted=True, p=1.0, q=1.0,
               dead_end="stop", alias=None) -> np.ndarray:
    """The walks with global ids in ``[start, stop)`` of the corpus ``random_walks(graph, per_node, length, seed,
    ...)`` with the same options.

    Parameters
    ----------
    graph : AdjacencyArrays
        Walks follow the stored out-edges (both directions of an undirected edge are stored).
    start, stop : int
        ``0 <= start <= stop <= per_node * graph.n_nodes``.
    per_node : int
        Walks started at every node (number of passes), ``>= 1``.
    length : int
        Nodes per walk including the start node, ``>= 2``.
    seed : int
        In ``[0, 2**64)``. Same seed, same bytes.
    threads : int, optional
        numba threads for this call (default: numba's current setting). The output does not depend on it.
    weighted : bool, default True
        Draw edges with probability proportional to their weight when the graph has weights; uniform otherwise.
    p, q : float, default 1.0
        Return and in-out parameters of second-order walks, each in ``P_Q_RANGE``; ``p = q = 1`` gives first-order
        walks. A step's expected cost grows with ``max(1/p, 1, 1/q)`` over the acceptance rate.
    dead_end : {"stop", "restart"}, default "stop"
        At a node without out-edges end the walk (``-1`` padding) or continue from its start node (a real step).
    alias : ndarray of uint64, optional
        ``alias_table(graph)``, computed once for many calls; built on each call when omitted (weighted walks only).

    Returns
    -------
    ndarray of int32, shape (stop - start, length)
        Row ``i`` is walk ``start + i``; ``-1`` pads a walk that stopped.

    Raises
    ------
    ConfigError
        A parameter is out of range (the message names it and echoes the value), or ``p``/``q`` are not 1 and a
        node's out-neighbours are not sorted.
    """
    per_node, length, seed = check_walk_params(per_node, length, seed)
    threads = _check_threads(threads)
    walker = prepare_walker(graph, weighted=weighted, p=p, q=q, dead_end=dead_end, alias=alias)
    n_walks = per_node * (walker.indptr.shape[0] - 1)
    start = _check_int("start", start, 0, n_walks)
    stop = _check_int("stop", stop, start, n_walks)
    return run_walks(walker, start, stop, length, seed, threads)


def random_walks(graph, per_node, length, seed=0, *, threads=None, weighted=True, p=1.0, q=1.0, dead_end="stop",
                 alias=None) -> np.ndarray:
    """All ``per_node * n_nodes`` truncated random walks of the corpus, in memory.

    Pass ``k`` (rows ``k * n_nodes .. (k + 1) * n_nodes - 1``) starts one walk at every node, in an order shuffled
    per ``(seed, k)``; every step follows an out-edge, chosen uniformly, or in proportion to its weight, and for
    ``p, q != 1`` reweighted by the second-order rule (module docstring). For corpora that do not fit in memory use
    :func:`walk_range` on pieces, or :func:`graphkit.corpus.write_walk_corpus`.

    Parameters
    ----------
    graph : AdjacencyArrays
    per_node : int
        Number of passes, ``>= 1``.
    length : int
        Nodes per walk including the start node, ``>= 2``.
    seed : int, default 0
        In ``[0, 2**64)``.
    threads : int, optional
        numba threads (default: numba's current setting); the output does not depend on it.
    weighted, p, q, dead_end, alias
        As in :func:`walk_range`.

    Returns
    -------
    ndarray of int32, shape (per_node * n_nodes, length)
        ``-1`` pads walks that stopped at a node without out-edges.

    Raises
    ------
    ConfigError
        A parameter is out of range.
    """
    per_node, length, seed = check_walk_params(per_node, length, seed)
    _check_graph(graph)
    return walk_range(graph, 0, per_node * graph.n_nodes, per_node=per_node, length=length, seed=seed,
                      threads=threads, weighted=weighted, p=p, q=q, dead_end=dead_end, alias=alias)


def _check_walks(walks, n_nodes):
    walks = np.asarray(walks)
    if walks.ndim != 2:
        raise ConfigError(f"walks must be a 2-D array [n_walks, length], got shape {walks.shape}")
    if walks.dtype.kind not in "iu":
        raise ConfigError(f"walks must hold integers, got dtype {walks.dtype}")
    if walks.size:
        lo, hi = int(walks.min()), int(walks.max())
        if lo < -1 or hi >= n_nodes:
            raise ConfigError(f"walks must hold node indices in [-1, {n_nodes}), got values in [{lo}, {hi}]")
    return np.ascontiguousarray(walks, dtype=np.int32)


def count_visits(walks, n_nodes) -> np.ndarray:
    """How often each node occurs in ``walks``, ignoring the ``-1`` padding.

    Parameters
    ----------
    walks : array_like of int, shape (n_walks, length)
        Node indices in ``0..n_nodes-1`` or ``-1``.
    n_nodes : int

    Returns
    -------
    ndarray of int64, shape (n_nodes,)

    Raises
    ------
    ConfigError
        ``walks`` is not 2-D or holds a value outside ``-1..n_nodes-1``.
    """
    n_nodes = _check_int("n_nodes", n_nodes, 0)
    walks = _check_walks(walks, n_nodes)
    counts = np.zeros(n_nodes, dtype=np.int64)
    if walks.size:
        _count_visits_kernel(walks.reshape(-1), counts)
    return counts


def count_restarts(walks, graph) -> int:
    """Entries of ``walks`` that follow a node without out-edges: the restarts of ``dead_end="restart"`` walks."""
    indptr, _ = _csr_arrays(graph)
    walks = _check_walks(walks, indptr.shape[0] - 1)
    return int(_count_restarts_kernel(walks, indptr)) if walks.size else 0


# The earlier private names, for callers that still use them.
_Walker, _prepare, _run = Walker, prepare_walker, run_walks
