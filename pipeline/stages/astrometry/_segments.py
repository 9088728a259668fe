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

Its rows are read every true line time from that DATE-OBS on, while ingest
placed its first row at the night row its DATE-OBS gives at the header's
line time: a line time off by a fraction ``e`` (a camera clock 300 ppm off)
moves a row by ``e`` times its time since its own segment's start, not
since the night's.  The fit times each segment so
(:attr:`GeometryOffsets.segment_start`, :func:`segment_start_times`): the
fitted line time places every segment, and a segment's own clock is the
error of its DATE-OBS alone (timed as one clock through the gap, a 300 ppm
line time needed 85 ms of "DATE-OBS error" after 7400 rows of 38 ms).

So the fit gives each segment after the first a clock offset of its own, in
:attr:`GeometryOffsets.segment_clock`, relative to the night's
``clock_offset``: the first segment's rows, timed from the night's first
DATE-OBS, fix the night's clock (with the east tilt it cannot be told from,
see :mod:`~pipeline.stages.astrometry._fit`); another segment's offset is the
error of its own first DATE-OBS against that.  A segment needs
``min_segment_stars`` matched stars for its offset to be fitted; one with
fewer keeps offset 0 (the night's clock), and the products say so.

A clock off by more than the match radius (a computer clock set again by
network time after a restart: 1 s is 15" of right ascension at the equator)
leaves a segment's stars unmatched at the night's clock, so its offset
cannot be fitted from them.  Such a segment is searched first
(:func:`search_segment_clock`): its detections are paired with the
reference stars predicted within the largest offset searched along the scan
and the offsets of the pairs binned; a clock offset moves every star of the
segment by the same number of rows, and the true pairs pile up in one bin.
A significant peak gives the segment's starting clock, and the fit goes on
from there as for any other segment; a segment without one keeps the
night's clock, and the products say what the search found.

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
from pipeline.stages.astrometry._match import candidate_pairs, offset_peak, scaled_tree

__all__ = [
    "NightSegments",
    "SegmentSearch",
    "search_segment_clock",
    "segment_clock_records",
    "segment_start_times",
]

#: Sigmas of chance pairs by which a search's peak must stand out (common
#: practice for a detection among many trials; the night's search uses it too).
PEAK_SIGNIFICANCE = 5.0


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


def segment_start_times(segments: NightSegments | None, line_time: float) -> tuple[float, ...]:
    """Nominal seconds from night row 0 to each segment's first row, by segment number.

    The ``segment_start`` of :class:`~pipeline.stages.astrometry._model.GeometryOffsets`:
    a segment's rows are timed from its own first DATE-OBS, so a line time
    off by a fraction ``e`` moves a row by ``e`` times its time since its
    segment's start.  Numbers without a segment get 0.

    Parameters
    ----------
    segments : NightSegments or None
        The night's segments; None: one segment (an empty tuple).
    line_time : float
        The night's nominal line time, s.

    Examples
    --------
    >>> nights = NightSegments(np.array([0, 1]), np.array([0, 3073]), np.array([1536, 6145]))
    >>> segment_start_times(nights, 0.04)
    (0.0, 122.92)
    """
    if segments is None or len(segments) < 2:
        return ()
    table = np.zeros(int(segments.numbers.max()) + 1)
    table[segments.numbers] = segments.starts * float(line_time)
    return tuple(float(v) for v in table)


@dataclass(frozen=True)
class SegmentSearch:
    """What the search along the scan found for one segment's clock.

    Attributes
    ----------
    segment : int
        Segment number.
    clock : float
        Seconds: the clock offset the peak gives the segment, relative to
        the night's (NaN if no pair was found).
    count : int
        Pairs in the peak's 3 x 3 bins.
    background : float
        Pairs expected there by chance.
    max_offset : float
        Seconds: the largest offset searched, either way.
    found : bool
        Whether the peak has ``min_stars`` pairs and stands out of the
        chance pairs by :data:`PEAK_SIGNIFICANCE` sigmas: the solution then
        starts the segment's clock from it.
    """

    segment: int
    clock: float
    count: int
    background: float
    max_offset: float
    found: bool

    def describe(self) -> str:
        """The search's outcome in words, for the products' notes."""
        chance = f"{self.count} pairs against {self.background:.1f} by chance"
        if not self.found:
            return (
                f"a search along the scan within +-{self.max_offset:g} s found no "
                f"significant clock offset (best peak: {chance})"
            )
        return (
            f"a search along the scan found its stars at a clock {self.clock * 1e3:+.1f} ms "
            f"off the first fit's night clock ({chance})"
        )


def search_segment_clock(
    ref_row: np.ndarray,
    ref_column: np.ndarray,
    det_row: np.ndarray,
    det_column: np.ndarray,
    *,
    line_time: float,
    max_offset: float,
    match_radius: float,
    min_stars: int,
    segment: int = -1,
    clock: float = 0.0,
) -> SegmentSearch:
    """Find one segment's clock offset from the offsets of its pairs along the scan.

    A clock offset ``s`` moves every star of the segment ``-s / line_time``
    rows along the scan and nothing across it, so the detections' offsets
    from their own reference stars' predictions share one row offset and a
    column offset near 0; chance pairs spread evenly over the box searched.
    The box is ``+-(max_offset / line_time + 2 match_radius)`` rows by
    ``+-2 match_radius`` columns, in bins of ``match_radius`` (the spread
    the rest of the geometry leaves, which the first match tolerates).

    Parameters
    ----------
    ref_row, ref_column : ndarray
        Strip positions of the reference stars predicted at the night's
        clock, pixels (NaN: not on the chip).
    det_row, det_column : ndarray
        Strip positions of the segment's detections, pixels.
    line_time : float
        Seconds per row.
    max_offset : float
        Seconds: the largest clock offset searched, either way.
    match_radius : float
        Pixels: the first match's radius.
    min_stars : int
        Fewest pairs in the peak for it to count.
    segment : int, optional
        The segment's number, for the result.
    clock : float, optional
        Seconds: the segment's clock offset relative to the night's in the
        predictions (the peak's offset is added to it).

    Returns
    -------
    SegmentSearch
    """
    half_row = max_offset / line_time + 2.0 * match_radius
    half_column = 2.0 * match_radius
    ri = np.empty(0, np.intp)
    if det_row.size:
        tree = scaled_tree(det_row, det_column, half_row, half_column)
        ri, di = candidate_pairs(ref_row, ref_column, tree, half_row, half_column)
    if ri.size == 0:
        return SegmentSearch(segment, np.nan, 0, 0.0, max_offset, found=False)
    peak = offset_peak(
        det_row[di] - ref_row[ri], det_column[di] - ref_column[ri], half_row, half_column,
        match_radius,
    )  # fmt: skip
    found = peak.count >= min_stars and peak.significance >= PEAK_SIGNIFICANCE
    # detection minus prediction: a clock late by s records the stars s / dt rows earlier
    return SegmentSearch(
        segment, clock - peak.d_row * line_time, peak.count, peak.background, max_offset, found
    )


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
    searches: Sequence[SegmentSearch] = (),
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
    searches : sequence of SegmentSearch, optional
        The searches along the scan made for segments whose stars missed at
        the night's clock (:func:`search_segment_clock`).

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
        cos(dec)``), and ``note`` in words; a searched segment also
        ``search``: ``offset_ms`` the search found (relative to the night's
        clock of the first fit), ``pairs`` in its peak, ``chance`` pairs
        there, ``range_s`` searched, and whether it ``found`` a clock.
    """
    # Earth's rotation rate from the Earth rotation angle (IERS Conventions
    # 2010), in mas of right ascension per second of time: 15041.07 mas/s
    mas_per_second = EARTH_ROTATION_RATE * ARCSEC_PER_RADIAN * 1000.0
    on_sky = mas_per_second * float(np.cos(np.radians(declination)))
    searched = {search.segment: search for search in searches}
    records = []
    for i, number in enumerate(segments.numbers):
        value, error = float(offsets[i]), float(errors[i])
        search = searched.get(int(number))
        if int(number) == reference:
            note = "the night's clock: clock_offset is this segment's"
        elif fitted[i]:
            note = f"fitted from {int(n_stars[i])} stars"
        else:
            note = (
                f"not fitted: {int(n_stars[i])} matched stars, fewer than "
                f"min_segment_stars={min_stars}; kept at the night's clock (offset 0)"
            )
        if search is not None:
            note = f"{note}; {search.describe()}"
        record = {
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
        if search is not None:
            record["search"] = {
                "offset_ms": search.clock * 1000.0,
                "pairs": search.count,
                "chance": round(search.background, 1),
                "range_s": search.max_offset,
                "found": search.found,
            }
        records.append(record)
    return records
