"""The nightly report: one self-contained HTML page per night.

The page opens with the problems the run reported, in words, then a summary
table and the figures (:data:`FIGURES`).  Each figure is a small pure
function from tables and arrays to a matplotlib Figure with a one-line
caption; a figure whose products do not exist is left out with a note
(nothing is ever drawn from made-up data).  Figures are PNGs embedded as
``data:`` URIs; the page loads nothing from anywhere, and every text from a
header, the config or the run is HTML-escaped.

Layers: :func:`collect_products` asks the runner for the night's products
(and reduces the rectified images stretch by stretch); :func:`build_report`
turns them into the page's text; the command line (``zdrift report``)
writes it.

Example
-------
>>> from pipeline.config import load_config              # doctest: +SKIP
>>> config = load_config("configs/demo.yaml")            # doctest: +SKIP
>>> page = report_night(config)                          # doctest: +SKIP
"""

from __future__ import annotations

from typing import Any

import pipeline
from pipeline.config import Config
from pipeline.report._clock import NightClock
from pipeline.report._collect import PRODUCT_SOURCES, NightProducts, collect_products
from pipeline.report._figures import (
    FIGURES,
    FigureSpec,
    column_flat_figure,
    quicklook_figure,
    seeing_across_chip_figure,
    seeing_along_night_figure,
    sky_along_night_figure,
    sources_along_night_figure,
)
from pipeline.report._options import ReportOptions
from pipeline.report._page import DrawnFigure, draw_figures, render_page
from pipeline.report._sky import (
    bin_image,
    measure_sky,
    pixel_area_arcsec2,
    place_pieces,
    sky_surface_brightness,
)
from pipeline.report._summary import problem_lines, summary_rows

__all__ = [
    "FIGURES",
    "PRODUCT_SOURCES",
    "DrawnFigure",
    "FigureSpec",
    "NightClock",
    "NightProducts",
    "ReportOptions",
    "bin_image",
    "build_report",
    "collect_products",
    "column_flat_figure",
    "draw_figures",
    "measure_sky",
    "pixel_area_arcsec2",
    "place_pieces",
    "problem_lines",
    "quicklook_figure",
    "render_page",
    "report_night",
    "seeing_across_chip_figure",
    "seeing_along_night_figure",
    "sky_along_night_figure",
    "sky_surface_brightness",
    "sources_along_night_figure",
    "summary_rows",
]


def _about(config: Config, header: Any) -> list[tuple[str, str]]:
    site, camera = config.site(), config.camera()
    rows = [
        ("night", config.night.name),
        ("site", site.name),
        ("telescope", camera.telescope),
        ("camera", camera.name),
    ]
    if header is not None:
        rows.append(("filter", str(header.get("FILTER", "not recorded")).strip()))
    rows.append(("zdrift version", pipeline.__version__))
    return rows


def build_report(night: NightProducts, config: Config, options: ReportOptions) -> str:
    """The page for a night's gathered products.

    Parameters
    ----------
    night : NightProducts
        From :func:`collect_products` (or made by hand, e.g. in tests).
    config : Config
        The night's config (names of the night, site and camera).
    options : ReportOptions

    Returns
    -------
    str
        The HTML page.
    """
    figures = draw_figures(night.products, options, sources=PRODUCT_SOURCES)
    problems = [] if night.status is None else problem_lines(night.status)
    problems += [f"Figure '{item.spec.title}': {item.note}" for item in figures if item.failed]
    return render_page(
        night=config.night.name,
        about=_about(config, night.header),
        problems=problems,
        summary=summary_rows(night.products, night.status),
        figures=figures,
    )


def report_night(config: Config) -> str:
    """Gather the night's products and return its report page (HTML).

    Options come from the config's ``report`` section.
    """
    options = config.section("report") or ReportOptions()
    return build_report(collect_products(config, options), config, options)
