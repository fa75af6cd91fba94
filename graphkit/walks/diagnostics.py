"""Figures that describe a walk corpus for the run's record: log-log slopes of the visit and degree
distributions, never-visited and dead-end nodes."""

from __future__ import annotations

import math

import numpy as np

from ..checks import check_int as _check_int
from ..errors import ConfigError

__all__ = ["walk_diagnostics", "loglog_slope", "SLOPE_METHOD"]

#: How the log-log slopes of ``walk_diagnostics`` are fitted (stored beside them).
SLOPE_METHOD = ("least squares of log(density) on log(value) over logarithmic bins (4 per factor of 2) from the "
                "median value up, bins holding at least 5 nodes; density = nodes in bin / bin width / nodes > 0")
_BINS_PER_OCTAVE = 4
_MIN_BIN_NODES = 5


def loglog_slope(values) -> dict:
    """Slope of a distribution's density on log-log axes, fitted as ``SLOPE_METHOD`` says.

    A power law ``P(x) ~ x**-alpha`` gives ``slope ~ -alpha``. Starting at the median makes the fit scale-free:
    multiplying every value by a constant (visits ~ degree x steps per edge) leaves it unchanged.

    Returns
    -------
    dict
        ``slope`` (None when fewer than 3 bins qualify), ``x_min`` (the median), ``n_bins``, ``n_fit`` (nodes in the
        fitted bins) and ``method``.
    """
    x = np.asarray(values, dtype=np.float64)
    x = x[x > 0]
    result = {"slope": None, "x_min": None, "n_bins": 0, "n_fit": 0, "method": SLOPE_METHOD}
    if x.size == 0:
        return result
    x_min = float(np.median(x))
    tail = x[x >= x_min]
    n_edges = int(math.ceil(_BINS_PER_OCTAVE * math.log2(tail.max() / x_min))) + 2
    edges = x_min * 2.0 ** (np.arange(n_edges) / _BINS_PER_OCTAVE)
    counts, _ = np.histogram(tail, edges)
    ok = counts >= _MIN_BIN_NODES
    result.update(x_min=x_min, n_bins=int(ok.sum()), n_fit=int(counts[ok].sum()))
    if ok.sum() >= 3:
        density = counts[ok] / np.diff(edges)[ok] / x.size
        centre = np.sqrt(edges[:-1] * edges[1:])[ok]
        result["slope"] = round(float(np.polyfit(np.log(centre), np.log(density), 1)[0]), 4)
    return result


def walk_diagnostics(visit_counts, degrees, *, per_node, in_degrees=None, n_restarts=0) -> dict:
    """Figures that describe a walk corpus, for the run's record.

    Parameters
    ----------
    visit_counts : array_like of int, shape (n_nodes,)
        Occurrences of every node in the corpus (:func:`count_visits`, summed over shards).
    degrees : array_like of int, shape (n_nodes,)
        Out-degree of every node (``AdjacencyArrays.degrees()``).
    per_node : int
        Walks started at every node; the corpus has ``per_node * n_nodes`` walks.
    in_degrees : array_like of int, shape (n_nodes,), optional
        In-degree of every node for a directed graph; by default equal to ``degrees`` (undirected).
    n_restarts : int, default 0
        Restart steps in the corpus (:func:`count_restarts`).

    Returns
    -------
    dict
        ``n_walks``; ``n_tokens`` (entries other than padding); ``n_steps = n_tokens - n_walks`` (moves along an
        edge plus restarts); ``n_restarts``; ``nodes_never_visited`` (0 for a complete corpus, since every node
        starts walks); ``nodes_never_entered`` (only seen as the start of their own walks); ``isolated_nodes`` (no
        edge in or out); ``dead_end_nodes`` (no out-edge); ``visit_slope`` and ``degree_slope`` (:func:`loglog_slope`
        of the visit counts and of the out-degrees: on an undirected graph visits are about proportional to degree,
        so the two should agree, and on a scale-free graph both show the power law).

    Raises
    ------
    ConfigError
        The arrays differ in length or hold negative values.
    """
    per_node = _check_int("per_node", per_node, 1)
    visits = np.asarray(visit_counts, dtype=np.int64).ravel()
    out_deg = np.asarray(degrees, dtype=np.int64).ravel()
    in_deg = out_deg if in_degrees is None else np.asarray(in_degrees, dtype=np.int64).ravel()
    if not (visits.shape == out_deg.shape == in_deg.shape):
        raise ConfigError(f"visit_counts, degrees and in_degrees must have one value per node, got lengths "
                          f"{visits.size}, {out_deg.size}, {in_deg.size}")
    if visits.size and min(visits.min(), out_deg.min(), in_deg.min()) < 0:
        raise ConfigError("visit_counts and degrees must be >= 0")
    n_walks = per_node * visits.size
    n_tokens = int(visits.sum())
    return {
        "n_walks": n_walks,
        "n_tokens": n_tokens,
        "n_steps": n_tokens - n_walks,
        "n_restarts": int(n_restarts),
        "nodes_never_visited": int(np.count_nonzero(visits == 0)),
        "nodes_never_entered": int(np.count_nonzero(visits <= per_node)),
        "isolated_nodes": int(np.count_nonzero((out_deg == 0) & (in_deg == 0))),
        "dead_end_nodes": int(np.count_nonzero(out_deg == 0)),
        "visit_slope": loglog_slope(visits),
        "degree_slope": loglog_slope(out_deg),
    }
