"""End-to-end refresh at growing graph sizes: wall time and peak memory per stage, cost per edge and per token.

Run by hand (pytest does not collect ``tests/bench``); it takes minutes, most of it in training::

    PREFECT_HOME=$PWD/.prefect-home .venv/bin/python tests/bench/bench_scale.py --sizes 200k,1m --json /tmp/scale.json --log /tmp/scale.log

Graphs: ``n`` nodes and ``n * degree / 2`` undirected edges whose two ends are drawn uniformly from ``0..n-1`` with
numpy (seeded, O(E) time, written in 5M-row pieces), as a Parquet table ``src``, ``dst`` (int64). Self-loops and
repeated pairs (about 10 and 10 per million edges) are dropped or merged by the ingest like in any input. A uniform
graph is the worst case for memory locality and Parquet compression, so real graphs should not do worse.

Each size runs two consecutive nights on one store, each as ``python -m graphkit.cli refresh`` in a fresh process
(the real Prefect flow, temporary Prefect server included), with the DEFAULT configuration (evaluation on: a 10%
link holdout whose model is published; the second night aligned onto the first) at DeepWalk's setting: 10 walks per
node of 40 nodes, d=128, window 5, 5 negatives, 1 epoch. The first night only builds the store (``--first-per-node``,
2 walks per node by default); the second night reads a changed edge table (1% of the rows replaced, a tenth of the
new ends being new nodes) and is the measured one. A sampler thread reads the RSS of the whole process tree (the
refresh and the temporary Prefect server) and of its largest single process every 0.1 s, and the disk space under the
store every second, and books each sample to the stage that the flow's log says is running. Stage wall times come
from the version's catalog row (the run's clock, fixed costs included); "task" times are log-line to log-line.
The reference for the linearity ratios is the smallest size of the same run. ``--log FILE`` appends timestamped
progress lines, so that a long run in the background can be followed; ``--json`` is rewritten after each size.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import re
import resource
import shutil
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import psutil
import pyarrow as pa
import pyarrow.parquet as pq

ROOT = Path(__file__).resolve().parents[2]
STAGE_LINE = re.compile(r"stage (\w+) started")
STAGES = ("ingest", "graph", "holdout", "walks", "train", "evaluate", "publish")
SETTINGS = {"per_node": 10, "length": 40, "dim": 128, "window": 5, "negatives": 5, "epochs": 1}


def parse_size(text: str) -> int:
    text = text.strip().lower()
    factor = {"k": 1_000, "m": 1_000_000}.get(text[-1:], 1)
    return int(float(text.rstrip("km")) * factor)


def _kept(path: Path, meta: Path, spec: dict) -> bool:
    """True when ``path`` was written by an earlier run from the same ``spec`` (recorded beside it in ``meta``)."""
    return path.exists() and meta.exists() and json.loads(meta.read_text()) == spec


def make_graph(folder: Path, n_nodes: int, degree: int, seed: int = 0) -> Path:
    """Write the uniform random edge table (kept across runs: same size and seed, same file)."""
    path = folder / "edges.parquet"
    meta = folder / "edges.json"
    spec = {"n_nodes": n_nodes, "degree": degree, "seed": seed, "generator": "uniform pairs, numpy PCG64"}
    if _kept(path, meta, spec):
        return path
    folder.mkdir(parents=True, exist_ok=True)
    n_edges = n_nodes * degree // 2
    rng = np.random.default_rng(seed)
    schema = pa.schema([("src", pa.int64()), ("dst", pa.int64())])
    tmp = path.with_suffix(".tmp")
    with pq.ParquetWriter(tmp, schema, compression="zstd") as writer:
        for a in range(0, n_edges, 5_000_000):
            k = min(5_000_000, n_edges - a)
            writer.write_table(pa.table({"src": rng.integers(0, n_nodes, k), "dst": rng.integers(0, n_nodes, k)},
                                        schema=schema), row_group_size=1_000_000)
    os.replace(tmp, path)
    meta.write_text(json.dumps(spec))
    return path


def make_second_night(folder: Path, first: Path, n_nodes: int, share: float = 0.01, seed: int = 1) -> Path:
    """The next night's edge table: the first night's with ``share`` of its rows replaced by new uniform pairs, a
    tenth of whose ends are new nodes (ids ``n_nodes .. n_nodes + n_nodes // 1000``)."""
    path = folder / "edges-night2.parquet"
    meta = folder / "edges-night2.json"
    spec = {"from": first.name, "share": share, "seed": seed, "n_nodes": n_nodes}
    if _kept(path, meta, spec):
        return path
    rng = np.random.default_rng(seed)
    n_new = max(1, n_nodes // 1000)
    tmp = path.with_suffix(".tmp")
    source = pq.ParquetFile(first)
    with pq.ParquetWriter(tmp, source.schema_arrow, compression="zstd") as writer:
        for batch in source.iter_batches(batch_size=1_000_000):
            src = batch.column("src").to_numpy().copy()
            dst = batch.column("dst").to_numpy().copy()
            swap = rng.random(len(src)) < share
            k = int(swap.sum())
            src[swap] = rng.integers(0, n_nodes, k)
            new_end = rng.random(k) < 0.1
            dst[swap] = np.where(new_end, n_nodes + rng.integers(0, n_new, k), rng.integers(0, n_nodes, k))
            writer.write_table(pa.table({"src": src, "dst": dst}, schema=source.schema_arrow),
                               row_group_size=1_000_000)
    os.replace(tmp, path)
    meta.write_text(json.dumps(spec))
    return path


def write_config(folder: Path, edges: Path, store: Path, threads: int | None, per_node: int | None = None,
                 keep: int | None = None, name: str = "bench.toml") -> Path:
    """The default configuration (evaluation on, alignment onto the current version) at the benchmark's sizes."""
    s = dict(SETTINGS, per_node=per_node or SETTINGS["per_node"])
    text = f"""# generated by tests/bench/bench_scale.py
[input]
edges = "{edges}"
source = "src"
target = "dst"
directed = false

[walks]
per_node = {s['per_node']}
length = {s['length']}
seed = 0

[train]
dim = {s['dim']}
window = {s['window']}
negatives = {s['negatives']}
epochs = {s['epochs']}
{f'threads = {threads}' if threads else ''}

[store]
path = "{store}"
{f'keep = {keep}' if keep else ''}
"""
    path = folder / name
    path.write_text(text)
    return path


def disk_bytes(folder: Path) -> int:
    """Bytes allocated on disk under ``folder`` (files that vanish while walking are skipped)."""
    total = 0
    for root, _dirs, files in os.walk(folder):
        for name in files:
            try:
                total += os.lstat(os.path.join(root, name)).st_blocks * 512
            except OSError:
                pass
    return total


class TreeSampler(threading.Thread):
    """Samples the RSS of a process and its descendants; books the samples to the current stage."""

    def __init__(self, pid: int, store: Path | None = None, every: float = 0.1):
        super().__init__(daemon=True)
        self.proc = psutil.Process(pid)
        self.every = every
        self.store = store
        self.stage = "startup"
        self.peak_tree: dict[str, int] = {}
        self.peak_main: dict[str, int] = {}
        self.peak_single: dict[str, int] = {}
        self.peak_disk: dict[str, int] = {}
        self._last_disk = 0.0
        self.started: dict[str, float] = {"startup": time.monotonic()}
        self._halt = threading.Event()

    def enter(self, stage: str) -> None:
        self.stage = stage
        self.started[stage] = time.monotonic()

    def run(self) -> None:
        while not self._halt.is_set():
            try:
                main = self.proc.memory_info().rss
                tree = single = main
                for child in self.proc.children(recursive=True):
                    try:
                        rss = child.memory_info().rss
                    except psutil.Error:
                        continue
                    tree += rss
                    single = max(single, rss)
            except psutil.Error:
                break
            st = self.stage
            self.peak_tree[st] = max(self.peak_tree.get(st, 0), tree)
            self.peak_main[st] = max(self.peak_main.get(st, 0), main)
            self.peak_single[st] = max(self.peak_single.get(st, 0), single)
            if self.store is not None and time.monotonic() - self._last_disk >= 1.0:
                self._last_disk = time.monotonic()
                self.peak_disk[st] = max(self.peak_disk.get(st, 0), disk_bytes(self.store))
            time.sleep(self.every)

    def stop(self) -> None:
        self._halt.set()
        self.join(timeout=5)


def run_refresh(config: Path, log_path: Path, store: Path | None = None, progress=None) -> dict:
    env = {**os.environ, "PYTHONUNBUFFERED": "1"}
    env.setdefault("PREFECT_HOME", str(ROOT / ".prefect-home"))
    t0 = time.monotonic()
    # --log-level debug: the runner logs each stage's start ("stage NAME started") at debug, which books the samples
    proc = subprocess.Popen([sys.executable, "-m", "graphkit.cli", "refresh", str(config), "--log-level", "debug"],
                            cwd=ROOT, env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True, bufsize=1)
    sampler = TreeSampler(proc.pid, store)
    sampler.start()
    with open(log_path, "w") as log:
        for line in proc.stdout:
            log.write(line)
            m = STAGE_LINE.search(line)
            if m:
                sampler.enter(m.group(1))
                if progress:
                    progress(f"stage {m.group(1)} started at {time.monotonic() - t0:.0f} s")
            elif line.startswith("published version"):  # the command's last line, after the flow has ended
                sampler.enter("finish")
    rc = proc.wait()
    wall = time.monotonic() - t0
    sampler.stop()
    if rc != 0:
        raise SystemExit(f"refresh failed with exit code {rc}; see {log_path}")
    names = list(sampler.started)
    task_seconds = {a: sampler.started[b] - sampler.started[a] for a, b in zip(names, names[1:])}
    return {"wall": wall, "peak_tree": sampler.peak_tree, "peak_main": sampler.peak_main,
            "peak_single": sampler.peak_single, "peak_disk": sampler.peak_disk,
            "task_seconds": task_seconds, "maxrss_children": resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
            * 1024}


def bench_one(out: Path, n_nodes: int, degree: int, threads: int | None, first_per_node: int = 2,
              keep: int | None = None, progress=print) -> dict:
    """Two consecutive nights on one store with the default configuration; the second one is measured."""
    from graphkit.store import list_versions

    folder = out / f"n{n_nodes}"
    t0 = time.monotonic()
    edges = make_graph(folder, n_nodes, degree)
    edges2 = make_second_night(folder, edges, n_nodes)
    gen_seconds = time.monotonic() - t0
    store = folder / "store"
    shutil.rmtree(store, ignore_errors=True)
    first = write_config(folder, edges, store, threads, per_node=first_per_node, keep=keep, name="night1.toml")
    second = write_config(folder, edges2, store, threads, keep=keep, name="night2.toml")
    progress(f"n={n_nodes:,}: graphs ready ({gen_seconds:.1f} s); night 1 (per_node={first_per_node}) ...")
    night1 = run_refresh(first, folder / "night1.log", store, lambda m: progress(f"n={n_nodes:,} night 1: {m}"))
    progress(f"n={n_nodes:,}: night 1 done in {night1['wall']:.0f} s; night 2 (measured) ...")
    run = run_refresh(second, folder / "night2.log", store, lambda m: progress(f"n={n_nodes:,} night 2: {m}"))
    progress(f"n={n_nodes:,}: night 2 done in {run['wall']:.0f} s")
    rows = list_versions(store)
    row = max(rows, key=lambda r: r["version"])
    if row.get("status", "complete") != "complete" or len(rows) < 2:
        raise SystemExit(f"night 2 did not publish a second version ({len(rows)} versions); see {folder}/night2.log")
    shutil.rmtree(store, ignore_errors=True)
    counts = row["counts"]
    return {"n_nodes": n_nodes, "degree": degree, "nodes": counts["nodes"], "edges": counts["edges"],
            "rows": counts["rows"], "tokens": counts["walk_tokens"], "train_tokens": counts["train_tokens"],
            "timings": row["timings"], "metrics": row["metrics"], "night1_wall": night1["wall"],
            "night1_peak_tree": max(night1["peak_tree"].values()), **run}


def _mb(x: int) -> str:
    return f"{x / 2**20:,.0f}"


def report(results: list[dict]) -> str:
    ref = results[0]
    lines = []
    head = ["nodes", "edges", "tokens"] + [f"{s} s" for s in STAGES] + ["total s"]
    lines.append("| " + " | ".join(head) + " |")
    lines.append("|" + "---:|" * len(head))
    for r in results:
        t = r["timings"]
        lines.append("| " + " | ".join([f"{r['nodes']:,}", f"{r['edges']:,}", f"{r['tokens']:,}"]
                                       + [f"{t.get(s, 0):.1f}" for s in STAGES] + [f"{r['wall']:.1f}"]) + " |")
    lines.append("")
    head = ["nodes"] + [f"{s} MiB" for s in ("startup",) + STAGES] + ["peak MiB (tree)", "peak MiB (refresh)",
                                                                        "largest process MiB", "disk MiB (store)"]
    lines.append("Peak RSS per stage, whole process tree (refresh + temporary Prefect server):")
    lines.append("")
    lines.append("| " + " | ".join(head) + " |")
    lines.append("|" + "---:|" * len(head))
    for r in results:
        pt = r["peak_tree"]
        cells = [_mb(pt[s]) if s in pt else "–" for s in ("startup",) + STAGES]
        lines.append("| " + " | ".join([f"{r['nodes']:,}"] + cells
                                       + [_mb(max(pt.values())), _mb(max(r["peak_main"].values())),
                                          _mb(max(r.get("peak_single", {}).values() or [0])),
                                          _mb(max(r.get("peak_disk", {}).values() or [0]))]) + " |")
    lines.append("")
    lines.append(f"Cost per unit, and its ratio to the {ref['nodes']:,}-node run (1.00 = linear):")
    lines.append("")
    head = ["nodes", "ingest ns/edge", "walks ns/token", "train ns/token", "train tokens/s", "publish us/node",
            "ratio ingest", "ratio walks", "ratio train"]
    lines.append("| " + " | ".join(head) + " |")
    lines.append("|" + "---:|" * len(head))

    def costs(r):
        t = r["timings"]
        return (1e9 * t["ingest"] / r["edges"], 1e9 * t["walks"] / r["tokens"], 1e9 * t["train"] / r["train_tokens"],
                1e6 * t["publish"] / r["nodes"])

    c0 = costs(ref)
    for r in results:
        c = costs(r)
        lines.append("| " + " | ".join([f"{r['nodes']:,}", f"{c[0]:.0f}", f"{c[1]:.1f}", f"{c[2]:.0f}",
                                        f"{r['metrics']['train_tokens_per_second']:,}", f"{c[3]:.1f}",
                                        f"{c[0] / c0[0]:.2f}", f"{c[1] / c0[1]:.2f}", f"{c[2] / c0[2]:.2f}"]) + " |")
    return "\n".join(lines)


#: What each stage's time and memory grow with (memory: the vectors and count arrays are per node).
TIME_UNITS = {"ingest": "edges", "graph": "edges", "holdout": "edges", "walks": "tokens", "train": "train_tokens",
              "evaluate": "nodes",
              "publish": "nodes"}
MEMORY_UNITS = {"ingest": "edges", "graph": "edges", "holdout": "edges", "walks": "nodes", "train": "nodes",
                "evaluate": "nodes",
                "publish": "nodes"}


def fit_line(xs, ys) -> tuple[float, float]:
    """(fixed, per unit) through the points: least squares for two or more sizes (fixed clipped at 0), else the
    plain ratio."""
    xs, ys = np.asarray(xs, float), np.asarray(ys, float)
    if len(xs) < 2:
        return 0.0, float(ys[0] / xs[0])
    slope, fixed = np.polyfit(xs, ys, 1)
    if fixed < 0:  # cannot save time by being bigger: fall back to proportional
        return 0.0, float(np.sum(xs * ys) / np.sum(xs * xs))
    return float(fixed), float(slope)


def extrapolate(results: list[dict], n_nodes: int, degree: int) -> str:
    """Time and peak memory per stage at ``n_nodes``: a fixed part plus a per-edge, per-token or per-node part
    fitted through the measured sizes."""
    target = {"nodes": n_nodes, "edges": n_nodes * degree // 2,
              "tokens": n_nodes * SETTINGS["per_node"] * SETTINGS["length"]}
    target["train_tokens"] = target["tokens"] * SETTINGS["epochs"]
    measured = ", ".join(f"{r['nodes']:,}" for r in results)
    lines = [f"Extrapolated to {n_nodes:,} nodes ({target['edges']:,} edges, {target['tokens']:,} tokens), "
             f"fixed + per-unit fit through {measured} nodes:", "",
             "| stage | grows with | fixed s | per unit | est. s | est. peak MiB (tree) |",
             "|---|---|---:|---:|---:|---:|"]
    total = 0.0
    peaks = []
    for stage in STAGES:
        unit = TIME_UNITS[stage]
        fixed, per = fit_line([r[unit] for r in results], [r["timings"].get(stage, 0.0) for r in results])
        est = fixed + per * target[unit]
        total += est
        munit = MEMORY_UNITS[stage]
        have = [r for r in results if stage in r["peak_tree"]]
        peak = ""
        if len(have) >= 2:  # a stage too short to be sampled at some size has no memory trend
            mfixed, mper = fit_line([r[munit] for r in have], [r["peak_tree"][stage] for r in have])
            peaks.append(mfixed + mper * target[munit])
            peak = _mb(peaks[-1])
        lines.append(f"| {stage} | {unit.replace('_', ' ')} | {fixed:.1f} | {1e9 * per:.1f} ns | {est:.0f} | {peak} |")
    overhead = float(np.mean([r["wall"] - sum(r["timings"].get(s, 0.0) for s in STAGES) for r in results]))
    total += overhead
    lines += ["", f"Plus {overhead:.0f} s outside the stages (imports, temporary Prefect server, task overhead): "
                  f"{total / 60:.1f} min in all; " +
              (f"peak memory {_mb(max(peaks))} MiB (process tree)." if peaks else
               "no memory trend (one size measured: run two or more sizes for it).")]
    return "\n".join(lines)


#: The targets on the 2-core machine, second night, default configuration: (nodes, wall s, tree bytes, disk bytes,
#: largest single process bytes); None where the target says nothing.
TARGETS = ((200_000, None, None, None, int(1.5 * 10**9)),
           (1_000_000, 8 * 60, 3 * 10**9, None, None),
           (10_000_000, 80 * 60, 15 * 10**9, 50 * 10**9, None))
TARGET_NODES = 1_000_000


def verdict(results: list[dict]) -> str:
    """Each measured size that has a target, side by side with it."""
    lines = []
    for nodes, seconds, tree, disk, single in TARGETS:
        row = next((r for r in results if r["n_nodes"] == nodes), None)
        if row is None:
            lines.append(f"Target at {nodes:,} nodes: not run at this size.")
            continue
        parts = []
        if seconds:
            parts.append(f"wall {row['wall']:.0f} s ({row['wall'] / 60:.1f} min) vs {seconds / 60:.0f} min = "
                         f"{row['wall'] / seconds:.2f}x, {'met' if row['wall'] <= seconds else 'MISSED'}")
        if tree:
            peak = max(row["peak_tree"].values())
            parts.append(f"peak tree {peak / 1e9:.2f} GB vs {tree / 1e9:.0f} GB = {peak / tree:.2f}x, "
                         f"{'met' if peak <= tree else 'MISSED'}")
        if disk:
            peak = max(row.get("peak_disk", {}).values() or [0])
            parts.append(f"disk {peak / 1e9:.1f} GB vs {disk / 1e9:.0f} GB = {peak / disk:.2f}x, "
                         f"{'met' if peak <= disk else 'MISSED'}")
        if single:
            peak = max(row.get("peak_single", {}).values() or [0])
            parts.append(f"largest process {peak / 1e9:.2f} GB vs {single / 1e9:.1f} GB = {peak / single:.2f}x, "
                         f"{'met' if peak <= single else 'MISSED'}")
        lines.append(f"Target at {nodes:,} nodes, second night: " + "; ".join(parts) + ".")
    return "\n".join(lines)


def default_extrapolation(results: list[dict]) -> int:
    """1M nodes until that size is measured, then ten times the largest size run."""
    largest = max(r["n_nodes"] for r in results)
    return TARGET_NODES if largest < TARGET_NODES else 10 * largest


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--sizes", default="100k,300k", help="comma-separated node counts (default 100k,300k)")
    p.add_argument("--degree", type=int, default=20, help="average degree (default 20)")
    p.add_argument("--threads", type=int, default=None, help="training threads (default: all cores)")
    p.add_argument("--out", default="/tmp/graphkit-bench-scale", help="work folder for graphs and stores")
    p.add_argument("--json", default=None, help="also write the raw results to this JSON file")
    p.add_argument("--keep", type=int, default=None, help="[store] keep for both nights (2 for the 10M target)")
    p.add_argument("--first-per-node", type=int, default=2,
                   help="walks per node of the first night, which only builds the store (default 2)")
    p.add_argument("--log", default=None, help="append timestamped progress lines to this file")
    p.add_argument("--from-json", default=None, help="print the tables of an earlier run's --json file, run nothing")
    p.add_argument("--extrapolate-to", type=parse_size, default=None,
                   help="node count for the fitted estimate (default: 1m, or 10x the largest size once 1m is run)")
    args = p.parse_args(argv)
    if args.from_json:
        results = json.loads(Path(args.from_json).read_text())
        to = args.extrapolate_to or default_extrapolation(results)
        print(report(results) + "\n\n" + verdict(results) + "\n\n" + extrapolate(results, to, results[0]["degree"]))
        return 0
    sizes = [parse_size(s) for s in args.sizes.split(",")]
    out = Path(args.out)
    print(f"graphkit scale benchmark, two nights per size (default config, the second measured): sizes {sizes}, "
          f"degree {args.degree}, {SETTINGS}, first night per_node={args.first_per_node}, keep={args.keep}")
    print(f"machine: {platform.processor() or platform.machine()}, {len(os.sched_getaffinity(0))} cores, "
          f"{psutil.virtual_memory().total / 2**30:.1f} GiB RAM, load average {os.getloadavg()[0]:.2f}")
    def progress(message: str) -> None:
        line = f"{time.strftime('%H:%M:%S')} {message}"
        print(line, flush=True)
        if args.log:
            with open(args.log, "a") as f:
                f.write(line + "\n")

    results = []
    for n in sizes:
        results.append(bench_one(out, n, args.degree, args.threads, args.first_per_node, args.keep, progress))
        if args.json:  # after each size, so that a long run keeps what it measured
            Path(args.json).write_text(json.dumps(results, indent=1, default=str))
    print()
    print(report(results))
    print()
    print(verdict(results))
    print()
    print(extrapolate(results, args.extrapolate_to or default_extrapolation(results), args.degree))
    print(f"load average after the run: {os.getloadavg()[0]:.2f}")
    if args.json:
        Path(args.json).write_text(json.dumps(results, indent=1, default=str))
    return 0


if __name__ == "__main__":
    sys.exit(main())
