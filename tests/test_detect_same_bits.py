"""The detect stage's cheaper forms of a step give the bits of the expression they replace.

Self-consistency tests on invented data: each cheaper form (fewer passes over
a plane, fewer numpy calls per source) is compared, bit for bit, with the
numpy expression it replaced, written out here as it was, on data with the
edge cases that tell them apart (no-data pixels, values clipped, boxes cut by
the image's edges, several sources per bin).  The catalogues must stay the
same to the bit, so the comparisons are exact.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from photutils.geometry import circular_overlap_grid
from scipy.ndimage import zoom

from pipeline.stages.detect import _measure
from pipeline.stages.detect._find import _expand_mesh, _inverse_root, _less_trend
from pipeline.stages.detect._model import SeeingProfile, model_image, reduce_kernel
from pipeline.stages.detect._saturated import Footprints
from tests._detect_scene import smear_track


def _same_bits(a: np.ndarray, b: np.ndarray) -> None:
    """``a`` and ``b`` hold the same bits (NaN payloads and zeros' signs included)."""
    a, b = np.asarray(a), np.asarray(b)
    assert a.dtype == b.dtype and a.shape == b.shape
    a, b = np.ascontiguousarray(a), np.ascontiguousarray(b)
    np.testing.assert_array_equal(a.view(np.uint8), b.view(np.uint8))


def test_inverse_root_is_the_masked_square_root_and_division():
    # The expression replaced: sqrt and 1/x only where valid (numpy's where=),
    # then 0 elsewhere.  Sums of all kinds: ordinary, tiny (below 1e-12 of the
    # largest), zero, negative (rounding), and just above the cut.
    rng = np.random.default_rng(11)
    sums = rng.uniform(1e-3, 50.0, (70, 90)).astype(np.float32)
    sums[5:9, :] = 0.0
    sums[20, 10:30] = -1e-9
    sums[30, :5] = np.float32(1e-13) * sums.max()
    sums[31, :5] = np.float32(2e-12) * sums.max()
    expected = sums.copy()
    valid = expected > 1e-12 * float(expected.max())
    expected *= np.float32(1.7)
    np.sqrt(expected, out=expected, where=valid)
    np.divide(np.float32(1.0), expected, out=expected, where=valid)
    expected[~valid] = 0.0
    assert (~valid).sum() > 100 and valid[31, :5].all()
    _same_bits(_inverse_root(sums.copy(), 1.7), expected)


@pytest.mark.parametrize("image_type", [np.float32, np.float64])
def test_less_trend_is_the_double_difference_rounded_once(image_type):
    # The expression replaced: (rows - trend).astype(float32), the difference
    # in double precision.  A sky of ~1e4 e- and a trend with all its bits
    # set: a single-precision difference would round differently.
    rng = np.random.default_rng(12)
    rows = (1e4 + rng.normal(0.0, 30.0, (40, 65))).astype(image_type)[::2]
    rows[3, 4] = np.nan  # no-data pixels stay NaN
    trend = 1e4 + rng.normal(0.0, 5.0, 65)
    _same_bits(_less_trend(rows, trend), (rows - trend).astype(np.float32))


def test_expanded_mesh_is_clipped_as_in_double_precision():
    # The expression replaced: np.clip with the double-precision bounds
    # (numpy converts each pixel to double and back).  A mesh with sharp
    # steps, whose cubic spline overshoots, so many pixels are clipped at
    # both bounds; bounds not representable in single precision.
    rng = np.random.default_rng(13)
    mesh = rng.choice([1000.1, 1000.7, 1003.3], size=(6, 7)) + rng.normal(0.0, 1e-3, (6, 7))
    trend = rng.normal(0.0, 0.3, 7 * 16 - 5)
    shape = (6 * 16 - 3, trend.size)
    ours = _expand_mesh(mesh, (16, 16), shape, trend)
    level = float(np.median(mesh))
    wy = zoom(np.eye(6), (16, 1), order=3, mode="reflect", grid_mode=True)[: shape[0]]
    wx = zoom(np.eye(7), (16, 1), order=3, mode="reflect", grid_mode=True)[: shape[1]]
    expected = (wy.astype(np.float32) @ (mesh - level).astype(np.float32)) @ wx.astype(np.float32).T
    low, high = (expected < mesh.min() - level).sum(), (expected > mesh.max() - level).sum()
    np.clip(expected, mesh.min() - level, mesh.max() - level, out=expected)
    expected += (trend + level).astype(np.float32)
    assert low > 20 and high > 20  # both bounds are reached
    _same_bits(ours, expected)


@pytest.mark.parametrize("layout", ["C", "F", "view"])
def test_footprints_take_and_put_are_boolean_indexing(layout):
    # The expressions replaced: plane[clipped] and plane[clipped] = values, in
    # the same (row-major) order, on planes of every layout.
    rng = np.random.default_rng(14)
    clipped = rng.random((30, 41)) < 0.05
    footprints = Footprints(np.zeros(clipped.shape, np.uint8), [], clipped)
    base = rng.normal(size=(30, 50) if layout == "view" else clipped.shape)
    plane = {"C": base, "F": np.asfortranarray(base), "view": base[:, 3:44]}[layout]
    _same_bits(footprints.take(plane), plane[clipped])
    values = np.arange(clipped.sum(), dtype=float)
    expected = plane.copy()
    expected[clipped] = values
    footprints.put(plane, values)
    _same_bits(plane, expected)
    footprints.put(plane, np.nan)
    assert np.isnan(plane[clipped]).all() and not np.isnan(plane[~clipped]).any()


def _aperture_sums_per_source(residual, variance, no_data, x, y, radii):
    """The loop replaced: each source's box, overlap and products in Python floats."""
    ny, nx = residual.shape
    rmax = float(max(radii))
    sums = np.zeros((len(x), len(radii)))
    variances = np.zeros((len(x), len(radii)))
    for i, (xc, yc) in enumerate(zip(x.tolist(), y.tolist(), strict=True)):
        x0, x1 = math.floor(xc - rmax + 0.5), math.ceil(xc + rmax + 0.5)
        y0, y1 = math.floor(yc - rmax + 0.5), math.ceil(yc + rmax + 0.5)
        a0, a1, b0, b1 = max(x0, 0), min(x1, nx), max(y0, 0), min(y1, ny)
        if a1 <= a0 or b1 <= b0:
            continue
        edges = (a0 - 0.5 - xc, a1 - 0.5 - xc, b0 - 0.5 - yc, b1 - 0.5 - yc)
        weights = np.array(
            [circular_overlap_grid(*edges, a1 - a0, b1 - b0, r, 1, 1).ravel() for r in radii]
        )
        gone = no_data[b0:b1, a0:a1]
        data = np.where(gone, 0.0, residual[b0:b1, a0:a1])
        var = np.where(gone, 0.0, variance[b0:b1, a0:a1])
        sums[i] = weights @ data.ravel()
        variances[i] = weights @ var.ravel()
    return sums, variances


def test_aperture_sums_are_the_per_source_sums():
    # Sources inside, cut by each edge of the image, over no-data pixels, and
    # two wholly off the image (no box: zero sums).
    rng = np.random.default_rng(15)
    no_data = np.zeros((60, 80), bool)
    no_data[20:24, 30:33] = no_data[57:, :6] = True
    residual = np.where(no_data, np.nan, rng.normal(0.0, 10.0, no_data.shape))
    variance = np.where(no_data, np.nan, rng.uniform(50.0, 150.0, no_data.shape))
    x = np.concatenate([rng.uniform(-2.0, 82.0, 40), [31.2, 1.3, 78.6, -30.0, 40.0]])
    y = np.concatenate([rng.uniform(-2.0, 62.0, 40), [21.7, 58.8, 0.2, 30.0, 95.0]])
    radii = [2.9, 5.8, 8.7]
    sums, variances = _measure._aperture_sums(residual, variance, no_data, x, y, radii)
    expected_sums, expected_variances = _aperture_sums_per_source(
        residual, variance, no_data, x, y, radii
    )
    assert (sums[-2:] == 0).all() and (sums[:-2] != 0).all()
    _same_bits(sums, expected_sums)
    _same_bits(variances, expected_variances)


def test_aperture_corrections_are_each_bins_first_source():
    # The loop replaced: per source in order, the correction of its 16-row
    # bin made from the bin's first source (a dict of the bins done).  Sources
    # not sorted by y, several per bin with different smears, so that which
    # one is first matters.
    profile = SeeingProfile(2.8)
    dx, dy = smear_track([500.0] * 4, 512, 64, 12.0, 2.0)
    shapes = [reduce_kernel(dx[0] * s, dy[0] * s, 0.4) for s in (0.1, 0.4, 0.8, 1.0)]
    y = np.array([40.0, 3.0, 300.0, 500.0, 44.0, 2.0, 33.0, 301.0, 15.9, 47.9])
    kernels = [shapes[i] for i in (0, 1, 2, 3, 1, 2, 3, 0, 2, 3)]
    radii = [2.8, 5.6, 8.4]
    ours = _measure.aperture_corrections(kernels, y, profile, radii)
    expected = np.empty((y.size, len(radii)))
    done = {}
    rmax = max(radii)
    for i, b in enumerate(np.floor(y / 16.0).astype(int).tolist()):
        if b not in done:
            kx, ky = kernels[i]
            hx = int(np.ceil(rmax + 4 * profile.fwhm + np.max(np.abs(kx))))
            hy = int(np.ceil(rmax + 4 * profile.fwhm + np.max(np.abs(ky))))
            unit = model_image((2 * hy + 1, 2 * hx + 1), hx, hy, kx, ky, profile)
            y0, x0 = int(np.floor(hy - rmax + 0.5)), int(np.floor(hx - rmax + 0.5))
            y1, x1 = int(np.ceil(hy + rmax + 0.5)), int(np.ceil(hx + rmax + 0.5))
            weights = _measure._overlap_weights(hx, hy, (y0, y1, x0, x1), radii)
            done[b] = 1.0 / (weights @ unit[y0:y1, x0:x1].ravel())
        expected[i] = done[b]
    # the bins' first sources have different smears from the others of their bins
    assert len(set(map(tuple, expected.tolist()))) == len(done) == 4
    _same_bits(ours, expected)
    assert _measure.aperture_corrections([], np.zeros(0), profile, radii).shape == (0, 3)


def test_joint_fits_shared_with_a_thread_give_the_same_catalogue(monkeypatch):
    """While a core is idle (the last units of a flow, a night of one stretch)
    the joint fits of the groups are split between two threads
    (``_measure.fit_groups``); each group is fitted on its own, so the
    catalogue is the same, to the bit, as with one call."""
    from pipeline import _threads
    from pipeline.stages.detect import _measure_jit, detect
    from tests._detect_scene import render_scene

    rng = np.random.default_rng(21)
    # 40 pairs of stars 1.4 FWHM apart: each pair is fitted jointly
    x0, y0 = rng.uniform(40, 980, 40), rng.uniform(40, 470, 40)
    x, y = np.r_[x0, x0 + 4.5], np.r_[y0, y0 + 1.0]
    scene = render_scene(x, y, 2e4, shape=(512, 1024), seed=4)
    calls = []
    compiled = _measure_jit.fit_groups_compiled

    def spy(*args):
        calls.append(args[3].shape[0])  # the groups it fits
        return compiled(*args)

    monkeypatch.setattr(_measure_jit, "fit_groups_compiled", spy)

    def catalogue():
        result = detect(scene.image, scene.variance, scene.mask, scene.kernels, fwhm_guess=3.2)
        return result.catalog

    alone = catalogue()
    one_call = list(calls)
    assert max(one_call) >= _measure.SHARED_GROUPS  # enough groups to share
    calls.clear()
    _threads.report_spare_cores(lambda: 1)
    try:
        shared = catalogue()
    finally:
        _threads.report_spare_cores(None)
    # each call of enough groups made in two, of the same groups in all
    assert len(calls) > len(one_call)
    assert sum(calls) == sum(one_call)
    assert alone.colnames == shared.colnames and len(alone) == len(shared) > 70
    for name in alone.colnames:
        _same_bits(np.asarray(alone[name]), np.asarray(shared[name]))
