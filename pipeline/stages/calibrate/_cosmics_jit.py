"""The compiled loop of the cosmic-ray search: ``L+`` and the candidates in one pass.

:func:`lplus_candidates` does at each pixel what the numpy passes of
:func:`pipeline.stages.calibrate._cosmics.laplacian_plus` and the cheap
preselection did chunk by chunk (the four differences, the clipped sums,
the smallest variance of the cross, the test), with the same float32
operations in the same order, so ``L+`` and the candidates are the same
bits and indices: no fused multiply-add (no ``fastmath``), constants in
float32.  One pass over the image instead of about twenty over chunks of it.

Kept apart so that numba is imported only by the calibrate stage's search
(the stage's ``Stage.warm`` loads it, with numba's disk cache, as a worker
starts).
"""

from __future__ import annotations

import numpy as np

from pipeline._jit import njit

__all__ = ["load_compiled", "lplus_candidates"]


@njit(nogil=True)
def _clipped(t):
    """``np.maximum(t, 0)``: ``t`` where ``t >= 0`` or NaN, else 0."""
    return t if not t < 0 else np.float32(0.0)


@njit(nogil=True)
def _smaller(a, b):
    """``np.minimum(a, b)`` for values that are not NaN."""
    return a if not b < a else b


@njit(nogil=True)
def _edge_lplus(work, i, j):
    """``L+`` at a pixel of the image's border (differences across the edge are 0)."""
    n_rows, n_cols = work.shape
    zero = np.float32(0.0)
    v = work[i, j]
    up = v - work[i - 1, j] if i > 0 else zero
    down = v - work[i + 1, j] if i + 1 < n_rows else zero
    left = v - work[i, j - 1] if j > 0 else zero
    right = -(work[i, j + 1] - v) if j + 1 < n_cols else zero
    total = _clipped(up + left)
    total += _clipped(up + right)
    total += _clipped(down + left)
    total += _clipped(down + right)
    return total * np.float32(0.25)


@njit(nogil=True)
def lplus_candidates(work, variance, ignore, threshold, lplus):
    """``L+`` of ``work`` into ``lplus``; flat indices of the pixels worth testing.

    A pixel is a candidate if ``L+**2 > threshold * min(variance of the pixel
    and its 4 neighbours)`` and ``ignore`` is False there.  Edges repeat the
    border pixels (a difference across the edge is zero).  All arrays are
    C-contiguous of shape ``(n_rows, n_columns)``; ``work``, ``variance`` and
    ``lplus`` float32 without NaN, ``threshold`` a float32 scalar.

    Returns
    -------
    ndarray of int64
        The candidates' flat indices, rising.
    """
    n_rows, n_cols = work.shape
    quarter = np.float32(0.25)
    keep = np.zeros(n_cols, np.bool_)
    row_found = np.empty(n_cols + 1, np.int64)
    found = np.empty(max(n_rows * n_cols // 64, 64), np.int64)
    count = 0
    for i in range(n_rows):
        above = max(i - 1, 0)
        below = min(i + 1, n_rows - 1)
        if 0 < i < n_rows - 1 and n_cols > 2:
            # inside: no edge to test, a loop the compiler can vectorise
            for j in range(1, n_cols - 1):
                v = work[i, j]
                up = v - work[i - 1, j]
                down = v - work[i + 1, j]
                left = v - work[i, j - 1]
                right = -(work[i, j + 1] - v)
                total = _clipped(up + left)
                total += _clipped(up + right)
                total += _clipped(down + left)
                total += _clipped(down + right)
                lplus[i, j] = total * quarter
            lplus[i, 0] = _edge_lplus(work, i, 0)
            lplus[i, n_cols - 1] = _edge_lplus(work, i, n_cols - 1)
        else:
            for j in range(n_cols):
                lplus[i, j] = _edge_lplus(work, i, j)
        va, vi, vb = variance[above], variance[i], variance[below]
        values, ignored = lplus[i], ignore[i]
        for j in range(n_cols):
            # the smallest of the cross, in np.minimum's order (edges repeated)
            smallest = _smaller(vi[j], va[j])
            smallest = _smaller(smallest, vb[j])
            smallest = _smaller(smallest, vi[max(j - 1, 0)])
            smallest = _smaller(smallest, vi[min(j + 1, n_cols - 1)])
            value = values[j]
            keep[j] = (value * value > smallest * threshold) & (not ignored[j])
        # the row's candidates, packed without a branch per pixel
        n = 0
        for j in range(n_cols):
            row_found[n] = j
            n += keep[j]
        if count + n > found.size:
            grown = np.empty(2 * (count + n), np.int64)
            grown[:count] = found[:count]
            found = grown
        for k in range(n):
            found[count + k] = i * n_cols + row_found[k]
        count += n
    return found[:count].copy()


def load_compiled() -> None:
    """Load the compiled loop in this process (from numba's disk cache once it is there).

    One call with the stage's argument types.  A worker process calls it as
    it starts (see ``Stage.warm``).
    """
    plane = np.ones((3, 3), np.float32)
    lplus_candidates(plane, plane, np.zeros(plane.shape, bool), np.float32(1.0), plane.copy())
