"""Provisional vectors for nodes that appeared after the current version was trained."""

from __future__ import annotations

import time
from typing import Any

import numpy as np
import pyarrow as pa

from .config import RefreshConfig
from .errors import StoreError
from .graph import AdjacencyArrays

__all__ = ["fold_in", "neighbour_mean_vectors"]


def neighbour_mean_vectors(graph: AdjacencyArrays, known: np.ndarray, vectors: np.ndarray, targets: np.ndarray):
    """Weighted mean of the known neighbours' vectors for each target node.

    Parameters
    ----------
    graph : AdjacencyArrays
    known : ndarray of int64, shape (n_nodes,)
        Row of each node in ``vectors``, or -1 when the node has no vector.
    vectors : ndarray of float32, shape (n_known, dim)
    targets : ndarray of int64, shape (m,)
        Nodes to fold in.

    Returns
    -------
    (ndarray of float32 [m, dim], ndarray of bool [m])
        The means, and which targets had at least one known neighbour (the others' rows are zero).
    """
    dim = vectors.shape[1]
    starts, stops = graph.indptr[targets], graph.indptr[targets + 1]
    lengths = stops - starts
    owner = np.repeat(np.arange(targets.size), lengths)
    edge = np.repeat(starts - np.concatenate([[0], np.cumsum(lengths)[:-1]]), lengths) + np.arange(lengths.sum())
    nbr = graph.indices[edge]
    w = np.ones(edge.size, np.float64) if graph.weights is None else graph.weights[edge].astype(np.float64)
    rows = known[nbr]
    ok = rows >= 0
    sums = np.zeros((targets.size, dim), np.float64)
    np.add.at(sums, owner[ok], vectors[rows[ok]].astype(np.float64) * w[ok, None])
    totals = np.bincount(owner[ok], weights=w[ok], minlength=targets.size)
    has = totals > 0
    sums[has] /= totals[has, None]
    return sums.astype(np.float32), has


def fold_in(cfg: RefreshConfig) -> dict[str, Any]:
    """Give nodes of the current edge tables that the current version lacks a provisional vector, and publish
    the result as a new version (the current rows unchanged, the new rows flagged ``provisional``).

    A node's provisional vector is the weighted mean of the vectors of its neighbours that the current version
    has (trained, not provisional ones). Nodes with no such neighbour get none. The next full refresh replaces
    every provisional vector with a trained one.

    When no node gets a provisional vector (no new node, or none with a known neighbour), nothing is published:
    ``version`` is None and the store is left as it was.

    Returns
    -------
    dict
        ``version`` (the new one, or None), ``base_version``, ``foldin_candidates`` (new nodes found),
        ``foldin_nodes`` (given a vector) and ``foldin_without_known_neighbours``.
    """
    from .pipeline import finish_run, plan_run, published_ids, run_lock, stage_graph, stage_ingest
    from .store import current_version, publish_embeddings, read_table

    t0 = time.perf_counter()
    base = current_version(cfg.store_path)
    if base is None:
        raise StoreError(f"{cfg.store_path}: no current version to fold new nodes into; run `graphkit refresh`")
    plan = plan_run(cfg)
    with run_lock(cfg):
        # the refresh's own stages: the same ingest folder (reused when a refresh of this input left it), the
        # graph's checks, and the ids as a refresh publishes them (with hash_ids, the pseudonyms ingest stored)
        ingest = stage_ingest(cfg, plan)
        graph = AdjacencyArrays.load(stage_graph(cfg, plan)["graph_dir"])
        ids, kinds = published_ids(cfg, plan)
        current = read_table(cfg.store_path, base)
        dim = current.schema.field("vector").type.list_size
        cur_vec = current.column("vector").combine_chunks().flatten().to_numpy().reshape(-1, dim)
        graph_keys = pa.table({"node_kind": kinds, "node_id": ids,
                               "idx": pa.array(np.arange(graph.n_nodes))})
        cur_keys = pa.table({"node_kind": current.column("node_kind"), "node_id": current.column("node_id"),
                             "row": pa.array(np.arange(current.num_rows)),
                             "prov": current.column("provisional")})
        try:
            joined = graph_keys.join(cur_keys, keys=["node_kind", "node_id"], join_type="left outer")
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
            raise StoreError(f"{cfg.store_path}: node ids of the edge tables and of version {base} have "
                             "different types") from None
        idx = joined.column("idx").to_numpy()
        row = joined.column("row").fill_null(-1).to_numpy()
        prov = joined.column("prov").fill_null(True).to_numpy(zero_copy_only=False)
        known = np.full(graph.n_nodes, -1, np.int64)
        trained = (row >= 0) & ~prov
        known[idx[trained]] = row[trained]
        targets = np.sort(idx[row < 0])
        means, has = neighbour_mean_vectors(graph, known, cur_vec, targets)
        new = targets[has]
        metrics = {"foldin_nodes": int(new.size), "foldin_without_known_neighbours": int(targets.size - new.size)}
        if new.size == 0:  # a version identical to the current one would only push an older one out of retention
            finish_run(plan)
            return {"version": None, "base_version": int(base), "foldin_candidates": int(targets.size), **metrics}
        table = pa.concat_tables([
            current,
            pa.table({"node_id": ids.take(pa.array(new)), "node_kind": kinds.take(pa.array(new)),
                      "provisional": pa.array(np.ones(new.size, bool)),
                      "vector": pa.FixedSizeListArray.from_arrays(pa.array(means[has].ravel()), dim)}),
        ])
        vectors = table.column("vector").combine_chunks().flatten().to_numpy().reshape(-1, dim)
        version = publish_embeddings(
            cfg.store_path, table.column("node_id").combine_chunks(), vectors,
            node_kinds=table.column("node_kind").combine_chunks(),
            provisional=table.column("provisional").to_numpy(zero_copy_only=False),
            params={**plan["params"], "lineage": {"fold_in_of": int(base), "warnings": ingest.get("warnings", []),
                                                "hashed_ids": cfg.input.hash_ids}},
            fingerprint=plan["fingerprint"], counts={**ingest["counts"], **metrics},
            timings={"foldin": round(time.perf_counter() - t0, 3)}, metrics=metrics, objective="fold_in",
            keep=cfg.store.keep)
        finish_run(plan)
    return {"version": version, "base_version": int(base), "foldin_candidates": int(targets.size), **metrics}
