"""File helpers: resolving input paths, fingerprints, atomic writes and manifests.

Input paths may be object-store URLs (see :mod:`graphkit.storage`): :func:`resolve_input_files` lists them with
the same rules, and :func:`fingerprint_files` describes an object by its metadata, never by its content.

Every file graphkit writes whole goes through :func:`atomic_output`, which has the one durability rule: write
aside under a hidden name in the same folder (``.NAME.tmp-<random>``), flush and fsync the file, ``os.replace`` it
onto its name, fsync the folder. A reader sees the old file or the new one, never half of one, and after a crash
or power cut a present file is a complete one. A failed write leaves only the old file (the aside one is
removed); an aside file left by a killed process matches ``*.tmp-*``, the pattern the cleanups look for.
"""

from __future__ import annotations

import hashlib
import json
import os
import uuid
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path, PurePath
from typing import Any

from . import storage
from .errors import EdgeTableError

__all__ = ["resolve_input_files", "fingerprint_files", "digest", "atomic_output", "aside_path", "fsync_file",
           "fsync_folder", "write_text_atomic", "write_json_atomic", "read_json"]

_GLOB_CHARS = set("*?[")
_EDGE_BYTES = 1 << 20  # head and tail hashed for the files past the budget (a Parquet footer sits at the end)
#: Bytes of input hashed in full per fingerprint; SHA-256 reads about 1.3 GB/s here, so about 2 s at most.
FULL_HASH_BUDGET = 2 << 30


def resolve_input_files(pattern: str, *, suffixes=(".parquet",)) -> list[PurePath]:
    """The files a table setting names: one file, every file with one of ``suffixes`` under a folder, or a glob
    (its matching files); local paths or object-store URLs (:class:`graphkit.storage.ObjectPath` then, whose
    ``str`` is the URL; open them through :func:`graphkit.storage.files_for`).

    Raises
    ------
    EdgeTableError
        When nothing matches, naming the path (for a URL also a missing bucket, refused credentials, a protocol
        whose package is missing).
    """
    p = storage.location(pattern)
    files = storage.files_for(p)
    remote = storage.is_remote(p)
    if any(c in str(p) for c in _GLOB_CHARS):
        found = sorted(m for m, entry in files.glob(p) if entry is not None)
        if not found:
            raise EdgeTableError(f"{pattern}: no {'objects' if remote else 'files'} match this pattern")
        return found
    kind = files.kind(p)
    if kind == "directory":
        found = sorted(e.path for e in files.walk(p) if e.path.suffix in suffixes and not e.path.name.startswith("."))
        if not found:
            raise EdgeTableError(f"{pattern}: {'prefix' if remote else 'folder'} holds no {'/'.join(suffixes)} "
                                 f"{'objects' if remote else 'files'}")
        return found
    if kind is None:
        raise EdgeTableError(files.missing(p) if remote else f"{pattern}: file not found")
    return [p]


def fingerprint_files(files, *, full_hash_budget: int = FULL_HASH_BUDGET) -> list[dict[str, Any]]:
    """Path, size, modification time (ns) and a SHA-256 of the content of each file, in order; for an object on
    a store (:class:`graphkit.storage.ObjectPath`) its URL, size, modification time and entity tag, from the
    store's metadata (``"hashed": "metadata"``: nothing is downloaded; the tag changes with the content).

    Local files are hashed in full while their sizes add up to at most ``full_hash_budget`` bytes; a file past that
    budget gets a hash of its first and last MiB (``"hashed": "edges"``) and relies on its size and modification
    time for the rest. Any edit therefore changes the fingerprint: a same-size edit changes the mtime, and within
    the budget also the hash (an edit that keeps size and mtime, as ``cp -p`` or ``rsync -t`` of other content can).
    """
    files = list(files)
    objects = [f for f in files if storage.is_remote(f)]
    meta = dict(zip(objects, storage.stat_files(objects)))
    out = []
    left = full_hash_budget
    for f in files:
        if storage.is_remote(f):
            e = meta[f]
            out.append({"path": str(f), "size": e.size, "mtime_ns": e.mtime_ns, "etag": e.etag,
                        "hashed": "metadata"})
            continue
        f = Path(f)
        st = f.stat()
        size = st.st_size
        h = hashlib.sha256()
        with open(f, "rb") as fh:
            if size <= left:
                left -= size
                hashed = "full"
                for block in iter(lambda: fh.read(_EDGE_BYTES * 8), b""):
                    h.update(block)
            else:
                hashed = "edges"
                h.update(fh.read(_EDGE_BYTES))
                fh.seek(max(0, size - _EDGE_BYTES))
                h.update(fh.read())
        out.append({"path": str(f.resolve()), "size": size, "mtime_ns": st.st_mtime_ns, "sha256": h.hexdigest(),
                    "hashed": hashed})
    return out


def digest(obj: Any, n: int = 16) -> str:
    """A short stable hash of a JSON-serialisable object (cache keys, work-folder names)."""
    return hashlib.sha256(json.dumps(obj, sort_keys=True, default=str).encode()).hexdigest()[:n]


def aside_path(path) -> Path:
    """The name ``path`` is written under before its rename: hidden, in the same folder (so the rename stays on one
    file system), unique per attempt (two attempts at one file, a retry and a stale worker, never share it)."""
    path = Path(path)
    return path.with_name(f".{path.name}.tmp-{uuid.uuid4().hex}")


def fsync_file(path) -> None:
    """Flush ``path``'s data to the disk (whoever wrote it, through whatever handle)."""
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def fsync_folder(folder) -> None:
    """Make the renames and new names in ``folder`` durable."""
    fd = os.open(folder, os.O_RDONLY | os.O_DIRECTORY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


@contextmanager
def atomic_output(path) -> Iterator[Path]:
    """Write ``path`` whole or not at all: yields the aside path to write (and close) in the ``with`` block; on a
    normal exit that file is fsynced, renamed onto ``path`` and the folder fsynced; on an error it is removed and
    ``path`` is left as it was. The folder must exist.

    Example: ``with atomic_output(out) as tmp: pq.write_table(table, tmp)``.
    """
    path = Path(path)
    tmp = aside_path(path)
    try:
        yield tmp
        fsync_file(tmp)
        os.replace(tmp, path)
        fsync_folder(path.parent)
    finally:
        tmp.unlink(missing_ok=True)  # only there when the block or the fsync failed


def write_text_atomic(path, text: str) -> Path:
    """Write ``text`` (UTF-8) to ``path`` through :func:`atomic_output`, creating the folder if needed."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    with atomic_output(path) as tmp:
        tmp.write_text(text, encoding="utf-8")
    return path


def write_json_atomic(path, obj: Any, *, indent: int = 2) -> Path:
    """Write ``obj`` as JSON (sorted keys; other types as ``str``) to ``path`` through :func:`atomic_output`, so
    readers never see half a file."""
    return write_text_atomic(path, json.dumps(obj, indent=indent, sort_keys=True, default=str))


def read_json(path) -> Any:
    """The JSON document at ``path``."""
    return json.loads(Path(path).read_text())
