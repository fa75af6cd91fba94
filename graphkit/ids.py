"""Pseudonymous node ids: keyed hashes (HMAC-SHA256) published instead of raw ids."""

from __future__ import annotations

import hashlib
import hmac
import os

import pyarrow as pa

from .errors import ConfigError

__all__ = ["hash_ids", "salt_from_env"]


def salt_from_env(var: str) -> bytes:
    """The secret key for :func:`hash_ids`, read from environment variable ``var`` (at least 16 characters)."""
    value = os.environ.get(var)
    if not value:
        raise ConfigError(f"[input] hash_ids = true needs a secret key in environment variable {var}")
    if len(value) < 16:
        raise ConfigError(f"environment variable {var}: the hash key must have at least 16 characters, "
                          f"got {len(value)}")
    return value.encode()


def hash_ids(ids, key: bytes) -> pa.Array:
    """HMAC-SHA256 of each id's text (``str(id)``, UTF-8) under ``key``, as 64 hex characters.

    The same id and key always give the same pseudonym, so downstream tables hashed with the same key still join;
    without the key the pseudonym cannot be recomputed from a guessed id.
    """
    values = ids.to_pylist() if isinstance(ids, (pa.Array, pa.ChunkedArray)) else list(ids)
    return pa.array([None if v is None else hmac.new(key, str(v).encode(), hashlib.sha256).hexdigest()
                     for v in values], pa.string())
