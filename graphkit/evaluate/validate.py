"""Argument checks shared by the holdout, the measures and the alignment: seeds, ratios, vector matrices, node
pairs, two versions' shared rows."""

from __future__ import annotations

import numbers

import numpy as np

from ..checks import check_int as _check_int
from ..errors import ConfigError

_MAX_SEED = (1 << 64) - 1
#: Largest number of float32 values held at once by a block-wise pass (64 MB): the finiteness check here and the
#: neighbour search of the drift measure.
_BLOCK_ELEMS = 1 << 24


def _check_seed(seed) -> int:
    return _check_int("seed", seed, 0, _MAX_SEED)


def _check_ratio(name, value) -> float:
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, numbers.Real) or not 0.0 < value < 1.0:
        raise ConfigError(f"{name} must be a number strictly between 0 and 1, got {value!r}")
    return float(value)


def _check_vectors(name, vectors) -> np.ndarray:
    x = np.asarray(vectors)
    if x.ndim != 2 or x.shape[0] == 0 or x.shape[1] == 0:
        raise ConfigError(f"{name} must be a non-empty 2-D array [n_nodes, dim], got shape {x.shape}")
    if x.dtype.kind != "f":
        raise ConfigError(f"{name} must hold floats, got dtype {x.dtype}")
    step = max(1, _BLOCK_ELEMS // x.shape[1])  # row blocks: no full-size mask, a memory map is read, not copied
    bad = sum(int(np.count_nonzero(~np.isfinite(x[a:a + step]))) for a in range(0, x.shape[0], step))
    if bad:
        raise ConfigError(f"{name} holds {bad} NaN or infinite values")
    return x


def _check_pairs(name, pairs, n_rows) -> np.ndarray:
    p = np.asarray(pairs)
    if p.ndim != 2 or p.shape[1] != 2:
        raise ConfigError(f"{name} must be an integer array of shape [n_pairs, 2], got shape {p.shape}")
    if p.dtype.kind not in "iu":
        raise ConfigError(f"{name} must hold integer node indices, got dtype {p.dtype}")
    if p.size and (p.min() < 0 or p.max() >= n_rows):
        raise ConfigError(f"{name} must hold node indices in [0, {n_rows}), got values in [{p.min()}, {p.max()}]")
    return p.astype(np.int64, copy=False)


def _sklearn_seed(rng) -> int:
    """A seed for scikit-learn's ``random_state`` (which takes 32-bit values), drawn from our own stream."""
    return int(rng.integers(0, 2**31 - 1))


def _check_shared(prev, cur, cur_rows=None):
    """Both matrices as arrays (no copy; memory maps stay maps) and ``cur_rows`` as int64, shapes checked; the
    values are checked for NaN block by block where they are read."""
    prev, cur = np.asarray(prev), np.asarray(cur)
    for name, x in (("prev", prev), ("cur", cur)):
        if x.ndim != 2 or x.shape[0] == 0 or x.shape[1] == 0:
            raise ConfigError(f"{name} must be a non-empty 2-D array [n_nodes, dim], got shape {x.shape}")
        if x.dtype.kind != "f":
            raise ConfigError(f"{name} must hold floats, got dtype {x.dtype}")
    if cur_rows is not None:
        cur_rows = np.asarray(cur_rows)
        if cur_rows.ndim != 1 or cur_rows.dtype.kind not in "iu":
            raise ConfigError(f"cur_rows must be a 1-D array of row numbers, got shape {cur_rows.shape} "
                              f"dtype {cur_rows.dtype}")
        cur_rows = cur_rows.astype(np.int64, copy=False)
        if cur_rows.size and (cur_rows.min() < 0 or cur_rows.max() >= cur.shape[0]):
            raise ConfigError(f"cur_rows must lie in 0..{cur.shape[0] - 1}")
    n_cur = cur.shape[0] if cur_rows is None else cur_rows.size
    if prev.shape[0] != n_cur:
        raise ConfigError(f"prev and cur must hold the same shared nodes (rows), "
                          f"got {prev.shape[0]} and {n_cur}")
    return prev, cur, cur_rows
