"""The versioned embedding store: numbered Parquet versions plus a DuckDB catalog.

Layout of a store folder::

    catalog.duckdb                      versions table, `embeddings` view (current), `embeddings_vNNNNNN` views
    versions/000001/embeddings.parquet  node_id (the input's own type), vector (fixed-size list of float32)
    work/                               scratch of runs in progress (ingest, graph, walk corpus)

A version becomes visible only when complete. Its Parquet file is written under a temporary name and renamed
into place; the catalog is then rebuilt in a copy, in one transaction, and the copy renamed over the old catalog.
Readers that opened the old catalog keep seeing the old version whole; readers that open after the rename see the
new one whole.
"""

from __future__ import annotations

import fcntl
import json
import os
import shutil
import time
from contextlib import contextmanager
from datetime import datetime, timezone
from importlib.metadata import PackageNotFoundError, version as _pkg_version
from pathlib import Path
from typing import Any

import duckdb
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from .errors import StoreError
from .faults import fault_point
from .sql import load_sql

__all__ = ["connect", "publish_embeddings", "list_versions", "read_version", "store_lock", "clean_stale", "CATALOG"]

CATALOG = "catalog.duckdb"
_LOCK = ".lock"


def _package_version() -> str:
    try:
        return _pkg_version("graphkit")
    except PackageNotFoundError:  # running from a source tree without installing
        return "0+unknown"


def _sql_literal(text: str) -> str:
    return "'" + text.replace("'", "''") + "'"


def _version_dir(version: int) -> str:
    return f"versions/{version:06d}"


@contextmanager
def store_lock(store):
    """Hold the store's writer lock (``fcntl`` on ``STORE/.lock``) or raise ``StoreError`` naming its owner."""
    store = Path(store)
    store.mkdir(parents=True, exist_ok=True, mode=0o755)
    path = store / _LOCK
    fd = os.open(path, os.O_RDWR | os.O_CREAT | os.O_NOFOLLOW, 0o644)
    try:
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            owner = os.pread(fd, 64, 0).decode(errors="replace").strip() or "unknown"
            raise StoreError(f"{store}: another refresh holds the store lock (pid {owner}); "
                             "wait for it to finish") from None
        os.ftruncate(fd, 0)
        os.pwrite(fd, str(os.getpid()).encode(), 0)
        yield
    finally:
        os.close(fd)  # closing releases the flock; a killed owner's lock vanishes with its process


def connect(store, *, version: int | None = None) -> duckdb.DuckDBPyConnection:
    """Open a store's catalog read-only: views ``embeddings`` (current version, or ``version``), ``versions``,
    and ``embeddings_vNNNNNN`` for every complete version.

    The connection is confined to the store folder (``enable_external_access = false`` with
    ``allowed_directories`` set to the store): queries cannot read or write files elsewhere.

    Parameters
    ----------
    store : path
        The store folder.
    version : int, optional
        Point ``embeddings`` at this version instead of the current one.

    Raises
    ------
    StoreError
        When the folder holds no catalog, or the version is not a complete one.
    """
    path = Path(store) / CATALOG
    if not path.exists():
        raise StoreError(f"{store}: no embedding store here (no {CATALOG}); run `graphkit refresh` first")
    con = duckdb.connect(str(path), read_only=True)
    # Confine the session to the store: no reads or writes elsewhere, no extensions; the setting cannot be
    # switched back on by a query.
    con.execute("set allowed_directories = $dirs", {"dirs": [str(Path(store).resolve()) + os.sep]})
    con.execute("set enable_external_access = false")
    if version is not None:
        rows = con.execute("select path, dim from versions where version = $v and status = 'complete'",
                           {"v": int(version)}).fetchall()
        if not rows:
            con.close()
            raise StoreError(f"{store}: no complete version {version}")
        rel_path, dim = rows[0]
        con.execute(load_sql("embeddings").format(
            kind="temp ", view="embeddings", path=_sql_literal(str((Path(store) / rel_path).resolve())), dim=int(dim)))
    return con


def _rows_as_dicts(con, query: str, params=None) -> list[dict[str, Any]]:
    res = con.execute(query, params or {})
    cols = [d[0] for d in res.description]
    out = []
    for row in res.fetchall():
        d = dict(zip(cols, row))
        for k, v in d.items():
            if k in ("params", "input_fingerprint", "counts", "timings", "metrics") and isinstance(v, str):
                d[k] = json.loads(v)
        out.append(d)
    return out


def list_versions(store) -> list[dict[str, Any]]:
    """Every version in the catalog, oldest first, as dicts (JSON columns decoded)."""
    con = connect(store)
    try:
        return _rows_as_dicts(con, "select * from versions order by version")
    finally:
        con.close()


def current_version(store) -> int | None:
    con = connect(store)
    try:
        rows = con.execute("select version from versions where is_current").fetchall()
        return rows[0][0] if rows else None
    finally:
        con.close()


def read_version(store, version: int | None = None) -> tuple[pa.Array, np.ndarray]:
    """The node ids (Arrow array, the input's own type) and the float32 vectors [n_nodes, dim] of a version."""
    con = connect(store)
    try:
        if version is None:
            rows = con.execute("select path, dim from versions where is_current").fetchall()
        else:
            rows = con.execute("select path, dim from versions where version = $v and status = 'complete'",
                               {"v": int(version)}).fetchall()
    finally:
        con.close()
    if not rows:
        raise StoreError(f"{store}: " + ("no current version" if version is None else f"no complete version {version}"))
    table = pq.read_table(Path(store) / rows[0][0])
    vec = table.column("vector").combine_chunks()
    dim = int(rows[0][1])
    return table.column("node_id").combine_chunks(), vec.flatten().to_numpy().reshape(-1, dim)


def _write_version_file(store: Path, version: int, node_ids: pa.Array, vectors: np.ndarray,
                        node_kinds: pa.Array | None = None) -> str:
    final_dir = store / _version_dir(version)
    tmp_dir = store / "versions" / f".tmp-{version:06d}-{os.getpid()}"
    if final_dir.exists():  # a dead run renamed its file but never reached the catalog: not visible, replace it
        shutil.rmtree(final_dir)
    shutil.rmtree(tmp_dir, ignore_errors=True)
    tmp_dir.mkdir(parents=True, mode=0o755)
    n, dim = vectors.shape
    flat = pa.array(np.ascontiguousarray(vectors, dtype=np.float32).reshape(-1))
    kinds = node_kinds if node_kinds is not None else pa.array(["node"] * n, pa.string())
    table = pa.table({"node_id": node_ids, "node_kind": kinds.cast(pa.string()),
                      "vector": pa.FixedSizeListArray.from_arrays(flat, dim)})
    pq.write_table(table, tmp_dir / "embeddings.parquet", compression="zstd", row_group_size=100_000)
    with open(tmp_dir / "embeddings.parquet", "rb") as fh:
        os.fsync(fh.fileno())
    os.replace(tmp_dir, final_dir)
    return f"{_version_dir(version)}/embeddings.parquet"


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
    return removed


def _next_version(catalog: Path) -> int:
    if not catalog.exists():
        return 1
    con = duckdb.connect(str(catalog), read_only=True)
    try:
        return int(con.execute("select coalesce(max(version), 0) + 1 from versions").fetchall()[0][0])
    finally:
        con.close()


def _rebuild_catalog(store: Path, row: dict[str, Any], make_current: bool) -> None:
    """Copy the catalog, apply one transaction to the copy, rename the copy over the original."""
    catalog = store / CATALOG
    tmp = store / f".{CATALOG}.tmp-{os.getpid()}"
    tmp.unlink(missing_ok=True)
    if catalog.exists():
        shutil.copyfile(catalog, tmp)
    con = duckdb.connect(str(tmp))
    try:
        con.execute("begin transaction")
        con.execute(load_sql("versions"))
        if make_current:
            con.execute("update versions set is_current = false where is_current")
        cols = ", ".join(row)
        con.execute(f"insert into versions ({cols}) values ({', '.join('$' + k for k in row)})", row)
        if row["status"] == "complete":
            abs_path = _sql_literal(str((store / row["path"]).resolve()))
            con.execute(load_sql("embeddings").format(kind="", view=f"embeddings_v{row['version']:06d}",
                                                      path=abs_path, dim=int(row["dim"])))
            if make_current:
                con.execute(load_sql("embeddings").format(kind="", view="embeddings", path=abs_path, dim=int(row["dim"])))
        con.execute("commit")
        con.execute("checkpoint")
    finally:
        con.close()
    with open(tmp, "rb") as fh:
        os.fsync(fh.fileno())
    os.replace(tmp, catalog)


def publish_embeddings(store, node_ids: pa.Array, vectors: np.ndarray, *, params: dict, fingerprint: list,
                       counts: dict, timings: dict, metrics: dict | None = None,
                       objective: str | None = None, node_kinds: pa.Array | None = None) -> int:
    """Publish a complete new version and make it current.

    Parameters
    ----------
    store : path
        The store folder (created if needed).
    node_ids : pyarrow.Array, length n_nodes
        Original node ids in the input's own type, in node_idx order.
    node_kinds : pyarrow.Array of str, length n_nodes, optional
        The kind of each node (default ``"node"``).
    vectors : ndarray of float32, shape (n_nodes, dim)
    params, fingerprint, counts, timings, metrics : JSON-serialisable
        Recorded in the version's catalog row.

    Returns
    -------
    int
        The new version number.
    """
    store = Path(store)
    if len(node_ids) != vectors.shape[0]:
        raise ValueError(f"node_ids has {len(node_ids)} entries but vectors has {vectors.shape[0]} rows")
    if not np.all(np.isfinite(vectors)):
        raise ValueError("refusing to publish vectors with NaN or infinite values")
    store.mkdir(parents=True, exist_ok=True, mode=0o755)
    t0 = time.perf_counter()
    version = _next_version(store / CATALOG)
    rel_path = _write_version_file(store, version, node_ids, vectors, node_kinds)
    timings = {**timings, "publish": round(time.perf_counter() - t0, 3)}
    row = {
        "version": version, "created_at": datetime.now(timezone.utc).replace(tzinfo=None),
        "status": "complete", "is_current": True, "path": rel_path,
        "n_nodes": int(vectors.shape[0]), "dim": int(vectors.shape[1]), "objective": objective,
        "params": json.dumps(params, default=str), "input_fingerprint": json.dumps(fingerprint, default=str),
        "counts": json.dumps(counts, default=str), "timings": json.dumps(timings),
        "metrics": json.dumps(metrics or {}), "package_version": _package_version(), "message": None,
    }
    fault_point("publish")  # version file in place, catalog not yet switched
    _rebuild_catalog(store, row, make_current=True)
    return version
