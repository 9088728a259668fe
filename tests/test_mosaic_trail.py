"""A satellite trail across one night of a tile: the stars under it are flagged.

Three nights of one patch of sky (invented data, as in
tests/test_mosaic_errors.py: 0.52 px nights on a 1 arcsec tile, each in its
own seeing and sky), a grid of stars, and in the best-seeing night a
satellite trail 40 times its sky noise at its peak, as wide as its seeing,
straight across the tile through a few of the stars.  The nights' own masks
do not know the trail: the co-add rejects it across the nights, but within
``source_radius`` of a star the rejection allows for the star's light, so
there the trail's light stays, and where the trail is rejected on the star
the star is the other nights' seeing.  Either way the star's magnitude is off
(measured -0.32 to +0.06 mag against the same tile without the trail), and
the tile catalogue says so with ``NEAR_FLAGGED`` (detect's flag for a masked
pixel in the fitted stamp): the tile's FLAGS carry ``NIGHT_LEFT_OUT`` where a
night with data was left out, and within ``source_radius`` of a rejection.
"""

import numpy as np
import pytest
from astropy.table import Table

from pipeline.masks import MASK_DTYPE, MaskBit
from pipeline.mosaic import NightImage, coadd, mosaic_tile, tile_catalog
from pipeline.stages.detect import DetectOptions, SourceFlag
from tests._mosaic_scene import gaussian_stars, night_wcs, tile

#: Night pixels per tile pixel (0.516 arcsec camera pixels on 1 arcsec tiles).
SCALE = 0.52
TILE_SIZE = 240
NIGHT_SHAPE = (500, 500)
#: (night, turn deg, seeing sigma in night px, sky variance e^2 per night px)
NIGHTS = [("n1", 0.3, 1.05, 100.0), ("n2", -0.6, 1.35, 120.0), ("n3", 0.9, 1.25, 90.0)]
#: The trail: in the best-seeing night, through these tile pixels, at this
#: many times the night's sky noise at its peak.
TRAIL_NIGHT, TRAIL, TRAIL_PEAK = "n1", ((0.0, 50.0), (239.0, 190.0)), 40.0
#: Faint stars (S/N ~60 in the tile) and, every fourth star, bright ones.
FAINT, BRIGHT = 5000.0, 1.0e5
#: Gaussian FWHM / sigma (common practice).
FWHM_PER_SIGMA = 2.0 * np.sqrt(2.0 * np.log(2.0))


def _point_kernels() -> Table:
    """Smear kernels of unsmeared stars on nodes across the night (rectify's layout)."""
    nodes = np.linspace(0.0, NIGHT_SHAPE[0] - 1.0, 3)
    x, y = (a.ravel() for a in np.meshgrid(nodes, nodes))
    zeros = np.zeros((x.size, 2))
    return Table({"x": x, "y": y, "dx": zeros, "dy": zeros})


def _trail_distance(x, y):
    """Distance of tile pixels from the trail's centre line, tile px."""
    (ax, ay), (bx, by) = TRAIL
    return np.abs((x - ax) * (by - ay) - (y - ay) * (bx - ax)) / np.hypot(bx - ax, by - ay)


def _night(target, night, x, y, flux, rng, trail: bool) -> NightImage:
    name, turn, sigma, sky = night
    wcs = night_wcs(NIGHT_SHAPE, rotation=turn, scale=SCALE)
    nx, ny = wcs.world_to_pixel_values(*target.wcs.pixel_to_world_values(x, y))
    stars = gaussian_stars(NIGHT_SHAPE, nx, ny, flux, sigma)
    light = np.zeros(NIGHT_SHAPE)
    if trail:
        (ax, ay), (bx, by) = (
            wcs.world_to_pixel_values(*target.wcs.pixel_to_world_values(*p)) for p in TRAIL
        )
        gy, gx = np.mgrid[: NIGHT_SHAPE[0], : NIGHT_SHAPE[1]]
        across = ((gx - ax) * (by - ay) - (gy - ay) * (bx - ax)) / np.hypot(bx - ax, by - ay)
        light = TRAIL_PEAK * np.sqrt(sky) * np.exp(-0.5 * (across / sigma) ** 2)
    variance = sky + stars + light
    image = stars + light + rng.normal(0.0, np.sqrt(variance))
    return NightImage(
        image.astype(np.float32),
        variance.astype(np.float32),
        np.zeros(NIGHT_SHAPE, MASK_DTYPE),  # the night's mask knows nothing of the trail
        wcs,
        25.0,
        name,
        seeing=FWHM_PER_SIGMA * sigma * SCALE,
        smear_kernels=_point_kernels(),
    )


def _tile(trail: bool):
    """The tile of the three nights (the same stars and noise with or without the trail)."""
    rng = np.random.default_rng(21)
    target = tile(TILE_SIZE)
    g = 22.0 + 14.0 * np.arange(15)
    x, y = (a.ravel() + rng.uniform(-0.5, 0.5, a.size) for a in np.meshgrid(g, g))
    flux = np.where(np.arange(x.size) % 4 == 0, BRIGHT, FAINT)
    nights = [_night(target, n, x, y, flux, rng, trail and n[0] == TRAIL_NIGHT) for n in NIGHTS]
    built = mosaic_tile(nights, target)
    options = DetectOptions(background_box=32, fwhm_guess=1.8, seeing_shape="gaussian")
    catalog = tile_catalog(built, **options.model_dump())
    # each star's source: the nearest within a pixel (-1: not found)
    cx, cy = np.asarray(catalog["x"].value), np.asarray(catalog["y"].value)
    distance = np.hypot(cx[:, None] - x[None, :], cy[:, None] - y[None, :])
    j = np.argmin(distance, axis=0)
    j[distance[j, np.arange(x.size)] >= 1.0] = -1
    return built, catalog, j, x, y


@pytest.fixture(scope="module")
def tiles():
    return _tile(False), _tile(True)


def test_the_trail_s_pixels_are_flagged_in_the_tile(tiles):
    """NIGHT_LEFT_OUT along the whole trail; without the trail nearly nowhere."""
    (clean, *_), (trailed, _, _, x, y) = tiles
    gy, gx = np.mgrid[:TILE_SIZE, :TILE_SIZE]
    inner = (gx > 5) & (gx < TILE_SIZE - 6) & (gy > 5) & (gy < TILE_SIZE - 6)
    on_trail = (_trail_distance(gx, gy) < 1.0) & inner
    stars = np.hypot(gx[..., None] - x, gy[..., None] - y).min(axis=-1)
    left_out = (trailed.planes.flags & MaskBit.NIGHT_LEFT_OUT) != 0
    # Every pixel of the trail's core away from stars: rejected there or within
    # source_radius of where it was.  Beside stars the rejection allows for
    # their light and keeps the trail's (measured 0.85 of the core flagged):
    # the next test's stars.
    assert left_out[on_trail & (stars > 8.0)].all()
    assert np.mean(left_out[on_trail]) > 0.75
    assert trailed.planes.rejected[0] > 20 * max(trailed.planes.rejected[1:].max(), 1)
    far = (_trail_distance(gx, gy) > 15.0) & inner
    # Away from it only the noise's rejections (a 4 sigma outlier of a night
    # every ~30 000 pixels, flagged 11 x 11 px around): measured 0.0017, and
    # 0.0015 of the tile without the trail.
    assert np.mean(left_out[far]) < 0.02
    clean_left_out = (clean.planes.flags & MaskBit.NIGHT_LEFT_OUT) != 0
    assert np.mean(clean_left_out[inner]) < 0.02
    # the co-add's other flags: none (the nights' masks are empty)
    assert not np.any(trailed.planes.flags & ~np.uint16(MaskBit.NIGHT_LEFT_OUT))


def test_stars_under_the_trail_are_flagged_in_the_tile_catalogue(tiles):
    """Every star the trail crosses carries NEAR_FLAGGED; its magnitude is off.

    Stars within 2 px of the trail's centre line (its seeing sigma is
    ~0.55 tile px): their magnitudes moved by -0.32 to +0.06 (median -0.18)
    against the tile without the trail.  Before the tile's FLAGS held the
    nights left out, none carried NEAR_FLAGGED and 3 of the 6 had no flag
    at all (-0.32, -0.26 and -0.03 mag; the others BLENDED, the trail's
    light split from them).  With NIGHT_LEFT_OUT on the rejected pixels
    alone, not grown by source_radius, the -0.32 mag one had none.  Stars
    far from it are unchanged and keep their flags.
    """
    (_, clean, j0, x, y), (_, trailed, j1, _, _) = tiles
    found = (j0 >= 0) & (j1 >= 0)
    distance = _trail_distance(x, y)
    under = found & (distance < 2.0)
    assert under.sum() >= 5
    near = int(SourceFlag.NEAR_FLAGGED)
    flags = np.asarray(trailed["flags"])[j1[under]]
    assert np.all(flags & near), flags
    shift = np.asarray(trailed["mag"].value)[j1[under]] - np.asarray(clean["mag"].value)[j0[under]]
    assert np.max(np.abs(shift)) > 0.05  # the trail does move them: a flag is due
    far = found & (distance > 15.0)
    assert far.sum() > 150
    far_flags = np.asarray(trailed["flags"])[j1[far]]
    # the far stars' flags: as without the trail (measured none flagged with
    # or without it; the noise's rejections may flag a few)
    assert np.mean(far_flags != 0) < 0.05


def test_a_night_left_out_is_flagged_where_it_had_data():
    """coadd: NIGHT_LEFT_OUT where a night with data is rejected or flagged, not without data.

    Five nights of flat sky (noise 1); night 0 has a 100-sigma outlier at
    one pixel, a SATURATED pixel (ignored by default: left out, data kept)
    at another and OUTSIDE (no data) at a third.
    """
    rng = np.random.default_rng(3)
    shape = (5, 40, 40)
    images = rng.normal(0.0, 1.0, shape).astype(np.float32)
    variances = np.ones(shape, np.float32)
    flags = np.zeros(shape, MASK_DTYPE)
    images[0, 10, 10] = 100.0
    flags[0, 30, 10] = MaskBit.SATURATED
    images[0, 30, 30], variances[0, 30, 30] = np.nan, np.nan
    flags[0, 30, 30] = MaskBit.OUTSIDE
    planes = coadd(images, variances, flags, match_levels=False)
    left_out = (planes.flags & MaskBit.NIGHT_LEFT_OUT) != 0
    # the outlier: left out over the rejection's growth (1 px) and flagged
    # within source_radius (5 px) of it
    assert left_out[5:16, 5:16].all() and planes.coverage[10, 10] == 4
    assert left_out[30, 10] and planes.coverage[30, 10] == 4
    assert not left_out[30, 30] and planes.coverage[30, 30] == 4
    # a saturated pixel of the kept nights is not theirs to flag: the OR of
    # the kept nights' flags holds no SATURATED
    assert not np.any(planes.flags & MaskBit.SATURATED)
    expected = np.zeros(shape[1:], bool)
    expected[5:16, 5:16] = True
    expected[30, 10] = True
    np.testing.assert_array_equal(left_out, expected)


def test_the_tile_catalogue_says_which_tile_flags_lie_around_each_source(tiles):
    """mask_near holds the tile FLAGS bits that made a source NEAR_FLAGGED; mask_core, its core's.

    Every NEAR_FLAGGED source names its bits in ``mask_near`` (here only
    NIGHT_LEFT_OUT: the nights' own masks are empty), and nearly every
    source without the flag has none there (measured 1 of 267, an edge
    pixel of a group's stamp); the core lies within the stamp, so its bits
    are among the stamp's.  The stars the trail crosses carry
    NIGHT_LEFT_OUT in ``mask_near``; on the tile without the trail almost
    no star does.  Without the columns (the catalogue as before) this fails.
    """
    (_, clean, j0, x, y), (_, trailed, j1, _, _) = tiles
    left_out = int(MaskBit.NIGHT_LEFT_OUT)
    for catalog in (clean, trailed):
        flagged = (np.asarray(catalog["flags"]) & int(SourceFlag.NEAR_FLAGGED)) != 0
        near = np.asarray(catalog["mask_near"])
        core = np.asarray(catalog["mask_core"])
        assert np.all(near[flagged] != 0)
        assert np.mean((near != 0) != flagged) < 0.02
        assert not np.any(core & ~near)
        assert not np.any((near | core) & ~left_out)
        assert catalog.meta["mask_bits"]["NIGHT_LEFT_OUT"] == left_out
        assert 0 < catalog.meta["mask_core_radius"] < min(catalog.meta["mask_near_half_size"]) + 1
        # the tile's own, in place of detect's, where the tiles have had them
        assert catalog.colnames[-4:] == ["mask_core", "mask_near", "mag", "mag_err"]
        assert "tile's FLAGS" in catalog["mask_near"].info.description
    distance = _trail_distance(x, y)
    under = (j1 >= 0) & (distance < 2.0)
    assert np.all(np.asarray(trailed["mask_near"])[j1[under]] & left_out)
    # a star the trail crosses may keep NIGHT_LEFT_OUT off its core (the
    # rejection allows for its light there); most carry it (measured 5 of 6)
    assert np.mean(np.asarray(trailed["mask_core"])[j1[under]] & left_out != 0) > 0.5
    far = (j1 >= 0) & (distance > 15.0)
    assert np.mean(np.asarray(trailed["mask_near"])[j1[far]] != 0) < 0.05
    assert np.mean(np.asarray(clean["mask_near"])[j0[j0 >= 0]] != 0) < 0.05
