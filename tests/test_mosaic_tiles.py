"""Tile layouts of a mosaic: centres, sizes, overlaps, the RA wrap, and their options."""

import itertools

import numpy as np
import pytest
from astropy.coordinates import SkyCoord
from pydantic import ValidationError

from pipeline.mosaic import (
    CoaddOptions,
    TilingOptions,
    explicit_tiles,
    footprint_of,
    strip_tiles,
    tiles_from_options,
    touches,
)
from tests._mosaic_scene import night_wcs

#: A strip at declination 49.7 that crosses RA 0: three stretches of 1800 x 600 px.
STRETCH_SHAPE = (600, 1800)
STRETCH_RAS = (359.4, 359.95, 0.5)


@pytest.fixture(scope="module")
def footprints():
    return [
        footprint_of(night_wcs(STRETCH_SHAPE, rotation=0.2, ra=ra), STRETCH_SHAPE)
        for ra in STRETCH_RAS
    ]


def _inside_some_tile(footprint, tiles):
    """Which points of ``footprint`` fall inside one of ``tiles`` (their pixel edges)."""
    inside = np.zeros(footprint.ra.size, bool)
    for tile in tiles:
        n_y, n_x = tile.shape
        x, y = tile.wcs.world_to_pixel_values(footprint.ra, footprint.dec)
        inside |= (x >= -0.5) & (x <= n_x - 0.5) & (y >= -0.5) & (y <= n_y - 0.5)
    return inside


def test_tangent_tiles_share_the_overlap_along_the_central_declination(footprints):
    tiles = strip_tiles(footprints, pixel_scale=1.0, shape=(500, 800), projection="TAN", overlap=96)
    assert len(tiles) >= 3
    decs = np.concatenate([f.dec for f in footprints])
    for tile in tiles:
        assert tile.shape == (500, 800)
        # centres on the strip's central declination (midway between its edges),
        # rounded to a whole number of pixels (1 arcsec) from the equator
        middle = 0.5 * (decs.min() + decs.max())
        assert abs(tile.wcs.wcs.crval[1] - middle) <= 0.5 / 3600 + 1e-12
        assert tile.wcs.wcs.crval[1] * 3600 == pytest.approx(round(middle * 3600), abs=1e-6)
        assert tile.wcs.wcs.ctype[0] == "RA---TAN"
    for west, east in itertools.pairwise(tiles):
        # Tiles run west to east, and east is to the left (CDELT1 < 0, the FITS
        # convention): the eastern neighbour's centre lies (width - overlap)
        # columns left of the western tile's centre on its central row.  The
        # spacing is solved exactly from the gnomonic equations, so only rounding
        # remains (1e-6 px).
        ra, dec = east.wcs.pixel_to_world_values(399.5, 249.5)
        x, y = west.wcs.world_to_pixel_values(ra, dec)
        assert 399.5 - x == pytest.approx(800 - 96, abs=1e-6)
        # both centres lie on one circle of declination, which curves north of the
        # western tile's central row by the gnomonic eta (Calabretta & Greisen 2002, eq. 55)
        d = np.radians(dec)
        da = np.radians(east.wcs.wcs.crval[0] - west.wcs.wcs.crval[0])
        eta = (
            np.sin(d)
            * np.cos(d)
            * (1 - np.cos(da))
            / (np.sin(d) ** 2 + np.cos(d) ** 2 * np.cos(da))
        )
        assert y - 249.5 == pytest.approx(np.degrees(eta) * 3600, abs=1e-6)
        assert 0 < (east.wcs.wcs.crval[0] - west.wcs.wcs.crval[0]) % 360 < 180


def test_tangent_tiles_cover_the_strip_across_ra_zero(footprints):
    tiles = strip_tiles(footprints, pixel_scale=1.0, shape=(700, 800), projection="TAN", overlap=0)
    centres = [t.wcs.wcs.crval[0] for t in tiles]
    # the strip spans ~1.6 deg of RA, ~3700 px at this declination: 5 or 6 tiles of
    # 800 px, not a ring round the whole sky
    assert len(tiles) <= 6
    assert min(centres) < 1.0 and max(centres) > 359.0
    # every point of every footprint falls inside some tile
    for fp in footprints:
        assert _inside_some_tile(fp, tiles).all()
        assert all(isinstance(touches(t, fp), bool) for t in tiles)
        assert any(touches(t, fp) for t in tiles)


@pytest.mark.parametrize("overlap", [0, 96])
def test_a_night_that_extends_the_strip_leaves_the_existing_tiles_in_place(footprints, overlap):
    # The first two stretches, then all three (the strip grows east across RA
    # 0), then the last two (a night that only covers the east end): every
    # tile of a shorter strip comes back with the same name and the same WCS.
    def layout(chosen):
        tiles = strip_tiles(chosen, pixel_scale=1.0, shape=(700, 800), overlap=overlap)
        return {t.name: (t.shape, t.wcs.wcs.crval.tolist()) for t in tiles}

    full = layout(footprints)
    for part in (footprints[:2], footprints[1:], footprints[:1]):
        tiles = layout(part)
        assert len(tiles) < len(full)
        for name, (shape, crval) in tiles.items():
            assert full[name][0] == shape
            # the same arithmetic on the same integers: equal to float rounding
            np.testing.assert_allclose(full[name][1], crval, rtol=0, atol=1e-9)
        # and still every point of the shorter strip lies in one of its tiles
        chosen = strip_tiles(part, pixel_scale=1.0, shape=(700, 800), overlap=overlap)
        for fp in part:
            assert _inside_some_tile(fp, chosen).all()


def test_cylindrical_strip_rows_follow_circles_of_declination(footprints):
    (tile,) = strip_tiles(footprints, pixel_scale=1.0, shape=(640, 0), projection="CAR")
    n_y, n_x = tile.shape
    x = np.linspace(0, n_x - 1, 50)
    ra, dec = tile.wcs.pixel_to_world_values(x, np.full_like(x, (n_y - 1) / 2))
    decs = np.concatenate([f.dec for f in footprints])
    # A CAR reference point on the equator makes rows lines of constant latitude
    # (Calabretta & Greisen 2002, sec. 5.2.3); astropy's WCSLIB evaluates it.
    assert np.ptp(dec) < 1e-9
    assert dec[0] == pytest.approx(0.5 * (decs.min() + decs.max()), abs=1e-9)
    # square pixels at the central declination: neighbours 1 arcsec apart on the sky
    a = SkyCoord(ra[:2], dec[:2], unit="deg")
    step = a[0].separation(a[1]).arcsec / (x[1] - x[0])
    assert step == pytest.approx(1.0, rel=1e-6)  # exact up to the second-order arc/chord (1e-9)
    # the strip covers every footprint's right ascensions
    for fp in footprints:
        px, _ = tile.wcs.world_to_pixel_values(fp.ra, fp.dec)
        assert px.min() >= -0.5 and px.max() <= n_x - 0.5


def test_explicit_tiles_put_their_centres_where_asked():
    tiles = explicit_tiles(
        [(359.9, 49.0), (10.0, -30.0)], pixel_scale=0.5, shapes=[(64, 96), (33, 33)]
    )
    for tile, (ra, dec), shape in zip(
        tiles, [(359.9, 49.0), (10.0, -30.0)], [(64, 96), (33, 33)], strict=True
    ):
        assert tile.shape == shape
        centre = tile.wcs.pixel_to_world_values((shape[1] - 1) / 2, (shape[0] - 1) / 2)
        assert centre[0] == pytest.approx(ra, abs=1e-9)
        assert centre[1] == pytest.approx(dec, abs=1e-9)
    with pytest.raises(ValueError, match="centres but"):
        explicit_tiles([(0.0, 0.0)], pixel_scale=1.0, shapes=[])


def test_touches_is_false_far_away_and_true_when_the_footprint_encloses_the_tile():
    big = footprint_of(night_wcs((3000, 3000), rotation=0.0), (3000, 3000))
    (inner,) = explicit_tiles([(359.99, 49.7)], pixel_scale=1.0, shapes=[(50, 50)])
    (far,) = explicit_tiles([(120.0, 49.7)], pixel_scale=1.0, shapes=[(50, 50)])
    assert touches(inner, big)
    assert not touches(far, big)


def test_strip_tiles_refuse_bad_arguments(footprints):
    with pytest.raises(ValueError, match="projection"):
        strip_tiles(footprints, pixel_scale=1.0, shape=(10, 10), projection="SIN")
    with pytest.raises(ValueError, match="overlap"):
        strip_tiles(footprints, pixel_scale=1.0, shape=(10, 10), overlap=10)
    with pytest.raises(ValueError, match="empty"):
        strip_tiles([], pixel_scale=1.0, shape=(10, 10))


@pytest.mark.parametrize(
    ("section", "message"),
    [
        ({"layout": "explicit", "pixel_scale": 1.0}, "at least one entry"),
        ({"pixel_scale": 1.0, "tiles": [{"ra": 1.0, "dec": 2.0}]}, "only read with layout"),
        ({"pixel_scale": 1.0, "overlap": 4096}, "smaller than tile_width"),
        ({"pixel_scale": 1.0, "tile_size": 4}, "Extra inputs"),
        ({"pixel_scale": -1.0}, "greater than 0"),
    ],
)
def test_tiling_options_reject_inconsistent_sections(section, message):
    with pytest.raises(ValidationError, match=message):
        TilingOptions(**section)


def test_coadd_options_know_the_flag_names():
    assert CoaddOptions().ignore_flags
    with pytest.raises(ValidationError, match="unknown flag"):
        CoaddOptions(ignore_flags=["SATURATED", "PURPLE"])
    with pytest.raises(ValidationError, match="Extra inputs"):
        CoaddOptions(sigma=3.0)


def test_tiles_from_a_tiling_section(footprints):
    tangent = TilingOptions(pixel_scale=1.0, tile_width=800, tile_height=500, overlap=96)
    tiles = tiles_from_options(tangent, footprints)
    assert tiles[0].shape == (500, 800) and tiles[0].wcs.wcs.ctype[0] == "RA---TAN"
    strip = TilingOptions(layout="cylindrical_strip", pixel_scale=2.0, tile_height=300)
    (car,) = tiles_from_options(strip, footprints)
    assert car.shape[0] == 300 and car.wcs.wcs.ctype[0] == "RA---CAR"
    explicit = TilingOptions(
        layout="explicit",
        pixel_scale=0.5,
        tile_width=64,
        tile_height=48,
        overlap=0,
        tiles=[{"ra": 10.0, "dec": 20.0}, {"ra": 11.0, "dec": 20.0, "width": 32}],
    )
    tiles = tiles_from_options(explicit, [])
    assert [t.shape for t in tiles] == [(48, 64), (48, 32)]
    assert tiles[1].wcs.wcs.crval[0] == pytest.approx(11.0)
