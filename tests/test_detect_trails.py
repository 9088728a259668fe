"""Satellite trails: the sources on them are flagged TRAIL (detect's _trails).

The scenes are invented (self-consistency): smeared stars rendered as in the
other detect tests (``tests/_detect_scene.py``) and a trail drawn as a line
of light with the seeing's Gaussian cross-section, as a satellite crossing
the chip in a fraction of a second leaves it.
"""

from __future__ import annotations

import warnings

import numpy as np

from pipeline.masks import MaskBit
from pipeline.stages.detect import SourceFlag, detect
from pipeline.stages.detect._trails import (
    kernel_length,
    on_trails,
    trail_pixels,
    trail_segments,
    trail_table,
)
from tests._detect_scene import render_scene

#: Seeing FWHM of the scenes, px.
FWHM = 3.2


def _with_trail(scene, start, stop, peak, seed=3):
    """The scene with a straight trail from ``start`` to ``stop`` ((x, y), px), ``peak`` e-."""
    ny, nx = scene.image.shape
    yy, xx = np.mgrid[0:ny, 0:nx].astype(float)
    (x0, y0), (x1, y1) = start, stop
    length = np.hypot(x1 - x0, y1 - y0)
    ux, uy = (x1 - x0) / length, (y1 - y0) / length
    along = (xx - x0) * ux + (yy - y0) * uy
    across = -(xx - x0) * uy + (yy - y0) * ux
    sigma = FWHM / 2.3548
    light = peak * np.exp(-0.5 * (across / sigma) ** 2) * ((along >= 0) & (along <= length))
    noise = np.random.default_rng(seed).normal(0.0, np.sqrt(light))
    return scene.image + light + noise, scene.variance + light


def _detect(image, variance, mask, kernels, result=False):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        out = detect(image, variance, mask, kernels, fwhm_guess=FWHM)
    return out if result else out.catalog


def test_sources_on_a_trail_are_flagged_and_the_stars_beside_it_not():
    """A trail 600 px long across a field of stars of S/N 150: the chain of
    sources the search cuts it into, and the star it crosses, are TRAIL;
    the stars away from it, and every source of the same field without the
    trail, are not."""
    x = np.array([100.0, 300.0, 500.0, 700.0, 900.0, 420.0, 560.0])
    # the sixth on the trail, the last 12 px beside it (its segment touches the
    # trail's, but the trail's light is nil there)
    y = np.array([40.0, 150.0, 60.0, 110.0, 90.0, 97.5, 120.0])
    scene = render_scene(x, y, None, snr=150.0, shape=(192, 1000), seed=11)
    start, stop = (150.0, 30.0), (750.0, 180.0)
    image, variance = _with_trail(scene, start, stop, peak=60.0)
    result = _detect(image, variance, scene.mask, scene.kernels, result=True)
    catalog = result.catalog
    # the trail itself: its axis along the drawn line, its length the line's
    # and what the matched filter spreads its ends by (the scene's smear
    # kernel, up to 12 px long, and the seeing)
    (found,) = result.trails
    assert abs(abs(found.uy / found.ux) - 0.25) < 0.01
    assert 0.0 < 2.0 * found.half_length - np.hypot(600.0, 150.0) < 2.0 * (12.0 + FWHM)
    # as detect's product, in night columns: the pixels it covers include the
    # drawn line's middle, and none of the stars away from it
    table = trail_table(result.trails, 0.0, FWHM)
    on = trail_pixels(table, np.arange(1000.0), 192)
    assert on[105, 450] and not on[40, 100] and not on[150, 300]
    flags = np.asarray(catalog["flags"])
    trail = (flags & int(SourceFlag.TRAIL)) != 0
    cx, cy = np.asarray(catalog["x"].value), np.asarray(catalog["y"].value)
    # the sources within 2 px of the trail's line are all flagged, and many
    slope = (stop[1] - start[1]) / (stop[0] - start[0])
    off = np.abs(cy - (start[1] + slope * (cx - start[0]))) / np.hypot(1.0, slope)
    on = (off < 2.0) & (cx > start[0] + 5) & (cx < stop[0] - 5)
    assert on.sum() >= 10 and trail[on].all()
    stars = np.argmin(np.hypot(cx[:, None] - x, cy[:, None] - y), axis=0)
    assert trail[stars].tolist() == [False, False, False, False, False, True, False]
    # the same field without the trail: nothing is a trail
    clean = _detect(scene.image, scene.variance, scene.mask, scene.kernels)
    assert not np.any(np.asarray(clean["flags"]) & int(SourceFlag.TRAIL))


def test_a_bleed_trail_and_a_smeared_star_are_not_trails():
    """A saturated star's bleed along the scan is as long and thin as a
    trail, but its pixels are SATURATED and BLEED; a star smeared along its
    kernel is shorter than TRAIL_LENGTH_FWHM seeing widths plus twice the
    kernel.  Neither is a trail (trail_segments on the search's segments)."""
    from pipeline.stages.detect._find import find_sources

    ny, nx = 64, 400
    snr = np.zeros((ny, nx))
    snr[30:33, 50:250] = 50.0  # a thin line 200 px long, 3 px wide
    snr[10:14, 300:330] = 50.0  # a streak 30 px long
    mask = np.zeros((ny, nx), np.uint16)
    no_data = np.zeros((ny, nx), bool)
    segm, parent = find_sources(
        snr, no_data, threshold=5.0, min_pixels=3, deblend_levels=0, deblend_contrast=0.005
    )
    min_length = 10.0 * FWHM + 2.0 * 12.0
    (line,) = trail_segments(segm, parent, mask, min_length)
    assert abs(line.ux) == 1.0 and line.uy == 0.0
    assert line.half_length == 99.5 and line.half_width == 2.0
    x, y = np.array([100.0, 100.0, 315.0, 251.0]), np.array([35.0, 40.0, 12.0, 31.0])
    assert on_trails([line], x, y, FWHM).tolist() == [True, False, False, True]
    mask[30:33, 50:250] = MaskBit.BLEED
    mask[31, 140:160] = MaskBit.SATURATED
    assert trail_segments(segm, parent, mask, min_length) == []
    assert kernel_length(np.array([[-6.0, 6.0]]), np.array([[0.0, 1.0]])) == 12.0
