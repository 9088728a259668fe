"""Ingest: check the night's raw blocks and index their rows in time.

Raw blocks are FITS files of consecutive TDI rows (DEVELOPERS.md,
"Raw data").
Ingest sees each block's header and a summary of its pixels (the runner
reads every pixel once).  It rejects broken blocks with a one-line reason
each: unreadable files, bad headers, blocks whose image holds no
usable pixel (all NaN, one constant value, all saturated:
:func:`check_block_pixels`) and blocks whose DATE-OBS contradicts their
BLOCKSEQ and collides with another block (:mod:`._order`).  It orders the
good ones by time, maps every row to its readout time (DATE-OBS is the time
row 0 of a block was shifted out; row ``k`` follows at ``DATE-OBS + k *
LINETIME``), checks that consecutive blocks join up, and compares header site
keywords, where present, with the config's site (:mod:`._site`).  A rejected
block's rows become a gap, so the night is reduced as if its file were absent.
A file cut short part-way through its image (an interrupted copy, plain or
gzip/bzip2) keeps the rows stored whole before the cut; the rows it lost
become a gap like a missing block's, named in one line
(:func:`lost_rows_problems`).

Night rows
----------
Night row ``r`` is counted from row 0 of the first good block, at one row
per LINETIME, so that the rows of a missing block stay in the night as rows
no block covers.  A gap therefore never shifts the rows that follow it, and
nothing bridges it: it also ends a *segment*, a maximal sequence of blocks
that follow each other without gap or overlap and share line time, camera
format (NAXIS1, DATASEC, BIASSEC), TDIROWS and filter.  The runner cuts
stretches within segments only, so rows in gaps belong to no stretch.
Problems found on the way (gaps, overlaps, duplicates, settings changed
mid-night, sequence numbers out of step) are reported, one line each.

Start of the scan
-----------------
The first TDIROWS rows read after charge clocking starts are only partly
exposed: row ``k`` after the start has ``k / TDIROWS`` of the full
exposure.  Where clocking started is a fact about the night, so it is set
once, here (``start_ramp``), and recorded per block in the ``clock_row``
column; :func:`describe_rows` turns it into each row's ``rows_since_start``,
which the calibrate stages use to flag the ramp and
leave it out of the column solve.

Functions
---------
:func:`read_block_header` and :func:`read_block_rows` read one file, for use
from Python (the runner reads raw files itself, in ``pipeline.runner._rawio``, and
hands the stage headers and rows); :func:`parse_block_header`,
:func:`index_night` and :func:`describe_rows` are pure.
"""

from __future__ import annotations

import logging
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import TYPE_CHECKING, Any, Literal

import numpy as np
from pydantic import BaseModel, ConfigDict, Field

from pipeline.exceptions import IngestError
from pipeline.geometry.instrument import Site
from pipeline.runner._rawio import read_block_readout_rows, read_raw_files
from pipeline.stages.base import BLOCK_INDEX, PROBLEMS, RAW_FILES, PixelSummary, RawFile, Stage
from pipeline.stages.ingest._clock import Boundary, find_clock_drift
from pipeline.stages.ingest._header import (
    KEYWORDS,
    BlockInfo,
    camera_format,
    parse_block_header,
    parse_section,
)
from pipeline.stages.ingest._order import find_out_of_order
from pipeline.stages.ingest._site import compare_site

if TYPE_CHECKING:
    from astropy.table import Table

__all__ = [
    "KEYWORDS",
    "NEVER",
    "STAGE",
    "BlockInfo",
    "IngestOptions",
    "NightIndex",
    "StartRamp",
    "camera_format",
    "check_block_data",
    "check_block_pixels",
    "check_raw_file",
    "compare_tdi_rows",
    "describe_rows",
    "index_night",
    "ingest_files",
    "lost_rows_problems",
    "parse_block_header",
    "parse_section",
    "read_block_header",
    "read_block_rows",
    "split_rows",
]

log = logging.getLogger(__name__)

#: ``rows_since_start`` of rows with no start-of-scan ramp (see :func:`describe_rows`).
NEVER = np.iinfo(np.int64).max

#: Where charge clocking started (see :func:`index_night`).
StartRamp = Literal["night", "segment", "none"]


@dataclass
class NightIndex:
    """The night's block index and what went wrong on the way.

    Attributes
    ----------
    table : astropy.table.Table
        One row per usable block in time order, columns:
        ``file``, ``hdu``, ``row_start`` (night row of the block's first row),
        ``n_rows``, ``block_seq``, ``date_obs`` (ISO UTC), ``t_start`` (s since
        ``meta['reference_time']``), ``line_time`` (s), ``tdi_rows``,
        ``segment`` (0, 1, ...), ``segment_row`` (row of the block's first row
        counted from its segment's first row), ``n_columns``, ``image_section``,
        ``overscan_section``, ``gain``,
        ``read_noise``, ``saturation``, ``filter``, ``clock_row`` (rows clocked
        since charge clocking started, at the block's first row; -1 if it
        started before the data, see ``start_ramp`` of :func:`index_night`).
    problems : list of str
        One line per continuity problem (gap, overlap, duplicate, change).
    rejected : list of str
        One line per unusable file: ``'<file>: <reason>'``.
    """

    table: Table
    problems: list[str] = field(default_factory=list)
    rejected: list[str] = field(default_factory=list)

    @property
    def ok(self) -> bool:
        """True if no file was rejected and no problem was found."""
        return not self.problems and not self.rejected

    @property
    def n_segments(self) -> int:
        """Number of segments (0 for an empty night)."""
        return int(np.max(self.table["segment"])) + 1 if len(self.table) else 0


# ----------------------------------------------------------------------------
# File edge


def read_block_header(
    path: str | Path,
    keywords: dict[str, str] | None = None,
    defaults: dict[str, Any] | None = None,
) -> BlockInfo:
    """Read and check one raw block as a run does: its header and its pixels.

    Parameters
    ----------
    path : str or pathlib.Path
        The FITS file (plain or compressed, e.g. ``.fits.gz``).
    keywords, defaults : dict, optional
        See :func:`parse_block_header`.

    Returns
    -------
    BlockInfo

    Raises
    ------
    IngestError
        One line naming the file and the reason: not FITS, no 2-D image,
        missing or ill-typed keyword, inconsistent sections, truncated, no
        usable pixel (:func:`check_block_pixels`).
    """
    path = Path(path)
    (raw,) = read_raw_files(path.parent, [path.name])
    return check_raw_file(raw, keywords=keywords, defaults=defaults)


def check_raw_file(
    raw: RawFile,
    *,
    keywords: dict[str, str] | None = None,
    defaults: dict[str, Any] | None = None,
    flip_rows: bool = False,
) -> BlockInfo:
    """:func:`read_block_header` for a file the runner has read (a ``RawFile``).

    Checks the header (:func:`parse_block_header`, with ``keywords`` and
    ``defaults``), the size and the pixels; raises :class:`IngestError`, one
    line naming the file and why it cannot be used.  A file cut short
    (``raw.complete_rows``) is the block of its whole rows, the rows stored
    first: the first read, or with ``flip_rows`` (rows stored last-read
    first) the last read, whose DATE-OBS is then moved on to the first of
    them (``lost_rows`` line times later).
    """
    import astropy.units as u

    if raw.error is not None or raw.header is None:
        raise IngestError(f"{raw.name}: {raw.error or 'no header'}.")
    info = parse_block_header(
        raw.header,
        raw.name,
        hdu=raw.hdu or 0,
        size=raw.size,
        keywords=keywords,
        defaults=defaults,
        complete_rows=raw.complete_rows,
    )
    if raw.pixel_error is not None:
        raise IngestError(f"{raw.name}: cannot read its pixels ({raw.pixel_error}).")
    if raw.pixels is not None:
        check_block_pixels(raw.pixels, info)
    if flip_rows and info.lost_rows:
        info = replace(info, date_obs=info.date_obs + info.lost_rows * info.line_time * u.s)
    return info


def lost_rows_problems(night: NightIndex, infos: Sequence[BlockInfo], flip_rows: bool) -> list[str]:
    """One line per indexed block of a file cut short: which of its rows were lost.

    Parameters
    ----------
    night : NightIndex
        The index of the blocks.
    infos : sequence of BlockInfo
        The blocks (:func:`check_raw_file`); those with ``lost_rows`` count.
    flip_rows : bool
        Rows stored last-read first: the rows lost are the first read.

    Returns
    -------
    list of str
    """
    lost = {info.name: info for info in infos if info.lost_rows}
    lines = []
    for block in night.table:
        info = lost.get(str(block["file"]))
        if info is None:
            continue
        kept, total = info.n_rows, info.n_rows + info.lost_rows
        start = int(block["row_start"])
        if flip_rows:  # the whole rows are the last read
            rows, night_rows = (0, info.lost_rows - 1), (start - info.lost_rows, start - 1)
            which = f"last {kept} of its {total} rows (stored first)"
        else:
            rows, night_rows = (kept, total - 1), (start + kept, start + total - 1)
            which = f"first {kept} of its {total} rows"
        lines.append(
            f"{info.name}: truncated file (cut after {kept} whole rows: an interrupted copy?): "
            f"the {which} are used; rows {rows[0]}-{rows[1]} (night rows "
            f"{night_rows[0]}-{night_rows[1]}, {info.lost_rows * info.line_time:.2f} s) are "
            "lost and left out as a gap; copy the file again if the camera's copy is whole."
        )
    return lines


#: What :func:`check_block_pixels` adds to its reasons: what happens to the block.
_LEFT_OUT = "its rows are left out of the night (a gap)"


def check_block_pixels(pixels: PixelSummary, info: BlockInfo) -> None:
    """Reject a block whose image section holds no usable pixel.

    Such a block (a dead or stuck readout, a NaN-filled file, a camera
    saturated by light) would otherwise enter night-wide solutions, such as
    the column solve, as if it held sky.  Only the image section (DATASEC)
    counts: the overscan of a dead readout may still hold a bias.

    Parameters
    ----------
    pixels : PixelSummary
        Summary of every pixel of the block (the runner's ``RawFile.pixels``).
    info : BlockInfo
        The block's header (:func:`parse_block_header`).

    Raises
    ------
    IngestError
        If every image pixel is non-finite, every finite one has the same
        value, or every finite one is at or above SATURATE.
    """
    _, columns = parse_section(info.image_section)
    n_finite = pixels.n_finite[columns]
    reason = _no_usable_pixel(
        pixels.n_rows * n_finite.size,
        n_finite,
        pixels.minimum[columns],
        pixels.maximum[columns],
        info.saturation,
    )
    if reason is not None:
        raise IngestError(f"{info.name}: {reason}; {_LEFT_OUT}.")


def _no_usable_pixel(n_pixels, n_finite, minimum, maximum, saturation=None) -> str | None:
    """Why no pixel of a summary is usable, or None if some pixel is."""
    if not n_finite.any():
        return f"all {n_pixels} image pixels are NaN or infinite"
    some = n_finite > 0
    low, high = float(np.min(minimum[some])), float(np.max(maximum[some]))
    if low == high:
        return f"all {int(n_finite.sum())} finite image pixels equal {low:g} ADU (a dead readout?)"
    if saturation is not None and low >= saturation:
        return (
            f"all {int(n_finite.sum())} finite image pixels are saturated ({low:g} to {high:g} "
            f"ADU, SATURATE={saturation:g})"
        )
    return None


def check_block_data(data: np.ndarray, name: str = "<data>") -> None:
    """Reject pixels that are all non-finite or all equal.

    Parameters
    ----------
    data : ndarray, shape (n_rows, n_columns)
        The block's image pixels (or some of its rows).
    name : str
        File name, for the message.

    Raises
    ------
    IngestError
        If no pixel is finite (a NaN-filled block) or every finite pixel has
        the same value (a zero-filled block or a dead readout).
    """
    summary = PixelSummary.of(np.atleast_2d(np.asarray(data, dtype=np.float64)))
    reason = _no_usable_pixel(
        summary.n_rows * summary.n_finite.size,
        summary.n_finite,
        summary.minimum,
        summary.maximum,
    )
    if reason is not None:
        raise IngestError(f"{name}: {reason}.")


def read_block_rows(
    path: str | Path,
    info: BlockInfo,
    rows: slice | None = None,
    *,
    flip_rows: bool = False,
    flip_columns: bool = False,
) -> tuple[np.ndarray, np.ndarray]:
    """Read rows of a raw block as image and overscan arrays.

    Parameters
    ----------
    path : str or pathlib.Path
        The FITS file.
    info : BlockInfo
        Its header information (:func:`read_block_header`).
    rows : slice, optional
        Rows to read, counted in readout order (row 0 read first); default all.
    flip_rows : bool
        The file stores the rows last-read first; they are reversed so that
        row 0 is the first read, the row DATE-OBS refers to.
    flip_columns : bool
        Reverse the image columns so that the column index grows to the north.

    Returns
    -------
    image : ndarray of float32, shape (n_rows, n_image_columns)
        Raw ADU (BZERO/BSCALE applied); axis 0 is the scan axis.
    overscan : ndarray of float32, shape (n_rows, n_overscan_columns)

    Raises
    ------
    IngestError
        If the file cannot be read (e.g. truncated) or holds no usable data.
    """
    path = Path(path)
    start, stop, _ = (rows or slice(None)).indices(info.n_rows)
    try:  # as the runner reads them (a file cut short, BLANK pixels, flipped rows)
        block = read_block_readout_rows(path, info.hdu, 0, info.n_rows, start, stop, flip_rows)
    except ValueError as exc:
        raise IngestError(f"{path.name}: cannot read rows {start}:{stop} ({exc}).") from None
    check_block_data(block, path.name)
    return split_rows(block, info.image_section, info.overscan_section, flip_columns=flip_columns)


def split_rows(
    raw: np.ndarray, image_section: str, overscan_section: str, *, flip_columns: bool = False
) -> tuple[np.ndarray, np.ndarray]:
    """Split stored rows into image and overscan columns.

    Parameters
    ----------
    raw : ndarray, shape (n_rows, NAXIS1)
        Rows as stored, overscan included; axis 0 is the scan axis.
    image_section, overscan_section : str
        1-based FITS sections; only their column ranges are used.
    flip_columns : bool
        Reverse the image columns (and the overscan's, for symmetry).

    Returns
    -------
    image, overscan : ndarray of float32
        Shapes (n_rows, n_image_columns) and (n_rows, n_overscan_columns).
    """
    _, data_cols = parse_section(image_section)
    _, bias_cols = parse_section(overscan_section)
    image = np.asarray(raw[:, data_cols], dtype=np.float32)
    overscan = np.asarray(raw[:, bias_cols], dtype=np.float32)
    if flip_columns:
        image, overscan = image[:, ::-1], overscan[:, ::-1]
    return image, overscan


# ----------------------------------------------------------------------------
# The index


def index_night(
    infos: Iterable[BlockInfo],
    rejected: Sequence[str] = (),
    *,
    tolerance_rows: float = 0.5,
    start_ramp: StartRamp = "night",
    line_time_from_stamps: bool = False,
) -> NightIndex:
    """Order good blocks by time, give each its night rows and check continuity.

    Parameters
    ----------
    infos : iterable of BlockInfo
        The blocks whose headers passed :func:`parse_block_header`.
    rejected : sequence of str
        One-line reasons of the files already rejected; carried into the result.
    tolerance_rows : float
        Largest mismatch, in rows, between a block's DATE-OBS and the end of the
        block before it that still counts as contiguous (clock jitter).
    start_ramp : {'night', 'segment', 'none'}
        Where charge clocking started: with the first good block of the night
        (and went on through any gap), again at the start of every segment
        (clocking restarted after each gap), or before the first block (the
        data hold no partly exposed rows).  Sets the ``clock_row`` column.
    line_time_from_stamps : bool
        When the block boundaries show a camera clock off its LINETIME (the
        same gap or overlap at every block, :mod:`._clock`), index the night
        again with the line time the DATE-OBS stamps imply for those blocks:
        they join up, and that line time is the night's.

    Returns
    -------
    NightIndex
        The index table, problems and rejected files.
    """
    in_order, out_of_order = find_out_of_order(list(infos), tolerance_rows)
    rejected = [*rejected, *out_of_order]
    problems: list[str] = []
    blocks = sorted(in_order, key=lambda b: (b.date_obs.jd1, b.date_obs.jd2, b.block_seq, b.name))
    main_format = _main_format(blocks)
    kept: list[BlockInfo] = []
    rows: list[dict[str, Any]] = []
    reference = blocks[0].date_obs if blocks else None
    segment = 0
    boundaries: list[Boundary] = []  # every join, for the clock's pattern (._clock)
    off_lines: dict[int, int] = {}  # boundary -> its gap or overlap line in problems
    for block in blocks:
        t_start = float((block.date_obs - reference).sec)
        if not kept:
            rows.append(_index_row(block, t_start, 0, segment, 0))
            kept.append(block)
            continue
        prev, prev_row = kept[-1], rows[-1]
        expected = prev_row["t_start"] + prev.n_rows * prev.line_time
        offset = (t_start - expected) / prev.line_time  # rows; > 0 gap, < 0 overlap
        if abs(t_start - prev_row["t_start"]) < tolerance_rows * prev.line_time and (
            block.n_rows == prev.n_rows and block.block_seq == prev.block_seq
        ):
            problems.append(
                f"{block.name}: duplicate of {prev.name} (same DATE-OBS and BLOCKSEQ "
                f"{block.block_seq}); left out."
            )
            continue
        new_segment = _continuity(block, prev, problems, main_format)
        apart, line, off = _join(block, prev, offset, tolerance_rows)
        if off:
            off_lines[len(boundaries)] = len(problems)
        if line is not None:
            problems.append(line)
        boundaries.append(
            Boundary(
                before=prev.name,
                after=block.name,
                offset=float(offset),
                rows=int(prev.n_rows),
                seconds=float(t_start - prev_row["t_start"]),
                line_time=float(prev.line_time),
                follows=block.block_seq - prev.block_seq == 1
                and bool(np.isclose(block.line_time, prev.line_time, rtol=1e-9, atol=0)),
            )
        )
        new_segment = new_segment or apart
        segment += new_segment
        row_start = prev_row["row_start"] + prev.n_rows + round(offset)
        segment_row = 0 if new_segment else prev_row["segment_row"] + prev.n_rows
        rows.append(_index_row(block, t_start, row_start, segment, segment_row))
        kept.append(block)
    drift = _one_clock_fault(problems, boundaries, off_lines, tolerance_rows)
    if drift is not None and line_time_from_stamps:
        return _indexed_at(drift, blocks, rejected, tolerance_rows, start_ramp)
    if start_ramp not in ("night", "segment", "none"):
        raise ValueError(f"start_ramp must be 'night', 'segment' or 'none'; got {start_ramp!r}.")
    for row in rows:
        clock_rows = {"night": row["row_start"], "segment": row["segment_row"], "none": -1}
        row["clock_row"] = clock_rows[start_ramp]
    table = _index_table(rows)
    table.meta["start_ramp"] = start_ramp
    table.meta["reference_time"] = reference.isot if reference is not None else None
    table.meta["n_rejected"] = len(rejected)
    table.meta["n_problems"] = len(problems)
    for line in rejected:
        log.error("Rejected %s", line)
    for line in problems:
        log.warning("%s", line)
    log.info(
        "Indexed %d blocks in %d segment(s), %d rejected, %d problem(s)",
        len(table),
        segment + 1 if rows else 0,
        len(rejected),
        len(problems),
    )
    return NightIndex(table, problems, list(rejected))


def _format(block: BlockInfo) -> tuple[int, tuple[int, int], tuple[int, int]]:
    """The camera format of a block: what its columns are (:func:`camera_format`)."""
    return camera_format(block.n_columns, block.image_section, block.overscan_section)


def _describe_format(block_format: tuple[int, tuple[int, int], tuple[int, int]]) -> str:
    n_columns, (d1, d2), (b1, b2) = block_format
    return f"NAXIS1 {n_columns}, DATASEC columns {d1}:{d2}, BIASSEC columns {b1}:{b2}"


def _main_format(blocks: Sequence[BlockInfo]) -> tuple[int, tuple, tuple] | None:
    """The format most blocks have (the earliest of equally common ones)."""
    formats = [_format(b) for b in blocks]
    return max(formats, key=formats.count) if formats else None


def _continuity(block, prev, problems, main_format) -> bool:
    """Append format and setting problems between ``prev`` and ``block``; True: new segment.

    A change of camera format names the block whose format differs from the
    night's main format (``main_format``), not the block that returns to it.
    """
    new_segment = _format(block) != _format(prev)
    if new_segment and _format(block) != main_format:
        n_columns = parse_section(block.image_section)[1]
        problems.append(
            f"{block.name}: format {_describe_format(_format(block))} differs from the "
            f"night's ({_describe_format(main_format)}); new segment, its "
            f"{n_columns.stop - n_columns.start} image columns solved on their own."
        )
    changes = []
    if not np.isclose(block.line_time, prev.line_time, rtol=1e-9, atol=0):
        changes.append(f"LINETIME {prev.line_time} -> {block.line_time} s")
    for label, old, new in (
        ("TDIROWS", prev.tdi_rows, block.tdi_rows),
        ("FILTER", prev.filter, block.filter),
    ):
        if old != new:
            changes.append(f"{label} {old} -> {new}")
    if changes:
        problems.append(f"{block.name}: changed mid-night ({'; '.join(changes)}); new segment.")
        new_segment = True
    # Calibrate follows these per row, so the rows stay one segment; but a change
    # mid-night is either a new readout mode or a wrong header, and a wrong GAIN
    # scales the block's fluxes: say so.
    readout = [
        f"{label} {old} -> {new} {unit}"
        for label, old, new, unit in (
            ("GAIN", prev.gain, block.gain, "e-/ADU"),
            ("RDNOISE", prev.read_noise, block.read_noise, "e-"),
            ("SATURATE", prev.saturation, block.saturation, "ADU"),
        )
        if not np.isclose(old, new, rtol=1e-6, atol=0)
    ]
    if readout:
        problems.append(
            f"{block.name}: readout changed mid-night ({'; '.join(readout)}); calibrated with "
            "its own values: check the header if the camera's readout mode did not change."
        )
    return new_segment


def _join(block, prev, offset, tolerance_rows) -> tuple[bool, str | None, bool]:
    """Whether ``block`` joins ``prev`` in time: ``(new_segment, problem, off)``.

    ``off``: the problem is a gap or an overlap (a boundary off in time).
    """
    seq_step = block.block_seq - prev.block_seq
    if offset > tolerance_rows:
        missing = offset / (block.n_rows + block.lost_rows)  # in blocks of its header's size
        return (
            True,
            f"{block.name}: gap of {offset:.1f} rows ({offset * prev.line_time:.2f} s, "
            f"about {missing:.2f} block(s); BLOCKSEQ {prev.block_seq} -> {block.block_seq}) "
            f"after {prev.name}; new segment.",
            True,
        )
    if offset < -tolerance_rows:
        return (
            True,
            f"{block.name}: starts {-offset:.1f} rows ({-offset * prev.line_time:.2f} s) "
            f"before the end of {prev.name} (overlap); its rows win; new segment.",
            True,
        )
    if seq_step != 1:
        return (
            False,
            f"{block.name}: BLOCKSEQ {prev.block_seq} -> {block.block_seq} but the times of "
            f"{prev.name} and {block.name} join up (clock or numbering error?).",
            False,
        )
    return False, None, False


def _one_clock_fault(problems: list[str], boundaries, off_lines: dict, tolerance_rows):
    """Replace the gap and overlap lines of a clock that is not LINETIME by one line.

    ``off_lines``: boundary index -> index of its gap or overlap line in
    ``problems`` (see :mod:`._clock`).  The per-boundary lines are logged at
    debug level instead.  Returns the :class:`~._clock.ClockDrift`, or None.
    """
    drift = find_clock_drift(boundaries, tolerance_rows)
    if drift is None:
        return None
    replaced = sorted(off_lines[i] for i in drift.members if i in off_lines)
    if not replaced:
        return None
    for k in replaced:
        log.debug("%s", problems[k])
    line = drift.describe(boundaries, tolerance_rows)
    gone = set(replaced)
    kept = [p for k, p in enumerate(problems) if k not in gone]
    kept.insert(replaced[0], line)
    problems[:] = kept
    return drift


def _indexed_at(drift, blocks, rejected, tolerance_rows, start_ramp) -> NightIndex:
    """The night indexed again with the line time the stamps imply (``line_time_from_stamps``).

    Blocks whose LINETIME is the drifting one take the implied line time;
    the first problem line says so.
    """
    header = drift.header_line_time
    again = [
        replace(b, line_time=drift.line_time)
        if np.isclose(b.line_time, header, rtol=1e-9, atol=0)
        else b
        for b in blocks
    ]
    night = index_night(again, rejected, tolerance_rows=tolerance_rows, start_ramp=start_ramp)
    night.problems.insert(
        0,
        f"LINETIME {header:.9g} s taken as {drift.line_time:.9g} s, the line time the "
        f"DATE-OBS stamps imply ({drift.relative * 1e6:+.0f} ppm; "
        "stages.ingest.line_time_from_stamps): the camera's clock is not its LINETIME.",
    )
    return night


def _index_row(block: BlockInfo, t_start, row_start, segment, segment_row) -> dict[str, Any]:
    return {
        "file": block.name,
        "hdu": block.hdu,
        "row_start": int(row_start),
        "n_rows": block.n_rows,
        "block_seq": block.block_seq,
        "date_obs": block.date_obs.isot,
        "t_start": t_start,
        "line_time": block.line_time,
        "tdi_rows": block.tdi_rows,
        "segment": segment,
        "segment_row": int(segment_row),
        "n_columns": block.n_columns,
        "image_section": block.image_section,
        "overscan_section": block.overscan_section,
        "gain": block.gain,
        "read_noise": block.read_noise,
        "saturation": block.saturation,
        "filter": block.filter,
    }


_INDEX_DTYPES = {
    "file": str,
    "hdu": np.int32,
    "row_start": np.int64,
    "n_rows": np.int64,
    "block_seq": np.int64,
    "date_obs": str,
    "t_start": np.float64,
    "line_time": np.float64,
    "tdi_rows": np.int32,
    "segment": np.int32,
    "segment_row": np.int64,
    "n_columns": np.int32,
    "image_section": str,
    "overscan_section": str,
    "gain": np.float64,
    "read_noise": np.float64,
    "saturation": np.float64,
    "filter": str,
    "clock_row": np.int64,
}


def _index_table(rows: list[dict[str, Any]]) -> Table:
    from astropy.table import Table

    columns = {}
    for name, dtype in _INDEX_DTYPES.items():
        if dtype is str:
            columns[name] = np.array([r[name] for r in rows], dtype="U") if rows else []
        else:
            columns[name] = np.array([r[name] for r in rows], dtype=dtype)
    table = Table(columns)
    for name, dtype in _INDEX_DTYPES.items():
        if dtype is str and not rows:
            table[name] = table[name].astype("U1")
    table["t_start"].unit = "s"
    table["line_time"].unit = "s"
    table["gain"].unit = "electron / adu"
    table["read_noise"].unit = "electron"
    table["saturation"].unit = "adu"
    return table


def describe_rows(index: Table, lo: int, hi: int) -> dict[str, np.ndarray]:
    """Per-row facts for night rows ``[lo, hi)`` from the block index.

    Parameters
    ----------
    index : astropy.table.Table
        ``NightIndex.table`` (the ``block_index`` product).
    lo, hi : int
        Night rows (scan axis).

    Returns
    -------
    dict of ndarray, each of shape (hi - lo,)
        ``covered`` (bool: some block holds the row), ``time`` (readout time,
        s since ``index.meta['reference_time']``; NaN where not covered),
        ``segment`` (-1 where not covered), ``segment_row`` (row counted from its
        segment's first row), ``night_row``, ``gain``, ``read_noise``, ``saturation``
        (header values; NaN where not covered), ``tdi_rows`` (0 where not
        covered).  Where blocks overlap, the later block wins, as when the
        runner reads the rows.
    """
    n = max(int(hi) - int(lo), 0)
    out = {
        "covered": np.zeros(n, bool),
        "time": np.full(n, np.nan),
        "segment": np.full(n, -1, np.int64),
        "segment_row": np.full(n, -1, np.int64),
        "night_row": np.arange(lo, lo + n, dtype=np.int64),
        "gain": np.full(n, np.nan),
        "read_noise": np.full(n, np.nan),
        "saturation": np.full(n, np.nan),
        "tdi_rows": np.zeros(n, np.int64),
        "rows_since_start": np.full(n, NEVER, np.int64),
    }
    for block in index:
        start = int(block["row_start"])
        r0, r1 = max(lo, start), min(hi, start + int(block["n_rows"]))
        if r0 >= r1:
            continue
        sel = slice(r0 - lo, r1 - lo)
        k = np.arange(r0 - start, r1 - start)
        out["covered"][sel] = True
        out["time"][sel] = float(block["t_start"]) + k * float(block["line_time"])
        out["segment"][sel] = int(block["segment"])
        out["segment_row"][sel] = int(block["segment_row"]) + k
        for name in ("gain", "read_noise", "saturation", "tdi_rows"):
            out[name][sel] = block[name]
        clock_row = int(block["clock_row"]) if "clock_row" in index.colnames else -1
        if clock_row >= 0:
            out["rows_since_start"][sel] = clock_row + k
    return out


# ----------------------------------------------------------------------------
# The stage


class IngestOptions(BaseModel):
    """Options of the ingest stage (``stages.ingest`` in the config)."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    keywords: dict[str, str] = Field(
        default_factory=dict,
        description="Canonical name -> the camera's FITS keyword, where they differ "
        f"(canonical names: {', '.join(KEYWORDS)}).",
    )
    defaults: dict[str, Any] = Field(
        default_factory=dict,
        description="Canonical name -> value to use when the keyword is missing.",
    )
    tolerance_rows: float = Field(
        0.5, ge=0, description="Largest DATE-OBS mismatch, in rows, still contiguous."
    )
    line_time_from_stamps: bool = Field(
        False,
        description="When every block boundary shows the same camera clock off LINETIME "
        "(a gap or overlap of the same size at every block), index the night with the line "
        "time the DATE-OBS stamps imply instead of LINETIME.",
    )
    start_ramp: StartRamp = Field(
        "night",
        description="Where charge clocking started: with the night's first block ('night'), "
        "at every segment after a gap ('segment'), or before the first block ('none': no partly "
        "exposed rows). The first TDIROWS rows after it get LOW_EXPOSURE and stay out of "
        "the column solve.",
    )


def ingest_files(
    files: Sequence[RawFile],
    options: IngestOptions,
    site: Site | None = None,
    tdi_rows: int | None = None,
    *,
    flip_rows: bool = False,
) -> NightIndex:
    """Check the runner's raw files and index the good ones.

    Parameters
    ----------
    files : sequence of RawFile
        The night's raw files with their headers and pixel summaries.
    options : IngestOptions
    site : pipeline.geometry.Site, optional
        The config's site; header site keywords that differ from it are
        reported (:func:`~pipeline.stages.ingest._site.compare_site`).
    tdi_rows : int, optional
        The config's ``camera.tdi_rows``; header TDIROWS that differ from it
        are reported (:func:`compare_tdi_rows`).
    flip_rows : bool
        The config's ``camera.flip_rows`` (for the rows of a file cut short:
        :func:`check_raw_file`).

    Returns
    -------
    NightIndex
        A file cut short part-way through its image is indexed with its
        whole rows; its lost rows are a gap, named in a problem line
        (:func:`lost_rows_problems`).
    """
    infos, rejected = [], []
    for raw in files:
        try:
            infos.append(
                check_raw_file(
                    raw, keywords=options.keywords, defaults=options.defaults, flip_rows=flip_rows
                )
            )
        except IngestError as exc:
            rejected.append(str(exc))
    night = index_night(
        infos,
        rejected,
        tolerance_rows=options.tolerance_rows,
        start_ramp=options.start_ramp,
        line_time_from_stamps=options.line_time_from_stamps,
    )
    # A cut file's line goes first: the gap after it, reported by the index, follows from it.
    cut = lost_rows_problems(night, infos, flip_rows)
    for line in cut:
        log.warning("%s", line)
    night.problems[:0] = cut
    lines = compare_site(infos, site) if site is not None else []
    if tdi_rows is not None:
        lines += compare_tdi_rows(infos, tdi_rows)
    for line in lines:
        log.warning("%s", line)
        night.problems.append(line)
    return night


def compare_tdi_rows(infos: Sequence[BlockInfo], tdi_rows: int) -> list[str]:
    """Problem lines for blocks whose header TDIROWS differs from the config's.

    The geometry (the stars' tracks and exposures, hence the catalogue's
    magnitudes) uses ``camera.tdi_rows``; the image products' exposure
    (``XPOSURE``, and so the science images' scale) and the start-of-scan
    ramp use the header's.  Two different values mean one of them is wrong.

    Parameters
    ----------
    infos : sequence of BlockInfo
        The blocks.
    tdi_rows : int
        The config's ``camera.tdi_rows``.

    Returns
    -------
    list of str
        One line per distinct header value that differs, naming the blocks.
    """
    by_value: dict[int, list[str]] = {}
    for info in infos:
        if info.tdi_rows != tdi_rows:
            by_value.setdefault(info.tdi_rows, []).append(info.name)
    return [
        f"{names[0] if len(names) == 1 else f'{names[0]} and {len(names) - 1} more'}: header "
        f"TDIROWS={value} but the config's camera.tdi_rows is {tdi_rows}: the geometry and the "
        "catalogue use the config's, the images' exposure (XPOSURE) the header's; check "
        "camera.tdi_rows or the camera's header."
        for value, names in by_value.items()
    ]


def _run(*, inputs, options: IngestOptions, context) -> dict[str, Any]:
    night = ingest_files(
        inputs[RAW_FILES],
        options,
        context.site,
        context.camera.tdi_rows,
        flip_rows=context.camera.flip_rows,
    )
    return {
        BLOCK_INDEX: night.table,
        "ingest_report": {
            "ok": night.ok,
            "n_blocks": len(night.table),
            "n_segments": night.n_segments,
            "rejected": night.rejected,
            "problems": night.problems,
        },
        # Rejected files and continuity problems make the run a partial
        # failure (exit status 1) while the good blocks are still reduced.
        PROBLEMS: [f"rejected {line}" for line in night.rejected] + night.problems,
    }


#: Declaration of the ingest stage for the runner.
STAGE = Stage(
    name="ingest",
    run=_run,
    options=IngestOptions,
    requires=(RAW_FILES,),
    scope="night",
    # compared with the headers
    uses=("site.latitude", "site.longitude", "site.height", "camera.tdi_rows", "camera.flip_rows"),
    defines_rows=True,
    description="Check raw block headers, order blocks in time, index rows and segments.",
    # 2: clock_row column (start_ramp); 3: segment, image/overscan_section;
    # 4: blocks without usable pixels or out of order are rejected, header
    # sites compared with the config
    # 5: units on gain, read_noise, saturation
    # 6: a DATE-OBS without a time of day is rejected (it read as midnight), a
    # GAIN, RDNOISE or SATURATE that changes mid-night is reported, and header
    # TDIROWS that differ from camera.tdi_rows
    # 7: a file cut short keeps its whole rows (the rest a gap, reported)
    # instead of being rejected whole; the camera format is the sections'
    # columns (a shorter block, or spaces in DATASEC, is no new format); an
    # image extension with INHERIT = T takes the primary header's keywords
    # 8: a camera clock off its LINETIME (the same gap or overlap at every block)
    # is one problem with the line time the DATE-OBS stamps imply (and, with
    # line_time_from_stamps, the night's line time)
    version=8,
)
