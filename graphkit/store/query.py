"""Reading a store: the read-only connection, nearest neighbours, export, and the data of a store's report."""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any

import duckdb
import numpy as np
import pyarrow as pa

from ..errors import InputError, StoreError
from ..io import atomic_output
from ..sql import Identifier, inline, load_sql
from .catalog import CATALOG, gather_rows, list_versions, load_diagnostics, version_row

__all__ = ["connect", "version_files", "similar_nodes", "export_version", "spread_vectors",
           "report_inputs"]


def version_files(store: Path, rel_path: str) -> tuple[Path, Path]:
    """(Parquet file, native DuckDB copy) of a version, from its catalog path (relative to the store)."""
    parquet = (store / rel_path).resolve()
    return parquet, parquet.with_suffix(".duckdb")


def connect(store, *, version: int | None = None) -> duckdb.DuckDBPyConnection:
    """Open a store's catalog read-only, unable to change or read any file.

    Views: ``embeddings`` (the current version, or ``version``), ``versions``, and ``embeddings_vNNNNNN`` for
    every kept complete version; macros ``cosine_similarity(a, b)``, ``nearest_neighbours(node_id, k, kind :=,
    id_kind :=)`` and ``pair_similarity(a_id, b_id)`` (``sql/macros.sql``, made afresh on the connection). Each version's native DuckDB copy is attached read-only, so the views scan
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
            parquet, native = version_files(store, rel_path)
            alias = f"v{v:06d}"
            if native.exists():
                # ATTACH cannot take a bound path; the alias is an identifier: both quoted by graphkit.sql
                con.execute(inline("attach $path as $alias (read_only)", {"path": str(native),
                                                                            "alias": Identifier(alias)}))
                source = Identifier(f"{alias}.embeddings")
            else:  # no native copy: Arrow reads the Parquet file, as DuckDB's own file system is switched off
                import pyarrow.dataset as ds

                source = Identifier(f"_parquet_{alias}")
                con.register(source, ds.dataset(str(parquet), format="parquet"))
            views = [f"embeddings_v{v:06d}"] + (["embeddings"] if (version is None and is_current) or v == version
                                                 else [])
            for view in views:
                con.execute(inline(load_sql("session_embeddings"),
                                   {"view": Identifier(view), "source": source, "dim": int(dim)}))
        # the catalog's own macros are as old as its last write: this package's definitions shadow them
        con.execute(load_sql("macros").replace("create or replace macro ", "create or replace temp macro "))
        con.execute("set allowed_directories = $dirs", {"dirs": [str(store.resolve()) + os.sep]})
        con.execute("set enable_external_access = false")  # before the file system goes: it cannot be set after
        con.execute("set disabled_filesystems = 'LocalFileSystem'")
        con.execute("set lock_configuration = true")
    except BaseException:
        con.close()
        raise
    return con


def similar_nodes(store, node_id: str, top: int = 10, version: int | None = None, kind: str | None = None,
                  id_kind: str | None = None, salt_env: str | None = None) -> list[tuple]:
    """The ``top`` nodes most cosine-similar to ``node_id`` (given as text; always bound as a parameter).

    Runs the catalog's ``nearest_neighbours`` macro (``sql/macros.sql``), the one nearest-neighbour query, so the
    answer is the macro's and ``sql/examples/nearest_neighbours.sql``'s: ``kind`` keeps only results of that node
    kind, ties are broken by node id then kind. ``id_kind`` picks the query node when its id exists under several
    kinds. In a version published with hashed ids (lineage ``hashed_ids``) a raw id is hashed with the key in
    environment variable ``salt_env`` (default: the run's ``[input] hash_salt_env``, else ``GRAPHKIT_ID_SALT``);
    a pseudonym given as is is used as is. The results are the store's ids (pseudonyms in a hashed store).

    Returns
    -------
    list of (node_id, node_kind, similarity)
        Most similar first.

    Raises
    ------
    StoreError
        When the id is not in the version, or exists under several kinds and ``id_kind`` is not given.
    InputError
        When ``top`` < 1, or a raw id must be hashed and the key is missing.
    """
    if int(top) < 1:
        raise InputError(f"--top must be >= 1, got {top}")
    con = connect(store, version=version)
    try:
        def kinds_of(ident):
            return [k for (k,) in con.execute(load_sql("query_node_kinds"),
                                              {"node_id": ident, "id_kind": id_kind}).fetchall()]

        query_id, kinds = str(node_id), kinds_of(str(node_id))
        params = version_row(Path(store), version).get("params") or {}
        if not kinds and (params.get("lineage") or {}).get("hashed_ids"):
            from ..ids import hash_ids, salt_from_env

            env = salt_env or (params.get("input") or {}).get("hash_salt_env") or "GRAPHKIT_ID_SALT"
            try:
                key = salt_from_env(env)
            except InputError as exc:
                raise InputError(f"{store}: the version was published with hashed ids; looking up the raw id "
                                 f"{node_id!r} needs its key: {exc}") from None
            query_id = hash_ids([str(node_id)], key)[0].as_py()
            kinds = kinds_of(query_id)
        if not kinds:
            raise StoreError(f"{store}: node id {node_id!r} is not in the embeddings"
                             + (f" as kind {id_kind!r}" if id_kind else ""))
        if len(kinds) > 1:
            raise StoreError(f"{store}: node id {node_id!r} exists as kinds {', '.join(sorted(kinds))}; "
                             "pass --id-kind")
        return con.execute(load_sql("similar"),
                           {"node_id": query_id, "id_kind": kinds[0], "kind": kind, "k": int(top)}).fetchall()
    finally:
        con.close()


def spread_vectors(table: pa.Table, prefix: str = "emb_", column: str = "vector") -> pa.Table:
    """``table`` with its fixed-size ``vector`` column replaced by float32 columns ``emb_000 …`` (for CSV and for
    feature tables); null vectors give nulls."""
    vec = table.column(column).combine_chunks()
    dim = vec.type.list_size
    position = table.schema.get_field_index(column)
    out = table.remove_column(position)
    # .values keeps the slots of null vectors (a fixed-size list), unlike .flatten(): rows stay aligned
    flat = vec.values.slice(vec.offset * dim, len(vec) * dim).to_numpy(zero_copy_only=False).reshape(-1, dim)
    mask = None if vec.null_count == 0 else ~vec.is_valid().to_numpy(zero_copy_only=False)
    for i in range(dim):
        out = out.add_column(position + i, f"{prefix}{i:03d}", pa.array(flat[:, i], pa.float32(), mask=mask))
    return out


def export_version(store, out, *, version: int | None = None, fmt: str = "parquet") -> int:
    """Write a version's ``node_id, node_kind, vector`` to ``out`` (``sql/export.sql``): Parquet with the vector
    column, or CSV with one float column per dimension (what spreadsheets, pandas and SQL loaders read). The
    file is written aside and renamed into place. Returns the rows written."""
    import pyarrow.csv as pcsv
    import pyarrow.parquet as pq

    con = connect(store, version=version)
    try:
        table = con.sql(load_sql("export")).to_arrow_table()
    finally:
        con.close()
    out = Path(out)
    with atomic_output(out) as tmp:
        if fmt == "csv":
            pcsv.write_csv(spread_vectors(table), tmp)
        else:
            pq.write_table(table, tmp, compression="zstd")
    return table.num_rows


def report_inputs(store) -> dict[str, Any]:
    """What the report of a store draws: the catalog rows, and for the current version the seeded subset of
    vectors the projection shows (read one row group at a time: the version is never held whole), its per-node
    diagnostics and labels. The keyword arguments of :func:`graphkit.report.write_report` but ``title``."""
    import pyarrow.parquet as pq

    from ..report import projected_rows

    rows = list_versions(store)
    current = next((r for r in rows if r["is_current"]), None)
    vectors, diag, labels, total = None, {}, None, None
    if current is not None:
        pf = pq.ParquetFile(Path(store) / current["path"])
        total = pf.metadata.num_rows
        dim = pf.schema_arrow.field("vector").type.list_size
        picked = projected_rows(total)  # the same seeded subset the run's own report drew
        vectors = np.empty((picked.size, dim), dtype=np.float32)
        gather_rows(pf, picked, vectors, dim)
        diag = load_diagnostics(store, current["version"])
        if diag.get("labels") is not None and len(diag["labels"]) == total:
            labels = [x or None for x in diag["labels"][picked].tolist()]
    return {"versions": rows, "degrees": diag.get("degrees"), "visit_counts": diag.get("visit_counts"),
            "vectors": vectors, "labels": labels, "vectors_total": total, "current": current}
