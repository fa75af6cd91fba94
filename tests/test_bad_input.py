"""Every bad input exits 2 within seconds with one line naming the file, column or key, no traceback, and the store
byte-identical; and the smaller defects of issue 13 (foldin without new nodes, export to CSV, CSV entity tables,
output paths), each through ``graphkit.cli.main`` in this process.

The store is built once per test process by a tiny demo refresh through ``graphkit.pipeline.refresh`` (no Prefect:
conftest's ``demo_template``) and copied for every test, so no test sees another's changes.
"""

from __future__ import annotations

import hashlib
import math
import re
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.csv as pcsv
import pyarrow.parquet as pq
import pytest

import graphkit.cli
from conftest import FAST_DEMO, cli, copy_store
from graphkit.store import list_versions, read_table

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "sample_parquet" / "demo.toml"


@pytest.fixture
def store(demo_template, tmp_path):
    """A private copy of conftest's ``demo_template`` (the demo refreshed with FAST_DEMO, version 1)."""
    return copy_store(demo_template, tmp_path / "store")


def digest_tree(folder: Path) -> dict[str, str]:
    """Every file and folder below ``folder`` with the SHA-256 of its bytes (the writer's lock file aside)."""
    out = {}
    for p in sorted(folder.rglob("*")):
        rel = str(p.relative_to(folder))
        if p.is_dir():
            out[rel + "/"] = "dir"
        elif p.name != ".lock":
            out[rel] = hashlib.sha256(p.read_bytes()).hexdigest()
    return out


def run(capsys, *argv) -> tuple[int, str, str, float]:
    """conftest's ``cli`` (``graphkit.cli.main`` in this process), with anything written around its streams."""
    code, out, err, seconds = cli(*argv)
    around = capsys.readouterr()
    return code, around.out + out, around.err + err, seconds


@pytest.fixture(autouse=True)
def no_prefect(monkeypatch):
    """A bad input must fail before the flow: reaching Prefect here is a failure of the test, not a slow run."""
    def reached(*_a, **_k):
        raise RuntimeError("preflight let a bad input through to the Prefect flow")

    monkeypatch.setattr(graphkit.cli, "_prefect_env", reached)
    monkeypatch.delenv("GRAPHKIT_ID_SALT", raising=False)
    monkeypatch.delenv("GRAPHKIT_DEBUG", raising=False)


# ------------------------------------------------------------------------------------------ bad configurations

#: --set overrides on the demo config (after FAST_DEMO), and the message they must give.
BAD_SETS = {
    "dim_0": (["train.dim=0"], r"--set train.dim: \[train\] dim: .*got 0"),
    "dim_too_big": (["train.dim=5000"], r"--set train.dim: \[train\] dim: .*less than or equal to 4096"),
    "length_1": (["walks.length=1"], r"--set walks.length: \[walks\] length: .*got 1"),
    "per_node_0": (["walks.per_node=0"], r"--set walks.per_node: \[walks\] per_node"),
    "window_0": (["train.window=0"], r"--set train.window: \[train\] window"),
    "negatives_0": (["train.negatives=0"], r"--set train.negatives: \[train\] negatives"),
    "epochs_0": (["train.epochs=0"], r"--set train.epochs: \[train\] epochs"),
    # the drivers' own bounds, which preflight did not know before
    "p_too_small": (["walks.p=0.0001"], r"--set walks.p: \[walks\] p: .*greater than or equal to 0.001"),
    "q_too_big": (["walks.q=5000"], r"--set walks.q: \[walks\] q: .*less than or equal to 1000"),
    "learning_rate_below_floor": (["train.learning_rate=0.00001"],
                                  r"--set train.learning_rate: \[train\] learning_rate: .*0.0001"),
    "learning_rate_0": (["train.learning_rate=0"], r"\[train\] learning_rate"),
    "subsample_2": (["train.subsample=2"], r"--set train.subsample: \[train\] subsample"),
    "subsample_nan": (["train.subsample=nan"], r"--set train.subsample: \[train\] subsample"),
    "threads_too_many": (["train.threads=100000"], r"--set train.threads: \[train\] threads: at most \d+ threads"),
    "seed_over_64_bits": (["walks.seed=18446744073709551616"], r"--set walks.seed: \[walks\] seed"),
    "eval_seed_negative": (["evaluate.seed=-1"], r"--set evaluate.seed: \[evaluate\] seed"),
    # rules between keys
    "dask_address_and_workers": (['dask.address="tcp://127.0.0.1:1"', "dask.workers=2"],
                                 r"--set dask.workers: \[dask\] workers .* \[dask\] address"),
    "auc_gate_without_holdout": (["gates.min_link_auc=0.5"],
                                 r"--set gates.min_link_auc: \[gates\] min_link_auc needs held-out edges"),
    "f1_gate_without_labels": (["gates.min_micro_f1=0.5"],
                               r"--set gates.min_micro_f1: \[gates\] min_micro_f1 needs node labels"),
    "macro_gate_without_labels": (["gates.min_macro_f1=0.5"], r"\[gates\] min_macro_f1 needs node labels"),
    "align_gate_without_align": (["store.align=false", "gates.max_align_residual=0.1"],
                                 r"\[gates\] max_align_residual needs the alignment"),
    "softmax_with_negatives": (["train.objective=hierarchical_softmax"],
                               r"--set train.objective: \[train\] negatives applies to objective"),
    "holdout_model_without_holdout": (["evaluate.publish_holdout_model=true"],
                                      r"\[evaluate\] publish_holdout_model = true needs held-out edges"),
    "label_kind_without_labels": (['evaluate.label_kind="account"'],
                                  r"--set evaluate.label_kind: \[evaluate\] label_kind is set but"),
    "window_without_timestamp": (["input.last_days=3"], r"--set input.last_days: \[input\] last_days needs a "
                                                        r"timestamp column"),
    "decay_without_timestamp": (["input.half_life_days=3"], r"\[input\] half_life_days needs a timestamp"),
    "since_after_until": (['input.timestamp="sent_at"', "input.since=2026-12-01", "input.until=2026-11-01"],
                          r"--set input.since: \[input\] since \(2026-12-01\) must be before \[input\] until"),
    "window_outside_the_data": (['input.timestamp="sent_at"', "input.since=2000-01-01", "input.until=2000-02-01"],
                                r"transfers\.parquet: no usable edge \(\d+ rows: \d+ outside the time window"),
    "decay_below_float32": (['input.timestamp="sent_at"', "input.half_life_days=0.01"],
                            r"transfers\.parquet: \d+ of \d+ rows are so old that their weight, halved every "
                            r"\[input\] half_life_days = 0.01 days, falls below the smallest float32"),
    # keys, types, inputs
    "unknown_key": (["train.dimm=3"], r"unknown key \[train\] dimm \(did you mean 'dim'\?\)"),
    "wrong_type": (['train.dim="x"'], r"--set train.dim: \[train\] dim: input should be a valid integer"),
    "wrong_list": (["evaluate.ratios=[0.5, 1.5]"], r"\[evaluate\] ratios: training shares"),
    "missing_column": (["input.source=sendr"], r"transfers\.parquet: no column 'sendr' .*did you mean 'sender'"),
    "missing_edges": (['input.edges="nope.parquet"'], r"nope\.parquet: file not found"),
    "null_ids": (["input.drop_null_ids=false"], r"transfers\.parquet: 7 of \d+ rows have a null id"),
    "missing_labels": (['evaluate.labels="nope.parquet"'], r"nope\.parquet"),
    "hash_without_key": (["input.hash_ids=true"], r"hash_ids = true needs a secret key in environment variable"),
    "csv_delimiter_two_chars": (['input.csv_delimiter=";;"'],
                                r"--set input.csv_delimiter: \[input\] csv_delimiter: must be one character"),
    "csv_delimiter_quote": (["input.csv_delimiter='\"'"], r"\[input\] csv_delimiter: '\"' cannot separate fields"),
    "csv_header_not_bool": (['input.csv_header="no"'], r"--set input.csv_header: \[input\] csv_header: input "
                                                       r"should be a valid boolean"),
    # object-store URLs that need no server to refuse (the others: tests/test_object_storage.py)
    "store_on_object_storage": (['store.path="s3://night-lake/store"'],
                                r"--set store.path: \[store\] path: the store is a local folder"),
    "edges_unknown_protocol": (['input.edges="nosuch://night-lake/edges/"'],
                               r"nosuch://night-lake/edges: unknown storage protocol 'nosuch'"),
    "edges_url_with_credentials": (['input.edges="s3://AKIAREADER:hunter2-hunter2@night-lake/edges/"'],
                                   r"s3://\*\*\*@night-lake/edges/: credentials in a URL are refused"),
    "labels_unknown_protocol": (['evaluate.labels="nosuch://night-lake/labels.parquet"'],
                                r"nosuch://night-lake/labels\.parquet: unknown storage protocol"),
}


@pytest.mark.parametrize("case", sorted(BAD_SETS))
def test_bad_config_exits_2_with_one_line(store, capsys, case):
    overrides, match = BAD_SETS[case]
    before = digest_tree(store)
    argv = ["refresh", DEMO, "--set", f'store.path="{store}"']
    for o in [*FAST_DEMO, *overrides]:
        argv += ["--set", o]
    code, _, err, seconds = run(capsys, *argv)
    assert code == 2, err
    assert len(err.strip().splitlines()) == 1 and "Traceback" not in err, err
    assert re.search(match, err), err
    assert seconds < 10
    assert digest_tree(store) == before


def test_the_drivers_and_the_config_share_their_bounds():
    """A value at the config's bound is one the drivers accept, a value past it one they refuse."""
    from pydantic import ValidationError

    import graphkit.checks as b
    from graphkit.config import TrainSection, WalksSection
    from graphkit.errors import ConfigError
    from graphkit.walks import check_walk_options, check_walk_params

    for p in b.P_Q_RANGE:
        WalksSection(p=p, q=p)
        check_walk_options(True, p, p, "stop")
    for bad in (b.P_Q_RANGE[0] / 2, b.P_Q_RANGE[1] * 2):
        with pytest.raises(ValidationError):
            WalksSection(p=bad)
        with pytest.raises(ConfigError, match="p must lie in"):
            check_walk_options(True, bad, 1.0, "stop")
    check_walk_params(b.PER_NODE_MIN, b.LENGTH_MIN, b.SEED_MAX)
    WalksSection(per_node=b.PER_NODE_MIN, length=b.LENGTH_MIN, seed=b.SEED_MAX)
    with pytest.raises(ConfigError, match="seed must be <="):
        check_walk_params(1, 2, b.SEED_MAX + 1)
    with pytest.raises(ValidationError):
        WalksSection(seed=b.SEED_MAX + 1)
    TrainSection(dim=b.DIM_RANGE[1], learning_rate=b.MIN_LEARNING_RATE, subsample=b.SUBSAMPLE_RANGE[1])
    for bad in (dict(dim=b.DIM_RANGE[1] + 1), dict(learning_rate=b.MIN_LEARNING_RATE / 2),
                dict(learning_rate=b.LEARNING_RATE_MAX * 2), dict(subsample=b.SUBSAMPLE_RANGE[1] * 2),
                dict(threads=b.max_threads() + 1)):
        with pytest.raises(ValidationError):
            TrainSection(**bad)
    # the same values through the trainer: each refused with the parameter's name
    from graphkit.train import train_vectors

    walks = np.array([[0, 1, 2, 1]], np.int32)
    for bad, name in ((dict(dim=b.DIM_RANGE[1] + 1), "dim"), (dict(learning_rate=b.LEARNING_RATE_MAX * 2),
                                                             "learning_rate"),
                      (dict(subsample=b.SUBSAMPLE_RANGE[1] * 2), "subsample"),
                      (dict(learning_rate=b.MIN_LEARNING_RATE / 2), "min_learning_rate"),
                      (dict(threads=b.max_threads() + 1), "threads")):
        with pytest.raises(ConfigError, match=name):
            train_vectors(walks, 3, **bad)


# ------------------------------------------------------------------------------------------ bad edge tables

def _weights(kind):
    """Two edges, the second with a bad weight of ``kind`` (as Arrow, so the Parquet type is kept)."""
    import decimal

    return {"negative": pa.array([1.0, -1.0]), "zero": pa.array([1.0, 0.0]), "nan": pa.array([1.0, math.nan]),
            "inf": pa.array([1.0, math.inf]), "null": pa.array([1.0, None]), "string": pa.array(["1", "x"]),
            "bool": pa.array([True, False]),
            "negative_decimal": pa.array([decimal.Decimal("1.5"), decimal.Decimal("-2.5")]),
            "huge_negative_int": pa.array([1, -(2**62)], pa.int64()),
            "over_float32": pa.array([1.0, 1e39]), "under_float32": pa.array([1.0, 1e-50])}[kind]


WEIGHT_REASON = r"1 of 2 rows have a null, NaN, infinite, zero or negative value in weight column 'amount'"
BAD_TABLES = {
    **{f"weight_{k}_{fmt}": (k, fmt, WEIGHT_REASON) for fmt in ("parquet", "csv")
       for k in ("negative", "zero", "nan", "inf", "null", "negative_decimal", "huge_negative_int", "over_float32",
                 "under_float32")},
    "weight_string_parquet": ("string", "parquet", r"weight column 'amount' must be numeric, got VARCHAR"),
    "weight_string_csv": ("string", "csv", r"weight column 'amount' must be numeric, got VARCHAR"),
    "weight_bool_parquet": ("bool", "parquet", r"weight column 'amount' must be numeric, got bool"),
    "not_parquet": (None, "parquet", r"edges\.parquet: not a readable Parquet file"),
    "truncated": (None, "parquet", r"edges\.parquet: not a readable Parquet file"),
    "empty": (None, "parquet", r"the edge table is empty \(0 rows\)"),
    "only_self_loops": (None, "parquet", r"no usable edge .*2 self-loops"),
    "mixed_id_types": (None, "parquet", r"node ids of type string, but of type integer"),
    "missing_weight_column": (None, "parquet", r"no column 'amount' for \[input\] weight"),
}

TABLE_CONFIG = """
[input]
edges = "{edges}"
source = "sender"
target = "receiver"
weight = "amount"

[walks]
per_node = 2
length = 10

[train]
dim = 16

[evaluate]
link_holdout = 0

[store]
path = "{store}"
"""


def _write_table(folder: Path, case: str, kind, fmt: str) -> str:
    ok = {"sender": ["a", "b"], "receiver": ["b", "c"]}
    if kind is not None:
        table = pa.table({**ok, "amount": _weights(kind)})
        if fmt == "csv":
            if kind == "null":
                (folder / "edges.csv").write_text("sender,receiver,amount\na,b,1.0\nb,c,\n")
            else:
                pcsv.write_csv(table, folder / "edges.csv")
            return "edges.csv"
        pq.write_table(table, folder / "edges.parquet")
        return "edges.parquet"
    if case == "not_parquet":
        (folder / "edges.parquet").write_text("sender,receiver,amount\na,b,1\n")
    elif case == "truncated":
        pq.write_table(pa.table({**ok, "amount": [1.0, 2.0]}), folder / "full.parquet")
        data = (folder / "full.parquet").read_bytes()
        (folder / "edges.parquet").write_bytes(data[: len(data) // 2])
    elif case == "empty":
        pq.write_table(pa.table({"sender": pa.array([], pa.string()), "receiver": pa.array([], pa.string()),
                                 "amount": pa.array([], pa.float64())}), folder / "edges.parquet")
    elif case == "only_self_loops":
        pq.write_table(pa.table({"sender": ["a", "b"], "receiver": ["a", "b"], "amount": [1.0, 1.0]}),
                       folder / "edges.parquet")
    elif case == "mixed_id_types":
        (folder / "edges").mkdir()
        pq.write_table(pa.table({"sender": [1], "receiver": [2], "amount": [1.0]}), folder / "edges" / "1.parquet")
        pq.write_table(pa.table({"sender": ["a"], "receiver": ["b"], "amount": [1.0]}),
                       folder / "edges" / "2.parquet")
        return "edges"
    elif case == "missing_weight_column":
        pq.write_table(pa.table(ok), folder / "edges.parquet")
    return "edges.parquet"


@pytest.mark.parametrize("case", sorted(BAD_TABLES))
def test_bad_edge_table_exits_2_with_the_reason(store, tmp_path, capsys, case):
    kind, fmt, match = BAD_TABLES[case]
    folder = tmp_path / "input"
    folder.mkdir()
    edges = _write_table(folder, case, kind, fmt)
    config = folder / "c.toml"
    config.write_text(TABLE_CONFIG.format(edges=edges, store=store))
    before = digest_tree(store)
    for command in ("refresh", "foldin"):
        code, _, err, seconds = run(capsys, command, config)
        assert code == 2, err
        assert len(err.strip().splitlines()) == 1 and "Traceback" not in err, err
        assert re.search(match, err), err
        assert str(folder) in err  # names the file
        assert seconds < 10
        assert digest_tree(store) == before


# ------------------------------------------------------------------------------------------ input discovery

def _write_discovered(folder: Path, case: str) -> tuple[str, str]:
    """An edge table that discovery refuses: (its path in the config, extra [input] lines)."""
    rows = "a,b,1.0\nb,c,2.0\n"
    if case == "short_header":
        (folder / "edges.csv").write_text("sender,receiver\n" + rows)
        return "edges.csv", ""
    if case == "long_header":
        (folder / "edges.tsv").write_text("sender\treceiver\tamount\tnote\n" + rows.replace(",", "\t"))
        return "edges.tsv", ""
    if case == "headerless_width_changes":
        (folder / "edges").mkdir()
        (folder / "edges" / "1.csv").write_text(rows)
        (folder / "edges" / "2.csv").write_text("a,b,1.0,x\n")
        return "edges", 'csv_header = false\n'
    if case == "semicolon_file_read_with_commas":  # the header is one field: its name says what happened
        (folder / "edges.csv").write_text("sender;receiver;amount\n" + rows.replace(",", ";"))
        return "edges.csv", ""
    if case == "mixed_formats":
        (folder / "edges").mkdir()
        pq.write_table(pa.table({"sender": ["a"], "receiver": ["b"], "amount": [1.0]}), folder / "edges" / "1.parquet")
        (folder / "edges" / "2.csv.gz").write_bytes(__import__("gzip").compress(b"sender,receiver,amount\na,b,1\n"))
        return "edges", ""
    if case == "empty_folder":
        (folder / "edges" / "_temporary").mkdir(parents=True)
        (folder / "edges" / "_SUCCESS").write_text("")
        (folder / "edges" / ".part-0.parquet.crc").write_text("")
        return "edges", ""
    if case == "int_partition_as_time":
        (folder / "edges" / "day=20261130").mkdir(parents=True)
        pq.write_table(pa.table({"sender": ["a"], "receiver": ["b"], "amount": [1.0]}),
                       folder / "edges" / "day=20261130" / "part-0.parquet")
        return "edges", 'timestamp = "day"\n'
    raise AssertionError(case)


BAD_DISCOVERY = {
    "short_header": r"edges\.csv: line 2 has 3 fields but the header row \(line 1\) has 2",
    "long_header": r"edges\.tsv: line 2 has 3 fields but the header row \(line 1\) has 4",
    "headerless_width_changes": r"2\.csv: line 1 has 4 fields but line 1 of \S+1\.csv has 3",
    "semicolon_file_read_with_commas": r"edges\.csv: no column 'sender' for \[input\] source .*sender;receiver;amount",
    "mixed_formats": r"edges: mixes edge file formats \(1 csv, 1 parquet files",
    "empty_folder": r"edges: folder holds no edge files",
    "int_partition_as_time": r"day=20261130.*timestamp column 'day' must hold dates or times .*got BIGINT",
}


@pytest.mark.parametrize("case", sorted(BAD_DISCOVERY))
def test_bad_discovery_exits_2_naming_the_file_or_folder(store, tmp_path, capsys, case):
    folder = tmp_path / "input"
    folder.mkdir()
    edges, extra = _write_discovered(folder, case)
    config = folder / "c.toml"
    config.write_text(TABLE_CONFIG.format(edges=edges, store=store).replace('weight = "amount"\n',
                                                                             'weight = "amount"\n' + extra))
    before = digest_tree(store)
    code, _, err, seconds = run(capsys, "refresh", config)
    assert code == 2, err
    assert len(err.strip().splitlines()) == 1 and "Traceback" not in err, err
    assert re.search(BAD_DISCOVERY[case], err), err
    assert str(folder / edges) in err  # names the file or folder
    assert seconds < 10
    assert digest_tree(store) == before


# ------------------------------------------------------------------------------------------ other commands

def _entities(tmp_path, store) -> Path:
    ids = read_table(store).column("node_id").to_pylist()[:5]
    path = tmp_path / "customers.parquet"
    pq.write_table(pa.table({"customer": ids + ["acct-nobody"], "score": np.arange(6.0)}), path)
    return path


BAD_COMMANDS = {
    "export_unknown_extension": (["export", "{store}", "--out", "{tmp}/v.txt"], r"unknown file extension '\.txt'"),
    "export_no_extension": (["export", "{store}", "--out", "{tmp}/vectors"], r"unknown file extension"),
    "export_into_store": (["export", "{store}", "--out", "{store}/versions/x.parquet"],
                          r"would write among the store's own files"),
    "export_over_a_version": (["export", "{store}", "--out", "{store}/versions/000001/embeddings.parquet"],
                              r"would write among the store's own files"),
    "export_under_a_file": (["export", "{store}", "--out", "{tmp}/customers.parquet/v.parquet"],
                            r"cannot create the folder .* is a file"),
    "export_onto_a_folder": (["export", "{store}", "--out", "{tmp}/folder.parquet"], r"is a folder"),
    "export_no_version": (["export", "{store}", "--out", "{tmp}/v.parquet", "--version", "99"], r"no complete version 99"),
    "export_no_store": (["export", "{tmp}/nostore", "--out", "{tmp}/v.parquet"], r"nostore"),
    "features_csv_flag_parquet_name": (["features", "{store}", "--entities", "{tmp}/customers.parquet", "--on",
                                        "customer", "--out", "{tmp}/f.parquet", "--csv"],
                                       r"--csv writes CSV, but --out .*f\.parquet names a parquet file"),
    "features_unknown_extension": (["features", "{store}", "--entities", "{tmp}/customers.parquet", "--on",
                                    "customer", "--out", "{tmp}/f.json"], r"unknown file extension '\.json'"),
    "features_missing_column": (["features", "{store}", "--entities", "{tmp}/customers.parquet", "--on", "custmer",
                                 "--out", "{tmp}/f.parquet"], r"no column 'custmer' for --on \(did you mean"),
    "features_missing_entities": (["features", "{store}", "--entities", "{tmp}/nope.parquet", "--on", "customer",
                                   "--out", "{tmp}/f.parquet"], r"nope\.parquet: entity table not found"),
    "features_csv_not_parquet": (["features", "{store}", "--entities", "{tmp}/people.parquet", "--on", "customer",
                                  "--out", "{tmp}/f.parquet"],
                                 r"people\.parquet: not a readable Parquet entity table .*must end in \.csv"),
    "features_bad_csv_column": (["features", "{store}", "--entities", "{tmp}/people.csv", "--on", "id",
                                 "--out", "{tmp}/f.csv"], r"people\.csv: no column 'id' for --on"),
    "features_into_store": (["features", "{store}", "--entities", "{tmp}/customers.parquet", "--on", "customer",
                             "--out", "{store}/work/f.parquet"], r"would write among the store's own files"),
    "report_unknown_extension": (["report", "{store}", "--out", "{tmp}/r.pdf"], r"unknown file extension '\.pdf'"),
    "report_under_a_file": (["report", "{store}", "--out", "{tmp}/customers.parquet/r.html"], r"is a file"),
    "similar_unknown_node": (["similar", "{store}", "acct-nobody"], r"node id 'acct-nobody' is not in"),
    "similar_top_0": (["similar", "{store}", "acct-nobody", "--top", "0"], r"--top must be >= 1"),
    "versions_no_store": (["versions", "{tmp}/nostore"], r"no embedding store here"),
    "foldin_bad_key": (["foldin", "{tmp}/bad.toml"], r"unknown key \[train\] dimm"),
    "refresh_no_config": (["refresh", "{tmp}/none.toml"], r"config file not found"),
    "usage_error": (["export", "{store}"], r"the following arguments are required: --out"),
}


@pytest.mark.parametrize("case", sorted(BAD_COMMANDS))
def test_bad_command_exits_2_and_changes_nothing(store, tmp_path, capsys, case):
    argv, match = BAD_COMMANDS[case]
    _entities(tmp_path, store)
    (tmp_path / "folder.parquet").mkdir()
    (tmp_path / "people.parquet").write_text("customer,score\nacct-1,1\n")  # CSV bytes under a Parquet name
    (tmp_path / "people.csv").write_text("customer,score\nacct-1,1\n")
    (tmp_path / "bad.toml").write_text(DEMO.read_text().replace("[train]", "[train]\ndimm = 3", 1))
    before = digest_tree(store)
    outside = sorted(p.name for p in tmp_path.iterdir())
    code, _, err, seconds = run(capsys, *(a.format(store=store, tmp=tmp_path) for a in argv))
    assert code == 2, err
    assert len(err.strip().splitlines()) <= (2 if case == "usage_error" else 1) and "Traceback" not in err, err
    assert re.search(match, err), err
    assert seconds < 10
    assert digest_tree(store) == before
    assert sorted(p.name for p in tmp_path.iterdir()) == outside  # no output, not even a folder


# ------------------------------------------------------------------------------------------ the smaller defects

def test_foldin_without_new_nodes_publishes_nothing(store, capsys):
    config = store.parent / "c.toml"
    text = DEMO.read_text().replace('path = "../demo_store"', f'path = "{store}"')
    config.write_text(text.replace('edges = "transfers.parquet"',
                                   f'edges = "{ROOT / "sample_parquet" / "transfers.parquet"}"')
                      .replace('labels = "labels.parquet"', f'labels = "{ROOT / "sample_parquet" / "labels.parquet"}"'))
    before = digest_tree(store)
    argv = ["foldin", config]
    for o in FAST_DEMO:
        argv += ["--set", o]
    code, out, err, _ = run(capsys, *argv)
    assert code == 0, err
    assert out.strip() == "no new nodes since version 1: nothing published"
    assert [v["version"] for v in list_versions(store)] == [1]
    after = digest_tree(store)
    assert {k: v for k, v in after.items() if not k.startswith("work")} == \
        {k: v for k, v in before.items() if not k.startswith("work")}
    assert not any((store / "work").iterdir())  # the fold-in's ingest folder is removed


def test_foldin_with_new_nodes_but_no_known_neighbour_publishes_nothing(store, tmp_path, capsys):
    demo = pq.read_table(ROOT / "sample_parquet" / "transfers.parquet")
    extra = pa.table({"sender": ["acct-new-1"], "receiver": ["acct-new-2"], "amount": [5.0],
                      "sent_at": demo.column("sent_at").slice(0, 1)}).cast(demo.schema)
    pq.write_table(pa.concat_tables([demo, extra]), tmp_path / "edges.parquet")
    config = tmp_path / "c.toml"
    config.write_text(TABLE_CONFIG.format(edges="edges.parquet", store=store)
                      .replace('weight = "amount"', 'weight = "amount"\ndrop_null_ids = true'))
    before = digest_tree(store)
    code, out, err, _ = run(capsys, "foldin", config)
    assert code == 0, err
    assert out.strip() == "2 new nodes, none with a known neighbour, since version 1: nothing published"
    assert [v["version"] for v in list_versions(store)] == [1]
    after = digest_tree(store)
    assert {k: v for k, v in after.items() if not k.startswith("work")} == \
        {k: v for k, v in before.items() if not k.startswith("work")}


def test_export_csv_is_csv_with_one_column_per_dimension(store, tmp_path, capsys):
    """Reference: pyarrow's CSV reader reads back exactly the float32 vectors of the Parquet export."""
    code, _, err, _ = run(capsys, "export", store, "--out", tmp_path / "new" / "deeper" / "v.csv")
    assert code == 0, err
    code, _, err, _ = run(capsys, "export", store, "--out", tmp_path / "v.parquet")
    assert code == 0, err
    raw = (tmp_path / "new" / "deeper" / "v.csv").read_bytes()
    assert not raw.startswith(b"PAR1") and raw.splitlines()[0].decode().startswith('"node_id","node_kind","emb_000"')
    csv = pcsv.read_csv(tmp_path / "new" / "deeper" / "v.csv")
    parquet = pq.read_table(tmp_path / "v.parquet")
    dim = parquet.schema.field("vector").type.list_size
    assert csv.column_names == ["node_id", "node_kind", *[f"emb_{i:03d}" for i in range(dim)]]
    assert csv.column("node_id").to_pylist() == parquet.column("node_id").to_pylist()
    want = parquet.column("vector").combine_chunks().flatten().to_numpy().reshape(-1, dim)
    got = np.column_stack([csv.column(f"emb_{i:03d}").to_numpy() for i in range(dim)]).astype(np.float32)
    np.testing.assert_array_equal(got, want)  # the text keeps every float32 exactly (shortest round trip)


def test_features_accepts_csv_entities_and_writes_the_named_format(store, tmp_path, capsys):
    ids = read_table(store).column("node_id").to_pylist()[:3]
    (tmp_path / "people.csv").write_text("customer,score\n" + "".join(f"{i},{n}\n" for n, i in enumerate(ids))
                                         + "007,9\n")
    code, out, err, _ = run(capsys, "features", store, "--entities", tmp_path / "people.csv", "--on", "customer",
                            "--out", tmp_path / "sub" / "f.parquet")
    assert code == 0, err
    assert "1 entities have no vector" in out
    t = pq.read_table(tmp_path / "sub" / "f.parquet")
    assert t.column("customer").to_pylist() == ids + ["007"]  # the id column as written, leading zeros kept
    assert t.column("emb_000").null_count == 1 and t.column("score").type == pa.int64()
    code, _, err, _ = run(capsys, "features", store, "--entities", tmp_path / "people.csv", "--on", "customer",
                          "--out", tmp_path / "f.csv", "--csv")
    assert code == 0, err
    assert not (tmp_path / "f.csv").read_bytes().startswith(b"PAR1")
    assert pcsv.read_csv(tmp_path / "f.csv").num_rows == 4


def test_report_creates_a_missing_folder(store, tmp_path, capsys):
    code, _, err, _ = run(capsys, "report", store, "--out", tmp_path / "a" / "b" / "r.html")
    assert code == 0, err
    assert (tmp_path / "a" / "b" / "r.html").read_text().startswith("<!DOCTYPE html>")
