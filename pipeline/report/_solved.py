"""Figures and numbers from the solved products: astrometry and the zero point.

Pure functions from the astrometry stage's ``parameters`` and
``residual_grid`` and the zeropoint stage's ``zero_point``, ``intervals``
and ``star_flat`` tables to matplotlib Figures (no pyplot) or short texts.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np
from astropy.table import Table
from matplotlib.figure import Figure

from pipeline.geometry.rectified import column_times
from pipeline.report._clock import FIGURE_SIZE, NightClock, _clock_text, time_axis

__all__ = [
    "fitted_parameter",
    "focal_length_figure",
    "line_time_check",
    "line_time_text",
    "nominal_focal_length_label",
    "residual_map_figure",
    "residuals_along_night_figure",
    "star_flat_figure",
    "zero_point_at_columns",
    "zero_point_columns",
    "zero_point_figure",
]


def _values(column: Any) -> np.ndarray:
    """Bare float values of a (Quantity) column."""
    return np.asarray(getattr(column, "value", column), dtype=float)


# ------------------------------------------------------------------- astrometry


def _grid_cells(grid: Table, name: str) -> np.ndarray:
    """A residual-grid column as an array (n_across, n_along); NaN where a cell has no star."""
    across = np.asarray(grid["across"], dtype=int)
    along = np.asarray(grid["along"], dtype=int)
    cells = np.full((across.max() + 1, along.max() + 1), np.nan)
    values = np.where(np.asarray(grid["n"]) > 0, _values(grid[name]), np.nan)
    cells[across, along] = values
    return cells


def residual_map_figure(grid: Table, n_columns: int, hours: tuple[float, float]) -> Figure:
    """Mean astrometric residual in cells across the chip and along the night.

    Parameters
    ----------
    grid : astropy.table.Table
        The astrometry stage's ``residual_grid``: ``across``, ``along`` (cell
        indices), ``n``, ``mean_along``, ``mean_across`` (mas).
    n_columns : int
        Chip columns the cells across divide evenly (the camera's).
    hours : (float, float)
        UTC span (hours since 0 h) the cells along divide evenly.
    """
    fig = Figure(figsize=(FIGURE_SIZE[0], 1.6 * FIGURE_SIZE[1]), layout="constrained")
    axes = fig.subplots(2, 1, sharex=True)
    maps = [_grid_cells(grid, name) for name in ("mean_along", "mean_across")]
    finite = np.concatenate([m[np.isfinite(m)] for m in maps])
    limit = float(np.max(np.abs(finite))) if finite.size else 1.0
    extent = (hours[0], hours[1], -0.5, n_columns - 0.5)
    for ax, cells, what in zip(axes, maps, ("along scan", "across scan"), strict=True):
        image = ax.imshow(
            cells,
            origin="lower",
            extent=extent,
            aspect="auto",
            cmap="RdBu_r",
            vmin=-limit,
            vmax=limit,
            interpolation="nearest",
        )
        fig.colorbar(image, ax=ax, label=f"{what} (mas)")
        ax.set_title(f"mean residual {what}, star minus model", fontsize=9)
        ax.set_ylabel("chip column (pix)")
    axes[1].xaxis.set_major_formatter(_clock_text)
    axes[1].set_xlabel("UTC of mid-crossing (h:m:s), cells spread over the matched stars' span")
    return fig


def residuals_along_night_figure(grid: Table, hours: tuple[float, float]) -> Figure:
    """Mean and rms residual along the night (the cells across the chip pooled).

    Parameters
    ----------
    grid : astropy.table.Table
        The ``residual_grid`` (``n``, ``mean_*``, ``rms_*`` in mas).
    hours : (float, float)
        UTC span (hours since 0 h) the cells along divide evenly.
    """
    n = _grid_cells(grid, "n")
    n = np.where(np.isfinite(n), n, 0.0)
    total = n.sum(axis=0)
    edges = np.linspace(hours[0], hours[1], n.shape[1] + 1)
    centres = 0.5 * (edges[:-1] + edges[1:])
    fig = Figure(figsize=(FIGURE_SIZE[0], 1.6 * FIGURE_SIZE[1]), layout="constrained")
    top, bottom = fig.subplots(2, 1, sharex=True)
    for what, colour in (("along", "tab:blue"), ("across", "tab:orange")):
        mean = np.nan_to_num(_grid_cells(grid, f"mean_{what}"))
        rms = np.nan_to_num(_grid_cells(grid, f"rms_{what}"))
        with np.errstate(invalid="ignore", divide="ignore"):
            pooled_mean = np.where(total > 0, (n * mean).sum(axis=0) / total, np.nan)
            pooled_rms = np.where(total > 0, np.sqrt((n * rms**2).sum(axis=0) / total), np.nan)
        top.plot(centres, pooled_mean, "o-", color=colour, label=f"{what} the scan")
        bottom.plot(centres, pooled_rms, "o-", color=colour, label=f"{what} the scan")
    top.axhline(0.0, color="0.5", lw=0.8)
    top.set_ylabel("mean residual (mas)")
    bottom.set_ylabel("rms residual (mas)")
    bottom.xaxis.set_major_formatter(_clock_text)
    bottom.set_xlabel("UTC of mid-crossing (h:m:s)")
    for ax in (top, bottom):
        ax.grid(alpha=0.3)
        ax.legend(loc="best", fontsize="small")
    return fig


def fitted_parameter(parameters: Table, name: str) -> tuple[float, float] | None:
    """``(value, error)`` of a fitted parameter, or None if it was not fitted."""
    names = list(parameters["name"])
    if name not in names:
        return None
    row = parameters[names.index(name)]
    return float(row["value"]), float(row["error"])


def line_time_check(meta: Mapping[str, Any], tdi_rows: int) -> dict[str, Any]:
    """The line-time error the solution implies, its correction and the smear it causes.

    Parameters
    ----------
    meta : mapping
        The astrometry ``parameters`` table's meta: ``line_time_s`` (the
        clocking the fit measured) and ``matched_line_time_s`` (the one that
        matches the stars' drift at the chip centre), seconds; and, when
        fitted, ``line_time_scale_err`` and ``focal_scale_err`` (1-sigma,
        dimensionless), from which the error's uncertainty follows.
    tdi_rows : int
        Rows a charge packet is clocked over.

    Returns
    -------
    dict
        ``error_s`` (clocked minus matched), ``relative`` (error over the
        matched line time), ``correction_s`` (to add to the line time:
        minus the error) and ``smear_px``: how far the charge drifts from its
        star over the ``tdi_rows`` rows, ``tdi_rows * |relative|`` pixels
        (a rate mismatch accumulates one relative error per row; common
        practice for TDI).  ``relative_err`` and ``error_err_s`` are the
        1-sigma uncertainties of ``relative`` and ``error_s`` (NaN when the
        meta records neither scale's error), and ``significant`` says
        whether the error lies more than 3 of them from zero (True when
        unknown).  The matched line time is proportional to the focal
        length (one line is one pixel of drift), so ``relative`` is about
        ``line_time_scale - focal_scale``; its uncertainty is taken as the
        two errors in quadrature, leaving out their covariance (derived; the
        clocking is measured along the night, the scale across the chip).
    """
    clocked = float(meta["line_time_s"])
    matched = float(meta["matched_line_time_s"])
    error = clocked - matched
    relative = error / matched
    errors = [float(meta[k]) for k in ("line_time_scale_err", "focal_scale_err") if k in meta]
    relative_err = float(np.sqrt(np.sum(np.square(errors)))) if errors else float("nan")
    return {
        "error_s": error,
        "relative": relative,
        "correction_s": -error,
        "smear_px": abs(relative) * tdi_rows,
        "relative_err": relative_err,
        "error_err_s": relative_err * matched,
        # 3 sigma: common practice for calling a measured offset real
        "significant": not abs(relative) <= 3.0 * relative_err,
    }


def line_time_text(check: Mapping[str, Any], tdi_rows: int) -> str:
    """The line-time error in words: value, uncertainty, smear and what to do.

    Parameters
    ----------
    check : mapping
        :func:`line_time_check`'s result.
    tdi_rows : int
        Rows a charge packet is clocked over.
    """
    error_us, relative_ppm = check["error_s"] * 1e6, check["relative"] * 1e6
    if np.isfinite(check["relative_err"]):
        value = (
            f"{error_us:+.3f} +- {check['error_err_s'] * 1e6:.3f} us ({relative_ppm:+.1f} +- "
            f"{check['relative_err'] * 1e6:.1f} ppm)"
        )
    else:
        value = f"{error_us:+.3f} us ({relative_ppm:+.1f} ppm)"
    if not check["significant"]:
        return f"{value}: within 3 sigma of zero, no correction indicated"
    return (
        f"{value}, smear {check['smear_px']:.2f} pix over {tdi_rows} rows; correction: add "
        f"{check['correction_s'] * 1e6:+.3f} us to the line time"
    )


def nominal_focal_length_label(meta: Mapping[str, Any]) -> str:
    """Where the nominal focal length of the astrometry's parameters came from.

    ``focal_length_from_spin_m`` holds the spin period's focal length when
    the camera gives a spin period, else the configured ``focal_length``
    (``focal_length_given`` says which; parameters made before it was
    recorded are taken as from the spin period).
    """
    if meta.get("focal_length_given") == "focal_length":
        return "configured"
    return "from the spin period"


def focal_length_figure(parameters: Table, tdi_rows: int) -> Figure:
    """Focal length from the fit against the one from the spin; clocked and matched line time.

    Parameters
    ----------
    parameters : astropy.table.Table
        The astrometry stage's ``parameters`` (rows ``name``, ``value``,
        ``error``; ``meta`` with ``focal_length_m``,
        ``focal_length_from_spin_m``, ``line_time_s``,
        ``matched_line_time_s``).
    tdi_rows : int
        For the smear the line-time error causes.
    """
    meta = parameters.meta
    fit = float(meta["focal_length_m"])
    spin = float(meta["focal_length_from_spin_m"])
    scale = fitted_parameter(parameters, "focal_scale")
    # focal_length = nominal * (1 + focal_scale): the error scales with the nominal.
    fit_err = 0.0 if scale is None else fit / (1.0 + scale[0]) * scale[1]
    check = line_time_check(meta, tdi_rows)
    fig = Figure(figsize=FIGURE_SIZE, layout="constrained")
    left, right = fig.subplots(1, 2)
    left.errorbar([0], [fit * 1e3], yerr=[fit_err * 1e3], fmt="o", color="tab:blue", capsize=4)
    left.plot([1], [spin * 1e3], "s", color="tab:green")
    left.set_xticks([0, 1], ["fitted to the stars", nominal_focal_length_label(meta)])
    left.set_xlim(-0.6, 1.6)
    left.set_ylabel("focal length (mm)")
    left.set_title(f"difference {1e6 * (fit - spin):+.0f} um", fontsize=9)
    clocked = float(meta["line_time_s"]) * 1e3
    matched = float(meta["matched_line_time_s"]) * 1e3
    right.plot([0], [clocked], "o", color="tab:blue")
    right.plot([1], [matched], "s", color="tab:green")
    right.set_xticks([0, 1], ["clocked (fit)", "matching the drift"])
    right.set_xlim(-0.6, 1.6)
    right.set_ylabel("line time (ms)")
    if check["significant"]:
        title = (
            f"error {check['error_s'] * 1e6:+.2f} us; correction "
            f"{check['correction_s'] * 1e6:+.2f} us; smear {check['smear_px']:.2f} pix"
        )
    else:
        title = (
            f"error {check['error_s'] * 1e6:+.2f} +- {check['error_err_s'] * 1e6:.2f} us: "
            "within 3 sigma of zero"
        )
    right.set_title(title, fontsize=9)
    for ax in (left, right):
        ax.ticklabel_format(axis="y", useOffset=False)
        ax.grid(alpha=0.3)
    return fig


# ------------------------------------------------------------------- zero point


def zero_point_columns(t: Any, meta: Mapping[str, Any]) -> np.ndarray:
    """Night columns of zero-point times ``t`` (s after night row 0 was read out).

    The inverse of :func:`pipeline.geometry.rectified.column_times`, the one
    map from columns to times; ``meta`` is the ``zero_point`` table's meta
    (``line_time_s``, ``tdi_rows``).
    """
    return _values(t) / float(meta["line_time_s"]) + 0.5 * float(meta["tdi_rows"])


def zero_point_at_columns(zero_point: Table, x: Any) -> np.ndarray:
    """The solved zero point Z (mag of 1 e-/s) at night columns ``x``, interpolated."""
    meta = zero_point.meta
    t = column_times(x, float(meta["line_time_s"]), int(meta["tdi_rows"]))
    return np.interp(t, _values(zero_point["t"]), _values(zero_point["zero_point"]))


def zero_point_figure(zero_point: Table, intervals: Table, clock: NightClock) -> Figure:
    """Z(t) with its error band, the clear level and the flagged stretches shaded.

    Parameters
    ----------
    zero_point : astropy.table.Table
        The zeropoint stage's ``zero_point`` (``t`` s, ``zero_point``,
        ``zero_point_err`` mag; meta ``line_time_s``, ``tdi_rows``).
    intervals : astropy.table.Table
        Its ``intervals`` (``t_start``, ``t_stop`` s, ``flags``,
        ``interpolated``; meta ``clear_level_mag``).
    clock : NightClock
    """
    meta = zero_point.meta
    hours = clock.hours(zero_point_columns(zero_point["t"], meta))
    z = _values(zero_point["zero_point"])
    err = _values(zero_point["zero_point_err"])
    fig = Figure(figsize=FIGURE_SIZE, layout="constrained")
    ax = fig.add_subplot()
    flagged = np.asarray(intervals["flags"]) != 0
    interpolated = np.asarray(intervals["interpolated"], dtype=bool)
    starts, stops = _values(intervals["t_start"]), _values(intervals["t_stop"])
    labelled = set()
    for start, stop, bad, bridged in zip(starts, stops, flagged, interpolated, strict=True):
        if not bad:
            continue
        span = clock.hours(zero_point_columns(np.array([start, stop]), meta))
        label = "interpolated stretch" if bridged else "flagged stretch"
        ax.axvspan(
            *span,
            color="tab:orange" if bridged else "tab:red",
            alpha=0.2,
            lw=0,
            label=None if label in labelled else label,
        )
        labelled.add(label)
    ax.fill_between(hours, z - err, z + err, color="tab:blue", alpha=0.3, lw=0)
    ax.plot(hours, z, "-", color="tab:blue", label="zero point (band: 1 sigma)")
    clear = intervals.meta.get("clear_level_mag")
    if clear is not None and np.isfinite(clear):
        ax.axhline(float(clear), color="0.3", ls="--", lw=0.8, label="clear level")
    time_axis(ax, clock)
    ax.set_ylabel("zero point (mag for 1 e$^-$/s)")
    ax.legend(loc="best", fontsize="small")
    ax.grid(alpha=0.3)
    return fig


def star_flat_figure(star_flat: Table) -> Figure:
    """Stars' zero-point residual in bins of chip columns, with the fitted trend.

    Parameters
    ----------
    star_flat : astropy.table.Table
        The zeropoint stage's ``star_flat`` (``column_start``,
        ``column_stop`` pix, ``offset``, ``offset_err`` mag; meta ``slope``
        mag/pix and ``deviant`` bin indices).
    """
    start, stop = _values(star_flat["column_start"]), _values(star_flat["column_stop"])
    centre = 0.5 * (start + stop - 1)
    offset = _values(star_flat["offset"]) * 1e3
    error = _values(star_flat["offset_err"]) * 1e3
    fig = Figure(figsize=FIGURE_SIZE, layout="constrained")
    ax = fig.add_subplot()
    ax.errorbar(centre, offset, yerr=error, fmt="o", ms=3, color="tab:blue", label="bin median")
    deviant = [int(k) for k in star_flat.meta.get("deviant", [])]
    if deviant:
        ax.plot(centre[deviant], offset[deviant], "x", ms=9, color="tab:red", label="deviant bin")
    slope = star_flat.meta.get("slope")
    good = np.isfinite(offset)
    if slope is not None and np.isfinite(slope) and good.any():
        level = np.average(offset[good] - 1e3 * slope * centre[good])
        ax.plot(centre, level + 1e3 * slope * centre, "--", color="0.3", label="trend")
    ax.axhline(0.0, color="0.5", lw=0.8)
    ax.set_xlabel("chip column, across the scan (pix)")
    ax.set_ylabel("star residual (mmag)")
    ax.legend(loc="best", fontsize="small")
    ax.grid(alpha=0.3)
    return fig
