"""Resampling a night onto a tile: flux, positions, variance, noise correlation and flags."""

import numpy as np
import pytest
from reproject import reproject_exact, reproject_interp

from pipeline.masks import MASK_DTYPE, MaskBit
from pipeline.mosaic import resample_to_tile
from tests._mosaic_scene import RA0, gaussian_stars, night_wcs, tile

#: Night image size (covers the 160 px tile with a margin) and the stars on it:
#: 0-based night pixel (x, y), flux (e-); sigma 1.8 night px (FWHM 4.2 arcsec).
SHAPE = (200, 220)
STARS = [(100.3, 95.6, 2.0e4), (60.7, 130.1, 1.0e4), (150.2, 70.4, 5.0e3), (120.9, 52.55, 8.0e3)]
SIGMA = 1.8


def _planes(image, variance=None, flags=None):
    variance = np.ones(image.shape) if variance is None else variance
    flags = np.zeros(image.shape, MASK_DTYPE) if flags is None else flags
    return image.astype(np.float32), variance.astype(np.float32), flags


def _on_tile(result, shape):
    full = np.full(shape, np.nan)
    full[result.slices] = result.image
    return full


@pytest.fixture(scope="module")
def stars_on_tile():
    """The stars of STARS on a night turned by 0.3 deg and scaled by 1 %, resampled."""
    wcs = night_wcs(SHAPE, rotation=0.3, scale=1.01)
    x, y, flux = (np.array(c) for c in zip(*STARS, strict=True))
    image = gaussian_stars(SHAPE, x, y, flux, SIGMA)
    target = tile(160)
    result = resample_to_tile(*_planes(image), wcs, target)
    ra, dec = wcs.pixel_to_world_values(x, y)
    tx, ty = target.wcs.world_to_pixel_values(ra, dec)
    return _on_tile(result, target.shape), tx, ty, flux


def _box(image, x, y, half=12):
    xi, yi = round(x), round(y)
    gy, gx = np.mgrid[yi - half : yi + half + 1, xi - half : xi + half + 1]
    return image[gy, gx], gx, gy


def test_flux_of_gaussian_stars_is_conserved(stars_on_tile):
    image, tx, ty, flux = stars_on_tile
    for x, y, f in zip(tx, ty, flux, strict=True):
        box, _, _ = _box(image, x, y)
        # Each night pixel holds the analytic integral of the Gaussian over it
        # (erf differences), so the box of +-12 px (6.7 sigma) holds the star's
        # whole flux to 1e-10.  0.2 % is the mosaic's flux-conservation requirement;
        # the four Keys passes keep it to ~1e-4.
        assert np.sum(box) / f - 1 == pytest.approx(0, abs=2e-3)


def test_stars_land_at_their_true_sky_positions(stars_on_tile):
    image, tx, ty, _ = stars_on_tile
    for x, y in zip(tx, ty, strict=True):
        box, gx, gy = _box(image, x, y)
        total = box.sum()
        # First moments of the resampled star against the tile pixel of its sky
        # position (astropy.wcs, FITS WCS standard).  Keys interpolation keeps a
        # centroid exactly for a translation and to ~1e-3 px for this small turn
        # and scale; 0.05 px is the mosaic's astrometric requirement.
        assert (box * gx).sum() / total == pytest.approx(x, abs=0.05)
        assert (box * gy).sum() / total == pytest.approx(y, abs=0.05)


@pytest.mark.parametrize("n_rows", [30, 45])
def test_a_night_only_a_few_rows_deep_on_the_tile_keeps_its_stars(n_rows):
    # A tile that the strip only grazes: pass 1's crossing columns are known
    # on 3 or 4 input rows, and their spline's degree along the rows must
    # follow (an anchored tile at the strip's end met this).
    shape = (n_rows, 220)
    wcs = night_wcs(shape, rotation=0.3, scale=1.01)
    x, y, flux = np.array([60.3, 150.7]), np.array([n_rows / 2 - 0.2, n_rows / 2 + 0.4]), 1e4
    image = gaussian_stars(shape, x, y, np.full(2, flux), SIGMA)
    target = tile(160)
    resampled = _on_tile(resample_to_tile(*_planes(image), wcs, target), target.shape)
    tx, ty = target.wcs.world_to_pixel_values(*wcs.pixel_to_world_values(x, y))
    for star_x, star_y in zip(tx, ty, strict=True):
        box, _, _ = _box(resampled, star_x, star_y)
        # the mosaic's 0.2 % flux requirement, as for the full night above
        assert np.nansum(box) / flux - 1 == pytest.approx(0, abs=2e-3)


@pytest.mark.parametrize(("scale", "tolerance"), [(1.25, 2e-3), (1.01, 5e-3)])
def test_agrees_with_reproject_on_a_smooth_image(scale, tolerance):
    """reproject's resamplers (a reference library) give the same image.

    Night pixels of 1.01 tile pixels, averaged over each tile pixel, against
    the exact overlap-area resampler (the cubic B-spline's blur, variance
    1/3 px**2, lowers the blob's peak by ~0.2 % more than the overlap's box;
    measured 0.39 % of the peak); of 1.25 (a finer tile, interpolated with
    the Keys taps) against its bicubic interpolation (the exact overlap of
    pixels larger than the tile's is blocky: 0.9 % of the peak off).
    """
    shape = (round(120 * 1.01 / scale), round(130 * 1.01 / scale))
    wcs = night_wcs(shape, rotation=0.3, scale=scale)
    # a broad blob: interpolation and exact overlap agree for well-sampled images
    # (the same blob on the sky at either scale)
    x, y = (64.2 - 65.0) * 1.01 / scale + shape[1] / 2, (58.7 - 60.0) * 1.01 / scale + shape[0] / 2
    image = gaussian_stars(shape, [x], [y], [1.0e6], 9.0 * 1.01 / scale) + 50.0
    target = tile(90)
    ours = _on_tile(resample_to_tile(*_planes(image), wcs, target), target.shape)
    # reproject works on surface brightness: divide by the night's pixel area and
    # multiply by the tile's (both constant to 1e-3 over this small field).
    ratio = (1 / scale) ** 2
    if scale > 1.1:
        theirs, footprint = reproject_interp(
            (image, wcs), target.wcs, shape_out=target.shape, order="bicubic"
        )
    else:
        theirs, footprint = reproject_exact((image, wcs), target.wcs, shape_out=target.shape)
    inner = np.s_[5:-5, 5:-5]
    assert footprint[inner].min() > 0.999
    # exact overlap averages over the pixel (a box filter) where interpolation does
    # not: for a blob of sigma 9 px that differs by sigma^-2 / 12 ~ 1e-3 of the peak
    # curvature term; 0.2 % of the peak covers it.
    peak = ours[inner].max()
    assert np.abs(ours[inner] - theirs[inner] * ratio).max() < tolerance * peak


@pytest.fixture(scope="module", params=[1.01, 0.52])
def white_noise(request):
    """Unit white noise on a night around a 512 px tile, resampled onto it, 4 realisations.

    The night's pixels are 1.01 of the tile's, or 0.52 (0.516 arcsec camera
    pixels on 1 arcsec tiles: the tile samples the night every 1.92 pixels).
    """
    scale = request.param
    shape = (round(560 / scale), round(600 / scale))
    wcs = night_wcs(shape, rotation=0.3, scale=scale, ra=RA0 + 1e-4, dec=49.7002)
    target = tile(512)
    rng = np.random.default_rng(7)
    return [resample_to_tile(*_planes(rng.normal(0.0, 1.0, shape)), wcs, target) for _ in range(4)]


def test_pixel_variance_prediction_matches_the_noise(white_noise):
    measured = np.mean([r.image[16:-16, 16:-16].var() for r in white_noise])
    plane = np.mean([r.variance[16:-16, 16:-16].mean() for r in white_noise])
    factor = white_noise[0].pixel_factor
    # ~1e6 pixels correlated over ~2 px: the variance is known to ~0.5 %; the
    # plane is exact per pixel (one pass per axis), so 2 % is a ratchet.
    assert factor == 1.0
    assert measured / (plane * factor) == pytest.approx(1.0, abs=0.02)


#: Width (sigma) of the Gaussian window of the large-aperture sums, tile px.
WINDOW = 6.0


def _window_sums(image: np.ndarray) -> tuple[float, float]:
    """Variance of the image's sums under a Gaussian window at every position, and sum(W**2).

    A smooth window of ``WINDOW`` px stands for a large aperture: its sum
    weighs each input pixel by the window at it, to ~(kernel / WINDOW)**2,
    where a box's edges cut through the kernels (8 % of a 16 px box's
    variance for a kernel averaging two night pixels).
    """
    from scipy.signal import fftconvolve

    h = int(4 * WINDOW)
    t = np.arange(-h, h + 1)
    window = np.exp(-0.5 * (t[:, None] ** 2 + t[None, :] ** 2) / WINDOW**2)
    sums = fftconvolve(image.astype(float), window, mode="valid")
    return float(sums.var()), float(np.sum(window**2))


def test_large_aperture_noise_prediction(white_noise):
    ratios = []
    for r in white_noise:
        image, variance = r.image[16:-16, 16:-16], r.variance[16:-16, 16:-16]
        measured, window2 = _window_sums(image)
        ratios.append(measured / (window2 * variance.mean()))
    # 4 x 432**2 positions, ~1900 independent windows (their area 4 pi WINDOW**2):
    # the variance is known to ~3 % (sqrt(2 / 1900)); 8 % is under three
    # standard errors.  Measured 1.53 against 1.54 (1.01) and 4.21 against 4.35
    # (0.52; the night averaged over each tile pixel: 0.77 against 0.80 while
    # it was sampled every 1.92 pixels, 0.41 when every night pixel was taken
    # to count once in a large sum: aperture errors from the tile's NOISECOR
    # were then 0.73 of the truth).
    assert np.mean(ratios) == pytest.approx(white_noise[0].noise_correlation, rel=0.08)


def test_every_night_pixel_counts_once_in_a_large_sum(white_noise, request):
    """A large sum on the tile holds every night pixel under it once, even on a coarser tile.

    Self-consistency: flux conservation makes a large (windowed) sum the
    night's pixels under it weighted by the window, whose variance for
    independent unit pixels is the sum of the squared window over them
    (common practice): ``sum(W**2) / scale**2`` with ``W`` on the tile's
    pixels.  Sampled every 1.92 night pixels with the Keys kernel, the
    pixels at the samples counted up to twice and those between hardly at
    all: the variance came out 1.89 times that (~1.4 per axis).  Measured
    0.97 (0.52) and 1.00 (1.01); the statistics as in
    :func:`test_large_aperture_noise_prediction`.
    """
    scale = request.node.callspec.params["white_noise"]
    ratios = []
    for r in white_noise:
        measured, window2 = _window_sums(r.image[16:-16, 16:-16])
        ratios.append(measured / (window2 / scale**2))
    assert np.mean(ratios) == pytest.approx(1.0, rel=0.08)


def test_a_coarser_tile_keeps_most_of_the_nights_depth():
    """A star's sky-limited flux error on a tile of 1.92 night pixels, over the night's.

    Unit white noise on 0.52 px nights, resampled onto 1 px tiles, and a
    Gaussian star of 1.45 tile px FWHM (the demo's 1.45 arcsec seeing on 1
    arcsec tiles) resampled alike: the scatter of the star's matched filter
    over positions, each image's own star as the filter, over its response
    to the star (self-consistency: a flux-conserving average loses little
    signal to noise).  Measured 1.13 (1.01 on a tile of the night's
    pixels: the Keys kernel's own blur); with the night sampled every 1.92
    pixels (the pixels between the samples nearly out), 1.49.
    """
    from scipy.signal import fftconvolve

    def flux_error(image, star):
        return fftconvolve(image, star[::-1, ::-1], mode="valid").std() / np.sum(star * star)

    scale, sigma = 0.52, 1.45 / (2 * np.sqrt(2 * np.log(2)))
    shape = (round(460 / scale), round(460 / scale))
    wcs = night_wcs(shape, rotation=0.3, scale=scale, ra=RA0 + 1e-4, dec=49.7002)
    target = tile(400)
    noise = np.random.default_rng(1).normal(0.0, 1.0, shape)
    y, x = (shape[0] - 1) / 2 + 0.3, (shape[1] - 1) / 2 + 0.2
    star = gaussian_stars(shape, [x], [y], [1.0], sigma / scale)
    h, i, j = int(4 * sigma / scale) + 3, round(y), round(x)
    on_night = flux_error(noise, star[i - h : i + h + 1, j - h : j + h + 1])
    star = resample_to_tile(*_planes(star), wcs, target).image.astype(float)
    i, j = np.unravel_index(np.argmax(star), star.shape)
    h = int(4 * sigma) + 3
    tile_noise = resample_to_tile(*_planes(noise), wcs, target).image[20:-20, 20:-20]
    on_tile = flux_error(tile_noise.astype(float), star[i - h : i + h + 1, j - h : j + h + 1])
    # ~1.6e5 positions correlated over ~4 px: each scatter is known to ~1 %
    assert on_tile / on_night < 1.2


def test_flags_spread_to_the_pixels_they_feed_and_no_data_stays_empty():
    wcs = night_wcs(SHAPE, rotation=0.3, scale=1.01)
    image = np.full(SHAPE, 100.0)
    flags = np.zeros(SHAPE, MASK_DTYPE)
    flags[90, 110] = MaskBit.COSMIC_RAY
    image[40:43, :] = np.nan
    flags[40:43, :] |= np.uint16(MaskBit.GAP)
    target = tile(160)
    result = resample_to_tile(*_planes(image, flags=flags), wcs, target)
    ra, dec = wcs.pixel_to_world_values(110, 90)
    tx, ty = target.wcs.world_to_pixel_values(ra, dec)
    hit = (result.flags & MaskBit.COSMIC_RAY) != 0
    ys, xs = np.nonzero(hit)
    ys, xs = ys + result.y_start, xs + result.x_start
    # A 4-tap pass feeds outputs whose sampling position lies within 2 px of the
    # pixel, so two passes per axis reach less than 4 px; the OR must cover at
    # least the 3 x 3 pixels nearest the hit.
    assert hit.sum() >= 9
    assert np.abs(xs - tx).max() < 4 and np.abs(ys - ty).max() < 4
    gap = (result.flags & MaskBit.GAP) != 0
    assert gap.any()
    assert np.isnan(result.image[gap]).all() and np.isnan(result.variance[gap]).all()
    assert np.isfinite(result.image[~gap & ((result.flags & MaskBit.OUTSIDE) == 0)]).all()


def test_a_night_that_misses_the_tile_gives_none_and_steep_turns_are_refused():
    far = night_wcs(SHAPE, ra=120.0)
    assert resample_to_tile(*_planes(np.ones(SHAPE)), far, tile(64)) is None
    turned = night_wcs(SHAPE, rotation=30.0)
    with pytest.raises(ValueError, match="turned by"):
        resample_to_tile(*_planes(np.ones(SHAPE)), turned, tile(64))
    with pytest.raises(ValueError, match="one shape"):
        resample_to_tile(
            np.ones((3, 3)), np.ones((3, 4)), np.zeros((3, 3), MASK_DTYPE), far, tile(64)
        )


def test_interpolated_pixel_mapping_matches_astropy_wcs_everywhere():
    # The resampler evaluates the tile -> night mapping exactly (astropy WCS,
    # i.e. WCSLIB) on nodes every 32 px only and interpolates it; every tile
    # pixel's sampling positions must agree with the exact transform.
    from pipeline.mosaic._resample import _crossing_columns, _grid_values, _input_pixels, _Mapping

    target = tile(512)
    shape = (600, 640)
    wcs = night_wcs(shape, rotation=0.3, scale=1.01, dec=49.7)
    mapping = _Mapping.build(target, wcs, shape)
    ys, xs = np.arange(target.shape[0]), np.arange(target.shape[1])
    exact_x, exact_y = _input_pixels(target, wcs, *np.meshgrid(xs.astype(float), ys.astype(float)))
    if mapping.flip_x:
        exact_x = shape[1] - 1 - exact_x
    if mapping.flip_y:
        exact_y = shape[0] - 1 - exact_y
    # 1e-4 px: 1/500 of the mosaic's 0.05 px position budget.  Bicubic splines
    # over the 32 px nodes do ~1e-9 px on this field, bilinear ones ~7e-4 px.
    assert np.abs(_grid_values(mapping.y, ys, xs) - exact_y).max() < 1e-4
    assert np.abs(_grid_values(mapping.x, ys, xs) - exact_x).max() < 1e-4
    # pass 1's positions: tile column X crosses night row y at night column
    # x*; the night pixel (x*, y) must map back onto tile column X
    rows = np.arange(40, 560, 7)
    crossing = _crossing_columns(mapping, rows, xs, (-100.0, 612.0))
    night_x = np.broadcast_to(crossing, crossing.shape)
    night_y = np.broadcast_to(rows[:, None].astype(float), crossing.shape)
    if mapping.flip_x:
        night_x = shape[1] - 1 - night_x
    if mapping.flip_y:
        night_y = shape[0] - 1 - night_y
    world = wcs.pixel_to_world_values(night_x, night_y)
    tile_x, _ = target.wcs.world_to_pixel_values(*world)
    assert np.abs(tile_x - xs[None, :]).max() < 1e-4
