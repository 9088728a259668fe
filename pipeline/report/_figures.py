"""The report's figures: small pure functions from tables and arrays to a Figure.

Each figure function takes the products it draws (tables, arrays) and
returns a :class:`matplotlib.figure.Figure` made without pyplot (no global
state, so figures can be drawn in threads).  :data:`FIGURES` registers them
for the page: each :class:`FigureSpec` names the products it needs, and the
page skips a figure with a note when one of them is absent.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any

import matplotlib
import numpy as np
from astropy.table import Table
from astropy.visualization import AsinhStretch, AsymmetricPercentileInterval, ImageNormalize
from matplotlib.figure import Figure

from pipeline.report._clock import FIGURE_SIZE as _SIZE
from pipeline.report._clock import NightClock, time_axis
from pipeline.report._options import ReportOptions
from pipeline.report._sky import sky_surface_brightness
from pipeline.report._smear import smear_figure
from pipeline.report._solved import (
    focal_length_figure,
    line_time_check,
    residual_map_figure,
    residuals_along_night_figure,
    star_flat_figure,
    zero_point_at_columns,
    zero_point_figure,
)

__all__ = [
    "FIGURES",
    "FigureSpec",
    "column_flat_figure",
    "night_sky",
    "quicklook_figure",
    "seeing_across_chip_figure",
    "seeing_along_night_figure",
    "sky_along_night_figure",
    "sources_along_night_figure",
]


def _whole_stretch_rows(seeing: Table) -> np.ndarray:
    """Mask of the seeing rows that cover a whole stretch (the widest per stretch)."""
    span = np.asarray(seeing["y_hi"]) - np.asarray(seeing["y_lo"])
    stretch = np.asarray(seeing["stretch"])
    whole = np.zeros(len(seeing), dtype=bool)
    for value in np.unique(stretch):
        rows = np.flatnonzero(stretch == value)
        whole[rows[np.argmax(span[rows])]] = True
    return whole


def seeing_along_night_figure(
    seeing: Table, clock: NightClock, pixel_scale: float | None = None
) -> Figure:
    """Seeing FWHM of each stretch against time.

    Parameters
    ----------
    seeing : astropy.table.Table
        Detect's seeing table (``stretch``, ``x_start``, ``x_stop``, ``y_lo``,
        ``y_hi``, ``fwhm`` in pix); the widest row of each stretch is its
        whole-stretch value.
    clock : NightClock
        Night column -> UTC.
    pixel_scale : float, optional
        arcsec per pixel, for a second axis in arcsec.
    """
    whole = seeing[_whole_stretch_rows(seeing)]
    x = 0.5 * (np.asarray(whole["x_start"], float) + np.asarray(whole["x_stop"], float))
    fig = Figure(figsize=_SIZE, layout="constrained")
    ax = fig.add_subplot()
    ax.plot(clock.hours(x), np.asarray(whole["fwhm"], float), "o-", color="tab:blue")
    time_axis(ax, clock)
    ax.set_ylabel("seeing FWHM (pix)")
    if pixel_scale:
        second = ax.secondary_yaxis(
            "right", functions=(lambda p: p * pixel_scale, lambda a: a / pixel_scale)
        )
        second.set_ylabel("seeing FWHM (arcsec)")
    ax.grid(alpha=0.3)
    return fig


def seeing_across_chip_figure(seeing: Table) -> Figure:
    """Seeing FWHM in bands of rows across the chip, every stretch and their median.

    Parameters
    ----------
    seeing : astropy.table.Table
        Detect's seeing table; rows narrower than their stretch's widest row
        are the bands across the chip.
    """
    bands = seeing[~_whole_stretch_rows(seeing)]
    y = 0.5 * (np.asarray(bands["y_lo"], float) + np.asarray(bands["y_hi"], float))
    fwhm = np.asarray(bands["fwhm"], float)
    fig = Figure(figsize=_SIZE, layout="constrained")
    ax = fig.add_subplot()
    ax.plot(y, fwhm, ".", color="0.6", label="one stretch")
    centres = np.unique(y)
    medians = [
        np.median(fwhm[(y == c) & np.isfinite(fwhm)]) if np.isfinite(fwhm[y == c]).any() else np.nan
        for c in centres
    ]
    ax.plot(centres, medians, "o-", color="tab:red", label="median of stretches")
    ax.set_xlabel("rectified row y, across the scan (pix)")
    ax.set_ylabel("seeing FWHM (pix)")
    ax.legend(loc="best", fontsize="small")
    ax.grid(alpha=0.3)
    return fig


def sky_along_night_figure(
    sky: Table, clock: NightClock, zero_point: float | np.ndarray, solved: bool = False
) -> Figure:
    """Sky surface brightness against time.

    Parameters
    ----------
    sky : astropy.table.Table
        ``x`` (night column, pix), ``sky_rate`` (electron / (s pix)) and
        ``pixel_area`` (arcsec^2), e.g. from :func:`measure_sky`.
    clock : NightClock
    zero_point : float or ndarray
        Magnitude of 1 electron per second, mag: one nominal value, or the
        night's solved zero point at each row of ``sky``.
    solved : bool
        Whether ``zero_point`` is the night's solved one (else the title says
        it is nominal).
    """
    mag = sky_surface_brightness(sky["sky_rate"], sky["pixel_area"], zero_point)
    fig = Figure(figsize=_SIZE, layout="constrained")
    ax = fig.add_subplot()
    ax.plot(clock.hours(sky["x"]), mag, ".-", color="tab:purple")
    ax.invert_yaxis()  # brighter sky up
    time_axis(ax, clock)
    ax.set_ylabel("sky (mag/arcsec$^2$)")
    if solved:
        ax.set_title("with the night's solved zero point", fontsize=9)
    else:
        title = f"NOMINAL zero point {float(zero_point):.2f} mag (1 e$^-$/s), not solved"
        ax.set_title(title, fontsize=9)
    ax.grid(alpha=0.3)
    return fig


def column_flat_figure(columns: Table) -> Figure:
    """The 1-D flat: relative response of each column, flagged columns marked.

    Parameters
    ----------
    columns : astropy.table.Table
        The columns product (``column``, ``flat``, ``flat_error``, ``flags``).
    """
    column = np.asarray(columns["column"])
    flat = np.asarray(columns["flat"], float)
    error = np.asarray(columns["flat_error"], float)
    flagged = np.asarray(columns["flags"]) != 0
    fig = Figure(figsize=_SIZE, layout="constrained")
    ax = fig.add_subplot()
    ax.fill_between(column, flat - error, flat + error, color="tab:blue", alpha=0.3, lw=0)
    ax.plot(column, flat, "-", color="tab:blue", lw=0.8, label="flat (band: 1 sigma)")
    shown = np.where(np.isfinite(flat), flat, np.nanmedian(flat) if np.isfinite(flat).any() else 1)
    ax.plot(column[flagged], shown[flagged], "x", color="tab:red", label="flagged column")
    ax.set_xlabel("detector column (pix)")
    ax.set_ylabel("relative response")
    ax.legend(loc="best", fontsize="small")
    ax.grid(alpha=0.3)
    return fig


def sources_along_night_figure(catalog: Table, clock: NightClock, bin_minutes: float) -> Figure:
    """Sources per minute and their median S/N in time bins.

    Parameters
    ----------
    catalog : astropy.table.Table
        Detect's night catalogue (``x`` in night columns, ``snr``).
    clock : NightClock
    bin_minutes : float
        Width of the time bins, minutes.
    """
    hours = clock.hours(np.asarray(catalog["x"], float))
    snr = np.asarray(catalog["snr"], float)
    fig = Figure(figsize=(_SIZE[0], 1.6 * _SIZE[1]), layout="constrained")
    top, bottom = fig.subplots(2, 1, sharex=True)
    if hours.size:
        # Equal bins of about bin_minutes spanning the data exactly, so that
        # no bin is only partly covered (a rate dip that is not real).
        first, last = hours.min(), hours.max()
        if (last - first) * 60.0 < bin_minutes:  # one bin of the nominal width
            centre, half = 0.5 * (first + last), 0.5 * bin_minutes / 60.0
            first, last = centre - half, centre + half
        n_bins = max(1, round((last - first) * 60.0 / bin_minutes))
        edges = np.linspace(first, last + 1e-9, n_bins + 1)
        counts, _ = np.histogram(hours, edges)
        minutes = np.diff(edges) * 60.0
        which = np.clip(np.digitize(hours, edges) - 1, 0, counts.size - 1)
        good = np.isfinite(snr)
        medians = [
            np.median(snr[good & (which == i)]) if np.any(good & (which == i)) else np.nan
            for i in range(counts.size)
        ]
        centres = 0.5 * (edges[:-1] + edges[1:])
        top.step(centres, counts / minutes, where="mid", color="tab:green")
        bottom.plot(centres, medians, "o-", color="tab:orange")
    top.set_ylabel("sources per minute")
    bottom.set_ylabel("median S/N")
    time_axis(bottom, clock)
    for ax in (top, bottom):
        ax.grid(alpha=0.3)
    return fig


def quicklook_figure(strip: np.ndarray, factor: int, max_aspect: float = 8.0) -> Figure:
    """The rectified strip, block-averaged, asinh stretch, cut into panels if long.

    The median of each column (across the scan) is subtracted first, so the
    sky's change along the night (twilight) does not swamp the stretch.
    Pixels without data (masked, gaps) are drawn red.

    Parameters
    ----------
    strip : ndarray, shape (ny, nx)
        The binned strip (NaN: no data), from night column 0.
    factor : int
        Its binning factor: one strip pixel is ``factor`` rectified pixels.
    max_aspect : float
        Longest panel, in strip heights; a longer strip is cut into panels.
    """
    strip = np.asarray(strip, dtype=float)
    ny, nx = strip.shape
    has_data = np.isfinite(strip).any(axis=0)
    level = np.zeros(nx)
    level[has_data] = np.nanmedian(strip[:, has_data], axis=0)
    strip = strip - level
    n_panels = max(1, int(np.ceil(nx / (max_aspect * ny))))
    width = int(np.ceil(nx / n_panels))
    finite = strip[np.isfinite(strip)]
    # Noise dark, stars bright but not clipped: 1st to 99.9th percentile under
    # an asinh stretch (common practice for survey quick-looks).
    norm = ImageNormalize(
        finite if finite.size else np.zeros(1),
        interval=AsymmetricPercentileInterval(1.0, 99.9),
        stretch=AsinhStretch(0.05),
    )
    cmap = matplotlib.colormaps["gray"].with_extremes(bad="#b03030")
    fig = Figure(figsize=(_SIZE[0], 0.6 + n_panels * _SIZE[0] / max_aspect), layout="constrained")
    axes = np.atleast_1d(fig.subplots(n_panels, 1, squeeze=False)[:, 0])
    for i, ax in enumerate(axes):
        lo, hi = i * width, min((i + 1) * width, nx)
        extent = (lo * factor, hi * factor, 0, ny * factor)
        ax.imshow(
            strip[:, lo:hi],
            origin="lower",
            cmap=cmap,
            norm=norm,
            extent=extent,
            aspect="auto",
            interpolation="nearest",
        )
        ax.set_ylabel("row y (pix)")
    axes[-1].set_xlabel(
        f"night column x, along the scan (pix; shown {factor} x {factor} binned, "
        "sky of each column subtracted; red: no data)"
    )
    return fig


# ----------------------------------------------------------------------- registry


@dataclass(frozen=True)
class FigureSpec:
    """A figure of the page.

    Parameters
    ----------
    name : str
        Identifier (the anchor and PNG name).
    title : str
        Heading on the page.
    needs : tuple of str
        Keys of the products mapping it draws from; if one is absent the page
        shows a note instead.
    draw : callable
        ``draw(products, options) -> Figure``.
    caption : str
        One line: what to look for.
    """

    name: str
    title: str
    needs: tuple[str, ...]
    draw: Callable[[Mapping[str, Any], ReportOptions], Figure]
    caption: str


def _seeing_night(products: Mapping[str, Any], options: ReportOptions) -> Figure:
    clock = NightClock(products["block_index"])
    return seeing_along_night_figure(products["seeing"], clock, products.get("pixel_scale"))


def _seeing_chip(products: Mapping[str, Any], options: ReportOptions) -> Figure:
    return seeing_across_chip_figure(products["seeing"])


def night_sky(products: Mapping[str, Any], options: ReportOptions) -> Table:
    """The sky along the night with the zero point it is measured with.

    Parameters
    ----------
    products : mapping
        ``sky`` (see :func:`measure_sky`, with ``pixel_area``) and, once
        solved, the zeropoint stage's ``zero_point``.
    options : ReportOptions
        For the nominal zero point used until one is solved.

    Returns
    -------
    astropy.table.Table
        ``sky`` plus ``zero_point`` (mag of 1 e-/s at each row) and
        ``sky_brightness`` (mag/arcsec^2); ``meta['solved']`` says whether
        the zero point is the night's solved one.
    """
    sky = Table(products["sky"], copy=True)
    zero_point = products.get("zero_point")
    solved = zero_point is not None
    if solved:
        sky["zero_point"] = zero_point_at_columns(zero_point, sky["x"])
    else:
        sky["zero_point"] = np.full(len(sky), options.nominal_zero_point)
    sky["zero_point"].unit = "mag"
    sky["sky_brightness"] = sky_surface_brightness(
        sky["sky_rate"], sky["pixel_area"], np.asarray(sky["zero_point"])
    )
    sky["sky_brightness"].unit = "mag / arcsec2"
    sky.meta["solved"] = solved
    return sky


def _sky(products: Mapping[str, Any], options: ReportOptions) -> Figure:
    clock = NightClock(products["block_index"])
    sky = night_sky(products, options)
    if not sky.meta["solved"]:
        return sky_along_night_figure(sky, clock, options.nominal_zero_point)
    return sky_along_night_figure(sky, clock, np.asarray(sky["zero_point"]), solved=True)


def _hours_of(products: Mapping[str, Any]) -> tuple[float, float]:
    """UTC span (hours) of the matched stars: what the residual cells along divide."""
    clock = NightClock(products["block_index"])
    return tuple(float(h) for h in clock.hours(np.asarray(products["matched_x_range"])))


def _residual_map(products: Mapping[str, Any], options: ReportOptions) -> Figure:
    n_columns = products["n_columns"]
    return residual_map_figure(products["residual_grid"], n_columns, _hours_of(products))


def _residual_night(products: Mapping[str, Any], options: ReportOptions) -> Figure:
    return residuals_along_night_figure(products["residual_grid"], _hours_of(products))


def _focal(products: Mapping[str, Any], options: ReportOptions) -> Figure:
    return focal_length_figure(products["astrometry_parameters"], products["tdi_rows"])


def _smear(products: Mapping[str, Any], options: ReportOptions) -> Figure:
    parameters = products.get("astrometry_parameters")
    line_time = None
    if parameters is not None and "tdi_rows" in products:
        line_time = line_time_check(parameters.meta, products["tdi_rows"])
    return smear_figure(products["smear_widths"], products["strip_rows"], line_time)


def _zero_point(products: Mapping[str, Any], options: ReportOptions) -> Figure:
    clock = NightClock(products["block_index"])
    return zero_point_figure(products["zero_point"], products["zp_intervals"], clock)


def _star_flat(products: Mapping[str, Any], options: ReportOptions) -> Figure:
    return star_flat_figure(products["star_flat"])


def _flat(products: Mapping[str, Any], options: ReportOptions) -> Figure:
    return column_flat_figure(products["columns"])


def _sources(products: Mapping[str, Any], options: ReportOptions) -> Figure:
    clock = NightClock(products["block_index"])
    return sources_along_night_figure(products["catalog"], clock, options.time_bin_minutes)


def _quicklook(products: Mapping[str, Any], options: ReportOptions) -> Figure:
    return quicklook_figure(products["strip"], products["strip_factor"])


#: The figures of the page, in page order.
FIGURES: tuple[FigureSpec, ...] = (
    FigureSpec(
        "seeing_night",
        "Seeing along the night",
        ("seeing", "block_index"),
        _seeing_night,
        "Seeing of each stretch from its bright isolated stars: look for jumps "
        "(focus, wind) and slow drifts.",
    ),
    FigureSpec(
        "seeing_chip",
        "Seeing across the chip",
        ("seeing",),
        _seeing_chip,
        "Seeing in bands of rows across the scan: a trend across the chip means tilt "
        "or field curvature, not the atmosphere.",
    ),
    FigureSpec(
        "sky",
        "Sky brightness along the night",
        ("sky", "block_index"),
        _sky,
        "Median sky of the rectified strip: twilight, moon and cloud show as a "
        "brighter sky; the level uses the solved zero point, or a NOMINAL one (said "
        "above the plot) when there is none.",
    ),
    FigureSpec(
        "zero_point",
        "Zero point along the night",
        ("zero_point", "zp_intervals", "block_index"),
        _zero_point,
        "Magnitude giving 1 e-/s against time: dips are cloud; shaded stretches are "
        "flagged (red) or bridged from their neighbours (orange).",
    ),
    FigureSpec(
        "star_flat",
        "Star flat (zero point across the chip)",
        ("star_flat",),
        _star_flat,
        "Stars' residual about the zero point in bins of chip columns: a slope or "
        "deviant bins mean the flat field is off there.",
    ),
    FigureSpec(
        "residual_map",
        "Astrometric residuals across the chip and along the night",
        ("residual_grid", "matched_x_range", "block_index", "n_columns"),
        _residual_map,
        "Mean star-minus-model offset in cells: coloured patches mean the geometry "
        "is off there (tilt, wander, a wrong line time).",
    ),
    FigureSpec(
        "residual_night",
        "Astrometric residuals along the night",
        ("residual_grid", "matched_x_range", "block_index"),
        _residual_night,
        "Mean and rms offsets of the matched stars in time cells: a drift or a jump "
        "means the clock or the mirror changed during the night.",
    ),
    FigureSpec(
        "focal_length",
        "Focal length and line time",
        ("astrometry_parameters", "tdi_rows"),
        _focal,
        "Focal length fitted to the stars against the spin period's, and the line "
        "time clocked against the one matching the drift: apply the correction above.",
    ),
    FigureSpec(
        "smear",
        "Smear: PSF widths along and across the scan",
        ("smear_widths", "strip_rows"),
        _smear,
        "Bright isolated stars' widths (solid) beside the geometry's for the same stars "
        "(dashed): along above and across below it means the line time or drift rate is "
        "off (the line-time error above says by how much); a gap at one side, tilt.",
    ),
    FigureSpec(
        "flat",
        "The 1-D flat (column response)",
        ("columns",),
        _flat,
        "Relative response per column with its error: look for new dead, hot or "
        "flagged columns and a wide error band.",
    ),
    FigureSpec(
        "sources",
        "Sources along the night",
        ("catalog", "block_index"),
        _sources,
        "Detections per minute and their median S/N: dips mean cloud, bright sky "
        "or a problem in the chain.",
    ),
    FigureSpec(
        "quicklook",
        "Quick look at the rectified strip",
        ("strip", "strip_factor"),
        _quicklook,
        "The rectified strip, asinh stretch: look for trails, glints, gaps and "
        "stripes the flat did not remove.",
    ),
)
