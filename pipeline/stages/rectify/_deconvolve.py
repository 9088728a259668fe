"""Optional smear deconvolution of rectified images (private to the rectify stage).

A star in a rectified image is the seeing PSF convolved with its smear
kernel ``K`` (the track relative to its mean, :func:`~pipeline.stages.rectify.smear_kernels`),
which varies across the scan.  The filter used here replaces ``K`` by a small
round Gaussian ``T`` of sigma ``s``:

    G(f) = T(f) conj(K(f)) (1 + lambda) / (|K(f)|^2 + lambda)

a Wiener-type regularised inverse (``lambda`` is the noise-to-signal power
ratio; ``(1 + lambda)`` makes ``G(0) = 1``, so flux is conserved exactly).
Where ``|K|^2 >> lambda`` the output PSF is the seeing convolved with ``T``:
round, whatever the smear.  Why this filter and not Richardson-Lucy: it is
linear, so flux is kept exactly, the noise gain is known in closed form
(``sqrt(mean |G|^2)`` for white noise) and goes into the variance plane, and
the result does not depend on an iteration count; the target Gaussian keeps
the noise gain moderate, because ``G`` need not restore frequencies the seeing
has already removed.

``K(f)`` is evaluated exactly from the kernel's equal-time samples,
``K(f) = mean_k exp(-2 pi i f . d_k)``, not from a pixelised kernel.

The kernel changes across the scan, so the image is processed in bands of
``band`` rows, each with the kernel at its centre; adjacent bands overlap and
are blended with triangular weights that sum to one.

Costs and limits (measured with ``tests/test_rectify.py``; ellipticity is the
Gaussian-weighted second-moment distortion of noise-free bright stars):

* A linear filter cannot restore the frequencies at which the kernel's
  transfer function vanishes (a top-hat smear of length ``L`` has zeros at
  ``k / L``); ``lambda`` sets how closely it approaches them.  Small chip of
  the tests (5 px edge smear, 3 px FWHM seeing, latitude 50): edge stars
  come within 0.006 of the centre line's ellipticity with the defaults
  (``lambda = 1e-3``, ``s = 1 px``) and a white-noise rms gain of 0.57 (the
  target Gaussian smooths).  The longer the smear, the lower its first zero
  and the more of the star's power the dip there removes (along the scan
  only), so each band uses ``lambda (4 px / L)^2`` for an along-scan smear
  ``L`` longer than 4 px (:func:`band_regularization`).  A 4096-column chip
  at 0.35 arcsec and latitude 49 (16 px edge smear, 4 px seeing): with the
  defaults edge stars come within 0.011 of the centre line (a fixed
  ``lambda = 1e-3`` left 0.06), peaks within 0.5 % of the centre line's,
  at a header noise gain of 1.41 (blank sky measured 1.42; 1.07 before).
* Small ``lambda`` makes the filter ring far along the scan (the inverse of a
  top-hat is a comb): :func:`deconvolution_margin` gives the columns each
  stretch needs beyond its own (~90 px for the small chip with the defaults,
  ~1480 px for the large one); give the run that much ``overlap_rows`` or
  the stretch edges are degraded (the warning names the rows to set).
  Each stretch uses the kernels at its own middle column, so adjacent
  deconvolved stretches agree to ~1e-3 of a bright star's peak, not
  exactly (the kernel drifts by ~1e-3 px over a stretch).
* The noise rises by the gain reported in the header (``DECNOISE``, rms after
  / before for white noise; measured within 7 % of the actual ratio in blank
  sky), the variance plane is scaled by its square, and the noise becomes
  correlated along the scan.  The mask is OR-dilated by the kernel's
  footprint (an output pixel mixes every input pixel the kernel spans; the
  filter's weak tails beyond it are ignored).
"""

from __future__ import annotations

import numpy as np
from scipy import fft

from pipeline.stages.rectify._map import StripMap, smear_kernels

__all__ = ["band_regularization", "deconvolution_margin", "deconvolve_smear", "wiener_filter"]

#: Relative level of the filter's response at which its tails are cut.
_TAIL_LEVEL = 1e-3
#: Zero-padding columns beyond the image in the filter's FFT.
_TAIL = 16
#: Along-scan smear length up to which the regularisation is used as given, px.
_REFERENCE_LENGTH = 4.0


def band_regularization(dx: np.ndarray, regularization: float) -> float:
    """The ``lambda`` used for a kernel: smaller for smears longer than 4 px.

    A top-hat of length ``L`` has its first transfer-function zero at
    ``1 / L``; the filter's dip there, of half-width ``~pi sqrt(lambda) / L``,
    removes the star's power near that frequency along the scan only, and the
    longer the smear, the more power the star has there and the rounder it
    must be restored.  ``lambda (4 / L)^2`` for ``L > 4`` px keeps the
    ellipticity left at the edges of a 16-px-smear chip below 0.02 (see the
    module docstring), and leaves shorter smears as they were.

    Parameters
    ----------
    dx : ndarray, shape (n_samples,)
        Along-scan kernel samples, pixels.
    regularization : float
        The configured ``lambda``.

    Returns
    -------
    float
    """
    length = float(np.ptp(dx))
    return regularization * min(1.0, _REFERENCE_LENGTH / max(length, 1e-12)) ** 2


def deconvolution_margin(model, frame, regularization: float, sigma: float) -> int:
    """Columns on each side of a stretch that the deconvolution needs, pixels.

    The filter's response along the scan, for the chip's edge and centre
    kernels, falls below ``_TAIL_LEVEL`` of its peak beyond this distance, so
    data missing beyond it changes the stretch's own columns by less than
    that fraction of the brightest star there.
    """
    x = float(frame.x_ref)
    strip_map = StripMap(model, frame, x - 1, x + 1)
    y = np.array([0.0, (frame.n_y - 1) / 2.0, frame.n_y - 1.0])
    table = smear_kernels(model, frame, strip_map, np.full(y.size, x), y, 64)
    width = 4096
    extent = 0
    for dx, dy in zip(table["dx"], table["dy"], strict=True):
        dx = np.asarray(dx)
        lam = band_regularization(dx, regularization)
        g, _ = wiener_filter(dx, np.asarray(dy), (64, width), lam, sigma)
        response = np.abs(fft.irfft2(g, s=(64, width))).max(axis=0)
        response = np.maximum(response[: width // 2], response[::-1][: width // 2])
        extent = max(extent, int(np.flatnonzero(response > _TAIL_LEVEL * response[0]).max()))
    return extent + 4


def wiener_filter(
    dx: np.ndarray,
    dy: np.ndarray,
    shape: tuple[int, int],
    regularization: float,
    sigma: float,
) -> tuple[np.ndarray, float]:
    """Transfer function of the smear-replacing filter on an rfft2 grid.

    Parameters
    ----------
    dx, dy : ndarray, shape (n_samples,)
        Equal-time kernel samples relative to their mean, pixels (``dx``
        along axis 1, ``dy`` along axis 0).
    shape : (int, int)
        ``(n_rows, n_columns)`` of the (padded) image the filter applies to.
    regularization : float
        ``lambda`` > 0.
    sigma : float
        Sigma of the target Gaussian, pixels (0: a pure regularised inverse).

    Returns
    -------
    g : ndarray of complex, shape (n_rows, n_columns // 2 + 1)
        Filter to multiply ``scipy.fft.rfft2`` of the image with.
    gain : float
        White-noise rms gain ``sqrt(mean |G|^2)`` over the full frequency grid.
    """
    fy = fft.fftfreq(shape[0])
    fx = fft.rfftfreq(shape[1])
    n = dx.size
    ey = np.exp(-2j * np.pi * np.outer(dy, fy))  # (n, ny)
    ex = np.exp(-2j * np.pi * np.outer(dx, fx))  # (n, nx_r)
    k = (ey.T @ ex) / n
    target = np.exp(-2.0 * np.pi**2 * sigma**2 * (fy[:, None] ** 2 + fx[None, :] ** 2))
    g = target * np.conj(k) * (1.0 + regularization) / (np.abs(k) ** 2 + regularization)
    # Power over the full grid from the half grid: interior columns count twice.
    power = np.abs(g) ** 2
    weight = np.full(fx.size, 2.0)
    weight[0] = 1.0
    if shape[1] % 2 == 0:
        weight[-1] = 1.0
    gain = float(np.sqrt((power * weight).sum() / (shape[0] * shape[1])))
    return g, gain


def _or_dilate(mask: np.ndarray, rx: int, ry: int) -> np.ndarray:
    """OR of every mask value within a box of half-sizes (ry, rx)."""
    out = mask.copy()
    for shift in range(1, rx + 1):
        out[:, shift:] |= mask[:, :-shift]
        out[:, :-shift] |= mask[:, shift:]
    rows = out.copy()
    for shift in range(1, ry + 1):
        out[shift:] |= rows[:-shift]
        out[:-shift] |= rows[shift:]
    return out


def deconvolve_smear(
    image: np.ndarray,
    variance: np.ndarray,
    mask: np.ndarray,
    model,
    frame,
    strip_map,
    x_lo: int,
    *,
    regularization: float,
    sigma: float,
    band: int,
    n_samples: int,
    no_data_bits: int,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, float]:
    """Replace the smear kernel of a rectified image by a round Gaussian.

    Parameters
    ----------
    image, variance : ndarray, shape (n_y, n_x)
        Rectified planes (axis 1 along the scan), NaN where no data.
    mask : ndarray of uint16, shape (n_y, n_x)
    model, frame, strip_map
        The night's TDIModel, RectifiedFrame and a StripMap covering the
        columns.
    x_lo : int
        Night column of the first pixel column.
    regularization, sigma : float
        See :func:`wiener_filter`.
    band : int
        Rows per band with one kernel.
    n_samples : int
        Kernel samples.
    no_data_bits : int
        Mask bits whose pixels are NaN.

    Returns
    -------
    image, variance, mask : ndarray
        Deconvolved planes (variance scaled by the local white-noise gain
        squared; mask OR-dilated by the kernel footprint).
    gain : float
        Mean white-noise rms gain over the bands.
    """
    n_y, n_x = image.shape
    centres = np.arange(0, n_y - 1 + band, band, dtype=float)
    x_mid = float(x_lo + (n_x - 1) // 2)
    kernels = smear_kernels(
        model, frame, strip_map, np.full(centres.size, x_mid), centres, n_samples
    )
    max_dx = float(np.abs(kernels["dx"]).max())
    max_dy = float(np.abs(kernels["dy"]).max())
    valid = np.isfinite(image) & ((mask & no_data_bits) == 0)
    level = float(np.median(image[valid])) if valid.any() else 0.0
    work = np.where(valid, image - level, 0.0)
    pad_y = int(np.ceil(max_dy)) + 8
    width = fft.next_fast_len(n_x + int(np.ceil(2 * max_dx)) + _TAIL, real=True)
    out = np.zeros((n_y, n_x))
    noise = np.zeros(n_y)
    gains = []
    y = np.arange(n_y)
    for centre, dx, dy in zip(centres, kernels["dx"], kernels["dy"], strict=True):
        weight = np.clip(1.0 - np.abs(y - centre) / band, 0.0, None)
        rows = np.flatnonzero(weight > 0)
        if rows.size == 0:
            continue
        lo = max(int(rows[0]) - pad_y, 0)
        hi = min(int(rows[-1]) + 1 + pad_y, n_y)
        height = fft.next_fast_len(hi - lo + 2 * pad_y)
        dx = np.asarray(dx)
        lam = band_regularization(dx, regularization)
        g, gain = wiener_filter(dx, np.asarray(dy), (height, width), lam, sigma)
        spectrum = fft.rfft2(work[lo:hi], s=(height, width))
        restored = fft.irfft2(spectrum * g, s=(height, width))[: hi - lo, :n_x]
        sel = slice(int(rows[0]), int(rows[-1]) + 1)
        out[sel] += weight[sel, None] * restored[sel.start - lo : sel.stop - lo]
        noise[sel] += weight[sel] * gain**2
        gains.append(gain)
    out_mask = _or_dilate(mask, int(np.ceil(max_dx)) + 1, int(np.ceil(max_dy)) + 1)
    out_image = (out + level).astype(image.dtype)
    out_variance = (variance * noise[:, None]).astype(variance.dtype)
    blank = (out_mask & no_data_bits) != 0
    out_image[blank] = np.nan
    out_variance[blank] = np.nan
    return out_image, out_variance, out_mask, float(np.sqrt(np.mean(np.square(gains))))
