"""The compiled loop of :func:`pipeline.stages.detect._mesh.clipped_medians`.

Kept apart so that numba is imported only when the detect stage first
estimates a background.
"""

from __future__ import annotations

import math

import numba
import numpy as np

__all__ = ["clip_sorted_rows"]


@numba.njit(cache=True, nogil=True)
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


@numba.njit(cache=True, nogil=True)
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
