"""A column saturated through the stretch: no source of its own, the stars beside it kept.

A very bright star (or a bleed in twilight) can fill a raw column with charge
for the whole night.  After rectify it is rows of the stretch clipped from
one end to the other: the column itself without data (SATURATED | BLEED |
BAD_COLUMN, NaN), its neighbours flagged BLEED while holding data.  As a
saturated star's footprint it swallowed every source that started within a
FWHM of it and left one source fitted on nothing (S/N ~ 0); on the demo
nights ~11 such sources, and the real stars beside the columns were lost.
A star whose core lies on such a column was cut in two by the search (one
source each side, most FIT_FAILED); now the search's segments cross the
column's rows, the fit starts at the matched filter's peak and its stamp
reaches the wings beyond the column.  A column saturated through the
previous stretch that stops just past the seam was a star's footprint in
this one (fewer than COLUMN_RUN clipped pixels here).

Self-consistency tests against the scenes' own truth (the stars they
rendered: invented data).
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from scipy.spatial import cKDTree

from pipeline.masks import MaskBit, has_bits
from pipeline.stages.detect import SourceFlag, detect
from pipeline.stages.detect._saturated import CLIPPED, COLUMN_RUN, saturated_columns
from tests._detect_scene import render_scene

#: The mask bits rectify gives a column saturated all night (no data), and
#: those of its neighbours (spilled charge, values kept).
COLUMN_BITS = MaskBit.SATURATED | MaskBit.BLEED | MaskBit.BAD_COLUMN | MaskBit.NONFINITE
MARGIN_BITS = MaskBit.BLEED


def _detect_quietly(scene, image, mask):
    """detect's catalogue of a scene (its warnings silenced) and the sources' ``(x, y)``."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        cat = detect(image, scene.variance, mask, scene.kernels, fwhm_guess=3.2).catalog
    return cat, np.column_stack([cat["x"].value, cat["y"].value])


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
    cat, found = _detect_quietly(scene, image, mask)
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


def _with_column(scene, image, mask, stop=None):
    """``image``, ``mask`` (changed in place) with a column saturated up to column ``stop``.

    Rows 60-67 without data (COLUMN_BITS, NaN), rows 59 and 68 BLEED with
    3 sigma of spilled charge, from the first column to ``stop`` (None: the
    last): what rectify leaves of a raw column saturated all night.
    """
    span = slice(0, stop)
    image[60:68, span] = np.nan
    mask[60:68, span] |= np.uint16(COLUMN_BITS)
    for row in (59, 68):
        mask[row, span] |= np.uint16(MARGIN_BITS)
        image[row, span] += 3.0 * np.sqrt(scene.variance[row, span])
    return image, mask


def _cut_scene(seed: int, snr_on: float = 600.0):
    """Twelve stars whose cores a saturated column cuts, eight far from it.

    Invented data.  The column: rows 60-67 without data, rows 59 and 68
    BLEED with 3 sigma of spilled charge, along the whole 1000-column
    stretch (as rectify leaves a raw column saturated all night: 8 rows of
    NaN and its neighbours).  The stars' centres lie on its middle (63.5)
    or 0.5 px inside either edge of its no-data rows (60.5, 66.5), +-0.3 px;
    S/N ``snr_on`` (whole star).  Eight stars of S/N 200 far from it give
    the seeing.
    """
    n = 12
    rng = np.random.default_rng(seed)
    x = np.concatenate([np.linspace(50.0, 950.0, n), np.linspace(60.0, 940.0, 8)])
    y = np.concatenate(
        [np.tile([63.5, 60.5, 66.5], n // 3) + rng.uniform(-0.3, 0.3, n), np.tile([20.0, 108.0], 4)]
    )
    snr = np.concatenate([np.full(n, snr_on), np.full(8, 200.0)])
    scene = render_scene(x, y, None, snr=snr, shape=(128, 1000), x_start=0, seed=seed)
    image, mask = _with_column(scene, scene.image.copy(), scene.mask.copy())
    return scene, image, mask, n


def test_a_star_whose_core_a_saturated_column_cuts_is_one_fitted_source():
    """Each star on the column: one source, fitted, flagged SATURATED | EDGE, its flux kept.

    Before (detect 17), on these five scenes: 3-4 of the 12 stars came out
    twice (one source each side of the column) and 8-11 sources were
    FIT_FAILED (started at one side's centroid, more than a FWHM from the
    star).  Now none; the fluxes, fitted on the wings beyond the column's
    10 flagged rows, scatter by 3.6 % rms about the truth (5.0 % with
    stamps not widened over the column: 1-2 rows of wings either side).
    """
    errors = []
    for seed in (1, 2, 3, 4, 5):
        scene, image, mask, n = _cut_scene(seed)
        cat, found = _detect_quietly(scene, image, mask)
        on = cKDTree(found).query_ball_point(np.column_stack([scene.x[:n], scene.y[:n]]), 8.0)
        flags = np.asarray(cat["flags"].value, int)
        flux = np.asarray(cat["flux_psf"], float)
        for i, near in enumerate(on):
            assert len(near) == 1, (seed, scene.y[i], found[near], flags[near])
            j = near[0]
            assert not flags[j] & SourceFlag.FIT_FAILED, (seed, scene.y[i], found[j])
            # its core cut: saturated (the column's bits) and without data
            assert flags[j] & SourceFlag.SATURATED and flags[j] & SourceFlag.EDGE
            assert abs(found[j, 1] - scene.y[i]) < 0.5
            errors.append(flux[j] / scene.flux[i] - 1.0)
    errors = np.asarray(errors)
    assert np.all(np.abs(errors) < 0.15), errors
    assert abs(np.median(errors)) < 0.03
    assert np.sqrt(np.mean(errors**2)) < 0.045


def _tail_scene(seed: int = 5):
    """A column saturated through the previous stretch, stopping 60 px past the seam.

    Invented data.  The plane holds the left neighbour's 32 edge columns
    (own columns 32-967); the column (rows 60-67 no data, 59 and 68 BLEED)
    runs from the plane's first column to column 92: 92 clipped pixels per
    row, fewer than COLUMN_RUN.  Three stars of S/N 60 beside it (their
    centres 4-5 px beyond its flagged rows), one of S/N 600 on it, five
    beside its rows farther on, eight far from it.
    """
    rng = np.random.default_rng(seed)
    x_side = np.array([40.0, 58.0, 76.0, 150.0, 300.0, 500.0, 700.0, 900.0])
    y_side = np.tile([55.0, 72.0], 4) + rng.uniform(-0.3, 0.3, 8)
    x = np.concatenate([[66.0], x_side, np.linspace(60.0, 940.0, 8)])
    y = np.concatenate([[63.5], y_side, np.tile([20.0, 108.0], 4)])
    snr = np.concatenate([[600.0], np.full(8, 60.0), np.full(8, 200.0)])
    scene = render_scene(x, y, None, snr=snr, shape=(128, 1000), x_start=0, seed=seed)
    image, mask = _with_column(scene, scene.image.copy(), scene.mask.copy(), stop=92)
    return scene, image, mask, (32, 968)


def test_a_column_saturated_up_to_just_past_the_seam_is_no_star():
    """The stars beside and on a column's last 60 px past the seam: each found and fitted.

    Before, its 92 clipped pixels per row made it a star's footprint: the
    three stars beside it and the one on it came out as one FIT_FAILED
    source at their mean position.
    """
    scene, image, mask, own = _tail_scene()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        cat = detect(
            image, scene.variance, mask, scene.kernels, fwhm_guess=3.2, own_columns=own
        ).catalog
    found = np.column_stack([cat["x"].value, cat["y"].value])
    d, k = cKDTree(np.column_stack([scene.x, scene.y])).query(found)
    flags = np.asarray(cat["flags"].value, int)
    assert np.all(d < 1.0), (found[d >= 1.0], flags[d >= 1.0])
    kept = np.flatnonzero((scene.x >= own[0] - 0.5) & (scene.x < own[1] - 0.5))
    assert np.array_equal(np.sort(k), kept)  # every star of the own columns, once
    assert not np.any(flags & SourceFlag.FIT_FAILED)
    on = flags[k == 0][0]
    assert on & SourceFlag.SATURATED and on & SourceFlag.EDGE
    flux = np.asarray(cat["flux_psf"], float)
    assert np.all(np.abs(flux / scene.flux[k] - 1.0) < 0.1)


def test_saturated_columns_across_a_seam_from_the_planes_end():
    """A clipped run from the plane's end across the seam is a column, whatever its length.

    Self-consistency: the pixels the construction says.  The plane holds
    32 columns of each neighbour (own columns 32-567).
    """
    clip = np.uint16(MaskBit.SATURATED)
    own = (32, 568)
    mask = np.zeros((30, 600), np.uint16)
    no_data = np.zeros(mask.shape, bool)
    expected = np.zeros(mask.shape, bool)
    mask[3, :40] = clip  # from the first column 8 px past the left seam: a column
    expected[3, :40] = True
    mask[6, 560:] = clip  # from 8 px before the right seam to the last column: one
    expected[6, 560:] = True
    mask[9, 1:60] = clip  # across the seam, not from the plane's end: a star's
    mask[12, :32] = clip  # the neighbour's edge alone, not across the seam
    mask[15, 20:40] = clip  # a star's core on the seam: not to the end
    no_data[18, :32] = True  # no neighbour (no data), then clipped: too short
    mask[18, 32:60] = clip
    assert COLUMN_RUN > 60
    got = saturated_columns(has_bits(mask, CLIPPED), no_data, own_columns=own)
    assert got is not None and np.array_equal(got, expected)
    # without the neighbours' edges (own_columns None) the length rule alone
    assert saturated_columns(has_bits(mask, CLIPPED), no_data) is None


def _bright_on_column(full_well: float):
    """Three stars of S/N 20 000 centred on the column, clipped at ``full_well`` e-.

    Invented data: the column as in :func:`_cut_scene`, eight stars of S/N
    200 far from it.  Returns the scene, image, mask and the clipped pixels.
    """
    x = np.concatenate([[150.0, 450.0, 750.0], np.linspace(60.0, 940.0, 8)])
    y = np.concatenate([np.full(3, 63.5), np.tile([20.0, 108.0], 4)])
    snr = np.concatenate([np.full(3, 2e4), np.full(8, 200.0)])
    scene = render_scene(x, y, None, snr=snr, shape=(128, 1000), x_start=0, seed=5)
    image, mask = scene.image.copy(), scene.mask.copy()
    clipped = image >= full_well
    image[clipped] = full_well
    mask[clipped] |= np.uint16(MaskBit.SATURATED)
    image, mask = _with_column(scene, image, mask)
    return scene, image, mask, clipped


@pytest.mark.parametrize("full_well", [8e6, 2e4])
def test_a_bright_star_on_the_column_is_one_source(full_well):
    """A star of S/N 20 000 on the column: one source, SATURATED | EDGE, not FIT_FAILED.

    Clipped at 8e6 e- its clipped core lies within the column's rows; at
    2e4 e- over rows 55-72, beyond them on both sides, so the core belongs
    to the saturated column.  Without the residual's misfit beside a star
    fitted on the column left out, the first came out as two sources (the
    second 3 px across, 2 % of the flux, the first's flux 19 % low); without
    the starts on the column within a FWHM along the scan merged, the
    second as two or three (FIT_FAILED ones at the column's edges, where
    the matched filter peaks beside the clipped core).  The first's flux is
    within 10 %; the second's, fitted on wings 8 px and more from the
    centre, is 0.62 of the truth (not checked), as a star clipped as far
    is off any column in the same scene (0.60).
    """
    scene, image, mask, clipped = _bright_on_column(full_well)
    if full_well < 1e5:
        assert clipped[:58].any() and clipped[70:].any()  # beyond the column's rows
    cat, found = _detect_quietly(scene, image, mask)
    flags = np.asarray(cat["flags"].value, int)
    flux = np.asarray(cat["flux_psf"], float)
    for i in range(3):
        near = np.flatnonzero(np.hypot(*(found - [scene.x[i], scene.y[i]]).T) < 15.0)
        assert near.size == 1, (scene.x[i], found[near], flags[near], flux[near] / scene.flux[i])
        j = near[0]
        assert not flags[j] & SourceFlag.FIT_FAILED
        assert flags[j] & SourceFlag.SATURATED and flags[j] & SourceFlag.EDGE
        if full_well > 1e5:
            assert abs(flux[j] / scene.flux[i] - 1.0) < 0.1


def test_stars_on_two_columns_at_one_place_along_the_scan_stay_two():
    """Stars at the same columns on two saturated columns: one source each, not merged.

    Invented data: a second column (rows 100-107 without data, 99 and 108
    BLEED) beside :func:`_with_column`'s, six stars of S/N 600 centred on
    each, at the same six places along the scan.  Starts on a column within
    a FWHM along the scan are one star, and a source of the residual image
    there is the misfit of the star fitted on the column, only if the
    column's pixels join them across the scan.  Without either check the
    other pass still finds the star (a star merged away is found again in
    the residual image; one found there is merged by neither); without both,
    stars of the second column were lost.
    """
    xs = np.linspace(100.0, 900.0, 6)
    x = np.concatenate([xs, xs, np.linspace(60.0, 940.0, 8)])
    y = np.concatenate([np.full(6, 63.5), np.full(6, 103.5), np.tile([20.0, 40.0], 4)])
    snr = np.concatenate([np.full(12, 600.0), np.full(8, 200.0)])
    scene = render_scene(x, y, None, snr=snr, shape=(128, 1000), x_start=0, seed=3)
    image, mask = _with_column(scene, scene.image.copy(), scene.mask.copy())
    image[100:108] = np.nan
    mask[100:108] |= np.uint16(COLUMN_BITS)
    for row in (99, 108):
        mask[row] |= np.uint16(MARGIN_BITS)
        image[row] += 3.0 * np.sqrt(scene.variance[row])
    cat, found = _detect_quietly(scene, image, mask)
    d, k = cKDTree(np.column_stack([x, y])).query(found)
    assert np.all(d < 1.0), found[d >= 1.0]
    assert np.array_equal(np.sort(k), np.arange(x.size))  # each star once
    assert not np.any(np.asarray(cat["flags"].value, int) & SourceFlag.FIT_FAILED)


#: The full well of :func:`_own_band_scene`'s stars, e-.
BAND_WELL = 2e4


def _with_bleed(image, mask, centres, length, well=BAND_WELL):
    """Clip ``image`` at ``well`` and run each clipped core ``length`` px along the scan.

    Invented data: what a raw column's bleed does to a saturated core in
    TDI (charge spilled along the column, both ways alike), on each core
    around ``centres`` ((x, y) pixels).  Returns the clipped pixels.
    """
    clipped = image >= well
    for x0, y0 in centres:
        near = np.zeros(clipped.shape, bool)
        ys, xs = np.mgrid[0 : clipped.shape[0], 0 : clipped.shape[1]]
        near[np.hypot(xs - x0, ys - y0) < 40] = True
        core = clipped & near
        for row in np.flatnonzero(core.any(axis=1)):
            cols = np.flatnonzero(core[row])
            lo, hi = max(cols[0] - length, 0), min(cols[-1] + length + 1, clipped.shape[1])
            clipped[row, lo:hi] = True
    image[clipped] = well
    mask[clipped] |= np.uint16(MaskBit.SATURATED)
    return clipped


def _own_band_scene(seed: int = 3):
    """Very bright stars whose bleed is the column they sit on, and one sitting on another's.

    Invented data.  Each of three stars (S/N 2e5, 6e4 and 3e4, whole star;
    clipped at :data:`BAND_WELL` e- out to 9-12 px across the scan, and
    bled 15 px along it) sits on a column saturated through the stretch
    centred on it (8 rows without data, their neighbours clipped): the
    column is its own bleed, and its clipped core widens the column's band
    where it lies.  A fourth, saturated (S/N 8e3), has its centre 6.5 px
    beside the second star's column, its clipped core touching it.  Eight
    stars of S/N 200 far away give the seeing.
    """
    x = np.concatenate([[200.0, 500.0, 800.0, 650.0], np.linspace(60.0, 940.0, 8)])
    y = np.concatenate([[40.3, 80.6, 40.3, 80.6 + 4.0 + 6.5], np.tile([10.0, 118.0], 4)])
    snr = np.concatenate([[2e5, 6e4, 3e4, 8e3], np.full(8, 200.0)])
    scene = render_scene(x, y, None, snr=snr, shape=(128, 1000), x_start=0, seed=seed)
    image, mask = scene.image.copy(), scene.mask.copy()
    _with_bleed(image, mask, list(zip(x[:4], y[:4], strict=True)), 15)
    for centre, span in ((40, slice(None)), (80, slice(None))):
        rows = slice(centre - 4 + (centre == 80), centre + 4 + (centre == 80))
        image[rows, span] = np.nan
        mask[rows, span] |= np.uint16(COLUMN_BITS)
        for row in (rows.start - 1, rows.stop):
            mask[row, span] |= np.uint16(MARGIN_BITS | MaskBit.SATURATED)
            image[row, span] = BAND_WELL
    return scene, image, mask


def test_a_star_whose_bleed_is_the_column_is_one_source_at_its_place():
    """The stars whose own bleed is the column, and one touching a column: each once, in place.

    Self-consistency (invented data: :func:`_own_band_scene`).  Their
    clipped cores are clipped pixels joined to a column saturated through
    the stretch; taken as the column's (detect 18), the three stars on
    their own columns came out as FIT_FAILED sources 3.7-6.3 px off across
    the column (at its edge, nothing left to fit), the star touching one
    3.1 px off with 0.08 of its flux and an error of 0.16 %.  Now each is
    one source within 0.4 px of the star, flagged SATURATED | EDGE, its
    flux NaN (FIT_FAILED) or within 3 of its errors of the truth (fitted,
    they came out at 0.19-0.41 and 4.1 times their fluxes with errors of
    0.1-10 %), and there is no other source near it along the columns.
    """
    scene, image, mask = _own_band_scene()
    cat, found = _detect_quietly(scene, image, mask)
    flags = np.asarray(cat["flags"].value, int)
    flux = np.asarray(cat["flux_psf"], float)
    error = np.asarray(cat["flux_psf_err"], float)
    for i in range(4):
        near = np.flatnonzero(
            (np.abs(found[:, 0] - scene.x[i]) < 40.0) & (np.abs(found[:, 1] - scene.y[i]) < 12.0)
        )
        assert near.size == 1, (i, found[near], flags[near])
        j = near[0]
        assert np.hypot(*(found[j] - [scene.x[i], scene.y[i]])) < 1.0, (i, found[j])
        assert flags[j] & SourceFlag.SATURATED and flags[j] & SourceFlag.EDGE
        if flags[j] & SourceFlag.FIT_FAILED:
            assert np.isnan(flux[j])
        else:  # an honest error: the truth within 3 of it
            assert abs(flux[j] - scene.flux[i]) < 3.0 * error[j], (i, flux[j], scene.flux[i])
