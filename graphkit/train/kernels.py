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

import numba
import numpy as np

from ..prefetch import prefetch
from ..rng import G as _G, LOW32 as _LOW32, S32 as _S32, mix_kernel as _mix_kernel

#: Dot products are clipped to +-_MAX_DOT before the sigmoid (the table's range): the gradient lost beyond it is
#: below 0.25 % of the learning rate.
_MAX_DOT = np.float32(6.0)
MAX_DOT = _MAX_DOT
#: Walks per block; threads take blocks in turn (see ``_train_parallel_kernel``), so blocks are kept small.
_BLOCK = 64


# ---------------------------------------------------------------------------------------------------- numba kernels
@numba.njit(cache=True, nogil=True, inline="always")
def _draw_kernel(s):
    """Advance stream ``s`` (uint64); returns (new state, 64 random bits)."""
    s = s + _G
    return s, _mix_kernel(s)




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
        prefetch(emb, (row, d))


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
