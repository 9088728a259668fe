"""Gather a night's products for the report, through the runner's readers.

The report reads nothing itself: :func:`collect_products` asks the runner
(:func:`pipeline.runner.night_status`, :func:`pipeline.runner.open_product`)
for the products that exist and reduces the rectified images one stretch at a
time to what the page draws (the sky level in bins, a block-averaged strip),
so memory stays bounded by one stretch on a long night.
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from astropy.table import vstack

from pipeline.config import Config
from pipeline.report._options import ReportOptions
from pipeline.report._sky import bin_image, measure_sky, pixel_area_arcsec2, place_pieces

__all__ = ["PRODUCT_SOURCES", "NightProducts", "collect_products"]

log = logging.getLogger(__name__)

#: Product key -> (stage, product name) of the night-scoped products the report reads.
_NIGHT_PRODUCTS = {
    "block_index": ("ingest", "block_index"),
    "ingest_report": ("ingest", "ingest_report"),
    "columns": ("columns", "columns"),
    "seeing": ("catalog", "seeing"),
    "catalog": ("catalog", "catalog"),
}

#: Product key -> the stage that makes it (for the page's notes).
PRODUCT_SOURCES = {key: stage for key, (stage, _) in _NIGHT_PRODUCTS.items()} | {
    "sky": "rectify",
    "strip": "rectify",
    "strip_factor": "rectify",
    "pixel_scale": "rectify",
}


@dataclass
class NightProducts:
    """What the report knows about a night.

    ``products`` maps keys (see :data:`PRODUCT_SOURCES`) to tables, arrays
    and numbers; an absent key means the product does not exist.  ``status``
    is the night's :class:`pipeline.runner.NightStatus`; ``header`` the FLUX
    header of the first rectified stretch (or None).
    """

    products: dict[str, Any] = field(default_factory=dict)
    status: Any = None
    header: Any = None


def _usable(status: Any, stage: str, unit: str) -> bool:
    for entry in status.stages:
        if entry.name == stage:
            return entry.units.get(unit, ("missing", ""))[0] in ("done", "stale")
    return False


def collect_products(config: Config, options: ReportOptions) -> NightProducts:
    """Read the night's products that exist and reduce the rectified images.

    Parameters
    ----------
    config : Config
        The night's config.
    options : ReportOptions

    Returns
    -------
    NightProducts
        Done or stale products only (stale ones are listed among the
        problems); failed, damaged and missing ones are left out.
    """
    from pipeline.runner import night_status, open_product

    status = night_status(config)
    night = NightProducts(status=status)
    for key, (stage, name) in _NIGHT_PRODUCTS.items():
        if _usable(status, stage, "night"):
            try:
                night.products[key] = open_product(config, stage, "night", name)
            except ValueError as exc:  # the unit exists but lacks this product
                log.info("report: no %s: %s", key, exc)
    index = night.products.get("block_index")
    stretches = [
        unit
        for entry in status.stages
        if entry.name == "rectify"
        for unit, (state, _) in entry.units.items()
        if state in ("done", "stale")
    ]
    if index is None or not stretches:
        return night
    n_columns = int(np.max(np.asarray(index["row_start"]) + np.asarray(index["n_rows"])))
    factor = max(1, math.ceil(n_columns / options.quicklook_width))
    skies, pieces, areas = [], [], []
    for unit in sorted(stretches):
        image = open_product(config, "rectify", unit)
        header = image.meta
        night.header = header if night.header is None else night.header
        x_start = round(float(header.get("CRVAL1A", 0)))
        data = np.asarray(image.data, dtype=float)
        usable = (np.asarray(image.flags) == 0) & np.isfinite(data)
        ny, nx = data.shape
        area = pixel_area_arcsec2(image.wcs, 0.5 * (nx - 1), 0.5 * (ny - 1))
        sky = measure_sky(
            data,
            usable,
            x_start=x_start,
            exposure=float(header["XPOSURE"]),
            n_bins=options.sky_bins_per_stretch,
        )
        sky["pixel_area"] = np.full(len(sky), area)
        skies.append(sky)
        areas.append(area)
        pieces.append((x_start, bin_image(np.where(usable, data, np.nan), factor)))
    night.products["sky"] = vstack(skies)
    night.products["sky"]["pixel_area"].unit = "arcsec2"
    night.products["strip"] = place_pieces(pieces, factor)
    night.products["strip_factor"] = factor
    night.products["pixel_scale"] = float(np.sqrt(np.median(areas)))
    return night
