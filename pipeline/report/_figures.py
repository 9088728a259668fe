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

from pipeline.report._clock import NightClock
from pipeline.report._options import ReportOptions
from pipeline.report._sky import sky_surface_brightness

__all__ = [
    "FIGURES",
    "FigureSpec",
    "column_flat_figure",
    "quicklook_figure",
    "seeing_across_chip_figure",
    "seeing_along_night_figure",
    "sky_along_night_figure",
    "sources_along_night_figure",
]

#: Size of a one-panel figure, inches (about 800 px wide at the default dpi).
_SIZE = (9.0, 3.4)


def _clock_text(hours: float, position: object = None) -> str:
    """Hours since 0 h as ``HH:MM:SS`` (past 24 h on the next day)."""
    seconds = round(hours * 3600.0)
    return f"{seconds // 3600 % 24:02d}:{seconds // 60 % 60:02d}:{seconds % 60:02d}"


def _time_axis(ax: Any, clock: NightClock) -> None:
    """Label the x axis as UTC clock time of mid-exposure."""
    ax.xaxis.set_major_formatter(_clock_text)
    ax.set_xlabel(f"UTC of mid-exposure (h:m:s, night of {clock.date})")


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
    _time_axis(ax, clock)
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


def sky_along_night_figure(sky: Table, clock: NightClock, zero_point: float) -> Figure:
    """Sky surface brightness against time, with a nominal zero point.

    Parameters
    ----------
    sky : astropy.table.Table
        ``x`` (night column, pix), ``sky_rate`` (electron / (s pix)) and
        ``pixel_area`` (arcsec^2), e.g. from :func:`measure_sky`.
    clock : NightClock
    zero_point : float
        Magnitude of 1 electron per second (nominal until it is solved), mag.
    """
    mag = sky_surface_brightness(sky["sky_rate"], sky["pixel_area"], zero_point)
    fig = Figure(figsize=_SIZE, layout="constrained")
    ax = fig.add_subplot()
    ax.plot(clock.hours(sky["x"]), mag, ".-", color="tab:purple")
    ax.invert_yaxis()  # brighter sky up
    _time_axis(ax, clock)
    ax.set_ylabel("sky (mag/arcsec$^2$)")
    ax.set_title(f"NOMINAL zero point {zero_point:.2f} mag (1 e$^-$/s), not solved", fontsize=9)
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
    _time_axis(bottom, clock)
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


def _sky(products: Mapping[str, Any], options: ReportOptions) -> Figure:
    clock = NightClock(products["block_index"])
    return sky_along_night_figure(products["sky"], clock, options.nominal_zero_point)


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
        "brighter sky; the level uses a NOMINAL zero point until it is solved.",
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
