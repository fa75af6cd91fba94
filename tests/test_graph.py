"""AdjacencyArrays: construction, invariants and files, checked against scipy.sparse (a general-purpose reference)."""

import numpy as np
import pytest
import scipy.sparse as sp

from graphkit import AdjacencyArrays
from graphkit.errors import ConfigError


def _scipy_adjacency(src, dst, w, n, directed):
    """Reference: scipy.sparse sums duplicate entries when converting COO to CSR."""
    a = sp.coo_matrix((w, (src, dst)), shape=(n, n)).tocsr()
    if not directed:
        a = a + a.T - sp.diags(a.diagonal())
    a.sort_indices()
    return a


@pytest.mark.parametrize("directed", [False, True])
def test_from_edges_matches_scipy(directed):
    rng = np.random.default_rng(3)
    n = 60
    src = rng.integers(0, n, 400)
    dst = rng.integers(0, n, 400)
    keep = src != dst
    src, dst = src[keep], dst[keep]
    w = rng.uniform(0.1, 3.0, src.size)
    g = AdjacencyArrays.from_edges(src, dst, w, n_nodes=n, directed=directed)
    ref = _scipy_adjacency(src, dst, w, n, directed)
    np.testing.assert_array_equal(g.indptr, ref.indptr)
    np.testing.assert_array_equal(g.indices, ref.indices)
    np.testing.assert_allclose(g.weights, ref.data, rtol=1e-6)
    assert g.indptr.dtype == np.int64 and g.indices.dtype == np.int32 and g.weights.dtype == np.float32


def test_save_load_memory_maps(tmp_path, two_cliques):
    two_cliques.save(tmp_path / "g")
    g = AdjacencyArrays.load(tmp_path / "g")
    assert isinstance(g.indices, np.memmap)
    np.testing.assert_array_equal(g.indptr, two_cliques.indptr)
    np.testing.assert_array_equal(g.indices, two_cliques.indices)
    assert g.weights is None and g.directed is False


@pytest.mark.parametrize("indptr, indices, match", [
    ([0, 2, 1], [1, 0], "non-decreasing|end at"),
    ([0, 1, 2], [1, 5], r"indices must lie in \[0, 2\)"),
    ([1, 2, 2], [0, 1], "start at 0"),
])
def test_validate_rejects_broken_arrays(indptr, indices, match):
    with pytest.raises(ConfigError, match=match):
        AdjacencyArrays.from_arrays(indptr, indices)


def test_validate_rejects_bad_weights():
    with pytest.raises(ConfigError, match="weights must be finite and > 0"):
        AdjacencyArrays.from_arrays([0, 1, 2], [1, 0], [1.0, -1.0])
