"""The HTML page: one self-contained file, PNG figures inline, no network resources."""

from __future__ import annotations

import base64
import html
import io
import logging
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from matplotlib.figure import Figure

from pipeline.report._figures import FIGURES, FigureSpec
from pipeline.report._options import ReportOptions

__all__ = [
    "DrawnFigure",
    "draw_figures",
    "figure_png",
    "page_document",
    "problem_block",
    "render_page",
    "section",
]

log = logging.getLogger(__name__)

#: Nothing may be fetched: images only as data URIs, inline styles, no scripts.
CONTENT_POLICY = "default-src 'none'; img-src data:; style-src 'unsafe-inline'"

_STYLE = """
body { font-family: sans-serif; margin: 1.5em auto; max-width: 60em; color: #222; }
h1 { font-size: 1.5em; } h2 { font-size: 1.15em; margin-top: 1.6em; }
table { border-collapse: collapse; } td, th { padding: 0.2em 0.8em; text-align: left;
  border-bottom: 1px solid #ddd; vertical-align: top; }
.problems { background: #fff3f0; border-left: 4px solid #c33; padding: 0.5em 1em; }
.ok { background: #f0fff3; border-left: 4px solid #3a3; padding: 0.5em 1em; }
.note { color: #855; font-style: italic; }
figure { margin: 0; } img { max-width: 100%; }
figcaption { font-size: 0.92em; color: #444; }
.wide { overflow-x: auto; } .nights td, .nights th { white-space: nowrap; }
"""


@dataclass(frozen=True)
class DrawnFigure:
    """A figure ready for the page: a PNG, or the note that says why there is none."""

    spec: FigureSpec
    png: bytes | None
    note: str = ""
    failed: bool = False


def figure_png(figure: Figure, dpi: int) -> bytes:
    """The figure as PNG bytes (Agg renderer)."""
    buffer = io.BytesIO()
    figure.savefig(buffer, format="png", dpi=dpi, metadata={"Software": None})
    return buffer.getvalue()


def draw_figures(
    products: Mapping[str, Any],
    options: ReportOptions,
    *,
    sources: Mapping[str, str] | None = None,
    specs: Sequence[FigureSpec] = FIGURES,
) -> list[DrawnFigure]:
    """Draw every figure whose products exist; a note for the others.

    Parameters
    ----------
    products : mapping
        Product key -> value; a key that is absent or None is missing.
    options : ReportOptions
    sources : mapping, optional
        Product key -> the stage that makes it, to name it in the notes.
    specs : sequence of FigureSpec
        The figures, default :data:`FIGURES`.

    Returns
    -------
    list of DrawnFigure
        In the order of ``specs``.  A figure that raises is reported in its
        note (and logged) rather than stopping the page.
    """
    sources = sources or {}
    drawn = []
    for spec in specs:
        missing = [key for key in spec.needs if products.get(key) is None]
        if missing:
            what = ", ".join(
                f"{key} (from stage {sources[key]})" if key in sources else key for key in missing
            )
            drawn.append(DrawnFigure(spec, None, f"Not drawn: this night has no {what}."))
            continue
        try:
            png = figure_png(spec.draw(products, options), options.dpi)
        except Exception as exc:  # one broken figure must not cost the whole page
            log.warning("figure %s could not be drawn: %s", spec.name, exc, exc_info=True)
            note = f"Not drawn: the figure failed ({type(exc).__name__}: {exc})."
            drawn.append(DrawnFigure(spec, None, note, failed=True))
            continue
        drawn.append(DrawnFigure(spec, png))
    return drawn


def _rows(rows: Sequence[tuple[str, str]]) -> str:
    return "\n".join(
        f"<tr><th>{html.escape(str(label))}</th><td>{html.escape(str(value))}</td></tr>"
        for label, value in rows
    )


def _figure(item: DrawnFigure) -> str:
    spec = item.spec
    title = f'<h2 id="{html.escape(spec.name)}">{html.escape(spec.title)}</h2>'
    if item.png is None:
        return f'{title}\n<p class="note">{html.escape(item.note)}</p>'
    data = base64.b64encode(item.png).decode("ascii")
    return (
        f"{title}\n<figure>"
        f'<img src="data:image/png;base64,{data}" alt="{html.escape(spec.title)}">'
        f"<figcaption>{html.escape(spec.caption)}</figcaption></figure>"
    )


def problem_block(
    problems: Sequence[str],
    where: str = "in this run",
    none: str = "The run reported no problems.",
) -> str:
    """The problems in words (escaped), or the line ``none`` when there are none."""
    if not problems:
        return f'<div class="ok">{html.escape(none)}</div>\n'
    items = "\n".join(f"<li>{html.escape(line)}</li>" for line in problems)
    return (
        f'<div class="problems"><strong>{len(problems)} problem'
        f"{'' if len(problems) == 1 else 's'} {html.escape(where)}:</strong>"
        f"<ul>{items}</ul></div>\n"
    )


def section(name: str, heading: str | None, rows: Sequence[tuple[str, str]]) -> str:
    """A table of label and value rows (escaped), under an optional heading."""
    title = "" if heading is None else f'<h2 id="{name}">{html.escape(heading)}</h2>\n'
    return f'{title}<table class="{name}">\n{_rows(rows)}\n</table>\n'


def page_document(title: str, body: str, figures: Sequence[DrawnFigure]) -> str:
    """The whole page: head (style, content policy), the title, ``body``, then the figures.

    ``title`` is escaped here; ``body`` is HTML made of escaped parts.
    """
    title = html.escape(title)
    drawn = "\n".join(_figure(item) for item in figures)
    return f"""<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta http-equiv="Content-Security-Policy" content="{CONTENT_POLICY}">
<title>{title}</title>
<style>{_STYLE}</style>
</head>
<body>
<h1>{title}</h1>
{body}{drawn}
</body>
</html>
"""


def render_page(
    *,
    night: str,
    about: Sequence[tuple[str, str]],
    problems: Sequence[str],
    summary: Sequence[tuple[str, str]],
    figures: Sequence[DrawnFigure],
) -> str:
    """The report page as one HTML string.

    Every text is escaped (:func:`html.escape`), whether it comes from a
    header, the config or the run; the page loads nothing (images are
    ``data:`` URIs, the style is inline, there is no script) and says so to
    the browser with a content security policy.

    Parameters
    ----------
    night : str
        The night's name.
    about : sequence of (str, str)
        Site, telescope, camera, filter... as label and value.
    problems : sequence of str
        What went wrong in the run, one sentence each (shown first).
    summary : sequence of (str, str)
        The summary table.
    figures : sequence of DrawnFigure
    """
    body = problem_block(problems) + section("about", None, about)
    body += section("summary", "Summary", summary)
    return page_document(f"zdrift nightly report: {night}", body, figures)
