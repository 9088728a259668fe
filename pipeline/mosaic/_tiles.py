"""Tiles of a mosaic: their celestial WCS and which products touch them.

A tile is an image of the sky with a standard FITS WCS in ICRS, north up and
east to the left (``CDELT1 < 0``), independent of the nights' frames.  Three
layouts:

* :func:`strip_tiles` with ``projection='TAN'``: gnomonic tiles of
  ``shape`` pixels whose centres lie on the strip's central declination
  (rounded to a whole number of pixels), spaced so that neighbours share
  ``overlap`` columns along it, on a grid anchored at right ascension 0: a
  night that extends the strip adds tiles without moving the others;
* :func:`strip_tiles` with ``projection='CAR'``: one plate-carree image along
  the whole strip.  Its reference point lies on the celestial equator
  (Calabretta & Greisen 2002, A&A 395, 1077, section 5.2.3), so rows are
  circles of constant declination and columns lines of constant right
  ascension; ``CDELT1`` is the pixel scale over ``cos`` of the central
  declination, so pixels are square there;
* :func:`explicit_tiles`: gnomonic tiles at given centres and sizes.

Right ascensions are unwrapped about the first footprint's centre, so strips
that cross 0/360 deg are laid out like any other; the tangent tiles' grid is
then counted from the strip's western end's side of 0 h (a night that moves
that end across 0 h moves the grid).
"""

from __future__ import annotations

import logging
from collections.abc import Iterable, Sequence
from dataclasses import dataclass

import numpy as np
from astropy.wcs import WCS

__all__ = [
    "Footprint",
    "Tile",
    "explicit_tiles",
    "footprint_of",
    "strip_tiles",
    "tiles_from_options",
    "touches",
]

log = logging.getLogger(__name__)

#: Border samples per edge of a footprint (its edges are curves on the sky).
_EDGE_SAMPLES = 33


@dataclass(frozen=True)
class Footprint:
    """Sky outline of an image: right ascension and declination along its border.

    Attributes
    ----------
    ra, dec : ndarray, shape (n,)
        Border points, deg (ICRS); ``ra`` in ``[0, 360)``.
    """

    ra: np.ndarray
    dec: np.ndarray


@dataclass(frozen=True)
class Tile:
    """One tile of a mosaic.

    Attributes
    ----------
    index : int
        Position of the tile along the strip: for tiles along a strip, its
        place on the sky's grid of tiles (centre at right ascension ``index
        * step``), so that it keeps its name when nights extend the strip;
        0, 1, ... for explicit tiles.
    wcs : astropy.wcs.WCS
        Celestial ICRS WCS of the tile's pixels.
    shape : (int, int)
        ``(n_y, n_x)`` pixels.
    """

    index: int
    wcs: WCS
    shape: tuple[int, int]

    @property
    def name(self) -> str:
        """Short label, e.g. ``'tile003'``."""
        return f"tile{self.index:03d}"


def _unwrapped(ra: np.ndarray, reference: float) -> np.ndarray:
    """Right ascensions within 180 deg of ``reference`` (deg)."""
    return reference + (np.asarray(ra) - reference + 180.0) % 360.0 - 180.0


def _border(shape: tuple[int, int]) -> tuple[np.ndarray, np.ndarray]:
    """0-based pixel coordinates ``(x, y)`` along the outer edges of an image."""
    n_y, n_x = shape
    xs = np.linspace(-0.5, n_x - 0.5, _EDGE_SAMPLES)
    ys = np.linspace(-0.5, n_y - 0.5, _EDGE_SAMPLES)
    x = np.concatenate([xs, np.full_like(ys, n_x - 0.5), xs[::-1], np.full_like(ys, -0.5)])
    y = np.concatenate([np.full_like(xs, -0.5), ys, np.full_like(xs, n_y - 0.5), ys[::-1]])
    return x, y


def footprint_of(wcs: WCS, shape: tuple[int, int]) -> Footprint:
    """The sky outline of an image.

    Parameters
    ----------
    wcs : astropy.wcs.WCS
        Celestial WCS of the image.
    shape : (int, int)
        ``(n_y, n_x)`` pixels.

    Returns
    -------
    Footprint
    """
    x, y = _border(shape)
    ra, dec = wcs.pixel_to_world_values(x, y)
    return Footprint(np.mod(np.asarray(ra, float), 360.0), np.asarray(dec, float))


def _tile_wcs(
    projection: str,
    ra: float,
    dec: float,
    shape: tuple[int, int],
    scale_deg: float,
) -> WCS:
    n_y, n_x = shape
    wcs = WCS(naxis=2)
    wcs.wcs.ctype = [f"RA---{projection}", f"DEC--{projection}"]
    wcs.wcs.cunit = ["deg", "deg"]
    wcs.wcs.radesys = "ICRS"
    if projection == "TAN":
        wcs.wcs.crval = [ra % 360.0, dec]
        wcs.wcs.crpix = [(n_x + 1) / 2.0, (n_y + 1) / 2.0]
        wcs.wcs.cdelt = [-scale_deg, scale_deg]
    else:  # CAR on the equator: rows follow circles of declination
        stretch = 1.0 / np.cos(np.radians(dec))
        wcs.wcs.crval = [ra % 360.0, 0.0]
        wcs.wcs.crpix = [(n_x + 1) / 2.0, (n_y + 1) / 2.0 - dec / scale_deg]
        wcs.wcs.cdelt = [-scale_deg * stretch, scale_deg]
    wcs.pixel_shape = (n_x, n_y)
    wcs.wcs.set()
    return wcs


def _tan_spacing(separation: float, dec: float) -> float:
    """Right-ascension step (deg) that puts the next centre ``separation`` deg along ξ.

    Both centres lie on the circle of declination ``dec``; ξ is the first
    gnomonic coordinate about one of them (Calabretta & Greisen 2002, eq. 54):
    ``ξ = cos δ sin Δα / (sin² δ + cos² δ cos Δα)`` (radians of the
    intermediate coordinate), solved for ``Δα``.
    """
    xi = np.radians(separation)
    d = np.radians(dec)
    s2, c2 = np.sin(d) ** 2, np.cos(d) ** 2
    # xi (s2 + c2 cos a) = cos d sin a  ->  A sin a - B cos a = C
    a_coef, b_coef, c_coef = np.cos(d), xi * c2, xi * s2
    phase = np.arctan2(b_coef, a_coef)
    return float(np.degrees(np.arcsin(c_coef / np.hypot(a_coef, b_coef)) + phase))


def strip_tiles(
    footprints: Sequence[Footprint],
    *,
    pixel_scale: float,
    shape: tuple[int, int],
    projection: str = "TAN",
    overlap: int = 0,
) -> list[Tile]:
    """Tiles along a strip that cover the union of the nights' footprints.

    Parameters
    ----------
    footprints : sequence of Footprint
        Outlines of the products to be mosaicked (:func:`footprint_of`).
    pixel_scale : float
        Tile pixel size, arcsec.
    shape : (int, int)
        ``(n_y, n_x)`` of each TAN tile; for CAR, ``n_y`` is the strip's height
        and ``n_x`` is ignored (the strip is as long as the footprints).
    projection : {'TAN', 'CAR'}
        Gnomonic tiles, or one plate-carree strip.
    overlap : int
        Columns shared by neighbouring TAN tiles at the central declination.

    Returns
    -------
    list of Tile
        West to east (increasing right ascension).

    Raises
    ------
    ValueError
        No footprints, an unknown projection, or ``overlap`` not smaller than the
        tile width.
    """
    projection = projection.upper()
    if projection not in ("TAN", "CAR"):
        raise ValueError(f"projection must be 'TAN' or 'CAR'; got {projection!r}.")
    if not footprints:
        raise ValueError("footprints is empty: give the outline of at least one product.")
    n_y, n_x = (int(n) for n in shape)
    if projection == "TAN" and not 0 <= overlap < n_x:
        raise ValueError(f"overlap must be in [0, {n_x}) pixels (the tile width); got {overlap}.")
    reference = float(np.mean(footprints[0].ra[:_EDGE_SAMPLES]))
    ra = np.concatenate([_unwrapped(f.ra, reference) for f in footprints])
    dec = np.concatenate([f.dec for f in footprints])
    scale_deg = pixel_scale / 3600.0
    # anchored: the centre row on a whole number of pixels from the equator,
    # right ascensions with the strip's western end in [0, 360)
    dec_centre = float(np.round(0.5 * (dec.min() + dec.max()) / scale_deg) * scale_deg)
    ra = ra - 360.0 * np.floor(ra.min() / 360.0)
    ra_lo, ra_hi = float(ra.min()), float(ra.max())
    height = (dec.max() - dec.min()) / scale_deg
    if height > n_y:
        log.info(
            "the strip is %.0f px high at %.3g arcsec/px; tiles of %d px hold its central %d px",
            height,
            pixel_scale,
            n_y,
            n_y,
        )
    cos_dec = np.cos(np.radians(dec_centre))
    if projection == "CAR":
        length = int(np.ceil((ra_hi - ra_lo) * cos_dec / scale_deg)) + 1
        centre = 0.5 * (ra_lo + ra_hi)
        return [
            Tile(0, _tile_wcs("CAR", centre, dec_centre, (n_y, length), scale_deg), (n_y, length))
        ]
    step = _tan_spacing((n_x - overlap) * scale_deg, dec_centre)
    # Tile k is centred at right ascension k * step: a night that extends the
    # strip adds tiles and leaves the others as they were.  Half the tile's
    # extent in right ascension where it is narrowest (its row nearest the
    # equator; gnomonic alpha = atan2(xi, cos d0 - eta sin d0), Calabretta &
    # Greisen 2002, eq. 54 inverted).
    xi, eta = np.radians(0.5 * n_x * scale_deg), np.radians(0.5 * n_y * scale_deg)
    d0 = np.radians(dec_centre)
    half = float(np.degrees(np.arctan2(xi, np.cos(d0) + eta * abs(np.sin(d0)))))
    first = int(np.floor((ra_lo + half) / step))
    last = max(int(np.ceil((ra_hi - half) / step)), first)
    return [
        Tile(k, _tile_wcs("TAN", (k * step) % 360.0, dec_centre, (n_y, n_x), scale_deg), (n_y, n_x))
        for k in range(first, last + 1)
    ]


def explicit_tiles(
    centres: Iterable[tuple[float, float]],
    *,
    pixel_scale: float,
    shapes: Iterable[tuple[int, int]],
) -> list[Tile]:
    """Gnomonic tiles at given centres.

    Parameters
    ----------
    centres : iterable of (float, float)
        ``(ra, dec)`` of each tile centre, deg (ICRS).
    pixel_scale : float
        Pixel size, arcsec.
    shapes : iterable of (int, int)
        ``(n_y, n_x)`` of each tile.

    Returns
    -------
    list of Tile
    """
    centres, shapes = list(centres), list(shapes)
    if len(centres) != len(shapes):
        raise ValueError(f"got {len(centres)} centres but {len(shapes)} shapes; give one each.")
    return [
        Tile(i, _tile_wcs("TAN", ra, dec, tuple(shape), pixel_scale / 3600.0), tuple(shape))
        for i, ((ra, dec), shape) in enumerate(zip(centres, shapes, strict=True))
    ]


def tiles_from_options(options, footprints: Sequence[Footprint]) -> list[Tile]:
    """The tiles a mosaic config's ``tiling`` section asks for.

    Parameters
    ----------
    options : pipeline.mosaic.TilingOptions
    footprints : sequence of Footprint
        Outlines of the products (unused for layout ``'explicit'``).

    Returns
    -------
    list of Tile
    """
    if options.layout == "explicit":
        return explicit_tiles(
            [(t.ra, t.dec) for t in options.tiles],
            pixel_scale=options.pixel_scale,
            shapes=[
                (t.height or options.tile_height, t.width or options.tile_width)
                for t in options.tiles
            ],
        )
    return strip_tiles(
        footprints,
        pixel_scale=options.pixel_scale,
        shape=(options.tile_height, options.tile_width),
        projection="TAN" if options.layout == "tangent_tiles" else "CAR",
        overlap=options.overlap if options.layout == "tangent_tiles" else 0,
    )


def touches(tile: Tile, footprint: Footprint, margin: float = 4.0) -> bool:
    """Whether a footprint overlaps a tile (within ``margin`` pixels).

    The footprint's border is mapped into the tile's pixels; the tile is
    touched if a border point lies inside it, or if the border encloses the
    tile's centre.

    Parameters
    ----------
    tile : Tile
    footprint : Footprint
    margin : float
        Pixels added around the tile (the resampling kernel's reach).

    Returns
    -------
    bool
    """
    n_y, n_x = tile.shape
    x, y = tile.wcs.world_to_pixel_values(footprint.ra, footprint.dec)
    x, y = np.asarray(x), np.asarray(y)
    finite = np.isfinite(x) & np.isfinite(y)
    inside = (
        (x > -0.5 - margin)
        & (x < n_x - 0.5 + margin)
        & (y > -0.5 - margin)
        & (y < n_y - 0.5 + margin)
    )
    if np.any(inside & finite):
        return True
    if not finite.all():
        return False
    # The border may enclose the whole tile: a ray test from the tile centre.
    cx, cy = (n_x - 1) / 2.0, (n_y - 1) / 2.0
    x2, y2 = np.roll(x, -1), np.roll(y, -1)
    crosses = ((y > cy) != (y2 > cy)) & (
        cx < x + (cy - y) * (x2 - x) / np.where(y2 == y, 1, y2 - y)
    )
    return bool(np.count_nonzero(crosses) % 2)
