"""Compressed sparse row graph: the in-memory (or memory-mapped) form every later stage reads."""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .errors import ConfigError
from .io import atomic_output, write_json_atomic

__all__ = ["AdjacencyArrays"]

_META = "graph.json"


@dataclass(frozen=True, eq=False)
class AdjacencyArrays:
    """A graph over dense node indices ``0..n_nodes-1`` in compressed sparse row form.

    The out-neighbours of node ``v`` are ``indices[indptr[v]:indptr[v + 1]]``, sorted ascending, with the matching
    edge weights in ``weights`` (``None`` means every edge weighs 1). An undirected graph stores each edge in both
    directions.

    Attributes
    ----------
    indptr : ndarray of int64, shape (n_nodes + 1,)
    indices : ndarray of int32, shape (n_edges,)
    weights : ndarray of float32, shape (n_edges,), or None
    directed : bool
    """

    indptr: np.ndarray
    indices: np.ndarray
    weights: np.ndarray | None = None
    directed: bool = False

    # ------------------------------------------------------------------ construction
    @classmethod
    def from_arrays(cls, indptr, indices, weights=None, *, directed=False, validate=True) -> "AdjacencyArrays":
        """Wrap existing CSR arrays, fixing dtypes (a copy only when the dtype or layout differs).

        Parameters
        ----------
        indptr : array_like of int, shape (n_nodes + 1,)
        indices : array_like of int, shape (n_edges,)
        weights : array_like of float, shape (n_edges,), optional
        directed : bool, default False
        validate : bool, default True
            Check the invariants the walk and training kernels rely on (see :meth:`validate`).
        """
        indptr = np.ascontiguousarray(indptr, dtype=np.int64)
        indices = np.ascontiguousarray(indices, dtype=np.int32)
        if weights is not None:
            weights = np.ascontiguousarray(weights, dtype=np.float32)
        graph = cls(indptr, indices, weights, bool(directed))
        if validate:
            graph.validate()
        return graph

    @classmethod
    def from_edges(cls, src, dst, weights=None, *, n_nodes=None, directed=False) -> "AdjacencyArrays":
        """Build a CSR graph from an edge list over dense indices.

        Duplicate edges are merged (weights summed); an undirected graph gets both directions of every edge.
        Self-loops are kept as given (the ingest stage drops them before this point).

        Parameters
        ----------
        src, dst : array_like of int, shape (n_rows,)
            Dense node indices in ``0..n_nodes-1``.
        weights : array_like of float, shape (n_rows,), optional
        n_nodes : int, optional
            Defaults to ``max(src, dst) + 1``.
        directed : bool, default False
        """
        src = np.asarray(src, dtype=np.int64).ravel()
        dst = np.asarray(dst, dtype=np.int64).ravel()
        if src.shape != dst.shape:
            raise ConfigError(f"src and dst must have the same length, got {src.size} and {dst.size}")
        w = None if weights is None else np.asarray(weights, dtype=np.float64).ravel()
        if w is not None and w.shape != src.shape:
            raise ConfigError(f"weights must have one value per edge, got {w.size} for {src.size} edges")
        if n_nodes is None:
            n_nodes = int(max(src.max(initial=-1), dst.max(initial=-1)) + 1)
        if src.size and (min(src.min(), dst.min()) < 0 or max(src.max(), dst.max()) >= n_nodes):
            raise ConfigError(f"node indices must lie in [0, {n_nodes}), got values outside it")
        if not directed:
            loops = src == dst
            src, dst = np.concatenate([src, dst[~loops]]), np.concatenate([dst, src[~loops]])
            if w is not None:
                w = np.concatenate([w, w[~loops]])
        key = src * np.int64(n_nodes) + dst
        order = np.argsort(key, kind="stable")
        key = key[order]
        first = np.ones(key.size, dtype=bool)
        first[1:] = key[1:] != key[:-1]
        starts = np.flatnonzero(first)
        ukey = key[starts]
        usrc = ukey // n_nodes
        indices = (ukey % n_nodes).astype(np.int32)
        merged = None
        if w is not None:
            merged = np.add.reduceat(w[order], starts).astype(np.float32) if starts.size else np.zeros(0, np.float32)
        indptr = np.zeros(n_nodes + 1, dtype=np.int64)
        np.cumsum(np.bincount(usrc, minlength=n_nodes), out=indptr[1:])
        return cls.from_arrays(indptr, indices, merged, directed=directed)

    # ------------------------------------------------------------------ properties
    @property
    def n_nodes(self) -> int:
        return int(self.indptr.shape[0] - 1)

    @property
    def n_edges(self) -> int:
        """Number of stored (directed) adjacency entries; an undirected edge counts twice."""
        return int(self.indices.shape[0])

    def degrees(self) -> np.ndarray:
        """Out-degree of every node, int64 array of shape (n_nodes,)."""
        return np.diff(self.indptr)

    def neighbors(self, v: int) -> np.ndarray:
        return self.indices[self.indptr[v]:self.indptr[v + 1]]

    # ------------------------------------------------------------------ checks
    def validate(self) -> None:
        """Check the invariants the kernels assume; raise ``ConfigError`` naming the broken one."""
        ip, ix = self.indptr, self.indices
        if ip.ndim != 1 or ip.shape[0] < 1:
            raise ConfigError(f"indptr must be a 1-D array of length n_nodes + 1, got shape {ip.shape}")
        if ix.ndim != 1:
            raise ConfigError(f"indices must be 1-D, got shape {ix.shape}")
        if ip[0] != 0 or ip[-1] != ix.shape[0]:
            raise ConfigError(f"indptr must start at 0 and end at len(indices)={ix.shape[0]}, got {ip[0]}..{ip[-1]}")
        if ip.shape[0] > 1 and np.any(np.diff(ip) < 0):
            raise ConfigError("indptr must be non-decreasing")
        n = ip.shape[0] - 1
        if ix.size and (ix.min() < 0 or ix.max() >= n):
            raise ConfigError(f"indices must lie in [0, {n}), got values in [{ix.min()}, {ix.max()}]")
        if self.weights is not None:
            w = self.weights
            if w.shape != ix.shape:
                raise ConfigError(f"weights must have shape {ix.shape}, got {w.shape}")
            if w.size and not (np.all(np.isfinite(w)) and w.min() > 0):
                raise ConfigError("weights must be finite and > 0")

    # ------------------------------------------------------------------ files
    def save(self, folder) -> Path:
        """Write the arrays as ``.npy`` files (plus ``graph.json``) so that workers can memory-map them."""
        folder = Path(folder)
        folder.mkdir(parents=True, exist_ok=True)
        arrays = {"indptr": self.indptr, "indices": self.indices}
        if self.weights is not None:
            arrays["weights"] = self.weights
        for name, values in arrays.items():
            with atomic_output(folder / f"{name}.npy") as tmp, open(tmp, "wb") as fh:
                np.save(fh, values)
        meta = {"n_nodes": self.n_nodes, "n_edges": self.n_edges, "directed": self.directed,
                "weighted": self.weights is not None}
        write_json_atomic(folder / _META, meta)  # graph.json last: its presence marks a complete graph
        return folder

    @classmethod
    def load(cls, folder, *, mmap=True) -> "AdjacencyArrays":
        """Open a graph written by :meth:`save`, memory-mapped read-only by default."""
        folder = Path(folder)
        meta = json.loads((folder / _META).read_text())
        mode = "r" if mmap else None
        indptr = np.load(folder / "indptr.npy", mmap_mode=mode)
        indices = np.load(folder / "indices.npy", mmap_mode=mode)
        weights = np.load(folder / "weights.npy", mmap_mode=mode) if meta["weighted"] else None
        return cls(indptr, indices, weights, bool(meta["directed"]))
