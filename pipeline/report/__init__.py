"""The nightly report: one self-contained HTML page per night.

The page opens with the problems the run reported, in words, then a summary
table and the figures (:data:`FIGURES`).  Each figure is a small pure
function from tables and arrays to a matplotlib Figure with a one-line
caption; a figure whose products do not exist is left out with a note
(nothing is ever drawn from made-up data).  Figures are PNGs embedded as
``data:`` URIs; the page loads nothing from anywhere, and every text from a
header, the config or the run is HTML-escaped.

Layers: the ``report`` stage (:mod:`pipeline.stages.report`) gets the
night's products from the runner; :func:`collect_products` picks what the
page draws (and reduces the rectified images stretch by stretch);
:func:`build_report` turns them into the page's text, which the runner
stores as ``<night>/report/night/page.html``.  ``zdrift run`` ends with it;
``zdrift report CONFIG`` runs that stage alone.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import TYPE_CHECKING

from pipeline._lazy import lazy_exports

if TYPE_CHECKING:
    from pipeline.report._collect import NightProducts
    from pipeline.report._options import ReportOptions

__all__ = [
    "FIGURES",
    "NIGHTS_FIGURES",
    "PRODUCT_SOURCES",
    "DrawnFigure",
    "FigureSpec",
    "NightClock",
    "NightProducts",
    "ReportOptions",
    "bin_image",
    "build_nights_report",
    "build_report",
    "collect_products",
    "column_flat_figure",
    "draw_figures",
    "focal_length_figure",
    "line_time_check",
    "measure_sky",
    "night_sky",
    "pixel_area_arcsec2",
    "place_pieces",
    "pooled_residuals",
    "problem_lines",
    "quicklook_figure",
    "render_page",
    "residual_map_figure",
    "residuals_along_night_figure",
    "seeing_across_chip_figure",
    "seeing_along_night_figure",
    "sky_along_night_figure",
    "sky_surface_brightness",
    "solved_rows",
    "sources_along_night_figure",
    "star_flat_figure",
    "summary_rows",
    "zero_point_at_columns",
    "zero_point_figure",
]

# Imported on first use: the report stage's options without matplotlib.
__getattr__, __dir__ = lazy_exports(
    __name__,
    {
        "_clock": ["NightClock"],
        "_collect": ["PRODUCT_SOURCES", "NightProducts", "collect_products"],
        "_figures": [
            "FIGURES",
            "FigureSpec",
            "column_flat_figure",
            "night_sky",
            "quicklook_figure",
            "seeing_across_chip_figure",
            "seeing_along_night_figure",
            "sky_along_night_figure",
            "sources_along_night_figure",
        ],
        "_nights": ["NIGHTS_FIGURES", "build_nights_report", "pooled_residuals"],
        "_options": ["ReportOptions"],
        "_page": ["DrawnFigure", "draw_figures", "render_page"],
        "_sky": [
            "bin_image",
            "measure_sky",
            "pixel_area_arcsec2",
            "place_pieces",
            "sky_surface_brightness",
        ],
        "_solved": [
            "focal_length_figure",
            "line_time_check",
            "residual_map_figure",
            "residuals_along_night_figure",
            "star_flat_figure",
            "zero_point_at_columns",
            "zero_point_figure",
        ],
        "_summary": ["problem_lines", "solved_rows", "summary_rows"],
    },
)


def build_report(
    night: NightProducts,
    name: str,
    about: Sequence[tuple[str, str]],
    options: ReportOptions,
) -> str:
    """The page for a night's gathered products.

    Parameters
    ----------
    night : NightProducts
        From :func:`collect_products` (or made by hand, e.g. in tests).
    name : str
        The night's name.
    about : sequence of (str, str)
        Site, telescope, camera, filter... as label and value (escaped on
        the page like every other text).
    options : ReportOptions

    Returns
    -------
    str
        The HTML page.
    """
    from pipeline.report._collect import PRODUCT_SOURCES
    from pipeline.report._page import draw_figures, render_page
    from pipeline.report._summary import problem_lines, summary_rows

    figures = draw_figures(night.products, options, sources=PRODUCT_SOURCES)
    problems = [] if night.status is None else problem_lines(night.status)
    problems += [f"Figure '{item.spec.title}': {item.note}" for item in figures if item.failed]
    return render_page(
        night=name,
        about=about,
        problems=problems,
        summary=summary_rows(night.products, night.status),
        figures=figures,
    )
