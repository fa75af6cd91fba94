"""Pseudonymous node ids: keyed hashes (HMAC-SHA256) published instead of raw ids.

Ids are hashed once per run, at ingest, and stored beside the raw ids in the node dictionary; later stages read
them. The hashing reuses the key's two prepared SHA-256 states (RFC 2104: ``H((K ^ opad) || H((K ^ ipad) || m))``),
so each id costs two ``copy``/``update`` pairs in hashlib's C code instead of a new HMAC object, and the hex text
is built for a whole chunk at once in numpy. (A thread pool does not help: hashlib keeps the GIL for inputs this
short.)
"""

from __future__ import annotations

import hashlib
import os

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from .errors import ConfigError

__all__ = ["hash_ids", "salt_from_env"]

#: Ids hashed per chunk: bounds the Python objects alive at a time (about 100 bytes per id).
HASH_CHUNK = 1 << 20
_BLOCK = 64  # SHA-256 block size in bytes
_HEX = np.frombuffer(b"0123456789abcdef", dtype=np.uint8)


def salt_from_env(var: str) -> bytes:
    """The secret key for :func:`hash_ids`, read from environment variable ``var`` (at least 16 characters)."""
    value = os.environ.get(var)
    if not value:
        raise ConfigError(f"[input] hash_ids = true needs a secret key in environment variable {var}")
    if len(value) < 16:
        raise ConfigError(f"environment variable {var}: the hash key must have at least 16 characters, "
                          f"got {len(value)}")
    return value.encode()


def _keyed_states(key: bytes):
    """The SHA-256 states after absorbing ``K ^ ipad`` and ``K ^ opad`` (RFC 2104, section 2)."""
    if len(key) > _BLOCK:
        key = hashlib.sha256(key).digest()
    key = key.ljust(_BLOCK, b"\0")
    inner = hashlib.sha256(bytes(b ^ 0x36 for b in key))
    outer = hashlib.sha256(bytes(b ^ 0x5C for b in key))
    return inner, outer


def _id_texts(ids) -> pa.Array:
    """The ids as a large_string Arrow array of their text (``str(id)``), nulls kept."""
    if isinstance(ids, pa.ChunkedArray):
        ids = ids.combine_chunks()
    if isinstance(ids, pa.Array):
        t = ids.type
        if pa.types.is_integer(t) or pa.types.is_string(t) or pa.types.is_large_string(t) \
                or pa.types.is_string_view(t):
            return pc.cast(ids, pa.large_string())  # integers print as str(int) does
        ids = ids.to_pylist()
    return pa.array([None if v is None else str(v) for v in ids], pa.large_string())


def _hex_array(digests: list[bytes]) -> pa.Array:
    """64-character lowercase hex strings of 32-byte digests, built in one pass."""
    raw = np.frombuffer(b"".join(digests), dtype=np.uint8)
    text = np.empty(raw.size * 2, dtype=np.uint8)
    text[0::2] = _HEX[raw >> 4]
    text[1::2] = _HEX[raw & 15]
    offsets = np.arange(0, 64 * (len(digests) + 1), 64, dtype=np.int32)
    return pa.StringArray.from_buffers(len(digests), pa.py_buffer(offsets), pa.py_buffer(text))


def hash_ids(ids, key: bytes) -> pa.Array:
    """HMAC-SHA256 of each id's text (``str(id)``, UTF-8) under ``key``, as 64 hex characters; nulls stay null.

    The same id and key always give the same pseudonym, so downstream tables hashed with the same key still join;
    without the key the pseudonym cannot be recomputed from a guessed id.

    Parameters
    ----------
    ids : pyarrow Array or ChunkedArray (integers or strings), or an iterable of ids
    key : bytes

    Returns
    -------
    pyarrow StringArray, one entry per id
    """
    texts = _id_texts(ids)
    inner, outer = _keyed_states(key)
    new_inner, new_outer = inner.copy, outer.copy
    parts = []
    for start in range(0, len(texts), HASH_CHUNK):
        chunk = texts.slice(start, HASH_CHUNK)
        offsets = np.frombuffer(chunk.buffers()[1], dtype=np.int64)[chunk.offset:chunk.offset + len(chunk) + 1]
        data = chunk.buffers()[2]
        data = data.to_pybytes() if data is not None else b""
        bounds = offsets.tolist()
        digests = []
        append = digests.append
        for a, b in zip(bounds[:-1], bounds[1:]):  # a null has an empty slot and gets the hash of "" (masked below)
            h = new_inner()
            h.update(data[a:b])
            o = new_outer()
            o.update(h.digest())
            append(o.digest())
        part = _hex_array(digests)
        if chunk.null_count:
            part = pc.if_else(chunk.is_valid(), part, pa.scalar(None, pa.string()))
        parts.append(part)
    if not parts:
        return pa.array([], pa.string())
    return pa.concat_arrays(parts) if len(parts) > 1 else parts[0]
