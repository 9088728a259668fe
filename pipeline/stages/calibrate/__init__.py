"""Calibrate: raw TDI rows to electrons, variance and a bit mask.

For one stretch of rows (axis 0 is the scan axis, time; axis 1 the columns
across the scan) :func:`calibrate_stretch`

1. measures each row's bias in the serial overscan, smooths it along the scan
   and subtracts it (and an optional fixed per-column bias pattern), then
   converts ADU to electrons with the header GAIN;
2. removes the per-column additive level (dark current, hot pixels' dark, bias
   pattern) and divides by the 1-D TDI flat, both solved from the night's sky
   (:func:`solve_columns`) or supplied;
3. computes the variance from the noise model
   ``(RDNOISE^2 + max(raw electrons, 0) + GAIN^2 / 12) / flat^2``: read noise,
   Poisson noise of everything collected (sky + dark + sources, counted before
   the flat divides it) and the ADC's quantisation (a uniform error of one ADU);
4. builds the mask (:class:`pipeline.masks.MaskBit`): saturation and bleed
   along the scan, bad and hot columns, cosmic rays, non-finite and missing
   pixels, the start-of-scan exposure ramp, whose rows it scales to the full
   exposure (:func:`scale_ramp_rows`).

Stage wiring
------------
The 1-D flat and dark need many rows, so the work is split in three stages:

``column_stats`` (per stretch)
    :func:`column_statistics`: bias-subtracted electrons, then
    :func:`summarize_columns`, a small table of per-block column levels.
``columns`` (per night)
    :func:`solve_columns` over all stretches' tables: the ``columns`` table
    (response, additive level, flags per column), persistable so other nights
    can use or compare it.
``calibrate`` (per stretch)
    :func:`calibrate_stretch` with that table.
"""

from __future__ import annotations

import functools
import logging
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
from pydantic import BaseModel, ConfigDict, Field, model_validator

from pipeline.exceptions import CalibrationWarning, StageError
from pipeline.masks import MASK_DTYPE, MaskBit, describe_mask
from pipeline.products import image_hdulist, night_grid_header
from pipeline.stages._observation import RowTimes, observation_for_rows, row_times
from pipeline.stages.base import BLOCK_INDEX, PROBLEMS, RAW_ROWS, Stage
from pipeline.stages.calibrate._bias import overscan_levels, smooth_levels
from pipeline.stages.calibrate._chunks import Scratch, row_chunks
from pipeline.stages.calibrate._columns import adopt_columns, solve_columns, summarize_columns
from pipeline.stages.calibrate._cosmics import NO_DATA_VARIANCE, detect_cosmic_rays
from pipeline.stages.calibrate._rows import stretch_rows_for_stage
from pipeline.stages.calibrate._saturation import bleed_level, bleed_pixels, saturation_mask

if TYPE_CHECKING:
    from astropy.io import fits
    from astropy.table import Table

__all__ = [
    "STAGE",
    "CalibrateOptions",
    "CalibratedStretch",
    "CalibrationWarning",
    "ColumnSolveOptions",
    "ColumnStatsOptions",
    "MaskBit",
    "adopt_columns",
    "calibrate_stretch",
    "column_statistics",
    "columns_product_name",
    "detect_cosmic_rays",
    "empty_rows",
    "exposure_fraction",
    "options_kwargs",
    "solve_columns",
    "strip_wcs_header",
    "subtract_bias",
    "summarize_columns",
]

log = logging.getLogger(__name__)


@dataclass(frozen=True)
class CalibratedStretch:
    """Result of :func:`calibrate_stretch`.

    Attributes
    ----------
    image : ndarray of float32, shape (n_rows, n_columns)
        Flat-fielded signal in electrons (sky included); NaN where the mask has
        NONFINITE, GAP or BAD_COLUMN.
    variance : ndarray of float32, shape (n_rows, n_columns)
        Variance of ``image`` in e^2; NaN where ``image`` is.
    mask : ndarray of uint16, shape (n_rows, n_columns)
        OR of :class:`~pipeline.masks.MaskBit` values.
    bias : ndarray of float64, shape (n_rows,)
        Bias level subtracted from each row, ADU (smoothed overscan).
    """

    image: np.ndarray
    variance: np.ndarray
    mask: np.ndarray
    bias: np.ndarray

    @property
    def mask_counts(self) -> dict[str, int]:
        """Number of pixels carrying each mask bit."""
        return describe_mask(self.mask)


def _per_row(value, n_rows: int, name: str) -> np.ndarray:
    """Broadcast a scalar or per-row header value to shape (n_rows,)."""
    array = np.asarray(value, dtype=np.float64)
    if array.ndim == 0:
        return np.full(n_rows, float(array))
    if array.shape != (n_rows,):
        raise ValueError(
            f"{name} must be a scalar or have shape ({n_rows},), one value per row; "
            f"got shape {array.shape}."
        )
    return array


def _segments(segment, n_rows: int) -> np.ndarray:
    if segment is None:
        return np.zeros(n_rows, dtype=np.int64)
    segment = np.asarray(segment)
    if segment.shape != (n_rows,):
        raise ValueError(
            f"segment must have shape ({n_rows},), one label per row; got {segment.shape}."
        )
    return segment


def _check_raw(image, overscan) -> tuple[np.ndarray, np.ndarray]:
    """Image and overscan as 2-D arrays with the same rows, or a ValueError."""
    overscan = np.asarray(overscan)
    if image.ndim != 2 or overscan.ndim != 2 or overscan.shape[0] != image.shape[0]:
        raise ValueError(
            f"image and overscan must be 2-D with the same rows (scan axis); got shapes "
            f"{image.shape} and {overscan.shape}; pass the rows of one stretch, the image "
            "columns and the overscan columns split by the DATASEC/BIASSEC sections."
        )
    return image, overscan


def _column_vector(value, n_columns: int, name: str) -> np.ndarray | None:
    """A per-column float32 vector of shape (n_columns,), None kept as None."""
    if value is None:
        return None
    value = np.asarray(value, dtype=np.float32)
    if value.shape != (n_columns,):
        raise ValueError(
            f"{name} must have shape ({n_columns},), one value per image column; got {value.shape}."
        )
    return value


def _row_bias(overscan, gain, read_noise, segment, smoothing, clip) -> np.ndarray:
    """Smoothed overscan bias of each row, ADU, per segment (NaN where segment < 0).

    ``smoothing`` holds the keywords of :func:`smooth_levels`.
    """
    n_rows = overscan.shape[0]
    read_noise = _per_row(read_noise, n_rows, "read_noise")
    segment = _segments(segment, n_rows)
    levels = overscan_levels(overscan, read_noise / gain, clip)
    bias = np.full(n_rows, np.nan)
    for label in np.unique(segment[segment >= 0]):
        rows = np.flatnonzero(segment == label)
        # Split also where a run's rows are not consecutive in this stretch.
        for part in np.split(rows, np.flatnonzero(np.diff(rows) != 1) + 1):
            if np.isfinite(levels[part]).any():
                bias[part] = smooth_levels(levels[part], **smoothing)
    return bias


def subtract_bias(
    image: np.ndarray,
    overscan: np.ndarray,
    *,
    gain: float | np.ndarray,
    read_noise: float | np.ndarray,
    column_bias: np.ndarray | None = None,
    segment: np.ndarray | None = None,
    bias_window: int | None = None,
    bias_polyorder: int = 2,
    bias_max_window: int = 2001,
    overscan_clip: float = 4.0,
) -> tuple[np.ndarray, np.ndarray]:
    """Subtract the smoothed overscan bias of each row and convert to electrons.

    Parameters
    ----------
    image : ndarray, shape (n_rows, n_columns)
        Raw image columns in ADU; axis 0 is the scan axis.
    overscan : ndarray, shape (n_rows, n_overscan)
        Raw serial-overscan columns of the same rows, ADU.
    gain : float or ndarray of shape (n_rows,)
        e-/ADU (header GAIN).
    read_noise : float or ndarray of shape (n_rows,)
        e- (header RDNOISE); sets the overscan clipping.
    column_bias : ndarray of shape (n_columns,), optional
        Fixed bias pattern in ADU to subtract from every row (e.g. from the
        readout electronics).  Without it such a pattern ends up in the
        solved per-column additive level, which removes it too.
    segment : ndarray of int, shape (n_rows,), optional
        Label of each row's run; the bias is smoothed within each run
        separately and never across a gap.  Rows labelled -1 (no data) get NaN.
    bias_window : int or None
        Savitzky-Golay window in rows (1: no smoothing).  None: chosen for
        each run of rows by cross-validation among windows up to
        ``bias_max_window`` (:func:`~pipeline.stages.calibrate._bias.choose_window`).
    bias_polyorder : int
        Degree of the smoothing polynomial.
    bias_max_window : int
        Longest window the cross-validation may choose, rows.
    overscan_clip : float
        Clipping half-width of the per-row overscan mean, in read noises.

    Returns
    -------
    electrons : ndarray of float32, shape (n_rows, n_columns)
        Bias-subtracted image in electrons.
    bias : ndarray of float64, shape (n_rows,)
        Subtracted bias level of each row in ADU.
    """
    image, overscan = _check_raw(np.asarray(image), overscan)
    n_rows, n_columns = image.shape
    gain = _per_row(gain, n_rows, "gain")
    smoothing = {"window": bias_window, "polyorder": bias_polyorder, "max_window": bias_max_window}
    bias = _row_bias(overscan, gain, read_noise, segment, smoothing, overscan_clip)
    column_bias = _column_vector(column_bias, n_columns, "column_bias")
    bias32 = bias.astype(np.float32)[:, None]
    gain32 = gain.astype(np.float32)[:, None]
    electrons = np.empty((n_rows, n_columns), dtype=np.float32)
    for r0, r1 in row_chunks(n_rows):  # chunks that stay in the cache
        out = electrons[r0:r1]
        np.subtract(image[r0:r1], bias32[r0:r1], out=out)
        if column_bias is not None:
            out -= column_bias
        out *= gain32[r0:r1]
    return electrons, bias


def column_statistics(
    image: np.ndarray,
    overscan: np.ndarray,
    rows: np.ndarray,
    times: np.ndarray,
    *,
    gain: float | np.ndarray,
    read_noise: float | np.ndarray,
    saturation: float | np.ndarray,
    segment: np.ndarray | None = None,
    use_rows: np.ndarray | None = None,
    block_rows: int = 256,
    clip: float = 3.0,
    bias_window: int | None = None,
    bias_polyorder: int = 2,
    bias_max_window: int = 2001,
    overscan_clip: float = 4.0,
) -> Table:
    """First pass of the column solve for one stretch.

    Subtracts the bias (:func:`subtract_bias`), leaves out saturated and
    non-finite pixels and the rows not in ``use_rows``, and returns
    :func:`summarize_columns` of the rest.

    Parameters
    ----------
    image, overscan : ndarray
        Raw rows in ADU, shapes (n_rows, n_columns) and (n_rows, n_overscan).
    rows : ndarray of int, shape (n_rows,)
        Night row index of each row.
    times : ndarray of float, shape (n_rows,)
        Readout time of each row, s.
    gain, read_noise, saturation : float or ndarray of shape (n_rows,)
        Header GAIN (e-/ADU), RDNOISE (e-) and SATURATE (ADU).
    segment : ndarray of int, shape (n_rows,), optional
        Run label per row (-1: no data); see :func:`subtract_bias`.
    use_rows : ndarray of bool, shape (n_rows,), optional
        Rows fit for the solve (e.g. not in the start-of-scan ramp); default all
        rows with data.
    block_rows, clip
        See :func:`summarize_columns`.
    bias_window, bias_polyorder, bias_max_window, overscan_clip
        See :func:`subtract_bias`.

    Returns
    -------
    astropy.table.Table
        As :func:`summarize_columns`.
    """
    n_rows = image.shape[0]
    electrons, _ = subtract_bias(
        image,
        overscan,
        gain=gain,
        read_noise=read_noise,
        segment=segment,
        bias_window=bias_window,
        bias_polyorder=bias_polyorder,
        bias_max_window=bias_max_window,
        overscan_clip=overscan_clip,
    )
    keep = _segments(segment, n_rows) >= 0
    if use_rows is not None:
        keep &= np.asarray(use_rows, bool)
    ignore = saturation_mask(image, _per_row(saturation, n_rows, "saturation"))
    read_noise = _per_row(read_noise, n_rows, "read_noise")
    rows, times = np.asarray(rows), np.asarray(times)
    if not keep.all():  # copies only when rows are left out
        electrons, ignore, rows, times, read_noise = (
            a[keep] for a in (electrons, ignore, rows, times, read_noise)
        )
    return summarize_columns(
        electrons, rows, times, read_noise, ignore, block_rows=block_rows, clip=clip
    )


def _column_model(columns, flat, dark, n_columns):
    """Flat, additive level and column flags as arrays of shape (n_columns,)."""
    flags = np.zeros(n_columns, dtype=MASK_DTYPE)
    if columns is not None:
        if len(columns) != n_columns:
            raise ValueError(
                f"columns table has {len(columns)} rows but the image has {n_columns} "
                "columns; solve the columns for this camera geometry."
            )
        flat = np.asarray(columns["flat"], float) if flat is None else flat
        dark = np.asarray(columns["dark"], float) if dark is None else dark
        flags = np.asarray(columns["flags"], dtype=MASK_DTYPE)
    flat = np.ones(n_columns) if flat is None else np.asarray(flat, dtype=np.float64)
    dark = np.zeros(n_columns) if dark is None else np.asarray(dark, dtype=np.float64)
    for name, value in (("flat", flat), ("dark", dark)):
        if value.shape != (n_columns,):
            raise ValueError(
                f"{name} must have shape ({n_columns},), one value per image column; got "
                f"{value.shape}."
            )
    bad = ~np.isfinite(flat) | (flat <= 0) | ~np.isfinite(dark)
    flags[bad] |= int(MaskBit.BAD_COLUMN)
    flat = np.where(bad, 1.0, flat)
    dark = np.where(bad, 0.0, dark)
    return flat, dark, flags


def calibrate_stretch(
    image: np.ndarray,
    overscan: np.ndarray,
    *,
    gain: float | np.ndarray,
    read_noise: float | np.ndarray,
    saturation: float | np.ndarray,
    columns: Table | None = None,
    flat: np.ndarray | None = None,
    dark: np.ndarray | None = None,
    column_bias: np.ndarray | None = None,
    segment: np.ndarray | None = None,
    rows_since_start: np.ndarray | None = None,
    tdi_rows: int | None = None,
    bias_window: int | None = None,
    bias_polyorder: int = 2,
    bias_max_window: int = 2001,
    overscan_clip: float = 4.0,
    bleed_fraction: float = 0.5,
    bleed_grow_rows: int = 2,
    bleed_grow_columns: int = 1,
    cosmic_rays: bool = True,
    cosmic_significance: float = 4.5,
    cosmic_neighbour_fraction: float = 0.3,
    cosmic_contrast: float = 5.0,
    cosmic_iterations: int = 2,
) -> CalibratedStretch:
    """Calibrate one stretch of raw TDI rows.

    Parameters
    ----------
    image : ndarray, shape (n_rows, n_columns)
        Raw image columns in ADU; axis 0 is the scan axis (row 0 read first),
        axis 1 the columns across the scan.
    overscan : ndarray, shape (n_rows, n_overscan)
        Raw serial-overscan columns of the same rows, ADU.
    gain, read_noise, saturation : float or ndarray of shape (n_rows,)
        Header GAIN (e-/ADU), RDNOISE (e-) and SATURATE (ADU, raw level).
    columns : astropy.table.Table, optional
        Output of :func:`solve_columns` (columns ``flat``, ``dark``, ``flags``).
    flat : ndarray of shape (n_columns,), optional
        1-D flat (response, mean about 1), e.g. from a twilight strip; overrides
        ``columns['flat']``.  None and no ``columns``: no flat fielding.
    dark : ndarray of shape (n_columns,), optional
        Additive level per column in electrons per pixel; overrides
        ``columns['dark']``.  None and no ``columns``: nothing subtracted.
    column_bias : ndarray of shape (n_columns,), optional
        Fixed bias pattern in ADU (see :func:`subtract_bias`).
    segment : ndarray of int, shape (n_rows,), optional
        Run label of each row; -1 marks rows without data (mask GAP).
    rows_since_start : ndarray of int, shape (n_rows,), optional
        Rows since charge clocking started; with ``tdi_rows`` the first
        ``tdi_rows`` of them get LOW_EXPOSURE (they crossed part of the chip).
    tdi_rows : int, optional
        TDIROWS.
    bias_window, bias_polyorder, bias_max_window, overscan_clip
        See :func:`subtract_bias`.
    bleed_fraction : float
        A pixel continuing a saturated pixel's run along its column belongs to
        the bleed trail if its raw level exceeds its row's sky (or bias, if
        higher) by this fraction of (SATURATE - sky): :func:`bleed_level`.
    bleed_grow_rows, bleed_grow_columns : int
        Margin added around saturated and bleed pixels along and across the
        scan (mask BLEED).
    cosmic_rays : bool
        Detect cosmic rays (mask COSMIC_RAY).  Needs the 1-D flat
        (``columns`` or ``flat``): without it the columns' differences in
        response and dark stand out of the sky like hits, and whole columns
        would be flagged (68 columns of a demo block).
    cosmic_significance, cosmic_neighbour_fraction, cosmic_contrast, cosmic_iterations
        ``significance``, ``neighbour_fraction``, ``contrast`` and ``n_iter`` of
        :func:`detect_cosmic_rays` (L.A.Cosmic, van Dokkum 2001).

    Returns
    -------
    CalibratedStretch

    Raises
    ------
    ValueError
        For arguments of the wrong shape, or ``cosmic_rays`` without
        ``columns`` or ``flat``.
    """
    image, overscan = _check_raw(np.asarray(image, dtype=np.float32), overscan)
    n_rows, n_columns = image.shape
    gain = _per_row(gain, n_rows, "gain")
    read_noise = _per_row(read_noise, n_rows, "read_noise")
    saturation = _per_row(saturation, n_rows, "saturation")
    segment = _segments(segment, n_rows)
    smoothing = {"window": bias_window, "polyorder": bias_polyorder, "max_window": bias_max_window}
    bias = _row_bias(overscan, gain, read_noise, segment, smoothing, overscan_clip)
    if cosmic_rays and columns is None and flat is None:
        raise ValueError(
            "cosmic_rays=True needs the 1-D flat (columns= or flat=): without it the columns' "
            "response and dark differences look like hits and whole columns would be flagged; "
            "pass the columns table, or cosmic_rays=False."
        )
    flat, dark, column_flags = _column_model(columns, flat, dark, n_columns)
    column_bias = _column_vector(column_bias, n_columns, "column_bias")
    image_e, variance, saturated, nonfinite = _calibrate_pixels(
        image, bias, gain, read_noise, saturation, flat, dark, column_bias
    )

    mask = np.zeros((n_rows, n_columns), dtype=MASK_DTYPE)
    flat_mask = mask.reshape(-1)
    for column in np.flatnonzero(column_flags):
        mask[:, column] |= column_flags[column]
    gap = np.flatnonzero(segment < 0)
    mask[gap] |= int(MaskBit.GAP)
    flat_mask[nonfinite] |= int(MaskBit.NONFINITE)
    mask[gap] &= ~MASK_DTYPE.type(MaskBit.NONFINITE)
    bias_level = np.where(np.isfinite(bias), bias, 0.0)
    bleed = bleed_pixels(
        image,
        saturated,
        functools.partial(bleed_level, image, bias_level, saturation, bleed_fraction),
        bleed_grow_rows,
        bleed_grow_columns,
    )
    flat_mask[saturated] |= int(MaskBit.SATURATED)
    flat_mask[bleed] |= int(MaskBit.BLEED)
    unexposed = np.zeros(0, dtype=np.int64)
    if rows_since_start is not None and tdi_rows:
        fraction = exposure_fraction(rows_since_start, tdi_rows)
        ramp = np.flatnonzero((fraction < 1.0) & (segment >= 0))
        mask[ramp] |= int(MaskBit.LOW_EXPOSURE)
        unexposed = ramp[fraction[ramp] <= 0.0]
        mask[unexposed] |= int(MaskBit.GAP)  # read at the start of clocking: no exposure
        exposed = ramp[fraction[ramp] > 0.0]
        scale_ramp_rows(image_e, variance, exposed, fraction[exposed], flat, dark)

    # Pixels without data: NaN in the products, a huge variance for the
    # cosmic-ray search (never the smallest noise).
    no_data = np.zeros((n_rows, n_columns), dtype=bool)
    bad_columns = np.flatnonzero(column_flags & int(MaskBit.BAD_COLUMN))
    no_data[:, bad_columns] = True
    no_data[gap] = True
    no_data[unexposed] = True
    no_data.reshape(-1)[nonfinite] = True
    image_e[no_data] = np.nan
    variance[no_data] = NO_DATA_VARIANCE
    if cosmic_rays and n_rows > 0:
        ignore = no_data
        ignore.reshape(-1)[saturated] = True
        ignore.reshape(-1)[bleed] = True
        hits = detect_cosmic_rays(
            image_e,
            variance,
            ignore,
            significance=cosmic_significance,
            neighbour_fraction=cosmic_neighbour_fraction,
            contrast=cosmic_contrast,
            n_iter=cosmic_iterations,
        )
        mask[hits] |= int(MaskBit.COSMIC_RAY)
    variance[np.isnan(image_e)] = np.nan
    return CalibratedStretch(image_e, variance, mask, bias)


def exposure_fraction(rows_since_start: np.ndarray, tdi_rows: int) -> np.ndarray:
    """Fraction of the full TDI exposure each row received.

    A charge packet read out ``k`` line times after clocking started has
    crossed only the last ``k`` of the chip's ``tdi_rows`` rows, so it holds
    ``k / tdi_rows`` of the light (and dark current) of a fully exposed one
    (the raw data contract: :mod:`pipeline.stages.ingest`, "Start of the
    scan").  Rows read ``tdi_rows`` or more line times after the start, and
    rows of a night clocked before its first block, have the full exposure.

    Parameters
    ----------
    rows_since_start : ndarray of int, shape (n_rows,)
        Line times since charge clocking started (``describe_rows``).
    tdi_rows : int
        TDIROWS, the chip rows a packet crosses.

    Returns
    -------
    ndarray of float64, shape (n_rows,)
        In [0, 1].

    Examples
    --------
    >>> exposure_fraction(np.array([0, 1, 2, 4, 9]), 4)
    array([0.  , 0.25, 0.5 , 1.  , 1.  ])
    """
    since = np.asarray(rows_since_start)
    if int(tdi_rows) <= 0:
        raise ValueError(f"tdi_rows must be a positive number of chip rows; got {tdi_rows}.")
    return np.clip(since.astype(np.float64) / int(tdi_rows), 0.0, 1.0)


def scale_ramp_rows(image_e, variance, rows, fraction, flat, dark) -> None:
    """Bring partly exposed rows to the full exposure, in place.

    A row with ``fraction`` ``f`` of the full exposure collected ``f`` of the
    sky's, the stars' and the dark current's electrons:
    ``electrons = f (flat * signal + dark)``.  :func:`_calibrate_pixels` made
    ``(electrons - dark) / flat`` of it; this returns ``electrons / (f flat) -
    dark / flat``, the signal of a full exposure, and divides the variance by
    ``f^2``, so that the start-of-scan ramp carries no step in the sky for the
    search to find, and its stars their whole fluxes (with the noise of their
    shorter exposures).  The flat and dark are the full chip's: a packet of
    the ramp crossed only part of it.

    Parameters
    ----------
    image_e, variance : ndarray of float32, shape (n_rows, n_columns)
        Calibrated electrons and their variance, changed in place.
    rows : ndarray of int
        Row indices of the partly exposed rows.
    fraction : ndarray of float, shape rows.shape
        Their exposure fractions, in (0, 1] (:func:`exposure_fraction`).
    flat, dark : ndarray of float, shape (n_columns,)
        The 1-D flat and additive level (e-) the rows were calibrated with.
    """
    if len(rows) == 0:
        return
    fraction = np.asarray(fraction, dtype=np.float64)[:, None]
    missing_dark = (dark * (1.0 / fraction - 1.0) / flat).astype(np.float32)
    inverse = (1.0 / fraction).astype(np.float32)
    image_e[rows] = image_e[rows] * inverse + missing_dark
    variance[rows] = variance[rows] * (inverse * inverse)


def _calibrate_pixels(image, bias, gain, read_noise, saturation, flat, dark, column_bias):
    """Electrons, variance, saturated and non-finite flat indices, chunk by chunk.

    ``(raw - bias - column_bias) * gain`` are the collected electrons; the
    variance is ``RDNOISE^2 + max(electrons, 0) + GAIN^2 / 12``; both are then
    corrected for the additive level and the flat:
    ``image = (electrons - dark) / flat``, ``variance /= flat^2``.
    """
    n_rows, n_columns = image.shape
    image_e = np.empty((n_rows, n_columns), dtype=np.float32)
    variance = np.empty((n_rows, n_columns), dtype=np.float32)
    bias32 = bias.astype(np.float32)[:, None]
    gain32 = gain.astype(np.float32)[:, None]
    constant = (read_noise**2 + gain**2 / 12.0).astype(np.float32)[:, None]
    saturation32 = saturation.astype(np.float32)[:, None]
    inv_flat = (1.0 / flat).astype(np.float32)
    inv_flat2 = inv_flat * inv_flat
    dark32 = dark.astype(np.float32)
    scratch = Scratch(n_columns)
    saturated, nonfinite = [], []
    zero = np.float32(0.0)
    for r0, r1 in row_chunks(n_rows):
        raw = image[r0:r1]
        e = image_e[r0:r1]
        v = variance[r0:r1]
        np.subtract(raw, bias32[r0:r1], out=e)
        if column_bias is not None:
            e -= column_bias
        e *= gain32[r0:r1]
        np.maximum(e, zero, out=v)
        v += constant[r0:r1]
        v *= inv_flat2
        e -= dark32
        e *= inv_flat
        test = scratch.get("test", r1 - r0, bool)
        np.greater_equal(raw, saturation32[r0:r1], out=test)
        if test.any():
            saturated.append(np.flatnonzero(test) + r0 * n_columns)
        np.isfinite(e, out=test)
        if not test.all():
            nonfinite.append(np.flatnonzero(~test) + r0 * n_columns)
    empty = np.zeros(0, dtype=np.int64)
    return (
        image_e,
        variance,
        np.concatenate(saturated) if saturated else empty,
        np.concatenate(nonfinite) if nonfinite else empty,
    )


# ----------------------------------------------------------------------------
# Stage options (field names mirror the keyword arguments above)


class _Options(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class _BiasOptions(_Options):
    bias_window: int | None = Field(
        None, ge=1, description="Bias smoothing window, rows; null: chosen by cross-validation."
    )
    bias_polyorder: int = Field(2, ge=0, description="Bias smoothing polynomial degree.")
    bias_max_window: int = Field(
        2001, ge=1, description="Longest bias smoothing window cross-validation may choose."
    )
    overscan_clip: float = Field(4.0, gt=0, description="Overscan clipping, read noises.")


class ColumnStatsOptions(_BiasOptions):
    """Options of the ``column_stats`` stage (see :func:`column_statistics`)."""

    block_rows: int | None = Field(
        None,
        ge=8,
        description="Rows per statistics block; null: 256, or on a night shorter than 8 such "
        "blocks an eighth of its rows (at least 16), so that its column solve has blocks "
        "enough (stages.columns.min_blocks, 8).",
    )
    clip: float = Field(3.0, gt=1, description="Clipping of stars and hits, noise units.")
    solve_rows: tuple[int, int] | None = Field(
        None,
        description="Night rows [start, stop) to solve the 1-D flat and dark from, e.g. a "
        "strip of evening twilight whose sky changes fast; null: every usable row.",
    )

    @model_validator(mode="after")
    def _check_solve_rows(self):
        if self.solve_rows is not None and not 0 <= self.solve_rows[0] < self.solve_rows[1]:
            raise ValueError(
                f"solve_rows must be [start, stop) night rows with 0 <= start < stop; got "
                f"{list(self.solve_rows)}."
            )
        return self


class ColumnSolveOptions(_Options):
    """Options of the ``columns`` stage (see :func:`solve_columns`)."""

    min_response: float = Field(0.5, ge=0)
    max_response: float = Field(1.5, gt=0)
    noise_limit: float = Field(1.5, gt=1)
    hot_level: float = Field(5.0, gt=0, description="e- per pixel above the median column.")
    hot_sigma: float = Field(5.0, gt=0, description="Robust spreads above the median column.")
    min_blocks: int = Field(8, ge=3)
    clip: float = Field(4.0, gt=1)
    max_flat_error: float = Field(
        0.002,
        gt=0,
        description="Largest median standard error of the responses from the regression; "
        "a night whose sky changes too little for it gets level ratios instead.",
    )
    flat_file: Path | None = Field(
        None,
        description="A solved columns table (.ecsv, e.g. the columns.ecsv product of another "
        "night or of a twilight or dome strip) to use instead of solving one; relative paths "
        "resolve against the config file's folder.",
    )


class CalibrateOptions(_BiasOptions):
    """Options of the ``calibrate`` stage (see :func:`calibrate_stretch`)."""

    flat_field: bool = Field(True, description="Apply the solved 1-D flat and dark.")
    bleed_fraction: float = Field(0.5, gt=0, le=1)
    bleed_grow_rows: int = Field(2, ge=0)
    bleed_grow_columns: int = Field(1, ge=0)
    cosmic_rays: bool = True
    cosmic_significance: float = Field(4.5, gt=0, description="S' limit of a hit, noise units")
    cosmic_neighbour_fraction: float = Field(
        0.3, gt=0, le=1, description="fraction of the significance for neighbours of hits"
    )
    cosmic_contrast: float = Field(
        5.0, gt=0, description="least contrast of a hit over the fine-structure image"
    )
    cosmic_iterations: int = Field(2, ge=1)

    @model_validator(mode="after")
    def _cosmic_rays_need_the_flat(self):
        if self.cosmic_rays and not self.flat_field:
            raise ValueError(
                "flat_field: false needs cosmic_rays: false: without the 1-D flat the "
                "columns' differences look like cosmic rays and whole columns would be flagged."
            )
        return self


def options_kwargs(options: BaseModel, exclude: tuple[str, ...] = ()) -> dict[str, Any]:
    """The options as keyword arguments, leaving out stage-only fields."""
    return {k: v for k, v in options.model_dump().items() if k not in exclude}


# ----------------------------------------------------------------------------
# The stage


def _run(*, inputs, options: CalibrateOptions, context) -> dict[str, Any]:
    from astropy.table import Table

    rows = stretch_rows_for_stage(inputs, context)
    columns = None
    if options.flat_field:
        columns = _columns_table(inputs["columns"], rows.image.shape[1], context)
    result = calibrate_stretch(
        rows.image,
        rows.overscan,
        gain=rows.gain,
        read_noise=rows.read_noise,
        saturation=rows.saturation,
        columns=columns,
        segment=rows.segment,
        rows_since_start=rows.rows_since_start,
        tdi_rows=rows.tdi_rows,
        **options_kwargs(options, exclude=("flat_field",)),
    )
    empty = empty_rows(result.mask, rows.covered)
    _warn_empty_rows(empty, rows, context.stretch)
    stretch = context.stretch
    times = row_times(inputs["ingest"][BLOCK_INDEX], stretch.lo, stretch.hi)
    row_table = Table(
        {
            "night_row": rows.night_row,
            "time": rows.time,
            "bias": result.bias,
            "data": rows.covered & ~empty,
        },
        meta={"reference_time": times.reference_time.isot},
    )
    row_table["time"].unit = "s"
    row_table["time"].description = "readout time since meta['reference_time']"
    row_table["bias"].unit = "adu"
    row_table["bias"].description = "bias subtracted from the row (smoothed overscan)"
    has_data = "the row holds data: a block covers it, and it is no readout dropout and not all NaN"
    row_table["data"].description = has_data
    out = {
        "image": image_hdulist(
            result.image,
            result.variance,
            result.mask,
            unit="electron",
            header=strip_wcs_header(times, stretch.lo),
            metadata=observation_for_rows(times, context),
        ),
        "rows": row_table,
        "mask_counts": result.mask_counts,
    }
    problems = dropout_problems(rows.night_row, rows.dropout, rows.image)
    saturated = saturated_sky_problems(rows.night_row, result.mask, out["mask_counts"])
    problems += saturated or sky_fill_problems(
        result.image, result.mask, rows.saturation, result.bias, rows.gain
    )
    if problems:
        out[PROBLEMS] = problems
    return out


#: Fraction of a row's pixels with data flagged SATURATED above which its sky,
#: not its stars, filled the wells: saturated stars cover a few per cent of a
#: row even in crowded fields (common practice).
SATURATED_SKY_FRACTION = 0.5
#: Share of a stretch's pixels saturated below which its rows are not looked
#: at (the benchmark night's crowded stretches: ~0.2 %).
SATURATED_SKY_SHARE = 0.025


def saturated_sky_problems(night_row: np.ndarray, mask: np.ndarray, counts: dict) -> list[str]:
    """One line per run of rows whose sky saturated (twilight, moonlight, a light leak).

    Their stars cannot be measured, and the stages after say only that they
    found few stars; this says why.

    Parameters
    ----------
    night_row : ndarray of int, shape (n_rows,)
        Night row of each stretch row.
    mask : ndarray of uint16, shape (n_rows, n_columns)
        The calibrated mask (:class:`~pipeline.masks.MaskBit`).
    counts : dict
        :func:`~pipeline.masks.describe_mask` of ``mask``: the rows are
        looked at only when more than :data:`SATURATED_SKY_SHARE` of the
        stretch's pixels are saturated (a star field's saturated stars stay
        far below; a sky saturated in fewer rows goes unsaid).

    Returns
    -------
    list of str
        Empty when no row's sky saturated.
    """
    if counts.get("SATURATED", 0) <= SATURATED_SKY_SHARE * mask.size:
        return []
    # Pixels with data: not in a gap, finite, and not a bad column's unless
    # saturated (a dead column does not fill; under a saturated sky the
    # column solve may take every column for bad).  The saturated share is
    # of these, so at most 1.
    is_saturated = (mask & MASK_DTYPE.type(int(MaskBit.SATURATED))) != 0
    counted = (mask & MASK_DTYPE.type(int(MaskBit.GAP | MaskBit.NONFINITE))) == 0
    counted &= is_saturated | ((mask & MASK_DTYPE.type(int(MaskBit.BAD_COLUMN))) == 0)
    with_data = counted.sum(axis=1)
    saturated = (is_saturated & counted).sum(axis=1)
    full = (with_data > 0) & (saturated > SATURATED_SKY_FRACTION * with_data)
    if not full.any():
        return []
    rows = np.flatnonzero(full)
    lines = []
    for part in np.split(rows, np.flatnonzero(np.diff(rows) != 1) + 1):
        first, last = int(night_row[part[0]]), int(night_row[part[-1]])
        share = saturated[part].sum() / max(int(with_data[part].sum()), 1)
        lines.append(
            f"night rows {first}-{last} ({part.size} rows): {share:.0%} of their pixels are "
            "saturated, the sky itself filled the wells (twilight, moonlight, a light leak?): "
            "no star there can be measured."
        )
    return lines


#: Share of the range from the bias to saturation that a stretch's sky may fill
#: before the stars on it saturate in numbers: at 80 % a star saturates once its
#: peak pixel gathers a quarter of the sky's electrons (common practice: keep
#: the sky well below the wells' and the converter's range).
SKY_FILL_LIMIT = 0.8


def sky_fill_problems(
    image: np.ndarray,
    mask: np.ndarray,
    saturation: np.ndarray,
    bias: np.ndarray,
    gain: np.ndarray,
) -> list[str]:
    """A line when the stretch's sky fills most of the range to saturation.

    The sky need not saturate itself for the night to be lost: on a sky at
    95 % of the range every star brighter than a few thousand electrons in
    its peak pixel saturates, detect flags nearly all of them SATURATED, and
    astrometry then fails for want of matches with no word of why.

    Parameters
    ----------
    image : ndarray, shape (n_rows, n_columns)
        Calibrated image, e- (sky included).
    mask : ndarray of uint16, shape (n_rows, n_columns)
        Its :class:`~pipeline.masks.MaskBit` flags; the sky is the median of
        unflagged pixels on up to 64 rows.
    saturation, bias : float or ndarray, shape (n_rows,)
        SATURATE and the bias subtracted from each row, ADU.
    gain : float or ndarray, shape (n_rows,)
        e-/ADU.

    Returns
    -------
    list of str
        One line (sky, its share of the range, the electrons a star's peak
        may add) when the sky fills more than :data:`SKY_FILL_LIMIT` of the
        range; else empty.
    """
    n_rows = image.shape[0]
    if n_rows == 0:
        return []
    every = slice(None, None, max(1, n_rows // 64))
    pixels = image[every]
    usable = (mask[every] == 0) & np.isfinite(pixels)
    if not usable.any():
        return []
    sky = float(np.median(pixels[usable]))
    room = (np.asarray(saturation, float) - np.asarray(bias, float)) * np.asarray(gain, float)
    room = float(np.median(room))  # e-, per row or one value for all
    if not (room > 0 and sky > SKY_FILL_LIMIT * room):
        return []
    return [
        f"the sky ({sky:,.0f} e- per pixel) fills {sky / room:.0%} of the range to "
        f"saturation ({room:,.0f} e-): a star whose peak pixel gathers more than "
        f"{max(room - sky, 0.0):,.0f} e- saturates, most of the brighter ones here (a sky "
        "too bright for this TDI crossing and gain: fewer TDI rows or a darker sky; or "
        "check the headers' SATURATE and GAIN)."
    ]


def dropout_problems(night_row: np.ndarray, dropout: np.ndarray, image: np.ndarray) -> list[str]:
    """One line per run of readout-dropout rows (:func:`~._rows.dropout_rows`).

    Parameters
    ----------
    night_row : ndarray of int, shape (n_rows,)
        Night row of each stretch row.
    dropout : ndarray of bool, shape (n_rows,) or None
        The dropout rows.
    image : ndarray, shape (n_rows, n_columns)
        Raw image columns, ADU (for the value the rows hold).

    Returns
    -------
    list of str
        Empty when there is no dropout row.
    """
    if dropout is None or not dropout.any():
        return []
    rows = np.flatnonzero(dropout)
    lines = []
    for part in np.split(rows, np.flatnonzero(np.diff(rows) != 1) + 1):
        first, last = int(night_row[part[0]]), int(night_row[part[-1]])
        lines.append(
            f"night rows {first}-{last} ({part.size} rows) hold one raw value "
            f"({float(image[part[0], 0]):g} ADU) in every image and overscan pixel: a readout "
            "dropout, not data; flagged GAP (no data) and left out of the bias, flat and sky."
        )
    return lines


def columns_product_name(n_columns: int, camera_columns: int) -> str:
    """Name of the ``columns`` stage's table for images ``n_columns`` wide.

    ``'columns'`` for the camera's own format (``camera_columns``),
    ``'columns_<n_columns>'`` for any other (see :mod:`pipeline.stages.columns`).
    """
    return "columns" if n_columns == camera_columns else f"columns_{n_columns}"


def _columns_table(products, n_columns: int, context) -> Table:
    """The columns stage's table for images ``n_columns`` wide."""
    name = columns_product_name(n_columns, context.camera.n_columns)
    if name not in products:
        raise StageError(
            f"Stretch {context.stretch.id} has {n_columns} image columns but the columns stage "
            f"solved no table for that format (it has {sorted(products)}); see its problems."
        )
    return products[name]


def strip_wcs_header(times: RowTimes, row_lo: int) -> fits.Header:
    """WCS of a calibrated stretch: chip column and readout time, and the night grid.

    Axis 1 (``COLUMN``) is the image column, 0-based (as calibrated:
    after ``camera.flip_columns``); axis 2
    (``TIME``, FITS WCS time axis, Rots et al. 2015) the readout time of
    the row, s since ``DATEREF``, uniform at one line time per row (as the
    ingest stage lays out the night's rows: exact to its
    ``tolerance_rows``).  The alternate WCS ``A`` (``NIGHT``) gives the
    image column and the night row.
    """
    from astropy.io import fits

    header = fits.Header()
    cards = [
        ("WCSAXES", 2, "two image axes"),
        ("CTYPE1", "COLUMN", "image column (0-based), across the scan"),
        ("CTYPE2", "TIME", "readout time of the row, along the scan"),
        ("CUNIT1", "pixel", ""),
        ("CUNIT2", "s", ""),
        ("CRPIX1", 1.0, ""),
        ("CRPIX2", 1.0, ""),
        ("CRVAL1", 0.0, "[pixel]"),
        ("CRVAL2", times.first, "[s] since DATEREF, first row"),
        ("CDELT1", 1.0, "[pixel]"),
        ("CDELT2", times.line_time, "[s] line time"),
    ]
    for key, value, comment in cards:
        header[key] = (value, comment)
    header.extend(
        night_grid_header(0, row_lo, ("COLUMN", "ROW"), ("image column", "night row (scan axis)"))
    )
    return header


def empty_rows(mask: np.ndarray, covered: np.ndarray) -> np.ndarray:
    """Rows that blocks cover but hold no finite pixel (NaN-filled raw data).

    Parameters
    ----------
    mask : ndarray of uint16, shape (n_rows, n_columns)
        The calibrated mask (:class:`~pipeline.masks.MaskBit`).
    covered : ndarray of bool, shape (n_rows,)
        Rows some block holds.

    Returns
    -------
    ndarray of bool, shape (n_rows,)
    """
    nonfinite = MASK_DTYPE.type(MaskBit.NONFINITE)
    # A row is empty only if its first pixel is: only those rows are read whole.
    empty = covered & (mask[:, :1] & nonfinite != 0).all(axis=1)
    if empty.any():
        empty[empty] = (mask[empty] & nonfinite != 0).all(axis=1)
    return empty


def _warn_empty_rows(empty: np.ndarray, rows, stretch) -> None:
    """Warn about rows that blocks cover but hold no finite pixel (:func:`empty_rows`)."""
    if empty.any():
        first, last = rows.night_row[empty][[0, -1]]
        warnings.warn(
            f"Stretch {stretch.id}: {int(empty.sum())} covered rows between night rows "
            f"{first} and {last} hold no finite pixel (NaN-filled raw data?).",
            CalibrationWarning,
            stacklevel=2,
        )


#: What a worker loads as it starts for calibrate and column_stats (``Stage.warm``):
#: the bias windows' filters (:mod:`pipeline.stages._signal`: FFTs and least
#: squares) and the column solve's error function.
WARM = ("scipy.fft", "scipy.linalg", "scipy.special")
#: ... and for calibrate also the cosmic-ray search's compiled loop (numba's disk cache).
CALIBRATE_WARM = (*WARM, "pipeline.stages.calibrate._cosmics_jit:load_compiled")

#: Declaration of the calibrate stage for the runner.
STAGE = Stage(
    name="calibrate",
    run=_run,
    options=CalibrateOptions,
    requires=("ingest", "columns", RAW_ROWS),
    scope="stretch",
    uses=("camera.flip_columns", "camera.flip_rows", "camera.name", "camera.telescope", "site"),
    description="Bias, 1-D flat and dark, variance and mask of each stretch.",
    warm=CALIBRATE_WARM,
    # 2: bias window by cross-validation; 3: faster passes (rounding); 4: one
    # multi-extension image product with units and observation metadata; 5: readout
    # dropout rows (one raw value in every pixel) flagged GAP; 6: rows.ecsv says
    # which rows hold data (column 'data'), for the report's hours of data, and
    # BLANK pixels of unsigned raw data are NaN (they read as 0 ADU); 7: a bleed
    # trail ends where it falls to a fraction of the room above the row's sky,
    # not above the bias (a twilight sky continued every trail to the column's end);
    # 8: the start-of-scan ramp's rows scaled to the full exposure, its first row
    # (no exposure) no data
    version=8,
)
