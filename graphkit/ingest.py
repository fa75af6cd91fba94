"""Ingest: edge tables -> cleaned, merged, indexed edges and a dense node dictionary, all in DuckDB.

Several tables can feed one graph (transfers between accounts, logins from devices); each side of each table has a
node kind and ids are kept apart per kind, so account 17 and device 17 are different nodes.
"""

from __future__ import annotations

import difflib
import time
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import duckdb
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from .discover import CsvOptions, Discovery, discover
from .errors import EdgeTableError, GraphDataWarning
from .faults import fault_point
from .graph import AdjacencyArrays
from .io import digest, fingerprint_files, write_json_atomic
from .sql import bind, inline, load_sql, quote_ident, sql_literal, work_connection
from .storage import redact

__all__ = ["EdgeTable", "check_edge_tables", "check_edge_table", "validate_edge_tables", "ingest_tables",
           "ingest_edges"]

@dataclass(frozen=True)
class EdgeTable:
    """One edge table: where it is, which columns hold what, the node kind of each side, and how its text files
    are parsed (``csv_header``; ``csv_delimiter``, None for the file ending's default)."""

    path: str
    source: str
    target: str
    weight: str | None = None
    source_kind: str = "node"
    target_kind: str = "node"
    timestamp: str | None = None
    csv_header: bool = True
    csv_delimiter: str | None = None

    @classmethod
    def of(cls, spec) -> "EdgeTable":
        if isinstance(spec, cls):
            return spec
        d = spec if isinstance(spec, dict) else spec.model_dump()
        out = {k: d.get(k, getattr(cls, k, None)) for k in cls.__dataclass_fields__}
        if out["csv_header"] is None:  # a table entry without its own setting
            out["csv_header"] = True
        return cls(**out)


def _suggest(name: str, columns) -> str:
    close = difflib.get_close_matches(name, list(columns), n=1, cutoff=0.5)
    return f" (did you mean {close[0]!r}?)" if close else f" (columns: {', '.join(columns)})"


def _id_kind(t: str) -> str:
    t = t.upper()
    if any(x in t for x in ("INT", "HUGEINT")) or t in ("BIGINT", "INTEGER", "SMALLINT", "TINYINT"):
        return "integer"
    if t in ("VARCHAR", "STRING", "TEXT") or t.startswith("VARCHAR"):
        return "string"
    return t.lower()


def _arrow_type_name(t: pa.DataType) -> str:
    if pa.types.is_integer(t):
        return "BIGINT"
    if pa.types.is_string(t) or pa.types.is_large_string(t) or pa.types.is_string_view(t):
        return "VARCHAR"
    if pa.types.is_floating(t) or pa.types.is_decimal(t):
        return "DOUBLE"
    if pa.types.is_timestamp(t) or pa.types.is_date(t):
        return "TIMESTAMP"
    return str(t)


def _csv_options(t: EdgeTable) -> CsvOptions:
    return CsvOptions(header=t.csv_header is not False, delimiter=t.csv_delimiter)


def _discover(t: EdgeTable) -> Discovery:
    return discover(t.path, _csv_options(t))


def _unified_type(found: Discovery, col: str) -> pa.DataType:
    """One Arrow type for ``col`` across the table's files (int32 and int64 as int64, ints and floats as float64)."""
    types = [cols[col] for cols in found.columns]
    if all(t == types[0] for t in types):
        return types[0]
    try:
        return pa.unify_schemas([pa.schema([(col, t)]) for t in types], promote_options="permissive").field(col).type
    except (pa.ArrowInvalid, pa.ArrowTypeError, pa.ArrowNotImplementedError):
        i = next(i for i, t in enumerate(types) if t != types[0])
        raise EdgeTableError(f"{found.files[i]}: column {col!r} has type {types[i]}, but {types[0]} in "
                             f"{found.files[0]}; all files of a table need one type per column") from None


def _scan_types(t: EdgeTable, found: Discovery, id_type: str) -> dict[str, pa.DataType]:
    """The columns a scan of table ``t`` reads and the Arrow type each file's values are cast to."""
    id_arrow = pa.int64() if id_type == "integer" else pa.string()
    types = {t.source: id_arrow, t.target: id_arrow}
    for col in (t.weight, t.timestamp):
        if col is not None:
            types[col] = _unified_type(found, col)
    return types


def check_edge_tables(tables) -> dict[str, Any]:
    """Cheap checks of every edge table before any work starts: files exist, are readable, carry the columns,
    and all node ids have one type. Reads only Parquet footers and the first block of text files (through
    :func:`graphkit.discover.discover`, once per process while the files are unchanged); hive partition columns
    are checked like the files' own.

    Returns
    -------
    dict
        ``files`` (list of list of Path, per table), ``id_type`` ("integer" or "string"), ``n_rows``
        (None when a CSV table is involved).

    Raises
    ------
    EdgeTableError
        Naming the file and column: no files, mixed formats, unreadable file, a text line with the wrong number of
        fields, missing column (with the closest existing name), ids of different types across files or tables,
        a non-numeric weight, a timestamp column holding neither dates, times nor text.
    """
    tables = [EdgeTable.of(t) for t in tables]
    all_files, n_rows = [], 0
    id_kinds: dict[str, str] = {}
    for i, t in enumerate(tables):
        key = "[input]" if len(tables) == 1 else f"[[input.tables]] entry {i + 1}"
        found = _discover(t)
        for f, arrow_cols in zip(found.files, found.columns):
            cols = {name: _arrow_type_name(tp) for name, tp in arrow_cols.items()}
            for role, col in (("source", t.source), ("target", t.target), ("weight", t.weight),
                              ("timestamp", t.timestamp)):
                if col is not None and col not in cols:
                    raise EdgeTableError(f"{f}: no column {col!r} for {key} {role}{_suggest(col, cols)}")
            for col in (t.source, t.target):
                id_kinds.setdefault(_id_kind(cols[col]), f"{f} column {col!r}")
            if t.weight is not None and cols[t.weight] not in ("DOUBLE", "BIGINT"):
                raise EdgeTableError(f"{f}: weight column {t.weight!r} must be numeric, got {cols[t.weight]}")
            if t.timestamp is not None and cols[t.timestamp] not in ("TIMESTAMP", "VARCHAR"):
                raise EdgeTableError(f"{f}: timestamp column {t.timestamp!r} must hold dates or times (or text "
                                     f"DuckDB reads as one), got {cols[t.timestamp]}")
        n_rows = None if found.n_rows is None or n_rows is None else n_rows + found.n_rows
        all_files.append(found.files)
    if len(id_kinds) > 1:
        (k1, w1), (k2, w2) = list(id_kinds.items())[:2]
        raise EdgeTableError(f"{w2}: node ids of type {k2}, but of type {k1} in {w1}; all ids must have one type")
    if n_rows == 0:
        raise EdgeTableError(f"{tables[0].path}: the edge table is empty (0 rows)")
    id_type = next(iter(id_kinds), "string")
    if id_type not in ("integer", "string"):
        raise EdgeTableError(f"{id_kinds[id_type]}: node ids must be integers or strings, got {id_type}")
    return {"files": all_files, "id_type": id_type, "n_rows": n_rows}


def check_edge_table(edges: str, source: str, target: str, weight: str | None = None) -> dict[str, Any]:
    """:func:`check_edge_tables` for a single table; ``files`` is then a flat list."""
    info = check_edge_tables([EdgeTable(edges, source, target, weight)])
    return {**info, "files": info["files"][0]}


def _run(con, name: str, params: dict, *, create: str | None = None):
    """Run ``sql/<name>.sql`` with the parameters it names, optionally as ``create <create> as ...``."""
    sql = load_sql(name)
    return con.execute((f"create {create} as " if create else "") + sql, bind(sql, params))


#: Rows per batch when the sorted adjacency streams out of DuckDB (about 12 MB of int32 + float32 per batch).
FETCH_BATCH_ROWS = 1 << 20


def _fetch_adjacency(result, n_nodes: int, n_entries: int, weighted: bool):
    """Stream ``edge_index`` rows (sorted by source, then target) into CSR arrays allocated once.

    Only one batch of the result is in Python at a time, so the peak is the final arrays plus DuckDB's own
    memory limit, not a second full copy of the adjacency.
    """
    indptr = np.zeros(n_nodes + 1, dtype=np.int64)
    indices = np.empty(n_entries, dtype=np.int32)
    wts = np.empty(n_entries, dtype=np.float32) if weighted else None
    pos, last = 0, 0
    for batch in result.to_arrow_reader(FETCH_BATCH_ROWS):
        k = batch.num_rows
        if pos + k > n_entries:
            raise EdgeTableError(f"adjacency has more than the {n_entries} entries counted")  # pragma: no cover
        src = batch.column(0).to_numpy()
        if k and (src[0] < last or np.any(src[1:] < src[:-1])):
            raise RuntimeError("the adjacency came out of DuckDB unsorted")  # pragma: no cover (a DuckDB change)
        if k:  # sorted by source: count within the batch's own range of sources, O(batch) not O(nodes)
            first = int(src[0])
            counts = np.bincount(src - first)
            indptr[1 + first:1 + first + counts.size] += counts
            last = int(src[-1])
        indices[pos:pos + k] = batch.column(1).to_numpy()
        if weighted:
            wts[pos:pos + k] = batch.column(2).to_numpy()
        pos += k
    if pos != n_entries:
        raise EdgeTableError(f"adjacency has {pos} entries, {n_entries} counted")  # pragma: no cover
    np.cumsum(indptr, out=indptr)
    return indptr, indices, wts


def _table_rows(con, t: EdgeTable, found: Discovery, id_type: str, keep: list):
    """A relation over one table's rows: DuckDB's own reader over the discovered Parquet files (its speed and its
    memory limit), joined to the partition values discovery typed; text files, and every table on an object
    store, as the Arrow dataset discovery builds (fsspec behind Arrow: DuckDB's own object-store reader is never
    used). Objects the relation reads from are appended to ``keep``."""
    if found.is_text or found.is_remote:
        dataset = found.dataset(_scan_types(t, found, id_type))
        keep.append(dataset)
        return con.from_arrow(dataset)
    names = [str(f.resolve()) for f in found.files]
    rel = con.sql(inline(load_sql("edge_files"), {"files": names}))
    if not found.partitions:
        return rel
    values = found.partition_table(names)
    keep.append(values)
    return rel.set_alias("f").join(con.from_arrow(values).set_alias("p"),
                                   "f.__graphkit_file = p.__graphkit_file")


def _raw_view(con, tables: list[EdgeTable], id_type: str) -> list:
    """Register ``raw_edges(src_kind, src, dst_kind, dst, weight, ts, table_path)``: every table projected and
    stacked. Returns the Arrow objects the view reads from, which must stay referenced while it is used."""
    id_sql = "bigint" if id_type == "integer" else "varchar"
    parts, datasets = [], []
    for t in tables:
        rel = _table_rows(con, t, _discover(t), id_type, datasets)
        w = f"{quote_ident(t.weight)}::double" if t.weight else "1.0::double"
        ts = f"{quote_ident(t.timestamp)}::timestamptz" if t.timestamp else "null::timestamptz"
        parts.append(rel.project(
            f"{sql_literal(t.source_kind)} as src_kind, {quote_ident(t.source)}::{id_sql} as src, "
            f"{sql_literal(t.target_kind)} as dst_kind, {quote_ident(t.target)}::{id_sql} as dst, "
            f"{w} as weight, {ts} as ts, {sql_literal(t.path)} as table_path"))
    rel = parts[0]
    for p in parts[1:]:
        rel = rel.union(p)
    rel.create_view("raw_edges")
    return datasets


def _read_error(tables: list[EdgeTable], id_type: str, where: str, exc) -> EdgeTableError:
    """The error for a scan DuckDB could not finish: naming the text file and line when a file alone fails."""
    try:
        for t in tables:
            found = _discover(t)
            message = found.locate_error(_scan_types(t, found, id_type))
            if message:
                return EdgeTableError(message)
    except Exception:  # noqa: BLE001 - building an error message must not fail; the scan's own reason is shown
        pass
    return EdgeTableError(f"{where}: cannot read the edge table ({redact(_first_line(exc))})")


def _examples(con, check: str) -> list[tuple]:
    """Up to 5 offending rows of ``sql/<check>.sql`` (table path first); [] when they cannot be read, so that
    building an error message never fails itself."""
    try:
        return [tuple(r) for r in con.sql(load_sql(check)).fetchall()]
    except Exception:  # noqa: BLE001 - the count already says what is wrong; the examples are a courtesy
        return []


def _format_rows(rows, limit: int = 300) -> str:
    """Example rows (without their table path) as one short line of reprs; never raises."""
    try:
        text = "[" + ", ".join("(" + ", ".join(_safe_repr(v) for v in r[1:]) + ")" for r in rows) + "]"
    except Exception:  # noqa: BLE001
        return "[rows that cannot be shown]"
    text = " ".join(text.split())
    return text if len(text) <= limit else text[:limit] + "...]"


def _first_line(exc) -> str:
    """The first line of an exception's message (its class name when the message is empty); never raises."""
    try:
        text = str(exc).strip()
    except Exception:  # noqa: BLE001
        text = ""
    return text.splitlines()[0] if text else type(exc).__name__


def _safe_repr(value) -> str:
    try:
        return repr(value)
    except Exception:  # noqa: BLE001
        return f"<{type(value).__name__}>"


def _check_rows(con, tables: list[EdgeTable], drop_null_ids: bool, where: str,
                window: dict | None = None) -> tuple[int, int, int, int]:
    """Count the rows of ``windowed`` by what ingest does with them; raise on rows it cannot use."""
    counts = _run(con, "checks/edge_counts", {}).fetchall()[0]
    n_rows, n_outside, n_null_src, n_null_dst, n_null, n_loops, n_bad_w = (int(c) for c in counts)
    by_path = {t.path: t for t in tables}
    if n_null and not drop_null_ids:
        ex = _examples(con, "checks/null_ids")
        path = ex[0][0] if ex else where
        t = by_path.get(path)
        col = "" if t is None else f", e.g. in column {t.source if ex[0][1] is None else t.target!r}"
        raise EdgeTableError(f"{path}: {n_null} of {n_rows} rows have a null id ({n_null_src} in the source, "
                             f"{n_null_dst} in the target column){col}; set [input] drop_null_ids = true to drop them")
    if n_bad_w:
        ex = _examples(con, "checks/bad_weights")
        path = ex[0][0] if ex else where
        t = by_path.get(path)
        column = "the weight column" if t is None else f"weight column {t.weight!r}"
        raise EdgeTableError(f"{path}: {n_bad_w} of {n_rows} rows have a null, NaN, infinite, zero or negative "
                             f"value in {column} (as float32: above 3.4e38 is infinite, below 1.4e-45 zero)"
                             + (f", e.g. {_format_rows(ex)}" if ex else ""))
    window = window or {}
    if window.get("half_life_days") is not None and window.get("as_of") is not None:
        n_zero, age = _run(con, "checks/decayed_weights", {"as_of": window["as_of"],
                                                            "half_life_days": window["half_life_days"]}).fetchall()[0]
        if n_zero:
            raise EdgeTableError(f"{where}: {n_zero} of {n_rows} rows are so old that their weight, halved every "
                                 f"[input] half_life_days = {window['half_life_days']:g} days, falls below the "
                                 f"smallest float32 (the youngest is {float(age):.0f} days old); leave them out "
                                 "with [input] last_days or since, or give a longer half-life")
    if n_rows - n_outside - n_null - n_loops <= 0:
        raise EdgeTableError(f"{where}: no usable edge ({n_rows} rows: {n_outside} outside the time window, "
                             f"{n_null} with a null id, {n_loops} self-loops); every node would be isolated")
    return n_rows, n_outside, n_null, n_loops


def _window_params(window: dict | None, directed: bool) -> dict:
    window = window or {}
    return {"since": window.get("since"), "until": window.get("until"), "as_of": window.get("as_of"),
            "half_life_days": window.get("half_life_days"), "directed": bool(directed)}


#: Row checks that passed in this process, by :func:`_checks_key`: the preflight before Prefect starts scans the rows;
#: the flow's own preflight and the ingest then reuse the counts as long as the files are unchanged.
_CHECKED: dict[str, dict[str, int]] = {}


def _checks_key(tables: list[EdgeTable], files, drop_null_ids: bool, window: dict | None) -> str:
    """What the row checks depend on: the table specs, the files (path, size, footer hash), the null-id policy and
    the window bounds (not the decay reference, which the checks do not use)."""
    window = window or {}
    return digest({"tables": [t.__dict__ for t in tables], "files": fingerprint_files([f for fs in files for f in fs]),
                   "drop_null_ids": bool(drop_null_ids), "since": window.get("since"), "until": window.get("until")})


def validate_edge_tables(tables, *, drop_null_ids: bool = False, window: dict | None = None) -> dict[str, Any]:
    """Every check ingest makes on the rows, without building anything: one scan of the tables in DuckDB.

    Run before a refresh starts, so that bad input fails within seconds. Returns the counts
    (rows, outside_window, null_ids, self_loops) together with :func:`check_edge_tables`' result. The scan runs
    once per process and input: called again on unchanged files, it reads only their footers, and
    :func:`ingest_tables` takes the counts instead of checking the rows again.
    """
    tables = [EdgeTable.of(t) for t in tables]
    info = check_edge_tables(tables)
    key = _checks_key(tables, info["files"], drop_null_ids, window)
    if key in _CHECKED:
        return {**info, "counts": dict(_CHECKED[key])}
    where = tables[0].path if len(tables) == 1 else f"{len(tables)} edge tables"
    con = work_connection()
    try:
        datasets = _raw_view(con, tables, info["id_type"])
        sql = load_sql("windowed_edges")
        con.execute("create temp view windowed as " + _inline_params(sql, _window_params(window, False)))
        n_rows, n_outside, n_null, n_loops = _check_rows(con, tables, drop_null_ids, where, window)
        del datasets
    except duckdb.Error as exc:
        raise _read_error(tables, info["id_type"], where, exc) from None
    finally:
        con.close()
    counts = {"rows": n_rows, "outside_window": n_outside, "null_ids": n_null, "self_loops": n_loops}
    _CHECKED[key] = counts
    return {**info, "counts": dict(counts)}


def _inline_params(sql: str, params: dict) -> str:
    """Views cannot take bound parameters: write the (timestamp or null) window bounds in as literals."""
    for name in ("since", "until"):
        v = params.get(name)
        sql = sql.replace(f"${name}::timestamptz", "null::timestamptz" if v is None
                          else f"{sql_literal(v.isoformat())}::timestamptz")
    return sql


def _write_nodes(con, path: Path, hash_key: bytes | None) -> None:
    """``nodes.parquet`` from the ``nodes`` table, in node_idx order; with ``hash_key`` plus ``node_pseudonym``, the
    HMAC-SHA256 of each id (:func:`graphkit.ids.hash_ids`), computed here once per run, batch by batch."""
    rel = con.sql("select node_idx, node_kind, node_id from nodes order by node_idx")
    if hash_key is None:
        rel.write_parquet(str(path), compression="zstd")
        return
    from .ids import hash_ids

    con.execute("set preserve_insertion_order = true")  # the batches must keep the ORDER BY
    writer = None
    try:
        for batch in rel.to_arrow_reader(FETCH_BATCH_ROWS):
            table = pa.Table.from_batches([batch]).append_column(
                "node_pseudonym", hash_ids(batch.column(2), hash_key))
            if writer is None:
                writer = pq.ParquetWriter(path, table.schema, compression="zstd")
            writer.write_table(table)
    finally:
        if writer is not None:
            writer.close()


def ingest_tables(tables, out_dir, *, directed: bool = False, drop_null_ids: bool = False,
                  window: dict | None = None, threads: int | None = None,
                  memory_limit: str | None = "1GB", hash_key: bytes | None = None) -> dict[str, Any]:
    """Read edge tables with DuckDB and write the graph a run works on.

    Rows outside the time window are left out; rows with a null id are dropped (``drop_null_ids``) or rejected;
    self-loops are dropped; duplicate edges merged (weights summed, after the optional decay by age); undirected
    edges stored in both directions; ``(node_kind, node_id)`` pairs mapped to dense int32 indices in that order.

    Parameters
    ----------
    tables : sequence of EdgeTable (or mappings with its fields)
    out_dir : path
        Receives ``graph/`` (CSR ``.npy`` arrays, see :meth:`AdjacencyArrays.save`), ``nodes.parquet``
        (node_idx int32, node_kind, node_id in the input's type) and ``ingest.json`` (counts, fingerprint).
    directed : bool, default False
    drop_null_ids : bool, default False
    window : dict, optional
        ``since``, ``until``, ``as_of`` (aware datetimes or None) and ``half_life_days`` (float or None), as
        :meth:`graphkit.config.InputSection.time_window` gives.
    memory_limit : str, default "1GB"
        DuckDB's memory limit; past it the joins and sorts spill to ``out_dir/duckdb_tmp``.
    hash_key : bytes, optional
        ``[input] hash_ids``: the key of the pseudonyms, stored as column ``node_pseudonym`` of ``nodes.parquet``
        so that no later stage hashes again.

    Returns
    -------
    dict
        The content of ``ingest.json``.

    Raises
    ------
    EdgeTableError
        See :func:`check_edge_tables`; also null ids (unless dropped), bad weights (null, NaN, infinite, zero or
        negative), and tables with no usable edge, each with a count and example rows.

    Warns
    -----
    GraphDataWarning
        When rows were dropped (null ids, self-loops) or merged (duplicates), with the counts.
    """
    t0 = time.perf_counter()
    tables = [EdgeTable.of(t) for t in tables]
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    info = check_edge_tables(tables)
    window = window or {}
    params = _window_params(window, directed)
    where = tables[0].path if len(tables) == 1 else f"{len(tables)} edge tables"
    con = work_connection(out_dir / "duckdb_tmp", threads=threads, memory_limit=memory_limit)
    try:
        datasets = _raw_view(con, tables, info["id_type"])
        _run(con, "windowed_edges", params, create="temp table windowed")
        del datasets  # read whole into the table
        checked = _CHECKED.get(_checks_key(tables, info["files"], drop_null_ids, window))
        if checked is not None:  # the preflight of this run checked these rows: no second pass over them
            n_rows, n_outside, n_null, n_loops = (checked[k] for k in ("rows", "outside_window", "null_ids",
                                                                      "self_loops"))
        else:
            n_rows, n_outside, n_null, n_loops = _check_rows(con, tables, drop_null_ids, where, window)
        _run(con, "edges", params, create="table edges")
        n_distinct, n_kept = (int(x or 0) for x in con.sql("select count(*), sum(n_rows) from edges").fetchall()[0])
        con.execute("create table nodes as " + load_sql("nodes"))
        n_nodes = int(con.sql("select count(*) from nodes").fetchall()[0][0])
        if n_nodes >= 2**31 - 1:
            raise EdgeTableError(f"{where}: {n_nodes} nodes exceed the int32 node index")
        _write_nodes(con, out_dir / "nodes.parquet", hash_key)
        kinds = dict(con.sql("select node_kind, count(*) from nodes group by node_kind order by 1").fetchall())
        weighted = any(t.weight for t in tables) or params["half_life_days"] is not None
        n_entries = n_distinct if directed else 2 * n_distinct
        # Streamed batches keep the ORDER BY only while insertion order is preserved (work_connection turns it off)
        con.execute("set preserve_insertion_order = true")
        sql = load_sql("edge_index")  # a relation, not a DB-API result: streamed without an extra copy
        indptr, indices, wts = _fetch_adjacency(con.sql(sql, params=bind(sql, params)), n_nodes, n_entries, weighted)
    except duckdb.Error as exc:
        raise _read_error(tables, info["id_type"], where, exc) from None
    finally:
        con.close()
    graph = AdjacencyArrays.from_arrays(indptr, indices, wts, directed=directed)
    graph.save(out_dir / "graph")
    n_merged = n_kept - n_distinct
    all_files = [f for fs in info["files"] for f in fs]
    problems = [f"{n} {what}" for n, what in ((n_null, "rows with a null id dropped"),
                                              (n_loops, "self-loops dropped"),
                                              (n_merged, "duplicate edges merged")) if n]
    result = {
        "tables": [t.__dict__ for t in tables],
        "files": [str(f) for f in all_files],
        "fingerprint": fingerprint_files(all_files),
        "id_type": info["id_type"],
        "directed": bool(directed),
        "weighted": weighted,
        "hashed_ids": hash_key is not None,
        "window": {k: (v.isoformat() if hasattr(v, "isoformat") else v) for k, v in window.items()},
        "counts": {
            "rows": n_rows, "outside_window": n_outside, "dropped_null_ids": n_null,
            "dropped_self_loops": n_loops, "merged_duplicates": n_merged, "edges": n_distinct, "nodes": n_nodes,
            "nodes_by_kind": kinds, "adjacency_entries": graph.n_edges,
        },
        "warnings": [f"{where}: {p}" for p in problems],
        "seconds": round(time.perf_counter() - t0, 3),
    }
    if problems:
        warnings.warn(f"{where}: " + ", ".join(problems), GraphDataWarning, stacklevel=2)
    fault_point("ingest")  # graph written, completion marker not yet
    write_json_atomic(out_dir / "ingest.json", result)
    return result


def ingest_edges(edges: str, out_dir, *, source: str, target: str, weight: str | None = None,
                 directed: bool = False, drop_null_ids: bool = False, threads: int | None = None) -> dict[str, Any]:
    """:func:`ingest_tables` for one table whose nodes are all of one kind."""
    return ingest_tables([EdgeTable(edges, source, target, weight)], out_dir, directed=directed,
                         drop_null_ids=drop_null_ids, threads=threads)
