"""Small synthetic nights for the mosaic tests: Gaussian stars on noise, WCSs built here.

A night's image imitates a rectified product: a plate-carree (CAR) grid whose
rows are circles of declination, east to the right, turned and scaled a
little against the tile.  Stars are round Gaussians in the night's pixels,
each pixel holding the analytic integral of the Gaussian over its area, so
the image sums to the stars' fluxes exactly (up to the light beyond its edges).
"""

from __future__ import annotations

import numpy as np
from astropy.wcs import WCS
from scipy.special import erf

from pipeline.mosaic import NightImage, Tile, explicit_tiles

#: Tile centre and pixel scale of the scenes (arcsec per pixel).
RA0, DEC0, SCALE = 359.99, 49.7, 1.0


def tile(size: int = 160, ra: float = RA0, dec: float = DEC0) -> Tile:
    """A square tangent-plane tile of ``size`` pixels at 1 arcsec per pixel."""
    return explicit_tiles([(ra, dec)], pixel_scale=SCALE, shapes=[(size, size)])[0]


def night_wcs(
    shape: tuple[int, int],
    *,
    rotation: float = 0.3,
    scale: float = 1.01,
    ra: float = RA0,
    dec: float = DEC0,
) -> WCS:
    """CAR WCS, rows along circles of declination, east right, turned by ``rotation`` deg.

    ``scale`` is the night's pixel size over the tile's.
    """
    n_y, n_x = shape
    pixel = SCALE * scale / 3600.0
    wcs = WCS(naxis=2)
    wcs.wcs.ctype = ["RA---CAR", "DEC--CAR"]
    wcs.wcs.radesys = "ICRS"
    wcs.wcs.crval = [ra % 360.0, 0.0]
    # PC turns the pixel grid before CDELT scales it: with CDELT1 cos(dec) = CDELT2
    # the grid is a true rotation on the sky (Calabretta & Greisen 2002, eq. 1-3).
    wcs.wcs.cdelt = [pixel / np.cos(np.radians(dec)), pixel]
    t = np.radians(rotation)
    wcs.wcs.pc = [[np.cos(t), -np.sin(t)], [np.sin(t), np.cos(t)]]
    centre = np.array([(n_x + 1) / 2.0, (n_y + 1) / 2.0])
    # put (ra, dec) at the image centre
    wcs.wcs.crpix = [0.0, 0.0]
    wcs.wcs.set()
    px, py = wcs.world_to_pixel_values(ra % 360.0, dec)
    wcs.wcs.crpix = centre - np.array([px, py]) - 1.0 + 0.0
    wcs.wcs.crpix = [centre[0] - (px + 1.0), centre[1] - (py + 1.0)]
    wcs.pixel_shape = (n_x, n_y)
    wcs.wcs.set()
    return wcs


def gaussian_stars(shape, xs, ys, fluxes, sigma) -> np.ndarray:
    """Pixel integrals of round Gaussians (sigma px) centred at 0-based ``(x, y)``."""
    n_y, n_x = shape
    image = np.zeros(shape)
    edges_x = np.arange(n_x + 1) - 0.5
    edges_y = np.arange(n_y + 1) - 0.5
    root2 = np.sqrt(2.0) * sigma
    for x, y, flux in zip(xs, ys, fluxes, strict=True):
        fx = np.diff(0.5 * erf((edges_x - x) / root2))
        fy = np.diff(0.5 * erf((edges_y - y) / root2))
        image += flux * np.outer(fy, fx)
    return image


def column_pieces(night: NightImage, column_slices) -> list[NightImage]:
    """The night's products cut to the night columns ``column_slices``, WCSs sliced to match."""
    return [
        NightImage(
            np.ascontiguousarray(night.image[:, cols]),
            np.ascontiguousarray(night.variance[:, cols]),
            np.ascontiguousarray(night.flags[:, cols]),
            night.wcs.slice((slice(None), cols)),
            night.zero_point,
            night.night,
        )
        for cols in column_slices
    ]
