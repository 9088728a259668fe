"""The compiled loops of :mod:`pipeline.stages.detect._measure`: the sums of
:func:`~pipeline.stages.detect._measure.residual_quadrupole` and the joint fits
of many groups in one call.

Kept apart so that numba is imported only when the detect stage first measures.

Its functions call the model of :mod:`~pipeline.stages.detect._fit_jit` and
:mod:`~pipeline.stages.detect._pixel_gauss_jit`, whose machine code numba
caches with theirs: :mod:`pipeline._jit` keeps the cache in a folder per
version of all the compiled modules, so a change to the model alone is
compiled anew here too.
"""

from __future__ import annotations

import math

import numpy as np

from pipeline._jit import njit
from pipeline.stages.detect._fit_jit import (
    errors_compiled,
    fit_compiled,
    model_compiled,
    weighted_compiled,
)

__all__ = ["fit_groups_compiled", "quadrupole_sums", "seeing_chi2_compiled"]


@njit(nogil=True)
def quadrupole_sums(data, variance, model, unit, x, y):
    """The sums of ``residual_quadrupole`` over the good pixels of a stamp.

    Returns
    -------
    ndarray, shape (6,)
        ``sum(r g1)``, ``sum(r g2)``, ``sum(g1^2 V)``, ``sum(g1 g2 V)``,
        ``sum(g2^2 V)`` and ``sum(W rho^2 m)`` (see ``residual_quadrupole``;
        ``V`` not yet scaled by the noise correlation).
    """
    out = np.zeros(6)
    ny, nx = data.shape
    for j in range(ny):
        dy = j - y
        for i in range(nx):
            d = data[j, i]
            v = variance[j, i]
            if not (math.isfinite(d) and math.isfinite(v) and v > 0.0):
                continue
            dx = i - x
            w = unit[j, i]
            g1 = w * (dx * dx - dy * dy)
            g2 = w * 2.0 * dx * dy
            r = d - model[j, i]
            out[0] += r * g1
            out[1] += r * g2
            out[2] += g1 * g1 * v
            out[3] += g1 * g2 * v
            out[4] += g2 * g2 * v
            out[5] += w * (dx * dx + dy * dy) * model[j, i]
    return out


@njit(nogil=True)
def _stamp_bits(mask, shown, separate, y0, y1, x0, x1, units):
    """OR of the mask bits over a stamp, and over each star's core in it.

    The core of star ``s`` is where its unit model exceeds 5 % of its peak
    (none where the model holds a NaN, as numpy's ``unit > 0.05 * unit.max()``).
    Returns the stamp's and the cores' bits of ``mask`` and, with
    ``separate``, of ``shown`` (else ``mask``'s again).
    """
    stamp = 0
    stamp_shown = 0
    for j in range(y0, y1):
        for i in range(x0, x1):
            stamp |= mask[j, i]
            if separate:
                stamp_shown |= shown[j, i]
    if not separate:
        stamp_shown = stamp
    cores = np.zeros(units.shape[0], dtype=np.int64)
    cores_shown = np.zeros(units.shape[0], dtype=np.int64)
    if stamp == 0 and stamp_shown == 0:
        return stamp, cores, stamp_shown, cores_shown
    for s in range(units.shape[0]):
        peak = -np.inf
        nan = False
        for j in range(units.shape[1]):
            for i in range(units.shape[2]):
                value = units[s, j, i]
                if value != value:
                    nan = True
                elif value > peak:
                    peak = value
        if nan:
            continue
        for j in range(units.shape[1]):
            for i in range(units.shape[2]):
                if units[s, j, i] > 0.05 * peak:
                    cores[s] |= mask[y0 + j, x0 + i]
                    if separate:
                        cores_shown[s] |= shown[y0 + j, x0 + i]
        if not separate:
            cores_shown[s] = cores[s]
    return stamp, cores, stamp_shown, cores_shown


@njit(nogil=True)
def fit_groups_compiled(
    residual, variance, mask, boxes, members, x, y, dx, dy, kernels, sigmas, weights, responses,
    erf, gauss, noise_correlation, shown, separate,
):  # fmt: skip
    """Fit many groups of stars, each on its stamp, in one call; see ``measure_groups``.

    Per group, what ``_measure_group`` does for a joint fit: the weighted
    stamp (``weighted_compiled``), the fit (``fit_compiled`` with ``fit_stars``'
    default of 100 evaluations per parameter), its errors
    (``errors_compiled``), the sums of ``residual_quadrupole`` of each star
    the fit kept (positive flux, converged) and the mask bits of the stamp
    and of each star's core.  The same arithmetic in the same order: the
    results are those of the calls one by one, without the Python around
    each (a third of a crowded stretch's fitting time).

    Parameters
    ----------
    residual, variance : ndarray, shape (ny, nx)
        The stretch's background-subtracted image and variance.
    mask : ndarray of uint16, shape (ny, nx)
        The mask the flags are made from (detect's own copy).
    boxes : ndarray of int64, shape (m, 4)
        Each group's stamp ``(y0, y1, x0, x1)``.
    members : ndarray of int64, shape (m + 1,)
        Group ``g``'s stars are ``[members[g], members[g + 1])``.
    x, y : ndarray, shape (n,)
        Starting positions of the stars.
    dx, dy, kernels : ndarray
        The stars' kernel samples one after the other; star ``s``'s are
        ``[kernels[s], kernels[s + 1])``.
    sigmas, weights, responses, erf, gauss
        As ``fit_compiled`` takes them (``responses``: one row per star).
    noise_correlation : float
    shown : ndarray of uint16, shape (ny, nx)
        The mask whose bits the catalogue shows (the stretch's), read only
        with ``separate``; without it, ``mask``'s bits are shown.
    separate : bool

    Returns
    -------
    stars : ndarray, shape (n, 8)
        Flux, x, y and their errors, and the core's bits of ``mask`` and
        of ``shown``.
    quadrupoles : ndarray, shape (n, 6)
        ``quadrupole_sums`` of each star (NaN where the fit did not keep it).
    groups : ndarray, shape (m, 5)
        Background, reduced chi-square, status (``fit_compiled``'s: -1 a
        singular step, to be fitted again in Python) and the stamp's bits of
        ``mask`` and of ``shown``.
    """
    n_groups = boxes.shape[0]
    stars = np.full((x.size, 8), np.nan)
    quadrupoles = np.full((x.size, 6), np.nan)
    groups = np.zeros((n_groups, 5))
    for g in range(n_groups):
        y0, y1, x0, x1 = boxes[g, 0], boxes[g, 1], boxes[g, 2], boxes[g, 3]
        a, b = members[g], members[g + 1]
        data = residual[y0:y1, x0:x1]
        var = variance[y0:y1, x0:x1]
        sw, d, n_good = weighted_compiled(data, var)
        k0 = kernels[a]
        bounds = kernels[a : b + 1] - k0
        p, jac, units, chi2, status = fit_compiled(
            d, sw, float(x0), x1 - x0, float(y0), y1 - y0, x[a:b].copy(), y[a:b].copy(),
            dx[k0 : kernels[b]].copy(), dy[k0 : kernels[b]].copy(), bounds, sigmas, weights,
            responses[a:b].copy(), erf, gauss, 100 * (1 + 3 * (b - a)),
        )  # fmt: skip
        groups[g, 2] = status
        if status < 0:
            continue
        err, ok = errors_compiled(np.ascontiguousarray(jac), noise_correlation)
        if not ok:
            err[:] = np.nan
        groups[g, 0] = p[0]
        groups[g, 1] = chi2 / max(n_good - p.size, 1)
        stamp, cores, stamp_shown, cores_shown = _stamp_bits(
            mask, shown, separate, y0, y1, x0, x1, units
        )
        groups[g, 3] = stamp
        groups[g, 4] = stamp_shown
        # the whole model: background plus every star, summed as _fitted_model does
        model = np.zeros((y1 - y0, x1 - x0))
        for s in range(b - a):
            model += p[1 + 3 * s] * units[s]
        model = p[0] + model
        for s in range(b - a):
            for k in range(3):
                stars[a + s, k] = p[1 + 3 * s + k]
                stars[a + s, 3 + k] = err[1 + 3 * s + k]
            stars[a + s, 6] = cores[s]
            stars[a + s, 7] = cores_shown[s]
            if status == 1 and p[1 + 3 * s] > 0:
                quadrupoles[a + s] = quadrupole_sums(
                    data, var, model, units[s], p[2 + 3 * s] - x0, p[3 + 3 * s] - y0
                )
    return stars, quadrupoles, groups


@njit(nogil=True)
def seeing_chi2_compiled(data, variance, x, y, dx, dy, response, sigmas, weights, erf, gauss):
    """Reduced chi-square of a star's stamp against the model at each trial seeing width.

    For trial ``t`` (mixture ``sigmas[t]``, ``weights[t]``; zero weights pad
    a shorter mixture) the unit model at ``(x, y)`` (stamp pixels) is
    ``model_compiled``'s, and background and flux are solved linearly by
    the normal equations of the weighted columns ``1`` and ``unit``: what
    ``seeing_curves`` did with one ``model_image`` and ``lstsq`` per trial,
    to rounding (~1e-13 of each value).  Pixels with non-finite data or
    variance, or variance <= 0, are left out.

    Returns
    -------
    ndarray, shape (m,)
    """
    ny, nx = data.shape
    sw, d, n_good = weighted_compiled(data, variance)
    out = np.empty(sigmas.shape[0])
    dof = max(n_good - 2, 1)
    for t in range(sigmas.shape[0]):
        unit = model_compiled(
            x, y, 0.0, nx, 0.0, ny, dx, dy, sigmas[t], weights[t], response, erf, gauss
        ).ravel()
        a11 = a12 = a22 = b1 = b2 = 0.0
        for i in range(d.size):
            if sw[i] == 0.0:
                continue
            u = unit[i] * sw[i]
            a11 += sw[i] * sw[i]
            a12 += sw[i] * u
            a22 += u * u
            b1 += sw[i] * d[i]
            b2 += u * d[i]
        det = a11 * a22 - a12 * a12
        if det == 0.0:
            out[t] = np.nan
            continue
        c1 = (a22 * b1 - a12 * b2) / det
        c2 = (a11 * b2 - a12 * b1) / det
        chi2 = 0.0
        for i in range(d.size):
            if sw[i] == 0.0:
                continue
            r = c1 * sw[i] + c2 * unit[i] * sw[i] - d[i]
            chi2 += r * r
        out[t] = chi2 / dof
    return out
