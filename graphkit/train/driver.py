"""The training driver :func:`train_vectors`: validates, builds the tables, allocates the matrices and runs the
kernels over the feeder's chunks."""

from __future__ import annotations

import numbers
import os
import tempfile
import warnings
from pathlib import Path

import numba
import numpy as np

from .. import progress
from ..checks import (DIM_RANGE, EPOCHS_MIN, LEARNING_RATE_MAX, MIN_LEARNING_RATE, NEGATIVES_MIN, SEED_MAX,
                      SUBSAMPLE_RANGE, THREADS_MIN, WINDOW_MIN, max_threads)
from ..checks import check_int as _check_int
from ..errors import ConfigError
from ..huffman import build_huffman
from .feeder import ChunkReader, is_one_shot, resolve_counts
from .kernels import _train_parallel_kernel, _train_serial_kernel
from .tables import alias_table, initial_vectors, keep_thresholds, sigmoid_table, stream_key

__all__ = ["train_vectors", "OBJECTIVES"]

OBJECTIVES = ("negative_sampling", "hierarchical_softmax")


def _check_rate(name, value, minimum, strict, maximum=None) -> float:
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, numbers.Real):
        raise ConfigError(f"{name} must be a number, got {value!r}")
    value = float(value)
    if not np.isfinite(value) or value < minimum or (strict and value == minimum):
        raise ConfigError(f"{name} must be {'>' if strict else '>='} {minimum} and finite, got {value!r}")
    if maximum is not None and value > maximum:
        raise ConfigError(f"{name} must be <= {maximum}, got {value!r}")
    return value


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
    if is_one_shot(walks) and epochs > 1:
        raise ConfigError(f"walks is a one-shot iterator, which cannot be read again for epochs={epochs}; "
                          "pass a re-iterable corpus")

    counts = resolve_counts(walks, n_nodes, counts, chunk_walks)
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
            with ChunkReader(walks, chunk_walks, n_nodes) as reader:
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
