"""A camera clock that is not its LINETIME: the same jump at every block boundary.

Ingest places each block by its DATE-OBS and counts its rows at LINETIME.
When the camera really shifted its rows every ``dt_true`` seconds while its
headers say ``dt``, and its blocks are time-stamped by a clock of their own,
every block of ``n`` rows ends ``n (dt_true - dt) / dt`` rows before (or
after) the next block's DATE-OBS: beyond ``tolerance_rows`` (half a row by
default, 0.025 % of the line time for 2048-row blocks) each boundary is a
"gap" or an "overlap", all of about the same size and all the same way.  A
night of such boundaries is one fault, not a gap at every block:
:func:`find_clock_drift` recognises it, and the DATE-OBS stamps give the
line time the camera really ran at, ``(t_k - t_(k-1)) / n_(k-1)``.

Only boundaries between blocks that follow each other (BLOCKSEQ one apart,
the same LINETIME) count: a missing block is a gap whatever the clock.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

__all__ = ["Boundary", "ClockDrift", "find_clock_drift"]

#: Fewest boundaries that make a pattern (two are a coincidence; common practice).
MIN_BOUNDARIES = 3
#: Fraction of the night's following boundaries that must share the pattern.
MIN_SHARE = 2.0 / 3.0
#: Relative spread of the offsets within the pattern (besides half the tolerance).
SPREAD = 0.1


@dataclass(frozen=True)
class Boundary:
    """The join between two blocks that follow each other in time.

    Attributes
    ----------
    before, after : str
        File names of the earlier and the later block.
    offset : float
        Rows between the end of ``before`` (DATE-OBS plus its rows at its
        LINETIME) and the DATE-OBS of ``after``: > 0 a gap, < 0 an overlap.
    rows : int
        Rows of ``before``.
    seconds : float
        DATE-OBS of ``after`` minus DATE-OBS of ``before``.
    line_time : float
        LINETIME of ``before``, seconds.
    follows : bool
        Whether ``after`` follows ``before`` (BLOCKSEQ one apart, the same
        LINETIME): only such boundaries show the clock.
    """

    before: str
    after: str
    offset: float
    rows: int
    seconds: float
    line_time: float
    follows: bool


@dataclass(frozen=True)
class ClockDrift:
    """A clock that differs from LINETIME, found at the block boundaries.

    Attributes
    ----------
    members : tuple of int
        Indices (into the boundaries given) of the boundaries that share it.
    n_following : int
        Boundaries between blocks that follow each other.
    offsets : ndarray
        Their offsets, rows.
    line_time : float
        The line time the DATE-OBS stamps imply, seconds.
    header_line_time : float
        LINETIME, seconds (the median of the members').
    """

    members: tuple[int, ...]
    n_following: int
    offsets: np.ndarray
    line_time: float
    header_line_time: float

    @property
    def relative(self) -> float:
        """Implied over header line time, minus 1."""
        return self.line_time / self.header_line_time - 1.0

    def describe(self, boundaries: Sequence[Boundary], tolerance_rows: float) -> str:
        """The problem line: the pattern, the implied line time, and the fix."""
        first, last = boundaries[self.members[0]], boundaries[self.members[-1]]
        kind = "gaps" if np.median(self.offsets) > 0 else "overlaps"
        n = len(self.members)
        which = (
            f"all {n} block boundaries"
            if n == self.n_following
            else f"{n} of the night's {self.n_following} boundaries between blocks in sequence"
        )
        rows = int(np.median([boundaries[i].rows for i in self.members]))
        return (
            f"{first.after} to {last.after}: {which} are {kind} of "
            f"{np.min(self.offsets):+.2f} to {np.max(self.offsets):+.2f} rows, the same at "
            f"every block: not {n} {kind} but a camera clock that is not its LINETIME. The "
            f"DATE-OBS stamps imply a line time of {self.line_time:.9g} s against LINETIME "
            f"{self.header_line_time:.9g} s ({self.relative * 1e6:+.0f} ppm, "
            f"{self.relative * rows:+.2f} rows per {rows}-row block, beyond the "
            f"{tolerance_rows:g}-row tolerance); each block is a segment of its own and the "
            "night's timing is off: set LINETIME to the clock the camera ran at (or "
            "stages.ingest.line_time_from_stamps: true)."
        )


def find_clock_drift(
    boundaries: Sequence[Boundary],
    tolerance_rows: float,
    *,
    min_boundaries: int = MIN_BOUNDARIES,
) -> ClockDrift | None:
    """The clock pattern of a night's block boundaries, if they show one.

    Parameters
    ----------
    boundaries : sequence of Boundary
        Every join between consecutive blocks of the night, in time order.
    tolerance_rows : float
        Ingest's ``tolerance_rows``: the largest offset that still joins.
    min_boundaries : int, optional
        Fewest boundaries that make a pattern.

    Returns
    -------
    ClockDrift or None
        None unless at least ``min_boundaries`` boundaries between blocks
        that follow each other, and at least two thirds of them, are off by
        the same line-time error (the offset per row within 10 % of their
        median, or half the tolerance), beyond the tolerance and all the
        same way.
    """
    following = [i for i, b in enumerate(boundaries) if b.follows and b.rows > 0]
    if len(following) < min_boundaries:
        return None
    rows = np.array([boundaries[i].rows for i in following], dtype=float)
    offsets = np.array([boundaries[i].offset for i in following], dtype=float)
    rate = float(np.median(offsets / rows))  # rows of offset per row of block
    expected = rate * rows
    if not np.median(np.abs(expected)) > tolerance_rows:
        return None
    allowed = np.maximum(SPREAD * np.abs(expected), 0.5 * tolerance_rows)
    close = np.abs(offsets - expected) <= allowed
    beyond = np.abs(offsets) > tolerance_rows
    shared = close & beyond & (np.sign(offsets) == np.sign(rate))
    if shared.sum() < max(min_boundaries, MIN_SHARE * len(following)):
        return None
    members = tuple(int(following[k]) for k in np.flatnonzero(shared))
    seconds = sum(boundaries[i].seconds for i in members)
    n_rows = sum(boundaries[i].rows for i in members)
    return ClockDrift(
        members=members,
        n_following=len(following),
        offsets=offsets[shared],
        line_time=seconds / n_rows,
        header_line_time=float(np.median([boundaries[i].line_time for i in members])),
    )
