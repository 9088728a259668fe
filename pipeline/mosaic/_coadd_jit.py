"""The compiled per-pixel loops of :func:`pipeline.mosaic.coadd`.

Kept apart so that numba is imported only when a tile is first co-added.
Each loop visits a pixel's nights once (the numpy version made a whole-array
pass per operation and sorted with a compare-exchange network), reading the
night planes in runs of ``CHUNK`` pixels; the arithmetic is that of
:func:`pipeline.mosaic.coadd`'s module docstring.  Tile-sized outputs are
allocated by the caller with numpy.
"""

from __future__ import annotations

import math

import numpy as np

from pipeline._jit import njit
from pipeline.masks import MaskBit

__all__ = [
    "bilinear_weights",
    "block_medians",
    "combine",
    "exclude",
    "flag_around",
    "median_and_noise",
    "reject",
    "shift_levels",
    "validity",
    "weighted_median_flat",
]


@njit(nogil=True, inline="always")
def _median_of(values, weights, p, order_v, order_w):
    """Weighted median of pixel ``p`` (``values[:, p]``; weight <= 0: missing); NaN if none."""
    n = 0
    total = 0.0
    for i in range(values.shape[0]):
        w = weights[i, p]
        if w > 0:
            v = values[i, p]
            # insertion sort: a handful of nights
            j = n
            while j > 0 and order_v[j - 1] > v:
                order_v[j] = order_v[j - 1]
                order_w[j] = order_w[j - 1]
                j -= 1
            order_v[j] = v
            order_w[j] = w
            n += 1
            total += w
    half = 0.5 * total
    if n == 0 or half <= 0:
        return np.nan
    cumulative = 0.0
    for j in range(n):
        cumulative += order_w[j]
        if cumulative >= half:
            return order_v[j]
    return order_v[n - 1]


@njit(nogil=True)
def weighted_median_flat(values, weights):
    """Weighted median along axis 0 of ``(n, m)`` arrays: float64, shape (m,)."""
    n, m = values.shape
    out = np.empty(m, np.float64)
    order_v = np.empty(n, np.float64)
    order_w = np.empty(n, np.float64)
    for p in range(m):
        out[p] = _median_of(values, weights, p, order_v, order_w)
    return out


#: Pixels handled at once by the loops over ``(n, m)`` planes: each plane is
#: read in runs of this many pixels (planes of 2**k pixels lie 2**k * 4 bytes
#: apart, so reading one pixel of every night at a time maps every read to one
#: cache set), and the per-pixel sums over nights are SIMD loops over the run.
CHUNK = 512


@njit(nogil=True)
def median_and_noise(planes, valid, limit, median, noise2, count, out, left_out):
    """Per pixel of ``(n, m)`` planes: weighted median, ``V_m = (pi/2) / sum(1/V_i)``, count.

    ``planes`` is ``(images, variances, flags, weights)``.  Each run of
    pixels is also combined into ``out`` (:func:`combine` with every valid
    night kept, ``left_out`` its flag bits) while it is in the processor
    cache: only the pixels whose nights a rejection clears need combining
    again.

    Written into ``median`` (the images' dtype), ``noise2`` (float64) and
    ``count`` (uint16), shape (m,); ``V_m`` is 0 where no night is valid.
    Returns the suspects: the pixels, increasing, where a valid night lies
    beyond the rejection limit before any allowance for sources, ``(x -
    median)**2 > limit (V_i + V_m)`` (:func:`reject` looks at these alone).

    The median is the least value whose nights at or below it hold half the
    total weight, i.e. the lowest value
    at which the cumulative weight of the sorted values reaches half (as
    :func:`weighted_median_flat`), found by comparing every pair of nights
    instead of sorting (the same value while the float64 sums of the float32
    weights are exact: weights within a factor ~2**25 of one another).
    """
    images, variances, _, weights = planes
    n, m = images.shape
    work = _combine_work()
    w = np.empty((n, CHUNK), np.float64)
    x = np.empty((n, CHUNK), images.dtype)
    total, below, inverse = np.empty((3, CHUNK), np.float64)
    best = np.empty(CHUNK, images.dtype)
    counted = np.zeros(CHUNK, np.uint16)
    suspect = np.empty(CHUNK, np.bool_)
    suspects = np.empty(1024, np.int64)
    n_suspects = 0
    for p0 in range(0, m, CHUNK):
        size = min(CHUNK, m - p0)
        total[:size] = 0.0
        inverse[:size] = 0.0
        counted[:size] = 0
        for i in range(n):
            for q in range(size):
                wi = np.float64(weights[i, p0 + q])
                wi = wi if wi > 0 else 0.0
                w[i, q] = wi
                x[i, q] = images[i, p0 + q]
                total[q] += wi
                ok = valid[i, p0 + q]
                inverse[q] += 1.0 / variances[i, p0 + q] if ok else 0.0
                counted[q] += ok
        best[:size] = np.inf
        for j in range(n):
            for q in range(size):
                below[q] = 0.0
            for i in range(n):
                for q in range(size):
                    below[q] += w[i, q] * (x[i, q] <= x[j, q])
            for q in range(size):
                v = x[j, q]
                take = (w[j, q] > 0) & (below[q] >= 0.5 * total[q]) & (v < best[q])
                best[q] = v if take else best[q]
        for q in range(size):
            half = 0.5 * total[q]
            median[p0 + q] = best[q] if half > 0 else np.nan
            noise2[p0 + q] = 0.5 * math.pi / inverse[q] if inverse[q] > 0 else 0.0
            count[p0 + q] = counted[q]
        suspect[:size] = False
        for i in range(n):
            for q in range(size):
                p = p0 + q
                d = x[i, q] - median[p]
                beyond = d * d > limit * (variances[i, p] + noise2[p])
                suspect[q] |= valid[i, p] & beyond
        for q in range(size):
            if suspect[q]:
                suspects, n_suspects = _append(suspects, n_suspects, p0 + q)
        _combine_run(planes, valid, p0, size, work, out, left_out)
    return suspects[:n_suspects]


@njit(nogil=True, inline="always")
def _append(buffer, n, value):
    """``buffer[n] = value``, doubling ``buffer`` when full; returns it and ``n + 1``."""
    if n == buffer.size:
        buffer = np.concatenate((buffer, np.empty(buffer.size, buffer.dtype)))
    buffer[n] = value
    return buffer, n + 1


@njit(nogil=True)
def reject(images, variances, valid, median, noise2, count, n_x, sky, args, suspects):
    """Outliers of ``(n, m)`` planes (``m`` pixels of rows ``n_x`` long), as flat indices.

    Returns the indices ``i * m + p`` of the rejected night ``i`` of pixel
    ``p``, increasing.

    Night ``i`` of pixel ``p`` is an outlier where ``(x - median)**2 >
    reject_sigma**2 * (V_i + V_m + (source_tolerance * S)**2)``, ``S`` the
    highest significant signal ``median - sky`` (above ``3 sqrt(V_m)``;
    ``V_m = noise2``) within ``source_radius`` pixels (a square).  ``S`` is
    needed only where a night lies beyond the limit without it (the
    ``suspects`` of :func:`median_and_noise`), and is computed there alone.
    ``args`` is ``(reject_sigma, source_tolerance, min_nights,
    source_radius)``.
    """
    reject_sigma, source_tolerance, min_nights, radius = args
    n, m = images.shape
    n_y = m // n_x
    hits = np.empty(1024, np.int64)
    n_hits = 0
    limit = reject_sigma * reject_sigma
    for p in suspects:
        if count[p] >= min_nights:
            y = p // n_x
            x = p - y * n_x
            signal = 0.0
            for yy in range(max(y - radius, 0), min(y + radius + 1, n_y)):
                for xx in range(max(x - radius, 0), min(x + radius + 1, n_x)):
                    r = yy * n_x + xx
                    s = median[r] - sky
                    if s > 3.0 * math.sqrt(noise2[r]) and s > signal:
                        signal = s
            allowance = noise2[p] + (source_tolerance * signal) ** 2
            for i in range(n):
                if valid[i, p]:
                    d = images[i, p] - median[p]
                    if d * d > limit * (variances[i, p] + allowance):
                        hits, n_hits = _append(hits, n_hits, i * m + p)
    return np.sort(hits[:n_hits])


@njit(nogil=True)
def exclude(valid, hits, n_x, grow):
    """Clear ``valid`` (``(n, m)``, rows ``n_x`` long) in squares of ``2 grow + 1`` px around hits.

    ``hits`` are flat indices ``i * m + p`` (:func:`reject`'s).  Returns the
    number of pixels cleared in each night (the grown rejections within
    ``valid``) and the pixels cleared in any night.
    """
    n, m = valid.shape
    n_y = m // n_x
    cleared = np.zeros(n, np.int64)
    touched = np.empty(1024, np.int64)
    n_touched = 0
    for h in hits:
        i = h // m
        p = h - i * m
        y = p // n_x
        x = p - y * n_x
        for yy in range(max(y - grow, 0), min(y + grow + 1, n_y)):
            for xx in range(max(x - grow, 0), min(x + grow + 1, n_x)):
                q = yy * n_x + xx
                if valid[i, q]:
                    valid[i, q] = False
                    cleared[i] += 1
                    touched, n_touched = _append(touched, n_touched, q)
    return cleared, touched[:n_touched]


@njit(nogil=True)
def flag_around(out_flags, hits, m, n_x, radius):
    """Set :attr:`~pipeline.masks.MaskBit.NIGHT_LEFT_OUT` in squares of ``2 radius + 1`` px.

    Around every hit (:func:`reject`'s flat indices ``i * m + p``) in
    ``out_flags`` (the tile's flags, shape (m,), rows ``n_x`` long).
    """
    n_y = m // n_x
    for h in hits:
        p = h % m
        y = p // n_x
        x = p - y * n_x
        for yy in range(max(y - radius, 0), min(y + radius + 1, n_y)):
            for xx in range(max(x - radius, 0), min(x + radius + 1, n_x)):
                out_flags[yy * n_x + xx] |= _LEFT_OUT


@njit(nogil=True, inline="always")
def _combine_run(planes, kept, p0, size, work, out, left_out):
    """:func:`combine` for pixels ``p0 ... p0 + size - 1`` (at most ``CHUNK``).

    ``planes`` is ``(images, variances, flags, weights)``, ``work`` a pair of
    (3, CHUNK) float64 and (4, CHUNK) uint16 buffers, ``out`` ``(image,
    weight, coverage, flags)``, ``left_out`` :func:`combine`'s.
    """
    images, variances, flags, weights = planes
    image, weight, coverage, out_flags = out
    total, weighted, spread = work[0][0], work[0][1], work[0][2]
    used, every, counted, lost = work[1][0], work[1][1], work[1][2], work[1][3]
    total[:size] = 0.0
    weighted[:size] = 0.0
    spread[:size] = 0.0
    used[:size] = 0
    every[:size] = 0
    counted[:size] = 0
    lost[:size] = 0
    for i in range(images.shape[0]):
        for q in range(size):
            p = p0 + q
            k = kept[i, p]
            f = flags[i, p]
            every[q] |= f
            # the images are finite (0 where invalid): 0 x image adds zero
            w = weights[i, p] if k else np.float32(0.0)
            total[q] += w
            weighted[q] += w * images[i, p]
            spread[q] += w * w * variances[i, p] if k else 0.0
            used[q] |= f if k else np.uint16(0)
            counted[q] += k
            # a night with data (weight > 0: valid) that is not kept: rejected
            lost[q] += (weights[i, p] > 0) != k
    for q in range(size):
        p = p0 + q
        coverage[p] = counted[q]
        dropped = _LEFT_OUT if (lost[q] != 0) | ((every[q] & left_out) != 0) else np.uint16(0)
        if total[q] > 0:
            image[p] = weighted[q] / total[q]
            weight[p] = total[q] * total[q] / spread[q] if spread[q] > 0 else 0.0
            out_flags[p] = used[q] | dropped
        else:
            image[p] = np.nan
            weight[p] = 0.0
            out_flags[p] = every[q] | dropped


#: The tile's bit for a night with data left out of a pixel's mean.
_LEFT_OUT = np.uint16(int(MaskBit.NIGHT_LEFT_OUT))


@njit(nogil=True, inline="always")
def _combine_work():
    return np.empty((3, CHUNK), np.float64), np.empty((4, CHUNK), np.uint16)


@njit(nogil=True)
def combine(planes, kept, out, pixels, left_out):
    """Weighted mean of ``(n, m)`` planes over the kept nights.

    ``planes`` is ``(images, variances, flags, weights)``.  Writes into
    ``out = (image, weight, coverage, flags)``, each of shape (m,): image
    (float32, NaN without data), weight ``(sum w)**2 / sum(w**2 V)``
    (float32, 0 without data), coverage and flags (uint16: OR of the kept
    nights', of all nights' where none is kept; plus
    :attr:`~pipeline.masks.MaskBit.NIGHT_LEFT_OUT` where a night with data
    is not kept: its weight > 0 but not in ``kept``, or its flags hold one
    of the bits ``left_out`` (uint16), at every pixel, or at ``pixels``
    alone if it is not empty.
    """
    m = kept.shape[1]
    work = _combine_work()
    if pixels.size:
        for p in pixels:
            _combine_run(planes, kept, p, 1, work, out, left_out)
        return
    for p0 in range(0, m, CHUNK):
        _combine_run(planes, kept, p0, min(CHUNK, m - p0), work, out, left_out)


@njit(nogil=True)
def validity(images, variances, flags, ignore_bits, cleaned, valid):
    """``valid`` (finite, positive variance, no ignored flag); ``cleaned``: images, 0 elsewhere.

    ``cleaned`` may be ``images`` itself; both are written.
    """
    n, m = images.shape
    for i in range(n):
        for p in range(m):
            x = images[i, p]
            v = variances[i, p]
            ok = np.isfinite(x) and np.isfinite(v) and v > 0 and (flags[i, p] & ignore_bits) == 0
            valid[i, p] = ok
            cleaned[i, p] = x if ok else np.float32(0.0)


@njit(nogil=True)
def block_medians(variance, valid, block, stride):
    """Lower median of the valid ``variance`` in each ``block`` x ``block`` block; NaN if none.

    Every ``stride``-th row and column of a block is read (``block`` a multiple of it).
    """
    n_y, n_x = variance.shape
    n_by, n_bx = -(-n_y // block), -(-n_x // block)
    out = np.full((n_by, n_bx), np.nan)
    # one band of blocks at a time, read row by row (the order the planes are stored in)
    side = block // stride
    buffers = np.empty((n_bx, side * side), np.float64)
    counts = np.zeros(n_bx, np.int64)
    for by in range(n_by):
        counts[:] = 0
        for y in range(by * block, min((by + 1) * block, n_y), stride):
            for x in range(0, n_x, stride):
                if valid[y, x]:
                    bx = x // block
                    buffers[bx, counts[bx]] = variance[y, x]
                    counts[bx] += 1
        for bx in range(n_bx):
            c = counts[bx]
            if c > 0:
                out[by, bx] = _select(buffers[bx], c, (c - 1) // 2)
    return out


@njit(nogil=True)
def _select(values, n, k):
    """The ``k``-th smallest of ``values[:n]``, reordering them (Hoare's selection, CACM 4, 321)."""
    lo, hi = 0, n - 1
    while lo < hi:
        pivot = values[(lo + hi) // 2]
        i, j = lo, hi
        while i <= j:
            while values[i] < pivot:
                i += 1
            while values[j] > pivot:
                j -= 1
            if i <= j:
                values[i], values[j] = values[j], values[i]
                i += 1
                j -= 1
        if k <= j:
            hi = j
        elif k >= i:
            lo = i
        else:
            break
    return values[k]


@njit(nogil=True)
def bilinear_weights(grid, block, valid, scale, out):
    """``out = scale / B`` where ``valid`` (0 elsewhere), ``B`` bilinear in ``grid`` between blocks.

    ``grid`` (at least 2 x 2) holds values at block centres ``(k + 1/2) block - 1/2``;
    beyond the first and last centres ``B`` is held constant.
    """
    n_y, n_x = valid.shape
    n_by, n_bx = grid.shape
    # every row of block centres interpolated along x first (the same terms
    # as interpolating at each pixel)
    along = np.empty((n_by, n_x))
    for x in range(n_x):
        u = min(max((x + 0.5) / block - 0.5, 0.0), n_bx - 1.0)
        j = min(int(u), n_bx - 2)
        fx = u - j
        for k in range(n_by):
            along[k, x] = (1.0 - fx) * grid[k, j] + fx * grid[k, j + 1]
    for y in range(n_y):
        t = min(max((y + 0.5) / block - 0.5, 0.0), n_by - 1.0)
        k = min(int(t), n_by - 2)
        fy = t - k
        low, high, ok, row = along[k], along[k + 1], valid[y], out[y]
        for x in range(n_x):
            b = (1.0 - fy) * low[x] + fy * high[x]
            row[x] = scale / b if ok[x] else 0.0
    return out


@njit(nogil=True, inline="always")
def _node(position, first, spacing, n_nodes):
    """Index of the node before ``position`` and the fraction beyond it (extrapolating linearly)."""
    t = (position - first) / spacing
    k = min(max(math.floor(t), 0), n_nodes - 2)
    return k, t - k


@njit(nogil=True)
def shift_levels(images, valid, grids, first, spacing):
    """Subtract from each night of ``(n, n_y, n_x)`` images its level where valid, in place.

    Night ``i``'s level is ``grids[i]`` (shape (n_by, n_bx), at least 2 x 2, or
    1 x 1 for one level) on nodes ``first + k spacing`` px along each axis,
    interpolated bilinearly and continued linearly beyond the outer nodes.
    """
    n, n_y, n_x = images.shape
    n_by, n_bx = grids.shape[1], grids.shape[2]
    for i in range(n):
        for y in range(n_y):
            if n_by < 2 or n_bx < 2:
                for x in range(n_x):
                    if valid[i, y, x]:
                        images[i, y, x] -= grids[i, 0, 0]
                continue
            k, fy = _node(y, first, spacing, n_by)
            for x in range(n_x):
                if valid[i, y, x]:
                    j, fx = _node(x, first, spacing, n_bx)
                    low = (1.0 - fx) * grids[i, k, j] + fx * grids[i, k, j + 1]
                    high = (1.0 - fx) * grids[i, k + 1, j] + fx * grids[i, k + 1, j + 1]
                    images[i, y, x] -= np.float32((1.0 - fy) * low + fy * high)
