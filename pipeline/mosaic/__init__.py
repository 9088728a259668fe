"""Multi-night mosaics: tiles, resampling onto them and the co-add of nights.

A mosaic spans many nights of the same strip of sky.  Its tiles
(:mod:`pipeline.mosaic._tiles`) carry standard celestial WCSs independent of
any night's frame; every calibrated product that touches a tile is resampled
onto it, conserving flux (:mod:`pipeline.mosaic._resample`), and the nights
are co-added with inverse-variance weights and outlier rejection across nights
(:mod:`pipeline.mosaic._coadd`).  A tile is one independent task:
:func:`mosaic_tile` takes the products touching it and returns its planes;
:mod:`pipeline.mosaic._products` turns them into the tile's FITS file,
catalogue, night table and quick look, and :data:`TILE_STAGE` is the unit
the runner ships to its workers (:func:`pipeline.runner.run_mosaic`), for a
mosaic config (:func:`load_mosaic_config`).
"""

from pipeline.mosaic._coadd import (
    NIGHT_ZERO_POINT_KEY,
    SEEING_KEY,
    ZERO_POINT_KEY,
    CoaddedPlanes,
    MosaicTile,
    NightImage,
    coadd,
    mosaic_tile,
    night_image_from_hdulist,
    select_products,
    weighted_median,
)
from pipeline.mosaic._config import MosaicConfig, MosaicSection, load_mosaic_config
from pipeline.mosaic._options import CoaddOptions, TileCentre, TilingOptions
from pipeline.mosaic._products import (
    TILE_EXTENSIONS,
    night_table,
    quicklook_png,
    tile_catalog,
    tile_hdulist,
)
from pipeline.mosaic._resample import ResampledImage, resample_to_tile
from pipeline.mosaic._stage import TILE_STAGE, TileContext, TileOptions
from pipeline.mosaic._tiles import (
    Footprint,
    Tile,
    explicit_tiles,
    footprint_of,
    strip_tiles,
    tiles_from_options,
    touches,
)

__all__ = [
    "NIGHT_ZERO_POINT_KEY",
    "SEEING_KEY",
    "TILE_EXTENSIONS",
    "TILE_STAGE",
    "ZERO_POINT_KEY",
    "CoaddOptions",
    "CoaddedPlanes",
    "Footprint",
    "MosaicConfig",
    "MosaicSection",
    "MosaicTile",
    "NightImage",
    "ResampledImage",
    "Tile",
    "TileCentre",
    "TileContext",
    "TileOptions",
    "TilingOptions",
    "coadd",
    "explicit_tiles",
    "footprint_of",
    "load_mosaic_config",
    "mosaic_tile",
    "night_image_from_hdulist",
    "night_table",
    "quicklook_png",
    "resample_to_tile",
    "select_products",
    "strip_tiles",
    "tile_catalog",
    "tile_hdulist",
    "tiles_from_options",
    "touches",
    "weighted_median",
]
