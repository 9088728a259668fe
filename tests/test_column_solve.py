"""The column solve's array steps against the reference libraries' own.

The night-wide column solve takes its medians by partition and fits its
lines a slice of columns at a time; these tests compare each step with
numpy's ``nanmedian`` and ``polyfit`` on arrays wider than one slice, with
NaN holes, even and odd counts and infinities.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from pipeline.stages.calibrate._columns import (
    _PART_COLUMNS,
    _fit_lines,
    _fit_some_lines,
    _initial_reference,
    _nanmedian,
    _noise_ratio,
)

#: Wider than two slices of the per-column steps, with a partial last slice.
N_COLUMNS = 2 * _PART_COLUMNS + 89


def _holey(rng, shape, nan_fraction=0.1):
    """Normal values with NaN holes, a few all-NaN lines both ways and some infinities."""
    values = rng.normal(100.0, 10.0, shape)
    values[rng.random(shape) < nan_fraction] = np.nan
    values[:, 3] = np.nan  # an all-NaN column
    values[5] = np.nan  # an all-NaN row
    values[7, 10:14] = [np.inf, -np.inf, np.inf, np.inf]
    values[:, 20] = np.round(values[:, 20])  # ties
    return values


def _same_to_rounding(ours, reference):
    """Equal to a few double-precision roundings (1e-14 relative), NaN and infinities alike.

    To rounding, not to the bit, so that a numpy release that computes a
    median's halving or a mean otherwise does not fail the test; the bugs
    these tests are about (the other middle value, a line's count taken
    wrongly, a median over a slice) move a value by 1e-3 of it or more.
    """
    np.testing.assert_allclose(ours, reference, rtol=1e-14, atol=0)


def _numpy_nanmedian(values, axis):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN lines: NaN, as ours
        return np.nanmedian(values, axis=axis)


# numpy.nanmedian sorts a masked array along an axis shorter than 600 and
# calls numpy.median per line along a longer one: both paths, even and odd.
@pytest.mark.parametrize("shape", [(40, 77), (41, 77), (700, 30), (701, 31)])
@pytest.mark.parametrize("axis", [0, 1])
def test_nanmedian_is_numpys(shape, axis):
    rng = np.random.default_rng(3)
    values = _holey(rng, shape)
    before = values.copy()
    # The same two middle values and the same (low + high) / 2 (reference:
    # numpy.nanmedian; to the bit today).
    _same_to_rounding(_nanmedian(values, axis), _numpy_nanmedian(values, axis))
    np.testing.assert_array_equal(values, before)  # the input is left alone


def test_nanmedian_without_any_nan_is_numpys():
    rng = np.random.default_rng(4)
    for n_rows in (64, 65):  # the partition path alone, even and odd
        values = rng.normal(size=(n_rows, 50))
        for axis in (0, 1):
            # reference: numpy.median (the same arithmetic: to the bit today)
            _same_to_rounding(_nanmedian(values, axis), np.median(values, axis=axis))


def _lines(rng, n_blocks=60, n_columns=N_COLUMNS):
    """Blocks of a sky ramp seen by columns of varied response, with outliers and holes."""
    sky = np.linspace(200.0, 900.0, n_blocks)
    slope = rng.normal(1.0, 0.05, n_columns)
    intercept = rng.normal(5.0, 2.0, n_columns)
    level = slope * sky[:, None] + intercept + rng.normal(0.0, 1.0, (n_blocks, n_columns))
    level[rng.random(level.shape) < 0.02] += 60.0  # stars: blocks to reject
    valid = rng.random(level.shape) > 0.05
    level[~valid] = np.nan
    weight = np.where(valid, rng.uniform(0.5, 2.0, level.shape), 0.0)
    return sky, level, weight, valid


def _polyfit_lines(sky, level, weight, valid, clip):
    """The documented fit, one column at a time with numpy.polyfit (weights sqrt(w))."""
    results = []
    for c in range(level.shape[1]):
        use = valid[:, c].copy()
        for _ in range(3):
            w = np.sqrt(weight[use, c])
            (a, b), cov = np.polyfit(sky[use], level[use, c], 1, w=w, cov="unscaled")
            resid = np.where(valid[:, c], level[:, c] - (a * sky + b), 0.0)
            chi2 = np.sum(weight[use, c] * resid[use] ** 2) / max(use.sum() - 2, 1)
            scale = np.sqrt(max(chi2, 1e-12))
            new_use = valid[:, c] & (np.abs(resid * np.sqrt(weight[:, c]) / scale) <= clip)
            if np.array_equal(new_use, use):
                break
            use = new_use
        results.append((a, b, scale * np.sqrt(cov[0, 0]), scale * np.sqrt(cov[1, 1]), use.sum()))
    return [np.array(values) for values in zip(*results, strict=True)]


def test_line_fits_are_numpy_polyfits_with_the_same_rejections():
    rng = np.random.default_rng(5)
    sky, level, weight, valid = _lines(rng)
    ours = _fit_lines(sky, level, weight, valid, 4.0)
    reference = _polyfit_lines(sky, level, weight, valid, 4.0)
    np.testing.assert_array_equal(ours[4], reference[4])  # the same blocks kept
    assert (ours[4] < valid.sum(axis=0)).sum() > N_COLUMNS // 4  # outliers were rejected
    # Least squares by QR (polyfit) against centred normal equations: both
    # lose ~1e-13 relative on sky levels of a few hundred; 1e-9 leaves margin.
    for mine, theirs in zip(ours[:4], reference[:4], strict=True):
        np.testing.assert_allclose(mine, theirs, rtol=1e-9, atol=1e-9)


# Widths of a partial last slice, one column included (numpy sums a lone
# column pairwise, several row by row).
@pytest.mark.parametrize("n_columns", [N_COLUMNS, 2 * _PART_COLUMNS + 1, 1])
def test_line_fits_by_slices_are_the_single_shot_fit(n_columns):
    rng = np.random.default_rng(6)
    sky, level, weight, valid = _lines(rng, n_columns=n_columns)
    sliced = _fit_lines(sky, level, weight, valid, 4.0)
    single = _fit_some_lines(sky, level, weight, valid, 4.0)
    for values, value in zip(sliced, single, strict=True):
        np.testing.assert_array_equal(values, value)  # exact: the same sums in the same order


def test_noise_ratio_and_relative_levels_are_numpy_nanmedians():
    rng = np.random.default_rng(7)
    level = _holey(rng, (50, N_COLUMNS), nan_fraction=0.05)
    level[:, 30] = 0.0  # zero levels: zero relative level
    valid = np.isfinite(level)
    scatter = np.abs(rng.normal(10.0, 1.0, level.shape))
    read_noise = np.full((50, 1), 5.0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN lines, as the solve
        expected = np.sqrt(read_noise**2 + np.maximum(level, 0.0))
        per_column = np.nanmedian(np.where(valid, scatter / expected, np.nan), axis=0)
        masked = np.where(valid, level, np.nan)
        relative = np.nanmedian(masked / np.nanmedian(masked, axis=1, keepdims=True), axis=0)
    # The same medians (reference: numpy.nanmedian) and one division.
    ratio = _noise_ratio(level, scatter, read_noise, valid)
    _same_to_rounding(ratio, per_column / np.nanmedian(per_column))
    _, ours = _initial_reference(level, valid, ratio, 1.5)
    _same_to_rounding(ours, relative)
