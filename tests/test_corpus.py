"""Walk corpus on disk: Dask shards equal the in-process walks, reruns skip finished shards, chunked reading."""

from __future__ import annotations

import fcntl
import json
import os

import networkx as nx
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from conftest import graph_from_nx

from graphkit import corpus as gc
from graphkit.corpus import WalkCorpus, accumulate_visits, count_corpus_visits, plan_shards, write_walk_corpus
from graphkit.errors import ConfigError
from graphkit.graph import AdjacencyArrays
from graphkit.walks import count_restarts, count_visits, random_walks, walk_diagnostics

PER_NODE, LENGTH, SEED = 4, 7, 3


@pytest.fixture(scope="module")
def graph_dir(tmp_path_factory):
    """A directed random graph (networkx gnm generator) with sinks, so that the corpus has -1 padding."""
    g = graph_from_nx(nx.gnm_random_graph(300, 700, seed=1, directed=True))
    assert (g.degrees() == 0).any()
    return g.save(tmp_path_factory.mktemp("graph") / "g")


@pytest.fixture(scope="module")
def reference(graph_dir):
    """The same corpus computed in one process, in memory (read-only: shared by the module's tests)."""
    walks = random_walks(AdjacencyArrays.load(graph_dir), PER_NODE, LENGTH, SEED, threads=1)
    walks.setflags(write=False)
    return walks


@pytest.fixture(scope="module")
def weighted_dir(tmp_path_factory):
    """The same kind of directed graph with edge weights (uniform in [0.2, 5]), sinks included."""
    g_nx = nx.gnm_random_graph(300, 900, seed=2, directed=True)
    rng = np.random.default_rng(0)
    for u, v in g_nx.edges():
        g_nx[u][v]["weight"] = rng.uniform(0.2, 5.0)
    g = graph_from_nx(g_nx)
    assert (g.degrees() == 0).any() and g.weights is not None
    return g.save(tmp_path_factory.mktemp("wgraph") / "g")


def read_all(corpus_dir, **kwargs):
    return np.concatenate(list(WalkCorpus(corpus_dir, **kwargs)))


def bincount_visits(walks, n_nodes):
    """Reference visit counts: numpy's bincount over every non-padding entry."""
    flat = np.asarray(walks).reshape(-1)
    return np.bincount(flat[flat >= 0], minlength=n_nodes).astype(np.int64)


def file_ids(corpus_dir):
    """(inode, mtime_ns) of every shard file: changes whenever a file is rewritten (write + rename)."""
    return {p.name: (p.stat().st_ino, p.stat().st_mtime_ns) for p in sorted(corpus_dir.glob("shard-*"))}


# ------------------------------------------------------------------------------------------ same walks everywhere
@pytest.mark.parametrize("n_shards, n_workers", [(1, 1), (3, 2), (7, 1), (7, 2)])
def test_corpus_equals_random_walks(graph_dir, reference, tmp_path, n_shards, n_workers):
    manifest = write_walk_corpus(graph_dir, tmp_path / "c", per_node=PER_NODE, length=LENGTH, seed=SEED,
                                 n_shards=n_shards, n_workers=n_workers)
    assert read_all(tmp_path / "c").tobytes() == reference.tobytes()
    walks = random_walks(AdjacencyArrays.load(graph_dir), PER_NODE, LENGTH, SEED, threads=2)
    assert reference.tobytes() == walks.tobytes()
    n_tokens = int((reference >= 0).sum())
    assert n_tokens < reference.size  # the sinks produce padding, which is not counted
    assert {k: manifest[k] for k in ("n_nodes", "n_walks", "length", "n_tokens", "per_node", "seed")} == {
        "n_nodes": 300, "n_walks": 1200, "length": LENGTH, "n_tokens": n_tokens, "per_node": PER_NODE, "seed": SEED}
    assert [(s["start"], s["stop"]) for s in manifest["shards"]] == plan_shards(1200, 1, n_shards)
    assert json.loads((tmp_path / "c" / "manifest.json").read_text()) == manifest
    corpus = WalkCorpus(tmp_path / "c")
    assert (len(corpus), corpus.n_walks, corpus.length, corpus.n_tokens, corpus.n_nodes) == (
        1200, 1200, LENGTH, n_tokens, 300)
    np.testing.assert_array_equal(corpus.visit_counts(), count_visits(reference, 300))
    # the same counts from the corpus read back, whatever the number of shards and workers
    np.testing.assert_array_equal(corpus.visit_counts(), bincount_visits(read_all(tmp_path / "c"), 300))
    assert corpus.visit_counts().sum() == n_tokens
    assert manifest["visits"] == "visits.npy" and not list((tmp_path / "c").glob("*.counts.npy"))


@pytest.mark.parametrize("opts, n_shards, n_workers", [
    (dict(), 3, 2),
    (dict(p=0.5, q=2.0, dead_end="restart"), 4, 2),
    (dict(weighted=False, p=2.0, q=0.5), 1, 1),
    (dict(dead_end="restart"), 7, 1),
], ids=str)
def test_weighted_second_order_corpus_equals_random_walks(weighted_dir, tmp_path, opts, n_shards, n_workers):
    graph = AdjacencyArrays.load(weighted_dir)
    reference = random_walks(graph, PER_NODE, LENGTH, SEED, threads=2, **opts)
    out = tmp_path / "c"
    manifest = write_walk_corpus(weighted_dir, out, per_node=PER_NODE, length=LENGTH, seed=SEED, n_shards=n_shards,
                                 n_workers=n_workers, **opts)
    assert read_all(out).tobytes() == reference.tobytes()
    assert (manifest["weighted"], manifest["p"], manifest["q"], manifest["dead_end"]) == (
        opts.get("weighted", True), opts.get("p", 1.0), opts.get("q", 1.0), opts.get("dead_end", "stop"))
    assert not (out / gc.ALIAS).exists()  # the shard tasks' alias table is scratch
    n_restarts = count_restarts(reference, graph)
    assert (n_restarts > 0) == (opts.get("dead_end") == "restart")
    assert sum(s["n_restarts"] for s in manifest["shards"]) == n_restarts
    expected = walk_diagnostics(count_visits(reference, 300), graph.degrees(), per_node=PER_NODE,
                                in_degrees=np.bincount(graph.indices, minlength=300), n_restarts=n_restarts)
    assert manifest["diagnostics"] == json.loads(json.dumps(expected))
    assert WalkCorpus(out).diagnostics == manifest["diagnostics"]
    assert manifest["diagnostics"]["dead_end_nodes"] == int((graph.degrees() == 0).sum()) > 0
    meta = pq.read_metadata(out / "shard-00000.parquet").metadata
    assert int(meta[b"graphkit.n_restarts"]) == manifest["shards"][0]["n_restarts"]
    assert int(meta[b"graphkit.n_tokens"]) == manifest["shards"][0]["n_tokens"]


def test_weighted_option_without_weights_is_recorded_as_unweighted(graph_dir, reference, tmp_path):
    manifest = write_walk_corpus(graph_dir, tmp_path / "c", per_node=PER_NODE, length=LENGTH, seed=SEED,
                                 weighted=True, n_shards=2)
    assert manifest["weighted"] is False
    assert read_all(tmp_path / "c").tobytes() == reference.tobytes()
    # the same corpus, so asking for it without weights reuses it instead of refusing
    assert write_walk_corpus(graph_dir, tmp_path / "c", per_node=PER_NODE, length=LENGTH, seed=SEED,
                             weighted=False) == manifest


def test_weighted_rerun_rewrites_only_incomplete_shards(weighted_dir, tmp_path):
    opts = dict(per_node=PER_NODE, length=LENGTH, seed=SEED, p=0.5, q=2.0, dead_end="restart")
    out = tmp_path / "c"
    first = write_walk_corpus(weighted_dir, out, n_shards=4, **opts)
    before = file_ids(out)
    (out / "manifest.json").unlink()
    (out / "shard-00001.parquet").unlink()
    (out / "alias.npy.tmp-0123").write_bytes(b"half an alias table from a crashed run")
    pq.write_table(pa.table({"walk": pa.array([[0] * LENGTH], pa.list_(pa.int32(), LENGTH))}),
                   out / "shard-00003.parquet")  # a Parquet file without our footer counts is not a finished shard
    before.pop("shard-00003.parquet")
    second = write_walk_corpus(weighted_dir, out, **opts)
    after = file_ids(out)
    assert second == first  # shard 1's counts and restarts come back, the others' are read from their footers
    assert {n for n in after if after.get(n) != before.get(n)} == {"shard-00001.parquet", "shard-00003.parquet"}
    assert not list(out.glob("*.tmp-*")) and not (out / gc.ALIAS).exists()
    assert read_all(out).tobytes() == random_walks(AdjacencyArrays.load(weighted_dir), PER_NODE, LENGTH, SEED, p=0.5,
                                                   q=2.0, dead_end="restart").tobytes()


@pytest.mark.parametrize("change, match", [
    (dict(p=0.5), r"another p \(1.0, now 0.5\)"),
    (dict(dead_end="restart"), r"another dead_end \('stop', now 'restart'\)"),
    (dict(weighted=False), r"another weighted \(True, now False\)"),
])
def test_corpus_of_other_walk_options_is_left_alone(weighted_dir, tmp_path, change, match):
    out = tmp_path / "c"
    write_walk_corpus(weighted_dir, out, per_node=PER_NODE, length=LENGTH, seed=SEED, n_shards=2)
    before, manifest = file_ids(out), (out / "manifest.json").read_bytes()
    with pytest.raises(ConfigError, match=match):
        write_walk_corpus(weighted_dir, out, per_node=PER_NODE, length=LENGTH, seed=SEED, **change)
    assert file_ids(out) == before and (out / "manifest.json").read_bytes() == manifest


def test_reweighted_graph_is_refused(weighted_dir, tmp_path):
    g = AdjacencyArrays.load(weighted_dir, mmap=False)
    g.save(tmp_path / "g")
    write_walk_corpus(tmp_path / "g", tmp_path / "c", per_node=1, length=5, seed=0)
    np.save(tmp_path / "g" / "weights.npy", g.weights[::-1].copy())  # same edges, other weights
    with pytest.raises(ConfigError, match=r"another graph"):
        write_walk_corpus(tmp_path / "g", tmp_path / "c", per_node=1, length=5, seed=0)


def test_different_seed_gives_different_corpus(graph_dir, reference, tmp_path):
    write_walk_corpus(graph_dir, tmp_path / "c", per_node=PER_NODE, length=LENGTH, seed=SEED + 1, n_shards=2)
    other = read_all(tmp_path / "c")
    assert other.shape == reference.shape
    assert (other[:, 0] != reference[:, 0]).mean() > 0.9  # start orders differ


@pytest.mark.slow
def test_process_cluster_gives_same_walks(graph_dir, reference, tmp_path):
    # Two worker processes: each task memory-maps the graph from graph_dir and writes its own shard.
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as lc:
        with distributed.Client(lc) as client:
            pids = set(client.run(os.getpid).values())
        manifest = write_walk_corpus(graph_dir, tmp_path / "c", per_node=PER_NODE, length=LENGTH, seed=SEED,
                                     n_shards=4, dask_address=lc.scheduler_address)
    assert os.getpid() not in pids and len(pids) == 2
    assert manifest["n_walks"] == 1200
    assert read_all(tmp_path / "c").tobytes() == reference.tobytes()
    np.testing.assert_array_equal(WalkCorpus(tmp_path / "c").visit_counts(), bincount_visits(reference, 300))


# ------------------------------------------------------------------------------------------ visit counts
@pytest.mark.parametrize("jit", [True, False], ids=["jit", "python"])
def test_accumulate_visits_adds_in_place_like_bincount(jit, monkeypatch):
    if not jit:  # the kernel's own Python body, as NUMBA_DISABLE_JIT=1 would run it
        monkeypatch.setattr(gc, "_accumulate_visits_kernel", gc._accumulate_visits_kernel.py_func)
    rng = np.random.default_rng(5)
    counts = np.zeros(50, dtype=np.int64)
    buffer = counts.ctypes.data
    chunks = [rng.integers(-1, 50, size=(k, 6)).astype(np.int32) for k in (0, 1, 17, 200)]
    added = [accumulate_visits(c, counts) for c in chunks]
    assert counts.ctypes.data == buffer  # accumulated in place, never reallocated
    everything = np.concatenate([c.reshape(-1) for c in chunks])
    np.testing.assert_array_equal(counts, bincount_visits(everything, 50))
    assert added == [int((c >= 0).sum()) for c in chunks]
    with pytest.raises(ConfigError, match=r"walks hold 2 node indices outside -1..49"):
        accumulate_visits(np.array([[3, 50, -2, 4]], np.int32), counts)
    with pytest.raises(ConfigError, match=r"counts must be a writeable C-contiguous int64"):
        accumulate_visits(chunks[2], np.zeros(50, dtype=np.int32))


def test_shards_write_nothing_proportional_to_the_graph(tmp_path):
    # 3000 nodes and ten shards of 300 one-step-long walks: a dense count file per shard (the earlier layout) would
    # be 24 kB per shard, four times the walks themselves
    g = graph_from_nx(nx.gnm_random_graph(3000, 6000, seed=4))
    g.save(tmp_path / "g")
    out = tmp_path / "c"
    manifest = write_walk_corpus(tmp_path / "g", out, per_node=1, length=2, seed=0, n_shards=10, n_workers=2)
    for shard in manifest["shards"]:
        files = list(out.glob(f"shard-{shard['index']:05d}*"))
        assert [f.name for f in files] == [shard["file"]]
        raw = 4 * shard["n_walks"] * 2  # int32 tokens of the shard
        assert files[0].stat().st_size < raw + 4096 < 8 * g.n_nodes  # walks plus Parquet's fixed footer
    # the one count file of the corpus: 8 bytes per node plus the .npy header
    assert (out / "visits.npy").stat().st_size == 8 * g.n_nodes + 128
    walks = read_all(out)
    np.testing.assert_array_equal(WalkCorpus(out).visit_counts(), bincount_visits(walks, g.n_nodes))
    one = count_corpus_visits(out, manifest["shards"], g.n_nodes, 2, threads=1)
    np.testing.assert_array_equal(one, count_corpus_visits(out, manifest["shards"], g.n_nodes, 2, threads=3))


def test_in_process_run_counts_while_walking(graph_dir, reference, tmp_path, monkeypatch):
    # a fresh corpus on the in-process cluster needs no second pass over its shards
    def no_pass(corpus_dir, shards, *args, **kwargs):
        assert shards == [], f"shards counted again: {shards}"
        return np.zeros(300, dtype=np.int64)

    monkeypatch.setattr(gc, "count_corpus_visits", no_pass)
    write_walk_corpus(graph_dir, tmp_path / "c", per_node=PER_NODE, length=LENGTH, seed=SEED, n_shards=5, n_workers=2)
    np.testing.assert_array_equal(WalkCorpus(tmp_path / "c").visit_counts(), bincount_visits(reference, 300))
    assert gc._POOLS == {}  # the run's arrays are released


def test_corpus_with_a_count_file_per_shard_is_still_read(graph_dir, reference, tmp_path):
    """Corpora written before visits.npy name a dense count file per shard in their manifest."""
    out = tmp_path / "c"
    manifest = write_walk_corpus(graph_dir, out, per_node=PER_NODE, length=LENGTH, seed=SEED, n_shards=2)
    for shard in manifest["shards"]:
        walks = np.concatenate([c for c in WalkCorpus(out)])[shard["start"]:shard["stop"]]
        shard["counts"] = f"shard-{shard['index']:05d}.counts.npy"
        np.save(out / shard["counts"], bincount_visits(walks, 300))
    del manifest["visits"]
    (out / "visits.npy").unlink()
    (out / "manifest.json").write_text(json.dumps(manifest))
    np.testing.assert_array_equal(WalkCorpus(out).visit_counts(), bincount_visits(reference, 300))


def test_visit_pool_drops_spoiled_and_doubled_arrays():
    pool = gc._VisitPool(4, 3)
    a, b, c = pool.arrays
    a.counts[:] = [1, 0, 0, 0]; a.shards = [0]
    b.counts[:] = [0, 5, 0, 0]; b.shards = [1]; b.spoiled = True  # part of a failed shard is in it
    c.counts[:] = [0, 0, 2, 0]; c.shards = [2, 3]
    total, covered = pool.fold()
    np.testing.assert_array_equal(total, [1, 0, 2, 0])
    assert covered == {0, 2, 3}  # shard 1 is left to the streaming pass
    pool = gc._VisitPool(4, 2)
    pool.arrays[0].shards, pool.arrays[1].shards = [0, 1], [1]  # shard 1 written twice: nothing is trusted
    assert pool.fold() == (None, set())


# ------------------------------------------------------------------------------------------ reruns and failures
def test_rerun_rewrites_only_incomplete_shards(graph_dir, reference, tmp_path):
    out = tmp_path / "c"
    first = write_walk_corpus(graph_dir, out, per_node=PER_NODE, length=LENGTH, seed=SEED, n_shards=4)
    before = file_ids(out)
    (out / "shard-00002.parquet").unlink()  # shard 2 is now incomplete
    (out / "shard-00001.parquet.tmp-deadbeef").write_bytes(b"half a file from a crashed run")
    second = write_walk_corpus(graph_dir, out, per_node=PER_NODE, length=LENGTH, seed=SEED)  # default n_shards
    after = file_ids(out)
    assert second == first
    assert set(after) == set(before)  # the stale temp file is gone, nothing else appeared
    changed = {name for name in after if after[name] != before[name]}
    assert changed == {"shard-00002.parquet"}
    assert read_all(out).tobytes() == reference.tobytes()
    # the kept shards' visits are counted once, not once per run
    np.testing.assert_array_equal(WalkCorpus(out).visit_counts(), bincount_visits(reference, 300))


def test_failed_shard_publishes_nothing(graph_dir, reference, tmp_path):
    out = tmp_path / "c"
    write_walk_corpus(graph_dir, out, per_node=PER_NODE, length=LENGTH, seed=SEED, n_shards=3)
    (out / "manifest.json").unlink()
    (out / "shard-00001.parquet").unlink()
    (out / "shard-00001.parquet").mkdir()  # the rename into place will fail
    before = file_ids(out)
    with pytest.raises(OSError):
        write_walk_corpus(graph_dir, out, per_node=PER_NODE, length=LENGTH, seed=SEED)
    assert not (out / "manifest.json").exists()
    after = file_ids(out)
    assert after == before  # shard 1 stays incomplete
    assert set(after) == set(before) and not list(out.glob("*.tmp-*"))
    with pytest.raises(ConfigError, match="manifest.json' not found"):
        WalkCorpus(out)
    (out / "shard-00001.parquet").rmdir()
    write_walk_corpus(graph_dir, out, per_node=PER_NODE, length=LENGTH, seed=SEED)
    assert read_all(out).tobytes() == reference.tobytes()


@pytest.mark.parametrize("change, match", [
    (dict(seed=SEED + 1), r"another seed \(3, now 4\)"),
    (dict(length=LENGTH + 1), r"another length"),
    (dict(n_shards=3), r"another bounds"),
])
def test_corpus_of_other_parameters_is_left_alone(graph_dir, tmp_path, change, match):
    out = tmp_path / "c"
    write_walk_corpus(graph_dir, out, per_node=PER_NODE, length=LENGTH, seed=SEED, n_shards=2)
    before, manifest = file_ids(out), (out / "manifest.json").read_bytes()
    args = dict(per_node=PER_NODE, length=LENGTH, seed=SEED) | change
    with pytest.raises(ConfigError, match=match):
        write_walk_corpus(graph_dir, out, **args)
    assert file_ids(out) == before and (out / "manifest.json").read_bytes() == manifest


def test_rebuilt_graph_is_refused(tmp_path, two_cliques):
    two_cliques.save(tmp_path / "g")
    write_walk_corpus(tmp_path / "g", tmp_path / "c", per_node=2, length=5, seed=0)
    os.utime(tmp_path / "g" / "indices.npy", ns=(1, 1))
    with pytest.raises(ConfigError, match=r"another graph"):
        write_walk_corpus(tmp_path / "g", tmp_path / "c", per_node=2, length=5, seed=0)


def test_foreign_shard_files_are_refused(graph_dir, tmp_path):
    (tmp_path / "c").mkdir()
    (tmp_path / "c" / "shard-00000.parquet").write_bytes(b"")
    with pytest.raises(ConfigError, match=r"holds shard files but no plan.json"):
        write_walk_corpus(graph_dir, tmp_path / "c", per_node=PER_NODE, length=LENGTH, seed=SEED)


def test_concurrent_run_is_refused(graph_dir, tmp_path):
    out = tmp_path / "c"
    out.mkdir()
    fd = os.open(out / ".lock", os.O_RDWR | os.O_CREAT)
    try:
        fcntl.flock(fd, fcntl.LOCK_EX)  # what another run holds while writing
        with pytest.raises(ConfigError, match=r"being written by another run"):
            write_walk_corpus(graph_dir, out, per_node=PER_NODE, length=LENGTH, seed=SEED)
    finally:
        os.close(fd)
    assert not (out / "plan.json").exists()


# ------------------------------------------------------------------------------------------ layout and reading
def test_parquet_layout_and_chunks(graph_dir, reference, tmp_path, monkeypatch):
    assert 100_000 <= gc.ROW_GROUP_WALKS <= 250_000
    monkeypatch.setattr(gc, "ROW_GROUP_WALKS", 250)  # in-process cluster: the driver passes it to the tasks
    out = tmp_path / "c"
    write_walk_corpus(graph_dir, out, per_node=PER_NODE, length=LENGTH, seed=SEED, n_shards=2)
    pf = pq.ParquetFile(out / "shard-00000.parquet")
    assert pf.schema_arrow.field("walk").type == pa.list_(pa.int32(), LENGTH)
    assert [pf.metadata.row_group(i).num_rows for i in range(pf.num_row_groups)] == [250, 250, 100]
    col = pf.metadata.row_group(0).column(0)
    assert col.compression == "ZSTD"
    assert not any("DICTIONARY" in e for e in col.encodings)
    assert np.load(out / "visits.npy").dtype == np.int64

    corpus = WalkCorpus(out, chunk_walks=100)
    for _ in range(2):  # re-iterable
        chunks = list(corpus)
        assert all(c.dtype == np.int32 and c.flags.c_contiguous and c.shape[0] <= 100 for c in chunks)
        assert [c.shape[0] for c in chunks[:4]] == [100, 100, 50, 100]  # row group by row group
        assert np.concatenate(chunks).tobytes() == reference.tobytes()
    assert max(c.shape[0] for c in WalkCorpus(out, chunk_walks=10_000)) == 250


def test_default_shard_plan():
    for n_walks, threads in [(0, 2), (1, 2), (50, 2), (250_000, 2), (10_000_000, 2), (50_000_000, 4)]:
        bounds = plan_shards(n_walks, threads)
        assert bounds[0][0] == 0 and bounds[-1][1] == n_walks
        assert all(a[1] == b[0] for a, b in zip(bounds, bounds[1:]))
        sizes = [b - a for a, b in bounds]
        assert max(sizes) <= gc.MAX_SHARD_WALKS and max(sizes) - min(sizes) <= 1
        assert len(bounds) <= max(1, gc.SHARDS_PER_THREAD * threads, -(-n_walks // gc.MAX_SHARD_WALKS))
    assert len(plan_shards(50, 2)) == 1
    assert len(plan_shards(10_000_000, 2)) == 8
    assert len(plan_shards(50_000_000, 4)) == 25


def test_empty_graph_gives_empty_corpus(tmp_path):
    AdjacencyArrays.from_edges([], [], n_nodes=0).save(tmp_path / "g")
    manifest = write_walk_corpus(tmp_path / "g", tmp_path / "c", per_node=2, length=5, seed=0)
    assert (manifest["n_walks"], manifest["n_tokens"]) == (0, 0)
    assert list(WalkCorpus(tmp_path / "c")) == []


# ------------------------------------------------------------------------------------------ bad input
@pytest.mark.parametrize("kwargs, match", [
    (dict(per_node=0), r"per_node must be >= 1, got 0"),
    (dict(length=1), r"length must be >= 2, got 1"),
    (dict(seed=-5), r"seed must be >= 0, got -5"),
    (dict(n_shards=0), r"n_shards must be >= 1, got 0"),
    (dict(n_shards=1201), r"n_shards must be <= 1200, got 1201"),
    (dict(n_workers=0), r"n_workers must be >= 1, got 0"),
    (dict(n_workers=2, dask_address="tcp://127.0.0.1:1"), r"n_workers applies to the in-process cluster only"),
    (dict(p=0.0), r"p must lie in \[0.001, 1000\], got 0.0"),
    (dict(q="2"), r"q must be a number, got '2'"),
    (dict(dead_end="jump"), r"dead_end must be one of 'stop', 'restart', got 'jump'"),
    (dict(weighted=1), r"weighted must be true or false, got 1"),
])
def test_bad_parameters_raise(graph_dir, tmp_path, kwargs, match):
    args = dict(per_node=PER_NODE, length=LENGTH, seed=SEED) | kwargs
    with pytest.raises(ConfigError, match=match):
        write_walk_corpus(graph_dir, tmp_path / "c", **args)
    assert not (tmp_path / "c").exists()  # nothing was created


def test_unsorted_graph_is_refused_for_second_order_walks(tmp_path):
    AdjacencyArrays.from_arrays([0, 2, 3, 4], [2, 1, 0, 0]).save(tmp_path / "g")
    with pytest.raises(ConfigError, match=r"sorted ascending; node 0 is not"):
        write_walk_corpus(tmp_path / "g", tmp_path / "c", per_node=1, length=4, seed=0, p=2.0)
    assert not (tmp_path / "c").exists()


def test_unreachable_scheduler(graph_dir, tmp_path):
    dask = pytest.importorskip("dask")
    with dask.config.set({"distributed.comm.timeouts.connect": "1s"}):
        with pytest.raises(ConfigError, match=r"cannot reach the Dask scheduler at dask_address='tcp://127.0.0.1:9'"):
            write_walk_corpus(graph_dir, tmp_path / "c", per_node=1, length=2, seed=0, dask_address="tcp://127.0.0.1:9")
    assert not (tmp_path / "c").exists()


def test_missing_graph_and_corpus(tmp_path):
    with pytest.raises(ConfigError, match=r"holds no graph \(graph.json is missing\)"):
        write_walk_corpus(tmp_path / "nope", tmp_path / "c", per_node=1, length=2, seed=0)
    with pytest.raises(ConfigError, match=r"manifest.json' not found: no complete walk corpus"):
        WalkCorpus(tmp_path)
    with pytest.raises(ConfigError, match=r"chunk_walks must be >= 1, got 0"):
        WalkCorpus(tmp_path, chunk_walks=0)
