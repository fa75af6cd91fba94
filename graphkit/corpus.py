"""The walk corpus on disk: Parquet shards written in parallel with Dask, read back in bounded chunks.

Layout of ``corpus_dir``::

    plan.json                 parameters, graph fingerprint and shard bounds (written first)
    shard-00000.parquet       one column ``walk``: FixedSizeList<int32>[length], -1 pads stopped walks
    shard-00000.counts.npy    int64 [n_nodes]: how often each node occurs in that shard
    ...
    manifest.json             written last: its presence marks a complete corpus

Shard ``i`` holds the walks with global ids in ``[start_i, stop_i)`` in order, so concatenating the shards gives
exactly ``random_walks(graph, per_node, length, seed)``, whatever the number of shards or workers.
"""

from __future__ import annotations

import fcntl
import json
import math
import os
import uuid
from contextlib import contextmanager
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from .errors import ConfigError
from .graph import CSRGraph
from .walks import _check_int, check_walk_params, count_visits, walk_range

__all__ = ["write_walk_corpus", "WalkCorpus"]

MANIFEST = "manifest.json"
PLAN = "plan.json"
_LOCK = ".lock"
_FORMAT = 1
#: Walks per Parquet row group, and per walk_range call inside a shard task (bounds a task's memory).
ROW_GROUP_WALKS = 131_072
#: Upper bound on walks per shard; shards are few and large (Dask best practice) but a failed one costs little.
MAX_SHARD_WALKS = 2_000_000
#: Below this a shard is not worth a task of its own.
MIN_SHARD_WALKS = 100_000
#: Shards per worker thread, so that a slow shard near the end does not leave the other threads idle.
SHARDS_PER_THREAD = 4


def shard_name(index: int) -> str:
    return f"shard-{index:05d}.parquet"


def counts_name(index: int) -> str:
    return f"shard-{index:05d}.counts.npy"


def _tmp_name(final: Path) -> Path:
    # The random part keeps two attempts at the same shard (a Dask retry, a stale worker) from sharing a temp file.
    return final.with_name(f"{final.name}.tmp-{uuid.uuid4().hex}")


def _write_json_atomic(path: Path, payload: dict) -> None:
    tmp = _tmp_name(path)
    tmp.write_text(json.dumps(payload, indent=1, sort_keys=True))
    os.replace(tmp, path)


# ---------------------------------------------------------------------------------------------------- planning
def plan_shards(n_walks: int, n_threads: int, n_shards: int | None = None) -> list[tuple[int, int]]:
    """Cut global walk ids ``0..n_walks-1`` into contiguous ``(start, stop)`` ranges of near-equal size.

    By default ``SHARDS_PER_THREAD`` shards per worker thread, none smaller than ``MIN_SHARD_WALKS`` unless there is
    only one, none larger than ``MAX_SHARD_WALKS``.
    """
    if n_shards is None:
        by_threads = min(SHARDS_PER_THREAD * max(1, n_threads), math.ceil(n_walks / MIN_SHARD_WALKS))
        n_shards = max(1, math.ceil(n_walks / MAX_SHARD_WALKS), by_threads)
    bounds = [i * n_walks // n_shards for i in range(n_shards + 1)]
    return list(zip(bounds[:-1], bounds[1:]))


def _graph_fingerprint(graph_dir: Path) -> dict:
    """Sizes and modification times of the graph files: cheap, and changes whenever the graph is rebuilt."""
    files = {}
    for name in ("graph.json", "indptr.npy", "indices.npy"):
        st = (graph_dir / name).stat()
        files[name] = [st.st_size, st.st_mtime_ns]
    return files


def _open_graph(graph_dir: Path) -> CSRGraph:
    if not (graph_dir / "graph.json").is_file():
        raise ConfigError(f"graph_dir {str(graph_dir)!r} holds no graph (graph.json is missing)")
    return CSRGraph.load(graph_dir, mmap=True)


@contextmanager
def _locked(corpus_dir: Path):
    """Create ``corpus_dir`` if needed and hold an exclusive lock on it, so that two runs never write one corpus."""
    corpus_dir.mkdir(parents=True, exist_ok=True)
    fd = os.open(corpus_dir / _LOCK, os.O_RDWR | os.O_CREAT, 0o644)
    try:
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            raise ConfigError(f"corpus_dir {str(corpus_dir)!r} is being written by another run") from None
        yield
    finally:
        os.close(fd)


# ---------------------------------------------------------------------------------------------------- shard task
def write_shard(graph_dir: str, corpus_dir: str, index: int, start: int, stop: int, *, per_node: int, length: int,
                seed: int, row_group_walks: int = ROW_GROUP_WALKS) -> dict:
    """Compute walks ``[start, stop)`` and write them as shard ``index`` of ``corpus_dir``; returns a small dict.

    Runs inside a Dask worker: it memory-maps the graph itself and keeps at most one row group of walks in memory.
    Both files are written under temporary names and renamed into place, counts first, so the Parquet file's presence
    marks a complete shard.
    """
    graph = CSRGraph.load(graph_dir, mmap=True)
    corpus_dir = Path(corpus_dir)
    final_parquet, final_counts = corpus_dir / shard_name(index), corpus_dir / counts_name(index)
    tmp_parquet, tmp_counts = _tmp_name(final_parquet), _tmp_name(final_counts)
    schema = pa.schema([pa.field("walk", pa.list_(pa.int32(), length), nullable=False)],
                       metadata={"graphkit.first_walk": str(start), "graphkit.seed": str(seed)})
    counts = np.zeros(graph.n_nodes, dtype=np.int64)
    try:
        with pq.ParquetWriter(tmp_parquet, schema, compression="zstd", use_dictionary=False) as writer:
            for a in range(start, stop, row_group_walks):
                b = min(stop, a + row_group_walks)
                # threads=1: the Dask worker threads are the parallelism (numba threads x Dask threads <= cores)
                walks = walk_range(graph, a, b, per_node=per_node, length=length, seed=seed, threads=1)
                counts += count_visits(walks, graph.n_nodes)
                fsl = pa.FixedSizeListArray.from_arrays(pa.array(walks.reshape(-1)), length)
                writer.write_table(pa.Table.from_arrays([fsl], schema=schema), row_group_size=b - a)
                del walks, fsl
            if start == stop:
                writer.write_table(schema.empty_table())
        with open(tmp_counts, "wb") as f:
            np.save(f, counts)
        os.replace(tmp_counts, final_counts)
        os.replace(tmp_parquet, final_parquet)
    finally:
        for tmp in (tmp_parquet, tmp_counts):
            tmp.unlink(missing_ok=True)
    return {"index": index, "n_tokens": int(counts.sum())}


def _shard_entry(index, start, stop, n_tokens):
    return {"index": index, "file": shard_name(index), "counts": counts_name(index), "start": start, "stop": stop,
            "n_walks": stop - start, "n_tokens": n_tokens}


def _is_complete(corpus_dir: Path, index: int) -> bool:
    return (corpus_dir / shard_name(index)).is_file() and (corpus_dir / counts_name(index)).is_file()


# ---------------------------------------------------------------------------------------------------- driver
def write_walk_corpus(graph_dir, corpus_dir, *, per_node, length, seed, n_shards=None, dask_address=None,
                      n_workers=None) -> dict:
    """Write the DeepWalk corpus of the graph in ``graph_dir`` to ``corpus_dir`` as Parquet shards, with Dask.

    The corpus equals ``random_walks(CSRGraph.load(graph_dir), per_node, length, seed)`` read shard after shard. It is
    never gathered: every task memory-maps the graph, writes its own shard and returns a small dict. Rerunning with
    the same arguments skips the shards already complete; ``manifest.json`` is written only when all are.

    Parameters
    ----------
    graph_dir : str or Path
        A folder written by :meth:`CSRGraph.save`; workers must see it under the same path.
    corpus_dir : str or Path
        Created if missing. If it holds a corpus planned with other parameters or another graph, nothing is touched
        and ``ConfigError`` is raised.
    per_node, length, seed : int
        As in :func:`graphkit.walks.random_walks`.
    n_shards : int, optional
        Number of shards, ``1 <= n_shards <= max(1, n_walks)``. Default: ``SHARDS_PER_THREAD`` per worker thread, each
        between ``MIN_SHARD_WALKS`` and ``MAX_SHARD_WALKS`` walks when possible.
    dask_address : str, optional
        Scheduler of an existing Dask cluster. Default: an in-process cluster of ``n_workers`` threads.
    n_workers : int, optional
        Threads of the in-process cluster (default: the cores this process may use). Not allowed with
        ``dask_address``: the cluster there is sized by whoever started it.

    Returns
    -------
    dict
        The manifest: ``n_nodes``, ``n_walks``, ``length``, ``n_tokens`` (tokens other than padding), ``per_node``,
        ``seed``, ``shards`` (file names relative to ``corpus_dir`` with their walk-id bounds and token counts), plus
        ``format`` and ``graph`` (the graph-file fingerprint the corpus was made from).

    Raises
    ------
    ConfigError
        Bad parameters, a missing graph, ``corpus_dir`` in use by another run or holding another corpus.
    """
    import distributed  # imported here: readers of a corpus need no Dask

    per_node, length, seed = check_walk_params(per_node, length, seed)
    if n_workers is not None:
        if dask_address is not None:
            raise ConfigError(f"n_workers applies to the in-process cluster only, got n_workers={n_workers!r} "
                              f"with dask_address={dask_address!r}")
        n_workers = _check_int("n_workers", n_workers, 1)
    graph_dir = Path(graph_dir).resolve()
    graph = _open_graph(graph_dir)
    n_nodes = graph.n_nodes
    n_walks = per_node * n_nodes
    if n_shards is not None:
        n_shards = _check_int("n_shards", n_shards, 1, max(1, n_walks))
    corpus_dir = Path(corpus_dir).resolve()

    if dask_address is None:
        threads = n_workers or len(os.sched_getaffinity(0))
        cluster = distributed.LocalCluster(processes=False, n_workers=1, threads_per_worker=threads,
                                           dashboard_address=None)
    else:
        cluster = None
    try:
        with _connect(distributed, cluster, dask_address) as client, _locked(corpus_dir):
            threads = sum(client.nthreads().values())
            plan = {"format": _FORMAT, "n_nodes": n_nodes, "n_walks": n_walks, "per_node": per_node, "length": length,
                    "seed": seed, "graph": _graph_fingerprint(graph_dir),
                    "bounds": plan_shards(n_walks, threads, n_shards) if n_shards is not None else None}
            plan = _settle_plan(corpus_dir, plan, threads)
            manifest = _run_shards(client, graph_dir, corpus_dir, plan)
    finally:
        if cluster is not None:
            cluster.close()
    return manifest


def _connect(distributed, cluster, dask_address):
    if cluster is not None:
        return distributed.Client(cluster)
    try:
        return distributed.Client(dask_address)
    except (OSError, TimeoutError, ValueError) as exc:
        raise ConfigError(f"cannot reach the Dask scheduler at dask_address={dask_address!r}: {exc}") from None


def _settle_plan(corpus_dir: Path, plan: dict, threads: int) -> dict:
    """Reuse the plan already in ``corpus_dir`` when it matches, write a new one into an empty one, else refuse."""
    path = corpus_dir / PLAN
    if path.is_file():
        old = json.loads(path.read_text())
        old["bounds"] = [tuple(b) for b in old["bounds"]]
        for key in ("format", "n_nodes", "n_walks", "per_node", "length", "seed", "graph", "bounds"):
            if key == "bounds" and plan["bounds"] is None:
                continue  # default shard count: keep the shards already planned
            if old.get(key) != plan[key]:
                raise ConfigError(f"corpus_dir {str(corpus_dir)!r} holds a corpus with another {key} "
                                  f"({old.get(key)!r}, now {plan[key]!r}); write to a new folder or delete it")
        return old
    leftovers = sorted(p.name for p in corpus_dir.glob("shard-*"))
    if leftovers or (corpus_dir / MANIFEST).exists():
        raise ConfigError(f"corpus_dir {str(corpus_dir)!r} holds shard files but no {PLAN} "
                          f"(e.g. {(leftovers or [MANIFEST])[0]}); write to a new folder or delete them")
    if plan["bounds"] is None:
        plan["bounds"] = plan_shards(plan["n_walks"], threads)
    _write_json_atomic(path, plan)
    return plan


def _run_shards(client, graph_dir: Path, corpus_dir: Path, plan: dict) -> dict:
    import distributed

    for stale in corpus_dir.glob("*.tmp-*"):  # left by a crashed run; we hold the lock, so nobody writes them now
        stale.unlink(missing_ok=True)
    bounds = plan["bounds"]
    n_tokens = {}
    futures = []
    for index, (start, stop) in enumerate(bounds):
        if _is_complete(corpus_dir, index):
            n_tokens[index] = int(np.load(corpus_dir / counts_name(index), mmap_mode="r").sum())
            continue
        futures.append(client.submit(write_shard, str(graph_dir), str(corpus_dir), index, start, stop,
                                     per_node=plan["per_node"], length=plan["length"], seed=plan["seed"],
                                     row_group_walks=ROW_GROUP_WALKS, pure=False))
    try:
        for future in distributed.as_completed(futures):
            result = future.result()  # re-raises the first task failure; no manifest is written then
            n_tokens[result["index"]] = result["n_tokens"]
    except BaseException:
        client.cancel(futures)
        raise
    shards = [_shard_entry(i, a, b, n_tokens[i]) for i, (a, b) in enumerate(bounds)]
    manifest = {key: plan[key] for key in ("format", "n_nodes", "n_walks", "per_node", "length", "seed", "graph")}
    manifest["n_tokens"] = sum(s["n_tokens"] for s in shards)
    manifest["shards"] = shards
    _write_json_atomic(corpus_dir / MANIFEST, manifest)
    return manifest


# ---------------------------------------------------------------------------------------------------- reader
class WalkCorpus:
    """A walk corpus on disk, re-iterable in chunks of at most ``chunk_walks`` walks.

    Parameters
    ----------
    corpus_dir : str or Path
        A folder completed by :func:`write_walk_corpus`.
    chunk_walks : int, default 65536
        Largest number of walks per yielded array.

    Attributes
    ----------
    n_walks, length, n_tokens, n_nodes : int
        From the manifest; ``n_tokens`` counts the walk entries other than the ``-1`` padding.

    Raises
    ------
    ConfigError
        ``manifest.json`` is missing (no corpus, or its writing has not finished) or a shard file is missing.
    """

    def __init__(self, corpus_dir, *, chunk_walks: int = 65536):
        self.corpus_dir = Path(corpus_dir)
        self.chunk_walks = _check_int("chunk_walks", chunk_walks, 1)
        path = self.corpus_dir / MANIFEST
        if not path.is_file():
            raise ConfigError(f"{str(path)!r} not found: no complete walk corpus in {str(self.corpus_dir)!r}")
        self.manifest = json.loads(path.read_text())
        self.n_walks = int(self.manifest["n_walks"])
        self.length = int(self.manifest["length"])
        self.n_tokens = int(self.manifest["n_tokens"])
        self.n_nodes = int(self.manifest["n_nodes"])
        for shard in self.manifest["shards"]:
            for key in ("file", "counts"):
                if not (self.corpus_dir / shard[key]).is_file():
                    raise ConfigError(f"walk corpus {str(self.corpus_dir)!r} is missing {shard[key]}")

    def __len__(self) -> int:
        return self.n_walks

    def __iter__(self):
        """Yield int32 C-contiguous read-only arrays [k, length], ``k <= chunk_walks``, in walk-id order."""
        for shard in self.manifest["shards"]:
            path = self.corpus_dir / shard["file"]
            pf = pq.ParquetFile(path)
            if pf.metadata.num_rows != shard["n_walks"]:
                raise ConfigError(f"{str(path)!r} holds {pf.metadata.num_rows} walks, the manifest says "
                                  f"{shard['n_walks']}")
            expected = pa.list_(pa.int32(), self.length)
            if pf.schema_arrow.field("walk").type != expected:
                raise ConfigError(f"{str(path)!r}: column 'walk' must be {expected}, "
                                  f"got {pf.schema_arrow.field('walk').type}")
            for group in range(pf.num_row_groups):
                column = pf.read_row_group(group, columns=["walk"]).column("walk")
                for chunk in column.chunks:
                    # flatten() honours the array's offset, unlike .values; zero-copy for a null-free column
                    walks = chunk.flatten().to_numpy(zero_copy_only=True).reshape(-1, self.length)
                    for a in range(0, walks.shape[0], self.chunk_walks):
                        yield walks[a:a + self.chunk_walks]

    def visit_counts(self) -> np.ndarray:
        """int64 [n_nodes]: how often each node occurs in the corpus (summed from the shards' count files)."""
        total = np.zeros(self.n_nodes, dtype=np.int64)
        for shard in self.manifest["shards"]:
            total += np.load(self.corpus_dir / shard["counts"], mmap_mode="r")
        return total
