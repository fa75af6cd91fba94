"""Pseudonymous node ids: keyed hashes (HMAC-SHA256) published instead of raw ids.

Ids are hashed once per run, at ingest, and stored beside the raw ids in the node dictionary; later stages read
them. HMAC-SHA256 (RFC 2104: ``H((K ^ opad) || H((K ^ ipad) || m))``) runs in a numba kernel over the ids' UTF-8
bytes straight from the Arrow buffers, in parallel: the SHA-256 compression of FIPS 180-4, continued from the
key's two prepared states, so every id costs two or three compressions and no Python object. The kernel writes the
hex text too. (hashlib in a Python loop costs a few microseconds per id, and a thread pool
does not help it: hashlib keeps the GIL for inputs this short.) Tested against the standard library's ``hmac``.
"""

from __future__ import annotations

import hashlib
import os

import numba
import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from .errors import ConfigError

__all__ = ["hash_ids", "salt_from_env"]

#: Ids hashed per chunk: bounds the hex text alive at a time (64 bytes per id).
HASH_CHUNK = 1 << 20
_BLOCK = 64  # SHA-256 block size in bytes


def salt_from_env(var: str) -> bytes:
    """The secret key for :func:`hash_ids`, read from environment variable ``var`` (at least 16 characters)."""
    value = os.environ.get(var)
    if not value:
        raise ConfigError(f"[input] hash_ids = true needs a secret key in environment variable {var}")
    if len(value) < 16:
        raise ConfigError(f"environment variable {var}: the hash key must have at least 16 characters, "
                          f"got {len(value)}")
    return value.encode()


def _root_bits(n: int, k: int) -> int:
    """floor(n ** (1/k)) for a non-negative integer, exactly."""
    x = int(round(n ** (1.0 / k)))
    while x ** k > n:
        x -= 1
    while (x + 1) ** k <= n:
        x += 1
    return x


def _first_primes(m: int) -> list[int]:
    out, c = [], 2
    while len(out) < m:
        if all(c % p for p in out):
            out.append(c)
        c += 1
    return out


# FIPS 180-4, sections 4.2.2 and 5.3.3: the first 32 bits of the fractional parts of the cube roots of the first 64
# primes, and of the square roots of the first 8 (computed here exactly rather than copied).
_K = np.array([_root_bits(p << 96, 3) & 0xFFFFFFFF for p in _first_primes(64)], dtype=np.uint32)
_H0 = np.array([_root_bits(p << 64, 2) & 0xFFFFFFFF for p in _first_primes(8)], dtype=np.uint32)


@numba.njit(cache=True, nogil=True, inline="always")
def _rotr(x, n):
    x = np.uint32(x)
    return np.uint32((x >> np.uint32(n)) | np.uint32(x << np.uint32(32 - n)))


@numba.njit(cache=True, nogil=True)
def _compress_kernel(state, block, k, w):
    """SHA-256 compression (FIPS 180-4, 6.2.2): absorb ``block`` (uint8 [64]) into ``state`` (uint32 [8], in
    place); ``w`` (uint32 [64]) is scratch. numba widens uint32 arithmetic, hence the casts back to 32 bits."""
    for t in range(16):
        w[t] = ((np.uint32(block[4 * t]) << np.uint32(24)) | (np.uint32(block[4 * t + 1]) << np.uint32(16))
                | (np.uint32(block[4 * t + 2]) << np.uint32(8)) | np.uint32(block[4 * t + 3]))
    for t in range(16, 64):
        s0 = _rotr(w[t - 15], 7) ^ _rotr(w[t - 15], 18) ^ (w[t - 15] >> np.uint32(3))
        s1 = _rotr(w[t - 2], 17) ^ _rotr(w[t - 2], 19) ^ (w[t - 2] >> np.uint32(10))
        w[t] = np.uint32(w[t - 16] + s0 + w[t - 7] + s1)
    a, b, c, d = state[0], state[1], state[2], state[3]
    e, f, g, h = state[4], state[5], state[6], state[7]
    for t in range(64):
        t1 = np.uint32(h + (_rotr(e, 6) ^ _rotr(e, 11) ^ _rotr(e, 25)) + ((e & f) ^ (np.uint32(~e) & g))
                       + k[t] + w[t])
        t2 = np.uint32((_rotr(a, 2) ^ _rotr(a, 13) ^ _rotr(a, 22)) + ((a & b) ^ (a & c) ^ (b & c)))
        h, g, f, e = g, f, e, np.uint32(d + t1)
        d, c, b, a = c, b, a, np.uint32(t1 + t2)
    state[0] += a
    state[1] += b
    state[2] += c
    state[3] += d
    state[4] += e
    state[5] += f
    state[6] += g
    state[7] += h


@numba.njit(cache=True, nogil=True)
def _put_words(state, block, at):
    for j in range(8):
        for b in range(4):
            block[at + 4 * j + b] = np.uint8((state[j] >> np.uint32(24 - 8 * b)) & np.uint32(0xFF))


@numba.njit(cache=True, nogil=True)
def _hmac_one(data, start, stop, inner, outer, k, st, block, w, out, row):
    """``out[row]`` (uint8 [64], lowercase hex) = SHA-256 of (``outer``'s block || SHA-256 of (``inner``'s block ||
    data[start:stop])) continuing from the two prepared states; ``st``, ``block``, ``w`` are scratch."""
    m = stop - start
    for j in range(8):
        st[j] = inner[j]
    pos = 0
    while m - pos >= 64:
        for j in range(64):
            block[j] = data[start + pos + j]
        _compress_kernel(st, block, k, w)
        pos += 64
    rem = m - pos
    for j in range(64):
        block[j] = data[start + pos + j] if j < rem else 0
    block[rem] = 0x80
    if rem >= 56:
        _compress_kernel(st, block, k, w)
        for j in range(64):
            block[j] = 0
    bits = np.uint64(64 + m) * np.uint64(8)  # the key block is part of the message
    for b in range(8):
        block[63 - b] = np.uint8((bits >> np.uint64(8 * b)) & np.uint64(0xFF))
    _compress_kernel(st, block, k, w)
    _put_words(st, block, 0)
    for j in range(32, 64):
        block[j] = 0
    block[32] = 0x80
    block[62] = 3  # (64 + 32) * 8 = 768 bits
    for j in range(8):
        st[j] = outer[j]
    _compress_kernel(st, block, k, w)
    for j in range(8):  # lowercase hex, 8 characters per word
        for b in range(8):
            nibble = (st[j] >> np.uint32(28 - 4 * b)) & np.uint32(0xF)
            out[row, 8 * j + b] = np.uint8(nibble + (48 if nibble < 10 else 87))


@numba.njit(cache=True, nogil=True, parallel=True)
def _hmac_kernel(data, offsets, inner, outer, k, out):
    """HMAC-SHA256 digests as hex text (uint8 [n, 64], filled in place) of the messages
    ``data[offsets[i]:offsets[i + 1]]`` (uint8, int64 [n + 1]) from the prepared inner and outer states
    (uint32 [8]); rows split in chunks of 4096 over the threads."""
    n = offsets.shape[0] - 1
    n_chunks = (n + 4095) // 4096
    for c in numba.prange(n_chunks):
        st = np.empty(8, np.uint32)
        block = np.empty(64, np.uint8)
        w = np.empty(64, np.uint32)
        for i in range(c * 4096, min(n, (c + 1) * 4096)):
            _hmac_one(data, offsets[i], offsets[i + 1], inner, outer, k, st, block, w, out, i)


def _keyed_states(key: bytes) -> tuple[np.ndarray, np.ndarray]:
    """The SHA-256 states after absorbing ``K ^ ipad`` and ``K ^ opad`` (RFC 2104, section 2)."""
    if len(key) > _BLOCK:
        key = hashlib.sha256(key).digest()
    key = key.ljust(_BLOCK, b"\0")
    w = np.empty(64, dtype=np.uint32)
    states = []
    for pad in (0x36, 0x5C):
        state = _H0.copy()
        _compress_kernel(state, np.frombuffer(bytes(b ^ pad for b in key), dtype=np.uint8).copy(), _K, w)
        states.append(state)
    return states[0], states[1]


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


def _text_array(hex_rows: np.ndarray) -> pa.Array:
    """A string array of the 64-character rows of ``hex_rows`` (uint8 [n, 64]), without a copy."""
    offsets = np.arange(0, 64 * (hex_rows.shape[0] + 1), 64, dtype=np.int32)
    return pa.StringArray.from_buffers(hex_rows.shape[0], pa.py_buffer(offsets), pa.py_buffer(hex_rows))


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
    parts = []
    for start in range(0, len(texts), HASH_CHUNK):
        chunk = texts.slice(start, HASH_CHUNK)
        offsets = np.frombuffer(chunk.buffers()[1], dtype=np.int64)[chunk.offset:chunk.offset + len(chunk) + 1]
        data = chunk.buffers()[2]
        data = np.frombuffer(data, dtype=np.uint8) if data is not None else np.zeros(0, np.uint8)
        digests = np.empty((len(chunk), 64), dtype=np.uint8)
        if len(chunk):  # a null has an empty slot and gets the hash of "" (masked below)
            _hmac_kernel(data, np.ascontiguousarray(offsets), inner, outer, _K, digests)
        part = _text_array(digests)
        if chunk.null_count:
            part = pc.if_else(chunk.is_valid(), part, pa.scalar(None, pa.string()))
        parts.append(part)
    if not parts:
        return pa.array([], pa.string())
    return pa.concat_arrays(parts) if len(parts) > 1 else parts[0]
