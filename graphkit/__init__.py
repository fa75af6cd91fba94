"""graphkit: nightly node embeddings for large relationship graphs.

Notebook entry points: :class:`AdjacencyArrays`, :func:`random_walks`, :func:`train_vectors`, :func:`connect`.
Heavy modules (numba kernels, DuckDB) load on first use.
"""

from __future__ import annotations

from importlib import import_module

from .errors import ConfigError, EdgeTableError, GraphDataWarning, InputError, StoreError
from .graph import AdjacencyArrays

__all__ = ["AdjacencyArrays", "random_walks", "train_vectors", "connect", "load_config", "refresh",
           "ConfigError", "EdgeTableError", "GraphDataWarning", "InputError", "StoreError"]

_LAZY = {"random_walks": ".walks", "train_vectors": ".train", "connect": ".store", "load_config": ".config",
         "refresh": ".pipeline"}


def __getattr__(name):
    if name in _LAZY:
        return getattr(import_module(_LAZY[name], __name__), name)
    raise AttributeError(f"module 'graphkit' has no attribute {name!r}")
