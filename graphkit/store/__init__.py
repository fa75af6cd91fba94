"""The versioned embedding store: numbered Parquet versions plus a DuckDB catalog.

Layout of a store folder::

    catalog.duckdb                      versions table; views `embeddings` (current) and `embeddings_vNNNNNN`;
                                        macros `cosine_similarity`, `nearest_neighbours`, `pair_similarity`
    versions/000001/embeddings.parquet  node_id (the input's own type), node_kind, provisional, vector
                                        (fixed-size list of float32): the table downstream jobs read
    versions/000001/embeddings.duckdb   the same rows as a native DuckDB table, attached by `connect` for fast SQL
    work/                               scratch of runs in progress (ingest, graph, walk corpus)

The parts: :mod:`.catalog` (versions, publish, failed runs, retention, pins, promote), :mod:`.align` (Procrustes
onto the current version), :mod:`.lock` (the writer lock, durable renames), :mod:`.work` (stage work folders),
:mod:`.query` (the read-only connection, nearest neighbours, export, the data of a report). Import the public
names from ``graphkit.store``.
"""

from __future__ import annotations

from ..errors import StoreError
from .align import ALIGN_BLOCK_BYTES, align_to_current, match_current
from .catalog import (CATALOG, apply_retention, clean_stale, current_version, diagnostic_arrays, gather_rows,
                      list_versions, load_diagnostics, pin_version, promote_version, publish_embeddings, read_table,
                      read_version, record_failed_run, version_of_run, version_row)
from .lock import WRITERS, check_store_writable, fsync_dir, replace_durably, store_lock
from .query import connect, export_version, report_inputs, similar_nodes, spread_vectors, version_files
from .work import WORK_PREFIXES, clean_work

__all__ = ["connect", "publish_embeddings", "record_failed_run", "version_of_run", "list_versions", "read_version",
           "read_table", "current_version", "version_row", "version_files", "promote_version", "pin_version",
           "apply_retention", "store_lock", "check_store_writable", "clean_stale", "clean_work", "WORK_PREFIXES",
           "diagnostic_arrays", "load_diagnostics", "gather_rows", "align_to_current", "match_current",
           "ALIGN_BLOCK_BYTES", "similar_nodes", "export_version", "spread_vectors", "report_inputs",
           "replace_durably", "fsync_dir", "WRITERS", "CATALOG", "StoreError"]
