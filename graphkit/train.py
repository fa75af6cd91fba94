"""Skip-gram training of node vectors on a walk corpus (the learning step of DeepWalk, Perozzi et al. 2014).

The model is word2vec's skip-gram (Mikolov et al. 2013) with either objective: negative sampling from the unigram
distribution raised to 0.75, or the hierarchical softmax over the Huffman tree of the visit counts.

Kernel layout (Ji, Shah, Willke et al. 2016, "Parallelizing Word2Vec in Shared and Distributed Memory"): for each
centre position the context nodes of its window are the *inputs* and the centre's targets are the *outputs*: the
centre itself plus ``negatives`` negatives drawn once per centre and shared by all its context nodes (negative
sampling), or the inner nodes on the centre's Huffman path with labels ``1 - code`` (hierarchical softmax). The small
matrix of dot products between the two sets gives the gradients ``g = (label - sigmoid(dot)) * lr``; both sets are
then updated from the values they had before the step. Threads share the two matrices without locks (Hogwild,
Recht et al. 2011), each one taking whole walks.

Exact definition of the random streams (all arithmetic modulo 2**64; ``mix`` and ``G`` as in :mod:`graphkit.walks`):

* epoch key ``key = mix(mix(seed ^ TRAIN_SALT) + epoch)``; walk ``w`` (global row number in the corpus, counting
  empty rows) starts from ``s = mix(key ^ w)``; every draw is ``s += G; r = mix(s)``.
* per centre, in walk order: one draw for the window, ``b = 1 + ((r >> 32) * window >> 32)``; then, for negative
  sampling, ``negatives`` draws from the alias table: bucket ``i = (r >> 32) * n_nodes >> 32``, kept when
  ``(r & 0xFFFFFFFF) < threshold[i]``, else ``alias[i]``. A negative equal to the centre is dropped (as word2vec
  does), so a centre can have fewer. Walks of fewer than two nodes have no pairs and are skipped.
* the learning rate of the centre at global position ``t`` (over all epochs, padding excluded) is
  ``max(min_lr, lr - (lr - min_lr) * t / (epochs * n_tokens))``, computed in float64 and rounded to float32.

With ``threads=1`` the result is bit-identical across runs and independent of how the walks are cut into chunks.
"""

from __future__ import annotations

import numbers
import operator
import warnings
from collections.abc import Iterable, Iterator

import numba
import numpy as np
from llvmlite import ir
from numba import types
from numba.core import cgutils
from numba.extending import intrinsic

from .errors import ConfigError
from .huffman import build_huffman

__all__ = ["train_vectors", "alias_table", "initial_vectors", "stream_key", "OBJECTIVES", "TRAIN_SALT"]

OBJECTIVES = ("negative_sampling", "hierarchical_softmax")
#: Salt that keeps the training streams apart from the walk streams of the same seed.
TRAIN_SALT = 0xD1B54A32D192ED03
#: Salt of the seed sequence of the initial input vectors.
INIT_SALT = 0x2545F491

_G = np.uint64(0x9E3779B97F4A7C15)
_M1 = np.uint64(0xBF58476D1CE4E5B9)
_M2 = np.uint64(0x94D049BB133111EB)
_S27 = np.uint64(27)
_S30 = np.uint64(30)
_S31 = np.uint64(31)
_S32 = np.uint64(32)
_LOW32 = np.uint64(0xFFFFFFFF)
_MASK64 = (1 << 64) - 1
#: Dot products are clipped to +-_MAX_DOT before the sigmoid: exp() then never overflows (fastmath assumes finite
#: values), and the gradient lost beyond it is below 0.25 % of the learning rate.
_MAX_DOT = np.float32(6.0)
#: Walks per parallel task: large enough to amortise the scratch allocation, small enough to balance two threads.
_BLOCK = 64


# ---------------------------------------------------------------------------------------------------- numba kernels
@numba.njit(cache=True, nogil=True, inline="always")
def _mix_kernel(z):
    """splitmix64 output function of a uint64."""
    z = (z ^ (z >> _S30)) * _M1
    z = (z ^ (z >> _S27)) * _M2
    return z ^ (z >> _S31)


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


# fastmath here only (it lets LLVM vectorise the dot-product reductions): on the planted-partition quality benchmark
# of tests/test_train.py it was 2.3x faster for negative sampling and 1.7-2.5x for the hierarchical softmax, with the
# same Micro-F1 (0.9497/0.9498 with it, 0.9501/0.9500 without, two seeds; HS 0.9244/0.9216 vs 0.9233/0.9227).
@numba.njit(cache=True, nogil=True, fastmath=True)
def _sgd_step_kernel(emb_in, emb_out, ctx, n_ctx, tgt, lab, n_tgt, lr, grad, d_in):
    """One skip-gram step of a centre: ``n_ctx`` input rows against ``n_tgt`` output rows.

    emb_in float32 [n_nodes, dim] and emb_out float32 [n_out, dim] are updated in place (rows ``ctx[:n_ctx]`` and
    ``tgt[:n_tgt]``); ctx int32 and tgt int32 hold row numbers, lab float32 [n_tgt] the labels (1 or 0), lr is
    float32. grad float32 [>= n_ctx, >= n_tgt] and d_in float32 [>= n_ctx, dim] are scratch. Both sets of rows are
    updated from their values before the step; a row listed twice gets both updates.
    """
    dim = emb_in.shape[1]
    one = np.float32(1.0)
    for k in range(n_ctx):
        ci = ctx[k]
        for t in range(n_tgt):
            ti = tgt[t]
            dot = np.float32(0.0)
            for d in range(dim):
                dot += emb_in[ci, d] * emb_out[ti, d]
            dot = min(max(dot, -_MAX_DOT), _MAX_DOT)
            grad[k, t] = (lab[t] - one / (one + np.exp(-dot))) * lr
    for k in range(n_ctx):
        for d in range(dim):
            d_in[k, d] = np.float32(0.0)
        for t in range(n_tgt):
            g = grad[k, t]
            ti = tgt[t]
            for d in range(dim):
                d_in[k, d] += g * emb_out[ti, d]
    for t in range(n_tgt):
        ti = tgt[t]
        for k in range(n_ctx):
            g = grad[k, t]
            ci = ctx[k]
            for d in range(dim):
                emb_out[ti, d] += g * emb_in[ci, d]
    for k in range(n_ctx):
        ci = ctx[k]
        for d in range(dim):
            emb_in[ci, d] += d_in[k, d]


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


@numba.njit(cache=True, nogil=True)
def _train_walks_kernel(tokens, starts, w_lo, w_hi, walk0, tok0, key, emb_in, emb_out, points, codes, lengths,
                        thresh, alias, hs, window, lr0, lr_min, total_work, ctx, tgt, lab, grad, d_in, negs):
    """Train on walks ``w_lo..w_hi-1`` of a chunk, one after the other, on the calling thread.

    tokens int32 [n_tok] are the chunk's node visits without padding, walk ``w`` being
    ``tokens[starts[w]:starts[w + 1]]`` (starts int64 [n_walks + 1]); walk0 is the global number of the chunk's first
    walk and tok0 the global position of its first token. emb_in/emb_out float32 are updated in place. HS tables:
    points int32 [n_nodes, max_len], codes uint8 [n_nodes, max_len], lengths int32 [n_nodes]; NS tables: thresh uint64
    [n_nodes], alias int32 [n_nodes]; the unused ones may be dummies. ctx, tgt, lab, grad, d_in: scratch as for
    ``_sgd_step_kernel`` (ctx holds min(2 * window, longest walk - 1) entries); negs int64 [2, negatives] (NS; [2, 0]
    for HS) holds the negatives of the current and the next centre, drawn one centre ahead to prefetch their rows.
    """
    win = np.uint64(window)
    for w in range(w_lo, w_hi):
        a = starts[w]
        n = starts[w + 1] - a
        if n < 2:
            continue
        s, r = _draw_kernel(_mix_kernel(key ^ np.uint64(walk0 + w)))
        b_next = 1 + np.int64(((r >> _S32) * win) >> _S32)
        s = _draw_negatives_kernel(s, thresh, alias, negs[0])
        for i in range(n):
            b, cur = b_next, negs[i & 1]
            if i + 1 < n:  # the next centre's draws, in stream order, and its rows on their way into the cache
                s, r = _draw_kernel(s)
                b_next = 1 + np.int64(((r >> _S32) * win) >> _S32)
                s = _draw_negatives_kernel(s, thresh, alias, negs[(i + 1) & 1])
                nxt = tokens[a + i + 1]
                if hs:
                    for lvl in range(lengths[nxt]):
                        _prefetch_row_kernel(emb_out, points[nxt, lvl])
                else:
                    _prefetch_row_kernel(emb_out, nxt)
                    for q in range(negs.shape[1]):
                        _prefetch_row_kernel(emb_out, negs[(i + 1) & 1, q])
                if i + 1 + window < n:
                    _prefetch_row_kernel(emb_in, tokens[a + i + 1 + window])
            n_ctx = 0
            for j in range(max(0, i - b), min(n, i + b + 1)):
                if j != i:
                    ctx[n_ctx] = tokens[a + j]
                    n_ctx += 1
            c = tokens[a + i]
            if hs:
                n_tgt = lengths[c]
                for lvl in range(n_tgt):
                    tgt[lvl] = points[c, lvl]
                    lab[lvl] = np.float32(1 - codes[c, lvl])
            else:
                tgt[0], lab[0], n_tgt = c, np.float32(1.0), 1
                for q in range(cur.shape[0]):
                    if cur[q] != c:  # word2vec drops a negative that hits the centre
                        tgt[n_tgt], lab[n_tgt] = cur[q], np.float32(0.0)
                        n_tgt += 1
            frac = min(np.float64(tok0 + a + i) / total_work, 1.0)
            lr = np.float32(max(lr_min, lr0 - (lr0 - lr_min) * frac))
            _sgd_step_kernel(emb_in, emb_out, ctx, n_ctx, tgt, lab, n_tgt, lr, grad, d_in)


@numba.njit(cache=True, nogil=True)
def _train_serial_kernel(tokens, starts, walk0, tok0, key, emb_in, emb_out, points, codes, lengths, thresh, alias,
                         hs, negatives, window, lr0, lr_min, total_work, max_ctx, max_tgt):
    """All walks of a chunk in order on the calling thread (arguments as for ``_train_walks_kernel``; max_ctx and
    max_tgt size the scratch). Updates emb_in and emb_out in place."""
    dim = emb_in.shape[1]
    ctx = np.empty(max_ctx, dtype=np.int32)
    tgt = np.empty(max_tgt, dtype=np.int32)
    lab = np.empty(max_tgt, dtype=np.float32)
    grad = np.empty((max_ctx, max_tgt), dtype=np.float32)
    d_in = np.empty((max_ctx, dim), dtype=np.float32)
    negs = np.empty((2, negatives), dtype=np.int64)
    _train_walks_kernel(tokens, starts, 0, starts.shape[0] - 1, walk0, tok0, key, emb_in, emb_out, points, codes,
                        lengths, thresh, alias, hs, window, lr0, lr_min, total_work, ctx, tgt, lab, grad, d_in, negs)


@numba.njit(cache=True, nogil=True, parallel=True)
def _train_parallel_kernel(tokens, starts, walk0, tok0, key, emb_in, emb_out, points, codes, lengths, thresh, alias,
                           hs, negatives, window, lr0, lr_min, total_work, max_ctx, max_tgt):
    """Same as ``_train_serial_kernel`` with blocks of walks spread over numba's threads, updating the shared
    matrices without locks (Hogwild): the result then depends on thread timing."""
    n_walks = starts.shape[0] - 1
    dim = emb_in.shape[1]
    for blk in numba.prange((n_walks + _BLOCK - 1) // _BLOCK):
        ctx = np.empty(max_ctx, dtype=np.int32)
        tgt = np.empty(max_tgt, dtype=np.int32)
        lab = np.empty(max_tgt, dtype=np.float32)
        grad = np.empty((max_ctx, max_tgt), dtype=np.float32)
        d_in = np.empty((max_ctx, dim), dtype=np.float32)
        negs = np.empty((2, negatives), dtype=np.int64)
        _train_walks_kernel(tokens, starts, blk * _BLOCK, min(n_walks, (blk + 1) * _BLOCK), walk0, tok0, key,
                            emb_in, emb_out, points, codes, lengths, thresh, alias, hs, window, lr0, lr_min,
                            total_work, ctx, tgt, lab, grad, d_in, negs)


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


def initial_vectors(n_nodes: int, dim: int, seed: int) -> np.ndarray:
    """word2vec's start: input vectors uniform in [-0.5/dim, 0.5/dim), float32 [n_nodes, dim], from ``seed``."""
    rng = np.random.default_rng([seed, INIT_SALT])
    emb = np.empty((n_nodes, dim), dtype=np.float32)
    rng.random(out=emb, dtype=np.float32)
    emb -= np.float32(0.5)
    emb /= np.float32(dim)
    return emb


def _check_int(name, value, minimum, maximum=None) -> int:
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, numbers.Integral):
        raise ConfigError(f"{name} must be an integer, got {value!r}")
    value = operator.index(value)
    if value < minimum:
        raise ConfigError(f"{name} must be >= {minimum}, got {value!r}")
    if maximum is not None and value > maximum:
        raise ConfigError(f"{name} must be <= {maximum}, got {value!r}")
    return value


def _check_rate(name, value, minimum, strict) -> float:
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, numbers.Real):
        raise ConfigError(f"{name} must be a number, got {value!r}")
    value = float(value)
    if not np.isfinite(value) or value < minimum or (strict and value == minimum):
        raise ConfigError(f"{name} must be {'>' if strict else '>='} {minimum} and finite, got {value!r}")
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


# ---------------------------------------------------------------------------------------------------- driver
def train_vectors(walks, n_nodes, dim=128, window=5, objective="negative_sampling", negatives=5, epochs=1, seed=0,
                  threads=None, *, learning_rate=0.025, min_learning_rate=0.0001, counts=None,
                  chunk_walks=65536) -> np.ndarray:
    """Train skip-gram node vectors on random walks, chunk by chunk.

    Parameters
    ----------
    walks : ndarray of int, shape (n_walks, length), or iterable of such chunks
        Node indices in ``0..n_nodes-1``; ``-1`` entries (padding after a walk stopped) are skipped. A re-iterable
        (a list of arrays, :class:`graphkit.corpus.WalkCorpus`) is read once per epoch, plus once before training to
        count visits unless it has ``visit_counts()`` or ``counts`` is given. A one-shot iterator needs ``counts``
        and ``epochs=1``. Chunks are never concatenated.
    n_nodes : int
        Number of nodes (rows of the result), ``>= 1``.
    dim : int, default 128
    window : int, default 5
        Largest distance between a centre and a context node; every centre draws its own window size uniformly
        in ``1..window`` (word2vec's dynamic window).
    objective : {"negative_sampling", "hierarchical_softmax"}
    negatives : int, default 5
        Negatives per centre (negative sampling only), drawn from the visit counts raised to 0.75.
    epochs : int, default 1
    seed : int, default 0
        In ``[0, 2**64)``; seeds the initial vectors and every random draw.
    threads : int, optional
        numba threads (default: numba's current setting). With 1 the result is bit-identical across runs;
        with more, threads update the shared vectors without locks and the result depends on timing.
    learning_rate, min_learning_rate : float
        The rate decays linearly from ``learning_rate`` to ``min_learning_rate`` over ``epochs`` passes.
    counts : array_like of int, shape (n_nodes,), optional
        Visit count of every node in the walks (per epoch). Builds the Huffman tree (hierarchical softmax) or the
        negative distribution, and gives the token total of the learning-rate schedule.
    chunk_walks : int, default 65536
        Walks per kernel call; larger chunks are cut (the result does not depend on it).

    Returns
    -------
    ndarray of float32, shape (n_nodes, dim)
        The input vectors. Nodes that no walk visits keep their random start.

    Raises
    ------
    ConfigError
        A parameter is out of range (the message names it and echoes the value), the walks hold a value outside
        ``-1..n_nodes-1`` or no node at all, or a one-shot iterator comes without ``counts`` or with ``epochs > 1``.
    """
    n_nodes = _check_int("n_nodes", n_nodes, 1)
    dim = _check_int("dim", dim, 1)
    window = _check_int("window", window, 1)
    if objective not in OBJECTIVES:
        raise ConfigError(f"objective must be one of {', '.join(map(repr, OBJECTIVES))}, got {objective!r}")
    hs = objective == "hierarchical_softmax"
    negatives = 0 if hs else _check_int("negatives", negatives, 1)
    epochs = _check_int("epochs", epochs, 1)
    seed = _check_int("seed", seed, 0, _MASK64)
    threads = numba.get_num_threads() if threads is None else _check_int("threads", threads, 1,
                                                                         numba.config.NUMBA_NUM_THREADS)
    learning_rate = _check_rate("learning_rate", learning_rate, 0.0, strict=True)
    min_learning_rate = _check_rate("min_learning_rate", min_learning_rate, 0.0, strict=False)
    if min_learning_rate > learning_rate:
        raise ConfigError(f"min_learning_rate must be <= learning_rate={learning_rate!r}, got {min_learning_rate!r}")
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
        emb_out = np.zeros((max(n_nodes - 1, 1), dim), dtype=np.float32)
        max_tgt = max(tree.max_len, 1)
    else:
        thresh, alias = alias_table(counts.astype(np.float64) ** 0.75)
        points, codes, lengths = np.zeros((1, 1), np.int32), np.zeros((1, 1), np.uint8), np.zeros(1, np.int32)
        emb_out = np.zeros((n_nodes, dim), dtype=np.float32)
        max_tgt = negatives + 1
    emb_in = initial_vectors(n_nodes, dim, seed)
    total_work = float(epochs) * n_tokens
    kernel = _train_serial_kernel if threads == 1 else _train_parallel_kernel

    previous = numba.get_num_threads()
    numba.set_num_threads(threads)
    try:
        for epoch in range(epochs):
            key = np.uint64(stream_key(seed, epoch))
            walk0, tok0 = 0, epoch * n_tokens
            for chunk in _chunks(walks, chunk_walks):
                tokens, starts = _compact(chunk, n_nodes)
                longest = int(np.diff(starts).max()) if chunk.shape[0] else 0
                if longest >= 2:
                    kernel(tokens, starts, np.int64(walk0), np.int64(tok0), key, emb_in, emb_out, points, codes,
                           lengths, thresh, alias, hs, negatives, window, learning_rate, min_learning_rate,
                           total_work, min(2 * window, longest - 1), max_tgt)
                walk0 += chunk.shape[0]
                tok0 += int(starts[-1])
            if epoch == 0 and tok0 != n_tokens:
                warnings.warn(f"counts sum to {n_tokens} but the walks hold {tok0} node visits; the learning-rate "
                              "schedule and the sampling tables follow counts", stacklevel=2)
    finally:
        numba.set_num_threads(previous)
    return emb_in
