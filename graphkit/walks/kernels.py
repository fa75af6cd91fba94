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
* Alias table (Walker 1977; Vose 1991, "A linear algorithm for generating random numbers with a given distribution";
  built by the one alias kernel of :mod:`graphkit.alias`, shared with training),
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

import numba
import numpy as np

from ..prefetch import prefetch as _prefetch
from ..rng import G as _G, LOW32 as _LOW32, S32 as _S32, mix_kernel as _mix_kernel
_TWO32 = np.uint64(1 << 32)
_ONE = np.uint64(1)
_ALWAYS = np.uint64(1 << 63)
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

