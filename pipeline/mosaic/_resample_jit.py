"""The compiled passes of :func:`pipeline.mosaic.resample_to_tile`.

Kept apart so that numba is imported only when a mosaic is first resampled.
Each pass is one loop over the output pixels: the four Keys weights (the
rectify stage's kernel, :func:`pipeline.stages.rectify._resample.keys_weights`),
computed in float64 and rounded to float32 as the numpy passes did, then the
image, variance and flag taps, in the same order.
"""

from __future__ import annotations

import numba
import numpy as np

__all__ = ["resample_columns", "resample_rows", "tensor_grid"]


@numba.njit(cache=True, nogil=True, inline="always")
def _keys(f, jacobian):
    """Keys (a = -0.5) weights of pixels ``floor(p) - 1 ... floor(p) + 2`` times ``jacobian``."""
    f2 = f * f
    f3 = f2 * f
    w0 = np.float32((-0.5 * f3 + f2 - 0.5 * f) * jacobian)
    w1 = np.float32((1.5 * f3 - 2.5 * f2 + 1.0) * jacobian)
    w2 = np.float32((-1.5 * f3 + 2.0 * f2 + 0.5 * f) * jacobian)
    w3 = np.float32((0.5 * f3 - 0.5 * f2) * jacobian)
    return w0, w1, w2, w3


@numba.njit(cache=True, nogil=True, inline="always")
def _sample(image, variance, flags, p, jacobian, outside):
    """Image, variance, flags and sum of squared weights at position ``p`` of 1-D lines."""
    base = np.floor(p)
    w = _keys(p - base, jacobian)
    first = int(base) - 1
    n_line = image.shape[0]
    o = np.float32(0.0)
    vo = np.float32(0.0)
    mo = np.uint16(0)
    sum_w2 = 0.0
    for k in range(4):
        wk = w[k]
        if wk == 0:
            continue
        line = first + k
        if 0 <= line < n_line:
            o += wk * image[line]
            w2 = wk * wk
            vo += w2 * variance[line]
            sum_w2 += w2
            mo |= flags[line]
        else:
            mo |= outside
    return o, vo, mo, sum_w2


@numba.njit(cache=True, nogil=True, inline="always")
def _slope(before, here, after, at_start, at_end):
    """``|d position / d output pixel|`` as ``numpy.gradient`` takes it (one-sided at the ends)."""
    if at_start and at_end:
        return 1.0
    if at_start:
        return abs(after - here)
    if at_end:
        return abs(here - before)
    return abs(after - before) / 2.0


@numba.njit(cache=True, nogil=True)
def resample_rows(image, variance, flags, positions, outside):
    """Pass along axis 1: output ``[r, j]`` samples ``image[r, positions[r, j]]``.

    The weights are multiplied by the Jacobian ``|d positions / d j|``.
    Returns image, variance, flags (shape ``positions.shape``), the sum over
    the output of the sum of the squared weights and the sum of the Jacobians.
    """
    n_rows, n_out = positions.shape
    out = np.zeros((n_rows, n_out), np.float32)
    vout = np.zeros((n_rows, n_out), np.float32)
    mout = np.zeros((n_rows, n_out), np.uint16)
    sum_w2 = 0.0
    sum_jacobian = 0.0
    for r in range(n_rows):
        line = positions[r]
        row_w2 = 0.0
        row_jacobian = 0.0
        for j in range(n_out):
            jacobian = _slope(
                line[max(j - 1, 0)], line[j], line[min(j + 1, n_out - 1)], j == 0, j == n_out - 1
            )
            row_jacobian += jacobian
            out[r, j], vout[r, j], mout[r, j], w2 = _sample(
                image[r], variance[r], flags[r], line[j], jacobian, outside
            )
            row_w2 += w2
        sum_w2 += row_w2
        sum_jacobian += row_jacobian
    return out, vout, mout, sum_w2, sum_jacobian


@numba.njit(cache=True, nogil=True)
def resample_columns(image, variance, flags, positions, outside):
    """Pass along axis 0: output ``[i, c]`` samples ``image[positions[i, c], c]``.

    Returns as :func:`resample_rows` (the Jacobian ``|d positions / d i|``).
    """
    n_out, n_cols = positions.shape
    out = np.zeros((n_out, n_cols), np.float32)
    vout = np.zeros((n_out, n_cols), np.float32)
    mout = np.zeros((n_out, n_cols), np.uint16)
    sum_w2 = 0.0
    sum_jacobian = 0.0
    for i in range(n_out):
        before = positions[max(i - 1, 0)]
        after = positions[min(i + 1, n_out - 1)]
        for c in range(n_cols):
            jacobian = _slope(before[c], positions[i, c], after[c], i == 0, i == n_out - 1)
            sum_jacobian += jacobian
            out[i, c], vout[i, c], mout[i, c], w2 = _sample(
                image[:, c], variance[:, c], flags[:, c], positions[i, c], jacobian, outside
            )
            sum_w2 += w2
    return out, vout, mout, sum_w2, sum_jacobian


@numba.njit(cache=True, nogil=True)
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
