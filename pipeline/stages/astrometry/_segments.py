"""The night's segments as the astrometric fit sees them: one clock per segment.

A gap (missing blocks, a pause) or an overlap splits a night into segments
(ingest's ``segment`` column), and the rows of each segment are timed from
the DATE-OBS of its own first block (rectify's
:func:`~pipeline.stages.rectify.segment_row_offset`).  A computer clock a few
tens of milliseconds off when that block was stamped moves every star of the
segment along the scan by the same amount: 30 ms is 0.3" at latitude 45
(a clock offset ``s`` moves the sky at a row by ``omega s`` in right
ascension, ``omega`` Earth's rotation rate, :data:`EARTH_ROTATION_RATE`), a
hundred times the error of a well-measured night.

So the fit gives each segment after the first a clock offset of its own, in
:attr:`GeometryOffsets.segment_clock`, relative to the night's
``clock_offset``: the first segment's rows, timed from the night's first
DATE-OBS, fix the night's clock (with the east tilt it cannot be told from,
see :mod:`~pipeline.stages.astrometry._fit`); another segment's offset is the
error of its own first DATE-OBS against that.  A segment needs
``min_segment_stars`` matched stars for its offset to be fitted; one with
fewer keeps offset 0 (the night's clock), and the products say so.

A point belongs to the segment whose rows hold it; a point in a gap to the
nearest segment; in an overlap, to the later segment, whose rows win (as
ingest's ``describe_rows`` decides).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike

from pipeline.geometry.optics import ARCSEC_PER_RADIAN, EARTH_ROTATION_RATE

__all__ = ["NightSegments", "segment_clock_records"]


@dataclass(frozen=True)
class NightSegments:
    """Night rows of each segment of a night.

    Attributes
    ----------
    numbers : ndarray of int, shape (n,)
        Segment numbers (ingest's ``segment``), in order of their rows.
    starts, stops : ndarray of int, shape (n,)
        Night rows ``[start, stop)`` of each segment.
    first_blocks : tuple of str
        File of each segment's first block.
    date_obs : tuple of str
        DATE-OBS of each segment's first block (ISO, UTC), which times it.
    """

    numbers: np.ndarray
    starts: np.ndarray
    stops: np.ndarray
    first_blocks: tuple[str, ...] = ()
    date_obs: tuple[str, ...] = ()

    @classmethod
    def from_block_index(cls, block_index) -> NightSegments:
        """The segments of ingest's block index (``segment``, ``row_start``, ``n_rows``).

        Parameters
        ----------
        block_index : astropy.table.Table
            Ingest's ``block_index``; without a ``segment`` column the whole
            night is one segment.
        """
        row_start = np.asarray(block_index["row_start"], dtype=np.int64)
        row_stop = row_start + np.asarray(block_index["n_rows"], dtype=np.int64)
        if "segment" in block_index.colnames:
            segment = np.asarray(block_index["segment"], dtype=np.int64)
        else:
            segment = np.zeros(row_start.size, dtype=np.int64)
        files = [str(f) for f in block_index["file"]] if "file" in block_index.colnames else None
        dates = (
            [str(d) for d in block_index["date_obs"]]
            if "date_obs" in block_index.colnames
            else None
        )
        numbers, starts, stops, first, date = [], [], [], [], []
        for number in np.unique(segment):
            members = np.flatnonzero(segment == number)
            head = members[np.argmin(row_start[members])]
            numbers.append(int(number))
            starts.append(int(row_start[members].min()))
            stops.append(int(row_stop[members].max()))
            first.append(files[head] if files else "")
            date.append(dates[head] if dates else "")
        order = np.argsort(starts, kind="stable")
        return cls(
            numbers=np.asarray(numbers, dtype=np.int64)[order],
            starts=np.asarray(starts, dtype=np.int64)[order],
            stops=np.asarray(stops, dtype=np.int64)[order],
            first_blocks=tuple(first[i] for i in order),
            date_obs=tuple(date[i] for i in order),
        )

    def __len__(self) -> int:
        return int(self.numbers.size)

    def of_rows(self, rows: ArrayLike) -> np.ndarray:
        """Segment number of each night row (a gap's rows: the nearest segment's).

        Parameters
        ----------
        rows : array_like of float
            Night (strip) rows, pixels; NaN gives the first segment.

        Returns
        -------
        ndarray of int
            The segment whose rows ``[start - 1/2, stop - 1/2)`` hold the row;
            in an overlap the later one, in a gap the nearer one (the later
            one at equal distance).
        """
        rows = np.nan_to_num(np.asarray(rows, dtype=float), nan=float(self.starts[0]))
        if len(self) == 1:
            return np.full(rows.shape, self.numbers[0], dtype=np.int64)
        lo = self.starts - 0.5
        hi = self.stops - 0.5
        distance = np.maximum(lo - rows[..., None], 0.0) + np.maximum(rows[..., None] - hi, 0.0)
        # the last of the nearest: later segments win overlaps and ties
        reverse = np.argmin(distance[..., ::-1], axis=-1)
        return self.numbers[len(self) - 1 - reverse]

    def containing(self, row: int) -> int:
        """Segment number of one night row (see :meth:`of_rows`)."""
        return int(self.of_rows(np.array([float(row)]))[0])


def segment_clock_records(
    segments: NightSegments,
    offsets: Sequence[float],
    errors: Sequence[float],
    n_stars: Sequence[int],
    fitted: Sequence[bool],
    *,
    reference: int,
    min_stars: int,
    declination: float,
) -> list[dict]:
    """What the products say of each segment's clock: value, error, and why.

    Parameters
    ----------
    segments : NightSegments
        The night's segments.
    offsets, errors : sequence of float
        Each segment's fitted clock offset relative to the night's and its
        1-sigma error, seconds, by position in ``segments`` (error NaN where
        not fitted).
    n_stars : sequence of int
        Matched stars the fit kept in each segment.
    fitted : sequence of bool
        Whether each segment's offset was fitted.
    reference : int
        Segment number whose clock is the night's (``clock_offset``).
    min_stars : int
        ``min_segment_stars``: fewest stars for a fitted offset.
    declination : float
        Degrees: the strip's declination, for the offset's size on the sky.

    Returns
    -------
    list of dict
        One per segment: ``segment``, ``rows``, ``first_block``, ``date_obs``,
        ``n_stars``, ``reference`` (its clock is the night's), ``fitted``,
        ``offset_ms`` and ``offset_err_ms`` (a positive offset: the
        segment's rows were read later than its DATE-OBS says, relative to
        the night's clock), ``ra_mas`` and
        ``ra_err_mas`` (how far the offset moves the segment's positions
        along right ascension on the sky, east positive: ``offset * omega *
        cos(dec)``), and ``note`` in words.
    """
    # Earth's rotation rate from the Earth rotation angle (IERS Conventions
    # 2010), in mas of right ascension per second of time: 15041.07 mas/s
    mas_per_second = EARTH_ROTATION_RATE * ARCSEC_PER_RADIAN * 1000.0
    on_sky = mas_per_second * float(np.cos(np.radians(declination)))
    records = []
    for i, number in enumerate(segments.numbers):
        value, error = float(offsets[i]), float(errors[i])
        if int(number) == reference:
            note = "the night's clock: clock_offset is this segment's"
        elif fitted[i]:
            note = f"fitted from {int(n_stars[i])} stars"
        else:
            note = (
                f"not fitted: {int(n_stars[i])} matched stars, fewer than "
                f"min_segment_stars={min_stars}; kept at the night's clock (offset 0)"
            )
        records.append(
            {
                "segment": int(number),
                "rows": [int(segments.starts[i]), int(segments.stops[i])],
                "first_block": segments.first_blocks[i] if segments.first_blocks else "",
                "date_obs": segments.date_obs[i] if segments.date_obs else "",
                "n_stars": int(n_stars[i]),
                "reference": int(number) == reference,
                "fitted": bool(fitted[i]),
                "offset_ms": value * 1000.0,
                "offset_err_ms": error * 1000.0,
                "ra_mas": value * on_sky,
                "ra_err_mas": error * on_sky,
                "note": note,
            }
        )
    return records
