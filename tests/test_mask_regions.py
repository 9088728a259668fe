"""The OR of mask bits around positions, and the core radius of a seeing profile.

The tile catalogue's ``mask_core`` and ``mask_near`` columns
(:mod:`pipeline.mosaic._products`) are built from these.
"""

import numpy as np
import pytest

from pipeline.masks import MASK_DTYPE, MaskBit, bits_around
from pipeline.mosaic._products import core_radius
from pipeline.stages.detect import SeeingProfile


def _mask():
    mask = np.zeros((30, 40), MASK_DTYPE)
    mask[10, 13] = MaskBit.SATURATED  # 3 px left of (16, 10)
    mask[14, 16] = MaskBit.NIGHT_LEFT_OUT  # 4 px above it
    mask[13, 19] = MaskBit.HOT_COLUMN  # (3, 3) off: 4.24 px, in the square, not the disc
    return mask


def test_a_disc_takes_the_pixels_whose_centres_lie_within_its_radius():
    mask = _mask()
    bits = bits_around(mask, [16.0, 16.0, 16.0], [10.0, 10.0, 10.0], [2.9, 3.0, 4.0])
    saturated, left_out = int(MaskBit.SATURATED), int(MaskBit.NIGHT_LEFT_OUT)
    assert bits.tolist() == [0, saturated, saturated | left_out]
    assert bits.dtype == MASK_DTYPE


def test_a_rectangle_takes_every_pixel_it_touches():
    """Its bounds rounded outward, as detect's stamps are: 16.5 +- 2.4 reaches column 19."""
    mask = _mask()
    square = bits_around(mask, [16.0], [10.0], 3.0, round_=False)[0]
    assert square == int(MaskBit.SATURATED | MaskBit.HOT_COLUMN)
    # columns 14-19 (rounded inward, 15-18), rows 6-13 (7-12)
    bits = bits_around(mask, [16.5], [9.8], 2.4, 3.1, round_=False)[0]
    assert bits == int(MaskBit.HOT_COLUMN)
    # an ellipse: 3 px across, 4 up
    assert bits_around(mask, [16.0], [10.0], 3.0, 4.0)[0] == int(
        MaskBit.SATURATED | MaskBit.NIGHT_LEFT_OUT
    )


def test_positions_off_the_mask_or_unknown_get_no_bits():
    mask = np.full((10, 10), MaskBit.OUTSIDE, MASK_DTYPE)
    bits = bits_around(mask, [np.nan, -20.0, 5.0, 11.0], [5.0, 5.0, np.nan, 5.0], 2.5)
    assert bits.tolist() == [0, 0, 0, int(MaskBit.OUTSIDE)]


@pytest.mark.parametrize("level", [0.05, 0.5])
def test_a_gaussian_core_radius(level):
    # exp(-r^2 / 2 sigma^2) = level (common practice)
    assert core_radius([1.7], [1.0], level) == pytest.approx(1.7 * np.sqrt(2 * np.log(1 / level)))


@pytest.mark.parametrize("beta", [2.5, 3.0, 4.5])
def test_a_moffat_core_radius(beta):
    """The Gaussian mixture detect fits with: the Moffat profile's own 5 % radius.

    Moffat (1969, A&A 3, 455): I(r) = (1 + (r/alpha)^2)^-beta, FWHM = 2 alpha
    sqrt(2^(1/beta) - 1); it falls to 5 % at alpha sqrt(0.05^(-1/beta) - 1).
    """
    fwhm = 2.8
    alpha = fwhm / (2 * np.sqrt(2 ** (1 / beta) - 1))
    expected = alpha * np.sqrt(0.05 ** (-1 / beta) - 1)
    radius = core_radius(*SeeingProfile(fwhm, "moffat", beta).mixture())
    # the mixture describes the profile to < 1e-3 of its peak (detect's _model)
    assert radius == pytest.approx(expected, rel=0.01)
    # half the peak at half the FWHM
    assert core_radius(*SeeingProfile(fwhm, "moffat", beta).mixture(), 0.5) == pytest.approx(
        fwhm / 2, rel=0.01
    )
