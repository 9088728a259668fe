"""A tile's co-added seeing takes each night's Moffat index from its science product.

Self-consistency (invented nights): the science stage writes the index its
night's detect used as ``SEEBETA``; the mosaic reads it into each night's
share of the tile's seeing mix (:class:`pipeline.mosaic._kernels.SeeingMix`),
and falls back to the configured ``moffat_beta`` where a product has no
card (products of older versions).  With the configured index (3.5) on
nights whose seeing has index 3.0, saturated stars fitted on their wings
came out 0.2-0.5 mag too bright on the nights; the tile's model must have
the nights' wings too.  The images hold sky noise only: the mix depends on
the nights' seeing, weights and pixels, not on their stars.
"""

import numpy as np
import pytest
from astropy.io import fits

from pipeline.masks import MASK_DTYPE
from pipeline.mosaic import mosaic_tile, night_image_from_hdulist
from pipeline.mosaic._coadd import pixel_arcsec
from pipeline.mosaic._kernels import SeeingMix
from pipeline.mosaic._products import _seeing_mix
from pipeline.products import SEEING_INDEX_KEY, image_hdulist
from pipeline.stages.detect import detect
from tests._mosaic_scene import night_wcs, tile
from tests.test_detect_seeing_index import _saturated_fluxes, _scene

TILE = tile(64)
NIGHT_SHAPE = (80, 80)
#: The tile catalogue's detect options: the configured index, not the nights'.
CONFIGURED = {"seeing_shape": "moffat", "moffat_beta": 3.5}


def _product(night: int, seeing: float, beta: float | None, variance: float = 100.0, scale=1.2):
    """A science product of one night (its header cards) read as the mosaic reads it.

    Its pixels are 1.2 of the tile's: a tile finer than the night is
    interpolated, which blurs the stars least (the scenes of saturated stars
    here are drawn without any resampling).
    """
    wcs = night_wcs(NIGHT_SHAPE, rotation=0.2 * night, scale=scale)
    header = wcs.to_header()
    header["PHOTZP"] = 25.0
    header["SEEING"] = seeing
    if beta is not None:
        header[SEEING_INDEX_KEY] = beta
    header["DATE-OBS"] = f"2026-10-{15 + night}T21:00:00"
    rng = np.random.default_rng(night)
    hdul = image_hdulist(
        rng.normal(0.0, np.sqrt(variance), NIGHT_SHAPE),
        np.full(NIGHT_SHAPE, variance),
        np.zeros(NIGHT_SHAPE, MASK_DTYPE),
        unit="electron",
        header=header,
        metadata=fits.Header(),
    )
    return night_image_from_hdulist(hdul)


def _outside(mix: SeeingMix, radius: float) -> float:
    """Share of the mix's light beyond ``radius`` pixels (round Gaussians: exp(-r^2 / 2 s^2))."""
    sigmas, weights = mix.mixture()
    return float(np.sum(weights * np.exp(-0.5 * (radius / sigmas) ** 2)))


def _moffat_outside(fwhm: float, beta: float, radius: float) -> float:
    """Share of a Moffat profile's light beyond ``radius`` (same unit as ``fwhm``).

    ``I(r) ~ (1 + (r / alpha)**2)**-beta`` with ``FWHM = 2 alpha sqrt(2**(1/beta) - 1)``
    encloses ``1 - (1 + (r / alpha)**2)**(1 - beta)`` within ``r`` (Moffat 1969,
    A&A 3, 455; from memory).
    """
    alpha = fwhm / (2.0 * np.sqrt(2.0 ** (1.0 / beta) - 1.0))
    return float((1.0 + (radius / alpha) ** 2) ** (1.0 - beta))


def test_the_mosaic_reads_each_nights_index_from_its_card():
    assert _product(0, 4.0, 3.0).seeing_beta == 3.0
    assert _product(0, 4.0, None).seeing_beta is None


def _moffats_outside(mix: SeeingMix, betas, radius: float) -> float:
    """Share beyond ``radius`` of the mix's nights as Moffat profiles of indices ``betas``."""
    widths = mix.fwhm * np.asarray(mix.widths)
    return sum(
        f * _moffat_outside(w, b, radius)
        for f, w, b in zip(mix.fractions, widths, betas, strict=True)
    )


def test_a_tile_of_nights_whose_cards_say_3_mixes_index_3():
    products = [_product(0, 4.0, 3.0), _product(1, 5.0, 3.0, variance=150.0)]
    built = mosaic_tile(products, TILE)
    mix = _seeing_mix(built, CONFIGURED)  # moffat_beta 3.5 configured
    # The wings: light beyond 1.5 FWHM of the mix's mean width, against the
    # nights' Moffat profiles of index 3.0 mixed with the co-add's shares
    # (9.2 % of the light lies there; 6.8 % with index 3.5.  Detect's eight
    # Gaussians hold a Moffat's light beyond 1.5 FWHM to 0.2 %, beyond 2 FWHM
    # only to 5 %; the nights' pixels and the resampling move it by 0.5 %).
    radius = 1.5 * mix.fwhm
    assert _outside(mix, radius) == pytest.approx(
        _moffats_outside(mix, (3.0, 3.0), radius), rel=0.01
    )
    assert _outside(mix, radius) / _moffats_outside(mix, (3.5, 3.5), radius) > 1.3
    assert [night[3] for night in built.seeing] == [3.0, 3.0]
    assert mix.betas == (3.0, 3.0) and mix.beta == 3.0
    # the same nights with index 3.0 configured: the same model, to the bit
    fwhms, weights, pixels = (np.array(c, float) for c in list(zip(*built.seeing, strict=True))[:3])
    scale = pixel_arcsec(TILE.wcs, TILE.shape)
    same = SeeingMix.of_nights(fwhms / scale, weights, pixels / scale, "moffat", 3.0)
    for a, b in zip(mix.mixture(), same.mixture(), strict=True):
        np.testing.assert_array_equal(a, b)


def test_saturated_stars_of_index_3_come_out_right_with_the_nights_cards():
    """The cards' index through the tile's mix to saturated stars' magnitudes.

    Detect's scene of saturated stars (``tests/test_detect_seeing_index.py``:
    seeing of index 3.0, FWHM 3.2 px, stars 10-100 times the flux that fills
    the well) fitted with the mix of a tile of 1 arcsec pixels from a night of
    1.12 arcsec pixels whose science product says SEEING 3.2 arcsec, SEEBETA
    3.0 (self-consistency: the simulator's renderer).  Measured: the mix of
    the card's index puts the stars within 0.046 mag of the truth (the mix
    holds the interpolation's blur, which the scene, drawn without any
    resampling, lacks: 0.014 while tiles of the nights' pixels were
    interpolated, whose taps' kurtosis the model holds was smaller); the
    configured 3.5 (the mix before the card) 0.11-0.22 mag too bright for
    the stars of 30-100 times.
    """
    scene = _scene(3.0, seed=1)

    def magnitude_errors(beta_card):
        built = mosaic_tile([_product(0, 3.2, beta_card, scale=1.12)], TILE)
        mix = _seeing_mix(built, CONFIGURED)
        result = detect(scene.image, scene.variance, scene.mask, scene.kernels, seeing_profile=mix)
        ratios, _ = _saturated_fluxes(result.catalog)
        return -2.5 * np.log10(ratios), result.catalog.meta["seeing_beta"]

    errors, beta = magnitude_errors(3.0)
    assert np.max(np.abs(errors)) < 0.05
    assert beta == 3.0  # the catalogue's index: the night's
    errors, beta = magnitude_errors(None)
    assert np.min(errors) < -0.15  # before: the brightest ones 0.2 mag bright
    assert beta == 3.5  # the configured index, without a card


def test_a_night_without_the_card_takes_the_configured_index():
    """A product of a science stage before ``SEEBETA``: ``moffat_beta`` stands in."""
    products = [_product(0, 4.0, 3.0), _product(1, 4.0, None)]
    built = mosaic_tile(products, TILE)
    mix = _seeing_mix(built, CONFIGURED)
    # each night's share of the model has its own wings: 3.0 from its card, 3.5 configured
    radius = 1.5 * mix.fwhm
    assert _outside(mix, radius) == pytest.approx(
        _moffats_outside(mix, (3.0, 3.5), radius), rel=0.01
    )
    assert built.seeing[0][3] == 3.0 and np.isnan(built.seeing[1][3])
    assert mix.betas == (3.0, 3.5)
    # each night's Gaussians are its own profile's, with its share of the light
    sigmas, weights = mix.mixture()
    for night, beta in enumerate((3.0, 3.5)):
        own = SeeingMix(mix.fwhm * mix.widths[night], "moffat", beta, pixels=(mix.pixels[night],))
        own_sigmas, own_weights = own.mixture()
        part = (
            slice(0, own_sigmas.size) if night == 0 else slice(sigmas.size - own_sigmas.size, None)
        )
        np.testing.assert_allclose(sigmas[part], own_sigmas, rtol=1e-12)
        np.testing.assert_allclose(weights[part], own_weights * mix.fractions[night], rtol=1e-12)
    # the mix's own index, a summary for the catalogue: the nights' mean with their shares
    assert mix.beta == pytest.approx(3.0 * mix.fractions[0] + 3.5 * mix.fractions[1])
    # no card at all: exactly the mix of the configured index
    old = _seeing_mix(mosaic_tile([_product(0, 4.0, None)], TILE), CONFIGURED)
    assert old.betas == (3.5,) and old.beta == 3.5


def test_a_gaussian_seeing_has_no_index():
    built = mosaic_tile([_product(0, 4.0, 3.0)], TILE)
    mix = _seeing_mix(built, {"seeing_shape": "gaussian", "moffat_beta": 3.5})
    assert mix.betas == ()
    sigmas, _ = mix.mixture()
    assert sigmas.size == 2  # one Gaussian, as a pair for the resampling's fourth cumulant
