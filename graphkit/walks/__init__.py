"""Truncated random walks over a CSR graph: first order (weighted or not, along edge direction) and second order.

The package holds three parts:

* :mod:`graphkit.walks.kernels`: the numba kernels and the exact definition of the walks (start permutation, random
  streams, edge draws, second-order coins, dead ends);
* :mod:`graphkit.walks.drivers`: validation and the public drivers :func:`random_walks`, :func:`walk_range`,
  :func:`alias_table`, :func:`count_visits`, :func:`count_restarts`;
* :mod:`graphkit.walks.diagnostics`: the figures recorded about a corpus (:func:`walk_diagnostics`,
  :func:`loglog_slope`).

Everything is re-exported here, so ``from graphkit.walks import X`` keeps working for every name it served before
the split (the private kernel names included: the tests and benchmarks reach into them).
"""

from __future__ import annotations

from ..checks import check_int as _check_int
from ..prefetch import prefetch as _prefetch
from ..rng import G as _G, LOW32 as _LOW32, S32 as _S32, mix_kernel as _mix_kernel
from .diagnostics import SLOPE_METHOD, loglog_slope, walk_diagnostics
from .drivers import (DEAD_ENDS, P_Q_RANGE, Walker, _check_graph, _check_threads, _check_walks, _csr_arrays,
                      _perm_bits, _prepare, _readonly, _run, _Walker, acceptance_thresholds, alias_table,
                      check_walk_options, check_walk_params, count_restarts, count_visits, prepare_walker,
                      random_walks, run_walks, walk_range)
from .kernels import (FEISTEL_ROUNDS, MIN_PERM_BITS, PERM_SALT, _alias_choose_kernel, _bounded_kernel, _coin_kernel,
                      _count_restarts_kernel, _count_visits_kernel, _first_unsorted_kernel, _has_edge_kernel,
                      _permute_kernel, _propose_kernel, _settle_kernel, _settle_second_kernel, _walk_block_kernel,
                      _walks_parallel_kernel, _walks_serial_kernel)

__all__ = ["random_walks", "walk_range", "count_visits", "count_restarts", "alias_table", "walk_diagnostics",
           "loglog_slope", "check_walk_options", "check_walk_params", "prepare_walker", "run_walks", "Walker",
           "acceptance_thresholds", "DEAD_ENDS", "P_Q_RANGE", "SLOPE_METHOD", "PERM_SALT", "FEISTEL_ROUNDS",
           "MIN_PERM_BITS"]

# Private names served before the split (tests reach into the kernels, benchmarks into the prefetch and the stream);
# listed so that they count as used.
_KEPT = (_check_int, _prefetch, _G, _LOW32, _S32, _mix_kernel, _check_graph, _check_threads, _check_walks,
         _csr_arrays, _perm_bits, _prepare, _readonly, _run, _Walker, _alias_choose_kernel, _bounded_kernel,
         _coin_kernel, _count_restarts_kernel, _count_visits_kernel, _first_unsorted_kernel, _has_edge_kernel,
         _permute_kernel, _propose_kernel, _settle_kernel, _settle_second_kernel, _walk_block_kernel,
         _walks_parallel_kernel, _walks_serial_kernel)
