"""The refresh as plain functions, one per stage; ``flows/refresh.py`` wraps each in a Prefect task.

Every stage reads and writes files under ``STORE/work/`` and returns a small JSON-serialisable dict (paths,
counts, seconds), never arrays. A stage's folder is named by a key built from the input fingerprint and the
parameters that stage depends on, and its completion marker is written last, so a rerun after a crash skips what
already finished (changing the training dimension does not redo the walks).
"""

from __future__ import annotations

import os
import shutil
import time
from datetime import datetime
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow.parquet as pq

from .config import RefreshConfig
from .faults import fault_point
from .graph import CSRGraph
from .ingest import ingest_tables, validate_edge_tables
from .io import digest, fingerprint_files, read_json, write_json_atomic

__all__ = ["plan_run", "preflight", "stage_ingest", "stage_graph", "stage_walks", "stage_train", "stage_publish",
           "finish_run", "refresh", "run_lock", "fault_point"]


def preflight(cfg: RefreshConfig) -> dict[str, Any]:
    """Checks that must fail within seconds, before any work: input files, their format, columns and rows."""
    return validate_edge_tables(cfg.tables(), drop_null_ids=cfg.input.drop_null_ids,
                                window=cfg.input.time_window())


def plan_run(cfg: RefreshConfig) -> dict[str, Any]:
    """Work folders and stage keys for a config (reads only the input files' sizes and footers)."""
    store = cfg.store_path
    files = [f for fs in preflight(cfg)["files"] for f in fs]
    fingerprint = fingerprint_files(files)
    window = cfg.input.time_window()
    inp = cfg.input
    windowed = any(v is not None for v in (inp.since, inp.until, inp.last_days, inp.half_life_days))
    ingest_key = digest({"fingerprint": fingerprint, "input": cfg.input.model_dump(exclude={"tables"}),
                         "tables": [t.model_dump() for t in cfg.tables()], "window": window if windowed else None})
    walks_key = digest({"ingest": ingest_key, "walks": cfg.walks.model_dump()})
    train_key = digest({"walks": walks_key, "train": cfg.train.model_dump(exclude={"threads"})})
    work = store / "work"
    return {
        "store": str(store),
        "work": str(work),
        "fingerprint": fingerprint,
        "ingest_dir": str(work / f"ingest-{ingest_key}"),
        "walks_dir": str(work / f"walks-{walks_key}"),
        "train_dir": str(work / f"train-{train_key}"),
        "params": cfg.to_public_dict(),
        "window": {k: (v.isoformat() if hasattr(v, "isoformat") else v) for k, v in window.items()},
    }


def stage_ingest(cfg: RefreshConfig, plan: dict) -> dict[str, Any]:
    """DuckDB ingest into ``ingest_dir`` (skipped when its ``ingest.json`` exists)."""
    out = Path(plan["ingest_dir"])
    if (out / "ingest.json").exists():
        return {**read_json(out / "ingest.json"), "skipped": True}
    shutil.rmtree(out, ignore_errors=True)  # leftovers of a dead run
    window = {k: (datetime.fromisoformat(v) if isinstance(v, str) else v) for k, v in plan["window"].items()}
    if cfg.input.hash_ids:  # fail before the long stages, not at publish
        from .ids import salt_from_env

        salt_from_env(cfg.input.hash_salt_env)
    return ingest_tables(cfg.tables(), out, directed=cfg.input.directed, drop_null_ids=cfg.input.drop_null_ids,
                         window=window)


def stage_graph(cfg: RefreshConfig, plan: dict) -> dict[str, Any]:
    """Open the memory-mapped CSR written by ingest and check its invariants."""
    t0 = time.perf_counter()
    folder = Path(plan["ingest_dir"]) / "graph"
    graph = CSRGraph.load(folder)
    graph.validate()
    deg = graph.degrees()
    return {"graph_dir": str(folder), "n_nodes": graph.n_nodes, "adjacency_entries": graph.n_edges,
            "isolated_nodes": int(np.count_nonzero(deg == 0)), "max_degree": int(deg.max(initial=0)),
            "seconds": round(time.perf_counter() - t0, 3)}


#: Bytes per walk token on disk, measured for zstd Parquet on a uniform random graph (stack-facts §5: 3.12 GB per
#: 1e9 tokens, the worst case); plus a margin for the count files and temporary files.
CORPUS_BYTES_PER_TOKEN = 3.2
FREE_SPACE_MARGIN = 1.2


def graph_nodes(plan: dict) -> int:
    return int(read_json(Path(plan["ingest_dir"]) / "graph" / "graph.json")["n_nodes"])


def check_free_space(folder, *, n_walks: int, length: int) -> int:
    """Refuse (``StoreError``) when the disk holding ``folder`` has less room than the walk corpus needs."""
    from .store import StoreError

    need = int(n_walks * length * CORPUS_BYTES_PER_TOKEN * FREE_SPACE_MARGIN)
    probe = Path(folder)
    while not probe.exists():
        probe = probe.parent
    free = shutil.disk_usage(probe).free
    if free < need:
        raise StoreError(f"{folder}: the walk corpus needs about {need / 1e9:.2f} GB ({n_walks} walks x {length} "
                         f"nodes) but only {free / 1e9:.2f} GB are free there")
    return need


def _walk_options(w) -> dict:
    """Walk options beyond DeepWalk's, passed only when they differ from the defaults."""
    opts = {"weighted": w.weighted, "p": w.p, "q": w.q, "dead_end": w.dead_end}
    defaults = {"weighted": True, "p": 1.0, "q": 1.0, "dead_end": "stop"}
    return {k: v for k, v in opts.items() if v != defaults[k]}


def stage_walks(cfg: RefreshConfig, plan: dict) -> dict[str, Any]:
    """Random walks sharded over Dask into the Parquet walk corpus (finished shards are kept on a rerun)."""
    from .corpus import write_walk_corpus

    out = Path(plan["walks_dir"])
    if (out / "manifest.json").exists():
        return {**read_json(out / "manifest.json"), "skipped": True}
    t0 = time.perf_counter()
    w = cfg.walks
    check_free_space(out, n_walks=w.per_node * graph_nodes(plan), length=w.length)
    manifest = write_walk_corpus(Path(plan["ingest_dir"]) / "graph", out, per_node=w.per_node, length=w.length,
                                 seed=w.seed, dask_address=cfg.dask.address, n_workers=cfg.dask.workers,
                                 **_walk_options(w))
    return {**manifest, "seconds": round(time.perf_counter() - t0, 3)}


def stage_train(cfg: RefreshConfig, plan: dict) -> dict[str, Any]:
    """Skip-gram over the walk corpus, chunk by chunk; writes ``vectors.npy`` (float32 [n_nodes, dim])."""
    from .corpus import WalkCorpus
    from .train import train_vectors

    out = Path(plan["train_dir"])
    done = out / "train.json"
    fault_point("train")
    if done.exists():
        return {**read_json(done), "skipped": True}
    t0 = time.perf_counter()
    corpus = WalkCorpus(plan["walks_dir"])
    t = cfg.train
    vectors = train_vectors(corpus, corpus.n_nodes, dim=t.dim, window=t.window, objective=t.objective,
                            negatives=t.negatives, epochs=t.epochs, seed=cfg.walks.seed, threads=t.threads,
                            learning_rate=t.learning_rate)
    out.mkdir(parents=True, exist_ok=True)
    tmp = out / f".vectors-{os.getpid()}.npy"
    np.save(tmp, vectors)
    os.replace(tmp, out / "vectors.npy")
    seconds = time.perf_counter() - t0
    tokens = int(corpus.n_tokens) * t.epochs
    result = {"vectors": str(out / "vectors.npy"), "n_nodes": int(vectors.shape[0]), "dim": int(vectors.shape[1]),
              "tokens": tokens, "tokens_per_second": round(tokens / max(seconds, 1e-9)),
              "seconds": round(seconds, 3)}
    write_json_atomic(done, result)
    return result


def stage_publish(cfg: RefreshConfig, plan: dict, ingest: dict, graph: dict, walks: dict, train: dict) -> int:
    """Publish the trained vectors as a new current version; returns its number.

    The caller holds the store lock (see :func:`run_lock`).
    """
    from .ids import hash_ids, salt_from_env
    from .store import align_to_current, publish_embeddings

    nodes = pq.read_table(Path(plan["ingest_dir"]) / "nodes.parquet")
    idx = nodes.column("node_idx").to_numpy()
    if not np.array_equal(idx, np.arange(idx.size)):
        raise RuntimeError("node dictionary is not in node_idx order")
    node_ids = nodes.column("node_id").combine_chunks()
    if cfg.input.hash_ids:
        node_ids = hash_ids(node_ids, salt_from_env(cfg.input.hash_salt_env))
    node_kinds = nodes.column("node_kind").combine_chunks()
    vectors = np.load(train["vectors"])
    alignment = {"aligned_to": None}
    if cfg.store.align:
        vectors, alignment = align_to_current(plan["store"], node_ids, node_kinds, vectors)
    counts = {**ingest["counts"], "isolated_nodes": graph["isolated_nodes"],
              "walks": walks["n_walks"], "walk_tokens": walks["n_tokens"], "train_tokens": train["tokens"]}
    timings = {name: (0.0 if stage.get("skipped") else stage["seconds"])
               for name, stage in (("ingest", ingest), ("graph", graph), ("walks", walks), ("train", train))}
    metrics = {"train_tokens_per_second": train["tokens_per_second"]}
    if alignment.get("residual") is not None:
        metrics["align_residual"] = round(alignment["residual"], 6)
    lineage = {"warnings": ingest.get("warnings", []), "window": ingest.get("window", {}),
               "hashed_ids": cfg.input.hash_ids, "alignment": alignment}
    return publish_embeddings(plan["store"], node_ids, vectors, node_kinds=node_kinds, keep=cfg.store.keep,
                              params={**plan["params"], "lineage": lineage}, fingerprint=plan["fingerprint"],
                              counts=counts, timings=timings, metrics=metrics, objective=cfg.train.objective)


@contextmanager
def run_lock(cfg: RefreshConfig):
    """Hold the store's writer lock for a whole run and clear what dead runs left behind."""
    from .store import clean_stale, store_lock

    old_mask = os.umask(0o022)  # nothing in the store is world- or group-writable, whatever the caller's umask
    try:
        with store_lock(cfg.store_path):
            clean_stale(cfg.store_path)
            yield
    finally:
        os.umask(old_mask)


def finish_run(plan: dict) -> None:
    """Remove the run's work folders once its version is published (the walk corpus can be large)."""
    for key in ("ingest_dir", "walks_dir", "train_dir"):
        shutil.rmtree(plan[key], ignore_errors=True)


def refresh(cfg: RefreshConfig) -> int:
    """Run every stage in order without Prefect (what the flow does, for notebooks and tests)."""
    plan = plan_run(cfg)
    with run_lock(cfg):
        ingest = stage_ingest(cfg, plan)
        graph = stage_graph(cfg, plan)
        walks = stage_walks(cfg, plan)
        train = stage_train(cfg, plan)
        version = stage_publish(cfg, plan, ingest, graph, walks, train)
        finish_run(plan)
    return version
