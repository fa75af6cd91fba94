"""Huffman coding of nodes by visit count: the output tree for hierarchical-softmax training.

Every node gets a binary code; the inner nodes on its root-to-leaf path each own one output vector in the
hierarchical softmax, so frequent nodes (short codes) cost fewer updates. The tree (Huffman 1952) is built by the
two-queue method (van Leeuwen 1976): once the leaves are sorted by weight, the inner nodes are created in order of
non-decreasing weight, so the two smallest weights are always at the fronts of two queues (sorted leaves, inner
nodes in creation order) and the merging is linear. The sort is numpy's; the merge and the per-node code and path
arrays are three small numba kernels.
"""

from __future__ import annotations

from dataclasses import dataclass

import numba
import numpy as np

from .errors import ConfigError

__all__ = ["HuffmanTree", "build_huffman"]

@dataclass(frozen=True, eq=False)
class HuffmanTree:
    """Binary Huffman code of ``n`` symbols (nodes) with ``n - 1`` inner nodes.

    Inner nodes are numbered ``0..n-2`` in the order the construction merges them, so the root is ``n - 2``
    and every inner node has a larger number than the inner nodes below it.

    Attributes
    ----------
    codes : ndarray of uint8, shape (n, max_len)
        ``codes[v, :lengths[v]]`` is the code of node ``v``, root first: bit ``l`` says which child of inner node
        ``points[v, l]`` the path takes (0 for the first child merged, 1 for the second). Entries past the length are 0.
    points : ndarray of int32, shape (n, max_len)
        ``points[v, :lengths[v]]`` are the inner nodes from the root down to the leaf's parent; -1 past the length.
    lengths : ndarray of int32, shape (n,)
        Code length of every node (0 only when ``n == 1``).
    """

    codes: np.ndarray
    points: np.ndarray
    lengths: np.ndarray

    @property
    def n_symbols(self) -> int:
        return int(self.lengths.shape[0])

    @property
    def n_inner(self) -> int:
        return max(self.n_symbols - 1, 0)

    @property
    def max_len(self) -> int:
        return int(self.codes.shape[1])


def build_huffman(counts) -> HuffmanTree:
    """Build the Huffman code of nodes weighted by their visit counts.

    Zero counts are clipped to 1 before the tree is built, so that every node, including one that no walk
    visited, gets a code (and a well-defined hierarchical-softmax probability); such nodes get the longest codes.
    Ties between equal weights are broken by a fixed order (leaves by node index, then inner nodes by creation
    order), so the same counts always give the same tree.

    Parameters
    ----------
    counts : array_like of int, shape (n,)
        Non-negative visit count of every node, ``n >= 1``.

    Returns
    -------
    HuffmanTree

    Raises
    ------
    ConfigError
        If ``counts`` is empty, not 1-D, or holds negative or non-integer values.
    """
    weights = _check_counts(counts)
    n = weights.shape[0]
    # Ties: leaves in node order (a stable sort), a leaf before an inner node of the same weight, inner nodes in
    # creation order. This is the order of a binary heap of (weight, tree node id) pairs with leaves numbered
    # 0..n-1 and inner node k numbered n + k, so the tree is the one a heap-based construction gives.
    order = np.argsort(weights, kind="stable")
    parent = np.empty(2 * n - 1, dtype=np.int64)
    bit = np.zeros(2 * n - 1, dtype=np.uint8)
    _huffman_merge_kernel(weights[order], order, parent, bit)
    depth = np.zeros(2 * n - 1, dtype=np.int32)
    _huffman_depths_kernel(parent, depth)
    lengths = np.ascontiguousarray(depth[:n])
    max_len = int(lengths.max())
    codes = np.zeros((n, max_len), dtype=np.uint8)
    points = np.full((n, max_len), -1, dtype=np.int32)
    _huffman_paths_kernel(parent, bit, lengths, codes, points)
    return HuffmanTree(codes, points, lengths)


def _check_counts(counts) -> np.ndarray:
    arr = np.asarray(counts)
    if arr.ndim != 1 or arr.shape[0] < 1:
        raise ConfigError(f"counts must be a non-empty 1-D array, got shape {arr.shape}")
    if arr.dtype.kind not in "iuf" or not np.all(np.isfinite(arr)):
        raise ConfigError(f"counts must be finite integers, got dtype {arr.dtype}")
    if arr.dtype.kind == "f" and np.any(arr != np.floor(arr)):
        bad = arr[arr != np.floor(arr)][:5].tolist()
        raise ConfigError(f"counts must be integers, got values such as {bad!r}")
    if np.any(arr < 0):
        raise ConfigError(f"counts must be >= 0, got values such as {arr[arr < 0][:5].tolist()!r}")
    return np.maximum(arr.astype(np.int64), 1)


@numba.njit(cache=True, nogil=True)
def _huffman_merge_kernel(sorted_weights, order, parent, bit):
    """Two-queue Huffman construction (van Leeuwen 1976), linear time.

    Parameters
    ----------
    sorted_weights : int64 [n]
        The leaf weights in non-decreasing order; ``order`` int64 [n] gives the leaf (node index) of each.
    parent : int64 [2n-1]
        Filled in place with the tree node id of each node's parent (leaves 0..n-1, inner node k is n + k, created
        as the k-th merge; the root 2n-2 gets -1).
    bit : uint8 [2n-1]
        Filled in place: 1 for the second child taken by a merge, 0 otherwise.
    """
    n = sorted_weights.shape[0]
    inner_w = np.empty(max(n - 1, 1), dtype=np.int64)
    leaf = 0   # front of the leaf queue (position in sorted order)
    head = 0   # front of the inner-node queue (inner nodes head..k-1 are not merged yet)
    parent[2 * n - 2] = -1
    for k in range(n - 1):
        total = 0
        for child in range(2):
            # The smaller front; a leaf wins a tie (it has the smaller id).
            if leaf < n and (head >= k or sorted_weights[leaf] <= inner_w[head]):
                node = order[leaf]
                total += sorted_weights[leaf]
                leaf += 1
            else:
                node = n + head
                total += inner_w[head]
                head += 1
            parent[node] = n + k
            bit[node] = child
        inner_w[k] = total


@numba.njit(cache=True, nogil=True)
def _huffman_depths_kernel(parent, depth):
    """Depth of every tree node below the root.

    Parameters
    ----------
    parent : int64 [2n-1]
        Tree node id of each node's parent (leaves 0..n-1, inner node k is n + k, root 2n-2 has -1).
    depth : int32 [2n-1]
        Filled in place; the root gets 0. Relies on a parent always having a larger id than its children.
    """
    m = parent.shape[0]
    depth[m - 1] = 0
    for node in range(m - 2, -1, -1):
        depth[node] = depth[parent[node]] + 1


@numba.njit(cache=True, nogil=True)
def _huffman_paths_kernel(parent, bit, lengths, codes, points):
    """Fill the root-to-leaf code and inner-node path of every leaf.

    Parameters
    ----------
    parent : int64 [2n-1]
        As for ``_huffman_depths_kernel``.
    bit : uint8 [2n-1]
        Which child (0 or 1) each node is of its parent.
    lengths : int32 [n]
        Depth of every leaf.
    codes : uint8 [n, max_len], points : int32 [n, max_len]
        Filled in place up to each leaf's length (inner nodes numbered 0..n-2); the rest is left untouched.
    """
    n = lengths.shape[0]
    for leaf in range(n):
        node = leaf
        for lvl in range(lengths[leaf] - 1, -1, -1):
            codes[leaf, lvl] = bit[node]
            points[leaf, lvl] = parent[node] - n
            node = parent[node]
