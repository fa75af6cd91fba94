"""Procrustes alignment of one version's vectors onto another's on their shared nodes (:func:`procrustes_rotation`)
and the residual drift left after it (:func:`procrustes_residual`); the store aligns published versions with it."""

from __future__ import annotations

import numpy as np

from ..errors import ConfigError
from .validate import _check_shared, _check_vectors

__all__ = ["procrustes_rotation", "procrustes_residual"]

#: Rows per block when accumulating the Procrustes cross-product in float64.
_PROCRUSTES_ROWS = 1 << 16


def _cross_product(prev, cur) -> np.ndarray:
    """``cur.T @ prev`` in float64, block by block so that no full float64 copy is made."""
    m = np.zeros((cur.shape[1], prev.shape[1]), dtype=np.float64)
    for start in range(0, prev.shape[0], _PROCRUSTES_ROWS):
        stop = start + _PROCRUSTES_ROWS
        m += cur[start:stop].astype(np.float64).T @ prev[start:stop].astype(np.float64)
    return m


def procrustes_rotation(prev, cur) -> np.ndarray:
    """The orthogonal matrix ``R`` minimising ``||cur @ R - prev||_F`` (orthogonal Procrustes, Schoenemann 1966).

    Same result as ``scipy.linalg.orthogonal_procrustes(cur, prev)[0]``, computed as ``U @ Vt`` from the SVD of
    ``cur.T @ prev`` accumulated in float64 over row blocks (no full float64 copy of the vectors).

    Parameters
    ----------
    prev, cur : ndarray of float, shape (n_shared, dim)
        Vectors of the same nodes in the same row order.

    Returns
    -------
    ndarray of float64, shape (dim, dim)
        Apply as ``cur @ R`` to align ``cur`` with ``prev``.

    Raises
    ------
    ConfigError
        Bad shapes or values.
    """
    prev, cur, _ = _check_shared(_check_vectors("prev", prev), _check_vectors("cur", cur))
    if prev.shape[1] != cur.shape[1]:
        raise ConfigError(f"prev and cur must have the same dimension, got {prev.shape[1]} and {cur.shape[1]}")
    u, _, vt = np.linalg.svd(_cross_product(prev, cur))
    return u @ vt


def procrustes_residual(prev, cur) -> dict:
    """How far ``cur`` stays from ``prev`` once rotated onto it: the part of the change a rotation cannot explain.

    Parameters
    ----------
    prev, cur : ndarray of float, shape (n_shared, dim)
        Vectors of the same nodes in the same row order.

    Returns
    -------
    dict
        ``residual``: ``||cur @ R - prev||_F / ||prev||_F`` with ``R`` from :func:`procrustes_rotation` (0 for a
        rotated copy); ``residual_unaligned``: the same without the rotation.

    Raises
    ------
    ConfigError
        Bad shapes or values, or ``prev`` is all zeros.
    """
    rotation = procrustes_rotation(prev, cur)
    prev, cur = np.asarray(prev), np.asarray(cur)
    num = den = raw = 0.0
    for start in range(0, prev.shape[0], _PROCRUSTES_ROWS):
        p = prev[start:start + _PROCRUSTES_ROWS].astype(np.float64)
        c = cur[start:start + _PROCRUSTES_ROWS].astype(np.float64)
        num += float(np.sum((c @ rotation - p) ** 2))
        raw += float(np.sum((c - p) ** 2))
        den += float(np.sum(p ** 2))
    if den == 0.0:
        raise ConfigError("prev is all zeros: the relative residual is undefined")
    return {"residual": float(np.sqrt(num / den)), "residual_unaligned": float(np.sqrt(raw / den))}
