"""Where the zero point can be trusted, and what the stars say about the flat.

* :func:`interval_quality`: per interval of the night (a stretch), the
  stars used, the zero point's drop below the night's clear level and the
  scatter of the stars about the fit; intervals with a cloud (a drop or a
  rise in scatter beyond limits) or with too few stars are flagged.
* :func:`star_flat`: the stars' residuals binned by column across the scan;
  a flat-field error shows as bins off zero, a vignetting or illumination
  error as a trend from one edge to the other.
* :func:`scale_to_zero_point`: the factor that brings an image whose zero
  point varies along the scan to one fixed zero point.
"""

from __future__ import annotations

import itertools
from enum import IntFlag
from typing import TYPE_CHECKING

import numpy as np
from numpy.typing import ArrayLike

if TYPE_CHECKING:
    from astropy.table import QTable

__all__ = [
    "ZeroPointFlag",
    "clear_level",
    "interval_quality",
    "scale_to_zero_point",
    "star_flat",
]

#: Normal-distribution consistency factor of the median absolute deviation
#: (common practice: MAD * 1.4826 estimates sigma).
_MAD_TO_SIGMA = 1.4826


class ZeroPointFlag(IntFlag):
    """Why an interval's zero point is not to be trusted (bits of ``flags``)."""

    #: The zero point drops more than ``max_drop`` below the night's clear level.
    CLOUD = 1
    #: The stars scatter about the fit more than ``max_scatter_ratio`` times the night's.
    SCATTER = 2
    #: Fewer than ``min_stars`` stars: the zero point is bridged from the neighbours.
    FEW_STARS = 4


def clear_level(zero_point: ArrayLike, percentile: float = 90.0) -> float:
    """The night's clear-sky zero point: a high percentile of ``Z`` on a time grid, mag.

    Cloud only lowers the zero point, so the clear level sits near the top
    of its distribution; a percentile (not the maximum) keeps noise out.
    """
    values = np.asarray(zero_point, dtype=float)
    values = values[np.isfinite(values)]
    if values.size == 0:
        raise ValueError("No finite zero point to take the clear level from.")
    return float(np.percentile(values, percentile))


def _robust_sigma(values: np.ndarray) -> float:
    if values.size < 2:
        return np.nan
    return _MAD_TO_SIGMA * float(np.median(np.abs(values - np.median(values))))


def interval_quality(
    edges: ArrayLike,
    star_t: ArrayLike,
    star_residual: ArrayLike,
    star_sigma: ArrayLike,
    used: ArrayLike,
    grid_t: ArrayLike,
    grid_zero_point: ArrayLike,
    *,
    clear: float,
    max_drop: float = 0.1,
    max_scatter_ratio: float = 2.0,
    min_stars: int = 10,
) -> QTable:
    """Judge the zero point of each interval ``[edges[i], edges[i+1])``.

    Parameters
    ----------
    edges : array_like
        Increasing interval boundaries, seconds.
    star_t, star_residual, star_sigma, used : array_like
        Each reference star's time (s), residual about the fit (mag), error
        (mag) and whether the fit kept it.
    grid_t, grid_zero_point : array_like
        The fitted zero point sampled finely in time (s, mag).
    clear : float
        The night's clear-sky zero point (:func:`clear_level`), mag.
    max_drop : float, optional
        Largest drop below ``clear`` (mag) an interval may show anywhere and
        still count as clear.
    max_scatter_ratio : float, optional
        Largest ratio of the interval's robust residual scatter to the
        night's.
    min_stars : int, optional
        Fewest used stars for an interval's own zero point.

    Returns
    -------
    `~astropy.table.QTable`
        One row per interval: ``t_start``, ``t_stop`` (s), ``n_stars``,
        ``zero_point`` (median over the interval), ``drop`` (largest drop
        below clear), ``scatter`` (mag), ``flags`` (:class:`ZeroPointFlag`).
    """
    from astropy import units as u
    from astropy.table import QTable

    edges = np.asarray(edges, dtype=float)
    t = np.asarray(star_t, dtype=float)
    residual = np.asarray(star_residual, dtype=float)
    used = np.asarray(used, dtype=bool)
    grid_t = np.asarray(grid_t, dtype=float)
    grid_zp = np.asarray(grid_zero_point, dtype=float)
    del star_sigma  # the scatter is judged against the night's, not the quoted errors
    night_scatter = _robust_sigma(residual[used])
    rows = []
    for lo, hi in itertools.pairwise(edges):
        here = used & (t >= lo) & (t < hi)
        on_grid = (grid_t >= lo) & (grid_t < hi)
        zp = grid_zp[on_grid] if on_grid.any() else np.array([np.nan])
        scatter = _robust_sigma(residual[here])
        drop = max(0.0, clear - float(np.nanmin(zp)))
        flags = ZeroPointFlag(0)
        if drop > max_drop:
            flags |= ZeroPointFlag.CLOUD
        if np.isfinite(scatter) and scatter > max_scatter_ratio * night_scatter:
            flags |= ZeroPointFlag.SCATTER
        if here.sum() < min_stars:
            flags |= ZeroPointFlag.FEW_STARS
        rows.append((lo, hi, int(here.sum()), float(np.nanmedian(zp)), drop, scatter, int(flags)))
    names = ("t_start", "t_stop", "n_stars", "zero_point", "drop", "scatter", "flags")
    columns = list(zip(*rows, strict=True)) if rows else [[] for _ in names]
    units = (u.s, u.s, None, u.mag, u.mag, u.mag, None)
    table = QTable()
    for name, values, unit in zip(names, columns, units, strict=True):
        table[name] = np.asarray(values, dtype=float) if unit is None else u.Quantity(values, unit)
    table["n_stars"] = table["n_stars"].astype(np.int32)
    table["flags"] = table["flags"].astype(np.int32)
    table.meta["flag_bits"] = {flag.name: int(flag) for flag in ZeroPointFlag}
    table.meta["night_scatter_mag"] = night_scatter
    return table


def star_flat(
    column: ArrayLike,
    residual: ArrayLike,
    used: ArrayLike,
    n_columns: int,
    *,
    bin_columns: int = 16,
    min_stars: int = 5,
    max_offset: float = 0.01,
    significance: float = 4.0,
    sigma: ArrayLike | None = None,
) -> tuple[QTable, dict]:
    """Stars' zero-point residuals binned by column: the "star flat".

    Parameters
    ----------
    column : array_like
        Each star's position across the scan, 0-based pixels.
    residual : array_like
        Its residual about the zero-point fit (``delta`` minus the model),
        mag.  Columns whose flat field leaves a response too high by a
        fraction ``e`` make their stars too bright, a residual of
        ``+2.5 log10(1 + e)``.
    used : array_like of bool
        Stars the fit kept.
    n_columns : int
        Width of the image across the scan, pixels.
    bin_columns : int, optional
        Columns per bin.
    min_stars : int, optional
        Bins with fewer stars get NaN.
    max_offset : float, optional
        A bin whose offset exceeds this (mag) and ``significance`` times its
        error is listed as deviant.
    sigma : array_like or None, optional
        Each star's error, mag.  Given, a bin's offset is the weighted mean
        of its residuals (the fit has already clipped the outliers) and its
        error the mean's, widened by the square root of the reduced chi-square
        where the scatter exceeds the errors: bright stars then weigh as much
        as they should.  None: the median, with the error of a median.
    significance : float, optional
        See ``max_offset``.  4 sigma: a 4096-column chip has 256 bins of 16,
        and 4 sigma keeps a noise-only report to ~1.6 % of nights (normal
        tail probability 6.3e-5 per bin).

    Returns
    -------
    table : `~astropy.table.QTable`
        ``column_start``, ``column_stop`` (pix), ``n_stars``, ``offset``
        (median residual, mag), ``offset_err`` (mag).
    trend : dict
        ``slope`` (mag per pixel), ``edge_to_edge`` (mag) and its standard
        error ``edge_to_edge_err`` (mag) of a straight line through the
        stars' residuals (weighted by ``sigma`` when given), and ``deviant`` (indices of the bins
        that are off, see ``max_offset``).
    """
    from astropy import units as u
    from astropy.table import QTable

    col = np.asarray(column, dtype=float)
    res = np.asarray(residual, dtype=float)
    used = np.asarray(used, dtype=bool) & np.isfinite(col) & np.isfinite(res)
    if bin_columns < 1 or n_columns < 1:
        raise ValueError(
            f"bin_columns and n_columns must be positive; got {bin_columns}, {n_columns}."
        )
    starts = np.arange(0, n_columns, bin_columns)
    stops = np.minimum(starts + bin_columns, n_columns)
    which = np.floor(col / bin_columns).astype(int)
    n, offset, error = [], [], []
    sig = None if sigma is None else np.asarray(sigma, dtype=float)
    for k in range(len(starts)):
        in_bin = used & (which == k)
        here = res[in_bin]
        n.append(here.size)
        if here.size >= min_stars and sig is not None:
            weight = 1.0 / sig[in_bin] ** 2
            mean = float(np.sum(weight * here) / np.sum(weight))
            chi2_red = float(np.sum(weight * (here - mean) ** 2)) / (here.size - 1)
            offset.append(mean)
            error.append(float(np.sqrt(max(chi2_red, 1.0) / np.sum(weight))))
        elif here.size >= min_stars:
            offset.append(float(np.median(here)))
            # Error of a median: 1.2533 sigma / sqrt(n) for normal data (common practice).
            error.append(1.2533 * _robust_sigma(here) / np.sqrt(here.size))
        else:
            offset.append(np.nan)
            error.append(np.nan)
    table = QTable(
        {
            "column_start": u.Quantity(starts, u.pix),
            "column_stop": u.Quantity(stops, u.pix),
            "n_stars": np.asarray(n, dtype=np.int32),
            "offset": u.Quantity(offset, u.mag),
            "offset_err": u.Quantity(error, u.mag),
        }
    )
    ok = np.isfinite(offset) & (np.asarray(error) > 0)
    slope, slope_err = _trend(col[used], res[used], None if sig is None else sig[used])
    off = np.abs(np.asarray(offset))
    with np.errstate(invalid="ignore"):
        deviant = np.flatnonzero(ok & (off > max_offset) & (off > significance * np.asarray(error)))
    return table, {
        "slope": slope,
        "edge_to_edge": slope * (n_columns - 1),
        "edge_to_edge_err": slope_err * (n_columns - 1),
        "deviant": [int(k) for k in deviant],
    }


#: A star-flat trend is reported only when it is also this many of its
#: standard errors from zero: one test per night, so 3 sigma raises a false
#: alarm on ~0.3 % of nights (normal two-sided tail probability 2.7e-3).
TREND_SIGNIFICANCE = 3.0


def _trend(column: np.ndarray, residual: np.ndarray, sigma: np.ndarray | None):
    """Slope of a straight line through the stars' residuals, and its standard error.

    Fitted to the stars themselves, not to the bins: on a sparse night most
    bins hold fewer than ``min_stars`` and would leave their stars out.
    Weighted by ``sigma`` when given; the error is the least-squares one,
    widened by the square root of the reduced chi-square where the stars
    scatter beyond their errors (without ``sigma``, the scatter about the
    line is the error).  NaN and NaN for fewer than three stars.

    Returns
    -------
    slope, slope_err : float
        mag per pixel.
    """
    if column.size < 3:
        return np.nan, np.nan
    weight = np.ones(column.size) if sigma is None else 1.0 / sigma**2
    design = np.column_stack([column, np.ones_like(column)])
    normal = design.T @ (design * weight[:, None])
    try:
        cov = np.linalg.inv(normal)
    except np.linalg.LinAlgError:  # every star in one column
        return np.nan, np.nan
    coef = cov @ (design.T @ (weight * residual))
    chi2_red = float(np.sum(weight * (residual - design @ coef) ** 2)) / (column.size - 2)
    scale = chi2_red if sigma is None else max(chi2_red, 1.0)
    return float(coef[0]), float(np.sqrt(cov[0, 0] * scale))


def scale_to_zero_point(zero_point: ArrayLike, target: float, exposure: float) -> np.ndarray:
    """Factor that brings electrons recorded at ``zero_point`` to the fixed ``target``.

    A source of magnitude ``m`` gives ``F = exposure * 10**(0.4 (Z - m))``
    electrons; multiplying by the returned factor gives
    ``10**(0.4 (target - m))``, so that ``m = target - 2.5 log10(sum)`` on
    every night.  Variances scale by its square.

    Parameters
    ----------
    zero_point : array_like
        Zero point where the pixels were recorded (e.g. per column along the
        scan), mag for 1 electron per second.
    target : float
        The fixed zero point of calibrated images, mag.
    exposure : float
        Exposure of each pixel (the crossing time), seconds.
    """
    if not exposure > 0:
        raise ValueError(f"exposure must be positive seconds; got {exposure}.")
    return 10.0 ** (0.4 * (target - np.asarray(zero_point, dtype=float))) / exposure
