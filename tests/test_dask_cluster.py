"""The walk corpus on a real multi-process Dask cluster, reached through ``[dask] address``.

A ``distributed.LocalCluster`` of 2 worker processes stands in for a cluster of machines: each worker must open the
CSR graph by path (memory-map) and write its own shards. The corpus must be byte-identical to the single-process one.
"""

from __future__ import annotations

import hashlib
import pickle
from pathlib import Path

import numpy as np
import pytest

distributed = pytest.importorskip("distributed")

from graphkit import pipeline  # noqa: E402
from graphkit.config import load_config  # noqa: E402
from graphkit.corpus import WalkCorpus, write_walk_corpus  # noqa: E402
from graphkit.graph import AdjacencyArrays  # noqa: E402
from graphkit.walks import random_walks  # noqa: E402

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "sample_parquet" / "demo.toml"


class TaskSpecSizes(distributed.diagnostics.plugin.SchedulerPlugin):
    """Records, for every task submitted to the scheduler, the pickled size of what a worker receives to run it,
    and which worker computed it."""

    def __init__(self):
        self.spec_bytes: dict[str, int] = {}
        self.data_keys: list[str] = []  # keys with no run spec: data pushed by a client (scatter)
        self.ran_on: dict[str, str] = {}

    def transition(self, key, start, finish, *args, **kwargs):
        if finish == "memory" and kwargs.get("worker"):
            self.ran_on[str(key)] = kwargs["worker"]

    def update_graph(self, scheduler, *, keys, tasks, **kwargs):
        for key in tasks:
            ts = scheduler.tasks.get(key)
            if ts is None:
                continue
            if ts.run_spec is None:
                self.data_keys.append(str(key))
            else:
                self.spec_bytes[str(key)] = len(pickle.dumps(ts.run_spec, protocol=5))


@pytest.fixture(scope="module")
def cluster():
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=":0",
                                  worker_dashboard_address=None) as lc:
        sizes = TaskSpecSizes()
        lc.scheduler.add_plugin(sizes, name="task-spec-sizes")  # the scheduler lives in this process
        yield lc, sizes


@pytest.fixture(scope="module")
def demo_graph(tmp_path_factory):
    """The demo graph ingested into a store's work folder and its holdout graph, the one the published model walks
    (plain stage functions, no Prefect)."""
    store = tmp_path_factory.mktemp("dask") / "store"
    cfg = load_config(DEMO, [f'store.path="{store}"'])
    plan = pipeline.plan_run(cfg)
    with pipeline.run_lock(cfg):
        pipeline.stage_ingest(cfg, plan)
        pipeline.stage_graph(cfg, plan)
        pipeline.stage_holdout(cfg, plan)  # the published model walks the holdout graph by default
    return cfg, plan, Path(plan["graph_dir"])


def _read(corpus_dir) -> np.ndarray:
    chunks = list(WalkCorpus(corpus_dir))
    return np.concatenate(chunks) if chunks else np.empty((0, 0), np.int32)


def _digests(folder: Path) -> dict[str, str]:
    return {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in sorted(folder.glob("shard-*"))}


@pytest.mark.slow
def test_process_cluster_corpus_is_byte_identical_to_single_process(cluster, demo_graph, tmp_path):
    lc, sizes = cluster
    cfg, plan, graph_dir = demo_graph
    w = cfg.walks
    sizes.ran_on.clear()
    graph = AdjacencyArrays.load(graph_dir)
    # the single-process reference: the whole corpus in memory, one numba call
    expected = random_walks(graph, w.per_node, w.length, w.seed, threads=1)

    remote = write_walk_corpus(graph_dir, tmp_path / "remote", per_node=w.per_node, length=w.length, seed=w.seed,
                               n_shards=4, dask_address=lc.scheduler_address)
    local = write_walk_corpus(graph_dir, tmp_path / "local", per_node=w.per_node, length=w.length, seed=w.seed,
                              n_shards=4)

    got = _read(tmp_path / "remote")
    assert got.dtype == np.int32 and got.shape == expected.shape
    assert np.array_equal(got, expected)
    assert remote["n_tokens"] == local["n_tokens"] == int(np.count_nonzero(expected >= 0))
    # same bytes on disk as the in-process (thread) cluster: the Parquet shards (no count file per shard), and the
    # visit counts, counted by one pass over the shards here and while walking in the in-process run
    assert len(_digests(tmp_path / "remote")) == 4
    assert _digests(tmp_path / "remote") == _digests(tmp_path / "local")
    assert (tmp_path / "remote" / "visits.npy").read_bytes() == (tmp_path / "local" / "visits.npy").read_bytes()

    # the 4 shards of the remote run were computed by both worker processes of the cluster
    assert len(sizes.ran_on) == 4 and all(k.startswith("write_shard-") for k in sizes.ran_on)
    assert set(sizes.ran_on.values()) == set(lc.scheduler.workers)


def test_workers_get_paths_not_arrays(cluster, demo_graph, tmp_path):
    """What the scheduler ships to run a shard is a function reference, two paths and a few ints: well under the
    size of the graph, so workers must memory-map the CSR from the shared path."""
    lc, sizes = cluster
    cfg, plan, graph_dir = demo_graph
    w = cfg.walks
    sizes.spec_bytes.clear()
    sizes.data_keys.clear()
    write_walk_corpus(graph_dir, tmp_path / "c", per_node=w.per_node, length=w.length, seed=w.seed, n_shards=3,
                      dask_address=lc.scheduler_address)
    graph_bytes = (graph_dir / "indptr.npy").stat().st_size + (graph_dir / "indices.npy").stat().st_size
    assert graph_bytes > 100_000  # the demo CSR is big enough for the check below to mean something
    assert len(sizes.spec_bytes) == 3, sizes.spec_bytes
    assert max(sizes.spec_bytes.values()) < 4_096, sizes.spec_bytes
    assert sizes.data_keys == []  # nothing scattered

    # control: the same measurement does see an array passed by value
    indices = np.load(graph_dir / "indices.npy")
    with distributed.Client(lc.scheduler_address) as client:
        assert client.submit(len, indices, key="control-by-value").result() == indices.size
    assert sizes.spec_bytes["control-by-value"] > indices.nbytes


def test_walks_stage_through_dask_address_config(cluster, demo_graph, tmp_path):
    """``--set dask.address=tcp://...`` routes the pipeline's walks stage to the existing cluster."""
    lc, _ = cluster
    cfg, plan, graph_dir = demo_graph
    assert lc.scheduler_address.startswith("tcp://")
    cfg2 = load_config(DEMO, [f'store.path="{cfg.store_path}"', f'dask.address="{lc.scheduler_address}"'])
    plan2 = pipeline.plan_run(cfg2)
    assert plan2["ingest_dir"] == plan["ingest_dir"]  # the cluster address is not part of any stage key
    plan2 = {**plan2, "walks_dir": str(tmp_path / "walks")}
    lc_sizes = cluster[1]
    lc_sizes.ran_on.clear()
    result = pipeline.stage_walks(cfg2, plan2)
    assert not result.get("skipped")
    assert len(lc_sizes.ran_on) == len(result["shards"]) >= 1  # the shards ran on the process cluster
    assert set(lc_sizes.ran_on.values()) <= set(lc.scheduler.workers)
    w = cfg.walks
    expected = random_walks(AdjacencyArrays.load(graph_dir), w.per_node, w.length, w.seed, threads=1)
    assert np.array_equal(_read(tmp_path / "walks"), expected)
