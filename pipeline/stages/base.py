"""The stage protocol: what a stage declares and what the runner hands it.

A stage is a pure function of in-memory inputs and typed options.  It never
opens, writes or even names a file; the runner (:mod:`pipeline.runner`) reads
the inputs, calls the stage and stores what it returns.  A stage is therefore
callable from Python on arrays and tables, and the runner can run it serially,
on a process pool or on a dask cluster without the stage knowing.

The calling convention is::

    products = stage.run(inputs=inputs, options=options, context=context)

``inputs``
    A mapping from each name in ``stage.requires`` to its value:

    * an upstream stage's name -> that stage's products, a ``dict`` from
      product name to object.  If the upstream stage has the same scope (or is
      night-scoped), this is its products for the same stretch (or the night).
      If a night-scoped stage requires a stretch-scoped one, the value is a
      read-only sequence with one such ``dict`` per stretch, in stretch order,
      loaded lazily (``context.input_stretches`` gives the stretch of each
      entry, with its row ranges).  Normally that is every stretch of the plan;
      a stage declared with ``partial_inputs=True`` gets only the stretches
      whose upstream products are usable (see :class:`Stage`);
    * :data:`NEIGHBOURS` (stretch scope, for a stage that declares
      ``neighbours``) -> a ``dict`` from each upstream name in
      ``stage.neighbours`` to a pair ``(before, after)``: the products of the
      stretches just before and just after this one in the same segment (see
      "Neighbouring stretches" below), or None where there is none;
    * :data:`RAW_FILES` (night scope) -> a list of :class:`RawFile`, one per
      raw file of the night, with its header (or the reason it is unreadable)
      and a :class:`PixelSummary` of its pixels (the runner reads every pixel
      once, so that blocks without usable data can be rejected);
    * an upstream stage named in ``stage.optional`` -> as above, or None
      when that stage is not in the graph, or its products are unusable
      (failed, blocked, damaged, not run; for a stretch-scoped one: no
      stretch usable).  The stage then works without it;
    * :data:`RUN_STATUS` (night scope) -> a ``dict`` describing the state
      of every unit of the stages before this one (see
      :func:`pipeline.runner.NightStore.run_status`): ``n_stretches`` (None
      before the block index exists) and ``stages``, a list of
      ``{"name", "units": {unit: [state, reason]}, "problems": {unit:
      [line, ...]}}``.  It enters the input hash, so a change of any
      earlier unit's state reruns the stage;
    * :data:`RAW_ROWS` (stretch scope) -> a ``float32`` array of shape
      ``(context.stretch.hi - context.stretch.lo, n_columns_in_file)`` holding
      night rows ``[lo, hi)`` (the stretch with its overlap margins) from the
      raw blocks, overscan columns included, BZERO/BSCALE applied.  Axis 0 is
      the scan axis in readout order (row 0 read first): with
      ``camera.flip_rows`` the runner reverses each block's stored rows.
      Columns are as stored (``camera.flip_columns`` is the stage's business,
      since only it knows DATASEC).  Night rows that no block covers (gaps)
      are NaN.  The runner assembles it from the block index.
``options``
    An instance of ``stage.options`` (a pydantic model), validated from the
    ``stages.<name>`` section of the config.  Its field names mirror the
    keyword arguments of the stage's public function, so
    ``my_function(array, **dict(options))`` reads like the YAML section.
``context``
    A :class:`StageContext`: site, camera, run settings, the night's name, the
    stretch being processed and the whole stretch plan.

The return value is a ``dict`` from product name to object.  One name is
reserved: under :data:`PROBLEMS` a stage may return a list of one-line
strings, the things wrong with its input that it worked around (a rejected
file, a gap).  They are not a product: the runner records them in the unit's
provenance, lists them in the run summary and counts the unit as a partial
failure (``zdrift run`` exits 1), on every later run too while the unit stays
up to date.  The runner stores
``numpy.ndarray`` as FITS images, ``astropy.io.fits`` HDUs/HDU lists as FITS
(keeping their headers, e.g. a WCS), ``astropy.table.Table``/``QTable`` as
ECSV, ``dict``/``list`` of JSON-able values as JSON and a ``str`` as an HTML
page (``.html``); it reads them back as
the same types for downstream stages.

Rows of the night and stretches
-------------------------------
Exactly one night-scoped stage of a graph sets ``defines_rows=True`` and
returns a product named :data:`BLOCK_INDEX`: an astropy ``Table`` with one row
per usable raw block and at least the columns ``file`` (name relative to the
night's ``raw_dir``, as in :attr:`RawFile.name`), ``hdu`` (index of the image
HDU), ``row_start`` (night row index of the block's first row) and ``n_rows``.
The night has ``max(row_start + n_rows)`` rows.  They fall into segments
(:func:`segment_rows`): runs of blocks that join up without a gap and share
the optional :data:`SEGMENT` column's value (ingest starts a new segment at
every gap, overlap and change of camera format).  The runner cuts each
segment into stretches of ``run.stretch_rows`` rows (:func:`plan_stretches`;
unset, as many rows as keep a stretch within :data:`STRETCH_PIXELS` pixels,
:func:`default_stretch_rows`), each widened by ``run.overlap_rows`` on both
sides but never beyond its segment, so a stretch never mixes formats or
reaches across a gap (rows in gaps belong to no stretch), and assembles
:data:`RAW_ROWS` from the index.  Per-stretch products cover ``[lo, hi)``,
margins included, unless the stage says otherwise in its docstring;
``context.stretch.core`` selects the stretch's own rows.

Neighbouring stretches
----------------------
A per-stretch stage whose upstream products tile the night without margins
(rectify's stretches adjoin exactly) may still need a little of the
stretches on either side, to measure what lies across a seam whole.  It
declares ``Stage(neighbours=("rectify",))``, naming stretch-scoped stages it
requires.  Besides ``inputs["rectify"]`` (its own stretch) it then gets
``inputs[NEIGHBOURS]["rectify"] == (before, after)``: the products of the
stretches ``index - 1`` and ``index + 1`` if they lie in the same segment
(stretches of different segments never adjoin), else None.  Each is a
read-only mapping that reads a product only when it is looked up; an image
product (``HDUList``) comes opened lazily, so
``pipeline.products.plane_columns(hdul["FLUX"], slice(0, 20))`` keeps only
those columns (``.data`` keeps the whole plane; astropy's ``section[:, :20]``
reads such a strip row by row, slowly; the file is still read through once,
to check its SHA-256, without being kept), and the
runner closes the files after the stage returns (so return no neighbour's HDU
as a product).  Called from Python with in-memory HDU lists, a stage gets no
file (``hdul.filename()`` is None, ``section`` does not work;
``plane_columns`` slices ``.data`` then).
A neighbour whose upstream unit failed, is blocked or has not run is handed
over as None too: the stretch still runs (the stage treats that side as
having no data), and the runner reports ``ran without neighbour s0004
(failed in rectify)`` as a problem (``zdrift run`` exits 1).  The
neighbours' output hashes (None for one left out) enter the unit's input
hashes, and a neighbour's unit that is not up to date makes the unit stale
too: a changed neighbour, or a missing one that appears, reruns the
stretch, and a night in which nothing changed reruns nothing.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any, Literal

import numpy as np
from pydantic import BaseModel

if TYPE_CHECKING:
    from astropy.io.fits import Header

    from pipeline.geometry.instrument import Camera, Site

__all__ = [
    "BLOCK_INDEX",
    "BLOCK_INDEX_COLUMNS",
    "NEIGHBOURS",
    "PROBLEMS",
    "RAW_FILES",
    "RAW_ROWS",
    "RUN_STATUS",
    "SEGMENT",
    "ExternalFile",
    "PixelSummary",
    "RawFile",
    "Stage",
    "StageContext",
    "Stretch",
    "check_graph",
    "default_stretch_rows",
    "plan_stretches",
    "segment_rows",
]

#: Pseudo-input (night scope): the night's raw files with their headers.
RAW_FILES = "raw_files"
#: Pseudo-input (stretch scope): the stretch's raw rows, margins included.
RAW_ROWS = "raw_rows"
#: Input key (stretch scope): the products of the neighbouring stretches.
NEIGHBOURS = "neighbours"
#: Reserved key of a stage's return value: one-line problems with its input.
PROBLEMS = "problems"
#: Pseudo-input (night scope): the state of every unit of the earlier stages.
RUN_STATUS = "run_status"
#: Name of the product that defines the night's rows (see module docstring).
BLOCK_INDEX = "block_index"
#: Columns the block index must have.
BLOCK_INDEX_COLUMNS = ("file", "hdu", "row_start", "n_rows")
#: Optional block index column: blocks with different values never share a stretch.
SEGMENT = "segment"

Scope = Literal["night", "stretch"]
Products = dict[str, Any]


@dataclass(frozen=True)
class Stretch:
    """A stretch of night rows: the unit of per-stretch work.

    Parameters
    ----------
    index : int
        Position of the stretch in the night, from 0.
    start, stop : int
        The stretch's own night rows ``[start, stop)`` (the scan axis).
    lo, hi : int
        The rows handed to the stage, ``[lo, hi)``: ``[start, stop)`` widened
        by the overlap margin on each side and clipped to its segment.
    segment : (int, int) or None
        Night rows ``[start, stop)`` of the segment the stretch lies in: no
        data lie beyond them for this stretch (a gap, another camera format,
        or the night's ends).  None: the whole night.
    """

    index: int
    start: int
    stop: int
    lo: int
    hi: int
    segment: tuple[int, int] | None = None

    @property
    def id(self) -> str:
        """Name of the stretch in the product store, e.g. ``'s0003'``."""
        return f"s{self.index:04d}"

    @property
    def core(self) -> slice:
        """Slice selecting rows ``[start, stop)`` in an array covering ``[lo, hi)``."""
        return slice(self.start - self.lo, self.stop - self.lo)

    @property
    def n_rows(self) -> int:
        """Number of rows handed to the stage, ``hi - lo``."""
        return self.hi - self.lo


#: Most pixels (core rows x image columns) of a stretch whose length the
#: config leaves to the runner (``run.stretch_rows`` unset).  A worker's peak
#: memory grows with its stretch's pixels (detect holds about 100 bytes per
#: pixel of the stretch it measures, see
#: :func:`pipeline.runner._executors.worker_memory`), so a wide chip gets
#: proportionally shorter stretches.
STRETCH_PIXELS = 4096 * 1024
#: Rows of such a stretch on a chip of at most ``STRETCH_PIXELS / 4096`` columns.
MAX_STRETCH_ROWS = 4096
#: The stretch rows chosen are a multiple of this (and at least this many):
#: the column statistics' blocks (256 rows by default) then lie whole in
#: stretches, and a rectified stretch stays far wider than the seam margins
#: of detect (a few tens of columns).
STRETCH_ROWS_STEP = 256


def default_stretch_rows(n_columns: int) -> int:
    """Rows per stretch when ``run.stretch_rows`` is unset.

    At most :data:`MAX_STRETCH_ROWS` rows, and no more than fit
    :data:`STRETCH_PIXELS` pixels with ``n_columns`` columns, rounded down to
    a multiple of :data:`STRETCH_ROWS_STEP` (at least one step): 4096 rows up
    to 1024 columns, 2048 at 2048, 1024 at 4096, 256 from 16384 on.

    Parameters
    ----------
    n_columns : int
        The camera's image columns (across the scan; overscan excluded).

    Returns
    -------
    int

    Examples
    --------
    >>> [default_stretch_rows(n) for n in (1024, 2048, 3000, 4096, 20000)]
    [4096, 2048, 1280, 1024, 256]
    """
    if n_columns < 1:
        raise ValueError(f"n_columns must be >= 1; got {n_columns}.")
    fit = STRETCH_PIXELS // int(n_columns) // STRETCH_ROWS_STEP * STRETCH_ROWS_STEP
    return int(min(MAX_STRETCH_ROWS, max(STRETCH_ROWS_STEP, fit)))


def plan_stretches(
    n_rows: int,
    stretch_rows: int,
    overlap_rows: int,
    segments: Sequence[tuple[int, int]] | None = None,
) -> tuple[Stretch, ...]:
    """Cut the night's rows into stretches with overlap margins.

    Parameters
    ----------
    n_rows : int
        Number of rows in the night (scan axis).
    stretch_rows : int
        Rows per stretch; the last stretch of a segment holds the remainder.
    overlap_rows : int
        Margin added on each side of a stretch, clipped to its segment.
    segments : sequence of (int, int), optional
        Night rows ``[start, stop)`` of the night's segments, in row order and
        not overlapping (see :func:`segment_rows`).  A stretch never crosses a
        segment boundary and its margins stop there, so that rows of another
        camera format, or on the far side of a gap, never enter it; rows in no
        segment (gaps) get no stretch.  Default: one segment, the whole night.

    Returns
    -------
    tuple of Stretch
        In row order, numbered from 0 across segments; empty when ``n_rows``
        is 0.

    Examples
    --------
    >>> [(s.start, s.stop, s.lo, s.hi) for s in plan_stretches(10, 4, 1)]
    [(0, 4, 0, 5), (4, 8, 3, 9), (8, 10, 7, 10)]
    >>> [(s.start, s.stop, s.lo, s.hi) for s in plan_stretches(10, 4, 1, [(0, 5), (7, 10)])]
    [(0, 4, 0, 5), (4, 5, 3, 5), (7, 10, 7, 10)]
    """
    if n_rows < 0:
        raise ValueError(f"n_rows must be >= 0; got {n_rows}.")
    if stretch_rows < 1:
        raise ValueError(f"stretch_rows must be >= 1; got {stretch_rows}.")
    if overlap_rows < 0:
        raise ValueError(f"overlap_rows must be >= 0; got {overlap_rows}.")
    if segments is None:
        segments = [(0, n_rows)] if n_rows else []
    segments = [(int(first), int(last)) for first, last in segments]
    previous_stop = 0
    for first, last in segments:
        if not previous_stop <= first < last <= n_rows:
            raise ValueError(
                f"segments must be ascending, non-empty, non-overlapping row ranges within "
                f"[0, {n_rows}); got {segments}."
            )
        previous_stop = last
    stretches = []
    for first, last in segments:
        for start in range(first, last, stretch_rows):
            stop = min(start + stretch_rows, last)
            lo = max(start - overlap_rows, first)
            hi = min(stop + overlap_rows, last)
            stretches.append(Stretch(len(stretches), start, stop, lo, hi, (first, last)))
    return tuple(stretches)


def segment_rows(index: Any) -> list[tuple[int, int]]:
    """Night rows ``[start, stop)`` of the segments of a block index.

    A segment is a maximal run of blocks that join up in rows (no gap) and
    share the optional :data:`SEGMENT` column's value.  Where a block starts
    before the end of the block before it (an overlap), its rows win, as when
    the runner reads them, and a new segment starts with it if the labels differ.

    Parameters
    ----------
    index : astropy.table.Table or pipeline.runner._blockrows.BlockRows
        A block index (columns ``row_start``, ``n_rows``, optionally ``segment``).

    Returns
    -------
    list of (int, int)
        In row order; empty for an empty index.

    Examples
    --------
    >>> from astropy.table import Table
    >>> segment_rows(Table({"row_start": [0, 4, 10], "n_rows": [4, 4, 2]}))
    [(0, 8), (10, 12)]
    >>> segment_rows(Table({"row_start": [0, 4, 8], "n_rows": [4, 4, 4], "segment": [0, 1, 0]}))
    [(0, 4), (4, 8), (8, 12)]
    """
    starts = np.asarray(index["row_start"], dtype=np.int64)
    stops = starts + np.asarray(index["n_rows"], dtype=np.int64)
    labels = np.asarray(index[SEGMENT]) if SEGMENT in index.colnames else np.zeros(starts.size)
    segments: list[list[int]] = []
    label = None
    for position in np.argsort(starts, kind="stable"):
        start, stop = int(starts[position]), int(stops[position])
        if segments and label == labels[position] and start <= segments[-1][1]:
            segments[-1][1] = max(segments[-1][1], stop)
            continue
        if segments and start < segments[-1][1]:  # a new segment's rows win
            segments[-1][1] = start
            if segments[-1][1] <= segments[-1][0]:
                segments.pop()
        segments.append([start, stop])
        label = labels[position]
    return [(start, stop) for start, stop in segments]


@dataclass(frozen=True)
class PixelSummary:
    """Extremes of every stored column of a raw image, for checks of the data.

    The runner reads each raw file's pixels once (in chunks of rows) and
    hands ingest this summary, so that a block whose image holds no usable
    pixel (all NaN, one constant value, or all saturated) is rejected before
    it can enter a night-wide solution.  Exact: a column summary covers every
    row of the file.

    Parameters
    ----------
    n_rows : int
        Rows summarised (NAXIS2).
    n_finite : ndarray of int64, shape (NAXIS1,)
        Finite pixels in each stored column (overscan included).
    minimum, maximum : ndarray of float64, shape (NAXIS1,)
        Smallest and largest finite value of each column, physical ADU
        (BZERO/BSCALE applied); NaN where a column has no finite pixel.
    """

    n_rows: int
    n_finite: np.ndarray
    minimum: np.ndarray
    maximum: np.ndarray

    @classmethod
    def of(cls, rows: np.ndarray) -> PixelSummary:
        """The summary of an array of rows, shape (n_rows, n_columns)."""
        rows = np.asarray(rows)
        if rows.ndim != 2:
            raise ValueError(f"rows must be a 2-D array (rows, columns); got shape {rows.shape}.")
        n_rows, n_columns = rows.shape
        none = np.full(n_columns, np.nan)
        if rows.dtype.kind in "iu" and n_rows:
            # Integers (raw pixels as stored, without BLANK) are all finite: the
            # same summary without a mask of the rows, whose count took 60 % of
            # it (a 1024 x 4112 chunk of 16-bit pixels: 1.0 ms instead of 4.9).
            return cls(
                n_rows=n_rows,
                n_finite=np.full(n_columns, n_rows, dtype=np.int64),
                minimum=rows.min(axis=0).astype(np.float64),
                maximum=rows.max(axis=0).astype(np.float64),
            )
        # fmin/fmax skip NaN (NaN only where a whole column is NaN), without warnings.
        return cls(
            n_rows=n_rows,
            n_finite=np.isfinite(rows).sum(axis=0, dtype=np.int64),
            minimum=np.fmin.reduce(rows, axis=0).astype(np.float64) if n_rows else none,
            maximum=np.fmax.reduce(rows, axis=0).astype(np.float64) if n_rows else none,
        )

    def __add__(self, other: PixelSummary) -> PixelSummary:
        """The summary of both sets of rows (same columns)."""
        return PixelSummary(
            n_rows=self.n_rows + other.n_rows,
            n_finite=self.n_finite + other.n_finite,
            minimum=np.fmin(self.minimum, other.minimum),
            maximum=np.fmax(self.maximum, other.maximum),
        )


@dataclass(frozen=True)
class RawFile:
    """One raw file of the night, as the runner hands it to a stage.

    Parameters
    ----------
    name : str
        Path relative to the night's ``raw_dir`` (POSIX separators).  Use it
        in the block index ``file`` column; it is not meant to be opened.
    hdu : int or None
        Index of the first HDU holding a 2-D image, or None if there is none.
    header : astropy.io.fits.Header or None
        Header of that HDU; None if the file could not be read.
    size : int or None
        File size in bytes, or None when the file is compressed (gzip, bzip2,
        ... or a tile-compressed image HDU): then the size on disk says
        nothing about the size of the data, and a check for truncation must
        be skipped.
    error : str or None
        Why the file could not be read (None if it could).
    pixels : PixelSummary or None
        Summary of the image HDU's pixels; None if they could not be read
        (``pixel_error`` says why) or were not read.
    pixel_error : str or None
        Why the pixels could not be read (e.g. a truncated compressed file).
    complete_rows : int or None
        For a file cut short part-way through its image (an interrupted
        copy): the rows stored whole before the cut (``pixels`` summarises
        those only).  None when the file holds every row.
    """

    name: str
    hdu: int | None
    header: Header | None
    size: int | None
    error: str | None = None
    pixels: PixelSummary | None = None
    pixel_error: str | None = None
    complete_rows: int | None = None


@dataclass(frozen=True)
class ExternalFile:
    """A file an option names that the stage reads in chunks (see ``Stage.streams``).

    Parameters
    ----------
    path : pathlib.Path
        Absolute path of the file.
    sha256 : str
        SHA-256 of its content when the runner planned the unit (it entered
        the unit's input hashes and was checked again before the unit ran).
    """

    path: Path
    sha256: str


@dataclass(frozen=True)
class StageContext:
    """What a stage may know about the night besides its inputs and options.

    Parameters
    ----------
    site : pipeline.geometry.Site
    camera : pipeline.geometry.Camera
    run : pydantic.BaseModel
        The config's ``run`` section (``stretch_rows``, ``overlap_rows``, ...).
    night : str
        The night's name.
    stretch : Stretch or None
        The stretch being processed; None for a night-scoped stage.
    stretches : tuple of Stretch
        The night's stretch plan (empty before the block index exists).
    missing_stretches : tuple of Stretch
        For a night-scoped stage with ``partial_inputs=True``: the stretches
        of the plan left out of its per-stretch inputs because an upstream
        unit failed, was blocked or has not run.  Empty otherwise.
    """

    site: Site
    camera: Camera
    run: BaseModel
    night: str
    stretch: Stretch | None = None
    stretches: tuple[Stretch, ...] = ()
    missing_stretches: tuple[Stretch, ...] = ()

    @property
    def input_stretches(self) -> tuple[Stretch, ...]:
        """The stretches whose products a night-scoped stage's sequences hold, in order."""
        return tuple(s for s in self.stretches if s not in self.missing_stretches)


@dataclass(frozen=True)
class Stage:
    """Declaration of a pipeline stage.

    Parameters
    ----------
    name : str
        Stage name: its config section ``stages.<name>``, its folder in the
        product store, its name on the command line.  Lower case, digits and
        ``_``.
    run : callable
        ``run(*, inputs, options, context) -> dict`` (see the module
        docstring).  Must be importable by reference (a module-level
        function) so that worker processes can unpickle it.
    options : type of pydantic.BaseModel
        Options model; every field has a default so an absent section is
        valid.  Declare ``model_config = ConfigDict(extra='forbid',
        frozen=True)`` so misspelled keys are errors.
    requires : tuple of str
        Upstream stage names and/or :data:`RAW_FILES`, :data:`RAW_ROWS`.
    scope : {'night', 'stretch'}
        Run once per night or once per stretch.
    uses : tuple of str
        Context fields the products depend on, as ``'site'``, ``'camera'``,
        ``'run'`` or dotted names such as ``'camera.n_columns'``.  They enter
        the stage's config hash, so changing them marks its products stale.
    defines_rows : bool
        This night-scoped stage returns the :data:`BLOCK_INDEX` product.
    files : tuple of str
        Names of option fields (``pathlib.Path | None``) that name a file the
        stage uses, e.g. a solved table from another night.  The config
        resolves the path against the config file's folder; the runner reads
        the file (``.ecsv`` as a Table, ``.fits`` as its first table HDU or
        image array, ``.json`` as JSON), hashes its content into the unit's
        input hashes and hands the object to the stage as ``inputs[name]``
        (None when the option is None).  The stage never opens it.
    optional : tuple of str
        Upstream stages in ``requires`` the stage can do without (night
        scope only): the stage still runs, with ``inputs[name] = None``,
        when one is not in the graph (a module not written yet, a toy
        graph) or its products are unusable.  A changed, appearing or
        vanishing optional input makes the unit stale; an unusable one is
        not a reason for staleness by itself.
    streams : tuple of str
        Dotted names of option fields (``pathlib.Path | None``, e.g.
        ``'reference.path'``) naming a file too large to read whole, which the
        stage reads in chunks through a reader of its own (the reference
        catalogue: :func:`pipeline.reference.read_reference`).  The runner
        hashes the file's content into the unit's input hashes (a changed
        file makes the unit stale), checks it again before the unit runs, and
        hands ``inputs[name] =`` :class:`ExternalFile` (None when the option
        is None).  This is the one narrow exception to "a stage never opens a
        file": the reader opens only the path it is handed, read-only.
    description : str
        One line for ``zdrift status`` and the docs.
    version : int
        Bump it when a code change alters what the stage produces: it enters
        the config hash, so products made by the old code become stale.
    partial_inputs : bool
        A night-scoped stage that can work on the stretches that exist (a
        night-wide fit that needs only enough of them) sets this.  The runner
        then hands it the per-stretch products of the stretches whose
        upstream units are usable (not failed, not blocked, not missing; a
        stretch is used only if all its stretch-scoped inputs are), lists the
        stretches left out in ``context.missing_stretches`` and in the unit's
        provenance, and reports them as a problem (``zdrift run`` exits 1).
        Which stretches were used enters the input hash, so the unit becomes
        stale when a missing stretch appears.  With the default False, one
        unusable stretch blocks the stage.
    neighbours : tuple of str
        For a stretch-scoped stage: stretch-scoped stages in ``requires``
        whose products of the neighbouring stretches the stage also gets, as
        ``inputs[NEIGHBOURS][name] == (before, after)`` (see "Neighbouring
        stretches" in the module docstring).  They enter the unit's input
        hashes.
    warm : tuple of str
        What a worker process prepares, in the background, as it starts, so
        that the stage's first unit there does not wait for it: modules the
        stage's functions import on first use (``'scipy.signal'``), or
        ``'module:function'``, a function called with no arguments that loads
        per-process state (Earth-orientation tables, compiled kernels from
        numba's disk cache).  It must not change what the stage produces;
        it does not enter the config hash.
    """

    name: str
    run: Callable[..., Mapping[str, Any]]
    options: type[BaseModel]
    requires: tuple[str, ...] = ()
    scope: Scope = "stretch"
    uses: tuple[str, ...] = ("site", "camera")
    defines_rows: bool = False
    files: tuple[str, ...] = ()
    description: str = ""
    version: int = 1
    partial_inputs: bool = False
    neighbours: tuple[str, ...] = ()
    streams: tuple[str, ...] = ()
    optional: tuple[str, ...] = ()
    warm: tuple[str, ...] = ()

    def __post_init__(self) -> None:
        if not self.name.isidentifier() or self.name != self.name.lower():
            raise ValueError(
                f"Stage name must be a lower-case Python identifier; got {self.name!r}."
            )
        if self.scope not in ("night", "stretch"):
            raise ValueError(
                f"Stage {self.name!r}: scope must be 'night' or 'stretch'; got {self.scope!r}."
            )
        if not (isinstance(self.options, type) and issubclass(self.options, BaseModel)):
            raise TypeError(
                f"Stage {self.name!r}: options must be a pydantic BaseModel subclass; "
                f"got {self.options!r}."
            )
        if not callable(self.run):
            raise TypeError(f"Stage {self.name!r}: run must be callable; got {self.run!r}.")
        names = (
            self.requires,
            self.uses,
            self.files,
            self.neighbours,
            self.streams,
            self.optional,
            self.warm,
        )
        if any(isinstance(group, str) for group in names):
            raise TypeError(
                f"Stage {self.name!r}: requires, uses, files, neighbours, streams, optional "
                "and warm must be tuples of names, not a single string (write ('x',) not 'x')."
            )
        for name in self.files:
            if name not in self.options.model_fields or name in self.requires:
                raise ValueError(
                    f"Stage {self.name!r}: files names {name!r}, which is not a field of "
                    f"{self.options.__name__} (or clashes with a required input)."
                )
        for name in self.streams:
            if name.split(".")[0] not in self.options.model_fields or name in self.requires:
                raise ValueError(
                    f"Stage {self.name!r}: streams names {name!r}, which does not start with "
                    f"a field of {self.options.__name__} (or clashes with a required input)."
                )
        for name in self.optional:
            if name not in self.requires or name in (RAW_FILES, RAW_ROWS, RUN_STATUS):
                raise ValueError(
                    f"Stage {self.name!r}: optional names {name!r}, which is not an upstream "
                    "stage in requires; add it to requires or drop it."
                )
        if self.optional and self.scope != "night":
            raise ValueError(
                f"Stage {self.name!r}: optional needs scope='night' (a per-stretch stage "
                "needs its inputs)."
            )
        if RUN_STATUS in self.requires and self.scope != "night":
            raise ValueError(f"Stage {self.name!r}: {RUN_STATUS!r} needs scope='night'.")
        if self.defines_rows and self.scope != "night":
            raise ValueError(f"Stage {self.name!r}: defines_rows needs scope='night'.")
        if RAW_ROWS in self.requires and self.scope != "stretch":
            raise ValueError(f"Stage {self.name!r}: {RAW_ROWS!r} needs scope='stretch'.")
        if RAW_FILES in self.requires and self.scope != "night":
            raise ValueError(f"Stage {self.name!r}: {RAW_FILES!r} needs scope='night'.")
        for name in self.neighbours:
            if name not in self.requires or name in (RAW_FILES, RAW_ROWS):
                raise ValueError(
                    f"Stage {self.name!r}: neighbours names {name!r}, which is not an "
                    "upstream stage in requires; add it to requires or drop it."
                )
        if self.neighbours and self.scope != "stretch":
            raise ValueError(
                f"Stage {self.name!r}: neighbours needs scope='stretch' (a night-scoped "
                "stage already gets every stretch)."
            )
        if self.partial_inputs and self.scope != "night":
            raise ValueError(
                f"Stage {self.name!r}: partial_inputs needs scope='night' (a per-stretch "
                "stage gets the products of its own stretch only)."
            )


def check_graph(graph: Sequence[Stage]) -> tuple[Stage, ...]:
    """Check that ``graph`` is a usable ordered list of stages.

    Names are unique, every stage requires only earlier stages or the raw
    pseudo-inputs, at most one stage defines the rows, and it comes before
    every stretch-scoped stage; a stage with ``partial_inputs`` requires at
    least one stretch-scoped stage; ``neighbours`` names stretch-scoped stages.
    An ``optional`` requirement may be absent from the graph, but not later.

    Returns
    -------
    tuple of Stage
        The graph as a tuple.

    Raises
    ------
    ValueError
        Naming the offending stage and what to change.
    """
    graph = tuple(graph)
    seen: dict[str, Stage] = {}
    row_stage = None
    for stage in graph:
        if not isinstance(stage, Stage):
            raise TypeError(f"graph entries must be Stage objects; got {stage!r}.")
        if stage.name in seen:
            raise ValueError(f"Stage name {stage.name!r} appears twice in the graph.")
        if stage.name in (RAW_FILES, RAW_ROWS, RUN_STATUS, NEIGHBOURS):
            raise ValueError(f"Stage name {stage.name!r} is reserved for the runner's inputs.")
        for need in stage.requires:
            if need not in seen and need not in (RAW_FILES, RAW_ROWS, RUN_STATUS):
                if need in stage.optional:
                    continue  # not in this graph: the stage runs without it
                raise ValueError(
                    f"Stage {stage.name!r} requires {need!r}, which is not an earlier "
                    f"stage; earlier stages: {sorted(seen)}."
                )
        if stage.defines_rows:
            if row_stage is not None:
                raise ValueError(
                    f"Stages {row_stage.name!r} and {stage.name!r} both set defines_rows."
                )
            row_stage = stage
        if stage.scope == "stretch" and row_stage is None:
            raise ValueError(
                f"Stretch-scoped stage {stage.name!r} comes before any stage with "
                "defines_rows=True; the runner cannot plan stretches."
            )
        absent_optional = [need for need in stage.optional if need not in seen]
        if (
            stage.partial_inputs
            and not absent_optional  # an absent one may be the stretch-scoped stage
            and not any(seen[need].scope == "stretch" for need in stage.requires if need in seen)
        ):
            raise ValueError(
                f"Stage {stage.name!r} sets partial_inputs but requires no stretch-scoped "
                "stage; drop partial_inputs or require one."
            )
        for name in stage.neighbours:
            if seen[name].scope != "stretch":
                raise ValueError(
                    f"Stage {stage.name!r}: neighbours names {name!r}, a night-scoped stage; "
                    "only stretch-scoped stages have neighbouring stretches."
                )
        seen[stage.name] = stage
    names = [stage.name for stage in graph]
    for position, stage in enumerate(graph):
        later = [need for need in stage.optional if need in names[position:]]
        if later:
            raise ValueError(
                f"Stage {stage.name!r} optionally requires {later}, which come after it; "
                "a stage may only require earlier ones."
            )
    return graph
