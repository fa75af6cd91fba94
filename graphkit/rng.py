"""The counter-based random stream shared by the walk and training kernels: splitmix64 (Steele, Lea & Flood 2014).

A stream's state is a uint64; every draw adds the golden-ratio increment ``G`` and mixes the result, so a stream
keyed on (seed, item number) gives the same numbers on any thread or shard.
"""

from __future__ import annotations

import numba
import numpy as np

__all__ = ["G", "S32", "LOW32", "mix_kernel"]

#: The golden-ratio increment of every draw.
G = np.uint64(0x9E3779B97F4A7C15)
_M1 = np.uint64(0xBF58476D1CE4E5B9)
_M2 = np.uint64(0x94D049BB133111EB)
_S27 = np.uint64(27)
_S30 = np.uint64(30)
_S31 = np.uint64(31)
#: Shift that takes the high 32 bits of a draw.
S32 = np.uint64(32)
#: Mask of the low 32 bits of a draw.
LOW32 = np.uint64(0xFFFFFFFF)


@numba.njit(cache=True, nogil=True, inline="always")
def mix_kernel(z):
    """splitmix64 output function of a uint64."""
    z = (z ^ (z >> _S30)) * _M1
    z = (z ^ (z >> _S27)) * _M2
    return z ^ (z >> _S31)


# The earlier private names, for code that still imports them.
_G, _S32, _LOW32, _mix_kernel = G, S32, LOW32, mix_kernel
