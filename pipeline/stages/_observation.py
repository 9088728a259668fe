"""Observation metadata of a stretch's image products, from the night's block index.

Shared by the stages that write image products (calibrate, rectify): they
describe the rows they cover, and this module turns that into the FITS
standard keywords of :func:`pipeline.products.observation_header`.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from pipeline.products import observation_header
from pipeline.stages.base import StageContext

if TYPE_CHECKING:
    from astropy.io import fits
    from astropy.table import Table
    from astropy.time import Time

__all__ = ["RowTimes", "observation_for_rows", "row_times"]


@dataclass(frozen=True)
class RowTimes:
    """Readout times of night rows ``[lo, hi)`` and the night's time origin.

    Attributes
    ----------
    reference_time : astropy.time.Time
        The block index's ``reference_time`` (night row 0 read out).
    first : float
        Readout time of night row ``lo``, s since ``reference_time``
        (extrapolated along the line time when the row is in a gap).
    line_time : float
        Seconds between row shifts.
    start, stop : float
        First charge collected and last row read out, s since
        ``reference_time``.
    exposure : float or None
        Crossing time ``TDIROWS * LINETIME`` of the rows (None if it varies).
    filter_name : str or None
        FILTER of the blocks (joined with ``+`` if it varies).
    """

    reference_time: Time
    first: float
    line_time: float
    start: float
    stop: float
    exposure: float | None
    filter_name: str | None


def row_times(index: Table, lo: int, hi: int) -> RowTimes:
    """Times of night rows ``[lo, hi)`` from the ingest stage's block index."""
    from astropy.time import Time

    if len(index) == 0 or index.meta.get("reference_time") is None:
        raise ValueError("the block index is empty; ingest found no usable block this night.")
    start = np.asarray(index["row_start"], dtype=np.int64)
    stop = start + np.asarray(index["n_rows"], dtype=np.int64)
    overlap = (start < hi) & (stop > lo)
    if overlap.any():
        blocks = index[overlap]
        row_start = np.asarray(blocks["row_start"], dtype=np.int64)
        # The first and last row of each block's part of [lo, hi).
        first_row = np.maximum(row_start, lo)
        last_row = np.minimum(row_start + np.asarray(blocks["n_rows"]), hi) - 1
    else:  # rows in a gap: the clock of the nearest earlier block (or the first)
        earlier = np.flatnonzero(start <= lo)
        blocks = index[earlier[-1:] if earlier.size else [0]]
        row_start = np.asarray(blocks["row_start"], dtype=np.int64)
        first_row, last_row = np.array([lo]), np.array([hi - 1])
    line_times = np.asarray(blocks["line_time"], dtype=float)
    # Each block's clock: night row r is read out at since + r * line_time.
    since = np.asarray(blocks["t_start"], dtype=float) - row_start * line_times
    read = np.concatenate([since + first_row * line_times, since + last_row * line_times])
    line_time = float(line_times[0])
    first = float(since[0] + lo * line_time)
    crossings = np.unique(np.asarray(blocks["tdi_rows"], dtype=float) * line_times)
    exposure = float(crossings[0]) if np.ptp(crossings) <= 1e-9 * crossings[0] else None
    filters = sorted({str(f) for f in blocks["filter"]})
    return RowTimes(
        reference_time=Time(index.meta["reference_time"], format="isot", scale="utc"),
        first=first,
        line_time=line_time,
        start=float(np.min(read)) - float(np.max(crossings)),
        stop=float(np.max(read)),
        exposure=exposure,
        filter_name="+".join(filters) if filters else None,
    )


def observation_for_rows(
    times: RowTimes,
    context: StageContext,
    *,
    reference_time: Time | None = None,
    reference_comment: str = "night row 0 read out",
) -> fits.Header:
    """:func:`~pipeline.products.observation_header` of rows with ``times``.

    ``reference_time`` (default ``times.reference_time``) becomes the
    product's ``DATEREF``; ``TSTART``/``TSTOP`` count from it.
    """
    shift = 0.0
    if reference_time is not None:
        shift = float((times.reference_time - reference_time).to_value("s"))
    else:
        reference_time = times.reference_time
    return observation_header(
        reference_time=reference_time,
        start=times.start + shift,
        stop=times.stop + shift,
        exposure=times.exposure,
        site=context.site,
        camera=context.camera,
        filter_name=times.filter_name,
        reference_comment=reference_comment,
    )
