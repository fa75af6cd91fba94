"""Each night's quality: link prediction, node classification, drift, gates and the report, run through the
pipeline on a planted-partition graph (networkx.planted_partition_graph, a general-purpose reference generator;
scikit-learn computes AUC and F1)."""

import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import networkx as nx
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import graphkit
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
def planted(tmp_path_factory):
    """20 blocks x 100 nodes, about 10 expected edges inside the block and 1 outside per node: a graph where
    link prediction is possible (with 6 inside and 6 outside, half the edges are random and even the true
    blocks score a link AUC of only about 0.74).

    Holds the inputs and a store with version 1 published from them; read-only: tests that refresh again work on a
    copy (``planted_copy``)."""
    root = tmp_path_factory.mktemp("planted")
    g = nx.planted_partition_graph(20, 100, 10 / 99, 1 / 1900, seed=3)
    e = np.array(g.edges())
    pq.write_table(pa.table({"a": pa.array(e[:, 0]), "b": pa.array(e[:, 1])}), root / "edges.parquet")
    nodes = np.arange(2000)
    pq.write_table(pa.table({"node": pa.array(nodes), "label": pa.array([f"block-{v // 100}" for v in nodes])}),
                   root / "labels.parquet")
    (root / "c.toml").write_text(CONFIG)
    assert graphkit.refresh(load_config(root / "c.toml")) == 1
    return root


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
    assert (planted / "store" / "reports" / f"version-{version:06d}.html").exists()
    out = subprocess.run([sys.executable, "-m", "graphkit.cli", "versions", str(planted / "store")],
                         capture_output=True, text=True, cwd=ROOT)
    assert "link_auc_cosine=" in out.stdout and "micro_f1_at_10=" in out.stdout


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


def test_report_command(planted, tmp_path):
    out = tmp_path / "r.html"
    r = subprocess.run([sys.executable, "-m", "graphkit.cli", "report", str(planted / "store"), "--out", str(out)],
                       capture_output=True, text=True, cwd=ROOT)
    assert r.returncode == 0, r.stderr
    html = out.read_text()
    assert html.count("data:image/png;base64,") >= 4 and "http://" not in html and "https://" not in html
