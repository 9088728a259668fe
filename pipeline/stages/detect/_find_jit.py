"""The compiled loops of the detect stage's search.

:func:`clip_sorted_rows` for :func:`pipeline.stages.detect._mesh.clipped_medians`
(the background), :func:`label_sorted` for the segments and the saturated
footprints, :func:`label_pixels` for the deblending's
(:func:`pipeline.stages.detect._find.deblend_segments`) regions above each
threshold, :func:`level_markers`, its markers from all the thresholds, and
:func:`threshold_ranks`, how many thresholds each pixel exceeds,
:func:`weighted_rows`, the matched filter's weighted rows,
:func:`segment_bounds`, the segments' boxes, :func:`local_maxima`, their
peaks, :func:`segment_first_sums` and :func:`segment_second_sums`, their
moments, and :func:`residual_rows`, the
image minus the background.
Kept apart so that numba is imported only when the detect stage first runs.
"""

from __future__ import annotations

import math

import numpy as np

from pipeline._jit import njit

__all__ = [
    "clip_sorted_rows",
    "label_pixels",
    "label_sorted",
    "level_markers",
    "load_compiled",
    "local_maxima",
    "residual_rows",
    "segment_bounds",
    "segment_first_sums",
    "segment_second_sums",
    "threshold_ranks",
    "weighted_rows",
]


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
def _join(parent, i, j):
    """Join the trees of ``i`` and ``j``: the larger root goes under the smaller."""
    a, b = _root(parent, i), _root(parent, j)
    if a != b:
        parent[max(a, b)] = min(a, b)


@njit(nogil=True)
def _number_regions(parent, region):
    """Fill ``region`` with each element's tree, numbered 1.. by first element; the count."""
    number = np.zeros(parent.shape[0], region.dtype)
    count = 0
    for i in range(parent.shape[0]):
        r = _root(parent, i)
        if number[r] == 0:
            count += 1
            number[r] = count
        region[i] = number[r]
    return count


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
                    _join(parent, i, j)
    region = np.empty(n, np.int64)
    count = _number_regions(parent, region)
    for i in range(n):
        scratch[position[i]] = -1
    return region, count


@njit(nogil=True)
def label_sorted(where, width, diagonal):
    """``scipy.ndimage.label`` of a plane's set pixels, from their flat indices alone.

    Parameters
    ----------
    where : ndarray of int64, shape (n,)
        The set pixels' flat indices on a plane ``width`` pixels wide,
        increasing (``np.flatnonzero`` of the plane).
    width : int
        The plane's width, pixels.
    diagonal : bool
        8-connected (``structure=np.ones((3, 3))``); else 4-connected
        (scipy's default structure).

    Returns
    -------
    region : ndarray of int32, shape (n,)
        Each pixel's label, 1..count, numbered in the order of the regions'
        first pixels (raster order): the labels scipy's ``label`` gives
        the plane's pixels.
    count : int
        Number of regions.

    Notes
    -----
    The neighbours before a pixel in raster order are its left one (the
    previous index, if adjoining) and those of the row above, found with a
    pointer that only moves forward: one pass over the pixels, no plane.
    ``scipy.ndimage.label`` visits every pixel of the plane (11 ms of CPU
    on the benchmark night's 4109 x 1090 stretches, where the segments
    cover ~7 % of it).
    """
    n = where.shape[0]
    parent = np.arange(n)
    j = 0  # the first pixel that may touch this one from the row above
    for i in range(n):
        p = where[i]
        column = p % width
        if i > 0 and column > 0 and where[i - 1] == p - 1:
            _join(parent, i, i - 1)
        lo = p - width - 1 if diagonal and column > 0 else p - width
        hi = p - width + 1 if diagonal and column < width - 1 else p - width
        while j < i and where[j] < lo:
            j += 1
        k = j
        while k < i and where[k] <= hi:
            _join(parent, i, k)
            k += 1
    region = np.empty(n, np.int32)
    return region, _number_regions(parent, region)


@njit(nogil=True)
def level_markers(rank, position, segment, n_boxes, width, size, min_pixels, levels):
    """The watershed markers of segments from their regions above each threshold.

    The loop of :func:`pipeline.stages.detect._find._level_markers` (see
    there), compiled: per level, the pixels still above it, their regions
    (:func:`label_pixels`), the regions of at least ``min_pixels`` pixels
    and the markers they replace, each a pass or two over the pixels
    instead of about twenty array operations (64 levels per unit of the
    benchmark night); the same markers.

    Parameters
    ----------
    rank : ndarray of int, shape (n,)
        How many of its segment's thresholds each pixel exceeds.
    position : ndarray of int64, shape (n,)
        Each pixel's flat index on the plane.
    segment : ndarray of int64, shape (n,)
        Each pixel's segment, 0 .. ``n_boxes`` - 1.
    n_boxes : int
        Number of segments.
    width, size : int
        The plane's width and number of pixels.
    min_pixels, levels : int
        Smallest region kept; number of thresholds.

    Returns
    -------
    marker : ndarray of int64, shape (n,)
        Each pixel's marker id: 0 none, ``1 .. n_boxes`` its segment's
        placeholder (no region found at any level), above that a region's.
    next_id : int
        One more than the largest id given.
    """
    n = rank.size
    marker = segment + 1  # a segment's placeholder, replaced by the first regions found
    next_id = n_boxes + 1
    scratch = np.full(size, -1, np.int64)
    active = np.arange(n)
    n_active = n
    for level in range(levels):
        kept = 0
        for t in range(n_active):  # the pixels above this level's threshold, in order
            if rank[active[t]] > level:
                active[kept] = active[t]
                kept += 1
        n_active = kept
        if n_active < min_pixels:
            break
        places = np.empty(n_active, np.int64)
        for t in range(n_active):
            places[t] = position[active[t]]
        region, count = label_pixels(places, width, scratch)
        pixels = np.zeros(count + 1, np.int64)
        for t in range(n_active):
            pixels[region[t]] += 1
        big = pixels >= min_pixels
        big[0] = False
        # each big region's marker (a region lies in one marker)
        owner = np.zeros(count + 1, np.int64)
        inside = False
        for t in range(n_active):
            if big[region[t]]:
                owner[region[t]] = marker[active[t]]
                inside = True
        if not inside:
            continue
        held = np.zeros(next_id, np.int64)  # big regions per marker
        for r in range(1, count + 1):
            if big[r]:
                held[owner[r]] += 1
        replace = held >= 2
        for i in range(1, n_boxes + 1):
            replace[i] = held[i] >= 1  # the first regions
        replace[0] = False
        if not replace.any():
            continue
        ids = np.zeros(count + 1, np.int64)  # the new markers, in region order
        for r in range(1, count + 1):
            if big[r] and replace[owner[r]]:
                ids[r] = next_id
                next_id += 1
        for i in range(n):
            if replace[marker[i]]:
                marker[i] = 0
        for t in range(n_active):
            if ids[region[t]] > 0:
                marker[active[t]] = ids[region[t]]
    return marker, next_id


@njit(nogil=True)
def threshold_ranks(values, thresholds, segment):
    """How many of its segment's thresholds each value exceeds (``>``), int64.

    ``thresholds[segment[i]]`` are value ``i``'s; numpy's
    ``count_nonzero(values[:, None] > thresholds[segment], axis=1)`` (the
    same comparisons, of the same types) without its (pixels x levels)
    arrays.
    """
    n, levels = values.shape[0], thresholds.shape[1]
    out = np.zeros(n, np.int64)
    for i in range(n):
        row = thresholds[segment[i]]
        v = values[i]
        count = 0
        for j in range(levels):
            if v > row[j]:
                count += 1
        out[i] = count
    return out


@njit(nogil=True)
def weighted_rows(plane, variance, out):
    """``plane / variance`` as the search filters it, float32, into ``out``; returns ``out``.

    ``plane x inverse_variance(variance)`` (the inverse in single precision,
    0 where the variance is NaN or <= 0), multiplied in double precision and
    rounded once to single, 0 where not finite: numpy's
    ``multiply(plane, inverse, out=<float32>)`` and the zeroing after it,
    the same operations on the same types in one pass instead of five.
    """
    ny, nx = plane.shape
    for i in range(ny):
        for j in range(nx):
            v = np.float32(variance[i, j])
            inverse = np.float32(1.0) / v if v > 0 else np.float32(0.0)
            value = np.float32(np.float64(plane[i, j]) * np.float64(inverse))
            out[i, j] = value if np.isfinite(value) else np.float32(0.0)
    return out


@njit(nogil=True)
def segment_bounds(where, label, n_labels, shape):
    """Each label's bounding box from its pixels: rows and columns, first and past-the-last.

    ``where``: the pixels' flat indices on a plane of ``shape``; ``label``:
    each one's label, 1..``n_labels``.  Returns ``(row_lo, row_hi, col_lo,
    col_hi)``, int64 arrays of ``n_labels``, as numpy's ``minimum.at`` and
    ``maximum.at`` of the pixels' rows and columns give them (``hi`` one
    past the largest), in one pass.
    """
    ny, nx = shape
    row_lo = np.full(n_labels + 1, ny, np.int64)
    row_hi = np.full(n_labels + 1, -1, np.int64)
    col_lo = np.full(n_labels + 1, nx, np.int64)
    col_hi = np.full(n_labels + 1, -1, np.int64)
    for i in range(where.shape[0]):
        k = label[i]
        r = where[i] // nx
        c = where[i] - r * nx
        row_lo[k] = min(row_lo[k], r)
        row_hi[k] = max(row_hi[k], r)
        col_lo[k] = min(col_lo[k], c)
        col_hi[k] = max(col_hi[k], c)
    return row_lo[1:], row_hi[1:] + 1, col_lo[1:], col_hi[1:] + 1


@njit(nogil=True)
def local_maxima(labels, values, where, n_labels):
    """Local maxima of each segment: pixels not below any of their 8 neighbours in it.

    Parameters
    ----------
    labels : ndarray of int, shape (ny, nx)
        Each pixel's segment (0: none).
    values : ndarray, shape (ny, nx)
        The map the segments were cut from.
    where : ndarray of int64
        Flat indices of the segments' pixels.
    n_labels : int
        Largest label.

    Returns
    -------
    ndarray of int64, shape (n_labels + 1,)
        Local maxima per label.  The comparisons of
        :func:`pipeline.stages.detect._find._several_peaks`' array steps
        (a neighbour off the image is the pixel itself; a neighbour of
        another segment does not count), in one pass over the pixels.
    """
    ny, nx = labels.shape
    flat_labels, flat_values = labels.reshape(-1), values.reshape(-1)
    counts = np.zeros(n_labels + 1, np.int64)
    steps = np.array([-nx - 1, -nx, -nx + 1, -1, 1, nx - 1, nx, nx + 1])
    for i in range(where.shape[0]):
        p = where[i]
        r = p // nx
        c = p - r * nx
        own, value = flat_labels[p], flat_values[p]
        peak = True
        if 0 < r < ny - 1 and 0 < c < nx - 1:  # all 8 neighbours on the image
            for step in steps:
                q = p + step
                if flat_labels[q] == own and not flat_values[q] <= value:
                    peak = False
                    break
        else:
            for dy in range(-1, 2):
                for dx in range(-1, 2):
                    if dy == 0 and dx == 0:
                        continue
                    inside = 0 <= r + dy < ny and 0 <= c + dx < nx
                    q = p + dy * nx + dx if inside else p
                    if flat_labels[q] == own and not flat_values[q] <= value:
                        peak = False
        if peak:
            counts[own] += 1
    return counts


@njit(nogil=True)
def segment_first_sums(where, labels, position, width, corner_x, corner_y, data, mask, snr):
    """Per segment, the sums of ``w``, ``w x``, ``w y`` and the largest ``snr``, in one pass.

    The first half of :func:`pipeline.stages.detect._find.segment_moments`'
    array steps, the same operations in the same order: each pixel's
    segment ``position[labels[p]]``, its ``x``, ``y`` about the segment's
    box corner and its weight (``data`` as float64, 0 where not finite,
    negative or ``mask``), summed pixel after pixel as ``np.bincount``
    sums them, and ``np.maximum.at`` of ``snr``.  ``labels``, ``data``,
    ``mask`` and ``snr`` are flat planes; ``where`` the segments' pixels.

    Returns
    -------
    index : ndarray of int64
        Each pixel's segment.
    m00, mx, my : ndarray of float64
        The sums.
    peak : ndarray of ``snr``'s type
    """
    n = corner_x.shape[0]
    index = np.empty(where.shape[0], np.int64)
    m00, mx, my = np.zeros(n), np.zeros(n), np.zeros(n)
    peak = np.full(n, -np.inf, snr.dtype)
    for i in range(where.shape[0]):
        p = where[i]
        k = position[labels[p]]
        index[i] = k
        # (written out here and below: a compiled helper returning the
        # three took five times as long)
        r = p // width
        x, y = np.float64(p - r * width) - corner_x[k], np.float64(r) - corner_y[k]
        w = np.float64(data[p])
        if not (np.isfinite(w) and w >= 0) or mask[p]:
            w = 0.0
        m00[k] += w
        mx[k] += w * x
        my[k] += w * y
        s = snr[p]
        if s > peak[k] or s != s:  # np.maximum: NaN wins
            peak[k] = s
    return index, m00, mx, my, peak


@njit(nogil=True)
def segment_second_sums(where, index, width, corner_x, corner_y, data, mask, xc, yc):
    """Per segment, the sums of ``w dx dx``, ``w dx dy``, ``w dy dy`` about ``(xc, yc)``.

    The second half of :func:`pipeline.stages.detect._find.segment_moments`'
    array steps (see :func:`segment_first_sums`): ``dx = x - xc``, ``(w
    dx) dx`` and so on, summed pixel after pixel as ``np.bincount`` sums them.
    """
    n = corner_x.shape[0]
    sxx, sxy, syy = np.zeros(n), np.zeros(n), np.zeros(n)
    for i in range(where.shape[0]):
        k = index[i]
        p = where[i]
        r = p // width
        x, y = np.float64(p - r * width) - corner_x[k], np.float64(r) - corner_y[k]
        w = np.float64(data[p])
        if not (np.isfinite(w) and w >= 0) or mask[p]:
            w = 0.0
        dx = x - xc[k]
        dy = y - yc[k]
        sxx[k] += w * dx * dx
        sxy[k] += w * dx * dy
        syy[k] += w * dy * dy
    return sxx, sxy, syy


@njit(nogil=True)
def residual_rows(image, background, no_data, out):
    """``image - background`` in double precision, NaN where ``no_data``, into ``out``.

    numpy's ``subtract(image, background, out=out, dtype=float64)`` and
    ``out[no_data] = nan`` (each value converted to float64 before the
    subtraction) in one pass instead of two and a boolean index; ``out``
    may be ``image`` itself (float64).  Returns ``out``.
    """
    ny, nx = image.shape
    for i in range(ny):
        for j in range(nx):
            if no_data[i, j]:
                out[i, j] = np.nan
            else:
                out[i, j] = np.float64(image[i, j]) - np.float64(background[i, j])
    return out


def load_compiled() -> None:
    """Load the compiled loops in this process (from numba's disk cache once it is there).

    One call of each with the argument types of every call.  A worker
    process calls it as it starts (see ``Stage.warm``).
    """
    clip_sorted_rows(
        np.zeros((1, 3), np.float32), 3.0, 5, np.empty(1, np.float32), np.empty(1, np.int64)
    )
    label_pixels(np.zeros(1, np.int64), 1, np.full(1, -1, np.int64))
    label_sorted(np.zeros(1, np.int64), 1, True)
    one = np.zeros(1, np.int64)
    level_markers(one, one, one, 1, 1, 1, 1, 1)
    # the search's map is float32, its thresholds too (linspace of float32 bounds)
    threshold_ranks(np.zeros(1, np.float32), np.zeros((1, 1), np.float32), one)
    # the residual (float64) over a rectified product's variance (float32)
    weighted_rows(np.zeros((1, 1)), np.ones((1, 1), np.float32), np.empty((1, 1), np.float32))
    # scipy.ndimage.label's labels are int32
    segment_bounds(one, np.ones(1, np.int32), 1, (1, 1))
    # the segments' labels (int32) on the search's map (float32)
    local_maxima(np.ones((1, 1), np.int32), np.zeros((1, 1), np.float32), one, 1)
    # the segments' moments: labels int32, the residual float64, the map float32
    flat, corner = np.zeros(1), np.zeros(1)
    first = segment_first_sums(
        one, np.zeros(1, np.int32), one, 1, corner, corner, flat, np.zeros(1, bool),
        np.zeros(1, np.float32),
    )  # fmt: skip
    segment_second_sums(one, first[0], 1, corner, corner, flat, np.zeros(1, bool), flat, flat)
    # a rectified product's image (float32) or detect's float64 copy, less the
    # background (float32)
    for image_type in (np.float32, np.float64):
        plane = np.zeros((1, 1), image_type)
        residual_rows(plane, np.zeros((1, 1), np.float32), np.ones((1, 1), bool), np.empty((1, 1)))
