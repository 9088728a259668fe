"""The compiled fit of one star, or a group of stars, and a background on a stamp.

:func:`pipeline.stages.detect._model.fit_stars` with a fitted background
(every fit of the stage: single stars, and groups of up to ``max_joint``
stars fitted jointly) runs here, in one compiled call: the same linear
start, the same damped Gauss-Newton steps
(:func:`pipeline.stages.detect._model._levenberg_marquardt`) and the same
model (:func:`pipeline.stages.detect._model._unit_model`'s products
of per-sample profiles, with rectify's resampling response), without the
Python calls around each evaluation, which cost more than the model itself
on a short track (0.6 ms per fit of a 16 x 16 stamp, where the arithmetic
takes a tenth of it).  On a dense stretch (1035 x 4096 px, 467 groups) the
group fits took 10.2 s of CPU in the Python loop and about 2.5 s here
(one run each, on a machine loaded four times over).  Kept apart
so that numba is imported only when the detect model first runs.  Its cached
machine code holds :mod:`~pipeline.stages.detect._pixel_gauss_jit`'s and is
held by :mod:`~pipeline.stages.detect._measure_jit`'s, and numba checks only
each file's own stamp: see the note there.
"""

from __future__ import annotations

import numpy as np

from pipeline._jit import njit
from pipeline.stages.detect._pixel_gauss_jit import (
    boxed_flat,
    profiles_flat,
)

__all__ = [
    "CONVERGED",
    "POOR_GAIN",
    "errors_compiled",
    "fit_compiled",
    "model_compiled",
    "reduce_compiled",
    "reduce_many_compiled",
    "subtract_models_compiled",
    "weighted_compiled",
]


#: A step accepted because it lowers the chi-square, but by less than this
#: fraction of what the fit's quadratic model of the chi-square promised for
#: it, raises the damping (x 10) instead of lowering it (x 0.1): the
#: Gauss-Newton model is poor there.  Without it a fit whose residual holds
#: what the model lacks (a neighbour's wing, a source off the stamp) takes
#: full steps that overshoot to and fro, each lowering the chi-square a
#: little: a lone star of S/N 9 took 200 evaluations, falling by 0.01 per
#: step; with it, 6 (common practice: the gain ratio of trust-region
#: methods, whose usual threshold is 1/4).  A step of ratio >= 1/4 is
#: damped as before, so fits that never take a poor step are unchanged.
POOR_GAIN = 0.25

#: A fit has converged when its next step's predicted chi-square change
#: ``d^T H d`` (undamped: times ``(1 + lambda)^2``, what the damping shrinks
#: it by along a diagonal ``H``) is below this: a step under a tenth of a
#: standard error in every parameter, taken to first order without
#: evaluating the model there.  The Gauss-Newton step is exact for a model
#: linear over the step; what it misses is of order ``d^2 / L`` for a model
#: that bends over ``L`` (the profile's width, > 1 px), i.e. < 1e-2 of a
#: standard error for position errors < 0.1 px (S/N > 10).  At 1e-4 (a
#: hundredth of an error) a crowded stretch's refits at a seeing 2 % off the
#: first pass's took a second evaluation each, to move less than that: 1.5
#: evaluations per fit after the start instead of 0.5 (the steps below 1e-4
#: still end a fit as before, however damped).
CONVERGED = 1e-2


@njit(nogil=True)
def _keys(s):
    """The Keys (a = -0.5) cubic-convolution kernel at distance ``s``, pixels."""
    s = abs(s)
    if s < 1.0:
        return (1.5 * s - 2.5) * s * s + 1.0
    if s < 2.0:
        return ((-0.5 * s + 2.5) * s - 4.0) * s + 2.0
    return 0.0


@njit(nogil=True)
def _taps(first, lattice, box):
    """Where rectify's sampling reads the profiles, and with what weights.

    ``lattice`` < 0: no resampling; ``box`` <= 0: no clocking top-hat.
    Returns the first pixel centre of the grid the profiles are evaluated
    on (``first - 2 + offset``, in that order: the numpy model's
    :func:`~pipeline.stages.detect._model._sampled_profiles` arithmetic, to
    the bit), its extra pixels, and the taps: output pixel ``i`` is ``sum_t
    weights[t] profile[i + shifts[t]]`` over the Keys kernel's non-zero
    taps, in order.
    """
    if lattice < 0.0 and box <= 0.0:
        return first, 0, np.ones(1), np.zeros(1, dtype=np.int64)
    offset = 0.0 if lattice < 0.0 else lattice
    weights = np.empty(5)
    shifts = np.empty(5, dtype=np.int64)
    count = 0
    for e in range(5):
        w = _keys(e - 2.0 + offset) if lattice >= 0.0 else (1.0 if e == 2 else 0.0)
        if w == 0.0:
            continue
        weights[count] = w
        shifts[count] = e
        count += 1
    return first - 2.0 + offset, 4, weights[:count], shifts[:count]


@njit(nogil=True)
def _rows_stepped(
    first, n, centres, sigmas, weights, lattice, box, step, erf_table, gauss_table, transpose,
    derivatives,
):  # fmt: skip
    """:func:`_rows` on an image resampled from the rectified one (a mosaic tile).

    ``step`` of its pixels per rectified pixel (signed): each Keys tap is
    the profile on the grid shifted by ``step`` times the tap's rectified
    distance (:class:`~pipeline.stages.detect._model.Response`), summed in
    the numpy model's order.
    """
    n_samples = centres.size
    rows = sigmas.size * n_samples
    stride = n + 1
    acc_v = np.zeros(0)
    acc_d = np.zeros(0)
    started = False
    for e in range(5):
        w = _keys(e - 2.0 + lattice)
        if w == 0.0:
            continue
        start = first + step * (e - 2.0 + lattice)
        if box > 0.0:
            v, d, stride = boxed_flat(
                start, n, centres, sigmas, box, erf_table, gauss_table, derivatives
            )
        else:
            v, d, stride = profiles_flat(
                start, n, centres, sigmas, erf_table, gauss_table, derivatives
            )
        width = rows * stride
        flat_v = v.reshape(width)
        flat_d = d.reshape(width if derivatives else 0)
        if not started:
            acc_v = np.zeros(width)
            acc_d = np.zeros(width if derivatives else 0)
            started = True
        for q in range(width):
            acc_v[q] += w * flat_v[q]
        if derivatives:
            for q in range(width):
                acc_d[q] += w * flat_d[q]
    return _laid_out(acc_v, acc_d, stride, n, weights, n_samples, sigmas.size, transpose)


@njit(nogil=True)
def _laid_out(acc_v, acc_d, stride, n, weights, n_samples, n_sigmas, transpose):
    """The summed profiles (rows ``stride`` apart) as :func:`_rows` returns them."""
    rows = n_sigmas * n_samples
    with_d = acc_d.size > 0
    if transpose:
        return _columns(acc_v, stride, n, rows), _columns(acc_d, stride, n, rows if with_d else 0)
    out_v = _scaled_rows(acc_v, stride, n, weights, n_samples, n_sigmas)
    out_d = _scaled_rows(acc_d, stride, n, weights, n_samples, n_sigmas if with_d else 0)
    return out_v, out_d


@njit(nogil=True)
def _rows(
    first, n, centres, sigmas, weights, lattice, box, erf_table, gauss_table, transpose,
    derivatives=True, step=1.0,
):  # fmt: skip
    """Profiles as rectify samples them, laid out for the model's matrix products.

    ``transpose`` False: each times its component's weight over K, as rows
    of shape (J K, n); True: unweighted, transposed to (n, J K).  Each value
    the same sums of the same products in the same order as the numpy model
    (:func:`~pipeline.stages.detect._model._sampled_profiles` times
    ``weights / K``), so equal to it to the bit.  ``derivatives`` False:
    the derivatives' rows are left out (shape (0, 0)), for a model alone.
    ``step`` other than 1: the grid is an image resampled from the
    rectified one (:func:`_rows_stepped`).
    """
    if step != 1.0 and lattice >= 0.0:
        return _rows_stepped(
            first, n, centres, sigmas, weights, lattice, box, step, erf_table, gauss_table,
            transpose, derivatives,
        )  # fmt: skip
    start, extra, taps, shifts = _taps(first, lattice, box)
    if box > 0.0:
        v, d, stride = boxed_flat(
            start, n + extra, centres, sigmas, box, erf_table, gauss_table, derivatives
        )
    else:
        v, d, stride = profiles_flat(
            start, n + extra, centres, sigmas, erf_table, gauss_table, derivatives
        )
    n_samples = centres.size
    rows = sigmas.size * n_samples
    # Tap by tap along all the rows laid end to end (long loops that the
    # compiler vectorises; 160 rows of 20 pixels each cost more in loop
    # overhead than in arithmetic); each pixel's sum in the taps' order, as
    # before.  Sums past a row's pixels (whose taps read the next row) are
    # not used.
    width = rows * stride
    flat_v = v.reshape(width)
    flat_d = d.reshape(width if derivatives else 0)
    span = width - extra
    if taps.size == 4:  # a lattice offset strictly between 0 and 1: every fit's case
        acc_v = _four_taps(flat_v, taps, shifts, span)
        acc_d = _four_taps(flat_d, taps, shifts, span if derivatives else 0)
    else:
        acc_v = np.zeros(span)
        acc_d = np.zeros(span if derivatives else 0)
        for t in range(taps.size):
            w = taps[t]
            # views from the tap's shift on: an index the compiler knows is not
            # negative (``q + shift`` would take numba's wraparound test, which
            # keeps the loop from being vectorised)
            from_v = flat_v[shifts[t] :]
            for q in range(span):
                acc_v[q] += w * from_v[q]
            if derivatives:
                from_d = flat_d[shifts[t] :]
                for q in range(span):
                    acc_d[q] += w * from_d[q]
    return _laid_out(acc_v, acc_d, stride, n, weights, n_samples, sigmas.size, transpose)


@njit(nogil=True)
def _four_taps(flat, taps, shifts, span):
    """``sum_t taps[t] flat[q + shifts[t]]`` for ``q < span``, four taps in one pass.

    The sums of :func:`_rows`' loop over the taps (a zero, then each tap's
    product added in turn: the same operations in the same order, so the
    same bits, a product of -0 included) without passing over the sums once
    per tap: 0.85 us instead of 2.3 us for 2400 values.
    """
    out = np.empty(span)
    if span == 0:
        return out
    w0, w1, w2, w3 = taps[0], taps[1], taps[2], taps[3]
    # views from each tap's shift on (indices the compiler knows are not
    # negative: no wraparound test, and the loop is vectorised)
    a, b, c, d = flat[shifts[0] :], flat[shifts[1] :], flat[shifts[2] :], flat[shifts[3] :]
    for q in range(span):
        out[q] = (((0.0 + w0 * a[q]) + w1 * b[q]) + w2 * c[q]) + w3 * d[q]
    return out


@njit(nogil=True)
def _columns(flat, stride, n, rows):
    """Rows ``stride`` apart in ``flat`` (their first ``n`` values) as columns, shape (n, rows)."""
    out = np.empty((n if rows else 0, rows))
    for r in range(rows):
        row = flat[r * stride :]
        for i in range(n):
            out[i, r] = row[i]
    return out


@njit(nogil=True)
def _scaled_rows(flat, stride, n, weights, n_samples, n_sigmas):
    """Rows ``stride`` apart in ``flat`` times ``weights[j] / n_samples``, shape (J K, n)."""
    out = np.empty((n_sigmas * n_samples, n if n_sigmas else 0))
    for j in range(n_sigmas):
        scale = weights[j] / n_samples
        for k in range(n_samples):
            r = j * n_samples + k
            row = flat[r * stride :]
            to = out[r]
            for i in range(n):
                to[i] = row[i] * scale
    return out


@njit(nogil=True)
def _unit(
    x0, y0, x_first, nx, y_first, ny, dx, dy, sigmas, weights, response, erf_table, gauss_table
):
    """Unit model at ``(x0, y0)`` and its derivatives in ``x0`` and ``y0``, each (ny, nx).

    ``response``: lattice offsets along x and y and the row step
    (:class:`~pipeline.stages.detect._model.Response`; offsets -1 and step
    0 for none).
    """
    a, da = _rows(
        x_first, nx, x0 + dx, sigmas, weights, response[0], response[2], erf_table, gauss_table,
        False, True, response[3],
    )  # fmt: skip
    bt, dbt = _rows(
        y_first, ny, y0 + dy, sigmas, weights, response[1], 0.0, erf_table, gauss_table, True,
        True, response[4],
    )  # fmt: skip
    return np.dot(bt, a), np.dot(bt, da), np.dot(dbt, a)


@njit(nogil=True)
def model_compiled(
    x0, y0, x_first, nx, y_first, ny, dx, dy, sigmas, weights, response, erf_table, gauss_table
):
    """The unit model of :func:`_unit` alone, without its derivatives, shape (ny, nx)."""
    a, _ = _rows(
        x_first, nx, x0 + dx, sigmas, weights, response[0], response[2], erf_table, gauss_table,
        False, False, response[3],
    )  # fmt: skip
    bt, _ = _rows(
        y_first, ny, y0 + dy, sigmas, weights, response[1], 0.0, erf_table, gauss_table, True,
        False, response[4],
    )  # fmt: skip
    return np.dot(bt, a)


@njit(nogil=True)
def _assemble(p, d, sw, units, units_x, units_y):
    """Weighted residual and weighted Jacobian at ``p``.

    ``p`` is the background and then flux, x, y of each star; ``units``,
    ``units_x`` and ``units_y`` are the stars' unit models and their
    derivatives in x and y, each (n, ny, nx).
    """
    n = units.shape[0]
    u = units.reshape(n, d.size)
    ux = units_x.reshape(n, d.size)
    uy = units_y.reshape(n, d.size)
    r = np.empty(d.size)
    jac = np.empty((d.size, 1 + 3 * n))
    for i in range(d.size):
        model = p[0]
        jac[i, 0] = sw[i]
        for s in range(n):
            f = p[1 + 3 * s]
            model += f * u[s, i]
            jac[i, 1 + 3 * s] = u[s, i] * sw[i]
            jac[i, 2 + 3 * s] = f * ux[s, i] * sw[i]
            jac[i, 3 + 3 * s] = f * uy[s, i] * sw[i]
        r[i] = model * sw[i] - d[i]
    return r, jac


@njit(nogil=True)
def _units(p, x_first, nx, y_first, ny, dx, dy, bounds, sigmas, weights, responses, erf, gauss):
    """Unit models of the stars at the positions in ``p`` and their derivatives, each (n, ny, nx).

    Star ``s`` has the kernel samples ``dx[bounds[s]:bounds[s + 1]]`` (and
    ``dy``) and the response ``responses[s]``.
    """
    n = bounds.size - 1
    units = np.empty((n, ny, nx))
    units_x = np.empty((n, ny, nx))
    units_y = np.empty((n, ny, nx))
    for s in range(n):
        k0, k1 = bounds[s], bounds[s + 1]
        u, ux, uy = _unit(
            p[2 + 3 * s], p[3 + 3 * s], x_first, nx, y_first, ny, dx[k0:k1], dy[k0:k1], sigmas,
            weights, responses[s], erf, gauss,
        )  # fmt: skip
        for j in range(ny):
            for i in range(nx):
                units[s, j, i] = u[j, i]
                units_x[s, j, i] = ux[j, i]
                units_y[s, j, i] = uy[j, i]
    return units, units_x, units_y


@njit(nogil=True)
def fit_compiled(
    d, sw, x_first, nx, y_first, ny, x, y, dx, dy, bounds, sigmas, weights, responses, erf, gauss,
    max_evaluations,
):  # fmt: skip
    """Fit a background and flux, x and y of each of ``n`` stars; see ``fit_stars``.

    Parameters
    ----------
    d, sw : ndarray, shape (ny * nx,)
        Weighted data ``data / sigma`` and weights ``1 / sigma`` (0 where a
        pixel is left out).
    x_first, nx, y_first, ny : float, int, float, int
        First pixel centre and number of pixels along each axis.
    x, y : ndarray, shape (n,)
        Starting positions.
    dx, dy : ndarray, shape (K_1 + ... + K_n,)
        Kernel samples of the stars one after the other, pixels.
    bounds : ndarray of int64, shape (n + 1,)
        Star ``s``'s samples are ``[bounds[s], bounds[s + 1])``.
    sigmas, weights, erf, gauss : ndarray
        The profile's mixture and the profile tables.
    responses : ndarray, shape (n, 5)
        Per star, rectify's lattice offsets along x and y, the row step and
        the image's pixels per rectified pixel along x and y (-1, -1, 0, 1,
        1: neither resampling nor clocking top-hat).
    max_evaluations : int
        Most model evaluations after the start (``fit_stars``'
        ``max_evaluations``); a fit that has not converged by then ends with
        status 0.

    Returns
    -------
    p : ndarray, shape (1 + 3 n,)
        Background, then flux, x, y of each star.
    jac : ndarray, shape (ny * nx, 1 + 3 n)
        Weighted Jacobian at the last point evaluated (``p`` less the last
        step, a hundredth of a standard error, when converged).
    units : ndarray, shape (n, ny, nx)
        Unit models at ``p`` (moved to first order over the last step).
    chi2 : float
    status : int
        1 converged, 0 not converged, -1 a singular step (the caller refits
        in Python, which reports it as ``fit_stars`` always did).
    """
    n = x.size
    size = 1 + 3 * n
    p = np.zeros(size)
    for s in range(n):
        p[2 + 3 * s] = x[s]
        p[3 + 3 * s] = y[s]
    model = (x_first, nx, y_first, ny, dx, dy, bounds, sigmas, weights, responses, erf, gauss)
    units, units_x, units_y = _units(p, *model)
    # Linear start: background and fluxes at the starting positions (normal
    # equations of the columns ``sw`` and ``unit * sw`` of each star).
    flat = units.reshape(n, d.size)
    design = np.empty((d.size, 1 + n))
    for i in range(d.size):
        design[i, 0] = sw[i]
        for s in range(n):
            design[i, 1 + s] = flat[s, i] * sw[i]
    normal, rhs = _normal(design, d)
    coef, ok = _solve(normal, rhs)
    if not ok:
        return p, np.zeros((d.size, size)), units, 0.0, -1
    p[0] = coef[0]
    largest = 0.0
    for s in range(n):
        largest = max(largest, abs(coef[1 + s]))
    for s in range(n):
        p[1 + 3 * s] = max(coef[1 + s], 1e-3 * largest + 1e-6)
    r, jac = _assemble(p, d, sw, units, units_x, units_y)
    chi2 = float(np.sum(r * r))
    lam = 1e-3
    for _ in range(max_evaluations):
        h, g = _normal(jac, r)
        damped = h.copy()
        for i in range(size):
            damped[i, i] += lam * h[i, i]
        step, ok = _solve(damped, -g)
        if not ok:
            return p, jac, units, chi2, -1
        moves = 0.0
        for s in range(n):
            moves = max(moves, abs(step[2 + 3 * s]), abs(step[3 + 3 * s]))
        if moves > 1.0:
            step *= 1.0 / moves
        predicted = 0.0
        for i in range(size):
            for k in range(size):
                predicted += step[i] * h[i, k] * step[k]
        undamped = predicted * (1.0 + lam) * (1.0 + lam)
        if predicted < 1e-4 or undamped < CONVERGED:  # the last step to first order
            p, units, chi2 = _last_step(p, step, r, jac, units, units_x, units_y)
            return p, jac, units, chi2, 1
        trial = p + step
        units_new, units_x_new, units_y_new = _units(trial, *model)
        r_new, jac_new = _assemble(trial, d, sw, units_new, units_x_new, units_y_new)
        chi2_new = float(np.sum(r_new * r_new))
        if np.isfinite(chi2_new) and chi2_new <= chi2:
            gain = chi2 - chi2_new
            # the chi-square's fall the quadratic model promised for the step
            expected = 0.0
            for i in range(size):
                expected -= 2.0 * g[i] * step[i]
            expected -= predicted
            p, r, jac, chi2 = trial, r_new, jac_new, chi2_new
            units, units_x, units_y = units_new, units_x_new, units_y_new
            if gain < POOR_GAIN * expected:
                lam *= 10.0
            else:
                lam = max(lam * 0.1, 1e-9)
            if gain <= 1e-8 * chi2:
                return p, jac, units, chi2, 1
        else:
            lam *= 10.0
            if lam > 1e8:  # no step downhill: p is the optimum to rounding
                return p, jac, units, chi2, 1
    return p, jac, units, chi2, 0


@njit(nogil=True)
def _last_step(p, step, r, jac, units, units_x, units_y):
    """``p + step``, the unit models there and the chi-square, to first order in ``step``.

    The residual moves by ``jac step`` and each unit model by its
    derivatives times the position step: for a step of predicted
    chi-square change < 1e-4 (a hundredth of a standard error), the
    neglected second order is ~1e-4 of a standard error's effect.
    """
    moved = units.copy()
    for s in range(units.shape[0]):
        ax, ay = step[2 + 3 * s], step[3 + 3 * s]
        for j in range(units.shape[1]):
            for i in range(units.shape[2]):
                moved[s, j, i] += ax * units_x[s, j, i] + ay * units_y[s, j, i]
    chi2 = 0.0
    for i in range(r.size):
        value = r[i]
        for a in range(step.size):
            value += jac[i, a] * step[a]
        chi2 += value * value
    return p + step, moved, chi2


@njit(nogil=True)
def _normal(jac, r):
    """``jac^T jac`` and ``jac^T r``.

    ``jac^T jac`` with the BLAS matrix product the model binds already: a
    group of four stars has 13 columns, whose products took 0.40 ms per
    step in loops and 0.05 ms in BLAS (45 x 70 stamp).  ``jac^T r`` in a
    loop, and the arrays filled by loops rather than slice assignments: a
    matrix-vector product and the broadcasting copies added about 6 s of CPU
    to the first compilation (20 to 28 s, on a loaded machine), where the
    loops cost nothing measurable.
    """
    jt = np.ascontiguousarray(jac.T)
    g = np.zeros(jt.shape[0])
    for a in range(jt.shape[0]):
        for i in range(r.size):
            g[a] += jt[a, i] * r[i]
    return np.dot(jt, jac), g


@njit(nogil=True)
def _solve(a, b):
    """``a^-1 b`` by Gaussian elimination with partial pivoting, and False if singular.

    For the 2 x 2 and 4 x 4 systems of a fit, written out (with
    :func:`_normal`) so that compiling the fit needs no LAPACK or BLAS
    bindings beyond the model's products: on a machine loaded 3.5 times
    over, the first compilation of the fit took 24 s with ``lstsq``,
    ``solve``, ``det`` and matrix products in its loop, 16 s without the
    LAPACK calls and 9 s without either (0.05 s to load it from the cache).
    """
    n = b.size
    m = a.copy()
    x = b.copy()
    for c in range(n):
        pivot = c
        for i in range(c + 1, n):
            if abs(m[i, c]) > abs(m[pivot, c]):
                pivot = i
        if m[pivot, c] == 0.0 or not np.isfinite(m[pivot, c]):
            return x, False
        if pivot != c:
            for k in range(n):
                m[c, k], m[pivot, k] = m[pivot, k], m[c, k]
            x[c], x[pivot] = x[pivot], x[c]
        for i in range(c + 1, n):
            f = m[i, c] / m[c, c]
            for k in range(c, n):
                m[i, k] -= f * m[c, k]
            x[i] -= f * x[c]
    for c in range(n - 1, -1, -1):
        for k in range(c + 1, n):
            x[c] -= m[c, k] * x[k]
        x[c] /= m[c, c]
    return x, True


@njit(nogil=True)
def weighted_compiled(data, variance):
    """Weighted data ``data / sigma``, weights ``1 / sigma`` and the number of pixels used.

    Both flattened (row by row), 0 where a pixel is left out (non-finite
    data or variance, or variance <= 0): what ``fit_stars`` formed with
    eight array operations (0.25 s of CPU of numpy's call overhead over a
    crowded stretch's 3300 fits), with the same arithmetic.
    """
    ny, nx = data.shape
    sw = np.zeros(ny * nx)
    d = np.zeros(ny * nx)
    n_good = 0
    for j in range(ny):
        for i in range(nx):
            v = variance[j, i]
            value = data[j, i]
            if np.isfinite(value) and np.isfinite(v) and v > 0.0:
                w = np.sqrt(1.0 / v)
                sw[j * nx + i] = w
                d[j * nx + i] = value * w
                n_good += 1
    return sw, d, n_good


@njit(nogil=True)
def reduce_compiled(dx, dy, spacing):
    """:func:`pipeline.stages.detect._model.reduce_kernel`, compiled (its steps, in its order)."""
    n = dx.size
    if n < 2:
        return dx, dy
    # Samples 1/m apart in time are (fastest speed) / m apart at most.
    fastest = 0.0
    for k in range(n - 1):
        fastest = max(fastest, np.hypot(dx[k + 1] - dx[k], dy[k + 1] - dy[k]))
    fastest *= n
    wanted = max(1, int(np.ceil(fastest / max(spacing, 1e-6) - 1e-9)))
    if wanted >= n:
        return dx, dy
    times = (np.arange(n) + 0.5) / n
    new = (np.arange(wanted) + 0.5) / wanted
    if wanted > 1:
        # The first and last points a 24th of a step further out along the
        # track: the mean of m equal-time points errs by (1/m)^2 / 24 times
        # the change of the integrand's slope between the track's ends (the
        # midpoint rule's leading error), which this cancels.
        new[0] -= 1.0 / (24.0 * wanted)
        new[-1] += 1.0 / (24.0 * wanted)
    rx = np.interp(new, times, dx)
    ry = np.interp(new, times, dy)
    rx -= rx.mean()
    ry -= ry.mean()
    # Stretch each axis to the samples' own spread: m points of a track are
    # narrower than the track (by about a step^2 / 12 in variance).
    for out, full in ((rx, dx), (ry, dy)):
        spread = np.sum(out * out)
        if spread > 0:
            centred = full - full.mean()
            out *= np.sqrt(np.sum(centred * centred) / n * wanted / spread)
    return rx, ry


@njit(nogil=True)
def reduce_many_compiled(dx, dy, spacing):
    """:func:`reduce_compiled` of each row of ``dx``, ``dy`` (n, K), and each result's extent.

    Returns the reduced samples one after the other, the bounds of each
    row's (shape (n + 1,)) and each row's largest ``|dx|`` and ``|dy|``
    (shape (n, 2)): one call for a stretch's sources instead of one each,
    whose Python overhead cost more than the reduction.
    """
    n = dx.shape[0]
    parts_x = []
    parts_y = []
    bounds = np.zeros(n + 1, dtype=np.int64)
    extents = np.zeros((n, 2))
    for i in range(n):
        rx, ry = reduce_compiled(dx[i].copy(), dy[i].copy(), spacing)
        parts_x.append(rx)
        parts_y.append(ry)
        bounds[i + 1] = bounds[i] + rx.size
        extents[i, 0] = np.max(np.abs(rx))
        extents[i, 1] = np.max(np.abs(ry))
    out_x = np.empty(bounds[n])
    out_y = np.empty(bounds[n])
    for i in range(n):
        out_x[bounds[i] : bounds[i + 1]] = parts_x[i]
        out_y[bounds[i] : bounds[i + 1]] = parts_y[i]
    return out_x, out_y, bounds, extents


@njit(nogil=True)
def errors_compiled(jac, scale):
    """Square roots of the diagonal of ``scale (jac^T jac)^-1``, and False if it is singular.

    ``fit_stars``' errors: numpy's ``inv`` (and its error state) cost
    ~35 us per fit in call overhead, as much as a small fit's arithmetic;
    here each column of the inverse is solved by :func:`_solve` (the same
    partial-pivoting elimination, to rounding).  Negative diagonal values
    (rounding, for a nearly singular matrix) give 0.
    """
    h, _ = _normal(jac, np.zeros(jac.shape[0]))
    size = h.shape[0]
    out = np.empty(size)
    unit = np.zeros(size)
    for a in range(size):
        unit[:] = 0.0
        unit[a] = 1.0
        column, ok = _solve(h, unit)
        if not ok:
            return out, False
        out[a] = np.sqrt(max(column[a] * scale, 0.0))
    return out, True


@njit(nogil=True)
def subtract_models_compiled(
    image, x, y, flux, dx, dy, kernels, responses, sigmas, weights, reach, erf, gauss
):
    """Subtract the models of many stars from ``image`` in place.

    Star ``s`` (flux ``flux[s]``, skipped if not finite) is rendered as
    ``model_image`` renders it, on the pixels within ``reach`` plus its
    kernel's largest ``|dx|`` (``|dy|``) of its position rounded to the
    nearest pixel (ties to even, as Python's ``round``), cut by the image's
    edges; its kernel samples are ``[kernels[s], kernels[s + 1])`` of
    ``dx``, ``dy`` and its response ``responses[s]``.  The arithmetic of
    ``model_image`` and of the subtraction, star after star.
    """
    ny, nx = image.shape
    for s in range(x.size):
        if not np.isfinite(flux[s]):
            continue
        k0, k1 = kernels[s], kernels[s + 1]
        ex = 0.0
        ey = 0.0
        for k in range(k0, k1):
            ex = max(ex, abs(dx[k]))
            ey = max(ey, abs(dy[k]))
        hx = int(np.ceil(reach + ex))
        hy = int(np.ceil(reach + ey))
        cx = int(np.rint(x[s]))
        cy = int(np.rint(y[s]))
        x0, y0 = max(cx - hx, 0), max(cy - hy, 0)
        x1, y1 = min(cx + hx + 1, nx), min(cy + hy + 1, ny)
        if x1 <= x0 or y1 <= y0:
            continue
        model = model_compiled(
            x[s] - x0, y[s] - y0, 0.0, x1 - x0, 0.0, y1 - y0, dx[k0:k1].copy(),
            dy[k0:k1].copy(), sigmas, weights, responses[s], erf, gauss,
        )  # fmt: skip
        for j in range(y1 - y0):
            for i in range(x1 - x0):
                image[y0 + j, x0 + i] -= flux[s] * model[j, i]
