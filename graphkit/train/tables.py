"""What the training kernels read besides the walks: the random-stream key of an epoch, the negative-sampling alias
table, the sigmoid table, the subsampling thresholds and the initial input vectors (definitions in
:mod:`graphkit.train.kernels`)."""

from __future__ import annotations

import numpy as np

from ..alias import alias_table_kernel
from ..rng import LOW32, S32
from .kernels import MAX_DOT as _MAX_DOT

__all__ = ["stream_key", "alias_table", "sigmoid_table", "keep_thresholds", "initial_vectors", "TRAIN_SALT",
           "INIT_SALT", "SIG_POINTS"]

#: Salt that keeps the training streams apart from the walk streams of the same seed.
TRAIN_SALT = 0xD1B54A32D192ED03
#: Salt of the seed sequence of the initial input vectors.
INIT_SALT = 0x2545F491

_MASK64 = (1 << 64) - 1
#: Points of the sigmoid table over [-_MAX_DOT, _MAX_DOT] (interpolated: at most 2e-6 from the exact function).
SIG_POINTS = 1024


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

    Built by the kernel of the walks' per-node tables (:mod:`graphkit.alias`), over one segment of all nodes.

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
    w = np.ascontiguousarray(weights, dtype=np.float64)
    n = w.shape[0]
    # One segment over all nodes for the shared kernel (graphkit.alias): u_i = w_i * n / sum(w).
    table = np.empty(n, dtype=np.uint64)
    alias_table_kernel(np.array([0, n], dtype=np.int64), w, table, np.empty(n, np.float64), np.empty(n, np.int64),
                       np.empty(n, np.int64))
    alias = (table & LOW32).astype(np.int32)
    thresh = table >> S32
    # A full column is exactly one whose alias is itself: keep it always (2**32), as the kernels' coin expects.
    thresh[alias == np.arange(n, dtype=np.int32)] = np.uint64(1 << 32)
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
