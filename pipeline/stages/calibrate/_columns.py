"""Per-column response (1-D TDI flat) and additive level, solved from the sky.

Every charge packet crosses a whole column, so a TDI camera's flat field and
dark current are 1-D, one value per column (Gunn et al.,
"The Flat Fields for SDSS DR2").  Column ``c`` records, in electrons after bias
subtraction,

    B_c(t) = g_c * S(t) + d_c

for a sky level ``S(t)`` that changes along the night.  Regressing each
column's source-free background on the sky level therefore gives the column's
response ``g_c`` (slope) and additive level ``d_c`` (intercept).

The solve has two passes so that memory stays flat for any night length:

* :func:`summarize_columns` (per stretch): clipped mean and scatter of every
  column in every block of ``block_rows`` rows.  Blocks are numbered from the
  night's row index, so overlapping stretches yield the same blocks and the
  solve keeps one copy of each.
* :func:`solve_columns` (per night): the regression over all blocks.

Identifiability: the sky is measured by the same columns, as the mean of a
fixed set of well-behaved reference columns, so the response comes out
normalised to mean 1 over them, and the additive level averages to zero over
them: a uniform dark current cannot be told from sky and stays in the sky
background (the detect stage subtracts both).  A sky gradient across the strip
that scales with the sky level is indistinguishable from a response pattern
and is absorbed into the flat.
"""

from __future__ import annotations

import logging
import warnings
from collections.abc import Mapping
from typing import TYPE_CHECKING

import numpy as np

from pipeline._threads import in_two_threads
from pipeline.exceptions import CalibrationWarning
from pipeline.masks import MaskBit
from pipeline.stages.calibrate._chunks import transposed

if TYPE_CHECKING:
    from astropy.table import Table

__all__ = ["adopt_columns", "solve_columns", "summarize_columns"]

log = logging.getLogger(__name__)

#: A hot column's excess level must exceed this many of its own fit errors.
_HOT_SIGNIFICANCE = 3.0


def _truncated_variance(clip: float) -> float:
    """Variance of a unit normal truncated at +-clip (analytic)."""
    from scipy.special import erf

    density = np.exp(-0.5 * clip * clip) / np.sqrt(2.0 * np.pi)
    return 1.0 - 2.0 * clip * density / erf(clip / np.sqrt(2.0))


def summarize_columns(
    electrons: np.ndarray,
    rows: np.ndarray,
    times: np.ndarray,
    read_noise: float | np.ndarray,
    ignore: np.ndarray | None = None,
    *,
    block_rows: int = 256,
    clip: float = 3.0,
) -> Table:
    """Background statistics of every column in blocks of rows (first pass).

    Parameters
    ----------
    electrons : ndarray, shape (n_rows, n_columns)
        Bias-subtracted raw image in electrons, before flat and dark; axis 0 is
        the scan axis.
    rows : ndarray of int, shape (n_rows,)
        Row index of each row in the night (or segment); blocks are
        ``rows // block_rows``, so they align across stretches.
    times : ndarray of float, shape (n_rows,)
        Readout time of each row, in seconds from any reference.
    read_noise : float or ndarray of shape (n_rows,)
        Read noise in electrons.
    ignore : ndarray of bool, shape (n_rows, n_columns), optional
        Pixels to leave out (saturated, non-finite, ...).
    block_rows : int
        Rows per block.
    clip : float
        Clipping half-width around each block's median, in units of the noise
        model ``sqrt(read_noise^2 + level)``; removes stars and cosmic rays.

    Returns
    -------
    `~astropy.table.Table`
        One row per block: ``block`` (int), ``n_rows`` (rows present),
        ``time`` (s, mean readout time), ``read_noise`` (e-), and the vector
        columns ``level`` (clipped mean, e-), ``scatter`` (clipped standard
        deviation corrected for the clipping, e-) and ``n_pixels`` (pixels
        used), each of length n_columns.
    """
    from astropy.table import Table

    electrons = np.asarray(electrons, dtype=np.float32)
    n_rows, n_columns = electrons.shape
    rows = np.asarray(rows)
    times = np.asarray(times, dtype=np.float64)
    if rows.shape != (n_rows,) or times.shape != (n_rows,):
        raise ValueError(
            f"rows and times must have shape ({n_rows},) like the image's scan axis; "
            f"got {rows.shape} and {times.shape}."
        )
    read_noise = np.broadcast_to(np.asarray(read_noise, dtype=np.float64), (n_rows,))
    unusable = ~np.isfinite(electrons)
    if ignore is not None:
        unusable = unusable | ignore
    block = rows // int(block_rows)
    starts = np.flatnonzero(np.r_[True, block[1:] != block[:-1]])
    stops = np.r_[starts[1:], n_rows]
    if n_rows == 0:  # all rows in gaps or in the start-of-scan ramp: no blocks
        starts = stops = starts[:0]
    out = {name: [] for name in ("block", "n_rows", "time", "read_noise")}
    level, scatter, count = [], [], []
    for start, stop in zip(starts, stops, strict=True):
        lev, sca, cnt = _block_statistics(
            electrons[start:stop], unusable[start:stop], float(read_noise[start:stop].mean()), clip
        )
        out["block"].append(int(block[start]))
        out["n_rows"].append(stop - start)
        out["time"].append(float(times[start:stop].mean()))
        out["read_noise"].append(float(read_noise[start:stop].mean()))
        level.append(lev)
        scatter.append(sca)
        count.append(cnt)
    table = Table(
        [
            np.array(out["block"], dtype=np.int64),
            np.array(out["n_rows"], dtype=np.int64),
            np.array(out["time"], dtype=np.float64),
            np.array(out["read_noise"], dtype=np.float64),
        ],
        names=list(out),
    )
    table["level"] = np.array(level, dtype=np.float32).reshape(-1, n_columns)
    table["scatter"] = np.array(scatter, dtype=np.float32).reshape(-1, n_columns)
    table["n_pixels"] = np.array(count, dtype=np.int32).reshape(-1, n_columns)
    table["time"].unit = "s"
    for name in ("read_noise", "level", "scatter"):
        table[name].unit = "electron"
    table.meta.update(block_rows=int(block_rows), clip=float(clip))
    return table


#: Stands for unusable pixels in the clipped sums: far outside any clipping
#: window, and, unlike NaN or infinity, zero when multiplied by zero.
_FAR = np.float32(1e30)


def _block_statistics(x, unusable, read_noise, clip):
    """Clipped mean, corrected scatter and count of each column of one block.

    Works on a transposed copy (rows of a column contiguous), which is
    partitioned in place: the clipped sums do not depend on the order.
    """
    xt = transposed(x, np.float32)  # a copy: (n_columns, n_rows_block)
    k = xt.shape[1] // 2
    bad_columns = np.flatnonzero(unusable.any(axis=0))
    if bad_columns.size:  # usually a few columns (saturated stars, bad pixels)
        bad = unusable[:, bad_columns].T
        values = np.where(bad, np.inf, xt[bad_columns])
        values.sort(axis=1)  # the good values first
        n_good = values.shape[1] - bad.sum(axis=1)
        bad_median = values[np.arange(bad_columns.size), n_good // 2 - (n_good == 0)]
        bad_median[n_good == 0] = np.nan
        xt[bad_columns] = np.where(bad, _FAR, xt[bad_columns])
    xt.partition(k, axis=1)
    median = xt[:, k].copy()  # the upper median, like bad_median
    if bad_columns.size:
        median[bad_columns] = bad_median
    half = (clip * np.sqrt(read_noise**2 + np.maximum(median, 0.0))).astype(np.float32)
    xt -= median[:, None]  # deviations (NaN in all-bad columns)
    keep = np.abs(xt) <= half[:, None]  # NaN compares false
    np.multiply(xt, keep, out=xt)  # 0 where not kept (NaN only where nothing is kept)
    n = np.count_nonzero(keep, axis=1)
    with np.errstate(invalid="ignore"):
        mean_dev = xt.sum(axis=1, dtype=np.float64) / np.maximum(n, 1)
        square = np.einsum("ij,ij->i", xt, xt).astype(np.float64)
        var = (square - mean_dev**2 * n) / np.maximum(n - 1, 1)
    scale = _truncated_variance(clip)
    with np.errstate(invalid="ignore"):
        level = np.where(n > 0, median + mean_dev, np.nan)
        scatter = np.where(n > 1, np.sqrt(np.maximum(var, 0.0) / scale), np.nan)
    return level, scatter, n


def solve_columns(
    summaries: Table | list[Table],
    *,
    min_response: float = 0.5,
    max_response: float = 1.5,
    noise_limit: float = 1.5,
    hot_level: float = 5.0,
    hot_sigma: float = 5.0,
    min_blocks: int = 8,
    clip: float = 4.0,
    max_flat_error: float = 0.002,
) -> Table:
    """Solve each column's response and additive level over the night.

    For block ``k`` the sky level ``s_k`` is the mean level of the reference
    columns; each column's block levels are fitted as ``a_c s_k + b_c`` by
    weighted least squares (weights: pixels used / (read noise^2 + level)),
    rejecting blocks more than ``clip`` standard errors off the line, twice.

    Parameters
    ----------
    summaries : Table or list of Table
        Outputs of :func:`summarize_columns` for the stretches of a night;
        duplicate blocks (from overlaps) are merged, keeping the fullest.
    min_response, max_response : float
        Columns whose response falls outside this range are flagged BAD_COLUMN.
    noise_limit : float
        Columns whose scatter exceeds the noise model by this factor, relative
        to the median column, are flagged BAD_COLUMN.
    hot_level, hot_sigma : float
        Columns whose additive level exceeds the median column's by more than
        ``hot_level`` electrons per pixel and by more than ``hot_sigma`` times
        the columns' robust spread (which a fixed bias pattern sets), and by
        more than 3 times their own fit error, are flagged HOT_COLUMN.
    min_blocks : int
        Minimum number of blocks for a column fit; fewer gives BAD_COLUMN.
        A night with fewer blocks in all raises ``ValueError``.
    clip : float
        Outlier rejection of blocks, in standard errors.
    max_flat_error : float
        If the sky level changes too little along the night to give the
        responses to this precision (median standard error), the additive
        levels are set to zero and the responses are the ratio of column to sky
        level, with a :class:`~pipeline.exceptions.CalibrationWarning`.  The
        default, 0.2 %, is the response precision the calibrate stage is
        required to reach; a column's additive level then only enters as
        ``level / sky`` in its response.

    Returns
    -------
    `~astropy.table.Table`
        One row per column: ``column`` (0-based image column), ``flat``
        (response, mean 1 over the reference columns), ``flat_error``,
        ``dark`` (additive level in e- per pixel, mean 0 over the reference
        columns), ``dark_error``, ``noise_ratio`` (scatter / noise model,
        relative to the median column), ``n_blocks`` and ``flags``
        (:class:`~pipeline.masks.MaskBit` BAD_COLUMN / HOT_COLUMN).  The meta
        holds ``sky_min``/``sky_max`` (e-), ``n_blocks``, ``n_reference`` and
        ``method`` (``'regression'`` or ``'ratio'``).
    """
    from astropy.table import Table

    table = _merge_blocks(summaries)
    level = np.asarray(table["level"], dtype=np.float64)  # (K, C)
    scatter = np.asarray(table["scatter"], dtype=np.float64)
    n_pix = np.asarray(table["n_pixels"], dtype=np.float64)
    read_noise = np.asarray(table["read_noise"], dtype=np.float64)[:, None]
    valid = np.isfinite(level) & (n_pix > 0)
    n_blocks, n_columns = level.shape
    if n_blocks < min_blocks:
        # Every column would be flagged BAD_COLUMN and the calibrated night
        # would be empty: say so instead.
        raise ValueError(
            f"Only {n_blocks} blocks of column statistics, fewer than min_blocks={min_blocks}, "
            "so no column's flat can be solved; use shorter blocks "
            "(stages.column_stats.block_rows), lower stages.columns.min_blocks, or adopt "
            "a solved table (stages.columns.flat_file)."
        )

    noise_ratio = _noise_ratio(level, scatter, read_noise, valid)
    reference, relative = _initial_reference(level, valid, noise_ratio, noise_limit)
    weight = np.where(valid, n_pix / (read_noise**2 + np.maximum(level, 1.0)), 0.0)
    for iteration in range(2):
        sky = _sky(level, valid, reference, relative)
        fit_valid = valid & np.isfinite(sky)[:, None]  # blocks with a sky level
        slope, intercept, slope_err, intercept_err, used = _fit_lines(
            np.nan_to_num(sky), level, weight, fit_valid, clip
        )
        if iteration == 0:
            reference = _refine_reference(slope, intercept, used, reference, min_blocks)
    if not np.isfinite(sky).any():
        raise ValueError(
            f"No block of the {n_blocks} has a usable reference column to measure the sky "
            "by (every column saturated, empty or much noisier than the others?); check "
            "the column_stats tables and the raw data."
        )
    slope, intercept, slope_err, sky = _normalise(slope, intercept, slope_err, sky, reference)

    method = "regression"
    flat_error = _median_or_nan(slope_err[reference])
    if not flat_error <= max_flat_error:
        warnings.warn(
            f"The sky level varies too little along the night (from {np.nanmin(sky):.1f} "
            f"to {np.nanmax(sky):.1f} e-) to separate column response from additive level "
            f"(median response error {flat_error:.3g} > "
            f"max_flat_error={max_flat_error}); using level ratios and no additive level.",
            CalibrationWarning,
            stacklevel=2,
        )
        method = "ratio"
        slope, intercept, slope_err, intercept_err = _ratio(
            np.nan_to_num(sky), level, np.where(fit_valid, weight, 0.0)
        )
        slope, intercept, slope_err, sky = _normalise(slope, intercept, slope_err, sky, reference)
        used = fit_valid.sum(axis=0)  # no line, so no block is rejected from one

    flags = np.zeros(n_columns, dtype=np.uint16)
    bad = (
        (used < min_blocks)
        | ~np.isfinite(slope)
        | (slope < min_response)
        | (slope > max_response)
        | (noise_ratio > noise_limit)
    )
    excess = intercept - _median_or_nan(intercept[~bad])
    spread = _robust_sigma(intercept[~bad])
    # ...and the excess must stand out from the column's own fit error, so a
    # column with few clean blocks (next to a bleed, say) is not called hot on
    # a noisy level.
    hot = (
        (excess > hot_level)
        & (excess > hot_sigma * spread)
        & (excess > _HOT_SIGNIFICANCE * intercept_err)
    )
    flags[bad] |= int(MaskBit.BAD_COLUMN)
    flags[hot & ~bad] |= int(MaskBit.HOT_COLUMN)
    result = Table(
        {
            "column": np.arange(n_columns),
            "flat": slope.astype(np.float64),
            "flat_error": slope_err,
            "dark": intercept,
            "dark_error": intercept_err,
            "noise_ratio": noise_ratio,
            "n_blocks": used.astype(np.int32),
            "flags": flags,
        }
    )
    result["dark"].unit = result["dark_error"].unit = "electron"
    result.meta.update(
        sky_min=float(np.nanmin(sky)),
        sky_max=float(np.nanmax(sky)),
        n_blocks=int(n_blocks),
        n_reference=int(reference.sum()),
        method=method,
        block_rows=int(table.meta.get("block_rows", 0)),
    )
    log.info(
        "Column solve (%s): %d blocks, sky %.1f-%.1f e-, %d bad and %d hot of %d columns",
        method,
        n_blocks,
        result.meta["sky_min"],
        result.meta["sky_max"],
        int(bad.sum()),
        int((hot & ~bad).sum()),
        n_columns,
    )
    return result


def adopt_columns(table: Table, n_columns: int, *, source: str = "") -> Table:
    """Check a solved ``columns`` table from elsewhere and use it for this night.

    A 1-D flat and additive level solved on another night, or on a twilight
    or dome strip, instead of the night's own sky: useful when the night's
    sky changes too little to separate them, or to keep one flat for a run
    of nights.

    Parameters
    ----------
    table : astropy.table.Table or mapping
        A table such as :func:`solve_columns` returns: one row per image
        column with at least ``flat`` (response, mean about 1) and ``dark``
        (e- per pixel); ``flags`` (MaskBit) is kept if present.  A mapping of
        column name to equal-length sequences (a JSON object) is read as such
        a table.
    n_columns : int
        Image columns of this night's camera.
    source : str
        Where the table comes from, recorded in the meta.

    Returns
    -------
    astropy.table.Table
        ``column``, ``flat``, ``dark``, ``flags`` (and the table's other
        columns); meta ``method='external'``, ``source`` and the table's own
        meta under ``source_meta``.

    Raises
    ------
    ValueError
        If a column is missing or the length is not ``n_columns``.
    TypeError
        If ``table`` is neither a table nor a mapping of columns.
    """
    from astropy.table import Table

    if isinstance(table, Mapping) and not isinstance(table, Table):
        try:
            table = Table({name: np.asarray(values) for name, values in table.items()})
        except ValueError as error:
            raise ValueError(
                f"The columns file {source or ''} is a mapping whose columns cannot form a "
                f"table ({error}); give one list per column, all of the camera's length."
            ) from None
    if not isinstance(table, Table):
        raise TypeError(
            f"The columns file {source or ''} holds a {type(table).__name__}, not a table; "
            "give an .ecsv or FITS table, or a JSON object of columns such as "
            '{"flat": [...], "dark": [...]}.'
        )
    missing = [name for name in ("flat", "dark") if name not in table.colnames]
    if missing:
        raise ValueError(
            f"The columns table {source or ''} lacks {missing}; give a table written by the "
            "columns stage (its columns.ecsv product)."
        )
    if len(table) != n_columns:
        raise ValueError(
            f"The columns table {source or ''} has {len(table)} rows but the camera has "
            f"{n_columns} image columns; use a table solved for this camera geometry."
        )
    result = Table(table, copy=True)
    result["column"] = np.arange(n_columns)
    if "flags" not in result.colnames:
        result["flags"] = np.zeros(n_columns, np.uint16)
    result["flags"] = np.asarray(result["flags"], dtype=np.uint16)
    first = ["column", "flat", "dark", "flags"]
    result = result[first + [c for c in result.colnames if c not in first]]
    result.meta = {"method": "external", "source": source, "source_meta": dict(table.meta)}
    log.info(
        "Columns from %s: %d flagged of %d",
        source or "a table",
        int(np.count_nonzero(result["flags"])),
        n_columns,
    )
    return result


def _merge_blocks(summaries: Table | list[Table]) -> Table:
    """Stack stretch summaries and keep the fullest copy of each block."""
    from astropy.table import Table, unique, vstack

    if isinstance(summaries, Table):
        summaries = [summaries]
    if not summaries:
        raise ValueError("summaries is empty; run summarize_columns on at least one stretch.")
    widths = {np.shape(s["level"])[1] for s in summaries if len(s)}
    if len(widths) > 1:
        raise ValueError(
            f"summaries disagree on the number of columns ({sorted(widths)}); a night must "
            "have one geometry (split it into runs at the change)."
        )
    table = vstack(summaries, metadata_conflicts="silent")
    if len(table) == 0:
        raise ValueError(
            "summaries hold no block: no stretch had a row usable for the column solve "
            "(rows in gaps and the first TDIROWS rows after clocking started are left out; "
            "if clocking started before the first block, say so with the ingest option "
            "start_ramp='none')."
        )
    table.sort(["block", "n_rows"], reverse=True)
    table = unique(table, keys="block", keep="first")
    table.sort("block")
    return table


def _median_or_nan(values):
    """Median of the finite values; NaN if there is none (no warning)."""
    values = values[np.isfinite(values)]
    return float(np.median(values)) if values.size else np.nan


#: Columns taken at once in the per-column steps: (blocks, columns)
#: temporaries of a few hundred kB, which stay in the cache and are reused
#: instead of freshly mapped (a 16 MB temporary of 512 blocks x 4096 columns
#: costs its page faults every time).
_PART_COLUMNS = 256


def _column_parts(n_columns: int) -> list[slice]:
    """Slices of :data:`_PART_COLUMNS` columns covering ``n_columns`` (one if none).

    No slice is one column wide unless the array is: numpy sums a single
    column down its blocks pairwise, several columns row by row, which
    rounds otherwise.
    """
    starts = list(range(0, max(n_columns, 1), _PART_COLUMNS))
    if len(starts) > 1 and n_columns - starts[-1] == 1:
        starts.pop()  # the last column joins the slice before it
    return [slice(start, stop) for start, stop in zip(starts, [*starts[1:], None], strict=True)]


def _nanmedian(values: np.ndarray, axis: int) -> np.ndarray:
    """``numpy.nanmedian(values, axis=axis)`` of a 2-D float64 array, without its warnings.

    The same values (the mean of the two middle values of the sorted non-NaN
    ones, ``(low + high) / 2``, infinities included; NaN where all are NaN),
    found by one partition of the rows that have no NaN and one sort of the
    others (NaN sorts last), where numpy sorts a masked array for an axis
    shorter than 600 (``numpy.ma.median``: 0.16 s of the night's column solve
    on 512 blocks of 4096 columns) and calls ``numpy.median`` per row for a
    longer one.  Only the sign of a zero median may differ (which of equal
    zeros a sort puts in the middle).
    """
    lines = np.ascontiguousarray(np.moveaxis(np.asarray(values, dtype=np.float64), axis, -1))
    n_lines, length = lines.shape
    counts = length - np.count_nonzero(np.isnan(lines), axis=1)
    median = np.full(n_lines, np.nan)
    full = counts == length
    if length and full.any():
        middle = sorted({(length - 1) // 2, length // 2})
        part = np.partition(lines[full], middle, axis=1)  # a copy
        with np.errstate(invalid="ignore"):  # -inf + inf gives NaN, as in numpy's median
            median[full] = (part[:, (length - 1) // 2] + part[:, length // 2]) / 2.0
    some = ~full & (counts > 0)
    if some.any():
        ordered = np.sort(lines[some], axis=1)  # NaN last
        count = counts[some]
        rows = np.arange(count.size)
        with np.errstate(invalid="ignore"):
            median[some] = (ordered[rows, (count - 1) // 2] + ordered[rows, count // 2]) / 2.0
    return median


def _robust_sigma(values):
    """Standard deviation from the median absolute deviation of the finite values.

    astropy's ``mad_std`` (the MAD times 1/Phi^-1(3/4) = 1.4826, exact for a
    normal distribution); NaN if there is no finite value (no warning).
    """
    from astropy.stats import mad_std

    values = values[np.isfinite(values)]
    return float(mad_std(values)) if values.size else np.nan


def _noise_ratio(level, scatter, read_noise, valid):
    """Median over blocks of scatter / noise model, relative to the median column.

    Noise-free data (every scatter 0) give 1 for the columns without scatter
    and infinity for the others.
    """
    per_column = np.empty(level.shape[1])
    for part in _column_parts(level.shape[1]):
        expected = np.sqrt(read_noise**2 + np.maximum(level[:, part], 0.0))
        ratio = np.where(valid[:, part], scatter[:, part] / expected, np.nan)
        per_column[part] = _nanmedian(ratio, axis=0)  # NaN for columns without a valid block
    with warnings.catch_warnings():
        # ...then flagged bad; all NaN gives NaN here too.
        warnings.simplefilter("ignore", RuntimeWarning)
        typical = np.nanmedian(per_column)
    if not typical > 0:
        return np.where(per_column > 0, np.inf, np.where(np.isnan(per_column), np.nan, 1.0))
    return per_column / typical


def _initial_reference(level, valid, noise_ratio, noise_limit):
    """Columns whose typical relative level and noise look normal.

    Returns the reference columns and every column's median level relative to
    the median column (NaN for columns without valid blocks).
    """
    # Blocks or columns without valid data give NaN and drop out.
    block_median = _nanmedian(np.where(valid, level, np.nan), axis=1)[:, None]
    relative = np.empty(level.shape[1])
    for part in _column_parts(level.shape[1]):
        valid_level = np.where(valid[:, part], level[:, part], np.nan)
        with np.errstate(divide="ignore", invalid="ignore"):  # a zero or NaN block median
            relative[part] = _nanmedian(valid_level / block_median, axis=0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # all NaN gives NaN
        centre = np.nanmedian(relative)
        spread = _robust_sigma(relative)
    with np.errstate(invalid="ignore"):
        normal = np.abs(relative - centre) <= 5.0 * max(spread, 1e-6)
    reference = normal & (noise_ratio <= noise_limit) & (relative > 0)
    return reference, relative


def _sky(level, valid, reference, relative):
    """Sky level of each block from the reference columns; NaN without any.

    Each valid reference column's level is divided by the column's typical
    relative level before averaging, so that a block where some reference
    columns are unusable (saturated by a bright star, say) is not biased by
    the flat field of the columns that remain.
    """
    ref_valid = valid[:, reference]
    ratio = np.where(ref_valid, level[:, reference] / relative[reference], 0.0)
    count = ref_valid.sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(count > 0, ratio.sum(axis=1) / count, np.nan)


def _normalise(slope, intercept, slope_err, sky, reference):
    """Put the lines on the sky scale where the reference columns average 1 and 0.

    ``level = a_c s + b_c`` with mean reference slope ``A`` and intercept ``B``
    is ``(a_c / A) s' + (b_c - a_c B / A)`` for the sky ``s' = A s + B``: the
    response averages 1 and the additive level 0 over the reference columns
    (the identifiable part, module docstring), rejections or not.
    """
    finite = reference & np.isfinite(slope) & np.isfinite(intercept)
    if not finite.any():  # no line could be fitted (constant sky): leave as is
        return slope, intercept, slope_err, sky
    mean_slope = np.mean(slope[finite])
    mean_intercept = np.mean(intercept[finite])
    new_slope = slope / mean_slope
    return (
        new_slope,
        intercept - new_slope * mean_intercept,
        slope_err / mean_slope,
        mean_slope * sky + mean_intercept,
    )


def _fit_lines(sky, level, weight, valid, clip):
    """Weighted straight-line fit ``level = a * sky + b`` for every column.

    Columns are fitted independently, :data:`_PART_COLUMNS` at a time, the
    later half of the parts in a second thread (numpy's loops release the
    GIL; the column solve runs while the pool's other worker idles: 0.17 ->
    0.10-0.13 s on a 4096-column night of 512 blocks).  Returns ``slope,
    intercept, slope_err, intercept_err, used`` (blocks kept), each of
    shape (n_columns,).
    """
    parts = in_two_threads(
        lambda part: _fit_some_lines(sky, level[:, part], weight[:, part], valid[:, part], clip),
        list(_column_parts(level.shape[1])),
        "column-fits",
    )
    return tuple(np.concatenate(values) for values in zip(*parts, strict=True))


def _fit_some_lines(sky, level, weight, valid, clip):
    """:func:`_fit_lines` of some columns: a weighted fit with outliers rejected.

    Each product of (blocks, columns) arrays is formed once, in place where
    it can be, in the order of the formulas (so the sums, taken down the
    blocks, round alike).  Iterating on after a column's kept blocks stop
    changing repeats its fit, so columns may stop at different passes.
    """
    level = np.ascontiguousarray(level)
    weight = np.ascontiguousarray(weight)
    valid = np.ascontiguousarray(valid)
    use = valid.copy()
    x = sky[:, None]
    root_weight = np.sqrt(weight)
    term = np.empty_like(weight)
    wdx = np.empty_like(weight)
    for _ in range(3):
        w = np.where(use, weight, 0.0)
        sw = w.sum(axis=0)
        with np.errstate(invalid="ignore", divide="ignore"):
            np.multiply(w, x, out=term)
            xm = term.sum(axis=0) / sw
            np.multiply(w, np.where(use, level, 0.0), out=term)
            ym = term.sum(axis=0) / sw
            np.subtract(x, xm, out=wdx)  # dx
            np.multiply(w, wdx, out=wdx)  # w * dx
            sxx = (np.multiply(wdx, x - xm, out=term)).sum(axis=0)
            np.subtract(level, ym, out=term)
            np.multiply(wdx, np.where(use, term, 0.0), out=term)
            slope = term.sum(axis=0) / sxx
            intercept = ym - slope * xm
            resid = np.multiply(slope, x)
            resid += intercept
            np.subtract(level, resid, out=resid)
            resid[~valid] = 0.0
            # Standard errors from the weights, scaled by the reduced chi^2.
            n = use.sum(axis=0)
            np.multiply(w, resid, out=term)
            term *= resid
            chi2 = term.sum(axis=0) / np.maximum(n - 2, 1)
            scale = np.sqrt(np.maximum(chi2, 1e-12))
            pull = np.multiply(resid, root_weight, out=term)
            pull /= scale
        new_use = valid & (np.abs(pull) <= clip)
        if np.array_equal(new_use, use):
            break
        use = new_use
    with np.errstate(invalid="ignore", divide="ignore"):
        slope_err = scale / np.sqrt(sxx)
        intercept_err = scale * np.sqrt(1.0 / sw + xm**2 / sxx)
    return slope, intercept, slope_err, intercept_err, use.sum(axis=0)


def _refine_reference(slope, intercept, used, reference, min_blocks):
    """Drop columns with outlying response or level from the reference set."""
    good = reference & (used >= min_blocks) & np.isfinite(slope)
    if not good.any():  # e.g. a sky that never changes: no line to judge by
        return reference
    new = good.copy()
    for values in (slope, intercept):
        centre = np.median(values[good])
        spread = _robust_sigma(values[good])
        new &= np.abs(values - centre) <= 5.0 * max(spread, 1e-9)
    return new if new.sum() >= max(3, good.sum() // 2) else good


def _ratio(sky, level, weight):
    """Response as the weighted mean ratio level / sky, no additive level."""
    w = np.where(np.isfinite(level), weight, 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        slope = (w * np.nan_to_num(level) * sky[:, None]).sum(axis=0) / (w * sky[:, None] ** 2).sum(
            axis=0
        )
        resid = level - slope * sky[:, None]
        chi2 = np.nansum(w * resid * resid, axis=0) / np.maximum((w > 0).sum(axis=0) - 1, 1)
        slope_err = np.sqrt(chi2 / (w * sky[:, None] ** 2).sum(axis=0))
    zeros = np.zeros_like(slope)
    return slope, zeros, slope_err, zeros
