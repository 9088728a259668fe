"""Bias level of each row from the serial overscan, smoothed along the scan.

In a TDI camera every row is read through the same serial register, and the
serial overscan columns read right after a row's image pixels measure that
row's bias level.  The level drifts slowly with time (temperature,
electronics), so a per-row robust level is smoothed along the scan axis to beat
down the read noise of the few overscan pixels per row (common practice).
"""

from __future__ import annotations

import warnings

import numpy as np
from scipy.signal import savgol_filter

__all__ = ["overscan_levels", "smooth_levels"]


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


def smooth_levels(levels: np.ndarray, window: int, polyorder: int = 2) -> np.ndarray:
    """Smooth per-row bias levels along the scan with a Savitzky-Golay filter.

    A local polynomial of degree ``polyorder`` over ``window`` rows follows a
    slow drift without lag and averages the read noise of the overscan down by
    about ``sqrt(window)`` (Savitzky & Golay 1964).  Rows with a NaN level are
    filled by linear interpolation before smoothing and stay filled, so that
    every row of a stretch gets a bias.

    Parameters
    ----------
    levels : ndarray, shape (n_rows,)
        Per-row bias levels in ADU along the scan.
    window : int
        Window length in rows; ``1`` returns the levels unsmoothed.  Shortened
        to the (odd) number of rows when the stretch is shorter.
    polyorder : int
        Degree of the local polynomial; must be below ``window``.

    Returns
    -------
    ndarray of float64, shape (n_rows,)
        Smoothed levels in ADU.
    """
    levels = np.asarray(levels, dtype=np.float64)
    good = np.isfinite(levels)
    if not good.any():
        raise ValueError(
            "No row of this stretch has a finite overscan level; check BIASSEC and the "
            "raw data (all overscan pixels are NaN or infinite)."
        )
    if not good.all():
        index = np.arange(levels.size)
        levels = np.interp(index, index[good], levels[good])
    window = min(int(window), levels.size)
    if window % 2 == 0:
        window -= 1
    if window <= polyorder:
        return levels
    return savgol_filter(levels, window, polyorder, mode="interp")
