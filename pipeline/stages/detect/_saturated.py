"""One source per saturated star.

A saturated star's core is clipped at the full well (and may bleed along the
scan): a flat top that no seeing profile fits.  Left alone, the deblending
splits the plateau's ripples into several sources, and the model fitted to
the clipped core leaves residual peaks on either side that the search in the
image minus the models takes for companions: measured on a simulated 2048 x
1024 stretch with 35 saturated stars, 29 of them came out as 2 to 5 sources
each, within 2 px of one another.

Common practice, followed here: the saturated and bleed pixels are left out
of the fit (its flux and position come from the unsaturated wings), and all
the sources whose start positions fall on one saturated footprint are merged
into one.  A real neighbour on the footprint itself (within about a FWHM of
the clipped pixels) is lost; it could not be measured there anyway.

A column saturated through the stretch is not a star.  A very bright star
(or a bleed in twilight) can fill a raw column, and spill into its
neighbours, for the whole night: after rectify, rows of the stretch clipped
from one end to the other, some without data (BAD_COLUMN), some holding
clipped or spilled charge.  As a footprint it swallowed every source that
started within a FWHM of it, real stars beside the column included, and
left one source at their mean position, fitted on nothing (S/N ~ 0), on a
stamp widened to the whole stretch.  :func:`saturated_columns` finds such
clipped pixels; detect takes them as pixels without data (their values are
clipped or spilled charge all along: common practice, as for a bad column)
and they make no footprint, so the stars beside them are searched, fitted
and flagged (SATURATED, NEAR_FLAGGED, EDGE from the mask) one by one.  A
star whose core such a column cuts is one source too, fitted on the wings
beyond the column as a star cut by a bad column is: the searches' segments
cross the column's rows, the fit starts at the matched filter's peak (the
centroid of one side's pixels lay up to half the column's width off) on a
stamp widened across the column, and the star is flagged SATURATED | EDGE
(its core reached clipped pixels without data).

The star whose bleed the column is, and a saturated star whose clipped core
touches it, are stars all the same, but their cores are clipped pixels
connected to the column: taken as the column's, they left no data to
search or fit (the night's brightest stars were missing, and a saturated
star touching a column came out 1.5-4 px off toward it with no usable
flux).  Their cores widen the column's band of clipped rows where they lie:
:func:`column_star_cores` finds where the band is wider than along the rest
of it and gives those pixels back to the star: a saturated footprint with
one source at the core's centre, flagged FIT_FAILED (its flux would rest on
far wings whose shape nothing measures; see detect).
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np

from pipeline.masks import MaskBit, has_bits

__all__ = [
    "CLIPPED",
    "ColumnCores",
    "Footprints",
    "column_star_cores",
    "dilate_sparse",
    "footprint_bounds",
    "merge_on_column",
    "merge_on_footprints",
    "on_footprint",
    "rows_reached",
    "saturated_columns",
    "saturated_footprints",
]

#: Mask bits of pixels whose values are clipped or spilled charge.
CLIPPED = MaskBit.SATURATED | MaskBit.BLEED

#: Fewest clipped pixels of a run along the scan, reaching an end of the
#: stretch, that make a saturated column (:func:`saturated_columns`), pixels.
#: On the three demo nights a saturated star's longest clipped run is 89 px
#: (the brightest synthetic star, r = 14.7, its core and bleed) and none reaches
#: an end of its stretch; the columns the three bright Gaia stars saturate for
#: the night, and the twilight bleeds of the first stretch, run 363 to 1074 px
#: from an end.  A star at the night's first or last column would need a
#: bleed of 128 px within the stretch to be taken for a column.  At a seam
#: with a neighbour the length is not the test: a column saturated through
#: the neighbour that stops saturating a few pixels past the seam holds few
#: clipped pixels here, but runs clipped across the neighbour's whole edge
#: from the plane's end, which a star's core and bleed do only when they
#: are longer than twice that edge (:func:`saturated_columns`).
COLUMN_RUN = 128

#: Rows by which a saturated column's band of clipped pixels must be wider
#: than its own width nearby (:data:`BAND_WINDOW`) to hold a star's
#: clipped core (:func:`column_star_cores`).  The band's edges wander by a
#: row where the spilled charge is near the full well; a core widens it by
#: more.
CORE_WIDENING = 2

#: Half-width of the window along the scan over which the band's own
#: width and edges are taken, pixels: more than twice as long as a
#: saturated core and its bleed (the simulated night's star of r = 5 on a
#: 2.2 px seeing: 81 px; the demo's brightest 40-113 px), so the core does
#: not raise its own reference.
BAND_WINDOW = 128

#: Columns along the scan added on either side of a widening to make the
#: core's pixels, pixels.
CORE_PAD = 2


def _pixels_under(x, y, shape) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Whether each position is finite, and the pixel (column, row) under it within ``shape``."""
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    ny, nx = shape
    inside = np.isfinite(x) & np.isfinite(y)
    ix = np.clip(np.round(np.where(inside, x, 0.0)).astype(int), 0, nx - 1)
    iy = np.clip(np.round(np.where(inside, y, 0.0)).astype(int), 0, ny - 1)
    return inside, ix, iy


@dataclass(frozen=True)
class ColumnCores:
    """Clipped cores of stars on columns saturated through a stretch.

    Attributes
    ----------
    pixels : ndarray of bool, shape (ny, nx)
        The cores' clipped pixels (stars' footprints, not the column's).
    x, y : ndarray, shape (n,)
        Each core's centre, pixels (zero-based): along the scan, the
        widening's centroid; across it, the middle of the clipped rows
        where the band is widest, or, for a core beyond one edge of the
        band only, its outer edge less its half-length along the scan.
    reach : ndarray, shape (n,)
        The core's half-width across the scan or half-length along it,
        whichever is larger, pixels.
    x_lo, x_hi : ndarray, shape (n,)
        First and last column of each core's pixels along the scan.
    y_lo, y_hi : ndarray, shape (n,)
        Outermost clipped rows of the band over each core's widening.
    """

    pixels: np.ndarray
    x: np.ndarray
    y: np.ndarray
    reach: np.ndarray
    x_lo: np.ndarray
    x_hi: np.ndarray
    y_lo: np.ndarray
    y_hi: np.ndarray

    def near(self, x, y, columns: np.ndarray | None, margin: float) -> np.ndarray:
        """Index of the core each position belongs to (-1: none), pixels.

        A position belongs to a core when it lies on the core's pixels or on
        ``columns`` (the rest of the band) within ``margin`` along the scan
        of the core's pixels, at rows the core spans: the matched filter
        peaks there beside the core's clipped values, where no other star
        could be measured.
        """
        x = np.asarray(x, dtype=float)
        y = np.asarray(y, dtype=float)
        ok, ix, iy = _pixels_under(x, y, self.pixels.shape)
        on = ok & (self.pixels[iy, ix] | (columns[iy, ix] if columns is not None else False))
        out = np.full(x.shape, -1)
        for k in np.flatnonzero(on).tolist():
            inside = (x[k] >= self.x_lo - margin) & (x[k] <= self.x_hi + margin)
            inside &= np.abs(y[k] - self.y) <= self.reach + margin
            if inside.any():
                cand = np.flatnonzero(inside)
                out[k] = int(cand[np.argmin(np.abs(self.x[cand] - x[k]))])
        return out


@dataclass(frozen=True)
class Footprints:
    """Saturated stars' footprints: clipped pixels grown by about a FWHM.

    Attributes
    ----------
    labels : ndarray of unsigned integers
        Footprint number (1, 2, ...) per pixel, 0 outside (the smallest
        unsigned type that holds the count).
    slices : list of (slice, slice)
        Bounding box of footprint ``k`` at index ``k - 1``.
    clipped : ndarray of bool
        The clipped pixels themselves (saturated or bleed).
    """

    labels: np.ndarray
    slices: list
    clipped: np.ndarray

    @functools.cached_property
    def clipped_index(self) -> np.ndarray:
        """Flat (row-major) indices of :attr:`clipped`'s pixels, increasing.

        ``plane.reshape(-1)[clipped_index]`` is ``plane[clipped]`` for a
        C-contiguous plane of the same shape, in the same order: a few
        thousand pixels looked up instead of a boolean plane read (0.02 ms
        instead of 0.7 ms on a 4109 x 1090 stretch with 18 000 clipped
        pixels; detect reads or sets them five times per unit).  Found once
        (0.6 ms), on first use.
        """
        return np.flatnonzero(self.clipped)

    def take(self, plane: np.ndarray) -> np.ndarray:
        """``plane[self.clipped]``: the clipped pixels' values, in row-major order."""
        if plane.flags.c_contiguous and plane.shape == self.clipped.shape:
            return plane.reshape(-1)[self.clipped_index]
        return plane[self.clipped]

    def put(self, plane: np.ndarray, values) -> None:
        """``plane[self.clipped] = values`` (``plane`` changed in place)."""
        if plane.flags.c_contiguous and plane.shape == self.clipped.shape:
            plane.reshape(-1)[self.clipped_index] = values
        else:
            plane[self.clipped] = values

    def at(self, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        """Footprint number under each position (0: none), pixels (zero-based)."""
        inside, ix, iy = _pixels_under(x, y, self.labels.shape)
        return np.where(inside, self.labels[iy, ix], 0).astype(np.int32)


def saturated_columns(
    clipped: np.ndarray,
    no_data: np.ndarray,
    min_run: int = COLUMN_RUN,
    own_columns: tuple[int, int] | None = None,
) -> np.ndarray | None:
    """The clipped pixels of columns saturated through the stretch (not a star's).

    A run along the scan (a row of the rectified stretch: one raw column
    over time) of clipped pixels (:data:`CLIPPED` bits) that reaches the
    first or the last column of the plane, across pixels without data if
    need be (the chip's outside, rows missing from the night), is a column
    saturated from the stretch's edge on when

    - it holds at least ``min_run`` clipped pixels (a star's clipped core
      and bleed are shorter), or
    - the plane holds a neighbour's edge columns at that end (``own_columns``)
      and the run crosses them clipped from the plane's end into the
      stretch's own columns: a column saturated through the neighbour that
      stops (or starts) saturating just past the seam.  Its clipped pixels
      here may be few (the neighbour's edge, 31 px on the demo nights, and
      a few more), but a star's clipped core and bleed reach the plane's
      end only if they run on beyond its neighbour's whole edge: a star
      within a few pixels of the seam with a bleed of twice that edge.
      Across an edge without a neighbour (no data, not clipped) this does
      not apply.

    Every clipped pixel connected to such a run (8-connected) is returned:
    the column's partly saturated neighbours and a star whose clipped core
    touches the column come with it.

    Parameters
    ----------
    clipped : ndarray of bool, shape (ny, nx)
        The clipped pixels (``has_bits(mask, CLIPPED)``); axis 1 is the scan
        axis.
    no_data : ndarray of bool, shape (ny, nx)
        Pixels without data (whatever their bits).
    min_run : int
        Fewest clipped pixels of such a run, pixels.
    own_columns : (int, int) or None
        Array columns ``[a, b)`` of the stretch's own when the plane holds
        its neighbours' edge columns beyond them (detect's ``own_columns``);
        None: no neighbour's edge.

    Returns
    -------
    ndarray of bool, shape (ny, nx), or None
        The columns' clipped pixels; None when there is none (the usual
        case: then nothing else is computed).
    """
    from pipeline.stages.detect._find_jit import label_sorted

    # the rows holding any clipped pixel first (a tenth of the cost of
    # counting them in every row: 0.15 ms against 1.4 ms on a clean
    # 1035 x 4096 stretch), then those holding enough
    nx = clipped.shape[1]
    rows = np.flatnonzero(clipped.any(axis=1))
    seams = _seams(own_columns, nx)
    # rows clipped across a seam with a neighbour's edge, whatever their count
    across = np.zeros(rows.size, bool)
    for a, _end in seams:
        across |= clipped[rows, a - 1] & clipped[rows, a]
    rows = rows[across | (np.count_nonzero(clipped[rows], axis=1) >= min_run)]
    if not rows.size:
        return None
    sub = clipped[rows]
    either = (sub | np.asarray(no_data)[rows]).reshape(-1)
    # runs of clipped-or-no-data pixels along each row: numbered by where
    # they start (each row's first pixel starts one if set)
    starts = either.copy()
    starts[1:] &= ~either[:-1]
    starts[::nx] = either[::nx]
    run = np.cumsum(starts)
    run[~either] = 0
    n_runs = int(run.max()) + 1
    clipped_in = np.bincount(run, weights=sub.reshape(-1), minlength=n_runs)
    ends = np.zeros(n_runs, bool)
    ends[run[::nx]] = True  # runs from the first column
    ends[run[nx - 1 :: nx]] = True  # ... and to the last
    ends[0] = False
    long = ends & (clipped_in >= min_run)
    flat_sub = sub.reshape(-1)
    for a, end in seams:
        # runs from the plane's end (column ``end``) clipped across the seam
        # between columns a - 1 and a: the run holds both (runs are
        # contiguous) and the end
        start = run[end::nx]
        both = (run[a - 1 :: nx] == start) & (run[a::nx] == start)
        both &= flat_sub[a - 1 :: nx] & flat_sub[a::nx]
        long[start[both & (start > 0)]] = True
    if not long.any():
        return None
    seeds = (long[run] & sub.reshape(-1)).reshape(sub.shape)
    where = np.flatnonzero(clipped)
    region, _count = label_sorted(where, nx, True)
    seed_where = (rows[:, None] * nx + np.arange(nx)[None, :])[seeds]
    chosen = np.unique(region[np.searchsorted(where, seed_where)])
    out = np.zeros(clipped.shape, bool)
    out.reshape(-1)[where[np.isin(region, chosen)]] = True
    return out


def column_star_cores(
    columns: np.ndarray,
    widening: int = CORE_WIDENING,
    window: int = BAND_WINDOW,
    pad: int = CORE_PAD,
    min_length: float = 0.0,
) -> ColumnCores | None:
    """Clipped cores of stars on the columns :func:`saturated_columns` found.

    Along each band of connected clipped pixels, the band's width (its
    clipped rows at each pixel along the scan) is compared with its own
    width (its median over ``window`` pixels either side): where it
    exceeds it by ``widening`` rows or more, over ``min_length`` pixels
    along the scan or more, a star's clipped core lies (the star whose
    bleed the column is, or a saturated star beside it).  Each run of such
    pixels, grown by ``pad``, is a core: its clipped pixels are the star's
    footprint, no longer the column's.  A band of even width (a
    bleed whose star is outside the stretch, a twilight bleed) holds none.

    The centre across the scan: a star's own bleed is centred on it (charge
    spills both ways alike), so a core that widens the band on both sides
    is centred between its outermost clipped rows.  A core beyond one edge
    of the band only (a saturated star beside the column, or a star on
    another star's band) is centred where it is longest along the scan
    (:func:`_one_side_centre`).

    Parameters
    ----------
    columns : ndarray of bool, shape (ny, nx)
        :func:`saturated_columns`' clipped pixels; axis 1 is the scan axis.
    widening : int
        Fewest rows of widening, rows.
    window : int
        Half-width of the window of the band's own width and edges, pixels.
    pad : int
        Pixels along the scan added to each side of a widening.
    min_length : float
        Fewest pixels along the scan of a widening that is a core, pixels:
        a star too faint to saturate, on the column, tips the column's
        spilled charge over the clip at its edges over a few FWHM (10-14 px
        on the demo nights, against 28-110 for the saturated stars' cores
        and their bleed).

    Returns
    -------
    ColumnCores or None
        None when no band widens.
    """
    from scipy.ndimage import median_filter

    from pipeline.stages.detect._find_jit import label_sorted

    ny, nx = columns.shape
    where = np.flatnonzero(columns)
    if not where.size:
        return None
    size = 2 * window + 1

    def local_median(values):
        return median_filter(values.astype(float), size=size, mode="nearest")

    region, count = label_sorted(where, nx, True)
    order = np.argsort(region, kind="stable")
    bounds = np.searchsorted(region[order], np.arange(1, count + 2))
    ys, xs = np.divmod(where, nx)
    pixels = np.zeros(columns.shape, bool)
    found: list[tuple[float, float, float]] = []
    for k in range(count):
        members = order[bounds[k] : bounds[k + 1]]
        yk, xk = ys[members], xs[members]
        x0 = int(xk.min())
        n = int(xk.max()) - x0 + 1
        width = np.bincount(xk - x0, minlength=n)
        lo = np.full(n, ny)
        hi = np.full(n, -1)
        np.minimum.at(lo, xk - x0, yk)
        np.maximum.at(hi, xk - x0, yk)
        held = np.flatnonzero(width > 0)
        # the band's own width and edges: their medians over the pixels
        # that hold the band (it may pass pixels without data, where it
        # holds none).  A lower percentile would keep two cores with long
        # bleeds within a window apart from raising it, but takes the
        # band's slow changes of width for cores (demo nights: 3-8 sources
        # more per night along the columns).
        local = local_median(width[held])
        wide = np.zeros(n, bool)
        wide[held] = width[held] - local >= widening
        if not wide.any():
            continue
        base_lo = np.zeros(n)
        base_hi = np.zeros(n)
        base_lo[held] = local_median(lo[held])
        base_hi[held] = local_median(hi[held])
        excess = np.zeros(n)
        excess[held] = np.maximum(width[held] - local, 0.0)
        edges = np.diff(np.concatenate(([0], wide.view(np.int8), [0])))
        for a, b in zip(np.flatnonzero(edges == 1), np.flatnonzero(edges == -1), strict=True):
            along = np.arange(a, b)
            xc = x0 + float(np.sum(along * excess[a:b]) / np.sum(excess[a:b]))
            top, bottom = float(hi[a:b].max()), float(lo[a:b].min())
            above = top - float(np.median(base_hi[a:b]))
            below = float(np.median(base_lo[a:b])) - bottom
            if b - a < min_length:  # a faint star's light on the column's edges
                continue
            half = 0.5 * (b - a)
            yc = 0.5 * (top + bottom)
            run = (xk - x0 >= a) & (xk - x0 < b)
            # beyond one edge only, or far more beyond it than the other
            # (whose edge wanders by a row or two): a star beside the band
            strong = max(above, below) >= max(2 * min(above, below) + 2, 2 * widening)
            if above >= widening and (below < widening or (strong and above > below)):
                edge = round(float(np.median(base_hi[a:b])))
                yc = _one_side_centre(yk[run], edge, int(top), +1, yc, strong)
            elif below >= widening and (above < widening or strong):
                edge = round(float(np.median(base_lo[a:b])))
                yc = _one_side_centre(yk[run], edge, int(bottom), -1, yc, strong)
            found.append(
                (
                    xc,
                    yc,
                    max(0.5 * (top - bottom), half),
                    x0 + a - pad,
                    x0 + b - 1 + pad,
                    bottom,
                    top,
                )
            )
            inside = (xk - x0 >= a - pad) & (xk - x0 < b + pad)
            pixels[yk[inside], xk[inside]] = True
    if not found:
        return None
    xc, yc, reach, x_lo, x_hi, y_lo, y_hi = (
        np.array(v, dtype=float) for v in zip(*found, strict=True)
    )
    return ColumnCores(pixels, xc, yc, reach, x_lo, x_hi, y_lo, y_hi)


def _one_side_centre(
    rows: np.ndarray, edge: int, outer: int, side: int, middle: float, beside: bool
) -> float:
    """Centre across the scan of a core beyond one edge of a band only, pixels.

    ``rows``: the rows of the core's clipped pixels (one per pixel);
    ``edge``: the band's last row on that side; ``outer``: the core's
    outermost row; ``side``: +1 beyond the band's upper edge, -1 its lower;
    ``middle``: the middle of the clipped rows; ``beside``: the core
    reaches 4 rows or more beyond the band (and twice as far as beyond its
    other edge, plus 2).  The core is longest along the scan at its centre
    (a round core, and the bleed along the scan, are symmetric about it):
    the middle of the rows beyond the band within a pixel of the longest.
    When they reach the band the centre is hidden in it: at the band's edge
    for a core ``beside`` it (a saturated star touching a column), else
    ``middle`` (a star on another star's band, r = 9.5 on the simulated
    night: 1.8 px off, where the band's edge was 7 px off).
    """
    beyond = np.arange(edge + side, outer + side, side)
    if not beyond.size:
        return middle
    length = np.array([np.count_nonzero(rows == r) for r in beyond.tolist()])
    longest = beyond[length >= length.max() - 1]
    if np.any(longest == edge + side):
        return float(edge + side) if beside else middle
    return float(np.mean(longest))


def _seams(own_columns: tuple[int, int] | None, nx: int) -> list[tuple[int, int]]:
    """``[(a, end), ...]``: each seam with a neighbour's edge beyond it.

    ``a`` is the column after the seam (the seam lies between ``a - 1`` and
    ``a``), ``end`` the plane's column at that side's end.
    """
    if own_columns is None:
        return []
    first, stop = int(own_columns[0]), int(own_columns[1])
    out = []
    if 0 < first < nx:
        out.append((first, 0))
    if 0 < stop < nx:
        out.append((stop, nx - 1))
    return out


def saturated_footprints(
    mask: np.ndarray,
    grow: float,
    columns: np.ndarray | None = None,
    clipped: np.ndarray | None = None,
) -> Footprints | None:
    """Find the saturated stars' footprints: clipped pixels grown by ``grow`` pixels.

    Parameters
    ----------
    mask : ndarray of uint16
        :class:`pipeline.masks.MaskBit` bits.
    grow : float
        Radius of the growth, pixels (about a seeing FWHM: the residual peaks
        of a clipped core lie within it).
    columns : ndarray of bool or None
        :func:`saturated_columns`: clipped pixels left out (no star's).
    clipped : ndarray of bool or None
        ``has_bits(mask, CLIPPED)``, if already made (left as it is).

    Returns
    -------
    Footprints or None
        None when no pixel is clipped (but for ``columns``).
    """
    from pipeline.stages.detect._find_jit import label_sorted, segment_bounds

    clipped = has_bits(mask, CLIPPED) if clipped is None else clipped
    if columns is not None:
        clipped = clipped & ~columns
    if not clipped.any():
        return None
    grown = clipped
    r = max(int(np.ceil(grow)), 0)
    if r:
        yy, xx = np.mgrid[-r : r + 1, -r : r + 1]
        grown = dilate_sparse(clipped, xx**2 + yy**2 <= r * r)
    # scipy.ndimage's ``label(grown)`` (4-connected) and ``find_objects`` of
    # it, from the grown pixels alone (a few per mille of the plane): the
    # same labels and boxes without three passes over the plane (~15 ms of
    # CPU per unit of the benchmark night)
    where = np.flatnonzero(grown)
    number, count = label_sorted(where, grown.shape[1], False)
    # the smallest type that numbers them: a plane of the stretch, uint8 (a
    # quarter of int32's bytes) up to 255 footprints, uint16 up to 65535
    kept = np.zeros(grown.shape, np.min_scalar_type(count))
    kept.reshape(-1)[where] = number
    row_lo, row_hi, col_lo, col_hi = segment_bounds(where, number, count, grown.shape)
    slices = [
        (slice(a, b), slice(c, d))
        for a, b, c, d in zip(
            row_lo.tolist(), row_hi.tolist(), col_lo.tolist(), col_hi.tolist(), strict=True
        )
    ]
    return Footprints(kept, slices, clipped)


def dilate_sparse(pixels: np.ndarray, structure: np.ndarray) -> np.ndarray:
    """``scipy.ndimage.binary_dilation(pixels, structure)`` where few pixels are set.

    The dilation is the union of the structure placed on each set pixel
    (its centre on the pixel, cut by the image's edges): one shifted copy of
    the set pixels' coordinates per element of the structure, set in an
    empty image, so the result is the same, exactly.  On the benchmark
    night's stretch 5 (4109 x 1090 pixels, 18 000 saturated and bleed
    pixels, a disk of radius 3) 0.018 s of CPU with a dilation of each
    64 x 64 tile that held some (which had replaced 0.07 s for the whole
    image on a crowded 1035 x 4096 stretch), 0.009 s here, ~0.004 s with
    the set pixels found by ``flatnonzero``.

    Parameters
    ----------
    pixels : ndarray of bool, shape (ny, nx)
    structure : ndarray of bool, odd shape (sy, sx), centred

    Returns
    -------
    ndarray of bool, shape (ny, nx)
    """
    ny, nx = pixels.shape
    ry, rx = structure.shape[0] // 2, structure.shape[1] // 2
    out = np.zeros(pixels.shape, dtype=bool)
    # The set pixels' rows and columns from their flat indices: the same
    # (row-major) coordinates as ``np.nonzero(pixels)``, whose 2-D path took
    # 5.7 ms of CPU on a 4109 x 1090 plane holding 18 000 set pixels, where
    # ``flatnonzero`` and a division take 0.75 ms (least of 3).
    ys, xs = np.divmod(np.flatnonzero(pixels), nx)
    for dy, dx in zip(*np.nonzero(structure), strict=True):
        y, x = ys + (int(dy) - ry), xs + (int(dx) - rx)
        inside = (y >= 0) & (y < ny) & (x >= 0) & (x < nx)
        out[y[inside], x[inside]] = True
    return out


def on_footprint(x: np.ndarray, y: np.ndarray, footprints: Footprints | None) -> np.ndarray:
    """Footprint number under each position (0: none); no footprints: all 0."""
    if footprints is None:
        return np.zeros(np.shape(x), dtype=np.int32)
    return footprints.at(x, y)


def footprint_bounds(xs, ys, footprints: Footprints | None, owner=None):
    """Corners ``(x, y)`` of the footprints under the positions, or None if none.

    Returns the two lists ``[x_min, x_max]`` and ``[y_min, y_max]`` (pixels)
    of the union of the bounding boxes, for widening a fit stamp so that it
    holds the clipped core and the unsaturated wings around it.  ``owner``:
    :func:`on_footprint` of the positions, if known.
    """
    if footprints is None:
        return None
    owner = on_footprint(xs, ys, footprints) if owner is None else owner
    if not owner.any():  # most groups: a tenth of np.unique's cost
        return None
    found = np.unique(owner[owner > 0])
    if not found.size:
        return None
    boxes = [footprints.slices[k - 1] for k in found]
    y_lo = min(b[0].start for b in boxes)
    y_hi = max(b[0].stop for b in boxes) - 1
    x_lo = min(b[1].start for b in boxes)
    x_hi = max(b[1].stop for b in boxes) - 1
    return [x_lo, x_hi], [y_lo, y_hi]


def rows_reached(cut: np.ndarray, start, stop) -> np.ndarray:
    """Whether each span of rows ``[start, stop)`` holds a row with a ``cut`` pixel.

    Parameters
    ----------
    cut : ndarray of bool, shape (ny, nx)
        A saturated column's pixels (or any set of pixels).
    start, stop : array_like of int, shape (n,)
        First row and the row past the last of each span.

    Returns
    -------
    ndarray of bool, shape (n,)
    """
    before = np.concatenate([[0], np.cumsum(cut.any(axis=1))])
    return before[np.asarray(stop, dtype=np.int64)] > before[np.asarray(start, dtype=np.int64)]


def merge_on_footprints(segm, x: np.ndarray, y: np.ndarray, footprints) -> bool:
    """Merge the segments whose start positions fall on one saturated footprint.

    The same result as photutils' ``segm.reassign_labels(same[1:], same[0])``
    for the segments ``same`` of each footprint in turn (labels not
    renumbered), in one pass: each of those calls maps and copies the whole
    image and the segmentation's labels and boxes are then found again from
    the whole image (0.74 s of the 3.8 s of CPU of detect on a crowded
    1035 x 4096 stretch with ~50 saturated stars); here only the merged
    segments' boxes are visited, and the labels, boxes and deblending
    parents are updated from the ones known.  ``tests/test_detect.py``
    checks the result against photutils'.

    Parameters
    ----------
    segm : `~pipeline.stages.detect._find.Segmentation`
        Modified in place: the segments of each footprint take the label of
        its first one.
    x, y : ndarray
        Start position of each segment, in ``segm.labels`` order (pixels).
    footprints : Footprints or None
        :func:`saturated_footprints`.

    Returns
    -------
    bool
        Whether any segment was merged (the caller then measures the segments
        again).
    """
    owner = on_footprint(x, y, footprints)
    labels = np.asarray(segm.labels)
    groups = [labels[owner == k] for k in np.unique(owner[owner > 0])]
    groups = [same for same in groups if same.size > 1]
    if not groups:
        return False
    _merge_labels(segm, groups)
    return True


def merge_on_column(
    segm, parent: dict, x: np.ndarray, y: np.ndarray, columns, reach: float
) -> bool:
    """Merge the segments that start on a saturated column within ``reach`` along the scan.

    The searches' segments cross a saturated column's rows, so a star
    whose core the column hides is one segment; but a star whose own
    clipped core joins the column (a saturated star on it, or the star that
    saturates the column) leaves no data over many rows, the matched
    filter has nothing to weigh across them, and the star was two segments,
    one starting at each of the column's edges (a very bright star of the
    demo nights: two sources 10 px apart across the column, both
    FIT_FAILED).  Segments that start on the column's pixels at columns
    less than ``reach`` apart are one star, as the sources on one saturated
    footprint are (a real pair on the column could not be measured there
    anyway), if the column's pixels join them across the scan.

    Parameters
    ----------
    segm : `~pipeline.stages.detect._find.Segmentation`
        Modified in place (as :func:`merge_on_footprints` does).
    parent : dict
        :func:`~pipeline.stages.detect._find.find_sources`' map of each
        label to the key its split segment's children share; the labels
        merged away are removed from it.
    x, y : ndarray
        Start position of each segment, in ``segm.labels`` order (pixels).
    columns : ndarray of bool or None
        :func:`saturated_columns`.
    reach : float
        Largest distance along the scan (axis 1) between the starts of one
        star's segments, pixels (about a seeing FWHM).

    Returns
    -------
    bool
        Whether any segment was merged.
    """
    if columns is None:
        return False
    labels = np.asarray(segm.labels)
    ny, nx = columns.shape
    ix = np.clip(np.round(np.nan_to_num(x)).astype(int), 0, nx - 1)
    iy = np.clip(np.round(np.nan_to_num(y)).astype(int), 0, ny - 1)
    on = np.flatnonzero(columns[iy, ix])
    if on.size < 2:
        return False
    # chains of starts on the column, each within ``reach`` of the next
    # along the scan and joined to it across the scan by the column's pixels
    # (not another column's at the same place along the scan)
    on = on[np.lexsort((iy[on], ix[on]))]
    xs = np.asarray(x, dtype=float)[on]
    joined = np.diff(xs) <= reach
    for k in np.flatnonzero(joined).tolist():
        lo, hi = sorted((int(iy[on[k]]), int(iy[on[k + 1]])))
        joined[k] = bool(columns[lo : hi + 1, ix[on[k]]].all())
    breaks = np.flatnonzero(~joined) + 1
    groups = [labels[part] for part in np.split(on, breaks) if part.size > 1]
    if not groups:
        return False
    _merge_labels(segm, groups)
    for same in groups:
        for label in same[1:].tolist():
            parent.pop(label, None)
    return True


def _merge_labels(segm, groups: list) -> None:
    """Give the segments of each array in ``groups`` the label of its first one, in place.

    What photutils' ``reassign_labels`` does for each group in turn (no
    renumbering), with the segmentation's labels, bounding boxes and
    deblending map set from the ones it had.
    """
    data = segm.data
    labels = np.asarray(segm.labels)
    slices = list(segm.slices)
    index = {int(label): i for i, label in enumerate(labels)}
    relabel = np.arange(int(labels.max()) + 1, dtype=data.dtype)
    gone = np.zeros(labels.size, bool)
    for same in groups:
        target = int(same[0])
        box = slices[index[target]]
        for label in same[1:]:
            i = index[int(label)]
            own = slices[i]
            view = data[own]
            view[view == label] = target
            relabel[label] = target
            gone[i] = True
            box = (
                slice(min(box[0].start, own[0].start), max(box[0].stop, own[0].stop)),
                slice(min(box[1].start, own[1].start), max(box[1].stop, own[1].stop)),
            )
        slices[index[target]] = box
    segm.deblended = {key: relabel[value] for key, value in segm.deblended.items()}
    segm.labels = labels[~gone]
    segm.slices = [box for box, drop in zip(slices, gone, strict=True) if not drop]
