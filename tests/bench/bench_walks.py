"""Walk-engine benchmark: our kernels against a straightforward numba walker, side by side in one process.

Run by hand (pytest does not collect ``tests/bench``); figures and targets are recorded in ``docs/bench/walks.md``::

    .venv/bin/python tests/bench/bench_walks.py [--nodes 2000000] [--degree 10] [--length 40] [--threads 2]
        [--repeats 3] [--graph uniform|powerlaw] [--samplers] [--no-memory]

Graph (``--graph uniform``, the issue's benchmark): ``nodes * degree / 2`` endpoint pairs drawn uniformly with numpy,
self-loops dropped, both directions stored, rows sorted and duplicate pairs merged by a numba counting sort: O(E)
apart from sorting each row (about 10 entries). ``--graph powerlaw`` draws the endpoints in proportion to expected
degrees ``(i + 10) ** -0.5`` (a Chung-Lu graph, Chung & Lu 2002; degree exponent 3), which has hubs of thousands of
edges, to compare weighted samplers where binary search is deepest. Weights (weighted variants): a hash of the
unordered node pair mapped to [0.1, 10), so both directions of an edge weigh the same.

Variants, each timed after a warm-up call (compilation or cache load), best of ``--repeats``, one walk per node,
``--threads`` numba threads:

* baseline: one walk at a time per prange iteration, ``np.random.randint`` inside the kernel, start ``w % n``;
* uniform, weighted (alias tables, built beforehand and timed separately), p=0.5 q=2 (unweighted second order) and
  p=0.5 q=2 on the weighted graph: :func:`graphkit.walks.random_walks`;
* with ``--samplers``: weighted walks drawn by binary search on per-node cumulative float32 weights, in the same
  lock-step form with one more prefetch round (bench-only kernel), to compare the two samplers.

Steps/s counts the walk entries after the first that are not padding. Peak memory: each variant is run once more in a
fresh subprocess that loads the graph from ``.npy`` files into memory and warms up; it reports the RSS then
(``psutil``) and, after resetting the kernel's peak mark (``/proc/self/clear_refs``), the peak RSS (``VmHWM``) over
building the variant's table and walking from every node. The peak therefore includes the graph, numba's own
footprint, the output array (int32 [nodes, length]) and whatever the variant allocates (the alias table).
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numba
import numpy as np

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from graphkit import walks as gw  # noqa: E402
from graphkit.graph import AdjacencyArrays  # noqa: E402

SEED = 1
P, Q = 0.5, 2.0


# ---------------------------------------------------------------------------------------------------- graphs
@numba.njit(cache=True, nogil=True)
def _csr_kernel(src, dst, n, indptr, indices):
    """Counting sort of the undirected pairs (src, dst) into CSR with both directions; rows sorted, duplicates
    merged. indptr int64 [n + 1] and indices int32 [2 * m] are filled in place; returns the stored edge count."""
    deg = np.zeros(n, np.int64)
    for i in range(src.shape[0]):
        deg[src[i]] += 1
        deg[dst[i]] += 1
    fill = np.zeros(n + 1, np.int64)
    for v in range(n):
        fill[v + 1] = fill[v] + deg[v]
    for i in range(src.shape[0]):
        u, v = src[i], dst[i]
        indices[fill[u]] = v
        fill[u] += 1
        indices[fill[v]] = u
        fill[v] += 1
    out = 0
    row_start = 0
    for v in range(n):
        row_end = row_start + deg[v]
        row = np.sort(indices[row_start:row_end])
        indptr[v] = out
        for i in range(row.shape[0]):
            if i == 0 or row[i] != row[i - 1]:
                indices[out] = row[i]
                out += 1
        row_start = row_end
    indptr[n] = out
    return out


def build_graph(n, degree, kind, seed=0) -> AdjacencyArrays:
    rng = np.random.default_rng(seed)
    m = n * degree // 2
    if kind == "uniform":
        src = rng.integers(0, n, m, dtype=np.int32)
        dst = rng.integers(0, n, m, dtype=np.int32)
    else:
        expected = (np.arange(n) + 10.0) ** -0.5
        cdf = np.cumsum(expected / expected.sum())
        src = np.minimum(np.searchsorted(cdf, rng.random(m)), n - 1).astype(np.int32)
        dst = np.minimum(np.searchsorted(cdf, rng.random(m)), n - 1).astype(np.int32)
    keep = src != dst
    src, dst = src[keep], dst[keep]
    indptr = np.empty(n + 1, np.int64)
    indices = np.empty(2 * src.size, np.int32)
    stored = _csr_kernel(src, dst, n, indptr, indices)
    return AdjacencyArrays.from_arrays(indptr, indices[:stored].copy())


def pair_weights(graph) -> np.ndarray:
    """float32 weight in [0.1, 10) from a splitmix hash of the unordered pair: symmetric, no extra bookkeeping."""
    src = np.repeat(np.arange(graph.n_nodes, dtype=np.uint64), np.diff(graph.indptr))
    dst = graph.indices.astype(np.uint64)
    z = np.minimum(src, dst) * np.uint64(0x9E3779B97F4A7C15) ^ np.maximum(src, dst)
    with np.errstate(over="ignore"):
        z = (z ^ (z >> np.uint64(30))) * np.uint64(0xBF58476D1CE4E5B9)
        z = (z ^ (z >> np.uint64(27))) * np.uint64(0x94D049BB133111EB)
    z ^= z >> np.uint64(31)
    return (0.1 + 9.9 * (z >> np.uint64(11)).astype(np.float64) / 2.0**53).astype(np.float32)


# ---------------------------------------------------------------------------------------------------- baseline
@numba.njit(cache=True, nogil=True, parallel=True)
def baseline_kernel(indptr, indices, out):
    """The straightforward walker: each prange iteration runs one walk to its end, numba's own np.random."""
    n = indptr.shape[0] - 1
    length = out.shape[1]
    for w in numba.prange(out.shape[0]):
        c = w % n
        out[w, 0] = c
        for t in range(1, length):
            a = indptr[c]
            d = indptr[c + 1] - a
            if d == 0:
                for r in range(t, length):
                    out[w, r] = -1
                break
            c = indices[a + np.random.randint(0, d)]
            out[w, t] = c


# ---------------------------------------------------------------------------------------------------- other sampler
@numba.njit(cache=True, nogil=True)
def cumulative_kernel(indptr, weights, out):
    """Per-node running sums of the weights (float32 [m], 4 bytes per edge)."""
    for v in range(indptr.shape[0] - 1):
        total = np.float32(0.0)
        for i in range(indptr[v], indptr[v + 1]):
            total += weights[i]
            out[i] = total


@numba.njit(cache=True, nogil=True)
def _bisect_block_kernel(indptr, indices, cum, seed, row0, out, n_rows, st, sc):
    """Weighted walks by binary search on cumulative weights, lock-step with three prefetch rounds per step
    (edge range -> cumulative weights -> chosen edge). Not our sampler: kept here to compare against alias tables."""
    n = indptr.shape[0] - 1
    for j in range(n_rows):
        c = (row0 + j) % n
        out[row0 + j, 0] = c
        sc[0, j] = c
        st[j] = (seed * gw._G) ^ np.uint64(row0 + j)
    for step in range(1, out.shape[1]):
        for j in range(n_rows):  # round 1: edge range, fetch the ends of the cumulative weights
            c = sc[0, j]
            if c >= 0:
                a = indptr[c]
                sc[1, j] = a
                sc[2, j] = indptr[c + 1] - a
                gw._prefetch(cum, a)
                gw._prefetch(cum, indptr[c + 1] - 1)
        for j in range(n_rows):  # round 2: bisect, fetch the chosen edge
            if sc[0, j] >= 0 and sc[2, j] > 0:
                a, d = sc[1, j], sc[2, j]
                st[j] = st[j] + gw._G
                u = np.float32((gw._mix_kernel(st[j]) >> np.uint64(40)) * (1.0 / 16777216.0)) * cum[a + d - 1]
                lo, hi = a, a + d - 1
                while lo < hi:
                    mid = (lo + hi) >> 1
                    if cum[mid] <= u:
                        lo = mid + 1
                    else:
                        hi = mid
                sc[3, j] = lo
                gw._prefetch(indices, lo)
        for j in range(n_rows):  # round 3: read the edge, fetch the next range
            c = sc[0, j]
            if c >= 0:
                c = indices[sc[3, j]] if sc[2, j] > 0 else -1
                sc[0, j] = c
                if c >= 0:
                    gw._prefetch(indptr, c)
            out[row0 + j, step] = c


@numba.njit(cache=True, nogil=True, parallel=True)
def bisect_walks_kernel(indptr, indices, cum, seed, out):
    n_blocks = (out.shape[0] + 127) // 128
    for b in numba.prange(n_blocks):
        st = np.empty(128, np.uint64)
        sc = np.empty((4, 128), np.int64)
        _bisect_block_kernel(indptr, indices, cum, seed, b * 128, out, min(128, out.shape[0] - b * 128), st, sc)


# ---------------------------------------------------------------------------------------------------- variants
VARIANTS = {
    "baseline": "baseline (one walk at a time, np.random)",
    "uniform": "uniform",
    "weighted": "weighted (alias tables)",
    "second": f"p={P} q={Q}",
    "second_weighted": f"p={P} q={Q}, weighted",
    "bisect": "weighted (binary search, float32 cumulative)",
}


def prepare(name, graph):
    """Whatever the variant needs besides the graph, built before timing: (extra, seconds, bytes)."""
    t0 = time.perf_counter()
    if name in ("weighted", "second_weighted"):
        extra = gw.alias_table(graph)
    elif name == "bisect":
        extra = np.empty(graph.n_edges, np.float32)
        cumulative_kernel(graph.indptr, graph.weights, extra)
    else:
        return None, 0.0, 0
    return extra, time.perf_counter() - t0, extra.nbytes


def run(name, graph, extra, n_walks, length, threads) -> np.ndarray:
    if name == "baseline":
        out = np.empty((n_walks, length), np.int32)
        previous = numba.get_num_threads()
        numba.set_num_threads(threads)
        try:
            baseline_kernel(graph.indptr, graph.indices, out)
        finally:
            numba.set_num_threads(previous)
        return out
    if name == "bisect":
        out = np.empty((n_walks, length), np.int32)
        previous = numba.get_num_threads()
        numba.set_num_threads(threads)
        try:
            bisect_walks_kernel(graph.indptr, graph.indices, extra, np.uint64(SEED), out)
        finally:
            numba.set_num_threads(previous)
        return out
    opts = {"uniform": dict(weighted=False), "weighted": dict(weighted=True, alias=extra),
            "second": dict(weighted=False, p=P, q=Q), "second_weighted": dict(weighted=True, p=P, q=Q, alias=extra)}
    return gw.walk_range(graph, 0, n_walks, per_node=1, length=length, seed=SEED, threads=threads, **opts[name])


def time_variants(names, graphs, length, threads, repeats) -> dict:
    """Best wall-clock time of each variant; the repeats go round-robin over the variants, so that a change in the
    shared machine's load hits all of them alike. Also records the process CPU time (all threads) of the best run."""
    prepared, results = {}, {}
    for name in names:
        extra, prep_s, prep_bytes = prepare(name, graphs[name])
        prepared[name] = extra
        run(name, graphs[name], extra, min(10_000, graphs[name].n_nodes), length, threads)  # warm-up
        results[name] = {"name": name, "seconds": float("inf"), "prep_s": prep_s, "prep_bytes": prep_bytes}
    for _ in range(repeats):
        for name in names:
            c0, t0 = time.process_time(), time.perf_counter()
            out = run(name, graphs[name], prepared[name], graphs[name].n_nodes, length, threads)
            wall, cpu = time.perf_counter() - t0, time.process_time() - c0
            r = results[name]
            if wall < r["seconds"]:
                r.update(seconds=wall, cpu_seconds=cpu, steps=int(np.count_nonzero(out[:, 1:] >= 0)))
            del out
    for r in results.values():
        r["steps_per_s"] = r["steps"] / r["seconds"]
        r["steps_per_cpu_s"] = r["steps"] / r["cpu_seconds"]
    return results


def _reset_peak_rss() -> bool:
    """Reset the kernel's peak-RSS mark of this process (Linux: writing 5 to /proc/self/clear_refs)."""
    try:
        Path("/proc/self/clear_refs").write_text("5")
        return True
    except OSError:
        return False


def _peak_rss() -> int:
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) * 1024
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024  # kilobytes on Linux


def child(name, graph_dir, length, threads) -> None:
    """One run of one variant in a fresh process; prints RSS figures as JSON.

    The warm-up (numba start-up, cache load) runs first; then the peak mark is reset, so the peak covers only
    building the variant's table (if any) and walking from every node, on top of the loaded graph.
    """
    import psutil

    weighted = (Path(graph_dir) / "weights.npy").exists()
    graph = AdjacencyArrays(np.load(Path(graph_dir) / "indptr.npy"), np.load(Path(graph_dir) / "indices.npy"),
                     np.load(Path(graph_dir) / "weights.npy") if weighted else None)
    extra, _, _ = prepare(name, graph)
    run(name, graph, extra, min(10_000, graph.n_nodes), length, threads)
    del extra
    rss_loaded = psutil.Process().memory_info().rss
    reset = _reset_peak_rss()
    extra, _, _ = prepare(name, graph)
    run(name, graph, extra, graph.n_nodes, length, threads)
    print(json.dumps({"rss_loaded": rss_loaded, "peak": _peak_rss(), "peak_reset": reset}))


def measure_memory(name, graph, tmp, length, threads) -> dict:
    folder = Path(tmp) / ("weighted" if graph.weights is not None else "plain")
    if not folder.exists():
        folder.mkdir(parents=True)
        np.save(folder / "indptr.npy", graph.indptr)
        np.save(folder / "indices.npy", graph.indices)
        if graph.weights is not None:
            np.save(folder / "weights.npy", graph.weights)
    res = subprocess.run([sys.executable, __file__, "--child", name, "--graph-dir", str(folder), "--length",
                          str(length), "--threads", str(threads)], capture_output=True, text=True, check=True)
    return json.loads(res.stdout.strip().splitlines()[-1])


# ---------------------------------------------------------------------------------------------------- main
def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--nodes", type=int, default=2_000_000)
    ap.add_argument("--degree", type=int, default=10)
    ap.add_argument("--length", type=int, default=40)
    ap.add_argument("--threads", type=int, default=2)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--graph", choices=("uniform", "powerlaw"), default="uniform")
    ap.add_argument("--samplers", action="store_true", help="also time the binary-search weighted sampler")
    ap.add_argument("--no-memory", action="store_true", help="skip the peak-memory subprocesses")
    ap.add_argument("--child", help=argparse.SUPPRESS)
    ap.add_argument("--graph-dir", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.child:
        child(args.child, args.graph_dir, args.length, args.threads)
        return 0

    load0 = os.getloadavg()
    t0 = time.perf_counter()
    plain = build_graph(args.nodes, args.degree, args.graph)
    weighted = AdjacencyArrays.from_arrays(plain.indptr, plain.indices, pair_weights(plain), validate=False)
    deg = plain.degrees()
    print(f"graph: {args.graph} random, {plain.n_nodes:,} nodes, {plain.n_edges:,} stored edges "
          f"(average degree {plain.n_edges / plain.n_nodes:.2f}, max {deg.max():,}, isolated {(deg == 0).sum():,}); "
          f"built in {time.perf_counter() - t0:.1f} s")
    print(f"walks: {plain.n_nodes:,} x length {args.length}, {args.threads} numba threads, best of {args.repeats} "
          f"after a warm-up; numba {numba.__version__}, {os.cpu_count()} CPUs; load average at start "
          f"{load0[0]:.2f} (a shared machine)")
    names = ["baseline", "uniform", "weighted", "second", "second_weighted"] + (["bisect"] if args.samplers else [])
    graphs = {name: weighted if name in ("weighted", "second_weighted", "bisect") else plain for name in names}
    results = time_variants(names, graphs, args.length, args.threads, args.repeats)
    tmp = tempfile.mkdtemp(prefix="bench_walks_")
    try:
        if not args.no_memory:
            for name in names:
                results[name].update(measure_memory(name, graphs[name], tmp, args.length, args.threads))
    finally:
        shutil.rmtree(tmp, ignore_errors=True)

    base, uni = results["baseline"]["steps_per_s"], results["uniform"]["steps_per_s"]
    base_cpu, uni_cpu = results["baseline"]["steps_per_cpu_s"], results["uniform"]["steps_per_cpu_s"]
    print()
    print("| variant | steps/s | vs baseline | vs uniform | best s (CPU s) | steps per CPU-s, vs baseline, vs uniform "
          "| peak RSS MB | RSS before MB | table: build s, MB |")
    print("|---|---:|---:|---:|---:|---:|---:|---:|---|")
    for name in names:
        r = results[name]
        mem = (f"{r['peak'] / 2**20:,.0f} | {r['rss_loaded'] / 2**20:,.0f}" if "peak" in r else "- | -")
        table = f"{r['prep_s']:.2f} s, {r['prep_bytes'] / 2**20:,.0f} MB" if r["prep_bytes"] else "-"
        print(f"| {VARIANTS[name]} | {r['steps_per_s'] / 1e6:.2f} M | {r['steps_per_s'] / base:.2f}x | "
              f"{r['steps_per_s'] / uni:.2f}x | {r['seconds']:.2f} ({r['cpu_seconds']:.2f}) | "
              f"{r['steps_per_cpu_s'] / 1e6:.2f} M, {r['steps_per_cpu_s'] / base_cpu:.2f}x, "
              f"{r['steps_per_cpu_s'] / uni_cpu:.2f}x | {mem} | {table} |")
    print()
    checks = [("uniform >= 5x baseline", uni / base, 5.0),
              ("weighted >= 0.5x uniform", results["weighted"]["steps_per_s"] / uni, 0.5),
              (f"p={P} q={Q} >= 0.25x uniform", results["second"]["steps_per_s"] / uni, 0.25)]
    for label, ratio, target in checks:
        print(f"target {label}: {ratio:.2f} -> {'met' if ratio >= target else 'NOT met'}")
    print(f"numba threading layer {numba.threading_layer()}; load average at end {os.getloadavg()[0]:.2f}; "
          f"total {time.perf_counter() - t0:.0f} s")
    return 0


if __name__ == "__main__":
    sys.exit(main())
