"""Stretches of one night that tile its grid leave no seam on a tile."""

import itertools

import numpy as np
import pytest
from astropy.wcs import WCS, Sip

from pipeline.masks import MASK_DTYPE
from pipeline.mosaic import NightImage, mosaic_tile
from pipeline.mosaic._seams import _shifted_wcs
from tests._mosaic_scene import RA0, column_pieces, gaussian_stars, night_wcs, tile

TILE = tile(200)
NIGHT_SHAPE = (240, 260)
#: Where the night is cut into two stretches, night column, and a star on the
#: seam (night pixel x, y; flux e-).
SEAM = 131
STAR = (SEAM - 0.3, 118.4, 5.0e4)


@pytest.fixture(scope="module")
def night():
    wcs = night_wcs(NIGHT_SHAPE, rotation=0.25, scale=1.005)
    x, y, flux = STAR
    image = 100.0 + gaussian_stars(NIGHT_SHAPE, [x], [y], [flux], 1.8)
    return NightImage(
        image.astype(np.float32),
        np.full(NIGHT_SHAPE, 100.0, np.float32),
        np.zeros(NIGHT_SHAPE, MASK_DTYPE),
        wcs,
        25.0,
        "2026-10-10",
    )


def _stretches(night, cuts):
    """The night cut at night columns ``cuts`` into stretches that tile it (rectify's layout)."""
    edges = [0, *cuts, NIGHT_SHAPE[1]]
    return column_pieces(night, [slice(a, b) for a, b in itertools.pairwise(edges)])


@pytest.mark.parametrize("cuts", [[SEAM], [60, SEAM]])
def test_stretches_that_tile_a_night_leave_no_gap(night, cuts):
    whole = mosaic_tile([night], TILE).planes
    split = mosaic_tile(_stretches(night, cuts), TILE).planes
    covered = whole.coverage > 0
    # every tile pixel the whole night covers is covered once by its stretches
    assert (split.coverage[covered] == 1).all()
    # each tile pixel is resampled from the same night pixels with the same
    # WCS, split or not: equal to float32 rounding of values ~1e3 (the spline
    # fits behind the sampling positions differ by ~1e-9 px between the boxes)
    np.testing.assert_allclose(split.image[covered], whole.image[covered], rtol=1e-5, atol=1e-3)
    np.testing.assert_allclose(split.weight[covered], whole.weight[covered], rtol=1e-5)


def test_a_star_on_a_seam_keeps_its_flux(night):
    split = mosaic_tile(_stretches(night, [SEAM]), TILE).planes
    x, y, flux = STAR
    tx, ty = TILE.wcs.world_to_pixel_values(*night.wcs.pixel_to_world_values(x, y))
    xi, yi = round(float(tx)), round(float(ty))
    box = split.image[yi - 12 : yi + 13, xi - 12 : xi + 13]
    # the box (+-6.7 sigma) holds the whole star (analytic pixel integrals) on a
    # flat sky of 100 e- per night pixel, i.e. 100 / 1.005**2 per tile pixel;
    # 0.2 % is the mosaic's flux-conservation requirement
    sky = 100.0 / 1.005**2
    assert np.isfinite(box).all()
    assert (box - sky).sum() / flux - 1 == pytest.approx(0.0, abs=2e-3)


def test_shifted_wcs_keeps_the_sky_of_every_pixel_with_sip():
    """A stretch's solved WCS carries SIP terms about CRPIX (FITS SIP convention, Shupe et al.
    2005): renaming its pixels must move the SIP reference pixel with CRPIX."""
    sip_wcs = WCS(naxis=2)
    sip_wcs.wcs.ctype = ["RA---TAN-SIP", "DEC--TAN-SIP"]
    sip_wcs.wcs.crval, sip_wcs.wcs.crpix = [RA0, 49.7], [130.0, 120.0]
    sip_wcs.wcs.cdelt = [-1.0 / 3600, 1.0 / 3600]
    a, b = np.zeros((3, 3)), np.zeros((3, 3))
    a[2, 0], a[1, 1], b[0, 2] = 2e-5, 1e-5, -3e-5
    sip_wcs.sip = Sip(a, b, None, None, sip_wcs.wcs.crpix)
    sip_wcs.wcs.set()
    shifted = _shifted_wcs(sip_wcs, 8, -5)
    x, y = np.array([0.0, 130.0, 259.0]), np.array([0.0, 118.0, 239.0])
    before = np.array(sip_wcs.pixel_to_world_values(x, y))
    after = np.array(shifted.pixel_to_world_values(x - 5, y + 8))
    assert np.isfinite(before).all()
    # the same sky to float64 rounding (1e-10 deg = 4e-7 arcsec)
    np.testing.assert_allclose(after, before, rtol=0, atol=1e-10)
