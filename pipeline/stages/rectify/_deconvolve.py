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
linear, so flux is kept exactly, the output noise follows in closed form
from the filter and the input noise's covariance and goes into the variance
plane, and the result does not depend on an iteration count; the target Gaussian keeps
the noise gain moderate, because ``G`` need not restore frequencies the seeing
has already removed.

``K(f)`` is evaluated exactly from the kernel's equal-time samples,
``K(f) = mean_k exp(-2 pi i f . d_k)``, not from a pixelised kernel.

The kernel changes across the scan, so the image is processed in bands of
``band`` rows, each with the kernel at its centre; adjacent bands overlap and
are blended with triangular weights that sum to one.

Variance.  The rectified noise is not white: the resampling correlates each
pixel with its neighbours over up to 3 px along each axis (more when the
rectified pixels are finer than the camera's), by an amount set by the
resampling's sub-pixel phases, which differ with latitude, row and column
(:mod:`pipeline.stages.rectify._noise`).  The filtered variance at row ``y``
is ``sum_a sum_l Q(a, l) C(y - a; l)``, with ``Q`` the products of the
filter's impulse-response rows at lag ``l`` (:func:`filter_lag_products`)
and ``C`` that covariance, per block of columns; the variance plane is scaled
by its ratio to ``C(y; 0)``.  The white-noise gain ``mean |G|^2`` used before
ignored the correlation: it matched the blank-sky noise to 1 % at latitude
50 (phases near 0 across the scan there, little correlation) but was 10 %
low at 30, 23 % at 0 (phase 1/2) and 32 % at half the camera's pixel scale.
Now the plane matches it to 0.1-0.4 % in all of these cases.  Blending two
bands' outputs adds their variance ratios, which is exact where adjacent
bands' filters agree (their kernels nearly do).  On the 4096-column chip at
latitude 49 (16 px edge smear) the plane is within 2.7 % of the blank-sky
rms in every 256-row band (the white-noise gain: 5 %), high where the smear
is longest, probably because the very small ``lambda`` there makes adjacent
bands' filters differ more than the blend assumes (not verified).

Costs and limits (measured with ``tests/test_rectify.py``; ellipticity is the
Gaussian-weighted second-moment distortion of noise-free bright stars):

* A linear filter cannot restore the frequencies at which the kernel's
  transfer function vanishes (a top-hat smear of length ``L`` has zeros at
  ``k / L``); ``lambda`` sets how closely it approaches them.  Small chip of
  the tests (5 px edge smear, 3 px FWHM seeing, latitude 50): edge stars
  come within 0.006 of the centre line's ellipticity with the defaults
  (``lambda = 1e-3``, ``s = 1 px``) and an rms noise gain of 0.55 (the
  target Gaussian smooths).  The longer the smear, the lower its first zero
  and the more of the star's power the dip there removes (along the scan
  only), so each band uses ``lambda (4 px / L)^2`` for an along-scan smear
  ``L`` longer than 4 px (:func:`band_regularization`).  A 4096-column chip
  at 0.35 arcsec and latitude 49 (16 px edge smear, 4 px seeing): with the
  defaults edge stars come within 0.011 of the centre line (a fixed
  ``lambda = 1e-3`` left 0.06), peaks within 0.5 % of the centre line's,
  at a header noise gain of 1.45 (blank sky measured 1.39; 1.07 before).
* Small ``lambda`` makes the filter ring far along the scan (the inverse of a
  top-hat is a comb): :func:`deconvolution_margin` gives the columns each
  stretch needs beyond its own (~90 px for the small chip with the defaults,
  ~1480 px for the large one); give the run that much ``overlap_rows`` or
  the stretch edges are degraded (the warning names the rows to set).
  Each stretch uses the kernels at its own middle column, so adjacent
  deconvolved stretches agree to ~1e-3 of a bright star's peak, not
  exactly (the kernel drifts by ~1e-3 px over a stretch).
* The noise changes by the gain reported in the header (``DECNOISE``, rms
  after / before over the pixels with data; measured within 0.3 % in blank
  sky), the variance plane by the variance ratio of each row and block of
  columns, and the noise becomes correlated along the scan; a large
  aperture's noise is unchanged (``G(0) = 1``), so the header's ``NOISECOR``
  rises by ``1 / DECNOISE**2`` (it was carried over unchanged, 3-12 times
  too small).  The mask is OR-dilated by the kernel's
  footprint (an output pixel mixes every input pixel the kernel spans; the
  filter's weak tails beyond it are ignored).
"""

from __future__ import annotations

import numpy as np

from pipeline.stages.rectify._map import StripMap, smear_kernels
from pipeline.stages.rectify._noise import RectifiedNoise

__all__ = [
    "band_regularization",
    "deconvolution_margin",
    "deconvolve_smear",
    "filter_lag_products",
    "wiener_filter",
]

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
    from scipy import fft

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


def _half_grid_weight(n_columns: int) -> np.ndarray:
    """How often each rfft column stands for itself in the full grid (1 or 2)."""
    weight = np.full(n_columns // 2 + 1, 2.0)
    weight[0] = 1.0
    if n_columns % 2 == 0:
        weight[-1] = 1.0
    return weight


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
    from scipy import fft

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
    weight = _half_grid_weight(shape[1])
    gain = float(np.sqrt((power * weight).sum() / (shape[0] * shape[1])))
    return g, gain


def filter_lag_products(g: np.ndarray, shape: tuple[int, int], lags: tuple[int, int]) -> np.ndarray:
    """Products of a filter's impulse-response rows at small lags.

    ``Q(a, l_y, l_x) = sum_x h(x, a) h(x - l_x, a - l_y)`` for the impulse
    response ``h`` on the (periodic) grid, row ``a`` counted from the output
    row.  Filtered noise of covariance ``C(y1; l_y, l_x)`` between ``(x,
    y1)`` and ``(x + l_x, y1 + l_y)`` has variance ``sum_a sum_l Q(a, l)
    C(y - a; l)`` at row ``y``; for white noise of unit variance that is
    ``sum_a Q(a, 0, 0) = mean |G|^2``.

    Parameters
    ----------
    g : ndarray of complex, shape (n_rows, n_columns // 2 + 1)
        Transfer function on an rfft2 grid (as :func:`wiener_filter` returns).
    shape : (int, int)
        ``(n_rows, n_columns)`` of the full grid.
    lags : (int, int)
        Largest ``|l_y|`` and ``|l_x|``, pixels.

    Returns
    -------
    ndarray, shape (n_rows, 2 L_y + 1, 2 L_x + 1)
        ``Q`` at ``[a mod n_rows, L_y + l_y, L_x + l_x]``.
    """
    from scipy import fft

    lag_y, lag_x = lags
    # Rows of h as rfft spectra along x; Parseval over the full x grid from
    # the half grid: the mirrored half adds the conjugate, so interior
    # columns count twice in the real part.
    spectra = fft.ifft(g, axis=0)
    fx = fft.rfftfreq(shape[1])
    weight = _half_grid_weight(shape[1])
    phase = np.exp(2j * np.pi * np.outer(fx, np.arange(-lag_x, lag_x + 1))) * weight[:, None]
    out = np.empty((shape[0], 2 * lag_y + 1, 2 * lag_x + 1))
    # Real arithmetic on contiguous arrays: many times faster than complex
    # products of strided views.
    real, imag = np.ascontiguousarray(spectra.real), np.ascontiguousarray(spectra.imag)
    cos, sin = np.ascontiguousarray(phase.real), np.ascontiguousarray(phase.imag)
    for ly in range(-lag_y, lag_y + 1):
        other_real = np.roll(real, ly, axis=0)  # row a - l_y at index a
        other_imag = np.roll(imag, ly, axis=0)
        cross_real = real * other_real + imag * other_imag
        cross_imag = imag * other_real - real * other_imag
        out[:, lag_y + ly] = (cross_real @ cos - cross_imag @ sin) / shape[1]
    return out


def _variance_ratio(
    g: np.ndarray,
    shape: tuple[int, int],
    covariance: np.ndarray,
    data: tuple[int, int],
    rows: slice,
) -> np.ndarray:
    """Filtered over unfiltered noise variance, per block of columns and row of ``rows``.

    The filter is applied to the image rows ``data = (lo, hi)`` zero-padded
    to the periodic grid ``shape``: output row ``y`` takes input row ``lo +
    (y - lo - a) mod n_rows`` through the response's row ``a``, when that is
    a data row.  With ``Q`` from :func:`filter_lag_products` and the
    covariance ``C`` of the image's noise (:meth:`RectifiedNoise.covariance`
    of all rows, ``(n_blocks, n_y, 2 L_y + 1, 2 L_x + 1)``), restricted to
    pairs of data rows, the ratio is ``sum_a sum_l Q(a, l) C(y - a; l) /
    C(y; 0)``, exact for the block-wise phases of the resampling.  Shape
    ``(n_blocks, rows.stop - rows.start)``.
    """
    lo, hi = data
    lag_y, lag_x = (n // 2 for n in covariance.shape[2:])
    products = filter_lag_products(g, shape, (lag_y, lag_x)).reshape(shape[0], -1)
    # Pairs whose second row lies outside the data rows meet zero padding.
    partner = np.arange(lo, hi)[:, None] + np.arange(-lag_y, lag_y + 1)
    paired = (partner >= lo) & (partner < hi)
    covariance = covariance[:, lo:hi] * paired[None, :, :, None]
    own = covariance[:, rows.start - lo : rows.stop - lo, lag_y, lag_x]
    # Every data row's covariance against every response row, then the pairs
    # (output row, response row a) whose input row holds data.
    per_row = covariance.reshape(covariance.shape[0], hi - lo, -1) @ products.T
    y = np.arange(rows.start, rows.stop)[:, None]
    a = np.arange(shape[0])[None, :]
    source = (y - lo - a) % shape[0]
    inside = source < hi - lo
    terms = per_row[:, np.where(inside, source, 0), np.broadcast_to(a, source.shape)]
    total = np.where(inside, terms, 0.0).sum(axis=-1)
    return total / np.where(own > 0, own, 1.0)


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
    noise: RectifiedNoise | None = None,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, float, float]:
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
    noise : RectifiedNoise or None, optional
        How the image's pixels sample the strip, for the covariance of its
        noise; None: uncorrelated noise.

    Returns
    -------
    image, variance, mask : ndarray
        Deconvolved planes (variance scaled by the filter's variance ratio
        for the image's correlated noise, per row and block of columns; mask
        OR-dilated by the kernel footprint).
    gain : float
        Rms noise after / before, ``sqrt`` of the mean variance ratio.
    noise_correlation : float
        Variance of a large aperture sum of the output divided by the sum of
        its variance plane (the filter keeps the noise power at frequency 0,
        ``G(0) = 1``, and changes the per-pixel variance).
    """
    from scipy import fft

    n_y, n_x = image.shape
    noise = RectifiedNoise.white(n_y, n_x) if noise is None else noise
    covariance = noise.covariance(0, n_y, noise.lags(), dtype=np.float32)
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
    ratio = np.zeros((noise.shifts.shape[0], n_y))
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
        g, _ = wiener_filter(dx, np.asarray(dy), (height, width), lam, sigma)
        spectrum = fft.rfft2(work[lo:hi], s=(height, width))
        restored = fft.irfft2(spectrum * g, s=(height, width))[: hi - lo, :n_x]
        sel = slice(int(rows[0]), int(rows[-1]) + 1)
        out[sel] += weight[sel, None] * restored[sel.start - lo : sel.stop - lo]
        ratio[:, sel] += weight[sel] * _variance_ratio(
            g, (height, width), covariance, (lo, hi), sel
        )
    out_mask = _or_dilate(mask, int(np.ceil(max_dx)) + 1, int(np.ceil(max_dy)) + 1)
    out_image = (out + level).astype(image.dtype)
    widths = np.diff(noise.breaks)
    pixel_ratio = np.repeat(ratio.T, widths, axis=1)
    out_variance = (variance * pixel_ratio).astype(variance.dtype)
    blank = (out_mask & no_data_bits) != 0
    out_image[blank] = np.nan
    out_variance[blank] = np.nan
    # Summaries over the pixels with data: the variance ratio, and the large-
    # aperture factor: the noise power at frequency 0, which the filter keeps
    # (G(0) = 1), over the output's variance.
    good = ~blank if not blank.all() else np.ones_like(blank)
    centre = [n // 2 for n in covariance.shape[2:]]
    zero_frequency, plane = (
        np.repeat(a.T, widths, axis=1)[good]
        for a in (covariance.sum(axis=(2, 3), dtype=float), covariance[:, :, centre[0], centre[1]])
    )
    mean_ratio = float(np.mean(plane * pixel_ratio[good]) / np.mean(plane))
    correlation = float(np.mean(zero_frequency) / np.mean(plane * pixel_ratio[good]))
    return out_image, out_variance, out_mask, float(np.sqrt(mean_ratio)), correlation
