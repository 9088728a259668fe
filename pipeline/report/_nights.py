"""The page across the nights of a mosaic: the nightly figures side by side.

One row per night of the nightly summary, and figures that overlay the
nights: seeing and sky brightness along each night, the zero point along
each night, and the astrometric residuals of each night.  Each night keeps
its colour in every figure.  Pure functions of the nights' products; the
runner reads them (:mod:`pipeline.runner._strip`).
"""

from __future__ import annotations

import html
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
from matplotlib.figure import Figure

from pipeline.report._clock import FIGURE_SIZE, NightClock, _clock_text
from pipeline.report._figures import FigureSpec, _whole_stretch_rows
from pipeline.report._options import ReportOptions
from pipeline.report._page import DrawnFigure, draw_figures, page_document, problem_block, section
from pipeline.report._solved import _grid_cells, _values, zero_point_columns

__all__ = [
    "NIGHTS_FIGURES",
    "build_nights_report",
    "residuals_over_nights_figure",
    "seeing_over_nights_figure",
    "sky_over_nights_figure",
    "zero_point_over_nights_figure",
]

#: A night and its products: ``(name, {key: product})``.
Night = tuple[str, Mapping[str, Any]]


def _colours(n: int) -> list[Any]:
    from matplotlib import colormaps

    return [colormaps["tab10"](i % 10) for i in range(n)]


def _time_of_day_axis(ax: Any) -> None:
    ax.xaxis.set_major_formatter(_clock_text)
    ax.set_xlabel("UTC of mid-exposure (h:m:s, each night from 0 h of its first block's date)")
    ax.grid(alpha=0.3)
    ax.legend(loc="best", fontsize="small")


def seeing_over_nights_figure(nights: Sequence[Night]) -> Figure:
    """Seeing FWHM of each stretch against time of day, one line per night.

    Parameters
    ----------
    nights : sequence of (str, mapping)
        Each night's name and products: ``seeing`` (detect's seeing table,
        ``fwhm`` in pix) and ``block_index`` (ingest's, for the clock).
    """
    fig = Figure(figsize=FIGURE_SIZE, layout="constrained")
    ax = fig.add_subplot()
    for (name, products), colour in zip(nights, _colours(len(nights)), strict=True):
        whole = products["seeing"][_whole_stretch_rows(products["seeing"])]
        x = 0.5 * (np.asarray(whole["x_start"], float) + np.asarray(whole["x_stop"], float))
        hours = NightClock(products["block_index"]).hours(x)
        ax.plot(hours, np.asarray(whole["fwhm"], float), "o-", color=colour, label=name)
    ax.set_ylabel("seeing FWHM (pix)")
    _time_of_day_axis(ax)
    return fig


def sky_over_nights_figure(nights: Sequence[Night]) -> Figure:
    """Sky surface brightness against time of day, one line per night.

    Parameters
    ----------
    nights : sequence of (str, mapping)
        ``sky``: the report stage's sky table (``x``, ``sky_brightness`` in
        mag/arcsec^2; ``meta['solved']`` whether the night's zero point was
        used) and ``block_index``.
    """
    fig = Figure(figsize=FIGURE_SIZE, layout="constrained")
    ax = fig.add_subplot()
    for (name, products), colour in zip(nights, _colours(len(nights)), strict=True):
        sky = products["sky"]
        hours = NightClock(products["block_index"]).hours(np.asarray(sky["x"], float))
        label = name if sky.meta.get("solved") else f"{name} (NOMINAL zero point)"
        ax.plot(hours, _values(sky["sky_brightness"]), ".-", color=colour, label=label)
    ax.invert_yaxis()  # brighter sky up
    ax.set_ylabel("sky (mag/arcsec$^2$)")
    _time_of_day_axis(ax)
    return fig


def zero_point_over_nights_figure(nights: Sequence[Night]) -> Figure:
    """The solved zero point against time of day, one line per night.

    Parameters
    ----------
    nights : sequence of (str, mapping)
        ``zero_point``: the zeropoint stage's table (``t`` s,
        ``zero_point``, ``zero_point_err`` mag) and ``block_index``.
    """
    fig = Figure(figsize=FIGURE_SIZE, layout="constrained")
    ax = fig.add_subplot()
    for (name, products), colour in zip(nights, _colours(len(nights)), strict=True):
        zero_point = products["zero_point"]
        clock = NightClock(products["block_index"])
        hours = clock.hours(zero_point_columns(zero_point["t"], zero_point.meta))
        z, err = _values(zero_point["zero_point"]), _values(zero_point["zero_point_err"])
        ax.fill_between(hours, z - err, z + err, color=colour, alpha=0.25, lw=0)
        ax.plot(hours, z, "-", color=colour, label=name)
    ax.set_ylabel("zero point (mag for 1 e$^-$/s)")
    _time_of_day_axis(ax)
    return fig


def pooled_residuals(grid: Any) -> dict[str, float]:
    """Star-weighted mean and rms residual of a night, along and across the scan, mas.

    Parameters
    ----------
    grid : astropy.table.Table
        The astrometry stage's ``residual_grid`` (``n``, ``mean_along``,
        ``mean_across``, ``rms_along``, ``rms_across`` in mas per cell).
    """
    n = np.nan_to_num(_grid_cells(grid, "n"))
    total = n.sum()
    out = {}
    for what in ("along", "across"):
        mean = np.nan_to_num(_grid_cells(grid, f"mean_{what}"))
        rms = np.nan_to_num(_grid_cells(grid, f"rms_{what}"))
        out[f"mean_{what}"] = float((n * mean).sum() / total) if total else np.nan
        out[f"rms_{what}"] = float(np.sqrt((n * rms**2).sum() / total)) if total else np.nan
    return out


def residuals_over_nights_figure(nights: Sequence[Night]) -> Figure:
    """Each night's mean and rms astrometric residual, along and across the scan.

    Parameters
    ----------
    nights : sequence of (str, mapping)
        ``residual_grid``: the astrometry stage's residual grid (mas).
    """
    names = [name for name, _ in nights]
    pooled = [pooled_residuals(products["residual_grid"]) for _, products in nights]
    position = np.arange(len(nights))
    fig = Figure(figsize=(FIGURE_SIZE[0], 1.6 * FIGURE_SIZE[1]), layout="constrained")
    top, bottom = fig.subplots(2, 1, sharex=True)
    for what, colour, shift in (("along", "tab:blue", -0.08), ("across", "tab:orange", 0.08)):
        top.plot(
            position + shift,
            [p[f"mean_{what}"] for p in pooled],
            "o",
            color=colour,
            label=f"{what} the scan",
        )
        bottom.plot(
            position + shift,
            [p[f"rms_{what}"] for p in pooled],
            "o",
            color=colour,
            label=f"{what} the scan",
        )
    top.axhline(0.0, color="0.5", lw=0.8)
    top.set_ylabel("mean residual (mas)")
    bottom.set_ylabel("rms residual (mas)")
    bottom.set_xticks(position, names)
    bottom.set_xlabel("night")
    highest = np.nanmax([[p["rms_along"], p["rms_across"]] for p in pooled] + [[1.0, 1.0]])
    bottom.set_ylim(0.0, 1.15 * highest)
    for ax in (top, bottom):
        ax.grid(alpha=0.3)
        ax.legend(loc="best", fontsize="small")
    return fig


def _over(key: str, draw):
    def figure(products: Mapping[str, Any], options: ReportOptions) -> Figure:
        return draw(products[key])

    return figure


#: The figures of the page across the nights, in page order.  Each needs the
#: list of nights that have the product (``seeing_nights`` ...).
NIGHTS_FIGURES: tuple[FigureSpec, ...] = (
    FigureSpec(
        "seeing_nights",
        "Seeing along each night",
        ("seeing_nights",),
        _over("seeing_nights", seeing_over_nights_figure),
        "Seeing of each stretch, one colour per night: a night far above the others "
        "weighs little in the co-add; a shared trend points at the telescope, not the sky.",
    ),
    FigureSpec(
        "sky_nights",
        "Sky brightness along each night",
        ("sky_nights",),
        _over("sky_nights", sky_over_nights_figure),
        "Median sky of each night's rectified strip: a night brighter throughout had "
        "moon or cloud; a NOMINAL label means that night's zero point was not solved.",
    ),
    FigureSpec(
        "zero_point_nights",
        "Zero point along each night",
        ("zero_point_nights",),
        _over("zero_point_nights", zero_point_over_nights_figure),
        "Each night's zero point (band: 1 sigma): the clear nights of one camera and "
        "filter should agree to a few hundredths (another camera has its own level); a "
        "night or a stretch below its clear level lost light to cloud.",
    ),
    FigureSpec(
        "residuals_nights",
        "Astrometric residuals of each night",
        ("residuals_nights",),
        _over("residuals_nights", residuals_over_nights_figure),
        "Mean and rms star-minus-model offsets per night: a night whose mean is off "
        "zero or whose rms stands out will blur the co-add; open its page.",
    ),
)

#: Figure product -> the night product it overlays.
_NEEDS = {
    "seeing_nights": ("seeing", "block_index"),
    "sky_nights": ("sky", "block_index"),
    "zero_point_nights": ("zero_point", "block_index"),
    "residuals_nights": ("residual_grid",),
}


def _summary_table(nights: Sequence[Night]) -> str:
    """One row per night: its summary values (columns: every label any night has)."""
    labels: list[str] = []
    for _, products in nights:
        for label, _value in products.get("summary") or ():
            if label not in labels:
                labels.append(label)
    head = "".join(f"<th>{html.escape(str(label))}</th>" for label in ["night", *labels])
    rows = []
    for name, products in nights:
        values = dict(products.get("summary") or ())
        page = products.get("page")
        cell = html.escape(name)
        if page:
            cell = f'<a href="{html.escape(str(page))}">{cell}</a>'
        cells = "".join(f"<td>{html.escape(str(values.get(label, '-')))}</td>" for label in labels)
        rows.append(f"<tr><th>{cell}</th>{cells}</tr>")
    return (
        '<div class="wide"><table class="nights">'
        f"<tr>{head}</tr>\n" + "\n".join(rows) + "</table></div>"
    )


def build_nights_report(
    nights: Sequence[Night],
    name: str,
    about: Sequence[tuple[str, str]],
    options: ReportOptions,
) -> str:
    """The page across the nights of a mosaic.

    Parameters
    ----------
    nights : sequence of (str, mapping)
        Each night's name and the products that exist: ``summary`` (the
        report stage's rows of label and value), ``seeing``, ``block_index``,
        ``sky``, ``zero_point``, ``residual_grid``, and ``page`` (a relative
        link to the night's own page).  A night without a product is left
        out of that figure, and said so at the top.
    name : str
        The mosaic's name.
    about : sequence of (str, str)
        Label and value lines under the title (escaped).
    options : ReportOptions
        For the figures' dpi.

    Returns
    -------
    str
        The HTML page (self-contained, like the nightly page).
    """
    products: dict[str, Any] = {}
    problems = []
    for key, needs in _NEEDS.items():
        having = [(n, p) for n, p in nights if all(p.get(k) is not None for k in needs)]
        lacking = [n for n, p in nights if (n, p) not in having]
        products[key] = having or None
        if lacking and having:
            problems.append(f"{', '.join(lacking)}: no {' or '.join(needs)}; left out of '{key}'.")
    figures = draw_figures(products, options, specs=NIGHTS_FIGURES)
    problems += [f"Figure '{item.spec.title}': {item.note}" for item in figures if item.failed]
    none = "Not drawn: no night has the products it needs."
    figures = [
        DrawnFigure(item.spec, None, none) if item.png is None and not item.failed else item
        for item in figures
    ]
    body = (
        problem_block(problems, "on this page", "Every night has every product of this page.")
        + section("about", None, about)
        + '<h2 id="nights">The nights</h2>\n'
        + _summary_table(nights)
    )
    return page_document(f"zdrift report across nights: {name}", body, figures)
