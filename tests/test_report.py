"""Tests of the nightly report: figures, page, escaping, missing products, the command."""

from __future__ import annotations

import math
from pathlib import Path

import _report_scene as scene
import _toy_graph
import numpy as np
import pytest
import yaml
from astropy import units as u
from astropy.nddata import block_reduce
from astropy.time import Time
from astropy.wcs import WCS

import pipeline.stages
from pipeline.cli import main
from pipeline.config import load_config
from pipeline.exceptions import ConfigError
from pipeline.geometry.rectified import column_times
from pipeline.report import (
    FIGURES,
    FigureSpec,
    NightClock,
    NightProducts,
    ReportOptions,
    bin_image,
    column_flat_figure,
    draw_figures,
    focal_length_figure,
    line_time_check,
    measure_sky,
    pixel_area_arcsec2,
    place_pieces,
    problem_lines,
    quicklook_figure,
    render_page,
    residual_map_figure,
    residuals_along_night_figure,
    seeing_across_chip_figure,
    seeing_along_night_figure,
    sky_along_night_figure,
    sky_surface_brightness,
    solved_rows,
    sources_along_night_figure,
    star_flat_figure,
    summary_rows,
    zero_point_figure,
)
from pipeline.report._clock import _clock_text
from pipeline.report._solved import zero_point_columns
from pipeline.stages.report import STAGE as REPORT_STAGE

SCRIPT = "<script>alert('x')</script>"


# ----------------------------------------------------------------- numbers


def test_sky_surface_brightness_follows_pogson() -> None:
    rate = np.array([1.0, 100.0, 400.0])
    area = 0.25
    got = sky_surface_brightness(rate, area, 25.0)
    # astropy's logarithmic units implement Pogson's scale: m = -2.5 log10(flux).
    expected = 25.0 + u.Magnitude(rate / area * u.electron / u.s / u.arcsec**2).value
    np.testing.assert_allclose(got, expected, rtol=0, atol=1e-12)  # float64 rounding only
    # Pogson (1856): a factor 100 in flux is exactly 5 magnitudes.
    assert got[0] - got[1] == pytest.approx(5.0, abs=1e-12)
    assert np.isnan(sky_surface_brightness(np.array([0.0, -1.0]), area, 25.0)).all()


def test_pixel_area_is_measured_on_the_sky_not_the_plane() -> None:
    # A plate carree (CAR) with 1 arcsec pixels: away from its equator a pixel
    # spans cos(dec) of its nominal width along the parallel (FITS WCS paper II,
    # Calabretta & Greisen 2002, sect. 5.2.3: CAR keeps equal spacing in both angles).
    wcs = WCS(naxis=2)
    wcs.wcs.ctype = ["RA---CAR", "DEC--CAR"]
    wcs.wcs.cdelt = [1 / 3600, 1 / 3600]
    wcs.wcs.crval = [0.0, 0.0]
    wcs.wcs.crpix = [1.0, 1.0]
    y60 = 60.0 * 3600.0  # the pixel row at Dec = 60 deg
    # Half-pixel finite differences on the sphere: relative error ~ (1 arcsec)^2.
    assert pixel_area_arcsec2(wcs, 0.0, y60) == pytest.approx(math.cos(math.radians(60)), rel=1e-6)
    assert pixel_area_arcsec2(wcs, 0.0, 0.0) == pytest.approx(1.0, rel=1e-6)


def test_measure_sky_ignores_masked_pixels_and_stars() -> None:
    flux = np.full((40, 60), 50.0)
    usable = np.ones(flux.shape, dtype=bool)
    flux[:30, :20] = 1e9  # most of the first bin: masked (a bleed)
    usable[:30, :20] = False
    flux[5, 25:28] = 1e5  # a star in the second bin
    flux[7, 45] = np.nan
    sky = measure_sky(flux, usable, x_start=100, exposure=2.0, n_bins=3)
    np.testing.assert_array_equal(sky["sky_rate"], [25.0, 25.0, 25.0])  # 50 e- / 2 s exactly
    np.testing.assert_array_equal(sky["x"], [109.5, 129.5, 149.5])
    assert list(sky["n_pixels"]) == [200, 800, 799]


def test_bin_image_matches_astropy_block_reduce_and_skips_nan() -> None:
    rng = np.random.default_rng(1)
    data = rng.normal(size=(9, 11))
    binned = bin_image(data, 2)
    assert binned.shape == (5, 6)
    # astropy.nddata.block_reduce (reference) trims ragged edges: compare the full blocks.
    np.testing.assert_allclose(binned[:4, :5], block_reduce(data, 2, func=np.mean), rtol=1e-12)
    assert binned[4, 5] == data[8, 10]  # the ragged corner holds one pixel
    data[:2, :2] = np.nan
    data[2, 2] = np.nan
    binned = bin_image(data, 2)
    assert np.isnan(binned[0, 0])
    assert binned[1, 1] == pytest.approx(np.mean([data[2, 3], data[3, 2], data[3, 3]]), rel=1e-12)


def test_place_pieces_puts_stretches_at_their_columns() -> None:
    strip = place_pieces([(0, np.ones((3, 5))), (20, np.full((3, 5), 2.0))], factor=2)
    assert strip.shape == (3, 15)
    assert (strip[:, :5] == 1).all() and (strip[:, 10:] == 2).all()
    assert np.isnan(strip[:, 5:10]).all()  # the gap
    with pytest.raises(ValueError, match="no rectified stretch"):
        place_pieces([], 2)


def test_place_pieces_shows_a_stretch_starting_before_column_0_from_there() -> None:
    """The first stretch's rectified frame may start a column before the night's
    first (CRVAL1A -1 on a 4096-column camera at latitude 50 deg): binned by 21,
    its first binned column lies before night column 0 and is left out, the
    rest placed from 0 (it was an empty slice, and the report failed)."""
    first = np.arange(6.0)[None, :].repeat(2, axis=0)
    strip = place_pieces([(-1, first), (147, np.full((2, 4), 9.0))], factor=21)
    assert strip.shape == (2, 11)
    np.testing.assert_array_equal(strip[:, :5], first[:, 1:])
    assert np.isnan(strip[:, 5:7]).all() and (strip[:, 7:] == 9).all()


def test_night_clock_gives_mid_exposure_utc() -> None:
    clock = NightClock(scene.block_index())
    assert clock.date == "2026-10-15"
    half = 0.5 * scene.TDI_ROWS * scene.LINE_TIME  # half a transit before readout
    midnight = Time("2026-10-15T00:00:00", scale="utc")
    first = (Time("2026-10-15T23:59:50", scale="utc") - midnight).sec - half
    second = (Time("2026-10-16T00:00:05", scale="utc") - midnight).sec - half
    # Time differences in float64 days: about 10 us of rounding.
    np.testing.assert_allclose(
        clock.hours([0, 99, 150, 199]) * 3600,
        [first, first + 99 * scene.LINE_TIME, second, second + 49 * scene.LINE_TIME],
        atol=1e-4,
    )
    assert _clock_text(clock.hours(150)) == "00:00:04"  # the next day, past 24 h
    with pytest.raises(ValueError, match="no usable block"):
        NightClock(scene.block_index()[:0])


# ----------------------------------------------------------------- figures


def _labels_have_text(figure) -> None:
    for ax in figure.axes:
        if ax.get_lines() or ax.get_images() or ax.collections:
            assert ax.get_xlabel() or ax is not figure.axes[-1] or ax.get_ylabel()
            assert ax.get_ylabel()


def test_seeing_along_the_night_plots_the_whole_stretch_values() -> None:
    clock = NightClock(scene.block_index())
    fig = seeing_along_night_figure(scene.seeing(), clock, pixel_scale=0.5)
    (line,) = fig.axes[0].get_lines()
    np.testing.assert_array_equal(line.get_ydata(), [3.0, 3.4])  # not the first band row
    np.testing.assert_allclose(line.get_xdata(), clock.hours([50.0, 200.0]))
    assert "(pix)" in fig.axes[0].get_ylabel() and "UTC" in fig.axes[0].get_xlabel()
    assert any("arcsec" in ax.get_ylabel() for ax in fig.axes[0].child_axes)


def test_seeing_across_the_chip_plots_band_medians() -> None:
    fig = seeing_across_chip_figure(scene.seeing())
    points, medians = fig.axes[0].get_lines()
    assert len(points.get_xdata()) == 4  # two bands x two stretches, whole rows left out
    np.testing.assert_array_equal(medians.get_xdata(), [25.0, 75.0])
    np.testing.assert_allclose(medians.get_ydata(), [3.2, 3.3])
    assert "(pix)" in fig.axes[0].get_xlabel() and "(pix)" in fig.axes[0].get_ylabel()


def test_sky_figure_says_the_zero_point_is_nominal() -> None:
    products = scene.products()
    fig = sky_along_night_figure(products["sky"], NightClock(products["block_index"]), 24.0)
    ax = fig.axes[0]
    (line,) = ax.get_lines()
    expected = 24.0 - 2.5 * np.log10(np.array([400.0, 300.0, 200.0, 100.0]) / 0.25)
    np.testing.assert_allclose(line.get_ydata(), expected)
    assert ax.yaxis_inverted()  # brighter sky up
    assert "NOMINAL" in ax.get_title() and "24.00" in ax.get_title()
    assert "mag/arcsec" in ax.get_ylabel()


def test_flat_figure_marks_flagged_columns() -> None:
    columns = scene.products()["columns"]
    fig = column_flat_figure(columns)
    _, flagged = fig.axes[0].get_lines()
    np.testing.assert_array_equal(flagged.get_xdata(), [10, 40])
    assert np.isfinite(flagged.get_ydata()).all()  # a NaN flat is still marked
    assert "(pix)" in fig.axes[0].get_xlabel()


def test_sources_figure_counts_every_source() -> None:
    products = scene.products()
    fig = sources_along_night_figure(products["catalog"], NightClock(products["block_index"]), 0.1)
    top, bottom = fig.axes
    (step,) = top.get_lines()
    centres = step.get_xdata()
    width_minutes = (centres[1] - centres[0]) * 60.0
    assert np.sum(step.get_ydata()) * width_minutes == pytest.approx(300)  # all 300 sources
    (medians,) = bottom.get_lines()
    assert np.isfinite(medians.get_ydata()).any()
    # One source: one bin of the nominal width, not a zero-width bin.
    one = sources_along_night_figure(
        products["catalog"][:1], NightClock(products["block_index"]), 1
    )
    assert one.axes[0].get_lines()[0].get_ydata()[0] == pytest.approx(1.0)


def test_quicklook_subtracts_column_sky_and_cuts_long_strips() -> None:
    strip = np.arange(20.0)[None, :] + np.zeros((10, 20))
    strip[3, 4] = 100.0
    fig = quicklook_figure(strip, factor=3, max_aspect=1.0)
    assert len(fig.axes) == 2  # 20 wide, 10 high, at most 1:1 per panel
    first = fig.axes[0].get_images()[0]
    image = np.asarray(first.get_array())
    assert image[3, 4] == 100.0 - 4.0 and image[0, 0] == 0.0
    assert first.get_extent() == [0, 30, 0, 30]  # in unbinned night pixels
    assert "binned" in fig.axes[-1].get_xlabel()


def test_every_registered_figure_draws_from_synthetic_products() -> None:
    drawn = draw_figures(scene.products(), ReportOptions())
    assert [d.spec.name for d in drawn] == [s.name for s in FIGURES]
    for item in drawn:
        assert item.png is not None and item.png.startswith(b"\x89PNG"), item.note
        assert "\n" not in item.spec.caption and item.spec.caption.endswith(".")
    for spec in FIGURES:
        _labels_have_text(spec.draw(scene.products(), ReportOptions()))


def test_residual_map_puts_each_cell_at_its_chip_columns_and_time() -> None:
    grid = scene.solved_products()["residual_grid"]
    fig = residual_map_figure(grid, 64, (1.0, 2.0))
    along, across = (ax.get_images()[0] for ax in fig.axes if ax.get_images())
    cells = np.ma.filled(np.asarray(along.get_array(), dtype=float), np.nan)
    assert cells.shape == (4, 8)  # 4 cells across the chip (rows), 8 along the night
    row = grid[(grid["across"] == 2) & (grid["along"] == 5)][0]
    expected = row["mean_along"] if row["n"] > 0 else np.nan
    np.testing.assert_array_equal(cells[2, 5], expected)
    empty = np.asarray(grid["n"]) == 0
    assert np.isnan(
        cells[np.asarray(grid["across"])[empty], np.asarray(grid["along"])[empty]]
    ).all()
    assert along.get_extent() == [1.0, 2.0, -0.5, 63.5]  # UTC hours x chip columns
    assert all("(mas)" in ax.get_ylabel() for ax in fig.axes if not ax.get_images())
    assert "(pix)" in fig.axes[0].get_ylabel() and "UTC" in across.axes.get_xlabel()


def test_residuals_along_the_night_pool_the_cells_by_star_count() -> None:
    grid = scene.solved_products()["residual_grid"]
    fig = residuals_along_night_figure(grid, (0.0, 8.0))
    mean_along = fig.axes[0].get_lines()[0].get_ydata()
    column = grid[grid["along"] == 3]
    n = np.asarray(column["n"], float)
    expected = np.sum(n * np.asarray(column["mean_along"])) / n.sum()
    assert mean_along[3] == pytest.approx(expected, rel=1e-12)  # float64 rounding only
    np.testing.assert_allclose(fig.axes[0].get_lines()[0].get_xdata(), np.arange(8) + 0.5)
    assert "(mas)" in fig.axes[0].get_ylabel() and "(mas)" in fig.axes[1].get_ylabel()


def test_line_time_error_correction_and_smear() -> None:
    # A clock 0.2 % slow: the charge drifts 0.002 pixel per row from its star,
    # 8.2 pixels over 4096 TDI rows (common practice for TDI).
    check = line_time_check({"line_time_s": 0.0501, "matched_line_time_s": 0.05}, 4096)
    assert check["error_s"] == pytest.approx(1e-4, rel=1e-9)  # float64 rounding only
    assert check["correction_s"] == pytest.approx(-1e-4, rel=1e-9)
    assert check["smear_px"] == pytest.approx(0.002 * 4096, rel=1e-9)
    fig = focal_length_figure(scene.solved_products()["astrometry_parameters"], scene.TDI_ROWS)
    left, right = fig.axes
    assert "(mm)" in left.get_ylabel() and "(ms)" in right.get_ylabel()
    assert "+120 um" in left.get_title() and "correction" in right.get_title()


def test_zero_point_figure_shades_flagged_stretches_at_their_times() -> None:
    products = scene.solved_products()
    clock = NightClock(scene.block_index())
    fig = zero_point_figure(products["zero_point"], products["zp_intervals"], clock)
    ax = fig.axes[0]
    line = next(line for line in ax.get_lines() if line.get_label().startswith("zero point"))
    # t = (x - tdi_rows / 2) * line_time (the zeropoint stage's time of column x).
    first_column = 0.0 / scene.LINE_TIME + scene.TDI_ROWS / 2
    assert line.get_xdata()[0] == pytest.approx(clock.hours(first_column)[()], abs=1e-12)
    spans = [p for p in ax.patches if p.get_label() in ("interpolated stretch", "flagged stretch")]
    assert len(spans) == 1  # the one flagged stretch, s0001
    x0 = spans[0].get_x()
    assert x0 == pytest.approx(clock.hours(6.5 / scene.LINE_TIME + scene.TDI_ROWS / 2)[()])
    assert "mag" in ax.get_ylabel() and "UTC" in ax.get_xlabel()
    assert not ax.yaxis_inverted()  # a larger zero point (clearer sky) up


def test_zero_point_columns_invert_the_one_column_time_map() -> None:
    meta = {"line_time_s": scene.LINE_TIME, "tdi_rows": scene.TDI_ROWS}
    x = np.array([0.0, 20.0, 137.5, 4000.0])
    t = column_times(x, scene.LINE_TIME, scene.TDI_ROWS)
    np.testing.assert_allclose(zero_point_columns(t, meta), x, rtol=0, atol=1e-9)  # rounding


def test_star_flat_marks_deviant_bins_in_mmag() -> None:
    fig = star_flat_figure(scene.solved_products()["star_flat"])
    ax = fig.axes[0]
    deviant = next(line for line in ax.get_lines() if line.get_label() == "deviant bin")
    np.testing.assert_allclose(deviant.get_xdata(), [55.5])  # bin 48-63, centre 55.5
    np.testing.assert_allclose(deviant.get_ydata(), [30.0])  # 0.03 mag
    assert "(mmag)" in ax.get_ylabel() and "(pix)" in ax.get_xlabel()


def test_sky_uses_the_solved_zero_point_once_there_is_one() -> None:
    products = scene.products()
    spec = next(spec for spec in FIGURES if spec.name == "sky")
    ax = spec.draw(products, ReportOptions()).axes[0]
    (line,) = ax.get_lines()
    sky = products["sky"]
    zp = products["zero_point"]
    t = (np.asarray(sky["x"]) - scene.TDI_ROWS / 2) * scene.LINE_TIME
    z = np.interp(t, zp["t"], zp["zero_point"])
    # astropy's logarithmic units implement Pogson's scale: m = -2.5 log10(flux).
    rate = np.asarray(sky["sky_rate"]) / 0.25 * u.electron / u.s / u.arcsec**2
    np.testing.assert_allclose(line.get_ydata(), z + u.Magnitude(rate).value, atol=1e-12)
    assert "NOMINAL" not in ax.get_title() and "solved" in ax.get_title()


def test_a_line_time_error_within_its_uncertainty_asks_for_no_correction() -> None:
    """The line-time error is clocked minus matched, and the matched line time
    follows the fitted focal length, so its uncertainty is at least the focal
    scale's. A simulated 256-column night (its clock matched to the drift) fitted
    focal_scale = +0.00126 +- 0.00145, and the page said "+61.008 us (+1259.6
    ppm), smear 2.58 pix; correction: add -61.008 us to the line time": advice
    from noise. Within 3 sigma of zero (common practice) it now says so."""
    meta = {
        "line_time_s": 0.0501,
        "matched_line_time_s": 0.05,
        "line_time_scale_err": 3e-7,
        "focal_scale_err": 1e-3,
    }
    check = line_time_check(meta, 4096)
    # quadrature of the two scales' errors, as the docstring derives
    assert check["relative_err"] == pytest.approx(math.hypot(3e-7, 1e-3), rel=1e-12)
    assert not check["significant"]  # 0.002 is 2 sigma
    rows = dict(solved_rows(scene.products() | {"astrometry_parameters": _with_meta(meta)}))
    text = rows["line-time error"]
    assert text.startswith("+100.000 +- 50.000 us (+2000.0 +- 1000.0 ppm)")
    assert "within 3 sigma" in text and "correction: add" not in text
    meta["focal_scale_err"] = 5e-4  # 0.002 is now 4 sigma: a real error, corrected
    check = line_time_check(meta, 4096)
    assert check["significant"]
    rows = dict(solved_rows(scene.products() | {"astrometry_parameters": _with_meta(meta)}))
    assert "correction: add -100.000 us to the line time" in rows["line-time error"]


def test_a_configured_focal_length_is_not_called_the_spin_period_s() -> None:
    """With camera.focal_length (no spin period) the nominal focal length is the
    configured one: the page said "6.00000 m from the spin period" on such nights."""
    meta = {"focal_length_given": "focal_length"}
    rows = dict(solved_rows(scene.products() | {"astrometry_parameters": _with_meta(meta)}))
    assert rows["focal length"] == "6.00012 m fitted, 6.00000 m configured (+120 +- 540 um)"
    fig = focal_length_figure(_with_meta(meta), scene.TDI_ROWS)
    assert [t.get_text() for t in fig.axes[0].get_xticklabels()] == [
        "fitted to the stars",
        "configured",
    ]
    meta = {"focal_length_given": "spin_period"}
    rows = dict(solved_rows(scene.products() | {"astrometry_parameters": _with_meta(meta)}))
    assert rows["focal length"].endswith("6.00000 m from the spin period (+120 +- 540 um)")


def test_the_summary_gives_each_segment_s_clock() -> None:
    """A night of two segments: the second's clock offset in ms and in mas of RA
    with their errors, or why it was not fitted; a night of one segment says nothing."""
    first = {
        "segment": 0,
        "rows": [0, 2048],
        "fitted": False,
        "offset_ms": 0.0,
        "offset_err_ms": 0.0,
        "ra_mas": 0.0,
        "ra_err_mas": 0.0,
        "n_stars": 400,
        "note": "the night's clock: clock_offset is this segment's",
    }
    second = first | {
        "segment": 1,
        "rows": [3072, 5120],
        "fitted": True,
        "offset_ms": -30.04,
        "offset_err_ms": 0.21,
        "ra_mas": -319.6,
        "ra_err_mas": 2.2,
        "n_stars": 231,
        "note": "fitted from 231 stars",
    }
    meta = {"segment_clocks": [first, second]}
    rows = dict(solved_rows(scene.products() | {"astrometry_parameters": _with_meta(meta)}))
    text = rows["segment clocks (relative to the night's)"]
    assert text == (
        "segment 0 (rows 0-2047): the night's clock: clock_offset is this segment's; "
        "segment 1 (rows 3072-5119): -30.04 +- 0.21 ms (-319.6 +- 2.2 mas in RA), "
        "fitted from 231 stars"
    )
    few = second | {"fitted": False, "n_stars": 3, "note": "not fitted: 3 matched stars"}
    meta = {"segment_clocks": [first, few]}
    rows = dict(solved_rows(scene.products() | {"astrometry_parameters": _with_meta(meta)}))
    assert rows["segment clocks (relative to the night's)"].endswith(
        "segment 1 (rows 3072-5119): not fitted: 3 matched stars"
    )
    meta = {"segment_clocks": [first]}
    rows = dict(solved_rows(scene.products() | {"astrometry_parameters": _with_meta(meta)}))
    assert not any(label.startswith("segment clocks") for label in rows)


def test_the_summary_says_what_astrometry_made_of_a_cloud() -> None:
    """The cloud's depth and significance, and which centroids the fit kept
    (with the common error each left the reference stars), in words."""
    floors = {"light_weighted": 0.0553, "time_means": 0.0213}
    cases = [
        (
            {
                "light_weighted": True,
                "light_weighting_floor_px": floors | {"light_weighted": 0.0187},
            },
            "deepest loss 26 % (173.1 sigma): centroids weighted by the light (reference stars' "
            "common error 0.0187 px, against 0.0213 for time means)",
        ),
        (
            {"light_weighted": False, "light_weighting_floor_px": floors},
            "deepest loss 26 % (173.1 sigma): time means kept: the reference stars followed "
            "them better (common error 0.0213 px, against 0.0553 weighted by the light)",
        ),
        (
            {"light_weighted": False, "cloud_significance": 0.4},
            "deepest loss 26 % (0.4 sigma): taken for a clear sky (time means)",
        ),
    ]
    for meta, expected in cases:
        meta = {"cloud_depth": 0.261, "cloud_significance": 173.1} | meta
        rows = dict(solved_rows(scene.products() | {"astrometry_parameters": _with_meta(meta)}))
        assert rows["cloud (astrometry)"] == expected
    meta = {"cloud_depth": 0.261, "cloud_significance": 173.1, "light_weighted": False}
    meta["stretch_extra_error_px"] = {"s0004": [0.0197, 0.0]}
    rows = dict(solved_rows(scene.products() | {"astrometry_parameters": _with_meta(meta)}))
    assert rows["cloud (astrometry)"].endswith(
        "; positions' errors widened in s0004 (+0.0197 / +0.0000 px along / across the scan)"
    )
    rows = dict(solved_rows(scene.products()))
    assert "cloud (astrometry)" not in rows  # nothing recorded: nothing said


def _with_meta(meta: dict):
    parameters = scene.solved_products()["astrometry_parameters"].copy()
    parameters.meta.update(meta)
    return parameters


def test_summary_states_the_solved_numbers() -> None:
    rows = dict(solved_rows(scene.products()))
    assert rows["matched reference stars"] == "321"
    assert "focal_scale = 2e-05 +- 9e-05;" in rows["solved parameters"]
    assert "rotation = 3.5 +- 0.8 arcsec" in rows["solved parameters"]
    # focal_scale 2e-05 +- 9e-05 of 6 m: +120 +- 540 um
    assert rows["focal length"] == (
        "6.00012 m fitted, 6.00000 m from the spin period (+120 +- 540 um)"
    )
    assert rows["line-time error"].startswith("+5.000 us (+100.0 ppm), smear 0.00 pix")
    assert rows["zero point"] == "clear level 27.800 mag (1 e-/s), 1 of 2 stretches flagged"


# -------------------------------------------------------------------- page


def test_missing_products_skip_their_figures_with_a_note() -> None:
    products = scene.products()
    del products["seeing"]
    products["sky"] = None
    drawn = {
        d.spec.name: d
        for d in draw_figures(products, ReportOptions(), sources={"seeing": "catalog"})
    }
    for name in ("seeing_night", "seeing_chip"):
        assert drawn[name].png is None and not drawn[name].failed
        assert "no seeing (from stage catalog)" in drawn[name].note
    assert drawn["sky"].png is None and "no sky" in drawn["sky"].note
    assert drawn["flat"].png is not None
    page = render_page(night="n", about=[], problems=[], summary=[], figures=list(drawn.values()))
    assert page.count("<img ") == len(FIGURES) - 3
    assert page.count("Not drawn: this night has no") == 3


def test_a_failing_figure_is_a_note_and_a_problem_not_a_crash(tmp_path: Path) -> None:
    def broken(products, options):
        raise RuntimeError("no good <b>")

    spec = FigureSpec("broken", "Broken", ("columns",), broken, "Never drawn.")
    (item,) = draw_figures(scene.products(), ReportOptions(), specs=[spec])
    assert item.failed and item.png is None and "RuntimeError: no good <b>" in item.note


def test_values_from_config_headers_and_run_are_escaped(tmp_path: Path) -> None:
    config = scene.config(tmp_path, name=SCRIPT)
    night = NightProducts(products=scene.products(), header={"FILTER": "<i>r</i>"})
    page = scene.page(night, config)
    assert "<script" not in page  # the page has no script of its own
    assert "&lt;script&gt;alert(&#x27;x&#x27;)&lt;/script&gt;" in page
    assert "&lt;i&gt;r&lt;/i&gt;" in page and "<i>" not in page
    page = render_page(
        night=SCRIPT, about=[], problems=["a <b>bold</b> & bad file"], summary=[], figures=[]
    )
    assert "<script" not in page and "<b>" not in page
    assert "a &lt;b&gt;bold&lt;/b&gt; &amp; bad file" in page


def test_page_loads_nothing_from_anywhere(tmp_path: Path) -> None:
    page = scene.page(NightProducts(products=scene.products()), scene.config(tmp_path))
    assert "http://" not in page and "https://" not in page and 'src="//' not in page
    assert page.count('src="data:image/png;base64,') == len(FIGURES)
    assert "Content-Security-Policy" in page and "default-src 'none'" in page


def test_summary_and_problems_in_words() -> None:
    rows = dict(summary_rows(scene.products()))
    assert rows["blocks"] == "2" and rows["gaps"] == "1"
    assert rows["hours of usable data"] == f"{200 * scene.LINE_TIME / 3600:.2f} h (10 s)"
    assert rows["sources"].startswith("300 (")
    assert rows["median seeing FWHM"].endswith("arcsec")
    status = {
        "n_stretches": 2,
        "stages": [
            {
                "name": "scale",
                "units": {"s0000": ["done", ""], "s0001": ["failed", "ValueError: boom"]},
                "problems": {"s0000": ["file x.fits rejected: truncated"]},
            },
            {"name": "total", "units": {"night": ["missing", ""]}, "problems": {}},
        ],
    }
    assert problem_lines(status) == [
        "Stage scale failed for s0001: ValueError: boom.",
        "Stage scale (s0000) reported: file x.fits rejected: truncated",
        "Stage total has not run for night.",
    ]
    rows = dict(summary_rows({}, status))
    # The page's problem lines name the unit not run too: the summary counts it
    # (it said "0 reported problems" under "5 problems in this run").
    assert rows["problems and failures"] == (
        "1 failed unit, 0 damaged units, 1 unit not run, 1 reported problem"
    )
    assert rows["sources"].startswith("not available")
    for label in ("matched reference stars", "solved parameters", "zero point"):
        assert rows[label].startswith("not available"), label


# ----------------------------------------------------------------- command


@pytest.fixture
def toy_file(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    """A toy night on disk and its config file; the CLI sees the toy graph and the report."""
    graph = (*_toy_graph.GRAPH, REPORT_STAGE)
    monkeypatch.setattr(pipeline.stages, "GRAPH", graph, raising=False)
    _toy_graph.write_raw_night(tmp_path / "raw")
    data = _toy_graph.toy_config_data(tmp_path)
    data["night"].update(raw_dir="raw", output_dir="out")
    path = tmp_path / "night.yaml"
    path.write_text(yaml.safe_dump(data))
    return path


def test_report_command_puts_failures_first_and_skips_absent_figures(
    toy_file: Path, capsys
) -> None:
    assert main(["run", str(toy_file), "--set", "stages.scale.fail_on=[1]"]) == 1
    out = toy_file.parent / "out" / "toy" / "report" / "night" / "page.html"
    # The run ends with the report, whatever failed before it, and says where it is.
    assert capsys.readouterr().out.strip().endswith(f"report: {out}")
    assert main(["report", str(toy_file), "--set", f"site.name={SCRIPT}"]) == 0
    assert capsys.readouterr().out.strip() == f"report: {out}"
    page = out.read_text(encoding="utf-8")
    problems = page.index('class="problems"')
    assert problems < page.index('id="summary"')
    assert "Stage scale failed for s0001: ValueError: toy failure on stretch 1." in page
    assert page.count("Not drawn: this night has no") == len(FIGURES)  # toy graph: no products
    assert "<script" not in page and "&lt;script&gt;" in page
    other = toy_file.parent / "elsewhere" / "page.html"
    assert main(["report", str(toy_file), "--output", str(other)]) == 0
    assert other.read_text(encoding="utf-8").startswith("<!DOCTYPE html>")


def test_the_report_section_is_checked_like_any_other() -> None:
    template = Path(__file__).parent.parent / "configs" / "template.yaml"
    config = load_config(template, ["stages.report.nominal_zero_point=24.5"])
    assert config.stage_options("report") == ReportOptions(nominal_zero_point=24.5)
    with pytest.raises(ConfigError, match="nominal_zeropoint"):
        load_config(template, ["stages.report.nominal_zeropoint=24.5"])


def test_the_sources_are_the_last_measurement_of_the_night() -> None:
    """When astrometry measured the stretches again with the solved smear
    kernels (passes > 1), the page counts its catalogue, the one the zero point
    and the science products use, not detect's first one: on a night whose
    camera was turned 0.3 deg unknown to its config the page said "4727
    sources (4269 flagged)" from the first measurement with the wrong kernels,
    where the night's catalogue held 2082."""
    from astropy.table import QTable

    from pipeline.report import collect_products

    first = QTable({"x": [1.0, 2.0, 3.0, 4.0], "flags": [1, 1, 1, 0]})
    again = QTable({"x": [1.0, 3.0], "flags": [0, 0], "ref_index": [0, -1]})
    again.meta["astrometry_passes"] = 3
    inputs = {"catalog": {"catalog": first}, "astrometry": {"catalog": again}}
    night = collect_products(inputs, ReportOptions())
    assert night.products["catalog"] is again
    rows = dict(summary_rows(night.products))
    assert rows["sources"] == "2 (0 flagged, as astrometry's pass 3 measured them)"
    again.meta["astrometry_passes"] = 1  # the same measurement: detect's catalogue stays
    night = collect_products(inputs, ReportOptions())
    assert night.products["catalog"] is first
    assert dict(summary_rows(night.products))["sources"] == "4 (3 flagged)"
