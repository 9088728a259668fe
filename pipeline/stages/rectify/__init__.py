"""Rectify: resample a calibrated TDI strip onto a grid on which tracks are straight.

Off the equator a star's image in a TDI strip is smeared along the scan and
bowed across it, and its recorded centroid (the time mean of its track) lies
on a curved, non-uniform grid of sky positions.  This stage resamples each
stretch of the calibrated strip onto the night's rectified frame
(:class:`pipeline.geometry.rectified.RectifiedFrame`): image rows are circles
of constant declination of date, columns lines of constant right ascension of
date, with an exact ICRS FITS WCS.

Axes: the input arrays have the scan (time) on axis 0 and the chip's columns
on axis 1.  The rectified arrays have ``y`` (declination, north up) on axis 0
and ``x`` (right ascension along the scan, **east to the right**) on axis 1:
a star's smear runs along its row.

Mapping
    Rectified pixel ``(x, y)`` takes the strip value at ``(r, c)`` =
    :meth:`TDIModel.recorded_centroid` of its ICRS position, so every star's
    recorded centroid lands on the position the WCS gives its catalogue
    coordinates.  The map is exact on a coarse grid of nodes and interpolated
    (:mod:`pipeline.stages.rectify._map`; error ~1e-9 px).
Resampling
    Two 1-D Keys cubic-convolution passes (:mod:`pipeline.stages.rectify._resample`):
    across the scan per strip row, then a sub-pixel shift along the scan per
    rectified row.  Flux is conserved (Jacobian weights), and for the near
    translations involved so are stars' centroids and second moments.  Each
    pass treats the sampling position as constant over blocks of at most 64
    rows or columns on which it changes by less than 0.002 px (error below
    0.001 px); blocks lie on a grid that is global for the night.
Variance and mask
    Variance is propagated as ``sum(w**2 var)``, exact per pixel but ignoring
    the covariance the interpolation creates between neighbouring pixels: the
    variance of an aperture sum is larger than the sum of the variance plane
    by the ``noise_correlation`` factor (header ``NOISECOR``, from that
    covariance, :mod:`pipeline.stages.rectify._noise`).  The mask of a
    rectified pixel is the OR of the masks of every strip pixel with non-zero
    weight, plus :attr:`MaskBit.OUTSIDE` if a tap falls outside the strip;
    pixels with a no-data bit (NONFINITE, GAP, BAD_COLUMN, OUTSIDE) are NaN.
Smear kernels
    The smear kernel (the star's track relative to its centroid, in rectified
    pixels) is recorded on a coarse grid (:func:`smear_kernels`), so that
    detection can model a star as the seeing PSF averaged over the kernel's
    samples; :func:`smear_kernel_at` interpolates it to any position.
Deconvolution (optional)
    A band-wise regularised (Wiener-type) filter that replaces the smear
    kernel with a small round Gaussian (:mod:`pipeline.stages.rectify._deconvolve`).
    Its variance plane is propagated through the filter with the noise's
    covariance, so it predicts the blank-sky noise (0.1-0.4 % at latitudes
    -50 to +50 and at half the pixel scale).

Stretches
    A stretch with core night rows ``[start, stop)`` writes the rectified
    columns ``x`` in ``[ceil(X(start - 1/2)), ceil(X(stop - 1/2)))``, where
    ``X`` is :meth:`RectifiedFrame.column_of_row`: adjacent stretches tile the
    night's grid without gap or overlap.  The overlap rows only feed the
    interpolation (and the deconvolution).

Measured (``tests/test_rectify.py``; 256-column, 1024-row test chip at 6.2
arcsec per pixel, noise-free stars):  star centroids land on their
catalogue positions through the product's WCS to 0.0005 px rms or better at
latitudes 0, +30, +50 and -31; flux is kept to 3e-4; stars of equal
declination share a row to 0.0013 px; the strip position each pixel samples
matches the exact model to < 0.001 px; stretches tile to 1e-9 e-.  Speed
(``benchmarks/bench_rectify.py``, one core, 4096 x 4096 stretch): ~25-35
Mpx/s for the resampling, ~13-20 Mpx/s for the whole stage, in plain NumPy
(no compiled extension needed).  With deconvolution (defaults; slow test on
a 4096-column chip at 0.35 arcsec per pixel and latitude 49, 16 px edge
smear): edge stars' mean ellipticity within 0.011 of the centre line's
(0.42 without), noise gain ``DECNOISE`` 1.45 (blank sky 1.39; the variance
plane within 2.7 % of the blank-sky rms in every 256-row band), 1.6 Mpx/s, and
``run.overlap_rows`` of ~1540 rows needed (the warning names the number).
"""

from __future__ import annotations

import functools
import logging
import warnings
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np
from pydantic import BaseModel, ConfigDict, Field

from pipeline.exceptions import RectifyWarning
from pipeline.geometry.instrument import Camera, Site
from pipeline.geometry.rectified import RectifiedFrame
from pipeline.geometry.tdi import TDIModel
from pipeline.masks import MASK_DTYPE, NO_DATA, MaskBit
from pipeline.products import (
    FLAGS_EXTENSION,
    FLUX_EXTENSION,
    VARIANCE_EXTENSION,
    image_hdulist,
    night_grid_header,
)
from pipeline.stages._line_time import (
    clock_spans,
    night_line_time,
    other_line_time_blocks,
)
from pipeline.stages._observation import observation_for_rows, row_times
from pipeline.stages.base import BLOCK_INDEX, Stage
from pipeline.stages.rectify._deconvolve import deconvolution_margin, deconvolve_smear
from pipeline.stages.rectify._map import StripMap, smear_kernels
from pipeline.stages.rectify._noise import RectifiedNoise
from pipeline.stages.rectify._resample import (
    resample_columns,
    shift_rows,
    transposed,
)

if TYPE_CHECKING:
    from astropy.io import fits
    from astropy.table import Table
    from astropy.wcs import WCS

__all__ = [
    "NO_DATA_BITS",
    "STAGE",
    "RectifiedStretch",
    "RectifyOptions",
    "line_time_problem",
    "night_line_time",
    "night_model",
    "rectify",
    "segment_row_offset",
    "smear_kernel_at",
    "smear_kernels",
    "stretch_columns",
]

log = logging.getLogger(__name__)

#: Mask bits of pixels that carry no usable data (image and variance NaN).
NO_DATA_BITS = NO_DATA
#: Length of the global blocks over which a sampling position is held fixed.
_BLOCK = 64
#: Largest change of a sampling position inside a block, pixels.
_TOLERANCE = 0.002


class RectifyOptions(BaseModel):
    """Options of the rectify stage (``stages.rectify`` in the config).

    Field names mirror the keyword arguments of :func:`rectify`.
    """

    model_config = ConfigDict(extra="forbid", frozen=True)

    pixel_scale: float | None = Field(
        None,
        gt=0,
        description="Rectified pixel size across the scan, arcsec; None: the camera's "
        "on-sky scale. Along the scan a pixel is always one line time.",
    )
    map_step_x: int = Field(256, ge=8, description="Map node spacing along the scan, px.")
    map_step_y: int = Field(16, ge=2, description="Map node spacing across the scan, px.")
    kernel_step: int = Field(
        32, ge=1, description="Spacing of the smear-kernel record across the scan, px."
    )
    kernel_samples: int = Field(64, ge=2, description="Time samples per smear kernel.")
    deconvolve: bool = Field(False, description="Undo the smear (band-wise Wiener filter).")
    deconvolve_regularization: float = Field(
        1e-3,
        gt=0,
        description="Wiener regularisation (noise-to-signal power) for smears up to "
        "4 px; a band whose smear is L > 4 px long uses it times (4/L)^2. Smaller makes "
        "long smears rounder at a higher noise cost and needs more overlap_rows.",
    )
    deconvolve_sigma: float = Field(
        1.0, ge=0, description="Sigma of the round Gaussian that replaces the kernel, px."
    )
    deconvolve_band: int = Field(
        16, ge=4, description="Height of the bands with their own kernel, px."
    )


@dataclass(frozen=True, eq=False)
class RectifiedStretch:
    """A rectified stretch.

    Attributes
    ----------
    image : ndarray, shape (n_y, n_x)
        Electrons per rectified pixel; axis 0 is ``y`` (declination of date,
        north up), axis 1 is ``x`` (right ascension of date along the scan,
        east to the right).  NaN where there is no data.
    variance : ndarray, shape (n_y, n_x)
        e^2.
    mask : ndarray of uint16, shape (n_y, n_x)
        :class:`pipeline.masks.MaskBit` bits.
    x_start : int
        Night column ``x`` of the first pixel column.
    frame : RectifiedFrame
        The night's rectified frame.
    smear_kernels : astropy.table.Table
        See :func:`smear_kernels`.
    noise_correlation : float
        Variance of a large aperture sum divided by the sum of the variance
        plane over it (>= 1; the interpolation correlates neighbours, and the
        deconvolution, which keeps a large aperture's noise and lowers the
        per-pixel variance, raises it by 1 / ``deconvolution_noise_gain**2``).
    deconvolution_noise_gain : float or None
        Rms noise after / before deconvolution, over the pixels with data, of
        the noise as the resampling left it (None if the stretch was not
        deconvolved).
    """

    image: np.ndarray
    variance: np.ndarray
    mask: np.ndarray
    x_start: int
    frame: RectifiedFrame
    smear_kernels: Table
    noise_correlation: float
    deconvolution_noise_gain: float | None = None

    @property
    def wcs(self) -> WCS:
        """ICRS FITS WCS of the arrays (astropy)."""
        return self.frame.wcs(self.x_start, self.image.shape[1])

    def header(self) -> fits.Header:
        """FITS header: the WCS, the night grid (alternate WCS ``A``) and the stage's cards."""
        header = self.frame.wcs_header(self.x_start)
        header.extend(
            night_grid_header(
                self.x_start,
                0,
                ("X", "Y"),
                ("rectified column x (along the scan)", "rectified row y (north up)"),
            )
        )
        header["NOISECOR"] = (
            round(self.noise_correlation, 5),
            "aperture variance / sum of variance plane",
        )
        header["DECONV"] = (self.deconvolution_noise_gain is not None, "smear deconvolved")
        if self.deconvolution_noise_gain is not None:
            header["DECNOISE"] = (
                round(self.deconvolution_noise_gain, 5),
                "rms noise after / before deconvolution",
            )
        return header


# ----------------------------------------------------------------------------
# Night geometry


@functools.lru_cache(maxsize=4)
def _cached_model(
    site: Site, camera: Camera, start_isot: str, duration: float, line_time: float
) -> TDIModel:
    from astropy.time import Time

    start = Time(start_isot, format="isot", scale="utc")
    return TDIModel(site, camera, start, duration, line_time=line_time)


def night_model(site: Site, camera: Camera, block_index: Table, n_rows: int) -> TDIModel:
    """The TDI model of a night from its block index.

    Parameters
    ----------
    site, camera : Site, Camera
        From the config.
    block_index : astropy.table.Table
        The ingest stage's ``block_index`` (``meta['reference_time']`` is the
        time night row 0 was shifted out; column ``line_time``).
    n_rows : int
        Night rows (scan axis).

    Returns
    -------
    TDIModel
        Covering the whole night (cached per process), at the line time of
        the night's most rows (:func:`night_line_time`; blocks at another
        line time are :func:`line_time_problem`'s).

    Raises
    ------
    ValueError
        If the index is empty.
    """
    start = block_index.meta.get("reference_time")
    if start is None or len(block_index) == 0:
        raise ValueError("the block index is empty; ingest found no usable block this night.")
    dt = night_line_time(
        np.asarray(block_index["line_time"], dtype=float),
        np.asarray(block_index["n_rows"], dtype=np.int64),
        clock_spans(block_index),
    )
    return _cached_model(site, camera, str(start), n_rows * dt, dt)


def line_time_problem(block_index: Table, rows: tuple[int, int], line_time: float) -> str | None:
    """Why night rows ``rows`` cannot be rectified at the night's line time, or None.

    A camera that changed its line time mid-night (ingest reports it and
    starts a segment) has rows whose readout times and smear the night's
    one clock does not describe.  The night is reduced at the line time of
    its most rows; a stretch with data from blocks at another one is
    refused, with what to do about it.

    Parameters
    ----------
    block_index : astropy.table.Table
        Ingest's block index (``row_start``, ``n_rows``, ``line_time``,
        ``file``; ``segment``, ``tdi_rows``: :func:`~pipeline.stages._line_time.clock_spans`).
    rows : (int, int)
        Night rows ``[start, stop)`` of the stretch's data.
    line_time : float
        The night's line time (:func:`night_line_time`), s.

    Returns
    -------
    str or None
        The reason (its blocks, their line time and the night's, and how to
        reduce them as a night of their own); None if every block in
        ``rows`` runs at the night's line time.
    """
    start = np.asarray(block_index["row_start"], dtype=np.int64)
    stop = start + np.asarray(block_index["n_rows"], dtype=np.int64)
    inside = (start < rows[1]) & (stop > rows[0])
    line_times = np.asarray(block_index["line_time"], dtype=float)
    elsewhere = other_line_time_blocks(line_times, line_time, clock_spans(block_index))
    other = inside & elsewhere
    if not other.any():
        return None
    files = [str(f) for f in np.asarray(block_index["file"])[other]]
    values = sorted({float(v) for v in line_times[other]})
    night = ~elsewhere
    return (
        f"its rows come from {', '.join(files)} at LINETIME "
        f"{', '.join(f'{v:.9g}' for v in values)} s, not the night's {line_time:.9g} s "
        f"({int(np.sum(stop[night] - start[night]))} of the night's "
        f"{int(np.sum(stop - start))} rows): the camera changed its line time mid-night "
        "(ingest reports where). The rows at the night's line time are reduced; reduce "
        "these blocks as a night of their own, with a config whose night.pattern matches "
        "only their files and another night.name (and one that leaves them out for the "
        "rest, if you want a run without this failure)."
    )


def segment_row_offset(
    block_index: Table, segment: tuple[int, int] | None, line_time: float
) -> float:
    """Rows by which a segment was read later than the night's row clock.

    Ingest places a block after a gap at a whole night row (the gap rounded
    to rows); its DATE-OBS may fall anywhere between.  The first block of
    the segment starting at night row ``segment[0]`` was read at
    ``t_start``, the night's clock says ``row_start * line_time``: the
    difference, in rows (at most half a row).  The rows of a segment join up,
    so its first block's time holds for all of it.

    Parameters
    ----------
    block_index : astropy.table.Table
        Ingest's block index (``row_start``, ``t_start`` in s since night row 0).
    segment : (int, int) or None
        Night rows ``[start, stop)`` of the segment; None: the whole night (0).
    line_time : float
        The night's line time, s.

    Returns
    -------
    float
        Rows; 0 for the night's first segment and when no block starts at
        ``segment[0]``.
    """
    if segment is None or len(block_index) == 0:
        return 0.0
    row_start = np.asarray(block_index["row_start"], dtype=np.int64)
    first = np.flatnonzero(row_start == int(segment[0]))
    if first.size == 0:
        return 0.0
    t_start = float(np.asarray(block_index["t_start"], dtype=float)[first[-1]])
    return t_start / float(line_time) - float(row_start[first[-1]])


def stretch_columns(
    model: TDIModel, frame: RectifiedFrame, core: tuple[int, int]
) -> tuple[int, int]:
    """Night columns ``[x_start, x_stop)`` that rectify writes for core rows ``core``.

    ``x`` in ``[ceil(X(start - 1/2)), ceil(X(stop - 1/2)))`` with ``X`` =
    :meth:`RectifiedFrame.column_of_row`, so adjacent stretches tile the
    night; the astrometry stage uses it to place each stretch's WCS.
    """
    bounds = frame.column_of_row(model, np.array(core, dtype=float) - 0.5)
    x_start, x_stop = (int(v) for v in np.ceil(bounds))
    return x_start, max(x_stop, x_start)


# ----------------------------------------------------------------------------
# Blocks on a global grid


def _global_blocks(lo: int, hi: int, value) -> tuple[list[tuple[int, int, float]], np.ndarray]:
    """Blocks covering ``[lo, hi)`` on which ``value(position)`` is nearly constant.

    Each cell of a global grid of ``_BLOCK`` pixels is cut into ``2**k``
    equal blocks, the fewest for which the change of ``value`` (an array per
    position) across the cell, shared out evenly, stays within
    ``_TOLERANCE`` per block.  ``value`` is held at each block's centre, so
    the largest error is half the tolerance.  The sampling positions vary
    smoothly (slow aberration and geometry drifts), so the change between
    the cell's ends measures the change within it.

    Returns
    -------
    blocks : list of (start, stop, centre)
        ``[start, stop)`` clipped to ``[lo, hi)``; ``centre`` of the whole
        block, so that every stretch uses the same value in the same block.
    values : ndarray, shape (n_blocks, ...)
        ``value(centre)`` of each block.
    """
    blocks: list[tuple[int, int, float]] = []
    values = []
    for cell in range(lo // _BLOCK, -(-hi // _BLOCK)):
        a = cell * _BLOCK
        change = float(np.max(np.abs(value(a + _BLOCK - 1.0) - value(float(a)))))
        parts = 1
        while parts < _BLOCK and change / parts > _TOLERANCE:
            parts *= 2
        length = _BLOCK // parts
        for start in range(a, a + _BLOCK, length):
            if start + length <= lo or start >= hi:
                continue
            centre = start + (length - 1) / 2.0
            blocks.append((max(start, lo), min(start + length, hi), centre))
            values.append(value(centre))
    return blocks, np.array(values)


def smear_kernel_at(kernels: Table, x: float, y: float) -> tuple[np.ndarray, np.ndarray]:
    """The smear kernel at a rectified position, from a recorded kernel table.

    Takes the recorded column nearest to ``x`` (kernels change by ~1e-3 px
    over a stretch along the scan) and interpolates linearly in ``y`` between
    the recorded rows; the samples of two kernels correspond (equal times),
    so interpolating them sample by sample interpolates the track.

    Parameters
    ----------
    kernels : astropy.table.Table
        The ``smear_kernels`` product (see :func:`smear_kernels`).
    x, y : float
        Night rectified pixel position.

    Returns
    -------
    dx, dy : ndarray, shape (n_samples,)
        Offsets of the equal-time samples from the star's centroid, rectified
        pixels.  A star's image is the seeing PSF averaged over
        ``(x + dx, y + dy)``.
    """
    xs = np.asarray(kernels["x"], dtype=float)
    column = xs[np.argmin(np.abs(xs - x))]
    rows = kernels[xs == column]
    rows = rows[np.argsort(np.asarray(rows["y"], dtype=float))]
    ys = np.asarray(rows["y"], dtype=float)
    k = int(np.clip(np.searchsorted(ys, y) - 1, 0, max(len(ys) - 2, 0)))
    if len(ys) == 1:
        return np.asarray(rows["dx"][0]), np.asarray(rows["dy"][0])
    t = float(np.clip((y - ys[k]) / (ys[k + 1] - ys[k]), 0.0, 1.0))
    dx = (1 - t) * np.asarray(rows["dx"][k]) + t * np.asarray(rows["dx"][k + 1])
    dy = (1 - t) * np.asarray(rows["dy"][k]) + t * np.asarray(rows["dy"][k + 1])
    return dx, dy


def _kernel_positions(x_start: int, x_stop: int, n_y: int, step: int) -> tuple[np.ndarray, ...]:
    """Smear-kernel record positions: every ``step`` rows (and the last) at 3 columns."""
    ys = np.unique(np.append(np.arange(0, n_y, step), n_y - 1)).astype(float)
    xs = np.unique(np.array([x_start, 0.5 * (x_start + x_stop - 1), x_stop - 1], dtype=float))
    xg, yg = np.meshgrid(xs, ys)
    return xg.ravel(), yg.ravel()


# ----------------------------------------------------------------------------
# The stage function


def _check_planes(image, variance, mask, n_columns: int) -> tuple[np.ndarray, ...]:
    image = np.asarray(image)
    variance = np.asarray(variance)
    mask = np.asarray(mask)
    if image.ndim != 2 or image.shape[1] != n_columns:
        raise ValueError(
            f"image must have shape (n_rows, {n_columns}) (scan axis first, the camera's "
            f"n_columns across); got {image.shape}."
        )
    if variance.shape != image.shape or mask.shape != image.shape:
        raise ValueError(
            f"variance and mask must have the image's shape {image.shape}; got "
            f"{variance.shape} and {mask.shape}."
        )
    if not np.issubdtype(mask.dtype, np.unsignedinteger):
        raise TypeError(f"mask must be an unsigned integer array; got dtype {mask.dtype}.")
    if not np.issubdtype(image.dtype, np.floating):
        image = image.astype(np.float64)
    return image, variance, mask.astype(MASK_DTYPE, copy=False)


def rectify(
    image: np.ndarray,
    variance: np.ndarray,
    mask: np.ndarray,
    model: TDIModel,
    *,
    row_lo: int = 0,
    core: tuple[int, int] | None = None,
    night_rows: int | None = None,
    data_rows: tuple[int, int] | None = None,
    row_offset: float = 0.0,
    pixel_scale: float | None = None,
    map_step_x: int = 256,
    map_step_y: int = 16,
    kernel_step: int = 32,
    kernel_samples: int = 64,
    deconvolve: bool = False,
    deconvolve_regularization: float = 1e-3,
    deconvolve_sigma: float = 1.0,
    deconvolve_band: int = 16,
) -> RectifiedStretch:
    """Rectify a stretch of a calibrated TDI strip.

    Parameters
    ----------
    image, variance : ndarray, shape (n_rows, n_columns)
        Calibrated electrons and e^2 of night rows ``[row_lo, row_lo +
        n_rows)``; axis 0 is the scan axis (time), axis 1 the chip's columns
        (north growing).  NaN where the mask has a no-data bit.
    mask : ndarray of unsigned int, shape (n_rows, n_columns)
        Calibration mask (:class:`pipeline.masks.MaskBit`).
    model : TDIModel
        Geometry of the night (``model.start`` = time of night row 0).
    row_lo : int, optional
        Night row of the arrays' first row.
    core : (int, int) or None, optional
        Night rows ``[start, stop)`` whose rectified columns to produce;
        default all rows given.  Rows outside the core only feed the
        interpolation.
    night_rows : int or None, optional
        Rows in the night (defines the frame's epoch and reference meridian);
        default ``row_lo + n_rows``.  Give the same value for every stretch.
    data_rows : (int, int) or None, optional
        Night rows ``[lo, hi)`` beyond which there are no data (the stretch's
        segment: a gap or another camera format lies beyond); default the
        whole night.  Pixels that would need rows beyond are flagged OUTSIDE
        without the warning that asks for more ``overlap_rows``.
    row_offset : float, optional
        Rows by which the given rows were read later than the night's row
        clock says (``model``: night row ``r`` read at ``r * line_time``):
        a segment after a gap starts at a whole night row, its first
        block's DATE-OBS at any time (:func:`segment_row_offset`).  The
        rows are resampled to the clock's; default 0.
    pixel_scale : float or None, optional
        Rectified pixel size across the scan, arcsec; None: the camera's
        on-sky scale.
    map_step_x, map_step_y : int, optional
        Spacing of the exact map nodes along and across the scan, px.
    kernel_step : int, optional
        Spacing of the smear-kernel record across the scan, px (kernels are
        recorded at the stretch's first, middle and last column).
    kernel_samples : int, optional
        Time samples per smear kernel.
    deconvolve : bool, optional
        Replace the smear kernel by a small round Gaussian (see
        :mod:`pipeline.stages.rectify._deconvolve`); default off.
    deconvolve_regularization : float, optional
        Wiener regularisation for smears up to 4 px (longer smears L use it
        times ``(4 / L)**2``): larger is smoother and less noisy.
    deconvolve_sigma : float, optional
        Sigma of the target Gaussian, px.
    deconvolve_band : int, optional
        Height of the bands (across the scan) that share one kernel, px.

    Returns
    -------
    RectifiedStretch
    """
    image, variance, mask = _check_planes(image, variance, mask, model.camera.n_columns)
    n_in = image.shape[0]
    row_hi = row_lo + n_in
    core = (row_lo, row_hi) if core is None else (int(core[0]), int(core[1]))
    if not row_lo <= core[0] <= core[1] <= row_hi:
        raise ValueError(f"core rows {core} must lie within the rows given, [{row_lo}, {row_hi}).")
    night_rows = row_hi if night_rows is None else int(night_rows)
    frame = RectifiedFrame.for_night(model, night_rows, pixel_scale=pixel_scale)
    x_start, x_stop = stretch_columns(model, frame, core)

    margin = (
        deconvolution_margin(model, frame, deconvolve_regularization, deconvolve_sigma)
        if deconvolve
        else 0
    )
    x_lo, x_hi = x_start - margin, x_stop + margin
    row_x = frame.column_of_row(model, np.array([row_lo, row_hi], dtype=float))
    pad = 16 + map_step_x // 4
    strip_map = StripMap(
        model,
        frame,
        min(x_lo, row_x[0]) - pad,
        max(x_hi, row_x[1]) + pad,
        step_x=map_step_x,
        step_y=map_step_y,
    )

    # Pass 2 (along the scan): sub-pixel shift per rectified row and block of x.
    blocks_x, shifts = _global_blocks(x_lo, x_hi, strip_map.offsets)
    if row_offset:  # the strip row read at the clock's time r lies at r - row_offset
        shifts = shifts - float(row_offset)
    jac_x = np.array([1.0 + strip_map.offsets_dx(c) for _, _, c in blocks_x])
    breaks_x = np.array([a for a, _, _ in blocks_x] + [x_hi]) - x_lo
    need_lo = int(np.floor(x_lo + shifts.min())) - 3
    need_hi = int(np.ceil(x_hi - 1 + shifts.max())) + 4
    data_lo, data_hi = (0, night_rows) if data_rows is None else data_rows
    if (need_lo < row_lo and row_lo > data_lo) or (need_hi > row_hi and row_hi < data_hi):
        overlap = max(core[0] - need_lo, need_hi - core[1])
        reason = (
            f" (the deconvolution needs {margin} columns beyond the stretch's own)"
            if deconvolve
            else ""
        )
        warnings.warn(
            f"rectify needs night rows [{need_lo}, {need_hi}) for columns [{x_lo}, {x_hi}){reason} "
            f"but was given [{row_lo}, {row_hi}): the pixels beyond are flagged OUTSIDE. "
            f"Set run.overlap_rows to at least {overlap}.",
            RectifyWarning,
            stacklevel=2,
        )
    need_lo, need_hi = max(need_lo, row_lo), min(need_hi, row_hi)
    if need_hi <= need_lo:  # nothing of this stretch is in view: keep one row
        need_lo, need_hi = row_lo, min(row_lo + 1, row_hi)

    # Pass 1 (across the scan): column positions per block of strip rows.
    blocks_r, positions = _global_blocks(need_lo, need_hi, strip_map.columns_for_row)
    jac_y = np.abs(np.gradient(positions, axis=1))
    breaks_r = np.array([a for a, _, _ in blocks_r] + [need_hi]) - need_lo
    rows = slice(need_lo - row_lo, need_hi - row_lo)
    bits = {"outside_bit": int(MaskBit.OUTSIDE), "nonfinite_bit": int(MaskBit.NONFINITE)}
    across = resample_columns(
        image[rows], variance[rows], mask[rows], positions, jac_y, breaks=breaks_r, **bits
    )
    along = shift_rows(
        *across, shifts + (x_lo - need_lo), x_hi - x_lo, jac_x, breaks=breaks_x, **bits
    )
    # Each intermediate plane is let go as soon as the next is made: the three
    # planes of each pass (~10 bytes per pixel of the stretch) are the unit's
    # peak memory when they are all held at once.
    del across
    along = list(along)
    for k, plane in enumerate(along):
        along[k] = transposed(plane)
        del plane
    out_image, out_variance, out_mask = along
    del along
    no_data = (out_mask & MASK_DTYPE.type(NO_DATA_BITS)) != 0
    out_image[no_data] = np.nan
    out_variance[no_data] = np.nan

    noise = RectifiedNoise(
        breaks=breaks_x,
        x_centres=np.array([c for _, _, c in blocks_x]),
        shifts=shifts,
        jac_x=jac_x,
        row_starts=np.array([a for a, _, _ in blocks_r], dtype=float),
        positions=positions,
        jac_y=jac_y,
    )
    correlation = None  # the deconvolution finds its own (and the covariance once)
    if not deconvolve:
        zero_frequency, plane = (a.mean(axis=1) for a in noise.power())
        widths = np.diff(breaks_x)
        correlation = float(
            np.average(zero_frequency, weights=widths) / np.average(plane, weights=widths)
        )

    kx, ky = _kernel_positions(x_start, max(x_stop, x_start + 1), frame.n_y, kernel_step)
    kernels = smear_kernels(model, frame, strip_map, kx, ky, kernel_samples)

    gain = None
    if deconvolve:
        out_image, out_variance, out_mask, gain, correlation = deconvolve_smear(
            out_image,
            out_variance,
            out_mask,
            model,
            frame,
            strip_map,
            x_lo,
            regularization=deconvolve_regularization,
            sigma=deconvolve_sigma,
            band=deconvolve_band,
            n_samples=kernel_samples,
            no_data_bits=int(NO_DATA_BITS),
            noise=noise,
        )
    core_cols = slice(margin, margin + x_stop - x_start)
    log.debug(
        "rectified rows [%d, %d) -> columns [%d, %d): %d x-blocks, %d row blocks",
        core[0],
        core[1],
        x_start,
        x_stop,
        len(blocks_x),
        len(blocks_r),
    )
    return RectifiedStretch(
        image=np.ascontiguousarray(out_image[:, core_cols]),
        variance=np.ascontiguousarray(out_variance[:, core_cols]),
        mask=np.ascontiguousarray(out_mask[:, core_cols]),
        x_start=x_start,
        frame=frame,
        smear_kernels=kernels,
        noise_correlation=correlation,
        deconvolution_noise_gain=gain,
    )


# ----------------------------------------------------------------------------
# The stage


def _run(*, inputs, options: RectifyOptions, context) -> dict[str, Any]:
    stretch = context.stretch
    night_rows = context.stretches[-1].stop if context.stretches else stretch.hi
    model = night_model(context.site, context.camera, inputs["ingest"][BLOCK_INDEX], night_rows)
    problem = line_time_problem(
        inputs["ingest"][BLOCK_INDEX],
        stretch.segment or (stretch.lo, stretch.hi),
        model.line_time,
    )
    if problem is not None:
        raise ValueError(f"stretch s{stretch.index:04d} is not rectified: {problem}")
    planes = inputs["calibrate"]["image"]
    result = rectify(
        planes[FLUX_EXTENSION].data,
        planes[VARIANCE_EXTENSION].data,
        planes[FLAGS_EXTENSION].data,
        model,
        row_lo=stretch.lo,
        core=(stretch.start, stretch.stop),
        night_rows=night_rows,
        data_rows=stretch.segment,  # no data beyond: a gap or another camera format
        row_offset=segment_row_offset(
            inputs["ingest"][BLOCK_INDEX], stretch.segment, model.line_time
        ),
        **options.model_dump(),
    )
    times = row_times(inputs["ingest"][BLOCK_INDEX], stretch.start, stretch.stop)
    metadata = observation_for_rows(
        times,
        context,
        reference_time=result.frame.epoch,
        reference_comment="epoch of the frame of date",
    )
    return {
        "image": image_hdulist(
            result.image,
            result.variance,
            result.mask,
            unit="electron",
            header=result.header(),
            metadata=metadata,
        ),
        "smear_kernels": result.smear_kernels,
    }


#: What a worker loads as it starts for rectify (``Stage.warm``): the
#: deconvolution's FFTs, the track splines, the Earth-orientation tables the
#: night's geometry model reads and the resampling's compiled loops (numba's
#: disk cache).
WARM = (
    "scipy.fft",
    "scipy.interpolate",
    "pipeline._offline:load_earth_orientation",
    "pipeline.stages.rectify._resample:load_compiled",
)

#: Declaration of the rectify stage for the runner.  Its per-stretch products
#: cover the rectified columns of the stretch's core rows only (not its margins).
STAGE = Stage(
    name="rectify",
    run=_run,
    options=RectifyOptions,
    requires=("ingest", "calibrate"),
    scope="stretch",
    uses=("site", "camera"),
    description="Resample stretches onto the straight-track frame; record smear kernels.",
    warm=WARM,
    # 2: deconvolution regularisation scales with the smear length; 3: one
    # multi-extension image product with units, observation metadata, night grid;
    # 4: deconvolved variance, DECNOISE and NOISECOR from the noise's covariance;
    # 6: planes read from FITS (big-endian float32) resample in float32; 7: a
    # segment after a gap resampled to the night's row clock (segment_row_offset)
    version=7,
)
