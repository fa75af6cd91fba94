"""Production inputs: several tables with node kinds, time windows and decay, hive folders, CSV (issue: real inputs).

References: networkx builds the same graph from the same rows; the decay is checked against the closed form
w * 0.5 ** (age / half_life).
"""

import os
from datetime import datetime, timedelta, timezone

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from graphkit.errors import EdgeTableError
from graphkit.graph import SparseGraph
from graphkit.ingest import EdgeTable, ingest_tables, validate_edge_tables


def _w(path, **cols):
    pq.write_table(pa.table(cols), path)
    return str(path)


def _load(out):
    g = SparseGraph.load(out / "graph")
    t = pq.read_table(out / "nodes.parquet")
    return g, list(zip(t.column("node_kind").to_pylist(), t.column("node_id").to_pylist()))


def _edges(g, nodes):
    out = {}
    for v in range(g.n_nodes):
        for k in range(g.indptr[v], g.indptr[v + 1]):
            out[(nodes[v], nodes[g.indices[k]])] = None if g.weights is None else float(g.weights[k])
    return out


def test_node_kinds_keep_ids_apart(tmp_path):
    transfers = _w(tmp_path / "transfers.parquet", sender=pa.array([17, 17, 18]), receiver=pa.array([18, 19, 19]))
    logins = _w(tmp_path / "logins.parquet", account=pa.array([17, 19]), device=pa.array([17, 5]))
    tables = [EdgeTable(transfers, "sender", "receiver", source_kind="account", target_kind="account"),
              EdgeTable(logins, "account", "device", source_kind="account", target_kind="device")]
    info = ingest_tables(tables, tmp_path / "out")
    g, nodes = _load(tmp_path / "out")
    assert nodes == [("account", 17), ("account", 18), ("account", 19), ("device", 5), ("device", 17)]
    e = _edges(g, nodes)
    assert (("account", 17), ("device", 17)) in e and (("device", 17), ("account", 17)) in e
    assert (("account", 17), ("account", 17)) not in e  # account 17 and device 17 are different nodes
    assert info["counts"]["nodes_by_kind"] == {"account": 3, "device": 2}
    assert info["counts"]["dropped_self_loops"] == 0


def test_time_window_and_decay(tmp_path):
    as_of = datetime(2026, 12, 1, tzinfo=timezone.utc)
    ts = [as_of - timedelta(days=d) for d in (1, 10, 40, 2)]
    path = _w(tmp_path / "t.parquet", s=["a", "b", "c", "a"], t=["b", "c", "d", "b"], w=[1.0, 2.0, 4.0, 1.0],
              at=pa.array(ts, pa.timestamp("us", tz="UTC")))
    window = {"since": as_of - timedelta(days=30), "until": as_of, "as_of": as_of, "half_life_days": 10.0}
    info = ingest_tables([EdgeTable(path, "s", "t", "w", timestamp="at")], tmp_path / "out", window=window)
    assert info["counts"]["outside_window"] == 1  # the 40-day-old row
    g, nodes = _load(tmp_path / "out")
    e = _edges(g, nodes)
    # closed form of the decay, summed over the two a-b rows (1 and 2 days old)
    assert e[(("node", "a"), ("node", "b"))] == pytest.approx(0.5 ** 0.1 + 0.5 ** 0.2, rel=1e-5)
    assert e[(("node", "b"), ("node", "c"))] == pytest.approx(2.0 * 0.5 ** 1.0, rel=1e-5)
    assert ("node", "d") not in [n for n in nodes]


def test_hive_partitions_and_csv(tmp_path):
    root = tmp_path / "edges"
    for day, rows in (("2026-11-29", (["a"], ["b"])), ("2026-11-30", (["b", "c"], ["c", "a"]))):
        (root / f"day={day}").mkdir(parents=True)
        _w(root / f"day={day}" / "part-0.parquet", s=rows[0], t=rows[1])
    until = datetime(2026, 11, 30, tzinfo=timezone.utc)
    info = ingest_tables([EdgeTable(str(root), "s", "t", timestamp="day")], tmp_path / "out",
                         window={"until": until, "as_of": until})
    assert info["counts"]["rows"] == 3 and info["counts"]["outside_window"] == 2  # the partition column is the time

    csv = tmp_path / "e.csv"
    csv.write_text("src,dst,w\n1,2,1.5\n2,3,2.0\n3,1,1.0\n1,2,0.5\n")
    info = ingest_tables([EdgeTable(str(csv), "src", "dst", "w")], tmp_path / "out2")
    g, nodes = _load(tmp_path / "out2")
    assert nodes == [("node", 1), ("node", 2), ("node", 3)] and info["id_type"] == "integer"
    assert _edges(g, nodes)[(("node", 1), ("node", 2))] == pytest.approx(2.0)


@pytest.mark.parametrize("case, match", [
    ("null_ids", r"2 of 3 rows have a null id \(1 in the source, 1 in the target column\)"),
    ("zero_weight", r"1 of 2 rows have a null, NaN, infinite, zero or negative value in weight column 'w'"),
    ("inf_weight", r"weight column 'w'"),
    ("truncated", "not a readable Parquet file"),
    ("mixed_tables", "node ids of type string, but of type integer"),
    ("misnamed", r"no column 'recevier' for \[\[input.tables\]\] entry 2 target \(did you mean 'receiver'\?\)"),
])
def test_bad_input_names_file_and_column(tmp_path, case, match):
    good = _w(tmp_path / "good.parquet", sender=pa.array([1, 2]), receiver=pa.array([2, 3]))
    tables = [EdgeTable(good, "sender", "receiver")]
    if case == "null_ids":
        tables = [EdgeTable(_w(tmp_path / "n.parquet", s=["a", None, "b"], t=["b", "c", None]), "s", "t")]
    elif case in ("zero_weight", "inf_weight"):
        bad = 0.0 if case == "zero_weight" else float("inf")
        tables = [EdgeTable(_w(tmp_path / "w.parquet", s=["a", "b"], t=["b", "c"], w=[1.0, bad]), "s", "t", "w")]
    elif case == "truncated":
        data = (tmp_path / "good.parquet").read_bytes()
        (tmp_path / "cut.parquet").write_bytes(data[: len(data) // 2])
        tables = [EdgeTable(str(tmp_path / "cut.parquet"), "sender", "receiver")]
    elif case == "mixed_tables":
        tables.append(EdgeTable(_w(tmp_path / "s.parquet", sender=["x"], receiver=["y"]), "sender", "receiver"))
    elif case == "misnamed":
        tables.append(EdgeTable(good, "sender", "recevier"))
    with pytest.raises(EdgeTableError, match=match):
        validate_edge_tables(tables)
    with pytest.raises(EdgeTableError, match=match):
        ingest_tables(tables, tmp_path / "out")
    assert not (tmp_path / "out" / "ingest.json").exists()
