"""Smear diagnostics: measured PSF widths along and across the scan against the geometry's.

A star in a rectified (not deconvolved) product is the seeing profile
averaged over its TDI smear kernel, which the geometry predicts (rectify's
``smear_kernels``).  Each bright isolated star's rms width along the scan
(x) and across it (y) is measured in a window about its fitted first moment,
above the local background; the same widths of the model the geometry
predicts for it (detect's fitted seeing of its stretch and band, convolved
with the recorded kernel at its position, rendered at the same sub-pixel
position) are measured in the same window.  Window truncation, pixel
sampling and the resampling thus affect both sides alike, and a difference
is the smear the geometry misses: a measured along-scan width above the
prediction (and an across-scan one below it, as the round seeing fit
shares the excess) points at a wrong line time or drift rate; a difference
across only at some columns, at a tilt or field rotation.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np
from astropy.table import Table
from matplotlib.figure import Figure

from pipeline.report._clock import FIGURE_SIZE

__all__ = ["measure_smear_widths", "smear_figure", "window_widths"]

#: Fewest stars of a band of rows for its median widths to be drawn.
MIN_STARS = 3


def window_widths(stamp: np.ndarray, x0: float, y0: float, radius: float) -> tuple[float, float]:
    """Rms widths along x and y of the light within ``radius`` of ``(x0, y0)``, pixels.

    Parameters
    ----------
    stamp : ndarray, shape (ny, nx)
        Background-subtracted image; pixel ``[j, i]`` is centred on ``(i, j)``.
    x0, y0 : float
        Centre (the star's first moment), pixels.
    radius : float
        Window radius, pixels.

    Returns
    -------
    (float, float)
        ``sqrt(sum I (x - x0)^2 / sum I)`` and the same in y, over the pixels
        whose centres lie within ``radius``; NaN if the window holds no
        positive light.
    """
    ny, nx = stamp.shape
    yy, xx = np.mgrid[0:ny, 0:nx]
    dx, dy = xx - x0, yy - y0
    inside = (dx**2 + dy**2 <= radius**2) & np.isfinite(stamp)
    light = np.where(inside, stamp, 0.0)
    total = light.sum()
    if not total > 0:
        return np.nan, np.nan
    along = (light * dx**2).sum() / total
    across = (light * dy**2).sum() / total
    return float(np.sqrt(along)) if along > 0 else np.nan, (
        float(np.sqrt(across)) if across > 0 else np.nan
    )


def _isolated(x: np.ndarray, y: np.ndarray, distance: float) -> np.ndarray:
    from scipy.spatial import cKDTree

    if x.size < 2:
        return np.ones(x.size, dtype=bool)
    near, _ = cKDTree(np.column_stack([x, y])).query(np.column_stack([x, y]), k=2)
    return near[:, 1] > distance


def _band_fwhm(seeing: Table, x: float, y: float) -> tuple[float, float]:
    """Detect's seeing FWHM (pixels) and Moffat index of the band (else the stretch) at ``(x, y)``.

    The index is the table's ``beta`` column (one per stretch, detect 17 on),
    else its meta ``moffat_beta`` (default 3.5).
    """
    xs = np.asarray(seeing["x_start"], float)
    xe = np.asarray(seeing["x_stop"], float)
    lo, hi = np.asarray(seeing["y_lo"], float), np.asarray(seeing["y_hi"], float)
    fwhm = np.asarray(seeing["fwhm"], float)
    default = float(seeing.meta.get("moffat_beta", 3.5))
    beta = np.asarray(seeing["beta"], float) if "beta" in seeing.colnames else None
    rows = np.flatnonzero((x >= xs - 0.5) & (x < xe + 0.5) & (y >= lo) & (y < hi))
    rows = rows[np.isfinite(fwhm[rows])]
    if not rows.size:
        return np.nan, default
    row = rows[np.argmin(hi[rows] - lo[rows])]  # the narrowest band
    return float(fwhm[row]), default if beta is None else float(beta[row])


def measure_smear_widths(
    image: np.ndarray,
    usable: np.ndarray,
    catalog: Any,
    seeing: Table,
    kernels: Table,
    *,
    x_start: int = 0,
    min_snr: float = 30.0,
    max_stars: int = 60,
) -> Table:
    """Measured and predicted widths of a stretch's bright isolated stars.

    Parameters
    ----------
    image : ndarray, shape (ny, nx)
        Rectified stretch, electrons; columns are night columns from
        ``x_start`` (the scan axis), rows the rectified rows (across it).
    usable : ndarray of bool, shape (ny, nx)
        Pixels with data and no flag.
    catalog : astropy.table.Table
        Detect's sources (``x``, ``y`` night pixels, ``snr``, ``flags``);
        those outside the stretch are ignored.
    seeing : astropy.table.Table
        Detect's seeing table (``x_start``, ``x_stop``, ``y_lo``, ``y_hi``,
        ``fwhm`` pix, ``beta``); ``meta`` ``seeing_shape`` describes the
        profile, and ``moffat_beta`` its index where the table has no
        ``beta`` column (default Moffat 3.5).
    kernels : astropy.table.Table
        Rectify's ``smear_kernels`` of the stretch.
    x_start : int
        Night column of ``image[:, 0]``.
    min_snr : float
        Faintest star used (detect's matched-filter S/N).
    max_stars : int
        At most this many of the brightest qualifying stars.

    Returns
    -------
    astropy.table.Table
        Per star: ``x``, ``y`` (pix), ``fwhm_seeing`` (detect's, pix), the
        rms widths ``along``, ``across`` (measured) and ``model_along``,
        ``model_across`` (the geometry's), pixels; ``meta['radius']`` the
        window radius factor.
    """
    from pipeline.stages.detect._model import KernelGrid, SeeingProfile, model_image

    names = ("x", "y", "fwhm_seeing", "along", "across", "model_along", "model_across")
    rows: list[tuple[float, ...]] = []
    out = Table(names=names, dtype=[float] * len(names))
    if not len(catalog) or not len(kernels):
        return out
    x = np.asarray(getattr(catalog["x"], "value", catalog["x"]), float)
    y = np.asarray(getattr(catalog["y"], "value", catalog["y"]), float)
    snr = np.asarray(getattr(catalog["snr"], "value", catalog["snr"]), float)
    flags = np.asarray(catalog["flags"]).astype(np.int64)
    ny, nx = image.shape
    grid = KernelGrid(kernels)
    shape = str(seeing.meta.get("seeing_shape", "moffat"))
    fwhm_all = np.asarray(seeing["fwhm"], float)
    reach = 4.0 * (np.nanmax(fwhm_all) if np.isfinite(fwhm_all).any() else 3.0)
    half = float(np.max(np.abs(np.asarray(kernels["dx"], float))))
    radius = reach + half
    box = int(np.ceil(radius + 4.0))
    own = (x >= x_start + box) & (x < x_start + nx - box) & (y >= box) & (y < ny - box)
    chosen = own & (flags == 0) & (snr >= min_snr) & _isolated(x, y, 2.0 * radius)
    order = [i for i in np.argsort(-snr) if chosen[i]][:max_stars]
    for i in order:
        fwhm, beta = _band_fwhm(seeing, x[i], y[i])
        if not np.isfinite(fwhm):
            continue
        ci, cj = int(np.rint(x[i] - x_start)), int(np.rint(y[i]))
        cut = np.s_[cj - box : cj + box + 1, ci - box : ci + box + 1]
        data, good = image[cut], usable[cut]
        x0, y0 = x[i] - x_start - (ci - box), y[i] - (cj - box)
        jj, ii = np.mgrid[0 : data.shape[0], 0 : data.shape[1]]
        rr = np.hypot(ii - x0, jj - y0)
        ring = good & (rr > radius) & (rr <= radius + 4.0)
        if not good[rr <= radius].all() or ring.sum() < 8:
            continue  # a flagged pixel in the window, or no background around it
        measured = window_widths(data - np.median(data[ring]), x0, y0, radius)
        dx, dy = grid(x[i], y[i])
        model = model_image(
            data.shape, x0, y0, dx, dy, SeeingProfile(fwhm, shape, beta), 1.0,
            grid.response(x[i], y[i]),
        )  # fmt: skip
        predicted = window_widths(model, x0, y0, radius)
        rows.append((x[i], y[i], fwhm, *measured, *predicted))
    if rows:
        out = Table(rows=rows, names=names, dtype=[float] * len(names))
    for name in names:
        out[name].unit = "pix"
    out.meta["radius"] = radius
    return out


def smear_figure(
    widths: Table, n_rows: int, line_time: Mapping[str, float] | None = None, bands: int = 8
) -> Figure:
    """Median measured and predicted rms widths, along and across the scan, against row.

    Parameters
    ----------
    widths : astropy.table.Table
        :func:`measure_smear_widths` of every stretch, stacked.
    n_rows : int
        Rectified rows across the scan (the chip's columns), for the bands.
    line_time : mapping, optional
        :func:`pipeline.report.line_time_check` of the astrometry, shown on
        the figure: the line-time error, its correction and the smear it
        causes.
    bands : int
        Bands of rows the stars are pooled in.
    """
    y = np.asarray(widths["y"], float)
    edges = np.linspace(0.0, float(n_rows), bands + 1)
    centres = 0.5 * (edges[:-1] + edges[1:])
    fig = Figure(figsize=FIGURE_SIZE, layout="constrained")
    ax = fig.add_subplot()
    styles = (
        ("along", "tab:blue", "-", "o", "measured along the scan"),
        ("model_along", "tab:blue", "--", None, "geometry's along"),
        ("across", "tab:orange", "-", "s", "measured across the scan"),
        ("model_across", "tab:orange", "--", None, "geometry's across"),
    )
    band = np.digitize(y, edges[1:-1])
    counts = np.bincount(band, minlength=bands)
    for name, colour, line, marker, label in styles:
        values = np.asarray(widths[name], float)
        medians = np.array(
            [
                np.nanmedian(values[band == k]) if counts[k] >= MIN_STARS else np.nan
                for k in range(bands)
            ]
        )
        ax.plot(centres, medians, ls=line, marker=marker, color=colour, label=label)
    ax.set_xlabel("rectified row y, across the scan (the chip's columns) (pix)")
    ax.set_ylabel("rms width in window (pix)")
    title = f"{len(widths)} bright isolated stars, median per band of {n_rows // bands} rows"
    if line_time is not None and line_time.get("significant", True):
        title += (
            f"; line time off by {line_time['error_s'] * 1e6:+.2f} us "
            f"({line_time['relative'] * 1e6:+.0f} ppm): smear {line_time['smear_px']:.2f} pix"
        )
    elif line_time is not None:
        title += "; line-time error within 3 sigma of zero"
    ax.set_title(title, fontsize=9)
    ax.legend(loc="best", fontsize="small", ncols=2)
    ax.grid(alpha=0.3)
    return fig
