"""The catalogue's ``mask_near`` and ``mask_core``: which mask bits made a source's flags.

detect flags a source NEAR_FLAGGED, SATURATED, COSMIC_RAY or EDGE from the
OR of the stretch's mask bits (:class:`pipeline.masks.MaskBit`) over the
stamp its fit took and over its core (where its fitted model exceeds 5 %
of its peak); the catalogue carries both ORs, named as the mosaic tiles'
catalogues name theirs, so that a user can tell a cosmic ray from a hot
column or a bleed.

Self-consistency tests on invented scenes (:mod:`tests._detect_scene`):
the flagged pixels are planted where the stars are known to be.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from pipeline.masks import NO_DATA, MaskBit
from pipeline.stages.detect import SourceFlag, _measure, detect
from pipeline.stages.detect._measure import measure_groups
from pipeline.stages.detect._model import KernelGrid, SeeingProfile
from tests._detect_scene import render_scene
from tests.test_detect_saturated_columns import BAND_WELL, _own_band_scene

SATURATION = int(MaskBit.SATURATED | MaskBit.BLEED)


def assert_flags_follow_the_bits(catalog) -> None:
    """detect's rules (:class:`SourceFlag`) hold between every row's flags and its bits.

    NEAR_FLAGGED iff ``mask_near`` is not 0; SATURATED iff ``mask_core``
    holds SATURATED or BLEED; COSMIC_RAY iff it holds COSMIC_RAY;
    PARTIAL_EXPOSURE iff it holds LOW_EXPOSURE; EDGE
    wherever the stamp holds OUTSIDE or GAP or the core NONFINITE (and
    elsewhere only for other reasons: the image's edge, a column saturated
    through the stretch); the core lies in the stamp.
    """
    flags = np.asarray(catalog["flags"], dtype=np.int64)
    near = np.asarray(catalog["mask_near"], dtype=np.int64)
    core = np.asarray(catalog["mask_core"], dtype=np.int64)

    def has(values, bits):
        return (values & int(bits)) != 0

    np.testing.assert_array_equal(has(flags, SourceFlag.NEAR_FLAGGED), near != 0)
    np.testing.assert_array_equal(has(flags, SourceFlag.SATURATED), has(core, SATURATION))
    np.testing.assert_array_equal(has(flags, SourceFlag.COSMIC_RAY), has(core, MaskBit.COSMIC_RAY))
    np.testing.assert_array_equal(
        has(flags, SourceFlag.PARTIAL_EXPOSURE), has(core, MaskBit.LOW_EXPOSURE)
    )
    edge = has(near, MaskBit.OUTSIDE | MaskBit.GAP) | has(core, MaskBit.NONFINITE)
    assert np.all(has(flags, SourceFlag.EDGE)[edge])
    assert not np.any(core & ~near)


def _flagged_scene():
    """Six stars 200 px apart along the scan, each with its own flagged pixels.

    Invented data: S/N 150 each, fitted alone.  0: clean.  1: a cosmic-ray
    hit on the pixel under its centre.  2: a hot column through its centre
    (a chip column is a row of the rectified stretch, flagged all along it).
    3: a cosmic-ray hit 5 rows off its centre (its model there is under 2 %
    of the peak: wings, not core).  4: a hot column 5 rows off.  5: a
    saturated pixel under its centre.  Returns the scene, its mask and the
    bits planted per star (core, wings).
    """
    x = np.array([100.0, 300.0, 500.0, 700.0, 900.0, 1100.0])
    y = np.array([30.0, 64.0, 98.0, 64.0, 160.0, 30.0])
    scene = render_scene(x, y, None, snr=150.0, shape=(192, 1200), seed=11)
    mask = scene.mask.copy()
    cosmic, hot = np.uint16(MaskBit.COSMIC_RAY), np.uint16(MaskBit.HOT_COLUMN)
    mask[64, 300] |= cosmic
    mask[98, :] |= hot
    mask[64 + 5, 700] |= cosmic
    mask[160 + 5, :] |= hot
    mask[30, 1100] |= np.uint16(MaskBit.SATURATED)
    planted = [
        (0, 0),
        (MaskBit.COSMIC_RAY, 0),
        (MaskBit.HOT_COLUMN, 0),
        (0, MaskBit.COSMIC_RAY),
        (0, MaskBit.HOT_COLUMN),
        (MaskBit.SATURATED, 0),
    ]
    return scene, mask, planted


def _nearest(catalog, x, y):
    """Row of the source nearest each ``(x, y)`` (array pixels), and its distance."""
    cx, cy = np.asarray(catalog["x"].value), np.asarray(catalog["y"].value)
    d = np.hypot(cx[None, :] - np.asarray(x)[:, None], cy[None, :] - np.asarray(y)[:, None])
    return np.argmin(d, axis=1), np.min(d, axis=1)


def test_mask_columns_name_the_bits_under_a_star_and_in_its_wings():
    """A flagged pixel under a star's core is in both columns, one in its wings in mask_near only.

    The clean star has 0 in both; each column holds the planted bit and
    no other; the flags agree (COSMIC_RAY and SATURATED from the core,
    NEAR_FLAGGED from the stamp); the columns sit right after ``flags``,
    described, with the bits' values in the meta.
    """
    scene, mask, planted = _flagged_scene()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        catalog = detect(scene.image, scene.variance, mask, scene.kernels, fwhm_guess=3.2).catalog
    rows, distance = _nearest(catalog, scene.x, scene.y)
    assert np.all(distance < 0.5)
    near = np.asarray(catalog["mask_near"])
    core = np.asarray(catalog["mask_core"])
    flags = np.asarray(catalog["flags"])
    for i, (in_core, in_wings) in enumerate(planted):
        j = rows[i]
        assert core[j] == int(in_core), (i, MaskBit(int(core[j])))
        assert near[j] == int(in_core | in_wings), (i, MaskBit(int(near[j])))
        assert bool(flags[j] & SourceFlag.NEAR_FLAGGED) == bool(in_core or in_wings)
    assert flags[rows[1]] & SourceFlag.COSMIC_RAY and not flags[rows[3]] & SourceFlag.COSMIC_RAY
    assert flags[rows[5]] & SourceFlag.SATURATED and not flags[rows[2]] & SourceFlag.SATURATED
    assert_flags_follow_the_bits(catalog)
    names = catalog.colnames
    assert names[names.index("flags") + 1 : names.index("flags") + 3] == ["mask_near", "mask_core"]
    for name in ("mask_near", "mask_core"):
        assert catalog[name].dtype == np.int32
        assert "MaskBit" in catalog[name].info.description
    assert catalog.meta["mask_bits"]["HOT_COLUMN"] == int(MaskBit.HOT_COLUMN)


def test_mask_columns_of_joint_fits_equal_those_of_the_fits_one_by_one(monkeypatch):
    """The compiled joint fits give the bits _measure_group gives, and show the mask asked for.

    ``shown`` (the stretch's own mask) differs from the mask the flags are
    made from (detect's copy, with bits added where it takes pixels as
    without data): the flags follow the one, the columns the other, in
    both paths.  A pair fitted jointly shares its stamp's bits.
    """
    x = [100.0, 300.0, 306.0, 500.0]
    y = [64.0, 64.0, 66.0, 64.0]
    scene = render_scene(x, y, 5e4, shape=(128, 600), seed=7)
    shown = scene.mask.copy()
    shown[64, 300] |= np.uint16(MaskBit.COSMIC_RAY)
    shown[69, 500] |= np.uint16(MaskBit.BLEED)
    mask = shown.copy()
    mask[63, 500] |= np.uint16(MaskBit.NONFINITE | MaskBit.BAD_COLUMN)  # detect's own
    groups = [[(100.3, 64.2)], [(300.2, 63.9), (305.7, 66.1)], [(500.2, 64.1)]]

    planes = (scene.image - 200.0, scene.variance, mask)

    def measure():
        model = (KernelGrid(scene.kernels), SeeingProfile(3.2))
        return measure_groups(*planes, groups, *model, x_start=1000, shown=shown)

    batch = measure()
    monkeypatch.setattr(_measure, "_measure_joint", lambda *args: {})
    one_by_one = measure()
    for name in ("flags", "mask_near", "mask_core"):
        np.testing.assert_array_equal(batch[name], one_by_one[name], err_msg=name)
    near, core, flags = batch["mask_near"], batch["mask_core"], batch["flags"]
    cosmic, bleed = int(MaskBit.COSMIC_RAY), int(MaskBit.BLEED)
    assert near.tolist() == [0, cosmic, cosmic, bleed]
    assert core[1] == cosmic and not core[2] & cosmic  # the pair's second star is 6 px off
    assert core[3] == 0  # BLEED in the wings; NONFINITE not the stretch's
    assert flags[3] & SourceFlag.EDGE and not flags[3] & SourceFlag.SATURATED


def test_a_saturated_column_shows_the_stretch_bits_and_column_stars_their_clipped_cores():
    """On a column saturated through the stretch, the columns show the stretch's own bits.

    Invented data (:func:`_own_band_scene`, its columns' rows holding
    clipped values flagged SATURATED | BLEED instead of NaN flagged without
    data).  detect takes those rows as without data (BAD_COLUMN |
    NONFINITE in its own copy of the mask, which makes a star on them
    EDGE); no source shows those bits, which the stretch lacks.  The stars
    whose clipped cores widen a column are FIT_FAILED | SATURATED | EDGE
    without a fit: their ``mask_core`` holds their clipped core's bits.
    """
    scene, image, mask = _own_band_scene()
    clipped_rows = (mask & np.uint16(NO_DATA)) != 0
    image[clipped_rows] = BAND_WELL
    mask[clipped_rows] = np.uint16(MaskBit.SATURATED | MaskBit.BLEED)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        catalog = detect(image, scene.variance, mask, scene.kernels, fwhm_guess=3.2).catalog
    flags = np.asarray(catalog["flags"], dtype=np.int64)
    near = np.asarray(catalog["mask_near"], dtype=np.int64)
    core = np.asarray(catalog["mask_core"], dtype=np.int64)
    assert not np.any((near | core) & int(NO_DATA))
    column_stars = ((flags & SourceFlag.FIT_FAILED) != 0) & ((flags & SourceFlag.SATURATED) != 0)
    assert column_stars.any()
    assert np.all(core[column_stars] & SATURATION)
    on_column = (flags & SourceFlag.EDGE) != 0
    assert on_column.any() and np.all(core[on_column] & SATURATION)
    assert_flags_follow_the_bits(catalog)


@pytest.mark.parametrize("all_flagged", [False, True])
def test_an_empty_catalogue_has_the_mask_columns(all_flagged):
    """A stretch without sources (or without usable pixels) lists the columns all the same."""
    scene = render_scene([], [], None, shape=(64, 200), seed=1)
    mask = scene.mask.copy()
    if all_flagged:
        mask[:] = np.uint16(MaskBit.BAD_COLUMN)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        catalog = detect(scene.image, scene.variance, mask, scene.kernels).catalog
    assert len(catalog) == 0
    assert {"mask_near", "mask_core"} <= set(catalog.colnames)


def test_a_column_star_whose_fit_ended_off_its_core_keeps_its_clipped_core_bits():
    """A column star's ``mask_core`` holds its clipped core's bits, wherever its fit ended.

    Such a star is flagged SATURATED without a fit (its position set to its
    clipped core's centre); its fit may have ended beside the core (pulled
    toward a neighbour, up to 5 px on the demo nights), whose own core then
    holds none of the clipped pixels.  Invented data: one core of 5 x 9
    clipped pixels, a fit whose core bits are 0.
    """
    from pipeline.stages.detect import _column_stars_unmeasured
    from pipeline.stages.detect._saturated import ColumnCores

    shown = np.zeros((40, 60), np.uint16)
    pixels = np.zeros(shown.shape, bool)
    pixels[18:23, 26:35] = True
    shown[pixels] = np.uint16(MaskBit.SATURATED)
    shown[20, 28:31] |= np.uint16(MaskBit.BLEED)
    shown[5, 5] = np.uint16(MaskBit.COSMIC_RAY)  # elsewhere: not the core's
    cores = ColumnCores(pixels, *(np.array([v], float) for v in (30.0, 20.0, 4.5, 26, 34, 18, 22)))
    names = ("x", "y", "x_err", "y_err", "flux", "flux_err")
    fits_ = {name: np.array([1.0, 2.0]) for name in names}
    fits_.update(flags=np.array([0, 0]), mask_near=np.array([0, 0]), mask_core=np.array([0, 0]))
    out = _column_stars_unmeasured(fits_, [0, 1], np.array([-1, 0]), cores, shown)
    assert out["mask_core"].tolist() == [0, SATURATION]
    assert out["flags"][1] & SourceFlag.SATURATED and out["flags"][1] & SourceFlag.FIT_FAILED
    assert (out["x"][1], out["y"][1]) == (30.0, 20.0)


def test_stars_in_the_start_of_scan_ramp_are_flagged_partial_exposure():
    """A star whose core lies in the ramp (LOW_EXPOSURE) is PARTIAL_EXPOSURE, one beside it not.

    The rectified stretch's scan runs along x: the ramp is the first
    columns.  Invented data (five stars of S/N 150, fitted alone): the ramp
    ends 6 px before the second star, which has it in its stamp only
    (NEAR_FLAGGED), while the first lies inside it.
    """
    x = [100.0, 300.0, 500.0, 700.0, 900.0]
    y = [30.0, 64.0, 98.0, 64.0, 160.0]
    scene = render_scene(x, y, None, snr=150.0, shape=(192, 1000), seed=11)
    mask = scene.mask.copy()
    mask[:, :294] |= np.uint16(MaskBit.LOW_EXPOSURE)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        catalog = detect(scene.image, scene.variance, mask, scene.kernels, fwhm_guess=3.2).catalog
    rows, distance = _nearest(catalog, x, y)
    assert np.all(distance < 0.5)
    flags = np.asarray(catalog["flags"])[rows]
    partial = (flags & int(SourceFlag.PARTIAL_EXPOSURE)) != 0
    near = (flags & int(SourceFlag.NEAR_FLAGGED)) != 0
    assert partial.tolist() == [True, False, False, False, False]
    assert near.tolist() == [True, True, False, False, False]
    assert_flags_follow_the_bits(catalog)
