"""The compiled loops of :mod:`pipeline.stages.detect._pixel_gauss`'s profiles.

Kept apart so that numba is imported only when the detect model first runs.
"""

from __future__ import annotations

import numpy as np

from pipeline._jit import njit
from pipeline.stages.detect._pixel_gauss import (
    _ERF_SLOPE,
    _LEAST_BOX,
    _NODES_PER_SIGMA,
    _REACH,
    _SHARED_SLACK,
    _SQRT2PI,
)

__all__ = ["boxed_flat", "boxed_profiles_compiled", "profiles_compiled", "profiles_flat"]


@njit(nogil=True)
def _erf_and_gauss_many(zs, erf_table, gauss_table, c, g, scratch):
    """``erf(z / sqrt 2)`` and ``exp(-z^2 / 2)`` at each of ``zs``, into ``c`` and ``g``.

    Hermite interpolation in the tables (their values and slopes at nodes
    ``1 / _NODES_PER_SIGMA`` apart); -1 and 0 below the tables, 1 and 0
    above.

    In three loops: each value's table index, fraction and state (below,
    inside or above the tables), without branches (selects, which the
    compiler can vectorise; the loop that did this with branches and the
    look-ups together ran one value at a time); the table look-ups at those
    indices; then the Hermite interpolation, which
    the compiler vectorises (a loop that also reads the tables at computed
    indices is not, the gathers' cost being judged too high).  All into
    ``scratch`` (shape (7, zs.size), the last row the table indices).  The
    same values as one at a time (the tests' reference, which this equals
    to the bit): outside the tables the index is 0 and the fraction ``u``,
    as before, and the state sets the result.  The look-ups took 1.7 ns per
    value instead of 2.2 to 2.5 ns with one branchy loop (2400 values
    within +-6 or +-20 sigma, this machine).
    """
    m = zs.size
    last = erf_table.size - 2
    step = 1.0 / _NODES_PER_SIGMA
    frac, e0, e1, g0s, g1s, state = (
        scratch[0], scratch[1], scratch[2], scratch[3], scratch[4], scratch[5]
    )  # fmt: skip
    index = scratch[6]
    for e in range(m):
        u = (zs[e] + _REACH) * _NODES_PER_SIGMA
        k = int(max(u, 0.0))
        low = u <= 0.0
        high = k > last
        i = 0 if (low or high) else k
        state[e] = -1.0 if low else (1.0 if high else 0.0)
        frac[e] = u - i
        index[e] = i
    for e in range(m):
        i = int(index[e])
        e0[e] = erf_table[i]
        e1[e] = erf_table[i + 1]
        g0s[e] = gauss_table[i]
        g1s[e] = gauss_table[i + 1]
    for e in range(m):
        f = frac[e]
        f2 = f * f
        f3 = f2 * f
        h00 = 2.0 * f3 - 3.0 * f2 + 1.0
        h10 = f3 - 2.0 * f2 + f
        h01 = -2.0 * f3 + 3.0 * f2
        h11 = f3 - f2
        g0 = g0s[e]
        g1 = g1s[e]
        z0 = scratch[6, e] * step - _REACH
        cv = h00 * e0[e] + h01 * e1[e] + step * _ERF_SLOPE * (h10 * g0 + h11 * g1)
        gv = h00 * g0 + h01 * g1 - step * (h10 * z0 * g0 + h11 * (z0 + step) * g1)
        flag = state[e]
        c[e] = cv if flag == 0.0 else flag
        g[e] = gv if flag == 0.0 else 0.0


@njit(nogil=True)
def profiles_flat(first, n, centres, sigmas, erf_table, gauss_table, derivatives=True):
    """:func:`profiles_compiled`'s values, each sigma's rows laid end to end ``n + 1`` apart.

    Returns ``value``, ``deriv`` and the stride: pixel ``e < n`` of centre
    ``k`` and sigma ``j`` is ``[j, k * stride + e]`` (the last of each
    stride is not a pixel).  The loops run along all the rows at once,
    which the compiler vectorises (rows of 20 pixels cost more in loop
    overhead than in arithmetic); the same arithmetic as each edge in turn.
    ``derivatives`` False: ``deriv`` is left out (shape (J, 0)).
    """
    size = centres.size
    stride = n + 1
    m = size * stride
    value = np.empty((sigmas.size, m))
    deriv = np.empty((sigmas.size, m if derivatives else 0))
    # the edges first - 0.5, then (first + e) + 0.5, as each row subtracts its centre
    edges = np.empty(stride)
    edges[0] = first - 0.5
    for e in range(n):
        edges[1 + e] = first + e + 0.5
    zs, c, g = np.empty(m), np.empty(m), np.empty(m)
    scratch = np.empty((7, m))
    # (views rather than offset indices: an index the compiler knows is not
    # negative skips numba's wraparound test, and the loops vectorise)
    c1, g1 = c[1:], g[1:]
    for j in range(sigmas.size):
        inv = 1.0 / sigmas[j]
        scale = 1.0 / (_SQRT2PI * sigmas[j])
        for k in range(size):
            to = zs[k * stride :]
            centre = centres[k]
            for e in range(stride):
                to[e] = (edges[e] - centre) * inv
        _erf_and_gauss_many(zs, erf_table, gauss_table, c, g, scratch)
        vj = value[j]
        for e in range(m - 1):
            vj[e] = 0.5 * (c1[e] - c[e])
        vj[m - 1] = 0.0
        if derivatives:
            dj = deriv[j]
            for e in range(m - 1):
                dj[e] = -(g1[e] - g[e]) * scale
            dj[m - 1] = 0.0
    return value, deriv, stride


@njit(nogil=True)
def _unflatten(value, deriv, stride, size, n):
    """Flat profiles (:func:`profiles_flat`) as arrays of shape (J, K, n)."""
    out_v = np.empty((value.shape[0], size, n))
    out_d = np.empty((value.shape[0], size, n))
    for j in range(value.shape[0]):
        for k in range(size):
            from_v, from_d = value[j, k * stride :], deriv[j, k * stride :]
            to_v, to_d = out_v[j, k], out_d[j, k]
            for e in range(n):
                to_v[e] = from_v[e]
                to_d[e] = from_d[e]
    return out_v, out_d


@njit(nogil=True)
def profiles_compiled(first, n, centres, sigmas, erf_table, gauss_table):
    """Pixel-integrated Gaussians and their derivatives, shape (J, K, n); see ``pixel_profiles``."""
    value, deriv, stride = profiles_flat(first, n, centres, sigmas, erf_table, gauss_table)
    return _unflatten(value, deriv, stride, centres.size, n)


@njit(nogil=True)
def boxed_flat(first, n, centres, sigmas, box, erf_table, gauss_table, derivatives=True):
    """:func:`boxed_profiles_compiled`'s values laid out as :func:`profiles_flat`'s.

    Returns ``value``, ``deriv`` and the stride (pixel ``e < n`` of centre
    ``k`` at ``[j, k * stride + e]``).  The normal sums at every centre's
    edges are evaluated together, per sigma, and the loops run along all
    the rows at once: the same arithmetic as each edge in turn.
    ``derivatives`` False: ``deriv`` is left out (shape (J, 0)).
    """
    if box < _LEAST_BOX:
        return profiles_flat(first, n, centres, sigmas, erf_table, gauss_table, derivatives)
    q = int(np.floor(box + 0.5))
    eps = box - q
    shared = q >= 1 and abs(eps) <= _SHARED_SLACK
    # Per centre, the shared points (edge e + box / 2 is point e + q), or
    # the n + 1 edges - box / 2 and then + box / 2 (edge e + box / 2 is
    # point e + n + 1).
    stride = n + 1 + q if shared else 2 * (n + 1)
    ahead = q if shared else n + 1
    size = centres.size
    total = size * stride
    points = np.empty(stride)
    if shared:
        for e in range(stride):
            points[e] = first - 0.5 + e - 0.5 * q
    zs, psi, cdf, pdf = np.empty(total), np.empty(total), np.empty(total), np.empty(total)
    c, g, scratch = np.empty(total), np.empty(total), np.empty((7, total))
    psi_m, cdf_m, psi_p, cdf_p = np.empty(total), np.empty(total), np.empty(total), np.empty(total)
    value = np.empty((sigmas.size, total))
    deriv = np.empty((sigmas.size, total if derivatives else 0))
    span = total - ahead  # points with a partner ``ahead`` further on
    zq, psi_q, cdf_q, pdf_q = zs[ahead:], psi[ahead:], cdf[ahead:], pdf[ahead:]
    psi_m1, cdf_m1, psi_p1, cdf_p1 = psi_m[1:], cdf_m[1:], psi_p[1:], cdf_p[1:]
    for j in range(sigmas.size):
        s = sigmas[j]
        inv = 1.0 / s
        h = 0.5 * eps * inv  # the points' shift from the shared ones, sigmas
        for k in range(size):
            to = zs[k * stride :]
            centre = centres[k]
            if shared:
                for e in range(stride):
                    to[e] = (points[e] - centre) * inv
            else:
                for e in range(n + 1):
                    edge = first - 0.5 + e - centre
                    to[e] = (edge - 0.5 * box) * inv
                    to[n + 1 + e] = (edge + 0.5 * box) * inv
        _normal_sums_many(zs, erf_table, gauss_table, psi, cdf, pdf, c, g, scratch)
        if shared:
            # Edge e - box / 2 is point e shifted by -eps / 2, edge e + box / 2
            # point e + q shifted by +eps / 2: Taylor's formula to second order.
            for e in range(span):
                psi_m[e] = psi[e] - h * cdf[e] + 0.5 * h * h * pdf[e]
                psi_p[e] = psi_q[e] + h * cdf_q[e] + 0.5 * h * h * pdf_q[e]
            if derivatives:
                for e in range(span):
                    cdf_m[e] = cdf[e] - h * pdf[e] - 0.5 * h * h * zs[e] * pdf[e]
                    cdf_p[e] = cdf_q[e] + h * pdf_q[e] - 0.5 * h * h * zq[e] * pdf_q[e]
        else:
            for e in range(span):
                psi_m[e], cdf_m[e] = psi[e], cdf[e]
                psi_p[e], cdf_p[e] = psi_q[e], cdf_q[e]
        vj = value[j]
        for e in range(span - 1):
            vj[e] = (s / box) * (psi_p1[e] - psi_p[e] - psi_m1[e] + psi_m[e])
        for e in range(span - 1, total):
            vj[e] = 0.0
        if derivatives:
            dj = deriv[j]
            for e in range(span - 1):
                dj[e] = -(cdf_p1[e] - cdf_p[e] - cdf_m1[e] + cdf_m[e]) / box
            for e in range(span - 1, total):
                dj[e] = 0.0
    return value, deriv, stride


@njit(nogil=True)
def _normal_sums_many(zs, erf_table, gauss_table, psi, cdf, pdf, c, g, scratch):
    """``Psi(z) = z Phi(z) + phi(z)`` (the normal CDF's integral), ``Phi(z)`` and ``phi(z)``.

    At each of ``zs``, into ``psi``, ``cdf`` and ``pdf``, from
    :func:`_erf_and_gauss_many`.
    """
    _erf_and_gauss_many(zs, erf_table, gauss_table, c, g, scratch)
    for e in range(zs.size):
        cdf[e] = 0.5 * (1.0 + c[e])
        pdf[e] = g[e] / _SQRT2PI
        psi[e] = zs[e] * cdf[e] + pdf[e]


@njit(nogil=True)
def boxed_profiles_compiled(first, n, centres, sigmas, box, erf_table, gauss_table):
    """Pixel profiles of Gaussians averaged over a top-hat ``box`` pixels wide, and derivatives.

    See :func:`pipeline.stages.detect._pixel_gauss.boxed_profiles`; shape (J, K, n).
    """
    value, deriv, stride = boxed_flat(first, n, centres, sigmas, box, erf_table, gauss_table)
    return _unflatten(value, deriv, stride, centres.size, n)
