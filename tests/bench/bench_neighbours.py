"""Benchmark: approximate nearest-neighbour libraries for `graphkit neighbours`, side by side.

For each candidate library the script builds a cosine index over the same vectors (unit-normalised float32, inner
product), queries every node for its K + 1 nearest (the node itself dropped), and times one query at a time. It
prints, per data set and library: recall@K against an exact blockwise numpy brute force on a seeded sample of
query nodes, build time, time to query all nodes, the median of single queries, and the peak memory above the
loaded vectors (each library runs in a process of its own, so that the figures do not mix).

Data sets:

* ``clustered``: seeded random clustered float32 vectors (``--nodes`` x ``--dim``, ``--clusters`` Gaussian
  clusters), for speed;
* ``planted``: vectors that graphkit itself trains (random walks + skip-gram) on networkx's
  ``planted_partition_graph`` (``--planted-blocks`` blocks of 200 nodes), the kind of vectors a version holds.

Run by hand (nice it on the shared machine):

    nice -n 10 .venv/bin/python tests/bench/bench_neighbours.py [--nodes 200000] \
        [--libs faiss,hnswlib,usearch,pynndescent]

Each library is imported only in its own child process; a library that is not installed is reported as such.

``--graphkit N`` measures the issue's targets through graphkit itself instead (publish N clustered vectors with
``[store] neighbours = --top``, recall@10 of the table, ``similar`` with the index open; see ``graphkit_run``).
``--build-width``, ``--links`` and ``--search-widths`` change the HNSW settings of the side-by-side runs.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

#: Index settings of the HNSW libraries: graph degree, build beam, search beam (the same for the three).
HNSW = {"M": 16, "ef_construction": 100, "ef_search": 64}
THREADS = 2
#: faiss only: search widths tried on the same index after the default one (``--search-widths``).
WIDTHS: list[int] = []


def unit_rows(x: np.ndarray, block: int = 65536) -> np.ndarray:
    """float32 rows scaled to unit length, in place, block by block (a zero row stays zero)."""
    for s in range(0, len(x), block):
        b = x[s:s + block]
        norms = np.sqrt(np.einsum("ij,ij->i", b, b))
        norms[norms == 0] = 1.0
        b /= norms[:, None]
    return x


def clustered(n: int, dim: int, clusters: int, seed: int) -> np.ndarray:
    """Seeded Gaussian clusters: centres N(0, 1), points at a spread of 0.5 around them, float32."""
    rng = np.random.default_rng(seed)
    centres = rng.standard_normal((clusters, dim), dtype=np.float32)
    x = np.empty((n, dim), np.float32)
    for s in range(0, n, 65536):
        m = min(65536, n - s)
        x[s:s + m] = centres[rng.integers(0, clusters, m)] + 0.5 * rng.standard_normal((m, dim), dtype=np.float32)
    return x


def planted_vectors(blocks: int, dim: int, seed: int) -> np.ndarray:
    """graphkit's own vectors of a planted-partition graph (networkx.planted_partition_graph)."""
    import networkx as nx

    from graphkit.graph import AdjacencyArrays
    from graphkit.train import train_vectors
    from graphkit.walks import random_walks

    size = 200
    n = blocks * size
    g = nx.planted_partition_graph(blocks, size, 6.0 / (size - 1), 6.0 / (n - size), seed=seed)
    e = np.array(list(g.edges()), dtype=np.int64).reshape(-1, 2)
    graph = AdjacencyArrays.from_edges(e[:, 0], e[:, 1], n_nodes=n)
    walks = random_walks(graph, per_node=10, length=40, seed=seed)
    return train_vectors(walks, n, dim=dim, window=5, seed=seed).astype(np.float32)


def exact_top(x: np.ndarray, queries: np.ndarray, k: int, block: int = 50_000) -> np.ndarray:
    """Exact top-k rows by inner product of unit rows for the query rows, the row itself left out (blockwise)."""
    q = x[queries]
    best_s = np.full((len(queries), k), -np.inf, np.float32)
    best_i = np.zeros((len(queries), k), np.int64)
    for s in range(0, len(x), block):
        sims = q @ x[s:s + block].T
        rows = np.arange(s, s + sims.shape[1])
        sims[queries[:, None] == rows[None, :]] = -np.inf
        cand_s = np.concatenate([best_s, sims], axis=1)
        cand_i = np.concatenate([best_i, np.broadcast_to(rows, sims.shape)], axis=1)
        pick = np.argpartition(-cand_s, k - 1, axis=1)[:, :k]
        best_s = np.take_along_axis(cand_s, pick, 1)
        best_i = np.take_along_axis(cand_i, pick, 1)
    return best_i


def memory_mb(field: str) -> float:
    """``VmRSS`` (now) or ``VmHWM`` (peak) of this process from /proc, in MB (the peak starts afresh at exec,
    unlike ``ru_maxrss``, which a child inherits from the process that forked it)."""
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith(field + ":"):
                return int(line.split()[1]) / 1024
    raise RuntimeError(f"no {field} in /proc/self/status")


# ------------------------------------------------------------------------------------------- one library (child)

def _faiss(x, k):
    import faiss

    faiss.omp_set_num_threads(THREADS)
    idx = faiss.IndexHNSWFlat(x.shape[1], HNSW["M"], faiss.METRIC_INNER_PRODUCT)
    idx.hnsw.efConstruction = HNSW["ef_construction"]
    t0 = time.perf_counter()
    idx.add(x)
    build = time.perf_counter() - t0
    idx.hnsw.efSearch = max(HNSW["ef_search"], k + 1)

    def search(q, kk):
        idx.hnsw.efSearch = max(HNSW["ef_search"], kk)
        return idx.search(q, kk)[1]

    def single(q):
        return idx.search(q, k + 1)[1]

    return build, search, single, None


def _hnswlib(x, k):
    import hnswlib

    idx = hnswlib.Index(space="ip", dim=x.shape[1])
    idx.init_index(max_elements=len(x), ef_construction=HNSW["ef_construction"], M=HNSW["M"], random_seed=0)
    idx.set_num_threads(THREADS)
    t0 = time.perf_counter()
    idx.add_items(x, np.arange(len(x)))
    build = time.perf_counter() - t0
    idx.set_ef(max(HNSW["ef_search"], k + 1))

    def search(q, kk):
        return idx.knn_query(q, k=kk)[0]

    def single(q):
        return idx.knn_query(q, k=k + 1, num_threads=1)[0]

    return build, search, single, None


def _usearch(x, k):
    from usearch.index import Index

    idx = Index(ndim=x.shape[1], metric="ip", dtype="f32", connectivity=HNSW["M"],
                expansion_add=HNSW["ef_construction"], expansion_search=max(HNSW["ef_search"], k + 1))
    t0 = time.perf_counter()
    idx.add(np.arange(len(x)), x, threads=THREADS)
    build = time.perf_counter() - t0

    def search(q, kk):
        return idx.search(q, kk, threads=THREADS).keys

    def single(q):
        return idx.search(q[0], k + 1, threads=1).keys

    return build, search, single, None


def _pynndescent(x, k):
    from pynndescent import NNDescent

    t0 = time.perf_counter()
    nnd = NNDescent(x, metric="dot", n_neighbors=max(30, k + 1), n_jobs=THREADS, random_state=0,
                    low_memory=True, verbose=False)
    graph = nnd.neighbor_graph[0]  # the all-nodes answer comes with the build
    build = time.perf_counter() - t0
    t1 = time.perf_counter()
    nnd.prepare()  # the search structure single queries need
    prepare = time.perf_counter() - t1

    def search(q, kk, rows=None):
        return graph[rows, :kk]

    def single(q):
        return nnd.query(q, k=k + 1)[0]

    return build, search, single, prepare


LIBRARIES = {"faiss": _faiss, "hnswlib": _hnswlib, "usearch": _usearch, "pynndescent": _pynndescent}
PACKAGES = {"faiss": "faiss-cpu", "hnswlib": "hnswlib", "usearch": "usearch", "pynndescent": "pynndescent"}


def child(lib: str, data: str, truth: str, k: int, out: str) -> None:
    x = np.load(data, mmap_mode="r")
    x = np.ascontiguousarray(x, dtype=np.float32)
    t = np.load(truth)
    queries, exact = t["queries"], t["exact"]
    base = memory_mb("VmRSS")
    try:
        build, search, single, prepare = LIBRARIES[lib](x, k)
    except ImportError as exc:
        Path(out).write_text(json.dumps({"lib": lib, "error": f"not installed ({exc})"}))
        return
    def all_nodes():
        t0 = time.perf_counter()
        found = np.empty((len(x), k), np.int64)
        batch = 20_000
        for s in range(0, len(x), batch):
            rows = np.arange(s, min(len(x), s + batch))
            got = search(x[rows], k + 1, rows) if lib == "pynndescent" else search(x[rows], k + 1)
            got = np.asarray(got, np.int64)
            keep = got != rows[:, None]
            # drop the node itself (or, when the index missed it, the last of the k + 1)
            keep[keep.all(axis=1), -1] = False
            found[rows] = got[keep].reshape(len(rows), k)
        hits = [len(set(found[q]) & set(e)) for q, e in zip(queries, exact)]
        return float(np.sum(hits)) / (len(queries) * k), time.perf_counter() - t0

    recall, all_s = all_nodes()
    widths = {}
    if lib == "faiss" and WIDTHS:  # the same index searched with wider beams
        for w in WIDTHS:
            HNSW["ef_search"] = w
            widths[w] = all_nodes()
    lat = []
    for q in queries[:300]:
        t1 = time.perf_counter()
        single(x[q:q + 1])
        lat.append(time.perf_counter() - t1)
    peak = memory_mb("VmHWM")
    Path(out).write_text(json.dumps({
        "lib": lib, "recall": recall, "build_s": build, "all_nodes_s": all_s, "prepare_s": prepare,
        "single_ms": 1000 * float(np.median(lat)), "peak_mb_over_vectors": peak - base, "widths": widths,
        "vectors_mb": x.nbytes / 2**20}))


def graphkit_run(n: int, dim: int, clusters: int, top: int, queries: int, tmp: str) -> dict:
    """The issue's targets through graphkit itself: publish ``n`` clustered vectors with ``neighbours = top``
    (index and table written at publish), recall@10 of the table's first 10 ranks on seeded query nodes, then
    `similar` with the index open (median of single queries) against the brute-force SQL."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    from graphkit.neighbours import TABLE_FILE, NeighbourIndex
    from graphkit.store import publish_embeddings, similar_nodes, version_row

    x = clustered(n, dim, clusters, seed=0)
    ids = pa.array(np.arange(n, dtype=np.int64))
    store = Path(tmp, "store")
    t0, c0 = time.perf_counter(), os.times()
    publish_embeddings(store, ids, x, params={}, fingerprint=[], counts={}, timings={}, neighbours=top)
    publish_s, c1 = time.perf_counter() - t0, os.times()
    # CPU seconds of this process: on a shared machine, the wall time says how busy the others were
    publish_cpu_s = (c1.user - c0.user) + (c1.system - c0.system)
    figures = version_row(store, None)["counts"]["neighbours"]
    folder = next(store.glob("versions/0*"))
    unit_rows(x)
    rng = np.random.default_rng(1)
    qs = np.sort(rng.choice(n, size=min(queries, n), replace=False))
    exact = exact_top(x, qs, 10)
    pf = pq.ParquetFile(folder / TABLE_FILE)
    got = np.empty((n, 10), np.int64)
    start = 0
    for b in pf.iter_batches(batch_size=top * 65536, columns=["neighbour_id", "rank"]):
        nb = b.column(0).to_numpy().reshape(-1, top)
        got[start:start + len(nb)] = nb[:, :10]
        start += len(nb)
    recall = float(np.mean([len(set(got[q]) & set(e)) / 10 for q, e in zip(qs, exact)]))
    t1 = time.perf_counter()
    index = NeighbourIndex(folder)
    open_s = time.perf_counter() - t1
    lat, lat_sql = [], []
    for q in qs[:200]:
        t1 = time.perf_counter()
        similar_nodes(store, str(q), 10, index=index)
        lat.append(time.perf_counter() - t1)
    for q in qs[:5]:
        t1 = time.perf_counter()
        similar_nodes(store, str(q), 10, use_index=False)
        lat_sql.append(time.perf_counter() - t1)
    t1 = time.perf_counter()
    parts = []
    for q in qs[:50]:
        t2 = time.perf_counter()
        index.similar(int(q), 10)
        parts.append(time.perf_counter() - t2)
    return {"nodes": n, "dim": dim, "top": top, "publish_s": publish_s, "publish_cpu_s": publish_cpu_s,
            "neighbours_s": figures["seconds"],
            "rows": figures["rows"], "recall_at_10": recall, "index_open_s": open_s,
            "similar_index_ms": 1000 * float(np.median(lat)),
            "similar_index_search_ms": 1000 * float(np.median(parts)),
            "similar_sql_ms": 1000 * float(np.median(lat_sql)),
            "index_mb": (folder / "neighbours.index").stat().st_size / 2**20,
            "table_mb": (folder / TABLE_FILE).stat().st_size / 2**20}


def licence(lib: str) -> str:
    from importlib.metadata import PackageNotFoundError, metadata

    try:
        md = metadata(PACKAGES[lib])
    except PackageNotFoundError:
        return "not installed"
    return md.get("License-Expression") or md.get("License") or "see its LICENSE file"


def run_data(name, x, args, tmp):
    rng = np.random.default_rng(1)
    queries = np.sort(rng.choice(len(x), size=min(args.queries, len(x)), replace=False))
    t0 = time.perf_counter()
    exact = exact_top(x, queries, args.k)
    exact_s = time.perf_counter() - t0
    data, truth = Path(tmp, f"{name}.npy"), Path(tmp, f"{name}-truth.npz")
    np.save(data, x)
    np.savez(truth, queries=queries, exact=exact)
    print(f"\n{name}: {len(x)} x {x.shape[1]} float32, recall@{args.k} on {len(queries)} seeded query nodes "
          f"(exact blockwise brute force: {exact_s:.1f} s for them, about {exact_s * len(x) / len(queries):.0f} s "
          f"for all nodes)", flush=True)
    print(f"{'library':<12}{'recall':>8}{'build s':>9}{'all s':>8}{'1 query ms':>11}{'peak MB':>9}  licence")
    results = []
    for lib in args.libs.split(","):
        out = Path(tmp, f"{name}-{lib}.json")
        cmd = [sys.executable, __file__, "--child", lib, "--data", str(data), "--truth", str(truth),
               "--k", str(args.k), "--out", str(out), "--build-width", str(HNSW["ef_construction"]),
               "--links", str(HNSW["M"]), "--search-widths", ",".join(map(str, WIDTHS))]
        t0 = time.perf_counter()
        proc = subprocess.run(cmd, capture_output=True, text=True)
        if proc.returncode != 0 or not out.exists():
            print(f"{lib:<12} failed: {proc.stderr.strip().splitlines()[-1:]} ")
            continue
        r = json.loads(out.read_text())
        r["wall_s"] = time.perf_counter() - t0
        results.append(r)
        if "error" in r:
            print(f"{lib:<12} {r['error']}")
            continue
        extra = f" (+ prepare {r['prepare_s']:.1f} s for single queries)" if r.get("prepare_s") else ""
        print(f"{lib:<12}{r['recall']:>8.4f}{r['build_s']:>9.1f}{r['all_nodes_s']:>8.1f}{r['single_ms']:>11.2f}"
              f"{r['peak_mb_over_vectors']:>9.0f}  {licence(lib)}{extra}", flush=True)
        for w, (rec, secs) in (r.get("widths") or {}).items():
            print(f"{'  ef ' + str(w):<12}{rec:>8.4f}{'':>9}{secs:>8.1f}", flush=True)
    return {"data": name, "nodes": len(x), "dim": int(x.shape[1]), "exact_sample_s": exact_s, "results": results}


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--nodes", type=int, default=200_000)
    ap.add_argument("--dim", type=int, default=128)
    ap.add_argument("--clusters", type=int, default=2000)
    ap.add_argument("--planted-blocks", type=int, default=100, help="blocks of 200 nodes (0: skip)")
    ap.add_argument("--queries", type=int, default=2000)
    ap.add_argument("--k", type=int, default=10)
    ap.add_argument("--libs", default="faiss,hnswlib,usearch,pynndescent")
    ap.add_argument("--json", default=None, help="also write the figures to this file")
    ap.add_argument("--graphkit", type=int, default=0, metavar="N",
                    help="instead: the issue's targets through graphkit at N clustered vectors (publish with "
                         "[store] neighbours = --top, recall@10, similar with the index open)")
    ap.add_argument("--top", type=int, default=50, help="K of --graphkit (default 50)")
    ap.add_argument("--links", type=int, default=HNSW["M"], help="HNSW links per node (M)")
    ap.add_argument("--build-width", type=int, default=HNSW["ef_construction"], help="HNSW efConstruction")
    ap.add_argument("--search-widths", default="", help="faiss: also search with these efSearch values")
    ap.add_argument("--child", default=None, help=argparse.SUPPRESS)
    ap.add_argument("--data", default=None, help=argparse.SUPPRESS)
    ap.add_argument("--truth", default=None, help=argparse.SUPPRESS)
    ap.add_argument("--out", default=None, help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    HNSW.update(M=args.links, ef_construction=args.build_width)
    WIDTHS[:] = [int(w) for w in args.search_widths.split(",") if w]
    if args.child:
        child(args.child, args.data, args.truth, args.k, args.out)
        return
    print(f"load (uptime): {os.getloadavg()}; cores: {os.cpu_count()}; HNSW settings {HNSW}; {THREADS} threads")
    if args.graphkit:
        from graphkit.neighbours import IndexSettings

        print(f"graphkit's index settings: {IndexSettings()}", flush=True)
        with tempfile.TemporaryDirectory() as tmp:
            r = graphkit_run(args.graphkit, args.dim, max(args.clusters, args.graphkit // 100), args.top,
                             args.queries, tmp)
        print(f"graphkit at {r['nodes']} x {r['dim']}, [store] neighbours = {r['top']}: the index and table of "
              f"{r['rows']} rows in {r['neighbours_s']:.1f} s (the whole publish {r['publish_s']:.1f} s, "
              f"{r['publish_cpu_s']:.0f} CPU s); "
              f"recall@10 {r['recall_at_10']:.4f}; index {r['index_mb']:.0f} MB opened in "
              f"{r['index_open_s']:.2f} s; similar with it open: {r['similar_index_ms']:.1f} ms "
              f"(the index search alone {r['similar_index_search_ms']:.2f} ms), brute-force SQL "
              f"{r['similar_sql_ms']:.0f} ms; table {r['table_mb']:.0f} MB")
        print(f"load at the end: {os.getloadavg()}")
        if args.json:
            Path(args.json).write_text(json.dumps({"load_end": os.getloadavg(), "graphkit": r}, indent=1))
        return
    runs = []
    with tempfile.TemporaryDirectory() as tmp:
        if args.planted_blocks:
            t0 = time.perf_counter()
            x = unit_rows(planted_vectors(args.planted_blocks, args.dim, seed=7))
            print(f"planted-partition vectors trained by graphkit in {time.perf_counter() - t0:.1f} s")
            runs.append(run_data("planted", x, args, tmp))
        x = unit_rows(clustered(args.nodes, args.dim, args.clusters, seed=0))
        runs.append(run_data("clustered", x, args, tmp))
    print(f"\nload at the end: {os.getloadavg()}")
    if args.json:
        Path(args.json).write_text(json.dumps({"load_end": os.getloadavg(), "hnsw": HNSW, "runs": runs}, indent=1))


if __name__ == "__main__":
    main()
