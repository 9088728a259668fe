"""Tests of the detect stage's search: background mesh, matched filter, local maxima.

Each replaces a call into a reference library (photutils, scipy) with a
cheaper computation of the same thing; the reference is what it is checked
against.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.ndimage import gaussian_filter, maximum_filter

from pipeline.stages.detect._find import _several_peaks, segment_map


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
