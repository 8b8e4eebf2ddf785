"""Fast form of the density-flattened NFW halo: compiled kernels reading an expansion table.

Placeholder: the expansion is not built yet; the kernels return NaN so that any use fails loudly.
"""

import math

import numba as nb


@nb.njit(cache=True, inline="always")
def expansion_accel(p, aux, x, y, z):
    return math.nan, math.nan, math.nan


@nb.njit(cache=True, inline="always")
def expansion_potential(p, aux, x, y, z):
    return math.nan
