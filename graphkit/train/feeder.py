"""The training feeder: walk chunks checked, cut to size and compacted into the kernels' form (tokens without
padding, walk starts), read by a background thread one chunk ahead of the kernels; the visit counts of a corpus."""

from __future__ import annotations

import queue
import threading
from collections.abc import Iterable, Iterator

import numpy as np

from ..errors import ConfigError

__all__ = ["ChunkReader", "compact_chunk", "walk_chunks", "resolve_counts", "is_one_shot"]


def _check_counts(counts, n_nodes) -> np.ndarray:
    arr = np.asarray(counts)
    if arr.shape != (n_nodes,):
        raise ConfigError(f"counts must have shape ({n_nodes},) (one per node), got {arr.shape}")
    if arr.dtype.kind not in "iu":
        raise ConfigError(f"counts must be integers, got dtype {arr.dtype}")
    if n_nodes and arr.min() < 0:
        raise ConfigError(f"counts must be >= 0, got a minimum of {int(arr.min())}")
    return arr.astype(np.int64)


def is_one_shot(walks) -> bool:
    """True for an iterator (read once), False for an array or a re-iterable; asks without starting an iteration."""
    if isinstance(walks, np.ndarray):
        return False
    if not isinstance(walks, Iterable):
        raise ConfigError(f"walks must be an int32 array or an iterable of walk chunks, got {type(walks).__name__}")
    return isinstance(walks, Iterator)


def walk_chunks(walks, chunk_walks):
    """Yield the 2-D integer arrays of ``walks`` cut into pieces of at most ``chunk_walks`` rows (views, no copy)."""
    source = (walks,) if isinstance(walks, np.ndarray) else walks
    for part in source:
        part = np.asarray(part)
        if part.ndim != 2:
            raise ConfigError(f"walk chunks must be 2-D [n_walks, length], got shape {part.shape}")
        if part.dtype.kind not in "iu":
            raise ConfigError(f"walk chunks must hold integers, got dtype {part.dtype}")
        for row0 in range(0, part.shape[0], chunk_walks):
            yield part[row0:row0 + chunk_walks]


def compact_chunk(chunk, n_nodes):
    """The kernel's form of a chunk: (tokens int32 without the -1 padding, starts int64 [k + 1] of every walk)."""
    if chunk.size:
        lo, hi = int(chunk.min()), int(chunk.max())
        if lo < -1 or hi >= n_nodes:
            raise ConfigError(f"walks must hold node indices in [-1, {n_nodes}), got values in [{lo}, {hi}]")
    keep = chunk >= 0
    starts = np.zeros(chunk.shape[0] + 1, dtype=np.int64)
    np.cumsum(keep.sum(axis=1), out=starts[1:])
    return np.ascontiguousarray(chunk[keep], dtype=np.int32), starts


def resolve_counts(walks, n_nodes, counts, chunk_walks) -> np.ndarray:
    if counts is not None:
        return _check_counts(counts, n_nodes)
    if is_one_shot(walks):
        raise ConfigError("walks is a one-shot iterator and counts was not given: the visit counts (for the "
                          "negative-sampling table or Huffman tree and the learning-rate schedule) are needed before "
                          "training starts, so pass counts=..., or a re-iterable corpus")
    if hasattr(walks, "visit_counts"):
        return _check_counts(walks.visit_counts(), n_nodes)
    # An in-memory array, or a re-iterable without stored counts: one counting pass over the chunks.
    total = np.zeros(n_nodes, dtype=np.int64)
    for chunk in walk_chunks(walks, chunk_walks):
        tokens, _ = compact_chunk(chunk, n_nodes)
        total += np.bincount(tokens, minlength=n_nodes)
    return total


class ChunkReader:
    """Iterate the kernel form of the chunks ``(tokens, starts, n_rows)``, read by a background thread that stays
    at most one chunk ahead of the consumer: the next Parquet chunk is decoded while numba (nogil) trains on the
    current one. An error of the reader is raised in the consumer; leaving early stops the reader."""

    _DONE = object()

    def __init__(self, walks, chunk_walks, n_nodes):
        self._source = walk_chunks(walks, chunk_walks)
        self._n_nodes = n_nodes
        self._queue = queue.Queue(maxsize=1)
        self._slot = threading.Semaphore(1)   # held while a chunk is read, given back when the consumer takes it
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._read, name="graphkit-chunk-reader", daemon=True)

    def _read(self):
        try:
            while True:
                self._slot.acquire()
                if self._stop.is_set():
                    return
                chunk = next(self._source, None)
                if chunk is None:
                    self._queue.put(self._DONE)
                    return
                tokens, starts = compact_chunk(chunk, self._n_nodes)
                self._queue.put((tokens, starts, chunk.shape[0]))
        except BaseException as exc:  # handed to the consumer, which raises it
            self._queue.put(exc)

    def __enter__(self):
        self._thread.start()
        return self

    def __iter__(self):
        while True:
            item = self._queue.get()
            self._slot.release()
            if item is self._DONE:
                return
            if isinstance(item, BaseException):
                raise item
            yield item

    def __exit__(self, *exc):
        self._stop.set()
        self._slot.release()   # wakes a reader waiting for its slot
        while self._thread.is_alive():   # a reader blocked on put() needs the queue drained
            try:
                self._queue.get(timeout=0.05)
            except queue.Empty:
                pass
        self._thread.join()
        return False


# The earlier private names, for callers that still use them.
_ChunkReader, _compact, _chunks, _resolve_counts, _is_one_shot = (ChunkReader, compact_chunk, walk_chunks,
                                                                  resolve_counts, is_one_shot)
