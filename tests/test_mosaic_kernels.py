"""Smeared stars on a tile: the nights' smear kernels carried through the resampling.

Invented nights (self-consistency): each star is a Moffat seeing profile
averaged over a bowed TDI smear kernel, rendered in the night's pixels by
detect's own model (:func:`pipeline.stages.detect.model_image`), on nights
turned by up to a degree against the tile, east to the right, with pixels
0.52 of the tile's (the demo's camera and tile scales).
"""

import dataclasses

import numpy as np
import pytest
from astropy.table import Table
from scipy.integrate import quad

from pipeline.exceptions import DetectWarning
from pipeline.mosaic import CoaddOptions, NightImage, mosaic_tile, tile_catalog
from pipeline.mosaic._kernels import KEYS_M4, SeeingMix, carried_kernels
from pipeline.stages.detect import DetectOptions, SeeingProfile, model_image
from pipeline.stages.detect._model import Response, _keys
from tests._mosaic_scene import night_wcs, tile

#: Night pixels per tile pixel (0.516 arcsec camera pixels on 1 arcsec tiles).
SCALE = 0.52
NIGHT_SHAPE = (340, 340)
#: (night, rotation deg, seeing FWHM in night px, sky e-)
NIGHTS = [("n1", 0.3, 2.9, 120.0), ("n2", -0.6, 3.4, 150.0), ("n3", 0.9, 3.9, 100.0)]
#: Kernel samples: 12 night px along the scan, a bow of 2.5 px across it that
#: grows by half from the bottom of the night to its top.
N_SAMPLES = 32
LENGTH, BOW = 12.0, 2.5
TILE_SIZE = 160
FLUX = 2.0e5  # e-: S/N ~ 600 in one night


def _kernel(y: float, length: float = LENGTH, bow: float = BOW) -> tuple[np.ndarray, np.ndarray]:
    u = (np.arange(N_SAMPLES) + 0.5) / N_SAMPLES - 0.5
    dx = length * u
    dy = bow * (1.0 + 0.5 * (y / NIGHT_SHAPE[0] - 0.5)) * 4.0 * u**2
    return dx - dx.mean(), dy - dy.mean()


def _kernel_table(
    columns=(0.0, 170.0, 339.0),
    rows=(0.0, 85.0, 170.0, 255.0, 339.0),
    kernel=_kernel,
    response: Response | None = None,
) -> Table:
    x, y, dx, dy = [], [], [], []
    for column in columns:
        for row in rows:
            kx, ky = kernel(row)
            x.append(column), y.append(row), dx.append(kx), dy.append(ky)
    table = Table({"x": x, "y": y, "dx": np.array(dx), "dy": np.array(dy)})
    if response is not None:  # rectify's columns: the same response everywhere
        table["lattice_x"] = response.lattice_x
        table["lattice_y"] = response.lattice_y
        table["row_step"] = response.row_step
    return table


def _stars(rng, n=16):
    """Tile pixel positions of the stars: a jittered grid inside the tile."""
    g = np.linspace(35, TILE_SIZE - 36, 4)
    x, y = (a.ravel() for a in np.meshgrid(g, g))
    return x + rng.uniform(-0.5, 0.5, x.size), y + rng.uniform(-0.5, 0.5, y.size)


def _point(y: float) -> tuple[np.ndarray, np.ndarray]:
    """No smear: every kernel sample at the star."""
    return np.zeros(N_SAMPLES), np.zeros(N_SAMPLES)


def _night(
    target,
    name,
    rotation,
    fwhm,
    sky,
    tx,
    ty,
    rng,
    kernel=_kernel,
    response=None,
    noise=True,
    shape="moffat",
) -> NightImage:
    """A night whose stars detect's model draws: seeing over ``kernel``, and ``response``.

    ``noise`` False: the image is its expectation (the variance plane is the same);
    ``shape``: the seeing's family (Moffat beta 3.5, or Gaussian).
    """
    wcs = night_wcs(NIGHT_SHAPE, rotation=rotation, scale=SCALE)
    x, y = wcs.world_to_pixel_values(*target.wcs.pixel_to_world_values(tx, ty))
    profile = SeeingProfile(fwhm, shape, 3.5)
    image = np.zeros(NIGHT_SHAPE)
    half = 30
    for xi, yi in zip(x, y, strict=True):
        x0, y0 = round(xi) - half, round(yi) - half
        stamp_shape = (2 * half + 1, 2 * half + 1)
        stamp = model_image(stamp_shape, xi - x0, yi - y0, *kernel(yi), profile, response=response)
        image[y0 : y0 + 2 * half + 1, x0 : x0 + 2 * half + 1] += FLUX * stamp
    variance = sky + image
    image = image + sky + (rng.normal(0.0, np.sqrt(variance)) if noise else 0.0)
    return NightImage(
        image.astype(np.float32),
        variance.astype(np.float32),
        np.zeros(NIGHT_SHAPE, np.uint16),
        wcs,
        25.0,
        name,
        seeing=fwhm * SCALE,
        smear_kernels=_kernel_table(kernel=kernel, response=response),
    )


@pytest.fixture(scope="module")
def smeared():
    rng = np.random.default_rng(14)
    target = tile(TILE_SIZE)
    tx, ty = _stars(rng)
    nights = [_night(target, *n, tx, ty, rng) for n in NIGHTS]
    return target, nights, tx, ty


def test_the_carried_kernel_is_the_nights_track_seen_in_tile_pixels(smeared):
    target, nights, _, _ = smeared
    night = nights[1]  # turned by -0.6 deg
    table = carried_kernels([night], target)
    # Each sample of the night's kernel is a point of the sky (FITS WCS standard,
    # Calabretta & Greisen 2002, through astropy.wcs): map the points themselves
    # onto the tile, relative to the mapped kernel centre.
    for row in table[:: max(len(table) // 7, 1)]:
        x, y = night.wcs.world_to_pixel_values(
            *target.wcs.pixel_to_world_values(row["x"], row["y"])
        )
        kx, ky = _kernel(float(y))
        px, py = target.wcs.world_to_pixel_values(*night.wcs.pixel_to_world_values(x + kx, y + ky))
        cx, cy = target.wcs.world_to_pixel_values(*night.wcs.pixel_to_world_values(x, y))
        # the carried kernel is the map's linear part: its curvature over the
        # 6 px of a track moves a sample by ~1e-6 px; the nearest node (16 px
        # spacing) and linear interpolation of the table (its bow changes by
        # 6e-4 px per night px) leave < 1e-2 px.
        np.testing.assert_allclose(row["dx"], px - cx, atol=1e-2)
        np.testing.assert_allclose(row["dy"], py - cy, atol=1e-2)
    # east is to the right in the night and to the left on the tile
    span = LENGTH * SCALE * (N_SAMPLES - 1) / N_SAMPLES  # first to last sample, tile px
    assert np.ptp(table["dx"][0]) == pytest.approx(span, rel=0.02)
    assert table["dx"][0][-1] < table["dx"][0][0]


def _measured(target, nights, tx, ty, **changes):
    built = mosaic_tile(nights, target, CoaddOptions())
    if changes:
        built = type(built)(**{**built.__dict__, **changes})
    # PSF fluxes as fitted, as a tile's catalogue has them (TileDetectOptions)
    options = DetectOptions(background_box=32, fwhm_guess=1.8, psf_scale_aperture=None)
    options = options.model_dump()
    catalog = tile_catalog(built, **options)
    x, y = np.asarray(catalog["x"].value), np.asarray(catalog["y"].value)
    near = np.hypot(x[:, None] - tx[None, :], y[:, None] - ty[None, :])
    j = np.argmin(near, axis=0)
    assert (near[j, np.arange(tx.size)] < 1.0).all()
    flux = np.asarray(catalog["flux_psf"].value)[j] / FLUX - 1.0
    snr = np.asarray(catalog["snr"].value)[j]
    return flux, x[j] - tx, y[j] - ty, snr


def test_tile_catalogue_fluxes_and_positions_of_smeared_stars(smeared):
    flux, d_x, d_y, snr = _measured(*smeared)
    assert (snr > 100).all()
    # Positions: the 0.05 px rms (measured 0.007 px: S/N ~ 1000 in the
    # co-add).  The bow turned the wrong way moves every star by ~0.4 px.
    assert np.sqrt(np.mean(d_x**2 + d_y**2)) <= 0.05
    # Fluxes: the issue asks for 0.5 %; the mean of 16 stars of ~0.2 % noise
    # each is known to 0.05 %, and measured -0.03 %: 0.2 % is 4 sigma.  A
    # single Moffat fitted to the three nights' seeing puts it at -0.5 %,
    # Gaussians integrated over the tile's pixels (not narrowed to the nights'
    # 0.52 px) at -0.4 %, round stars at -1 %.
    assert abs(np.mean(flux)) <= 0.002
    # each star within 4 sigma of its photon noise (measured sd 0.19 %)
    assert np.std(flux) <= 0.004


def _cumulants(sigmas, weights):
    """Flux, variance and fourth cumulant along an axis of a mixture of round Gaussians.

    A Gaussian of variance v has fourth moment 3 v**2 along an axis (common practice).
    """
    v = sigmas**2
    flux = weights.sum()
    variance = np.sum(weights * v) / flux
    return flux, variance, 3.0 * np.sum(weights * v * v) / flux - 3.0 * variance**2


def test_the_keys_kernels_fourth_moment():
    # integral of t**4 K(t) over the Keys (a = -1/2) kernel the resampler uses
    # (Keys 1981, IEEE Trans. ASSP 29, 1153), by quadrature on each cubic
    pieces = [quad(lambda t: t**4 * _keys(np.array(t)), a, a + 1)[0] for a in (-2, -1, 0, 1)]
    assert sum(pieces) == pytest.approx(KEYS_M4, abs=1e-9)  # quadrature of cubics: exact
    # and its second moment is 0 (it reproduces quadratics): the variance is the seeing's
    second = [quad(lambda t: t**2 * _keys(np.array(t)), a, a + 1)[0] for a in (-2, -1, 0, 1)]
    assert sum(second) == pytest.approx(0.0, abs=1e-12)


@pytest.mark.parametrize("pixel", [1.0, 1.25])
def test_a_mix_of_one_night_is_the_family_with_the_samples_cumulants(pixel):
    mix = SeeingMix.of_nights([2.5], [3.0], [pixel], "moffat", 3.5)
    sigmas, weights = mix.mixture()
    own_sigmas, own_weights = SeeingProfile(2.5, "moffat", 3.5).mixture()
    n = own_sigmas.size
    # each of the family's Gaussians is a pair: the same flux, the variance and
    # fourth cumulant of the night's pixel (a top-hat of width w: variance w**2
    # / 12, fourth cumulant -w**4 / 120, common practice) beyond the tile's, and
    # the resampler's: on pixels of the tile's size the cubic B-spline that
    # averages a night over a tile pixel (four top-hats of 1), on a finer tile
    # (a night's pixel of 1.25 tile pixels) the Keys kernel's fourth cumulant
    if pixel == 1.0:
        extra, extra_k4 = 4.0 / 12.0, -4.0 / 120.0
    else:
        extra = (pixel**2 - 1.0) / 12.0
        extra_k4 = (1.0 - pixel**4) / 120.0 + KEYS_M4 * pixel**4
    for i in range(n):
        flux, variance, k4 = _cumulants(sigmas[[i, n + i]], weights[[i, n + i]])
        assert flux == pytest.approx(own_weights[i], rel=1e-12)
        assert variance == pytest.approx(own_sigmas[i] ** 2 + extra, rel=1e-12)
        assert k4 == pytest.approx(extra_k4, rel=1e-9)
    two = SeeingMix.of_nights([2.0, 3.0], [1.0, 3.0], [0.5, 0.5], "gaussian", 3.5)
    assert two.fwhm == pytest.approx(2.75)  # the weighted mean FWHM
    sigmas, weights = two.with_fwhm(5.5).mixture()
    # Gaussian FWHM = 2 sqrt(2 ln 2) sigma (common practice), scaled together by 2,
    # the tile pixel's top-hat taken off, the night's put on (a top-hat of
    # width w: variance w**2 / 12, fourth cumulant -w**4 / 120, common
    # practice) and the resampler's average over a tile pixel of two night
    # pixels, the cubic B-spline: four top-hats of 1
    variances = (np.array([4.0, 6.0]) / (2 * np.sqrt(2 * np.log(2)))) ** 2 + (0.5**2 + 3) / 12
    k4 = -(0.5**4 + 3) / 120
    for night, (fraction, variance) in enumerate(zip([0.25, 0.75], variances, strict=True)):
        pair = slice(2 * night, 2 * night + 2)
        assert _cumulants(sigmas[pair], weights[pair]) == pytest.approx(
            (fraction, variance, k4), rel=1e-9
        )
    assert weights.sum() == pytest.approx(1.0)


def _held_width_fluxes(target, nights, tx, ty, **options) -> np.ndarray:
    """Tile catalogue fluxes over ``FLUX`` less 1 of the stars at ``tx``, ``ty``.

    The seeing width is held at the mix of the nights' (no stars to fit it).
    """
    built = mosaic_tile(nights, target, CoaddOptions())
    options = DetectOptions(background_box=32, fwhm_guess=1.8, seeing_stars=0, **options)
    with pytest.warns(DetectWarning, match="to fit the seeing"):  # the width is the mix's
        catalog = tile_catalog(built, **options.model_dump())
    x, y = np.asarray(catalog["x"].value), np.asarray(catalog["y"].value)
    j = np.argmin(np.hypot(x[:, None] - tx[None, :], y[:, None] - ty[None, :]), axis=0)
    return np.asarray(catalog["flux_psf"].value)[j] / FLUX - 1.0


@pytest.mark.parametrize("held", [True, False], ids=["held-width", "fitted-width"])
def test_resampled_gaussian_stars_keep_their_flux_on_the_tile(held):
    """Noise-free Gaussian stars of known flux on a night, resampled and fitted on the tile.

    Each star is the Gaussian integrated over the night's pixels (the error
    function at the pixel edges, common practice), 1.46 tile px FWHM on
    0.52 px nights (the demo's 1.45 arcsec seeing on 1 arcsec tiles, 2x
    undersampled); no smear; the fit's width held at the night's, or fitted
    to the stars as a tile's catalogue does.
    """
    rng = np.random.default_rng(16)
    target = tile(TILE_SIZE)
    g = np.linspace(30, TILE_SIZE - 31, 6)
    tx, ty = (a.ravel() + rng.uniform(-0.5, 0.5, a.size) for a in np.meshgrid(g, g))
    night = _night(target, "n1", 0.3, 2.8, 1e5, tx, ty, rng, _point, noise=False, shape="gaussian")
    if held:
        flux = _held_width_fluxes(target, [night], tx, ty, seeing_shape="gaussian")
    else:
        built = mosaic_tile([night], target, CoaddOptions())
        options = DetectOptions(background_box=32, fwhm_guess=1.8, seeing_shape="gaussian")
        catalog = tile_catalog(built, **options.model_dump())
        x, y = np.asarray(catalog["x"].value), np.asarray(catalog["y"].value)
        j = np.argmin(np.hypot(x[:, None] - tx[None, :], y[:, None] - ty[None, :]), axis=0)
        flux = np.asarray(catalog["flux_psf"].value)[j] / FLUX - 1.0
    # The resampler averages the night over each tile pixel with the cubic
    # B-spline, which the pairs of Gaussians hold closely.  Measured (36
    # stars, spread 0.02 %): +0.04 % with the width held, -0.06 % fitted.
    # The Keys kernel stretched to the tile's pixel instead (whose negative
    # lobes the pairs do not hold) gave +0.76 % and +0.13 %; the B-spline
    # left out of the model (the Keys kernel of the night's pixels) -30 %
    # and +0.23 %.
    assert abs(np.mean(flux)) <= 0.003
    assert np.std(flux) <= 0.004  # the phases' spread (measured 0.02 %, 0.54 % point-sampled)


#: Rectify's response on the night below: lattice offsets of 0.2 and 0.05 px
#: (the demo's reach 0.26 and 0.09) and TDI clocking over one strip row.
RESPONSE = Response(0.2, 0.05, 1.0)


def _short(y: float) -> tuple[np.ndarray, np.ndarray]:
    """A track of 1 night px and a bow of 0.3 px: the demo's near the chip's centre."""
    return _kernel(y, length=1.0, bow=0.3)


@pytest.fixture(scope="module")
def clocked():
    """One night in 1.45 arcsec seeing (2.8 night px), short tracks, with rectify's response.

    Its sky (1e5 e-) dominates the stars' variance, as on the demo's nights,
    and the image is noise-free: the flux test below is deterministic.
    """
    rng = np.random.default_rng(15)
    target = tile(TILE_SIZE)
    tx, ty = _stars(rng)
    night = _night(target, "n1", 0.3, 2.8, 1e5, tx, ty, rng, _short, RESPONSE, noise=False)
    return target, [night], tx, ty


def test_the_clocking_top_hat_is_carried_onto_the_tile(clocked):
    target, nights, _, _ = clocked
    table = carried_kernels(nights, target)
    # One strip row along the night's x is 0.52 tile px along the tile's x
    # (the map's scale; its 0.3 deg turn shortens it by 1e-5): the Jacobian
    # that carries the kernel, to 1e-3 of a row (the map's finite
    # differences are exact to ~1e-6).
    np.testing.assert_allclose(table["row_step"], SCALE * RESPONSE.row_step, rtol=1e-3)
    # rectify's interpolation: the night's lattice offsets, its taps a night
    # pixel apart along each axis, the tile's x running against the night's
    np.testing.assert_allclose(table["lattice_x"], RESPONSE.lattice_x, atol=1e-12)
    np.testing.assert_allclose(table["lattice_y"], RESPONSE.lattice_y, atol=1e-12)
    np.testing.assert_allclose(table["lattice_step_x"], -SCALE, rtol=1e-3)
    np.testing.assert_allclose(table["lattice_step_y"], SCALE, rtol=1e-3)
    # two nights whose rows differ: the root mean square, weighted as the co-add
    other = dataclasses.replace(
        nights[0],
        night="n2",
        smear_kernels=_kernel_table(kernel=_short, response=Response(0.2, 0.05, 2.0)),
    )
    mixed = carried_kernels([nights[0], other], target, [1.0, 3.0])
    expected = SCALE * np.sqrt((1.0 * 1.0**2 + 3.0 * 2.0**2) / 4.0)
    np.testing.assert_allclose(mixed["row_step"], expected, rtol=1e-3)


def test_tile_positions_of_stars_under_rectifys_interpolation(clocked):
    """The tile's model holds rectify's cubic taps: its fits find the first moment.

    Self-consistency: detect's model draws the night (noise-free) with
    rectify's lattice offsets 0.2 and 0.05 px, and the tile's WCS maps the
    stars' first moments to the pixels ``tx``, ``ty``.
    """
    _, d_x, d_y, _ = _measured(*clocked)
    # Measured 0.00002 and 0.00001 tile px (sd 0.0002 px over the stars'
    # phases).  Without the taps on the tile the fits moved the stars by
    # +0.0038 px along x (3.8 mas on 1 arcsec tiles; the demo's tiles were
    # off by -3.2 to +3.7 mas, the nights' offsets drifting along the
    # scan) and -0.0017 px along y: 0.001 px lies between.
    assert abs(np.mean(d_x)) <= 0.001
    assert abs(np.mean(d_y)) <= 0.001


def test_tile_fluxes_of_clocked_stars_with_short_tracks(clocked):
    """The tile's model holds the nights' clocking top-hat (width held at the nights' seeing)."""
    flux = _held_width_fluxes(*clocked)
    # Measured -0.15 % (noise-free; spread 0.64 % over the stars' phases on
    # the tile's pixels, 0.16 % on the mean of 16; -0.53 % before SeeingMix
    # took the resampler's fourth cumulant).  Without the top-hat on the tile
    # the stars come out 1.69 % too bright (the demo's tiles: 0.5 to 1 %, the
    # fitted width taking part of it in).  1 % lies between the two, 5
    # standard errors of the mean from either.
    assert abs(np.mean(flux)) <= 0.01
