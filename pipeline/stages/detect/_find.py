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
from typing import TYPE_CHECKING

import numpy as np
from astropy.stats import SigmaClip, sigma_clipped_stats

if TYPE_CHECKING:
    from pipeline.stages.detect._model import KernelGrid, SeeingProfile

__all__ = [
    "band_templates",
    "column_trend",
    "estimate_background",
    "filter_scale",
    "find_sources",
    "inverse_variance",
    "significance_map",
    "template",
]


def estimate_background(image: np.ndarray, no_data: np.ndarray, box: int) -> np.ndarray:
    """Smooth background, e- per pixel, shape of ``image``, single precision.

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
    resolved to 0.01 e-, far below its noise) and the mesh is expanded with
    the same cubic spline as photutils' default, applied as one matrix per
    axis (:func:`_expand_mesh`): 4 times faster on a 4096 x 4096 stretch
    than the two-dimensional zoom, and equal to it to rounding.
    """
    from photutils.background import Background2D, MedianBackground, StdBackgroundRMS

    ny, nx = image.shape
    trend = column_trend(image, no_data, box)
    box_size = (min(box, ny), min(box, nx))
    # Every other row of a tall image: a box's median from 2048 instead of
    # 4096 pixels has a noise of 2.8 % of a pixel's instead of 2 %, and the
    # mesh costs half as much; the mesh (and its boxes) is the same.
    stride = 2 if box_size[0] % 2 == 0 and ny >= 4 * box_size[0] else 1
    bkg = Background2D(
        np.where(no_data[::stride], 0.0, image[::stride] - trend).astype(np.float32),
        (box_size[0] // stride, box_size[1]),
        mask=no_data[::stride],
        filter_size=(3, 3),
        sigma_clip=SigmaClip(sigma=3.0, maxiters=5),
        bkg_estimator=MedianBackground(),
        bkg_rms_estimator=StdBackgroundRMS(),
        exclude_percentile=50.0,
    )
    return _expand_mesh(np.asarray(bkg.background_mesh, dtype=float), box_size, image.shape, trend)


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

    def weights(n, factor, size):
        from scipy.ndimage import zoom

        return zoom(np.eye(n), (factor, 1), order=3, mode="reflect", grid_mode=True)[:size]

    # Single precision: a 1e5 e- sky to 0.01 e-, the product twice as fast.
    wy = weights(mesh.shape[0], box_size[0], shape[0]).astype(np.float32)
    wx = weights(mesh.shape[1], box_size[1], shape[1]).astype(np.float32)
    out = (wy @ (mesh - level).astype(np.float32)) @ wx.T
    np.clip(out, mesh.min() - level, mesh.max() - level, out=out)
    out += (trend + level).astype(np.float32)
    return out


def column_trend(image: np.ndarray, no_data: np.ndarray, box: int) -> np.ndarray:
    """Smooth sky level as a function of column ``x``, e- per pixel, shape ``(nx,)``.

    Sigma-clipped median of each column (stars and no-data pixels left out),
    smoothed with a quadratic fitted over ``2 box + 1`` columns; columns
    without data take the interpolated neighbouring values.  Returns zeros
    when fewer than 3 columns have data.  Tall images use every n-th row (at
    least 512 rows).
    """
    from scipy.signal import savgol_filter

    ny, nx = image.shape
    # Every ``stride``-th row, at least 512 of them: the median of 512 rows has
    # a noise of 1.25 / sqrt(512) = 6 % of a pixel's, and the quadratic
    # smoothing over 2 box + 1 columns divides it by several more.
    rows = slice(None, None, max(1, ny // 512))
    with warnings.catch_warnings():
        # All-masked columns give NaN; they are interpolated below.
        warnings.simplefilter("ignore", RuntimeWarning)
        # Columns as contiguous rows, and no mask when every pixel has data:
        # the same medians in 0.11 s of CPU instead of 0.18 s (4096 x 4096,
        # least of 5 runs).
        masked = no_data[rows].T
        level = sigma_clipped_stats(
            np.ascontiguousarray(np.where(masked, 0.0, image[rows].T), dtype=np.float32),
            mask=np.ascontiguousarray(masked) if masked.any() else None,
            axis=1,
            sigma=3.0,
            maxiters=5,
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


def _filter_bands(plane: np.ndarray, templates, square: bool) -> np.ndarray:
    """Correlate ``plane`` with each band's template (or its square), float32.

    ``oaconvolve`` per band of rows (with its margins).  Transforming the
    whole plane along ``x`` once and only each band's short column along
    ``y`` (batched, or in groups of 8 bands) gave the same values (to 3e-7)
    but no gain: on the 4096 x 4096 benchmark stretch, CPU per filtering,
    least of 5 interleaved runs, 0.37 s here against 0.61 s (all bands at
    once) and 0.37 s (groups of 8).
    """
    from scipy.signal import oaconvolve

    ny = plane.shape[0]
    out = np.empty(plane.shape, np.float32)
    for lo, hi, k, hy in templates:
        a, b = max(lo - hy, 0), min(hi + hy, ny)
        out[lo:hi] = oaconvolve(plane[a:b], k * k if square else k, mode="same")[lo - a : hi - a]
    return out


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
    inv = inverse_variance(variance) if inverse is None else inverse
    if templates is None:
        templates = band_templates(kernels, profile, x_centre, variance.shape[0], band)
    scale = _filter_bands(inv, templates, square=True)
    # Rounding leaves tiny values (and negatives) where no pixel has data.
    valid = scale > 1e-12 * float(scale.max())
    scale *= np.float32(noise_correlation)
    np.sqrt(scale, out=scale, where=valid)
    np.divide(np.float32(1.0), scale, out=scale, where=valid)
    scale[~valid] = 0.0
    return scale


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
        :func:`inverse_variance` of ``variance``, if already computed.
    templates : list or None
        :func:`band_templates` of the same kernels, profile and bands, if
        already computed.

    Returns
    -------
    ndarray of float32, shape (ny, nx)
        Signal-to-noise; 0 where no data contributes.  The filtering runs in
        single precision (relative rounding ~1e-6, far below the noise).
    """
    # The weighted residual d / V as d x (1 / V) in single precision, one
    # pass from the float64 residual, and the inverse variance made once per
    # stretch: 4 whole-image passes fewer than dividing with a mask (measured
    # 0.027 s instead of 0.040 s of CPU, least of 5, on a 4096 x 4096 stretch).
    inv = inverse_variance(variance) if inverse is None else inverse
    weighted = np.empty(inv.shape, np.float32)
    np.multiply(residual, inv, out=weighted, casting="same_kind")
    weighted[~np.isfinite(weighted)] = 0.0  # NaN residual (no data); inv is 0 there too
    if templates is None:
        templates = band_templates(kernels, profile, x_centre, residual.shape[0], band)
    if scale is None:
        scale = filter_scale(
            variance,
            kernels,
            profile,
            x_centre=x_centre,
            noise_correlation=noise_correlation,
            inverse=inv,
            templates=templates,
        )
    snr = _filter_bands(weighted, templates, square=False)
    snr *= scale
    return snr


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
    values = snr[~no_data & (snr != 0)]
    if values.size < 100:
        return 1.0
    _, _, std = sigma_clipped_stats(values, sigma=3.0, maxiters=10)
    return float(std) ** 2


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


def segment_map(snr: np.ndarray, no_data: np.ndarray, *, threshold: float, min_pixels: int):
    """Segments of ``snr`` above ``threshold``: photutils' ``detect_sources``, faster.

    The same segmentation image as
    :func:`photutils.segmentation.detect_sources` (``snr``, ``threshold``,
    ``min_pixels``, ``mask=no_data``, 8-connected): pixels above the
    threshold and not masked, labelled in raster order by
    ``scipy.ndimage.label``, segments of fewer than ``min_pixels`` pixels
    removed and the rest numbered 1, 2, ... in the same order, with the same
    labels and bounding-box slices.  photutils visits the whole image three
    more times (the relabelling look-up, ``find_objects`` and a copy of the
    inverted mask) where the segments cover a few per cent of it; here only
    their pixels are visited after the labelling: on the 4096 x 4096
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
    photutils.segmentation.SegmentationImage or None
        None when no segment is left.
    """
    from scipy.ndimage import label

    above = snr > threshold
    above[no_data] = False
    labels, n = label(above, structure=np.ones((3, 3), bool))
    if n == 0:
        return None
    flat = labels.reshape(-1)
    where = np.flatnonzero(above)  # a bool plane: faster than the labels
    old = flat[where]
    keep = np.bincount(old, minlength=n + 1) >= min_pixels
    keep[0] = False
    n_kept = int(keep.sum())
    if n_kept == 0:
        return None
    renumber = np.zeros(n + 1, labels.dtype)
    renumber[keep] = np.arange(1, n_kept + 1, dtype=labels.dtype)
    new = renumber[old]
    if n_kept < n:
        flat[where] = new
        inside = new > 0
        where, new = where[inside], new[inside]
    rows, cols = np.divmod(where, labels.shape[1])
    bounds = []
    for values, start in ((rows, labels.shape[0]), (cols, labels.shape[1])):
        lo = np.full(n_kept + 1, start, np.int64)
        hi = np.full(n_kept + 1, -1, np.int64)
        np.minimum.at(lo, new, values)
        np.maximum.at(hi, new, values)
        bounds.append((lo[1:], hi[1:] + 1))
    (row_lo, row_hi), (col_lo, col_hi) = bounds
    slices = [
        (slice(int(a), int(b)), slice(int(c), int(d)))
        for a, b, c, d in zip(row_lo, row_hi, col_lo, col_hi, strict=True)
    ]
    return _segmentation_image(labels, slices, {})


def _segmentation_image(data: np.ndarray, slices: list, deblended: dict):
    """A SegmentationImage of consecutive labels 1..n whose slices are known.

    Built as photutils' own ``detect_sources`` and ``deblend_sources`` build
    theirs, with the labels, their bounding-box ``slices`` and the map of
    ``deblended`` parents (original label -> its children's labels) set: the
    public constructor would find the labels again with a sort of the whole
    image, and the slices with another pass over it.
    """
    from photutils.segmentation import SegmentationImage

    segm = object.__new__(SegmentationImage)
    segm._data = data
    segm.__dict__["labels"] = np.arange(1, len(slices) + 1, dtype=data.dtype)
    segm.__dict__["slices"] = slices
    segm.__dict__["_deblend_label_map"] = deblended
    return segm


def deblend_segments(
    snr: np.ndarray, segm, labels: np.ndarray, min_pixels: int, *, levels: int, contrast: float
):
    """photutils' ``deblend_sources`` of the segments ``labels``, one segment at a time.

    The same result as :func:`photutils.segmentation.deblend_sources`
    (``snr``, ``segm``, ``min_pixels``, ``labels=labels``,
    ``n_levels=levels``, ``contrast=contrast``, exponential thresholds,
    8-connected, relabelled): the segments not split keep their order and
    are numbered first, each split segment's children follow in the order
    of ``labels``, and ``deblended_label_to_parent`` maps each child to its
    segment's label in ``segm``.  photutils deblends each segment in its
    bounding box but relabels, and later finds the labels and slices of, the
    whole image (0.26 s of CPU of its 0.97 s on the 4096 x 4096 benchmark
    stretch); here each segment's box is deblended alone (by photutils) and
    only the segments' pixels are renumbered.  ``tests/test_detect.py``
    checks the result against photutils'.

    Parameters
    ----------
    snr : ndarray, shape (ny, nx)
        The map ``segm`` was cut from.
    segm : photutils.segmentation.SegmentationImage
        Consecutive labels 1..n (:func:`segment_map`).
    labels : ndarray of int
        Increasing labels of the segments to deblend.
    min_pixels : int
        Smallest child, pixels.
    levels, contrast : int, float
        photutils' ``n_levels`` and ``contrast``.

    Returns
    -------
    photutils.segmentation.SegmentationImage
    """
    from photutils.segmentation import SegmentationImage, deblend_sources

    data = segm.data
    children = {}  # label -> its box's child labels 1..k (0 elsewhere)
    for label in np.asarray(labels, dtype=int):
        box = segm.slices[label - 1]
        own = data[box] == label
        with warnings.catch_warnings():
            # photutils notes when it falls back from exponential to linear
            # thresholds for a segment with non-positive values: not a problem.
            warnings.filterwarnings("ignore", message="The deblending mode", category=UserWarning)
            split = deblend_sources(
                snr[box],
                SegmentationImage(np.where(own, label, 0).astype(data.dtype)),
                min_pixels,
                labels=[label],
                n_levels=levels,
                contrast=contrast,
                progress_bar=False,
            )
        if split.n_labels > 1:
            children[int(label)] = split.data
    if not children:
        return segm
    # Numbering as photutils relabels: the segments left whole first, in
    # order, then the children of each split segment.
    whole = np.ones(segm.n_labels + 1, bool)
    whole[0] = False
    whole[list(children)] = False
    renumber = np.zeros(segm.n_labels + 1, data.dtype)
    renumber[whole] = np.arange(1, int(whole.sum()) + 1, dtype=data.dtype)
    out = data.copy()
    flat = out.reshape(-1)
    where = np.flatnonzero(flat)
    flat[where] = renumber[flat[where]]
    slices = [box for box, keep in zip(segm.slices, whole[1:], strict=True) if keep]
    deblended = {}
    for label, split in children.items():
        box = segm.slices[label - 1]
        first = len(slices) + 1
        n_children = int(split.max())
        out[box][split > 0] = split[split > 0] + (first - 1)
        for child in range(1, n_children + 1):
            rows, cols = np.nonzero(split == child)
            slices.append(
                (
                    slice(box[0].start + int(rows.min()), box[0].start + int(rows.max()) + 1),
                    slice(box[1].start + int(cols.min()), box[1].start + int(cols.max()) + 1),
                )
            )
        deblended[label] = np.arange(first, first + n_children, dtype=data.dtype)
    return _segmentation_image(out, slices, deblended)


def _several_peaks(snr: np.ndarray, segm) -> np.ndarray:
    """Labels of the segments with more than one local maximum.

    photutils' deblending splits a segment where it holds separate regions
    above some level; each such region holds a local maximum of the segment
    (a pixel not below any of its 8 neighbours in the segment), so a segment
    with a single one cannot be split and is left out of the (costly)
    deblending: the result is the same.  Different segments never touch
    (they would be one), so pixels outside segments count as -inf.  Only the
    segments' bounding boxes are examined.
    """
    labels = segm.data
    counts = np.zeros(segm.max_label + 1, np.int64)
    for label, box in zip(segm.labels, segm.slices, strict=True):
        rows, cols = box
        lo_r, lo_c = max(rows.start - 1, 0), max(cols.start - 1, 0)
        window = (slice(lo_r, rows.stop + 1), slice(lo_c, cols.stop + 1))
        inside = labels[window] == label
        values = np.pad(np.where(inside, snr[window], -np.inf), 1, constant_values=-np.inf)
        top = np.maximum(np.maximum(values[:-2], values[1:-1]), values[2:])
        local = np.maximum(np.maximum(top[:, :-2], top[:, 1:-1]), top[:, 2:])
        counts[label] = np.count_nonzero(inside & (values[1:-1, 1:-1] >= local))
    return np.flatnonzero(counts > 1)
