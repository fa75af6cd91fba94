"""Huffman codes of nodes by visit count (graphkit.huffman).

External checks: Kraft's equality for a complete prefix code and the bound H(p) <= L < H(p) + 1 on the mean code
length of an optimal code (Huffman 1952, "A Method for the Construction of Minimum-Redundancy Codes"; Cover & Thomas,
"Elements of Information Theory", 2nd ed., ch. 5: Kraft inequality, Theorems 5.3.1/5.4.1, L = H for dyadic
distributions; theorem numbers from memory), plus the total cost of an independent textbook Huffman construction,
and the whole tree against a heap-based construction (Huffman 1952 with :mod:`heapq`, the method the two-queue
kernel replaced) using the documented tie order.
"""

from __future__ import annotations

import bisect
import heapq
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from graphkit.errors import ConfigError
from graphkit.huffman import build_huffman

RNG = np.random.default_rng(20261202)

COUNT_VECTORS = {
    "two": [3, 1],
    "uniform-8": [5] * 8,
    "uniform-10": [1] * 10,
    "dyadic": [2 ** k for k in range(12)] + [1],   # probabilities 2**-l: Huffman meets the entropy exactly
    "fibonacci": [1, 1, 2, 3, 5, 8, 13, 21, 34, 55, 89, 144],   # the most skewed tree for its size
    "zipf": RNG.zipf(1.3, 500).clip(max=10 ** 9).tolist(),
    "random": RNG.integers(1, 1000, 257).tolist(),
    "with-zeros": [0, 7, 0, 0, 3, 1, 0, 12],
    "hub": [10 ** 6] + [1] * 40,
}


def code_strings(tree):
    return ["".join(str(b) for b in tree.codes[v, :tree.lengths[v]]) for v in range(tree.n_symbols)]


def reference_cost(weights):
    """Sum of count x code length of an optimal code: the textbook construction with a sorted list, O(n^2).
    The cost of a Huffman tree is the sum of the weights of its merged (inner) nodes."""
    items = sorted(weights)
    cost = 0
    while len(items) > 1:
        a, b = items.pop(0), items.pop(0)
        cost += a + b
        bisect.insort(items, a + b)
    return cost


def heapq_reference(counts):
    """(codes, points, lengths) of the Huffman tree built with a binary heap of (weight, tree node id) pairs:
    leaves are 0..n-1, the k-th merge creates node n + k; the first popped becomes child 0, the second child 1."""
    weights = [max(int(c), 1) for c in counts]
    n = len(weights)
    heap = [(w, i) for i, w in enumerate(weights)]
    heapq.heapify(heap)
    parent, bit = [-1] * (2 * n - 1), [0] * (2 * n - 1)
    for k in range(n - 1):
        (w1, a), (w2, b) = heapq.heappop(heap), heapq.heappop(heap)
        parent[a] = parent[b] = n + k
        bit[b] = 1
        heapq.heappush(heap, (w1 + w2, n + k))
    paths = []
    for leaf in range(n):
        code, inner, node = [], [], leaf
        while parent[node] != -1:
            code.append(bit[node])
            inner.append(parent[node] - n)
            node = parent[node]
        paths.append((code[::-1], inner[::-1]))
    max_len = max(len(c) for c, _ in paths)
    codes = np.zeros((n, max_len), dtype=np.uint8)
    points = np.full((n, max_len), -1, dtype=np.int32)
    for v, (code, inner) in enumerate(paths):
        codes[v, :len(code)] = code
        points[v, :len(inner)] = inner
    return codes, points, np.array([len(c) for c, _ in paths], dtype=np.int32)


def check_tree(counts):
    """Every structural and information-theoretic property of the code of ``counts``."""
    counts = np.asarray(counts, dtype=np.int64)
    n = counts.shape[0]
    tree = build_huffman(counts)
    weights = np.maximum(counts, 1)   # zero counts are clipped to 1 (documented)
    assert tree.codes.dtype == np.uint8 and tree.points.dtype == np.int32 and tree.lengths.dtype == np.int32
    assert tree.codes.shape == tree.points.shape == (n, int(tree.lengths.max()))
    lengths = tree.lengths.astype(np.int64)

    # Kraft's equality: the code is complete (Cover & Thomas, ch. 5.2; every inner node of a Huffman tree has 2 kids).
    assert sum(2.0 ** -int(l) for l in lengths) == pytest.approx(1.0, abs=1e-12)

    # Mean length within one bit of the entropy (Cover & Thomas, Theorem 5.4.1 and optimality of Huffman, 5.8).
    if n > 1:
        p = weights / weights.sum()
        entropy = float(-(p * np.log2(p)).sum())
        mean_len = float((p * lengths).sum())
        assert entropy - 1e-9 <= mean_len < entropy + 1

    # Optimal: the same total cost as an independent construction (ties may change lengths, never the cost).
    assert int((weights * lengths).sum()) == reference_cost(weights.tolist())

    # Prefix-free: in sorted order a prefix would sit right before a word that extends it.
    words = sorted(code_strings(tree))
    assert len(set(words)) == n
    for u, v in zip(words, words[1:]):
        assert not v.startswith(u)

    # Paths: the inner node at depth l is determined by the first l bits (siblings share their parent's points),
    # every inner node 0..n-2 is used exactly once, the root is n-2, and the padding is -1 / 0.
    node_of_prefix = {}
    for v, word in enumerate(code_strings(tree)):
        L = tree.lengths[v]
        for lvl in range(L):
            assert node_of_prefix.setdefault(word[:lvl], int(tree.points[v, lvl])) == tree.points[v, lvl]
        assert np.all(tree.points[v, L:] == -1) and np.all(tree.codes[v, L:] == 0)
        # Inner nodes are numbered in merge order, so numbers decrease from the root down.
        assert np.all(np.diff(tree.points[v, :L]) < 0)
    assert sorted(node_of_prefix.values()) == list(range(n - 1))
    # The very tree of the heap-based construction: the two-queue merge keeps its tie order.
    for got, want in zip((tree.codes, tree.points, tree.lengths), heapq_reference(counts)):
        np.testing.assert_array_equal(got, want)
    if n > 1:
        assert node_of_prefix[""] == n - 2
        for prefix in node_of_prefix:
            for bit in "01":
                child = prefix + bit
                assert child in node_of_prefix or child in set(words)
    return tree


@pytest.mark.parametrize("name", sorted(COUNT_VECTORS))
def test_huffman_properties(name):
    check_tree(COUNT_VECTORS[name])


def test_dyadic_counts_meet_the_entropy():
    # Cover & Thomas, ch. 5.3: L = H exactly when every probability is a power of 1/2.
    counts = np.array(COUNT_VECTORS["dyadic"])
    tree = build_huffman(counts)
    p = counts / counts.sum()
    assert float((p * tree.lengths).sum()) == pytest.approx(float(-(p * np.log2(p)).sum()), abs=1e-12)
    # Here each length is -log2 p exactly.
    np.testing.assert_array_equal(tree.lengths, -np.log2(p).astype(int))


def test_uniform_power_of_two_gives_equal_lengths():
    assert build_huffman([4] * 16).lengths.tolist() == [4] * 16


def test_frequent_nodes_get_shorter_codes():
    counts = np.array(COUNT_VECTORS["zipf"])
    lengths = build_huffman(counts).lengths
    # Optimality implies that a strictly larger count never gets a longer code (ties may go either way).
    larger = counts[:, None] > counts[None, :]
    assert not np.any(larger & (lengths[:, None] > lengths[None, :]))


def test_zero_counts_are_clipped_to_one():
    counts = COUNT_VECTORS["with-zeros"]
    tree = build_huffman(counts)
    assert np.all(tree.lengths >= 1)
    clipped = build_huffman(np.maximum(counts, 1))
    for field in ("codes", "points", "lengths"):
        np.testing.assert_array_equal(getattr(tree, field), getattr(clipped, field))


def test_deterministic_tie_breaking():
    counts = [2, 1, 1, 2, 1, 1, 2, 2, 1]
    a, b = build_huffman(counts), build_huffman(np.array(counts, dtype=np.int32))
    for field in ("codes", "points", "lengths"):
        np.testing.assert_array_equal(getattr(a, field), getattr(b, field))


def test_single_symbol():
    tree = build_huffman([9])
    assert tree.lengths.tolist() == [0] and tree.codes.shape == (1, 0) and tree.n_inner == 0


@given(st.lists(st.integers(min_value=0, max_value=10 ** 6), min_size=1, max_size=60))
@settings(max_examples=60, deadline=None, database=None)  # no .hypothesis folder in the checkout
def test_huffman_properties_random(counts):
    check_tree(counts)


def test_many_ties_match_the_heap_construction():
    # Equal weights everywhere: every step of the merge is decided by the tie order (leaf first, then creation order).
    for counts in ([7] * 33, [1, 2] * 20, RNG.integers(1, 4, 300).tolist()):
        tree = build_huffman(counts)
        for got, want in zip((tree.codes, tree.points, tree.lengths), heapq_reference(counts)):
            np.testing.assert_array_equal(got, want)


@pytest.mark.parametrize("counts, match", [
    ([], "non-empty"),
    ([[1, 2], [3, 4]], "1-D"),
    ([3, -1, 2], "counts must be >= 0"),
    ([1.5, 2.0], "integers"),
    (["a", "b"], "finite integers"),
    ([1.0, float("nan")], "finite integers"),
])
def test_bad_counts(counts, match):
    with pytest.raises(ConfigError, match=match):
        build_huffman(counts)


@pytest.mark.slow
@pytest.mark.skipif(os.environ.get("NUMBA_DISABLE_JIT") == "1", reason="already running without the JIT")
def test_huffman_kernels_without_jit():
    """The property checks with NUMBA_DISABLE_JIT=1 (the kernels run as Python), in a fresh interpreter."""
    env = {**os.environ, "NUMBA_DISABLE_JIT": "1"}
    cmd = [sys.executable, "-m", "pytest", "-q", "-p", "no:cacheprovider", f"{__file__}::test_huffman_properties"]
    done = subprocess.run(cmd, cwd=Path(__file__).parent.parent, env=env, capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stdout[-3000:] + done.stderr[-3000:]
    assert f"{len(COUNT_VECTORS)} passed" in done.stdout
