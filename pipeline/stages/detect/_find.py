"""Background, matched-filter significance and segmentation of a rectified stretch.

* Background: first the sky's trend along the scan (the sky changes with
  time, i.e. with column ``x``): sigma-clipped column medians smoothed by a
  local quadratic fit over ``2 background_box + 1`` columns
  (Savitzky-Golay, which stays unbiased on a ramp up to the stretch's
  edges); then photutils :class:`~photutils.background.Background2D` on a
  mesh of ``background_box`` pixels with sigma clipping on what is left,
  no-data pixels masked.  Background2D alone flattens a ramp over the outer
  half mesh: the night sky falling by 4 e- per column left 300 e- (1.3
  sigma per pixel) at a stretch's first column and hundreds of false
  sources along every seam.
* Significance: the filter matched to the local point source (seeing profile
  averaged over the smear kernel, which changes across the chip, so one
  template per band of rows).  With template ``k`` and variance ``V`` the
  optimal flux estimate at each pixel is ``sum(k d / V) / sum(k^2 / V)`` with
  variance ``1 / sum(k^2 / V)``; its signal-to-noise is
  ``sum(k d / V) / sqrt(sum(k^2 / V))``, divided by ``sqrt(noise_correlation)``
  because the resampling correlates neighbouring pixels (Kaiser 2004,
  "matched filter" detection; common practice).  For an isolated star it
  equals the signal-to-noise of the PSF fit, so the threshold is directly a
  S/N.
* Segmentation and deblending: photutils
  :func:`~photutils.segmentation.detect_sources` and
  :func:`~photutils.segmentation.deblend_sources` on the significance map.
"""

from __future__ import annotations

import warnings

import numpy as np
from astropy.stats import SigmaClip, sigma_clipped_stats
from photutils.background import Background2D, MedianBackground, StdBackgroundRMS
from photutils.segmentation import deblend_sources, detect_sources
from photutils.utils.exceptions import NoDetectionsWarning
from scipy.signal import oaconvolve, savgol_filter

from pipeline.stages.detect._model import KernelGrid, SeeingProfile, model_image

__all__ = ["column_trend", "estimate_background", "find_sources", "significance_map", "template"]


def estimate_background(
    image: np.ndarray, no_data: np.ndarray, box: int
) -> tuple[np.ndarray, np.ndarray]:
    """Smooth background and its rms (e- per pixel), shape of ``image``.

    Parameters
    ----------
    image : ndarray, shape (ny, nx)
        Electrons; NaN where there is no data.
    no_data : ndarray of bool, shape (ny, nx)
        Pixels to leave out.
    box : int
        Mesh size, pixels (clipped to the image size).
    """
    ny, nx = image.shape
    trend = column_trend(image, no_data, box)
    box_size = (min(box, ny), min(box, nx))
    bkg = Background2D(
        np.where(no_data, 0.0, image - trend),
        box_size,
        mask=no_data,
        filter_size=(3, 3),
        sigma_clip=SigmaClip(sigma=3.0, maxiters=5),
        bkg_estimator=MedianBackground(),
        bkg_rms_estimator=StdBackgroundRMS(),
        exclude_percentile=50.0,
    )
    return np.asarray(bkg.background) + trend, np.asarray(bkg.background_rms)


def column_trend(image: np.ndarray, no_data: np.ndarray, box: int) -> np.ndarray:
    """Smooth sky level as a function of column ``x``, e- per pixel, shape ``(nx,)``.

    Sigma-clipped median of each column (stars and no-data pixels left out),
    smoothed with a quadratic fitted over ``2 box + 1`` columns; columns
    without data take the interpolated neighbouring values.  Returns zeros
    when fewer than 3 columns have data.
    """
    nx = image.shape[1]
    with warnings.catch_warnings():
        # All-masked columns give NaN; they are interpolated below.
        warnings.simplefilter("ignore", RuntimeWarning)
        level = sigma_clipped_stats(
            np.where(no_data, 0.0, image), mask=no_data, axis=0, sigma=3.0, maxiters=5
        )[1]
    level = np.asarray(level, dtype=float)
    good = np.isfinite(level)
    if good.sum() < 3:
        return np.zeros(nx)
    cols = np.arange(nx)
    level = np.interp(cols, cols[good], level[good])
    # Smooth only between the first and last column with data (the fit's edge
    # handling then sees the real ramp); columns beyond keep the edge value.
    a, b = cols[good][0], cols[good][-1] + 1
    n = b - a
    window = min(2 * box + 1, n if n % 2 else n - 1)
    if window > 2:
        level[a:b] = savgol_filter(level[a:b], window, 2, mode="interp")
        level[:a], level[b:] = level[a], level[b - 1]
    return level


def template(
    profile: SeeingProfile, dx: np.ndarray, dy: np.ndarray
) -> tuple[np.ndarray, tuple[int, int]]:
    """Unit-flux point-source image centred on its first moment.

    Returns the image (odd sizes) and its centre pixel ``(cy, cx)``.
    """
    hx = int(np.ceil(2.0 * profile.fwhm + np.max(np.abs(dx))))
    hy = int(np.ceil(2.0 * profile.fwhm + np.max(np.abs(dy))))
    img = model_image((2 * hy + 1, 2 * hx + 1), hx, hy, dx, dy, profile)
    return img, (hy, hx)


def significance_map(
    residual: np.ndarray,
    variance: np.ndarray,
    kernels: KernelGrid,
    profile: SeeingProfile,
    *,
    x_centre: float,
    band: int = 256,
    noise_correlation: float = 1.0,
) -> np.ndarray:
    """Matched-filter signal-to-noise of a point source at each pixel.

    Parameters
    ----------
    residual : ndarray, shape (ny, nx)
        Background-subtracted image, e-; NaN where there is no data.
    variance : ndarray, shape (ny, nx)
        e^2; NaN or <= 0 where there is no data.
    kernels : KernelGrid
        The stretch's smear kernels.
    profile : SeeingProfile
        Seeing profile.
    x_centre : float
        Night column at which to take the kernels (they barely change along
        a stretch).
    band : int
        Rows per template band (the smear changes across the chip).
    noise_correlation : float
        rectify's ``NOISECOR``.

    Returns
    -------
    ndarray, shape (ny, nx)
        Signal-to-noise; 0 where no data contributes.
    """
    good = np.isfinite(residual) & np.isfinite(variance) & (variance > 0)
    inv = np.where(good, 1.0 / np.where(good, variance, 1.0), 0.0)
    weighted = np.where(good, residual, 0.0) * inv
    ny = residual.shape[0]
    out = np.zeros(residual.shape)
    for lo in range(0, ny, band):
        hi = min(lo + band, ny)
        k, (hy, _) = template(profile, *kernels(x_centre, 0.5 * (lo + hi - 1)))
        k = k[::-1, ::-1]  # correlation with the template = convolution with it flipped
        a, b = max(lo - hy, 0), min(hi + hy, ny)
        num = oaconvolve(weighted[a:b], k, mode="same")
        den = oaconvolve(inv[a:b], k * k, mode="same")
        rows = slice(lo - a, hi - a)
        with np.errstate(invalid="ignore", divide="ignore"):
            snr = num[rows] / np.sqrt(den[rows] * noise_correlation)
        out[lo:hi] = np.where(den[rows] > 1e-12 * den.max(), snr, 0.0)
    return out


def find_sources(
    snr: np.ndarray,
    no_data: np.ndarray,
    *,
    threshold: float,
    min_pixels: int,
    deblend_levels: int,
    deblend_contrast: float,
):
    """Segment the significance map and deblend it.

    Returns
    -------
    segm : photutils SegmentationImage or None
        None when nothing is above the threshold.
    parent : dict
        Label -> parent label for deblended sources (a source not split maps
        to itself).
    """
    with warnings.catch_warnings():
        # An empty result is reported by the caller with its own warning class.
        warnings.simplefilter("ignore", NoDetectionsWarning)
        segm = detect_sources(snr, threshold, min_pixels, mask=no_data)
    if segm is None:
        return None, {}
    if deblend_levels > 0:
        with warnings.catch_warnings():
            # photutils notes when it falls back from exponential to linear
            # thresholds for a segment with non-positive values: not a problem.
            warnings.filterwarnings("ignore", message="The deblending mode", category=UserWarning)
            segm = deblend_sources(
                snr,
                segm,
                min_pixels,
                n_levels=deblend_levels,
                contrast=deblend_contrast,
                progress_bar=False,
            )
    parent = {int(label): int(label) for label in segm.labels}
    for child, par in getattr(segm, "deblended_label_to_parent", {}).items():
        parent[int(child)] = int(par)
    return segm, parent
