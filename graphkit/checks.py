"""Parameter checks shared by the drivers: they raise ConfigError naming the parameter and echoing the value."""

from __future__ import annotations

import numbers
import operator

import numpy as np

from .errors import ConfigError

__all__ = ["check_int", "max_threads", "SEED_MAX", "PER_NODE_MIN", "LENGTH_MIN", "P_Q_RANGE", "DIM_RANGE",
           "WINDOW_MIN", "NEGATIVES_MIN", "EPOCHS_MIN", "MIN_LEARNING_RATE", "LEARNING_RATE_MAX",
           "SUBSAMPLE_RANGE", "THREADS_MIN", "NEIGHBOURS_MIN"]


def check_int(name, value, minimum, maximum=None) -> int:
    """Return ``value`` as a Python int, or raise ConfigError naming ``name`` and echoing the value."""
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, numbers.Integral):
        raise ConfigError(f"{name} must be an integer, got {value!r}")
    value = operator.index(value)
    if value < minimum:
        raise ConfigError(f"{name} must be >= {minimum}, got {value!r}")
    if maximum is not None and value > maximum:
        raise ConfigError(f"{name} must be <= {maximum}, got {value!r}")
    return value

# ---------------------------------------------------------------------------------------------------- bounds
# The one source of every parameter bound: the drivers (walks.py, train.py) check them, and the config's pydantic
# types (config.py) are built from them, so a config the drivers would refuse is refused at load time.

#: Seeds of the counter-based random streams: any unsigned 64-bit integer.
SEED_MAX = (1 << 64) - 1
#: Walks started from every node, and nodes per walk (a walk needs a start and one step).
PER_NODE_MIN = 1
LENGTH_MIN = 2
#: Range of the node2vec return and in-out parameters: outside it one acceptance ratio exceeds 1e6, so a step
#: would need about a million draws.
P_Q_RANGE = (1e-3, 1e3)
#: Vector dimension, context window, negative samples, epochs.
DIM_RANGE = (1, 4096)
WINDOW_MIN = 1
NEGATIVES_MIN = 1
EPOCHS_MIN = 1
#: The learning rate decays linearly to ``MIN_LEARNING_RATE``; the starting rate lies in
#: ``[MIN_LEARNING_RATE, LEARNING_RATE_MAX]``.
MIN_LEARNING_RATE = 0.0001
LEARNING_RATE_MAX = 1.0
#: Subsampling threshold: 0 keeps every visit; at 1 or more no node is ever dropped.
SUBSAMPLE_RANGE = (0.0, 1.0)
#: Training and walk threads, at least 1 and at most numba's thread pool (:func:`max_threads`).
THREADS_MIN = 1
#: Neighbours per node of `graphkit neighbours --top` and `[store] neighbours`.
NEIGHBOURS_MIN = 1


def max_threads() -> int:
    """The most threads a numba kernel can use here (``NUMBA_NUM_THREADS``, by default the cores)."""
    import numba

    return int(numba.config.NUMBA_NUM_THREADS)
