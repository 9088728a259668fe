"""The compiled passes of :func:`pipeline.mosaic.resample_to_tile`.

Kept apart so that numba is imported only when a mosaic is first resampled.
Each pass is one loop over the output pixels: the four Keys weights (the
rectify stage's kernel, :func:`pipeline.stages.rectify._resample.keys_weights`),
computed in float64 and rounded to float32 as the numpy passes did, then the
image, variance and flag taps, in the same order.

The sampling positions are not stored: each pass evaluates the
tensor-product spline that gives them (``B @ table``, a sparse B-spline
basis along the output lines times a table along them) one output line at a
time, as :func:`tensor_grid` does for a whole grid (the same terms in the same
order, so the same values).  Pass 2 stores its pixels straight into the
caller's planes, or merges them into a night's tile planes
(:func:`pipeline.mosaic.mosaic_tile`), with no intermediate copy.
"""

from __future__ import annotations

import numpy as np

from pipeline._jit import njit

__all__ = ["STRETCH_FROM", "resample_columns", "resample_rows", "tensor_grid"]

#: Steps (input pixels per output pixel) above which the input is averaged
#: over the output pixel (:func:`_sample_wide`) rather than sampled with the
#: four Keys taps.  Sampling every ``step`` pixels leaves those between the
#: samples nearly out; averaging blurs a star by the output pixel.  A star's
#: sky-limited flux error (white noise, a 1.45 arcsec star on 1 arcsec
#: tiles, each image's own star as the filter) grows over the night's by
#: 6 % sampled at a step of 1.33, 9 % at 1.43, 15 % at 1.5, 25 % at 1.67
#: and 49 % at 1.92, and by 12 % averaged at any of them: they cross near
#: 1.45.  But a tile of about the nights' pixels (steps 0.9-1.1) samples
#: each star of a night at one phase of the taps, which changes only over
#: ~1 / |step - 1| pixels: the taps blur a star's core by an amount that
#: depends on that phase (none at 0, most at half a pixel), which no model
#: of the tile's stars can hold for every night at once.  On a simulated
#: two-night tile of the nights' pixels (seeing 4.1 and 2.7 px) the stars'
#: PSF fluxes swung with the sharp night's phase, -0.09 to +0.07 mag
#: against their apertures, 3.4 % scatter for S/N > 150; averaged, 0.6-0.8
#: % (1.1-1.5 % at steps 0.8, 1.2 and 1.4 with the taps, where the phase
#: turns within a star).  Averaging costs a sky-limited star 1-2.5 % of
#: flux error at steps 0.9-1.25 (0.3-0.8 % with the taps; measured on the
#: stars of 2.7 and 4.0 tile pixels FWHM), and gains at 1.43 (1.02-1.03
#: against 1.05): tiles from 0.9 night pixels up average.
STRETCH_FROM = 0.9


@njit(nogil=True, inline="always")
def _keys(f, jacobian):
    """Keys (a = -0.5) weights of pixels ``floor(p) - 1 ... floor(p) + 2`` times ``jacobian``."""
    f2 = f * f
    f3 = f2 * f
    w0 = np.float32((-0.5 * f3 + f2 - 0.5 * f) * jacobian)
    w1 = np.float32((1.5 * f3 - 2.5 * f2 + 1.0) * jacobian)
    w2 = np.float32((-1.5 * f3 + 2.0 * f2 + 0.5 * f) * jacobian)
    w3 = np.float32((0.5 * f3 - 0.5 * f2) * jacobian)
    return w0, w1, w2, w3


@njit(nogil=True, inline="always")
def _tap(o, vo, sum_w2, wk, value, variance):
    """Add a tap of weight ``wk``: to the value, the variance and the sum of squared weights."""
    o += wk * value
    w2 = wk * wk
    vo += w2 * variance
    return o, vo, sum_w2 + w2


@njit(nogil=True, inline="always")
def _sample(image, variance, flags, row, column, along_rows, n_line, w, outside):
    """Image, variance, flags and sum of squared weights of four taps along a line.

    The taps are ``[row + k, column]`` (``along_rows``) or ``[row, column +
    k]``, ``k = 0 ... 3``, on a line of ``n_line`` pixels from index 0.  A tap
    beyond the line adds the ``outside`` flag where its weight is non-zero;
    one of zero weight adds nothing.  The planes hold finite values, so
    ``0 x value`` adds zero.
    """
    first = row if along_rows else column
    o = np.float32(0.0)
    vo = np.float32(0.0)
    mo = np.uint16(0)
    sum_w2 = 0.0
    if first >= 0 and first + 3 < n_line:
        # every tap inside (the usual case): no tests but the weight's for the flags
        for k in range(4):
            y = row + k if along_rows else row
            x = column if along_rows else column + k
            o, vo, sum_w2 = _tap(o, vo, sum_w2, w[k], image[y, x], variance[y, x])
            mo |= flags[y, x] if w[k] != 0 else np.uint16(0)
        return o, vo, mo, sum_w2
    for k in range(4):
        wk = w[k]
        if wk == 0:
            continue
        if not 0 <= first + k < n_line:
            mo |= outside
            continue
        y = row + k if along_rows else row
        x = column if along_rows else column + k
        o, vo, sum_w2 = _tap(o, vo, sum_w2, wk, image[y, x], variance[y, x])
        mo |= flags[y, x]
    return o, vo, mo, sum_w2


@njit(nogil=True, inline="always")
def _cubic_bspline(t):
    """The cubic B-spline (four unit top-hats convolved) at distance ``t``, pixels."""
    t = abs(t)
    if t < 1.0:
        return 2.0 / 3.0 - t * t + 0.5 * t * t * t
    if t < 2.0:
        u = 2.0 - t
        return u * u * u / 6.0
    return 0.0


@njit(nogil=True)
def _sample_wide(image, variance, flags, row, column, along_rows, n_line, position, step, outside):
    """:func:`_sample`, the input averaged over an output pixel of ``step`` > 1 input pixels.

    The taps are the input pixels ``i`` within ``2 step`` of ``position``
    along the line (``[i, column]`` if ``along_rows``, else ``[row, i]``),
    weighted ``step B((i - position) / step) / sum_i B((i - position) /
    step)``, ``B`` the cubic B-spline (:func:`_cubic_bspline`): every input
    pixel between the samples counts, and a flat input gives ``step`` times
    its value at every phase.  Flags as :func:`_sample`.
    """
    lo = int(np.floor(position - 2.0 * step)) + 1
    hi = int(np.ceil(position + 2.0 * step)) - 1
    norm = 0.0
    for i in range(lo, hi + 1):
        norm += _cubic_bspline((i - position) / step)
    o = np.float32(0.0)
    vo = np.float32(0.0)
    mo = np.uint16(0)
    sum_w2 = 0.0
    for i in range(lo, hi + 1):
        wk = np.float32(step * _cubic_bspline((i - position) / step) / norm)
        if wk == 0:
            continue
        if not 0 <= i < n_line:
            mo |= outside
            continue
        y = i if along_rows else row
        x = column if along_rows else i
        o, vo, sum_w2 = _tap(o, vo, sum_w2, wk, image[y, x], variance[y, x])
        mo |= flags[y, x]
    return o, vo, mo, sum_w2


@njit(nogil=True, inline="always")
def _slope(before, here, after, at_start, at_end):
    """``|d position / d output pixel|`` as ``numpy.gradient`` takes it (one-sided at the ends)."""
    if at_start and at_end:
        return 1.0
    if at_start:
        return abs(after - here)
    if at_end:
        return abs(here - before)
    return abs(after - before) / 2.0


@njit(nogil=True, inline="always")
def _grid_line(grid, i, shift, line):
    """Line ``i`` of the spline grid ``(indptr, indices, data, table)`` minus ``shift``."""
    indptr, indices, data, table = grid
    n = line.size
    for j in range(n):
        line[j] = 0.0
    for p in range(indptr[i], indptr[i + 1]):
        weight = data[p]
        row = indices[p]
        for j in range(n):
            line[j] += weight * table[row, j]
    if shift != 0.0:
        for j in range(n):
            line[j] -= shift


@njit(nogil=True, inline="always")
def _slopes_along(line, jacobian):
    """:func:`_slope` at every pixel of ``line``, along it."""
    n = line.size
    for j in range(1, n - 1):
        jacobian[j] = abs(line[j + 1] - line[j - 1]) / 2.0
    jacobian[0] = _slope(line[0], line[0], line[min(1, n - 1)], True, n == 1)
    if n > 1:
        jacobian[n - 1] = _slope(line[n - 2], line[n - 1], line[n - 1], False, True)


@njit(nogil=True, inline="always")
def _slopes_across(before, here, after, at_start, at_end, jacobian):
    """:func:`_slope` at every pixel of line ``here``, across the lines."""
    if at_start and at_end:
        jacobian[:] = 1.0
    elif at_start:
        for c in range(here.size):
            jacobian[c] = abs(after[c] - here[c])
    elif at_end:
        for c in range(here.size):
            jacobian[c] = abs(here[c] - before[c])
    else:
        for c in range(here.size):
            jacobian[c] = abs(after[c] - before[c]) / 2.0


@njit(nogil=True, inline="always")
def _line_weights(positions, jacobian, first, weights):
    """First tap and the four weights (:func:`_keys`) of every position of a line.

    A loop of its own (no taps read), so that it runs as SIMD instructions.
    """
    for j in range(positions.size):
        p = positions[j]
        base = np.floor(p)
        w0, w1, w2, w3 = _keys(p - base, jacobian[j])
        first[j] = int(base) - 1
        weights[0, j] = w0
        weights[1, j] = w1
        weights[2, j] = w2
        weights[3, j] = w3


@njit(nogil=True)
def resample_rows(image, variance, flags, grid, shift, outside, out, vout, mout):
    """Pass along axis 1: output ``[r, j]`` samples ``image[r, position]``.

    ``position`` is line ``r`` of the spline ``grid`` (see :func:`_grid_line`)
    minus ``shift``; the weights are multiplied by the Jacobian
    ``|d position / d j|``.  ``image``, ``variance``, ``flags`` are C-ordered
    rows (``image[r]`` contiguous); ``out``, ``vout``, ``mout`` (shape
    ``(n_rows, n_out)``) are overwritten.  Returns the sum over the output of
    the sum of the squared weights and the sum of the Jacobians.
    """
    n_rows, n_out = out.shape
    n_line = image.shape[1]
    line = np.empty(n_out)
    jacobian = np.empty(n_out)
    first = np.empty(n_out, np.int64)
    w = np.empty((4, n_out), np.float32)
    sum_w2 = 0.0
    sum_jacobian = 0.0
    for r in range(n_rows):
        _grid_line(grid, r, shift, line)
        _slopes_along(line, jacobian)
        _line_weights(line, jacobian, first, w)
        row_out, row_vout, row_mout = out[r], vout[r], mout[r]
        row_w2 = 0.0
        row_jacobian = 0.0
        for j in range(n_out):
            row_jacobian += jacobian[j]
            if jacobian[j] > STRETCH_FROM:
                o, vo, mo, w2 = _sample_wide(
                    image, variance, flags, r, 0, False, n_line, line[j], jacobian[j], outside
                )
            else:
                o, vo, mo, w2 = _sample(
                    image,
                    variance,
                    flags,
                    r,
                    first[j],
                    False,
                    n_line,
                    (w[0, j], w[1, j], w[2, j], w[3, j]),
                    outside,
                )
            row_out[j], row_vout[j], row_mout[j] = o, vo, mo
            row_w2 += w2
        sum_w2 += row_w2
        sum_jacobian += row_jacobian
    return sum_w2, sum_jacobian


@njit(nogil=True, inline="always")
def _store(out, vout, mout, y, x, o, vo, mo, no_data, factor, merge):
    """Store a pixel (NaN without data), or merge it into a night's planes.

    Merging (``merge``): the pixel takes the new image and variance (times
    ``factor``) where the new pixel has data (finite, positive variance) and
    the planes have none yet; its flags become the new ones there, stay
    where the planes had data, and are OR-ed where neither has.  Returns
    whether the pixel was taken and ``1 / variance`` of it.
    """
    value = np.float32(np.nan) if no_data else o
    v = np.float32(np.nan) if no_data else vo
    if not merge:
        out[y, x], vout[y, x], mout[y, x] = value, v, mo
        return False, 0.0
    v = v * factor
    new = np.isfinite(value) and np.isfinite(v) and v > 0
    if np.isfinite(out[y, x]):
        return False, 0.0
    if new:
        out[y, x], vout[y, x], mout[y, x] = value, v, mo
        return True, 1.0 / v
    mout[y, x] |= mo
    return False, 0.0


@njit(nogil=True)
def resample_columns(image, variance, flags, grid, shift, core, box, settings, planes, origin):
    """Pass along axis 0: output ``[i, c]`` samples ``image[position, c]``.

    ``position`` is line ``i`` of the spline ``grid`` minus ``shift``; the
    weights are multiplied by ``|d position / d i|``.  A pixel has no data
    where a no-data flag reaches it, or (with a core) where its sampling
    position, before the shift, and its input column (line ``i`` of the
    spline ``core``) lie outside ``box = (y_lo, y_hi, x_lo, x_hi)``: it is
    also flagged ``outside`` there.

    ``settings`` is ``(outside, no_data_bits, use_core, factor, merge)`` and
    ``planes`` ``(out, vout, mout)``: output pixel ``[i, c]`` goes to
    ``[origin[0] + i, origin[1] + c]`` of them, stored or merged (see
    :func:`_store`).  The output has ``grid``'s shape (lines x
    ``image.shape[1]`` columns).  Returns the sums of the squared weights and
    of the Jacobians over the output, the number of pixels taken and the sum
    of their ``1 / variance`` (merging only).
    """
    outside, no_data_bits, use_core, factor, merge = settings
    out, vout, mout = planes
    y0, x0 = origin
    y_lo, y_hi, x_lo, x_hi = box
    n_out = grid[0].size - 1
    n_line, n_cols = image.shape
    before = np.empty(n_cols)
    here = np.empty(n_cols)
    after = np.empty(n_cols)
    columns = np.empty(n_cols if use_core else 0)
    jacobian = np.empty(n_cols)
    first = np.empty(n_cols, np.int64)
    w = np.empty((4, n_cols), np.float32)
    _grid_line(grid, 0, shift, here)
    if n_out > 1:
        _grid_line(grid, 1, shift, after)
    else:
        after[:] = here
    before[:] = here
    sum_w2 = 0.0
    sum_jacobian = 0.0
    taken = 0
    inverse = 0.0
    for i in range(n_out):
        if i > 0:
            before, here, after = here, after, before
            if i + 1 < n_out:
                _grid_line(grid, i + 1, shift, after)
            else:
                after[:] = here
        if use_core:
            _grid_line(core, i, 0.0, columns)
        _slopes_across(before, here, after, i == 0, i == n_out - 1, jacobian)
        _line_weights(here, jacobian, first, w)
        for c in range(n_cols):
            sum_jacobian += jacobian[c]
            if jacobian[c] > STRETCH_FROM:
                o, vo, mo, w2 = _sample_wide(
                    image, variance, flags, 0, c, True, n_line, here[c], jacobian[c], outside
                )
            else:
                o, vo, mo, w2 = _sample(
                    image,
                    variance,
                    flags,
                    first[c],
                    c,
                    True,
                    n_line,
                    (w[0, c], w[1, c], w[2, c], w[3, c]),
                    outside,
                )
            sum_w2 += w2
            no_data = (mo & no_data_bits) != 0
            if use_core:
                row = here[c] + shift
                column = columns[c]
                if not (row >= y_lo and row < y_hi and column >= x_lo and column < x_hi):
                    mo |= outside
                    no_data = True
            took, inv = _store(out, vout, mout, y0 + i, x0 + c, o, vo, mo, no_data, factor, merge)
            taken += took
            inverse += inv
    return sum_w2, sum_jacobian, taken, inverse


@njit(nogil=True)
def tensor_grid(indptr, indices, data, table):
    """``B @ table`` for a sparse (CSR) ``B``: a tensor-product spline on a grid."""
    n_rows = indptr.size - 1
    n_cols = table.shape[1]
    out = np.zeros((n_rows, n_cols))
    for i in range(n_rows):
        for p in range(indptr[i], indptr[i + 1]):
            weight = data[p]
            row = indices[p]
            for j in range(n_cols):
                out[i, j] += weight * table[row, j]
    return out
