"""Truncated random walks over a CSR graph: the DeepWalk corpus (Perozzi, Al-Rfou & Skiena, KDD 2014), optionally
weighted, along edge direction, and second order (the return / in-out walks of Grover & Leskovec, KDD 2016).

The corpus is ``per_node`` passes over the nodes; in every pass each node starts exactly one walk and the passes visit
the nodes in a freshly shuffled order. Walks are numbered globally: walk ``w`` is in pass ``w // n_nodes`` at position
``w % n_nodes`` and starts at ``perm(seed, pass, position)``. Everything about walk ``w`` is computed from
``(seed, w)`` alone, so any range of walks can be produced on its own, on any thread, and the bytes never depend on
the thread count or on how the id range was cut into shards.

Exact definition (a test re-implements it with plain Python integers; all arithmetic is modulo 2**64):

* ``mix(z)`` is the splitmix64 output function: ``z ^= z >> 30; z *= 0xBF58476D1CE4E5B9; z ^= z >> 27;
  z *= 0x94D049BB133111EB; z ^= z >> 31``. ``next(s)`` advances ``s += G`` (``G = 0x9E3779B97F4A7C15``) and returns
  ``(s, mix(s))``.
* Start permutation of pass ``p``: ``k = max(MIN_PERM_BITS, bits of n_nodes - 1)`` (0 when ``n_nodes <= 1``);
  ``pass_key = mix(mix(seed ^ PERM_SALT) + p)``, round keys ``key_r = mix(pass_key + (r + 1) * G)`` for
  ``r < FEISTEL_ROUNDS``. Round ``r`` splits ``x`` (``k`` bits) into a low part of ``lo = k // 2`` bits (``k - k // 2``
  on odd rounds) and a high part of ``hi = k - lo`` bits and returns
  ``(low << hi) | (high ^ (mix(key_r ^ low) & (2**hi - 1)))``: a Feistel network, hence a bijection of
  ``0..2**k - 1``. The permutation of ``0..n_nodes - 1`` applies the network repeatedly until the value is below
  ``n_nodes`` (cycle walking: fewer than two passes through the network per index on average once
  ``n_nodes > 2**MIN_PERM_BITS / 2``; smaller graphs pay more, which is cheap at their size).
* Walk stream: ``s = (seed * G) ^ w``, then ``s, _ = next(s)``.
* Edge draw at a node ``c`` with ``d > 0`` out-edges at positions ``a .. a + d - 1`` of ``indices``: ``s, r = next(s)``
  and ``j = ((r >> 32) * d) >> 32`` (Lemire 2019, "Fast random integer generation in an interval", with its rejection
  step: when the low 32 bits of the product are below ``(2**32 - d) % d`` the draw is repeated, which makes ``j``
  exactly uniform). Unweighted walks take edge ``a + j``. Weighted walks use the alias table (below): with
  ``e = alias[a + j]`` they take edge ``a + j`` when ``(r & (2**32 - 1)) < (e >> 32)``, else edge
  ``a + (e & (2**32 - 1))``; ``r`` is the accepted draw, whose low 32 bits Lemire's method leaves unused.
* Alias table (Walker 1977; Vose 1991, "A linear algorithm for generating random numbers with a given distribution"),
  one uint64 per edge, per node: ``W`` = the float64 sum of the node's weights in edge order; ``u_i = w_i * d / W``;
  indices with ``u_i < 1`` go on a stack ``small``, the others on a stack ``large``, in edge order. While both are
  non-empty: pop ``s`` from ``small`` and ``l`` from ``large``, set ``alias[a + s] = (floor(u_s * 2**32) << 32) | l``,
  ``u_l = (u_l + u_s) - 1`` and push ``l`` back on ``small`` if ``u_l < 1``, else on ``large``. Every index left on
  either stack gets ``((2**32 - 1) << 32) | itself``. Draw ``j`` then yields edge ``j`` with probability
  ``floor(u_j * 2**32) / 2**32``, else its alias: the weight-proportional choice up to 2**-32 per column.
* Second order (``p`` or ``q`` not 1): the first step of a walk, and the first step after a restart, is a first-order
  draw. Later steps from ``c``, with ``t`` the node before ``c``, draw a proposal ``x`` as above (weighted or not)
  and accept it with probability ``f(x) / max(1/p, 1, 1/q)``, ``f = 1/p`` if ``x == t``, ``1`` if the edge
  ``t -> x`` exists, ``1/q`` otherwise; a rejected proposal is drawn again. So the next node has probability
  proportional to ``weight(c, x) * f(x)`` with ``O(1)`` extra memory per walk and none per edge. The coin: with
  ``ratio_c = f / max(...)`` in float64 and ``T_c = floor(ratio_c * 2**63)`` (so ``T = 2**63`` means "always"),
  ``s, r = next(s)`` and accept when ``(r >> 1) < T_c``. No coin is drawn when the answer cannot depend on it: for
  ``x == t`` when ``T_return = 2**63``, for ``x != t`` when ``T_neighbour = T_other = 2**63``.
* Dead ends (a node with no out-edges): with ``dead_end="stop"`` the walk ends and the rest of its row is ``-1``;
  with ``"restart"`` the next entry of the row is the walk's start node again, with no random draw: a real step of
  the corpus (counted as a token and in the visit counts), never padding. A walk whose start node itself has no
  out-edges cannot restart and stops. In an undirected graph only isolated nodes are dead ends.

Speed: each thread advances ``_BLOCK`` walks in lock-step, one step of each in turn, split into two rounds: the first
reads every walk's edge range and prefetches the drawn edge, the second reads the edge and prefetches the next node's
range. The loads of different walks are independent, so their cache misses overlap instead of queueing. See
``docs/bench/walks.md`` for the measured effect.
"""

from __future__ import annotations

import math
import numbers
from typing import NamedTuple

import numba
import numpy as np

from ..checks import LENGTH_MIN, P_Q_RANGE, PER_NODE_MIN, SEED_MAX, THREADS_MIN, max_threads
from ..checks import check_int as _check_int
from ..rng import _G, _LOW32, _S32, _mix_kernel
from ..errors import ConfigError
from ..graph import SparseGraph

__all__ = ["random_walks", "walk_range", "count_visits", "count_restarts", "alias_table", "walk_diagnostics",
           "loglog_slope", "check_walk_options", "DEAD_ENDS", "P_Q_RANGE"]

_TWO32 = np.uint64(1 << 32)
_ONE = np.uint64(1)
_ALWAYS = np.uint64(1 << 63)
#: Alias entry of a column that always keeps its own edge.
_FULL = np.uint64(0xFFFFFFFF << 32)
#: Salt that keeps the permutation keys apart from the walk streams of the same seed.
PERM_SALT = 0x5851F42D4C957F2D
_PERM_SALT = np.uint64(PERM_SALT)
#: Feistel rounds of the start permutation; four already give a pseudo-random permutation (Luby & Rackoff 1988),
#: two more are margin for the tiny domains of small graphs. They cost a few hashes per walk.
FEISTEL_ROUNDS = 6
#: Walks advanced in lock-step by one thread. It changes speed, never the output: one thread on the benchmark graph
#: (2M nodes, degree 10) did about 24, 28 and 34 M uniform steps/s with 32, 64 and 128 (a probe, noisy machine).
_BLOCK = 128
#: Smallest Feistel domain (bits). Networks over 2-5 bits give visibly non-uniform shuffles (a chi-square test on
#: 24000 passes over 5 nodes rejected them at p < 1e-15); from 6 bits on they passed.
MIN_PERM_BITS = 8
_MAX_SEED = SEED_MAX
#: Accepted values of ``dead_end``.
DEAD_ENDS = ("stop", "restart")
#: Range of p and q (``graphkit.checks.P_Q_RANGE``). A step costs up to max(1/p, 1, 1/q) / min(1/p, 1, 1/q)
#: proposals where the likeliest class of neighbour is missing, so the range keeps that at most 10**6.
_NO_ALIAS = np.empty(0, dtype=np.uint64)
_NO_ALIAS.flags.writeable = False


# ---------------------------------------------------------------------------------------------------- prefetch
if numba.config.DISABLE_JIT:
    def _prefetch(arr, i):
        """Pure-Python mode: nothing to prefetch."""
        return None
else:
    from llvmlite import ir as _ir
    from numba.core import cgutils as _cgutils
    from numba.core import types as _types
    from numba.extending import intrinsic as _intrinsic

    @_intrinsic
    def _prefetch(typingctx, arr, i):
        """Hint the CPU to fetch ``arr[i]`` into cache (LLVM ``llvm.prefetch``: read, high locality). No effect on
        results; unlike a load, an outstanding prefetch does not stall the instructions after it."""
        def codegen(context, builder, signature, args):
            ary = context.make_array(signature.args[0])(context, builder, args[0])
            ptr = _cgutils.get_item_pointer(context, builder, signature.args[0], ary, [args[1]], wraparound=False)
            ptr = builder.bitcast(ptr, _ir.IntType(8).as_pointer())
            i32 = _ir.IntType(32)
            fnty = _ir.FunctionType(_ir.VoidType(), [ptr.type, i32, i32, i32])
            fn = _cgutils.get_or_insert_function(builder.module, fnty, "llvm.prefetch.p0")
            builder.call(fn, [ptr, i32(0), i32(3), i32(1)])
            return context.get_dummy_value()
        return _types.void(arr, i), codegen


# ---------------------------------------------------------------------------------------------------- numba kernels
@numba.njit(cache=True, nogil=True, inline="always")
def _bounded_kernel(s, d):
    """Advance stream ``s`` and draw a uniform integer below ``d`` (uint64, ``1 <= d < 2**32``).

    Returns ``(s, j, r)``: the new state, the draw and the accepted 64-bit output (its low 32 bits are unused by the
    draw, and are the weighted walks' alias coin).
    """
    s = s + _G
    r = _mix_kernel(s)
    m = (r >> _S32) * d
    low = m & _LOW32
    if low < d:  # rare: at most d / 2**32 of the draws
        t = (_TWO32 - d) % d
        while low < t:
            s = s + _G
            r = _mix_kernel(s)
            m = (r >> _S32) * d
            low = m & _LOW32
    return s, m >> _S32, r


# Helpers called inside the per-walk loops take scalars only: numba passes an array to a call as several fields and,
# when inlined, wraps it in reference counting, which measured 1.6x slower on second-order walks than scalar helpers.
@numba.njit(cache=True, nogil=True, inline="always")
def _alias_choose_kernel(a, j, r, e):
    """Edge position chosen by column ``j`` (int64) of the node whose edges start at ``a``; ``e`` is the column's
    alias entry and ``r`` the draw that chose it (its low 32 bits are the coin)."""
    if (r & _LOW32) < (e >> _S32):
        return a + j
    return a + np.int64(e & _LOW32)


@numba.njit(cache=True, nogil=True, inline="always")
def _coin_kernel(s, x, t, t_ret, t_lo, t_hi):
    """Second-order coin for proposal ``x`` after node ``t`` (thresholds as in the module doc, ``t_lo``/``t_hi`` the
    smaller/larger of ``T_neighbour, T_other``). Returns ``(s, verdict, u)``: verdict 1 accept, 0 reject, -1 when
    the answer depends on whether the edge ``t -> x`` exists (then accept iff ``u`` is below its class threshold)."""
    if x == t:
        if t_ret >= _ALWAYS:
            return s, 1, _ALWAYS
        s = s + _G
        return s, 1 if (_mix_kernel(s) >> _ONE) < t_ret else 0, _ALWAYS
    if t_lo >= _ALWAYS:
        return s, 1, _ALWAYS
    s = s + _G
    u = _mix_kernel(s) >> _ONE
    if u < t_lo:
        return s, 1, u
    if u >= t_hi:
        return s, 0, u
    return s, -1, u


@numba.njit(cache=True, nogil=True)
def _has_edge_kernel(indices, a, d, x):
    """Whether ``x`` is among ``indices[a:a + d]`` (sorted ascending): binary search."""
    lo = a
    hi = a + d
    while lo < hi:
        mid = (lo + hi) >> 1
        if indices[mid] < x:
            lo = mid + 1
        else:
            hi = mid
    return lo < a + d and indices[lo] == x


@numba.njit(cache=True, nogil=True)
def _permute_kernel(pos, pass_key, n, k):
    """Image of ``pos`` (uint64, ``< n``) under the keyed permutation of ``0..n-1`` over ``k`` bits (see module doc)."""
    x = pos
    while True:
        for r in range(FEISTEL_ROUNDS):
            half = k // 2 if r % 2 == 0 else k - k // 2
            lo_bits = np.uint64(half)
            hi_bits = np.uint64(k - half)
            low = x & ((_ONE << lo_bits) - _ONE)
            high = x >> lo_bits
            key = _mix_kernel(pass_key + np.uint64(r + 1) * _G)
            x = (low << hi_bits) | (high ^ (_mix_kernel(key ^ low) & ((_ONE << hi_bits) - _ONE)))
        if x < n:
            return x


@numba.njit(cache=True, nogil=True)
def _propose_kernel(indptr, indices, alias, second, n_rows, st, sc):
    """First round of a lock-step step: for every live walk read its node's edge range, draw an edge, prefetch it.

    st uint64 [2, B] (stream state, accepted draw) and sc int64 [7, B] (node, drawn position or -1 at a dead end,
    range start, degree, previous node, its range start, its degree) are updated in place for rows ``0..n_rows-1``.
    """
    weighted = alias.shape[0] > 0
    for j in range(n_rows):
        c = sc[0, j]
        if c < 0:
            continue
        a = indptr[c]
        d = indptr[c + 1] - a
        sc[2, j] = a
        sc[3, j] = d
        if d > 0:
            s, pick, r = _bounded_kernel(st[0, j], np.uint64(d))
            st[0, j] = s
            st[1, j] = r
            pos = a + np.int64(pick)
            sc[1, j] = pos
            _prefetch(indices, pos)
            if weighted:
                _prefetch(alias, pos)
            if second:  # redraws and the next step's edge test read the whole range: fetch its ends too
                _prefetch(indices, a)
                _prefetch(indices, a + d - 1)
                if weighted:
                    _prefetch(alias, a)
                    _prefetch(alias, a + d - 1)
        else:
            sc[1, j] = -1


@numba.njit(cache=True, nogil=True)
def _settle_kernel(indptr, indices, alias, restart, out, row0, step, n_rows, st, sc):
    """Second round, first-order walks: resolve each walk's drawn edge (alias coin, dead end), write column ``step``
    of rows ``row0..row0 + n_rows - 1`` of ``out`` (int32 [*, length]) and prefetch the next node's edge range."""
    weighted = alias.shape[0] > 0
    for j in range(n_rows):
        c = sc[0, j]
        x = np.int64(-1)
        if c >= 0:
            pos = sc[1, j]
            if pos >= 0:
                if weighted:
                    pos = _alias_choose_kernel(sc[2, j], pos - sc[2, j], st[1, j], alias[pos])
                x = np.int64(indices[pos])
            elif restart and c != out[row0 + j, 0]:  # at a dead end; c == start means the start is one
                x = np.int64(out[row0 + j, 0])
            sc[0, j] = x
            if x >= 0:
                _prefetch(indptr, x)
        out[row0 + j, step] = np.int32(x)


@numba.njit(cache=True, nogil=True)
def _settle_second_kernel(indptr, indices, alias, thr, restart, out, row0, step, n_rows, st, sc):
    """Second round, second-order walks: like ``_settle_kernel``, plus the coin that accepts a proposal or draws
    another (thr uint64 [3]: ``T_return, T_neighbour, T_other``); keeps each walk's previous node in ``sc[4:7]``."""
    weighted = alias.shape[0] > 0
    t_ret, t_nb, t_out = thr[0], thr[1], thr[2]
    t_lo, t_hi = min(t_nb, t_out), max(t_nb, t_out)
    for j in range(n_rows):
        c = sc[0, j]
        x = np.int64(-1)
        if c >= 0:
            pos = sc[1, j]
            if pos >= 0:
                a, d, t = sc[2, j], sc[3, j], sc[4, j]
                s, r = st[0, j], st[1, j]
                while True:
                    if weighted:
                        pos = _alias_choose_kernel(a, pos - a, r, alias[pos])
                    x = np.int64(indices[pos])
                    if t < 0:  # first step of the walk or after a restart: first order
                        break
                    s, verdict, u = _coin_kernel(s, x, t, t_ret, t_lo, t_hi)
                    if verdict < 0:
                        verdict = 1 if u < (t_nb if _has_edge_kernel(indices, sc[5, j], sc[6, j], x) else t_out) else 0
                    if verdict > 0:
                        break
                    s, pick, r = _bounded_kernel(s, np.uint64(d))
                    pos = a + np.int64(pick)
                st[0, j] = s
                sc[4, j], sc[5, j], sc[6, j] = c, a, d
            elif restart and c != out[row0 + j, 0]:
                x = np.int64(out[row0 + j, 0])
                sc[4, j] = -1  # the restarted walk's next step is first order again
            sc[0, j] = x
            if x >= 0:
                _prefetch(indptr, x)
        out[row0 + j, step] = np.int32(x)


@numba.njit(cache=True, nogil=True)
def _walk_block_kernel(indptr, indices, alias, thr, second, restart, k, seed, walk0, out, row0, n_rows, st, sc):
    """Write walks ``walk0 + row0 .. walk0 + row0 + n_rows - 1`` into rows ``row0..`` of ``out``, in lock-step.

    indptr int64 [n+1], indices int32 [m], alias uint64 [m] or [0] (unweighted), thr uint64 [3] (second-order coins,
    used when ``second``); out int32 [*, length] (rows written in place); st uint64 [2, >= n_rows] and
    sc int64 [7, >= n_rows] scratch.
    """
    n = np.uint64(indptr.shape[0] - 1)
    perm_seed = _mix_kernel(seed ^ _PERM_SALT)
    for j in range(n_rows):
        w = np.uint64(walk0 + row0 + j)
        start = _permute_kernel(w % n, _mix_kernel(perm_seed + w // n), n, k)
        out[row0 + j, 0] = np.int32(start)
        sc[0, j] = np.int64(start)
        sc[4, j] = -1
        st[0, j] = ((seed * _G) ^ w) + _G
        _prefetch(indptr, np.int64(start))
    for step in range(1, out.shape[1]):
        _propose_kernel(indptr, indices, alias, second, n_rows, st, sc)
        if second:
            _settle_second_kernel(indptr, indices, alias, thr, restart, out, row0, step, n_rows, st, sc)
        else:
            _settle_kernel(indptr, indices, alias, restart, out, row0, step, n_rows, st, sc)


@numba.njit(cache=True, nogil=True)
def _walks_serial_kernel(indptr, indices, alias, thr, second, restart, k, seed, walk0, out):
    """Fill every row of ``out`` (int32 [n_walks, length]) with walks ``walk0..``, on the calling thread."""
    n_walks = out.shape[0]
    st = np.empty((2, _BLOCK), dtype=np.uint64)
    sc = np.empty((7, _BLOCK), dtype=np.int64)
    for row0 in range(0, n_walks, _BLOCK):
        _walk_block_kernel(indptr, indices, alias, thr, second, restart, k, seed, walk0, out, row0,
                           min(_BLOCK, n_walks - row0), st, sc)


@numba.njit(cache=True, nogil=True, parallel=True)
def _walks_parallel_kernel(indptr, indices, alias, thr, second, restart, k, seed, walk0, out):
    """Same as ``_walks_serial_kernel``, blocks of walks spread over numba's threads (output does not change)."""
    n_walks = out.shape[0]
    n_blocks = (n_walks + _BLOCK - 1) // _BLOCK
    for b in numba.prange(n_blocks):
        row0 = b * _BLOCK
        st = np.empty((2, _BLOCK), dtype=np.uint64)
        sc = np.empty((7, _BLOCK), dtype=np.int64)
        _walk_block_kernel(indptr, indices, alias, thr, second, restart, k, seed, walk0, out, row0,
                           min(_BLOCK, n_walks - row0), st, sc)


@numba.njit(cache=True, nogil=True)
def _alias_table_kernel(indptr, weights, out, u, small, large):
    """Vose's alias table of every node (module doc) into out uint64 [m]; u float64, small/large int64 scratch of at
    least the largest degree."""
    for v in range(indptr.shape[0] - 1):
        a = indptr[v]
        d = indptr[v + 1] - a
        total = 0.0
        for i in range(d):
            total += np.float64(weights[a + i])
        n_small = 0
        n_large = 0
        for i in range(d):
            u[i] = np.float64(weights[a + i]) * d / total
            if u[i] < 1.0:
                small[n_small] = i
                n_small += 1
            else:
                large[n_large] = i
                n_large += 1
        while n_small > 0 and n_large > 0:
            n_small -= 1
            n_large -= 1
            s = small[n_small]
            big = large[n_large]
            out[a + s] = (np.uint64(u[s] * 4294967296.0) << _S32) | np.uint64(big)
            u[big] = (u[big] + u[s]) - 1.0
            if u[big] < 1.0:
                small[n_small] = big
                n_small += 1
            else:
                large[n_large] = big
                n_large += 1
        for i in range(n_large):
            out[a + large[i]] = _FULL | np.uint64(large[i])
        for i in range(n_small):
            out[a + small[i]] = _FULL | np.uint64(small[i])


@numba.njit(cache=True, nogil=True)
def _first_unsorted_kernel(indptr, indices):
    """First node whose out-neighbours are not sorted ascending, or -1."""
    for v in range(indptr.shape[0] - 1):
        for i in range(indptr[v] + 1, indptr[v + 1]):
            if indices[i] < indices[i - 1]:
                return v
    return -1


@numba.njit(cache=True, nogil=True)
def _count_visits_kernel(flat, counts):
    """Add one to ``counts[v]`` (int64 [n_nodes], in place) for every ``v >= 0`` of ``flat`` (int32 [size])."""
    for i in range(flat.shape[0]):
        v = flat[i]
        if v >= 0:
            counts[v] += 1


@numba.njit(cache=True, nogil=True)
def _count_restarts_kernel(walks, indptr):
    """Entries of ``walks`` (int32 [n, length]) that follow a node without out-edges: the restarts."""
    n = 0
    for i in range(walks.shape[0]):
        for t in range(1, walks.shape[1]):
            v = walks[i, t - 1]
            if walks[i, t] >= 0 and v >= 0 and indptr[v + 1] == indptr[v]:
                n += 1
    return n


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
    if not isinstance(graph, SparseGraph):
        raise ConfigError(f"graph must be a SparseGraph, got {type(graph).__name__}")


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
    graph : SparseGraph
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
    _alias_table_kernel(indptr, weights, out, np.empty(dmax, np.float64), np.empty(dmax, np.int64),
                        np.empty(dmax, np.int64))
    return out


class _Walker(NamedTuple):
    """Validated kernel arguments for one kind of walk over one graph."""

    indptr: np.ndarray
    indices: np.ndarray
    alias: np.ndarray  # uint64 [n_edges], or [0] for unweighted walks
    thr: np.ndarray  # uint64 [3]
    second: bool
    restart: bool


def _prepare(graph, *, weighted, p, q, dead_end, alias=None, check=True) -> _Walker:
    """Validate the options and build what the kernels need. ``check=False`` skips the O(n_edges) sortedness check
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
                              f"node {bad} is not (build the graph with SparseGraph.from_edges)")
    return _Walker(indptr, indices, alias, acceptance_thresholds(p, q), second, dead_end == "restart")


def _run(walker: _Walker, start, stop, length, seed, threads) -> np.ndarray:
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
    graph : SparseGraph
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
    walker = _prepare(graph, weighted=weighted, p=p, q=q, dead_end=dead_end, alias=alias)
    n_walks = per_node * (walker.indptr.shape[0] - 1)
    start = _check_int("start", start, 0, n_walks)
    stop = _check_int("stop", stop, start, n_walks)
    return _run(walker, start, stop, length, seed, threads)


def random_walks(graph, per_node, length, seed=0, *, threads=None, weighted=True, p=1.0, q=1.0, dead_end="stop",
                 alias=None) -> np.ndarray:
    """All ``per_node * n_nodes`` truncated random walks of the corpus, in memory.

    Pass ``k`` (rows ``k * n_nodes .. (k + 1) * n_nodes - 1``) starts one walk at every node, in an order shuffled
    per ``(seed, k)``; every step follows an out-edge, chosen uniformly, or in proportion to its weight, and for
    ``p, q != 1`` reweighted by the second-order rule (module docstring). For corpora that do not fit in memory use
    :func:`walk_range` on pieces, or :func:`graphkit.corpus.write_walk_corpus`.

    Parameters
    ----------
    graph : SparseGraph
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


# ---------------------------------------------------------------------------------------------------- diagnostics
#: How the log-log slopes of ``walk_diagnostics`` are fitted (stored beside them).
SLOPE_METHOD = ("least squares of log(density) on log(value) over logarithmic bins (4 per factor of 2) from the "
                "median value up, bins holding at least 5 nodes; density = nodes in bin / bin width / nodes > 0")
_BINS_PER_OCTAVE = 4
_MIN_BIN_NODES = 5


def loglog_slope(values) -> dict:
    """Slope of a distribution's density on log-log axes, fitted as ``SLOPE_METHOD`` says.

    A power law ``P(x) ~ x**-alpha`` gives ``slope ~ -alpha``. Starting at the median makes the fit scale-free:
    multiplying every value by a constant (visits ~ degree x steps per edge) leaves it unchanged.

    Returns
    -------
    dict
        ``slope`` (None when fewer than 3 bins qualify), ``x_min`` (the median), ``n_bins``, ``n_fit`` (nodes in the
        fitted bins) and ``method``.
    """
    x = np.asarray(values, dtype=np.float64)
    x = x[x > 0]
    result = {"slope": None, "x_min": None, "n_bins": 0, "n_fit": 0, "method": SLOPE_METHOD}
    if x.size == 0:
        return result
    x_min = float(np.median(x))
    tail = x[x >= x_min]
    n_edges = int(math.ceil(_BINS_PER_OCTAVE * math.log2(tail.max() / x_min))) + 2
    edges = x_min * 2.0 ** (np.arange(n_edges) / _BINS_PER_OCTAVE)
    counts, _ = np.histogram(tail, edges)
    ok = counts >= _MIN_BIN_NODES
    result.update(x_min=x_min, n_bins=int(ok.sum()), n_fit=int(counts[ok].sum()))
    if ok.sum() >= 3:
        density = counts[ok] / np.diff(edges)[ok] / x.size
        centre = np.sqrt(edges[:-1] * edges[1:])[ok]
        result["slope"] = round(float(np.polyfit(np.log(centre), np.log(density), 1)[0]), 4)
    return result


def walk_diagnostics(visit_counts, degrees, *, per_node, in_degrees=None, n_restarts=0) -> dict:
    """Figures that describe a walk corpus, for the run's record.

    Parameters
    ----------
    visit_counts : array_like of int, shape (n_nodes,)
        Occurrences of every node in the corpus (:func:`count_visits`, summed over shards).
    degrees : array_like of int, shape (n_nodes,)
        Out-degree of every node (``SparseGraph.degrees()``).
    per_node : int
        Walks started at every node; the corpus has ``per_node * n_nodes`` walks.
    in_degrees : array_like of int, shape (n_nodes,), optional
        In-degree of every node for a directed graph; by default equal to ``degrees`` (undirected).
    n_restarts : int, default 0
        Restart steps in the corpus (:func:`count_restarts`).

    Returns
    -------
    dict
        ``n_walks``; ``n_tokens`` (entries other than padding); ``n_steps = n_tokens - n_walks`` (moves along an
        edge plus restarts); ``n_restarts``; ``nodes_never_visited`` (0 for a complete corpus, since every node
        starts walks); ``nodes_never_entered`` (only seen as the start of their own walks); ``isolated_nodes`` (no
        edge in or out); ``dead_end_nodes`` (no out-edge); ``visit_slope`` and ``degree_slope`` (:func:`loglog_slope`
        of the visit counts and of the out-degrees: on an undirected graph visits are about proportional to degree,
        so the two should agree, and on a scale-free graph both show the power law).

    Raises
    ------
    ConfigError
        The arrays differ in length or hold negative values.
    """
    per_node = _check_int("per_node", per_node, 1)
    visits = np.asarray(visit_counts, dtype=np.int64).ravel()
    out_deg = np.asarray(degrees, dtype=np.int64).ravel()
    in_deg = out_deg if in_degrees is None else np.asarray(in_degrees, dtype=np.int64).ravel()
    if not (visits.shape == out_deg.shape == in_deg.shape):
        raise ConfigError(f"visit_counts, degrees and in_degrees must have one value per node, got lengths "
                          f"{visits.size}, {out_deg.size}, {in_deg.size}")
    if visits.size and min(visits.min(), out_deg.min(), in_deg.min()) < 0:
        raise ConfigError("visit_counts and degrees must be >= 0")
    n_walks = per_node * visits.size
    n_tokens = int(visits.sum())
    return {
        "n_walks": n_walks,
        "n_tokens": n_tokens,
        "n_steps": n_tokens - n_walks,
        "n_restarts": int(n_restarts),
        "nodes_never_visited": int(np.count_nonzero(visits == 0)),
        "nodes_never_entered": int(np.count_nonzero(visits <= per_node)),
        "isolated_nodes": int(np.count_nonzero((out_deg == 0) & (in_deg == 0))),
        "dead_end_nodes": int(np.count_nonzero(out_deg == 0)),
        "visit_slope": loglog_slope(visits),
        "degree_slope": loglog_slope(out_deg),
    }
