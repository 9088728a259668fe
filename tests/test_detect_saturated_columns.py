"""A column saturated through the stretch: no source of its own, the stars beside it kept.

A very bright star (or a bleed in twilight) can fill a raw column with charge
for the whole night.  After rectify it is rows of the stretch clipped from
one end to the other: the column itself without data (SATURATED | BLEED |
BAD_COLUMN, NaN), its neighbours flagged BLEED while holding data.  As a
saturated star's footprint it swallowed every source that started within a
FWHM of it and left one source fitted on nothing (S/N ~ 0); on the demo
nights ~11 such sources, and the real stars beside the columns were lost.
Self-consistency tests against the scenes' own truth (the stars they
rendered).
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from scipy.spatial import cKDTree

from pipeline.masks import MaskBit, has_bits
from pipeline.stages.detect import SourceFlag, detect
from pipeline.stages.detect._saturated import CLIPPED, saturated_columns
from tests._detect_scene import render_scene

#: The mask bits rectify gives a column saturated all night (no data), and
#: those of its neighbours (spilled charge, values kept).
COLUMN_BITS = MaskBit.SATURATED | MaskBit.BLEED | MaskBit.BAD_COLUMN | MaskBit.NONFINITE
MARGIN_BITS = MaskBit.BLEED


def _column_scene(spill: float):
    """Stars 4 px beside a column saturated along the whole 1000-column stretch.

    Rows 60-67: the column (no data); rows 59 and 68: its neighbours, BLEED,
    holding the sky plus ``spill`` sigma of spilled charge.  Twelve stars of
    S/N 60 sit alternately 4 px above and below it (centres 4 px beyond the
    neighbour rows), eight of S/N 200 far from it for the seeing.
    """
    n = 12
    x = np.linspace(60.0, 940.0, n)
    offset = np.random.default_rng(1).uniform(-0.5, 0.5, n)
    y = np.where(np.arange(n) % 2, 72.0, 55.0) + offset
    snr = np.full(n, 60.0)
    x = np.concatenate([x, np.linspace(60.0, 940.0, 8)])
    y = np.concatenate([y, np.tile([20.0, 108.0], 4)])
    snr = np.concatenate([snr, np.full(8, 200.0)])
    scene = render_scene(x, y, None, snr=snr, shape=(128, 1000), x_start=0, seed=5)
    image, mask = scene.image.copy(), scene.mask.copy()
    image[60:68] = np.nan
    mask[60:68] |= np.uint16(COLUMN_BITS)
    for row in (59, 68):
        mask[row] |= np.uint16(MARGIN_BITS)
        image[row] += spill * np.sqrt(scene.variance[row])
    return scene, image, mask, x, y, n


@pytest.mark.parametrize("spill", [0.0, 3.0])
def test_stars_beside_a_column_saturated_through_the_stretch_are_each_found(spill):
    """Each star beside the column found once, nothing else found.

    Before the column was told from a star (its rows were one saturated
    footprint 1000 px long), 10 of the 12 stars beside it were merged into
    one source at S/N 0 between them (plain sky on the neighbour rows) or
    all 12 into one FIT_FAILED source (3 sigma of spilled charge there).
    """
    scene, image, mask, x, y, n = _column_scene(spill)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        cat = detect(image, scene.variance, mask, scene.kernels, fwhm_guess=3.2).catalog
    found = np.column_stack([cat["x"].value, cat["y"].value])
    d, k = cKDTree(np.column_stack([x, y])).query(found)
    # every detection is a true star (within 0.5 px: S/N 60), no star twice
    extra = (d > 0.5) | (np.bincount(k, minlength=x.size)[k] > 1)
    assert not extra.any(), (found[extra], cat["flags"].value[extra], cat["snr"][extra])
    assert np.array_equal(np.sort(k), np.arange(x.size))  # ... and every star found
    flags = np.asarray(cat["flags"].value, int)
    beside = k < n
    # flagged for the flagged pixels in their stamps, fitted (not FIT_FAILED);
    # a core that reaches the column's pixels (SATURATED: they are its only
    # clipped ones) reaches pixels detect had no data in: EDGE too
    assert np.all(flags[beside] & SourceFlag.NEAR_FLAGGED)
    cut = (flags & SourceFlag.SATURATED) != 0
    assert cut[beside].any() and np.all(flags[cut] & SourceFlag.EDGE)
    assert not np.any(flags & SourceFlag.FIT_FAILED)
    assert np.all(cat["snr"][beside] > 30.0)


def _expected_runs_plane():
    """A mask with columns saturated from an edge, a star's long bleed and short runs."""
    clip = np.uint16(MaskBit.SATURATED)
    mask = np.zeros((40, 600), np.uint16)
    no_data = np.zeros(mask.shape, bool)
    expected = np.zeros(mask.shape, bool)
    mask[10, :] = clip  # through the stretch
    expected[10, :] = True
    mask[11:14, 100:104] = clip  # a star's clipped core touching that column: with it
    expected[11:14, 100:104] = True
    mask[16:18, 300:303] = clip  # a star's core apart from it: not a column
    mask[20, 472:] = clip  # 128 clipped px to the last column: a column
    expected[20, 472:] = True
    mask[22, 473:] = clip  # 127 px to the last column: not one
    mask[30, 200:400] = clip  # a star's 200 px bleed within the stretch: not one
    no_data[5, :50] = True  # the chip's outside, then clipped: from the edge
    mask[5, 50:300] = clip | np.uint16(MaskBit.BLEED)
    expected[5, 50:300] = True
    return mask, no_data, expected


def test_saturated_columns_are_long_clipped_runs_from_the_stretch_edge():
    """The clipped pixels of runs of >= 128 reaching an end of the stretch, and those touching them.

    Self-consistency: the pixels the scene's construction says.
    """
    mask, no_data, expected = _expected_runs_plane()
    got = saturated_columns(has_bits(mask, CLIPPED), no_data)
    assert got is not None and np.array_equal(got, expected)
    # none: no clipped pixel, or only a star's runs
    assert saturated_columns(np.zeros((8, 300), bool), np.zeros((8, 300), bool)) is None
    star = mask.copy()
    star[[5, 10, 11, 12, 13, 20]] = 0
    assert saturated_columns(has_bits(star, CLIPPED), np.zeros(mask.shape, bool)) is None
