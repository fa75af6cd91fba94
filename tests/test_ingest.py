"""Ingest with DuckDB, checked against networkx building the same graph from the same rows."""

import warnings

import networkx as nx
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from graphkit.errors import EdgeTableError, GraphDataWarning
from graphkit.graph import AdjacencyArrays
from graphkit.ingest import ingest_edges


def _write(path, **cols):
    pq.write_table(pa.table(cols), path)
    return str(path)


def _ingest(tmp_path, edges, **kw):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", GraphDataWarning)
        info = ingest_edges(edges, tmp_path / "out", drop_null_ids=True, **kw)
    graph = AdjacencyArrays.load(tmp_path / "out" / "graph")
    ids = pq.read_table(tmp_path / "out" / "nodes.parquet").column("node_id").to_pylist()
    return info, graph, ids


def _as_nx(graph, ids, directed):
    g = nx.DiGraph() if directed else nx.Graph()
    g.add_nodes_from(ids)
    for v in range(graph.n_nodes):
        for k in range(graph.indptr[v], graph.indptr[v + 1]):
            g.add_edge(ids[v], ids[graph.indices[k]], weight=float(graph.weights[k]) if graph.weights is not None else 1.0)
    return g


@pytest.mark.parametrize("batch_rows", [None, 7], ids=["one-batch", "7-row-batches"])
@pytest.mark.parametrize("directed", [False, True])
def test_ingest_matches_networkx(tmp_path, monkeypatch, directed, batch_rows):
    if batch_rows:  # the sorted adjacency streams out of DuckDB in many small batches, across node boundaries
        monkeypatch.setattr("graphkit.ingest.FETCH_BATCH_ROWS", batch_rows)
    rng = np.random.default_rng(11)
    src = [f"acct-{i}" for i in rng.integers(0, 40, 300)]
    dst = [f"acct-{i}" for i in rng.integers(0, 40, 300)]
    dst[5] = None
    w = rng.uniform(0.5, 2.0, 300)
    path = _write(tmp_path / "t.parquet", a=pa.array(src), b=pa.array(dst), amount=w)
    info, graph, ids = _ingest(tmp_path, path, source="a", target="b", weight="amount", directed=directed)

    # Reference: networkx, summing the weights of repeated rows (and of both directions when undirected).
    ref = nx.DiGraph() if directed else nx.Graph()
    for s, d, x in zip(src, dst, w):
        if s is None or d is None or s == d:
            continue
        old = ref.get_edge_data(s, d, {"weight": 0.0})["weight"]
        ref.add_edge(s, d, weight=old + x)
    got = _as_nx(graph, ids, directed)
    assert sorted(got.nodes) == sorted(ref.nodes) == ids  # node_idx follows id order
    key = (lambda e: e) if directed else frozenset
    assert {key(e) for e in got.edges} == {key(e) for e in ref.edges}
    for s, d, data in ref.edges(data=True):
        assert got[s][d]["weight"] == pytest.approx(data["weight"], rel=1e-5)
    c = info["counts"]
    assert c["dropped_null_ids"] == 1
    assert c["dropped_self_loops"] == sum(1 for s, d in zip(src, dst) if s is not None and d is not None and s == d)
    assert c["edges"] == ref.number_of_edges() and c["nodes"] == ref.number_of_nodes()
    assert c["adjacency_entries"] == (1 if directed else 2) * ref.number_of_edges()


def test_integer_ids_folder_and_glob(tmp_path):
    folder = tmp_path / "edges"
    folder.mkdir()
    _write(folder / "part-1.parquet", s=pa.array([1, 2, 3], pa.int64()), t=pa.array([2, 3, 1], pa.int64()))
    _write(folder / "part-2.parquet", s=pa.array([3, 4], pa.int64()), t=pa.array([4, 1], pa.int64()))
    for edges in (str(folder), str(folder / "*.parquet")):
        info, graph, ids = _ingest(tmp_path, edges, source="s", target="t")
        assert ids == [1, 2, 3, 4] and graph.weights is None
        assert info["counts"]["edges"] == 5 and info["id_type"] == "integer"


def test_warns_with_counts(tmp_path):
    path = _write(tmp_path / "t.parquet", s=["a", "a", "b", "c"], t=["b", "b", "b", None])
    with pytest.warns(GraphDataWarning, match="1 rows with a null id dropped, 1 self-loops dropped, "
                                               "1 duplicate edges merged"):
        ingest_edges(path, tmp_path / "out", source="s", target="t", drop_null_ids=True)


@pytest.mark.parametrize("case, match", [
    ("missing_file", r"nope\.parquet: file not found"),
    ("empty_glob", "no files match"),
    ("not_parquet", "not a readable Parquet file"),
    ("missing_column", r"no column 'sendr' for \[input\] source \(did you mean 'sender'\?\)"),
    ("only_self_loops", "no usable edge"),
    ("bad_weight", "2 of 3 rows have a null, NaN, infinite, zero or negative value in weight column 'w'"),
    ("mixed_types", "node ids of type"),
    ("empty", "the edge table is empty"),
])
def test_bad_tables_raise(tmp_path, case, match):
    src, kw = "sender", {}
    if case == "missing_file":
        edges = str(tmp_path / "nope.parquet")
    elif case == "empty_glob":
        edges = str(tmp_path / "*.parquet")
    elif case == "not_parquet":
        edges = str(tmp_path / "x.parquet")
        (tmp_path / "x.parquet").write_text("sender,receiver\n1,2\n")
    elif case == "missing_column":
        edges = _write(tmp_path / "t.parquet", sender=["a"], receiver=["b"])
        src = "sendr"
    elif case == "only_self_loops":
        edges = _write(tmp_path / "t.parquet", sender=["a", "b"], receiver=["a", "b"])
    elif case == "bad_weight":
        edges = _write(tmp_path / "t.parquet", sender=["a", "b", "c"], receiver=["b", "c", "a"],
                       w=[1.0, float("nan"), -2.0])
        kw = {"weight": "w"}
    elif case == "mixed_types":
        d = tmp_path / "d"
        d.mkdir()
        _write(d / "1.parquet", sender=pa.array([1, 2]), receiver=pa.array([2, 3]))
        _write(d / "2.parquet", sender=["a"], receiver=["b"])
        edges = str(d)
    elif case == "empty":
        edges = _write(tmp_path / "t.parquet", sender=pa.array([], pa.string()), receiver=pa.array([], pa.string()))
    with pytest.raises(EdgeTableError, match=match):
        ingest_edges(edges, tmp_path / "out", source=src, target="receiver", **kw)


def test_adjacency_matches_scipy_csr_when_duckdb_runs_in_parallel(tmp_path):
    """Reference: scipy.sparse's COO -> CSR conversion (duplicates summed, columns sorted per row).

    Big enough (60,000 rows) that DuckDB sorts and streams with several threads, which is where the order of the
    streamed batches has to hold; the weights check that each weight stays with its own entry.
    """
    import scipy.sparse as sp

    rng = np.random.default_rng(5)
    n = 4000
    ids = np.sort(rng.choice(10**9, n, replace=False))  # node_idx is the rank of the id
    a, b = rng.integers(0, n, 60_000), rng.integers(0, n, 60_000)
    w = rng.uniform(0.5, 2.0, a.size)
    path = _write(tmp_path / "t.parquet", s=pa.array(ids[a]), d=pa.array(ids[b]), w=w)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", GraphDataWarning)
        ingest_edges(path, tmp_path / "out", source="s", target="d", weight="w", threads=2)
    graph = AdjacencyArrays.load(tmp_path / "out" / "graph")

    keep = a != b
    m = sp.coo_matrix((w[keep], (a[keep], b[keep])), shape=(n, n))
    ref = (m + m.T).tocsr()
    ref.sum_duplicates()
    ref.sort_indices()
    present = np.unique(np.concatenate([a[keep], b[keep]]))
    assert present.size == n  # every id has an edge, so the dense indices are the ranks 0..n-1
    np.testing.assert_array_equal(graph.indptr, ref.indptr)
    np.testing.assert_array_equal(graph.indices, ref.indices)
    np.testing.assert_allclose(graph.weights, ref.data, rtol=1e-5)


def test_rows_are_checked_in_one_scan_per_run(tmp_path, monkeypatch):
    """The preflight before Prefect, the flow's own preflight and the ingest: one scan of the rows for checks;
    a changed file is checked again, and a bad one still fails at the preflight."""
    from graphkit import ingest as gi
    from graphkit.ingest import EdgeTable, ingest_tables, validate_edge_tables

    monkeypatch.setattr(gi, "_CHECKED", {})
    scans = []
    check = gi._check_rows
    monkeypatch.setattr(gi, "_check_rows", lambda *a: scans.append(1) or check(*a))
    path = _write(tmp_path / "t.parquet", a=pa.array(["x", "y", "z", "x"]), b=pa.array(["y", "z", "x", "x"]))
    tables = [EdgeTable(path, "a", "b")]
    first = validate_edge_tables(tables)
    assert validate_edge_tables(tables) == first and len(scans) == 1
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", GraphDataWarning)
        info = ingest_tables(tables, tmp_path / "out")
    assert len(scans) == 1
    assert (info["counts"]["rows"], info["counts"]["dropped_self_loops"], info["counts"]["edges"]) == (4, 1, 3)
    assert validate_edge_tables(tables, window={"since": None, "until": None}) == first  # the same open window
    _write(tmp_path / "t.parquet", a=pa.array(["x", None]), b=pa.array(["y", "z"]))
    with pytest.raises(EdgeTableError, match=r"1 of 2 rows have a null id"):
        validate_edge_tables(tables)
    assert len(scans) == 2


@pytest.mark.parametrize("fmt", ["parquet", "csv"])
def test_nan_weight_is_reported_with_its_row(tmp_path, fmt):
    """A NaN weight in Parquet once crashed the message (DuckDB pruned the row group by its min/max statistics,
    which leave NaN out, so the example query found no row): the message must give the count and the row."""
    t = pa.table({"s": ["a", "b"], "d": ["b", "c"], "w": [1.0, float("nan")]})
    path = tmp_path / f"t.{fmt}"
    if fmt == "parquet":
        pq.write_table(t, path)
    else:
        path.write_text("s,d,w\na,b,1.0\nb,c,nan\n")
    with pytest.raises(EdgeTableError, match=r"1 of 2 rows have a null, NaN, infinite, zero or negative value in "
                                             r"weight column 'w' .*e\.g\. \[\('b', 'c', nan\)\]"):
        ingest_edges(str(path), tmp_path / "out", source="s", target="d", weight="w")


def test_error_message_survives_examples_that_cannot_be_read(tmp_path, monkeypatch):
    import graphkit.ingest as ingest

    real = ingest.load_sql
    monkeypatch.setattr(ingest, "load_sql", lambda name: "select broken(" if name == "checks/bad_weights"
                        else real(name))
    path = _write(tmp_path / "t.parquet", s=["a", "b"], d=["b", "c"], w=[1.0, -1.0])
    with pytest.raises(EdgeTableError, match=r"t\.parquet: 1 of 2 rows have a null, NaN, infinite, zero or negative "
                                             r"value in weight column 'w' \(as float32[^)]*\)$"):
        ingest_edges(path, tmp_path / "out", source="s", target="d", weight="w")


def test_example_rows_are_one_short_line():
    from graphkit.ingest import _format_rows

    class Odd:
        def __repr__(self):
            raise RuntimeError("no repr")

    line = _format_rows([("t", "a\nb", Odd(), 2.5), ("t", "x" * 1000, 1, None)])
    assert "\n" not in line and "<Odd>" in line and len(line) <= 304 and line.endswith("...]")
