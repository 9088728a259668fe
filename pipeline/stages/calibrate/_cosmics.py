"""Cosmic-ray detection by Laplacian edge detection (van Dokkum 2001).

This follows L.A.Cosmic (van Dokkum 2001, PASP 113, 1420) and its tests,
with parameters named for what they do (``significance``,
``neighbour_fraction``, ``contrast``), but evaluates the costly median filters
only where they matter:

1. ``L+``: the image is 2x subsampled, convolved with the Laplacian kernel,
   clipped at zero and rebinned.  For one pixel with value ``v`` and
   neighbours up/down/left/right this is exactly the mean of
   ``max(2v - up - left, 0)``, ``max(2v - up - right, 0)``,
   ``max(2v - down - left, 0)`` and ``max(2v - down - right, 0)``, computed
   here on the whole image with a few array operations.
2. A cheap, conservative preselection keeps the pixels whose ``L+`` could
   pass the significance test with any noise value in their cross-shaped
   neighbourhood.
3. Only there: the noise ``N = sqrt(med5(variance))`` (the variance comes from
   the calibrate stage's noise model), ``S' = (L+ - med5(L+)) / (2 N)`` and
   the fine-structure image ``F = (med3(I) - med7(med3(I))) / N``; a pixel is
   a hit if ``S' > significance`` and ``S' / F > contrast``.  (astroscrappy divides
   ``L+`` by its own pixel's noise before the 5x5 median; here the centre
   pixel's noise is used for the whole 5x5 box, which differs only where the
   noise changes within two pixels.)
4. Neighbours of hits are added if ``S' > significance``, then neighbours of
   those if ``S' > neighbour_fraction * significance``; hits are replaced by the median of their
   unmasked 5x5 neighbourhood and the search repeats near them, ``n_iter``
   times in all, to peel multi-pixel hits.

TDI does not trail cosmic rays: charge deposited anywhere along a column moves
with its packet, so hits are as sharp as in a staring exposure
(DEVELOPERS.md, "TDI detector facts").
"""

from __future__ import annotations

import warnings

import numpy as np

from pipeline.stages.calibrate._chunks import Scratch, row_chunks

__all__ = ["NO_DATA_VARIANCE", "detect_cosmic_rays", "laplacian_plus"]

#: Variance standing for "no data" in the search (finite, so differences work).
NO_DATA_VARIANCE = np.float32(1e30)


def _cross_differences(array, r0, r1, scratch, prefix=""):
    """``v - up``, ``v - down``, ``v - left``, ``v - right`` for rows [r0, r1), edges repeated."""
    n_rows = array.shape[0]
    n = r1 - r0
    up, down = scratch.get(prefix + "up", n), scratch.get(prefix + "down", n)
    left, right = scratch.get(prefix + "left", n), scratch.get(prefix + "right", n)
    rows = array[r0:r1]
    if r0 > 0:
        np.subtract(rows, array[r0 - 1 : r1 - 1], out=up)
    else:
        up[0] = 0.0
        np.subtract(rows[1:], rows[:-1], out=up[1:])
    if r1 < n_rows:
        np.subtract(rows, array[r0 + 1 : r1 + 1], out=down)
    else:
        down[-1] = 0.0
        np.subtract(rows[:-1], rows[1:], out=down[:-1])
    left[:, 0] = 0.0
    np.subtract(rows[:, 1:], rows[:, :-1], out=left[:, 1:])
    right[:, -1] = 0.0
    np.negative(left[:, 1:], out=right[:, :-1])
    return up, down, left, right


def _lplus_rows(array, r0, r1, out, scratch):
    """``L+`` of rows [r0, r1) of ``array`` into ``out`` (shape (r1 - r0, n_columns))."""
    up, down, left, right = _cross_differences(array, r0, r1, scratch)
    term = scratch.get("term", r1 - r0)
    zero = np.float32(0.0)
    np.add(up, left, out=out)
    np.maximum(out, zero, out=out)
    for a, b in ((up, right), (down, left), (down, right)):
        np.add(a, b, out=term)
        np.maximum(term, zero, out=term)
        out += term
    out *= np.float32(0.25)


def laplacian_plus(image: np.ndarray) -> np.ndarray:
    """The clipped, subsampled Laplacian ``L+`` of L.A.Cosmic at every pixel.

    Parameters
    ----------
    image : ndarray of float, shape (n_rows, n_columns)
        Image; edges are extended by repeating the border pixels.

    Returns
    -------
    ndarray of float32, shape (n_rows, n_columns)
    """
    v = np.asarray(image, dtype=np.float32)
    out = np.empty(v.shape, dtype=np.float32)
    scratch = Scratch(v.shape[1])
    for r0, r1 in row_chunks(v.shape[0]):
        _lplus_rows(v, r0, r1, out[r0:r1], scratch)
    return out


def _candidates(work, variance, ignore, significance):
    """``L+`` everywhere and the flat indices of the pixels worth testing.

    A pixel can pass ``S' > significance`` only if ``L+ > 2 significance N``; ``N`` is
    at least the smallest noise in its cross-shaped neighbourhood, times a
    margin of sqrt(0.5) for a 5x5 median below that minimum.
    """
    from pipeline.stages.calibrate._cosmics_jit import lplus_candidates

    lplus = np.empty(work.shape, dtype=np.float32)
    threshold = np.float32(0.5 * (2.0 * significance) ** 2)
    candidates = lplus_candidates(
        work,
        np.ascontiguousarray(variance, dtype=np.float32),
        np.ascontiguousarray(ignore, dtype=bool),
        threshold,
        lplus,
    )
    return lplus, candidates


def _laplacian_plus_at(image: np.ndarray, flat_index: np.ndarray) -> np.ndarray:
    """``L+`` at the given flat pixel indices (edges repeated)."""
    rows, cols = np.divmod(flat_index, image.shape[1])
    v = image[rows, cols]
    up = v - image[np.maximum(rows - 1, 0), cols]
    down = v - image[np.minimum(rows + 1, image.shape[0] - 1), cols]
    left = v - image[rows, np.maximum(cols - 1, 0)]
    right = v - image[rows, np.minimum(cols + 1, image.shape[1] - 1)]
    return 0.25 * (
        np.maximum(up + left, 0)
        + np.maximum(up + right, 0)
        + np.maximum(down + left, 0)
        + np.maximum(down + right, 0)
    )


def _patch_index(flat_index: np.ndarray, shape: tuple[int, int], size: int) -> np.ndarray:
    """Flat indices of ``size`` x ``size`` boxes, edges repeated: (n, size * size)."""
    half = size // 2
    n_rows, n_columns = shape
    offsets = np.arange(-half, half + 1)
    index = flat_index[:, None] + (offsets[:, None] * n_columns + offsets[None, :]).ravel()
    rows, cols = np.divmod(flat_index, n_columns)
    edge = np.flatnonzero(
        (rows < half) | (rows >= n_rows - half) | (cols < half) | (cols >= n_columns - half)
    )
    if edge.size:
        r = np.clip(rows[edge, None] + offsets[None, :], 0, n_rows - 1)
        c = np.clip(cols[edge, None] + offsets[None, :], 0, n_columns - 1)
        index[edge] = (r[:, :, None] * n_columns + c[:, None, :]).reshape(edge.size, -1)
    return index


def _patches(array: np.ndarray, flat_index: np.ndarray, size: int) -> np.ndarray:
    """Values of ``size`` x ``size`` boxes, edges repeated: (n, size * size)."""
    return np.take(array.reshape(-1), _patch_index(flat_index, array.shape, size))


def _median_last(values: np.ndarray) -> np.ndarray:
    """Median along the last axis (odd length), by partition."""
    k = values.shape[-1] // 2
    return np.partition(values, k, axis=-1)[..., k]


def _noise_and_s_prime(
    variance: np.ndarray, lplus: np.ndarray, flat_index: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Noise ``N = sqrt(med5(variance))`` and ``S' = (L+ - med5(L+)) / (2 N)`` at pixels.

    The noise is free of cosmic rays (the median ignores them); both share
    one 5x5 patch index.
    """
    index = _patch_index(flat_index, variance.shape, 5)
    noise = np.sqrt(np.maximum(_median_last(np.take(variance.reshape(-1), index)), 1e-5))
    lplus_median = _median_last(np.take(lplus.reshape(-1), index))
    return noise, (lplus.flat[flat_index] - lplus_median) / (2.0 * noise)


def _fine_structure(image: np.ndarray, flat_index: np.ndarray) -> np.ndarray:
    """``med3(I) - med7(med3(I))`` at the given pixels.

    The 3x3 medians are computed once for every pixel of the union of the 7x7
    boxes (candidates cluster in star cores, so the union is much smaller than
    49 boxes per candidate) and gathered from a sparse image.
    """
    boxes = _patch_index(flat_index, image.shape, 7)
    needed = _unique(boxes, image.size)
    med3 = np.empty(image.size, dtype=np.float32)
    med3[needed] = _median_last(_patches(image, needed, 3))
    smooth = med3[boxes]
    return smooth[:, 24] - _median_last(smooth)


def _unique(index: np.ndarray, size: int) -> np.ndarray:
    """Sorted unique values of ``index`` (flat pixel indices below ``size``)."""
    if index.size > size // 64:
        marks = np.zeros(size, dtype=bool)
        marks[index.ravel()] = True
        return np.flatnonzero(marks)
    values = np.sort(index, axis=None)
    return values[np.r_[True, values[1:] != values[:-1]]]


def _neighbours(flat_index: np.ndarray, shape: tuple[int, int], radius: int) -> np.ndarray:
    """Flat indices of the (2 radius + 1)^2 boxes around the given pixels, unique."""
    if flat_index.size == 0:
        return flat_index
    return _unique(_patch_index(flat_index, shape, 2 * radius + 1), shape[0] * shape[1])


def _clean(image: np.ndarray, hits: np.ndarray, flat_index: np.ndarray) -> None:
    """Replace hit pixels (in place) by the median of their unflagged 5x5 box."""
    index = _patch_index(flat_index, image.shape, 5)
    box = np.where(np.take(hits.reshape(-1), index), np.nan, np.take(image.reshape(-1), index))
    with warnings.catch_warnings():
        # A hit whose whole 5x5 box is flagged keeps its value (NaN -> fallback).
        warnings.simplefilter("ignore", RuntimeWarning)
        fill = np.nanmedian(box, axis=1)
    keep = np.isfinite(fill)
    image.flat[flat_index[keep]] = fill[keep]


def _fill_no_data(work: np.ndarray) -> bool:
    """Fill non-finite pixels in place smoothly enough for the Laplacian.

    Whole columns without data (bad columns) are interpolated linearly from
    the nearest good columns, whole rows (gaps) copied from the nearest row
    with data, and what is left by the median of a sample of the image: a
    constant fill would make the neighbours of a bad column look like sharp
    edges.  Returns False if there is no finite pixel at all.
    """
    bad = np.flatnonzero(~np.isfinite(work))
    if bad.size == 0:
        return True
    if bad.size == work.size:
        return False
    n_rows, n_columns = work.shape
    rows, cols = np.divmod(bad, n_columns)
    full_cols = np.bincount(cols, minlength=n_columns) == n_rows
    full_rows = np.bincount(rows, minlength=n_rows) == n_columns
    good_cols = np.flatnonzero(~full_cols)
    if full_cols.any() and good_cols.size:
        for c in np.flatnonzero(full_cols):
            right = np.searchsorted(good_cols, c)
            left_col = good_cols[max(right - 1, 0)]
            right_col = good_cols[min(right, good_cols.size - 1)]
            if left_col == right_col:
                work[:, c] = work[:, left_col]
            else:
                weight = np.float32((c - left_col) / (right_col - left_col))
                work[:, c] = (1 - weight) * work[:, left_col] + weight * work[:, right_col]
    good_rows = np.flatnonzero(~full_rows)
    if full_rows.any():
        nearest = np.clip(
            np.searchsorted(good_rows, np.flatnonzero(full_rows)), 0, good_rows.size - 1
        )
        below = good_rows[np.maximum(nearest - 1, 0)]
        above = good_rows[nearest]
        gap_rows = np.flatnonzero(full_rows)
        source = np.where(np.abs(gap_rows - below) <= np.abs(above - gap_rows), below, above)
        work[gap_rows] = work[source]
    left = np.flatnonzero(~np.isfinite(work.reshape(-1)[bad]))
    if left.size:
        sample = work.reshape(-1)[:: max(work.size // 100_000, 1)]
        sample = sample[np.isfinite(sample)]
        work.reshape(-1)[bad[left]] = np.median(sample) if sample.size else 0.0
    return True


def detect_cosmic_rays(
    image: np.ndarray,
    variance: np.ndarray,
    ignore: np.ndarray | None = None,
    *,
    significance: float = 4.5,
    neighbour_fraction: float = 0.3,
    contrast: float = 5.0,
    n_iter: int = 2,
) -> np.ndarray:
    """Find cosmic-ray hits with L.A.Cosmic's tests (van Dokkum 2001).

    Parameters
    ----------
    image : ndarray, shape (n_rows, n_columns)
        Calibrated image in electrons (sky included); axis 0 is the scan axis.
        Non-finite pixels must be listed in ``ignore``.
    variance : ndarray, shape (n_rows, n_columns)
        Variance of ``image`` in e^2 from the noise model; give
        :data:`NO_DATA_VARIANCE` (or NaN or inf, which cost a copy) where there
        is no data.
    ignore : ndarray of bool, shape (n_rows, n_columns), optional
        Pixels never flagged and left out of the cleaning (saturated, bleed, bad
        columns, non-finite).
    significance : float
        Smallest significance ``S'`` of a cosmic-ray pixel, in noise units
        (default 4.5, as van Dokkum 2001 recommends).
    neighbour_fraction : float
        Neighbours of hits are hits too above this fraction of
        ``significance`` (default 0.3).
    contrast : float
        Minimum contrast ``S' / F`` between the Laplacian and the fine-structure
        image; larger values protect undersampled stars (default 5).
    n_iter : int
        Number of detect-and-clean passes; later passes look only near earlier
        hits.

    Returns
    -------
    ndarray of bool, shape (n_rows, n_columns)
        True on cosmic-ray pixels.
    """
    shape = image.shape
    ignore = np.zeros(shape, bool) if ignore is None else ignore
    work = np.array(image, dtype=np.float32)
    if not _fill_no_data(work):
        return np.zeros(shape, dtype=bool)
    variance = np.asarray(variance, dtype=np.float32)
    if not np.isfinite(variance).all():
        # No-data pixels get a huge variance: never the smallest noise, and
        # the 5x5 median ignores a few of them.
        variance = np.nan_to_num(variance, nan=NO_DATA_VARIANCE, posinf=NO_DATA_VARIANCE)

    lplus, candidates = _candidates(work, variance, ignore, significance)
    hits = np.zeros(shape, bool)
    for _ in range(max(int(n_iter), 1)):
        found = _one_pass(
            work,
            variance,
            lplus,
            candidates,
            hits,
            ignore,
            significance,
            neighbour_fraction,
            contrast,
        )
        if found.size == 0:
            break
        hits.flat[found] = True
        _clean(work, hits, found)
        # Next pass: only near the hits, with L+ recomputed from the cleaned image.
        near = _neighbours(found, shape, 3)
        lplus.flat[near] = _laplacian_plus_at(work, near)
        near = _neighbours(found, shape, 2)
        near = near[~hits.flat[near] & ~ignore.flat[near]]
        # The same cheap preselection as on the first pass.
        vmin = np.min(_patches(variance, near, 3)[:, [1, 3, 4, 5, 7]], axis=1)
        candidates = near[lplus.flat[near] ** 2 > 0.5 * (2.0 * significance) ** 2 * vmin]
    return hits


def _one_pass(
    work, variance, lplus, candidates, hits, ignore, significance, neighbour_fraction, contrast
):
    """One L.A.Cosmic pass over the candidate pixels; returns new hit indices."""
    if candidates.size == 0:
        return candidates
    noise, sp = _noise_and_s_prime(variance, lplus, candidates)
    keep = sp > significance
    candidates, noise, sp = candidates[keep], noise[keep], sp[keep]
    if candidates.size == 0:
        return candidates
    fine = np.maximum(_fine_structure(work, candidates) / noise, 0.01)
    found = candidates[sp / fine > contrast]
    # Grow twice into the 3x3 neighbourhood: first at the full significance, then
    # at its neighbour fraction.
    for limit in (significance, neighbour_fraction * significance):
        near = _neighbours(found, work.shape, 1)
        near = near[~ignore.flat[near] & ~hits.flat[near]]
        if near.size == 0:
            break
        _, sp_near = _noise_and_s_prime(variance, lplus, near)
        found = _unique(np.concatenate([found, near[sp_near > limit]]), work.size)
    return found
