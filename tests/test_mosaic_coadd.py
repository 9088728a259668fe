"""Co-adding nights on a tile: noise prediction, outlier rejection, star fluxes, night limits."""

import numpy as np
import pytest
from astropy.io import fits

from pipeline.masks import MASK_DTYPE, MaskBit
from pipeline.mosaic import (
    CoaddOptions,
    NightImage,
    coadd,
    mosaic_tile,
    night_image_from_hdulist,
    resample_to_tile,
    weighted_median,
)
from pipeline.products import image_hdulist
from tests._mosaic_scene import RA0, column_pieces, gaussian_stars, night_wcs, tile

TILE = tile(256)
NIGHT_SHAPE = (300, 320)
#: Per night: turn (deg), scale, centre offsets (deg), blank-sky variance (e^2),
#: seeing sigma (night px).  Five nights of one strip, each framed a little differently.
NIGHTS = [
    (0.10, 0.990, 0.0000, 0.0000, 100.0, 1.2),
    (0.15, 0.995, 0.0004, -0.0002, 150.0, 1.5),
    (0.20, 1.000, -0.0003, 0.0003, 200.0, 1.8),
    (0.25, 1.005, 0.0002, 0.0001, 250.0, 2.1),
    (0.30, 1.010, -0.0001, -0.0003, 300.0, 2.4),
]
#: Stars: tile pixel (x, y) of their sky position and flux (e-; S/N ~ 1000).
STARS = [(200, 60, 3e5), (60, 200, 3e5), (128, 40, 3e5), (40, 128, 3e5), (220, 120, 3e5)]
#: The satellite trail of night 2 runs through these tile pixels (away from the stars).
TRAIL = ((0.0, 30.0), (255.0, 229.0))


def _sky(x, y):
    return TILE.wcs.pixel_to_world_values(np.asarray(x, float), np.asarray(y, float))


def _night(i, rng, *, trail=False, **fields):
    rotation, scale, dra, ddec, variance, sigma = NIGHTS[i]
    wcs = night_wcs(NIGHT_SHAPE, rotation=rotation, scale=scale, ra=RA0 + dra, dec=49.7 + ddec)
    sx, sy, flux = (np.array(c, float) for c in zip(*STARS, strict=True))
    x, y = wcs.world_to_pixel_values(*_sky(sx, sy))
    model = gaussian_stars(NIGHT_SHAPE, x, y, flux, sigma)
    if trail:
        (ax, ay), (bx, by) = (wcs.world_to_pixel_values(*_sky(*p)) for p in TRAIL)
        gy, gx = np.mgrid[: NIGHT_SHAPE[0], : NIGHT_SHAPE[1]]
        distance = ((gx - ax) * (by - ay) - (gy - ay) * (bx - ax)) / np.hypot(bx - ax, by - ay)
        model = model + 40.0 * np.sqrt(variance) * np.exp(-0.5 * (distance / sigma) ** 2)
    total = variance + model
    image = model + rng.normal(0.0, np.sqrt(total))
    fields = {"zero_point": 25.0, "night": f"2026-10-{10 + i}", "seeing": 2.3548 * sigma} | fields
    return NightImage(
        image.astype(np.float32),
        total.astype(np.float32),
        np.zeros(NIGHT_SHAPE, MASK_DTYPE),
        wcs,
        **fields,
    )


@pytest.fixture(scope="module")
def nights():
    """The five nights without and with the satellite trail (same noise)."""
    clean = [_night(i, np.random.default_rng(i)) for i in range(5)]
    trailed = [_night(i, np.random.default_rng(i), trail=(i == 2)) for i in range(5)]
    return clean, trailed


@pytest.fixture(scope="module")
def coadds(nights):
    clean, trailed = nights
    return mosaic_tile(clean, TILE), mosaic_tile(trailed, TILE)


def _blank(planes, margin=20):
    """Pixels far from stars and the trail, inside the tile's margin."""
    gy, gx = np.mgrid[: TILE.shape[0], : TILE.shape[1]]
    far = np.ones(TILE.shape, bool)
    for x, y, _ in STARS:
        far &= np.hypot(gx - x, gy - y) > 20
    (ax, ay), (bx, by) = TRAIL
    far &= np.abs((gx - ax) * (by - ay) - (gy - ay) * (bx - ax)) / np.hypot(bx - ax, by - ay) > 15
    inner = np.zeros(TILE.shape, bool)
    inner[margin:-margin, margin:-margin] = True
    return far & inner & (planes.coverage > 0)


def test_blank_sky_noise_matches_the_inverse_variance_prediction(coadds):
    clean, _ = coadds
    planes = clean.planes
    blank = _blank(planes)
    measured = np.var(planes.image[blank])
    predicted = np.mean(1.0 / planes.weight[blank])
    # ~25000 pixels correlated over ~2 px: the measured variance is known to
    # ~2 %; 5 % on the rms is the mosaic's noise requirement.
    assert np.sqrt(measured / predicted) == pytest.approx(1.0, abs=0.05)
    assert np.median(planes.coverage[blank]) == 5
    # the resampling's correlation is reported for aperture sums (> 1, see
    # test_mosaic_resample.py for its check against large boxes)
    assert clean.noise_correlation > 1.2


def test_the_depth_gain_over_one_night_is_the_square_root_of_the_summed_weights(nights, coadds):
    """The co-add of five nights against the first night alone on the same tile.

    The blank-sky noise falls by the square root of the summed weights over
    the night's own (inverse-variance weighting, common practice); the
    mosaic's requirement is agreement within 10 % (measured ratio 1.013).  The
    nights' weights span a factor 2.6, so a plain mean of them would still reach
    0.94 of the prediction: this checks the depth, not the weighting.
    """
    clean, _ = coadds
    alone = [mosaic_tile([night], TILE) for night in nights[0]]
    blank = _blank(clean.planes) & _blank(alone[0].planes)
    gain = np.std(alone[0].planes.image[blank]) / np.std(clean.planes.image[blank])
    weights = [np.mean(a.planes.weight[blank]) for a in alone]  # each night's own
    predicted = np.sqrt(np.sum(weights) / weights[0])
    # ~25000 correlated pixels: each rms is known to ~2 %, the ratio to ~3 %
    assert gain / predicted == pytest.approx(1.0, abs=0.10)
    assert gain > 1.5  # five nights of unequal weights, not one


def test_satellite_trail_leaves_no_pixel_above_three_sigma(coadds):
    clean, trailed = coadds
    sigma = 1.0 / np.sqrt(clean.planes.weight)
    # The trail's light in the co-add: the co-add with the trail minus the one
    # without (same noise), in co-add sigma.  The mosaic's requirement: below 3
    # sigma everywhere (the trail is 40 sigma of its night; without rejection it
    # leaves ~30 sigma).  Negative differences are not trail light: they come
    # from noise outliers of other nights judged against a slightly different
    # median.
    excess = (trailed.planes.image - clean.planes.image) / sigma
    assert np.nanmax(excess[4:-4, 4:-4]) < 3.0
    assert trailed.planes.rejected[2] > 2000  # the trail's pixels in its night
    assert trailed.planes.rejected[2] > 20 * np.delete(trailed.planes.rejected, 2).max()


def test_a_sky_that_changes_along_the_scan_is_matched_not_rejected():
    # Three nights of blank sky (1 e- rms) at different levels; in one the sky
    # brightens by 8 sigma along the scan (with time) across the tile, as the
    # demo's second night does.  One level per night would leave +-4 sigma
    # ramps at the tile's ends for the rejection to take (the demo lost ~96000
    # pixels of a tile so); a level that follows the sky leaves only the
    # Gaussian tails.  Invented data: a self-consistency test.
    from tests._mosaic_reference import coadd_numpy

    rng = np.random.default_rng(14)
    shape = (3, 256, 512)
    x = np.arange(shape[2])
    sky = np.stack([np.full(shape[2], 10.0), -5.0 + 8.0 * x / (shape[2] - 1), np.zeros(shape[2])])
    images = (sky[:, None, :] + rng.normal(0.0, 1.0, shape)).astype(np.float32)
    variances = np.ones(shape, np.float32)
    flags = np.zeros(shape, MASK_DTYPE)
    planes = coadd(images, variances, flags)
    # Gaussian tails beyond 4 sigma (6e-5 of the pixels) grown to 3 x 3
    # squares: ~6e-4 of a night's pixels; 2e-3 leaves room for their noise
    assert planes.rejected.max() < 2e-3 * shape[1] * shape[2]
    # the co-add's level is the nights' mean sky at both ends of the ramp, to
    # ~3 times the noise of a 256 x 16 px mean (0.58 / 64 e-)
    mean_sky = sky.mean(axis=0)
    for ends in (np.s_[:16], np.s_[-16:]):
        level = np.mean(planes.image[:, ends]) - np.mean(mean_sky[ends])
        assert abs(level) < 0.03
    # the compiled level surface against the numpy one (float32 rounding)
    reference = coadd_numpy(images, variances, flags)
    np.testing.assert_allclose(planes.image, reference.image, rtol=1e-6, atol=1e-5)
    np.testing.assert_array_equal(planes.rejected, reference.rejected)


@pytest.mark.parametrize("ignored", ["GAP", "ZERO_POINT"])
def test_a_night_without_a_usable_pixel_on_the_tile_is_left_out(ignored):
    # Three nights of blank sky on a tile wide enough for several level blocks;
    # every pixel of the third is flagged with a bit the co-add ignores (a
    # readout gap over the whole tile, or, with ZERO_POINT in ignore_flags,
    # a stretch whose zero point a passing cloud made unreliable: a simulated
    # three-night mosaic failed so, "shape mismatch ... (8, 8) and (2, 2)").
    # The co-add is the other two nights'.  Invented data: self-consistency.
    rng = np.random.default_rng(21)
    shape = (3, 256, 1024)
    images = (np.array([10.0, 20.0, 30.0])[:, None, None] + rng.normal(0.0, 1.0, shape)).astype(
        np.float32
    )
    variances = np.ones(shape, np.float32)
    flags = np.zeros(shape, MASK_DTYPE)
    flags[2] = int(MaskBit[ignored])
    ignore = (*CoaddOptions().ignore_flags, "ZERO_POINT")
    planes = coadd(images, variances, flags, ignore_flags=ignore)
    assert np.all(planes.coverage == 2)
    assert planes.offsets[2] == 0.0
    two = coadd(images[:2], variances[:2], flags[:2], ignore_flags=ignore)
    np.testing.assert_allclose(planes.image, two.image, atol=1e-5)


def test_a_night_the_coadd_cannot_use_is_left_out_of_the_seeing_and_the_errors(nights):
    # Night 0 (the best seeing, 1.2 px sigma) with every pixel flagged
    # ZERO_POINT, which ignore_flags leaves out: it adds no light, so it must
    # not weigh in the tile's seeing mix (the PSF its catalogue fits), its
    # zero-point or position errors.  On a simulated three-night mosaic it
    # still did: the tile's bright stars came out 0.007-0.010 mag too bright.
    import dataclasses

    clean, _ = nights
    errors = {"zero_point_error": 0.002, "position_error": (1e-6, 1e-6)}
    flagged = dataclasses.replace(
        clean[0],
        flags=np.full(NIGHT_SHAPE, MaskBit.ZERO_POINT, MASK_DTYPE),
        zero_point_error=0.0001,  # a tiny error that would pull the co-added one down
        position_error=(1e-8, 1e-8),
    )
    others = [dataclasses.replace(night, **errors) for night in clean[1:3]]
    options = CoaddOptions(ignore_flags=(*CoaddOptions().ignore_flags, "ZERO_POINT"))
    with_flagged = mosaic_tile([flagged, *others], TILE, options)
    without = mosaic_tile(others, TILE, options)
    # left out, and its row of the nights' table says why
    assert with_flagged.nights == without.nights
    assert with_flagged.excluded == {0: "every pixel on the tile flagged with ignore_flags"}
    assert [s[0] for s in with_flagged.seeing] == [s[0] for s in without.seeing]
    assert with_flagged.zero_point_error == pytest.approx(without.zero_point_error)
    assert with_flagged.position_error == pytest.approx(without.position_error)
    np.testing.assert_allclose(with_flagged.planes.image, without.planes.image, atol=1e-4)


def test_star_fluxes_survive_rejection_in_mixed_seeing(coadds):
    _, trailed = coadds
    image = trailed.planes.image
    for x, y, flux in STARS:
        box = image[y - 14 : y + 15, x - 14 : x + 15]
        # S/N ~ 1000 per star: noise moves the box sum by ~0.1 %; the mosaic's
        # requirement for stars of S/N > 100 is 0.5 %.  Seeing sigma 1.2-2.4 px
        # across the nights: rejecting star cores or wings would bias the sum.
        assert box.sum() / flux - 1 == pytest.approx(0.0, abs=5e-3)


def test_nights_beyond_the_seeing_and_transparency_limits_are_left_out(nights):
    clean, _ = nights
    products = list(clean)
    products[1] = _night(1, np.random.default_rng(1), night_zero_point=24.2)
    products = [
        NightImage(p.image, p.variance, p.flags, p.wcs, 25.0, p.night, 25.0, p.seeing)
        if i != 1
        else p
        for i, p in enumerate(products)
    ]
    # night 4: seeing 2.3548 * 2.4 = 5.65 arcsec; night 1: 0.8 mag less transparent
    options = CoaddOptions(max_seeing=5.0, max_transparency_loss=0.5)
    result = mosaic_tile(products, TILE, options)
    assert result.nights == ("2026-10-10", "2026-10-12", "2026-10-13")
    assert set(result.excluded) == {1, 4}
    assert "seeing" in result.excluded[4] and "zero point" in result.excluded[1]
    assert result.planes.coverage.max() == 3
    same = mosaic_tile([products[i] for i in (0, 2, 3)], TILE, options)
    np.testing.assert_array_equal(result.planes.image, same.planes.image)
    with pytest.raises(ValueError, match="outside the limits"):
        mosaic_tile(products, TILE, CoaddOptions(max_seeing=1.0))


def test_a_tile_co_adds_one_passband(nights):
    """Nights of another FILTER are not co-added with the rest: without
    ``coadd.filter`` a tile whose products mix passbands fails and names
    them; with it, the others are left out with the reason, and products of
    an unknown passband are kept (common practice: a co-add is of one band)."""
    import dataclasses

    clean, _ = nights
    products = [
        dataclasses.replace(p, filter_name="i" if k == 2 else ("r" if k != 3 else None))
        for k, p in enumerate(clean)
    ]
    with pytest.raises(ValueError, match=r"of 2 passbands \(FILTER r: 2026-10-10, 2026-10-11"):
        mosaic_tile(products, TILE, CoaddOptions())
    result = mosaic_tile(products, TILE, CoaddOptions(filter="r"))
    assert result.excluded == {2: "FILTER i, not coadd.filter r"}
    assert "2026-10-12" not in result.nights and "2026-10-13" in result.nights
    alone = mosaic_tile(products[2:3], TILE, CoaddOptions(filter="i"))
    assert alone.nights == ("2026-10-12",)


def test_products_on_other_zero_points_are_rescaled(nights):
    clean, _ = nights
    night = clean[0]
    factor = 10 ** (-0.4 * (25.0 - 24.0))  # fewer electrons per magnitude at zp 24
    fainter = NightImage(
        night.image * np.float32(factor),
        night.variance * np.float32(factor**2),
        night.flags,
        night.wcs,
        24.0,
        "2026-10-20",
    )
    result = mosaic_tile([night, fainter], TILE, CoaddOptions(match_levels=False))
    alone = resample_to_tile(night.image, night.variance, night.flags, night.wcs, TILE)
    assert result.zero_point == 25.0
    # float32 rounding of the rescaled planes: 1e-5 relative
    np.testing.assert_allclose(
        result.planes.image[alone.slices], alone.image, rtol=1e-5, atol=1e-3, equal_nan=True
    )


def test_weighted_median_worked_examples():
    values = np.array([[1.0, 1.0], [2.0, 2.0], [3.0, 3.0], [10.0, 10.0]])
    weights = np.array([[1.0, 1.0], [1.0, 1.0], [1.0, 1.0], [1.0, 5.0]])
    # equal weights: the lowest value reaching half the total weight (2 of 4);
    # one heavy value (5 of 8) is the median by itself (common practice)
    np.testing.assert_array_equal(weighted_median(values, weights), [2.0, 10.0])
    assert np.isnan(weighted_median(values[:, :1], np.zeros((4, 1))))[0]


def test_night_image_from_an_image_product():
    wcs = night_wcs((20, 30))
    header = wcs.to_header()
    # the cards the science stage writes
    header["PHOTZP"] = 25.0
    header["ZPMED"] = 24.6
    header["SEEING"] = 3.1
    header["NOISECOR"] = 1.4
    header["DATE-OBS"] = "2026-10-15T21:00:00"
    # the solved WCS's systematic errors (astrometry's cards), in degrees of each
    # coordinate: 20 mas on the sky along RA at the centre's declination
    _, dec = wcs.pixel_to_world_values(14.5, 9.5)
    header["CSYER1"] = 0.020 / 3600.0 / np.cos(np.radians(dec))
    header["CSYER2"] = 0.015 / 3600.0
    hdul = image_hdulist(
        np.ones((20, 30)),
        np.ones((20, 30)),
        np.zeros((20, 30), MASK_DTYPE),
        unit="electron",
        header=header,
        metadata=fits.Header(),
    )
    night = night_image_from_hdulist(hdul)
    assert (night.zero_point, night.night_zero_point, night.seeing) == (25.0, 24.6, 3.1)
    assert night.noise_correlation == 1.4 and night.night == "2026-10-15"
    assert night.wcs.wcs.ctype[0] == "RA---CAR"
    assert night.position_error == pytest.approx((0.020, 0.015), rel=1e-9)
    del hdul["FLUX"].header["CSYER1"], hdul["FLUX"].header["CSYER2"]
    assert night_image_from_hdulist(hdul).position_error == (0.0, 0.0)
    del hdul["FLUX"].header["PHOTZP"]
    with pytest.raises(ValueError, match="PHOTZP"):
        night_image_from_hdulist(hdul)


def test_overlapping_products_of_one_night_count_once(nights):
    clean, _ = nights
    night = clean[0]
    pieces = column_pieces(night, [slice(0, 180), slice(140, None)])
    whole = mosaic_tile([night], TILE)
    split = mosaic_tile(pieces, TILE)
    assert split.nights == (night.night,)
    assert split.planes.coverage.max() == 1
    # Where the pieces overlap by 40 columns, each resamples the same pixels:
    # the merge must leave no gap and change nothing beyond float32 rounding.
    both = np.isfinite(whole.planes.image)
    assert np.isfinite(split.planes.image[both]).all()
    np.testing.assert_allclose(
        split.planes.image[both], whole.planes.image[both], rtol=1e-4, atol=1e-2
    )
