"""The gain and read noise the raw data show, against the header's GAIN and RDNOISE.

A wrong GAIN or RDNOISE (a value in the wrong unit, ADU/e- for e-/ADU, or a
readout mode the header does not follow) scales every flux and variance and
so every mask built on the noise model: with GAIN a factor 5e4 too large,
the noise model predicted a tiny fraction of the scatter and cosmic-ray
detection flagged 80 % of the pixels, and nothing said why.  The raw data
carry both values (the photon-transfer method; Janesick 2007, "Photon
Transfer", SPIE, from memory):

* the serial overscan holds read noise only: its pixel-to-pixel variance,
  in ADU^2, is ``(RDNOISE / GAIN)^2``;
* a column of sky holds the sky's photon noise too: the variance of the
  difference of two consecutive rows of one column, halved, is
  ``S / GAIN + (RDNOISE / GAIN)^2`` with ``S`` the sky above the bias in
  ADU (a TDI column has one response and one sky level for consecutive
  rows, so the flat and the sky's slow trend cancel in the difference).

So ``GAIN = S / (var_sky - var_overscan)`` and ``RDNOISE = GAIN *
sqrt(var_overscan)``.  The variance is taken per pair of rows, across the
columns (cosmic rays and the odd star are outliers of the differences, which
a median absolute deviation ignores), because the sky changes along the
night (twilight, clouds, the start of the scan) and a MAD over pairs of
unlike noise is no mean of their variances; the gain is the photon-transfer
line through the origin, ``sum(S) / sum(var_sky - var_overscan)`` over the
pairs.

In a crowded field stars are no longer the odd outlier: the slopes of their
profiles between two rows widen the whole distribution of differences (at
200,000 stars per square degree, 0.52"/px, the gain came out 1.30 e-/ADU for
2.0).  So each pair of rows uses only the pixels whose mean over the two rows
lies at most one noise sigma above the sky there (:func:`_sky_pixels`): for
two values of one sky, their sum and their difference are independent
(Gaussian noise of equal variance), so the choice made on the mean leaves
the differences' spread as it was, while the pixels on stars drop out; the
sky level ``S`` is the median of those pixels (below the sky's mean by ~0.2
sigma of the pair's mean: < 0.1 % of a night sky of 10,000 ADU, ~1 % at
100 ADU).
"""

from __future__ import annotations

import warnings
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

__all__ = ["NoiseMeasurement", "gain_problems", "measure_gain"]

#: Image columns used at most, evenly spaced (the estimate needs far fewer than
#: a chip's, and its cost stays a small part of the stage's).
MAX_COLUMNS = 128
#: Pairs of consecutive rows of the image used at most, evenly spaced (the
#: overscan's few columns use every pair): each gives the variance across
#: MAX_COLUMNS columns to ~12 %, so 256 give the gain to < 1 %, and the cost
#: stays ~10 ms per stretch however long (~35 ms for the 1152 rows of a
#: 4096-column chip's stretch with every pair).
MAX_PAIRS = 256
#: Ratio of measured to header value beyond which the header is reported wrong.
#: A unit mistake (e-/ADU for ADU/e-, a gain of 2 read as 0.5) is a factor of 4;
#: the estimate is good to a few per cent on a night's sky (self-consistency on
#: the simulator's nights: 1.94 to 2.05 e-/ADU for its 2.0, also within the
#: start-of-scan ramp).
TOLERANCE = 1.5
#: The sky's photon noise must add at least this much to the overscan's
#: variance for the gain to be measured (otherwise read noise dominates).
MIN_SKY_EXCESS = 1.0


@dataclass(frozen=True)
class NoiseMeasurement:
    """What the raw rows of a stretch show (see the module docstring).

    Attributes
    ----------
    gain : float
        e-/ADU from the sky's photon noise; NaN when the sky is too faint
        (or there are too few pairs of rows) to measure it.
    read_noise : float
        e-, the overscan's noise times ``gain``; NaN when ``gain`` is.
    overscan_noise : float
        ADU, the overscan's pixel-to-pixel noise; NaN without overscan.
    header_gain, header_read_noise : float
        Median header GAIN (e-/ADU) and RDNOISE (e-) of the rows used.
    """

    gain: float
    read_noise: float
    overscan_noise: float
    header_gain: float
    header_read_noise: float


def _row_difference_variance(differences: np.ndarray) -> np.ndarray:
    """Half the variance of each row of differences, from its MAD (ADU^2)."""
    from astropy.stats import mad_std

    n_finite = np.isfinite(differences).sum(axis=1)
    variance = mad_std(differences, axis=1, ignore_nan=True) ** 2 / 2.0
    return np.where(n_finite >= 8, variance, np.nan)


#: Pixels of a pair of rows whose mean lies more than this many noise sigmas
#: (the lower half's spread) above the pair's median are left out of the
#: gain's estimate: stars and their slopes (see the module notes).  One sigma
#: keeps ~84 % of the sky's pixels.
SKY_SIGMAS = 1.0


def _sky_pixels(first: np.ndarray, second: np.ndarray) -> np.ndarray:
    """Which pixels of pairs of rows (each row of ``first`` with ``second``'s) are sky.

    The pairs' means, less the sky each shows: the sky level of each pair
    (the median across the columns) times each column's response (the
    median over the pairs of its mean over the pair's level, so that the
    column-to-column spread of a flat field does not set the cut).  Sky are
    the pixels whose residual lies at most :data:`SKY_SIGMAS` above its
    pair's median residual, in units of the residuals' spread below that
    median (the median minus the 15.87th percentile: stars only add light,
    so the lower side is the noise's).  NaN is not sky.
    """
    mean = 0.5 * (first + second)
    # numpy's NaN-aware median and percentile cost ~4x the plain ones: those
    # only where a NaN is (a saturated pixel, a row without data)
    median, percentile = np.median, np.percentile
    if np.isnan(mean).any():
        median, percentile = np.nanmedian, np.nanpercentile
    with warnings.catch_warnings(), np.errstate(invalid="ignore", divide="ignore"):
        warnings.simplefilter("ignore", RuntimeWarning)  # rows or columns of NaN
        level = median(mean, axis=1, keepdims=True)
        level = np.where(level > 0, level, np.nan)
        if not np.isfinite(level).all():
            median, percentile = np.nanmedian, np.nanpercentile
        response = median(mean / level, axis=0, keepdims=True)
        residual = mean - level * response
        centre = median(residual, axis=1, keepdims=True)
        low = percentile(residual, 100.0 * 0.158655, axis=1, keepdims=True)
        return residual <= centre + SKY_SIGMAS * (centre - low)


def _clipped_variance(values: np.ndarray) -> float:
    """Half the variance of overscan differences, clipped at 5 MADs (ADU^2).

    A standard deviation, not the MAD: overscan values are integers a few
    ADU apart, whose MAD is quantised (4.1 e- for the simulator's 5 e-).
    """
    from astropy.stats import mad_std

    values = values[np.isfinite(values)]
    if values.size < 16:
        return np.nan
    centre, spread = np.median(values), max(float(mad_std(values)), 1.0)
    kept = values[np.abs(values - centre) < 5.0 * spread]
    return float(np.var(kept)) / 2.0


def measure_gain(
    image: np.ndarray,
    overscan: np.ndarray,
    use_rows: np.ndarray,
    segment: np.ndarray,
    gain: np.ndarray,
    read_noise: np.ndarray,
    saturation: np.ndarray,
) -> NoiseMeasurement | None:
    """Measure the gain and read noise of a stretch's raw rows.

    Parameters
    ----------
    image, overscan : ndarray, shapes (n_rows, n_columns) and (n_rows, n_overscan)
        Raw ADU (before bias), axis 0 the scan axis.
    use_rows : ndarray of bool, shape (n_rows,)
        Rows with data and their full exposure (no start-of-scan ramp).
    segment : ndarray of int, shape (n_rows,)
        Segment of each row (-1 for no data); pairs of rows are taken within
        a segment only.
    gain, read_noise, saturation : ndarray, shape (n_rows,)
        The header's GAIN (e-/ADU), RDNOISE (e-) and SATURATE (ADU) per row.

    Returns
    -------
    NoiseMeasurement or None
        None when fewer than 16 pairs of consecutive rows are usable.
    """
    use = np.asarray(use_rows, bool)
    pairs = use[:-1] & use[1:] & (segment[:-1] == segment[1:])
    if np.count_nonzero(pairs) < 16:
        return None
    every = np.flatnonzero(pairs)  # the overscan's few columns: every pair
    rows = every[:: -(-len(every) // MAX_PAIRS)]  # the step rounded up: <= MAX_PAIRS pairs
    step = max(1, image.shape[1] // MAX_COLUMNS)
    sky = np.asarray(image[:, ::step], dtype=np.float64)
    sky = np.where(sky < saturation[:, None], sky, np.nan)  # saturated stars: no noise
    var_overscan = np.nan
    bias = np.zeros(image.shape[0])
    if overscan.shape[1]:
        stored = np.asarray(overscan, dtype=np.float64)
        var_overscan = _clipped_variance((stored[every + 1] - stored[every]).ravel())
        bias = np.median(stored, axis=1)
    floor = max(var_overscan, 0.25) if np.isfinite(var_overscan) else 0.25
    with np.errstate(invalid="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # rows of NaN
        # The pixels of sky alone (stars' slopes would widen the differences)
        first, second = sky[rows], sky[rows + 1]
        alone = _sky_pixels(first, second)
        first, second = np.where(alone, first, np.nan), np.where(alone, second, np.nan)
        level = np.nanmedian(first - bias[rows, None], axis=1)  # ADU, per pair
        # The sky changes along the night (twilight, clouds, the start of the
        # scan): one variance per pair of rows, across the columns, since a MAD
        # over pairs of unlike noise is no mean of their variances.
        variance = _row_difference_variance(second - first)
    excess = variance - (var_overscan if np.isfinite(var_overscan) else 0.0)
    good = np.isfinite(level) & np.isfinite(excess) & (level > 0)
    measured = np.nan
    if np.count_nonzero(good) >= 16 and np.sum(
        excess[good]
    ) > MIN_SKY_EXCESS * floor * np.count_nonzero(good):
        # The photon-transfer line through the origin: sky level against variance.
        measured = float(np.sum(level[good]) / np.sum(excess[good]))
    return NoiseMeasurement(
        gain=float(measured),
        read_noise=float(measured * np.sqrt(var_overscan)),
        overscan_noise=float(np.sqrt(var_overscan)),
        header_gain=float(np.median(gain[every])),
        header_read_noise=float(np.median(read_noise[every])),
    )


def gain_problems(measurements: Sequence[tuple[str, NoiseMeasurement]]) -> list[str]:
    """One line when the stretches' data contradict the header's GAIN or RDNOISE.

    Parameters
    ----------
    measurements : sequence of (str, NoiseMeasurement)
        Stretch id and its measurement (:func:`measure_gain`).

    Returns
    -------
    list of str
        Empty when the medians of the measurements agree with the header
        within a factor :data:`TOLERANCE` (or nothing could be measured).
    """
    if not measurements:
        return []
    ids = [name for name, _ in measurements]
    values = [m for _, m in measurements]

    def median(name: str) -> float:
        column = np.array([getattr(m, name) for m in values], dtype=float)
        return float(np.nanmedian(column)) if np.isfinite(column).any() else np.nan

    gain, read_noise = median("gain"), median("read_noise")
    header_gain, header_read_noise = median("header_gain"), median("header_read_noise")
    overscan_noise = median("overscan_noise")
    wrong = []
    if np.isfinite(gain) and not 1 / TOLERANCE <= gain / header_gain <= TOLERANCE:
        wrong.append(f"GAIN={header_gain:.4g} e-/ADU, but the sky's photon noise says {gain:.3g}")
    if np.isfinite(read_noise) and not 1 / TOLERANCE <= read_noise / header_read_noise <= TOLERANCE:
        wrong.append(
            f"RDNOISE={header_read_noise:.4g} e-, but the overscan's noise "
            f"({overscan_noise:.3g} ADU) at the measured gain says {read_noise:.3g}"
        )
    elif not np.isfinite(gain) and np.isfinite(overscan_noise):
        expected = header_read_noise / header_gain
        if not 1 / TOLERANCE <= overscan_noise / expected <= TOLERANCE:
            wrong.append(
                f"RDNOISE/GAIN={expected:.3g} ADU, but the overscan's noise is "
                f"{overscan_noise:.3g} ADU (the sky was too faint to measure the gain)"
            )
    if not wrong:
        return []
    where = f"stretch {ids[0]}" if len(ids) == 1 else f"{len(ids)} stretches, {ids[0]} to {ids[-1]}"
    return [
        f"the raw data contradict the header (medians of {where}): {'; '.join(wrong)}. Fluxes, "
        "variances and the noise-based masks (cosmic rays, bad columns) use the header's "
        "values: correct the camera's header, or give the right value in "
        "stages.ingest.defaults (with stages.ingest.keywords naming a keyword the files "
        "lack)."
    ]
