"""Ingest: one Parquet edge table -> cleaned, merged, indexed edges and a dense node dictionary (DuckDB)."""

from __future__ import annotations

import difflib
import time
import warnings
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from .errors import EdgeTableError, GraphDataWarning
from .graph import CSRGraph
from .io import fingerprint_files, resolve_input_files, write_json_atomic
from .sql import load_sql, quote_ident, work_connection

__all__ = ["check_edge_table", "ingest_edges"]


def _suggest(name: str, columns) -> str:
    close = difflib.get_close_matches(name, list(columns), n=1, cutoff=0.5)
    return f" (did you mean {close[0]!r}?)" if close else f" (columns: {', '.join(columns)})"


def _id_kind(t: pa.DataType) -> str:
    if pa.types.is_integer(t):
        return "integer"
    if pa.types.is_string(t) or pa.types.is_large_string(t) or pa.types.is_string_view(t):
        return "string"
    return str(t)


def check_edge_table(edges: str, source: str, target: str, weight: str | None = None) -> dict[str, Any]:
    """Cheap checks of an edge table before any work starts: files exist, are Parquet, carry the columns.

    Reads only the Parquet footers.

    Returns
    -------
    dict
        ``files`` (list of Path), ``n_rows`` (int), ``id_type`` (the id column's Arrow type as a string).

    Raises
    ------
    EdgeTableError
        Naming the file and column: no files, not Parquet, missing column (with the closest existing name),
        ids of different types across files or between source and target, a non-numeric weight.
    """
    files = resolve_input_files(edges)
    n_rows = 0
    id_kinds: dict[str, Path] = {}
    for f in files:
        try:
            meta = pq.read_metadata(f)
            schema = meta.schema.to_arrow_schema()
        except (pa.ArrowInvalid, OSError) as exc:
            reason = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
            raise EdgeTableError(f"{f}: not a readable Parquet file ({reason})") from None
        names = schema.names
        for role, col in (("source", source), ("target", target), ("weight", weight)):
            if col is not None and col not in names:
                raise EdgeTableError(f"{f}: no column {col!r} for [input] {role}{_suggest(col, names)}")
        for col in (source, target):
            id_kinds.setdefault(_id_kind(schema.field(col).type), f)
        if weight is not None:
            wt = schema.field(weight).type
            if not (pa.types.is_integer(wt) or pa.types.is_floating(wt) or pa.types.is_decimal(wt)):
                raise EdgeTableError(f"{f}: weight column {weight!r} must be numeric, got {wt}")
        n_rows += meta.num_rows
    if len(id_kinds) > 1:
        (k1, f1), (k2, f2) = list(id_kinds.items())[:2]
        raise EdgeTableError(f"{f2}: node ids of type {k2} in column {source!r}/{target!r}, "
                             f"but {k1} in {f1}; all ids must have one type")
    if n_rows == 0:
        raise EdgeTableError(f"{edges}: the edge table is empty (0 rows in {len(files)} file(s))")
    return {"files": files, "n_rows": n_rows, "id_type": next(iter(id_kinds))}


def ingest_edges(edges: str, out_dir, *, source: str, target: str, weight: str | None = None,
                 directed: bool = False, threads: int | None = None) -> dict[str, Any]:
    """Read an edge table with DuckDB and write the graph a run works on.

    Null ids and self-loops are dropped and counted, duplicate edges merged (weights summed), undirected edges
    stored in both directions, node ids of any type mapped to dense int32 indices in id order.

    Parameters
    ----------
    edges : str
        A Parquet file, a folder (read recursively, hive partitions allowed) or a glob.
    out_dir : path
        Receives ``graph/`` (CSR ``.npy`` arrays, see :meth:`CSRGraph.save`), ``nodes.parquet``
        (node_idx int32, node_id in the input's type) and ``ingest.json`` (counts, fingerprint, timing).
    source, target, weight : str
        Column names; ``weight`` is optional (every edge then weighs 1 and the graph is unweighted).
    directed : bool, default False

    Returns
    -------
    dict
        The content of ``ingest.json``.

    Raises
    ------
    EdgeTableError
        See :func:`check_edge_table`; also bad weights (null, NaN, infinite, zero or negative) with a count and
        up to five example rows, and tables with no usable edge after cleaning.

    Warns
    -----
    GraphDataWarning
        When rows were dropped (null ids, self-loops) or merged (duplicates), with the counts.
    """
    t0 = time.perf_counter()
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    info = check_edge_table(edges, source, target, weight)
    files = info["files"]
    con = work_connection(out_dir / "duckdb_tmp", threads=threads)
    try:
        hive = Path(edges).is_dir()
        raw = con.read_parquet([str(f) for f in files], hive_partitioning=hive)
        w_expr = f"{quote_ident(weight)}::double" if weight else "1.0::double"
        raw.project(f"{quote_ident(source)} as src, {quote_ident(target)} as dst, {w_expr} as weight") \
           .create_view("raw_edges")
        counts = con.sql(load_sql("checks/edge_counts")).fetchall()[0]
        n_rows, n_null, n_loops, n_bad_w = (int(c) for c in counts)
        if weight and n_bad_w:
            examples = con.sql(load_sql("checks/bad_weights")).fetchall()
            raise EdgeTableError(f"{edges}: {n_bad_w} of {n_rows} rows have a null, NaN, infinite, zero or negative "
                                 f"value in weight column {weight!r}, e.g. {examples}")
        con.execute("create table edges as " + load_sql("edges"), {"directed": bool(directed)})
        n_distinct, n_kept = (int(x or 0) for x in con.sql("select count(*), sum(n_rows) from edges").fetchall()[0])
        if n_distinct == 0:
            why = f"{n_null} with a null id, {n_loops} self-loops"
            raise EdgeTableError(f"{edges}: no usable edge in column(s) {source!r}/{target!r} "
                                 f"({n_rows} rows: {why})")
        con.execute("create table nodes as " + load_sql("nodes"))
        n_nodes = int(con.sql("select count(*) from nodes").fetchall()[0][0])
        if n_nodes >= 2**31 - 1:
            raise EdgeTableError(f"{edges}: {n_nodes} nodes exceed the int32 node index")
        con.sql("select node_idx, node_id from nodes order by node_idx") \
           .write_parquet(str(out_dir / "nodes.parquet"), compression="zstd")
        arrays = con.execute(load_sql("edge_index"), {"directed": bool(directed)}).fetchnumpy()
    finally:
        con.close()
    src_idx = np.asarray(arrays["src_idx"], dtype=np.int64)
    indices = np.ascontiguousarray(arrays["dst_idx"], dtype=np.int32)
    wts = np.ascontiguousarray(arrays["weight"], dtype=np.float32) if weight else None
    del arrays
    indptr = np.zeros(n_nodes + 1, dtype=np.int64)
    np.cumsum(np.bincount(src_idx, minlength=n_nodes), out=indptr[1:])
    del src_idx
    graph = CSRGraph.from_arrays(indptr, indices, wts, directed=directed)
    graph.save(out_dir / "graph")
    n_merged = n_kept - n_distinct
    result = {
        "edges": edges,
        "files": [str(f) for f in files],
        "fingerprint": fingerprint_files(files),
        "id_type": info["id_type"],
        "directed": bool(directed),
        "weighted": weight is not None,
        "counts": {
            "rows": n_rows, "dropped_null_ids": n_null, "dropped_self_loops": n_loops,
            "merged_duplicates": n_merged, "edges": n_distinct, "nodes": n_nodes,
            "adjacency_entries": graph.n_edges,
        },
        "seconds": round(time.perf_counter() - t0, 3),
    }
    problems = [f"{n} {what}" for n, what in ((n_null, "rows with a null id dropped"),
                                              (n_loops, "self-loops dropped"),
                                              (n_merged, "duplicate edges merged")) if n]
    if problems:
        warnings.warn(f"{edges}: " + ", ".join(problems), GraphDataWarning, stacklevel=2)
    write_json_atomic(out_dir / "ingest.json", result)
    return result
