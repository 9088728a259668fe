"""Tests of the rectify stage against the exact TDI model, astropy.wcs and analytic results."""

import re
import tracemalloc
import warnings

import numpy as np
import pytest
from _rectify_scene import measure, small_camera, star_scene
from _rectify_scene import night_model as scene_model
from astropy.coordinates import SkyCoord
from astropy.io import fits
from astropy.table import Table
from astropy.wcs import WCS
from pydantic import ValidationError
from scipy import fft as scipy_fft

from pipeline.exceptions import RectifyWarning
from pipeline.geometry.rectified import RectifiedFrame
from pipeline.geometry.tdi import first_order_bow
from pipeline.masks import MaskBit
from pipeline.products import image_hdulist
from pipeline.stages import GRAPH, StageContext, Stretch
from pipeline.stages._line_time import clock_spans, other_line_time_blocks
from pipeline.stages.detect._model import KernelGrid
from pipeline.stages.rectify import (
    STAGE,
    RectifyOptions,
    line_time_problem,
    night_line_time,
    night_model,
    rectify,
    segment_row_offset,
    smear_kernel_at,
    smear_kernels,
)
from pipeline.stages.rectify._deconvolve import filter_lag_products, wiener_filter
from pipeline.stages.rectify._map import StripMap, column_windows, crossing_after, map_nodes

LATITUDES = [0.0, 30.0, 50.0, -31.0]
N_ROWS = 2048

_SCENES: dict = {}


def _grid_scene(latitude: float):
    """Bright isolated stars on a grid of rectified positions (cached per latitude)."""
    if latitude not in _SCENES:
        model = scene_model(latitude, N_ROWS)
        frame = RectifiedFrame.for_night(model, N_ROWS)
        xs = np.linspace(150.0, N_ROWS - 150.0, 7) + 0.37
        ys = np.linspace(24.0, frame.n_y - 25.0, 8) + 0.21
        x, y = np.meshgrid(xs, ys)
        # shift every row of stars by a different sub-pixel phase along the scan
        x = x + 0.13 * np.arange(ys.size)[:, None]
        scene = star_scene(model, N_ROWS, x.ravel(), y.ravel())
        _SCENES[latitude] = (scene, rectify(scene.image, scene.variance, scene.mask, model))
    return _SCENES[latitude]


# ----------------------------------------------------------------------------
# The frame and its WCS


@pytest.mark.parametrize("latitude", LATITUDES)
def test_wcs_is_the_frame_rotation(latitude):
    # FITS WCS standard (Calabretta & Greisen 2002, Paper II) through
    # astropy.wcs/WCSLIB: with our CRVAL/LONPOLE/LATPOLE the CAR native
    # longitude is RA_date - RA_ref and the native latitude Dec_date.
    model = scene_model(latitude, N_ROWS)
    frame = RectifiedFrame.for_night(model, N_ROWS)
    x_start = 700
    wcs = frame.wcs(x_start, 600)
    rng = np.random.default_rng(1)
    x = rng.uniform(-50, 650, 500)
    y = rng.uniform(-5, frame.n_y + 5, 500)
    native = wcs.wcs.p2s(np.column_stack([x, y]), 0)
    ra_date, dec_date = frame.date_from_pixel(x + x_start, y)
    lon = (native["phi"] - (ra_date - frame.ra_ref) + 180.0) % 360.0 - 180.0
    # 1e-10 deg = 0.4 micro-arcsec: double-precision trigonometry in WCSLIB.
    assert np.abs(lon).max() < 1e-10
    assert np.abs(native["theta"] - dec_date).max() < 1e-10
    world = wcs.pixel_to_world(x, y)
    ra, dec = frame.icrs_from_pixel(x + x_start, y)
    sep = world.separation(SkyCoord(ra, dec, unit="deg")).arcsec
    assert sep.max() < 1e-6  # same: ~1e-9 of a pixel
    assert wcs.wcs.radesys == "ICRS"


def test_frame_axes_and_orientation():
    # Design: x grows with RA of date (time runs along +x, east to the right),
    # y grows to the north; one column is one line time of Earth rotation
    # (IERS Conventions 2010 Earth rotation angle rate).
    model = scene_model(30.0, N_ROWS)
    frame = RectifiedFrame.for_night(model, N_ROWS)
    era_rate_deg = 360.0 * 1.00273781191135448 / 86400.0
    assert frame.cdelt1 == pytest.approx(era_rate_deg * model.line_time, rel=1e-14)
    assert frame.cdelt2 == pytest.approx(model.pixel_scale / 3600.0, rel=1e-14)
    wcs = frame.wcs(0, 100)
    a, b = wcs.pixel_to_world([10.0, 11.0], [50.0, 51.0])
    assert b.ra.deg > a.ra.deg  # east to the right (RA grows with x)
    north = wcs.pixel_to_world([10.0, 10.0], [50.0, 60.0])
    assert north[1].dec.deg > north[0].dec.deg
    # The chip centre at mid-night sits on the middle row and near x = x_ref.
    x_mid = frame.column_of_row(model, frame.x_ref)
    assert abs(x_mid - frame.x_ref) < 1e-6  # by construction of ra_origin


def test_frame_rejects_bad_input():
    model = scene_model(30.0, 256)
    with pytest.raises(ValueError, match="n_rows"):
        RectifiedFrame.for_night(model, 0)
    with pytest.raises(ValueError, match="pixel_scale"):
        RectifiedFrame.for_night(model, 256, pixel_scale=-1.0)


# ----------------------------------------------------------------------------
# The mapping


def test_map_interpolation_error():
    # Exact model (TDIModel.recorded_centroid) vs the interpolated map at
    # random points: the design budget is 0.002 px; a rotated camera makes the
    # map depend on both coordinates.
    model = scene_model(50.0, N_ROWS, small_camera(rotation=0.3))
    frame = RectifiedFrame.for_night(model, N_ROWS)
    strip_map = StripMap(model, frame, 200, 1800)
    rng = np.random.default_rng(2)
    x = rng.uniform(200, 1800, 300)
    y = rng.uniform(0, frame.n_y - 1, 300)
    r, c = strip_map(x, y)
    ra, dec = frame.icrs_from_pixel(x, y)
    r_exact = np.empty_like(r)
    c_exact = np.empty_like(c)
    for i in range(x.size):
        r_exact[i], c_exact[i] = model.recorded_centroid(
            ra[i], dec[i], after=crossing_after(model, x[i])
        )
    assert np.abs(r - r_exact).max() < 0.002
    assert np.abs(c - c_exact).max() < 0.002
    # columns_for_row solves x + a(x, y) = row; check it against the map itself.
    row = 1000.3
    c_row = strip_map.columns_for_row(row)
    yy = np.arange(frame.n_y, dtype=float)
    xx = np.full(frame.n_y, row)
    for _ in range(5):
        xx = xx - (strip_map(xx, yy)[0] - row)
    # 1e-6 px: both are the same interpolant; the Taylor step neglects ~1e-9.
    assert np.abs(c_row - strip_map(xx, yy)[1]).max() < 1e-6


def test_map_nodes_and_column_windows_are_each_columns_own():
    """map_nodes and column_windows search many columns' crossings together; each
    node column must be (r - x, c) of TDIModel.recorded_centroid of its own
    stars, and each column's window TDIModel.crossing_window of its own (and
    so its track TDIModel.track), to the bit, with the crossing its column
    picks (crossing_after).  Self-consistency check."""
    model = scene_model(50.0, N_ROWS, small_camera(rotation=0.3))
    frame = RectifiedFrame.for_night(model, N_ROWS)
    nodes: dict = {}
    map_nodes(model, frame, [(200.0, 700.0), (600.0, 1300.0)], nodes, step_x=256, step_y=64)
    y_nodes = StripMap(model, frame, 200.0, 700.0, step_x=256, step_y=64).y_nodes
    assert sorted(nodes) == [256.0 * k for k in range(-1, 8)]
    for xn, (offset, column) in nodes.items():
        ra, dec = frame.icrs_from_pixel(xn, y_nodes)
        r, c = model.recorded_centroid(ra, dec, after=crossing_after(model, xn))
        np.testing.assert_array_equal(offset, r - xn)
        np.testing.assert_array_equal(column, c)
    sets = []
    for columns in ([300.0, 900.0], [1500.0, 1500.0, 100.0]):
        x = np.repeat(columns, 3)
        y = np.tile([5.0, 40.0, 77.0], len(columns))
        sets.append((x, *frame.icrs_from_pixel(x, y)))
    for (x, ra, dec), windows in zip(sets, column_windows(model, sets), strict=True):
        assert len(windows) == np.unique(x).size
        for value, (t0, t1) in zip(np.unique(x), windows, strict=True):
            sel = x == value
            after = crossing_after(model, value)
            alone = model.crossing_window(ra[sel], dec[sel], after=after)
            np.testing.assert_array_equal(t0, alone[0])
            np.testing.assert_array_equal(t1, alone[1])
            track = model.track_in_window(ra[sel], dec[sel], t0, t1, 7)
            expected = model.track(ra[sel], dec[sel], 7, after=after)
            np.testing.assert_array_equal(track.r, expected.r)
            np.testing.assert_array_equal(track.c, expected.c)


@pytest.mark.parametrize("latitude", [50.0, -31.0])
def test_resampling_positions_match_wcs_and_model(latitude):
    # End-to-end check of the product's WCS (FITS WCS via astropy.wcs) against
    # the exact model, everywhere on the product: rectifying images whose
    # values are the strip row and column coordinates returns, divided by the
    # rectified image of ones, the strip position each pixel sampled (the Keys
    # kernel reproduces linear functions exactly).  That position must be the
    # recorded centroid of the star the WCS puts at that pixel.
    n_rows = 1024
    model = scene_model(latitude, n_rows, small_camera(rotation=-0.2))
    rows, cols = np.indices((n_rows, model.camera.n_columns), dtype=float)
    zeros = np.zeros(rows.shape, np.uint16)
    results = [rectify(p, np.ones_like(p), zeros, model) for p in (np.ones_like(rows), rows, cols)]
    ones, r_used, c_used = (res.image for res in results)
    wcs = results[0].wcs
    ny, nx = ones.shape
    yy, xx = np.mgrid[8 : ny - 8 : 9, 16 : nx - 16 : 37]
    world = wcs.pixel_to_world(xx.ravel(), yy.ravel())
    r_exact, c_exact = model.recorded_centroid(
        world.ra.deg, world.dec.deg, after=crossing_after(model, float(nx) / 2) - 400.0
    )
    r_sampled = (r_used / ones)[yy, xx].ravel()
    c_sampled = (c_used / ones)[yy, xx].ravel()
    # The rectified WCS must be exact to well under 0.01 pixel across the product.
    assert np.abs(r_sampled - r_exact).max() < 0.01
    assert np.abs(c_sampled - c_exact).max() < 0.01


# ----------------------------------------------------------------------------
# Stars on simulated nights


@pytest.mark.parametrize("latitude", LATITUDES)
def test_star_centroids_land_on_wcs_positions(latitude):
    scene, result = _grid_scene(latitude)
    # Predicted position: the catalogue (ICRS) position through astropy.wcs.
    x_wcs, y_wcs = result.wcs.world_to_pixel(SkyCoord(scene.ra, scene.dec, unit="deg"))
    image = result.image
    flux, xc, yc = np.array([measure(image, x, y, 12) for x, y in zip(x_wcs, y_wcs, strict=True)]).T
    assert np.isfinite(flux).all()
    dx, dy = xc - x_wcs, yc - y_wcs
    # Requirement: <= 0.02 px rms (first moment of a noise-free star).
    assert np.sqrt(np.mean(dx**2)) < 0.02
    assert np.sqrt(np.mean(dy**2)) < 0.02
    # No trend across the columns (y) or along the night (x): the change of a
    # fitted straight line over the field is far below the rms budget.
    for offsets in (dx, dy):
        for coord in (x_wcs, y_wcs):
            slope = np.polyfit(coord, offsets, 1)[0]
            assert abs(slope * np.ptp(coord)) < 0.01
    # Flux of a Gaussian star is conserved (requirement 0.2 %; the Gaussian is
    # 8 sigma inside the box, so truncation is below 1e-12).
    np.testing.assert_allclose(flux, scene.flux, rtol=2e-3)
    # Rows are straight: stars of equal declination of date share one row
    # wherever along the night they pass.
    for row in np.unique(scene.y):
        sel = scene.y == row
        assert np.ptp(yc[sel]) < 0.02


def test_track_apex_would_fail_the_centroid_check():
    # Negative control (track geometry, derived): a star's mid-crossing point
    # lies s/3 equatorward of its time-mean, s = N^2 p tan(delta) / 8.  Mapping
    # to the apex instead of the mean would put stars ~1.5 px off at 50 deg.
    scene, result = _grid_scene(50.0)
    kernels = result.smear_kernels
    n_samples = kernels.meta["n_samples"]
    centre = kernels[np.argmin(np.abs(kernels["y"] - (result.image.shape[0] - 1) / 2))]
    p = np.radians(scene.model.pixel_scale / 3600.0)
    sagitta = scene.model.n_rows**2 * p * np.tan(np.radians(50.0)) / 8.0
    mid = centre["dy"][n_samples // 2]
    # First-order formula vs the exact track: 5 % covers the higher orders and
    # the half-sample offset of the middle sample.
    assert mid == pytest.approx(-sagitta / 3.0, rel=0.05)
    assert abs(mid) > 10 * 0.02  # far beyond the centroid budget


@pytest.mark.parametrize("latitude", [30.0, 50.0, -31.0])
def test_smear_kernel_record_matches_analytic_smear_and_bow(latitude):
    # Numerical examples (derived, DEVELOPERS.md): the along-scan slip of a track eta north
    # of the centre line is -N eta tan(phi) / (1 - eta tan(phi)) pixels plus the
    # centre track's own (cubic) residual, to <= 0.002 px; section 3.4: the
    # cross-scan sagitta is N^2 p tan(delta) / 8.  The record holds the exact
    # tracks, sampled at the midpoints of n equal time steps, so the sampled
    # run is (1 - 1/n) of the slip and the sampled bow (1 - 2/n) of the sagitta.
    scene, result = _grid_scene(latitude)
    kernels = result.smear_kernels
    model = scene.model
    n_samples = kernels.meta["n_samples"]
    p = np.radians(model.pixel_scale / 3600.0)
    n = model.n_rows
    phi = np.radians(latitude)
    y_centre = (result.image.shape[0] - 1) / 2.0
    kernels = kernels[kernels["x"] == kernels["x"][0]]
    residuals, runs = [], []
    for row in kernels:
        eta = (row["y"] - y_centre) * p
        slip = -n * eta * np.tan(phi) / (1.0 - eta * np.tan(phi))
        # In the strip a track runs from r to r - slip: along +x by -slip.
        run = row["dx"][-1] - row["dx"][0]
        residuals.append(run + slip * (1.0 - 1.0 / n_samples))
        runs.append(run)
        delta = phi + np.arctan(eta)
        sagitta = n**2 * p * np.tan(delta) / 8.0
        # First order equals the exact sagitta to 4 decimals (numerical examples); 1 %.
        assert row["bow"] == pytest.approx(abs(sagitta) * (1 - 2 / n_samples), rel=0.01)
    # What remains is the centre track's cubic residual, the same for every
    # track (to 0.002 px at 4096 rows, numerical examples); 0.01 px allows for
    # our coarse 6-arcsec pixels, and the slip itself spans several pixels.
    assert np.ptp(residuals) < 0.01
    assert np.ptp(runs) > 4.0
    # Poleward stars lag their packet (track geometry), so their strip track
    # runs to later rows: towards +x for the poleward edge.
    poleward = kernels[np.argmax(kernels["y"] * np.sign(latitude))]
    assert (poleward["dx"][-1] - poleward["dx"][0]) > 1.0


@pytest.mark.parametrize("latitude", LATITUDES)
def test_smear_kernel_bow_has_the_sign_the_geometry_predicts(latitude):
    # Track geometry (DEVELOPERS.md; first_order_bow): a track bows poleward at its
    # ends, sagitta N^2 p tan(delta) / 8, positive to the north; its time-mean
    # lies s/3 poleward of the meridian point.  Sampled uniformly in time at
    # u = t/T - 1/2, the cross-scan offsets from the mean are s (4 u^2 - <4 u^2>).
    # Fit s to each recorded kernel, signed, and compare: a bow recorded the
    # wrong way round (south, or north, only) is off by 2 s.
    scene, result = _grid_scene(latitude)
    kernels = result.smear_kernels
    n_samples = kernels.meta["n_samples"]
    u = (np.arange(n_samples) + 0.5) / n_samples - 0.5
    shape = 4 * u**2 - np.mean(4 * u**2)
    dy = np.asarray(kernels["dy"])
    fitted = dy @ shape / (shape @ shape)
    offset = np.asarray(kernels["y"]) - (result.image.shape[0] - 1) / 2.0
    predicted = first_order_bow(latitude, scene.model.n_rows, scene.model.pixel_scale, offset)
    # 1e-3 px + 2e-4 relative: the first-order sagitta equals the exact one to
    # 1e-4 (numerical examples, derived; measured <= 6e-4 px at 50 deg, 2e-5 px at the
    # equator, where the edges' sagittas are -/+0.016 px).
    np.testing.assert_allclose(fitted, predicted, rtol=2e-4, atol=1e-3)
    # what is left is the parabola's higher orders and the map's interpolation
    assert np.abs(dy - fitted[:, None] * shape).max() < 0.005


def test_smear_kernel_lookup_matches_exact_kernel():
    # The interpolated kernel between recorded rows equals the exact kernel of
    # a star there (TDIModel.track) to well below a hundredth of a pixel.
    scene, result = _grid_scene(50.0)
    model, frame = scene.model, result.frame
    x, y = 1000.0, 101.0
    dx, dy = smear_kernel_at(result.smear_kernels, x, y)
    strip_map = StripMap(model, frame, x - 1, x + 1)
    exact = smear_kernels(model, frame, strip_map, np.array([x]), np.array([y]))
    # 0.01 px: linear interpolation over 32 px of a kernel whose length
    # changes linearly with y (first order, track geometry).
    assert np.abs(dx - exact["dx"][0]).max() < 0.01
    assert np.abs(dy - exact["dy"][0]).max() < 0.01


# ----------------------------------------------------------------------------
# Stretches, noise and masks


def test_two_stretches_equal_one():
    # Self-consistency: a strip rectified in two
    # overlapping stretches equals the strip rectified at once.
    model = scene_model(50.0, N_ROWS)
    frame = RectifiedFrame.for_night(model, N_ROWS)
    rng = np.random.default_rng(3)
    scene = star_scene(
        model,
        N_ROWS,
        rng.uniform(50, 2000, 120),
        rng.uniform(10, frame.n_y - 10, 120),
        sky=50.0,
        noise_seed=1,
    )
    planes = (scene.image, scene.variance, scene.mask)
    whole = rectify(*planes, model)
    split, overlap = 1000, 64
    first = rectify(
        *(p[: split + overlap] for p in planes), model, core=(0, split), night_rows=N_ROWS
    )
    second = rectify(
        *(p[split - overlap :] for p in planes),
        model,
        row_lo=split - overlap,
        core=(split, N_ROWS),
        night_rows=N_ROWS,
    )
    assert first.x_start == whole.x_start
    assert second.x_start == first.x_start + first.image.shape[1]
    for name in ("image", "variance", "mask"):
        joined = np.concatenate([getattr(first, name), getattr(second, name)], axis=1)
        # 1e-9 e-: identical arithmetic; only the map nodes' round-off differs.
        np.testing.assert_allclose(joined, getattr(whole, name), rtol=0, atol=1e-9)
    # Deconvolved stretches use kernels at their own middle column (the kernel
    # drifts by ~1e-3 px over a stretch), so they agree to 1e-3 of the
    # brightest peak, given overlap_rows beyond deconvolution_margin (~90 px).
    overlap = 140
    options = {"deconvolve": True, "night_rows": N_ROWS}
    whole = rectify(*planes, model, deconvolve=True)
    first = rectify(*(p[: split + overlap] for p in planes), model, core=(0, split), **options)
    second = rectify(
        *(p[split - overlap :] for p in planes),
        model,
        row_lo=split - overlap,
        core=(split, N_ROWS),
        **options,
    )
    joined = np.concatenate([first.image, second.image], axis=1)
    assert np.nanmax(np.abs(joined - whole.image)) < 1e-3 * np.nanmax(whole.image)


def test_too_small_overlap_warns():
    model = scene_model(0.0, 512)
    image = np.ones((300, 256))
    with pytest.warns(RectifyWarning, match="overlap_rows"):
        rectify(
            image, image, np.zeros(image.shape, np.uint16), model,
            row_lo=100, core=(101, 399), night_rows=512,
        )  # fmt: skip


def test_overlap_warning_names_enough_rows_for_deconvolution():
    # Self-consistency: the number of overlap rows the warning asks for (it
    # includes the deconvolution's margin) silences it.
    model = scene_model(50.0, 1024)
    image = np.ones((1024, 256))
    mask = np.zeros(image.shape, np.uint16)
    core = (450, 574)

    def run(overlap):
        lo, hi = core[0] - overlap, core[1] + overlap
        return rectify(
            image[lo:hi], image[lo:hi], mask[lo:hi], model,
            row_lo=lo, core=core, night_rows=1024, deconvolve=True,
        )  # fmt: skip

    with pytest.warns(RectifyWarning, match=r"overlap_rows to at least (\d+)") as record:
        run(16)
    needed = int(re.search(r"at least (\d+)", str(record[0].message)).group(1))
    assert needed > 16 + 60  # the deconvolution's margin is ~90 columns here
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        run(needed)


def test_variance_and_noise_correlation():
    # Analytic: white noise of variance v rectified has per-pixel variance
    # equal to the variance plane, and aperture sums whose variance is the
    # plane's sum times the reported noise-correlation factor.
    model = scene_model(30.0, 1024)
    rng = np.random.default_rng(7)
    image = rng.normal(0.0, 10.0, (1024, 256))
    variance = np.full(image.shape, 100.0)
    result = rectify(image, variance, np.zeros(image.shape, np.uint16), model)
    core = result.image[20:-20, 40:-40]
    plane = result.variance[20:-20, 40:-40]
    # 200k pixels, correlated in 4x4 groups: standard error ~1 %; 5 % margin.
    assert np.var(core) == pytest.approx(np.mean(plane), rel=0.05)
    ny, nx = core.shape
    boxes = core[: ny // 16 * 16, : nx // 16 * 16].reshape(ny // 16, 16, nx // 16, 16)
    sums = boxes.sum(axis=(1, 3)).ravel()
    predicted = 256 * np.mean(plane) * result.noise_correlation
    # ~900 sums: relative standard error ~5 %; 15 % is 3 sigma and still tells
    # the factor (here ~1.4) from 1.
    assert np.var(sums) == pytest.approx(predicted, rel=0.15)
    assert result.noise_correlation > 1.0


def test_peak_memory_is_a_few_planes_of_the_input():
    """Each pass's planes are let go once the next are made.

    rectify's own allocations peak at 5.6 input image planes on this float32
    stretch (measured: the cleaned inputs, the first pass's image, variance
    and mask, then the second pass's and their transposes made one at a
    time); 9.6 when the first pass's planes lived through the second pass
    and the transposition.  The limit, 6.5, leaves most of a plane for other
    library versions' temporaries and still catches one pass held too long.
    Self-consistency (tracemalloc counts numpy's allocations).
    """
    model = scene_model(30.0, 2048)
    rng = np.random.default_rng(7)
    image = rng.normal(0.0, 10.0, (2048, 256)).astype(np.float32)
    image[5, 7] = np.nan  # a non-finite pixel: the cleaned copies are made
    variance = np.full(image.shape, 100.0, np.float32)
    mask = np.zeros(image.shape, np.uint16)
    rectify(image, variance, mask, model)  # first: imports and caches out of the way
    tracemalloc.start()
    try:
        rectify(image, variance, mask, model)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert peak / image.nbytes <= 6.5


def test_masks_and_no_data():
    # Definition (pipeline.masks): no-data pixels are NaN; a bad strip column
    # becomes a flagged band of rectified rows no wider than the 4-tap kernel;
    # the night's first and last columns and the chip's edges are OUTSIDE.
    model = scene_model(30.0, 1024)
    image = np.full((1024, 256), 100.0)
    variance = np.full(image.shape, 100.0)
    mask = np.zeros(image.shape, np.uint16)
    image[:, 120] = np.nan
    variance[:, 120] = np.nan
    mask[:, 120] |= np.uint16(MaskBit.BAD_COLUMN)
    mask[500, 60] |= np.uint16(MaskBit.COSMIC_RAY)
    result = rectify(image, variance, mask, model)
    bad_rows = np.flatnonzero(((result.mask & MaskBit.BAD_COLUMN) != 0).any(axis=1))
    assert 1 <= bad_rows.size <= 4
    assert np.isnan(result.image[bad_rows, 100:-100]).all()
    outside = (result.mask & MaskBit.OUTSIDE) != 0
    assert outside[:, 0].all() and outside[:, -1].all()  # night edges
    assert outside[0].all() and outside[-1].all()  # beyond the chip's columns
    assert np.isnan(result.image[outside]).all()
    good = result.mask == 0
    # A constant sky of 100 e- is reproduced exactly (Jacobian ~1 +- 1e-4).
    np.testing.assert_allclose(result.image[good], 100.0, rtol=1e-3)
    hits = np.argwhere((result.mask & MaskBit.COSMIC_RAY) != 0)
    assert 1 <= len(hits) <= 16  # one strip pixel reaches at most 4 x 4 outputs


def test_rectify_rejects_bad_input():
    model = scene_model(0.0, 256)
    good = np.zeros((256, 256))
    mask = np.zeros((256, 256), np.uint16)
    with pytest.raises(ValueError, match="n_columns"):
        rectify(np.zeros((256, 100)), np.zeros((256, 100)), mask[:, :100], model)
    with pytest.raises(ValueError, match="variance and mask"):
        rectify(good, good[:10], mask, model)
    with pytest.raises(TypeError, match="unsigned"):
        rectify(good, good, good, model)
    with pytest.raises(ValueError, match="core rows"):
        rectify(good, good, mask, model, core=(10, 300))


# ----------------------------------------------------------------------------
# Deconvolution


def _ellipticity(image, x0, y0, half=9, sigma_w=3.0):
    """Gaussian-weighted second-moment ellipticity |(Ixx-Iyy, 2Ixy)| / (Ixx+Iyy).

    The distortion definition of weighted-moment shape measurement (common
    practice in weak lensing; e.g. Bernstein & Jarvis 2002, from memory).
    """
    xi, yi = round(x0), round(y0)
    box = image[yi - half : yi + half + 1, xi - half : xi + half + 1]
    yy, xx = np.mgrid[-half : half + 1, -half : half + 1].astype(float)
    w = box * np.exp(-(xx**2 + yy**2) / (2 * sigma_w**2))
    total = w.sum()
    mx, my = (w * xx).sum() / total, (w * yy).sum() / total
    ixx = (w * (xx - mx) ** 2).sum() / total
    iyy = (w * (yy - my) ** 2).sum() / total
    ixy = (w * (xx - mx) * (yy - my)).sum() / total
    return np.hypot(ixx - iyy, 2 * ixy) / (ixx + iyy)


@pytest.mark.parametrize("latitude", [50.0, -50.0])
def test_deconvolution_makes_edge_stars_as_round_as_the_centre(latitude):
    model = scene_model(latitude, N_ROWS)
    frame = RectifiedFrame.for_night(model, N_ROWS)
    xs = np.arange(200.0, N_ROWS - 200.0, 80.0) + 0.3
    # whole rows, so every star has the same sub-pixel phase as its centre-line twin
    rows = np.array([26.0, float((frame.n_y - 1) // 2), frame.n_y - 27.0])
    x, y = np.meshgrid(xs, rows)
    scene = star_scene(model, N_ROWS, x.ravel(), y.ravel())
    planes = (scene.image, scene.variance, scene.mask)

    def mean_ellipticities(result):
        return [
            np.mean(
                [
                    _ellipticity(result.image, xi - result.x_start, yi)
                    for xi, yi in zip(scene.x, scene.y, strict=True)
                    if yi == row
                ]
            )
            for row in rows
        ]

    south, centre, north = mean_ellipticities(rectify(*planes, model))
    # Without deconvolution the smear makes the shapes differ a lot (the
    # centre line is bowed across, the edges smeared along and across).
    assert max(abs(south - centre), abs(north - centre)) > 0.1
    result = rectify(*planes, model, deconvolve=True)
    south, centre, north = mean_ellipticities(result)
    # Requirement: within 0.02 of the centre line.
    assert abs(south - centre) < 0.02
    assert abs(north - centre) < 0.02
    # Flux is kept: the filter has G(0) = 1 (0.5 %: box truncation of the
    # filter's ringing).
    flux = np.array(
        [
            measure(result.image, xi - result.x_start, yi, 12)[0]
            for xi, yi in zip(scene.x, scene.y, strict=True)
        ]
    )
    np.testing.assert_allclose(flux, scene.flux, rtol=5e-3)
    assert result.deconvolution_noise_gain is not None

    # The stamps themselves, not only their second moments (which a mirrored
    # bow leaves unchanged): each edge star, normalised to unit flux, matches
    # the centre-line star of the same column pixel by pixel.  Measured 1.2 %
    # of the peak at +/-50 deg (the regularised inverse leaves some smear);
    # 3 % is the budget, a bow deconvolved the wrong way round gives 20 %.
    def stamp(x, y, half=8):
        xi, yi = round(x - result.x_start), round(y)
        box = result.image[yi - half : yi + half + 1, xi - half : xi + half + 1]
        return box / box.sum()

    for x in xs:
        centre_star = stamp(x, rows[1])
        for row in (rows[0], rows[2]):
            difference = np.abs(stamp(x, row) - centre_star).max()
            assert difference < 0.03 * centre_star.max(), (x, row, difference)


def test_filter_lag_products_match_the_impulse_response():
    # Parseval: the lag products computed from the transfer function equal
    # sums over the impulse response (scipy.fft.irfft2) of a bowed smear's
    # filter, at every row and lag; their lag-0 sum is the white-noise
    # power mean |G|^2.
    dx = np.linspace(-2.5, 2.5, 64)
    dy = 0.3 * dx**2 - 0.6
    shape = (40, 128)
    g, gain = wiener_filter(dx, dy, shape, 1e-2, 1.0)
    h = scipy_fft.irfft2(g, s=shape)
    products = filter_lag_products(g, shape, (3, 4))
    direct = np.array(
        [
            [
                [np.sum(h[a] * np.roll(h[(a - ly) % shape[0]], lx)) for lx in range(-4, 5)]
                for ly in range(-3, 4)
            ]
            for a in range(shape[0])
        ]
    )
    # 1e-7 of the largest product, 1e-6 of the power (measured 2e-8 and 3e-7):
    # irfft2 drops the small non-Hermitian part of the filter's columns at
    # frequency 0 and Nyquist, which the products and mean |G|^2 keep.
    np.testing.assert_allclose(products, direct, atol=1e-7 * np.abs(direct).max())
    assert products[:, 3, 4].sum() == pytest.approx(gain**2, rel=1e-6)


#: Latitudes (north and south) and rectified pixel scales (None: the camera's
#: 6.2 arcsec) of the blank-sky noise checks.  The resampling's phases, and
#: so the correlation of the noise the filter sees, differ between them: at
#: the camera's scale little across the scan at 50 deg, most at 0 deg; at
#: half of it the phase alternates from row to row.
NOISE_CASES = [(-50.0, None), (-30.0, None), (0.0, None), (30.0, None), (50.0, None), (30.0, 3.1)]


def _box_sums(image: np.ndarray, height: int, width: int) -> np.ndarray:
    """Sums over non-overlapping ``height`` x ``width`` boxes of a 2-D array."""
    ny, nx = (image.shape[0] // height) * height, (image.shape[1] // width) * width
    boxes = image[:ny, :nx].reshape(ny // height, height, nx // width, width)
    return boxes.sum(axis=(1, 3)).ravel()


@pytest.mark.parametrize(("latitude", "pixel_scale"), NOISE_CASES)
def test_deconvolution_variance_plane_predicts_blank_sky_noise(latitude, pixel_scale):
    # Analytic truth: white input noise of known variance; the measured rms
    # of the products in blank sky is what the variance plane and the header
    # cards (DECNOISE, NOISECOR) must predict.
    model = scene_model(latitude, 1024)
    rng = np.random.default_rng(11)
    image = rng.normal(200.0, 10.0, (1024, 256))
    planes = (image, np.full(image.shape, 100.0), np.zeros(image.shape, np.uint16))
    plain = rectify(*planes, model, pixel_scale=pixel_scale)
    sharp = rectify(*planes, model, deconvolve=True, pixel_scale=pixel_scale)
    inner = (slice(30, -30), slice(120, -120))
    noise = {"plain": np.nanstd(plain.image[inner]), "sharp": np.nanstd(sharp.image[inner])}
    # Before deconvolution: the resampling weights' sum of squares, exact for
    # white input (measured 0.05 % apart); 1 %: the sample rms of 160 000 -
    # 360 000 pixels correlated over a few pixels is good to ~0.3 %.
    assert noise["plain"] == pytest.approx(np.sqrt(np.nanmean(plain.variance[inner])), rel=0.01)
    # After it the plane is scaled by the filter's variance ratio for the
    # noise as the resampling left it, correlated over a few pixels (measured
    # 0.1-0.4 % apart in every case; a white-noise gain was 0.6-0.9 % low at
    # +-50 deg, 10 % at +-30, 23 % at 0 and 32 % at half the pixel scale).
    # The tolerance is the measurement's own error: the sample variance of N
    # Gaussian pixels with correlation coefficients rho has a relative error
    # sqrt(2 sum(rho^2) / N); here N = 162 000 (361 000 at half the scale)
    # and sum(rho^2) = 4.7-6.7 (measured from the image's autocorrelation),
    # so the rms is good to 0.3-0.5 %; 1.5 % is 3 sigma.
    predicted = np.sqrt(np.nanmean(sharp.variance[inner]))
    assert noise["sharp"] == pytest.approx(predicted, rel=0.015)
    # The header's gain is the rms after / before over the product's pixels
    # with data (measured within 0.9 %, the product's edges included, where
    # the filter reads missing data as zero); 2 %.
    good = np.isfinite(sharp.image)
    ratio = np.std(sharp.image[good]) / np.std(plain.image[good])
    assert ratio == pytest.approx(sharp.deconvolution_noise_gain, rel=0.02)
    # NOISECOR still predicts large-aperture sums: the filter keeps their
    # noise (G(0) = 1) and lowers the per-pixel variance, so the factor rises
    # by 1 / gain^2 (a NOISECOR carried over unchanged is 3-12 times too
    # small).  Sums over 32 x 64 px boxes of the same noise before and after:
    # the ratio of their variances, measured 0.93-1.13 of the headers' over
    # three noise seeds at 0, 30 and 50 deg (~84 boxes each: a few %
    # statistical error; the boxes' edges lose the smoothed noise's
    # correlation with the outside, ~5 % at 0 deg; one NOISECOR for the
    # product while the smear, and the factor, change across it, ~10 % at
    # +-50 deg); 20 %.
    rows = np.flatnonzero(np.isfinite(sharp.image[:, inner[1]]).all(axis=1))
    region = (slice(rows[0], rows[-1] + 1), inner[1])
    measured = np.var(_box_sums(sharp.image[region], 32, 64)) / np.var(
        _box_sums(plain.image[region], 32, 64)
    )
    headers = (sharp.noise_correlation * np.mean(sharp.variance[region])) / (
        plain.noise_correlation * np.mean(plain.variance[region])
    )
    assert measured == pytest.approx(headers, rel=0.2)


# ----------------------------------------------------------------------------
# The stage


def test_stage_is_registered_with_strict_options():
    assert STAGE in GRAPH
    assert STAGE.requires == ("ingest", "calibrate")
    with pytest.raises(ValidationError):
        RectifyOptions(pixel_scal=1.0)
    with pytest.raises(ValidationError):
        RectifyOptions(map_step_x=0)
    # Options mirror the function's keyword arguments (DEVELOPERS.md, Style).
    import inspect

    parameters = inspect.signature(rectify).parameters
    for name in RectifyOptions.model_fields:
        assert name in parameters


def _run_stage(model, index, stretch, stretches):
    """The stage on ``stretch`` of a night ``index``, calibrated to 576 rows of a flat 10 e- sky."""
    image = np.full((576, 256), 10.0)
    calibrated = image_hdulist(
        image,
        image.copy(),
        np.zeros(image.shape, np.uint16),
        unit="electron",
        header=fits.Header(),
        metadata=fits.Header(),
    )
    context = StageContext(
        site=model.site,
        camera=model.camera,
        run=RectifyOptions(),
        night="test",
        stretch=stretch,
        stretches=stretches,
    )
    inputs = {"ingest": {"block_index": index}, "calibrate": {"image": calibrated}}
    return STAGE.run(inputs=inputs, options=RectifyOptions(), context=context)


def test_stage_run_returns_an_image_product_with_readable_wcs():
    model = scene_model(30.0, 1024)
    index = Table(
        {
            "row_start": [0],
            "n_rows": [1024],
            "t_start": [0.0],
            "line_time": [model.line_time],
            "tdi_rows": [model.camera.tdi_rows],
            "filter": ["r"],
        },
        meta={"reference_time": model.start.isot},
    )
    stretch = Stretch(0, 0, 512, 0, 576)
    products = _run_stage(model, index, stretch, (stretch, Stretch(1, 512, 1024, 448, 1024)))
    assert set(products) == {"image", "smear_kernels"}
    planes = products["image"]
    assert [hdu.name for hdu in planes] == ["PRIMARY", "FLUX", "FLUXVAR", "FLAGS"]
    flux = planes["FLUX"]
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        wcs = WCS(flux.header)
        night = WCS(flux.header, key="A")
    assert wcs.wcs.ctype[0] == "RA---CAR"
    # The stretch's first rectified column is night column 0 (the NIGHT grid).
    assert night.wcs.name == "NIGHT" and night.pixel_to_world_values(0, 0) == (0.0, 0.0)
    assert flux.data.shape[1] == pytest.approx(512, abs=2)
    assert flux.header["BUNIT"] == "electron" and planes["FLUXVAR"].header["BUNIT"] == "electron2"
    # The frame of date's epoch: the night's mid-time (RectifiedFrame.for_night).
    mid = model.start.utc.mjd + 0.5 * 1024 * model.line_time / 86400.0
    assert flux.header["MJDREF"] == pytest.approx(mid, abs=1e-9)  # 1e-9 d = 86 us: float MJD
    same = night_model(model.site, model.camera, index, 1024)
    assert same.line_time == model.line_time
    assert len(products["smear_kernels"]) > 0


def test_finer_pixel_scale_keeps_flux_and_positions():
    # A rectified pixel smaller than the camera's (here 0.8x) oversamples the
    # strip: interpolation then keeps flux (Jacobian weights) and positions.
    # (Coarser pixels undersample and lose ~0.5 % of flux at 1.25x: not a default.)
    scene, _ = _grid_scene(50.0)
    result = rectify(
        scene.image, scene.variance, scene.mask, scene.model,
        pixel_scale=0.8 * scene.model.pixel_scale,
    )  # fmt: skip
    x_wcs, y_wcs = result.wcs.world_to_pixel(SkyCoord(scene.ra, scene.dec, unit="deg"))
    flux, xc, yc = np.array(
        [measure(result.image, x, y, 14) for x, y in zip(x_wcs, y_wcs, strict=True)]
    ).T
    assert np.sqrt(np.mean((xc - x_wcs) ** 2 + (yc - y_wcs) ** 2)) < 0.02  # requirement
    np.testing.assert_allclose(flux, scene.flux, rtol=2e-3)  # requirement: 0.2 %


def test_demo_like_camera_with_noise():
    # A 1024-column, 4096-row camera at 0.52 arcsec per pixel and 41.65 deg
    # (the demo night's set-up), stars of S/N ~ 700 on a sky with Poisson-like
    # noise: centroids on the WCS to <= 0.02 px rms (requirement), flux to 0.2 %.
    camera = small_camera(n_columns=1024, tdi_rows=4096, focal_length=6.0)
    n_rows = 8192
    model = scene_model(41.65, n_rows, camera)
    frame = RectifiedFrame.for_night(model, n_rows)
    xs = np.linspace(500.0, n_rows - 500.0, 12) + 0.41
    ys = np.linspace(30.0, frame.n_y - 31.0, 10) + 0.27
    x, y = np.meshgrid(xs, ys)
    scene = star_scene(
        model, n_rows, x.ravel(), y.ravel(), flux=1.0e6, fwhm=2.7, sky=400.0, noise_seed=5
    )
    result = rectify(scene.image, scene.variance, scene.mask, model)
    x_wcs, y_wcs = result.wcs.world_to_pixel(SkyCoord(scene.ra, scene.dec, unit="deg"))
    sky = np.nanmedian(result.image)
    flux, xc, yc = np.array(
        [measure(result.image - sky, a, b, 12) for a, b in zip(x_wcs, y_wcs, strict=True)]
    ).T
    # Photon noise of 1e6 e- on 400 e-/px sky: centroid error ~0.002 px, flux
    # error ~0.15 % (25x25 box of sky), so the budgets test the geometry.
    assert np.sqrt(np.mean((xc - x_wcs) ** 2)) < 0.02
    assert np.sqrt(np.mean((yc - y_wcs) ** 2)) < 0.02
    assert np.abs(np.median(flux / scene.flux - 1)) < 2e-3


@pytest.mark.slow
def test_full_size_chip_at_49_degrees_with_deconvolution():
    # A 4096 x 4096 chip at 0.35 arcsec per pixel and 49 deg (the set-up of
    # DEVELOPERS.md numerical examples: edge slip ~16 px, sagitta ~4 px): centroids and
    # flux as in the small-chip tests, and deconvolution makes edge stars as
    # round as centre-line stars (requirement: within 0.02).
    camera = small_camera(n_columns=4096, tdi_rows=4096, focal_length=8.84)
    n_rows = 6144
    model = scene_model(49.0, n_rows, camera)
    frame = RectifiedFrame.for_night(model, n_rows)
    xs = np.arange(400.0, n_rows - 400.0, 90.0) + 0.3
    rows = np.array([40.0, (frame.n_y - 1) / 2.0, frame.n_y - 41.0])
    x, y = np.meshgrid(xs, rows)
    scene = star_scene(model, n_rows, x.ravel(), y.ravel(), fwhm=4.0, samples_per_pixel=4.0)
    planes = (scene.image, scene.variance, scene.mask)
    plain = rectify(*planes, model)
    x_wcs, y_wcs = plain.wcs.world_to_pixel(SkyCoord(scene.ra, scene.dec, unit="deg"))
    flux, xc, yc = np.array(
        [measure(plain.image, a, b, 20) for a, b in zip(x_wcs, y_wcs, strict=True)]
    ).T
    assert np.sqrt(np.mean((xc - x_wcs) ** 2 + (yc - y_wcs) ** 2)) < 0.02
    np.testing.assert_allclose(flux, scene.flux, rtol=2e-3)
    # The defaults: a 16-px smear gets lambda * (4/16)^2 (band_regularization in
    # pipeline.stages.rectify._deconvolve; measured 0.011 between edges and centre).
    sharp = rectify(*planes, model, deconvolve=True)
    e = np.array(
        [
            _ellipticity(sharp.image, a, b, half=14, sigma_w=4.0)
            for a, b in zip(x_wcs, y_wcs, strict=True)
        ]
    )
    south, centre, north = (np.mean(e[scene.y == row]) for row in rows)
    assert abs(south - centre) < 0.02
    assert abs(north - centre) < 0.02


def test_recorded_lattice_offsets_are_where_strip_pixels_land():
    """``lattice_x``/``lattice_y`` (mod 1) are the offsets of the strip's pixel centres.

    Analytic: the Keys kernel reproduces linear functions (Keys 1981, IEEE
    Trans. ASSP 29, 1153), so the rectified image of one lit strip pixel has
    its first moment exactly where that pixel's centre maps; modulo 1 that is
    the recorded lattice offset.  0.01 px: the offsets drift by < 1e-3 px
    between the records, and the moments of the 4 x 4 footprint are exact
    to rounding.
    """
    model = scene_model(50.0, N_ROWS)
    image = np.zeros((N_ROWS, 256))
    rows, columns = np.meshgrid(np.arange(300, N_ROWS - 300, 137), np.arange(20, 236, 31))
    image[rows.ravel(), columns.ravel()] = 1000.0
    result = rectify(image, np.ones_like(image), np.zeros(image.shape, np.uint16), model)
    out = np.nan_to_num(result.image)
    grid = KernelGrid(result.smear_kernels)
    checked = 0
    for iy, ix in zip(*np.nonzero(out > 50.0), strict=True):
        if out[iy, ix] < out[iy - 2 : iy + 3, ix - 2 : ix + 3].max():
            continue  # not the footprint's peak
        box = out[iy - 3 : iy + 4, ix - 3 : ix + 4]
        yy, xx = np.mgrid[iy - 3 : iy + 4, ix - 3 : ix + 4]
        xm, ym = np.sum(box * xx) / box.sum(), np.sum(box * yy) / box.sum()
        # At the peak's pixel centre: a property of the pixel grid, not of the star.
        response = grid.response(result.x_start + ix, iy)
        for moment, lattice in ((xm, response.lattice_x), (ym, response.lattice_y)):
            wrapped = (moment - lattice + 0.5) % 1.0 - 0.5
            assert abs(wrapped) < 0.01, (xm, ym, response)
        checked += 1
    assert checked > 50


def test_line_times_that_differ_by_header_rounding_are_one_line_time():
    """One block's LINETIME printed with 7 decimals (0.0458929 s against
    0.045892920031762555 s, 4.4e-7 apart) used to fail rectify, and so the
    whole night, on every stretch: 'the line time changes within the night'.
    Over the night's 5120 rows the two give row times 0.002 rows apart
    (derived), so they are one line time: the one of the most rows."""
    line_times = np.array([0.045892920031762555] * 3 + [0.0458929] + [0.045892920031762555])
    rows = np.full(5, 1024)
    assert night_line_time(line_times, rows, 5120) == 0.045892920031762555
    # The rounded value on most rows wins; equally common values take the shortest.
    mostly_rounded = np.array([0.0458929] * 3 + [0.045892920031762555] * 2)
    assert night_line_time(mostly_rounded, rows, 5120) == 0.0458929
    assert night_line_time(np.array([0.05, 0.05 + 1e-9]), np.array([10, 10]), 100) == 0.05


def test_a_camera_that_changes_its_line_time_mid_night_keeps_the_rows_of_the_most():
    """A real change of the clock (an operator who retunes the TDI rate) used
    to fail rectify on every stretch, and so the whole night.  Now the night's
    line time is the one of the most rows (values within the tolerance, one
    clock printed with other digits, counted together), and only the stretches
    with rows of another line time are refused, naming their files and how
    to reduce them.  (Derived: 1e-5 relative is 0.05 rows over 5120 rows.)"""
    a, b = 0.05, 0.05 * (1 + 1e-5)
    assert night_line_time(np.array([a, b]), np.array([2560, 2560]), 5120) == a  # tie: shortest
    assert night_line_time(np.array([a, b, b]), np.array([2048, 1536, 1536]), 5120) == b
    # a rounded print of the main clock counts with it
    rounded = round(b, 7)
    assert night_line_time(np.array([a, rounded, b]), np.array([2048, 1024, 2048]), 5120) == b
    index = Table(
        {
            "file": ["block_0000.fits", "block_0001.fits", "block_0002.fits"],
            "row_start": [0, 2048, 3584],
            "n_rows": [2048, 1536, 1536],
            "line_time": [a, b, b],
        }
    )
    assert other_line_time_blocks(np.array([a, b, b]), b, 5120).tolist() == [True, False, False]
    assert line_time_problem(index, (2048, 5120), b) is None
    reason = line_time_problem(index, (0, 2048), b)
    assert "block_0000.fits at LINETIME 0.05 s, not the night's 0.0500005 s" in reason
    assert "(3072 of the night's 5120 rows)" in reason and "night.pattern" in reason
    # rows from both clocks are refused
    assert line_time_problem(index, (1900, 2100), b) is not None


def test_line_times_are_one_clock_when_they_agree_over_their_segment():
    """Rows are timed from the start of their segment, so a clock error adds
    up over the segment's rows (and the TDI rows of the smear), not over the
    night's: a camera restarted after a 117,665-row gap that computed its
    line time again 1.2e-7 apart (0.015 rows over that night's 125,857 rows)
    had its second part refused; over its 4096-row segment it is 0.0005
    rows. (Derived.)"""
    a, c = 0.04589291321390699, 0.04589291883945021
    index = Table(
        {
            "file": [f"block_{k:04d}.fits" for k in range(8)],
            "row_start": [0, 1024, 2048, 3072, 121761, 122785, 123809, 124833],
            "n_rows": [1024] * 8,
            "line_time": [a] * 4 + [c] * 4,
            "tdi_rows": [4096] * 8,
            "segment": [0] * 4 + [1] * 4,
        }
    )
    np.testing.assert_array_equal(clock_spans(index), [4096] * 8)
    assert night_line_time(index["line_time"], index["n_rows"], clock_spans(index)) == a
    assert line_time_problem(index, (121761, 125857), a) is None
    # a clock 0.2 % slow is another line time however short its segment
    index["line_time"][4:] = a * 1.002
    assert "block_0004.fits, block_0005.fits" in line_time_problem(index, (121761, 125857), a)
    # the segment's rows count where they are more than the TDI rows
    index["tdi_rows"] = 64
    np.testing.assert_array_equal(clock_spans(index), [4096] * 8)
    index["segment"] = [0, 0, 0, 0, 1, 1, 2, 2]
    np.testing.assert_array_equal(clock_spans(index), [4096] * 4 + [2048] * 4)


def test_rectify_refuses_a_stretch_clocked_at_another_line_time():
    """The stage runs a stretch of the night's line time and refuses one of
    another, saying why (self-consistency)."""
    model = scene_model(30.0, 1024)
    other = model.line_time * 1.002
    index = Table(
        {
            "file": ["a.fits", "b.fits", "c.fits"],
            "row_start": [0, 512, 1024],
            "n_rows": [512, 512, 256],
            "t_start": [0.0, 512 * model.line_time, 1024 * model.line_time],
            "line_time": [model.line_time, model.line_time, other],
            "tdi_rows": [model.camera.tdi_rows] * 3,
            "filter": ["r"] * 3,
        },
        meta={"reference_time": model.start.isot},
    )
    stretches = (
        Stretch(0, 0, 512, 0, 576, (0, 1024)),
        Stretch(1, 1024, 1280, 1024, 1280, (1024, 1280)),
    )
    assert set(_run_stage(model, index, stretches[0], stretches)) == {"image", "smear_kernels"}
    with pytest.raises(ValueError, match=r"s0001 is not rectified: its rows come from c.fits"):
        _run_stage(model, index, stretches[1], stretches)


def test_a_segment_after_a_fractional_gap_is_resampled_to_the_night_s_row_clock():
    """A camera that stops for 10.4 rows: ingest places the next block 10 rows
    on (rows are whole), and its rows were read 0.4 rows later than the
    night's row clock says.  Rectify used to ignore the 0.4 rows: on a
    simulated 5-block night with such a gap before block 3, the stars after
    it came out 54 mas off in RA (rms 45 mas, a third of them lost to the
    astrometric fit) and the fit bent its wander to follow them (rms dRA
    38 mas over the night against 12 mas).  Now the segment's rows are
    resampled by -0.4 rows: its stars move 0.4 px along the scan."""
    import astropy.units as u
    from astropy.time import Time
    from test_ingest import LINE_TIME, START, make_header
    from test_ingest import N_ROWS as BLOCK_ROWS

    from pipeline.stages.ingest import index_night, parse_block_header

    late = Time(START) + (3 * BLOCK_ROWS + 10.4) * LINE_TIME * u.s
    headers = [make_header(seq) for seq in range(3)]
    headers.append(make_header(3, **{"DATE-OBS": late.isot}))
    index = index_night([parse_block_header(h, f"b{k}.fits") for k, h in enumerate(headers)]).table
    assert list(index["row_start"]) == [0, BLOCK_ROWS, 2 * BLOCK_ROWS, 3 * BLOCK_ROWS + 10]
    # DATE-OBS is written to the millisecond: 0.4 rows to 1 ms / 50 ms = 0.02 rows.
    segment = (3 * BLOCK_ROWS + 10, 4 * BLOCK_ROWS + 10)
    assert segment_row_offset(index, segment, LINE_TIME) == pytest.approx(0.4, abs=0.02)
    assert segment_row_offset(index, (0, 3 * BLOCK_ROWS), LINE_TIME) == 0.0

    # The rectified stars move by the offset along the scan (x), not across it.
    scene, plain = _grid_scene(40.0)
    later = rectify(scene.image, scene.variance, scene.mask, scene.model, row_offset=0.4)
    for x, y in zip(scene.x, scene.y, strict=True):
        _, x0, y0 = measure(plain.image, x - plain.x_start, y, 8)
        _, x1, y1 = measure(later.image, x - later.x_start, y, 8)
        # 0.005 px: the resampling's interpolation at two sub-pixel phases (measured ~1e-3)
        assert x1 - x0 == pytest.approx(0.4, abs=0.005)
        assert y1 - y0 == pytest.approx(0.0, abs=0.005)
