"""Benchmark: budget accuracy (issue 16, item 4). Run by hand, on a quiet machine.

For each graph size and each budget, one ``graphkit refresh`` of the default configuration (evaluation on) with
``[budget] minutes = M`` and generous bounds (``walks.per_node = 80``, ``train.epochs = 5``), on a fresh store, so
the first run of each size calibrates; then, with ``--lineage``, the same budgets again on that store (sized from
its lineage). Graphs: uniform random graphs of average degree 20, drawn by ``bench_scale.make_graph``.

Target, per run: the command's wall time (process start to exit) within the budget + 10 % and at least 70 % of it.
Printed side by side: budget, wall, wall / budget, the sizing chosen, the predicted and the measured seconds of the
walks and training.

    .venv/bin/python tests/bench/bench_budget.py --sizes 100k,1m --minutes 2,5,15 [--lineage] [--json out.json]
    .venv/bin/python tests/bench/bench_budget.py --sizes 100k --minutes 5 --only-lineage   # on the store left behind

Item 3 of the issue (the budgeted run against the reference pipeline at equal wall time) is not measured here yet.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from bench_scale import ROOT, make_graph, parse_size, write_config  # noqa: E402

MAX_PER_NODE, MAX_EPOCHS = 80, 5


def run(config: Path, minutes: float, log: Path) -> float:
    env = {**os.environ, "PYTHONUNBUFFERED": "1"}
    env.setdefault("PREFECT_HOME", str(ROOT / ".prefect-home"))
    t0 = time.monotonic()
    with open(log, "w") as fh:
        rc = subprocess.call([sys.executable, "-m", "graphkit.cli", "refresh", str(config),
                              "--set", f"budget.minutes={minutes}", "--set", f"walks.per_node={MAX_PER_NODE}",
                              "--set", f"train.epochs={MAX_EPOCHS}"], cwd=ROOT, env=env, stdout=fh,
                             stderr=subprocess.STDOUT)
    wall = time.monotonic() - t0
    if rc != 0:
        raise SystemExit(f"refresh failed with exit code {rc}; see {log}")
    return wall


def main(argv=None) -> int:
    from graphkit.store import list_versions

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", default="100k", help="comma-separated node counts (100k, 1m, ...)")
    ap.add_argument("--minutes", default="2,5,15", help="comma-separated budgets in minutes")
    ap.add_argument("--lineage", action="store_true", help="run every budget a second time, sized from lineage")
    ap.add_argument("--only-lineage", action="store_true",
                    help="keep the store of an earlier run of this benchmark and size every run from its lineage")
    ap.add_argument("--out", default="/tmp/graphkit-bench-budget", help="work folder")
    ap.add_argument("--json", help="also write the figures to this file")
    args = ap.parse_args(argv)
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    rows = []
    print(f"load average at the start: {os.getloadavg()}")
    for n in map(parse_size, args.sizes.split(",")):
        folder = out / f"n{n}"
        edges = make_graph(folder, n, 20)
        store = folder / "store"
        config = write_config(folder, edges, store, None)
        sweeps = ("calibration", "lineage") if args.lineage else ("calibration",)
        for sweep in (("lineage",) if args.only_lineage else sweeps):
            for minutes in map(float, args.minutes.split(",")):
                if sweep == "calibration" and store.exists():
                    import shutil

                    shutil.rmtree(store)
                wall = run(config, minutes, folder / f"refresh-{minutes:g}-{sweep}.log")
                row = list_versions(store)[-1]
                b = row["params"]["lineage"]["budget"]
                rows.append({"nodes": n, "minutes": minutes, "source": b["costs"]["source"], "wall": round(wall, 1),
                             "ratio": round(wall / (60 * minutes), 3), "per_node": b["per_node"],
                             "epochs": b["epochs"], "predicted": b["predicted"], "actual": b["actual"],
                             "predicted_total": b["predicted_total_seconds"]})
                r = rows[-1]
                met = 0.7 <= r["ratio"] <= 1.1
                print(f"{n:>9,} nodes  budget {minutes:>5g} min  wall {wall:7.1f} s  wall/budget {r['ratio']:.3f}  "
                      f"({'met' if met else 'MISSED'}: 0.70-1.10)  per_node {r['per_node']:>2}  epochs "
                      f"{r['epochs']}  train predicted {b['predicted']['train']:.0f} s, measured "
                      f"{b['actual'].get('train', 0):.0f} s  [{r['source']}]", flush=True)
    print(f"load average at the end: {os.getloadavg()}")
    if args.json:
        Path(args.json).write_text(json.dumps(rows, indent=1))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
