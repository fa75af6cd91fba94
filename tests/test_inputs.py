"""Production inputs: several tables with node kinds, time windows and decay, hive folders, CSV (issue: real inputs).

References: networkx builds the same graph from the same rows; the decay is checked against the closed form
w * 0.5 ** (age / half_life).
"""

import os
from pathlib import Path
from datetime import datetime, timedelta, timezone

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from graphkit.errors import EdgeTableError
from graphkit.graph import AdjacencyArrays
from graphkit.ingest import EdgeTable, ingest_tables, validate_edge_tables


def _w(path, **cols):
    pq.write_table(pa.table(cols), path)
    return str(path)


def _load(out):
    g = AdjacencyArrays.load(out / "graph")
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


# ---------------------------------------------------------------------------------------------- as_of and fingerprints
def _nightly_config(tmp_path, extra=""):
    """A config with a relative window, as a nightly job has: the last 30 days, decay measured from as_of."""
    from graphkit.config import load_config

    t0 = datetime(2026, 11, 30, tzinfo=timezone.utc)
    _w(tmp_path / "e.parquet", s=["a", "b", "c"], t=["b", "c", "a"],
       at=pa.array([t0 - timedelta(days=d) for d in (1, 2, 3)], pa.timestamp("us", tz="UTC")))
    (tmp_path / "c.toml").write_text(f'[input]\nedges = "e.parquet"\nsource = "s"\ntarget = "t"\ntimestamp = "at"\n'
                                     f'last_days = 3650\nhalf_life_days = 30\n{extra}\n[store]\npath = "store"\n')
    return load_config(tmp_path / "c.toml")


def test_as_of_is_fixed_once_per_run_and_a_rerun_resumes_it(tmp_path):
    from graphkit.pipeline import RESUME_WITHIN_HOURS, begin_run, finish_run, plan_run

    cfg = _nightly_config(tmp_path)
    t0 = datetime(2026, 12, 1, 2, 0, 7, 123456, tzinfo=timezone.utc)
    first = plan_run(cfg, now=t0)
    assert (first["as_of"], first["as_of_source"]) == ("2026-12-01T02:00:07+00:00", "now")  # to the second
    assert first["window"]["since"] == (t0.replace(microsecond=0) - timedelta(days=3650)).isoformat()
    # without a record, another moment is another run: other stage folders
    assert plan_run(cfg, now=t0 + timedelta(seconds=1))["ingest_dir"] != first["ingest_dir"]

    begin_run(first)  # the run starts (under the lock) and records its as_of; then it is killed
    record = Path(first["run_record"])
    assert record.parent == cfg.store_path / "work" and record.is_file()
    rerun = plan_run(cfg, now=t0 + timedelta(hours=RESUME_WITHIN_HOURS - 1))
    assert (rerun["as_of"], rerun["as_of_source"]) == (first["as_of"], "resumed")
    assert all(rerun[k] == first[k] for k in ("ingest_dir", "walks_dir", "train_dir", "window"))
    # a day later it is a new run with a new window, as it is when the input has changed since
    late = plan_run(cfg, now=t0 + timedelta(hours=RESUME_WITHIN_HOURS + 1))
    assert late["as_of_source"] == "now" and late["ingest_dir"] != first["ingest_dir"]

    # a deployment run takes its scheduled time, whatever the record says; a config's until wins over both
    scheduled = datetime(2026, 12, 2, 1, 0, tzinfo=timezone(timedelta(hours=-1)))
    run = plan_run(cfg, scheduled, now=t0)
    assert (run["as_of"], run["as_of_source"]) == ("2026-12-02T02:00:00+00:00", "scheduled")
    (tmp_path / "fixed").mkdir()
    fixed = _nightly_config(tmp_path / "fixed", "until = 2026-11-30T12:00:00Z")
    run = plan_run(fixed, scheduled, now=t0)
    assert (run["as_of"], run["as_of_source"]) == ("2026-11-30T12:00:00+00:00", "until")

    finish_run(first)  # a finished run leaves no record: the next run starts afresh
    assert not record.exists()
    assert plan_run(cfg, now=t0 + timedelta(hours=1))["as_of_source"] == "now"


def test_as_of_is_in_the_ingest_key_only_where_it_shapes_the_graph(tmp_path):
    from graphkit.config import load_config
    from graphkit.pipeline import plan_run

    cfg = _nightly_config(tmp_path)
    t0 = datetime(2026, 12, 1, tzinfo=timezone.utc)
    # no window at all: the moment does not matter, a rerun resumes at any time
    plain = load_config(tmp_path / "c.toml", ["input.last_days=none", "input.half_life_days=none"])
    assert plan_run(plain, now=t0)["ingest_dir"] == plan_run(plain, now=t0 + timedelta(days=3))["ingest_dir"]
    # a fixed since, no decay: the window does not move with as_of either
    since = load_config(tmp_path / "c.toml", ["input.last_days=none", "input.half_life_days=none",
                                              "input.since=2026-11-01"])
    assert plan_run(since, now=t0)["ingest_dir"] == plan_run(since, now=t0 + timedelta(days=3))["ingest_dir"]
    assert plan_run(cfg, now=t0)["ingest_dir"] != plan_run(cfg, now=t0 + timedelta(days=3))["ingest_dir"]


def test_fingerprint_sees_any_content_change(tmp_path):
    from graphkit.io import fingerprint_files

    csv = tmp_path / "e.csv"
    csv.write_text("s,t\na,b\nb,c\n")
    st = csv.stat()
    [fp] = fingerprint_files([csv])
    assert fp["size"] == st.st_size and fp["mtime_ns"] == st.st_mtime_ns and fp["hashed"] == "full"
    import hashlib
    assert fp["sha256"] == hashlib.sha256(csv.read_bytes()).hexdigest()
    # the same bytes written again with the old mtime: the same fingerprint
    csv.write_text("s,t\na,b\nb,c\n")
    os.utime(csv, ns=(st.st_atime_ns, st.st_mtime_ns))
    assert fingerprint_files([csv]) == [fp]
    # an edit of the same size that keeps the mtime (as cp -p of other content would): the hash sees it
    csv.write_text("s,t\na,b\nb,d\n")
    os.utime(csv, ns=(st.st_atime_ns, st.st_mtime_ns))
    assert csv.stat().st_size == fp["size"] and fingerprint_files([csv])[0]["sha256"] != fp["sha256"]
    # past the hashing budget only the head and tail are hashed; the mtime still tells an edit
    [big] = fingerprint_files([csv], full_hash_budget=0)
    assert big["hashed"] == "edges"
    os.utime(csv, ns=(st.st_atime_ns, st.st_mtime_ns + 1_000_000))
    assert fingerprint_files([csv], full_hash_budget=0)[0]["mtime_ns"] != big["mtime_ns"]


def test_an_edited_csv_of_the_same_size_is_ingested_again(tmp_path):
    from graphkit.config import load_config
    from graphkit.pipeline import plan_run

    (tmp_path / "e.csv").write_text("s,t\na,b\nb,c\n")
    (tmp_path / "c.toml").write_text('[input]\nedges = "e.csv"\nsource = "s"\ntarget = "t"\n[store]\npath = "st"\n')
    cfg = load_config(tmp_path / "c.toml")
    before = plan_run(cfg)["ingest_dir"]
    st = (tmp_path / "e.csv").stat()
    (tmp_path / "e.csv").write_text("s,t\na,b\nb,d\n")
    os.utime(tmp_path / "e.csv", ns=(st.st_atime_ns, st.st_mtime_ns))
    assert plan_run(cfg)["ingest_dir"] != before
