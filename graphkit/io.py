"""File helpers: resolving input paths, fingerprints, atomic writes and manifests."""

from __future__ import annotations

import glob as _glob
import hashlib
import json
import os
import tempfile
from pathlib import Path
from typing import Any

from .errors import EdgeTableError

__all__ = ["resolve_input_files", "fingerprint_files", "digest", "write_json_atomic", "read_json"]

_GLOB_CHARS = set("*?[")
_TAIL_BYTES = 1 << 20  # the footer (schema, row groups, statistics) sits at the end of a Parquet file


def resolve_input_files(pattern: str, *, suffixes=(".parquet",)) -> list[Path]:
    """The files an ``edges`` setting names: one file, every matching file under a folder, or a glob.

    Raises
    ------
    EdgeTableError
        When nothing matches, naming the path.
    """
    p = Path(pattern)
    if any(c in pattern for c in _GLOB_CHARS):
        files = sorted(Path(f) for f in _glob.glob(pattern, recursive=True) if Path(f).is_file())
        if not files:
            raise EdgeTableError(f"{pattern}: no files match this pattern")
        return files
    if p.is_dir():
        files = sorted(f for f in p.rglob("*") if f.is_file() and f.suffix in suffixes and not f.name.startswith("."))
        if not files:
            raise EdgeTableError(f"{pattern}: folder holds no {'/'.join(suffixes)} files")
        return files
    if not p.exists():
        raise EdgeTableError(f"{pattern}: file not found")
    return [p]


def fingerprint_files(files) -> list[dict[str, Any]]:
    """Path, size and a SHA-256 of the last MiB (the Parquet footer) of each file, in order."""
    out = []
    for f in files:
        f = Path(f)
        size = f.stat().st_size
        h = hashlib.sha256()
        with open(f, "rb") as fh:
            fh.seek(max(0, size - _TAIL_BYTES))
            h.update(fh.read())
        out.append({"path": str(f.resolve()), "size": size, "tail_sha256": h.hexdigest()})
    return out


def digest(obj: Any, n: int = 16) -> str:
    """A short stable hash of a JSON-serialisable object (cache keys, work-folder names)."""
    return hashlib.sha256(json.dumps(obj, sort_keys=True, default=str).encode()).hexdigest()[:n]


def write_json_atomic(path, obj: Any) -> Path:
    """Write JSON next to ``path`` and rename it into place, so readers never see half a file."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    with os.fdopen(fd, "w") as fh:
        json.dump(obj, fh, indent=2, sort_keys=True, default=str)
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, path)
    return path


def read_json(path) -> Any:
    return json.loads(Path(path).read_text())
