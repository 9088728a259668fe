"""When each night column was exposed, from the block index."""

from __future__ import annotations

from typing import Any

import numpy as np
from astropy.table import Table
from astropy.time import Time

__all__ = ["FIGURE_SIZE", "NightClock", "time_axis"]


class NightClock:
    """Map night columns (the scan axis of the rectified strip) to UTC.

    Row ``r`` of a block is read out at ``date_obs + (r - row_start) *
    line_time``; its charge was collected over the ``tdi_rows`` line times
    before, so its mid-exposure is half a transit earlier.  A rectified
    column ``x`` holds night row ``x`` (the products' ``WCSNAMEA='NIGHT'``
    axis).

    Parameters
    ----------
    block_index : astropy.table.Table
        The ingest stage's block index (``row_start``, ``n_rows``,
        ``date_obs``, ``line_time``, ``tdi_rows``).
    """

    def __init__(self, block_index: Table):
        if len(block_index) == 0:
            raise ValueError("block_index has no rows: the night has no usable block.")
        order = np.argsort(np.asarray(block_index["row_start"]), kind="stable")
        index = block_index[order]
        read = Time(list(index["date_obs"]), format="isot", scale="utc")
        line_time = np.asarray(index["line_time"], dtype=float)
        half_transit = 0.5 * np.asarray(index["tdi_rows"], dtype=float) * line_time
        #: 0 h UTC of the date of the first block: the origin of :meth:`hours`.
        self.midnight = Time(read[0].isot[:10], format="isot", scale="utc")
        start = (read - self.midnight).to_value("s") - half_transit
        rows = np.asarray(index["row_start"], dtype=float)
        n_rows = np.asarray(index["n_rows"], dtype=float)
        # Knots at each block's first and last row; gaps between blocks are
        # interpolated, but no product has columns there.
        self._rows = np.ravel(np.column_stack([rows, rows + n_rows - 1]))
        self._seconds = np.ravel(np.column_stack([start, start + (n_rows - 1) * line_time]))

    @property
    def date(self) -> str:
        """The date (UTC) hours are counted from, ``YYYY-MM-DD``."""
        return self.midnight.isot[:10]

    def hours(self, x: np.ndarray) -> np.ndarray:
        """Mid-exposure of night columns ``x``, hours since 0 h UTC of :attr:`date`."""
        return np.interp(np.asarray(x, dtype=float), self._rows, self._seconds) / 3600.0


#: Size of a one-panel figure, inches (about 800 px wide at the default dpi).
FIGURE_SIZE = (9.0, 3.4)


def _clock_text(hours: float, position: object = None) -> str:
    """Hours since 0 h as ``HH:MM:SS`` (past 24 h on the next day)."""
    seconds = round(hours * 3600.0)
    return f"{seconds // 3600 % 24:02d}:{seconds // 60 % 60:02d}:{seconds % 60:02d}"


def time_axis(ax: Any, clock: NightClock) -> None:
    """Label the x axis as UTC clock time of mid-exposure."""
    ax.xaxis.set_major_formatter(_clock_text)
    ax.set_xlabel(f"UTC of mid-exposure (h:m:s, night of {clock.date})")
