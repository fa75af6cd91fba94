"""Quality study for the time budget (issue 16, item 2): held-out link AUC and node-classification Micro-F1 against
tokens trained, for walks per node, walk length, window and epochs. Run by hand; writes docs/quality/*.png and the
figures as JSON.

    .venv/bin/python tests/bench/bench_quality.py [--seeds 0,1] [--json docs/quality/study.json]

Graphs (outside references): networkx's planted-partition generator (50 blocks x 200 nodes, 10 expected edges inside
the block and 1 outside per node, the graph of tests/bench/bench_eval.py), and scikit-learn's bundled handwritten
digits (``sklearn.datasets.load_digits``, 1,797 images, 10 classes) as a 10-nearest-neighbour graph built by
``sklearn.neighbors.kneighbors_graph``. Each run holds out 10 % of the edges (at most 20,000, the product's default),
trains on the rest with graphkit's walks and trainer (d = 128, 5 negatives, 2 threads), and scores the held-out
edges against as many non-edges (cosine ROC-AUC, ``graphkit.evaluate.link_prediction``) and the labels (one-vs-rest
logistic regression at 10 % labelled nodes, 3 splits, ``graphkit.evaluate.node_classification``) of the same
vectors, as the nightly run does with ``publish_holdout_model = true``.

Sweeps around the default (10 walks per node, length 40, window 5, 1 epoch): walks per node; equal-token families
that trade walks per node for epochs; walk length at equal tokens; the window. Each point is the mean over the seeds;
the seconds are walks + training on this machine (its load is printed).
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
sys.path[:0] = [str(ROOT), str(ROOT / "tests"), str(Path(__file__).resolve().parent)]

import graphkit  # noqa: E402
from bench_eval import digits_graph, planted_graph  # noqa: E402
from graphkit.evaluate import holdout_edges, link_prediction, node_classification  # noqa: E402

DIM = 128
BASE = {"per_node": 10, "length": 40, "window": 5, "epochs": 1}
SWEEPS = {
    "per_node": [dict(BASE, per_node=p) for p in (1, 2, 4, 10, 20, 40)],
    "walks or epochs": [dict(BASE, per_node=p, epochs=e) for p, e in
                        ((2, 1), (1, 2), (4, 1), (2, 2), (1, 4), (10, 1), (5, 2), (20, 1), (10, 2), (5, 4),
                         (40, 1), (20, 2), (10, 4))],
    "length": [dict(BASE, per_node=p, length=l) for p, l in ((40, 10), (20, 20), (10, 40), (5, 80))],
    "window": [dict(BASE, window=w) for w in (2, 5, 10)],
}


def run_one(held, labels, cfg, seed) -> dict:
    t0 = time.perf_counter()
    walks = graphkit.random_walks(held.train_graph, per_node=cfg["per_node"], length=cfg["length"], seed=seed)
    t1 = time.perf_counter()
    vec = graphkit.train_vectors(walks, held.train_graph.n_nodes, dim=DIM, window=cfg["window"],
                                 epochs=cfg["epochs"], seed=seed, threads=2)
    t2 = time.perf_counter()
    lp = link_prediction(vec, held.positives, held.negatives, seed=0)
    nc = node_classification(vec, np.arange(labels.size), labels, ratios=(0.1,), repeats=3, seed=seed)
    return {"tokens": int((walks >= 0).sum()) * cfg["epochs"], "walk_s": t1 - t0, "train_s": t2 - t1,
            "auc": lp["link_auc_cosine"], "auc_se": lp.get("link_auc_cosine_se"),
            "micro_f1": nc["per_ratio"][0]["micro_f1_mean"]}


def study(name, graph, labels, seeds) -> list[dict]:
    held = holdout_edges(graph, 0.1, seed=0, max_edges=20_000)
    graphkit.train_vectors(graphkit.random_walks(held.train_graph, 1, 5, seed=0)[:64], graph.n_nodes, dim=DIM)
    rows, seen = [], {}
    for sweep, configs in SWEEPS.items():
        for cfg in configs:
            key = tuple(sorted(cfg.items()))
            if key not in seen:
                runs = [run_one(held, labels, cfg, s) for s in seeds]
                seen[key] = {**cfg, "tokens": runs[0]["tokens"],
                             **{m: float(np.mean([r[m] for r in runs])) for m in ("walk_s", "train_s", "auc",
                                                                                  "micro_f1")},
                             "auc_sd": float(np.std([r["auc"] for r in runs], ddof=1)) if len(runs) > 1 else None,
                             "f1_sd": float(np.std([r["micro_f1"] for r in runs], ddof=1)) if len(runs) > 1
                             else None}
            r = {"graph": name, "sweep": sweep, **seen[key]}
            rows.append(r)
            print(f"{name:<8} {sweep:<16} per_node {r['per_node']:>2} length {r['length']:>2} window {r['window']:>2} "
                  f"epochs {r['epochs']}  tokens {r['tokens'] / 1e6:6.2f}M  AUC {r['auc']:.4f}  "
                  f"Micro-F1 {r['micro_f1']:.4f}  walks+train {r['walk_s'] + r['train_s']:5.1f} s", flush=True)
    return rows


def plot(rows, out: Path) -> list[Path]:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from matplotlib.ticker import FuncFormatter, NullFormatter

    out.mkdir(parents=True, exist_ok=True)
    paths = []
    for graph in sorted({r["graph"] for r in rows}):
        fig, axes = plt.subplots(2, 4, figsize=(16, 7), sharey="row")
        for j, sweep in enumerate(SWEEPS):
            pts = [r for r in rows if r["graph"] == graph and r["sweep"] == sweep]
            for i, (metric, label) in enumerate((("auc", "held-out link AUC (cosine)"),
                                                 ("micro_f1", "Micro-F1 at 10% labels"))):
                ax = axes[i, j]
                if sweep == "walks or epochs":
                    for e in sorted({p["epochs"] for p in pts}):
                        sel = sorted((p for p in pts if p["epochs"] == e), key=lambda p: p["tokens"])
                        ax.plot([p["tokens"] / 1e6 for p in sel], [p[metric] for p in sel], "o-",
                                label=f"{e} epoch{'s' if e > 1 else ''}")
                    ax.legend(fontsize=8)
                else:
                    x_of = {"length": lambda p: p["length"], "window": lambda p: p["window"]}.get(
                        sweep, lambda p: p["tokens"] / 1e6)
                    sel = sorted(pts, key=x_of)
                    xs = [x_of(p) for p in sel]
                    ax.plot(xs, [p[metric] for p in sel], "o-")
                    if sweep == "per_node":
                        for p, x in zip(sel, xs):
                            ax.annotate(f"{p['per_node']} walks", (x, p[metric]), fontsize=7, xytext=(3, -10),
                                        textcoords="offset points")
                ax.set_xscale("log")
                ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:g}"))
                ax.xaxis.set_minor_formatter(NullFormatter())
                ax.set_xticks(sorted({round(x, 3) for x in ax.get_lines()[0].get_xdata()}))
                ax.tick_params(axis="x", labelsize=7)
                ax.set_xlabel({"length": "walk length (nodes), at 4M tokens (planted) / 0.72M (digits)",
                               "window": "window, at 10 walks of 40 nodes per node"}.get(sweep,
                                                                                       "tokens trained (M)"))
                if j == 0:
                    ax.set_ylabel(label)
                ax.set_title(f"{sweep}" if i == 0 else "")
                ax.grid(alpha=0.3)
        fig.suptitle(f"{graph}: quality against tokens trained (d = 128, mean over seeds)")
        fig.tight_layout()
        path = out / f"{graph}.png"
        fig.savefig(path, dpi=90)
        plt.close(fig)
        paths.append(path)
    return paths


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seeds", default="0,1")
    ap.add_argument("--json", default=str(ROOT / "docs" / "quality" / "study.json"))
    ap.add_argument("--plots", default=str(ROOT / "docs" / "quality"))
    ap.add_argument("--replot", action="store_true", help="only draw the plots again from the JSON")
    args = ap.parse_args(argv)
    if args.replot:
        for p in plot(json.loads(Path(args.json).read_text()), Path(args.plots)):
            print(f"wrote {p}")
        return 0
    seeds = [int(s) for s in args.seeds.split(",")]
    print(f"load average at the start: {os.getloadavg()}", flush=True)
    rows = study("planted", *planted_graph(), seeds) + study("digits", *digits_graph(), seeds)
    print(f"load average at the end: {os.getloadavg()}")
    Path(args.json).parent.mkdir(parents=True, exist_ok=True)
    Path(args.json).write_text(json.dumps(rows, indent=1))
    for p in plot(rows, Path(args.plots)):
        print(f"wrote {p}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
