"""The night's one line time, and the blocks clocked at another.

Every stage after ingest times a night row by one line time for the whole
night, from the start of its segment (rectify's ``segment_row_offset``,
astrometry's segment clocks): a block clocked at another line time is
off by the difference times the rows since its segment began, and its
stars' smear by the difference times the TDI rows.  Headers may print one
clock with other digits, and a camera restarted after a gap may compute its
line time again for another moment of the year (1e-7 apart); a camera may
also really change its line time mid-night (an operator who retunes the TDI
rate).  Ingest reports every change and starts a segment there.  Line
times whose rows drift apart by at most :data:`LINE_TIME_TOLERANCE_ROWS`
over the segment (and over the TDI rows) are one clock; the rows at the
night's line time (that of the most rows) are reduced, and rectify refuses
the stretches of blocks at another, with how to reduce them as a night of
their own.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    from astropy.table import Table

__all__ = [
    "LINE_TIME_TOLERANCE_ROWS",
    "clock_spans",
    "index_line_time",
    "night_line_time",
    "other_line_time_blocks",
]

#: Line times of a night's blocks are one line time when the row times they
#: give differ by at most this many rows over a block's span (its segment's
#: rows, and at least the TDI rows: :func:`clock_spans`).
LINE_TIME_TOLERANCE_ROWS = 0.01


def _same_clock(a: np.ndarray, b: float, spans: np.ndarray | int) -> np.ndarray:
    """Whether line times ``a`` and ``b`` give row times within the tolerance over ``spans``."""
    return np.abs(a - b) * spans <= LINE_TIME_TOLERANCE_ROWS * np.minimum(a, b)


def clock_spans(block_index: Table) -> np.ndarray:
    """Rows over which each block's clock error adds up: its segment's, at least its TDI rows.

    Parameters
    ----------
    block_index : astropy.table.Table
        Ingest's block index (``n_rows``; ``segment`` and ``tdi_rows`` where
        present: without ``segment`` the whole night is one segment).

    Returns
    -------
    ndarray of int64, shape (n_blocks,)
    """
    rows = np.asarray(block_index["n_rows"], dtype=np.int64)
    if "segment" in block_index.colnames:
        segment = np.asarray(block_index["segment"], dtype=np.int64)
        labels, where = np.unique(segment, return_inverse=True)
        spans = np.bincount(where.ravel(), weights=rows, minlength=labels.size)[where.ravel()]
    else:
        spans = np.full(rows.shape, rows.sum())
    if "tdi_rows" in block_index.colnames:
        spans = np.maximum(spans, np.asarray(block_index["tdi_rows"], dtype=np.int64))
    return spans.astype(np.int64)


def night_line_time(
    line_times: np.ndarray, block_rows: np.ndarray, spans: np.ndarray | int
) -> float:
    """The one line time of a night, that of the most rows.

    Line times whose row times differ by at most
    :data:`LINE_TIME_TOLERANCE_ROWS` rows over a block's span (one clock
    printed with other digits) count as one.

    Parameters
    ----------
    line_times : ndarray of float, shape (n_blocks,)
        Each block's LINETIME, s.
    block_rows : ndarray of int, shape (n_blocks,)
        Each block's rows.
    spans : int or ndarray of int, shape (n_blocks,)
        Rows over which each block's clock error adds up (:func:`clock_spans`;
        one number: the night's rows for all).

    Returns
    -------
    float
        Of the values whose clock runs the most rows (counting the values
        within the tolerance of it), the one printed on the most rows (the
        shortest of equally common ones), s.  Blocks at another line time
        are :func:`other_line_time_blocks`.
    """
    line_times = np.asarray(line_times, dtype=float)
    block_rows = np.asarray(block_rows, dtype=float)
    values, where = np.unique(line_times, return_inverse=True)
    exact = np.bincount(where.ravel(), weights=block_rows, minlength=values.size)
    spans = np.broadcast_to(np.asarray(spans, dtype=float), line_times.shape)
    clock = np.array([block_rows[_same_clock(line_times, v, spans)].sum() for v in values])
    # lexsort: last key first; np.unique sorted the values (the shortest first)
    best = np.lexsort((np.arange(values.size), -exact, -clock))[0]
    return float(values[best])


def other_line_time_blocks(
    line_times: np.ndarray, line_time: float, spans: np.ndarray | int
) -> np.ndarray:
    """Which blocks run at another line time than the night's ``line_time``.

    Parameters
    ----------
    line_times : ndarray of float, shape (n_blocks,)
        Each block's LINETIME, s.
    line_time : float
        The night's (:func:`night_line_time`), s.
    spans : int or ndarray of int, shape (n_blocks,)
        Rows over which each block's clock error adds up (:func:`clock_spans`).

    Returns
    -------
    ndarray of bool, shape (n_blocks,)
        True where the block's row times would drift from the night's clock
        by more than :data:`LINE_TIME_TOLERANCE_ROWS` rows over its span.
    """
    line_times = np.asarray(line_times, dtype=float)
    return ~_same_clock(line_times, float(line_time), spans)


def index_line_time(block_index: Table) -> float:
    """:func:`night_line_time` of ingest's block index.

    Raises
    ------
    ValueError
        If the index has no block or no ``line_time`` column.
    """
    if "line_time" not in block_index.colnames or len(block_index) == 0:
        raise ValueError(
            "the block index has no line_time column or no block; this stage needs "
            "ingest's block index of a night with usable blocks."
        )
    return night_line_time(
        np.asarray(block_index["line_time"], dtype=float),
        np.asarray(block_index["n_rows"], dtype=np.int64),
        clock_spans(block_index),
    )
