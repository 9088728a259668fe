"""The compiled fit of a group of stars against the Python loop it mirrors.

Self-consistency tests on invented stamps: the Python Levenberg-Marquardt of
:func:`pipeline.stages.detect._model.fit_stars` is the reference, and the
compiled kernel must take its steps and stop where it stops.
"""

from __future__ import annotations

import numpy as np
import pytest

from pipeline.stages.detect import SeeingProfile, _model, fit_stars, model_image
from pipeline.stages.detect._model import Response
from tests._detect_scene import smear_track

#: Groups of 2 to 4 overlapping stars (FWHM 4 px; neighbours 1.5 to 2 FWHM
#: apart): the chip row of each star's smear (row 4000: a 15 px track with a
#: bow; 2100: 1 px) and its position on the stamp, flux (e-) and rectify
#: response (None: no resampling, no clocking top-hat).
GROUPS = [
    pytest.param(
        [(4000.0, 30.3, 20.6, 2.0e4, Response(0.31, 0.72, 0.9)),
         (3990.0, 35.1, 26.2, 8.0e3, Response(0.41, 0.67, 0.9))],
        id="pair-long-tracks",
    ),
    pytest.param(
        [(2100.0, 25.2, 18.4, 1.0e4, Response(0.05, 0.93, 1.0)),
         (2104.0, 31.0, 22.1, 3.0e4, None),
         (2098.0, 37.7, 20.9, 5.0e3, Response(0.62, 0.12, 1.0))],
        id="triple-short-tracks",
    ),
    pytest.param(
        [(3000.0, 22.2, 15.3, 1.5e4, Response(0.5, 0.5, 0.9)),
         (3003.0, 28.1, 20.0, 6.0e3, Response(0.5, 0.5, 0.9)),
         (3008.0, 34.9, 25.2, 2.2e4, Response(0.5, 0.5, 0.9)),
         (2995.0, 40.0, 18.7, 9.0e3, Response(0.5, 0.5, 0.9))],
        id="four-in-a-chain",
    ),
]  # fmt: skip


@pytest.mark.parametrize("stars", GROUPS)
def test_compiled_group_fit_takes_the_python_loops_steps(stars, monkeypatch):
    profile = SeeingProfile(4.0)
    shape = (45, 70)
    kernels, responses = [], []
    truth = np.full(shape, 200.0)
    for row, x, y, flux, response in stars:
        dx, dy = smear_track([row], 4096, 64, 16.0, 3.0)
        kernel = _model.reduce_kernel(dx[0], dy[0], 0.5)
        kernels.append(kernel)
        responses.append(response)
        truth += model_image(shape, x, y, *kernel, profile, flux, response=response)
    rng = np.random.default_rng(len(stars))
    data = truth + rng.normal(0.0, np.sqrt(truth))
    data[3, 7] = np.nan  # a pixel without data is left out by both
    origin = (100, 300)
    # Starts 0.5 px off (the fit takes several steps) on the full image's pixels.
    x_start = [x + origin[1] + 0.6 for _, x, _, _, _ in stars]
    y_start = [y + origin[0] - 0.4 for _, _, y, _, _ in stars]

    def fit():
        return fit_stars(
            data, truth, x_start, y_start, kernels, profile, origin=origin, responses=responses
        )

    compiled = fit()
    monkeypatch.setattr(_model, "_fit_one", lambda *args: None)  # the Python loop
    python = fit()
    # Same steps, same stopping point: only the order of the sums differs (BLAS
    # against loops, the normal equations against lstsq in the linear start),
    # rounding of ~1e-13 relative that the overlapping stars' correlations
    # (condition numbers up to ~1e4) carry to < 1e-10 of the errors (measured:
    # parameters equal, errors within 4e-15).  1e-8 of an error is far below
    # anything a catalogue shows; a step that differs (a wrong derivative, a
    # lost cross term) moves the result by ~1e-3 of an error or more.
    for name in ("flux", "x", "y"):
        err = getattr(python, f"{name}_err")
        assert np.all(np.isfinite(err))
        np.testing.assert_array_less(
            np.abs(getattr(compiled, name) - getattr(python, name)), 1e-8 * err
        )
        np.testing.assert_allclose(getattr(compiled, f"{name}_err"), err, rtol=1e-8)
    # The background (~200 e-) has an error of ~0.3 e- (14 e- per pixel over
    # ~3000 pixels): 1e-10 relative is < 1e-7 of it.
    assert compiled.background == pytest.approx(python.background, rel=1e-10)
    assert compiled.chi2 == pytest.approx(python.chi2, rel=1e-10)
    assert compiled.success and python.success
    assert len(compiled.units) == len(stars)
    for unit, reference in zip(compiled.units, python.units, strict=True):
        np.testing.assert_allclose(unit, reference, rtol=0, atol=1e-12)


@pytest.mark.parametrize("loop", ["compiled", "python"])
def test_fit_ends_with_the_models_and_chi2_of_its_result(loop, monkeypatch):
    # The converged fit's last step is taken without evaluating the model
    # there (units and chi-square moved to first order): what it returns must
    # still be the model at the parameters it returns, as rendered afresh.
    profile = SeeingProfile(4.0)
    shape = (45, 70)
    response = Response(0.31, 0.72, 1.0)
    dx, dy = smear_track([4000.0], 4096, 64, 16.0, 3.0)
    kernel = _model.reduce_kernel(dx[0], dy[0], 0.5)
    truth = 200.0 + model_image(shape, 33.3, 21.6, *kernel, profile, 3.0e5, response=response)
    rng = np.random.default_rng(11)
    data = truth + rng.normal(0.0, np.sqrt(truth))
    if loop == "python":
        monkeypatch.setattr(_model, "_fit_one", lambda *args: None)
    fit = fit_stars(data, truth, [34.1], [20.9], [kernel], profile, responses=[response])
    assert fit.success
    unit = model_image(shape, fit.x[0], fit.y[0], *kernel, profile, response=response)
    # The step left out is < 0.1 of a position error (~3e-3 px at S/N ~1000,
    # CONVERGED), so the unit model errs by half its square times the model's
    # curvature (~0.3 of the peak per px^2), < 2e-8 of the peak (measured
    # 1e-8); moved to zeroth order (the unit model of the point before) it
    # errs by up to ~2e-4 of the peak.
    np.testing.assert_allclose(fit.units[0], unit, rtol=0, atol=1e-7 * unit.max())
    model = fit.background + fit.flux[0] * unit
    chi2 = np.sum((data - model) ** 2 / truth) / (data.size - 4)
    # The chi-square moves by the step's predicted change (< 1e-4 of the sum,
    # whose size is ~3000), to first order exactly: 1e-9 relative is ~3e-6 of it.
    assert fit.chi2 == pytest.approx(chi2, rel=1e-9)
