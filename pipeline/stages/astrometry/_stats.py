"""Residual statistics on a grid across the chip and along the night."""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np
from numpy.typing import ArrayLike

if TYPE_CHECKING:
    from astropy.table import Table

__all__ = ["residual_grid", "stretch_excess_errors"]


def residual_grid(
    column: ArrayLike,
    time: ArrayLike,
    d_along: ArrayLike,
    d_across: ArrayLike,
    *,
    column_range: tuple[float, float],
    time_range: tuple[float, float],
    n_across: int = 4,
    n_along: int = 8,
) -> Table:
    """Mean and rms of residuals in cells across the chip and along the night.

    Parameters
    ----------
    column : array_like, shape (n,)
        Position across the scan (chip column), pixels.
    time : array_like, shape (n,)
        Time of each star (middle of its crossing), seconds.
    d_along, d_across : array_like, shape (n,)
        Residuals along and across the scan, any one unit (e.g. mas).
    column_range, time_range : (float, float)
        Extent the cells divide evenly.
    n_across, n_along : int, optional
        Cells across the chip and along the night.

    Returns
    -------
    astropy.table.Table
        One row per cell: ``across`` and ``along`` (cell indices), ``n``,
        ``mean_along``, ``mean_across``, ``rms_along``, ``rms_across`` and
        ``error_along``/``error_across`` (standard errors of the means; NaN
        where a cell has fewer than 2 stars).
    """
    from astropy.table import Table

    if n_across < 1 or n_along < 1:
        raise ValueError(f"n_across and n_along must be >= 1 cells; got {n_across} and {n_along}.")
    column, time, d_along, d_across = (
        np.asarray(a, dtype=float).ravel() for a in (column, time, d_along, d_across)
    )
    i = np.floor(
        (column - column_range[0]) / (column_range[1] - column_range[0]) * n_across
    ).astype(np.intp)
    j = np.floor((time - time_range[0]) / (time_range[1] - time_range[0]) * n_along).astype(np.intp)
    i = np.clip(i, 0, n_across - 1)
    j = np.clip(j, 0, n_along - 1)
    rows = []
    for a in range(n_across):
        for b in range(n_along):
            sel = (i == a) & (j == b) & np.isfinite(d_along) & np.isfinite(d_across)
            n = int(sel.sum())
            stats = []
            for d in (d_along[sel], d_across[sel]):
                mean = float(d.mean()) if n else np.nan
                rms = float(np.sqrt((d**2).mean())) if n else np.nan
                err = float(d.std(ddof=1) / np.sqrt(n)) if n > 1 else np.nan
                stats.append((mean, rms, err))
            rows.append(
                (
                    a,
                    b,
                    n,
                    stats[0][0],
                    stats[1][0],
                    stats[0][1],
                    stats[1][1],
                    stats[0][2],
                    stats[1][2],
                )
            )
    return Table(
        rows=rows,
        names=(
            "across",
            "along",
            "n",
            "mean_along",
            "mean_across",
            "rms_along",
            "rms_across",
            "error_along",
            "error_across",
        ),
    )


#: Fewest matched stars of a stretch whose residuals say whether it holds an
#: error the others lack (fewer: its scatter is not known well enough).
EXCESS_MIN_PAIRS = 20
#: Chance that a stretch whose residuals hold no more than the night's common
#: error is given an extra error all the same (per stretch and axis).
EXCESS_FALSE_ALARM = 1e-4


def stretch_excess_errors(
    stretch: ArrayLike,
    residual_along: ArrayLike,
    residual_across: ArrayLike,
    sigma_along: ArrayLike,
    sigma_across: ArrayLike,
    *,
    min_pairs: int = EXCESS_MIN_PAIRS,
    false_alarm: float = EXCESS_FALSE_ALARM,
) -> dict[int, tuple[float, float]]:
    """The error each stretch's positions hold beyond the night's, from its reference stars.

    A passing cloud moves the stars recorded during it by an amount that no
    fit of the night follows wholly (see
    :func:`~pipeline.stages.astrometry.light_weighting_fits_better`): their
    residuals scatter more than the night's common error
    (:func:`~pipeline.stages.astrometry.error_floor`, which also holds the
    reference catalogue's own errors) says.  Per stretch and axis: the
    common error its residuals alone ask for, ``e_s`` (so that their
    chi-square is their number); the night's level ``e_ref``, the median of
    those over the stretches; and where a stretch's residuals are
    inconsistent with ``e_ref`` (chi-square beyond its ``1 - false_alarm``
    quantile), the extra error ``sqrt(e_s^2 - e_ref^2)`` that its positions
    carry in addition to their own (in quadrature: common practice for an
    error component the given errors lack, as the night's common error is).

    Parameters
    ----------
    stretch : array_like of int, shape (n,)
        Stretch of each matched star.
    residual_along, residual_across : array_like, shape (n,)
        Solved minus measured position, pixels.
    sigma_along, sigma_across : array_like, shape (n,)
        Their errors (measurement and reference), pixels.
    min_pairs : int, optional
        Fewest stars of a stretch judged (others get no extra error).
    false_alarm : float, optional
        Chance of an extra error where there is none, per stretch and axis.

    Returns
    -------
    dict
        ``{stretch: (extra_along, extra_across)}``, pixels, for the
        stretches that carry an extra error on either axis.
    """
    from scipy.stats import chi2

    from pipeline.stages.astrometry._fit import error_floor

    stretch = np.asarray(stretch, dtype=np.int64)
    axes = [
        (np.asarray(r, dtype=float), np.asarray(s, dtype=float))
        for r, s in ((residual_along, sigma_along), (residual_across, sigma_across))
    ]
    judged = [k for k in np.unique(stretch) if np.count_nonzero(stretch == k) >= min_pairs]
    if len(judged) < 2:  # no night's level to compare a stretch with
        return {}
    extra: dict[int, list[float]] = {int(k): [0.0, 0.0] for k in judged}
    for axis, (residual, sigma) in enumerate(axes):
        floors = {}
        for k in judged:
            sel = stretch == k
            floors[k] = error_floor(residual[sel], sigma[sel], float(np.count_nonzero(sel)))
        level = float(np.median(list(floors.values())))
        for k in judged:
            sel = stretch == k
            n = np.count_nonzero(sel)
            statistic = float(np.sum(residual[sel] ** 2 / (sigma[sel] ** 2 + level**2)))
            if chi2.sf(statistic, n) < false_alarm and floors[k] > level:
                extra[int(k)][axis] = float(np.sqrt(floors[k] ** 2 - level**2))
    return {k: (a, b) for k, (a, b) in extra.items() if a > 0.0 or b > 0.0}
