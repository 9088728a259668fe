"""Tests of the compiled pixel-integrated Gaussians of the detect model."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import norm

from pipeline.stages.detect import SeeingProfile, _model, fit_stars, model_image
from pipeline.stages.detect._pixel_gauss import (
    boxed_profiles,
    boxed_profiles_direct,
    pixel_profiles,
    pixel_profiles_direct,
)
from tests._detect_scene import smear_track

# Sigmas of the stage's Moffat mixture at FWHM 2.5 to 6 px and a narrow one.
SIGMAS = [np.array([0.5]), np.array([0.85, 1.27, 2.36, 4.08]), np.array([7.5])]


@pytest.mark.parametrize("sigmas", SIGMAS)
@pytest.mark.parametrize("first", [-30.0, 0.0, 117.0])
def test_compiled_profiles_match_scipy_erf(sigmas, first):
    grid = first + np.arange(61.0)
    # Centres inside, at the edge and off the stamp (tails beyond 8 sigma).
    centres = first + np.array([-40.0, -3.2, 0.0, 12.37, 30.5, 30.51, 59.9, 61.0, 95.0])
    value, deriv = pixel_profiles(grid, centres, sigmas)
    ref_value, ref_deriv = pixel_profiles_direct(grid, centres, sigmas)
    # Cubic Hermite in a table 1/64 sigma apart errs by < h^4 / 384 * max|f''''|
    # ~ 2e-10 (measured 8e-11 and 1.7e-10 / sigma); 1e-9 leaves rounding margin,
    # a linear interpolation (the derivative terms lost) errs by 1e-5.
    assert np.abs(value - ref_value).max() < 1e-9
    assert np.abs(deriv - ref_deriv).max() < 1e-9 / sigmas.min()


def test_compiled_profile_of_a_pixel_is_the_normal_integral():
    # A Gaussian of sigma 1.5 px centred at 20.3: pixel 20 holds
    # Phi(0.2 / 1.5) - Phi(-0.8 / 1.5) = 0.25613 (scipy.stats.norm, worked by hand).
    value, deriv = pixel_profiles(np.arange(40.0), np.array([20.3]), np.array([1.5]))
    assert value[0, 0, 20] == pytest.approx(norm.cdf(0.2 / 1.5) - norm.cdf(-0.8 / 1.5), abs=1e-9)
    # d/dc of the integral = -(pdf(hi) - pdf(lo)) / sigma (pdf in sigma units).
    slope = -(norm.pdf(0.2 / 1.5) - norm.pdf(-0.8 / 1.5)) / 1.5
    assert deriv[0, 0, 20] == pytest.approx(slope, abs=1e-9)
    assert value.sum() == pytest.approx(1.0, abs=1e-12)  # 13 sigma each side


@pytest.mark.parametrize("row", [4000.0, 2100.0])
def test_fit_with_compiled_profiles_matches_the_direct_fit(row, monkeypatch):
    # A smeared Moffat star (the benchmark's chip, FWHM 4 px) fitted on the same
    # noisy stamp with the compiled and with the scipy profiles.
    dx, dy = smear_track([row], 4096, 64, 16.0, 3.0)
    profile = SeeingProfile(4.0)
    shape = (41, 65)
    flux, sky = 2.0e4, 200.0
    truth = model_image(shape, 32.3, 20.6, dx[0], dy[0], profile, flux)
    rng = np.random.default_rng(3)
    data = truth + rng.normal(0.0, np.sqrt(truth + sky))
    variance = truth + sky

    def fit():
        return fit_stars(data, variance, [32.0], [21.0], [(dx[0], dy[0])], profile)

    compiled = fit()
    monkeypatch.setattr(_model, "pixel_profiles", pixel_profiles_direct)
    monkeypatch.setattr(_model, "_fit_one", lambda *args: None)  # the Python loop
    direct = fit()
    # What a fit sees must change by < 1e-4 of the flux and < 1e-3 px (a hundredth
    # of these errors: flux_err ~ 1 %, position ~ 0.05 px); profiles agreeing to
    # 1e-10 move them by ~1e-9.
    assert compiled.flux[0] == pytest.approx(direct.flux[0], rel=1e-6)
    assert abs(compiled.x[0] - direct.x[0]) < 1e-5
    assert abs(compiled.y[0] - direct.y[0]) < 1e-5
    assert compiled.flux_err[0] == pytest.approx(direct.flux_err[0], rel=1e-6)


@pytest.mark.parametrize(
    ("row", "start"), [(4000.0, (32.0, 21.0)), (2100.0, (31.2, 20.1)), (3000.0, (33.5, 21.9))]
)
def test_compiled_single_star_fit_takes_the_python_loops_steps(row, start, monkeypatch):
    # One star and a background: the compiled fit must give what the Python
    # loop (the reference) gives, step for step, on a long track (row 4000),
    # a short one (2100) and from a start 1.5 px off.
    dx, dy = smear_track([row], 4096, 64, 16.0, 3.0)
    kernel = _model.reduce_kernel(dx[0], dy[0], 0.5)
    profile = SeeingProfile(4.0)
    shape = (41, 65)
    truth = model_image(shape, 32.3, 20.6, *kernel, profile, 2.0e4) + 200.0
    rng = np.random.default_rng(5)
    data = truth + rng.normal(0.0, np.sqrt(truth))
    data[3, 7] = np.nan  # a pixel without data is left out by both
    origin = (100, 300)

    def fit():
        return fit_stars(
            data, truth, [start[0] + 300], [start[1] + 100], [kernel], profile, origin=origin
        )

    compiled = fit()
    monkeypatch.setattr(_model, "_fit_one", lambda *args: None)
    python = fit()
    # Same steps, same stopping point: only the order of the sums differs
    # (BLAS against loops), rounding of ~1e-13 relative that the steps carry
    # to ~1e-10 of the errors; 1e-8 of an error is far below anything a
    # catalogue shows and far above that rounding.
    for name in ("flux", "x", "y"):
        err = getattr(python, f"{name}_err")[0]
        assert abs(getattr(compiled, name)[0] - getattr(python, name)[0]) < 1e-8 * err
        assert getattr(compiled, f"{name}_err")[0] == pytest.approx(err, rel=1e-8)
    assert compiled.background == pytest.approx(python.background, rel=1e-8, abs=1e-8)
    assert compiled.chi2 == pytest.approx(python.chi2, rel=1e-10)
    assert compiled.success and python.success
    np.testing.assert_allclose(compiled.units[0], python.units[0], rtol=0, atol=1e-12)


def test_compiled_small_solve_matches_lapack_and_reports_a_singular_system():
    from pipeline.stages.detect._fit_jit import _solve

    rng = np.random.default_rng(8)
    a = rng.normal(size=(4, 4))
    b = rng.normal(size=4)
    x, ok = _solve(a, b)
    # numpy.linalg.solve (LAPACK gesv, partial pivoting too) is the reference;
    # 1e-12: rounding of a 4 x 4 elimination with a condition number ~10.
    assert ok
    np.testing.assert_allclose(x, np.linalg.solve(a, b), rtol=0, atol=1e-12)
    # A zero column cannot be solved: reported, so the fit falls back to Python.
    a[:, 2] = 0.0
    assert not _solve(a, b)[1]


#: Top-hat widths: one row of a rectified pixel (and 6e-3 off it, near the
#: largest offset whose edges are shared), other widths (edges not shared).
BOXES = [1.0, 1.00007, 1.006, 0.9, 2.004, 0.3]


@pytest.mark.parametrize("sigmas", SIGMAS)
@pytest.mark.parametrize("box", BOXES)
def test_boxed_profiles_match_the_formula_with_scipy(sigmas, box):
    grid = -30.0 + np.arange(61.0)
    centres = -30.0 + np.array([-40.0, -3.2, 0.0, 12.37, 30.5, 30.51, 59.9, 61.0, 95.0])
    value, deriv = boxed_profiles(grid, centres, sigmas, box)
    ref_value, ref_deriv = boxed_profiles_direct(grid, centres, sigmas, box)
    # The tables' error (2e-10 in erf, times |z| < 8 in z Phi(z)) over box / sigma
    # (the second difference divides by it) and Taylor's third order for
    # shared edges: measured up to 9e-9 (sigma 7.5, box 0.3); 2e-8 leaves
    # margin, and a lost second-order term errs by 7e-6 at box 1.006.
    assert np.abs(value - ref_value).max() < 2e-8
    assert np.abs(deriv - ref_deriv).max() < 2e-8 / sigmas.min()


@pytest.mark.parametrize("box", BOXES)
def test_boxed_profile_is_the_profile_averaged_over_the_top_hat(box):
    # The definition (common practice): a top-hat average is the mean of the
    # profile over centres spread evenly across the top-hat; 4000 of them
    # (the midpoint rule) err by (box / 4000)^2 / 24 of the second derivative,
    # < 1e-9 here (measured differences up to 5e-9 for the value, 1e-8 for
    # the derivative, with the tables' errors); the two Gaussians +-box /
    # sqrt(12) apart the model drew before differ by up to 4e-4.
    grid = 3.0 + np.arange(40.0)
    centres = np.array([2.0, 17.3, 22.81, 41.5])
    sigmas = np.array([0.64, 1.3, 3.1])
    value, deriv = boxed_profiles(grid, centres, sigmas, box)
    shifts = box * ((np.arange(4000) + 0.5) / 4000 - 0.5)
    mean_value, mean_deriv = np.zeros_like(value), np.zeros_like(deriv)
    for shift in shifts:
        v, d = pixel_profiles(grid, centres + shift, sigmas)
        mean_value += v / shifts.size
        mean_deriv += d / shifts.size
    assert np.abs(value - mean_value).max() < 2e-8
    assert np.abs(deriv - mean_deriv).max() < 4e-8


def test_a_narrow_top_hat_is_left_out():
    grid = np.arange(30.0)
    centres, sigmas = np.array([14.2]), np.array([0.64, 2.0])
    value, deriv = boxed_profiles(grid, centres, sigmas, 0.04)
    plain, plain_deriv = pixel_profiles(grid, centres, sigmas)
    np.testing.assert_array_equal(value, plain)
    np.testing.assert_array_equal(deriv, plain_deriv)
    # ... which changes the profile by < 2.6e-4 of its peak (box^2 / 12 of variance)
    exact = boxed_profiles_direct(grid, centres, sigmas, 0.04)[0]
    assert np.abs(value - exact).max() < 2.6e-4 * value.max()


def _erf_and_gauss(z, erf_table, gauss_table):
    """``erf(z / sqrt 2)`` and ``exp(-z^2 / 2)`` by Hermite interpolation, one value.

    The compiled ``_erf_and_gauss_many``'s arithmetic in its order, one
    value at a time (the reference it equals to the bit).
    """
    from pipeline.stages.detect._pixel_gauss import _ERF_SLOPE, _NODES_PER_SIGMA, _REACH

    u = (z + _REACH) * _NODES_PER_SIGMA
    if u <= 0.0:
        return -1.0, 0.0
    i = int(u)
    if i >= erf_table.size - 1:
        return 1.0, 0.0
    f = u - i
    f2 = f * f
    f3 = f2 * f
    h00 = 2.0 * f3 - 3.0 * f2 + 1.0
    h10 = f3 - 2.0 * f2 + f
    h01 = -2.0 * f3 + 3.0 * f2
    h11 = f3 - f2
    step = 1.0 / _NODES_PER_SIGMA
    g0 = gauss_table[i]
    g1 = gauss_table[i + 1]
    z0 = i * step - _REACH
    # d erf(z / sqrt 2) / dz = sqrt(2 / pi) exp(-z^2 / 2); d exp(-z^2 / 2) / dz = -z exp(..)
    c = h00 * erf_table[i] + h01 * erf_table[i + 1] + step * _ERF_SLOPE * (h10 * g0 + h11 * g1)
    g = h00 * g0 + h01 * g1 - step * (h10 * z0 * g0 + h11 * (z0 + step) * g1)
    return c, g


def _one_edge_at_a_time(first, n, centres, sigmas, box=0.0):
    """The profiles with each edge's table look-up in turn, in Python (the reference).

    ``box`` 0: :func:`pixel_profiles`' formula; otherwise
    :func:`boxed_profiles`' (shared edges near a whole number of pixels, with
    Taylor's formula to second order), each step in the compiled loop's order
    of operations, from the scalar look-up ``_erf_and_gauss``.
    """
    from pipeline.stages.detect._pixel_gauss import _SQRT2PI, profile_tables

    erf_table, gauss_table = profile_tables()

    look = _erf_and_gauss

    def sums(z):
        c, g = look(z, erf_table, gauss_table)
        cdf = 0.5 * (1.0 + c)
        pdf = g / _SQRT2PI
        return z * cdf + pdf, cdf, pdf

    value = np.empty((len(sigmas), len(centres), n))
    deriv = np.empty_like(value)
    q = int(np.floor(box + 0.5))
    eps = box - q
    shared = q >= 1 and abs(eps) <= 0.01
    for j, s in enumerate(sigmas.tolist()):
        inv = 1.0 / s
        for k, centre in enumerate(centres.tolist()):
            if box == 0.0:
                c_lo, g_lo = look((first - 0.5 - centre) * inv, erf_table, gauss_table)
                for e in range(n):
                    c_hi, g_hi = look((first + e + 0.5 - centre) * inv, erf_table, gauss_table)
                    value[j, k, e] = 0.5 * (c_hi - c_lo)
                    deriv[j, k, e] = -(g_hi - g_lo) * (1.0 / (_SQRT2PI * s))
                    c_lo, g_lo = c_hi, g_hi
                continue
            if shared:
                h = 0.5 * eps * inv
                zs = [(first - 0.5 + e - 0.5 * q - centre) * inv for e in range(n + 1 + q)]
                psi, cdf, pdf = zip(*[sums(z) for z in zs], strict=True)
                minus = [(psi[e] - h * cdf[e] + 0.5 * h * h * pdf[e],
                          cdf[e] - h * pdf[e] - 0.5 * h * h * zs[e] * pdf[e])
                         for e in range(n + 1)]  # fmt: skip
                plus = [(psi[e + q] + h * cdf[e + q] + 0.5 * h * h * pdf[e + q],
                         cdf[e + q] + h * pdf[e + q] - 0.5 * h * h * zs[e + q] * pdf[e + q])
                        for e in range(n + 1)]  # fmt: skip
            else:
                edges = [first - 0.5 + e - centre for e in range(n + 1)]
                minus = [sums((edge - 0.5 * box) * inv)[:2] for edge in edges]
                plus = [sums((edge + 0.5 * box) * inv)[:2] for edge in edges]
            for e in range(n):
                value[j, k, e] = (s / box) * (
                    plus[e + 1][0] - plus[e][0] - minus[e + 1][0] + minus[e][0]
                )
                deriv[j, k, e] = (
                    -(plus[e + 1][1] - plus[e][1] - minus[e + 1][1] + minus[e][1]) / box
                )
    return value, deriv


def test_table_look_ups_stay_inside_the_tables_and_equal_one_at_a_time():
    # Self-consistency: the compiled look-ups (run here as Python, where an
    # index past the tables raises IndexError, which the compiled code would
    # not) give each value the scalar reference's bits, at the tables' ends
    # and beyond them on both sides, and read no table entry past the last.
    from pipeline.stages.detect._pixel_gauss import _REACH, profile_tables

    erf_table, gauss_table = profile_tables()
    from pipeline.stages.detect._pixel_gauss_jit import _erf_and_gauss_many

    step = 1.0 / 64.0
    ends = [-_REACH, _REACH - step, _REACH]
    zs = np.array([-1e3, -50.0, -_REACH - 1e-9, -3.3, 0.0, 0.01, 2.5, 7.99, 1e3,
                   *[e + d for e in ends for d in (-1e-12, 0.0, 1e-12)]])  # fmt: skip
    c, g, scratch = np.empty(zs.size), np.empty(zs.size), np.full((7, zs.size), np.nan)
    _erf_and_gauss_many.py_func(zs, erf_table, gauss_table, c, g, scratch)
    reference = np.array([_erf_and_gauss(z, erf_table, gauss_table) for z in zs])
    np.testing.assert_array_equal(c, reference[:, 0])
    np.testing.assert_array_equal(g, reference[:, 1])
    assert np.all((scratch[6] >= 0) & (scratch[6] <= erf_table.size - 2))


@pytest.mark.parametrize("box", [0.0, *BOXES])
def test_profiles_are_each_edge_looked_up_in_turn_to_the_bit(box):
    # Self-consistency: the compiled loops look the tables up for every edge
    # of every centre first and interpolate afterwards, along all the rows
    # at once; each value is the same arithmetic as one edge at a time, so
    # the same to the last bit (the fits' results stay as they were).
    first, n = -30.4, 23
    centres = first + np.array([-40.0, -3.2, 0.0, 12.37, 22.5, 22.51, 30.9, 61.0])
    sigmas = np.array([0.58, 1.63, 2.82, 7.5])
    grid = first + np.arange(float(n))
    if box == 0.0:
        value, deriv = pixel_profiles(grid, centres, sigmas)
    else:
        value, deriv = boxed_profiles(grid, centres, sigmas, box)
    ref_value, ref_deriv = _one_edge_at_a_time(first, n, centres, sigmas, box)
    np.testing.assert_array_equal(value, ref_value)
    np.testing.assert_array_equal(deriv, ref_deriv)


#: Grid starts, lattice offsets (-1: none) and top-hats (0: none).  Where
#: there is a lattice, ``(first - 2) + lattice`` and ``first + (lattice -
#: 2)`` round apart (checked in the test): the rows must take the numpy
#: model's order (at (2, 0.123456789, 0) the other one moves 230 values
#: by a unit in the last place).
ROWS_CASES = [(1.0, 0.38988594, 1.00007), (2.0, 0.123456789, 0.0), (2.0, -1.0, 1.00007),
              (5.0, -1.0, 0.0), (2.0, 0.123456789, 0.9)]  # fmt: skip


@pytest.mark.parametrize(("first", "lattice", "box"), ROWS_CASES)
def test_compiled_rows_are_the_numpy_sampled_profiles_to_the_bit(first, lattice, box):
    # Self-consistency: the compiled model's rows (each Keys tap along all
    # the rows at once, then weighted or transposed) are
    # _model._sampled_profiles (numpy, the Python fits' model) times the
    # component weights over K, to the last bit.
    from pipeline.stages.detect._fit_jit import _rows
    from pipeline.stages.detect._pixel_gauss import profile_tables

    erf_table, gauss_table = profile_tables()

    if lattice >= 0.0:
        assert (first - 2.0) + lattice != first + (lattice - 2.0)
    n = 19
    dx, _ = smear_track([3900.0], 4096, 20, 16.0, 3.0)
    centres = first + 9.37 + dx[0]
    profile = SeeingProfile(2.7)
    sigmas, weights = profile.mixture()
    grid = first + np.arange(float(n))
    value, deriv = _model._sampled_profiles(
        grid, centres, sigmas, None if lattice < 0.0 else lattice, box
    )
    scale = (weights / centres.size)[:, None, None]
    tables = (erf_table, gauss_table)
    rows, rows_d = _rows(first, n, centres, sigmas, weights, lattice, box, *tables, False)
    np.testing.assert_array_equal(rows, (value * scale).reshape(-1, n))
    np.testing.assert_array_equal(rows_d, (deriv * scale).reshape(-1, n))
    columns, columns_d = _rows(first, n, centres, sigmas, weights, lattice, box, *tables, True)
    np.testing.assert_array_equal(columns, value.reshape(-1, n).T)
    np.testing.assert_array_equal(columns_d, deriv.reshape(-1, n).T)


@pytest.mark.parametrize("response", [(-1.0, -1.0, 0.0, 1.0, 1.0),
                                      (0.38988594, 0.123456789, 1.00007, 1.0, 1.0),
                                      (0.3, 0.7, 0.9, 1.0, 1.0),
                                      (0.3, 0.7, 0.9, 0.51, -0.49)])  # fmt: skip
def test_model_without_derivatives_is_the_fits_model_to_the_bit(response):
    # Self-consistency: model_compiled (the seeing curves' and the subtracted
    # models) leaves the derivatives out; its values are those the fits'
    # _unit computes with them, to the last bit.  A response row has five
    # values (lattice offsets, row step, the image's steps per rectified
    # pixel: _response_row); with three, the compiled code read the steps
    # past the array's end (no bounds check) and the test failed at random.
    from pipeline.stages.detect._fit_jit import _unit, model_compiled
    from pipeline.stages.detect._pixel_gauss import profile_tables

    erf_table, gauss_table = profile_tables()

    dx, dy = smear_track([3900.0], 4096, 24, 16.0, 3.0)
    sigmas, weights = SeeingProfile(2.7).mixture()
    args = (2.0, 23, 1.0, 17, dx[0], dy[0], sigmas, weights, np.array(response), erf_table,
            gauss_table)  # fmt: skip
    model, model_x, model_y = _unit(13.37, 9.81, *args)
    assert np.abs(model_x).max() > 0 and np.abs(model_y).max() > 0
    np.testing.assert_array_equal(model_compiled(13.37, 9.81, *args), model)
