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


# ---------------------------------------------------------------------------------------- discovery (issue 14, item 6)
# Reference for every graph below: networkx's Graph built from the same rows as written (weights of repeated rows
# summed), compared edge by edge with what the ingest stored.
import gzip

import networkx as nx
import pyarrow.csv as pcsv

from graphkit import discover as gd

#: A fictional week of card payments: (customer, merchant, amount).
PAYMENTS = [("cus-01", "shop-a", 12.5), ("cus-02", "shop-a", 3.0), ("cus-01", "shop-b", 7.25),
            ("cus-03", "shop-c", 40.0), ("cus-02", "shop-b", 1.5), ("cus-01", "shop-a", 2.5)]


def _reference(rows) -> dict:
    ref = nx.Graph()
    for s, t, w in rows:
        prev = ref.get_edge_data(s, t, {"weight": 0.0})["weight"]
        ref.add_edge(s, t, weight=prev + w)
    return {frozenset((s, t)): d["weight"] for s, t, d in ref.edges(data=True)}


def _stored(out) -> dict:
    g, nodes = _load(out)
    got = {}
    for (a, b), w in _edges(g, nodes).items():
        got[frozenset((a[1], b[1]))] = w
    return got


def _text(rows, delimiter=",", header=("customer", "merchant", "amount")) -> str:
    lines = [delimiter.join(header)] if header else []
    lines += [delimiter.join((s, t, repr(w))) for s, t, w in rows]
    return "\n".join(lines) + "\n"


def _assert_same_graph(out, rows):
    got, ref = _stored(out), _reference(rows)
    assert got.keys() == ref.keys()
    for k, w in ref.items():
        assert got[k] == pytest.approx(w, rel=1e-6), k


def _ingest(tmp_path, path, *, name="out", **kw):
    gd._DISCOVERED.clear()
    table = EdgeTable(str(path), kw.pop("source", "customer"), kw.pop("target", "merchant"),
                      kw.pop("weight", "amount"), **kw)
    info = ingest_tables([table], tmp_path / name)
    return info


def test_folder_of_compressed_csv_skips_hidden_and_underscore_files(tmp_path):
    root = tmp_path / "payments"
    (root / "2026" / "_temporary").mkdir(parents=True)
    with gzip.open(root / "2026" / "mon.csv.gz", "wt") as f:
        f.write(_text(PAYMENTS[:3]))
    (root / "tue.csv").write_text(_text(PAYMENTS[3:5]))
    with pa.CompressedOutputStream(str(root / "2026" / "wed.csv.zst"), "zstd") as f:  # Arrow reads .zst itself
        f.write(_text(PAYMENTS[5:]).encode())
    # what writers leave beside the data: none of it is an edge file, and none of it may be read
    (root / "_SUCCESS").write_text("")
    (root / ".tue.csv.crc").write_bytes(b"\x00\x01 not text")
    (root / "2026" / "_temporary" / "part-9.csv").write_text("customer,merchant,amount\nghost,shop-z,1.0\n")
    (root / "2026" / ".mon.csv.gz.tmp-1").write_text("half a file")
    info = _ingest(tmp_path, root)
    assert [Path(f).name for f in info["files"]] == ["mon.csv.gz", "wed.csv.zst", "tue.csv"]
    _assert_same_graph(tmp_path / "out", PAYMENTS)
    assert [fp["path"] for fp in info["fingerprint"]] == [str(Path(f).resolve()) for f in info["files"]]


def test_glob_over_typed_hive_partitions(tmp_path):
    """A ``day=`` partition is the time column (typed as a date), a ``shop=`` partition the target id column;
    the glob's fixed part is where partition folders start."""
    root = tmp_path / "edges"
    days = {"2026-11-28": PAYMENTS[:2], "2026-11-29": PAYMENTS[2:4], "2026-11-30": PAYMENTS[4:]}
    for day, rows in days.items():
        for s, t, w in rows:
            folder = root / f"day={day}" / f"shop={t}"
            folder.mkdir(parents=True, exist_ok=True)
            n = len(list(folder.glob("*.parquet")))
            pq.write_table(pa.table({"customer": [s], "amount": [w]}), folder / f"part-{n}.parquet")
    (root / "day=2026-11-30" / "notes.txt").write_text("not in the glob")
    found = gd.discover(str(root / "day=*" / "**" / "*.parquet"))
    assert found.partitions == {"day": pa.date32(), "shop": pa.string()}
    assert found.format == "parquet" and len(found.files) == len(PAYMENTS)
    until = datetime(2026, 11, 30, tzinfo=timezone.utc)
    tables = [EdgeTable(str(root / "day=*" / "**" / "*.parquet"), "customer", "shop", "amount", timestamp="day")]
    info = ingest_tables(tables, tmp_path / "out", window={"until": until, "as_of": until})
    assert info["counts"]["rows"] == len(PAYMENTS) and info["counts"]["outside_window"] == 2  # the 30th is out
    _assert_same_graph(tmp_path / "out", PAYMENTS[:4])


@pytest.mark.parametrize("case, match", [
    ("int_day_as_time", r"day=20261129.*timestamp column 'day' must hold dates or times .*got BIGINT"),
    ("int_shop_with_string_customers", r"node ids of type integer, but of type string"),
    ("string_partition_weight", r"weight column 'amount' must be numeric, got VARCHAR"),
    ("misnamed_partition", r"no column 'shop' for \[input\] target \(did you mean 'shops'\?\)"),
])
def test_partition_columns_go_through_the_column_checks(tmp_path, case, match):
    root = tmp_path / "edges"
    part = {"int_day_as_time": "day=20261129", "int_shop_with_string_customers": "shop=17",
            "string_partition_weight": "amount=big", "misnamed_partition": "shops=a"}[case]
    (root / part).mkdir(parents=True)
    cols = {"customer": ["cus-01", "cus-02"], "shop": ["a", "b"], "amount": [1.0, 2.0]}
    cols.pop("shop" if case == "misnamed_partition" else part.split("=")[0], None)
    pq.write_table(pa.table(cols), root / part / "part-0.parquet")
    table = EdgeTable(str(root), "customer", "shop", "amount", timestamp="day" if "day" in part else None)
    gd._DISCOVERED.clear()
    with pytest.raises(EdgeTableError, match=match):
        validate_edge_tables([table])


@pytest.mark.parametrize("layout", ["headerless", "semicolon", "tsv", "tsv_headerless_gz"])
def test_text_layouts(tmp_path, layout):
    kw = {}
    if layout == "headerless":
        path = tmp_path / "p.csv"
        path.write_text(_text(PAYMENTS, header=None))
        kw = dict(csv_header=False, source=gd.headerless_name(1), target=gd.headerless_name(2),
                  weight=gd.headerless_name(3))
    elif layout == "semicolon":
        path = tmp_path / "p.csv"
        path.write_text(_text(PAYMENTS, delimiter=";"))
        kw = dict(csv_delimiter=";")
    elif layout == "tsv":
        path = tmp_path / "p.tsv"  # a tab by default, no option needed
        path.write_text(_text(PAYMENTS, delimiter="\t"))
    else:
        path = tmp_path / "p.tsv.gz"
        with gzip.open(path, "wt") as f:
            f.write(_text(PAYMENTS, delimiter="\t", header=None))
        kw = dict(csv_header=False, source="column_1", target="column_2", weight="column_3")
    info = _ingest(tmp_path, path, **kw)
    assert info["counts"]["rows"] == len(PAYMENTS)
    _assert_same_graph(tmp_path / "out", PAYMENTS)


def test_headerless_columns_are_named_by_position(tmp_path):
    path = tmp_path / "p.csv"
    path.write_text(_text(PAYMENTS, header=None))
    found = gd.discover(str(path), gd.CsvOptions(header=False))
    assert list(found.columns[0]) == ["column_1", "column_2", "column_3"]
    # with the default (a header row), the first row's values would be the names: the checks say so
    with pytest.raises(EdgeTableError, match=r"no column 'customer' for \[input\] source"):
        _ingest(tmp_path, path)


def test_a_header_row_shorter_or_longer_than_the_rows_names_the_file_and_line(tmp_path):
    short = tmp_path / "short.csv"
    short.write_text("customer,merchant\n" + "".join(f"{s},{t},{w}\n" for s, t, w in PAYMENTS))
    with pytest.raises(EdgeTableError, match=r"short\.csv: line 2 has 3 fields but the header row \(line 1\) has 2"):
        _ingest(tmp_path, short)
    long = tmp_path / "long.csv"
    long.write_text("customer,merchant,amount,note\n" + "".join(f"{s},{t},{w}\n" for s, t, w in PAYMENTS))
    with pytest.raises(EdgeTableError, match=r"long\.csv: line 2 has 3 fields but the header row \(line 1\) has 4"):
        _ingest(tmp_path, long)
    # a ragged row far past the first block (which discovery reads) is found by the scan, named with its line
    late = tmp_path / "late.csv"
    rows = "".join(f"cus-{i},shop-{i % 7},1.0\n" for i in range(150_000))
    late.write_text("customer,merchant,amount\n" + rows + "cus-x,shop-y\n")
    assert late.stat().st_size > 2 << 20
    with pytest.raises(EdgeTableError, match=r"late\.csv: line 150002 has 2 fields but the header row \(line 1\) "
                                             r"has 3"):
        _ingest(tmp_path, late)


def test_mixed_formats_and_empty_folders_are_named(tmp_path):
    mixed = tmp_path / "mixed"
    mixed.mkdir()
    pq.write_table(pa.table({"customer": ["a"], "merchant": ["b"], "amount": [1.0]}), mixed / "a.parquet")
    (mixed / "b.csv").write_text("customer,merchant,amount\na,b,1.0\n")
    with pytest.raises(EdgeTableError, match=rf"{mixed}: mixes edge file formats \(1 csv, 1 parquet files"):
        _ingest(tmp_path, mixed)
    empty = tmp_path / "empty"
    (empty / "_logs").mkdir(parents=True)
    (empty / "_SUCCESS").write_text("")
    (empty / "_logs" / "x.parquet").write_text("")
    with pytest.raises(EdgeTableError, match=rf"{empty}: folder holds no edge files"):
        _ingest(tmp_path, empty)


def test_discovery_runs_once_per_process_while_the_files_are_unchanged(tmp_path, monkeypatch):
    """The preflight before Prefect, the flow's preflight and the ingest: the footers are read once; a new file in
    the folder or a changed one is discovered again."""
    root = tmp_path / "edges"
    root.mkdir()
    pq.write_table(pa.table({"customer": ["a", "b"], "merchant": ["b", "c"], "amount": [1.0, 2.0]}),
                   root / "p0.parquet")
    reads = []
    schema = gd._file_schema
    monkeypatch.setattr(gd, "_file_schema", lambda f, *a: reads.append(f.name) or schema(f, *a))
    gd._DISCOVERED.clear()
    table = [EdgeTable(str(root), "customer", "merchant", "amount")]
    validate_edge_tables(table)
    validate_edge_tables(table)
    ingest_tables(table, tmp_path / "out")
    assert reads == ["p0.parquet"]
    pq.write_table(pa.table({"customer": ["c"], "merchant": ["d"], "amount": [1.0]}), root / "p1.parquet")
    assert validate_edge_tables(table)["counts"]["rows"] == 3
    assert reads == ["p0.parquet", "p0.parquet", "p1.parquet"]


@pytest.mark.parametrize("ending, codec", [(".gz", "gzip"), (".bz2", "bz2"), (".lz4", "lz4"), (".zst", "zstd"),
                                           (".zstd", "zstd")])
def test_every_compression_ending_of_text_files(tmp_path, ending, codec):
    path = tmp_path / f"payments.tsv{ending}"
    with pa.CompressedOutputStream(str(path), codec) as f:
        f.write(_text(PAYMENTS, delimiter="\t").encode())
    _ingest(tmp_path, path)
    _assert_same_graph(tmp_path / "out", PAYMENTS)


def test_only_an_empty_field_is_null_and_other_names_are_parquet(tmp_path):
    """Ids such as NA or NULL are ids (an account may be called that); a file without a known ending is Parquet,
    as Hive writes them, and a stray text file among them is an error naming it."""
    path = tmp_path / "p.csv"
    path.write_text("customer,merchant,amount\nNA,NULL,1.0\nnan,shop-a,2.0\n,shop-b,3.0\n")
    info = ingest_tables([EdgeTable(str(path), "customer", "merchant", "amount")], tmp_path / "out",
                         drop_null_ids=True)
    assert info["counts"]["dropped_null_ids"] == 1
    _assert_same_graph(tmp_path / "out", [("NA", "NULL", 1.0), ("nan", "shop-a", 2.0)])

    hive = tmp_path / "warehouse"
    hive.mkdir()
    pq.write_table(pa.table({"customer": ["cus-01"], "merchant": ["shop-a"], "amount": [1.0]}), hive / "000000_0")
    _ingest(tmp_path, hive, name="hive")
    _assert_same_graph(tmp_path / "hive", [("cus-01", "shop-a", 1.0)])
    (hive / "README.md").write_text("nightly export of the payments table\n")
    with pytest.raises(EdgeTableError, match=r"README\.md: not a readable Parquet file .*read as Parquet"):
        _ingest(tmp_path, hive, name="hive2")


def test_partition_nulls_and_clashing_names(tmp_path):
    root = tmp_path / "edges"
    for shop in ("shop-a", "__HIVE_DEFAULT_PARTITION__"):
        (root / f"shop={shop}").mkdir(parents=True)
        pq.write_table(pa.table({"customer": ["cus-01", "cus-02"], "amount": [1.0, 2.0]}),
                       root / f"shop={shop}" / "part-0.parquet")
    info = ingest_tables([EdgeTable(str(root), "customer", "shop", "amount")], tmp_path / "out", drop_null_ids=True)
    assert info["counts"]["dropped_null_ids"] == 2  # Hive's name for a null partition value
    _assert_same_graph(tmp_path / "out", [("cus-01", "shop-a", 1.0), ("cus-02", "shop-a", 2.0)])
    pq.write_table(pa.table({"customer": ["cus-03"], "shop": ["shop-z"], "amount": [1.0]}),
                   root / "shop=shop-a" / "part-1.parquet")
    with pytest.raises(EdgeTableError, match=r"part-1\.parquet: column 'shop' is both in the file and a partition"):
        validate_edge_tables([EdgeTable(str(root), "customer", "shop", "amount")])


def test_paths_with_quotes_and_partitions_reach_duckdb_intact(tmp_path):
    """The Parquet file list is written into the view's SQL text (graphkit.sql.inline): a quote in a folder name
    must stay a quote."""
    root = tmp_path / "o'hara's exports"
    (root / "day=2026-11-30").mkdir(parents=True)
    pq.write_table(pa.table({"customer": [s for s, _, _ in PAYMENTS], "merchant": [t for _, t, _ in PAYMENTS],
                             "amount": [w for _, _, w in PAYMENTS]}), root / "day=2026-11-30" / "it's.parquet")
    info = _ingest(tmp_path, root, timestamp="day")
    assert info["counts"]["rows"] == len(PAYMENTS)
    _assert_same_graph(tmp_path / "out", PAYMENTS)


def test_text_files_under_partition_folders(tmp_path):
    root = tmp_path / "edges"
    for s, t, w in PAYMENTS:
        (root / f"shop={t}").mkdir(parents=True, exist_ok=True)
        with open(root / f"shop={t}" / "part.csv", "a") as f:
            f.write(f"{s};{w}\n")
    found = gd.discover(str(root), gd.CsvOptions(header=False, delimiter=";"))
    assert found.partitions == {"shop": pa.string()} and list(found.columns[0]) == ["column_1", "column_2", "shop"]
    _ingest(tmp_path, root, source="column_1", target="shop", weight="column_2", csv_header=False,
            csv_delimiter=";")
    _assert_same_graph(tmp_path / "out", PAYMENTS)


def test_a_path_inside_a_partition_keeps_its_column(tmp_path):
    day = tmp_path / "edges" / "day=2026-11-30"
    day.mkdir(parents=True)
    pq.write_table(pa.table({"customer": ["cus-01"], "merchant": ["shop-a"], "amount": [1.0]}), day / "p.parquet")
    for path in (day, day / "*.parquet", day / "p.parquet"):
        found = gd.discover(str(path))
        assert found.partitions == {"day": pa.date32()}, path
        assert found.columns[0]["day"] == pa.date32()
    until = datetime(2026, 12, 1, tzinfo=timezone.utc)
    info = ingest_tables([EdgeTable(str(day / "p.parquet"), "customer", "merchant", "amount", timestamp="day")],
                         tmp_path / "out", window={"until": until, "as_of": until, "half_life_days": 1.0})
    g = AdjacencyArrays.load(tmp_path / "out" / "graph")
    assert info["counts"]["rows"] == 1 and float(g.weights[0]) == pytest.approx(0.5, rel=1e-5)  # one day old


def test_stage_keys_follow_the_discovered_files(tmp_path):
    """A rerun over the same folder resumes (same ingest folder); a new file, or a new CSV option, is a new ingest.
    Files discovery skips do not count."""
    from graphkit.config import load_config
    from graphkit.pipeline import plan_run

    root = tmp_path / "edges"
    root.mkdir()
    (root / "mon.csv").write_text(_text(PAYMENTS[:3]))
    (tmp_path / "c.toml").write_text('[input]\nedges = "edges"\nsource = "customer"\ntarget = "merchant"\n'
                                     'weight = "amount"\n[store]\npath = "st"\n')
    cfg = load_config(tmp_path / "c.toml")
    first = plan_run(cfg)
    assert [Path(fp["path"]).name for fp in first["fingerprint"]] == ["mon.csv"]
    (root / "_SUCCESS").write_text("")
    (root / ".mon.csv.crc").write_text("x")
    assert plan_run(cfg)["ingest_dir"] == first["ingest_dir"]
    assert plan_run(load_config(tmp_path / "c.toml", ['input.csv_delimiter=","']))["ingest_dir"] != \
        first["ingest_dir"]
    (root / "tue.csv").write_text(_text(PAYMENTS[3:]))
    assert plan_run(cfg)["ingest_dir"] != first["ingest_dir"]


def test_a_value_past_the_first_block_that_does_not_fit_its_column_is_named(tmp_path):
    """Arrow takes a text column's type from the file's first block (1 MiB); a later value of another kind fails
    the scan, and the message names the file, line, column and value."""
    path = tmp_path / "late.csv"
    path.write_text("customer,merchant,amount\n" + "".join(f"{i},{i % 7},1.0\n" for i in range(150_000))
                    + "cus-x,3,1.0\n")
    with pytest.raises(EdgeTableError, match=r"late\.csv: line 150002, column 'customer': 'cus-x' is not int64"):
        _ingest(tmp_path, path)


def test_quoted_fields_keep_delimiters_and_line_breaks(tmp_path):
    """Quoted ids holding the delimiter and a line break stay whole, over more than one 1 MiB block."""
    path = tmp_path / "p.csv"
    body = "".join(f'"cus-{i}, Lisbon","shop\n{i % 5}",1.0\n' for i in range(60_000))  # past one block
    path.write_text("customer,merchant,amount\n" + body)
    info = _ingest(tmp_path, path)
    rows = [(f"cus-{i}, Lisbon", f"shop\n{i % 5}", 1.0) for i in range(60_000)]
    assert info["counts"]["rows"] == len(rows)
    _assert_same_graph(tmp_path / "out", rows)
