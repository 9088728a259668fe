"""The compiled loops of :mod:`pipeline.stages.detect._pixel_gauss`'s profiles.

Kept apart so that numba is imported only when the detect model first runs.
"""

from __future__ import annotations

import numba
import numpy as np

from pipeline.stages.detect._pixel_gauss import (
    _ERF_SLOPE,
    _LEAST_BOX,
    _NODES_PER_SIGMA,
    _REACH,
    _SHARED_SLACK,
    _SQRT2PI,
)

__all__ = ["boxed_profiles_compiled", "profiles_compiled"]


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


@numba.njit(cache=True, nogil=True)
def _normal_sums(z, erf_table, gauss_table):
    """``Psi(z) = z Phi(z) + phi(z)`` (the normal CDF's integral), ``Phi(z)`` and ``phi(z)``."""
    c, g = _erf_and_gauss(z, erf_table, gauss_table)
    cdf = 0.5 * (1.0 + c)
    pdf = g / _SQRT2PI
    return z * cdf + pdf, cdf, pdf


@numba.njit(cache=True, nogil=True)
def boxed_profiles_compiled(first, n, centres, sigmas, box, erf_table, gauss_table):
    """Pixel profiles of Gaussians averaged over a top-hat ``box`` pixels wide, and derivatives.

    See :func:`pipeline.stages.detect._pixel_gauss.boxed_profiles`.
    """
    if box < _LEAST_BOX:
        return profiles_compiled(first, n, centres, sigmas, erf_table, gauss_table)
    q = int(np.floor(box + 0.5))
    eps = box - q
    shared = q >= 1 and abs(eps) <= _SHARED_SLACK
    m = n + 1 + q if shared else n + 1
    zs, psi, cdf, pdf = np.empty(m), np.empty(m), np.empty(m), np.empty(m)
    psi_m, cdf_m, psi_p, cdf_p = np.empty(n + 1), np.empty(n + 1), np.empty(n + 1), np.empty(n + 1)
    value = np.empty((sigmas.size, centres.size, n))
    deriv = np.empty((sigmas.size, centres.size, n))
    for j in range(sigmas.size):
        s = sigmas[j]
        inv = 1.0 / s
        h = 0.5 * eps * inv  # the points' shift from the shared ones, sigmas
        for k in range(centres.size):
            if shared:
                # Edge e - box / 2 is point e shifted by -eps / 2, edge e + box / 2
                # point e + q shifted by +eps / 2: Taylor's formula to second order.
                for e in range(m):
                    z = (first - 0.5 + e - 0.5 * q - centres[k]) * inv
                    zs[e] = z
                    psi[e], cdf[e], pdf[e] = _normal_sums(z, erf_table, gauss_table)
                for e in range(n + 1):
                    a = e + q
                    psi_m[e] = psi[e] - h * cdf[e] + 0.5 * h * h * pdf[e]
                    cdf_m[e] = cdf[e] - h * pdf[e] - 0.5 * h * h * zs[e] * pdf[e]
                    psi_p[e] = psi[a] + h * cdf[a] + 0.5 * h * h * pdf[a]
                    cdf_p[e] = cdf[a] + h * pdf[a] - 0.5 * h * h * zs[a] * pdf[a]
            else:
                for e in range(n + 1):
                    edge = first - 0.5 + e - centres[k]
                    z = (edge - 0.5 * box) * inv
                    psi_m[e], cdf_m[e], _ = _normal_sums(z, erf_table, gauss_table)
                    z = (edge + 0.5 * box) * inv
                    psi_p[e], cdf_p[e], _ = _normal_sums(z, erf_table, gauss_table)
            for e in range(n):
                value[j, k, e] = (s / box) * (psi_p[e + 1] - psi_p[e] - psi_m[e + 1] + psi_m[e])
                deriv[j, k, e] = -(cdf_p[e + 1] - cdf_p[e] - cdf_m[e + 1] + cdf_m[e]) / box
    return value, deriv
