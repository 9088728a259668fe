"""The compiled loops of the detect stage's search.

:func:`clip_sorted_rows` for :func:`pipeline.stages.detect._mesh.clipped_medians`
(the background), :func:`label_pixels` for the deblending's
(:func:`pipeline.stages.detect._find.deblend_segments`) regions above each
threshold.  Kept apart so that numba is imported only when the detect stage
first runs.
"""

from __future__ import annotations

import math

import numpy as np

from pipeline._jit import njit

__all__ = ["clip_sorted_rows", "label_pixels", "load_compiled"]


@njit(nogil=True)
def _count_below(row, n, value, inclusive):
    """Number of the first ``n`` (sorted) values of ``row`` below ``value`` (or equal to it)."""
    lo, hi = 0, n
    while lo < hi:
        mid = (lo + hi) // 2
        x = np.float64(row[mid])
        if x < value or (inclusive and x == value):
            lo = mid + 1
        else:
            hi = mid
    return lo


@njit(nogil=True)
def clip_sorted_rows(ordered, sigma, maxiters, median, n_kept):
    """Sigma-clipped median of each sorted row (NaN last) of ``ordered`` (float32).

    Fills ``median`` (float32) and ``n_kept``; see ``clipped_medians``.
    The sums of the values kept (less the row's middle value) are taken
    once and lessened by each value a pass clips off either end.
    """
    n_rows = ordered.shape[0]
    for r in range(n_rows):
        row = ordered[r]
        f = row.shape[0]
        while f > 0 and math.isnan(row[f - 1]):
            f -= 1
        if f == 0:
            median[r] = np.nan
            n_kept[r] = 0
            continue
        ref = np.float64(row[(f - 1) // 2])
        s1 = 0.0
        s2 = 0.0
        for i in range(f):
            d = np.float64(row[i]) - ref
            s1 += d
            s2 += d * d
        a, b = 0, f
        lower, upper = np.nan, np.nan
        for _ in range(maxiters):
            count = b - a
            half = a + count // 2
            if count % 2 == 1:
                centre = np.float64(row[half])
            else:
                centre = 0.5 * (np.float64(row[half]) + np.float64(row[half - 1]))
            mean = s1 / count
            std = math.sqrt(max((s2 - s1 * mean) / count, 0.0))
            lower = centre - sigma * std
            upper = centre + sigma * std
            new_a, new_b = a, b
            while new_a < new_b and np.float64(row[new_a]) < lower:
                d = np.float64(row[new_a]) - ref
                s1 -= d
                s2 -= d * d
                new_a += 1
            while new_b > new_a and np.float64(row[new_b - 1]) > upper:
                d = np.float64(row[new_b - 1]) - ref
                s1 -= d
                s2 -= d * d
                new_b -= 1
            if new_b - new_a == count or new_b == new_a:
                break
            a, b = new_a, new_b
        # the values of the whole row within the last bounds
        first = _count_below(row, f, lower, False)
        k = max(_count_below(row, f, upper, True) - first, 0)
        n_kept[r] = k
        if k == 0:
            median[r] = np.nan
        elif k % 2 == 1:
            median[r] = row[first + k // 2]
        else:  # numpy's median of float32 values: their mean in single precision
            median[r] = (row[first + k // 2 - 1] + row[first + k // 2]) / np.float32(2.0)


@njit(nogil=True)
def _root(parent, i):
    """Root of ``i``'s tree in a union-find forest, halving the path on the way."""
    while parent[i] != i:
        parent[i] = parent[parent[i]]
        i = parent[i]
    return i


@njit(nogil=True)
def label_pixels(position, width, scratch):
    """8-connected regions of a set of pixels of a plane ``width`` pixels wide.

    Parameters
    ----------
    position : ndarray of int64, shape (n,)
        The pixels' flat indices on the plane (distinct).
    width : int
        The plane's width, pixels.
    scratch : ndarray of int64, shape (plane size,)
        -1 everywhere; left so.

    Returns
    -------
    region : ndarray of int64, shape (n,)
        Each pixel's region, 1..count, numbered in the order of the
        regions' first pixels in ``position``.
    count : int
        Number of regions.
    """
    n = position.shape[0]
    parent = np.arange(n)
    for i in range(n):
        scratch[position[i]] = i
    for i in range(n):
        p = position[i]
        column = p % width
        # the neighbours before it in raster order: each touching pair once
        for q, ok in (
            (p - width - 1, column > 0),
            (p - width, True),
            (p - width + 1, column < width - 1),
            (p - 1, column > 0),
        ):
            if ok and q >= 0:
                j = scratch[q]
                if j >= 0:
                    a, b = _root(parent, i), _root(parent, j)
                    if a != b:
                        parent[max(a, b)] = min(a, b)
    region = np.empty(n, np.int64)
    number = np.zeros(n, np.int64)
    count = 0
    for i in range(n):
        r = _root(parent, i)
        if number[r] == 0:
            count += 1
            number[r] = count
        region[i] = number[r]
        scratch[position[i]] = -1
    return region, count


def load_compiled() -> None:
    """Load the compiled loops in this process (from numba's disk cache once it is there).

    One call of each with the argument types of every call.  A worker
    process calls it as it starts (see ``Stage.warm``).
    """
    clip_sorted_rows(
        np.zeros((1, 3), np.float32), 3.0, 5, np.empty(1, np.float32), np.empty(1, np.int64)
    )
    label_pixels(np.zeros(1, np.int64), 1, np.full(1, -1, np.int64))
