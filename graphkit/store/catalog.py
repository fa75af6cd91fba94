"""The versioned embedding store: numbered Parquet versions plus a DuckDB catalog.

Layout of a store folder::

    catalog.duckdb                      versions table; views `embeddings` (current) and `embeddings_vNNNNNN`;
                                        macros `cosine_similarity`, `nearest_neighbours`, `pair_similarity`
    versions/000001/embeddings.parquet  node_id (the input's own type), node_kind, provisional, vector
                                        (fixed-size list of float32): the table downstream jobs read
    versions/000001/embeddings.duckdb   the same rows as a native DuckDB table, attached by `connect` for fast SQL
    work/                               scratch of runs in progress (ingest, graph, walk corpus)

A version becomes visible only when complete. Everything of it is written in a temporary folder renamed into
place; the catalog is then rebuilt in a copy, in one transaction (new row, current version, retention), and the
copy renamed over the old catalog; each rename is followed by an fsync of its folder. Readers that opened the old
catalog keep seeing the old version whole; readers that open after the rename see the new one whole. Every
catalog writer holds the writer lock (:func:`store_lock`), and a publish is idempotent per run id.
"""

from __future__ import annotations

import fcntl
import json
import os
import shutil
import threading
import time
import uuid
from contextlib import contextmanager
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
from ..sql import load_sql

__all__ = ["connect", "publish_embeddings", "record_failed_run", "version_of_run", "list_versions", "read_version",
           "promote_version", "pin_version", "apply_retention", "store_lock", "clean_stale", "diagnostic_arrays",
           "CATALOG"]

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


#: Seconds a writer that finds the lock taken keeps re-reading the holder's pid when the lock file names no
#: live process yet: the winner of a simultaneous start writes its pid a moment after taking the lock.
_HOLDER_SETTLE_SECONDS = 1.0

# The locks this process holds, by resolved store path: [pid, fd, depth]. The lock is re-entrant within the
# process that holds it (a refresh holds it for the whole run; the publish inside takes it again), and a forked
# child, whose pid differs, does not inherit the ownership.
_HELD: dict[str, list] = {}
_HELD_GUARD = threading.Lock()
# Catalog writers of one process take turns too (the flock cannot tell its threads apart): a promote in a notebook
# thread while a refresh publishes in another, say.
_WRITERS = threading.RLock()


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # alive, another user's
        return True
    return True


def _lock_holder(fd) -> tuple[int, str] | None:
    """(pid, purpose) the lock file names, when that process is alive; None otherwise."""
    pid_text, _, purpose = os.pread(fd, 256, 0).decode(errors="replace").strip().partition(" ")
    if not pid_text.isdigit() or not _pid_alive(int(pid_text)):
        return None
    return int(pid_text), purpose.strip() or "writer"


def _held_message(store, holder, waited: float) -> str:
    after = f" after waiting {waited:g} s" if waited > 0 else ""
    if holder is None:
        return (f"{store}: another writer holds the store lock (its process is unknown){after}; "
                "wait for it to finish")
    pid, purpose = holder
    return f"{store}: another {purpose} holds the store lock (pid {pid}){after}; wait for it to finish"


def _take_flock(fd, store, wait: float) -> None:
    """Take the flock on ``fd``, waiting up to ``wait`` seconds, or raise ``StoreError`` naming the holder.

    The holder is named only when the lock file holds the pid of a live process; a pid left by a dead writer, or
    no pid yet (the holder took the lock a moment ago), is re-read for up to ``_HOLDER_SETTLE_SECONDS``, after
    which the holder is reported as unknown rather than wrongly.
    """
    start = time.monotonic()
    while True:
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            return
        except BlockingIOError:
            pass
        _refuse_when_due(store, _lock_holder(fd), start, wait)
        time.sleep(0.02)


def _refuse_when_due(store, holder, start: float, wait: float) -> None:
    """Raise ``StoreError`` naming ``holder`` once ``wait`` seconds have passed since ``start`` and the holder is
    known, or ``_HOLDER_SETTLE_SECONDS`` have passed without it being known."""
    elapsed = time.monotonic() - start
    if elapsed >= wait and (holder is not None or elapsed >= _HOLDER_SETTLE_SECONDS):
        raise StoreError(_held_message(store, holder, wait)) from None


def _held_here(store: Path):
    entry = _HELD.get(str(store.resolve()))
    return entry if entry is not None and entry[0] == os.getpid() else None


@contextmanager
def store_lock(store, *, wait: float = 0.0, purpose: str = "refresh"):
    """Hold the store's writer lock (``fcntl.flock`` on ``STORE/.lock``) or raise ``StoreError`` naming its owner.

    Every catalog writer holds it: a refresh for its whole run, and publish, a failed run's record, promote,
    pin and retention for their catalog switch. It is re-entrant within the process that holds it, so these
    functions work both inside a run and on their own.

    Parameters
    ----------
    store : path
        The store folder (created if needed).
    wait : float
        Seconds to wait for another writer to finish before giving up (default 0: refuse at once).
    purpose : str
        What the holder is doing, recorded beside its pid for the message a refused writer gets.
    """
    store = Path(store)
    store.mkdir(parents=True, exist_ok=True, mode=0o755)
    path = store / _LOCK
    key = str(store.resolve())
    start, outer = time.monotonic(), False
    while True:
        # Taking and releasing happen under one guard, so that another thread of this process never sees the
        # flock taken but not yet registered (or unregistered but not yet released) and refuses itself.
        with _HELD_GUARD:
            entry = _held_here(store)
            if entry is not None:
                entry[2] += 1
                break
            try:
                fd = os.open(path, os.O_RDWR | os.O_CREAT | os.O_NOFOLLOW, 0o644)
            except OSError as exc:  # ELOOP: a symlink planted where the lock belongs is never followed
                raise StoreError(f"{path}: cannot open the store lock ({exc.strerror}); a symlink there is "
                                 "refused") from None
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except BlockingIOError:
                holder = _lock_holder(fd)
                os.close(fd)
            else:
                os.ftruncate(fd, 0)
                os.pwrite(fd, f"{os.getpid()} {purpose}".encode(), 0)
                entry = [os.getpid(), fd, 1]
                _HELD[key] = entry
                outer = True
                break
        _refuse_when_due(store, holder, start, float(wait))
        time.sleep(0.02)
    old_mask = os.umask(0o022) if outer else None  # nothing in the store is group- or world-writable
    try:
        yield
    finally:
        with _HELD_GUARD:
            entry[2] -= 1
            if entry[2] == 0:  # the last holder in this process releases the flock
                if _HELD.get(key) is entry:
                    del _HELD[key]
                os.ftruncate(entry[1], 0)  # a released lock names nobody, so a later refusal cannot name a stale pid
                os.close(entry[1])  # closing releases the flock; a killed owner's lock vanishes with its process
        if old_mask is not None:
            os.umask(old_mask)


def check_store_writable(store) -> None:
    """Fail fast, before a run starts, on a store path that cannot work or a store another writer holds.

    Only looks: creates nothing. The run takes the lock for real later (:func:`store_lock`); this check is for a
    clear error within seconds instead of after the run has started.
    """
    store = Path(store)
    if store.exists() and not store.is_dir():
        raise StoreError(f"{store}: [store] path names a file, not a folder")
    existing = next((p for p in [store, *store.parents] if p.exists()), None)
    if existing is not None and not os.access(existing, os.W_OK | os.X_OK):
        raise StoreError(f"{existing}: no permission to write the store here")
    path = store / _LOCK
    if not path.exists() or path.is_symlink() or _held_here(store) is not None:
        return
    try:
        fd = os.open(path, os.O_RDONLY | os.O_NOFOLLOW)
    except OSError:
        return  # store_lock gives the precise error
    try:
        _take_flock(fd, store, 0.0)
    finally:
        os.close(fd)


def _fsync_dir(folder) -> None:
    fd = os.open(folder, os.O_RDONLY | os.O_DIRECTORY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _replace_durably(src, dst) -> None:
    """``os.replace`` followed by an fsync of the folders involved, so the rename itself survives a power cut."""
    src, dst = Path(src), Path(dst)
    os.replace(src, dst)
    _fsync_dir(dst.parent)
    if src.parent.resolve() != dst.parent.resolve():
        _fsync_dir(src.parent)


def _version_files(store: Path, rel_path: str) -> tuple[Path, Path]:
    parquet = (store / rel_path).resolve()
    return parquet, parquet.with_suffix(".duckdb")


def connect(store, *, version: int | None = None) -> duckdb.DuckDBPyConnection:
    """Open a store's catalog read-only, unable to change or read any file.

    Views: ``embeddings`` (the current version, or ``version``), ``versions``, and ``embeddings_vNNNNNN`` for
    every kept complete version; macros ``cosine_similarity(a, b)``, ``nearest_neighbours(node_id, k)`` and
    ``pair_similarity(a_id, b_id)``. Each version's native DuckDB copy is attached read-only, so the views scan
    DuckDB's own storage instead of Parquet (a top-10 query over a million vectors is about ten times faster).

    Once the catalog and the versions are attached (read-only) and the views made, DuckDB's local file system is
    switched off and its configuration locked: no statement on the connection can write a file (COPY, EXPORT,
    ATTACH, INSTALL), read one (``read_csv``, ``read_parquet``), change the attached databases (they are
    read-only) or change a setting back. Temporary tables and views, in memory, still work.

    Parameters
    ----------
    store : path
        The store folder.
    version : int, optional
        Point ``embeddings`` at this kept version instead of the current one.

    Raises
    ------
    StoreError
        When the folder holds no catalog, no complete version yet, or the version is not a kept complete one.
    """
    store = Path(store)
    path = store / CATALOG
    if not path.exists():
        raise StoreError(f"{store}: no embedding store here (no {CATALOG}); run `graphkit refresh` first")
    con = duckdb.connect(str(path), read_only=True)
    try:
        rows = con.execute("select version, path, dim, is_current from versions where status = 'complete' "
                           "order by version").fetchall()
        if not rows:
            n_runs = con.execute("select count(*) from versions").fetchall()[0][0]
            raise StoreError(f"{store}: no complete version yet ({n_runs} run(s) recorded, none published; "
                             f"`graphkit versions {store}` shows why)")
        if version is not None and int(version) not in {r[0] for r in rows}:
            raise StoreError(f"{store}: no complete version {version} (kept: {', '.join(str(r[0]) for r in rows)})")
        for v, rel_path, dim, is_current in rows:
            parquet, native = _version_files(store, rel_path)
            alias = f"v{v:06d}"
            if native.exists():
                con.execute(f"attach {_sql_literal(str(native))} as {alias} (read_only)")
                body = f"select node_id, node_kind, provisional, vector from {alias}.embeddings"
            else:  # no native copy: Arrow reads the Parquet file, as DuckDB's own file system is switched off
                import pyarrow.dataset as ds

                con.register(f"_parquet_{alias}", ds.dataset(str(parquet), format="parquet"))
                body = (f"select node_id, node_kind, provisional, vector::float[{int(dim)}] as vector "
                        f"from _parquet_{alias}")
            con.execute(f"create or replace temp view embeddings_v{v:06d} as {body}")
            if (version is None and is_current) or v == version:
                con.execute(f"create or replace temp view embeddings as {body}")
        con.execute("set allowed_directories = $dirs", {"dirs": [str(store.resolve()) + os.sep]})
        con.execute("set enable_external_access = false")  # before the file system goes: it cannot be set after
        con.execute("set disabled_filesystems = 'LocalFileSystem'")
        con.execute("set lock_configuration = true")
    except BaseException:
        con.close()
        raise
    return con


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


def _version_row(store, version: int | None) -> dict[str, Any]:
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
    row = _version_row(store, version)
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


def _write_version_files(store: Path, version: int, table: pa.Table, diagnostics: dict | None = None) -> str:
    """Write everything of a version aside (Parquet file, native DuckDB copy, diagnostics), then rename the
    folder into place; nothing is added to it afterwards."""
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
        con.execute(f"create table embeddings as select node_id, node_kind, provisional, "
                    f"vector::float[{int(dim)}] as vector from version_rows")
        con.execute("checkpoint")
    finally:
        con.close()
    names = ["embeddings.parquet", "embeddings.duckdb"]
    if diagnostics:
        np.savez_compressed(tmp_dir / "diagnostics.npz", **diagnostics)
        names.append("diagnostics.npz")
    for name in names:
        with open(tmp_dir / name, "rb") as fh:
            os.fsync(fh.fileno())
    _fsync_dir(tmp_dir)
    _replace_durably(tmp_dir, final_dir)
    fault_point("publish-version-renamed")  # the version's folder in place, the catalog not yet switched
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


#: The stage folders :func:`graphkit.pipeline.plan_run` names under ``STORE/work/``.
WORK_PREFIXES = ("ingest-", "holdout-", "walks-", "train-")


def clean_work(store, *, keep=(), older_than_days: float = 7.0, now: float | None = None) -> list[str]:
    """Remove the stage folders of runs that never finished, once they are older than ``older_than_days``.

    A run killed midway leaves its stage folders so that the next run with the same input and parameters resumes
    from them; when the input or the parameters changed, nothing will ever resume from them. A folder's age is
    its modification time, which every file written directly into it (a walk shard, a marker) refreshes. Only
    folders named like a stage's (:data:`WORK_PREFIXES`) are touched, never ``keep`` (the current run's) nor
    anything that is a symlink. Call it only while holding the run lock. Returns the removed paths.
    """
    work = Path(store) / "work"
    if not work.is_dir():
        return []
    cutoff = (time.time() if now is None else now) - older_than_days * 86400.0
    keep = {Path(k).resolve() for k in keep if k}
    removed = []
    for entry in sorted(work.iterdir()):
        if not entry.name.startswith(WORK_PREFIXES) or entry.is_symlink() or not entry.is_dir():
            continue
        if entry.resolve() in keep or entry.stat().st_mtime > cutoff:
            continue
        shutil.rmtree(entry, ignore_errors=True)
        removed.append(str(entry))
    return removed


def _next_version(con) -> int:
    return int(con.execute("select coalesce(max(version), 0) + 1 from versions").fetchall()[0][0])


def _create_views(con, store: Path) -> None:
    """(Re)create the Parquet-backed views and the macros from the versions table, inside the caller's
    transaction: one view per kept complete version, ``embeddings`` for the current one."""
    for (name,) in con.execute("select view_name from duckdb_views() where not temporary and "
                               "view_name like 'embeddings%'").fetchall():
        con.execute(f"drop view {name}")
    rows = con.execute("select version, path, dim, is_current from versions where status = 'complete'").fetchall()
    for v, rel_path, dim, is_current in rows:
        path = _sql_literal(str(_version_files(store, rel_path)[0]))
        con.execute(load_sql("embeddings").format(kind="", view=f"embeddings_v{v:06d}", path=path, dim=int(dim)))
        if is_current:
            con.execute(load_sql("embeddings").format(kind="", view="embeddings", path=path, dim=int(dim)))
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
    _replace_durably(tmp, catalog)
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
    cols = ", ".join(row)
    con.execute(f"insert into versions ({cols}) values ({', '.join('$' + k for k in row)})", row)


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
                       run_id: str | None = None, diagnostics: dict | None = None) -> int:
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
    with store_lock(store, purpose="publish"), _WRITERS:
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
        rel_path = _write_version_files(store, version, table, diagnostics)
        timings = {**timings, "publish": round(time.perf_counter() - t0, 3)}
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
    with store_lock(store, purpose="refresh"), _WRITERS:
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

    with store_lock(store, wait=wait, purpose="promote"), _WRITERS:
        _update_catalog(store, apply)


def pin_version(store, version: int, pinned: bool = True, *, wait: float = 0.0) -> None:
    """Pin a version (retention never deletes it) or unpin it; holds the writer lock like :func:`promote_version`."""
    store = Path(store)
    _open_catalog(store).close()

    def apply(con):
        _check_version(con, store, version, complete=False)
        con.execute("update versions set pinned = $p where version = $v", {"p": bool(pinned), "v": int(version)})

    with store_lock(store, wait=wait, purpose="pin"), _WRITERS:
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
    with store_lock(store, wait=wait, purpose="retention"), _WRITERS:
        drop = _update_catalog(store, lambda con: _expire(con, int(keep)))
        for v in drop:
            shutil.rmtree(store / _version_dir(v), ignore_errors=True)
    return drop


def load_diagnostics(store, version: int) -> dict[str, np.ndarray]:
    path = Path(store) / _version_dir(version) / "diagnostics.npz"
    if not path.exists():
        return {}
    with np.load(path, allow_pickle=False) as z:
        return {k: z[k] for k in z.files}


#: Working memory of one block of alignment (float64 copies of a block of old and new rows and their product); the
#: vectors are never copied whole in float64.
ALIGN_BLOCK_BYTES = 48 << 20


def _block_rows(dim: int) -> int:
    return max(256, ALIGN_BLOCK_BYTES // (3 * 8 * max(int(dim), 1)))


def _id_family(t: pa.DataType) -> str | None:
    if pa.types.is_integer(t):
        return "integer"
    if pa.types.is_string(t) or pa.types.is_large_string(t) or pa.types.is_string_view(t):
        return "string"
    return None


def _cached_match(folder: Path, cur: int, n_new: int, dim: int) -> dict[str, Any] | None:
    try:
        meta = json.loads((folder / "match.json").read_text())
    except (OSError, ValueError):
        return None
    if (meta.get("version"), meta.get("n_new"), meta.get("dim")) != (cur, n_new, dim):
        return None
    if meta.get("unmatched"):
        return {"unmatched": True}
    return {"version": cur, "new_rows": np.load(folder / "new_rows.npy"),
            "old_vectors": np.load(folder / "old_vectors.npy", mmap_mode="r")}


def _matched_rows(prev_path: Path, node_ids: pa.Array, node_kinds: pa.Array) -> tuple[np.ndarray, np.ndarray]:
    """(new_rows, old_rows) int64 of the previous version's trained rows shared with the new ones, by new row.

    A DuckDB join on (node_kind, node_id) that reads only those two columns and ``provisional`` of the previous
    version's Parquet file."""
    from ..sql import work_connection

    con = work_connection(memory_limit="1GB")
    try:
        con.register("new_keys", pa.table({"node_kind": node_kinds.cast(pa.string()), "node_id": node_ids,
                                           "new_row": pa.array(np.arange(len(node_ids), dtype=np.int64))}))
        con.read_parquet(str(prev_path), file_row_number=True).create_view("prev")
        rows = con.execute(
            "select n.new_row, p.file_row_number::bigint as old_row from new_keys as n "
            "join prev as p on p.node_kind = n.node_kind and p.node_id = n.node_id "
            "where not p.provisional order by n.new_row").fetchnumpy()
    finally:
        con.close()
    return (np.asarray(rows["new_row"], dtype=np.int64), np.asarray(rows["old_row"], dtype=np.int64))


def _gather_rows(pf: pq.ParquetFile, old_rows: np.ndarray, out: np.ndarray, dim: int) -> None:
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


def match_current(store, node_ids: pa.Array, node_kinds: pa.Array, dim: int, *,
                  cache_dir=None) -> dict[str, Any] | None:
    """Rows shared with the current version, matched on (node_kind, node_id); trained rows of it only.

    The previous version is read once: a join on the key columns alone, then its vector column row group by row
    group into a float32 array of the matched rows only. With ``cache_dir`` (a run's work folder), that array is a
    memory-mapped ``.npy`` there, written by the first caller of the run and shared by the others (warm start,
    drift and alignment); it is keyed by the current version, so a version published meanwhile is read afresh.

    Returns ``{"version", "new_rows", "old_vectors"}`` (``old_vectors[i]``, float32, is the current vector of new
    row ``new_rows[i]``; ``new_rows`` ascending), or None when there is no current version of the same dimension
    or the id types differ.
    """
    cur = current_version(store)
    if cur is None:
        return None
    folder = Path(cache_dir) / f"v{cur:06d}" if cache_dir is not None else None
    if folder is not None:
        cached = _cached_match(folder, cur, len(node_ids), int(dim))
        if cached is not None:
            return None if cached.get("unmatched") else cached
    prev_path = Path(store) / _version_row(store, cur)["path"]
    pf = pq.ParquetFile(prev_path)
    vtype = pf.schema_arrow.field("vector").type
    ok = (getattr(vtype, "list_size", None) == dim and
          _id_family(pf.schema_arrow.field("node_id").type) == _id_family(node_ids.type) is not None)
    if ok:
        new_rows, old_rows = _matched_rows(prev_path, node_ids, node_kinds)
    if folder is None:
        if not ok:
            return None
        old_vec = np.empty((new_rows.size, dim), dtype=np.float32)
        _gather_rows(pf, old_rows, old_vec, dim)
        return {"version": int(cur), "new_rows": new_rows, "old_vectors": old_vec}
    tmp = folder.with_name(f".{folder.name}-{os.getpid()}")
    shutil.rmtree(tmp, ignore_errors=True)
    tmp.mkdir(parents=True)
    meta = {"version": int(cur), "n_new": len(node_ids), "dim": int(dim), "unmatched": not ok}
    if ok:
        np.save(tmp / "new_rows.npy", new_rows)
        old_vec = np.lib.format.open_memmap(tmp / "old_vectors.npy", mode="w+", dtype=np.float32,
                                            shape=(new_rows.size, dim))
        _gather_rows(pf, old_rows, old_vec, dim)
        old_vec.flush()
        del old_vec
    (tmp / "match.json").write_text(json.dumps(meta))  # last: the marker of a complete cache
    shutil.rmtree(folder, ignore_errors=True)
    os.replace(tmp, folder)
    cached = _cached_match(folder, cur, len(node_ids), int(dim))
    return None if cached is None or cached.get("unmatched") else cached


def _blockwise_procrustes(old_vec, vectors: np.ndarray, new_rows: np.ndarray) -> tuple[np.ndarray, dict]:
    """Orthogonal Procrustes of ``vectors[new_rows]`` onto ``old_vec`` (``R`` minimising ``||cur @ R - prev||_F``,
    the ``U @ Vt`` of the SVD of ``cur.T @ prev``) and the residuals of
    :func:`graphkit.evaluate.procrustes_residual`, summed in float64 over row blocks of both."""
    from ..errors import ConfigError

    dim = vectors.shape[1]
    step = _block_rows(dim)
    cross = np.zeros((dim, dim), dtype=np.float64)
    for a in range(0, new_rows.size, step):
        prev = np.asarray(old_vec[a:a + step], dtype=np.float64)
        cur = vectors[new_rows[a:a + step]].astype(np.float64)
        if not (np.isfinite(prev).all() and np.isfinite(cur).all()):
            raise ConfigError("vectors to align hold NaN or infinite values")
        cross += np.dot(cur.T, prev)  # np.dot hands the transposed view to BLAS; `@` took 10x longer here
        del prev, cur
    u, _, vt = np.linalg.svd(cross)
    rot = u @ vt
    num = raw = den = 0.0
    for a in range(0, new_rows.size, step):
        prev = np.asarray(old_vec[a:a + step], dtype=np.float64)
        cur = vectors[new_rows[a:a + step]].astype(np.float64)
        diff = np.dot(cur, rot)
        diff -= prev
        num += float(np.vdot(diff, diff))
        del diff
        cur -= prev
        raw += float(np.vdot(cur, cur))
        den += float(np.vdot(prev, prev))
        del prev, cur
    if den == 0.0:
        raise ConfigError("prev is all zeros: the relative residual is undefined")
    return rot, {"residual": float(np.sqrt(num / den)), "residual_unaligned": float(np.sqrt(raw / den))}


def align_to_current(store, node_ids: pa.Array, node_kinds: pa.Array, vectors: np.ndarray,
                     *, min_shared: int = 2, cache_dir=None) -> tuple[np.ndarray, dict[str, Any]]:
    """Rotate new vectors onto the current version by orthogonal Procrustes (Schönemann 1966) on shared nodes.

    Vectors are only defined up to rotation; aligning each version with the previous one keeps downstream
    models that were trained on last week's vectors usable. Nodes are matched on (node_kind, node_id).

    The cross-covariance and the residuals are summed block by block in float64 and the rotation is applied block
    by block in place: beyond the new vectors and the previous version's matched rows (memory-mapped from
    ``cache_dir`` when given, see :func:`match_current`), at most one block (``ALIGN_BLOCK_BYTES``) is allocated.
    ``vectors`` is rotated in place when it is a writeable C-contiguous float32 array (else a float32 copy is).

    Returns
    -------
    (ndarray of float32, dict)
        The rotated vectors and ``{"aligned_to", "shared_nodes", "residual", "residual_unaligned"}``;
        the vectors unchanged and ``{"aligned_to": None, ...}`` when there is nothing to align to.
    """
    info = {"aligned_to": None, "shared_nodes": 0, "residual": None, "residual_unaligned": None}
    match = match_current(store, node_ids, node_kinds, vectors.shape[1], cache_dir=cache_dir)
    if match is None:
        return vectors, info
    if match["new_rows"].size < max(min_shared, 2):
        return vectors, {**info, "shared_nodes": int(match["new_rows"].size)}
    cur, new_rows, old_vec = match["version"], match["new_rows"], match["old_vectors"]
    rot, res = _blockwise_procrustes(old_vec, vectors, new_rows)
    out = vectors
    if not (isinstance(out, np.ndarray) and out.dtype == np.float32 and out.flags.c_contiguous
            and out.flags.writeable):
        out = np.array(vectors, dtype=np.float32, order="C")
    step = _block_rows(out.shape[1])
    for a in range(0, out.shape[0], step):
        block = out[a:a + step]
        block[...] = np.dot(block.astype(np.float64), rot)  # cast back to float32 on assignment
    return out, {"aligned_to": int(cur), "shared_nodes": int(new_rows.size),
                 "residual": float(res["residual"]), "residual_unaligned": float(res["residual_unaligned"])}
