"""Feature export for downstream models: an entity table with a version's vector spread into numbered columns."""

from __future__ import annotations

import difflib
from pathlib import Path
from typing import Any

import duckdb
import pyarrow as pa

from .errors import EdgeTableError, StoreError
from .sql import Identifier, inline, load_sql, quote_ident
from .io import atomic_output
from .store import spread_vectors, version_files, version_row

__all__ = ["export_features"]

_CSV_SUFFIXES = (".csv", ".tsv", ".csv.gz", ".tsv.gz")
#: Entity rows joined, spread and written at a time.
_BATCH_ROWS = 65_536


def _first_line(exc) -> str:
    text = str(exc).strip()
    return text.splitlines()[0] if text else type(exc).__name__


def _read_entities(con, entities, on: str):
    """The entity table as a DuckDB relation: Parquet (file, folder or glob) or one CSV file."""
    name = str(entities)
    if name.lower().endswith(_CSV_SUFFIXES):
        if not Path(name).is_file():
            raise EdgeTableError(f"{entities}: entity table not found")
        try:
            ent = con.read_csv(name, header=True)
            if on in ent.columns:  # ids as written: a sniffed integer type would turn 007 into 7
                ent = con.read_csv(name, header=True, dtype={on: "VARCHAR"})
            return ent
        except duckdb.Error as exc:
            raise EdgeTableError(f"{entities}: not a readable CSV entity table ({_first_line(exc)})") from None
    path = Path(name)
    if not any(ch in name for ch in "*?[") and not path.exists():
        raise EdgeTableError(f"{entities}: entity table not found")
    try:
        return con.read_parquet(str(path / "**" / "*.parquet") if path.is_dir() else name)
    except duckdb.Error as exc:
        hint = "; CSV entity tables must end in .csv" if path.is_file() else ""
        raise EdgeTableError(f"{entities}: not a readable Parquet entity table ({_first_line(exc)}){hint}") from None


def export_features(store, entities, on: str, out, *, version: int | None = None, kind: str | None = None,
                    fmt: str = "parquet", prefix: str = "emb_") -> dict[str, Any]:
    """Write ``entities`` with each row's vector as float columns ``emb_000 … emb_{dim-1}``.

    Entities without a vector keep their row, with nulls in the vector columns. Row order is kept.

    Parameters
    ----------
    store : path
    entities : path
        A Parquet file (or folder/glob) of entities, e.g. the customers a churn model scores, or a CSV file with a
        header row (``.csv``, ``.tsv``, optionally ``.gz``); the ``on`` column of a CSV file is read as text, as
        written, so that ids such as ``007`` keep their leading zeros.
    on : str
        The entity column holding the node id (compared as text, so int and string ids both match).
    out : path
        Output file (Parquet, or CSV with ``fmt="csv"``), written aside and renamed into place.
    version : int, optional
        A kept version (default: the current one).
    kind : str, optional
        Only nodes of this kind; required when the version holds several kinds.

    Returns
    -------
    dict
        ``rows``, ``with_vector``, ``without_vector``, ``version``, ``dim``.
    """
    if fmt not in ("parquet", "csv"):
        raise StoreError(f"format must be parquet or csv, got {fmt!r}")
    store = Path(store)
    row = version_row(store, version)
    parquet, native = version_files(store, row["path"])
    dim = int(row["dim"])
    out = Path(out)
    con = duckdb.connect()
    try:
        ent = _read_entities(con, entities, on)
        if on not in ent.columns:
            close = difflib.get_close_matches(on, ent.columns, n=1)
            hint = f" (did you mean {close[0]!r}?)" if close else f" (columns: {', '.join(ent.columns)})"
            raise EdgeTableError(f"{entities}: no column {on!r} for --on{hint}")
        if {"__entity_row", "__entity_key", "__vector"} & set(ent.columns) or any(c.startswith(prefix)
                                                                                   for c in ent.columns):
            raise EdgeTableError(f"{entities}: columns named {prefix}* would be overwritten; rename them first")
        # the --on column is a name, which cannot be bound: quoted by graphkit.sql
        ent.project(f"*, row_number() over () as __entity_row, {quote_ident(on)}::varchar as __entity_key") \
            .create_view("entities")
        if native.exists():
            con.execute(inline("attach $path as version_db (read_only)", {"path": str(native)}))  # no bound path
            source = Identifier("version_db.embeddings")
        else:
            source = Identifier("version_parquet")
            con.read_parquet(str(parquet)).create_view(source)
        con.execute(inline(load_sql("session_embeddings"), {"view": Identifier("vectors"), "source": source,
                                                            "dim": dim}))
        kinds = [k for (k,) in con.sql(load_sql("version_kinds")).fetchall()]
        if kind is None and len(kinds) > 1:
            raise StoreError(f"{store}: version {row['version']} holds nodes of kinds {', '.join(kinds)}; "
                             "pass --kind")
        if kind is not None and kind not in kinds:
            raise StoreError(f"{store}: version {row['version']} has no nodes of kind {kind!r} "
                             f"(kinds: {', '.join(kinds)})")
        try:
            out.parent.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise StoreError(f"{out}: cannot create the folder {out.parent} ({exc.strerror or exc})") from None
        joined = con.sql(load_sql("features"), params={"kind": kind}).to_arrow_reader(_BATCH_ROWS)
        counts = [0, 0]

        def spread():  # batch by batch: the entity table is never held whole
            for batch in joined:
                counts[0] += batch.num_rows
                counts[1] += batch.num_rows - batch.column("__vector").null_count
                yield from spread_vectors(pa.Table.from_batches([batch]), prefix, "__vector").to_batches()

        schema = spread_vectors(joined.schema.empty_table(), prefix, "__vector").schema
        writer = con.cursor()  # the joined rows stream from `con` while this connection writes them
        try:
            writer.register("feature_rows", pa.RecordBatchReader.from_batches(schema, spread()))
            with atomic_output(out) as tmp:
                rel = writer.table("feature_rows")
                if fmt == "csv":
                    rel.write_csv(str(tmp))
                else:
                    rel.write_parquet(str(tmp), compression="zstd")
        finally:
            writer.close()
    finally:
        con.close()
    n_rows, n_with = counts
    return {"rows": n_rows, "with_vector": n_with, "without_vector": n_rows - n_with,
            "version": int(row["version"]), "dim": dim}
