"""Background, matched-filter significance and segmentation of a rectified stretch.

* Background: first the sky's trend along the scan (the sky changes with
  time, i.e. with column ``x``): sigma-clipped column medians smoothed by a
  local quadratic fit over ``2 background_box + 1`` columns
  (Savitzky-Golay, which stays unbiased on a ramp up to the stretch's
  edges); then photutils :class:`~photutils.background.Background2D`'s mesh
  of ``background_box`` pixels with sigma clipping on what is left, no-data
  pixels masked (computed in :mod:`pipeline.stages.detect._mesh`: the same
  values).  Background2D alone flattens a ramp over the outer
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
  :func:`~photutils.segmentation.deblend_sources` on the significance map,
  done with fewer calls (:func:`segment_map`, :func:`deblend_segments`:
  the same results).  Pixels without data belong to no segment, except
  those of a narrow gap across the scan (:func:`narrow_gaps`: a bad
  column's few rows), where the significance is still the matched filter's
  from the pixels around: a star the gap passes through or beside is one
  segment, not one on each side.
"""

from __future__ import annotations

import functools
import warnings
from dataclasses import dataclass
from itertools import pairwise
from typing import TYPE_CHECKING

import numpy as np

from pipeline.stages._signal import savgol_filter
from pipeline.stages.detect._mesh import clipped_medians

if TYPE_CHECKING:
    from pipeline.stages.detect._model import KernelGrid, SeeingProfile

__all__ = [
    "BackgroundModel",
    "Segmentation",
    "background_model",
    "band_templates",
    "column_trend",
    "estimate_background",
    "filter_scale",
    "find_sources",
    "inverse_variance",
    "narrow_gaps",
    "segment_moments",
    "segment_pixels",
    "significance_map",
    "template",
]


def estimate_background(image: np.ndarray, no_data: np.ndarray, box: int) -> np.ndarray:
    """Smooth background, e- per pixel, shape of ``image``, single precision.

    ``background_model(image, no_data, box).plane()`` (see
    :func:`background_model`).

    Parameters
    ----------
    image : ndarray, shape (ny, nx)
        Electrons; NaN where there is no data.
    no_data : ndarray of bool, shape (ny, nx)
        Pixels to leave out.
    box : int
        Mesh size, pixels (clipped to the image size).

    Notes
    -----
    The mesh statistics use every other row of a tall image and run in
    single precision (a sky of 1e5 e- is then
    resolved to 0.01 e-, far below its noise); they are photutils'
    ``Background2D`` mesh (:func:`~pipeline.stages.detect._mesh.background_mesh`:
    the same values, 7 ms of CPU instead of 102 ms on the benchmark night's
    stretch 5, least of 5) and the mesh is expanded with
    the same cubic spline as photutils' default, applied as one matrix per
    axis (:func:`_expand_mesh`): 4 times faster on a 4096 x 4096 stretch
    than the two-dimensional zoom, and equal to it to rounding.
    """
    return background_model(image, no_data, box).plane()


@dataclass(frozen=True)
class BackgroundModel:
    """The background of a stretch as its mesh and column trend (a few kB).

    :meth:`plane` expands it to the stretch (a float32 plane, 4 bytes per
    pixel): a caller that needs the plane twice, far apart, may drop it in
    between and expand it again (the same values, 19 ms of CPU on the
    benchmark night's stretch 5 of 4109 x 1090 pixels, least of 7).

    Attributes
    ----------
    mesh : ndarray of float64
        The background mesh (:func:`~pipeline.stages.detect._mesh.background_mesh`).
    box_size : (int, int)
        Its boxes' rows and columns in the stretch.
    shape : (int, int)
        The stretch's shape.
    trend : ndarray of float64, shape (nx,)
        The sky's trend along the scan (:func:`column_trend`), e- per pixel.
    """

    mesh: np.ndarray
    box_size: tuple[int, int]
    shape: tuple[int, int]
    trend: np.ndarray

    def plane(self) -> np.ndarray:
        """The background at each pixel, e-, float32, shape :attr:`shape` (a new array)."""
        return _expand_mesh(self.mesh, self.box_size, self.shape, self.trend)


def background_model(image: np.ndarray, no_data: np.ndarray, box: int) -> BackgroundModel:
    """The background of :func:`estimate_background`, not yet expanded to the stretch.

    Parameters and statistics are :func:`estimate_background`'s; the image
    may be float32 or float64 (the same values from the same data).
    """
    from pipeline.stages.detect._mesh import background_mesh

    ny, nx = image.shape
    trend = column_trend(image, no_data, box)
    box_size = (min(box, ny), min(box, nx))
    # Every other row of a tall image: a box's median from 2048 instead of
    # 4096 pixels has a noise of 2.8 % of a pixel's instead of 2 %, and the
    # mesh costs half as much; the mesh (and its boxes) is the same.
    stride = 2 if box_size[0] % 2 == 0 and ny >= 4 * box_size[0] else 1
    mesh = background_mesh(
        _less_trend(image[::stride], trend),  # no-data pixels are masked
        no_data[::stride],
        (box_size[0] // stride, box_size[1]),
        sigma=3.0,
        maxiters=5,
        exclude_percentile=50.0,
    )
    return BackgroundModel(np.asarray(mesh, dtype=float), box_size, image.shape, trend)


def _less_trend(rows: np.ndarray, trend: np.ndarray) -> np.ndarray:
    """``(rows - trend).astype(np.float32)``: the difference in double precision, rounded once.

    numpy subtracts into the float32 result a buffer of rows at a time
    (``dtype=float64``: each value converted to double, subtracted, then
    rounded to single), the same values without the float64 plane of the
    difference: 1.1 ms of CPU instead of 2.1 ms for every other row of a
    4109 x 1090 stretch (least of 5).
    """
    return np.subtract(rows, trend, out=np.empty(rows.shape, np.float32), dtype=np.float64)


def _expand_mesh(
    mesh: np.ndarray,
    box_size: tuple[int, int],
    shape: tuple[int, int],
    trend: np.ndarray | None = None,
) -> np.ndarray:
    """Cubic-spline expansion of a background mesh to the image, as photutils does it.

    ``scipy.ndimage.zoom`` (order 3, mode 'reflect', grid mode) is linear and
    separable, so it is the matrix product ``Wy @ mesh @ Wx.T`` with each
    axis' matrix the zoom of the unit vectors; cropped to ``shape`` and
    clipped to the mesh's range like photutils' interpolator.  The zoom's
    weights sum to one, so expanding the mesh minus its median and adding
    the median back is the same.  The column ``trend`` (shape ``(nx,)``),
    if given, is added.  The result is single precision (float32): a sky of 1e5 e- to
    0.01 e-, far below its noise; clipping and adding the trend in place
    there saves three float64 passes over the image (with the trend added,
    0.07 s of CPU instead of 0.13 s on a 4096 x 4096 stretch, least of 5).
    """
    level = float(np.median(mesh))  # expand the deviations: no cancellation on a high sky
    trend = np.zeros(shape[1]) if trend is None else trend
    if np.ptp(mesh) == 0:
        return np.broadcast_to((trend + level).astype(np.float32), shape).copy()

    wy = _zoom_weights(mesh.shape[0], box_size[0], shape[0])
    wx = _zoom_weights(mesh.shape[1], box_size[1], shape[1])
    out = (wy @ (mesh - level).astype(np.float32)) @ wx.T
    # Clipped to the bounds rounded to single precision: rounding is monotonic,
    # so it commutes with the clip, and each value is the same as clipped to
    # the double-precision bounds and rounded back, without numpy's
    # conversion of every pixel to double and back (1.1 ms of CPU instead of
    # 3.4 ms on a 4109 x 1090 plane, least of 5).
    np.clip(out, np.float32(mesh.min() - level), np.float32(mesh.max() - level), out=out)
    out += (trend + level).astype(np.float32)
    return out


@functools.lru_cache(maxsize=4)
def _zoom_weights(n: int, factor: int, size: int) -> np.ndarray:
    """The matrix of a mesh axis' cubic-spline zoom (:func:`_expand_mesh`), float32, read-only.

    ``scipy.ndimage.zoom`` of the ``n`` unit vectors by ``factor`` (order 3,
    mode 'reflect', grid mode), its first ``size`` rows, in single precision
    (a 1e5 e- sky to 0.01 e-, the product twice as fast).  Kept for the
    next calls (the stretches of a night share their shapes): the zoom of
    the identity took 5.7 ms of CPU per axis and call on the benchmark
    night's stretches, four calls per unit; the matrices are ~1 MB.
    """
    from scipy.ndimage import zoom

    out = zoom(np.eye(n), (factor, 1), order=3, mode="reflect", grid_mode=True)[:size]
    out = out.astype(np.float32)
    out.flags.writeable = False
    return out


def column_trend(image: np.ndarray, no_data: np.ndarray, box: int) -> np.ndarray:
    """Smooth sky level as a function of column ``x``, e- per pixel, shape ``(nx,)``.

    Sigma-clipped median of each column (stars and no-data pixels left out),
    smoothed with a quadratic fitted over ``2 box + 1`` columns; columns
    without data take the interpolated neighbouring values.  Returns zeros
    when fewer than 3 columns have data.  Tall images use every n-th row (at
    least 512 rows).
    """
    ny, nx = image.shape
    # Every ``stride``-th row, at least 512 of them: the median of 512 rows has
    # a noise of 1.25 / sqrt(512) = 6 % of a pixel's, and the quadratic
    # smoothing over 2 box + 1 columns divides it by several more.
    rows = slice(None, None, max(1, ny // 512))
    # astropy's sigma_clipped_stats median of each column (all-masked ones
    # NaN, interpolated below), with the columns as rows: 4 ms of CPU instead
    # of 22 ms on the benchmark night's stretch 5 (least of 5).
    level = clipped_medians(
        np.where(no_data[rows], np.nan, image[rows]).T.astype(np.float32), sigma=3.0, maxiters=5
    )[0]
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
        level[a:b] = savgol_filter(level[a:b], window, 2)  # mode 'interp'
        level[:a], level[b:] = level[a], level[b - 1]
    return level


def template(
    profile: SeeingProfile, dx: np.ndarray, dy: np.ndarray
) -> tuple[np.ndarray, tuple[int, int]]:
    """Unit-flux point-source image centred on its first moment.

    Returns the image (odd sizes) and its centre pixel ``(cy, cx)``.
    """
    from pipeline.stages.detect._model import model_image

    hx = int(np.ceil(2.0 * profile.fwhm + np.max(np.abs(dx))))
    hy = int(np.ceil(2.0 * profile.fwhm + np.max(np.abs(dy))))
    img = model_image((2 * hy + 1, 2 * hx + 1), hx, hy, dx, dy, profile)
    return img, (hy, hx)


def band_templates(kernels, profile, x_centre: float, ny: int, band: int) -> list:
    """Matched-filter templates per band of ``band`` rows of ``ny``.

    Returns a list of ``(lo, hi, flipped template, half height)``, rows
    ``[lo, hi)``, float32 templates (see :func:`template`).
    """
    out = []
    for lo in range(0, ny, band):
        hi = min(lo + band, ny)
        k, (hy, _) = template(profile, *kernels(x_centre, 0.5 * (lo + hi - 1)))
        # correlation with the template = convolution with it flipped
        out.append((lo, hi, k[::-1, ::-1].astype(np.float32), hy))
    return out


#: Most bands of rows :func:`_filter_bands` transforms in one batch (each a
#: complex block of ``band + 2 margin`` rows of the rows' spectrum along
#: ``x``: 16 bands of a 4109 x 1090 stretch hold 3.5 MB), and at most an
#: eighth of the plane's rows: a batch's arrays (~0.9 MB per band of 32 rows
#: of 1090 pixels) then hold less than half a float64 plane of the stretch,
#: which the stage's peak memory counts.
BANDS_PER_CALL = 16


def _filter_bands(
    plane: np.ndarray | None,
    templates,
    square: bool,
    *,
    weights: np.ndarray | None = None,
    variance: np.ndarray | None = None,
    scale: np.ndarray | None = None,
) -> np.ndarray:
    """Correlate ``plane`` with each band's template (or its square), float32.

    With ``weights``, ``plane x weights`` is filtered (single precision, 0
    where not finite); with ``variance`` instead, the weights are its
    :func:`inverse_variance`, made a batch of rows at a time (no plane of
    them is held: 4 bytes per pixel of the stretch fewer while the searches
    run, the same values); ``plane`` None filters those weights themselves.
    With ``scale``, the result is multiplied by it.
    All are applied a batch of rows at a time, while the rows are in the
    processor's cache: a plane of the stretch fewer to make and pass over
    (the same values; the time the same within its noise).

    The 'same'-size convolution of each band of rows (and its margins of
    half a template, zero beyond the plane) with the band's flipped
    template, as ``oaconvolve(plane[band and margins], k, 'same')`` makes
    it, by FFT in single precision, a batch of adjoining bands at a time
    (:data:`BANDS_PER_CALL`): their rows (and margins) are transformed along ``x`` once
    (padded with zeros to at least half a template, so that the circular
    convolution wraps onto zeros), then each band's rows with its margins
    along ``y`` (a length holding them: no wrap either); multiplied by the
    templates' transforms at the same lengths, transformed back along
    ``y`` (the band's own rows kept) and along ``x``.  A batch's arrays
    (a few MB) stay in the processor's cache, where whole-plane ones
    (18 MB each) made the filtering's time vary twofold with the memory
    traffic of other processes.  The same values to single-precision
    rounding (~1e-7 of a row's largest); on the benchmark night's stretch 5
    (4109 x 1090 pixels, 129 bands) a filtering takes 31 ms of CPU inside
    the stage instead of 55 ms for ``oaconvolve`` per band (least of 3),
    which transforms each band's rows and margins along ``x`` again and
    pads, slices and adds its blocks in Python.
    """
    from scipy.fft import fft, ifft, irfft, next_fast_len, rfft

    from pipeline.stages.detect._find_jit import weighted_rows

    ny, nx = (plane if plane is not None else variance).shape
    margin = max(hy for _, _, _, hy in templates)
    rows = max(hi - lo for lo, hi, _, _ in templates) + 2 * margin
    ly = next_fast_len(rows, False)
    per_call = max(1, min(BANDS_PER_CALL, ny // (8 * (rows - 2 * margin))))
    lx = next_fast_len(nx + max(k.shape[1] // 2 for _, _, k, _ in templates), True)
    if plane is not None and weights is None and variance is None:
        plane = np.asarray(plane, np.float32)
    out = np.empty((ny, nx), np.float32)
    for first in range(0, len(templates), per_call):
        group = templates[first : first + per_call]
        top, bottom = group[0][0], group[-1][1]  # the group's rows (its bands adjoin)
        a, b = max(top - margin, 0), min(bottom + margin, ny)
        inverse = weights[a:b] if weights is not None else None
        if plane is not None and inverse is None and variance is not None:
            # the inverse variance and the product in one compiled pass (the
            # same values): 2.5 ms of CPU instead of 10 ms for the 4109 x
            # 1090 pixels of the benchmark night's stretch 5
            rows = weighted_rows(
                np.ascontiguousarray(plane[a:b]),
                np.ascontiguousarray(variance[a:b]),
                np.empty((b - a, nx), np.float32),
            )
        elif plane is None:
            rows = inverse if inverse is not None else inverse_variance(variance[a:b])
        elif inverse is not None:
            # in double precision, rounded once to single (as numpy's
            # ``multiply(plane, weights, out=<float32>)``)
            rows = plane[a:b]
            rows = np.multiply(rows, inverse, out=np.empty(rows.shape, np.float32))
            rows[~np.isfinite(rows)] = 0.0
        else:
            rows = plane[a:b]
        spectrum = rfft(rows, n=lx, axis=1)  # complex64
        block = np.zeros((len(group), ly, spectrum.shape[1]), spectrum.dtype)
        for j, (lo, hi, _, _) in enumerate(group):
            start, stop = max(lo - margin, 0), min(hi + margin, ny)
            block[j, start - (lo - margin) : stop - (lo - margin)] = spectrum[start - a : stop - a]
        kernels = [k * k if square else k for _, _, k, _ in group]
        block = fft(block, axis=1, overwrite_x=True)
        block *= _template_spectra(kernels, margin, ly, lx)
        block = ifft(block, axis=1, overwrite_x=True)
        for j, (lo, hi, _, _) in enumerate(group):
            spectrum[lo - a : hi - a] = block[j, margin : margin + hi - lo]
        # complex64 in, float32 out
        out[top:bottom] = irfft(spectrum[top - a : bottom - a], n=lx, axis=1)[:, :nx]
        if scale is not None:
            out[top:bottom] *= scale[top:bottom]
    return out


def _template_spectra(kernels: list, margin: int, ly: int, lx: int) -> np.ndarray:
    """Transforms of odd-sized kernels (float32) centred on pixel (0, 0): (n, ly, lx // 2 + 1).

    Each kernel's centre goes to the corner and its other pixels wrap around
    the ``ly x lx`` plane (its transform is then that of a 'same'-size
    convolution); rows at offsets up to ``margin``.  Transformed along ``x``
    on its own rows only, then along ``y``.
    """
    from scipy.fft import fft, rfft

    rows = np.zeros((len(kernels), 2 * margin + 1, lx), np.float32)  # offsets -margin..margin
    for j, k in enumerate(kernels):
        ky, kx = k.shape[0] // 2, k.shape[1] // 2
        top = margin - ky
        rows[j, top : top + k.shape[0], : k.shape[1] - kx] = k[:, kx:]
        rows[j, top : top + k.shape[0], lx - kx :] = k[:, :kx]
    along_x = rfft(rows, axis=2)
    out = np.zeros((len(kernels), ly, along_x.shape[2]), along_x.dtype)
    out[:, : margin + 1] = along_x[:, margin:]
    out[:, ly - margin :] = along_x[:, :margin]
    return fft(out, axis=1, overwrite_x=True)


def inverse_variance(variance: np.ndarray) -> np.ndarray:
    """``1 / V`` in single precision, 0 where ``V`` is NaN or <= 0 (no data)."""
    var32 = np.asarray(variance, dtype=np.float32)
    with np.errstate(divide="ignore", invalid="ignore"):
        inv = np.float32(1.0) / var32
    inv[~(var32 > 0)] = 0.0  # NaN > 0 is False: no data gives 0
    return inv


def filter_scale(
    variance: np.ndarray,
    kernels: KernelGrid,
    profile: SeeingProfile,
    *,
    x_centre: float,
    band: int = 256,
    noise_correlation: float = 1.0,
    inverse: np.ndarray | None = None,
    templates: list | None = None,
) -> np.ndarray:
    """``1 / sqrt(noise_correlation sum(k^2 / V))`` at each pixel, float32, shape of ``variance``.

    The matched filter's correlation with the data times this plane is its
    signal-to-noise.  It depends only on the variance plane and the
    template, so it is made once per stretch and profile and a second search
    (the image minus the fitted models) reuses it: the square root and the
    division are then one multiplication per search.  0 where no pixel with
    data contributes.  See :func:`significance_map` for the parameters.
    """
    if templates is None:
        templates = band_templates(kernels, profile, x_centre, variance.shape[0], band)
    # the inverse variance given, or made a batch of rows at a time
    scale = _filter_bands(
        inverse, templates, square=True, variance=variance if inverse is None else None
    )
    return _inverse_root(scale, noise_correlation)


def _inverse_root(sums: np.ndarray, noise_correlation: float) -> np.ndarray:
    """``1 / sqrt(noise_correlation sums)`` in place (float32), 0 where ``sums`` is not valid.

    Rounding leaves tiny values (and negatives) where no pixel has data:
    valid are the sums above ``1e-12`` of the largest.  The square root and
    the division are taken of every pixel and the invalid ones (NaN or inf
    there) set to 0 after: each valid pixel's value is the same as with
    ``where=valid`` in both, whose masked loops took 2.8 ms of CPU more on
    the benchmark night's stretch 5 (4109 x 1090 pixels; 3.8 ms instead of
    6.6 ms, least of 3).  Returns ``sums``.
    """
    valid = sums > 1e-12 * float(sums.max())
    sums *= np.float32(noise_correlation)
    with np.errstate(invalid="ignore", divide="ignore"):
        np.sqrt(sums, out=sums)
        np.divide(np.float32(1.0), sums, out=sums)
    np.copyto(sums, np.float32(0.0), where=~valid)
    return sums


def significance_map(
    residual: np.ndarray,
    variance: np.ndarray,
    kernels: KernelGrid,
    profile: SeeingProfile,
    *,
    x_centre: float,
    band: int = 256,
    noise_correlation: float = 1.0,
    scale: np.ndarray | None = None,
    inverse: np.ndarray | None = None,
    templates: list | None = None,
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
    scale : ndarray or None
        :func:`filter_scale` of the same variance, kernels, profile, bands
        and noise correlation, if already computed; None computes it.
    inverse : ndarray of float32 or None
        :func:`inverse_variance` of ``variance``, if already computed; None:
        made from ``variance`` a batch of rows at a time as the plane is
        filtered (no plane of it is held; the same values).
    templates : list or None
        :func:`band_templates` of the same kernels, profile and bands, if
        already computed.

    Returns
    -------
    ndarray of float32, shape (ny, nx)
        Signal-to-noise; 0 where no data contributes.  The filtering runs in
        single precision (relative rounding ~1e-6, far below the noise).
    """
    # The weighted residual d / V as d x (1 / V) in single precision, made
    # from the float64 residual a batch of rows at a time as it is filtered
    # (0 where the residual is NaN: no data, where 1 / V is 0 too), with the
    # inverse variance given or made with it, a batch of rows at a time.
    if templates is None:
        templates = band_templates(kernels, profile, x_centre, residual.shape[0], band)
    if scale is None:
        scale = filter_scale(
            variance,
            kernels,
            profile,
            x_centre=x_centre,
            noise_correlation=noise_correlation,
            inverse=inverse,
            templates=templates,
        )
    return _filter_bands(
        residual,
        templates,
        square=False,
        weights=inverse,
        variance=variance if inverse is None else None,
        scale=scale,
    )


def measured_noise_correlation(snr: np.ndarray, no_data: np.ndarray) -> float:
    """Blank-sky variance of a significance map made with ``noise_correlation=1``.

    The header's ``NOISECOR`` is the factor of a large aperture.  For a
    deconvolved product that is not the factor at the scale of a star: the
    filter that sharpens the smear amplifies the noise at high frequencies
    and anti-correlates it at lags of the smear's length, so a large aperture
    sees less noise than the variance plane sums (``NOISECOR`` < 1) while a
    star-sized template sees about the variance plane's.  The matched
    filter's own output says which: on blank sky its signal-to-noise has
    variance ``k^T C k / k^T diag(C) k`` for the template ``k`` and the
    noise covariance ``C`` (common practice: calibrate a detection image's
    noise on its own blank sky), which also scales the PSF fits' errors,
    whose weights are the same template.

    Parameters
    ----------
    snr : ndarray, shape (ny, nx)
        :func:`significance_map` with ``noise_correlation=1``.
    no_data : ndarray of bool, shape (ny, nx)
        Pixels without data (left out).

    Returns
    -------
    float
        The variance of the 3-sigma-clipped significance (sources clipped),
        or 1 when fewer than 100 pixels have data.
    """
    from astropy.stats import sigma_clipped_stats

    values = snr[~no_data & (snr != 0)]
    if values.size < 100:
        return 1.0
    _, _, std = sigma_clipped_stats(values, sigma=3.0, maxiters=10)
    return float(std) ** 2


#: Rows (across the scan) per band in which a deconvolved product's
#: significance is calibrated on its own blank sky
#: (:func:`measured_noise_correlation_rows`).
NOISE_BAND_ROWS = 64
#: Fewest blank-sky values of a band for its own measurement; a band with
#: fewer takes the whole map's.
NOISE_BAND_MIN_PIXELS = 1000


def measured_noise_correlation_rows(
    snr: np.ndarray, no_data: np.ndarray, band: int = NOISE_BAND_ROWS
) -> np.ndarray:
    """:func:`measured_noise_correlation` per band of rows, at every row.

    A deconvolved product's noise is not alike across the scan: each band of
    rows has its own filter (rectify undoes a smear that grows from the
    chip's centre line to its edges, amplifying the noise near the smear's
    transfer zeros the more, the longer it is), and the resampling's noise
    correlation changes with its sub-pixel phases.  On a 4096-column chip
    at latitude 50 the blank-sky variance of the significance map made with
    ``noise_correlation=1`` went from ~0.5 near the centre line to ~4 a few
    hundred rows from the edges and over 100 in the outermost 64 rows: one
    factor for the whole map put the edges' threshold at a fraction of the
    noise (thousands of spurious, elongated detections) and the centre's
    above it.  Each band's factor is measured on its own blank sky (common
    practice: calibrate a detection image's noise where it is used) and
    interpolated linearly between the bands' centres (constant beyond the
    outer ones).

    Parameters
    ----------
    snr : ndarray, shape (ny, nx)
        :func:`significance_map` with ``noise_correlation=1``.
    no_data : ndarray of bool, shape (ny, nx)
        Pixels without data (left out).
    band : int
        Rows per band.

    Returns
    -------
    ndarray of float, shape (ny,)
        The factor at each row; a band with fewer than
        :data:`NOISE_BAND_MIN_PIXELS` values takes the whole map's
        (:func:`measured_noise_correlation`).
    """
    if band < 1:
        raise ValueError(f"band must be a positive number of rows; got {band}.")
    ny = snr.shape[0]
    starts = np.arange(0, ny, band)
    stops = np.minimum(starts + band, ny)
    factors = np.full(starts.size, np.nan)
    for i, (lo, hi) in enumerate(zip(starts, stops, strict=True)):
        part, empty = snr[lo:hi], no_data[lo:hi]
        if np.count_nonzero(~empty & (part != 0)) >= NOISE_BAND_MIN_PIXELS:
            factors[i] = measured_noise_correlation(part, empty)
    short = np.isnan(factors)
    if short.any():  # the whole map's factor, clipped over every pixel, only when needed
        factors[short] = measured_noise_correlation(snr, no_data)
    return np.interp(np.arange(ny), (starts + stops - 1) / 2.0, factors)


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
    segm : Segmentation or None
        None when nothing is above the threshold.
    parent : dict
        Label -> a key shared by the children of one split segment (minus
        the segment's label before deblending); a source not split maps to
        itself.
    """
    segm = segment_map(snr, no_data, threshold=threshold, min_pixels=min_pixels)
    if segm is None:
        return None, {}
    crowded = _several_peaks(snr, segm)
    if deblend_levels > 0 and crowded.size:
        segm = deblend_segments(
            snr, segm, crowded, min_pixels, levels=deblend_levels, contrast=deblend_contrast
        )
    parent = {int(label): int(label) for label in segm.labels}
    # A split segment's label is that of the segmentation before deblending,
    # which the relabelled segments left whole reuse: negated, it is nobody's.
    for child, par in getattr(segm, "deblended_label_to_parent", {}).items():
        parent[int(child)] = -int(par)
    return segm, parent


@dataclass(frozen=True)
class SegmentMoments:
    """Centroid, shape and peak of each segment (see :func:`segment_moments`).

    Attributes
    ----------
    x, y : ndarray
        First moment of the image over the segment, pixels (NaN where the
        segment holds no positive value).
    fwhm : ndarray
        Circularised FWHM of the Gaussian with the segment's second moments,
        pixels.
    ellipticity : ndarray
        ``1 - b / a`` of that Gaussian.
    orientation : ndarray
        Angle of its major axis from ``+x`` toward ``+y``, degrees in [0, 360).
    peak : ndarray
        Largest value of the search map (``snr``) in the segment.
    """

    x: np.ndarray
    y: np.ndarray
    fwhm: np.ndarray
    ellipticity: np.ndarray
    orientation: np.ndarray
    peak: np.ndarray


def segment_moments(data: np.ndarray, segm, mask: np.ndarray, snr: np.ndarray) -> SegmentMoments:
    """photutils' ``SourceCatalog`` centroids and shapes of the segments, and their peaks.

    The centroid (``x_centroid``, ``y_centroid``), ``fwhm``,
    ``ellipticity`` and ``orientation`` that
    :class:`photutils.segmentation.SourceCatalog` (``data``, ``segm``,
    ``mask=mask``) gives: moments of ``data`` over each segment with masked,
    non-finite and negative pixels counted as 0, each about its box's
    corner as photutils takes them, and the covariance widened by 1/12 px^2
    per axis while its determinant is below 1/144 (a one-pixel-wide
    segment).  SourceCatalog makes a cutout, its masks and two matrix
    products per segment; here the sums for all segments are one
    ``bincount`` each over the segments' pixels: on the benchmark night's
    stretch 5 (1750 segments), 0.023 s of CPU instead of 0.062 s with the
    peaks (least of 3).  Sums in another order: the same to ~1e-13 px.
    ``tests/test_detect.py`` checks the result against photutils'.

    Parameters
    ----------
    data : ndarray, shape (ny, nx)
        Background-subtracted image, e-.
    segm : Segmentation
        The segments (labels increasing, any gaps).
    mask : ndarray of bool, shape (ny, nx)
        Pixels left out.
    snr : ndarray, shape (ny, nx)
        The map the segments were cut from (for their peaks).

    Returns
    -------
    SegmentMoments
        One value per segment, in ``segm.labels`` order.
    """
    from pipeline.stages.detect._find_jit import segment_first_sums, segment_second_sums

    labels = np.asarray(segm.labels)
    n = labels.size
    where = segment_pixels(segm)
    # each pixel's segment, from a table of the labels' positions: the
    # labels' binary search per pixel cost 1.6 ms a call on a crowded stretch
    position = np.zeros(int(labels[-1]) + 1 if n else 1, dtype=np.intp)
    position[labels] = np.arange(n)
    corner_y = np.array([box[0].start for box in segm.slices], dtype=float)
    corner_x = np.array([box[1].start for box in segm.slices], dtype=float)
    # The sums over each segment's pixels (weights: ``data`` as float64, 0
    # where not finite, negative or masked; positions about the box's
    # corner), pixel after pixel as ``np.bincount`` sums them, in two
    # compiled passes: the same values as the array steps (a gather, a cast
    # and a bincount per sum, ``np.maximum.at`` for the peaks: 9 ms of CPU a
    # call on the benchmark night's stretch 5, four calls per unit).
    flat = (np.ascontiguousarray(plane).reshape(-1) for plane in (segm.data, data, mask, snr))
    labels_flat, data_flat, mask_flat, snr_flat = flat
    width = segm.data.shape[1]
    index, m00, mx, my, peak = segment_first_sums(
        where, labels_flat, position, width, corner_x, corner_y, data_flat, mask_flat, snr_flat
    )
    with np.errstate(invalid="ignore", divide="ignore"):
        xc, yc = mx / m00, my / m00
    sums = segment_second_sums(
        where, index, width, corner_x, corner_y, data_flat, mask_flat, xc, yc
    )
    with np.errstate(invalid="ignore", divide="ignore"):
        xx, xy, yy = (total / m00 for total in sums)
    covariance = np.empty((n, 2, 2))
    covariance[:, 0, 0], covariance[:, 0, 1], covariance[:, 1, 0], covariance[:, 1, 1] = (
        xx,
        xy,
        xy,
        yy,
    )
    # photutils' (SourceExtractor's) widening of "infinitely thin" segments
    delta = 1.0 / 12.0
    with np.errstate(invalid="ignore"):
        determinant = np.linalg.det(covariance)
        covariance[determinant < 0] = np.nan
        thin = np.flatnonzero(determinant < delta**2)
        while thin.size:
            covariance[thin, 0, 0] += delta
            covariance[thin, 1, 1] += delta
            thin = thin[np.linalg.det(covariance[thin]) < delta**2]
    eigen = np.full((n, 2), np.nan)
    finite = np.isfinite(covariance).all(axis=(1, 2))
    eigen[finite] = np.linalg.eigvalsh(covariance[finite])[:, ::-1]  # decreasing
    eigen[(eigen < 0).any(axis=1)] = np.nan
    a, b = np.sqrt(eigen[:, 0]), np.sqrt(eigen[:, 1])
    orientation = 0.5 * np.arctan2(
        2.0 * covariance[:, 0, 1], covariance[:, 0, 0] - covariance[:, 1, 1]
    )
    return SegmentMoments(
        x=xc + corner_x,
        y=yc + corner_y,
        fwhm=2.0 * np.sqrt(np.log(2.0) * (a**2 + b**2)),
        ellipticity=1.0 - b / a,
        orientation=np.rad2deg(orientation) % 360,
        peak=peak,
    )


def narrow_gaps(no_data: np.ndarray, max_rows: int) -> np.ndarray:
    """Pixels without data in runs across the scan of at most ``max_rows``, data on both sides.

    A dead or bad CCD column is, after rectify, a few rows of no-data pixels
    along the scan (4 rows for one raw column with the resampling's
    kernels).  The matched filter's significance on them is that of the
    data around (the template reaches over the gap; :func:`significance_map`
    gives missing pixels no weight), but a segmentation that leaves them out
    cuts a star the gap passes through into two segments, and a bright
    star's wing beyond a gap beside it into a segment of its own: each
    became a source, fitted as a second star of the pair (most of them
    FIT_FAILED or EDGE).  The searches segment across these pixels instead;
    wider holes (gaps between blocks, the chip's outside) stay out.

    Parameters
    ----------
    no_data : ndarray of bool, shape (ny, nx)
        Pixels without data; axis 0 is across the scan (a raw column is a
        rectified row).
    max_rows : int
        Longest run of no-data pixels along axis 0 that counts as narrow.

    Returns
    -------
    ndarray of bool, shape (ny, nx)
        The no-data pixels of runs along axis 0 of at most ``max_rows``
        pixels that have a pixel with data just before and just after them
        (a run touching the first or last row is not narrow).
    """
    if max_rows < 1:
        raise ValueError(f"max_rows must be a positive number of rows; got {max_rows}.")
    no_data = np.asarray(no_data, bool)
    out = np.zeros(no_data.shape, bool)
    rows = np.flatnonzero(no_data.any(axis=1))
    if not rows.size:
        return out
    # The runs along axis 0, from the no-data pixels alone (a few per cent of
    # the plane), column by column: ~13 ms for a 4109 x 1024 stretch against
    # ~50 ms for scipy.ndimage.label of the rows holding any.
    lo, hi = int(rows[0]), int(rows[-1]) + 1
    n = hi - lo
    flat = np.flatnonzero(no_data[lo:hi].T)  # column after column
    column, row = np.divmod(flat, n)
    starts = np.ones(flat.size, bool)
    starts[1:] = (np.diff(flat) != 1) | (column[1:] != column[:-1])
    first = np.flatnonzero(starts)
    length = np.diff(np.append(first, flat.size))
    narrow = length <= max_rows
    # runs touching the plane's first or last row have no data beyond them
    if lo == 0:
        narrow &= row[first] > 0
    if hi == no_data.shape[0]:
        narrow &= row[first] + length < n
    keep = np.repeat(narrow, length)
    out[lo + row[keep], column[keep]] = True
    return out


def segment_map(snr: np.ndarray, no_data: np.ndarray, *, threshold: float, min_pixels: int):
    """Segments of ``snr`` above ``threshold``: photutils' ``detect_sources``, faster.

    The same segmentation image as
    :func:`photutils.segmentation.detect_sources` (``snr``, ``threshold``,
    ``min_pixels``, ``mask=no_data``, 8-connected): pixels above the
    threshold and not masked, labelled in raster order as
    ``scipy.ndimage.label`` labels them, segments of fewer than ``min_pixels`` pixels
    removed and the rest numbered 1, 2, ... in the same order, with the same
    labels and bounding-box slices.  photutils visits the whole image three
    more times (the relabelling look-up, ``find_objects`` and a copy of the
    inverted mask) where the segments cover a few per cent of it; here only
    their pixels are visited after the thresholding, the labelling too
    (:func:`~pipeline.stages.detect._find_jit.label_sorted`): on the 4096 x 4096
    benchmark stretch's first significance map, 0.045 s of CPU instead of
    0.094 s (least of 3, interleaved, on a loaded machine: 0.07 s instead of
    0.14 s).  ``tests/test_detect.py`` checks the result against photutils'.

    Parameters
    ----------
    snr : ndarray, shape (ny, nx)
        Significance map (finite).
    no_data : ndarray of bool, shape (ny, nx)
        Pixels that belong to no segment.
    threshold : float
        A pixel belongs to a segment where ``snr > threshold``.
    min_pixels : int
        Smallest segment, pixels.

    Returns
    -------
    Segmentation or None
        None when no segment is left.
    """
    from pipeline.stages.detect._find_jit import label_sorted, segment_bounds

    # The pixels above, less those without data: the same (increasing) flat
    # indices as thresholding and clearing the no-data pixels in a plane,
    # without the boolean-index pass over it (0.85 ms of CPU instead of 1.4
    # ms on a 4109 x 1090 map, least of 3).
    where = np.flatnonzero(snr > threshold)
    where = where[~no_data.reshape(-1)[where]]
    # scipy's labels of the pixels above (int32, numbered in raster order),
    # from the pixels alone (label_sorted): scipy.ndimage.label visited the
    # whole plane, 11 ms of CPU a call on the benchmark night's stretches
    old, n = label_sorted(where, snr.shape[1], True)
    if n == 0:
        return None
    keep = np.bincount(old, minlength=n + 1) >= min_pixels
    keep[0] = False
    n_kept = int(keep.sum())
    if n_kept == 0:
        return None
    renumber = np.zeros(n + 1, old.dtype)
    renumber[keep] = np.arange(1, n_kept + 1, dtype=old.dtype)
    new = renumber[old]
    if n_kept < n:
        inside = new > 0
        where, new = where[inside], new[inside]
    labels = np.zeros(snr.shape, old.dtype)
    labels.reshape(-1)[where] = new
    # the boxes in one compiled pass over the pixels: a division and four
    # ufunc.at took 7 ms of CPU a call on a crowded stretch
    row_lo, row_hi, col_lo, col_hi = segment_bounds(where, new, n_kept, labels.shape)
    slices = [
        (slice(int(a), int(b)), slice(int(c), int(d)))
        for a, b, c, d in zip(row_lo, row_hi, col_lo, col_hi, strict=True)
    ]
    return _segmentation_image(labels, slices, {}, where)


class Segmentation:
    """Labelled segments of a map: what the stage uses of photutils' ``SegmentationImage``.

    The attributes of the same names as photutils' hold the same values for
    the same segments (``tests/test_detect.py`` compares them); photutils'
    class is not used itself because ``photutils.segmentation`` imports
    scipy.signal, scipy.stats and astropy.modeling (0.2 s of CPU per
    process).  Not a general container: the stage's functions make and
    change it (:func:`segment_map`, :func:`deblend_segments`,
    :func:`pipeline.stages.detect._saturated.merge_on_footprints`).

    Parameters
    ----------
    data : ndarray of int, shape (ny, nx)
        Each pixel's segment label, 0 outside segments.
    labels : ndarray of int, shape (n,)
        The segments' labels, increasing.
    slices : list of (slice, slice)
        Each segment's bounding box (rows, columns), in ``labels`` order.
    deblended : dict, optional
        The label a split segment had -> its children's labels (ndarray).
    pixels : ndarray of int, optional
        Flat indices of the segments' pixels, increasing (see
        :func:`segment_pixels`); None: not known.
    """

    def __init__(self, data, labels, slices, deblended=None, pixels=None):
        self.data = data
        self.labels = labels
        self.slices = slices
        self.deblended = {} if deblended is None else deblended
        self.pixels = pixels

    @property
    def n_labels(self) -> int:
        """Number of segments."""
        return len(self.labels)

    @property
    def max_label(self) -> int:
        """Largest label (0 without segments)."""
        return int(np.max(self.labels)) if self.n_labels else 0

    @property
    def deblended_label_to_parent(self) -> dict:
        """Label of each child of a split segment -> the label the segment had."""
        return {child: parent for parent, kids in self.deblended.items() for child in kids}

    @property
    def areas(self) -> np.ndarray:
        """Pixels in each segment, in ``labels`` order."""
        counts = np.bincount(
            self.data.reshape(-1)[segment_pixels(self)], minlength=self.max_label + 1
        )
        return counts[self.labels]


def _segmentation_image(data: np.ndarray, slices: list, deblended: dict, pixels: np.ndarray):
    """A :class:`Segmentation` of consecutive labels 1..n whose slices and pixels are known."""
    return Segmentation(
        data, np.arange(1, len(slices) + 1, dtype=data.dtype), slices, deblended, pixels
    )


def segment_pixels(segm) -> np.ndarray:
    """Flat indices of the pixels of ``segm``'s segments, increasing.

    Known for the segmentations made here (:func:`segment_map`,
    :func:`deblend_segments`): deblending splits segments and merging on
    saturated footprints relabels them, neither changes which pixels belong
    to one, so the list made with the segmentation holds; otherwise one pass
    over the image finds them.  Each pass costs ~15 ms of CPU on a 4096 x
    1035 stretch.
    """
    pixels = getattr(segm, "pixels", None)
    return np.flatnonzero(segm.data) if pixels is None else pixels


def deblend_segments(
    snr: np.ndarray, segm, labels: np.ndarray, min_pixels: int, *, levels: int, contrast: float
):
    """photutils' ``deblend_sources`` of the segments ``labels``, all segments at once.

    The same result as :func:`photutils.segmentation.deblend_sources`
    (``snr``, ``segm``, ``min_pixels``, ``labels=labels``,
    ``n_levels=levels``, ``contrast=contrast``, exponential thresholds,
    8-connected, relabelled): the segments not split keep their order and
    are numbered first, each split segment's children follow in the order
    of ``labels``, and ``deblended_label_to_parent`` maps each child to its
    segment's label in ``segm``.  photutils thresholds, labels and floods
    each segment's box in turn (on a crowded stretch ~100 segments x 32
    levels of a few hundred pixels: mostly call overhead); here every
    segment's box is placed on one plane (:class:`_Shelves`, gathered from
    the segments' pixel list), each level is one labelling of the pixels
    above it (:func:`_level_markers`) and the watershed one flooding of the
    plane (:func:`_watershed_children`): 0.10 s of CPU instead of 0.30 s
    (least of 5) for the 241 segments of the two searches of the benchmark
    night's stretch 5 (4096 columns, ~400 stars per megapixel) with a
    labelling of the whole plane per level and the pixels gathered box by
    box; ~0.06 s now.
    A segment with more than 200 markers (photutils then starts again with
    linear thresholds) is left to photutils.  ``tests/test_detect.py``
    checks the result against photutils'.

    Parameters
    ----------
    snr : ndarray, shape (ny, nx)
        The map ``segm`` was cut from.
    segm : Segmentation
        Consecutive labels 1..n (:func:`segment_map`).
    labels : ndarray of int
        Increasing labels of the segments to deblend.
    min_pixels : int
        Smallest child, pixels.
    levels, contrast : int, float
        photutils' ``n_levels`` and ``contrast``.

    Returns
    -------
    Segmentation
    """
    from pipeline.stages.detect._find_jit import segment_bounds

    data = segm.data
    shelves = _Shelves.of(snr, segm, labels, min_pixels, levels)
    children = {}  # label -> its box's child labels 1..k (0 elsewhere)
    if shelves is not None:
        marker = _level_markers(shelves, min_pixels, levels)
        many = shelves.count_markers(marker) > 200
        for k in np.flatnonzero(many & shelves.exponential):
            label = shelves.labels[k]  # photutils' linear thresholds
            box = segm.slices[label - 1]
            split = _photutils_deblend(
                snr[box], data[box] == label, label, min_pixels, levels, contrast
            )
            marker[shelves.starts[k] : shelves.starts[k + 1]] = 0  # done
            if split is not None:
                children[label] = split
        children.update(_watershed_children(shelves, marker, contrast))
    if not children:
        return segm
    # Numbering as photutils relabels: the segments left whole first, in
    # order, then the children of each split segment.
    children = {label: children[label] for label in sorted(children)}
    whole = np.ones(segm.n_labels + 1, bool)
    whole[0] = False
    whole[list(children)] = False
    renumber = np.zeros(segm.n_labels + 1, data.dtype)
    renumber[whole] = np.arange(1, int(whole.sum()) + 1, dtype=data.dtype)
    where = segment_pixels(segm)
    out = np.zeros(data.shape, data.dtype)  # only the segments' pixels are set: no copy
    out.reshape(-1)[where] = renumber[data.reshape(-1)[where]]
    slices = [box for box, keep in zip(segm.slices, whole[1:], strict=True) if keep]
    first_child = first = len(slices) + 1
    deblended = {}
    for label, split in children.items():
        box = segm.slices[label - 1]
        n_children = int(split.max())
        out[box][split > 0] = split[split > 0] + (first - 1)
        deblended[label] = np.arange(first, first + n_children, dtype=data.dtype)
        first += n_children
    # the children's boxes from their pixels, all at once (a np.nonzero per
    # child took ~5 ms of CPU per unit of the benchmark night)
    new = out.reshape(-1)[where]
    child = new >= first_child
    bounds = segment_bounds(
        where[child], new[child] - (first_child - 1), first - first_child, out.shape
    )
    slices += [
        (slice(a, b), slice(c, d))
        for a, b, c, d in zip(*(bound.tolist() for bound in bounds), strict=True)
    ]
    return _segmentation_image(out, slices, deblended, where)


def _thresholds(values: np.ndarray, levels: int) -> np.ndarray | None:
    """photutils' deblending thresholds of a segment's ``values`` (None: all equal).

    Exponentially spaced between the segment's minimum and maximum (both
    left out), linearly when the minimum is not positive, computed with the
    same operations on the same types as photutils' so that each pixel is
    above the same thresholds.
    """
    low, high = np.nanmin(values), np.nanmax(values)
    if low == high:
        return None
    linear = np.linspace(low, high, levels + 2)
    if low <= 0:
        return linear[1:-1]
    normalized = (linear - low) / (high - low)
    return (low * (high / low) ** normalized)[1:-1]


def _thresholds_of(low: np.ndarray, high: np.ndarray, levels: int) -> np.ndarray:
    """:func:`_thresholds` of many segments, from their minima and maxima (all different).

    Returns
    -------
    ndarray, shape (n, levels)
        Row ``i``: the thresholds of the segment of minimum ``low[i]`` and
        maximum ``high[i]``, the same operations on the same types
        element by element.
    """
    linear = np.linspace(low, high, levels + 2, axis=1)
    out = linear[:, 1:-1].copy()
    positive = low > 0
    if positive.any():
        lo, hi = low[positive, None], high[positive, None]
        normalized = (linear[positive] - lo) / (hi - lo)
        out[positive] = (lo * (hi / lo) ** normalized)[:, 1:-1]
    return out


#: Width of the plane on which :func:`deblend_segments` places the segments'
#: boxes, pixels: shelves of boxes about as wide as a stretch is tall.
SHELF_WIDTH = 1024


@dataclass
class _Shelves:
    """Segments' boxes side by side on one plane, a pixel apart (rows of boxes: shelves).

    Each segment's pixels are listed together, in raster order of its box.

    Attributes
    ----------
    labels : list of int
        The segments' labels.
    boxes : list of (slice, slice)
        Their bounding boxes in the image.
    exponential : ndarray of bool
        Exponential thresholds (a positive minimum), per segment.
    starts : ndarray of int
        Segment ``k``'s pixels are ``starts[k]:starts[k + 1]`` of the lists.
    rows, cols : ndarray of int
        Each pixel's place in its segment's box.
    position : ndarray of int
        Each pixel's flat index on the plane.
    values : ndarray
        Each pixel's value (of the map the segments were cut from).
    rank : ndarray of int
        How many of its segment's thresholds each pixel exceeds.
    shape : (int, int)
        The plane's shape.
    """

    labels: list
    boxes: list
    exponential: np.ndarray
    starts: np.ndarray
    rows: np.ndarray
    cols: np.ndarray
    position: np.ndarray
    values: np.ndarray
    rank: np.ndarray
    shape: tuple

    @classmethod
    def of(cls, snr, segm, labels, min_pixels: int, levels: int) -> _Shelves | None:
        """The segments ``labels`` of ``segm`` that photutils would deblend (None: none).

        photutils leaves whole a segment of fewer than ``2 min_pixels``
        pixels or of one value.
        """
        from pipeline.stages.detect._find_jit import threshold_ranks

        # All the segments' pixels at once, grouped by segment (stable: each
        # in raster order): 5 ms of CPU instead of 26 ms for a loop over 178
        # segments' boxes (the benchmark night's stretch 5, least of 5).
        data = segm.data.reshape(-1)
        chosen = np.zeros(segm.max_label + 1, bool)
        chosen[np.asarray(labels, dtype=int)] = True
        where = segment_pixels(segm)
        where = where[chosen[data[where]]]
        order = np.argsort(data[where], kind="stable")
        where = where[order]
        own = data[where]
        firsts = np.flatnonzero(np.r_[True, own[1:] != own[:-1]])
        counts = np.diff(np.r_[firsts, own.size])
        values = snr.reshape(-1)[where]
        low = np.minimum.reduceat(values, firsts) if own.size else values[:0]
        high = np.maximum.reduceat(values, firsts) if own.size else values[:0]
        keep = (counts >= 2 * min_pixels) & (low != high)
        if not keep.any():
            return None
        segment = np.repeat(np.arange(firsts.size), counts)
        inside = keep[segment]
        where, values = where[inside], values[inside]
        counts, low, high = counts[keep], low[keep], high[keep]
        kept = [int(label) for label in own[firsts[keep]]]
        boxes = [segm.slices[label - 1] for label in kept]
        thresholds = _thresholds_of(low, high, levels)
        segment = np.repeat(np.arange(len(kept)), counts)
        # photutils' ``data > threshold`` at each threshold, counted (compiled:
        # numpy's (pixels x levels) arrays took 4 ms of CPU a call on a crowded stretch)
        ranks = threshold_ranks(values, thresholds, segment)
        pixel_rows, pixel_cols = np.divmod(where, segm.data.shape[1])
        rows = pixel_rows - np.array([b[0].start for b in boxes])[segment]
        cols = pixel_cols - np.array([b[1].start for b in boxes])[segment]
        heights = [b[0].stop - b[0].start for b in boxes]
        widths = [b[1].stop - b[1].start for b in boxes]
        width = max(SHELF_WIDTH, max(widths) + 1)
        origin, x, y, shelf = [], 0, 0, 0
        for h, w in zip(heights, widths, strict=True):
            if x + w > width:
                x, y, shelf = 0, y + shelf + 1, 0
            origin.append((y, x))
            x, shelf = x + w + 1, max(shelf, h)
        starts = np.zeros(len(kept) + 1, np.int64)
        starts[1:] = np.cumsum(counts)
        origin = np.array(origin).reshape(-1, 2)
        position = (origin[segment, 0] + rows) * width + origin[segment, 1] + cols
        return cls(
            kept,
            boxes,
            low > 0,
            starts,
            rows,
            cols,
            position,
            values,
            ranks,
            (y + shelf, width),
        )

    @property
    def segment(self) -> np.ndarray:
        """Each pixel's segment (index in :attr:`labels`)."""
        return np.repeat(np.arange(len(self.labels)), np.diff(self.starts))

    def count_markers(self, marker: np.ndarray) -> np.ndarray:
        """Distinct positive ids of ``marker`` (one per pixel) in each segment."""
        seen = marker > 0
        pairs = np.unique(self.segment[seen] * (int(marker.max()) + 1) + marker[seen])
        return np.bincount(pairs // (int(marker.max()) + 1), minlength=len(self.labels))

    def box_of(self, k: int, ids: np.ndarray) -> np.ndarray:
        """Segment ``k``'s ``ids`` (one per pixel) on its box, 0 elsewhere."""
        box = self.boxes[k]
        out = np.zeros((box[0].stop - box[0].start, box[1].stop - box[1].start), ids.dtype)
        lo, hi = self.starts[k], self.starts[k + 1]
        out[self.rows[lo:hi], self.cols[lo:hi]] = ids
        return out


def _level_markers(shelves: _Shelves, min_pixels: int, levels: int) -> np.ndarray:
    """photutils' watershed markers of each segment, from its thresholds at all levels.

    photutils (``make_markers``) keeps a set of markers per segment: at each
    level, the connected regions above the threshold with at least
    ``min_pixels`` pixels; a marker holding two or more of them is replaced
    by them (the first level with any region gives the first markers; the
    markers never touch).  Here each level is one labelling of the pixels
    above it on the plane of all the segments
    (:func:`~pipeline.stages.detect._find_jit.label_pixels`, compiled:
    ``scipy.ndimage.label`` of the whole plane at every level took 16 of
    the 35 ms of CPU this took on the benchmark night's stretch 5), and the
    markers are an id per pixel; the loop over the levels is compiled too
    (:func:`~pipeline.stages.detect._find_jit.level_markers`: its twenty
    array operations per level took 30 ms of CPU per unit of that stretch,
    compiled 21 ms, most of it the labelling).  The regions' numbering
    differs from ``scipy.ndimage.label``'s, the markers do not: their ids
    are renumbered by their first pixels at the end.

    Returns
    -------
    ndarray of int
        Per pixel of ``shelves``: its marker's id (0: none), the ids of a
        segment's markers increasing in the order of their first pixel, as
        photutils' labelling numbers them, and larger than those of the
        segments before it.  A segment with fewer than two markers stays
        whole.
    """
    from pipeline.stages.detect._find_jit import level_markers

    n_boxes = len(shelves.labels)
    # A segment's markers start as one placeholder id (1..n_boxes), replaced
    # by the first regions found; regions found get ids above.
    marker, next_id = level_markers(
        shelves.rank,
        shelves.position,
        shelves.segment,
        n_boxes,
        shelves.shape[1],
        shelves.shape[0] * shelves.shape[1],
        min_pixels,
        levels,
    )
    marker[marker <= n_boxes] = 0  # placeholders: no region at any level
    # ids in segment order, then in the order of each marker's first pixel
    seen = marker > 0
    ids, first = np.unique(marker[seen], return_index=True)
    number = np.zeros(next_id, np.int64)
    number[ids[np.argsort(first)]] = np.arange(1, ids.size + 1)
    return number[marker]


def _watershed_children(shelves: _Shelves, marker: np.ndarray, contrast: float) -> dict:
    """Each segment's children from its markers, as photutils' ``apply_watershed``.

    The watershed of minus the values from the markers within each segment
    (8-connected; one flooding of the plane, which floods each segment as
    alone: the boxes do not touch and a segment's pixels keep their order);
    while a segment's child holds less than ``contrast`` of the segment's
    sum, its faintest is removed and the segment flooded again from what is
    left.

    Returns
    -------
    dict
        Label -> its children on its box, numbered 1..k in the order of
        their markers (0 elsewhere), for the segments left with two or more.
    """
    from skimage.segmentation import watershed

    segment = shelves.segment
    n_ids = int(marker.max()) + 1
    owner = np.zeros(n_ids, np.int64)
    owner[marker] = segment
    # photutils' sum of each segment (float32, as its values) and of each child
    totals = np.array([np.nansum(shelves.values[a:b]) for a, b in pairwise(shelves.starts)])
    weights = shelves.values.astype(float)
    image = np.zeros(shelves.shape, shelves.values.dtype)
    image.reshape(-1)[shelves.position] = -shelves.values
    seeds = np.zeros(shelves.shape, np.int64)
    mask = np.zeros(shelves.shape, bool)
    structure = np.ones((3, 3), bool)
    flooding = shelves.count_markers(marker) >= 2  # segments still being flooded
    split = np.zeros(len(shelves.labels), bool)
    while flooding.any():
        pixels = flooding[segment]
        mask.reshape(-1)[shelves.position] = pixels
        seeds.reshape(-1)[shelves.position] = np.where(pixels, marker, 0)
        flooded = watershed(image, seeds, mask=mask, connectivity=structure)
        marker = np.where(pixels, flooded.reshape(-1)[shelves.position], marker)
        sums = np.bincount(marker, weights=weights, minlength=n_ids)
        present = np.zeros(n_ids, bool)
        present[marker[pixels]] = True
        present[0] = False
        ids = np.flatnonzero(present)
        fraction = sums[ids] / totals[owner[ids]]
        # per segment, its faintest child (the first id of equally faint ones)
        order = np.lexsort((ids, fraction, owner[ids]))
        segments, first = np.unique(owner[ids][order], return_index=True)
        counts = np.bincount(owner[ids], minlength=flooding.size)[segments]
        faint = fraction[order][first] < contrast
        remove = faint & (counts >= 2)
        flooding[:] = False
        flooding[segments[remove]] = True
        split[segments[(counts >= 2) & ~faint]] = True
        gone = np.zeros(n_ids, bool)
        gone[ids[order][first][remove]] = True
        marker = np.where(gone[marker], 0, marker)
    out = {}
    for k in np.flatnonzero(split):
        own = marker[shelves.starts[k] : shelves.starts[k + 1]]
        ids = np.unique(own[own > 0])  # the flooding leaves no pixel of it at 0
        out[shelves.labels[k]] = shelves.box_of(
            k, np.where(own > 0, np.searchsorted(ids, own) + 1, 0)
        )
    return out


def _photutils_deblend(data, own, label: int, min_pixels: int, levels: int, contrast: float):
    """photutils' ``deblend_sources`` of one segment on its box: its children, or None."""
    from photutils.segmentation import SegmentationImage, deblend_sources

    with warnings.catch_warnings():
        # photutils notes when it falls back from exponential to linear
        # thresholds (too many markers): that is what this segment is here for.
        warnings.filterwarnings("ignore", message="The deblending mode", category=UserWarning)
        split = deblend_sources(
            data,
            SegmentationImage(np.where(own, label, 0)),
            min_pixels,
            labels=[label],
            n_levels=levels,
            contrast=contrast,
            progress_bar=False,
        )
    return split.data if split.n_labels > 1 else None


def _several_peaks(snr: np.ndarray, segm) -> np.ndarray:
    """Labels of the segments with more than one local maximum.

    photutils' deblending splits a segment where it holds separate regions
    above some level; each such region holds a local maximum of the segment
    (a pixel not below any of its 8 neighbours in the segment), so a segment
    with a single one cannot be split and is left out of the (costly)
    deblending: the result is the same.  Different segments never touch
    (they would be one), so pixels outside segments do not count.  Only the
    segments' pixels are visited, in one compiled pass
    (:func:`~pipeline.stages.detect._find_jit.local_maxima`): on the
    benchmark night's stretch 5 (1558 segments of 302,000 pixels) the
    array steps over each of the 8 neighbours in turn took 13 ms of CPU
    (28 ms for a loop over the segments' boxes before them).
    """
    from pipeline.stages.detect._find_jit import local_maxima

    data, values = np.ascontiguousarray(segm.data), np.ascontiguousarray(snr)
    counts = local_maxima(data, values, segment_pixels(segm), segm.max_label)
    return np.flatnonzero(counts > 1)
