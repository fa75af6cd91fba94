"""The walk corpus on disk: Parquet shards written in parallel with Dask, read back in bounded chunks.

Layout of ``corpus_dir``::

    plan.json                 parameters, graph fingerprint and shard bounds (written first)
    alias.npy                 weighted walks only, while shards are pending: the alias table (uint64 [n_edges],
                              8 bytes per edge) that every shard task memory-maps; removed once the corpus is complete
    shard-00000.parquet       one column ``walk``: FixedSizeList<int32>[length], -1 pads stopped walks; the footer
                              holds the shard's token and restart counts
    ...
    visits.npy                int64 [n_nodes]: how often each node occurs in the corpus, counted once all shards
                              are complete by one streaming pass over them (written just before the manifest)
    manifest.json             written last: its presence marks a complete corpus; holds the run's diagnostics

Shard ``i`` holds the walks with global ids in ``[start_i, stop_i)`` in order, so concatenating the shards gives
exactly ``random_walks(graph, per_node, length, seed, weighted=..., p=..., q=..., dead_end=...)``, whatever the
number of shards or workers. A shard counts as complete only once its Parquet file, written under a temporary name
and renamed into place, exists with its footer counts; a rerun skips complete shards.

A shard writes only its walks: no per-node file, so what it writes is proportional to the shard, not to the graph.
Visit counts accumulate in place: on the in-process cluster every worker thread owns one int64 [n_nodes] array for
the whole run and adds each row group of walks into it while the walks are in memory (:func:`accumulate_visits`);
the arrays are summed once when all shards are complete and written as ``visits.npy``. Shards the run did not count
itself (kept from an earlier run, or written on an external cluster whose workers cannot share arrays with this
process) are counted by one streaming pass over just those shards (:func:`count_corpus_visits`). An array that saw
part of a shard that then failed is dropped, and its shards are counted by that pass, so no visit is counted twice.
"""

from __future__ import annotations

import fcntl
import json
import math
import os
import queue
import threading
import uuid
from concurrent.futures import ThreadPoolExecutor
from contextlib import contextmanager
from pathlib import Path

import numba
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from . import progress
from .checks import check_int as _check_int
from .errors import ConfigError
from .faults import fault_point
from .graph import AdjacencyArrays
from .io import atomic_output, write_text_atomic
from .walks import (alias_table, check_walk_options, check_walk_params, count_restarts, prepare_walker, run_walks,
                    walk_diagnostics)

__all__ = ["write_walk_corpus", "WalkCorpus", "accumulate_visits", "count_corpus_visits"]

MANIFEST = "manifest.json"
PLAN = "plan.json"
ALIAS = "alias.npy"
VISITS = "visits.npy"
_LOCK = ".lock"
#: 2: walk options (weighted, p, q, dead_end) in the plan, diagnostics in the manifest.
_FORMAT = 2
_PLAN_KEYS = ("format", "n_nodes", "n_walks", "per_node", "length", "seed", "weighted", "p", "q", "dead_end", "graph")
#: Walks per Parquet row group, and per kernel call inside a shard task (bounds a task's memory).
ROW_GROUP_WALKS = 131_072
#: Upper bound on walks per shard; shards are few and large (Dask best practice) but a failed one costs little.
MAX_SHARD_WALKS = 2_000_000
#: Below this a shard is not worth a task of its own.
MIN_SHARD_WALKS = 100_000
#: Shards per worker thread, so that a slow shard near the end does not leave the other threads idle.
SHARDS_PER_THREAD = 4
_META_TOKENS = "graphkit.n_tokens"
_META_RESTARTS = "graphkit.n_restarts"


def shard_name(index: int) -> str:
    return f"shard-{index:05d}.parquet"


def _write_json_atomic(path: Path, payload: dict) -> None:
    write_text_atomic(path, json.dumps(payload, indent=1, sort_keys=True))


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
    names = ["graph.json", "indptr.npy", "indices.npy"]
    if (graph_dir / "weights.npy").is_file():
        names.append("weights.npy")  # reweighting the same edges changes weighted walks
    for name in names:
        st = (graph_dir / name).stat()
        files[name] = [st.st_size, st.st_mtime_ns]
    return files


def _open_graph(graph_dir: Path) -> AdjacencyArrays:
    if not (graph_dir / "graph.json").is_file():
        raise ConfigError(f"graph_dir {str(graph_dir)!r} holds no graph (graph.json is missing)")
    return AdjacencyArrays.load(graph_dir, mmap=True)


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


# ---------------------------------------------------------------------------------------------------- visit arrays
class _VisitArray:
    """One worker thread's visit counts: int64 [n_nodes], the shards fully added into it, and whether a failed shard
    left part of its walks in it (the array is then not used)."""

    def __init__(self, n_nodes: int):
        self.counts = np.zeros(n_nodes, dtype=np.int64)
        self.shards: list[int] = []
        self.spoiled = False


class _VisitPool:
    """The visit arrays of one corpus run, lent to shard tasks one at a time (at most one per running task)."""

    def __init__(self, n_nodes: int, size: int):
        self.arrays = [_VisitArray(n_nodes) for _ in range(size)]
        self._free: queue.SimpleQueue = queue.SimpleQueue()
        for array in self.arrays:
            self._free.put(array)

    def take(self) -> _VisitArray:
        return self._free.get()

    def give(self, array: _VisitArray) -> None:
        self._free.put(array)

    def fold(self) -> tuple[np.ndarray | None, set[int]]:
        """The sum of the usable arrays (None when there is none) and the shards it covers."""
        usable = [a for a in self.arrays if not a.spoiled and a.shards]
        seen = [i for a in usable for i in a.shards]
        if len(seen) != len(set(seen)):  # a shard written twice in this run: count every shard again
            return None, set()
        if not usable:
            return None, set()
        total = usable[0].counts
        for a in usable[1:]:
            total += a.counts
        return total, set(seen)


#: Visit pools of the corpus runs in progress in this process, by token; shard tasks on the in-process cluster find
#: theirs here (a task in another process finds none and leaves the counting to the driver).
_POOLS: dict[str, _VisitPool] = {}
_POOLS_LOCK = threading.Lock()


# ---------------------------------------------------------------------------------------------------- shard task
def write_shard(graph_dir: str, corpus_dir: str, index: int, start: int, stop: int, *, per_node: int, length: int,
                seed: int, weighted: bool = True, p: float = 1.0, q: float = 1.0, dead_end: str = "stop",
                alias_path: str | None = None, row_group_walks: int = ROW_GROUP_WALKS,
                visits_pool: str | None = None) -> dict:
    """Compute walks ``[start, stop)`` and write them as shard ``index`` of ``corpus_dir``; returns a small dict.

    Runs inside a Dask worker: it memory-maps the graph (and the alias table at ``alias_path`` for weighted walks)
    itself and keeps at most one row group of walks in memory. The Parquet file is written under a temporary name
    and renamed into place, so its presence marks a complete shard. Nothing proportional to the graph is allocated
    or written per shard: when the pool ``visits_pool`` of this process is there, each row group's visits are added
    in place into one of its arrays (``"counted": True`` in the result).
    """
    graph = AdjacencyArrays.load(graph_dir, mmap=True)
    alias = np.load(alias_path, mmap_mode="r") if alias_path is not None else None
    # check=False: the driver checked the graph files once (sorted rows for second-order walks)
    walker = prepare_walker(graph, weighted=weighted, p=p, q=q, dead_end=dead_end, alias=alias, check=False)
    corpus_dir = Path(corpus_dir)
    final_parquet = corpus_dir / shard_name(index)
    schema = pa.schema([pa.field("walk", pa.list_(pa.int32(), length), nullable=False)],
                       metadata={"graphkit.first_walk": str(start), "graphkit.seed": str(seed)})
    n_tokens = n_restarts = 0
    with _POOLS_LOCK:
        pool = _POOLS.get(visits_pool) if visits_pool is not None else None
    visits = pool.take() if pool is not None else None
    try:
        with atomic_output(final_parquet) as tmp_parquet, \
                pq.ParquetWriter(tmp_parquet, schema, compression="zstd", use_dictionary=False) as writer:
            for a in range(start, stop, row_group_walks):
                b = min(stop, a + row_group_walks)
                # threads=1: the Dask worker threads are the parallelism (numba threads x Dask threads <= cores)
                walks = run_walks(walker, a, b, length, seed, threads=1)
                if visits is not None:
                    n_tokens += accumulate_visits(walks, visits.counts)
                else:
                    n_tokens += int(np.count_nonzero(walks >= 0))
                if walker.restart:
                    n_restarts += count_restarts(walks, graph)
                fsl = pa.FixedSizeListArray.from_arrays(pa.array(walks.reshape(-1)), length)
                writer.write_table(pa.Table.from_arrays([fsl], schema=schema), row_group_size=b - a)
                del walks, fsl
            if start == stop:
                writer.write_table(schema.empty_table())
            writer.add_key_value_metadata({_META_TOKENS: str(n_tokens), _META_RESTARTS: str(n_restarts)})
        if visits is not None:
            visits.shards.append(index)
    except BaseException:
        if visits is not None:
            visits.spoiled = True  # holds part of a shard that is not complete
        raise
    finally:
        if visits is not None:
            pool.give(visits)
    return {"index": index, "n_tokens": n_tokens, "n_restarts": n_restarts, "counted": visits is not None}


def _shard_footer(corpus_dir: Path, index: int) -> dict | None:
    """Token and restart counts of a complete shard, from its Parquet footer; None when the footer lacks them (the
    shard is then written again)."""
    try:
        meta = pq.read_metadata(corpus_dir / shard_name(index)).metadata or {}
        return {"index": index, "n_tokens": int(meta[_META_TOKENS.encode()]),
                "n_restarts": int(meta[_META_RESTARTS.encode()])}
    except (KeyError, ValueError, OSError, pa.ArrowException):
        return None


def _shard_entry(index, start, stop, n_tokens, n_restarts):
    return {"index": index, "file": shard_name(index), "start": start, "stop": stop,
            "n_walks": stop - start, "n_tokens": n_tokens, "n_restarts": n_restarts}


def _is_complete(corpus_dir: Path, index: int) -> bool:
    return (corpus_dir / shard_name(index)).is_file()


# ---------------------------------------------------------------------------------------------------- driver
def write_walk_corpus(graph_dir, corpus_dir, *, per_node, length, seed, n_shards=None, dask_address=None,
                      n_workers=None, weighted=True, p=1.0, q=1.0, dead_end="stop") -> dict:
    """Write the walk corpus of the graph in ``graph_dir`` to ``corpus_dir`` as Parquet shards, with Dask.

    The corpus equals ``random_walks(AdjacencyArrays.load(graph_dir), per_node, length, seed, weighted=weighted,
    p=p, q=q, dead_end=dead_end)`` read shard after shard. It is never gathered: every task memory-maps the graph, writes its
    own shard and returns a small dict, so memory stays bounded by one row group per worker thread (plus the
    memory-mapped graph, and the alias table for weighted walks). Rerunning with the same arguments skips the shards
    already complete; ``manifest.json`` is written only when all are.

    Parameters
    ----------
    graph_dir : str or Path
        A folder written by :meth:`AdjacencyArrays.save`; workers must see it under the same path.
    corpus_dir : str or Path
        Created if missing. If it holds a corpus planned with other parameters or another graph, nothing is touched
        and ``ConfigError`` is raised. Workers must see it under the same path.
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
    weighted, p, q, dead_end
        As in :func:`graphkit.walks.walk_range`. ``weighted`` has an effect only when the graph has weights; the
        plan and manifest record the effective value.

    Returns
    -------
    dict
        The manifest: ``n_nodes``, ``n_walks``, ``length``, ``n_tokens`` (tokens other than padding), ``per_node``,
        ``seed``, ``weighted``, ``p``, ``q``, ``dead_end``, ``shards`` (file names relative to ``corpus_dir`` with
        their walk-id bounds, token and restart counts), ``diagnostics`` (:func:`graphkit.walks.walk_diagnostics`),
        plus ``format`` and ``graph`` (the graph-file fingerprint the corpus was made from).

    Raises
    ------
    ConfigError
        Bad parameters, a missing graph, ``corpus_dir`` in use by another run or holding another corpus.
    """
    import distributed  # imported here: readers of a corpus need no Dask

    per_node, length, seed = check_walk_params(per_node, length, seed)
    weighted, p, q, dead_end = check_walk_options(weighted, p, q, dead_end)
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
    if (p, q) != (1.0, 1.0):
        # once here rather than in every task: the shard tasks run with check=False
        prepare_walker(graph, weighted=False, p=p, q=q, dead_end=dead_end)
    corpus_dir = Path(corpus_dir).resolve()

    if dask_address is None:
        threads = n_workers or len(os.sched_getaffinity(0))
        cluster = distributed.LocalCluster(processes=False, n_workers=1, threads_per_worker=threads,
                                           dashboard_address="127.0.0.1:0")  # None still binds 8787; never 0.0.0.0
    else:
        cluster = None
    try:
        with _connect(distributed, cluster, dask_address) as client, _locked(corpus_dir):
            threads = sum(client.nthreads().values())
            plan = {"format": _FORMAT, "n_nodes": n_nodes, "n_walks": n_walks, "per_node": per_node, "length": length,
                    "seed": seed, "weighted": bool(weighted and graph.weights is not None), "p": p, "q": q,
                    "dead_end": dead_end, "graph": _graph_fingerprint(graph_dir),
                    "bounds": plan_shards(n_walks, threads, n_shards) if n_shards is not None else None}
            plan = _settle_plan(corpus_dir, plan, threads)
            token = None
            if cluster is not None:  # tasks run in this process: one visit array per worker thread
                token = uuid.uuid4().hex
                with _POOLS_LOCK:
                    _POOLS[token] = _VisitPool(n_nodes, threads)
            try:
                manifest = _run_shards(client, graph, graph_dir, corpus_dir, plan, visits_pool=token)
            finally:
                if token is not None:
                    with _POOLS_LOCK:
                        _POOLS.pop(token, None)
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
        old["bounds"] = [tuple(b) for b in old.get("bounds", [])]
        for key in _PLAN_KEYS + ("bounds",):
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


def _ensure_alias(graph: AdjacencyArrays, corpus_dir: Path) -> Path:
    """The alias table as ``corpus_dir/alias.npy``, built straight into a memory-mapped temporary file and renamed
    into place (so a present file is a complete one); reused by a rerun."""
    final = corpus_dir / ALIAS
    if not final.is_file():
        with atomic_output(final) as tmp:
            if graph.n_edges:
                table = np.lib.format.open_memmap(tmp, mode="w+", dtype=np.uint64, shape=(graph.n_edges,))
                alias_table(graph, out=table)
                table.flush()
                del table
            else:  # an empty array cannot be memory-mapped
                with open(tmp, "wb") as f:
                    np.save(f, np.empty(0, dtype=np.uint64))
    return final


def _run_shards(client, graph: AdjacencyArrays, graph_dir: Path, corpus_dir: Path, plan: dict, *,
                visits_pool: str | None = None) -> dict:
    import distributed

    for stale in corpus_dir.glob("*.tmp-*"):  # left by a crashed run; we hold the lock, so nobody writes them now
        stale.unlink(missing_ok=True)
    bounds = plan["bounds"]
    done = {}
    pending = []
    for index, (start, stop) in enumerate(bounds):
        footer = _shard_footer(corpus_dir, index) if _is_complete(corpus_dir, index) else None
        if footer is not None:
            done[index] = footer
        else:
            pending.append((index, start, stop))
    alias_path = str(_ensure_alias(graph, corpus_dir)) if pending and plan["weighted"] else None
    options = {k: plan[k] for k in ("per_node", "length", "seed", "weighted", "p", "q", "dead_end")}
    futures = [client.submit(write_shard, str(graph_dir), str(corpus_dir), index, start, stop, **options,
                             alias_path=alias_path, row_group_walks=ROW_GROUP_WALKS, visits_pool=visits_pool,
                             pure=False)
               for index, start, stop in pending]
    total = plan["n_walks"] * plan["length"]

    def report_progress():
        progress.report("walks", sum(bounds[i][1] - bounds[i][0] for i in done) * plan["length"], total)

    report_progress()  # resumed shards show as done
    try:
        for future in distributed.as_completed(futures):
            result = future.result()  # re-raises the first task failure; no manifest is written then
            done[result["index"]] = result
            report_progress()
            fault_point("walks")  # a shard complete, the corpus not yet
    except BaseException:
        client.cancel(futures)
        raise
    shards = [_shard_entry(i, a, b, done[i]["n_tokens"], done[i]["n_restarts"]) for i, (a, b) in enumerate(bounds)]
    manifest = {key: plan[key] for key in _PLAN_KEYS}
    manifest["n_tokens"] = sum(s["n_tokens"] for s in shards)
    manifest["shards"] = shards
    visits, counted = _POOLS[visits_pool].fold() if visits_pool in _POOLS else (None, set())
    rest = [s for s in shards if s["index"] not in counted]  # kept from an earlier run, or counted elsewhere
    if visits is None:
        visits = count_corpus_visits(corpus_dir, rest, plan["n_nodes"], plan["length"])
    elif rest:
        visits += count_corpus_visits(corpus_dir, rest, plan["n_nodes"], plan["length"])
    if int(visits.sum()) != manifest["n_tokens"]:
        raise ConfigError(f"walk corpus {str(corpus_dir)!r}: the shards hold {int(visits.sum())} tokens, their "
                          f"footers say {manifest['n_tokens']}; delete the folder and run again")
    with atomic_output(corpus_dir / VISITS) as tmp, open(tmp, "wb") as f:
        np.save(f, visits)
    manifest["visits"] = VISITS
    manifest["diagnostics"] = _diagnostics(graph, visits, shards, plan["per_node"])
    _write_json_atomic(corpus_dir / MANIFEST, manifest)
    (corpus_dir / ALIAS).unlink(missing_ok=True)  # scratch of the shard tasks; a complete corpus never needs it
    for old in corpus_dir.glob("shard-*.counts.npy"):  # dense per-shard counts of an older run: superseded
        old.unlink(missing_ok=True)
    return manifest


def _diagnostics(graph: AdjacencyArrays, visits: np.ndarray, shards: list[dict], per_node: int) -> dict:
    out_deg = graph.degrees()
    in_deg = np.bincount(np.asarray(graph.indices), minlength=graph.n_nodes) if graph.directed else None
    return walk_diagnostics(visits, out_deg, per_node=per_node, in_degrees=in_deg,
                            n_restarts=sum(s["n_restarts"] for s in shards))


# ---------------------------------------------------------------------------------------------------- visit counts
@numba.njit(cache=True, nogil=True)
def _accumulate_visits_kernel(flat, counts):
    """Add one to ``counts[v]`` (int64 [n_nodes], in place) for every ``0 <= v < n_nodes`` of ``flat`` (int32
    [size]); ``-1`` is padding. Returns (tokens added, entries outside ``-1..n_nodes-1``, which are skipped)."""
    n = counts.shape[0]
    added = 0
    bad = 0
    for i in range(flat.shape[0]):
        v = flat[i]
        if v >= 0 and v < n:
            counts[v] += 1
            added += 1
        elif v != -1:
            bad += 1
    return added, bad


def accumulate_visits(walks, counts) -> int:
    """Add the visits in ``walks`` to ``counts`` in place; returns the number of tokens added.

    Parameters
    ----------
    walks : ndarray of int32, shape (n_walks, length) or (size,)
        Node indices, ``-1`` for padding.
    counts : ndarray of int64, shape (n_nodes,)
        C-contiguous and writeable; receives the counts.

    Raises
    ------
    ConfigError
        ``counts`` is not a writeable C-contiguous int64 vector, or ``walks`` holds a value outside
        ``-1..n_nodes-1`` (``counts`` then holds the valid entries' visits).
    """
    if not (isinstance(counts, np.ndarray) and counts.dtype == np.int64 and counts.ndim == 1
            and counts.flags.c_contiguous and counts.flags.writeable):
        raise ConfigError("counts must be a writeable C-contiguous int64 array of one value per node")
    flat = np.ascontiguousarray(walks, dtype=np.int32).reshape(-1)
    added, bad = _accumulate_visits_kernel(flat, counts)
    if bad:
        raise ConfigError(f"walks hold {bad} node indices outside -1..{counts.shape[0] - 1}")
    return int(added)


def _row_groups(corpus_dir: Path, shards: list[dict]) -> list[tuple[Path, int]]:
    groups = []
    for shard in shards:
        path = corpus_dir / shard["file"]
        groups += [(path, g) for g in range(pq.ParquetFile(path).num_row_groups)]
    return groups


def count_corpus_visits(corpus_dir, shards: list[dict], n_nodes: int, length: int, *,
                        threads: int | None = None) -> np.ndarray:
    """How often each node occurs in the given shards of a corpus: one streaming pass, int64 [n_nodes].

    Each of ``threads`` threads (default: the cores this process may use) reads its share of the row groups one at
    a time and adds it into its own count array in place; the arrays are summed once. Memory: ``threads`` count
    arrays plus one row group per thread; the corpus is never held whole.
    """
    corpus_dir = Path(corpus_dir)
    groups = _row_groups(corpus_dir, shards)
    threads = max(1, min(threads or len(os.sched_getaffinity(0)), len(groups)))
    expected = pa.list_(pa.int32(), length)

    def count(share):
        counts = np.zeros(n_nodes, dtype=np.int64)
        for path, group in share:
            column = pq.ParquetFile(path).read_row_group(group, columns=["walk"]).column("walk")
            if column.type != expected:
                raise ConfigError(f"{str(path)!r}: column 'walk' must be {expected}, got {column.type}")
            for chunk in column.chunks:
                try:
                    accumulate_visits(chunk.flatten().to_numpy(zero_copy_only=True), counts)
                except ConfigError as exc:
                    raise ConfigError(f"{str(path)!r}: {exc}") from None
        return counts

    if threads == 1:
        return count(groups)
    with ThreadPoolExecutor(threads) as pool:  # pyarrow's reads and the nogil kernel run in parallel
        parts = list(pool.map(count, [groups[i::threads] for i in range(threads)]))
    total = parts[0]
    for part in parts[1:]:
        total += part
    return total


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
        #: What the run recorded about its walks (see :func:`graphkit.walks.walk_diagnostics`).
        self.diagnostics = self.manifest.get("diagnostics", {})
        # ``visits``: one count file for the corpus; corpora written before it name a count file per shard
        keys = ("file",) if "visits" in self.manifest else ("file", "counts")
        names = [shard[key] for shard in self.manifest["shards"] for key in keys]
        for name in names + ([self.manifest["visits"]] if "visits" in self.manifest else []):
            if not (self.corpus_dir / name).is_file():
                raise ConfigError(f"walk corpus {str(self.corpus_dir)!r} is missing {name}")

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
        """int64 [n_nodes]: how often each node occurs in the corpus (counted once when the corpus was written)."""
        if "visits" in self.manifest:
            counts = np.load(self.corpus_dir / self.manifest["visits"])
            if counts.shape != (self.n_nodes,) or counts.dtype != np.int64:
                raise ConfigError(f"{str(self.corpus_dir / self.manifest['visits'])!r} must hold int64 "
                                  f"[{self.n_nodes}], got {counts.dtype} {counts.shape}")
            return counts
        total = np.zeros(self.n_nodes, dtype=np.int64)
        for shard in self.manifest["shards"]:
            total += np.load(self.corpus_dir / shard["counts"], mmap_mode="r")
        return total
