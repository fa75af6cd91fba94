"""Each night's vectors measured before they are published: link prediction on held-out edges, node
classification against a labels table, drift against the current version, and the quality gates."""

from __future__ import annotations

import time
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from .errors import EdgeTableError
from .graph import AdjacencyArrays
from .io import read_json, write_json_atomic

__all__ = ["make_holdout", "load_labels", "evaluate_vectors", "failed_gates"]


def make_holdout(graph_dir, out_dir, *, fraction: float, seed: int, max_edges: int | None = None) -> dict[str, Any]:
    """Hold out ``fraction`` of the edges, at most ``max_edges`` (no node loses all its edges), and save the
    training graph and the scored pairs under ``out_dir``; skipped when ``holdout.json`` is there."""
    from .evaluate import holdout_edges

    out = Path(out_dir)
    if (out / "holdout.json").exists():
        return {**read_json(out / "holdout.json"), "skipped": True}
    t0 = time.perf_counter()
    graph = AdjacencyArrays.load(graph_dir, mmap=False)
    result = holdout_edges(graph, fraction, seed=seed, max_edges=max_edges)
    result.train_graph.save(out / "graph")
    np.save(out / "positives.npy", result.positives)
    np.save(out / "negatives.npy", result.negatives)
    info = {**result.counts, "fraction": fraction, "seconds": round(time.perf_counter() - t0, 3)}
    write_json_atomic(out / "holdout.json", info)
    return info


def check_labels_table(path: str, *, id_column: str, label_column: str, kind: str | None = None,
                       kinds=None) -> list:
    """The checks on a labels table that need no graph: its files exist and are Parquet, the two columns exist,
    and ``kind`` is one of the node kinds the edge tables produce (``kinds``). Returns the files (local paths, or
    objects for a URL: see :mod:`graphkit.storage`).

    Raises
    ------
    EdgeTableError
        Naming the file (the URL) and the ``[evaluate]`` key at fault.
    """
    from . import storage
    from .io import resolve_input_files

    files = resolve_input_files(path)
    try:
        schema = pq.read_schema(storage.arrow_name(files[0]), filesystem=storage.files_for(files[0]).arrow)
    except (OSError, pa.ArrowException) as exc:
        raise EdgeTableError(storage.access_error(files[0], exc) or
                             f"{files[0]}: [evaluate] labels is not a readable Parquet file "
                             f"({(str(exc).strip() or type(exc).__name__).splitlines()[0]})") from None
    for key, col in (("label_id_column", id_column), ("label_column", label_column)):
        if col not in schema.names:
            raise EdgeTableError(f"{files[0]}: no column {col!r} for [evaluate] {key} "
                                 f"(columns: {', '.join(schema.names)})")
    if kind is not None and kinds is not None and kind not in kinds:
        raise EdgeTableError(f"[evaluate] label_kind = {kind!r} is not a node kind of the edge tables "
                             f"(kinds: {', '.join(sorted(kinds))})")
    return files


def _first_line(exc) -> str:
    try:
        text = str(exc).strip()
    except Exception:  # noqa: BLE001 - building an error message must not fail
        text = ""
    return text.splitlines()[0][:300] if text else type(exc).__name__


def load_labels(path: str, nodes_parquet, *, id_column: str, label_column: str,
                kind: str | None = None) -> tuple[np.ndarray, np.ndarray, dict[str, int]]:
    """Map a labels table (one row per node and label) onto node indices.

    Returns
    -------
    (node_idx int64 [rows], labels object [rows], counts)
        ``node_idx`` is -1 for labelled ids the graph does not have; counts holds ``rows`` and ``unmatched``.
    """
    import duckdb

    from . import storage
    from .sql import load_sql

    files = check_labels_table(path, id_column=id_column, label_column=label_column)
    # The two columns are read by name with Arrow and renamed, so no column name is ever written into SQL text.
    try:
        table = pq.ParquetDataset([storage.arrow_name(f) for f in files],
                                  filesystem=storage.files_for(files[0]).arrow).read(columns=[id_column, label_column])
    except (OSError, pa.ArrowException) as exc:
        raise EdgeTableError(storage.access_error(files[0], exc) or
                             f"{path}: [evaluate] labels cannot be read ({storage.redact(_first_line(exc))})"
                             ) from None
    as_text = [pc.cast(table.column(c), pa.string()) for c in (id_column, label_column)]
    labels = pa.table({"label_row": pa.array(np.arange(table.num_rows, dtype=np.int64)),
                       "label_node_id": as_text[0], "label": as_text[1]})
    con = duckdb.connect()
    try:
        con.register("labels", labels)
        con.read_parquet(str(nodes_parquet)).create_view("nodes")
        rows = con.execute(load_sql("labelled_nodes"), {"kind": kind}).fetchall()
    finally:
        con.close()
    idx = np.array([r[0] for r in rows], dtype=np.int64)
    labels = np.array([r[1] for r in rows], dtype=object)
    return idx, labels, {"rows": len(rows), "unmatched": int(np.count_nonzero(idx < 0))}


def evaluate_vectors(cfg, plan: dict, *, published_vectors: np.ndarray, eval_vectors: np.ndarray | None,
                     node_ids: pa.Array, node_kinds: pa.Array) -> dict[str, Any]:
    """Every configured quality figure for a run, as a flat dict of numbers (plus ``node_classification``)."""
    from .evaluate import link_prediction, neighbour_overlap, node_classification
    from .store import match_current

    ev = cfg.evaluate
    metrics: dict[str, Any] = {}
    timings: dict[str, float] = {}
    if eval_vectors is not None and plan.get("holdout_dir"):
        t0 = time.perf_counter()
        pos = np.load(Path(plan["holdout_dir"]) / "positives.npy")
        neg = np.load(Path(plan["holdout_dir"]) / "negatives.npy")
        if len(pos) and len(neg):
            lp = link_prediction(eval_vectors, pos, neg, seed=ev.seed)
            metrics.update({k: round(float(v), 6) for k, v in lp.items() if k.startswith("link_") and
                            isinstance(v, float)})
            metrics["link_pairs"] = int(len(pos) + len(neg))
        timings["link_prediction"] = round(time.perf_counter() - t0, 3)
    if cfg.labels_path:
        t0 = time.perf_counter()
        idx, labels, counts = load_labels(cfg.labels_path, Path(plan["ingest_dir"]) / "nodes.parquet",
                                          id_column=ev.label_id_column, label_column=ev.label_column,
                                          kind=ev.label_kind)
        nc = node_classification(published_vectors, idx, labels, ratios=tuple(ev.ratios), repeats=ev.repeats,
                                 max_nodes=ev.max_labelled_nodes, seed=ev.seed)
        for key in ("micro_f1_at_10", "macro_f1_at_10"):
            if key in nc:
                metrics[key] = round(float(nc[key]), 6)
        metrics["node_classification"] = {"per_ratio": nc["per_ratio"], "n_labelled": nc["n_labelled"],
                                          "n_classes": nc["n_classes"], "unmatched_label_rows": counts["unmatched"]}
        timings["node_classification"] = round(time.perf_counter() - t0, 3)
    t0 = time.perf_counter()
    # the current version's matched rows, read once per run and shared with warm start and alignment
    from .pipeline import previous_dir

    match = match_current(plan["store"], node_ids, node_kinds, published_vectors.shape[1],
                          cache_dir=previous_dir(plan) if plan.get("ingest_dir") else None)
    if match is not None and match["new_rows"].size >= 20:
        k = min(10, match["new_rows"].size - 1)
        rows = match["new_rows"]
        overlap = neighbour_overlap(match["old_vectors"], published_vectors, k=k, sample=ev.drift_sample,
                                    seed=ev.seed, cur_rows=None if rows.size == published_vectors.shape[0] else rows)
        metrics["neighbour_overlap"] = round(float(overlap), 6)
        metrics["neighbour_drift"] = round(1.0 - float(overlap), 6)
        metrics["drift_shared_nodes"] = int(match["new_rows"].size)
        metrics["drift_against"] = int(match["version"])
        timings["drift"] = round(time.perf_counter() - t0, 3)
    metrics["evaluate_seconds"] = round(sum(timings.values()), 3)
    return metrics


_GATES = {  # gate key -> (metric, direction)
    "min_link_auc": ("link_auc_cosine", "min"),
    "min_micro_f1": ("micro_f1_at_10", "min"),
    "min_macro_f1": ("macro_f1_at_10", "min"),
    "max_neighbour_drift": ("neighbour_drift", "max"),
    "max_align_residual": ("align_residual", "max"),
}


def failed_gates(metrics: dict[str, Any], gates) -> list[str]:
    """The configured gates the metrics fail, as readable reasons.

    A gate whose metric was not measured fails too, so that a gate on link AUC with the holdout switched off
    cannot pass silently. Drift and alignment gates are the exception: a first version has nothing to compare
    with and passes them.
    """
    reasons = []
    for key, (metric, direction) in _GATES.items():
        bound = getattr(gates, key)
        if bound is None:
            continue
        value = metrics.get(metric)
        if value is None:
            if metric in ("neighbour_drift", "align_residual"):
                continue
            reasons.append(f"[gates] {key} = {bound} but {metric} was not measured")
        elif (direction == "min" and value < bound) or (direction == "max" and value > bound):
            word = "below" if direction == "min" else "above"
            reasons.append(f"{metric} = {value:.4f} is {word} [gates] {key} = {bound}")
    return reasons
