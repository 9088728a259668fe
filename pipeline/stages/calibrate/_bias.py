"""Bias level of each row from the serial overscan, smoothed along the scan.

In a TDI camera every row is read through the same serial register, and the
serial overscan columns read right after a row's image pixels measure that
row's bias level.  The level drifts slowly with time (temperature,
electronics), so a per-row robust level is smoothed along the scan axis to beat
down the read noise of the few overscan pixels per row (common practice).
"""

from __future__ import annotations

import functools
import warnings

import numpy as np

from pipeline.stages._signal import fftconvolve, savgol_coeffs

__all__ = [
    "ROW_OUTLIER_SIGMA",
    "choose_window",
    "overscan_levels",
    "savitzky_golay",
    "smooth_levels",
]


def overscan_levels(
    overscan: np.ndarray, read_noise_adu: float | np.ndarray, n_sigma: float = 4.0
) -> np.ndarray:
    """Robust bias level of each row from its overscan pixels.

    Each row's level is the mean of the overscan pixels within ``n_sigma`` read
    noises of that row's median (a clipped mean: as robust as the median to a
    cosmic ray or a hot pixel in the overscan, but with the mean's precision and
    without its quantisation on integer data).

    Parameters
    ----------
    overscan : ndarray, shape (n_rows, n_overscan)
        Raw overscan pixels in ADU; axis 0 is the scan (time) axis.
    read_noise_adu : float or ndarray of shape (n_rows,)
        Read noise in ADU (RDNOISE / GAIN), per row or for all rows.
    n_sigma : float
        Clipping half-width in read noises.

    Returns
    -------
    ndarray of float64, shape (n_rows,)
        Bias level of each row in ADU; NaN for rows without a finite overscan
        pixel.
    """
    overscan = np.asarray(overscan, dtype=np.float64)
    if overscan.ndim != 2 or overscan.shape[1] < 1:
        raise ValueError(
            f"overscan must be a 2-D array (n_rows, n_overscan) with at least one "
            f"column; got shape {overscan.shape}. Check BIASSEC."
        )
    finite = np.isfinite(overscan)
    if finite.all():
        median = np.median(overscan, axis=1)
    else:
        with warnings.catch_warnings():
            # Rows without any finite overscan pixel give NaN, which is the
            # documented result; numpy's all-NaN warning adds nothing.
            warnings.simplefilter("ignore", RuntimeWarning)
            median = np.nanmedian(np.where(finite, overscan, np.nan), axis=1)
    half_width = n_sigma * np.broadcast_to(np.asarray(read_noise_adu, float), median.shape)
    keep = finite & (np.abs(overscan - median[:, None]) <= half_width[:, None])
    count = keep.sum(axis=1)
    total = np.where(keep, overscan, 0.0).sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(count > 0, total / np.maximum(count, 1), np.nan)


#: Rows whose level is this many robust standard deviations off the smoothed
#: bias are left out and the bias is smoothed again (a glitch in one row's
#: overscan must not pull its neighbours).
ROW_OUTLIER_SIGMA = 5.0


def smooth_levels(
    levels: np.ndarray,
    window: int | None = None,
    polyorder: int = 2,
    max_window: int = 2001,
) -> np.ndarray:
    """Smooth per-row bias levels along the scan with a Savitzky-Golay filter.

    A local polynomial of degree ``polyorder`` over ``window`` rows follows a
    slow drift without lag and averages the read noise of the overscan down by
    about ``sqrt(window)`` (Savitzky & Golay 1964).  Rows with a NaN level are
    filled by linear interpolation before smoothing and stay filled, so that
    every row of a stretch gets a bias.  Rows more than
    :data:`ROW_OUTLIER_SIGMA` robust standard deviations off the smoothed
    levels are then treated like NaN rows and the levels smoothed again.

    Parameters
    ----------
    levels : ndarray, shape (n_rows,)
        Per-row bias levels in ADU along the scan.
    window : int or None
        Window length in rows; ``1`` returns the levels unsmoothed.  None
        (default): the window among odd lengths up to ``max_window`` that
        predicts left-out rows best (:func:`choose_window`), so that a quiet
        bias is averaged over many rows and a lively one followed closely.
        Shortened to the (odd) number of rows when the stretch is shorter.
    polyorder : int
        Degree of the local polynomial; must be below ``window``.
    max_window : int
        Longest window tried when ``window`` is None.

    Returns
    -------
    ndarray of float64, shape (n_rows,)
        Smoothed levels in ADU.
    """
    from astropy.stats import mad_std

    levels = np.asarray(levels, dtype=np.float64)
    good = np.isfinite(levels)
    if not good.any():
        raise ValueError(
            "No row of this stretch has a finite overscan level; check BIASSEC and the "
            "raw data (all overscan pixels are NaN or infinite)."
        )
    if window is None:
        window = choose_window(levels, polyorder, max_window)
    window = _odd_window(window, levels.size)
    if window <= polyorder:
        return _fill(levels, good)
    smooth = savitzky_golay(_fill(levels, good), window, polyorder)
    resid = np.where(good, levels - smooth, np.nan)
    sigma = mad_std(resid[good], ignore_nan=True)
    outlier = good & (np.abs(np.nan_to_num(resid)) > ROW_OUTLIER_SIGMA * sigma)
    if outlier.any() and sigma > 0:
        good = good & ~outlier
        smooth = savitzky_golay(_fill(levels, good), window, polyorder)
    return smooth


def savitzky_golay(values: np.ndarray, window: int, polyorder: int) -> np.ndarray:
    """``scipy.signal.savgol_filter(values, window, polyorder, mode='interp')``, faster.

    The interior is one FFT convolution, whose cost does not grow with the
    window (a direct convolution over 2001 rows costs 2001 multiplications
    per row); the first and last ``window // 2`` rows take the polynomial
    fitted to the first and last ``window`` rows, as scipy's ``'interp'``
    mode does.  The mean is taken out first so that the FFT's rounding is
    relative to the variations, not to the bias level.

    Parameters
    ----------
    values : ndarray, shape (n,)
        Finite values; ``n >= window``.
    window : int
        Odd window length.
    polyorder : int
        Degree of the local polynomial, below ``window``.

    Returns
    -------
    ndarray of float64, shape (n,)
    """
    values = np.asarray(values, dtype=np.float64)
    offset = values.mean()
    centred = values - offset
    out = fftconvolve(centred, _coefficients(window, polyorder), mode="same")
    half = window // 2
    if half:
        x = np.arange(window, dtype=np.float64)
        for edge, rows in (
            (slice(0, window), slice(0, half)),
            (slice(-window, None), slice(-half, None)),
        ):
            coefficients = np.polynomial.polynomial.polyfit(x, centred[edge], polyorder)
            out[rows] = np.polynomial.polynomial.polyval(x[rows], coefficients)
    return out + offset


def _fill(levels: np.ndarray, good: np.ndarray) -> np.ndarray:
    """Levels with the rows not ``good`` linearly interpolated."""
    if good.all():
        return levels
    index = np.arange(levels.size)
    return np.interp(index, index[good], levels[good])


def _odd_window(window: int, n_rows: int) -> int:
    window = min(int(window), n_rows)
    return window - 1 if window % 2 == 0 else window


@functools.lru_cache(maxsize=64)
def _coefficients(window: int, polyorder: int) -> np.ndarray:
    """Savitzky-Golay convolution coefficients (cached; do not modify)."""
    return savgol_coeffs(window, polyorder)


@functools.lru_cache(maxsize=64)
def _edge_leverage(window: int, polyorder: int) -> np.ndarray:
    """Hat matrix diagonal of a degree-``polyorder`` fit to ``window`` rows (cached)."""
    half = window // 2
    x = np.arange(window) - half
    q, _ = np.linalg.qr(np.vander(x / max(half, 1), polyorder + 1))
    return np.sum(q * q, axis=1)


def _hat_diagonal(n_rows: int, window: int, polyorder: int) -> np.ndarray:
    """Diagonal of the smoothing matrix of ``savgol_filter(..., mode='interp')``.

    Inside, every row gets the filter's central weight; in the first and last
    ``window // 2`` rows the filter is the least-squares polynomial over the
    first (last) ``window`` rows, whose hat matrix diagonal is the squared
    row norm of the orthonormal basis of its Vandermonde matrix.
    """
    half = window // 2
    diagonal = np.full(n_rows, _coefficients(window, polyorder)[half])
    edge = _edge_leverage(window, polyorder)
    diagonal[:half] = edge[:half]
    diagonal[n_rows - half :] = edge[window - half :]
    return diagonal


def choose_window(levels: np.ndarray, polyorder: int = 2, max_window: int = 2001) -> int:
    """The smoothing window that best predicts each row's level from the others.

    Leave-one-out cross-validation: a linear smoother with hat matrix ``H``
    predicts row ``i`` from the other rows with the error
    ``(y_i - s_i) / (1 - H_ii)`` (e.g. Hastie, Tibshirani & Friedman, The
    Elements of Statistical Learning, eq. 7.52).  The mean square of these
    errors over the rows with a finite level is computed for odd windows from
    ``4 * (polyorder + 1) + 1`` rows up to ``max_window`` in steps of ~1.4x,
    and the window with the smallest one is returned.  White noise favours
    long windows, a bias that wanders favours short ones.

    Parameters
    ----------
    levels : ndarray, shape (n_rows,)
        Per-row levels (NaN allowed: interpolated over, not scored).
    polyorder : int
        Degree of the local polynomial.
    max_window : int
        Longest window tried (cut to the number of rows).

    Returns
    -------
    int
        Odd window length in rows.
    """
    levels = np.asarray(levels, dtype=np.float64)
    good = np.isfinite(levels)
    n_rows = levels.size
    shortest = 4 * (polyorder + 1) + 1
    longest = _odd_window(max_window, n_rows)
    if longest <= shortest or good.sum() <= shortest:
        return max(longest, 1)
    filled = _fill(levels, good)
    windows = sorted(
        {_odd_window(w, n_rows) for w in np.geomspace(shortest, longest, 12).astype(int)}
        | {longest}
    )
    best, best_score = longest, np.inf
    for window in windows:
        smooth = savitzky_golay(filled, window, polyorder)
        leverage = _hat_diagonal(n_rows, window, polyorder)
        error = (filled - smooth)[good] / (1.0 - leverage[good])
        score = float(np.mean(error * error))
        if score < best_score:
            best, best_score = window, score
    return best
