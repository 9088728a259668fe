"""Tests of the detect stage: the smear-aware model, its fits and the catalogue."""

from __future__ import annotations

import inspect
import logging
import tracemalloc
import warnings

import numpy as np
import pytest
from astropy.wcs import WCS
from photutils.aperture import CircularAperture, aperture_photometry
from photutils.background import Background2D
from photutils.centroids import centroid_2dg
from photutils.segmentation import (
    SegmentationImage,
    SourceCatalog,
    deblend_sources,
    detect_sources,
)
from pydantic import ValidationError
from scipy.ndimage import binary_dilation, find_objects, gaussian_filter
from scipy.spatial import cKDTree
from scipy.stats import norm

from pipeline.exceptions import DetectWarning
from pipeline.masks import MaskBit
from pipeline.simulate._render import GaussianMixturePSF, render_tracks
from pipeline.stages.detect import (
    DetectOptions,
    SeeingProfile,
    SourceFlag,
    _deblended,
    _measure,
    _measure_jit,
    _model,
    _subtract_models,
    detect,
    fit_stars,
    model_image,
    seam_margin,
)
from pipeline.stages.detect._find import (
    _expand_mesh,
    deblend_segments,
    estimate_background,
    find_sources,
    measured_noise_correlation,
    measured_noise_correlation_rows,
    segment_map,
    segment_moments,
    segment_pixels,
)
from pipeline.stages.detect._measure import (
    KERNEL_SPACING,
    isolated_sources,
    measure_groups,
    psf_aperture_scale,
    residual_quadrupole,
    seeing_curves,
)
from pipeline.stages.detect._measure_jit import quadrupole_sums
from pipeline.stages.detect._model import KernelGrid, Response, reduce_kernel
from pipeline.stages.detect._night import Planes, padded_stretch
from pipeline.stages.detect._saturated import (
    Footprints,
    dilate_sparse,
    merge_on_footprints,
    saturated_footprints,
)
from pipeline.stages.rectify import smear_kernel_at
from tests._detect_scene import kernel_table, render_scene, smear_track

POINT = (np.zeros(1), np.zeros(1))


def test_gaussian_pixel_value_matches_the_analytic_integral():
    # A round Gaussian star, sigma 1.5 px, 1e4 e- at (x, y) = (20.3, 15.7).
    # Pixel (x=20, y=16) holds F * [Phi((20.5-20.3)/s) - Phi((19.5-20.3)/s)]
    #                          * [Phi((16.5-15.7)/s) - Phi((15.5-15.7)/s)]
    # = 1e4 * 0.25613 * 0.25613 = 656.04 e- (worked by hand; Phi from scipy.stats.norm).
    sigma, flux = 1.5, 1.0e4
    profile = SeeingProfile(sigma * 2.0 * np.sqrt(2.0 * np.log(2.0)), "gaussian")
    image = model_image((32, 40), 20.3, 15.7, *POINT, profile, flux)
    expected = (
        flux
        * (norm.cdf(0.2 / sigma) - norm.cdf(-0.8 / sigma))
        * (norm.cdf(0.8 / sigma) - norm.cdf(-0.2 / sigma))
    )
    assert expected == pytest.approx(656.04, abs=0.01)
    # 1e-9 relative: erf differences in double precision.
    assert image[16, 20] == pytest.approx(expected, rel=1e-9)
    # The whole image holds the flux (truncation beyond 10 sigma is < 1e-20).
    assert image.sum() == pytest.approx(flux, rel=1e-12)


def test_gaussian_star_flux_and_centroid_are_recovered():
    sigma, flux, x0, y0 = 1.5, 1.0e4, 20.3, 15.7
    profile = SeeingProfile(sigma * 2.0 * np.sqrt(2.0 * np.log(2.0)), "gaussian")
    image = model_image((32, 40), x0, y0, *POINT, profile, flux) + 50.0
    variance = image.copy()
    fit = fit_stars(image, variance, [19.8], [16.1], [POINT], profile)
    # Noise-free: the least-squares optimum is the truth to the optimizer's tolerance.
    assert fit.flux[0] == pytest.approx(flux, rel=1e-7)
    assert fit.x[0] == pytest.approx(x0, abs=1e-6)
    assert fit.y[0] == pytest.approx(y0, abs=1e-6)
    assert fit.background == pytest.approx(50.0, abs=1e-4)
    # Noisy repeats: the scatter matches the fit's own error, and the error is
    # the Cramer-Rao bound of a Gaussian PSF, sigma_x = sqrt(sum_i (dm_i/dx)^2 / var_i)^-1
    # (Mendez, Silva & Lobos 2013, PASP 125, 580, eq. 18 for one axis).
    rng = np.random.default_rng(1)
    xs = []
    for _ in range(200):
        noisy = image + rng.normal(0.0, np.sqrt(variance))
        fit = fit_stars(noisy, variance, [x0], [y0], [POINT], profile)
        xs.append(fit.x[0])
    h = 1e-5
    dm = (
        model_image((32, 40), x0 + h, y0, *POINT, profile, flux)
        - model_image((32, 40), x0 - h, y0, *POINT, profile, flux)
    ) / (2 * h)
    # The bound with flux, y and background known; with them free it grows by < 2 %
    # for a round star (the parameters are nearly orthogonal).
    crb = 1.0 / np.sqrt(np.sum(dm**2 / variance))
    assert fit.x_err[0] == pytest.approx(crb, rel=0.03)
    # 200 repeats: the standard deviation is known to 1/sqrt(2*200) = 5 %; 3 sigma.
    assert np.std(xs) == pytest.approx(crb, rel=0.15)
    assert abs(np.mean(xs) - x0) < 4 * crb / np.sqrt(200)


def test_fit_leaves_out_pixels_without_data_and_counts_the_rest():
    # Zero, negative or NaN variance and non-finite data all mean "no data"
    # (fit_stars' documented rule): the fit equals the one with those pixels
    # NaN in the data, and its reduced chi-square is the sum over the pixels
    # used, over their number less the 4 parameters (the definition).
    profile = SeeingProfile(3.0)
    image = model_image((24, 30), 14.2, 11.6, *POINT, profile, 2.0e4) + 40.0
    variance = image.copy()
    noisy = image + np.random.default_rng(2).normal(0.0, np.sqrt(variance))
    data, var = noisy.copy(), variance.copy()
    var[3, 4], var[5, 20], var[12, 15], data[8, 9], data[20, 2] = 0.0, -1.0, np.nan, np.nan, np.inf
    gone = ~(np.isfinite(data) & np.isfinite(var) & (var > 0))
    fit = fit_stars(data, var, [14.0], [11.9], [POINT], profile)
    reference = fit_stars(np.where(gone, np.nan, noisy), variance, [14.0], [11.9], [POINT], profile)
    for name in ("flux", "x", "y", "flux_err", "x_err", "y_err"):
        np.testing.assert_array_equal(getattr(fit, name), getattr(reference, name))
    model = fit.background + fit.flux[0] * fit.units[0]
    chi2 = np.sum(((noisy - model) ** 2 / variance)[~gone]) / (np.count_nonzero(~gone) - 4)
    assert fit.chi2 == pytest.approx(chi2, rel=1e-9)  # round-off of two sums of 700 terms


def _bowed_star(bow=2.5, length=10.0, flux=2.0e5, fwhm=3.0):
    """A noise-free star on a curved smear, rendered with 256 samples."""
    t = (np.arange(256) + 0.5) / 256 - 0.5
    q = 4.0 * t**2
    dx, dy = length * t, bow * (q - q.mean())
    image = np.zeros((61, 81))
    render_tracks(
        (30.6 + dy)[None],
        (40.3 + dx)[None],
        np.full((1, 256), flux / 256),
        image.shape,
        GaussianMixturePSF.moffat(fwhm, 3.5),
        out=image,
    )
    return image, dx, dy


def test_bowed_star_position_is_the_first_moment_not_the_apex():
    bow = 2.5
    image, dx, dy = _bowed_star(bow=bow)
    x0, y0 = 40.3, 30.6
    # The image's own first moment is the truth (check of the rendering).
    yy = np.mgrid[: image.shape[0], : image.shape[1]][0]
    assert (image * yy).sum() / image.sum() == pytest.approx(y0, abs=1e-3)
    # 64 equal-time samples with zero mean, as rectify records them.
    kernel = (dx.reshape(64, 4).mean(axis=1), dy.reshape(64, 4).mean(axis=1))
    profile = SeeingProfile(3.0, "moffat")
    variance = image + 10.0
    fit = fit_stars(image, variance, [x0 + 0.4], [y0 - 0.5], [kernel], profile)
    # 0.003 px: the model's 8-component Moffat differs from the renderer's 4-component
    # one by < 1e-3 of the peak, and its 64 samples from the renderer's 256.
    assert fit.x[0] == pytest.approx(x0, abs=0.003)
    assert fit.y[0] == pytest.approx(y0, abs=0.003)
    assert fit.flux[0] == pytest.approx(2.0e5, rel=2e-3)
    # A peak-weighted estimator (photutils' 2-D Gaussian fit) lands toward the
    # apex of the bow, the middle of the track, bow/3 = 0.83 px below the first
    # moment (the samples' mean of 4t^2 is 1/3): measured -0.19 px, 60 times the
    # model fit's tolerance above.
    gx, gy = centroid_2dg(image)
    assert -bow / 3.0 < gy - y0 < -0.15
    assert abs(gx - x0) < 0.05  # along the scan the track is symmetric


def _round_star_pulls(result, x, y, flux):
    """Position and flux pulls of the catalogue against the truth (all found within 0.5 px)."""
    cat = result.catalog
    d, j = cKDTree(np.column_stack([x, y])).query(np.column_stack([cat["x"].value, cat["y"].value]))
    assert len(cat) == len(x) and np.all(d < 0.5)
    pull_x = (cat["x"].value - x[j]) / cat["x_err"].value
    pull_f = (cat["flux_psf"].value - flux[j]) / cat["flux_psf_err"].value
    return pull_x, pull_f


def test_deconvolved_round_stars():
    rng = np.random.default_rng(5)
    n = 60
    x = rng.uniform(20, 490, n)
    y = rng.uniform(20, 236, n)
    flux = rng.uniform(2e4, 1e5, n)
    # Drawn with 8 Gaussians, a Moffat profile of index 3.5 to 1e-3 of its
    # peak: detect fits the index, and the 6 of the renderer's default are
    # no Moffat profile of any index (fitted 3.39-3.43 on seeds 3-5, whose
    # wings beyond the stamps made the PSF fluxes ~0.3 % high, mean pulls
    # 0.7-1.25; with 8, 3.50-3.54 and -0.36 to 0.12).
    scene = render_scene(
        x, y, flux, shape=(256, 512), x_start=0, seed=3, round_stars=True, components=8
    )
    result = detect(
        scene.image,
        scene.variance,
        scene.mask,
        scene.kernels,
        deconvolved=True,
        fwhm_guess=3.0,
    )
    pull_x, pull_f = _round_star_pulls(result, x, y, flux)
    # Unit pulls: 60 stars give the standard deviation to 9 %; 3 sigma = 0.3.
    assert np.std(pull_x) == pytest.approx(1.0, abs=0.3)
    assert np.std(pull_f) == pytest.approx(1.0, abs=0.3)
    # Mean pull within 3 / sqrt(60) = 0.4 of zero: no bias.
    assert abs(np.mean(pull_x)) < 0.4 and abs(np.mean(pull_f)) < 0.4
    assert result.seeing["fwhm"][0] == pytest.approx(3.2, rel=0.02)


def test_deconvolved_noise_anticorrelated_at_the_smear_length():
    """A deconvolved product's NOISECOR < 1 is no error, and errors follow the star's scale.

    Rectify's deconvolution sharpens the smear: its filter rings at lags of
    the smear's length and anti-correlates the noise there, so a large
    aperture sees less noise than the variance plane sums (``NOISECOR`` =
    1 / sum(h^2) < 1) while a star a few pixels wide sees about the variance
    plane's.  Here the noise is white noise filtered along the scan by
    ``h = (1 + 2a) delta(0) - a delta(+-L)`` with L = 20 px, far beyond the
    star: the fits' pulls must stay 1 (taking NOISECOR at its word would
    shrink the errors by sqrt(sum(h^2)) = 1.66).
    """
    rng = np.random.default_rng(11)
    n = 60
    x = rng.uniform(30, 480, n)
    y = rng.uniform(20, 236, n)
    flux = rng.uniform(2e4, 1e5, n)
    scene = render_scene(x, y, flux, shape=(256, 512), x_start=0, round_stars=True)
    a, lag = 0.3, 20
    white = rng.standard_normal(scene.image.shape) * np.sqrt(scene.variance)
    noise = (1 + 2 * a) * white
    noise[:, lag:] -= a * white[:, :-lag]
    noise[:, :-lag] -= a * white[:, lag:]
    gain = (1 + 2 * a) ** 2 + 2 * a**2  # sum(h^2)
    result = detect(
        scene.image + noise,
        scene.variance * gain,
        scene.mask,
        scene.kernels,
        noise_correlation=1.0 / gain,
        deconvolved=True,
        fwhm_guess=3.0,
    )
    pull_x, pull_f = _round_star_pulls(result, x, y, flux)
    # Unit pulls: 60 stars give the standard deviation to 9 %; 3 sigma = 0.3
    # (NOISECOR's errors would give 1.66).
    assert np.std(pull_x) == pytest.approx(1.0, abs=0.3)
    assert np.std(pull_f) == pytest.approx(1.0, abs=0.3)


def test_deconvolved_noise_calibrated_per_band_of_rows():
    """A deconvolved product's noise, unlike across the scan, is measured band by band.

    Rectify's deconvolution undoes a smear that grows toward the chip's
    edges with one filter per band of rows, so the noise at a star's scale
    differs across the scan (over 100 times the variance plane's in the
    outermost rows of a wide chip at latitude 50).  Here the noise of the
    first 128 rows is twice the variance plane's rms, of the others the
    plane's: detect must find no source there that is not a star (one
    factor for the whole stretch put the threshold near 2.8 sigma there) and
    keep unit pulls on both sides (common practice: calibrate a detection
    image's noise on its own blank sky, where it is used).
    """
    rng = np.random.default_rng(21)
    n = 120
    x = rng.uniform(20, 490, n)
    y = rng.uniform(10, 502, n)
    flux = rng.uniform(2e4, 1e5, n)
    scene = render_scene(x, y, flux, shape=(512, 512), x_start=0, round_stars=True)
    loud = np.ones(scene.image.shape[0])
    loud[:128] = 2.0
    noise = rng.standard_normal(scene.image.shape) * np.sqrt(scene.variance) * loud[:, None]
    result = detect(
        scene.image + noise,
        scene.variance,
        scene.mask,
        scene.kernels,
        deconvolved=True,
        fwhm_guess=3.0,
    )
    cat = result.catalog
    d, j = cKDTree(np.column_stack([x, y])).query(np.column_stack([cat["x"].value, cat["y"].value]))
    # every star found once, nothing else (one factor for all rows: 15 spurious sources)
    assert np.all(d < 0.5) and len(cat) == n
    pull_f = (cat["flux_psf"].value - flux[j]) / cat["flux_psf_err"].value
    top = y[j] < 128
    # ~30 and ~90 stars: the standard deviation to 13 % and 7.5 %, 3 sigma 0.4 and 0.23
    # (here 0.92 and 0.86; one factor for all rows: 1.36 and 0.73)
    assert np.std(pull_f[top]) == pytest.approx(1.0, abs=0.4)
    assert np.std(pull_f[~top]) == pytest.approx(1.0, abs=0.23)


def test_noise_factor_per_band_of_rows():
    """Each band's blank-sky variance at its centre, interpolated between, the map's when short."""
    rng = np.random.default_rng(4)
    rms = np.where(np.arange(256) < 64, 3.0, 1.0)  # variance 9 in the first band, 1 after
    snr = (rng.standard_normal((256, 400)) * rms[:, None]).astype(np.float32)
    no_data = np.zeros(snr.shape, bool)
    factor = measured_noise_correlation_rows(snr, no_data, band=64)
    bands = [
        measured_noise_correlation(snr[a : a + 64], no_data[a : a + 64]) for a in range(0, 256, 64)
    ]
    # 25 600 values per band: the variance to ~1 % (3 sigma clipping trims ~3 % of it)
    assert bands[0] == pytest.approx(9.0, rel=0.05)
    assert bands[1:] == pytest.approx([1.0] * 3, rel=0.05)
    # at the bands' centres, linear between them, constant beyond the outer ones
    centres = [31.5, 95.5, 159.5, 223.5]
    np.testing.assert_allclose(factor, np.interp(np.arange(256), centres, bands), rtol=1e-12)
    # bands of fewer than 1000 values with data take the whole map's factor
    no_data[:, 10:] = True
    short = measured_noise_correlation_rows(snr, no_data, band=64)
    np.testing.assert_array_equal(short, measured_noise_correlation(snr, no_data))


def test_kernel_grid_matches_rectify_lookup():
    table = kernel_table(256, 100, 400, 12.0, 2.0)
    grid = KernelGrid(table)
    for x, y in [(100.0, 0.0), (320.5, 77.3), (499.0, 255.0), (250.0, 130.9)]:
        dx, dy = grid(x, y)
        rx, ry = smear_kernel_at(table, x, y)
        np.testing.assert_allclose(dx, rx, atol=1e-12)
        np.testing.assert_allclose(dy, ry, atol=1e-12)


def test_kernel_grid_responses_are_its_response_to_the_bit():
    # The vectorised lookup against the point-by-point one (numpy's interp):
    # the same floats, exactly, at recorded rows and columns, between them,
    # beyond both ends, and with lattice offsets that wrap past 1.
    table = kernel_table(256, 100, 400, 12.0, 2.0)
    rng = np.random.default_rng(3)
    table["lattice_x"] = 0.9 + 0.3 * rng.random(len(table))
    table["lattice_y"] = rng.random(len(table))
    table["row_step"] = 1.0 + 0.01 * rng.random(len(table))
    grid = KernelGrid(table)
    x = np.concatenate([[100.0, 299.5, 499.0, 50.0, 600.0], rng.uniform(90, 510, 200)])
    y = np.concatenate([[0.0, 32.0, 255.0, -5.0, 300.0], rng.uniform(-10, 270, 200)])
    assert grid.responses(x, y) == [grid.response(a, b) for a, b in zip(x, y, strict=True)]
    assert KernelGrid(kernel_table(64, 0, 64, 4.0, 1.0)).responses(x[:3], y[:3]) == [None] * 3


def test_kernels_looked_up_at_once_are_those_looked_up_one_by_one():
    # The batched lookup and reduction measure_groups uses against the
    # point-by-point ones (KernelGrid.__call__, then reduce_kernel): the same
    # floats, exactly, at recorded rows and columns, between them and beyond
    # both ends; the extents are the reduced samples' largest |dx|, |dy|.
    table = kernel_table(256, 100, 400, 12.0, 2.0)
    grid = KernelGrid(table)
    rng = np.random.default_rng(4)
    x = np.concatenate([[100.0, 299.5, 499.0, 50.0, 600.0], rng.uniform(90, 510, 200)])
    y = np.concatenate([[0.0, 32.0, 255.0, -5.0, 300.0], rng.uniform(-10, 270, 200)])
    spacing = KERNEL_SPACING * 3.2
    kernels, extents = _measure._reduced_kernels(grid, 0, x, y, spacing, point=False)
    for a, b, (kx, ky), (ex, ey) in zip(x, y, kernels, extents, strict=True):
        one_x, one_y = reduce_kernel(*grid(a, b), spacing)
        np.testing.assert_array_equal(kx, one_x)
        np.testing.assert_array_equal(ky, one_y)
        assert (ex, ey) == (np.max(np.abs(one_x)), np.max(np.abs(one_y)))
    many_x, many_y = grid.many(x, y)
    np.testing.assert_array_equal(many_x[7], grid(x[7], y[7])[0])
    assert grid.extents(x, y)[1][7] == np.max(np.abs(many_y[7]))


def test_reduced_kernel_keeps_the_mean_and_the_extent():
    dx, dy = smear_track([500.0], 512, 64, 12.0, 2.0)
    rx, ry = reduce_kernel(dx[0], dy[0], 0.5)
    # Neighbours within 0.5 px where the star moves fastest, with fewer samples
    # than group means of the 64 (they needed a divisor of 64: 32 here).
    steps = np.hypot(np.diff(rx), np.diff(ry))
    assert rx.size < 32 and steps.max() <= 0.5
    assert rx.mean() == pytest.approx(0.0, abs=1e-12)
    assert ry.mean() == pytest.approx(0.0, abs=1e-12)
    assert rx.max() == pytest.approx(dx.max(), abs=0.5)


@pytest.mark.parametrize("row", [4000.0, 3000.0, 2500.0, 2100.0])
def test_reduced_kernel_model_matches_the_full_kernel(row):
    # The benchmark's chip (4096 rows, smear 1 px at the centre line to 16 px at
    # the edges with a 3 px bow), FWHM 4 px, the stage's spacing (FWHM / 6).
    dx, dy = smear_track([row], 4096, 64, 16.0, 3.0)
    profile = SeeingProfile(4.0)
    spacing = KERNEL_SPACING * profile.fwhm
    full = model_image((41, 65), 32.3, 20.6, dx[0], dy[0], profile)
    reduced = model_image((41, 65), 32.3, 20.6, *reduce_kernel(dx[0], dy[0], spacing), profile)
    # 8e-4 of the peak: measured 1.4e-4 to 7.5e-4 (the rule before, FWHM / 8
    # without the end points moved out, erred by up to 9.5e-4; at FWHM / 6 by
    # 1.2e-3 to 1.7e-3).
    assert np.abs(reduced - full).max() < 8e-4 * full.max()
    # What a flux fit sees, the projection of the error on the model: measured
    # 1.1e-5 to 1.0e-4; 2e-4 keeps it a tenth of the 0.2 % flux trend the stage allows.
    assert abs(np.sum((reduced - full) * full) / np.sum(full * full)) < 2e-4
    assert reduced.sum() == pytest.approx(full.sum(), rel=1e-9)  # flux kept


def test_later_passes_reuse_fits_of_unchanged_groups(monkeypatch):
    # A refit that starts where a fit ended lands there again, so measure_groups
    # takes such groups from its memo; a group with a new member is refitted.
    scene = render_scene([100.0, 300.0, 306.0], [64.0, 64.0, 66.0], 5e4, shape=(128, 400), seed=5)
    memo: dict = {}

    def measure(groups):
        return measure_groups(
            scene.image - 200.0,
            scene.variance,
            scene.mask,
            groups,
            KernelGrid(scene.kernels),
            SeeingProfile(3.2),
            x_start=1000,
            memo=memo,
        )

    first = measure([[(100.4, 64.3)], [(300.3, 63.8), (305.6, 66.2)]])
    ended = list(zip(first["x"], first["y"], strict=True))
    calls = []
    real = _model.fit_stars  # _measure imports it from _model when it fits
    monkeypatch.setattr(_model, "fit_stars", lambda *a, **k: calls.append(1) or real(*a, **k))
    batch = _measure_jit.fit_groups_compiled  # ... and the joint fits from _measure_jit

    def fit_groups(*args):
        calls.extend([1] * len(args[3]))  # one per group (stamp box)
        return batch(*args)

    monkeypatch.setattr(_measure_jit, "fit_groups_compiled", fit_groups)
    again = measure([ended[:1], ended[1:]])
    assert not calls
    np.testing.assert_array_equal(again["flux"], first["flux"])
    measure([[ended[0], (110.0, 64.0)]])
    assert len(calls) == 1


@pytest.mark.parametrize("n", [1, 2, 300])
def test_groups_are_the_overlapping_stamps_components(n):
    # _groups against a brute-force reference: every pair of sources whose
    # stamps (half sizes 1.5 FWHM + 1 for point kernels) overlap on both axes
    # joined, the components by union-find; each group's members increasing
    # and the groups in the order of their first members, as the fits and
    # the catalogue's rows take them (self-consistency, invented positions).
    from pipeline.stages.detect import _groups

    rng = np.random.default_rng(n)
    cx, cy = rng.uniform(0, 400, n), rng.uniform(0, 60, n)
    fwhm = 3.0
    half = 1.5 * fwhm + 1.0
    parent = list(range(n))

    def root(i):
        while parent[i] != i:
            i = parent[i]
        return i

    for i in range(n):
        for j in range(i + 1, n):
            if abs(cx[i] - cx[j]) < 2 * half and abs(cy[i] - cy[j]) < 2 * half:
                parent[root(j)] = root(i)
    components: dict = {}
    for i in range(n):
        components.setdefault(root(i), []).append(i)
    expected = sorted(components.values(), key=lambda members: members[0])
    got = _groups(cx, cy, None, 0, fwhm, True)
    assert got == expected
    assert all(type(i) is int for members in got for i in members)
    if n == 300:  # crowded enough for groups of several sizes
        assert {len(g) for g in got} >= {1, 2, 3}


def test_joint_fits_in_one_call_equal_the_fits_one_by_one(monkeypatch):
    # measure_groups fits its joint groups in one compiled call
    # (fit_groups_compiled); _measure_group, the reference, fits them one by
    # one through fit_stars.  Same arithmetic in the same order: the same
    # catalogue to the bit, flags included.  The scene holds a lone star, a
    # pair, a pair 0.5 FWHM apart fitted as one (UNRESOLVED), a star with a
    # cosmic-ray hit in its core and one with a flagged pixel in its wings only,
    # a star cut by the image edge and a star beside pixels without data.
    x = [100.0, 300.0, 306.0, 500.0, 501.6, 700.0, 800.0, 3.0, 900.0]
    y = [64.0, 64.0, 66.0, 64.0, 64.0, 64.0, 64.0, 64.0, 64.0]
    flux = [5e4, 5e4, 2e4, 6e4, 5e4, 5e4, 5e4, 5e4, 5e4]
    scene = render_scene(x, y, flux, shape=(128, 1000), seed=7)
    image, mask = scene.image - 200.0, scene.mask.copy()
    mask[64, 700] |= np.uint16(MaskBit.COSMIC_RAY)
    mask[69, 800] |= np.uint16(MaskBit.COSMIC_RAY)
    image[60:70, 906] = np.nan
    mask[60:70, 906] |= np.uint16(MaskBit.NONFINITE)
    groups = [[(100.3, 64.2)], [(300.2, 63.9), (305.7, 66.1)], [(500.8, 64.1)],
              [(700.2, 63.8)], [(799.6, 64.3)], [(3.4, 64.2)], [(900.3, 64.1)]]  # fmt: skip

    def measure():
        return measure_groups(
            image,
            scene.variance,
            mask,
            groups,
            KernelGrid(scene.kernels),
            SeeingProfile(3.2),
            x_start=1000,
            own_columns=(10, 1000),
            blended=[[False], [True, True], [False], [False], [False], [False], [False]],
        )

    recorded = []
    compiled = _measure_jit.fit_groups_compiled

    def recording(*args):
        recorded.append((args, compiled(*args)))
        return recorded[-1][1]

    monkeypatch.setattr(_measure_jit, "fit_groups_compiled", recording)
    batch = measure()
    # The residual quadrupole's sums (which set UNRESOLVED) of each fitted star,
    # as _unresolved forms them from fit_stars' result on the stamp.
    (_, variance, _, boxes, members, xs, ys, dx, dy, samples, *_), (_, sums, _) = recorded[0]
    grid = KernelGrid(scene.kernels)
    for g, (y0, y1, x0, x1) in enumerate(boxes):
        a, b = members[g], members[g + 1]
        data, var = image[y0:y1, x0:x1], variance[y0:y1, x0:x1]
        kernels = [(dx[samples[s] : samples[s + 1]], dy[samples[s] : samples[s + 1]])
                   for s in range(a, b)]  # fmt: skip
        responses = grid.responses(1000 + xs[a:b], ys[a:b])
        fit = fit_stars(data, var, xs[a:b], ys[a:b], kernels, SeeingProfile(3.2),
                        origin=(y0, x0), responses=responses)  # fmt: skip
        model = _measure._fitted_model(fit)
        for s in range(a, b):
            x, y = fit.x[s - a] - x0, fit.y[s - a] - y0
            reference = quadrupole_sums(data, var, model, fit.units[s - a], x, y)
            np.testing.assert_array_equal(sums[s], reference)
    monkeypatch.setattr(_measure, "_measure_joint", lambda *args: {})
    one_by_one = measure()
    for name in ("x", "y", "x_err", "y_err", "flux", "flux_err", "background", "chi2"):
        np.testing.assert_array_equal(batch[name], one_by_one[name], err_msg=name)
    np.testing.assert_array_equal(batch["flags"], one_by_one["flags"])
    np.testing.assert_array_equal(batch["group"], one_by_one["group"])
    flags = [SourceFlag(int(f)) for f in batch["flags"]]
    assert flags[1] & flags[2] & SourceFlag.BLENDED
    assert flags[3] & SourceFlag.UNRESOLVED
    assert flags[4] & SourceFlag.COSMIC_RAY
    assert flags[5] & SourceFlag.NEAR_FLAGGED and not flags[5] & SourceFlag.COSMIC_RAY
    assert flags[6] & SourceFlag.EDGE and flags[6] & SourceFlag.OVERLAP  # rows: as the groups
    # no data 6 px off, in the wings alone: not EDGE (see the test below)
    assert flags[7] & SourceFlag.NEAR_FLAGGED and not flags[7] & (
        SourceFlag.EDGE | SourceFlag.OVERLAP
    )
    assert all(np.isfinite(batch["flux"]))


def test_a_joint_fit_with_a_singular_step_is_fitted_again_one_by_one(monkeypatch):
    # Two sources started on the same pixel have the same unit model: the
    # compiled fit meets a singular step (status -1) and the group is fitted
    # again through fit_stars (the Python loop, which reports it), as the fits
    # one by one do; the other groups of the call are kept from the batch.
    scene = render_scene([100.0, 300.0], [64.0, 64.0], 5e4, shape=(128, 400), seed=3)
    groups = [[(100.3, 64.2), (100.3, 64.2)], [(300.2, 63.9)]]
    statuses = []
    compiled = _measure_jit.fit_groups_compiled

    def recording(*args):
        out = compiled(*args)
        statuses.extend(out[2][:, 2].tolist())
        return out

    planes = (scene.image - 200.0, scene.variance, scene.mask)

    def measure():
        return measure_groups(*planes, groups, KernelGrid(scene.kernels), SeeingProfile(3.2))

    monkeypatch.setattr(_measure_jit, "fit_groups_compiled", recording)
    batch = measure()
    assert statuses == [-1.0, 1.0]
    monkeypatch.setattr(_measure, "_measure_joint", lambda *args: {})
    one_by_one = measure()
    for name in ("x", "y", "flux", "flux_err", "chi2", "flags"):
        np.testing.assert_array_equal(batch[name], one_by_one[name], err_msg=name)


def test_models_subtracted_in_one_call_equal_model_image_one_by_one():
    # _subtract_models renders and subtracts every source's model in one
    # compiled call; the reference is model_image per source on the pixels
    # within 3 FWHM plus the kernel's extent of its rounded position (Python's
    # round: ties to even), cut by the edges.  The same arithmetic: equal to
    # the bit.  Sources at a tie (x.5), on the edges, off the image and
    # without a flux (a failed fit) included.
    profile = SeeingProfile(3.2)
    scene = render_scene([100.0], [64.0], 5e4, shape=(128, 400), seed=1)
    grid = KernelGrid(scene.kernels)
    x = np.array([100.3, 200.5, 201.5, 1.2, 398.7, 150.0, 420.0])
    y = np.array([64.2, 30.5, 90.0, 64.0, 127.4, 20.0, 64.0])
    flux = np.array([5e4, 2e4, 3e4, 4e4, 1e4, np.nan, 1e4])
    kernels = [reduce_kernel(*grid(1000 + a, b), 0.5) for a, b in zip(x, y, strict=True)]
    responses = grid.responses(1000 + x, y)
    fits_ = {"x": x, "y": y, "flux": flux, "kernel": kernels, "response": responses}
    got = _subtract_models(scene.image, fits_, profile)
    expected = scene.image.copy()
    for xs, ys, f, (dx, dy), response in zip(x, y, flux, kernels, responses, strict=True):
        if not np.isfinite(f):
            continue
        hx = int(np.ceil(3.0 * profile.fwhm + np.max(np.abs(dx))))
        hy = int(np.ceil(3.0 * profile.fwhm + np.max(np.abs(dy))))
        x0, y0 = max(round(xs) - hx, 0), max(round(ys) - hy, 0)
        x1, y1 = min(round(xs) + hx + 1, 400), min(round(ys) + hy + 1, 128)
        if x1 > x0 and y1 > y0:
            shape = (y1 - y0, x1 - x0)
            model = model_image(shape, xs - x0, ys - y0, dx, dy, profile, f, response)
            expected[y0:y1, x0:x1] -= model
    np.testing.assert_array_equal(got, expected)
    assert not np.array_equal(got, scene.image)


def test_seeing_curves_equal_least_squares_per_trial_width():
    # seeing_curves solves background and flux at each trial width by the
    # normal equations, compiled; the reference is numpy's lstsq of the
    # weighted columns 1 and model_image's unit model, per trial.  Equal to
    # rounding: 1e-10 relative (measured ~1e-14; a curve off by a wrong
    # weight or pixel is off by > 1e-3).  A pixel without data is left out.
    profile = SeeingProfile(3.2)
    scene = render_scene([100.0], [64.0], 5e4, shape=(128, 200), seed=4)
    image = scene.image - 200.0
    image[62, 99] = np.nan
    grid = KernelGrid(scene.kernels)
    fwhm_grid = np.linspace(2.0, 5.0, 7)
    _, curves = seeing_curves(
        image, scene.variance, [(100.2, 63.9)], grid, profile, fwhm_grid, x_start=1000
    )
    spacing = KERNEL_SPACING * profile.fwhm
    kernel = reduce_kernel(*grid(1000 + 100.2, 63.9), spacing)
    response = grid.response(1000 + 100.2, 63.9)
    y0, y1, x0, x1, _ = _measure._stamp(image.shape, [100.2], [63.9], [kernel], 1.5 * 3.2)
    data, var = image[y0:y1, x0:x1], scene.variance[y0:y1, x0:x1]
    fit = fit_stars(data, var, [100.2], [63.9], [kernel], profile, origin=(y0, x0),
                    responses=[response])  # fmt: skip
    good = np.isfinite(data)
    sw = np.sqrt(1.0 / var[good])
    expected = []
    for fwhm in fwhm_grid:
        unit = model_image(data.shape, fit.x[0] - x0, fit.y[0] - y0, *kernel,
                           profile.with_fwhm(fwhm), response=response)  # fmt: skip
        design = np.column_stack([np.ones(sw.size), unit[good]]) * sw[:, None]
        coef = np.linalg.lstsq(design, data[good] * sw, rcond=None)[0]
        expected.append(np.sum((design @ coef - data[good] * sw) ** 2) / (sw.size - 2))
    np.testing.assert_allclose(curves[0], expected, rtol=1e-10)


def test_seeing_curves_of_many_stars_are_those_of_each_alone():
    # Self-consistency: seeing_curves looks up the kernels and responses of
    # all its candidates at once; each star's curve must be the one it gets
    # alone, to the bit (a star given a neighbour's kernel or response, or a
    # candidate dropped at the edge shifting the others', is off).  Stars on
    # rows far apart (kernels and responses differ), one cut by the edge.
    x = [100.0, 300.0, 500.0, 700.0]
    y = [20.0, 60.0, 2.0, 110.0]
    scene = render_scene(x, y, [5e4, 4e4, 5e4, 6e4], shape=(128, 800), seed=9)
    image = scene.image - 200.0
    table = scene.kernels.copy()  # with responses that differ from star to star
    rng = np.random.default_rng(9)
    table["lattice_x"] = rng.uniform(0.1, 0.9, len(table))
    table["lattice_y"] = rng.uniform(0.1, 0.9, len(table))
    table["row_step"] = 1.0 + 0.01 * rng.random(len(table))
    grid = KernelGrid(table)
    profile = SeeingProfile(3.2)
    fwhm_grid = np.linspace(2.0, 5.0, 5)
    stars = [(100.3, 20.2), (299.8, 59.9), (500.1, 2.1), (700.2, 110.3)]
    rows, curves = seeing_curves(
        image, scene.variance, stars, grid, profile, fwhm_grid, x_start=1000
    )
    alone = [seeing_curves(image, scene.variance, [s], grid, profile, fwhm_grid, x_start=1000)
             for s in stars]  # fmt: skip
    assert rows.tolist() == [20.2, 59.9, 110.3]  # the star at row 2 is cut by the edge
    np.testing.assert_array_equal(rows, np.concatenate([r for r, _ in alone]))
    np.testing.assert_array_equal(curves, np.concatenate([c for _, c in alone]))
    assert len({tuple(r) for r in curves}) == 3


def test_a_seeing_moved_by_hidden_companions_costs_one_refit(monkeypatch):
    # The brightest stars, which the first seeing fit picks as isolated, each
    # hide a faint companion 1.2 FWHM away that only the search of the image
    # minus the models finds: the first seeing comes out wide, and the one
    # fitted on the stars then known to be alone is the true one.  The fits
    # after the first pass (with the companions, then without the weak ones)
    # use that seeing: no group is fitted with the old one before being
    # fitted again with the new.
    fwhm = 3.2
    xs, ys, fs = [], [], []
    for i in range(10):
        xs += [40.0 + 45.0 * i, 40.0 + 45.0 * i + 1.2 * fwhm]
        ys += [60.0, 60.5]
        fs += [2.0e5, 2.5e4]
    xs += list(np.linspace(30, 480, 8))  # truly isolated stars, fainter
    ys += [180.0] * 8
    fs += [1.0e5] * 8
    scene = render_scene(xs, ys, fs, shape=(256, 512), x_start=0, seed=3, fwhm=fwhm)
    widths = []
    real = measure_groups
    monkeypatch.setattr(
        "pipeline.stages.detect.measure_groups",
        lambda *a, **k: widths.append(a[5].fwhm) or real(*a, **k),
    )
    result = detect(scene.image, scene.variance, scene.mask, scene.kernels)
    hit, _ = _match(scene, result.catalog, radius=1.0)
    assert hit.all()  # the companions were found
    # the seeing moved by more than the 0.3 % that makes the stage refit
    assert widths[0] > 1.003 * widths[-1]
    # 1 %: the seeing fit of 8 stars of S/N ~ 300 (measured 0.12 % off)
    assert widths[-1] == pytest.approx(fwhm, rel=0.01)
    assert len(widths) >= 2 and set(widths[1:]) == {widths[-1]}


# A 512 x 1024 stretch with 12 px smear and a 2 px bow at the edges: 120 stars
# each near S/N 5 and 10 and 160 from S/N 20 to 300, on a jittered 24 px grid
# (no blends: pairs have their own test).
@pytest.fixture(scope="module")
def field():
    rng = np.random.default_rng(11)
    gy, gx = np.mgrid[20:500:24, 20:1004:24]
    pick = rng.permutation(gx.size)[:400]
    x = gx.ravel()[pick] + rng.uniform(-3, 3, 400)
    y = gy.ravel()[pick] + rng.uniform(-3, 3, 400)
    target = np.concatenate(
        [np.full(120, 5.0), np.full(120, 10.0), 10 ** rng.uniform(np.log10(20), np.log10(300), 160)]
    )
    scene = render_scene(x, y, None, snr=target, seed=7)
    with np.errstate(all="ignore"):
        result = detect(scene.image, scene.variance, scene.mask, scene.kernels, x_start=1000)
    return scene, result


def _alone(scene, distance):
    """Stars with no other star within ``distance`` pixels (closer pairs are blends)."""
    d = cKDTree(np.column_stack([scene.x, scene.y])).query(
        np.column_stack([scene.x, scene.y]), k=2
    )[0][:, 1]
    return d >= distance


def _match(scene, cat, radius=1.5):
    truth = np.column_stack([scene.x + scene.x_start, scene.y])
    found = np.column_stack([cat["x"].value, cat["y"].value])
    d, j = cKDTree(found).query(truth)
    return d < radius, j


def test_completeness_and_spurious_detections(field):
    scene, result = field
    # 3 px: 3.5 times the position error along the smear of a S/N 5 star (0.85 px),
    # and far below the 24 px grid, so no detection can take another star's place.
    hit, _ = _match(scene, result.catalog, radius=3.0)
    # Stars closer than 1.5 FWHM to another are blends, not counted here (close
    # pairs have their own test).
    alone = _alone(scene, 1.5 * 3.2)
    for lo, hi, need in ((9.9, 10.1, 0.95), (4.9, 5.1, 0.50)):
        sel = alone & (scene.snr >= lo) & (scene.snr < hi)
        # ~100 stars per bin: the fraction is known to +-5 % (binomial).
        assert sel.sum() >= 80
        # Done-when figures of the stage (issue): >= 95 % at S/N 10, >= 50 % at S/N 5.
        assert hit[sel].mean() >= need, (lo, hit[sel].mean())
    assert hit[alone & (scene.snr >= 11)].all()
    d, _ = cKDTree(np.column_stack([scene.x + scene.x_start, scene.y])).query(
        np.column_stack([result.catalog["x"].value, result.catalog["y"].value])
    )
    spurious = np.mean(d > 3.0)
    # Done-when figure of the stage (issue): < 1 % of detections spurious.
    assert spurious < 0.01
    # Isolated stars of S/N 5 to 300 are not taken for unresolved pairs: < 1 %
    # (pure noise flags 3e-4 of them, UNRESOLVED_CHI2; 400 stars).
    _, j = _match(scene, result.catalog, radius=3.0)
    unresolved = result.catalog["flags"].value[j[alone & hit]] & SourceFlag.UNRESOLVED
    assert np.mean(unresolved > 0) < 0.01


def test_positions_fluxes_and_errors_on_smeared_field(field):
    scene, result = field
    cat = result.catalog
    hit, j = _match(scene, cat)
    good = hit & (scene.snr > 50) & _alone(scene, 1.5 * 3.2)
    k = j[good]
    ex = cat["x"].value[k] - (scene.x[good] + scene.x_start)
    ey = cat["y"].value[k] - scene.y[good]
    pull_x = ex / cat["x_err"].value[k]
    pull_y = ey / cat["y_err"].value[k]
    # Errors describe the scatter: ~100 stars give the rms to 7 %; 1.3 allows the
    # neighbours fitted in the same group and the noise correlation being 1 here.
    assert np.sqrt(np.mean(pull_x**2)) < 1.3
    assert np.sqrt(np.mean(pull_y**2)) < 1.3
    bright = hit & (scene.snr > 100) & _alone(scene, 1.5 * 3.2)
    ratio = cat["flux_psf"].value[j[bright]] / scene.flux[bright] - 1
    assert abs(np.mean(ratio)) < 0.003
    assert np.std(ratio) < 0.01
    # The seeing width the stage found (the renderer's Moffat FWHM is 3.2 px).
    assert result.seeing["fwhm"][0] == pytest.approx(3.2, rel=0.01)
    for name in ("x", "y", "ra", "flux_psf", "snr", "flux_aper2", "aper2_corr"):
        assert cat[name].unit is not None
    # the bit masks and group numbers are integers without a unit
    for name in ("flags", "group"):
        assert cat[name].dtype.kind == "i" and getattr(cat[name], "unit", None) is None


@pytest.mark.parametrize("background", [True, False])
def test_a_fit_ends_unconverged_at_its_evaluation_cap(background):
    # A star started 3.6 px from its place: position steps are capped at 1 px
    # (fit_stars' documented rule), so the fit needs at least 4 evaluations;
    # capped at 2 it ends unconverged, uncapped it reaches the truth.  With a
    # background the compiled loop fits, without it the Python loop.
    profile = SeeingProfile(3.0)
    image = model_image((32, 40), 20.3, 15.7, *POINT, profile, 1.0e4) + (
        50.0 if background else 0.0
    )
    variance = image + 10.0
    args = (image, variance, [16.7], [15.7], [POINT], profile)
    capped = fit_stars(*args, fit_background=background, max_evaluations=2)
    assert not capped.success
    fit = fit_stars(*args, fit_background=background)
    assert fit.success
    # Noise-free: the optimum is the truth to the optimizer's tolerance.
    assert fit.x[0] == pytest.approx(20.3, abs=1e-5)


@pytest.mark.parametrize(("seed", "background"), [(2, True), (1, False)])
def test_a_fit_pulled_by_a_sharp_spike_converges_in_few_steps(seed, background):
    # A few hot pixels (a cosmic-ray hit's shape, taken from a crowded stretch)
    # fitted as a star: the Gauss-Newton model of the chi-square is poor, and
    # full steps overshoot to and fro, each lowering the chi-square a little
    # (> 250 evaluations with a background, 221 without).  Raising the damping
    # after a step that gains less than a quarter of its prediction (the gain
    # ratio of trust-region methods, from memory: Madsen, Nielsen & Tingleff,
    # "Methods for non-linear least squares problems") ends them in 11 and 9.
    # With a background the compiled loop fits, without it the Python loop.
    t = np.linspace(-1.0, 1.0, 17)
    kernel = (t * 2.2, 0.9 * t**2 - np.mean(0.9 * t**2))
    profile = SeeingProfile(2.8)
    rng = np.random.default_rng(seed)
    image = rng.normal(0.0, 20.0, (14, 17))
    image[6, 8:10] += 20.0 * np.array([6.1, 3.5])
    image[7, 7:10] += 20.0 * np.array([3.0, 13.8, 6.8])
    variance = np.full(image.shape, 400.0)
    response = {"responses": [Response(0.669, 0.669, 1.00007)]}  # rectify's, at the hit
    # 30: three times what the fits take now
    fit = fit_stars(
        image, variance, [8.2], [7.0], [kernel], profile, fit_background=background,
        max_evaluations=30, **response,
    )  # fmt: skip
    assert fit.success
    # an optimum: a fit started where it ended stays there (to 0.1 of an error,
    # the convergence rule's tenth of a standard error in every parameter,
    # CONVERGED; measured 0.02)
    again = fit_stars(
        image, variance, fit.x, fit.y, [kernel], profile, fit_background=background, **response
    )
    assert abs(again.x[0] - fit.x[0]) < 0.1 * fit.x_err[0]
    assert abs(again.y[0] - fit.y[0]) < 0.1 * fit.y_err[0]
    assert abs(again.flux[0] - fit.flux[0]) < 0.1 * fit.flux_err[0]


def test_split_trials_are_capped_and_still_split_a_pair(monkeypatch):
    # Every two-source trial of split_pair stops at SPLIT_MAX_EVALUATIONS (a
    # trial on one star creeps along a degenerate valley for hundreds), and a
    # pair 1.5 FWHM apart along the smear is still split into its two stars.
    fwhm = 3.2
    scene = render_scene([100.0, 100.0 + 1.5 * fwhm], [40.0, 40.0], [6.0e4, 3.0e4],
                         shape=(80, 200), x_start=0, seed=3, fwhm=fwhm)  # fmt: skip
    caps = []
    fit_stars_ = _model.fit_stars

    def recording(*args, **kwargs):
        if len(args[2]) == 2:
            caps.append(kwargs.get("max_evaluations"))
        return fit_stars_(*args, **kwargs)

    monkeypatch.setattr(_model, "fit_stars", recording)
    centre = (100.0 + 0.5 * fwhm, 40.0)
    halves, _gain = _measure.split_pair(
        scene.image, scene.variance, [centre], 0, KernelGrid(scene.kernels), SeeingProfile(fwhm)
    )
    assert caps and all(c == _measure.SPLIT_MAX_EVALUATIONS for c in caps), caps
    # The brighter half first; 0.3 px: a few position errors at S/N > 100 in
    # a blend (the fainter half's error along the smear is ~0.05 px).
    np.testing.assert_allclose(halves, [(100.0, 40.0), (100.0 + 1.5 * fwhm, 40.0)], atol=0.3)


def test_fit_errors_are_the_inverse_normal_matrix_diagonal():
    # Reference: numpy's inverse of J^T J (the covariance of a least-squares
    # fit, up to the noise-correlation scale); a singular J^T J (two equal
    # columns) has no errors.
    from pipeline.stages.detect._fit_jit import errors_compiled

    rng = np.random.default_rng(12)
    jac = rng.normal(size=(300, 7)) * np.array([1.0, 30.0, 0.1, 5.0, 2.0, 0.5, 8.0])
    err, ok = errors_compiled(jac, 1.7)
    assert ok
    expected = np.sqrt(np.diag(np.linalg.inv(jac.T @ jac)) * 1.7)
    # 1e-10: two eliminations of a 7 x 7 system of condition ~1e4 differ by
    # ~1e-16 x 1e4 relative.
    np.testing.assert_allclose(err, expected, rtol=1e-10)
    jac[:, 3] = jac[:, 2]
    assert not errors_compiled(jac, 1.7)[1]


def test_close_pairs_are_both_found_and_measured():
    # Pairs 1.5 FWHM apart with a flux ratio of 5, along and across the smear.
    fwhm = 3.2
    xs, ys, fs = [], [], []
    for i, angle in enumerate(np.linspace(0, np.pi, 8, endpoint=False)):
        for row, yc in enumerate((64.0, 192.0)):
            xc = 40.0 + 60.0 * i
            sep = 1.5 * fwhm
            xs += [xc, xc + sep * np.cos(angle)]
            ys += [yc + 20 * row, yc + 20 * row + sep * np.sin(angle)]
            fs += [1.0e5, 2.0e4]
    # Isolated bright stars for the seeing fit, as a real field has.
    xs += list(np.linspace(30, 480, 8))
    ys += [128.0] * 8
    fs += [1.0e5] * 8
    scene = render_scene(xs, ys, fs, shape=(256, 512), x_start=0, seed=2, fwhm=fwhm)
    result = detect(scene.image, scene.variance, scene.mask, scene.kernels)
    cat = result.catalog
    hit, j = _match(scene, cat, radius=1.0)
    assert hit.all()
    ratio = cat["flux_psf"].value[j] / scene.flux - 1
    # Within 5 % (the faint members have S/N ~ 100, so 1 %, plus what the blend costs).
    assert np.all(np.abs(ratio) < 0.05), ratio


def test_the_psf_scale_measures_a_seeing_width_that_is_off():
    """A stretch's PSF fluxes inherit its seeing model's errors: a width 3 %
    too wide (here held at fwhm_guess; on simulated nights a fit on a dozen
    stars strayed by 2.5 %) made them 1.05 % too bright (measured).  The
    stretch's ratio of corrected 2-FWHM aperture sums (less an annulus's sky)
    to PSF fluxes, ``psf_scale``, which the zero point applies, brings them
    within 0.4 % of the truth; with the right width it is 1 within 1e-3.
    Self-consistency with the simulator's renderer."""
    rng = np.random.default_rng(5)
    gx, gy = np.meshgrid(np.linspace(40, 980, 16), np.linspace(40, 470, 6))
    x = gx.ravel() + rng.uniform(-3, 3, gx.size)
    y = gy.ravel() + rng.uniform(-3, 3, gx.size)
    scene = render_scene(x, y, 2e5, shape=(512, 1024), x_start=0, seed=3, fwhm=3.2, components=8)

    def measured(fwhm, aperture=2):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", DetectWarning)  # no seeing fit: asked for
            held = {"fwhm_guess": fwhm, "seeing_stars": 0, "fit_moffat_beta": False}
            planes = (scene.image, scene.variance, scene.mask, scene.kernels)
            cat = detect(*planes, psf_scale_aperture=aperture, **held).catalog
        hit, j = _match(scene, cat, radius=1.0)
        bias = float(np.median(cat["flux_psf"].value[j[hit]] / scene.flux[hit])) - 1.0
        return bias, cat["psf_scale"].value, cat["psf_scale_err"].value

    bias, scale, error = measured(3.2 * 1.03)
    assert 0.008 < bias < 0.013
    assert np.ptp(scale) == 0 and error[0] < 0.001  # one value for the stretch
    assert abs((1.0 + bias) * scale[0] - 1.0) < 0.004
    bias, scale, _ = measured(3.2)
    assert abs(scale[0] - 1.0) < 1e-3 and abs(bias) < 0.002
    assert np.isnan(measured(3.2, None)[1]).all()
    with pytest.raises(ValidationError, match="psf_scale_aperture 4 names no aperture"):
        DetectOptions(psf_scale_aperture=4)


def test_the_psf_scale_uses_isolated_unflagged_bright_stars_only():
    """Ratios of aperture to PSF flux of a stretch's stars: faint, flagged or
    crowded ones take no part, an outlier is clipped, and with fewer than five
    stars the fluxes stay as fitted (self-consistency)."""
    n = 12
    psf = np.full(n, 1.0e5)
    psf_err = np.full(n, 500.0)  # S/N 200
    aper = np.full(n, 1.02e5)
    aper_err = np.full(n, 800.0)
    corr = np.ones(n)
    flags = np.zeros(n, dtype=int)
    aper[0] = 1.5e5  # a neighbour in its aperture, missed by the isolation test: clipped
    scale, error, used = psf_aperture_scale(psf, psf_err, aper, aper_err, corr, flags)
    assert scale == pytest.approx(1.02) and used == n - 1 and 0 < error < 0.005
    flags[1:] = int(SourceFlag.BLENDED)
    assert psf_aperture_scale(psf, psf_err, aper, aper_err, corr, flags) == (1.0, 0.0, 0)
    flags[:] = 0
    crowded = np.arange(n) < 8
    assert psf_aperture_scale(psf, psf_err, aper, aper_err, corr, flags, ~crowded)[2] == 0
    faint = psf_aperture_scale(psf, psf_err * 10, aper, aper_err, corr, flags)  # S/N 20
    assert faint == (1.0, 0.0, 0)
    isolated = isolated_sources([0.0, 5.0, 40.0], [0.0, 0.0, 0.0], [6.0, 6.0, 6.0])
    assert isolated.tolist() == [False, False, True]


def test_crowded_field_seeing_from_stars_fitted_alone():
    # ~2,600 stars per megapixel (150,000 per square degree at 0.52"/px):
    # hardly any bright star has no other source within twice a fit stamp's
    # reach, the stage's first choice of seeing stars.  Before the crowded
    # field's fallback (the stars whose fit stamp no other source's overlaps)
    # it found at most 1 such star per stretch of a simulated night, fell back
    # to ``fwhm_guess`` and the stretches' magnitudes scattered by 0.07 mag.
    rng = np.random.default_rng(11)
    shape = (256, 1024)
    n = int(2600e-6 * shape[0] * shape[1])
    x = rng.uniform(8, shape[1] - 8, n)
    y = rng.uniform(8, shape[0] - 8, n)
    flux = 10 ** rng.uniform(3.0, 5.5, n)  # S/N ~ 5 to ~ 1000
    scene = render_scene(x, y, flux, shape=shape, x_start=0, seed=4, fwhm=3.2)
    with warnings.catch_warnings():
        warnings.simplefilter("error", DetectWarning)  # no fallback to fwhm_guess
        result = detect(scene.image, scene.variance, scene.mask, scene.kernels, fwhm_guess=2.6)
    # The renderer's Moffat FWHM is 3.2 px; 2 %: the wings of neighbours
    # just beyond a seeing star's stamp (and the 8- vs 4-component Moffat).
    assert result.seeing["n_stars"][0] >= 10
    assert result.seeing["fwhm"][0] == pytest.approx(3.2, rel=0.02)


def _pairs_along_the_scan(seed=2, kernel_scale=1.0):
    """Pairs 1.6-2 FWHM apart along the scan where the smear is 14 px long (3.5 FWHM).

    Each pair overlaps along its smear and looks like one longer streak;
    isolated bright stars along the chip's middle give the seeing fit.  With
    ``kernel_scale`` the detect stage is told smears of that many times the
    true length.
    """
    fwhm, shape = 4.0, (512, 1024)
    xs, ys, fs = [], [], []
    separations, ratios = np.linspace(1.6, 2.0, 10), np.tile([1.3, 2.5], 5)
    for i, (sep, ratio) in enumerate(zip(separations, ratios, strict=True)):
        for row in (30.0, 482.0):  # 0.88 of the half-width from the centre line
            xc = 60.0 + 95.0 * i
            xs += [xc, xc + sep * fwhm * (1 if i % 2 else -1)]
            ys += [row, row + 0.3 * (i % 3 - 1)]
            fs += [6.0e4, 6.0e4 / ratio]
    xs += list(np.linspace(40, 980, 12))
    ys += [256.0] * 12
    fs += [1.0e5] * 12
    scene = render_scene(
        xs, ys, fs, shape=shape, x_start=0, seed=seed, fwhm=fwhm, length_edge=16.0, bow_edge=3.0
    )
    kernels = scene.kernels.copy()
    kernels["dx"] *= kernel_scale
    return scene, kernels


def test_pairs_along_a_long_smear_are_split_and_both_measured():
    # A pair along the scan 1.6-2 FWHM apart on a 14 px smear is fitted first
    # as one elongated source (UNRESOLVED); fitted as two, both are found at
    # their places and measured.  Before the split, 4 of these 40 stars were
    # lost (their pair fitted as one source between them).
    scene, kernels = _pairs_along_the_scan()
    cat = detect(scene.image, scene.variance, scene.mask, kernels, fwhm_guess=4.0).catalog
    hit, j = _match(scene, cat, radius=1.0)
    assert hit.all(), np.flatnonzero(~hit)
    assert len(np.unique(j)) == len(j) == len(cat)  # one source per star, none more
    ratio = cat["flux_psf"].value[j] / scene.flux - 1
    # Within 5 % (the fainter halves have S/N ~ 100: 1 %, plus what the blend costs).
    assert np.all(np.abs(ratio) < 0.05), ratio
    assert not np.any(cat["flags"].value & SourceFlag.UNRESOLVED)


def test_pairs_are_not_made_when_the_model_is_off_for_every_star(caplog):
    # Kernels 40 % short elongate every bright star's residual: the model is
    # off, not the sky full of pairs, so nothing is split and the log says so.
    scene, kernels = _pairs_along_the_scan(kernel_scale=0.6)
    with caplog.at_level(logging.INFO, logger="pipeline.stages.detect"):
        cat = detect(scene.image, scene.variance, scene.mask, kernels, fwhm_guess=4.0).catalog
    assert "kept whole" in caplog.text
    unsplit = detect(
        scene.image, scene.variance, scene.mask, kernels, fwhm_guess=4.0, split_pairs=False
    ).catalog
    assert len(cat) == len(unsplit)


def test_unresolved_pairs_are_flagged_and_isolated_stars_are_not():
    # Pairs 0.5 to 1 FWHM apart (flux ratio 1 to 3, any angle to the smear)
    # beside isolated stars of the same total flux (S/N ~ 260), on a chip
    # whose smear grows from 1 px on the centre line to 12 px at the edges.
    # Many such pairs are split into two sources; those measured as one source
    # must carry UNRESOLVED, and no isolated star may.
    fwhm = 3.2
    rng = np.random.default_rng(0)
    xs, ys, fs, centres, is_pair = [], [], [], [], []
    for row in range(6):
        for col in range(24):
            xc, yc = 25 + 40 * col + rng.uniform(0, 1), 22 + 42 * row + rng.uniform(0, 1)
            centres.append((xc, yc))
            is_pair.append((row + col) % 2 == 0)
            if not is_pair[-1]:
                xs, ys, fs = [*xs, xc], [*ys, yc], [*fs, 1.0e5]
                continue
            sep, ratio, angle = (
                rng.uniform(0.5, 1.0) * fwhm,
                rng.uniform(1, 3),
                rng.uniform(0, np.pi),
            )
            f1, f2 = 1.0e5 * ratio / (1 + ratio), 1.0e5 / (1 + ratio)
            # members placed so that the pair's first moment is (xc, yc)
            for offset, f in ((sep * f2 / 1.0e5, f1), (-sep * f1 / 1.0e5, f2)):
                xs, ys, fs = (
                    [*xs, xc + offset * np.cos(angle)],
                    [*ys, yc + offset * np.sin(angle)],
                    [*fs, f],
                )
    scene = render_scene(xs, ys, fs, shape=(256, 1000), x_start=0, seed=0, fwhm=fwhm)
    # The flag itself, before any split (a field half made of close pairs is
    # what the split's guard takes for a model gone wrong; splits are tested
    # in test_pairs_along_a_long_smear_are_split_and_both_measured).
    cat = detect(scene.image, scene.variance, scene.mask, scene.kernels, split_pairs=False).catalog
    found = np.column_stack([cat["x"].value, cat["y"].value])
    centres, is_pair = np.array(centres), np.array(is_pair)
    # 6 px: the largest separation (3.2 px) plus the members' position errors,
    # far below the 40 px grid.
    near = cKDTree(found).query_ball_point(centres, 6.0)
    count = np.array([len(n) for n in near])
    flagged = np.array(
        [any(cat["flags"].value[k] & SourceFlag.UNRESOLVED for k in n) for n in near]
    )
    assert np.all(count[~is_pair] == 1)
    single = is_pair & (count == 1)
    assert single.sum() >= 15  # enough pairs measured as one to mean something (23 here)
    assert flagged[single].all()
    # Pure noise exceeds the chi-square threshold for 3e-4 of the stars
    # (UNRESOLVED_CHI2), so 0.02 of these 72 are expected.
    assert not flagged[~is_pair].any()


def test_no_stars_gives_an_empty_catalogue_and_a_warning():
    rng = np.random.default_rng(0)
    image = 100.0 + rng.normal(0.0, 10.0, (128, 256))
    variance = np.full(image.shape, 100.0)
    mask = np.zeros(image.shape, np.uint16)
    with pytest.warns(DetectWarning, match="no source"):
        result = detect(image, variance, mask, kernel_table(128, 0, 256, 4.0, 1.0))
    assert len(result.catalog) == 0
    assert "flux_psf" in result.catalog.colnames and not result.problems


def _twilight_ramp(shape=(256, 512), seed=3):
    """Star-free stretch whose sky falls along the scan as on the demo night.

    Sky 60000 e- per pixel falling by 5 e- per column: the demo night's
    recorded sky drops from 63400 to 42000 e- over its 4096 columns (its
    README); Poisson noise, variance plane equal to the sky.
    """
    rng = np.random.default_rng(seed)
    sky = 60000.0 - 5.0 * np.arange(shape[1])
    sky = np.broadcast_to(sky, shape)
    image = sky + rng.normal(0.0, np.sqrt(sky))
    return image, np.array(sky), np.zeros(shape, np.uint16)


def test_background_follows_a_sky_ramp_to_the_stretch_edges():
    image, sky, mask = _twilight_ramp()
    background = estimate_background(image, mask.astype(bool), 64)
    error = np.mean(background - sky, axis=0)  # per column, e-
    # 0.1 sigma per pixel (24 e-): the mean over 256 rows of a smooth estimate has
    # a noise of ~245 / sqrt(256 * 64) ~ 2 e-; a mesh background left flat over
    # the outer half box errs by 5 e- x 32 columns = 160 e- at the edges.
    assert np.max(np.abs(error)) < 0.1 * np.sqrt(sky.min())


def test_mesh_expansion_matches_photutils():
    # photutils Background2D's own expansion of its mesh (cubic spline zoom) is
    # the reference; a 300 x 520 image gives a mesh that overhangs both edges.
    # The sky varies about zero: scipy's zoom of a 5-row mesh keeps a constant
    # to 5e-7 only (its spline filter's boundary tolerance), which on a high
    # sky would be a difference of photutils', not of the expansion.
    rng = np.random.default_rng(2)
    yy, xx = np.mgrid[:300, :520]
    image = 40.0 * np.sin(xx / 90.0) * np.cos(yy / 70.0) + rng.normal(0, 20, (300, 520))
    bkg = Background2D(image, (64, 64), filter_size=(3, 3))
    ours = _expand_mesh(np.asarray(bkg.background_mesh), (64, 64), image.shape)
    # 1e-4 e-: single-precision products of ~40 e- values (relative rounding
    # ~1e-7 of their sums); the pixel noise is 20 e-.
    np.testing.assert_allclose(ours, bkg.background, rtol=0, atol=1e-4)


def test_mesh_expansion_of_images_of_other_shapes_in_turn():
    # The axes' zoom matrices are kept between calls (_zoom_weights): each
    # image must still get its own.  photutils Background2D's expansion is the
    # reference, as above; 300 and 290 rows give meshes of 5 rows of 64
    # (the same zoom of the same mesh rows, cropped to another height), 520
    # and 500 columns meshes of 9 and 8 columns.
    rng = np.random.default_rng(3)
    for shape in [(300, 520), (290, 500), (300, 500), (300, 520)]:
        yy, xx = np.mgrid[: shape[0], : shape[1]]
        image = 40.0 * np.sin(xx / 90.0) * np.cos(yy / 70.0) + rng.normal(0, 20, shape)
        bkg = Background2D(image, (64, 64), filter_size=(3, 3))
        ours = _expand_mesh(np.asarray(bkg.background_mesh), (64, 64), image.shape)
        assert ours.shape == shape
        np.testing.assert_allclose(ours, bkg.background, rtol=0, atol=1e-4)


def test_deblending_only_multi_peak_segments_changes_nothing():
    # Isolated stars and close pairs: deblending every segment (photutils'
    # default) and only those with more than one local maximum must agree.
    rng = np.random.default_rng(4)
    yy, xx = np.mgrid[:128, :256]
    snr = rng.normal(0, 1, (128, 256))
    stars = [(30, 30, 40), (80, 60, 25), (86.5, 60, 20), (160, 90, 30), (200, 40, 8)]
    stars += [(120, 20, 30), (127, 21, 15), (240, 110, 25), (246, 113, 25)]  # two more pairs
    for x0, y0, amp in stars:
        snr += amp * np.exp(-((xx - x0) ** 2 + (yy - y0) ** 2) / (2 * 2.0**2))
    no_data = np.zeros(snr.shape, bool)
    options = {"threshold": 4.3, "min_pixels": 3, "deblend_levels": 32, "deblend_contrast": 0.005}
    segm, parent = find_sources(snr, no_data, **options)
    everything = deblend_sources(
        snr,
        detect_sources(snr, 4.3, 3, mask=no_data),
        3,
        n_levels=32,
        contrast=0.005,
        progress_bar=False,
    )
    np.testing.assert_array_equal(segm.data, everything.data)
    # and the segments are deblended one by one as photutils does them together
    np.testing.assert_array_equal(segm.labels, everything.labels)
    assert segm.slices == everything.slices
    assert segm.deblended_label_to_parent == everything.deblended_label_to_parent
    assert len(set(parent.values())) < len(parent)  # the pair was split
    # Only the children count as deblended, also where a segment left whole
    # is renumbered to the label a split segment had (here label 1).
    children = set(segm.deblended_label_to_parent)
    assert 1 not in children and 1 in segm.deblended_label_to_parent.values()
    assert _deblended(segm.labels, parent) == [int(k) in children for k in segm.labels]


#: (min_pixels, threshold): single-pixel segments kept, small ones dropped.
SEGMENT_CASES = [(1, 2.5), (3, 2.0), (6, 2.0)]


@pytest.mark.parametrize(("min_pixels", "threshold"), SEGMENT_CASES)
def test_segment_map_is_photutils_detect_sources(min_pixels, threshold):
    # photutils' detect_sources is the reference: the same labels, in the same
    # order, the same bounding boxes and areas, exactly.  Smoothed noise (as in
    # a matched-filter map) at these thresholds makes many segments of 1 to 20
    # pixels (so some are dropped and the rest renumbered), and sources touch
    # the image edges and the masked columns.
    rng = np.random.default_rng(7)
    yy, xx = np.mgrid[:150, :260]
    snr = gaussian_filter(rng.normal(0, 1, (150, 260)), 1.0)
    snr /= snr.std()
    for x0, y0, amp in [(0, 40, 30), (120, 149, 25), (200, 70, 12), (57, 75, 40)]:
        snr += amp * np.exp(-((xx - x0) ** 2 + (yy - y0) ** 2) / (2 * 2.5**2))
    no_data = np.zeros(snr.shape, bool)
    no_data[:, 55:58] = True  # cuts the star at x = 57 in two
    ours = segment_map(snr, no_data, threshold=threshold, min_pixels=min_pixels)
    theirs = detect_sources(snr, threshold, min_pixels, mask=no_data)
    assert theirs.n_labels > 20  # many segments (and for min_pixels > 1, many dropped)
    np.testing.assert_array_equal(ours.data, theirs.data)
    assert ours.data.dtype == theirs.data.dtype
    np.testing.assert_array_equal(ours.labels, theirs.labels)
    assert ours.slices == theirs.slices
    np.testing.assert_array_equal(ours.areas, theirs.areas)
    np.testing.assert_array_equal(segment_pixels(ours), np.flatnonzero(theirs.data))
    assert segment_map(snr, no_data, threshold=1e3, min_pixels=1) is None


def _crowded_map(seed: int, pedestal: float = 0.0) -> np.ndarray:
    """A matched-filter-like map (float32, as the stage's): smoothed noise and 150
    blended stars of S/N 5 to 500, a faint companion beside some bright ones, and,
    if ``pedestal``, a block of noise on it (one segment with hundreds of peaks)."""
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[:160, :300]
    snr = gaussian_filter(rng.normal(0, 1, yy.shape), 1.0)
    snr /= snr.std()
    for x0, y0, amp, width in zip(
        rng.uniform(0, 300, 150),
        rng.uniform(0, 160, 150),
        np.exp(rng.uniform(np.log(5), np.log(500), 150)),
        rng.uniform(1.3, 2.5, 150),
        strict=True,
    ):
        snr += amp * np.exp(-((xx - x0) ** 2 + (yy - y0) ** 2) / (2 * width**2))
        if amp > 100:  # a companion of about 1 % of it, 4 to 6 px away
            x1, y1 = x0 + rng.uniform(4, 6), y0 + rng.uniform(-2, 2)
            snr += 0.01 * amp * np.exp(-((xx - x1) ** 2 + (yy - y1) ** 2) / (2 * width**2))
    if pedestal:  # the block alone (a ring of 0 around it), noise on the pedestal
        snr[96:156, 18:182] = 0.0
        snr[98:154, 20:180] = pedestal + gaussian_filter(rng.normal(0, 3, (56, 160)), 0.5)
    return snr.astype(np.float32)


#: (seed, pedestal, threshold, min_pixels, levels, contrast): the stage's options
#: on a crowded map; more pixels, fewer levels and a contrast that removes
#: children; a segment with more than 200 markers (photutils starts it again with
#: linear thresholds); thresholds below 0 (segments with a non-positive minimum:
#: linear thresholds from the start).
DEBLEND_CASES = [
    (11, 0.0, 4.3, 3, 32, 0.005),
    (12, 0.0, 3.0, 5, 16, 0.05),
    (13, 10.0, 4.3, 3, 32, 0.005),
    (14, 0.0, -0.5, 3, 8, 0.01),
]


@pytest.mark.parametrize(
    ("seed", "pedestal", "threshold", "min_pixels", "levels", "contrast"), DEBLEND_CASES
)
def test_deblend_segments_is_photutils_deblend_sources(
    seed, pedestal, threshold, min_pixels, levels, contrast, monkeypatch
):
    # photutils' deblend_sources of every segment is the reference: the same
    # label image, labels, boxes and parents, exactly (deblend_segments makes
    # the markers and floods all segments together on one plane).
    from pipeline.stages.detect import _find

    snr = _crowded_map(seed, pedestal)
    no_data = np.zeros(snr.shape, bool)
    no_data[:, 200:203] = True  # segments cut by no-data columns
    segm = segment_map(snr, no_data, threshold=threshold, min_pixels=min_pixels)
    handed_over = []  # segments left to photutils (more than 200 markers)

    def photutils_deblend(data, own, label, *args):
        handed_over.append(label)
        return _photutils_deblend(data, own, label, *args)

    _photutils_deblend = _find._photutils_deblend
    monkeypatch.setattr(_find, "_photutils_deblend", photutils_deblend)
    # narrow shelves: boxes above and below each other on the plane, too
    monkeypatch.setattr(_find, "SHELF_WIDTH", 64)
    options = {"levels": levels, "contrast": contrast}
    ours = deblend_segments(snr, segm, segm.labels, min_pixels, **options)
    with warnings.catch_warnings():
        # photutils notes the segments it deblends with linear thresholds
        warnings.filterwarnings("ignore", message="The deblending mode", category=UserWarning)
        theirs = deblend_sources(
            snr,
            detect_sources(snr, threshold, min_pixels, mask=no_data),
            min_pixels,
            n_levels=levels,
            contrast=contrast,
            progress_bar=False,
        )
    assert len(theirs.deblended_label_to_parent) > 20  # many segments split
    np.testing.assert_array_equal(ours.data, theirs.data)
    np.testing.assert_array_equal(ours.labels, theirs.labels)
    assert ours.slices == theirs.slices
    assert ours.deblended_label_to_parent == theirs.deblended_label_to_parent
    np.testing.assert_array_equal(segment_pixels(ours), np.flatnonzero(theirs.data))
    assert bool(handed_over) == (pedestal > 0)
    if contrast > 0.01:  # the contrast removed children
        loose = deblend_segments(snr, segm, segm.labels, min_pixels, levels=levels, contrast=0)
        assert loose.n_labels > ours.n_labels


def test_a_segment_split_only_at_the_top_threshold_is_split_as_photutils_splits_it():
    # Two equal peaks joined by a ridge that only the last (highest) of the
    # 32 exponential thresholds clears: photutils' deblend_sources (the
    # reference) splits the segment there, and so must deblend_segments (a
    # loop over the levels that skips the last one, or one level late, does
    # not).  Invented map: a plateau of 2 with a rim of 1.1 (the segment's
    # minimum), peaks of 100 and a ridge of 80; thresholds 1.1 (100 / 1.1)^(k / 33),
    # k = 1..32: the 31st is 76.1 (below the ridge), the 32nd 87.2 (above it).
    snr = np.zeros((20, 30))
    snr[5:15, 5:25] = 1.1
    snr[6:14, 6:24] = 2.0
    snr[9:11, 8:10] = snr[9:11, 18:20] = 100.0
    snr[9:11, 10:18] = 80.0
    no_data = np.zeros(snr.shape, bool)
    segm = segment_map(snr, no_data, threshold=1.0, min_pixels=3)
    ours = deblend_segments(snr, segm, segm.labels, 3, levels=32, contrast=0.005)
    theirs = deblend_sources(
        snr, detect_sources(snr, 1.0, 3), 3, n_levels=32, contrast=0.005, progress_bar=False
    )
    assert theirs.n_labels == 2  # the reference splits it
    np.testing.assert_array_equal(ours.data, theirs.data)
    assert ours.deblended_label_to_parent == theirs.deblended_label_to_parent


def test_segment_moments_are_photutils_source_catalog():
    # photutils' SourceCatalog is the reference for the centroids and shapes,
    # to rounding (sums in another order).  The segments include masked pixels
    # and NaN data (both counted as 0), negative pixels (0 too), one-pixel-wide
    # segments (the covariance widened by 1/12 px^2), a segment whose data are
    # all negative (NaN centroid and shape) and labels with gaps.
    rng = np.random.default_rng(8)
    snr = _crowded_map(21)
    data = 30.0 * snr.astype(float) + rng.normal(0, 20.0, snr.shape)
    segm = segment_map(snr, np.zeros(snr.shape, bool), threshold=4.3, min_pixels=3)
    labels = segm.labels
    segm.data[5, 10:40] = labels.max() + 1  # a one-pixel-wide row
    segm.data[20:35, 290] = labels.max() + 2  # a one-pixel-wide column
    segm.data[60:63, 150:153] = labels.max() + 3
    data[60:63, 150:153] = -5.0  # no positive pixel
    segm.data[segm.data == labels[3]] = 0  # a gap in the labels
    segm = SegmentationImage(segm.data)
    mask = np.zeros(snr.shape, bool)
    mask[:, 100:104] = True  # segments cut by masked columns
    data[40:45, :] = np.nan
    theirs = SourceCatalog(np.where(mask | ~np.isfinite(data), 0.0, data), segm, mask=mask)
    ours = segment_moments(data, segm, mask, snr)
    assert segm.n_labels > 50 and not np.array_equal(segm.labels, np.arange(1, segm.n_labels + 1))
    # 1e-9 px and 1e-9 deg: sums of ~1e5 e- products in another order (relative
    # rounding ~1e-15 each); the thin segments' widening is exact.
    for name, ref in (
        ("x", theirs.x_centroid),
        ("y", theirs.y_centroid),
        ("fwhm", theirs.fwhm.value),
        ("ellipticity", theirs.ellipticity.value),
        ("orientation", theirs.orientation.value),
    ):
        np.testing.assert_allclose(getattr(ours, name), ref, rtol=0, atol=1e-9, err_msg=name)
    assert np.isnan(ours.x[-1]) and np.isnan(ours.fwhm[-1])  # all negative: nothing
    thin = np.asarray(theirs.semiminor_axis.value)[-3:-1]  # widened: sqrt(1/12) px
    np.testing.assert_allclose(thin, np.sqrt(1 / 12), rtol=1e-12)
    peaks = [
        snr[box][segm.data[box] == k].max() for k, box in zip(segm.labels, segm.slices, strict=True)
    ]
    np.testing.assert_array_equal(ours.peak, peaks)


def test_sky_ramp_along_the_scan_gives_no_false_sources():
    image, sky, mask = _twilight_ramp()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DetectWarning)  # "no source" is the expected outcome
        result = detect(image, sky, mask, kernel_table(256, 0, 512, 4.0, 1.0))
    # Pure noise at 4.3 sigma gives ~18 peaks on 16.7 Mpix (the threshold's
    # calibration in DetectOptions), 0.14 expected on these 0.13 Mpix; with the
    # background left flat at the edges dozens of sources lined the first columns.
    assert len(result.catalog) <= 1, result.catalog["x", "y", "snr"]


def test_fully_flagged_stretch_is_a_problem():
    image = np.full((64, 64), np.nan)
    mask = np.full(image.shape, int(MaskBit.OUTSIDE), np.uint16)
    result = detect(image, image.copy(), mask, kernel_table(64, 0, 64, 4.0, 1.0))
    assert len(result.catalog) == 0
    assert result.problems and "no usable pixel" in result.problems[0]


def test_has_data_looks_at_every_band_of_rows(monkeypatch):
    # numpy's whole-plane test is the reference: a pixel holds data when it is
    # not flagged as none, finite and of positive variance.  One such pixel in
    # the last row of a stretch taller than a band (and others that fail one
    # condition each) must be found.
    import pipeline.stages.detect as stage
    from pipeline.stages.detect import _has_data

    monkeypatch.setattr(stage, "HAS_DATA_ROWS", 8)
    shape = (30, 5)
    image = np.full(shape, np.nan, np.float32)
    variance = np.ones(shape, np.float32)
    mask = np.zeros(shape, np.uint16)
    image[3, 1], mask[3, 1] = 1.0, int(MaskBit.OUTSIDE)  # flagged
    image[12, 2], variance[12, 2] = 1.0, 0.0  # no variance
    image[20, 3] = np.inf  # not finite

    def reference():
        bits = MaskBit.NONFINITE | MaskBit.GAP | MaskBit.BAD_COLUMN | MaskBit.OUTSIDE
        no_data = (mask & int(bits)) != 0
        return bool(np.any(~no_data & np.isfinite(image) & (variance > 0)))

    planes = Planes(image, variance, mask, 0, None)
    assert _has_data(planes) is reference() is False
    image[29, 4] = 2.0
    assert _has_data(planes) is reference() is True


def test_flags_mark_saturation_and_edges():
    scene = render_scene(
        [100.0, 5.0], [60.0, 60.0], [1e5, 1e5], shape=(128, 256), x_start=0, seed=1
    )
    scene.mask[58:62, 99:102] |= np.uint16(MaskBit.SATURATED)
    result = detect(scene.image, scene.variance, scene.mask, scene.kernels)
    cat = result.catalog
    cat.sort("x")
    flags = cat["flags"].value.astype(int)
    assert flags[1] & SourceFlag.SATURATED
    assert flags[0] & SourceFlag.EDGE
    assert not flags[1] & SourceFlag.EDGE


def test_pixels_without_data_make_edge_in_the_core_only():
    """A bad column through a star's core makes it EDGE (left out of astrometry
    and the zero point); through its wings only, NEAR_FLAGGED, and the fit is
    as good as without it.  Before, any pixel without data in the stamp made
    EDGE: on a simulated night with 0.2 % of raw pixels NaN (each a ~4x4 patch
    after rectify) 1054 of 1762 sources were EDGE and astrometry matched 166
    reference stars instead of 300; the stars freed since (402 of S/N > 20)
    were placed with 46-70 mas rms against truth, the clean stars 50-66."""
    rng = np.random.default_rng(8)
    n = 40
    x = np.linspace(30.0, 970.0, n)
    y = np.where(np.arange(n) % 2 == 0, 64.0 + 1.0, 64.0 + 6.0) + rng.uniform(-0.3, 0.3, n)
    # and isolated stars far from it for the seeing fit, as a real field has
    x = np.concatenate([x, np.linspace(40.0, 960.0, 8)])
    y = np.concatenate([y, np.tile([20.0, 108.0], 4)])
    # 8 Gaussians: a Moffat profile of index 3.5 (see test_deconvolved_round_stars;
    # with the default 6 the index was fitted 3.35, the wing stars' mean flux
    # pull 1.27)
    scene = render_scene(
        x, y, np.full(x.size, 5e4), shape=(128, 1000), x_start=0, seed=9, components=8
    )
    # a bad raw column: one row of the rectified image without data
    image, mask = scene.image.copy(), scene.mask.copy()
    image[64, :] = np.nan
    mask[64, :] |= np.uint16(MaskBit.NONFINITE)
    cat = detect(image, scene.variance, mask, scene.kernels, fwhm_guess=3.2).catalog
    # Each star's detection (one source per star: tests/test_detect_gaps.py).
    d, k = cKDTree(np.column_stack([cat["x"].value, cat["y"].value])).query(np.column_stack([x, y]))
    assert np.all(d < 0.5)
    flags = cat["flags"].value.astype(int)[k]
    core = np.abs(y - 64.0) < 2.0  # 1 px off: the no-data row crosses the core
    assert core.sum() == n // 2 and np.all(flags[core] & SourceFlag.EDGE)
    wing = np.abs(y - 70.0) < 1.0  # 6 px off: beyond the 5 % isophote (~4 px), in the stamp
    assert wing.sum() == n // 2 and np.all(flags[wing] & SourceFlag.NEAR_FLAGGED)
    assert not np.any(flags[wing] & SourceFlag.EDGE)
    # The wing stars' pulls against the truth: unbiased, unit scatter (20
    # stars: 3 standard errors of the mean 0.67, of the sd ~0.5).
    w = k[wing]
    pull_y = (cat["y"].value[w] - y[wing]) / cat["y_err"].value[w]
    pull_f = (cat["flux_psf"].value[w] - 5e4) / cat["flux_psf_err"].value[w]
    for pull in (pull_y, pull_f):
        assert abs(np.mean(pull)) < 0.67 and 0.5 < np.std(pull) < 1.5, pull


def _clipped_scene(flux, seed, full_well=2e4, bleed=0):
    """A bright star at (150, 100) clipped at ``full_well`` e- with a neighbour 14 px off.

    ``bleed``: columns of spilled charge (at the full well) on either side of
    the clipped core along the scan, on its three middle rows.
    """
    x, y = [150.0, 150.0, 400.0, 600.0], [100.0, 114.0, 60.0, 200.0]
    scene = render_scene(x, y, [flux, 3e4, 2e5, 1e5], shape=(256, 1024), x_start=0, seed=seed)
    clipped = scene.image > full_well
    scene.image[clipped] = full_well
    scene.mask[clipped] |= np.uint16(MaskBit.SATURATED)
    if bleed:
        cols = np.flatnonzero(clipped[100])
        trail = np.s_[99:102, cols.min() - bleed : cols.max() + bleed + 1]
        scene.image[trail] = full_well
        scene.mask[trail] |= np.uint16(MaskBit.BLEED)
    return scene, int(clipped.sum())


@pytest.mark.parametrize("seed", [1, 2])
def test_a_saturated_star_is_measured_on_its_wings(seed):
    """A star clipped at the full well: its flux and position from the unclipped wings.

    A fit that takes the clipped core at face value gets 35 % of the flux
    (measured); the wings alone give it to 0.4-0.6 % here (the model is the
    scene's own seeing and smear: the error is the wings' noise and the
    background fitted over the stamp).  Tolerance 2 % and 0.05 px: a few
    times those measured.
    """
    scene, n_clipped = _clipped_scene(4e6, seed)
    assert n_clipped > 20  # the scene does clip the core
    cat = detect(scene.image, scene.variance, scene.mask, scene.kernels).catalog
    x, y = np.asarray(cat["x"]), np.asarray(cat["y"])
    (on,) = np.flatnonzero(np.hypot(x - 150.0, y - 100.0) < 8.0)
    assert int(cat["flags"][on]) & SourceFlag.SATURATED
    assert abs(cat["flux_psf"][on].value / 4e6 - 1.0) < 0.02
    assert np.hypot(x[on] - 150.0, y[on] - 100.0) < 0.05


@pytest.mark.parametrize("bleed", [0, 12])
def test_a_saturated_star_is_one_source(bleed):
    """A star 2000x the full well is one source, and its neighbour is kept.

    Its clipped plateau (~120 pixels) split into four sources around the
    core, none at its centre (measured), before its footprint was merged;
    a bleed trail, which no model fits, left sources along it in the image
    minus the models.  The position tolerance, 0.05 px, is a few times the
    offset measured (0.01 px); the flux is left out: the background fitted
    over the stamp takes some of the wings (8 % low, measured).
    """
    scene, _ = _clipped_scene(4e7, 1, bleed=bleed)
    cat = detect(scene.image, scene.variance, scene.mask, scene.kernels).catalog
    x, y = np.asarray(cat["x"]), np.asarray(cat["y"])
    (on,) = np.flatnonzero((np.abs(y - 100.0) < 8.0) & (np.abs(x - 150.0) < 12.0 + bleed))
    assert np.hypot(x[on] - 150.0, y[on] - 100.0) < 0.05
    assert np.min(np.hypot(x - 150.0, y - 114.0)) < 0.5  # the neighbour, 14 px away


def test_clipped_pixels_left_out_of_the_fits_only():
    """The fits see a saturated star's clipped pixels as missing; nothing else does.

    detect punches the holes in its own variance plane (no copy) and puts the
    values back before the aperture sums, or, when the plane is the caller's,
    in a copy.  Self-consistency: every catalogue column the same on both
    paths (float64 read-only planes of the caller; the caller's scratch
    planes; float32 planes, converted), the scratch variance whole again
    afterwards (the aperture errors of the
    saturated star are finite: its apertures hold clipped pixels).
    """
    scene, _ = _clipped_scene(4e6, 1)
    image, variance = scene.image.astype(float), scene.variance.astype(float)
    for plane in (image, variance):  # the caller's planes may be read-only (a memory map)
        plane.setflags(write=False)

    def run(image_in, variance_in, overwrite):
        return detect(
            image_in, variance_in, scene.mask, scene.kernels, overwrite_input=overwrite
        ).catalog

    given = run(image, variance, False)  # the caller's planes: the fits get a copy
    scratch = variance.copy()
    for other in (run(image.copy(), scratch, True), run(scene.image, scene.variance, False)):
        for name in given.colnames:
            assert np.array_equal(other[name], given[name], equal_nan=True), name
    assert np.array_equal(scratch, variance)  # no pixel lacks data: no NaN filled in
    x, y = np.asarray(given["x"]), np.asarray(given["y"])
    (on,) = np.flatnonzero(np.hypot(x - 150.0, y - 100.0) < 8.0)
    assert np.isfinite(given["flux_aper3_err"][on])


@pytest.mark.parametrize("count", [3, 255, 256, 70_000])
def test_footprints_are_numbered_in_a_small_type_without_wrapping(count):
    """Each footprint's number comes back at its pixel, however many there are.

    The numbers are kept in the smallest unsigned type that holds the count
    (a plane of the stretch); 256 footprints do not fit uint8 and 70,000 not
    uint16.  Self-consistency with scipy.ndimage.label's raster order.
    """
    side = int(np.ceil(np.sqrt(count)))
    mask = np.zeros((4 * side, 4 * side), np.uint16)
    ys, xs = np.divmod(np.arange(count), side)
    mask[4 * ys + 1, 4 * xs + 1] = np.uint16(MaskBit.SATURATED)  # one pixel each, apart
    footprints = saturated_footprints(mask, 0.0)
    assert footprints.labels.dtype == np.min_scalar_type(count)
    assert np.array_equal(footprints.at(4 * xs + 1, 4 * ys + 1), np.arange(1, count + 1))


def test_merging_on_footprints_is_photutils_reassign_labels():
    # photutils' reassign_labels for the segments of each footprint in turn is
    # the reference: the same label image, labels, boxes, areas and deblending
    # parents, exactly.  Three footprints: one over a deblended pair and a
    # third star (the merged box grows across all three), one over two
    # isolated stars, one over a single star (nothing to merge).
    rng = np.random.default_rng(5)
    yy, xx = np.mgrid[:128, :256]
    snr = rng.normal(0, 1, (128, 256))
    stars = [(60, 40, 30), (66.5, 40, 25), (70, 60, 20), (150, 30, 20), (175, 90, 20)]
    stars += [(220, 100, 15), (30, 110, 12)]
    for x0, y0, amp in stars:
        snr += amp * np.exp(-((xx - x0) ** 2 + (yy - y0) ** 2) / (2 * 2.0**2))
    options = {"threshold": 4.3, "min_pixels": 3, "deblend_levels": 32, "deblend_contrast": 0.005}
    segm, _ = find_sources(snr, np.zeros(snr.shape, bool), **options)
    assert segm.deblended_label_to_parent  # the pair was split
    areas = np.zeros(snr.shape, np.int32)
    areas[25:75, 50:80] = 1
    areas[20:100, 140:185] = 2
    areas[90:110, 210:230] = 3
    footprints = Footprints(areas, find_objects(areas), np.zeros(snr.shape, bool))
    cat = SourceCatalog(snr, SegmentationImage(segm.data))
    x, y = np.asarray(cat.x_centroid), np.asarray(cat.y_centroid)
    expected = SegmentationImage(segm.data.copy())  # photutils' own, with the same parents
    expected._deblend_label_map = {key: kids.copy() for key, kids in segm.deblended.items()}
    assert expected.deblended_label_to_parent == segm.deblended_label_to_parent
    owner = footprints.at(x, y)
    for k in (1, 2, 3):
        same = np.asarray(segm.labels)[owner == k]
        if same.size > 1:
            expected.reassign_labels(same[1:], same[0])
    assert expected.n_labels == segm.n_labels - 3  # two merges in one footprint, one in another
    assert merge_on_footprints(segm, x, y, footprints)
    np.testing.assert_array_equal(segm.data, expected.data)
    np.testing.assert_array_equal(segm.labels, expected.labels)
    assert segm.slices == expected.slices
    np.testing.assert_array_equal(segm.areas, expected.areas)
    assert segm.deblended_label_to_parent == expected.deblended_label_to_parent
    np.testing.assert_array_equal(segment_pixels(segm), np.flatnonzero(expected.data))
    again = SourceCatalog(
        snr, SegmentationImage(segm.data)
    )  # one segment per footprint now: nothing to merge
    assert not merge_on_footprints(segm, again.x_centroid, again.y_centroid, footprints)


#: Image shapes for the tiled dilation: several tiles with a partial last
#: one, one exact tile, and a tile cut on both axes.
DILATION_SHAPES = [(300, 470), (64, 64), (65, 63)]


@pytest.mark.parametrize("shape", DILATION_SHAPES)
def test_sparse_dilation_is_scipy_binary_dilation(shape):
    # scipy's binary_dilation of the whole image is the reference, exactly:
    # pixels on the image edges and on both sides of tile borders (64), with
    # a disk of radius 3, an asymmetric-reach structure (5 x 9) and one not
    # symmetric about its centre (which way it is placed matters).
    rng = np.random.default_rng(8)
    pixels = rng.random(shape) < 0.003
    pixels[0, 0] = pixels[-1, -1] = pixels[0, -1] = True
    pixels[min(63, shape[0] - 1), min(64, shape[1] - 1)] = True
    yy, xx = np.mgrid[-3:4, -3:4]
    lopsided = np.zeros((5, 3), bool)
    lopsided[0, 0] = lopsided[2, 1] = lopsided[4, 1] = lopsided[3, 2] = True
    for structure in (xx**2 + yy**2 <= 9, np.ones((5, 9), bool), lopsided):
        expected = binary_dilation(pixels, structure=structure)
        np.testing.assert_array_equal(dilate_sparse(pixels, structure), expected)


def test_bad_input_is_rejected():
    with pytest.raises(ValueError, match="one shape"):
        detect(np.zeros((4, 4)), np.zeros((4, 5)), np.zeros((4, 4), np.uint16), None)
    with pytest.raises(ValueError, match="noise_correlation"):
        detect(
            np.zeros((4, 4)),
            np.ones((4, 4)),
            np.zeros((4, 4), np.uint16),
            None,
            noise_correlation=0.0,
        )
    with pytest.raises(ValueError, match="fwhm"):
        SeeingProfile(-1.0)


def test_seam_star_is_measured_whole_and_listed_once():
    # Three stretches of 200 columns tiling 600 night columns; a star sits on
    # each seam (first moment 0.3 px either side of it) and one in the middle.
    xs = np.array([199.7, 400.3, 300.0])
    ys = np.array([64.0, 64.0, 64.0])
    scene = render_scene(xs, ys, 5e4, shape=(128, 600), x_start=0, seed=4)
    parts = []
    for a in (0, 200, 400):
        cols = slice(a, a + 200)
        parts.append(
            Planes(
                scene.image[:, cols], scene.variance[:, cols], scene.mask[:, cols], a, scene.kernels
            )
        )
    found = []
    for i, own in enumerate(parts):
        left = parts[i - 1] if i > 0 else None
        right = parts[i + 1] if i < 2 else None
        padded, own_columns = padded_stretch(own, left, right, seam_margin(own.kernels, 3.0))
        cat = _detect_padded(padded, own_columns)
        assert np.all((cat["x"].value >= own.x_start - 0.5) & (cat["x"].value < own.x_stop - 0.5))
        found.append(cat)
    x = np.sort(np.concatenate([c["x"].value for c in found]))
    flux = np.concatenate([c["flux_psf"].value for c in found])
    assert x.size == 3  # each star once
    np.testing.assert_allclose(x, np.sort(xs), atol=0.05)  # 0.05: 10 sigma at S/N ~200
    # Whole: the seam stars' fluxes are those of the middle star (same flux) to 2 %.
    np.testing.assert_allclose(flux, 5e4, rtol=0.02)
    seam = [
        c for c in found if len(c) and (c["flags"].value.astype(int) & SourceFlag.OVERLAP).any()
    ]
    assert seam  # the seam stars say they used a neighbour's columns


def test_overwriting_the_input_planes_spares_two_planes_and_changes_nothing():
    # 40 stars on a 256 x 600 stretch whose first 20 columns have no data
    rng = np.random.default_rng(5)
    x, y = rng.uniform(40, 580, 40), rng.uniform(20, 236, 40)
    scene = render_scene(x, y, 2e4, shape=(256, 600), x_start=0, seed=6)
    image, variance = scene.image.astype(float), scene.variance.astype(float)
    image[:, :20] = np.nan
    mask = scene.mask.copy()
    mask[:, :20] |= mask.dtype.type(MaskBit.OUTSIDE)

    def run(overwrite):
        planes = image.copy(), variance.copy()
        tracemalloc.start()
        try:
            result = detect(*planes, mask, scene.kernels, overwrite_input=overwrite)
            peak = tracemalloc.get_traced_memory()[1]
        finally:
            tracemalloc.stop()
        return result, planes, peak

    run(False)  # first: the one-time allocations (imports, caches) out of the way
    kept, planes, peak_kept = run(False)
    assert np.array_equal(planes[0], image, equal_nan=True)  # the inputs are left alone
    assert np.array_equal(planes[1], variance, equal_nan=True)
    reused, planes, peak_reused = run(True)
    for name in kept.catalog.colnames:
        assert np.array_equal(reused.catalog[name], kept.catalog[name], equal_nan=True), name
    # detect makes its residual and filled variance in the input planes instead of
    # two new float64 planes; 1.5: half a plane of slack for what else the peak holds
    assert peak_kept - peak_reused > 1.5 * image.nbytes
    assert np.isnan(planes[0][:, :20]).all() and not np.array_equal(planes[0], image)


def _detect_padded(padded, own_columns):
    """The catalogue of a stretch padded with its neighbours' edge columns."""
    return detect(
        padded.image,
        padded.variance,
        padded.mask,
        padded.kernels,
        x_start=padded.x_start,
        own_columns=own_columns,
    ).catalog


def test_lone_stretch_without_neighbours_flags_its_edge_stars():
    scene = render_scene([3.0, 100.0], [64.0, 64.0], 5e4, shape=(128, 200), x_start=0, seed=4)
    own = Planes(scene.image, scene.variance, scene.mask, 0, scene.kernels)
    padded, own_columns = padded_stretch(own, None, None, 20)
    cat = _detect_padded(padded, own_columns)
    cat.sort("x")
    assert int(cat["flags"][0]) & SourceFlag.EDGE
    assert not int(cat["flags"][1]) & SourceFlag.EDGE


def test_stage_is_registered_with_strict_options():
    from pipeline.stages import GRAPH

    stage = next(s for s in GRAPH if s.name == "detect")
    assert stage.scope == "stretch" and stage.requires == ("rectify",)
    assert stage.neighbours == ("rectify",)
    assert set(DetectOptions.model_fields) <= set(inspect.signature(detect).parameters)
    with pytest.raises(ValidationError):
        DetectOptions(threshold=3.0)


# Noise-free field (expected images, no noise drawn) with stars at optimal S/N 200
# (seeing), 8 and 5.2, far apart: the matched filter's peak of each is its S/N
# up to the template's mismatch, so which stars pass the threshold is certain.
NOISE_FREE_X = [40.0, 100, 160, 220, 280, 340, 400, 460, 60, 200, 330, 470]
NOISE_FREE_Y = [64.0] * 8 + [190.0] * 4
NOISE_FREE_SNR = [200.0] * 4 + [5.2] * 4 + [8.0] * 4


@pytest.fixture(scope="module")
def noise_free_field():
    return render_scene(
        NOISE_FREE_X, NOISE_FREE_Y, None, snr=NOISE_FREE_SNR, shape=(256, 512), x_start=0
    )


@pytest.mark.parametrize("noise_correlation", [2.0, 4.0])
def test_noise_correlation_lowers_significance_and_widens_errors(
    noise_free_field, noise_correlation
):
    # rectify's NOISECOR is the factor by which the plane's variance underrates
    # the variance of a sum over a star (correlated resampled noise), so every
    # matched-filter significance is divided by sqrt(NOISECOR) and every error
    # multiplied by it (derived: var(sum w_i n_i) = NOISECOR * sum w_i^2 var_i).
    scene = noise_free_field
    catalogs = {}
    for c in (1.0, noise_correlation):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", DetectWarning)
            result = detect(
                scene.image, scene.variance, scene.mask, scene.kernels, noise_correlation=c
            )
        catalogs[c] = result.catalog
        catalogs[c].sort("x")
    plain, correlated = catalogs[1.0], catalogs[noise_correlation]
    assert len(plain) == len(scene.x)  # every star passes 4.3 sigma at NOISECOR 1
    # At NOISECOR c the stars whose S/N / sqrt(c) falls below 4.3 are gone:
    # S/N 5.2 -> 3.7 at c = 2; S/N 8 -> 5.7 at 2 but 4.0 at 4.
    kept = np.array(NOISE_FREE_SNR) / np.sqrt(noise_correlation) > 4.3
    np.testing.assert_allclose(
        np.sort(correlated["x"].value), np.sort(np.array(NOISE_FREE_X)[kept]), atol=0.05
    )  # 0.05 px: noise-free fits land on the first moment to a few 0.001 px
    same = np.isin(np.round(plain["x"].value), np.round(correlated["x"].value))
    ratio = np.sqrt(noise_correlation)
    # 1e-4: the same fits (weights equal up to a constant) stop within the
    # optimiser's tolerance of one optimum (measured 7e-6 apart); a missing
    # sqrt(NOISECOR) would be 41 % or 100 %.
    for name in ("x_err", "y_err", "flux_psf_err", "flux_aper2_err"):
        np.testing.assert_allclose(
            correlated[name].value, plain[name].value[same] * ratio, rtol=1e-4, err_msg=name
        )
    np.testing.assert_allclose(correlated["snr"].value, plain["snr"].value[same] / ratio, rtol=1e-4)
    np.testing.assert_allclose(
        correlated["flux_psf"].value, plain["flux_psf"].value[same], rtol=1e-4
    )


def test_a_source_on_a_cosmic_ray_hit_is_flagged():
    scene = render_scene(
        [100.0, 200.0, 300.0], [60.0, 60.0, 60.0], [1e5, 1e5, 1e5], shape=(128, 400), x_start=0,
        seed=1,
    )  # fmt: skip
    scene.mask[60, 100] |= np.uint16(MaskBit.COSMIC_RAY)  # in the first star's core
    scene.mask[10, 200] |= np.uint16(MaskBit.COSMIC_RAY)  # 50 rows from the second star
    cat = detect(scene.image, scene.variance, scene.mask, scene.kernels).catalog
    cat.sort("x")
    flags = cat["flags"].value.astype(int)
    assert len(cat) == 3
    assert flags[0] & SourceFlag.COSMIC_RAY and flags[0] & SourceFlag.NEAR_FLAGGED
    assert not flags[1] & SourceFlag.COSMIC_RAY and not flags[2] & SourceFlag.COSMIC_RAY


def _oblique_car_wcs():
    """A rectified product's celestial WCS: plate carree about an oblique pole (in
    the form rectify writes; numbers from the demo night), 0.516"/px on the sky at
    declination ~41.6 deg, where the plane's x degrees are cos(41.6) = 0.75 sky degrees."""
    header = {
        "CTYPE1": "RA---CAR", "CTYPE2": "DEC--CAR", "CUNIT1": "deg", "CUNIT2": "deg",
        "CRPIX1": 1025.0, "CRPIX2": -290160.47056790016,
        "CRVAL1": 305.9516164047855, "CRVAL2": -0.08665416872904666,
        "CDELT1": 0.000191744004517349, "CDELT2": 0.000143268335993048,
        "LONPOLE": -125.27935264517669, "LATPOLE": 89.84996586916132, "RADESYS": "ICRS",
    }  # fmt: skip
    return WCS(header)


def test_sky_errors_follow_the_pixel_errors_through_the_wcs():
    scene = render_scene(
        [60.0, 200.0, 340.0], [30.0, 64.0, 100.0], [2e4, 5e4, 1e5], shape=(128, 400), x_start=0,
        seed=2,
    )  # fmt: skip
    wcs = _oblique_car_wcs()
    cat = detect(scene.image, scene.variance, scene.mask, scene.kernels, wcs=wcs).catalog
    assert len(cat) == 3
    x, y = cat["x"].value, cat["y"].value

    def separation(dx, dy):  # arcsec on the sky per pixel (astropy's separation, Vincenty)
        a = wcs.pixel_to_world(x - dx, y - dy)
        b = wcs.pixel_to_world(x + dx, y + dy)
        return a.separation(b).arcsec

    along_x, along_y = separation(0.5, 0.0), separation(0.0, 0.5)
    # The pixels are square on the sky, 0.516" (CDELT2), while the plane's CDELT1
    # is 0.690": an error taken from CDELT1 would be 34 % too large along x.
    # 0.3 %: the scale along x follows cos(dec) over the rows (measured 0.5163 here).
    np.testing.assert_allclose(along_x, 0.000143268335993048 * 3600, rtol=3e-3)
    np.testing.assert_allclose(along_y, 0.000143268335993048 * 3600, rtol=1e-9)  # CDELT2
    # 1e-4: x runs along RA to 0.15 deg (LATPOLE), so the cross terms add < 1e-5.
    np.testing.assert_allclose(cat["ra_err"].value, cat["x_err"].value * along_x, rtol=1e-4)
    np.testing.assert_allclose(cat["dec_err"].value, cat["y_err"].value * along_y, rtol=1e-4)
    assert cat["ra_err"].unit == "arcsec" and cat["dec_err"].unit == "arcsec"


def test_aperture_sums_and_errors_match_photutils():
    # aperture_fluxes sums the variance plane instead of forming photutils'
    # error array; both must give photutils' aperture_photometry values
    # (exact overlap, error = sqrt(sum of error^2 x overlap)) with no-data
    # pixels (NaN, masked) inside some apertures.
    rng = np.random.default_rng(5)
    residual = rng.normal(0.0, 10.0, (60, 80))
    variance = rng.uniform(50.0, 150.0, residual.shape)
    no_data = np.zeros(residual.shape, bool)
    no_data[20:24, 30:33] = True
    residual[no_data] = np.nan
    variance[no_data] = np.nan
    # the last two apertures are cut by the image's edges
    x, y = np.array([31.2, 10.5, 60.0, 1.3, 78.6]), np.array([21.7, 40.1, 5.3, 58.8, 0.2])
    kernels = [POINT] * 5
    radii = [2.0, 4.5, 3.3]
    flux, err, _ = _measure.aperture_fluxes(
        residual, variance, no_data, x, y, kernels, SeeingProfile(3.0), radii, 1.7
    )
    data = np.where(no_data, 0.0, residual)
    error = np.sqrt(np.where(no_data, 0.0, variance) * 1.7)
    for j, r in enumerate(radii):
        ref = aperture_photometry(data, CircularAperture(np.column_stack([x, y]), r), error=error)
        # 1e-12 relative: the same sums in another order (double precision).
        np.testing.assert_allclose(flux[:, j], ref["aperture_sum"], rtol=1e-12)
        np.testing.assert_allclose(err[:, j], ref["aperture_sum_err"], rtol=1e-12)


def test_aperture_corrections_match_photutils():
    # Reference: photutils' exact circular aperture mask applied to the unit
    # model (CircularAperture.to_mask(method="exact").multiply), the model
    # total over it; one source per 16-row bin, smears of 1 to 12 px.
    profile = SeeingProfile(2.8)
    ys = np.array([3.0, 40.0, 300.0, 500.0])
    dx, dy = smear_track([500.0] * 4, 512, 64, 12.0, 2.0)
    kernels = [reduce_kernel(dx[0] * s, dy[0] * s, 0.4) for s in (0.1, 0.4, 0.8, 1.0)]
    radii = [2.8, 5.6, 8.4]
    corr = _measure.aperture_corrections(kernels, ys, profile, radii)
    for i, (kx, ky) in enumerate(kernels):
        hx = int(np.ceil(max(radii) + 4 * profile.fwhm + np.max(np.abs(kx))))
        hy = int(np.ceil(max(radii) + 4 * profile.fwhm + np.max(np.abs(ky))))
        unit = model_image((2 * hy + 1, 2 * hx + 1), hx, hy, kx, ky, profile)
        for j, r in enumerate(radii):
            inside = CircularAperture((hx, hy), r).to_mask(method="exact").multiply(unit)
            # 1e-12 relative: the same products summed over another box (double precision)
            assert corr[i, j] == pytest.approx(1.0 / inside.sum(), rel=1e-12)


def test_segment_without_light_starts_at_its_snr_peak():
    # A segment of the S/N map whose image pixels sum to <= 0 has no centroid
    # (photutils gives NaN), which crashed the grouping and the fit stamps on
    # large nights; it must start at its highest S/N pixel instead.
    from pipeline.stages.detect import _start_positions

    labels = np.zeros((20, 30), dtype=int)
    labels[2:7, 3:9] = 1  # a star: positive image, centroid defined
    labels[10:16, 15:25] = 2  # noise: the image sums to a negative value
    image = np.zeros(labels.shape)
    image[4, 5] = 100.0
    image[10:16, 15:25] = -1.0
    snr = np.zeros(labels.shape)
    snr[labels > 0] = 3.0
    snr[12, 21] = 9.0
    segm = SegmentationImage(labels)
    cat = segment_moments(image, segm, np.zeros(labels.shape, bool), snr)
    assert not np.isfinite(cat.x[1])
    x, y = _start_positions(cat, segm, snr)
    assert (x[0], y[0]) == (5.0, 4.0)
    assert (x[1], y[1]) == (21.0, 12.0)


def test_psf_flux_of_simulator_stars_matches_their_electrons():
    """Noise-free round stars rendered by the simulator's default PSF: PSF flux = truth.

    The simulator's default seeing (a Moffat of beta 3.5 as its default
    mixture, :class:`pipeline.simulate.PSFOptions`) rendered pixel-integrated
    (no clocking box, no resampling), through :func:`detect` with the seeing
    width fitted from the stars: the PSF flux is the rendered electrons to
    0.1 %, a fifth of the issue's 0.5 % (measured: -0.01 %).  The four- and
    six-component mixtures the simulator once rendered gave +1.4 % and
    +0.23 % here: the fitted width follows the core of these bright stars,
    and the model's wings then hold too much light.
    """
    from pipeline.simulate import PSFOptions

    options = PSFOptions()
    fwhm = options.fwhm / 0.516  # arcsec on the test cameras' 0.516 arcsec pixels
    psf = GaussianMixturePSF.moffat(fwhm, options.beta, options.n_components)
    rng = np.random.default_rng(7)
    y, x = np.mgrid[24:150:25, 24:150:25].reshape(2, -1) + rng.uniform(0, 1, (2, 36))
    flux = rng.uniform(1e5, 3e5, x.size)
    image = render_tracks(y[:, None], x[:, None], flux[:, None], (176, 176), psf, radius=20.0)
    sky = 200.0
    result = detect(
        image + sky,
        image + sky,
        np.zeros(image.shape, np.uint16),
        kernel_table(176, 0, 176, 0.0, 0.0),
        deconvolved=True,
        fwhm_guess=fwhm,
    )
    cat = result.catalog
    d, j = cKDTree(np.column_stack([x, y])).query(np.column_stack([cat["x"].value, cat["y"].value]))
    assert len(cat) == x.size and np.all(d < 0.1)
    ratio = cat["flux_psf"].value / flux[j] - 1.0
    assert abs(np.median(ratio)) < 1e-3, np.median(ratio)


def _keys_resampled(image, shift_y, shift_x):
    """``image`` sampled at ``(i + shift_y, j + shift_x)`` with rectify's Keys weights."""
    from pipeline.stages.rectify._resample import keys_weights

    out = image
    for axis, shift in ((0, shift_y), (1, shift_x)):
        w = keys_weights(np.array(float(shift))).ravel()
        moved = np.zeros_like(out)
        a, o = np.moveaxis(out, axis, 0), np.moveaxis(moved, axis, 0)
        n = a.shape[0]
        for k in range(4):  # output pixel i takes input pixels i - 1 ... i + 2
            s = k - 1
            o[max(0, -s) : min(n, n - s)] += w[k] * a[max(0, s) : min(n, n + s)]
        out = moved
    return out


def test_psf_flux_of_resampled_clocked_stars_matches_their_electrons():
    """Stars as rectify delivers them (clocking top-hat, Keys resampling): PSF flux = truth.

    The simulator's default Moffat with its one-row clocking top-hat along
    the scan, then sampled half a pixel across and 0.3 px along the scan
    with rectify's Keys weights (``pipeline.stages.rectify._resample``), as a
    rectified stretch is.  The smear-kernel record carries the lattice
    offsets and the row step (rectify's ``smear_kernels``): with them the
    model is the image's profile and the PSF flux is the electrons to 0.1 %
    (measured -0.05 %).  Without them the fitted seeing comes out 3.7 % wide
    and the fluxes 1.8 % high (measured).
    """
    from pipeline.simulate import PSFOptions

    options = PSFOptions()
    fwhm = options.fwhm / 0.516
    psf = GaussianMixturePSF.moffat(fwhm, options.beta, options.n_components)
    rng = np.random.default_rng(7)
    y, x = np.mgrid[24:150:25, 24:150:25].reshape(2, -1) + rng.uniform(0, 1, (2, 36))
    flux = rng.uniform(1e5, 3e5, x.size)
    # Rendered with the strip's axes (scan on axis 0), then turned to the
    # rectified ones (scan along x, axis 1).
    strip = render_tracks(x[:, None], y[:, None], flux[:, None], (176, 176), psf, row_box=1.0)
    shift_y, shift_x = 0.5, 0.3
    image = _keys_resampled(strip.T.copy(), shift_y, shift_x)
    kernels = kernel_table(176, 0, 176, 0.0, 0.0)
    kernels["dx"] = np.zeros_like(kernels["dx"])  # no smear: a short TDI chip's stars
    kernels["lattice_x"] = np.full(len(kernels), -shift_x)  # strip pixel n lands at n - shift
    kernels["lattice_y"] = np.full(len(kernels), -shift_y)
    kernels["row_step"] = np.ones(len(kernels))
    sky = 1e4
    result = detect(
        image + sky, image + sky, np.zeros(image.shape, np.uint16), kernels, fwhm_guess=fwhm
    )
    cat = result.catalog
    truth = np.column_stack([x - shift_x, y - shift_y])
    d, j = cKDTree(truth).query(np.column_stack([cat["x"].value, cat["y"].value]))
    assert len(cat) == x.size and np.all(d < 0.05)
    ratio = cat["flux_psf"].value / flux[j] - 1.0
    assert abs(np.median(ratio)) < 1e-3, np.median(ratio)
    # The seeing is the simulator's (0.2 %: the width search's grid interpolation).
    assert result.seeing["fwhm"][0] == pytest.approx(fwhm, rel=2e-3)


def test_residual_quadrupole_is_its_documented_sums():
    # Reference: the formulas of residual_quadrupole's docstring written out
    # with numpy (self-consistency: the compiled sums must be these sums).  A
    # stamp cut from a larger image (not contiguous) with no-data pixels.
    rng = np.random.default_rng(11)
    image = rng.normal(0, 10, (40, 60))
    data = image[5:35, 4:54]
    data[3, 7:12] = np.nan
    variance = rng.uniform(50, 300, data.shape)
    variance[20, 30] = 0.0
    model = rng.normal(0, 3, data.shape)
    unit = rng.uniform(0, 1, data.shape)
    x, y, corr = 21.3, 13.8, 1.7
    chi2, elongation = residual_quadrupole(data, variance, model, unit, x, y, corr)
    good = np.isfinite(data) & (variance > 0)
    dy, dx = np.mgrid[: data.shape[0], : data.shape[1]] - np.array([y, x])[:, None, None]
    w = np.where(good, unit, 0.0)
    g = np.array([w * (dx**2 - dy**2), w * 2 * dx * dy])
    r = np.where(good, data - model, 0.0)
    e = np.sum(g * r, axis=(1, 2))
    cov = np.einsum("ayx,byx->ab", g, g * np.where(good, variance, 0.0) * corr)
    second = np.sum(w * (dx**2 + dy**2) * model)
    # 1e-10: sums of ~1500 terms in another order (relative rounding ~1e-13).
    assert chi2 == pytest.approx(e @ np.linalg.solve(cov, e), rel=1e-10)
    assert elongation == pytest.approx(np.hypot(*e) / second, rel=1e-10)


@pytest.mark.parametrize(
    "response",
    [None, _model.Response(0.3, 0.7, 0.9), _model.Response(0.3, 0.7, 0.9, -0.52, 0.52)],
)
def test_model_image_is_the_numpy_model(response):
    # Self-consistency: model_image runs compiled; _model._unit_model (numpy)
    # is the reference the fits' Python loop uses.
    dx, dy = smear_track([3900.0], 4096, 40, 16.0, 3.0)
    profile = SeeingProfile(4.0)
    sigmas, weights = profile.mixture()
    ours = model_image((31, 45), 20.3, 14.6, dx[0], dy[0], profile, 1234.0, response)
    reference = 1234.0 * _model._unit_model(
        np.arange(45.0), np.arange(31.0), 20.3, 14.6, dx[0], dy[0], sigmas, weights,
        response=response,
    )  # fmt: skip
    # 1e-12 of the peak: the same sums, in another order at most.
    np.testing.assert_allclose(ours, reference, rtol=0, atol=1e-12 * reference.max())


def test_kernel_samples_are_the_kernels_end_to_end():
    # numpy's per-kernel steps are the reference: each kernel's samples as
    # float64, flattened, concatenated, and each kernel's first sample.
    from pipeline.stages.detect._model import _kernel_samples

    rng = np.random.default_rng(17)
    kernels = [
        (rng.normal(size=5), rng.normal(size=5)),
        (np.zeros(1), np.zeros(1)),
        (rng.normal(size=3).astype(np.float32), rng.normal(size=3).astype(np.float32)),
        (rng.normal(size=(2, 2)), rng.normal(size=(2, 2))),
    ]
    dx, dy, bounds = _kernel_samples(kernels)
    for ours, axis in ((dx, 0), (dy, 1)):
        theirs = np.concatenate([np.asarray(k[axis], dtype=np.float64).ravel() for k in kernels])
        np.testing.assert_array_equal(ours, theirs)
        assert ours.dtype == np.float64
    np.testing.assert_array_equal(bounds, [0, 5, 6, 9, 13])
