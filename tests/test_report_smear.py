"""Smear diagnostics of the report (pipeline.report._smear) on rendered stars."""

from __future__ import annotations

import numpy as np
import pytest
from astropy.table import Table

from pipeline.report._smear import measure_smear_widths, smear_figure, window_widths
from pipeline.stages.detect._model import SeeingProfile, model_image

FWHM = 3.0  # px: seeing of the synthetic stretch
SMEAR = 6.0  # px: the geometry's along-scan smear length (a straight track)
SHAPE = (120, 400)  # rectified rows (across the scan) x columns (along it)
X_START = 1000  # night column of the stretch's first column


def _track(length: float, k: int = 64) -> tuple[np.ndarray, np.ndarray]:
    """Uniform samples of a straight along-scan track of ``length`` px, zero mean."""
    dx = (np.arange(k) + 0.5) / k * length - 0.5 * length
    return dx, np.zeros(k)


def _kernels(length: float) -> Table:
    dx, dy = _track(length)
    xs, ys = [X_START, X_START + SHAPE[1]], [0.0, float(SHAPE[0])]
    cells = [(x, y) for x in xs for y in ys]
    return Table(
        {
            "x": [float(x) for x, _ in cells],
            "y": [y for _, y in cells],
            "dx": np.tile(dx, (len(cells), 1)),
            "dy": np.tile(dy, (len(cells), 1)),
        }
    )


def _stretch(length: float, beta: float = 3.5) -> tuple[np.ndarray, Table]:
    """Noise-free stars on a flat sky, each smeared along the scan by ``length`` px.

    The seeing: Moffat of index ``beta``.
    """
    rng = np.random.default_rng(3)
    image = np.full(SHAPE, 50.0)
    xs = np.linspace(40, SHAPE[1] - 40, 8) + rng.uniform(-0.5, 0.5, 8)
    ys = np.array([35.0, 85.0] * 4) + rng.uniform(-0.5, 0.5, 8)
    dx, dy = _track(length)
    profile = SeeingProfile(FWHM, "moffat", beta)
    for x, y in zip(xs, ys, strict=True):
        image += model_image(SHAPE, x, y, dx, dy, profile, flux=1e5)
    catalog = Table({"x": xs + X_START, "y": ys, "snr": np.full(8, 200.0), "flags": np.zeros(8)})
    return image, catalog


def _seeing() -> Table:
    seeing = Table(
        {
            "y_lo": [0, 0, 60],
            "y_hi": [SHAPE[0], 60, SHAPE[0]],
            "fwhm": [FWHM, FWHM, FWHM],
            "x_start": [X_START] * 3,
            "x_stop": [X_START + SHAPE[1]] * 3,
        }
    )
    seeing.meta.update(seeing_shape="moffat", moffat_beta=3.5)
    return seeing


def test_window_widths_of_a_pixelated_gaussian():
    # A round Gaussian of sigma s integrated over unit pixels has second moment
    # s^2 + 1/12 per axis (Sheppard's correction; common practice).  The window
    # (8 sigma) truncates under 1e-6 of the light: 1e-4 px covers the sum.
    sigma, x0, y0 = 1.7, 20.3, 19.6
    fwhm = sigma * 2.0 * np.sqrt(2.0 * np.log(2.0))
    stamp = model_image((41, 41), x0, y0, [0.0], [0.0], SeeingProfile(fwhm, "gaussian"))
    along, across = window_widths(stamp, x0, y0, 8 * sigma)
    expected = np.sqrt(sigma**2 + 1 / 12)
    assert along == pytest.approx(expected, abs=1e-4)
    assert across == pytest.approx(expected, abs=1e-4)


def test_measured_widths_equal_the_geometry_when_it_is_right():
    image, catalog = _stretch(SMEAR)
    widths = measure_smear_widths(
        image, np.ones(SHAPE, bool), catalog, _seeing(), _kernels(SMEAR), x_start=X_START
    )
    assert len(widths) == 8
    # Noise-free stars rendered by the same model: measured = predicted up to
    # the Moffat wings in the background ring, taken for sky (measured 2e-5 px).
    np.testing.assert_allclose(widths["along"], widths["model_along"], atol=1e-3)
    np.testing.assert_allclose(widths["across"], widths["model_across"], atol=1e-3)
    # The smear widens along the scan only: a 6 px track (a top-hat) adds
    # 6^2/12 = 3 px^2 of variance; the window cuts the Moffat wings' share of
    # it (measured 4e-4 relative).
    excess = np.asarray(widths["model_along"]) ** 2 - np.asarray(widths["model_across"]) ** 2
    np.testing.assert_allclose(excess, SMEAR**2 / 12, rtol=0.003)


def test_the_prediction_takes_the_seeing_index_detect_fitted():
    # Stars of Moffat index 2.5, against detect's seeing table of that index
    # (its ``beta`` column, detect 17 on) while the configured one (meta) is
    # 3.5: the predicted widths are the measured ones, as in the test above.
    # With the configured index instead the heavier wings go unpredicted:
    # measured widths 0.41 px above the predicted ones (measured), across
    # the scan as along it.
    image, catalog = _stretch(SMEAR, beta=2.5)
    seeing = _seeing()
    seeing["beta"] = 2.5
    widths = measure_smear_widths(
        image, np.ones(SHAPE, bool), catalog, seeing, _kernels(SMEAR), x_start=X_START
    )
    np.testing.assert_allclose(widths["along"], widths["model_along"], atol=1e-3)
    np.testing.assert_allclose(widths["across"], widths["model_across"], atol=1e-3)
    seeing.remove_column("beta")  # a table of detect before 16: the configured index
    configured = measure_smear_widths(
        image, np.ones(SHAPE, bool), catalog, seeing, _kernels(SMEAR), x_start=X_START
    )
    excess = np.asarray(configured["across"]) - np.asarray(configured["model_across"])
    assert np.all(excess > 0.2)


def test_smear_the_geometry_misses_shows_along_the_scan():
    # The stars drifted 9 px but the geometry says 6 (a line time off by 1 part
    # in ~700 over 2048 rows): the measured along-scan width exceeds the
    # prediction by about sqrt((9^2 - 6^2) / 12) in quadrature, not across.
    image, catalog = _stretch(9.0)
    widths = measure_smear_widths(
        image, np.ones(SHAPE, bool), catalog, _seeing(), _kernels(SMEAR), x_start=X_START
    )
    gap = np.asarray(widths["along"]) ** 2 - np.asarray(widths["model_along"]) ** 2
    # The window's cut of the wings again (measured 1e-3 relative).
    np.testing.assert_allclose(gap, (9.0**2 - SMEAR**2) / 12, rtol=0.005)
    # Across: the background ring sees the longer track's wings (measured 2e-4 px).
    np.testing.assert_allclose(widths["across"], widths["model_across"], atol=1e-3)
    figure = smear_figure(widths, SHAPE[0], bands=2)
    measured, predicted = figure.axes[0].get_lines()[:2]
    assert np.all(measured.get_ydata() > predicted.get_ydata() + 0.3)


def test_flagged_or_crowded_stars_are_not_used():
    image, catalog = _stretch(SMEAR)
    catalog["flags"][0] = 4
    usable = np.ones(SHAPE, bool)
    x1, y1 = int(catalog["x"][1]) - X_START, int(catalog["y"][1])
    usable[y1, x1 + 2] = False  # a flagged pixel in star 1's window
    catalog.add_row({"x": catalog["x"][2] + 5.0, "y": catalog["y"][2], "snr": 10.0, "flags": 0})
    widths = measure_smear_widths(
        image, usable, catalog, _seeing(), _kernels(SMEAR), x_start=X_START
    )
    used = set(np.round(widths["x"], 6))
    assert len(widths) == 5
    assert not {round(float(catalog["x"][i]), 6) for i in (0, 1, 2)} & used
