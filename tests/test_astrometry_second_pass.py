"""Astrometry's second pass: the solved geometry's smear kernels and the decision to use them.

Checks against the first-order smear of a line time that does not match the
drift (DESIGN.md section 4: ``N x (rate error)`` rows along the scan, an
analytic result of the track geometry), and self-consistency: the nominal
geometry gives rectify's own kernels back.
"""

from __future__ import annotations

import dataclasses
from types import SimpleNamespace

import numpy as np
import pytest
from _rectify_scene import night_model, small_camera

from pipeline.geometry.rectified import RectifiedFrame
from pipeline.geometry.tdi import TDIModel
from pipeline.stages.astrometry import AstrometryStageOptions
from pipeline.stages.astrometry._second_pass import (
    BRIGHT_SNR,
    centroid_noise,
    kernel_change,
    solved_kernels,
    solved_kernels_of_stretches,
)
from pipeline.stages.rectify._map import StripMap, smear_kernels

N_ROWS = 3000
TDI_ROWS = 1024
LATITUDES = [41.65, -30.0]


def _recorded(latitude: float):
    """rectify's kernel record of a stretch (columns 1500 and 1600, every 16 px across)."""
    model = night_model(latitude, N_ROWS, small_camera(tdi_rows=TDI_ROWS))
    frame = RectifiedFrame.for_night(model, N_ROWS)
    x = np.repeat([1500.0, 1600.0], 17)
    y = np.tile(np.linspace(0.0, frame.n_y - 1.0, 17), 2)
    strip_map = StripMap(model, frame, 1400.0, 1700.0)
    return model, frame, smear_kernels(model, frame, strip_map, x, y)


def _solution(model: TDIModel, frame: RectifiedFrame, focal_scale: float):
    """What solved_kernels reads of a solution: a geometry whose focal length is off.

    The line time stays the configured one (the camera's real clocking), so
    the drift in pixels per line changes by ``focal_scale``.
    """
    camera = dataclasses.replace(
        model.camera, focal_length=model.focal_length * (1.0 + focal_scale)
    )
    solved = TDIModel(model.site, camera, model.start, model.duration, line_time=model.line_time)
    # stars recorded at (x, y): the frame's sky, good to the solved scale's
    # ~1 % of the distance from the centre (the kernels change by 1e-3 px per px)
    return SimpleNamespace(solved_model=solved, sky_from_rectified=frame.icrs_from_pixel)


@pytest.mark.parametrize("latitude", LATITUDES)
def test_the_nominal_geometry_gives_rectifys_kernels_back(latitude):
    model, frame, recorded = _recorded(latitude)
    again = solved_kernels(recorded, _solution(model, frame, 0.0), model, frame)
    # 1e-6 px: the same tracks through maps of other node ranges (the map's
    # interpolation of a smooth Jacobian; measured ~1e-9)
    assert kernel_change(recorded, again) < 1e-6


@pytest.mark.parametrize("latitude", LATITUDES)
def test_a_focal_length_1_percent_off_lengthens_the_kernels_by_n_rows_times_1_percent(latitude):
    model, frame, recorded = _recorded(latitude)
    focal_scale = 0.01
    solved = solved_kernels(recorded, _solution(model, frame, focal_scale), model, frame)
    # DESIGN.md section 4 (first order): a line time off the drift by e smears
    # each star by N e rows along the scan; a longer focal length makes the
    # image drift faster by e, so the kernels grow by about N e rows (10.24
    # here) where the configured line time matched the drift (the chip
    # centre).  Exactly for a uniform drift: the crossing then lasts N / (1 + e)
    # lines, and the kernel's samples (mid-points of n equal time bins) span
    # (n - 1) / n of the streak.
    centre = np.abs(np.asarray(recorded["y"]) - (frame.n_y - 1) / 2.0) < 1.0
    d_length = np.asarray(solved["length"] - recorded["length"])[centre]
    n_samples = recorded.meta["n_samples"]
    rows = TDI_ROWS * focal_scale / (1.0 + focal_scale) * (n_samples - 1) / n_samples
    expected = rows * np.abs(np.asarray(recorded["row_step"]))[centre]
    assert TDI_ROWS * focal_scale * 0.97 < expected.min()  # the first-order figure, to 3 %
    # 0.5 %: the drift's change across the kernel's few px of declination and
    # the curvature of the track (second order, ~1e-3 of the length)
    np.testing.assert_allclose(d_length, expected, rtol=0.005)
    # The largest sample displacement is half the length change (the ends of
    # a uniform streak about its mean), plus the bow's change, which is small.
    change = kernel_change(recorded, solved)
    assert 0.5 * d_length.max() * 0.98 <= change <= 0.5 * d_length.max() * 1.2


def test_kernel_change_needs_the_same_positions():
    _, _, recorded = _recorded(41.65)
    with pytest.raises(ValueError, match="same positions"):
        kernel_change(recorded, recorded[:3])
    assert kernel_change(recorded[:0], recorded[:0]) == 0.0


def test_centroid_noise_is_the_bright_matched_stars_median():
    n = 200
    err = np.linspace(0.01, 0.2, n)
    snr = np.linspace(500.0, 5.0, n)  # brighter stars measured better
    matched = np.ones(n, bool)
    matched[:5] = False  # the five best are not matched: left out
    bright = matched & (snr >= BRIGHT_SNR)
    assert centroid_noise(err, err, snr, matched) == pytest.approx(np.median(err[bright]))
    # no S/N: the best-measured tenth of the matched stars
    expected = np.median(np.sort(err[matched])[: matched.sum() // 10])
    assert centroid_noise(err, err, None, matched) == pytest.approx(expected)
    assert np.isnan(centroid_noise(err, err, snr, np.zeros(n, bool)))


def test_second_pass_options():
    options = AstrometryStageOptions()
    assert options.max_passes == 3 and options.second_pass_noise == 1.0
    with pytest.raises(ValueError, match="max_passes"):
        AstrometryStageOptions(max_passes=0)


@pytest.mark.parametrize("cpus", [1, 2])
def test_the_stretches_kernels_together_are_each_stretch_s_own(cpus, monkeypatch):
    """solved_kernels_of_stretches (one pass for the sky, the map's shared node
    columns computed once, on two CPUs the second half of the stretches in a
    thread) gives every stretch the kernels it gets alone, in order."""
    from pipeline import _threads

    monkeypatch.setattr(_threads, "n_cpus", lambda: cpus)
    model = night_model(LATITUDES[0], N_ROWS, small_camera(tdi_rows=TDI_ROWS))
    frame = RectifiedFrame.for_night(model, N_ROWS)
    records = []
    for columns in ([1200.0, 1300.0], [1400.0, 1500.0, 1650.0], [1700.0]):  # adjacent stretches
        x = np.repeat(columns, 9)
        y = np.tile(np.linspace(0.0, frame.n_y - 1.0, 9), len(columns))
        strip_map = StripMap(model, frame, min(columns) - 100.0, max(columns) + 100.0)
        records.append(smear_kernels(model, frame, strip_map, x, y))
    solution = _solution(model, frame, 0.005)
    solution.sky_from_rectified_groups = lambda groups: [frame.icrs_from_pixel(*g) for g in groups]
    together = solved_kernels_of_stretches(records, solution, model, frame)
    for record, kernels in zip(records, together, strict=True):
        alone = solved_kernels(record, solution, model, frame)
        for name in alone.colnames:  # the same computation: to the bit
            np.testing.assert_array_equal(kernels[name], alone[name])
