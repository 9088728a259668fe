"""Small calibrated TDI strips with stars at known positions, for the rectify tests.

Stars are rendered along their exact strip tracks (:meth:`TDIModel.track`)
with the simulator's pixel-integrating renderer, straight into a calibrated
image (electrons; no detector effects), so the rectify stage can be checked
against the truth without running ingest and calibrate.  The chip is small
(256 columns, 1024 TDI rows) with a coarse pixel scale (~6 arcsec) so that the
smear at the chip's edges is still several pixels.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from astropy.time import Time

from pipeline.geometry import Camera, Site, TDIModel
from pipeline.geometry.rectified import RectifiedFrame
from pipeline.simulate._render import GaussianMixturePSF, render_tracks
from pipeline.stages.rectify._map import crossing_after

START = "2026-03-14T04:00:00"
#: Fictional site longitude (degrees east) used for every latitude.
LONGITUDE = -70.3


def small_camera(**kwargs) -> Camera:
    """A 256-column, 1024-row TDI camera at ~6.2 arcsec per pixel."""
    values = {"n_columns": 256, "tdi_rows": 1024, "pixel_size": 15.0, "focal_length": 0.5}
    values.update(kwargs)
    return Camera(**values, name="test chip")


def night_model(latitude: float, n_rows: int, camera: Camera | None = None) -> TDIModel:
    """A TDI model covering ``n_rows`` night rows at a fictional site."""
    camera = small_camera() if camera is None else camera
    site = Site(latitude=latitude, longitude=LONGITUDE, height=1500.0, name="test site")
    start = Time(START, scale="utc")
    probe = TDIModel(site, camera, start, 0.0)
    return TDIModel(site, camera, start, n_rows * probe.line_time)


@dataclass
class Scene:
    """A rendered strip and its truth."""

    model: TDIModel
    frame: RectifiedFrame
    image: np.ndarray
    variance: np.ndarray
    mask: np.ndarray
    x: np.ndarray  # rectified (night) column of each star
    y: np.ndarray  # rectified row of each star
    ra: np.ndarray
    dec: np.ndarray
    flux: np.ndarray


def star_scene(
    model: TDIModel,
    n_rows: int,
    x: np.ndarray,
    y: np.ndarray,
    *,
    flux: float = 1.0e5,
    fwhm: float = 3.0,
    sky: float = 0.0,
    noise_seed: int | None = None,
    samples_per_pixel: float = 6.0,
) -> Scene:
    """Render stars placed at rectified pixels ``(x, y)`` of the night frame.

    Parameters
    ----------
    model : TDIModel
    n_rows : int
        Night rows of the strip (scan axis).
    x, y : ndarray
        Rectified pixel positions of the stars (their ICRS positions are
        taken from the frame, so the truth is exact).
    flux : float
        Electrons per star.
    fwhm : float
        Gaussian seeing FWHM, pixels.
    sky : float
        Sky level, electrons per pixel.
    noise_seed : int or None
        If given, add Gaussian noise of variance ``image`` (Poisson-like).
    samples_per_pixel : float
        Track samples per pixel of path length.
    """
    frame = RectifiedFrame.for_night(model, n_rows)
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    ra, dec = frame.icrs_from_pixel(x, y)
    n_samples = int(max(64, samples_per_pixel * 40))
    image = np.zeros((n_rows, model.camera.n_columns))
    psf = GaussianMixturePSF.gaussian(fwhm)
    for value in np.unique(x):
        sel = x == value
        track = model.track(ra[sel], dec[sel], n_samples, after=crossing_after(model, value))
        weights = np.full(track.r.shape, flux / n_samples)
        render_tracks(track.r, track.c, weights, image.shape, psf, out=image)
    image += sky
    variance = np.maximum(image, 1.0)
    if noise_seed is not None:
        rng = np.random.default_rng(noise_seed)
        image = image + rng.normal(0.0, np.sqrt(variance))
    mask = np.zeros(image.shape, np.uint16)
    return Scene(model, frame, image, variance, mask, x, y, ra, dec, np.full(x.size, flux))


def measure(image: np.ndarray, x0: float, y0: float, half: int) -> tuple[float, float, float]:
    """Flux and first-moment centroid in a box of half-size ``half`` around ``(x0, y0)``.

    ``image`` is a rectified image indexed ``[y, x]`` with its first column at
    ``x = 0`` (subtract ``x_start`` first).
    """
    xi, yi = round(x0), round(y0)
    box = image[yi - half : yi + half + 1, xi - half : xi + half + 1]
    yy, xx = np.mgrid[yi - half : yi + half + 1, xi - half : xi + half + 1]
    total = box.sum()
    return total, (box * xx).sum() / total, (box * yy).sum() / total
