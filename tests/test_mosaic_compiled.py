"""The mosaic's compiled loops against the numpy versions they replaced, on random inputs.

The numpy versions (``tests/_mosaic_reference.py``) are what the accuracy
tests of ``test_mosaic_resample.py`` and ``test_mosaic_coadd.py`` were first
written against; these tests are self-consistency checks, not external truth.
"""

import numpy as np
import pytest
from scipy.interpolate import RectBivariateSpline

from pipeline.masks import MASK_DTYPE, MaskBit
from pipeline.mosaic import coadd, resample_to_tile, weighted_median
from pipeline.mosaic._coadd_jit import median_and_noise
from pipeline.mosaic._resample import _grid_values, _SplineGrid, merge_onto_tile
from pipeline.mosaic._resample_jit import resample_columns, resample_rows
from tests._mosaic_reference import (
    coadd_numpy,
    merge_onto_tile_numpy,
    resample_axis_numpy,
    resample_to_tile_numpy,
    weighted_median_numpy,
)
from tests._mosaic_scene import night_wcs, tile

#: (axis, n_rows, n_cols, output shape) of the random resampling passes.
PASSES = [(1, 37, 50, (37, 61)), (0, 45, 33, (52, 33)), (1, 3, 5, (3, 9)), (0, 4, 6, (1, 6))]


def _random_planes(rng, shape):
    image = rng.normal(100.0, 30.0, shape).astype(np.float32)
    variance = rng.uniform(1.0, 50.0, shape).astype(np.float32)
    flags = np.where(rng.random(shape) < 0.05, MaskBit.SATURATED, 0).astype(MASK_DTYPE)
    return image, variance, flags


def _compiled_pass(planes, positions, axis):
    """One compiled pass at the given positions (a spline grid with an identity basis)."""
    n_lines = positions.shape[0]
    grid = _SplineGrid(
        np.arange(n_lines + 1, dtype=np.int32),
        np.arange(n_lines, dtype=np.int32),
        np.ones(n_lines),
        np.ascontiguousarray(positions, float),
    ).arrays
    out = (
        np.empty(positions.shape, np.float32),
        np.empty(positions.shape, np.float32),
        np.empty(positions.shape, MASK_DTYPE),
    )
    outside = MASK_DTYPE.type(int(MaskBit.OUTSIDE))
    if axis == 1:
        w2, jacobian = resample_rows(*planes, grid, 0.0, outside, *out)
    else:
        # no no-data bits: every pixel stored as computed
        settings = (outside, MASK_DTYPE.type(0), False, np.float32(1.0), False)
        box = (0.0, 0.0, 0.0, 0.0)
        w2, jacobian, _, _ = resample_columns(*planes, grid, 0.0, grid, box, settings, out, (0, 0))
    return (*out, w2 / positions.size, jacobian / positions.size)


@pytest.mark.parametrize(("axis", "n_rows", "n_cols", "out_shape"), PASSES)
def test_compiled_pass_matches_numpy(axis, n_rows, n_cols, out_shape):
    rng = np.random.default_rng(n_rows)
    planes = _random_planes(rng, (n_rows, n_cols))
    n_line = n_cols if axis == 1 else n_rows
    # positions from 2 px before the first line to 2 px beyond the last (taps
    # outside), a few on exact integers (a zero weight)
    positions = rng.uniform(-2.0, n_line + 1.0, out_shape)
    positions.flat[::7] = np.round(positions.flat[::7])
    *ours, ours_w2, ours_jacobian = _compiled_pass(planes, positions, axis)
    one = positions.shape[axis] == 1  # the resampler's Jacobian for a single output line
    jacobian = np.ones(out_shape) if one else np.abs(np.gradient(positions, axis=axis))
    *theirs, theirs_w2 = resample_axis_numpy(planes, positions, jacobian, axis)
    assert ours_jacobian == pytest.approx(jacobian.mean(), rel=1e-12)
    # the same float32 operations in the same order: equal to float32 rounding
    # (1e-6 of values ~100, variances ~50)
    np.testing.assert_allclose(ours[0], theirs[0], rtol=1e-6, atol=1e-4)
    np.testing.assert_allclose(ours[1], theirs[1], rtol=1e-6, atol=1e-4)
    np.testing.assert_array_equal(ours[2], theirs[2])
    assert (ours[2] & MaskBit.OUTSIDE).any()
    # float64 sums of the same float32 terms, in another order
    assert ours_w2 == pytest.approx(theirs_w2, rel=1e-9)


@pytest.mark.parametrize("n", [1, 2, 5, 9])
def test_compiled_weighted_median_matches_numpy(n):
    rng = np.random.default_rng(n)
    values = rng.normal(0.0, 1.0, (n, 40, 30)).astype(np.float32)
    weights = rng.uniform(0.0, 2.0, (n, 40, 30)).astype(np.float32)
    weights[rng.random(weights.shape) < 0.3] = 0.0
    weights[:, :10] = weights[:, :10] > 0  # equal weights: the cumulative meets half exactly
    ours, theirs = weighted_median(values, weights), weighted_median_numpy(values, weights)
    assert ours.dtype == theirs.dtype
    # the median is one of the values: equal, or NaN at the same pixels
    np.testing.assert_array_equal(ours, theirs)
    # the co-add's median (pairwise comparisons over runs of pixels, not a sort)
    valid = weights > 0
    variances = rng.uniform(1.0, 3.0, values.shape).astype(np.float32)
    m = values[0].size
    median, noise2, count = np.empty(m, np.float32), np.empty(m), np.empty(m, np.uint16)
    images, weights, valid, variances = (
        a.reshape(n, -1) for a in (values, weights, valid, variances)
    )
    planes = (images, variances, np.zeros(images.shape, MASK_DTYPE), weights)
    combined = (np.empty(m, np.float32), np.empty(m, np.float32), *np.empty((2, m), MASK_DTYPE))
    median_and_noise(planes, valid, 16.0, median, noise2, count, combined, np.uint16(0))
    np.testing.assert_array_equal(median.reshape(theirs.shape), theirs)
    np.testing.assert_array_equal(count, valid.sum(axis=0))
    inverse = np.where(valid, 1.0 / variances.astype(float), 0.0).sum(axis=0)
    expected = np.where(inverse > 0, 0.5 * np.pi / np.where(inverse > 0, inverse, 1.0), 0.0)
    # float64 sums of the same terms in the same order
    np.testing.assert_allclose(noise2, expected, rtol=1e-12)


def test_compiled_coadd_matches_numpy():
    rng = np.random.default_rng(3)
    shape = (6, 90, 80)
    images = rng.normal(50.0, 10.0, shape).astype(np.float32)
    # a sky variance that grows across the tile and ripples from pixel to pixel:
    # the weights' block medians and their interpolation matter
    ramp = 1.0 + 0.5 * np.arange(shape[2]) / shape[2]
    variances = 100.0 * rng.uniform(0.8, 1.2, (6, 1, 1)) * ramp * rng.uniform(0.9, 1.1, shape)
    variances = variances.astype(np.float32)
    images[:, 40:44, 30:34] += 2000.0  # a star in every night
    images[2, 10, :] += 500.0  # a trail in one night
    # a faint star (~12 sigma in the median) twice as bright in one night: the
    # source allowance keeps it, without which that night would be rejected
    images[:, 20:23, 50:53] += np.array([60.0, 60.0, 60.0, 120.0, 60.0, 60.0])[:, None, None]
    images[4, 60:63, 5:8] = np.nan
    images[2, 11, 20:25] = np.nan  # beside the trail: rejections must not grow into it
    images[3:, 20:30, 60:70] = np.nan  # three nights left: still rejecting
    images[0, 25, 65] += 500.0
    flags = np.zeros(shape, MASK_DTYPE)
    flags[1, 70:75, 70:75] = MaskBit.SATURATED
    images[:, 85:, 75:] = np.nan  # no data: the flags of every night
    flags[:, 85:, 75:] = MaskBit.GAP
    scale = np.array([1.0, 0.8, 1.0, 0.5, 1.0, 0.9])
    ours = coadd(images, variances, flags, scale=scale)
    theirs = coadd_numpy(images, variances, flags, scale=scale)
    assert ours.rejected.sum() > 80  # the trail and its grown edges
    np.testing.assert_array_equal(ours.rejected, theirs.rejected)
    np.testing.assert_array_equal(ours.coverage, theirs.coverage)
    np.testing.assert_array_equal(ours.flags, theirs.flags)
    # the nights left out (the trail, the saturated pixels of night 1) are flagged
    left_out = (ours.flags & MaskBit.NIGHT_LEFT_OUT) != 0
    assert left_out[10, 40] and left_out[72, 72] and not left_out[50, 10]
    # float64 sums over nights against float32 ones: 1e-6 relative
    np.testing.assert_allclose(ours.image, theirs.image, rtol=1e-6)
    np.testing.assert_allclose(ours.weight, theirs.weight, rtol=1e-6)


@pytest.mark.parametrize("degree", [1, 2, 3])
def test_spline_on_a_grid_matches_scipy(degree):
    """The compiled tensor-product evaluation against scipy's (FITPACK's) grid evaluation."""
    nodes_y, nodes_x = np.arange(-64.0, 300.0, 32.0), np.arange(-96.0, 260.0, 32.0)
    grid_y, grid_x = np.meshgrid(nodes_y, nodes_x, indexing="ij")
    values = 0.99 * grid_y + 0.003 * grid_x + 1e-6 * grid_x * grid_y + 1e-5 * grid_y**2
    spline = RectBivariateSpline(nodes_y, nodes_x, values, kx=degree, ky=degree)
    ys, xs = np.arange(-5, 250), np.arange(3, 200)
    # both sum the same few B-spline terms of values ~300: float64 rounding
    np.testing.assert_allclose(
        _grid_values(spline, ys, xs), spline(ys.astype(float), xs.astype(float)), atol=1e-9
    )


#: (core, planes already holding data) of the fused resampling's comparisons:
#: a whole product, one answering for a core (a stretch between neighbours),
#: and one merged into a night's planes that another product partly filled.
FUSED = [(None, False), ((20.5, 150.5, -0.5, 120.5), False), ((20.5, 150.5, -0.5, 120.5), True)]


@pytest.mark.parametrize("scale", [1.01, 1.25])
@pytest.mark.parametrize(("core", "filled"), FUSED)
def test_fused_resampling_matches_numpy(core, filled, scale):
    """Positions made line by line, pass 2 stored or merged in place, against the numpy path.

    Night pixels of 1.01 tile pixels (averaged over each tile pixel) and of
    1.25 (a finer tile: interpolated with the Keys taps).
    """
    rng = np.random.default_rng(7)
    shape = (200, 220)
    image, variance, flags = _random_planes(rng, shape)
    image[40:43, :] = np.nan  # no data: NaN on the tile, flagged
    flags[90:92, 100:103] |= np.uint16(MaskBit.COSMIC_RAY)
    wcs = night_wcs(shape, rotation=0.3, scale=scale)
    target = tile(160)
    ours = resample_to_tile(image, variance, flags, wcs, target, core=core)
    theirs = resample_to_tile_numpy(image, variance, flags, wcs, target, core=core)
    assert ours.slices == theirs.slices
    # float32 sums of the same terms in the same order: equal to float32
    # rounding of values ~100 (1e-6) and of variances ~50 times weights
    np.testing.assert_allclose(ours.image, theirs.image, rtol=1e-6, atol=1e-4)
    np.testing.assert_allclose(ours.variance, theirs.variance, rtol=1e-6, atol=1e-4)
    np.testing.assert_array_equal(ours.flags, theirs.flags)
    assert np.isnan(ours.image).any() and np.isfinite(ours.image).any()
    # float64 sums of the same float32 terms, in another order
    assert ours.noise_correlation == pytest.approx(theirs.noise_correlation, rel=1e-9)

    def night_planes():
        planes = (
            np.full(target.shape, np.nan, np.float32),
            np.full(target.shape, np.nan, np.float32),
            np.full(target.shape, MaskBit.OUTSIDE, MASK_DTYPE),
        )
        if filled:  # another product of the night already holds the left half
            planes[0][:, :80], planes[1][:, :80], planes[2][:, :80] = 5.0, 2.0, MaskBit.SATURATED
        return planes

    merged, reference = night_planes(), night_planes()
    a = merge_onto_tile(image, variance, flags, wcs, target, merged, core=core)
    b = merge_onto_tile_numpy(image, variance, flags, wcs, target, reference, core=core)
    assert a[0] == b[0] > 0  # pixels taken
    assert a[1] == pytest.approx(b[1], rel=1e-9)
    np.testing.assert_allclose(merged[0], reference[0], rtol=1e-6, atol=1e-4)
    np.testing.assert_allclose(merged[1], reference[1], rtol=1e-6, atol=1e-4)
    np.testing.assert_array_equal(merged[2], reference[2])
