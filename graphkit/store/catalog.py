"""The catalog of a store: its versions (publish, failed runs, retention, pins, promote) and reading them back.

A version becomes visible only when complete. Everything of it is written in a temporary folder renamed into
place; the catalog is then rebuilt in a copy, in one transaction (new row, current version, retention), and the
copy renamed over the old catalog; each rename is followed by an fsync of its folder (:func:`replace_durably`).
Readers that opened the old catalog keep seeing the old version whole; readers that open after the rename see the
new one whole. Every catalog writer holds the writer lock (:func:`graphkit.store.lock.store_lock`), and a publish
is idempotent per run id.
"""

from __future__ import annotations

import json
import os
import shutil
import time
import uuid
from datetime import datetime, timezone
from importlib.metadata import PackageNotFoundError, version as _pkg_version
from pathlib import Path
from typing import Any

import duckdb
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from ..errors import StoreError
from ..faults import fault_point
from ..sql import Identifier, inline, load_sql
from . import lock
from .lock import WRITERS, store_lock

__all__ = ["publish_embeddings", "record_failed_run", "version_of_run", "list_versions", "current_version",
           "version_row", "read_table", "read_version", "gather_rows", "promote_version", "pin_version",
           "apply_retention", "clean_stale", "diagnostic_arrays", "load_diagnostics", "CATALOG"]

CATALOG = "catalog.duckdb"


def _package_version() -> str:
    try:
        return _pkg_version("graphkit")
    except PackageNotFoundError:  # running from a source tree without installing
        return "0+unknown"


def _version_dir(version: int) -> str:
    return f"versions/{version:06d}"


_JSON_COLUMNS = ("params", "input_fingerprint", "counts", "timings", "metrics")


def _rows_as_dicts(con, query: str, params=None) -> list[dict[str, Any]]:
    res = con.execute(query, params or {})
    cols = [d[0] for d in res.description]
    out = []
    for row in res.fetchall():
        d = dict(zip(cols, row))
        for k in _JSON_COLUMNS:
            if isinstance(d.get(k), str):
                d[k] = json.loads(d[k])
        out.append(d)
    return out


def _open_catalog(store) -> duckdb.DuckDBPyConnection:
    path = Path(store) / CATALOG
    if not path.exists():
        raise StoreError(f"{store}: no embedding store here (no {CATALOG}); run `graphkit refresh` first")
    return duckdb.connect(str(path), read_only=True)


def list_versions(store) -> list[dict[str, Any]]:
    """Every version in the catalog, oldest first, as dicts (JSON columns decoded)."""
    con = _open_catalog(store)
    try:
        return _rows_as_dicts(con, "select * from versions order by version")
    finally:
        con.close()


def current_version(store) -> int | None:
    """The current version's number, or None when the store has none."""
    if not (Path(store) / CATALOG).exists():
        return None
    con = _open_catalog(store)
    try:
        rows = con.execute("select version from versions where is_current").fetchall()
        return rows[0][0] if rows else None
    finally:
        con.close()


def version_row(store, version: int | None) -> dict[str, Any]:
    """The catalog row of a complete version (the current one by default); ``StoreError`` otherwise."""
    con = _open_catalog(store)
    try:
        if version is None:
            rows = _rows_as_dicts(con, "select * from versions where is_current")
        else:
            rows = _rows_as_dicts(con, "select * from versions where version = $v", {"v": int(version)})
    finally:
        con.close()
    if not rows:
        raise StoreError(f"{store}: " + ("no current version" if version is None else f"no version {version}"))
    if rows[0]["status"] != "complete":
        raise StoreError(f"{store}: version {rows[0]['version']} is {rows[0]['status']}, not complete")
    return rows[0]


def read_table(store, version: int | None = None) -> pa.Table:
    """A version's table (node_id, node_kind, provisional, vector) as Arrow; the current one by default."""
    row = version_row(store, version)
    return pq.read_table(Path(store) / row["path"])


def read_version(store, version: int | None = None) -> tuple[pa.Array, np.ndarray]:
    """The node ids (Arrow array, the input's own type) and the float32 vectors [n_nodes, dim] of a version."""
    table = read_table(store, version)
    vec = table.column("vector").combine_chunks()
    dim = vec.type.list_size
    return table.column("node_id").combine_chunks(), vec.flatten().to_numpy().reshape(-1, dim)


def _version_table(node_ids, vectors, node_kinds, provisional) -> pa.Table:
    n, dim = vectors.shape
    flat = pa.array(np.ascontiguousarray(vectors, dtype=np.float32).reshape(-1))
    kinds = node_kinds if node_kinds is not None else pa.array(["node"] * n, pa.string())
    prov = pa.array(np.zeros(n, bool) if provisional is None else np.asarray(provisional, bool))
    return pa.table({"node_id": node_ids, "node_kind": kinds.cast(pa.string()), "provisional": prov,
                     "vector": pa.FixedSizeListArray.from_arrays(flat, dim)})


def _write_version_files(store: Path, version: int, table: pa.Table, diagnostics: dict | None = None,
                         neighbours: int | None = None) -> tuple[str, dict | None]:
    """Write everything of a version aside (Parquet file, native DuckDB copy, diagnostics, and with
    ``neighbours`` the neighbour index and table of :mod:`graphkit.neighbours`), then rename the folder into
    place; nothing is added to it afterwards. Returns the Parquet file's path in the store and the neighbour
    table's figures (None without)."""
    final_dir = store / _version_dir(version)
    tmp_dir = store / "versions" / f".tmp-{version:06d}-{os.getpid()}"
    if final_dir.exists():  # a dead run renamed its folder but never reached the catalog: not visible, replace it
        shutil.rmtree(final_dir)
    shutil.rmtree(tmp_dir, ignore_errors=True)
    tmp_dir.mkdir(parents=True, mode=0o755)
    pq.write_table(table, tmp_dir / "embeddings.parquet", compression="zstd", row_group_size=100_000)
    dim = table.schema.field("vector").type.list_size
    con = duckdb.connect(str(tmp_dir / "embeddings.duckdb"))
    try:
        con.register("version_rows", table)
        con.execute(inline(load_sql("version_embeddings"), {"dim": int(dim)}))
        con.execute("checkpoint")
    finally:
        con.close()
    names = ["embeddings.parquet", "embeddings.duckdb"]
    figures = None
    if neighbours is not None:
        from ..neighbours import INDEX_FILE, TABLE_FILE, write_neighbours

        figures = write_neighbours(tmp_dir, neighbours)
        names += [INDEX_FILE, TABLE_FILE]
    if diagnostics:
        np.savez_compressed(tmp_dir / "diagnostics.npz", **diagnostics)
        names.append("diagnostics.npz")
    for name in names:
        with open(tmp_dir / name, "rb") as fh:
            os.fsync(fh.fileno())
    lock.fsync_dir(tmp_dir)
    lock.replace_durably(tmp_dir, final_dir)
    fault_point("publish-version-renamed")  # the version's folder in place, the catalog not yet switched
    return f"{_version_dir(version)}/embeddings.parquet", figures


def clean_stale(store) -> list[str]:
    """Remove what a killed writer left behind: temporary version folders, catalog copies, stage scratch.

    Call it only while holding :func:`store_lock`. Returns the removed paths.
    """
    store = Path(store)
    removed = []
    for p in list(store.glob("versions/.tmp-*")) + list(store.glob(f".{CATALOG}.tmp-*")) \
            + list(store.glob("work/*/duckdb_tmp")) + list(store.glob("work/*/*.tmp-*")) \
            + list(store.glob("work/*/.*.tmp")):
        if p.is_dir() and not p.is_symlink():
            shutil.rmtree(p, ignore_errors=True)
        else:
            p.unlink(missing_ok=True)
        removed.append(str(p))
    return removed + _sweep_versions(store)


def _sweep_versions(store: Path) -> list[str]:
    """Remove version folders no reader can reach: those of expired versions (retention marks them in the
    catalog switch and deletes them after it) and those numbered above every catalog row (a publish killed
    after renaming its folder into place, before the switch). Call it only while holding the lock."""
    if not (store / CATALOG).exists():
        return []
    con = _open_catalog(store)
    try:
        expired = {v for (v,) in con.execute("select version from versions where status = 'expired'").fetchall()}
        top = con.execute("select coalesce(max(version), 0) from versions").fetchall()[0][0]
    finally:
        con.close()
    removed = []
    for folder in sorted((store / "versions").glob("[0-9]" * 6)):
        v = int(folder.name)
        if (v in expired or v > top) and folder.is_dir() and not folder.is_symlink():
            shutil.rmtree(folder, ignore_errors=True)
            removed.append(str(folder))
    return removed



def neighbour_table(store: Path, rel_path: str) -> Path | None:
    """The neighbour table of a version (from its catalog path), or None when it was published without one."""
    path = (Path(store) / rel_path).resolve().parent / "neighbours.parquet"
    return path if path.exists() else None


def _next_version(con) -> int:
    return int(con.execute("select coalesce(max(version), 0) + 1 from versions").fetchall()[0][0])


def _create_views(con, store: Path) -> None:
    """(Re)create the Parquet-backed views and the macros from the versions table, inside the caller's
    transaction: one view per kept complete version, ``embeddings`` for the current one."""
    for (name,) in con.execute("select view_name from duckdb_views() where not temporary and "
                               "(view_name like 'embeddings%' or view_name like 'neighbours%')").fetchall():
        con.execute(inline("drop view $view", {"view": Identifier(name)}))  # a name cannot be bound
    rows = con.execute("select version, path, dim, is_current from versions where status = 'complete'").fetchall()
    for v, rel_path, dim, is_current in rows:
        path = str((store / rel_path).resolve())  # absolute: a relative path would be read from the reader's cwd
        for view in [f"embeddings_v{v:06d}"] + (["embeddings"] if is_current else []):
            con.execute(inline(load_sql("embeddings"), {"view": Identifier(view), "path": path, "dim": int(dim)}))
        table = neighbour_table(store, rel_path)
        if table is not None:  # published with [store] neighbours
            for view in [f"neighbours_v{v:06d}"] + (["neighbours"] if is_current else []):
                con.execute(inline(load_sql("neighbours"), {"view": Identifier(view), "path": str(table)}))
    if any(r[3] for r in rows):
        con.execute(load_sql("macros"))


def _update_catalog(store: Path, apply) -> Any:
    """Copy the catalog, run ``apply(con)`` and the view rebuild in one transaction on the copy, then rename the
    copy over the catalog: readers see the old state or the new one, whole. Returns what ``apply`` returns."""
    catalog = store / CATALOG
    tmp = store / f".{CATALOG}.tmp-{os.getpid()}"
    tmp.unlink(missing_ok=True)
    if catalog.exists():
        shutil.copyfile(catalog, tmp)
    con = duckdb.connect(str(tmp))
    try:
        con.execute("begin transaction")
        con.execute(load_sql("versions"))
        con.execute("alter table versions add column if not exists run_id varchar")  # catalogs from before it
        result = apply(con)
        _create_views(con, store)
        con.execute("commit")
        con.execute("checkpoint")
    except BaseException:
        con.close()
        tmp.unlink(missing_ok=True)
        raise
    con.close()
    with open(tmp, "rb") as fh:
        os.fsync(fh.fileno())
    fault_point("publish")  # new catalog complete, not yet switched in
    lock.replace_durably(tmp, catalog)
    return result


def _row(version: int, status: str, *, params, fingerprint, counts, timings, metrics, objective, message=None,
         path=None, n_nodes=None, dim=None, is_current=False, run_id=None) -> dict[str, Any]:
    return {
        "version": version, "created_at": datetime.now(timezone.utc).replace(tzinfo=None),
        "status": status, "is_current": is_current, "pinned": False, "path": path,
        "n_nodes": n_nodes, "dim": dim, "objective": objective,
        "params": json.dumps(params, default=str), "input_fingerprint": json.dumps(fingerprint, default=str),
        "counts": json.dumps(counts, default=str), "timings": json.dumps(timings, default=str),
        "metrics": json.dumps(metrics or {}, default=str), "package_version": _package_version(),
        "message": message, "run_id": run_id,
    }


def _insert(con, row: dict) -> None:
    con.execute(load_sql("version_row"), row)


def version_of_run(store, run_id: str) -> tuple[int, str] | None:
    """(version, status) of the catalog row a run with this id recorded, or None when it recorded none."""
    if not run_id or not (Path(store) / CATALOG).exists():
        return None
    con = _open_catalog(store)
    try:
        cols = {c for (c,) in con.execute("select column_name from duckdb_columns() "
                                           "where table_name = 'versions'").fetchall()}
        if "run_id" not in cols:
            return None
        rows = con.execute("select version, status from versions where run_id = $r order by version",
                           {"r": str(run_id)}).fetchall()
    finally:
        con.close()
    return (int(rows[0][0]), rows[0][1]) if rows else None


def _expire(con, keep: int) -> list[int]:
    """Mark all but the ``keep`` newest complete versions (and the current and pinned ones) ``expired``, inside
    the caller's catalog transaction. Returns their numbers; their folders go after the switch."""
    rows = con.execute("select version, is_current, pinned from versions where status = 'complete' "
                       "order by version desc").fetchall()
    drop = [v for i, (v, cur, pin) in enumerate(rows) if i >= keep and not cur and not pin]
    for v in drop:
        con.execute("update versions set status = 'expired' where version = $v", {"v": v})
    return drop


def _check_keep(keep) -> None:
    if int(keep) < 1:
        raise StoreError(f"[store] keep must be >= 1, got {keep}")


def diagnostic_arrays(*, degrees, visit_counts=None, labels=None) -> dict[str, np.ndarray]:
    """Per-node figures the report draws later (degree, walk visits, first label), as stored in a version's
    ``diagnostics.npz`` (pass them to :func:`publish_embeddings`)."""
    arrays = {"degrees": np.asarray(degrees, np.int64)}
    if visit_counts is not None:
        arrays["visit_counts"] = np.asarray(visit_counts, np.int64)
    if labels is not None:
        arrays["labels"] = np.array(["" if x is None else str(x) for x in labels])
    return arrays


def publish_embeddings(store, node_ids: pa.Array, vectors: np.ndarray, *, params: dict, fingerprint: list,
                       counts: dict, timings: dict, metrics: dict | None = None, objective: str | None = None,
                       node_kinds: pa.Array | None = None, provisional=None, keep: int | None = None,
                       run_id: str | None = None, diagnostics: dict | None = None,
                       neighbours: int | None = None) -> int:
    """Publish a complete new version and make it current.

    Holds the store's writer lock (re-entrant: a refresh already holds it). Everything of the version is
    written before it becomes visible; the catalog switch makes it current and applies retention in one
    transaction.

    Parameters
    ----------
    store : path
        The store folder (created if needed).
    node_ids : pyarrow.Array, length n_nodes
        Original node ids in the input's own type, in node_idx order.
    vectors : ndarray of float32, shape (n_nodes, dim)
    node_kinds : pyarrow.Array of str, length n_nodes, optional
        The kind of each node (default ``"node"``).
    provisional : array_like of bool, length n_nodes, optional
        Rows whose vector was folded in from neighbours rather than trained (default: none).
    params, fingerprint, counts, timings, metrics : JSON-serialisable
        Recorded in the version's catalog row (its lineage).
    keep : int, optional
        Retention: keep this many complete versions (plus the current and pinned ones); see
        :func:`apply_retention`.
    run_id : str, optional
        The run's id, recorded in the version's row. A retry of the same run (same id) whose earlier attempt
        got through the catalog switch gets that version back instead of publishing the vectors twice.
        Default: a fresh id (every call publishes).
    diagnostics : dict of str to ndarray, optional
        Per-node figures for the report (:func:`diagnostic_arrays`), stored in the version's folder.
    neighbours : int, optional
        Also write every node's this many nearest neighbours (``neighbours.parquet``) and their index
        (``neighbours.index``) into the version's folder before it becomes visible (:mod:`graphkit.neighbours`);
        the catalog then has the view ``neighbours`` over the current version's table.

    Returns
    -------
    int
        The new version number (or the one this run already published).
    """
    store = Path(store)
    if len(node_ids) != vectors.shape[0]:
        raise ValueError(f"node_ids has {len(node_ids)} entries but vectors has {vectors.shape[0]} rows")
    if not np.all(np.isfinite(vectors)):
        raise ValueError("refusing to publish vectors with NaN or infinite values")
    if keep is not None:
        _check_keep(keep)
    run_id = str(run_id) if run_id else uuid.uuid4().hex
    with store_lock(store, purpose="publish"), WRITERS:
        known = version_of_run(store, run_id)
        if known is not None and known[1] != "failed":
            _sweep_versions(store)  # an attempt killed or failed after the switch may have left expired folders
            return known[0]
        t0 = time.perf_counter()
        table = _version_table(node_ids, vectors, node_kinds, provisional)
        version = 1
        if (store / CATALOG).exists():
            con = _open_catalog(store)
            try:
                version = _next_version(con)
            finally:
                con.close()
        rel_path, figures = _write_version_files(store, version, table, diagnostics, neighbours)
        timings = {**timings, "publish": round(time.perf_counter() - t0, 3)}
        if figures is not None:
            # its seconds are part of the publish's: kept beside the counts, not summed twice in the timings
            counts = {**counts, "neighbours": {"top": figures["top"], "rows": figures["rows"],
                                               "seconds": figures["seconds"]}}
        row = _row(version, "complete", params=params, fingerprint=fingerprint, counts=counts, timings=timings,
                   metrics=metrics, objective=objective, path=rel_path, n_nodes=int(vectors.shape[0]),
                   dim=int(vectors.shape[1]), is_current=True, run_id=run_id)

        def apply(con):
            con.execute("update versions set is_current = false where is_current")
            _insert(con, row)
            return _expire(con, int(keep)) if keep is not None else []

        expired = _update_catalog(store, apply)
        fault_point("publish-catalog-switched")  # visible and current; expired folders not yet removed
        for v in expired:
            shutil.rmtree(store / _version_dir(v), ignore_errors=True)
    return version


def record_failed_run(store, *, message: str, params: dict, fingerprint: list, counts: dict, timings: dict,
                      metrics: dict | None = None, objective: str | None = None, run_id: str | None = None) -> int:
    """Record a run that was refused (e.g. by a quality gate) as a ``failed`` version; the current one stays.

    Holds the writer lock; a retry of the same ``run_id`` gets the version already recorded."""
    store = Path(store)
    run_id = str(run_id) if run_id else uuid.uuid4().hex
    with store_lock(store, purpose="refresh"), WRITERS:
        known = version_of_run(store, run_id)
        if known is not None:
            return known[0]

        def apply(con):
            version = _next_version(con)
            _insert(con, _row(version, "failed", params=params, fingerprint=fingerprint, counts=counts,
                              timings=timings, metrics=metrics, objective=objective, message=message,
                              run_id=run_id))
            return version

        return _update_catalog(store, apply)


def _check_version(con, store, version: int, *, complete=True) -> None:
    rows = con.execute("select status from versions where version = $v", {"v": int(version)}).fetchall()
    if not rows:
        raise StoreError(f"{store}: no version {version}")
    if complete and rows[0][0] != "complete":
        raise StoreError(f"{store}: version {version} is {rows[0][0]}, not a complete version")


def promote_version(store, version: int, *, wait: float = 0.0) -> None:
    """Make an older complete (kept) version current again.

    Holds the writer lock, waiting up to ``wait`` seconds for another writer (a refresh) to finish."""
    store = Path(store)
    _open_catalog(store).close()  # a store that is not there is not created by taking its lock

    def apply(con):
        _check_version(con, store, version)
        con.execute("update versions set is_current = (version = $v)", {"v": int(version)})

    with store_lock(store, wait=wait, purpose="promote"), WRITERS:
        _update_catalog(store, apply)


def pin_version(store, version: int, pinned: bool = True, *, wait: float = 0.0) -> None:
    """Pin a version (retention never deletes it) or unpin it; holds the writer lock like :func:`promote_version`."""
    store = Path(store)
    _open_catalog(store).close()

    def apply(con):
        _check_version(con, store, version, complete=False)
        con.execute("update versions set pinned = $p where version = $v", {"p": bool(pinned), "v": int(version)})

    with store_lock(store, wait=wait, purpose="pin"), WRITERS:
        _update_catalog(store, apply)


def apply_retention(store, keep: int, *, wait: float = 0.0) -> list[int]:
    """Keep the ``keep`` newest complete versions plus the current and pinned ones; mark the others ``expired``.

    A publish applies the same rule inside its own catalog switch (``keep=``); this is the rule on its own.
    Their files are deleted only after the new catalog, which no longer points at them, is in place. Returns
    the expired version numbers.
    """
    _check_keep(keep)
    store = Path(store)
    _open_catalog(store).close()
    with store_lock(store, wait=wait, purpose="retention"), WRITERS:
        drop = _update_catalog(store, lambda con: _expire(con, int(keep)))
        for v in drop:
            shutil.rmtree(store / _version_dir(v), ignore_errors=True)
    return drop


def gather_rows(pf: pq.ParquetFile, old_rows: np.ndarray, out: np.ndarray, dim: int) -> None:
    """``out[i] = vector[old_rows[i]]`` of the Parquet file, reading its vector column one row group at a time."""
    order = np.argsort(old_rows, kind="stable")
    sorted_rows = old_rows[order]
    start = 0
    for group in range(pf.num_row_groups):
        stop = start + pf.metadata.row_group(group).num_rows
        lo, hi = np.searchsorted(sorted_rows, [start, stop])
        if hi > lo:
            column = pf.read_row_group(group, columns=["vector"]).column("vector").combine_chunks()
            block = column.flatten().to_numpy().reshape(-1, dim)
            out[order[lo:hi]] = block[sorted_rows[lo:hi] - start]
            del column, block
        start = stop


def load_diagnostics(store, version: int) -> dict[str, np.ndarray]:
    path = Path(store) / _version_dir(version) / "diagnostics.npz"
    if not path.exists():
        return {}
    with np.load(path, allow_pickle=False) as z:
        return {k: z[k] for k in z.files}
