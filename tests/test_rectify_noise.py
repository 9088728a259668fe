"""The rectified noise's zero-frequency power against its full covariance."""

from __future__ import annotations

import numpy as np
import pytest

from pipeline.stages.rectify._noise import RectifiedNoise


def _noise(n_y=300, n_blocks=3, n_row_blocks=4, scale=0.6, seed=0) -> RectifiedNoise:
    """Rectified rows finer than the camera's (``scale`` strip pixels per row),
    columns drifting by a few pixels along the rows and blocks of both passes
    whose phases differ: the covariance reaches several row lags and the
    column offsets between rows change."""
    rng = np.random.default_rng(seed)
    y = np.arange(n_y, dtype=float)
    shifts = np.array(
        [0.013 * y + 2.7 * np.sin(y / 70.0 + b) + rng.uniform(0, 1) for b in range(n_blocks)]
    )
    jac_x = 1.0 + 0.02 * np.cos(y / 50.0)[None, :] * np.ones((n_blocks, 1))
    positions = np.array([scale * y + 0.3 * k + 0.001 * y**1.5 for k in range(n_row_blocks)])
    jac_y = np.abs(np.gradient(positions, axis=1))
    return RectifiedNoise(
        breaks=np.linspace(0, 60, n_blocks + 1).astype(int),
        x_centres=np.linspace(10, 250, n_blocks),  # strip rows in every pass-1 block
        shifts=shifts,
        jac_x=jac_x,
        row_starts=np.linspace(-5.0, 200.0, n_row_blocks),
        positions=positions,
        jac_y=jac_y,
    )


@pytest.mark.parametrize("chunk", [1024, 37])
def test_power_is_the_covariance_summed_over_its_lags(chunk):
    # Self-consistency: power() takes the column-lag sum in closed form; the
    # full covariance summed over both lags must give the same to round-off.
    noise = _noise()
    lags = noise.lags()
    assert lags[0] >= 2 and lags[1] > 3  # several row lags, drifting columns
    covariance = noise.covariance(0, noise.n_y, lags)
    zero_frequency, variance = noise.power(chunk=chunk)
    np.testing.assert_allclose(zero_frequency, covariance.sum(axis=(2, 3)), rtol=1e-12, atol=1e-14)
    np.testing.assert_allclose(variance, covariance[:, :, lags[0], lags[1]], rtol=1e-12)
    # Keys weights correlate neighbours positively: more power than variance.
    assert np.all(zero_frequency > variance)
