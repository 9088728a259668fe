"""Residual statistics on a grid across the chip and along the night."""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np
from numpy.typing import ArrayLike

if TYPE_CHECKING:
    from astropy.table import Table

__all__ = ["residual_grid"]


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
