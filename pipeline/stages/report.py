"""Report: the night's self-contained HTML page, the last stage of a run.

Night scope.  It requires the products of the stages before it but can do
without every one of them (``Stage.optional``): a night whose astrometry
failed, or a pipeline without a zeropoint stage, still gets a page, which
says at the top what failed and why (the ``run_status`` input) and notes
each figure it could not draw.  The figures, tables and words are made by
:mod:`pipeline.report`; the runner stores the page as ``page.html``.

Its inputs are hashed like any stage's (the upstream products and the state
of every earlier unit), so a rerun of an unchanged night does not rebuild
the page, and a changed product or a new failure does.
"""

from __future__ import annotations

import logging
from typing import Any

import pipeline
from pipeline.report import ReportOptions
from pipeline.stages.base import RUN_STATUS, Stage

__all__ = ["PAGE", "STAGE", "about_rows"]

log = logging.getLogger(__name__)

#: Name of the page product (stored as ``page.html``).
PAGE = "page"

#: Upstream stages the page draws from, all optional.
_UPSTREAM = ("ingest", "columns", "calibrate", "rectify", "catalog", "astrometry", "zeropoint")


def about_rows(context: Any, header: Any) -> list[tuple[str, str]]:
    """Night, site, telescope, camera, filter (from the FLUX header) and version."""
    rows = [
        ("night", context.night),
        ("site", context.site.name),
        ("telescope", context.camera.telescope),
        ("camera", context.camera.name),
    ]
    if header is not None:
        rows.append(("filter", str(header.get("FILTER", "not recorded")).strip()))
    rows.append(("zdrift version", pipeline.__version__))
    return rows


def _run(*, inputs, options: ReportOptions, context) -> dict[str, Any]:
    from pipeline.report import build_report, collect_products, night_sky, summary_rows

    night = collect_products(inputs, options, status=inputs.get(RUN_STATUS))
    night.products["n_columns"] = int(context.camera.n_columns)
    night.products["tdi_rows"] = int(context.camera.tdi_rows)
    page = build_report(night, context.night, about_rows(context, night.header), options)
    log.info("report: page of night %s from %d products", context.night, len(night.products))
    products = {
        PAGE: page,
        "summary": [list(row) for row in summary_rows(night.products, night.status)],
    }
    if "sky" in night.products:
        products["sky"] = night_sky(night.products, options)
    return products


#: Declaration of the report stage: night scope, last; every upstream stage is
#: optional, and it uses the stretches whose rectified images exist.
STAGE = Stage(
    name="report",
    run=_run,
    options=ReportOptions,
    requires=(*_UPSTREAM, RUN_STATUS),
    optional=_UPSTREAM,
    scope="night",
    uses=("site", "camera"),
    partial_inputs=True,
    description="The night's HTML report page: problems, summary and figures.",
    # 2: a line-time error within 3 sigma of zero asks for no correction; a
    # configured focal length is not called the spin period's; the sources are
    # astrometry's last measurement when it measured again; 3: the hours of
    # data leave out the rows calibrate found without data (readout dropouts);
    # the fitted focal length's difference from the nominal with its error;
    # the summary counts the out-of-date units and those not run; 4: a row for
    # the cloud astrometry saw and the centroids it kept; 5: and the stretches
    # whose positions' errors it widened
    version=5,
)
