"""Each night's quality: link prediction, node classification, drift, gates and the report, run through the
pipeline on a planted-partition graph (networkx.planted_partition_graph, a general-purpose reference generator;
scikit-learn computes AUC and F1)."""

import shutil
from pathlib import Path

import networkx as nx
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import graphkit
from conftest import cli
from graphkit.config import load_config
from graphkit.errors import ConfigError, GateFailure
from graphkit.store import current_version, list_versions

ROOT = Path(__file__).resolve().parent.parent

CONFIG = """
[input]
edges = "edges.parquet"
source = "a"
target = "b"

[walks]
per_node = 10
length = 20
seed = 1

[train]
dim = 32

[evaluate]
labels = "labels.parquet"
label_id_column = "node"
ratios = [0.1, 0.5]
repeats = 2

[gates]
min_link_auc = 0.9
min_micro_f1 = 0.9

[store]
path = "store"
"""


@pytest.fixture(scope="module")
def planted_inputs(tmp_path_factory):
    """20 blocks x 100 nodes, about 10 expected edges inside the block and 1 outside per node: a graph where
    link prediction is possible (with 6 inside and 6 outside, half the edges are random and even the true
    blocks score a link AUC of only about 0.74). The edge and label tables and the config; no store."""
    root = tmp_path_factory.mktemp("planted")
    g = nx.planted_partition_graph(20, 100, 10 / 99, 1 / 1900, seed=3)
    e = np.array(g.edges())
    pq.write_table(pa.table({"a": pa.array(e[:, 0]), "b": pa.array(e[:, 1])}), root / "edges.parquet")
    nodes = np.arange(2000)
    pq.write_table(pa.table({"node": pa.array(nodes), "label": pa.array([f"block-{v // 100}" for v in nodes])}),
                   root / "labels.parquet")
    (root / "c.toml").write_text(CONFIG)
    return root


@pytest.fixture(scope="module")
def planted(planted_inputs):
    """The planted inputs and a store with version 1 published from them (a refresh with the evaluation: several
    seconds); read-only: tests that refresh again work on a copy (``planted_copy``)."""
    assert graphkit.refresh(load_config(planted_inputs / "c.toml")) == 1
    return planted_inputs


@pytest.fixture
def planted_copy(planted, tmp_path):
    """A private copy of the planted inputs and store, for a test that publishes or records more versions."""
    return Path(shutil.copytree(planted, tmp_path / "planted"))


@pytest.mark.slow
def test_good_run_passes_gates_and_records_metrics(planted):
    version = current_version(planted / "store")
    row = list_versions(planted / "store")[-1]
    m = row["metrics"]
    assert row["version"] == version and row["status"] == "complete"
    assert m["link_auc_cosine"] > 0.9 and m["link_auc_hadamard"] > 0.9  # scikit-learn roc_auc_score
    assert m["micro_f1_at_10"] > 0.9  # scikit-learn f1_score, DeepWalk protocol (Perozzi et al. 2014)
    per_ratio = m["node_classification"]["per_ratio"]
    assert [r["ratio"] for r in per_ratio] == [0.1, 0.5]
    assert row["counts"]["link_holdout"]["n_held_out"] > 0
    # DeLong's SE (Biometrics 1988) of about 4,600 held-out pairs: Hanley & McNeil's closed form (1982) for the same
    # AUC and counts is the outside check, within a factor of 2 (it assumes exponential score distributions)
    from graphkit.evaluate import auc_se_hanley_mcneil

    n_pos = row["counts"]["link_holdout"]["n_held_out"]
    hm = auc_se_hanley_mcneil(m["link_auc_cosine"], n_pos, row["counts"]["link_holdout"]["n_negatives"])
    assert 0.5 * hm < m["link_auc_cosine_se"] < 2 * hm
    assert "eval_walks" not in row["timings"] and row["timings"]["holdout"] > 0  # one pass
    assert (planted / "store" / "reports" / f"version-{version:06d}.html").exists()
    code, out, err, _ = cli("versions", planted / "store", "--wide")
    assert code == 0, err
    assert "link_auc_cosine=" in out and "micro_f1_at_10=" in out


@pytest.mark.slow
def test_broken_run_fails_its_gate_and_changes_nothing(planted_copy):
    planted = planted_copy
    before = current_version(planted / "store")
    n_before = len(list_versions(planted / "store"))
    with pytest.raises(GateFailure, match=r"micro_f1_at_10 = 0\.\d+ is below \[gates\] min_micro_f1 = 0.9"):
        graphkit.refresh(load_config(planted / "c.toml", ["train.dim=2", "walks.length=2"]))
    rows = list_versions(planted / "store")
    assert len(rows) == n_before + 1
    failed = rows[-1]
    assert failed["status"] == "failed" and not failed["is_current"] and failed["path"] is None
    assert "failed quality gates" in failed["message"] and failed["metrics"]["micro_f1_at_10"] < 0.9
    assert current_version(planted / "store") == before  # the previous version stays current
    assert (planted / "store" / "reports" / f"version-{failed['version']:06d}.html").exists()
    assert list((planted / "store" / "work").iterdir()) == []


@pytest.mark.slow
def test_drift_is_measured_against_the_current_version(planted_copy):
    planted = planted_copy
    graphkit.refresh(load_config(planted / "c.toml", ["walks.seed=2", "evaluate.link_holdout=0",
                                                      "gates.min_link_auc=none"]))
    m = list_versions(planted / "store")[-1]["metrics"]
    assert 0 <= m["neighbour_drift"] <= 1 and m["drift_shared_nodes"] == 2000
    assert "link_auc_cosine" not in m  # holdout switched off
    # a gate on a metric that cannot be measured is refused when the config is read, not after the run
    with pytest.raises(ConfigError, match=r"--set evaluate.link_holdout: \[gates\] min_link_auc needs held-out "
                                          r"edges .* but \[evaluate\] link_holdout = 0"):
        load_config(planted / "c.toml", ["evaluate.link_holdout=0"])


@pytest.mark.slow  # needs the planted store
def test_report_command(planted, tmp_path):
    out = tmp_path / "r.html"
    code, _, err, _ = cli("report", planted / "store", "--out", out)
    assert code == 0, err
    html = out.read_text()
    assert html.count("data:image/png;base64,") >= 4 and "http://" not in html and "https://" not in html


def test_report_timing_chart_names_stages_and_fixed_costs(tmp_path):
    from graphkit.report import write_report

    timings = {"startup": 3.0, "server_start": 10.0, "ingest": 1.0, "walks": 4.0, "train": 6.0, "report": 2.0,
               "publish": 0.5, "after_publish_estimate": 7.0}
    out = write_report(tmp_path / "r.html", versions=[{"version": 1, "status": "complete", "timings": timings}],
                       title="t")
    html = out.read_text()
    # by hand: 33.5 s in all, 11.5 s in the stages (ingest, walks, train, publish), 22 s of fixed costs
    assert "Version 1: 33.5 s recorded, 11.5 s in the stages and 22.0 s of fixed costs" in html
    assert "of which 7.0 s after the publish, estimated" in html


def test_versions_command_shows_stages_and_fixed_costs(tmp_path, capsys):
    from graphkit.cli import main
    from graphkit.store import publish_embeddings

    store = tmp_path / "store"
    publish_embeddings(store, pa.array([1, 2, 3]), np.eye(3, dtype=np.float32), params={}, fingerprint=[],
                       counts={}, timings={"startup": 2.0, "walks": 3.0, "train": 4.0, "report": 1.0})
    assert main(["versions", str(store), "--wide"]) == 0
    out = capsys.readouterr().out
    # the store adds its own "publish" seconds: stages 7 + publish, fixed 3
    row = list_versions(store)[0]["timings"]
    assert f"{sum(row.values()):.1f}" in out and f"{7 + row['publish']:.1f} + 3.0" in out


def test_plan_publishes_the_holdout_model_unless_told_otherwise(planted_inputs):
    from graphkit.pipeline import plan_run

    planted = planted_inputs

    one = plan_run(load_config(planted / "c.toml"))
    # default: one walk/train pass on the holdout graph, and that model is published
    assert one["graph_dir"] == str(Path(one["holdout_dir"]) / "graph")
    assert (one["walks_dir"], one["train_dir"]) == (one["eval_walks_dir"], one["eval_train_dir"])
    two = plan_run(load_config(planted / "c.toml", ["evaluate.publish_holdout_model=false"]))
    assert two["graph_dir"] == str(Path(two["ingest_dir"]) / "graph") and two["walks_dir"] != two["eval_walks_dir"]
    # the cap is part of the holdout's key: changing it redoes the holdout, not the ingest
    capped = plan_run(load_config(planted / "c.toml", ["evaluate.max_holdout_edges=100"]))
    assert capped["holdout_dir"] != one["holdout_dir"] and capped["ingest_dir"] == one["ingest_dir"]


@pytest.mark.slow
def test_two_pass_mode_still_runs_and_times_both_passes(planted, tmp_path):
    cfg = load_config(planted / "c.toml", [f'store.path="{tmp_path / "store"}"', "evaluate.publish_holdout_model=false",
                                           "evaluate.max_holdout_edges=300"])
    graphkit.refresh(cfg)
    row = list_versions(tmp_path / "store")[-1]
    assert row["status"] == "complete" and row["counts"]["link_holdout"]["n_held_out"] == 300
    assert row["timings"]["eval_walks"] > 0 and row["timings"]["eval_train"] > 0
    assert row["metrics"]["link_auc_cosine"] > 0.8


@pytest.mark.parametrize("id_column,label_column", [("account", "segment"), ('acc"t', "seg; drop table nodes; --"),
                                                    ("Account Id", "select")],
                         ids=["plain", "quote and statement", "space and keyword"])
def test_load_labels_maps_rows_in_order_whatever_the_column_names(tmp_path, id_column, label_column):
    """Labels are matched onto node indices by id (as text) and kind, in the labels table's order, with nulls
    dropped; the column names reach no SQL text, so quotes, semicolons and keywords in them are just names."""
    from graphkit.quality import load_labels

    pq.write_table(pa.table({"node_idx": pa.array([0, 1, 2, 3], pa.int64()),
                             "node_id": ["acct-1", "acct-2", "dev-9", "7"],
                             "node_kind": ["account", "account", "device", "account"]}), tmp_path / "nodes.parquet")
    ids = ["acct-2", "acct-1", None, "acct-404", "dev-9", "7", "acct-1"]
    segments = ["retail", "business", "retail", "retail", None, "retail", "retail"]
    pq.write_table(pa.table({id_column: ids, label_column: segments}), tmp_path / "labels.parquet")
    idx, labels, counts = load_labels(str(tmp_path / "labels.parquet"), tmp_path / "nodes.parquet",
                                      id_column=id_column, label_column=label_column)
    # by hand: rows 2 (null id) and 4 (null label) dropped; acct-404 is not a node
    assert idx.tolist() == [1, 0, -1, 3, 0]
    assert labels.tolist() == ["retail", "business", "retail", "retail", "retail"]
    assert counts == {"rows": 5, "unmatched": 1}
    idx, _, _ = load_labels(str(tmp_path / "labels.parquet"), tmp_path / "nodes.parquet", id_column=id_column,
                            label_column=label_column, kind="device")
    assert idx.tolist() == [-1, -1, -1, -1, -1]
    assert pq.read_table(tmp_path / "nodes.parquet").num_rows == 4  # nothing ran against the nodes


def test_load_labels_reads_integer_ids_as_text(tmp_path):
    """An integer id column matches the text node ids it spells (DuckDB's cast and Arrow's give the same digits)."""
    from graphkit.quality import load_labels

    pq.write_table(pa.table({"node_idx": pa.array([0, 1], pa.int64()), "node_id": ["10", "20"],
                             "node_kind": ["account", "account"]}), tmp_path / "nodes.parquet")
    pq.write_table(pa.table({"id": pa.array([20, 10, 30], pa.int64()), "label": pa.array([1, 2, 1], pa.int32())}),
                   tmp_path / "labels.parquet")
    idx, labels, _ = load_labels(str(tmp_path / "labels.parquet"), tmp_path / "nodes.parquet", id_column="id",
                                 label_column="label")
    assert idx.tolist() == [1, 0, -1] and labels.tolist() == ["1", "2", "1"]
