"""One tile of a mosaic as a runner unit: the stage the runner ships to its workers.

The runner (:mod:`pipeline.runner._mosaic`) plans the tiles, finds the
science products touching each and hands them over as ``inputs['science']``
(one mapping per product, its ``image`` an HDUList), with a
:class:`TileContext`; :data:`TILE_STAGE` returns the tile's products.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

from pydantic import BaseModel, ConfigDict, Field

from pipeline.mosaic._coadd import mosaic_tile, night_image_from_hdulist
from pipeline.mosaic._options import CoaddOptions
from pipeline.mosaic._products import night_table, quicklook_png, tile_catalog, tile_hdulist
from pipeline.mosaic._tiles import Tile
from pipeline.stages.base import PROBLEMS, Stage
from pipeline.stages.detect import DetectOptions

__all__ = ["TILE_STAGE", "TileContext", "TileOptions"]

#: Name of the science stage, whose ``image`` products mosaics combine.
SCIENCE = "science"
#: Its product of the stars' smear kernels (absent from products made before it was).
KERNELS = "smear_kernels"


class TileOptions(BaseModel):
    """What a tile's products depend on besides its inputs and its placement."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    coadd: CoaddOptions = Field(default_factory=CoaddOptions)
    detect: DetectOptions = Field(default_factory=DetectOptions)


@dataclass(frozen=True)
class TileContext:
    """What a tile's unit knows besides its inputs and options.

    Attributes
    ----------
    night : str
        The mosaic's name (the runner records it where a night's units record the night).
    tile : Tile
    inputs : tuple of (str, str, str)
        ``(night, unit, sha256)`` of each input product, in the order of
        ``inputs['science']``.
    config : mapping
        The mosaic config (JSON-able) for the tile's header.
    """

    night: str
    tile: Tile
    inputs: tuple[tuple[str, str, str], ...] = ()
    config: Mapping[str, Any] = field(default_factory=dict)
    stretch: None = None


def _run(*, inputs, options: TileOptions, context: TileContext) -> dict:
    products = [
        night_image_from_hdulist(unit["image"], night=night, smear_kernels=unit.get(KERNELS))
        for unit, (night, _, _) in zip(inputs[SCIENCE], context.inputs, strict=True)
    ]
    tile = mosaic_tile(products, context.tile, options.coadd)
    labels = [(f"{night}/{unit}", digest) for night, unit, digest in context.inputs]
    catalog = tile_catalog(tile, **options.detect.model_dump())
    out = {
        "tile": tile_hdulist(tile, labels, context.config),
        "catalog": catalog,
        "nights": night_table(products, tile),
        "quicklook": quicklook_png(tile.planes.image),
        PROBLEMS: list(catalog.meta.pop("problems", [])),
    }
    if tile.smear_kernels is not None:
        out[KERNELS] = tile.smear_kernels
    return out


#: The unit of a mosaic: one tile from the science products that touch it.
TILE_STAGE = Stage(
    name="tiles",
    run=_run,
    options=TileOptions,
    requires=(SCIENCE,),
    scope="night",
    uses=(),
    # 2: catalogues measured with the smear kernel the co-added stars carry;
    # 3: and with the nights' TDI clocking top-hat; 4: mag_err holds the zero
    # point's error (the nights' ZPERR as co-added), the tile's header ZPERR;
    # NOISECOR counts the uneven weights of a night sampled by a coarser tile;
    # 5: a tile over 1.45 times coarser than its nights averages them over
    # its pixels (a cubic B-spline), which the catalogue's seeing mix holds;
    # 6: ra_err/dec_err hold the nights' astrometric errors (CSYER1/2) as co-added;
    # 7: FLAGS' NIGHT_LEFT_OUT where a night with data was left out (and
    # within source_radius of a rejection), which the catalogue's flags see;
    # 8: the catalogue's model holds rectify's cubic taps at the nights'
    # lattice offsets (smear_kernels' lattice_*): positions at the first moment;
    # 9: the seeing mix takes each night's Moffat index from its SEEBETA card
    # 10: catalogue columns mask_core and mask_near, the tile's FLAGS bits
    # around each source (why it is NEAR_FLAGGED, and whether in its core)
    # 11: a night with no usable pixel on the tile (all ignore_flags) is left
    # out of it: no weight in the seeing mix, the kernels or the errors
    # 12: the catalogue's flags, group (and detect's other integers) integers
    # when read, not dimensionless Quantities (floats)
    # 13: detect's psf_scale, psf_scale_err columns (NaN: not measured on a tile)
    # 14: detect's flags PARTIAL_EXPOSURE (a core on LOW_EXPOSURE) and TRAIL
    # 15: the science images' TRAIL pixels left out (ignore_flags)
    # 16: tiles from 0.9 night pixels up average the nights (was 1.45): the
    #     interpolation's phase swung PSF fluxes on tiles of the nights' pixels
    version=16,
    description="One tile of a mosaic: co-add, catalogue, night table, quick look.",
)
