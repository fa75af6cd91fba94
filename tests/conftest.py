"""Shared fixtures: tiny graphs for exact checks and a planted-partition graph for quality checks."""

from __future__ import annotations

import os

import networkx as nx
import numpy as np
import pytest

os.environ.setdefault("PREFECT_HOME", os.path.join(os.path.dirname(os.path.dirname(__file__)), ".prefect-home"))
if os.environ.get("PYTEST_XDIST_WORKER"):
    # Under pytest-xdist every worker gets a Prefect home (and so a SQLite database) of its own: two workers' temporary
    # servers writing one database file would wait on each other's locks.
    os.environ["PREFECT_HOME"] = os.path.join(os.environ["PREFECT_HOME"], os.environ["PYTEST_XDIST_WORKER"])
os.makedirs(os.environ["PREFECT_HOME"], exist_ok=True)  # before Prefect's import, which warns when it cannot
os.environ.setdefault("PREFECT_SERVER_ANALYTICS_ENABLED", "false")
os.environ.setdefault("DO_NOT_TRACK", "1")
os.environ.setdefault("PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS", "120")

from graphkit.graph import AdjacencyArrays  # noqa: E402


#: Overrides that make the demo refresh a quick fixture: fewer, shorter walks, small vectors, no evaluation.
FAST_DEMO = ["walks.per_node=2", "walks.length=20", "train.dim=16", "evaluate.link_holdout=0", "evaluate.labels=none",
             "gates.min_link_auc=none", "gates.min_micro_f1=none"]


def graph_from_nx(g: nx.Graph) -> AdjacencyArrays:
    """CSR graph over the integer nodes 0..n-1 of a networkx graph (weights from the 'weight' attribute if any)."""
    edges = np.array(list(g.edges()), dtype=np.int64).reshape(-1, 2)
    weighted = any("weight" in d for _, _, d in g.edges(data=True))
    w = np.array([d.get("weight", 1.0) for _, _, d in g.edges(data=True)]) if weighted else None
    return AdjacencyArrays.from_edges(edges[:, 0], edges[:, 1], w, n_nodes=g.number_of_nodes(),
                                      directed=g.is_directed())


@pytest.fixture
def path_graph():
    """0-1-2-3-4, undirected."""
    return graph_from_nx(nx.path_graph(5))


@pytest.fixture
def star_graph():
    """Hub 0 with leaves 1..6, undirected."""
    return graph_from_nx(nx.star_graph(6))


@pytest.fixture
def two_cliques():
    """Two 5-cliques joined by one bridge edge (4-5): connected and not bipartite."""
    g = nx.disjoint_union(nx.complete_graph(5), nx.complete_graph(5))
    g.add_edge(4, 5)
    return graph_from_nx(g)


@pytest.fixture
def graph_with_isolated():
    """A triangle 0-1-2 plus node 3 with no edges."""
    return AdjacencyArrays.from_edges([0, 1, 2], [1, 2, 0], n_nodes=4)


@pytest.fixture
def small_directed():
    """0->1, 1->2, 2->0, 2->3; node 3 has no out-edges."""
    return AdjacencyArrays.from_edges([0, 1, 2, 2], [1, 2, 0, 3], n_nodes=4, directed=True)


def planted_partition(n_blocks=50, block_size=200, in_deg=6.0, out_deg=6.0, seed=7):
    """Planted-partition graph (networkx.planted_partition_graph) with about ``in_deg`` expected edges per node
    inside its block and ``out_deg`` outside; returns (AdjacencyArrays, labels)."""
    n = n_blocks * block_size
    p_in = in_deg / (block_size - 1)
    p_out = out_deg / (n - block_size)
    g = nx.planted_partition_graph(n_blocks, block_size, p_in, p_out, seed=seed)
    labels = np.repeat(np.arange(n_blocks), block_size)
    return graph_from_nx(g), labels


@pytest.fixture(scope="session")
def planted_graph():
    """50 blocks x 200 nodes, 6 expected edges inside and 6 outside the block per node."""
    return planted_partition()
