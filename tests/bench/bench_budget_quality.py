"""Benchmark: what a budget buys against the reference pipeline at the reference's wall time (issue 16, item 3).
Run by hand, on a quiet machine:

    .venv/bin/python tests/bench/bench_budget_quality.py [--graph imports|digits|planted] [--json out.json]

The reference pipeline is the straightforward one: a numba random walker (one walk at a time, numpy's generator
inside the kernel; uniform first-order walks, 10 per node of 40 nodes) and gensim's Word2Vec (sg=1, d=128, window
5, 5 negatives, 1 epoch, workers=2, min_count=1, sample=0) on the walks as lists of str tokens; its wall time
``T_ref`` covers the walks, the conversion to tokens, the vocabulary and the training. graphkit's run is sized by
``graphkit.budget`` for a budget of ``T_ref`` (unit costs from ``graphkit.budget.calibrate`` on the same graph, the
calibration's seconds counted as spent, bounds 80 walks per node and 5 epochs), then walks and trains with the
sizing chosen; its wall time covers the calibration, the walks and the training. Neither side counts ingest,
evaluation or publishing: this compares what each pipeline makes of the same seconds of walking and training.

Both are scored the same way on the same split: 10 % of the edges held out (at most 20,000) before walking, the
held-out edges against as many non-edges by the cosine of their vectors (ROC-AUC, ``graphkit.evaluate``), and
node classification (one-vs-rest logistic regression at 10 % labelled nodes, 3 splits, Micro-F1).

Target: graphkit's link AUC at least 0.02 above the reference's, its Micro-F1 at most 0.005 below.

Graphs (outside the project): ``imports``, the import graph of the packages installed beside this interpreter
(every module of site-packages a node, parsed with ``ast``; an edge for each import between two of them; label: the
top-level package); ``digits``, scikit-learn's handwritten digits as a 10-nearest-neighbour graph; ``planted``,
networkx's planted partition (both as in tests/bench/bench_eval.py).
"""

from __future__ import annotations

import argparse
import ast
import json
import os
import sys
import sysconfig
import time
from pathlib import Path

import numba
import numpy as np

ROOT = Path(__file__).resolve().parents[2]
sys.path[:0] = [str(ROOT), str(ROOT / "tests"), str(Path(__file__).resolve().parent)]

import graphkit  # noqa: E402
from graphkit import AdjacencyArrays, budget  # noqa: E402
from graphkit.evaluate import holdout_edges, link_prediction, node_classification  # noqa: E402

SETTINGS = {"per_node": 10, "length": 40, "dim": 128, "window": 5, "negatives": 5, "epochs": 1}
MAX_PER_NODE, MAX_EPOCHS = 80, 5


def import_graph(root: str | None = None):
    """Modules of site-packages as nodes, imports between them as undirected edges, the top-level package as label;
    nodes without an edge are left out."""
    root = Path(root or sysconfig.get_paths()["purelib"])
    modules: dict[str, Path] = {}
    for dirpath, _, files in os.walk(root):
        for f in files:
            if not f.endswith(".py"):
                continue
            rel = Path(dirpath, f).relative_to(root).with_suffix("")
            parts = rel.parts[:-1] if rel.name == "__init__" else rel.parts
            if parts and all(p.isidentifier() for p in parts):
                modules[".".join(parts)] = Path(dirpath, f)
    index = {m: i for i, m in enumerate(sorted(modules))}
    src, dst = [], []
    for mod, path in modules.items():
        try:
            tree = ast.parse(path.read_bytes())
        except (SyntaxError, ValueError):
            continue
        package = mod if path.name == "__init__.py" else mod.rpartition(".")[0]
        for node in ast.walk(tree):
            names = []
            if isinstance(node, ast.Import):
                names = [a.name for a in node.names]
            elif isinstance(node, ast.ImportFrom):
                base = node.module or ""
                if node.level:
                    up = package.split(".")
                    up = up[:len(up) - node.level + 1] if node.level > 1 else up
                    base = ".".join(up + ([base] if base else []))
                names = [base] + [f"{base}.{a.name}" for a in node.names]
            for name in names:
                while name and name not in index:   # the longest imported prefix that is a module here
                    name = name.rpartition(".")[0]
                if name and name != mod:
                    src.append(index[mod])
                    dst.append(index[name])
    names = sorted(modules)
    src, dst = np.array(src), np.array(dst)
    used = np.unique(np.r_[src, dst])
    remap = np.full(len(names), -1)
    remap[used] = np.arange(used.size)
    graph = AdjacencyArrays.from_edges(remap[src], remap[dst], n_nodes=used.size)
    labels = np.array([names[i].split(".")[0] for i in used])
    return graph, labels


@numba.njit
def _reference_walks(indptr, indices, per_node, length, seed):
    """The straightforward walker: every node starts ``per_node`` walks, one after the other."""
    np.random.seed(seed)
    n = indptr.size - 1
    out = np.full((n * per_node, length), -1, np.int64)
    row = 0
    for _ in range(per_node):
        order = np.random.permutation(n)
        for s in order:
            v = s
            out[row, 0] = v
            for j in range(1, length):
                d = indptr[v + 1] - indptr[v]
                if d == 0:
                    break
                v = indices[indptr[v] + np.random.randint(d)]
                out[row, j] = v
            row += 1
    return out


def reference(graph, seed: int) -> tuple[np.ndarray, float]:
    from gensim.models import Word2Vec

    _reference_walks(graph.indptr, graph.indices, 1, 2, 0)   # compiled before the clock starts
    t0 = time.perf_counter()
    walks = _reference_walks(graph.indptr, graph.indices, SETTINGS["per_node"], SETTINGS["length"], seed)
    sentences = [[str(v) for v in w if v >= 0] for w in walks]
    model = Word2Vec(sg=1, vector_size=SETTINGS["dim"], window=SETTINGS["window"], negative=SETTINGS["negatives"],
                     hs=0, min_count=1, sample=0, workers=2, seed=seed, epochs=SETTINGS["epochs"])
    model.build_vocab(sentences)
    model.train(sentences, total_examples=len(sentences), epochs=SETTINGS["epochs"])
    seconds = time.perf_counter() - t0
    vec = np.zeros((graph.n_nodes, SETTINGS["dim"]), np.float32)
    for v in range(graph.n_nodes):
        if str(v) in model.wv:
            vec[v] = model.wv[str(v)]
    return vec, seconds


def budgeted(graph, seconds: float, seed: int) -> tuple[np.ndarray, float, dict]:
    walks_cfg = {"per_node": MAX_PER_NODE, "length": SETTINGS["length"], "weighted": True, "p": 1.0, "q": 1.0,
                 "dead_end": "stop"}
    train_cfg = {"dim": SETTINGS["dim"], "window": SETTINGS["window"], "negatives": SETTINGS["negatives"],
                 "objective": "negative_sampling", "threads": 2, "learning_rate": 0.025, "subsample": 0.0}
    t0 = time.perf_counter()
    costs, _ = budget.calibrate(graph, walks_cfg, train_cfg, seed)
    # in process: no walks stage of Dask and Parquet shards, no corpus to decode, nothing after training
    costs = budget.UnitCosts(walk_seconds_per_token=costs.walk_seconds_per_token / budget.WALK_STAGE_FACTOR,
                             train_seconds_per_token=costs.train_seconds_per_token / budget.TRAIN_STAGE_FACTOR,
                             train_fixed_seconds=costs.train_fixed_seconds, walk_fixed_seconds=0.0,
                             tail_seconds=0.0, source=costs.source)
    sizing = budget.choose_sizing(minutes=seconds / 60, elapsed=time.perf_counter() - t0, n_nodes=graph.n_nodes,
                                  length=SETTINGS["length"], passes=1, costs=costs, max_per_node=MAX_PER_NODE,
                                  max_epochs=MAX_EPOCHS)
    walks = graphkit.random_walks(graph, per_node=sizing.per_node, length=SETTINGS["length"], seed=seed)
    vec = graphkit.train_vectors(walks, graph.n_nodes, dim=SETTINGS["dim"], window=SETTINGS["window"],
                                 negatives=SETTINGS["negatives"], epochs=sizing.epochs, seed=seed, threads=2)
    return vec, time.perf_counter() - t0, {"per_node": sizing.per_node, "epochs": sizing.epochs,
                                           "predicted": sizing.predicted_seconds}


def score(vec, held, labels, seed) -> dict:
    lp = link_prediction(vec, held.positives, held.negatives, seed=0)
    nc = node_classification(vec, np.arange(labels.size), labels, ratios=(0.1,), repeats=3, seed=seed)
    return {"auc": lp["link_auc_cosine"], "micro_f1": nc["per_ratio"][0]["micro_f1_mean"]}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--graph", default="imports", choices=("imports", "digits", "planted"))
    ap.add_argument("--seeds", default="0,1")
    ap.add_argument("--json")
    args = ap.parse_args(argv)
    print(f"load average at the start: {os.getloadavg()}", flush=True)
    if args.graph == "imports":
        graph, labels = import_graph()
    else:
        from bench_eval import digits_graph, planted_graph

        graph, labels = digits_graph() if args.graph == "digits" else planted_graph()
    held = holdout_edges(graph, 0.1, seed=0, max_edges=20_000)
    n_edges = int(graph.n_edges // 2)
    print(f"{args.graph}: {graph.n_nodes:,} nodes, {n_edges:,} edges, {len(set(labels))} labels; "
          f"{len(held.positives):,} edges held out", flush=True)
    graphkit.train_vectors(np.array([[0, 1]], np.int32), 2, dim=8)   # the trainer's compiled code, once
    rows = []
    for seed in (int(s) for s in args.seeds.split(",")):
        ref_vec, ref_s = reference(held.train_graph, seed)
        gk_vec, gk_s, sizing = budgeted(held.train_graph, ref_s, seed)
        ref, gk = score(ref_vec, held, labels, seed), score(gk_vec, held, labels, seed)
        rows.append({"seed": seed, "reference_seconds": ref_s, "graphkit_seconds": gk_s, **sizing,
                     "reference": ref, "graphkit": gk})
        print(f"seed {seed}: reference {ref_s:6.1f} s  AUC {ref['auc']:.4f}  Micro-F1 {ref['micro_f1']:.4f} | "
              f"graphkit at that budget: {gk_s:6.1f} s ({gk_s / ref_s:.2f}x), {sizing['per_node']} walks per node, "
              f"{sizing['epochs']} epochs  AUC {gk['auc']:.4f} ({gk['auc'] - ref['auc']:+.4f}, target >= +0.02)  "
              f"Micro-F1 {gk['micro_f1']:.4f} ({gk['micro_f1'] - ref['micro_f1']:+.4f}, target >= -0.005)",
              flush=True)
    d_auc = np.mean([r["graphkit"]["auc"] - r["reference"]["auc"] for r in rows])
    d_f1 = np.mean([r["graphkit"]["micro_f1"] - r["reference"]["micro_f1"] for r in rows])
    print(f"mean over seeds: AUC {d_auc:+.4f} ({'met' if d_auc >= 0.02 else 'MISSED'}), Micro-F1 {d_f1:+.4f} "
          f"({'met' if d_f1 >= -0.005 else 'MISSED'})")
    print(f"load average at the end: {os.getloadavg()}")
    if args.json:
        Path(args.json).write_text(json.dumps(rows, indent=1))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
