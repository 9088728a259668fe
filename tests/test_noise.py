"""The gain and read noise measured from raw rows, against the header's.

Self-consistency tests on invented rows with Poisson sky and Gaussian read
noise; the method (photon transfer: the variance of a sky signal of S ADU is
S / GAIN + (RDNOISE / GAIN)^2) is Janesick 2007, "Photon Transfer" (from
memory).
"""

from __future__ import annotations

import re

import numpy as np
import pytest

from pipeline.stages.calibrate._noise import gain_problems, measure_gain

GAIN, READ_NOISE, BIAS = 2.0, 5.0, 1000.0


def _raw(n_rows=512, n_columns=256, sky=20000.0, seed=3):
    """Raw ADU of a TDI stretch: a flat-fielded sky with a slow trend, stars, overscan."""
    rng = np.random.default_rng(seed)
    response = 1.0 + 0.03 * rng.standard_normal(n_columns)  # a 3 % 1-D flat
    trend = np.linspace(1.0, 0.9, n_rows)[:, None]  # the sky fades along the scan
    electrons = rng.poisson(sky * trend * response).astype(float)
    electrons[rng.random(electrons.shape) < 0.01] += 5e4  # stars and cosmic rays
    electrons += READ_NOISE * rng.standard_normal(electrons.shape)
    image = np.round(BIAS + electrons / GAIN)
    overscan = np.round(BIAS + READ_NOISE / GAIN * rng.standard_normal((n_rows, 16)))
    return image, overscan


def _measure(image, overscan, gain=GAIN, read_noise=READ_NOISE):
    n = image.shape[0]
    return measure_gain(
        image,
        overscan,
        np.ones(n, bool),
        np.zeros(n, int),
        np.full(n, gain),
        np.full(n, read_noise),
        np.full(n, 65535.0),
    )


def test_the_gain_and_read_noise_are_measured_from_the_raw_rows():
    noise = _measure(*_raw())
    assert noise.gain == pytest.approx(GAIN, rel=0.05)
    assert noise.read_noise == pytest.approx(READ_NOISE, rel=0.1)
    assert noise.overscan_noise == pytest.approx(READ_NOISE / GAIN, rel=0.1)
    assert gain_problems([("s0000", noise)]) == []


def _crowded(n_rows=512, n_columns=256, per_pixel=1.0 / 60.0, seed=5):
    """Raw ADU of a crowded field: a flat-fielded sky with a star every 60 pixels.

    Gaussian stars of FWHM 2.7 px (sigma 1.15 px) whose fluxes follow a
    power law from 300 to 3e5 e- (most of them faint: a slope of 0.33 per
    magnitude, common practice for star counts), placed at random.  Taking
    every pixel the slopes of their profiles between consecutive rows gave
    1.80 e-/ADU for 2.0 here (1.30 on a simulated night of 200,000 stars
    per square degree at 0.52"/px, whose header it then called wrong).
    """
    rng = np.random.default_rng(seed)
    sky = 9000.0
    response = 1.0 + 0.02 * rng.standard_normal(n_columns)
    light = np.full((n_rows, n_columns), sky) * response
    n_stars = int(per_pixel * n_rows * n_columns)
    # magnitudes uniform in 10**(0.33 m): fluxes from 3e5 down to 300 e-
    u = rng.random(n_stars)
    mags = np.log10(1.0 + u * (10 ** (0.33 * 7.5) - 1.0)) / 0.33
    flux = 3e5 * 10 ** (-0.4 * mags)
    rows, cols = np.mgrid[0:n_rows, 0:n_columns]
    ys, xs = rng.uniform(0, n_rows, n_stars), rng.uniform(0, n_columns, n_stars)
    for f, y0, x0 in zip(flux, ys, xs, strict=True):
        y_lo, y_hi = max(int(y0) - 5, 0), min(int(y0) + 6, n_rows)
        x_lo, x_hi = max(int(x0) - 5, 0), min(int(x0) + 6, n_columns)
        r2 = (rows[y_lo:y_hi, x_lo:x_hi] - y0) ** 2 + (cols[y_lo:y_hi, x_lo:x_hi] - x0) ** 2
        light[y_lo:y_hi, x_lo:x_hi] += f * np.exp(-0.5 * r2 / 1.15**2) / (2 * np.pi * 1.15**2)
    electrons = rng.poisson(light).astype(float) + READ_NOISE * rng.standard_normal(light.shape)
    image = np.round(BIAS + electrons / GAIN)
    overscan = np.round(BIAS + READ_NOISE / GAIN * rng.standard_normal((n_rows, 16)))
    return image, overscan


def test_a_crowded_field_gives_the_gain_not_its_stars():
    """The stars' slopes between rows are left out with the pixels on them:
    within 5 % (measured 1.95; the pixels between stars still hold faint
    wings), where taking every pixel gave 1.80."""
    noise = _measure(*_crowded())
    print(f"crowded field: gain {noise.gain:.3f}, read noise {noise.read_noise:.2f}")
    assert noise.gain == pytest.approx(GAIN, rel=0.05)
    assert noise.read_noise == pytest.approx(READ_NOISE, rel=0.1)
    assert gain_problems([("s0000", noise)]) == []


@pytest.mark.parametrize(
    ("header_gain", "header_read_noise"), [(1e5, 5.0), (0.5, 5.0), (2.0, 40.0)]
)
def test_a_header_the_data_contradict_is_one_problem(header_gain, header_read_noise):
    said_gain = re.escape(f"GAIN={header_gain:.4g} e-/ADU, but the sky's photon noise says ")
    said_gain += r"(\S+)"
    """GAIN=1e5 (or 0.5, ADU/e- for e-/ADU) left the noise model so wrong that
    80 % of a night's pixels were flagged as cosmic rays, and nothing said why."""
    image, overscan = _raw()
    noise = _measure(image, overscan, header_gain, header_read_noise)
    lines = gain_problems([("s0000", noise), ("s0001", noise)])
    assert len(lines) == 1
    assert lines[0].startswith("the raw data contradict the header (medians of 2 stretches")
    if header_gain != GAIN:
        said = re.search(said_gain, lines[0])
        assert float(said.group(1).rstrip(".;")) == pytest.approx(GAIN, rel=0.05)
    else:
        assert "RDNOISE=40 e-, but the overscan's noise" in lines[0]


def test_without_sky_only_the_overscan_is_checked():
    image, overscan = _raw(sky=0.0)
    noise = _measure(image, overscan, 2.0, 5.0)
    assert np.isnan(noise.gain)
    assert gain_problems([("s0000", noise)]) == []
    noise = _measure(image, overscan, 2.0, 50.0)
    (line,) = gain_problems([("s0000", noise)])
    assert "RDNOISE/GAIN=25 ADU, but the overscan's noise is 2.5 ADU" in line


def test_the_start_of_scan_ramp_gives_the_same_gain():
    """The first TDIROWS rows after clocking starts collect k / TDIROWS of the
    sky (DEVELOPERS.md, "Start and end of a scan"): here 32 rows of no sky,
    then a ramp to 2000 e- over 96 rows, on 48 columns.  Pooled over chunks
    of rows, the MAD of differences of unlike noise gave 3.9 e-/ADU for 2.0
    (the night looked like a wrong header); per pair of rows it does not."""
    rng = np.random.default_rng(5)
    n_rows, n_columns = 128, 48
    ramp = np.clip((np.arange(n_rows) - 32) / 96, 0, 1)[:, None]
    electrons = rng.poisson(2000 * ramp * np.ones((1, n_columns))).astype(float)
    electrons += READ_NOISE * rng.standard_normal(electrons.shape)
    image = np.round(BIAS + electrons / GAIN)
    overscan = np.round(BIAS + READ_NOISE / GAIN * rng.standard_normal((n_rows, 8)))
    noise = _measure(image, overscan)
    assert noise.gain == pytest.approx(GAIN, rel=0.1)
    assert gain_problems([("s0000", noise)]) == []
