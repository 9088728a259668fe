"""What detect holds in memory: a whole stretch's planes are counted in the pipeline's peak.

A worker's memory peaks while detect measures a stretch, so planes that are
no longer needed must not live through the long fitting passes, the
product's own planes must not be copied before they are padded with the
neighbours' edges, and its float32 planes are not converted to float64
ones.  Self-consistency checks on an invented scene.
"""

from __future__ import annotations

import gc
import tracemalloc
import weakref

import numpy as np
import pytest
from _detect_scene import render_scene
from astropy.io import fits

import pipeline.stages.detect as detect_module
from pipeline.masks import MaskBit
from pipeline.products import FLAGS_EXTENSION, FLUX_EXTENSION, VARIANCE_EXTENSION
from pipeline.stages.detect import _planes, detect, detect_stretch

#: Largest peak of detect's own allocations, in planes of the image (float64,
#: ny x nx).  Measured 5.8 on the scene below (background, residual, the
#: variance filled and its copy for the fits, the fits' stamps and the second
#: search's planes); 6.8 while the background plane lived from the residual
#: to the catalogue, 9.1 when the first search's planes (catalogue, filled
#: residual, significance, segmentation) lived through the fits, 9.3 before
#: they were freed.  The 0.7 plane of slack is for other library versions'
#: temporaries, and still catches one float64 plane more.
MAX_PLANES = 6.5


@pytest.fixture(scope="module")
def scene_with_gap():
    """A 512 x 1024 stretch of 300 stars at random places, S/N 5 to 300, 6 columns without data."""
    rng = np.random.default_rng(5)
    x, y = rng.uniform(10, 1014, 300), rng.uniform(10, 502, 300)
    snr = 10 ** rng.uniform(np.log10(5), np.log10(300), x.size)
    scene = render_scene(x, y, None, snr=snr, seed=7)
    scene.image[:, :6] = np.nan  # with pixels lacking data, the planes are filled copies
    return scene


def test_detect_peak_memory_is_a_few_planes(scene_with_gap):
    scene = scene_with_gap
    with np.errstate(all="ignore"):
        detect(scene.image, scene.variance, scene.mask, scene.kernels, x_start=1000)  # imports
        tracemalloc.start()
        try:
            result = detect(scene.image, scene.variance, scene.mask, scene.kernels, x_start=1000)
            _, peak = tracemalloc.get_traced_memory()
        finally:
            tracemalloc.stop()
    assert len(result.catalog) > 200  # the scene was measured, not rejected
    assert peak / scene.image.nbytes <= MAX_PLANES


def test_own_planes_are_used_as_stored():
    """detect_stretch's view of the product shares the stored (float32) planes."""
    header = fits.Header(
        {"CTYPE1": "RA---TAN", "CTYPE2": "DEC--TAN", "CRVAL1": 10.0, "CRVAL2": 50.0}
        | {"CDELT1": -1e-4, "CDELT2": 1e-4, "CRPIX1": 8.0, "CRPIX2": 4.0}
        | {"WCSNAMEA": "NIGHT", "CRVAL1A": 100.0, "CRPIX1A": 1.0, "CDELT1A": 1.0}
    )
    planes = {
        FLUX_EXTENSION: np.ones((8, 16), np.float32),
        VARIANCE_EXTENSION: np.full((8, 16), 2.0, np.float32),
        FLAGS_EXTENSION: np.zeros((8, 16), np.uint16),
    }
    hdul = fits.HDUList(
        [fits.PrimaryHDU()]
        + [fits.ImageHDU(data, header=header, name=name) for name, data in planes.items()]
    )
    own = _planes({"image": hdul, "smear_kernels": None})
    for array, name in zip((own.image, own.variance, own.mask), planes, strict=True):
        assert np.shares_memory(array, hdul[name].data), name
    assert own.x_start == 100


def _float32_scene():
    """A rectified product's planes as stored (float32): scene_with_gap's stars, the
    brightest clipped at a full well (flagged SATURATED), 6 columns without data."""
    rng = np.random.default_rng(11)
    x, y = rng.uniform(10, 1014, 300), rng.uniform(10, 502, 300)
    snr = 10 ** rng.uniform(np.log10(5), np.log10(300), x.size)
    scene = render_scene(x, y, None, snr=snr, seed=12)
    image = scene.image.astype(np.float32)
    full_well = np.float32(0.5 * image.max())
    clipped = image > full_well
    image[clipped] = full_well
    mask = scene.mask.copy()
    mask[clipped] |= np.uint16(MaskBit.SATURATED)
    image[:, :6] = np.nan
    mask[:, :6] |= np.uint16(MaskBit.OUTSIDE)
    return image, scene.variance.astype(np.float32), mask, scene.kernels, int(clipped.sum())


float32_scene = pytest.fixture(scope="module")(_float32_scene)


def _measured(image, variance, mask, kernels, overwrite=False):
    """detect's catalogue and the peak of its own allocations (tracemalloc), bytes."""
    with np.errstate(all="ignore"):
        tracemalloc.start()
        try:
            result = detect(image, variance, mask, kernels, x_start=1000, overwrite_input=overwrite)
            _, peak = tracemalloc.get_traced_memory()
        finally:
            tracemalloc.stop()
    return result.catalog, peak


def test_float32_planes_are_measured_as_their_float64_copies(float32_scene):
    """detect keeps a product's float32 planes as they are, with the same results.

    Self-consistency: every catalogue column the same, to the bit, as from
    float64 copies of the planes, on a scene whose every path of that
    handling is taken (pixels without data, a clipped star left out of the
    fits, a second search in the image minus the models, made in the
    residual, which must be made again before the refits and apertures).
    The caller's image is left as it was; its variance is NaN where there
    is no data only when it is scratch space.  And the float32 planes save
    memory: measured 4.2 float64 planes of the image at the peak against
    5.6 from float64 planes (6.0 before the seeing's width was fitted
    without its saturated stars, whose peak came elsewhere; 3.7 with
    scratch space); a float64 plane more (e.g. a copy of the residual for
    the second search) fails the test.
    """
    image, variance, mask, kernels, n_clipped = float32_scene
    assert n_clipped > 20  # the scene does clip a star's core
    _measured(image, variance, mask, kernels)  # first: one-time allocations out of the way
    expected, peak64 = _measured(image.astype(float), variance.astype(float), mask, kernels)
    got, peak32 = _measured(image, variance, mask, kernels)
    scratch = image.copy(), variance.copy()
    reused, _ = _measured(*scratch, mask, kernels, overwrite=True)
    assert len(expected) > 250  # the scene was measured, not rejected
    for catalog in (got, reused):
        for name in expected.colnames:
            assert np.array_equal(catalog[name], expected[name], equal_nan=True), name
    assert np.array_equal(scratch[0], image, equal_nan=True)
    assert np.isnan(scratch[1][:, :6]).all()
    assert np.array_equal(scratch[1][:, 6:], variance[:, 6:])
    plane = image.size * np.dtype(np.float64).itemsize
    assert peak32 < 4.7 * plane
    assert peak32 < peak64 - plane


def _stretch_products(image, variance, mask, kernels, x_start):
    """A rectified stretch's products (in memory, as the store reads them) of the planes."""
    header = fits.Header(
        {"CTYPE1": "RA---TAN", "CTYPE2": "DEC--TAN", "CRVAL1": 10.0, "CRVAL2": 50.0}
        | {"CDELT1": -1e-4, "CDELT2": 1e-4, "CRPIX1": 8.0, "CRPIX2": 4.0}
        | {"WCSNAMEA": "NIGHT", "CRVAL1A": float(x_start), "CRPIX1A": 1.0, "CDELT1A": 1.0}
    )
    planes = {FLUX_EXTENSION: image, VARIANCE_EXTENSION: variance, FLAGS_EXTENSION: mask}
    hdul = fits.HDUList(
        [fits.PrimaryHDU()]
        + [fits.ImageHDU(data.copy(), header=header, name=name) for name, data in planes.items()]
    )
    return {"image": hdul, "smear_kernels": kernels}


def test_the_stage_drops_the_stretch_planes_once_padded(float32_scene, monkeypatch):
    """The stage's unit frees its input planes once it has copied them (release=True).

    The unit's inputs are its own (the runner reads them for it): its
    stretch's planes are then held once, not twice, while it measures.
    Self-consistency: the same catalogue as when they are kept, and no
    reference to the planes left anywhere (a Planes view of them kept by
    detect_stretch would keep them, 10 bytes per pixel).
    """
    image, variance, mask, kernels, _ = float32_scene
    kept_products = _stretch_products(image, variance, mask, kernels, 1000)
    released_products = _stretch_products(image, variance, mask, kernels, 1000)
    planes = [
        weakref.ref(released_products["image"][name].data)
        for name in (FLUX_EXTENSION, VARIANCE_EXTENSION, FLAGS_EXTENSION)
    ]
    alive_while_measured = []

    def measure(*args, **kwargs):  # detect, noting whether the planes are still held
        gc.collect()
        alive_while_measured.append([ref() is not None for ref in planes])
        return detect(*args, **kwargs)

    with np.errstate(all="ignore"):
        kept = detect_stretch(kept_products)["catalog"]
        monkeypatch.setattr(detect_module, "detect", measure)
        released = detect_stretch(released_products, release=True)["catalog"]
    assert len(kept) > 250
    for name in kept.colnames:
        assert np.array_equal(released[name], kept[name], equal_nan=True), name
    assert alive_while_measured == [[False, False, False]]
    assert kept_products["image"][FLUX_EXTENSION].data is not None  # left as it was
