"""Tests of the 1-D resampling passes of the rectify stage (analytic truths)."""

import numpy as np
import pytest

from pipeline.stages.rectify._resample import (
    keys_weights,
    noise_correlation_factor,
    resample_columns,
    shift_rows,
)

OUT = 1 << 8
NONFINITE = 1 << 5

FRACTIONS = [0.0, 0.1, 0.25, 0.5, 0.73, 0.999]


def _gaussian(shape, x0, y0, sigma, flux=1.0e5):
    y, x = np.indices(shape, dtype=float)
    g = np.exp(-0.5 * (((x - x0) / sigma) ** 2 + ((y - y0) / sigma) ** 2))
    return flux * g / (2 * np.pi * sigma**2)


def _moments(image):
    y, x = np.indices(image.shape, dtype=float)
    total = image.sum()
    xc, yc = (image * x).sum() / total, (image * y).sum() / total
    xx = (image * (x - xc) ** 2).sum() / total
    yy = (image * (y - yc) ** 2).sum() / total
    xy = (image * (x - xc) * (y - yc)).sum() / total
    return total, xc, yc, xx, yy, xy


def _planes(image):
    return image, np.ones_like(image), np.zeros(image.shape, np.uint16)


@pytest.mark.parametrize("frac", FRACTIONS)
def test_keys_weights_reproduce_quadratics(frac):
    # Keys (1981), IEEE Trans. ASSP 29, 1153: with a = -0.5 the kernel sums to
    # one and reproduces polynomials up to degree 2 (analytic property).
    w = keys_weights(np.array(frac))
    taps = np.array([-1.0, 0.0, 1.0, 2.0])
    for degree in range(3):
        # 1e-12: exact in exact arithmetic; this is float64 round-off.
        assert np.sum(w * taps**degree) == pytest.approx(frac**degree, abs=1e-12)
    # The cubic is *not* reproduced (the kernel is only third-order accurate):
    # this guards against a test that would pass for any weights.
    if frac not in (0.0, 0.5):  # at 0 and 1/2 the cubic is reproduced by symmetry
        assert abs(np.sum(w * taps**3) - frac**3) > 1e-6


@pytest.mark.parametrize("frac", FRACTIONS)
def test_columns_conserve_flux_and_moments(frac):
    # Analytic: a translation by a sub-pixel shift moves the centroid by the
    # shift and leaves flux and second moments unchanged (quadratic
    # reproduction of the Keys kernel, see module docstring).
    star = _gaussian((48, 64), 30.3, 21.6, 1.6)
    shift = 5.0 + frac
    positions = np.arange(64) + shift
    out, _var, msk = resample_columns(
        *_planes(star), positions, outside_bit=OUT, nonfinite_bit=NONFINITE
    )
    f0, x0, y0, xx0, yy0, xy0 = _moments(star)
    f1, x1, y1, xx1, yy1, xy1 = _moments(out)
    # 1e-9 relative: the star is ~20 sigma from every edge, so truncation of
    # its wings is below 1e-80; what remains is float64 round-off.
    assert f1 == pytest.approx(f0, rel=1e-9)
    assert x1 == pytest.approx(x0 - shift, abs=1e-9)
    assert y1 == pytest.approx(y0, abs=1e-9)
    assert xx1 == pytest.approx(xx0, abs=1e-8)
    assert yy1 == pytest.approx(yy0, abs=1e-8)
    assert xy1 == pytest.approx(xy0, abs=1e-8)
    assert not msk[:, :40].any()


@pytest.mark.parametrize("frac", FRACTIONS)
def test_rows_shift_matches_analytic_gaussian(frac):
    # Analytic: resampling a well-sampled Gaussian (sigma = 2 px) at shifted
    # positions equals the Gaussian evaluated there, up to the kernel's
    # interpolation error.
    star = _gaussian((80, 40), 19.2, 37.4, 2.0)
    offsets = np.full(40, 3.0 + frac)
    out, _, _ = shift_rows(*_planes(star), offsets, 70, outside_bit=OUT, nonfinite_bit=NONFINITE)
    expected = _gaussian((70, 40), 19.2, 37.4 - 3.0 - frac, 2.0)
    # 5e-3 of the peak: the Keys kernel's error is O(h^3 f''') (Keys 1981);
    # measured 3.9e-3 at worst for sigma = 2 px, where bilinear interpolation
    # errs by f(1-f)/2 * |f''| = 3e-2 of the peak at a half-pixel phase.
    assert np.max(np.abs(out - expected)) < 5e-3 * expected.max()
    f0, _x0, y0, *_ = _moments(star)
    f1, _x1, y1, *_ = _moments(out)
    assert f1 == pytest.approx(f0, rel=1e-9)  # float64 round-off
    assert y1 == pytest.approx(y0 - 3.0 - frac, abs=1e-9)


def test_jacobian_scales_flux():
    # Analytic: sampling the input at half the pixel spacing doubles the number
    # of output pixels over the star; with the Jacobian 0.5 the sum is kept.
    star = _gaussian((30, 80), 40.0, 15.0, 3.0)
    positions = 20.0 + 0.5 * np.arange(80)
    out, _, _ = resample_columns(
        *_planes(star), positions, 0.5, outside_bit=OUT, nonfinite_bit=NONFINITE
    )
    # 1e-6: the star spans ~13 sigma of margin; interpolation errors of a
    # smooth, well-sampled profile average out in the sum to well below 1e-6.
    assert out.sum() == pytest.approx(star.sum(), rel=1e-6)


@pytest.mark.parametrize("frac", [0.0, 0.3, 0.5])
def test_variance_and_noise_correlation(frac):
    # Analytic: for independent inputs of variance v the output variance is
    # v * sum(w^2) per pixel, and the variance of a large aperture sum is the
    # sum of the input variances (weights sum to one), i.e. larger than the
    # propagated sum by the noise-correlation factor.
    rng = np.random.default_rng(4)
    n_rows, n_cols = 400, 300
    noise = rng.normal(0.0, 1.0, (n_rows, n_cols))
    variance = np.ones((n_rows, n_cols))
    positions = np.arange(8, n_cols - 8) + frac
    out, var, _ = resample_columns(
        noise,
        variance,
        np.zeros((n_rows, n_cols), np.uint16),
        positions,
        outside_bit=OUT,
        nonfinite_bit=NONFINITE,
    )
    w = keys_weights(np.array(frac))
    np.testing.assert_allclose(var, np.sum(w**2), rtol=1e-6)  # float32-free, exact
    # Per-pixel variance from the noise: 400 x 284 samples give a relative
    # standard error of ~0.3 %; 2 % is 6 sigma.
    assert out.var() == pytest.approx(np.sum(w**2), rel=0.02)
    # Aperture sums over 64 output columns: the factor predicts their variance.
    sums = out[:, :256].reshape(n_rows, 4, 64).sum(axis=2)
    predicted = 64 * np.sum(w**2) * noise_correlation_factor(w)
    # 400 x 4 sums: relative standard error 3.5 %; 15 % is ~4 sigma and still
    # separates the factor at frac 0.5 (1.56) from 1.
    assert sums.var() == pytest.approx(predicted, rel=0.15)


@pytest.mark.parametrize("frac", [0.0, 0.4])
def test_mask_or_over_nonzero_taps(frac):
    # Definition: an output pixel carries the OR of the bits of every input
    # pixel with non-zero weight; for a zero phase only one tap is non-zero.
    image = np.zeros((20, 20))
    mask = np.zeros((20, 20), np.uint16)
    mask[5, 10] = 1
    mask[5, 11] = 2
    offsets = np.full(20, frac)
    _, _, out_mask = shift_rows(
        image.T.copy(), image.T.copy(), mask.T.copy(), offsets, 20,
        outside_bit=OUT, nonfinite_bit=NONFINITE,
    )  # fmt: skip
    flagged = np.flatnonzero(out_mask[:, 5] & 1)
    if frac == 0.0:
        assert flagged.tolist() == [10]
    else:
        # Taps floor(p)-1 .. floor(p)+2 reach input row 10 from outputs 8..11.
        assert flagged.tolist() == [8, 9, 10, 11]
        assert out_mask[9, 5] == 3
    assert not (out_mask[:, [4, 6]] & 3).any()


def test_outside_and_nonfinite_flags():
    # Definition: taps beyond the input carry the outside bit; NaN inputs are
    # flagged, read as zero and do not spread beyond their taps.
    image = np.ones((10, 30))
    image[:, 15] = np.nan
    positions = np.arange(-3, 33, dtype=float)
    out, _var, mask = resample_columns(
        image, np.ones_like(image), np.zeros((10, 30), np.uint16), positions,
        outside_bit=OUT, nonfinite_bit=NONFINITE,
    )  # fmt: skip
    outside = (mask[0] & OUT) != 0
    # positions -3..-1 and 30..32 have a tap outside [0, 30), and so does
    # nothing else (integer positions use one tap only).
    assert np.flatnonzero(outside).tolist() == [0, 1, 2, 33, 34, 35]
    bad = (mask[0] & NONFINITE) != 0
    assert np.flatnonzero(bad).tolist() == [18]
    assert np.isfinite(out).all()
    good = ~outside & ~bad
    np.testing.assert_allclose(out[:, good], 1.0, rtol=1e-12)  # constant is reproduced


@pytest.mark.parametrize("dtype", [np.float32, np.float64, ">f4"])
def test_nonfinite_variance_flags_too_and_the_planes_given_are_left_alone(dtype):
    # Definition: a pixel is data only where its value and its variance are
    # finite; the passes read the others as zero without changing the caller's
    # planes (native ones are cleaned in copies).
    image = np.ones((6, 20), dtype)
    variance = np.ones_like(image)
    variance[:, 7] = np.inf
    image[:, 12] = np.nan
    mask = np.zeros(image.shape, np.uint16)
    given = image.copy(), variance.copy()
    out, var, flags = resample_columns(
        image, variance, mask, np.arange(20.0), outside_bit=OUT, nonfinite_bit=NONFINITE
    )
    assert (np.flatnonzero(flags[0] & NONFINITE) == [7, 12]).all()
    assert np.isfinite(out).all() and np.isfinite(var).all()
    assert (out[:, [7, 12]] == 0).all() and (var[:, [7, 12]] == 0).all()
    np.testing.assert_array_equal(image, given[0])
    np.testing.assert_array_equal(variance, given[1])
    assert not mask.any()


def test_bad_input_raises():
    with pytest.raises(ValueError, match="one shape"):
        resample_columns(
            np.zeros((3, 4)), np.zeros((3, 5)), np.zeros((3, 4), np.uint16), np.arange(4.0),
            outside_bit=OUT, nonfinite_bit=NONFINITE,
        )  # fmt: skip
    with pytest.raises(TypeError, match="unsigned"):
        shift_rows(
            np.zeros((3, 4)), np.zeros((3, 4)), np.zeros((3, 4)), np.zeros(4), 3,
            outside_bit=OUT, nonfinite_bit=NONFINITE,
        )  # fmt: skip
    with pytest.raises(ValueError, match="offsets must have shape"):
        shift_rows(
            np.zeros((3, 4)), np.zeros((3, 4)), np.zeros((3, 4), np.uint16), np.zeros(3), 3,
            outside_bit=OUT, nonfinite_bit=NONFINITE,
        )  # fmt: skip


def test_blocks_equal_separate_calls():
    # Self-consistency: blocks of rows with their own positions give exactly
    # what separate calls on those rows give (the pass is row-local).
    rng = np.random.default_rng(2)
    image = rng.normal(size=(50, 30))
    planes = (image, np.ones_like(image), np.zeros(image.shape, np.uint16))
    pos = np.stack([np.arange(30) + 0.3, np.arange(30) * 1.01 - 0.6])
    out, var, _ = resample_columns(
        *planes, pos, breaks=[0, 20, 50], outside_bit=OUT, nonfinite_bit=NONFINITE
    )
    for rows, p in ((slice(0, 20), pos[0]), (slice(20, 50), pos[1])):
        ref, ref_var, _ = resample_columns(
            *(a[rows] for a in planes), p, outside_bit=OUT, nonfinite_bit=NONFINITE
        )
        np.testing.assert_array_equal(out[rows], ref)
        np.testing.assert_array_equal(var[rows], ref_var)
    offsets = np.stack([np.full(30, 2.25), np.full(30, 1.5)])
    out2, _, _ = shift_rows(
        *planes, offsets, 40, breaks=[0, 10, 40], outside_bit=OUT, nonfinite_bit=NONFINITE
    )
    ref_a, _, _ = shift_rows(*planes, offsets[0], 10, outside_bit=OUT, nonfinite_bit=NONFINITE)
    ref_b, _, _ = shift_rows(*planes, offsets[1] + 10, 30, outside_bit=OUT, nonfinite_bit=NONFINITE)
    np.testing.assert_array_equal(out2[:10], ref_a)
    np.testing.assert_array_equal(out2[10:], ref_b)
    with pytest.raises(ValueError, match="breaks must rise"):
        shift_rows(*planes, offsets, 40, breaks=[0, 40], outside_bit=OUT, nonfinite_bit=NONFINITE)
