"""Catalog: the night's source catalogue and seeing table, from detect's stretches.

``detect`` measures each stretch on its own (with its neighbours' edge
columns) and keeps the sources whose first-moment column ``x`` lies in the
stretch's own columns (:data:`pipeline.stages.detect._night.MERGE_RULE`), so
every source of the night is in exactly one stretch catalogue.  This light
night-scoped step stacks them, in stretch order, into the night catalogue,
and the stretches' seeing tables into the night's seeing table.  It reads
tables only, one stretch at a time; what it holds grows with the number of
sources (about 0.3 kB each), not with the images.

The night catalogue's metadata is what every stretch catalogue records
alike (detect's options, flag bits, aperture radii); a value that differs
between stretches (each stretch's fitted ``seeing_fwhm``) is left out, the
night's seeing table holding it per stretch.
"""

from __future__ import annotations

import logging
from collections.abc import Sequence
from typing import TYPE_CHECKING

import numpy as np
from pydantic import BaseModel, ConfigDict

from pipeline.stages.base import Stage
from pipeline.stages.detect._night import MERGE_RULE

if TYPE_CHECKING:
    from astropy.table import QTable, Table

__all__ = ["STAGE", "CatalogOptions", "common_meta", "stack_catalogs"]

log = logging.getLogger(__name__)


class CatalogOptions(BaseModel):
    """Options of the catalog stage (``stages.catalog``): none yet."""

    model_config = ConfigDict(extra="forbid", frozen=True)


def stack_catalogs(catalogs: Sequence[QTable], seeing: Sequence[Table]) -> tuple[QTable, Table]:
    """The night catalogue and seeing table from the stretches' ones.

    Parameters
    ----------
    catalogs : sequence of astropy.table.QTable
        detect's ``catalog`` of each stretch, in stretch order (each source
        listed by the one stretch whose columns hold its ``x``).
    seeing : sequence of astropy.table.Table
        detect's ``seeing`` of the same stretches.

    Returns
    -------
    catalog : astropy.table.QTable
        All sources, stretch by stretch; units and flag bits as detect's.
    seeing : astropy.table.Table
        The seeing rows of every stretch (its ``stretch`` column says which).

    Raises
    ------
    ValueError
        If no stretch is given (the stage is then blocked, not run).
    """
    from astropy.table import vstack

    if not catalogs or len(catalogs) != len(seeing):
        raise ValueError(
            f"stack_catalogs needs one catalogue and one seeing table per stretch, at least "
            f"one; got {len(catalogs)} and {len(seeing)}."
        )
    night = vstack(list(catalogs), metadata_conflicts="silent")
    # vstack merges metadata by joining lists and dicts (32 stretches' three
    # aperture radii become 96): the night keeps only what all stretches share.
    night.meta = common_meta([c.meta for c in catalogs])
    night.meta["merge_rule"] = MERGE_RULE
    seeing_table = vstack(list(seeing), metadata_conflicts="silent")
    seeing_table.meta = common_meta([s.meta for s in seeing])
    return night, seeing_table


def common_meta(metas: Sequence[dict]) -> dict:
    """The items of the first of ``metas`` that every other one holds with an equal value.

    Values are compared whole (a nested list or dict equal item by item), so
    a night of stretches measured alike keeps each recorded setting as one
    stretch recorded it.
    """
    first, *others = metas
    return {
        key: value
        for key, value in first.items()
        if all(key in other and _equal(other[key], value) for other in others)
    }


def _equal(a, b) -> bool:
    """Whether two metadata values are equal (NaN equal to NaN; arrays item by item)."""
    try:
        return bool(np.array_equal(a, b, equal_nan=True))
    except TypeError:  # not numbers: nested dicts, strings
        return a == b


def _run(*, inputs, options: CatalogOptions, context) -> dict:
    catalogs, seeing = [], []
    for products in inputs["detect"]:  # read one stretch's tables at a time
        catalogs.append(products["catalog"])
        seeing.append(products["seeing"])
    catalog, seeing_table = stack_catalogs(catalogs, seeing)
    log.info("night catalogue: %d sources from %d stretches", len(catalog), len(catalogs))
    return {"catalog": catalog, "seeing": seeing_table}


#: Declaration of the catalog stage: night scope, after detect; it works on the
#: stretches detect measured (a stretch left out is reported as a problem).
STAGE = Stage(
    name="catalog",
    run=_run,
    options=CatalogOptions,
    requires=("detect",),
    scope="night",
    uses=(),
    partial_inputs=True,
    # 2: the night catalogue's metadata is what its stretches share (vstack
    #    joined their lists: 96 aperture radii for 32 stretches)
    version=2,
    description="The night's source catalogue and seeing table, from detect's stretches.",
)
