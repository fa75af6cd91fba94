"""The alias-table kernel (Walker 1977; Vose 1991, "A linear algorithm for generating random numbers with a given
distribution") behind both public ``alias_table`` functions: per-node edge draws of weighted walks
(:func:`graphkit.walks.alias_table`) and the negative-sampling distribution of training
(:func:`graphkit.train.alias_table`, one distribution over all nodes).

A table holds one uint64 per column: the high 32 bits are the probability of keeping the column in units of
2**-32, the low 32 bits the column its draws go to otherwise (its alias). Construction, per segment of ``d``
weights starting at ``a``: ``W`` = the float64 sum of the weights in order; ``u_i = w_i * d / W``; columns with
``u_i < 1`` go on a stack ``small``, the others on a stack ``large``, in order. While both are non-empty: pop ``s``
from ``small`` and ``l`` from ``large``, set ``table[a + s] = (floor(u_s * 2**32) << 32) | l``,
``u_l = (u_l + u_s) - 1`` and push ``l`` back on ``small`` if ``u_l < 1``, else on ``large``. Every column left on
either stack gets ``((2**32 - 1) << 32) | itself``: a full column is exactly one whose alias is itself.
"""

from __future__ import annotations

import numba
import numpy as np

from .rng import S32

__all__ = ["alias_table_kernel", "FULL"]

#: Table entry of a column that always keeps itself (its alias is itself, so the draw does not depend on the coin).
FULL = np.uint64(0xFFFFFFFF << 32)


@numba.njit(cache=True, nogil=True)
def alias_table_kernel(indptr, weights, out, u, small, large):
    """Alias table of every segment ``weights[indptr[v]:indptr[v + 1]]`` (module doc) into out uint64 [m], in
    place. indptr int64 [n + 1]; weights float32 or float64 [m], finite and >= 0 with a positive sum per non-empty
    segment; u float64, small/large int64 scratch of at least the longest segment."""
    for v in range(indptr.shape[0] - 1):
        a = indptr[v]
        d = indptr[v + 1] - a
        total = 0.0
        for i in range(d):
            total += np.float64(weights[a + i])
        n_small = 0
        n_large = 0
        for i in range(d):
            u[i] = np.float64(weights[a + i]) * d / total
            if u[i] < 1.0:
                small[n_small] = i
                n_small += 1
            else:
                large[n_large] = i
                n_large += 1
        while n_small > 0 and n_large > 0:
            n_small -= 1
            n_large -= 1
            s = small[n_small]
            big = large[n_large]
            out[a + s] = (np.uint64(u[s] * 4294967296.0) << S32) | np.uint64(big)
            u[big] = (u[big] + u[s]) - 1.0
            if u[big] < 1.0:
                small[n_small] = big
                n_small += 1
            else:
                large[n_large] = big
                n_large += 1
        for i in range(n_large):
            out[a + large[i]] = FULL | np.uint64(large[i])
        for i in range(n_small):
            out[a + small[i]] = FULL | np.uint64(small[i])
