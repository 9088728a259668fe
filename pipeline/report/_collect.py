"""Gather a night's products for the report from the report stage's inputs.

The report reads nothing itself: the runner hands the ``report`` stage the
products of the stages before it (those that exist; see
``Stage.optional``), and :func:`collect_products` picks what the page
draws and reduces the rectified images one stretch at a time to the sky
level in bins and a block-averaged strip, so memory stays bounded by one
stretch on a long night.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from astropy.table import vstack

from pipeline.products import ccddata_from_hdulist
from pipeline.report._options import ReportOptions
from pipeline.report._sky import bin_image, measure_sky, pixel_area_arcsec2, place_pieces
from pipeline.report._smear import measure_smear_widths

__all__ = ["PRODUCT_SOURCES", "NightProducts", "collect_products", "rows_without_data"]

log = logging.getLogger(__name__)

#: Product key -> (stage, product name) of the night-scoped products the report reads.
_NIGHT_PRODUCTS = {
    "block_index": ("ingest", "block_index"),
    "ingest_report": ("ingest", "ingest_report"),
    "columns": ("columns", "columns"),
    "seeing": ("catalog", "seeing"),
    "catalog": ("catalog", "catalog"),
    "astrometry_parameters": ("astrometry", "parameters"),
    "residual_grid": ("astrometry", "residual_grid"),
    "zero_point": ("zeropoint", "zero_point"),
    "zp_intervals": ("zeropoint", "intervals"),
    "star_flat": ("zeropoint", "star_flat"),
    "colour_term": ("zeropoint", "colour_term"),
}

#: Product key -> the stage that makes it (for the page's notes).
PRODUCT_SOURCES = {key: stage for key, (stage, _) in _NIGHT_PRODUCTS.items()} | {
    "sky": "rectify",
    "strip": "rectify",
    "strip_factor": "rectify",
    "pixel_scale": "rectify",
    "matched_x_range": "astrometry",
    "smear_widths": "rectify",
    "strip_rows": "rectify",
    "no_data_rows": "calibrate",
}


@dataclass
class NightProducts:
    """What the report knows about a night.

    ``products`` maps keys (see :data:`PRODUCT_SOURCES`) to tables, arrays
    and numbers; an absent key means the product does not exist.  ``status``
    is the state of the earlier stages' units (the stage's ``run_status``
    input, see :data:`pipeline.stages.base.RUN_STATUS`); ``header`` the FLUX
    header of the first rectified stretch (or None).
    """

    products: dict[str, Any] = field(default_factory=dict)
    status: Any = None
    header: Any = None


def rows_without_data(calibrated: Any) -> np.ndarray:
    """Night rows a block covers that calibrate found without data.

    Parameters
    ----------
    calibrated : sequence of mapping
        The calibrate stage's products per stretch; only ``rows`` is read
        (its ``night_row``, ``time``, NaN where no block covers the row, and
        ``data``).

    Returns
    -------
    ndarray of int64
        Sorted, each row once (stretches' margins overlap): readout
        dropouts and NaN-filled rows.
    """
    lost = []
    for products in calibrated:
        rows = products["rows"]
        if "data" not in rows.colnames:
            continue
        covered = np.isfinite(np.asarray(rows["time"], dtype=float))
        lost.append(np.asarray(rows["night_row"], np.int64)[covered & ~np.asarray(rows["data"])])
    return np.unique(np.concatenate(lost)) if lost else np.zeros(0, np.int64)


def collect_products(
    inputs: Mapping[str, Any], options: ReportOptions, status: Any = None
) -> NightProducts:
    """Pick the products the page draws and reduce the rectified images.

    Parameters
    ----------
    inputs : mapping
        Stage name -> its products (a dict for a night-scoped stage, a
        sequence of per-stretch dicts for ``rectify``), or None where the
        stage's products are unusable or the stage is not in the pipeline.
    options : ReportOptions
    status : dict, optional
        The ``run_status`` input.

    Returns
    -------
    NightProducts
    """
    night = NightProducts(status=status)
    for key, (stage, name) in _NIGHT_PRODUCTS.items():
        products = inputs.get(stage)
        if products is not None and name in products:
            night.products[key] = products[name]
    astrometry = inputs.get("astrometry")
    if astrometry is not None and "catalog" in astrometry:
        solved = astrometry["catalog"]
        if solved.meta.get("astrometry_passes", 1) > 1:
            # astrometry measured the stretches again with the solved smear
            # kernels: its catalogue, not detect's first one, is what the zero
            # point and the science products use (a night whose camera was
            # turned 0.3 deg unknown to its config: 4727 sources, 4269 flagged,
            # at first; 2082 once measured with the solved kernels)
            night.products["catalog"] = solved
        matched = np.asarray(solved["ref_index"]) >= 0
        x = np.asarray(getattr(solved["x"], "value", solved["x"]), dtype=float)[matched]
        if x.size:
            night.products["matched_x_range"] = (float(x.min()), float(x.max()))
    index = night.products.get("block_index")
    calibrated = inputs.get("calibrate")
    if index is not None and calibrated:
        night.products["no_data_rows"] = rows_without_data(calibrated)
    stretches = inputs.get("rectify")
    if index is None or not stretches:
        return night
    n_columns = int(np.max(np.asarray(index["row_start"]) + np.asarray(index["n_rows"])))
    factor = max(1, math.ceil(n_columns / options.quicklook_width))
    skies, pieces, areas, widths = [], [], [], []
    catalog, seeing = night.products.get("catalog"), night.products.get("seeing")
    for products in stretches:  # one stretch in memory at a time
        image = ccddata_from_hdulist(products["image"])
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
        smeared = not header.get("DECONV", False) and "smear_kernels" in products
        if smeared and catalog is not None and seeing is not None:
            kernels = products["smear_kernels"]
            widths.append(
                measure_smear_widths(data, usable, catalog, seeing, kernels, x_start=x_start)
            )
            night.products["strip_rows"] = ny
    night.products["sky"] = vstack(skies)
    night.products["sky"]["pixel_area"].unit = "arcsec2"
    night.products["strip"] = place_pieces(pieces, factor)
    night.products["strip_factor"] = factor
    night.products["pixel_scale"] = float(np.sqrt(np.median(areas)))
    if widths:
        night.products["smear_widths"] = vstack(widths, metadata_conflicts="silent")
    return night
