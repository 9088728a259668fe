"""The compiled loop of :func:`pipeline.stages.detect._pixel_gauss.pixel_profiles`.

Kept apart so that numba is imported only when the detect model first runs.
"""

from __future__ import annotations

import numba
import numpy as np

from pipeline.stages.detect._pixel_gauss import _ERF_SLOPE, _NODES_PER_SIGMA, _REACH, _SQRT2PI

__all__ = ["profiles_compiled"]


@numba.njit(cache=True, nogil=True)
def _erf_and_gauss(z, erf_table, gauss_table):
    """``erf(z / sqrt 2)`` and ``exp(-z^2 / 2)`` by Hermite interpolation in the tables."""
    u = (z + _REACH) * _NODES_PER_SIGMA
    if u <= 0.0:
        return -1.0, 0.0
    i = int(u)
    if i >= erf_table.size - 1:
        return 1.0, 0.0
    f = u - i
    f2 = f * f
    f3 = f2 * f
    h00 = 2.0 * f3 - 3.0 * f2 + 1.0
    h10 = f3 - 2.0 * f2 + f
    h01 = -2.0 * f3 + 3.0 * f2
    h11 = f3 - f2
    step = 1.0 / _NODES_PER_SIGMA
    g0 = gauss_table[i]
    g1 = gauss_table[i + 1]
    z0 = i * step - _REACH
    # d erf(z / sqrt 2) / dz = sqrt(2 / pi) exp(-z^2 / 2); d exp(-z^2 / 2) / dz = -z exp(..)
    c = h00 * erf_table[i] + h01 * erf_table[i + 1] + step * _ERF_SLOPE * (h10 * g0 + h11 * g1)
    g = h00 * g0 + h01 * g1 - step * (h10 * z0 * g0 + h11 * (z0 + step) * g1)
    return c, g


@numba.njit(cache=True, nogil=True)
def profiles_compiled(first, n, centres, sigmas, erf_table, gauss_table):
    value = np.empty((sigmas.size, centres.size, n))
    deriv = np.empty((sigmas.size, centres.size, n))
    for j in range(sigmas.size):
        inv = 1.0 / sigmas[j]
        scale = 1.0 / (_SQRT2PI * sigmas[j])
        for k in range(centres.size):
            z = (first - 0.5 - centres[k]) * inv
            c_lo, g_lo = _erf_and_gauss(z, erf_table, gauss_table)
            for e in range(n):
                z = (first + e + 0.5 - centres[k]) * inv
                c_hi, g_hi = _erf_and_gauss(z, erf_table, gauss_table)
                value[j, k, e] = 0.5 * (c_hi - c_lo)
                deriv[j, k, e] = -(g_hi - g_lo) * scale
                c_lo = c_hi
                g_lo = g_hi
    return value, deriv
