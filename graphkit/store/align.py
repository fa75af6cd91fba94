"""Alignment of a new version onto the current one: orthogonal Procrustes on the nodes they share.

The current version's matched rows are read once per run (a key join, then the vector column row group by row
group) and shared, memory-mapped, by warm start, drift and alignment (:func:`match_current`).
"""

from __future__ import annotations

import json
import os
import shutil
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from . import lock
from .catalog import current_version, gather_rows, version_row

__all__ = ["align_to_current", "match_current", "ALIGN_BLOCK_BYTES"]


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
    from ..sql import load_sql, work_connection

    con = work_connection(memory_limit="1GB")
    try:
        con.register("new_keys", pa.table({"node_kind": node_kinds.cast(pa.string()), "node_id": node_ids,
                                           "new_row": pa.array(np.arange(len(node_ids), dtype=np.int64))}))
        con.read_parquet(str(prev_path), file_row_number=True).create_view("prev")
        rows = con.execute(load_sql("matched_rows")).fetchnumpy()
    finally:
        con.close()
    return (np.asarray(rows["new_row"], dtype=np.int64), np.asarray(rows["old_row"], dtype=np.int64))


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
    prev_path = Path(store) / version_row(store, cur)["path"]
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
        gather_rows(pf, old_rows, old_vec, dim)
        return {"version": int(cur), "new_rows": new_rows, "old_vectors": old_vec}
    tmp = folder.with_name(f".{folder.name}-{os.getpid()}")
    shutil.rmtree(tmp, ignore_errors=True)
    tmp.mkdir(parents=True)
    meta = {"version": int(cur), "n_new": len(node_ids), "dim": int(dim), "unmatched": not ok}
    if ok:
        np.save(tmp / "new_rows.npy", new_rows)
        old_vec = np.lib.format.open_memmap(tmp / "old_vectors.npy", mode="w+", dtype=np.float32,
                                            shape=(new_rows.size, dim))
        gather_rows(pf, old_rows, old_vec, dim)
        old_vec.flush()
        del old_vec
    (tmp / "match.json").write_text(json.dumps(meta))  # last: the marker of a complete cache
    shutil.rmtree(folder, ignore_errors=True)
    lock.replace_durably(tmp, folder)
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
