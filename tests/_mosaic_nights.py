"""Product folders of small synthetic nights for the mosaic runner tests.

Five nights of one strip, each with two science stretches as the science
stage writes them (FLUX in counts of PHOTZP, FLUXVAR, FLAGS, the solved WCS,
PHOTZP/ZPMED/ZPERR/ZPFLAGS/SEEING cards), stored with provenance sidecars in
``<root>/<night>/science/<stretch>/``.  Three explicit tiles lie along the
strip: stretch ``s0000`` of every night touches tiles 0 and 1, stretch
``s0001`` only tile 2.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from astropy.io import fits

from pipeline.masks import MASK_DTYPE
from pipeline.products import (
    NIGHT_ZERO_POINT_KEY,
    SEEING_KEY,
    ZERO_POINT_ERROR_KEY,
    ZERO_POINT_FLAGS_KEY,
    ZERO_POINT_KEY,
    image_hdulist,
)
from pipeline.runner._store import output_hash, write_products, write_sidecar
from tests._mosaic_scene import gaussian_stars, night_wcs

RA, DEC = 120.0, 49.7
PHOTZP = 25.0
#: Tile centres along the strip (arcsec east of RA) and tile size (px at 1 arcsec).
TILE_OFFSETS = (-50.0, 0.0, 50.0)
TILE_SIZE = 48
#: Each stretch: centre (arcsec east of RA) and shape (rows, columns).
STRETCHES = {"s0000": (-27.0, (64, 96)), "s0001": (54.0, (64, 48))}
#: Per night: name, seeing FWHM (arcsec), transparency zero point (ZPMED, mag),
#: blank-sky variance (counts^2), turn of the frame (deg).
NIGHTS = (
    ("n1", 1.6, 24.00, 25.0, 0.10),
    ("n2", 2.0, 23.95, 30.0, 0.15),
    ("n3", 2.4, 23.90, 35.0, 0.20),
    ("n4", 1.8, 23.98, 28.0, 0.25),
    ("n5", 3.5, 23.40, 60.0, 0.30),
)
#: Stars: (arcsec east of RA, arcsec north of DEC, magnitude).
STARS = ((-48.0, 2.0, 16.0), (3.0, -4.0, 16.5), (47.0, 5.0, 16.2))
#: FWHM / sigma of a Gaussian (common practice).
FWHM_PER_SIGMA = 2.0 * np.sqrt(2.0 * np.log(2.0))


def ra_of(offset: float) -> float:
    """Right ascension ``offset`` arcsec east of RA along the strip's declination, deg."""
    return RA + offset / 3600.0 / np.cos(np.radians(DEC))


def tiling() -> dict:
    """The ``tiling`` section of the three explicit tiles."""
    tiles = [{"ra": float(ra_of(x)), "dec": DEC} for x in TILE_OFFSETS]
    return {
        "layout": "explicit",
        "pixel_scale": 1.0,
        "tile_width": TILE_SIZE,
        "tile_height": TILE_SIZE,
        "overlap": 0,
        "tiles": tiles,
    }


def science_product(night: tuple, stretch: str, bump: float = 0.0) -> fits.HDUList:
    """One stretch of one night as the science stage writes it (``bump``: added counts)."""
    name, seeing, zp, sky_variance, turn = night
    centre, shape = STRETCHES[stretch]
    wcs = night_wcs(shape, rotation=turn, scale=1.0, ra=ra_of(centre), dec=DEC)
    ras = [ra_of(x) for x, _, _ in STARS]
    decs = [DEC + y / 3600.0 for _, y, _ in STARS]
    xs, ys = wcs.world_to_pixel_values(ras, decs)
    fluxes = [10 ** (0.4 * (PHOTZP - m)) for _, _, m in STARS]
    sigma = seeing / FWHM_PER_SIGMA  # 1 arcsec pixels
    rng = np.random.default_rng([ord(c) for c in name + stretch])
    image = gaussian_stars(shape, xs, ys, fluxes, sigma)
    variance = sky_variance + np.maximum(image, 0.0)
    image = image + rng.normal(0.0, np.sqrt(variance)) + 100.0 + bump
    header = wcs.to_header()
    header[ZERO_POINT_KEY] = PHOTZP
    header[NIGHT_ZERO_POINT_KEY] = zp
    header[ZERO_POINT_ERROR_KEY] = 0.01
    header["CSYER2"] = 0.01 / 3600.0  # the solved WCS's error in Dec: 10 mas
    header[ZERO_POINT_FLAGS_KEY] = 0
    header[SEEING_KEY] = seeing
    header["DATE-OBS"] = "2026-10-15T21:00:00"
    return image_hdulist(
        image,
        variance,
        np.zeros(shape, MASK_DTYPE),
        unit="ct",
        header=header,
        metadata=fits.Header(),
    )


def write_science(root: Path, night: tuple, stretch: str, bump: float = 0.0) -> None:
    """Store one stretch's science product with its sidecar, as the runner would."""
    unit_dir = root / night[0] / "science" / stretch
    entries = write_products(unit_dir, {"image": science_product(night, stretch, bump)}, {})
    record = {"stage": "science", "unit": stretch, "night": night[0], "products": entries}
    write_sidecar(unit_dir, {**record, "output_hash": output_hash(entries)})


def write_nights(root: Path) -> list[Path]:
    """Every night's product folder; returns them in night order."""
    for night in NIGHTS:
        for stretch in STRETCHES:
            write_science(root, night, stretch)
    return [root / night[0] for night in NIGHTS]
