"""Tests of the detect stage's search: background mesh, matched filter, local maxima.

Each replaces a call into a reference library (photutils, scipy) with a
cheaper computation of the same thing; the reference is what it is checked
against.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from astropy.stats import SigmaClip, sigma_clipped_stats
from photutils.background import Background2D, MedianBackground
from scipy.ndimage import gaussian_filter, maximum_filter

from pipeline.stages.detect._find import _several_peaks, segment_map
from pipeline.stages.detect._mesh import background_mesh, clipped_medians


def _peaky_map(seed: int) -> np.ndarray:
    """A matched-filter-like map (float32): smoothed noise, 120 stars of S/N 5 to
    300 (many blended), some cut by the image edges, and a two-pixel plateau."""
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[:140, :230]
    snr = gaussian_filter(rng.normal(0, 1, yy.shape), 1.0)
    snr /= snr.std()
    for x0, y0, amp in zip(
        rng.uniform(-3, 233, 120),
        rng.uniform(-3, 143, 120),
        np.exp(rng.uniform(np.log(5), np.log(300), 120)),
        strict=True,
    ):
        snr += amp * np.exp(-((xx - x0) ** 2 + (yy - y0) ** 2) / (2 * 1.8**2))
    snr[69:72, 99:103] = np.minimum(snr[69:72, 99:103], 49.0)
    snr[70, 100:102] = 50.0  # a peak of two equal pixels (both are maxima)
    return snr.astype(np.float32)


@pytest.mark.parametrize("seed", [3, 4])
def test_several_peaks_counts_scipy_local_maxima(seed):
    # scipy.ndimage.maximum_filter (3 x 3, each segment alone, -inf elsewhere) is
    # the reference: a local maximum is a segment's pixel not below any of its 8
    # neighbours in the segment; the segments with two or more are listed.
    snr = _peaky_map(seed)
    no_data = np.zeros(snr.shape, bool)
    segm = segment_map(snr, no_data, threshold=4.3, min_pixels=3)
    expected = []
    for label in segm.labels:
        own = segm.data == label
        alone = np.where(own, snr, -np.inf)
        peaks = own & (alone >= maximum_filter(alone, size=3, mode="constant", cval=-np.inf))
        if np.count_nonzero(peaks) > 1:
            expected.append(label)
    ours = _several_peaks(snr, segm)
    # the map holds both kinds, and segments on all four edges of the image
    assert 10 < len(expected) < segm.n_labels - 10
    edges = segm.data[[0, -1]].ravel().tolist() + segm.data[:, [0, -1]].ravel().tolist()
    assert len(set(edges) - {0}) > 4
    np.testing.assert_array_equal(ours, expected)


def test_several_peaks_do_not_wrap_across_rows():
    # One segment filling a 2 x 3 map: the last pixel of the first row (9) and
    # the first of the second (10) are the next pixel of each other in memory
    # but not neighbours; scipy.ndimage.maximum_filter (3 x 3, nothing beyond
    # the edges) finds both maxima.
    snr = np.array([[1.0, 2.0, 9.0], [10.0, 1.0, 1.0]], np.float32)
    segm = segment_map(snr, np.zeros(snr.shape, bool), threshold=0.5, min_pixels=1)
    assert segm.n_labels == 1
    peaks = snr >= maximum_filter(snr, size=3, mode="constant", cval=-np.inf)
    assert np.count_nonzero(peaks) == 2
    np.testing.assert_array_equal(_several_peaks(snr, segm), [1])


def test_segment_sums_are_numpys_bincount_steps():
    # numpy's array steps that segment_moments took before its compiled passes
    # are the reference, to the bit: per pixel its segment, x and y about the
    # box corner and its weight (float64 data, 0 where NaN, negative or
    # masked), ``np.bincount`` of w, w x, w y, then of (w dx) dx, (w dx) dy,
    # (w dy) dy about the centroid, and ``np.maximum.at`` of the map.
    from pipeline.stages.detect._find_jit import segment_first_sums, segment_second_sums

    rng = np.random.default_rng(14)
    snr = _peaky_map(5)
    segm = segment_map(snr, np.zeros(snr.shape, bool), threshold=4.3, min_pixels=3)
    data = 30.0 * snr.astype(float) + rng.normal(0.0, 20.0, snr.shape)
    data[40:43] = np.nan
    mask = np.zeros(snr.shape, bool)
    mask[:, 100:103] = True
    labels, n = segm.labels, segm.n_labels
    where = np.flatnonzero(segm.data)
    position = np.zeros(int(labels[-1]) + 1, np.intp)
    position[labels] = np.arange(n)
    corner_y = np.array([box[0].start for box in segm.slices], dtype=float)
    corner_x = np.array([box[1].start for box in segm.slices], dtype=float)
    # the reference
    index = position[segm.data.reshape(-1)[where]]
    rows, cols = np.divmod(where, snr.shape[1])
    x, y = cols - corner_x[index], rows - corner_y[index]
    w = data.reshape(-1)[where].astype(float)
    w[~(np.isfinite(w) & (w >= 0)) | mask.reshape(-1)[where]] = 0.0
    assert np.count_nonzero(w == 0.0) > 100 and np.count_nonzero(w) > 1000

    def total(weights):
        return np.bincount(index, weights, minlength=n)

    m00, mx, my = total(w), total(w * x), total(w * y)
    with np.errstate(invalid="ignore", divide="ignore"):
        xc, yc = mx / m00, my / m00
    dx, dy = x - xc[index], y - yc[index]
    second = [total(w * a * b) for a, b in ((dx, dx), (dx, dy), (dy, dy))]
    peak = np.full(n, -np.inf, dtype=snr.dtype)
    np.maximum.at(peak, index, snr.reshape(-1)[where])
    # ours
    planes = (segm.data.reshape(-1), data.reshape(-1), mask.reshape(-1), snr.reshape(-1))
    first = segment_first_sums(where, planes[0], position, snr.shape[1], corner_x, corner_y,
                               *planes[1:])  # fmt: skip
    np.testing.assert_array_equal(first[0], index)
    for ours, theirs in zip(first[1:], (m00, mx, my, peak), strict=True):
        np.testing.assert_array_equal(ours, theirs)
        assert ours.dtype == theirs.dtype
    ours = segment_second_sums(where, index, snr.shape[1], corner_x, corner_y, *planes[1:3],
                               xc, yc)  # fmt: skip
    for a, b in zip(ours, second, strict=True):
        np.testing.assert_array_equal(a, b)


def _band_templates(rng, ny: int, band: int) -> list:
    """Bands of ``band`` rows (the last one shorter), each with its own odd-sized
    random template (heights 3 to 11, widths 5 to 21), as ``band_templates``
    lists them: (lo, hi, flipped template, half height)."""
    out = []
    for lo in range(0, ny, band):
        hy, hx = int(rng.integers(1, 6)), int(rng.integers(2, 11))
        k = rng.uniform(0.0, 1.0, (2 * hy + 1, 2 * hx + 1)).astype(np.float32)
        out.append((lo, min(lo + band, ny), k[::-1, ::-1].copy(), hy))
    return out


@pytest.mark.parametrize("square", [False, True])
def test_filter_bands_is_scipy_oaconvolve_per_band(square):
    # scipy.signal.oaconvolve of each band of rows with its margins ('same'
    # size, zeros beyond the plane) is the reference, to single-precision
    # rounding; the bands' templates differ in size, the last band is short,
    # and the plane's first and last rows and columns are filtered with zeros
    # beyond them.
    from scipy.signal import oaconvolve

    from pipeline.stages.detect import _find

    rng = np.random.default_rng(5)
    ny, nx, band = 150, 211, 16
    plane = rng.normal(0.0, 1.0, (ny, nx)).astype(np.float32)
    plane[40:43, 100:103] += 300.0  # a bright source among noise
    templates = _band_templates(rng, ny, band)
    expected = np.empty((ny, nx))
    for lo, hi, k, hy in templates:
        a, b = max(lo - hy, 0), min(hi + hy, ny)
        kernel = k.astype(float) ** 2 if square else k.astype(float)
        expected[lo:hi] = oaconvolve(plane[a:b].astype(float), kernel, "same")[lo - a : hi - a]
    ours = _find._filter_bands(plane, templates, square)
    assert ours.dtype == np.float32 and ours.flags.c_contiguous
    # 1e-6 of the largest value: single-precision transforms (relative rounding
    # 6e-8 per operation, growing as log2 of the lengths, ~10) of values up to
    # the source's; the noise alone filters to values ~1e-2 of it.
    atol = 1e-6 * np.max(np.abs(expected))
    np.testing.assert_allclose(ours, expected, rtol=0, atol=atol)


def _same_to_rounding(ours, reference):
    """Equal to a few single-precision roundings (4e-7 relative), NaN where NaN.

    To rounding, not to the bit, so that a release of astropy or photutils
    that orders a sum or a median's halving otherwise does not fail the
    test; the bugs these tests are about (a median's other middle value, a
    clipping pass more or less, a box not excluded or not filled) move a
    value by 1e-4 of it or more.
    """
    np.testing.assert_allclose(ours, reference, rtol=4e-7, atol=0)


def _clipping_rows(seed: int) -> np.ndarray:
    """Rows of samples (float32) of every kind a clipping meets: sky noise with
    stars in it, an even and an odd number of samples (NaN for the rest), whole
    numbers (ties), a constant row, a row without samples, two samples."""
    rng = np.random.default_rng(seed)
    rows = rng.normal(1000.0, 30.0, (60, 257))
    stars = rng.random(rows.shape) < 0.08
    rows[stars] += rng.exponential(400.0, stars.sum())  # outliers on one side
    rows[1::3, 200:] = np.nan  # 200 samples
    rows[2::3, 201:] = np.nan  # 201 samples
    rows[5] = np.round(rows[5] / 10.0)  # whole numbers: many equal values
    rows[7] = 42.0
    rows[8] = np.nan
    rows[9, 2:] = np.nan
    return rows.astype(np.float32)


@pytest.mark.parametrize("maxiters", [1, 2, 5, 10])
def test_clipped_medians_are_astropy_sigma_clipped_stats(maxiters):
    # astropy's sigma_clipped_stats (median centre, standard deviation, median
    # of what is left) along the rows is the reference: the same passes and the
    # same single-precision median of the values kept (to the bit today).
    rows = _clipping_rows(6)
    ours, n_kept = clipped_medians(rows, sigma=3.0, maxiters=maxiters)
    missing = np.isnan(rows)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # the row without samples
        _, expected, _ = sigma_clipped_stats(
            np.where(missing, 0, rows), mask=missing, axis=1, sigma=3.0, maxiters=maxiters
        )
    kept = SigmaClip(sigma=3.0, maxiters=maxiters)(
        np.ma.MaskedArray(np.where(missing, 0, rows), missing), axis=1
    )
    assert ours.dtype == np.float32
    _same_to_rounding(ours, expected)
    np.testing.assert_array_equal(n_kept, np.count_nonzero(~kept.mask, axis=1))
    assert np.isnan(ours[8]) and ours[7] == 42.0


#: (shape, box, masked): partial boxes on both edges (a last row of boxes with
#: more than half a box of rows, kept; a last column with fewer, excluded and
#: filled), boxes mostly masked (excluded) and stars; a plane of whole boxes.
MESH_CASES = [((215, 280), (20, 64), True), ((160, 256), (32, 64), False)]


@pytest.mark.parametrize(("shape", "box", "masked"), MESH_CASES)
def test_background_mesh_is_photutils_background2d(shape, box, masked):
    # photutils' Background2D mesh with the stage's options is the reference
    # (to the bit today: the clipping bounds agree to ~1e-15 of the noise and
    # no value lies that close to one of them).
    rng = np.random.default_rng(9)
    yy, xx = np.mgrid[: shape[0], : shape[1]]
    data = 500.0 + 0.3 * xx - 0.2 * yy + rng.normal(0.0, 25.0, shape)
    for x0, y0, flux in zip(
        rng.uniform(0, shape[1], 80),
        rng.uniform(0, shape[0], 80),
        rng.exponential(2e4, 80),
        strict=True,
    ):
        data += flux / (2 * np.pi * 2.0**2) * np.exp(-((xx - x0) ** 2 + (yy - y0) ** 2) / 8.0)
    data = data.astype(np.float32)
    mask = np.zeros(shape, bool)
    if masked:
        mask[30:55, 70:140] = True  # a box wholly masked, others in part
        mask[100:110, :] = True
    reference = Background2D(
        data,
        box,
        mask=mask,
        filter_size=(3, 3),
        sigma_clip=SigmaClip(sigma=3.0, maxiters=5),
        bkg_estimator=MedianBackground(),
        exclude_percentile=50.0,
    ).background_mesh
    ours = background_mesh(data, mask, box, sigma=3.0, maxiters=5, exclude_percentile=50.0)
    assert ours.dtype == reference.dtype
    _same_to_rounding(ours, reference)


def test_background_mesh_says_when_every_box_is_masked():
    data = np.zeros((64, 64), np.float32)
    with pytest.raises(ValueError, match="every background box"):
        background_mesh(data, np.ones(data.shape, bool), (32, 32))


def test_background_mesh_excludes_a_box_half_masked_as_photutils_does():
    # photutils' Background2D excludes a box keeping no more than
    # (1 - exclude_percentile / 100) of its pixels: here one with exactly half
    # of them masked and none clipped (uniform noise reaches only 1.7 sigma),
    # filled from its neighbours like photutils fills it.
    rng = np.random.default_rng(10)
    data = (100.0 + 10.0 * np.arange(24)[None, :] + rng.uniform(0, 1, (24, 24))).astype(np.float32)
    mask = np.zeros(data.shape, bool)
    mask[8:12, 8:16] = True  # half of the middle box
    reference = Background2D(
        data,
        (8, 8),
        mask=mask,
        filter_size=(3, 3),
        sigma_clip=SigmaClip(sigma=3.0, maxiters=5),
        bkg_estimator=MedianBackground(),
        exclude_percentile=50.0,
    )
    assert np.isnan(reference._bkg_stats[1, 1])  # excluded (photutils' own mesh)
    ours = background_mesh(data, mask, (8, 8), sigma=3.0, maxiters=5, exclude_percentile=50.0)
    _same_to_rounding(ours, reference.background_mesh)


@pytest.mark.parametrize("fill", [0.2, 0.35])
def test_label_pixels_groups_them_as_scipy_label(fill):
    # scipy.ndimage.label (8-connected) of the plane holding the pixels is the
    # reference: the same regions (numbered otherwise: by first pixel in the
    # list), with pixels on every edge of the plane (no region may wrap from
    # one row's end to the next row's start).
    from scipy.ndimage import label

    from pipeline.stages.detect._find_jit import label_pixels

    rng = np.random.default_rng(11)
    shape = (23, 37)
    plane = rng.random(shape) < fill
    position = rng.permutation(np.flatnonzero(plane))
    scratch = np.full(plane.size, -1, np.int64)
    region, count = label_pixels(position, shape[1], scratch)
    expected, n = label(plane, structure=np.ones((3, 3), bool))
    theirs = expected.reshape(-1)[position]
    assert count == n > 5
    # one region of theirs per region of ours and back: the same partition
    pairs = set(zip(region.tolist(), theirs.tolist(), strict=True))
    assert len(pairs) == n
    assert np.all(scratch == -1)  # left as it was given
    first = np.unique(region, return_index=True)[1]
    np.testing.assert_array_equal(region[np.sort(first)], np.arange(1, n + 1))


@pytest.mark.parametrize("diagonal", [True, False])
@pytest.mark.parametrize("fill", [0.05, 0.3, 0.6])
def test_label_sorted_is_scipy_label(diagonal, fill):
    # scipy.ndimage.label of the plane is the reference, labels and all
    # (numbered in raster order), 8-connected (structure of ones) or with
    # scipy's default 4-connected structure; pixels on every edge of the
    # plane (no region may wrap from one row's end to the next row's start).
    from scipy.ndimage import label

    from pipeline.stages.detect._find_jit import label_sorted

    rng = np.random.default_rng(13)
    for shape in ((23, 37), (40, 9), (1, 30), (30, 1)):
        plane = rng.random(shape) < fill
        plane[0, 0] = plane[-1, -1] = True
        where = np.flatnonzero(plane)
        region, count = label_sorted(where, shape[1], diagonal)
        structure = np.ones((3, 3), bool) if diagonal else None
        expected, n = label(plane, structure=structure)
        assert count == n
        assert region.dtype == expected.dtype
        np.testing.assert_array_equal(region, expected.reshape(-1)[where])
    assert n > 1


def test_threshold_ranks_count_as_numpy_comparisons():
    # numpy's ``values > thresholds`` (float32, as the deblending's map and
    # thresholds) counted per pixel is the reference, with values equal to
    # thresholds (not above them) and NaN (above none).
    from pipeline.stages.detect._find_jit import threshold_ranks

    rng = np.random.default_rng(12)
    thresholds = np.sort(rng.random((5, 8)).astype(np.float32), axis=1)
    segment = rng.integers(0, 5, 400)
    values = rng.random(400).astype(np.float32)
    values[:40] = thresholds[segment[:40], rng.integers(0, 8, 40)]  # ties
    values[40] = np.nan
    expected = np.count_nonzero(values[:, None] > thresholds[segment], axis=1)
    ours = threshold_ranks(values, thresholds, segment)
    np.testing.assert_array_equal(ours, expected)
    assert ours[40] == 0 and ours.dtype == expected.dtype


@pytest.mark.parametrize("plane_type", [np.float64, np.float32])
def test_weighted_rows_are_numpys_product_with_the_inverse_variance(plane_type):
    # numpy's steps are the reference, to the bit: the inverse variance in
    # single precision (0 where the variance is NaN or <= 0), the product
    # ``multiply(plane, inverse, out=<float32>)`` and 0 where not finite
    # (no data, or an overflow to infinity).
    from pipeline.stages.detect._find import inverse_variance
    from pipeline.stages.detect._find_jit import weighted_rows

    rng = np.random.default_rng(13)
    shape = (40, 70)
    plane = rng.normal(0.0, 30.0, shape).astype(plane_type)
    plane[5, :] = np.nan
    plane[6, :3] = 3e38  # times an inverse above 1: infinite in single precision
    variance = rng.uniform(1e-3, 200.0, shape).astype(np.float32)
    variance[:, 7] = np.nan
    variance[:, 8] = 0.0
    variance[:, 9] = -1.0
    variance[6, :3] = 0.01
    expected = np.empty(shape, np.float32)
    with np.errstate(over="ignore"):
        np.multiply(plane, inverse_variance(variance), out=expected)
    assert np.isinf(expected[6, :3]).all()
    expected[~np.isfinite(expected)] = 0.0
    ours = weighted_rows(plane, variance, np.empty(shape, np.float32))
    np.testing.assert_array_equal(ours.view(np.int32), expected.view(np.int32))


@pytest.mark.parametrize(
    ("image_type", "into"),
    [(np.float32, "new"), (np.float32, "other"), (np.float64, "new"), (np.float64, "image"),
     (np.float64, "other")],
)  # fmt: skip
def test_residual_is_numpys_double_precision_difference(image_type, into):
    # numpy's ``subtract(image, background, out=..., dtype=float64)`` and NaN
    # where there is no data are the reference, to the bit, whether the
    # result is a new plane, the image itself (float64) or another plane;
    # and a big-endian image (a FITS file's) gives the same values.
    from pipeline.stages.detect import _residual

    rng = np.random.default_rng(14)
    shape = (30, 50)
    # values apart by more than a factor of two: their single-precision
    # difference would be rounded
    image = rng.normal(1e4, 100.0, shape).astype(image_type)
    background = rng.uniform(0.0, 3e4, shape).astype(np.float32)
    no_data = rng.random(shape) < 0.1
    expected = np.subtract(image, background, dtype=np.float64)
    expected[no_data] = np.nan
    out = {"new": False, "image": image, "other": np.zeros(shape)}[into]
    ours = _residual(image.copy() if into != "image" else image, background, no_data, True, out)
    np.testing.assert_array_equal(ours.view(np.int64), expected.view(np.int64))
    if into != "image":
        swapped = image.astype(image.dtype.newbyteorder(">"))
        again = _residual(swapped, background, no_data, True, False)
        np.testing.assert_array_equal(again.view(np.int64), expected.view(np.int64))


def test_filter_bands_weights_and_scales_rows_as_whole_plane_steps():
    # The same scipy.signal.oaconvolve reference, of the weighted plane (float64
    # data times float32 weights, rounded to single precision, 0 where the data
    # are NaN: pixels without data) and times a scale afterwards.
    from scipy.signal import oaconvolve

    from pipeline.stages.detect import _find

    rng = np.random.default_rng(12)
    ny, nx = 200, 150
    data = rng.normal(0.0, 5.0, (ny, nx))
    data[:, 60:63] = np.nan  # no data
    weights = rng.uniform(0.5, 2.0, (ny, nx)).astype(np.float32)
    weights[:, 60:63] = 0.0
    scale = rng.uniform(0.1, 10.0, (ny, nx)).astype(np.float32)
    templates = _band_templates(rng, ny, 8)  # 25 bands: batches of 3
    assert len(templates) > 3
    weighted = np.empty((ny, nx), np.float32)
    np.multiply(data, weights, out=weighted, casting="same_kind")
    weighted[~np.isfinite(weighted)] = 0.0
    expected = np.empty((ny, nx))
    for lo, hi, k, hy in templates:
        a, b = max(lo - hy, 0), min(hi + hy, ny)
        expected[lo:hi] = oaconvolve(weighted[a:b].astype(float), k.astype(float), "same")[
            lo - a : hi - a
        ]
    expected *= scale
    ours = _find._filter_bands(data, templates, False, weights=weights, scale=scale)
    # as above: single-precision rounding of values up to the largest
    np.testing.assert_allclose(ours, expected, rtol=0, atol=1e-6 * np.max(np.abs(expected)))
