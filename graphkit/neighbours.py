"""Every node's nearest neighbours from an approximate index: the table of ``graphkit neighbours`` and of
``[store] neighbours``, and the index ``graphkit similar`` answers from when a version has one.

The index is faiss's HNSW graph (faiss-cpu, MIT licence; chosen by measurement against hnswlib, usearch and
pynndescent, see ``docs/neighbours.md``) over the unit-length vectors with the inner product, so its scores are
cosine similarities, as ``similar`` computes them. Its labels are the rows of the version's (or, for one kind, the
kind's) vectors in the version's order.

The answer, defined here once (and kept by ``similar`` when it reads an index):

* a node is never its own neighbour;
* neighbours are ordered by similarity, highest first; ties by node id, then node kind (the order of the
  ``nearest_neighbours`` macro); ``rank`` counts 1, 2, … in that order, tied or not;
* with ``kind``, both the query nodes and their neighbours are the nodes of that kind;
* a node has ``min(top, n - 1)`` neighbours, ``n`` the nodes in scope: a set of ``top`` or fewer nodes gives
  each node all the others;
* a zero vector has no direction: its similarity to every node is 0.

The vectors are read in row blocks and scaled to unit length in float32, block by block (never a float64 copy of
the matrix); the table is written one row group per batch of query nodes, through
:func:`graphkit.io.atomic_output`, so the whole table is never in memory.
"""

from __future__ import annotations

import time
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Iterator

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from .checks import NEIGHBOURS_MIN, check_int
from .errors import InputError
from .io import atomic_output, fsync_file

__all__ = ["INDEX_FILE", "TABLE_FILE", "IndexSettings", "NeighbourIndex", "build_index", "check_top",
           "scope_rows", "scope_size", "neighbour_schema",
           "unit_blocks", "write_neighbours", "version_neighbours", "NEIGHBOUR_SCHEMA"]

#: File names inside a version's folder (written at publish only).
INDEX_FILE = "neighbours.index"
TABLE_FILE = "neighbours.parquet"
#: Vectors read (and scaled) at a time, and query nodes searched per row group of the table.
READ_ROWS = 65_536
QUERY_ROWS = 16_384
#: Extra results asked of the index beyond ``top + 1``, so that ties at the last place are broken by node id
#: among more than the index happened to return first.
TIE_MARGIN = 4


@dataclass(frozen=True)
class IndexSettings:
    """HNSW settings (faiss ``IndexHNSWFlat``): ``links`` per node and layer (``M``), the build's beam width
    (``efConstruction``) and the search's (``efSearch``; at least twice the results asked for, see
    :func:`search_width`). The defaults reach
    recall@10 >= 0.95 at 1M x 128 in the measurements of ``docs/neighbours.md``."""

    links: int = 16
    build_width: int = 100
    search_width: int = 64


def neighbour_schema(id_type: pa.DataType) -> pa.Schema:
    """Schema of the table: ``node_id, node_kind, neighbour_id, neighbour_kind, rank, similarity``."""
    return pa.schema([("node_id", id_type), ("node_kind", pa.string()), ("neighbour_id", id_type),
                      ("neighbour_kind", pa.string()), ("rank", pa.int32()), ("similarity", pa.float32())])


#: The neighbour table's columns for integer node ids (node ids keep the version's own id type).
NEIGHBOUR_SCHEMA = neighbour_schema(pa.int64())


def check_top(top, n_nodes: int, *, option: str = "--top", scope: str = "the version") -> int:
    """``top`` as an int, or :class:`InputError` naming ``option``: it must be >= 1 and at most the nodes in
    scope (a node has at most ``n_nodes - 1`` neighbours; ``top = n_nodes`` gives every node all the others)."""
    try:
        top = check_int(option, top, NEIGHBOURS_MIN)
    except InputError as exc:
        raise InputError(str(exc)) from None
    if top > n_nodes:
        raise InputError(f"{option} {top}: {scope} has only {n_nodes} node{'s' if n_nodes != 1 else ''}")
    return top


@contextmanager
def _faiss_threads(threads: int | None):
    """faiss's OpenMP threads for the block (its setting is process-wide: put back afterwards)."""
    import faiss

    before = faiss.omp_get_max_threads()
    if threads is not None:
        faiss.omp_set_num_threads(int(threads))
    try:
        yield faiss
    finally:
        faiss.omp_set_num_threads(before)


def unit_blocks(parquet: Path, rows: np.ndarray | None = None,
                block: int = READ_ROWS) -> Iterator[tuple[np.ndarray, np.ndarray]]:
    """The version's vectors in row blocks, scaled to unit length in float32 (a zero vector stays zero).

    Parameters
    ----------
    parquet : path
        A version's ``embeddings.parquet``.
    rows : ndarray of int64, sorted, optional
        Only these rows of the file (default: all).
    block : int
        Rows read at a time.

    Yields
    ------
    (positions, vectors)
        ``positions``: int64 rows of the file; ``vectors``: float32 (len(positions), dim), a fresh array.
    """
    pf = pq.ParquetFile(parquet)
    start = 0
    for batch in pf.iter_batches(batch_size=block, columns=["vector"]):
        col = batch.column(0)
        dim = col.type.list_size
        stop = start + len(col)
        x = col.values.slice(col.offset * dim, len(col) * dim).to_numpy(zero_copy_only=False)
        x = np.array(x, dtype=np.float32).reshape(-1, dim)
        pos = np.arange(start, stop, dtype=np.int64)
        if rows is not None:
            lo, hi = np.searchsorted(rows, [start, stop])
            pos = rows[lo:hi]
            x = x[pos - start]
        start = stop
        if len(pos):
            norms = np.sqrt(np.einsum("ij,ij->i", x, x))
            norms[norms == 0] = 1.0
            x /= norms[:, None]
            yield pos, x


def build_index(parquet: Path, dim: int, rows: np.ndarray | None = None, *,
                settings: IndexSettings = IndexSettings(), threads: int | None = None):
    """An HNSW index (faiss ``IndexHNSWFlat``, inner product) over the unit vectors of a version's rows.

    Parameters
    ----------
    parquet : path
        A version's ``embeddings.parquet``.
    dim : int
        The vectors' dimension.
    rows : ndarray of int64, sorted, optional
        Index only these rows (label ``i`` is ``rows[i]``); default every row (label = row).
    settings : IndexSettings
    threads : int, optional
        faiss threads while building (default: faiss's own, all cores). With 1 the index is reproducible.
    """
    with _faiss_threads(threads) as faiss:
        index = faiss.IndexHNSWFlat(int(dim), settings.links, faiss.METRIC_INNER_PRODUCT)
        index.hnsw.efConstruction = settings.build_width
        for _, x in unit_blocks(parquet, rows):
            index.add(x)
    return index


def _id_table(parquet: Path) -> pa.Table:
    """The version's ``node_id`` and ``node_kind`` columns (small beside the vectors)."""
    table = pq.read_table(parquet, columns=["node_id", "node_kind"])
    return table.combine_chunks()


def _order_rank(ids: pa.Table) -> np.ndarray:
    """Position of each row when the rows are sorted by node id, then node kind (the tie order)."""
    order = pc.sort_indices(ids, sort_keys=[("node_id", "ascending"), ("node_kind", "ascending")])
    rank = np.empty(ids.num_rows, np.int64)
    rank[order.to_numpy()] = np.arange(ids.num_rows, dtype=np.int64)
    return rank


def _pick(labels: np.ndarray, scores: np.ndarray, own: np.ndarray, order_rank: np.ndarray,
          top: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """For each query row (``own``: its row, in label space), the first ``top`` results other than itself, by
    score then tie order. The index returns each row's results best first; only rows holding equal scores are
    sorted again (by score, then tie order). ``labels`` -1 (fewer results) are dropped. Returns (query position,
    labels, scores), flattened, query by query, best first."""
    tied = np.flatnonzero((scores[:, 1:] == scores[:, :-1]).any(axis=1))
    if len(tied):
        sub = labels[tied]
        order = np.lexsort((order_rank[np.where(sub >= 0, sub, 0)], -scores[tied]))  # along each row
        labels, scores = labels.copy(), scores.copy()
        labels[tied] = np.take_along_axis(sub, order, axis=1)
        scores[tied] = np.take_along_axis(scores[tied], order, axis=1)
    valid = (labels >= 0) & (labels != own[:, None])
    keep = valid & (np.cumsum(valid, axis=1) <= top)
    q, _ = np.nonzero(keep)
    return q, labels[keep], scores[keep]


def search_width(settings: IndexSettings, ask: int) -> int:
    """The search's beam for ``ask`` results: ``settings.search_width``, and at least twice ``ask``."""
    return max(settings.search_width, 2 * ask)


def scope_rows(parquet: Path, kind: str | None) -> np.ndarray | None:
    """The rows of a version that ``kind`` selects (None: every row), or :class:`InputError` naming ``--kind``
    when the version has no node of that kind."""
    if kind is None:
        return None
    kinds = pq.read_table(parquet, columns=["node_kind"]).column("node_kind")
    rows = np.flatnonzero(pc.equal(kinds, pa.scalar(str(kind))).to_numpy(zero_copy_only=False))
    if len(rows) == 0:
        found = sorted(pc.unique(kinds).to_pylist())
        raise InputError(f"--kind {kind!r}: no node of that kind in the version (kinds: {', '.join(found)})")
    return rows.astype(np.int64)


def scope_size(parquet: Path, kind: str | None) -> tuple[int, str]:
    """(nodes in scope, its name for messages) of a version and an optional kind."""
    rows = scope_rows(parquet, kind)
    if rows is None:
        return pq.ParquetFile(parquet).metadata.num_rows, "the version"
    return len(rows), f"kind {kind!r}"


def version_neighbours(parquet: Path, out: Path, top: int, *, kind: str | None = None, index=None,
                       settings: IndexSettings = IndexSettings(), threads: int | None = None) -> dict:
    """Write every node's ``top`` nearest neighbours of a version to ``out`` (Parquet, whole or not at all).

    Parameters
    ----------
    parquet : path
        The version's ``embeddings.parquet``.
    out : path
        The table to write (its folder must exist).
    top : int
        Neighbours per node, checked by :func:`check_top` against the nodes in scope.
    kind : str, optional
        Only nodes of this kind, as queries and as neighbours.
    index : faiss index, optional
        An index over all the version's rows (the one published with it); built here when None or when ``kind``
        is given (the index then holds that kind's rows only).
    settings, threads
        As for :func:`build_index`; ``threads`` also for the searches.

    Returns
    -------
    dict
        ``rows`` written, ``nodes`` queried, ``top``, ``build_seconds`` (0 with a given index), ``seconds``.
    """
    t0 = time.perf_counter()
    parquet, out = Path(parquet), Path(out)
    pf = pq.ParquetFile(parquet)
    dim = pf.schema_arrow.field("vector").type.list_size
    ids = _id_table(parquet)
    rows = scope_rows(parquet, kind)
    n = ids.num_rows if rows is None else len(rows)
    top = check_top(top, n, scope="the version" if kind is None else f"kind {kind!r}")
    build_s = 0.0
    if index is None or rows is not None:
        tb = time.perf_counter()
        index = build_index(parquet, dim, rows, settings=settings, threads=threads)
        build_s = time.perf_counter() - tb
    elif index.ntotal != n:
        raise ValueError(f"the index holds {index.ntotal} vectors but the version has {n}")
    scope_ids = ids if rows is None else ids.take(pa.array(rows))
    order_rank = _order_rank(scope_ids)
    node_id, node_kind = scope_ids.column("node_id"), scope_ids.column("node_kind")
    schema = neighbour_schema(node_id.type)
    ask = min(n, top + 1 + TIE_MARGIN)
    written = 0
    with _faiss_threads(threads), atomic_output(out) as tmp:
        index.hnsw.efSearch = search_width(settings, ask)
        with pq.ParquetWriter(tmp, schema, compression="zstd") as writer:
            offset = 0  # label of the block's first row
            for _, x in unit_blocks(parquet, rows, block=QUERY_ROWS):
                scores, labels = index.search(x, ask)
                own = np.arange(offset, offset + len(x), dtype=np.int64)
                q, lab, sc = _pick(labels, scores, own, order_rank, top)
                qrows = pa.array(own[q])
                counts = np.bincount(q, minlength=len(x))
                rank = (np.arange(len(q)) - np.repeat(np.cumsum(counts) - counts, counts) + 1).astype(np.int32)
                writer.write_table(pa.table({
                    "node_id": node_id.take(qrows), "node_kind": node_kind.take(qrows),
                    "neighbour_id": node_id.take(pa.array(lab)), "neighbour_kind": node_kind.take(pa.array(lab)),
                    "rank": pa.array(rank), "similarity": pa.array(np.clip(sc, -1.0, 1.0).astype(np.float32)),
                }, schema=schema))
                written += len(q)
                offset += len(x)
    return {"rows": written, "nodes": n, "top": top, "build_seconds": round(build_s, 3),
            "seconds": round(time.perf_counter() - t0, 3)}


def write_neighbours(folder: Path, top: int, *, settings: IndexSettings = IndexSettings(),
                     threads: int | None = None) -> dict:
    """At publish: build the index of the version in ``folder`` (not yet renamed into place), save it as
    :data:`INDEX_FILE` and write :data:`TABLE_FILE`. A version with ``top`` or fewer nodes gives each node all
    the others. Returns :func:`version_neighbours`' dict, with ``seconds`` the whole: index, its file and the
    table."""
    import faiss

    folder = Path(folder)
    parquet = folder / "embeddings.parquet"
    n = pq.ParquetFile(parquet).metadata.num_rows
    top = check_int("[store] neighbours", top, NEIGHBOURS_MIN)
    dim = pq.ParquetFile(parquet).schema_arrow.field("vector").type.list_size
    t0 = time.perf_counter()
    index = build_index(parquet, dim, settings=settings, threads=threads)
    build_s = time.perf_counter() - t0
    with atomic_output(folder / INDEX_FILE) as tmp:
        faiss.write_index(index, str(tmp))
    result = version_neighbours(parquet, folder / TABLE_FILE, min(top, n), index=index, settings=settings,
                                threads=threads) if n > 1 else _empty_table(parquet, folder / TABLE_FILE)
    fsync_file(folder / TABLE_FILE)
    return {**result, "top": top, "build_seconds": round(build_s, 3),
            "seconds": round(time.perf_counter() - t0, 3)}


def _empty_table(parquet: Path, out: Path) -> dict:
    ids = _id_table(parquet)
    with atomic_output(out) as tmp:
        pq.write_table(neighbour_schema(ids.schema.field("node_id").type).empty_table(), tmp)
    return {"rows": 0, "nodes": ids.num_rows, "seconds": 0.0}


class NeighbourIndex:
    """A version's published index, opened once (memory-mapped) and queried many times (``similar``).

    It holds the version's node ids and kinds beside the index, so that a query needs no SQL: the query node is
    found by its id (compared as text, as the ``nearest_neighbours`` macro compares it) and its vector read back
    from the index.

    Parameters
    ----------
    folder : path
        The version's folder, holding :data:`INDEX_FILE` and ``embeddings.parquet``.
    settings : IndexSettings
        The search width (``search_width``) used at query time.
    params : dict, optional
        The version's catalog ``params`` (its lineage says whether ids are hashed).
    """

    def __init__(self, folder, settings: IndexSettings = IndexSettings(), params: dict | None = None):
        import faiss

        folder = Path(folder)
        self.index = faiss.read_index(str(folder / INDEX_FILE), faiss.IO_FLAG_MMAP)
        self.ids = _id_table(folder / "embeddings.parquet")
        if self.index.ntotal != self.ids.num_rows:
            raise ValueError(f"{folder}: the index holds {self.index.ntotal} vectors, the version "
                             f"{self.ids.num_rows}")
        self.settings = settings
        self.params = params or {}
        self._kinds = self.ids.column("node_kind")
        self._node_ids = self.ids.column("node_id")
        self._integer_ids = pa.types.is_integer(self._node_ids.type)

    @staticmethod
    def exists(folder) -> bool:
        return (Path(folder) / INDEX_FILE).exists()

    def _rows_with_id(self, ident: str) -> np.ndarray:
        if self._integer_ids:
            try:
                value = int(ident)
            except ValueError:
                return np.zeros(0, np.int64)
            if str(value) != ident:  # the macro compares text: "042" is not 42
                return np.zeros(0, np.int64)
            try:
                scalar = pa.scalar(value, self._node_ids.type)
            except (OverflowError, pa.ArrowInvalid):
                return np.zeros(0, np.int64)
        else:
            scalar = pa.scalar(ident, self._node_ids.type)
        return pc.indices_nonzero(pc.equal(self._node_ids, scalar)).to_numpy()

    def kinds_of(self, ident: str, id_kind: str | None = None) -> list[str]:
        """The kinds (sorted) under which the id exists, only ``id_kind`` when given."""
        kinds = sorted({k for k in self._kinds.take(pa.array(self._rows_with_id(ident))).to_pylist()})
        return [k for k in kinds if id_kind is None or k == id_kind]

    def row_of(self, ident: str, kind: str) -> int:
        """The row (index label) of the node with this id and kind."""
        rows = self._rows_with_id(ident)
        kinds = self._kinds.take(pa.array(rows)).to_pylist()
        return int(next(r for r, k in zip(rows, kinds) if k == kind))

    def similar(self, row: int, top: int, *, kind: str | None = None, max_ask: int = 4096) -> list[tuple] | None:
        """The ``top`` nodes nearest to the node in ``row``, itself left out, optionally of ``kind`` only: a list
        of (node_id, node_kind, similarity), best first, ties by node id then kind. None when the kind is too
        rare among the nearest ``max_ask`` to fill ``top`` (the caller then answers by brute force)."""
        q = self.index.reconstruct(int(row)).reshape(1, -1)  # stored at unit length
        n = self.index.ntotal
        ask = min(n, top + 1 + TIE_MARGIN)
        while True:
            self.index.hnsw.efSearch = search_width(self.settings, ask)
            scores, labels = self.index.search(q, ask)
            keep = (labels[0] >= 0) & (labels[0] != row)
            lab, sc = labels[0][keep], scores[0][keep]
            kinds = self._kinds.take(pa.array(lab)).to_pylist()
            ident = self._node_ids.take(pa.array(lab)).to_pylist()
            found = [(i, k, float(min(1.0, max(-1.0, s)))) for i, k, s in zip(ident, kinds, sc)
                     if kind is None or k == kind]
            if len(found) >= top or ask >= n:
                break
            if ask >= max_ask:
                return None
            ask = min(n, max_ask, ask * 4)
        found.sort(key=lambda r: (-r[2], r[0], r[1]))
        return found[:top]
