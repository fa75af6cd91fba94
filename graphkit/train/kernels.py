"""Skip-gram training of node vectors on a walk corpus (the learning step of DeepWalk, Perozzi et al. 2014).

The model is word2vec's skip-gram (Mikolov et al. 2013) with either objective: negative sampling from the unigram
distribution raised to 0.75, or the hierarchical softmax over the Huffman tree of the visit counts.

Kernel layout (after Ji, Shah, Willke et al. 2016, "Parallelizing Word2Vec in Shared and Distributed Memory"): for
each centre position the context nodes of its window are the *inputs* and the centre's targets are the *outputs*:
the centre itself plus ``negatives`` negatives drawn once per centre and shared by all its context nodes (negative
sampling), or the inner nodes on the centre's Huffman path with labels ``1 - code`` (hierarchical softmax). The
context nodes are taken two at a time, in window order (the last one alone if their number is odd): for each pair,
the 2 x n_targets dot products give the gradients ``g = (label - sigmoid(dot)) * lr``, and the pair's rows and the
targets' rows are updated from the values they had before that pair's step (targets in order, then inputs, so a row
listed twice gets both updates). Pairs rather than the whole window: with the hierarchical softmax every centre
shares the top of the tree, and a whole window's summed step on those rows cost 0.002-0.004 Micro-F1 on the
planted-partition benchmark, pairs none, at the same speed (docs/bench/train.md). The kernels work in 2 x 2 tiles.
Threads share the two matrices without locks (Hogwild, Recht et al. 2011), each one taking blocks of walks in turn;
a background thread reads the next chunk of walks meanwhile.

``sigmoid(x)`` clips ``x`` to [-6, 6] and interpolates linearly in a table of the logistic function at
``SIG_POINTS`` evenly spaced points of that interval (``sigmoid_table()``, float32), within 2e-6 of the exact value.

Exact definition of the random streams (all arithmetic modulo 2**64; ``mix`` and ``G`` as in :mod:`graphkit.walks`):

* epoch key ``key = mix(mix(seed ^ TRAIN_SALT) + epoch)``; walk ``w`` (global row number in the corpus, counting
  empty rows) starts from ``s = mix(key ^ w)``; every draw is ``s += G; r = mix(s)``.
* with subsampling (``subsample > 0``) the walk first takes one draw per node visit, in order: the visit of ``v`` is
  kept when ``r >> 32 < keep[v]`` (``keep_thresholds``), and the walk becomes its kept visits. Without it, no draws.
* per centre (kept visit), in walk order: one draw for the window, ``b = 1 + ((r >> 32) * window >> 32)``; then, for
  negative sampling, ``negatives`` draws from the alias table: bucket ``i = (r >> 32) * n_nodes >> 32``, kept when
  ``(r & 0xFFFFFFFF) < threshold[i]``, else ``alias[i]``. A negative equal to the centre is dropped (as word2vec
  does), so a centre can have fewer. Walks of fewer than two (kept) nodes have no pairs and are skipped.
* the learning rate of the centre at global position ``t`` (over all epochs, counting every visit but no padding,
  discarded visits included) is ``max(min_lr, lr - (lr - min_lr) * t / (epochs * n_tokens))``, computed in float64
  and rounded to float32.

With ``threads=1`` the result is bit-identical across runs and independent of how the walks are cut into chunks.
"""

from __future__ import annotations

import numbers
import os
import queue
import tempfile
import threading
import warnings
from collections.abc import Iterable, Iterator
from pathlib import Path

import numba
import numpy as np
from llvmlite import ir
from numba import types
from numba.core import cgutils
from numba.extending import intrinsic

from .. import progress
from ..checks import (DIM_RANGE, EPOCHS_MIN, LEARNING_RATE_MAX, MIN_LEARNING_RATE, NEGATIVES_MIN, SEED_MAX,
                     SUBSAMPLE_RANGE, THREADS_MIN, WINDOW_MIN, max_threads)
from ..checks import check_int as _check_int
from ..rng import _G, _LOW32, _S32, _mix_kernel
from ..errors import ConfigError
from ..huffman import build_huffman

__all__ = ["train_vectors", "alias_table", "initial_vectors", "keep_thresholds", "sigmoid_table", "stream_key",
           "OBJECTIVES", "TRAIN_SALT", "SIG_POINTS"]

OBJECTIVES = ("negative_sampling", "hierarchical_softmax")
#: Salt that keeps the training streams apart from the walk streams of the same seed.
TRAIN_SALT = 0xD1B54A32D192ED03
#: Salt of the seed sequence of the initial input vectors.
INIT_SALT = 0x2545F491

_MASK64 = (1 << 64) - 1
#: Dot products are clipped to +-_MAX_DOT before the sigmoid (the table's range): the gradient lost beyond it is
#: below 0.25 % of the learning rate.
_MAX_DOT = np.float32(6.0)
#: Points of the sigmoid table over [-_MAX_DOT, _MAX_DOT] (interpolated: at most 2e-6 from the exact function).
SIG_POINTS = 1024
#: Walks per block; threads take blocks in turn (see ``_train_parallel_kernel``), so blocks are kept small.
_BLOCK = 64


# ---------------------------------------------------------------------------------------------------- numba kernels
@numba.njit(cache=True, nogil=True, inline="always")
def _draw_kernel(s):
    """Advance stream ``s`` (uint64); returns (new state, 64 random bits)."""
    s = s + _G
    return s, _mix_kernel(s)


if numba.config.DISABLE_JIT:
    def _prefetch(arr, row, col):
        """Cache hint only: nothing to do when the kernels run as plain Python."""
else:
    @intrinsic
    def _prefetch(typingctx, arr, row, col):
        """Cache hint for the line holding ``arr[row, col]`` (LLVM ``llvm.prefetch``: read, keep in all levels)."""
        def codegen(context, builder, signature, args):
            aryty = signature.args[0]
            ary = context.make_array(aryty)(context, builder, args[0])
            idx = [context.cast(builder, v, t, types.intp) for v, t in zip(args[1:], signature.args[1:])]
            ptr = cgutils.get_item_pointer(context, builder, aryty, ary, idx, wraparound=False)
            i8p, i32 = ir.IntType(8).as_pointer(), ir.IntType(32)
            fnty = ir.FunctionType(ir.VoidType(), [i8p, i32, i32, i32])
            fn = cgutils.get_or_insert_function(builder.module, fnty, "llvm.prefetch.p0")
            builder.call(fn, [builder.bitcast(ptr, i8p), i32(0), i32(3), i32(1)])
            return context.get_dummy_value()
        return types.void(arr, row, col), codegen


@numba.njit(cache=True, nogil=True, inline="always")
def _sigmoid_kernel(x, sig, scale):
    """The logistic function of float32 ``x`` read from the table ``sig`` (float32 [SIG_POINTS], see
    ``sigmoid_table``) with linear interpolation, after clipping ``x`` to +-_MAX_DOT; ``scale`` is
    ``float32((SIG_POINTS - 1) / (2 * _MAX_DOT))``."""
    u = (min(max(x, -_MAX_DOT), _MAX_DOT) + _MAX_DOT) * scale
    i = min(np.int64(u), sig.shape[0] - 2)
    return sig[i] + (u - np.float32(i)) * (sig[i + 1] - sig[i])


# fastmath on the two SGD kernels only: it lets LLVM vectorise the dot-product reductions. On the planted-partition
# benchmark graph (threads=1, seeds 5 and 6) the Micro-F1 was the same to four digits with and without it: 0.9513
# and 0.9517 for negative sampling, 0.9301 and 0.9282 for the hierarchical softmax, at 1.4-2.5x the speed.
# Both work on 2 x 2 tiles (two input rows against two output rows per pass over the dimensions): each loaded value
# then feeds two multiply-adds, and there are a quarter as many short loops. The driver pads odd counts with a zero
# row whose gradients it sets to 0, so the tiles need no remainder code.
@numba.njit(cache=True, nogil=True, fastmath=True)
def _gradients_kernel(emb_in, emb_out, ctx, n_ctx, tgt, lab, n_tgt, lr, sig, grad):
    """Fill grad float32 [>= n_ctx + 1, >= n_tgt + 1] with ``(lab[t] - sigmoid(in_k . out_t)) * lr`` where ``in_k``
    is ``emb_in[ctx[k]]`` and ``out_t`` is ``emb_out[tgt[t]]``.

    emb_in float32 [n_in, dim], emb_out float32 [n_out, dim] (read only here); ctx, tgt int32 row numbers, each
    followed by a padding row (the matrices' zero last row) that completes an odd count to a tile, whose
    gradients are set to 0; lab float32 [n_tgt] labels; lr float32; sig the sigmoid table.
    """
    dim = emb_in.shape[1]
    nc, nt = n_ctx + (n_ctx & 1), n_tgt + (n_tgt & 1)
    for k in range(0, nc, 2):
        i0, i1 = emb_in[ctx[k]], emb_in[ctx[k + 1]]
        for t in range(0, nt, 2):
            o0, o1 = emb_out[tgt[t]], emb_out[tgt[t + 1]]
            s00 = s01 = s10 = s11 = np.float32(0.0)
            for d in range(dim):
                a, b, x, y = i0[d], i1[d], o0[d], o1[d]
                s00 += a * x
                s01 += a * y
                s10 += b * x
                s11 += b * y
            grad[k, t], grad[k, t + 1], grad[k + 1, t], grad[k + 1, t + 1] = s00, s01, s10, s11
    scale = np.float32((sig.shape[0] - 1) / (2.0 * _MAX_DOT))
    for k in range(n_ctx):
        for t in range(n_tgt):
            grad[k, t] = (lab[t] - _sigmoid_kernel(grad[k, t], sig, scale)) * lr
        if nt > n_tgt:
            grad[k, n_tgt] = np.float32(0.0)
    if nc > n_ctx:
        for t in range(nt):
            grad[n_ctx, t] = np.float32(0.0)


@numba.njit(cache=True, nogil=True, fastmath=True)
def _apply_kernel(emb_in, emb_out, ctx, n_ctx, tgt, n_tgt, grad, d_in):
    """Apply the gradients of ``_gradients_kernel``: ``emb_out[tgt[t]] += sum_k grad[k, t] * emb_in[ctx[k]]`` and
    ``emb_in[ctx[k]] += sum_t grad[k, t] * emb_out[tgt[t]]``, in place, both from the rows' values before the step.

    ctx, tgt and grad are padded as for ``_gradients_kernel`` (the padding rows get zero updates). Targets are
    updated in order and inputs last, so a row listed twice gets both updates. d_in float32 [>= n_ctx + 1, dim] is
    scratch.
    """
    dim = emb_in.shape[1]
    nc, nt = n_ctx + (n_ctx & 1), n_tgt + (n_tgt & 1)
    for k in range(0, nc, 2):
        a0, a1 = d_in[k], d_in[k + 1]
        for d in range(dim):
            a0[d] = np.float32(0.0)
            a1[d] = np.float32(0.0)
        for t in range(0, nt, 2):
            g00, g01, g10, g11 = grad[k, t], grad[k, t + 1], grad[k + 1, t], grad[k + 1, t + 1]
            o0, o1 = emb_out[tgt[t]], emb_out[tgt[t + 1]]
            for d in range(dim):
                x, y = o0[d], o1[d]
                a0[d] += g00 * x + g01 * y
                a1[d] += g10 * x + g11 * y
    for t in range(0, nt, 2):
        o0, o1 = emb_out[tgt[t]], emb_out[tgt[t + 1]]
        for k in range(0, nc, 2):
            g00, g01, g10, g11 = grad[k, t], grad[k, t + 1], grad[k + 1, t], grad[k + 1, t + 1]
            i0, i1 = emb_in[ctx[k]], emb_in[ctx[k + 1]]
            for d in range(dim):
                a, b = i0[d], i1[d]
                o0[d] += g00 * a + g10 * b
                o1[d] += g01 * a + g11 * b
    for k in range(n_ctx):
        row, acc = emb_in[ctx[k]], d_in[k]
        for d in range(dim):
            row[d] += acc[d]


@numba.njit(cache=True, nogil=True, inline="always")
def _prefetch_row_kernel(emb, row):
    """Start loading row ``row`` of ``emb`` (float32 [n, dim]) into the cache, one 64-byte line at a time; changes
    nothing. Issued one centre ahead, it hides the memory latency of the randomly placed rows."""
    for d in range(0, emb.shape[1], 16):
        _prefetch(emb, row, d)


@numba.njit(cache=True, nogil=True, inline="always")
def _draw_negatives_kernel(s, thresh, alias, out):
    """Fill ``out`` (int64 [negatives]) with alias-table draws (thresh uint64 [n], alias int32 [n]); returns the
    advanced stream state ``s``."""
    n = np.uint64(thresh.shape[0])
    for q in range(out.shape[0]):
        s, r = _draw_kernel(s)
        v = np.int64(((r >> _S32) * n) >> _S32)
        if (r & _LOW32) >= thresh[v]:
            v = np.int64(alias[v])
        out[q] = v
    return s


@numba.njit(cache=True, nogil=True, inline="always")
def _keep_visits_kernel(tokens, a, m, keep, s, seq, pos):
    """Copy the visits ``tokens[a:a + m]`` of one walk into seq (int32) with their offsets in pos (int64), dropping
    those that subsampling discards (one draw per visit, kept when the high 32 bits are below ``keep[node]``; keep
    uint64 [n_nodes], or [0] when subsampling is off: no draws, every visit kept). Returns (stream state, kept)."""
    if keep.shape[0] == 0:
        for j in range(m):
            seq[j] = tokens[a + j]
            pos[j] = j
        return s, m
    n = 0
    for j in range(m):
        s, r = _draw_kernel(s)
        v = tokens[a + j]
        if (r >> _S32) < keep[v]:
            seq[n] = v
            pos[n] = j
            n += 1
    return s, n


@numba.njit(cache=True, nogil=True, inline="always")
def _targets_kernel(c, hs, points, codes, lengths, negs, tgt, lab):
    """Output rows and labels of centre ``c`` into tgt/lab; returns their number. Hierarchical softmax: the inner
    nodes of c's Huffman path with labels 1 - code. Negative sampling: c (label 1), then the negatives ``negs``
    (label 0) except those equal to c, which word2vec drops too."""
    if hs:
        for lvl in range(lengths[c]):
            tgt[lvl] = points[c, lvl]
            lab[lvl] = np.float32(1 - codes[c, lvl])
        return lengths[c]
    tgt[0], lab[0], n_tgt = c, np.float32(1.0), 1
    for q in range(negs.shape[0]):
        if negs[q] != c:
            tgt[n_tgt], lab[n_tgt] = negs[q], np.float32(0.0)
            n_tgt += 1
    return n_tgt


@numba.njit(cache=True, nogil=True, inline="always")
def _prefetch_targets_kernel(emb_out, c, hs, points, lengths, negs):
    """Prefetch the output rows centre ``c`` will update (its Huffman path, or itself and its negatives)."""
    if hs:
        for lvl in range(lengths[c]):
            _prefetch_row_kernel(emb_out, points[c, lvl])
    else:
        _prefetch_row_kernel(emb_out, c)
        for q in range(negs.shape[0]):
            _prefetch_row_kernel(emb_out, negs[q])


@numba.njit(cache=True, nogil=True)
def _train_walks_kernel(tokens, starts, w_lo, w_hi, walk0, tok0, key, emb_in, emb_out, tables, window, rates, scratch):
    """Train on walks ``w_lo..w_hi-1`` of a chunk, one after the other, on the calling thread.

    tokens int32 [n_tok] are the chunk's node visits without padding, walk ``w`` being
    ``tokens[starts[w]:starts[w + 1]]`` (starts int64 [n_walks + 1]); walk0 is the global number of the chunk's first
    walk and tok0 the global position of its first token. emb_in/emb_out float32 are updated in place; the last row
    of each is the zero padding row of the tiles. tables = (hs, points int32 [n, max_len], codes uint8 [n, max_len],
    lengths int32 [n], thresh uint64 [n], alias int32 [n], keep uint64 [n] or [0], sig float32 [SIG_POINTS]); the
    unused objective's arrays may be dummies. rates = (lr0, lr_min, total_work). scratch = (seq int32 [longest],
    pos int64 [longest], ctx int32 [max_ctx + 1], tgt int32 and lab float32 [max_tgt + 1], grad float32
    [max_ctx + 1, max_tgt + 1], d_in float32 [max_ctx + 1, dim], negs int64 [2, negatives]) from
    ``_scratch_kernel``; negs holds the negatives of the current and the next centre, drawn one centre ahead to
    prefetch their rows.
    """
    hs, points, codes, lengths, thresh, alias, keep, sig = tables
    lr0, lr_min, total_work = rates
    seq, pos, ctx, tgt, lab, grad, d_in, negs = scratch
    win = np.uint64(window)
    pad_in, pad_out = emb_in.shape[0] - 1, emb_out.shape[0] - 1
    for w in range(w_lo, w_hi):
        a = starts[w]
        s, n = _keep_visits_kernel(tokens, a, starts[w + 1] - a, keep, _mix_kernel(key ^ np.uint64(walk0 + w)),
                                   seq, pos)
        if n < 2:
            continue
        s, r = _draw_kernel(s)
        b_next = 1 + np.int64(((r >> _S32) * win) >> _S32)
        s = _draw_negatives_kernel(s, thresh, alias, negs[0])
        for i in range(n):
            b, cur = b_next, negs[i & 1]
            if i + 1 < n:  # the next centre's draws, in stream order, and its rows on their way into the cache
                s, r = _draw_kernel(s)
                b_next = 1 + np.int64(((r >> _S32) * win) >> _S32)
                s = _draw_negatives_kernel(s, thresh, alias, negs[(i + 1) & 1])
                _prefetch_targets_kernel(emb_out, seq[i + 1], hs, points, lengths, negs[(i + 1) & 1])
                if i + 1 + window < n:
                    _prefetch_row_kernel(emb_in, seq[i + 1 + window])
            n_ctx = 0
            for j in range(max(0, i - b), min(n, i + b + 1)):
                if j != i:
                    ctx[n_ctx] = seq[j]
                    n_ctx += 1
            n_tgt = _targets_kernel(seq[i], hs, points, codes, lengths, cur, tgt, lab)
            ctx[n_ctx], tgt[n_tgt] = pad_in, pad_out   # completes an odd count to a tile (zero gradients)
            frac = min(np.float64(tok0 + a + pos[i]) / total_work, 1.0)
            lr = np.float32(max(lr_min, lr0 - (lr0 - lr_min) * frac))
            for k in range(0, n_ctx, 2):   # context nodes two at a time, each pair from the current rows
                pair = ctx[k:]
                m = min(2, n_ctx - k)
                _gradients_kernel(emb_in, emb_out, pair, m, tgt, lab, n_tgt, lr, sig, grad)
                _apply_kernel(emb_in, emb_out, pair, m, tgt, n_tgt, grad, d_in)


@numba.njit(cache=True, nogil=True)
def _scratch_kernel(longest, max_ctx, max_tgt, dim, negatives):
    """The scratch tuple of ``_train_walks_kernel`` for one thread (allocated once per block of walks), with room
    for the padding row after the context and target rows."""
    c, t = max_ctx + 1, max_tgt + 1
    return (np.empty(longest, dtype=np.int32), np.empty(longest, dtype=np.int64), np.empty(c, dtype=np.int32),
            np.empty(t, dtype=np.int32), np.empty(t, dtype=np.float32), np.empty((c, t), dtype=np.float32),
            np.empty((c, dim), dtype=np.float32), np.empty((2, negatives), dtype=np.int64))


@numba.njit(cache=True, nogil=True)
def _train_serial_kernel(tokens, starts, walk0, tok0, key, emb_in, emb_out, tables, window, rates, sizes):
    """All walks of a chunk in order on the calling thread (arguments as for ``_train_walks_kernel``; sizes =
    (longest walk, max_ctx, max_tgt, negatives, threads) size the scratch). Updates emb_in and emb_out in place."""
    longest, max_ctx, max_tgt, negatives, _ = sizes
    scratch = _scratch_kernel(longest, max_ctx, max_tgt, emb_in.shape[1], negatives)
    _train_walks_kernel(tokens, starts, 0, starts.shape[0] - 1, walk0, tok0, key, emb_in, emb_out, tables, window,
                        rates, scratch)


@numba.njit(cache=True, nogil=True, parallel=True)
def _train_parallel_kernel(tokens, starts, walk0, tok0, key, emb_in, emb_out, tables, window, rates, sizes):
    """Same as ``_train_serial_kernel`` on numba's threads, which update the shared matrices without locks
    (Hogwild): the result then depends on thread timing. ``sizes`` has a fifth entry, the thread count T; thread
    ``i`` takes the blocks of walks ``i, i + T, i + 2T, ...``, so that all threads work on nearby positions of the
    corpus at any time and train with nearly the same learning rate (contiguous halves would put the second thread
    at a rate decayed by half a chunk from the start; on the planted-partition benchmark that cost 0.003-0.006
    Micro-F1 with the hierarchical softmax)."""
    longest, max_ctx, max_tgt, negatives, n_threads = sizes
    n_walks = starts.shape[0] - 1
    n_blocks = (n_walks + _BLOCK - 1) // _BLOCK
    for tid in numba.prange(n_threads):
        scratch = _scratch_kernel(longest, max_ctx, max_tgt, emb_in.shape[1], negatives)
        for blk in range(tid, n_blocks, n_threads):
            _train_walks_kernel(tokens, starts, blk * _BLOCK, min(n_walks, (blk + 1) * _BLOCK), walk0, tok0, key,
                                emb_in, emb_out, tables, window, rates, scratch)


@numba.njit(cache=True, nogil=True)
def _alias_table_kernel(scaled, thresh, alias, small, large):
    """Walker/Vose alias table of a distribution.

    scaled float64 [n]: the probabilities times n (overwritten). thresh uint64 [n] and alias int32 [n] are filled in
    place: bucket ``i`` keeps ``i`` when 32 random bits are below ``thresh[i]`` (0..2**32) and gives ``alias[i]``
    otherwise. small, large int64 [n] are scratch. Deterministic: the stacks are processed in index order.
    """
    n = scaled.shape[0]
    two32 = 4294967296.0
    n_small = 0
    n_large = 0
    for i in range(n):
        if scaled[i] < 1.0:
            small[n_small] = i
            n_small += 1
        else:
            large[n_large] = i
            n_large += 1
    while n_small > 0 and n_large > 0:
        n_small -= 1
        lo = small[n_small]
        n_large -= 1
        hi = large[n_large]
        thresh[lo] = np.uint64(scaled[lo] * two32)
        alias[lo] = hi
        scaled[hi] = (scaled[hi] + scaled[lo]) - 1.0
        if scaled[hi] < 1.0:
            small[n_small] = hi
            n_small += 1
        else:
            large[n_large] = hi
            n_large += 1
    # Whatever is left holds probability 1 up to rounding.
    for j in range(n_large):
        thresh[large[j]] = np.uint64(two32)
        alias[large[j]] = large[j]
    for j in range(n_small):
        thresh[small[j]] = np.uint64(two32)
        alias[small[j]] = small[j]


# ---------------------------------------------------------------------------------------------------- helpers
def _mix_int(z: int) -> int:
    """splitmix64 output function on Python ints (the same as ``_mix_kernel``)."""
    z &= _MASK64
    z = ((z ^ (z >> 30)) * 0xBF58476D1CE4E5B9) & _MASK64
    z = ((z ^ (z >> 27)) * 0x94D049BB133111EB) & _MASK64
    return z ^ (z >> 31)


def stream_key(seed: int, epoch: int) -> int:
    """Key of the training streams of one epoch (see the module docstring)."""
    return _mix_int(_mix_int(seed ^ TRAIN_SALT) + epoch)


def alias_table(weights) -> tuple[np.ndarray, np.ndarray]:
    """Alias table (Walker 1977; Vose 1991) of the distribution proportional to ``weights``: O(n) memory and time.

    Parameters
    ----------
    weights : array_like of float, shape (n,)
        Non-negative, with a positive sum. A zero weight is never drawn.

    Returns
    -------
    thresh : ndarray of uint64, shape (n,)
        Bucket ``i`` keeps ``i`` when 32 uniform random bits are below ``thresh[i]`` (in ``0..2**32``).
    alias : ndarray of int32, shape (n,)
        The node bucket ``i`` gives otherwise.
    """
    w = np.asarray(weights, dtype=np.float64)
    n = w.shape[0]
    scaled = w * (n / w.sum())
    thresh = np.zeros(n, dtype=np.uint64)
    alias = np.zeros(n, dtype=np.int32)
    _alias_table_kernel(scaled, thresh, alias, np.empty(n, np.int64), np.empty(n, np.int64))
    return thresh, alias


def sigmoid_table() -> np.ndarray:
    """The logistic function at ``SIG_POINTS`` evenly spaced points of [-6, 6] (float32), as the kernels read it."""
    x = np.linspace(-float(_MAX_DOT), float(_MAX_DOT), SIG_POINTS)
    return (1.0 / (1.0 + np.exp(-x))).astype(np.float32)


def keep_thresholds(counts, subsample: float) -> np.ndarray:
    """Subsampling of frequent nodes (Mikolov et al. 2013): a visit of node ``v`` is kept with probability
    ``min(1, sqrt(subsample / f_v))``, ``f_v = counts[v] / counts.sum()``; returns it times 2**32 as uint64 (n,),
    compared with the high 32 bits of a draw. Empty when ``subsample`` is 0 (off)."""
    if subsample == 0:
        return np.zeros(0, dtype=np.uint64)
    counts = np.asarray(counts, dtype=np.float64)
    freq = counts / counts.sum()
    with np.errstate(divide="ignore"):
        keep = np.minimum(1.0, np.sqrt(subsample / freq))   # an unvisited node gets inf -> 1
    return np.floor(keep * 2.0 ** 32).astype(np.uint64)


def initial_vectors(n_nodes: int, dim: int, seed: int, *, out=None) -> np.ndarray:
    """word2vec's start: input vectors uniform in [-0.5/dim, 0.5/dim), float32 [n_nodes, dim], from ``seed``.

    ``out`` (float32 C-contiguous [n_nodes, dim], e.g. an ``np.memmap``) is filled in place and returned."""
    rng = np.random.default_rng([seed, INIT_SALT])
    emb = np.empty((n_nodes, dim), dtype=np.float32) if out is None else out
    rng.random(out=emb, dtype=np.float32)
    emb -= np.float32(0.5)
    emb /= np.float32(dim)
    return emb




def _check_rate(name, value, minimum, strict, maximum=None) -> float:
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, numbers.Real):
        raise ConfigError(f"{name} must be a number, got {value!r}")
    value = float(value)
    if not np.isfinite(value) or value < minimum or (strict and value == minimum):
        raise ConfigError(f"{name} must be {'>' if strict else '>='} {minimum} and finite, got {value!r}")
    if maximum is not None and value > maximum:
        raise ConfigError(f"{name} must be <= {maximum}, got {value!r}")
    return value


def _check_counts(counts, n_nodes) -> np.ndarray:
    arr = np.asarray(counts)
    if arr.shape != (n_nodes,):
        raise ConfigError(f"counts must have shape ({n_nodes},) (one per node), got {arr.shape}")
    if arr.dtype.kind not in "iu":
        raise ConfigError(f"counts must be integers, got dtype {arr.dtype}")
    if n_nodes and arr.min() < 0:
        raise ConfigError(f"counts must be >= 0, got a minimum of {int(arr.min())}")
    return arr.astype(np.int64)


def _is_one_shot(walks) -> bool:
    """True for an iterator (read once), False for an array or a re-iterable; asks without starting an iteration."""
    if isinstance(walks, np.ndarray):
        return False
    if not isinstance(walks, Iterable):
        raise ConfigError(f"walks must be an int32 array or an iterable of walk chunks, got {type(walks).__name__}")
    return isinstance(walks, Iterator)


def _chunks(walks, chunk_walks):
    """Yield the 2-D integer arrays of ``walks`` cut into pieces of at most ``chunk_walks`` rows (views, no copy)."""
    source = (walks,) if isinstance(walks, np.ndarray) else walks
    for part in source:
        part = np.asarray(part)
        if part.ndim != 2:
            raise ConfigError(f"walk chunks must be 2-D [n_walks, length], got shape {part.shape}")
        if part.dtype.kind not in "iu":
            raise ConfigError(f"walk chunks must hold integers, got dtype {part.dtype}")
        for row0 in range(0, part.shape[0], chunk_walks):
            yield part[row0:row0 + chunk_walks]


def _compact(chunk, n_nodes):
    """The kernel's form of a chunk: (tokens int32 without the -1 padding, starts int64 [k + 1] of every walk)."""
    if chunk.size:
        lo, hi = int(chunk.min()), int(chunk.max())
        if lo < -1 or hi >= n_nodes:
            raise ConfigError(f"walks must hold node indices in [-1, {n_nodes}), got values in [{lo}, {hi}]")
    keep = chunk >= 0
    starts = np.zeros(chunk.shape[0] + 1, dtype=np.int64)
    np.cumsum(keep.sum(axis=1), out=starts[1:])
    return np.ascontiguousarray(chunk[keep], dtype=np.int32), starts


def _resolve_counts(walks, n_nodes, counts, chunk_walks) -> np.ndarray:
    if counts is not None:
        return _check_counts(counts, n_nodes)
    if _is_one_shot(walks):
        raise ConfigError("walks is a one-shot iterator and counts was not given: the visit counts (for the "
                          "negative-sampling table or Huffman tree and the learning-rate schedule) are needed before "
                          "training starts, so pass counts=..., or a re-iterable corpus")
    if hasattr(walks, "visit_counts"):
        return _check_counts(walks.visit_counts(), n_nodes)
    # An in-memory array, or a re-iterable without stored counts: one counting pass over the chunks.
    total = np.zeros(n_nodes, dtype=np.int64)
    for chunk in _chunks(walks, chunk_walks):
        tokens, _ = _compact(chunk, n_nodes)
        total += np.bincount(tokens, minlength=n_nodes)
    return total


def _check_init(init, n_nodes, dim):
    """(rows int64 [m], vectors float32 [m, dim]) from ``init``, or None; see ``train_vectors``."""
    if init is None:
        return None
    if isinstance(init, tuple):
        if len(init) != 2:
            raise ConfigError(f"init must be an array of shape ({n_nodes}, {dim}) or a (rows, vectors) pair, "
                              f"got a tuple of {len(init)} items")
        rows, vectors = np.asarray(init[0]), np.asarray(init[1])
        if rows.ndim != 1 or (rows.size and rows.dtype.kind not in "iu"):
            raise ConfigError(f"init rows must be a 1-D integer array, got shape {rows.shape} and dtype {rows.dtype}")
        rows = rows.astype(np.int64)
        if rows.size and (rows.min() < 0 or rows.max() >= n_nodes):
            raise ConfigError(f"init rows must be node indices in [0, {n_nodes}), got values in "
                              f"[{rows.min()}, {rows.max()}]")
        if np.unique(rows).size != rows.size:
            raise ConfigError("init rows must be distinct, got a repeated node index")
        shape = (rows.size, dim)
    else:
        rows, vectors = None, np.asarray(init)
        shape = (n_nodes, dim)
    if vectors.shape != shape:
        raise ConfigError(f"init vectors must have shape {shape}, got {vectors.shape}")
    if vectors.dtype.kind != "f":
        raise ConfigError(f"init vectors must be floats, got dtype {vectors.dtype}")
    if not np.isfinite(vectors).all():
        raise ConfigError("init vectors must be finite, got NaN or infinity")
    return rows, vectors


def _weight_matrix(shape, memmap_dir, name):
    """A zeroed float32 matrix in memory, or in a file of ``memmap_dir`` that is unlinked at once: the mapping stays
    valid (the pages can still go to disk under memory pressure) and the space is freed when the array is."""
    if memmap_dir is None:
        return np.zeros(shape, dtype=np.float32)
    fd, path = tempfile.mkstemp(prefix=f".{name}-", suffix=".f32", dir=memmap_dir)
    try:
        os.ftruncate(fd, max(1, shape[0] * shape[1] * 4))  # sparse, hence zero, until written
        return np.memmap(path, dtype=np.float32, mode="r+", shape=shape)
    finally:
        os.close(fd)
        os.unlink(path)


def _check_memmap_dir(memmap_dir):
    if memmap_dir is None:
        return None
    path = Path(memmap_dir)
    if path.exists() and not path.is_dir():
        raise ConfigError(f"memmap_dir must be a folder, got the file {str(path)!r}")
    try:
        path.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise ConfigError(f"memmap_dir {str(path)!r} cannot be created: {exc.strerror}") from None
    return path


class _ChunkReader:
    """Iterate the kernel form of the chunks ``(tokens, starts, n_rows)``, read by a background thread that stays
    at most one chunk ahead of the consumer: the next Parquet chunk is decoded while numba (nogil) trains on the
    current one. An error of the reader is raised in the consumer; leaving early stops the reader."""

    _DONE = object()

    def __init__(self, walks, chunk_walks, n_nodes):
        self._source = _chunks(walks, chunk_walks)
        self._n_nodes = n_nodes
        self._queue = queue.Queue(maxsize=1)
        self._slot = threading.Semaphore(1)   # held while a chunk is read, given back when the consumer takes it
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._read, name="graphkit-chunk-reader", daemon=True)

    def _read(self):
        try:
            while True:
                self._slot.acquire()
                if self._stop.is_set():
                    return
                chunk = next(self._source, None)
                if chunk is None:
                    self._queue.put(self._DONE)
                    return
                tokens, starts = _compact(chunk, self._n_nodes)
                self._queue.put((tokens, starts, chunk.shape[0]))
        except BaseException as exc:  # handed to the consumer, which raises it
            self._queue.put(exc)

    def __enter__(self):
        self._thread.start()
        return self

    def __iter__(self):
        while True:
            item = self._queue.get()
            self._slot.release()
            if item is self._DONE:
                return
            if isinstance(item, BaseException):
                raise item
            yield item

    def __exit__(self, *exc):
        self._stop.set()
        self._slot.release()   # wakes a reader waiting for its slot
        while self._thread.is_alive():   # a reader blocked on put() needs the queue drained
            try:
                self._queue.get(timeout=0.05)
            except queue.Empty:
                pass
        self._thread.join()
        return False


# ---------------------------------------------------------------------------------------------------- driver
def train_vectors(walks, n_nodes, dim=128, window=5, objective="negative_sampling", negatives=5, epochs=1, seed=0,
                  threads=None, *, learning_rate=0.025, min_learning_rate=MIN_LEARNING_RATE, subsample=0.0, init=None,
                  memmap_dir=None, counts=None, chunk_walks=65536) -> np.ndarray:
    """Train skip-gram node vectors on random walks, chunk by chunk.

    Parameters
    ----------
    walks : ndarray of int, shape (n_walks, length), or iterable of such chunks
        Node indices in ``0..n_nodes-1``; ``-1`` entries (padding after a walk stopped) are skipped. A re-iterable
        (a list of arrays, :class:`graphkit.corpus.WalkCorpus`) is read once per epoch, plus once before training to
        count visits unless it has ``visit_counts()`` or ``counts`` is given. A one-shot iterator needs ``counts``
        and ``epochs=1``. Chunks are never concatenated; a background thread reads the next one while the current
        one trains.
    n_nodes : int
        Number of nodes (rows of the result), ``>= 1``.
    dim : int, default 128
        In ``graphkit.checks.DIM_RANGE``.
    window : int, default 5
        Largest distance between a centre and a context node; every centre draws its own window size uniformly
        in ``1..window`` (word2vec's dynamic window).
    objective : {"negative_sampling", "hierarchical_softmax"}
    negatives : int, default 5
        Negatives per centre (negative sampling only), drawn from the visit counts raised to 0.75 and shared by
        all context nodes of the centre's window.
    epochs : int, default 1
    seed : int, default 0
        In ``[0, 2**64)``; seeds the initial vectors and every random draw.
    threads : int, optional
        numba threads (default: numba's current setting). With 1 the result is bit-identical across runs;
        with more, threads update the shared vectors without locks and the result depends on timing.
    learning_rate, min_learning_rate : float
        The rate decays linearly from ``learning_rate`` (at most ``LEARNING_RATE_MAX``) to ``min_learning_rate``
        over all tokens of all epochs.
    subsample : float, default 0
        Subsampling threshold ``t`` of frequent nodes (Mikolov et al. 2013): a visit of a node of frequency ``f`` is
        kept with probability ``min(1, sqrt(t / f))`` before windows are formed. 0 keeps every visit; 1e-3 to 1e-5
        are the usual values for words (common practice). At most 1 (``SUBSAMPLE_RANGE``).
    init : ndarray of float, shape (n_nodes, dim), or tuple (rows, vectors), optional
        Warm start: the initial input vectors. A full matrix replaces the random start; a pair gives the start of
        nodes ``rows`` (distinct ints, shape (m,)) as ``vectors`` (shape (m, dim)) while every other node starts
        random as usual. Output vectors start at zero either way.
    memmap_dir : str or Path, optional
        Keep both weight matrices in files of this folder (``np.memmap``; created if missing) rather than in
        memory, for graphs whose matrices do not fit. The files are unlinked at once: their space is freed when the
        returned array is.
    counts : array_like of int, shape (n_nodes,), optional
        Visit count of every node in the walks (per epoch). Builds the Huffman tree (hierarchical softmax) or the
        negative distribution, the subsampling probabilities, and gives the token total of the learning-rate
        schedule.
    chunk_walks : int, default 65536
        Walks per kernel call; larger chunks are cut (the result does not depend on it).

    Returns
    -------
    ndarray of float32, shape (n_nodes, dim)
        The input vectors (an ``np.memmap`` with ``memmap_dir``). Nodes that no walk visits keep their start.

    Raises
    ------
    ConfigError
        A parameter is out of range (the message names it and echoes the value), the walks hold a value outside
        ``-1..n_nodes-1`` or no node at all, or a one-shot iterator comes without ``counts`` or with ``epochs > 1``.
    """
    n_nodes = _check_int("n_nodes", n_nodes, 1)
    dim = _check_int("dim", dim, *DIM_RANGE)
    window = _check_int("window", window, WINDOW_MIN)
    if objective not in OBJECTIVES:
        raise ConfigError(f"objective must be one of {', '.join(map(repr, OBJECTIVES))}, got {objective!r}")
    hs = objective == "hierarchical_softmax"
    negatives = 0 if hs else _check_int("negatives", negatives, NEGATIVES_MIN)
    epochs = _check_int("epochs", epochs, EPOCHS_MIN)
    seed = _check_int("seed", seed, 0, SEED_MAX)
    threads = numba.get_num_threads() if threads is None else _check_int("threads", threads, THREADS_MIN,
                                                                         max_threads())
    learning_rate = _check_rate("learning_rate", learning_rate, 0.0, strict=True, maximum=LEARNING_RATE_MAX)
    min_learning_rate = _check_rate("min_learning_rate", min_learning_rate, 0.0, strict=False)
    if min_learning_rate > learning_rate:
        raise ConfigError(f"min_learning_rate must be <= learning_rate={learning_rate!r}, got {min_learning_rate!r}")
    subsample = _check_rate("subsample", subsample, SUBSAMPLE_RANGE[0], strict=False, maximum=SUBSAMPLE_RANGE[1])
    warm = _check_init(init, n_nodes, dim)
    memmap_dir = _check_memmap_dir(memmap_dir)
    chunk_walks = _check_int("chunk_walks", chunk_walks, 1)
    if _is_one_shot(walks) and epochs > 1:
        raise ConfigError(f"walks is a one-shot iterator, which cannot be read again for epochs={epochs}; "
                          "pass a re-iterable corpus")

    counts = _resolve_counts(walks, n_nodes, counts, chunk_walks)
    n_tokens = int(counts.sum())
    if n_tokens == 0:
        raise ConfigError("walks hold no node visits (counts sum to 0): nothing to train on")
    if hs:
        tree = build_huffman(counts)
        points, codes, lengths = tree.points, tree.codes, tree.lengths
        thresh, alias = np.zeros(1, np.uint64), np.zeros(1, np.int32)
        n_out, max_tgt = max(n_nodes - 1, 1), max(tree.max_len, 1)
    else:
        thresh, alias = alias_table(counts.astype(np.float64) ** 0.75)
        points, codes, lengths = np.zeros((1, 1), np.int32), np.zeros((1, 1), np.uint8), np.zeros(1, np.int32)
        n_out, max_tgt = n_nodes, negatives + 1
    tables = (hs, points, codes, lengths, thresh, alias, keep_thresholds(counts, subsample), sigmoid_table())
    rates = (learning_rate, min_learning_rate, float(epochs) * n_tokens)
    # One extra zero row in each matrix: the padding row of the kernels' 2 x 2 tiles (it stays zero).
    emb_in = _weight_matrix((n_nodes + 1, dim), memmap_dir, "input")
    vectors_in = emb_in[:n_nodes]
    if warm is None or warm[0] is not None:
        initial_vectors(n_nodes, dim, seed, out=vectors_in)
    if warm is not None:
        rows, vectors = warm
        if rows is None:
            vectors_in[:] = vectors
        else:
            vectors_in[rows] = vectors
    emb_out = _weight_matrix((n_out + 1, dim), memmap_dir, "output")
    kernel = _train_serial_kernel if threads == 1 else _train_parallel_kernel

    previous = numba.get_num_threads()
    numba.set_num_threads(threads)
    try:
        progress.report("train", 0, epochs * n_tokens)  # opens the pass, so the first chunk shows a rate
        for epoch in range(epochs):
            key = np.uint64(stream_key(seed, epoch))
            walk0, tok0 = 0, epoch * n_tokens
            with _ChunkReader(walks, chunk_walks, n_nodes) as reader:
                for tokens, starts, n_rows in reader:
                    longest = int(np.diff(starts).max()) if n_rows else 0
                    if longest >= 2:
                        sizes = (longest, min(2 * window, longest - 1), max_tgt, negatives, threads)
                        kernel(tokens, starts, np.int64(walk0), np.int64(tok0), key, emb_in, emb_out, tables,
                               window, rates, sizes)
                    walk0 += n_rows
                    tok0 += int(starts[-1])
                    progress.report("train", tok0, epochs * n_tokens)
            if epoch == 0 and tok0 != n_tokens:
                warnings.warn(f"counts sum to {n_tokens} but the walks hold {tok0} node visits; the learning-rate "
                              "schedule and the sampling tables follow counts", stacklevel=2)
    finally:
        numba.set_num_threads(previous)
    return vectors_in
