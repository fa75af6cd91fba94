"""Property test: any edge table ingested gives the graph networkx builds from the same rows (general-purpose
reference library), whatever the id type, duplicates, self-loops and weights."""

import tempfile
import warnings
from pathlib import Path

import networkx as nx
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from hypothesis import HealthCheck, given, settings, strategies as st

from graphkit.errors import GraphDataWarning
from graphkit.graph import AdjacencyArrays
from graphkit.ingest import ingest_edges

ID_TYPES = {
    "int64": (st.integers(-2**40, 2**40), pa.int64()),
    "int32": (st.integers(-50, 50), pa.int32()),
    "string": (st.text(alphabet="abcxyz'\"; -é", min_size=0, max_size=4), pa.string()),
}


@st.composite
def edge_tables(draw):
    kind = draw(st.sampled_from(sorted(ID_TYPES)))
    ids, arrow_type = ID_TYPES[kind]
    pool = draw(st.lists(ids, min_size=2, max_size=12, unique=True))
    node = st.sampled_from(pool)
    rows = draw(st.lists(st.tuples(node, node, st.floats(0.01, 100.0)), min_size=1, max_size=60))
    if all(s == t for s, t, _ in rows):
        rows.append((pool[0], pool[1], 1.0))
    directed = draw(st.booleans())
    return rows, arrow_type, directed


@pytest.mark.slow
@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(edge_tables())
def test_ingest_equals_networkx(table):
    rows, arrow_type, directed = table
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        pq.write_table(pa.table({"s": pa.array([r[0] for r in rows], arrow_type),
                                 "t": pa.array([r[1] for r in rows], arrow_type),
                                 "w": pa.array([r[2] for r in rows], pa.float64())}), tmp / "e.parquet")
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", GraphDataWarning)
            ingest_edges(str(tmp / "e.parquet"), tmp / "out", source="s", target="t", weight="w", directed=directed)
        g = AdjacencyArrays.load(tmp / "out" / "graph", mmap=False)
        ids = pq.read_table(tmp / "out" / "nodes.parquet").column("node_id").to_pylist()

    ref = nx.DiGraph() if directed else nx.Graph()
    for s, t, w in rows:
        if s == t:
            continue
        ref.add_edge(s, t, weight=ref.get_edge_data(s, t, {"weight": 0.0})["weight"] + w)
    assert sorted(ids) == ids and set(ids) == set(ref.nodes)
    got = {}
    for v in range(g.n_nodes):
        for k in range(g.indptr[v], g.indptr[v + 1]):
            got[(ids[v], ids[g.indices[k]])] = float(g.weights[k])
    want = {}
    for s, t, d in ref.edges(data=True):
        want[(s, t)] = d["weight"]
        if not directed:
            want[(t, s)] = d["weight"]
    assert got.keys() == want.keys()
    for key, w in want.items():
        assert abs(got[key] - w) <= 1e-4 * max(1.0, w)
