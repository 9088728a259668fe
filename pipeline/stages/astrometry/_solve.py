"""The night's astrometric solution: predict, match (searching if needed), fit, invert."""

from __future__ import annotations

import dataclasses
import itertools
import logging
from dataclasses import dataclass
from functools import cached_property
from typing import TYPE_CHECKING

import numpy as np
from numpy.typing import ArrayLike

from pipeline._threads import in_two_threads
from pipeline.exceptions import AstrometryError
from pipeline.geometry.optics import (
    ARCSEC_PER_RADIAN,
    EARTH_ROTATION_RATE,
    focal_length_from_spin,
    normal_gravity,
)
from pipeline.geometry.rectified import RectifiedFrame
from pipeline.geometry.tdi import TDIModel
from pipeline.stages.astrometry._fit import (
    FIT_PARAMETERS,
    GeometryFit,
    fit_geometry,
    parameter_jacobian,
)
from pipeline.stages.astrometry._match import (
    candidate_pairs,
    match_nearest,
    offset_peak,
    peak_count,
    scaled_tree,
)
from pipeline.stages.astrometry._model import (
    GeometryOffsets,
    GeometryPredictor,
    PredictedCentroids,
    SkyTracks,
)
from pipeline.stages.astrometry._segments import (
    PEAK_SIGNIFICANCE,
    NightSegments,
    SegmentSearch,
    search_segment_clock,
    segment_clock_records,
    segment_start_times,
)
from pipeline.stages.astrometry._stats import residual_grid

if TYPE_CHECKING:
    from astropy.table import Table

__all__ = ["AstrometricSolution", "SearchRanges", "search_geometry", "solve_night"]

log = logging.getLogger(__name__)


@dataclass(frozen=True)
class SearchRanges:
    """How far from the nominal geometry the search looks when the first match fails.

    Attributes
    ----------
    clock_offset : float
        Seconds either side (also covers the east tilt, which acts like it).
    focal_scale : float
        Fractional focal-length error either side.
    rotation : float
        Degrees either side.
    tilt : float
        Arcseconds either side, east and north.
    bin_size : float
        Pixels: width of the offset histogram's bins and of the steps of the
        focal-length and rotation grids at the chip's edge.
    segment_clock : float
        Seconds either side: the clock offset searched for a segment after a
        gap whose stars do not match at the night's clock (0: no such search).
    """

    clock_offset: float = 10.0
    focal_scale: float = 0.03
    rotation: float = 0.5
    tilt: float = 60.0
    bin_size: float = 4.0
    segment_clock: float = 10.0


def _outward(half_range: float, step: float) -> np.ndarray:
    """0, +step, -step, +2 step, ... up to ``half_range``."""
    k = np.arange(1, int(np.floor(half_range / step)) + 1)
    return np.r_[0.0, np.column_stack([k * step, -k * step]).ravel()]


def search_geometry(
    predictor: GeometryPredictor,
    ref_tracks: SkyTracks,
    det_row: np.ndarray,
    det_column: np.ndarray,
    ranges: SearchRanges = SearchRanges(),
    max_stars: int = 3000,
):
    """Find the geometry by a grid over focal length and rotation and offset histograms.

    The clock offset (with the east tilt) is a shift along the scan and the
    north tilt a shift across it: for each trial focal length and rotation
    those come out as the peak of the 2-D histogram of detection-minus-
    prediction offsets of all pairs within the search box, so only the two
    scale-like parameters need a grid.  At most ``max_stars`` reference
    stars (spread along the night) take part.  Their effect is applied linearly
    (finite-difference derivatives of the predictor), good to a fraction of a
    bin over the ranges.

    Returns
    -------
    offsets : GeometryOffsets
        Starting geometry for the fit.
    peak : OffsetPeak
        The winning histogram peak (its count and chance background).
    """
    if len(ref_tracks) > max_stars:
        # a spread-out subset is plenty to find the peak, at a fraction of the pairs
        pick = np.linspace(0, len(ref_tracks) - 1, max_stars).astype(np.intp)
        ref_tracks = SkyTracks(
            ref_tracks.t_centre[pick], ref_tracks.half_width, ref_tracks.coef[:, :, pick]
        )
    base_offsets = GeometryOffsets()
    pred = predictor.predict(ref_tracks, base_offsets)
    row0 = pred.rows(predictor.n_rows, predictor.line_time)
    col0 = pred.column

    def derivative(**change):
        ((_name, step),) = change.items()
        p = predictor.predict(ref_tracks, dataclasses.replace(base_offsets, **change))
        return (p.rows(predictor.n_rows, predictor.line_time) - row0) / step, (
            p.column - col0
        ) / step

    d_focal = derivative(focal_scale=1e-3)
    d_rot = derivative(rotation=60.0)
    d_north = derivative(tilt_north=10.0)
    n_col = predictor.model.camera.n_columns
    dt = predictor.line_time
    scale = predictor.pixel_angle * ARCSEC_PER_RADIAN
    cos_lat = np.cos(np.radians(predictor.model.latitude))
    tilt_s = ranges.tilt / (EARTH_ROTATION_RATE * ARCSEC_PER_RADIAN * cos_lat)
    rot_arcsec = ranges.rotation * 3600.0
    half_row = (
        (ranges.clock_offset + tilt_s) / dt
        + ranges.focal_scale * np.nanmax(np.abs(d_focal[0]))
        + rot_arcsec * np.nanmax(np.abs(d_rot[0]))
        + ranges.tilt * np.nanmax(np.abs(d_north[0]))
        + 2 * ranges.bin_size
    )
    half_col = (
        ranges.tilt / scale
        + ranges.focal_scale * np.nanmax(np.abs(d_focal[1]))
        + rot_arcsec * np.nanmax(np.abs(d_rot[1]))
        + 2 * ranges.bin_size
    )
    tree = scaled_tree(det_row, det_column, half_row, half_col)
    ri, di = candidate_pairs(row0, col0, tree, half_row, half_col)
    dr0 = det_row[di] - row0[ri]
    dc0 = det_column[di] - col0[ri]
    lever = 0.5 * n_col
    focal_step = ranges.bin_size / lever
    rot_step = ranges.bin_size / lever * ARCSEC_PER_RADIAN
    # grids ordered outwards from the nominal value, so that on a chip too
    # small to tell trials apart the nominal one wins the ties
    focal_grid = _outward(ranges.focal_scale, focal_step)
    rot_grid = _outward(rot_arcsec, rot_step)
    best = (-1, 0.0, 0.0)
    fr, fc = d_focal[0][ri], d_focal[1][ri]
    rr, rc = d_rot[0][ri], d_rot[1][ri]
    for f in focal_grid:
        base_r = dr0 - f * fr
        base_c = dc0 - f * fc
        for a in rot_grid:
            count = peak_count(
                base_r - a * rr, base_c - a * rc, half_row, half_col, ranges.bin_size
            )
            if count > best[0]:
                best = (count, f, a)
    _, f, a = best
    peak = offset_peak(
        dr0 - f * fr - a * rr, dc0 - f * fc - a * rc, half_row, half_col, ranges.bin_size
    )
    north_c = np.nanmedian(d_north[1])
    north_r = np.nanmedian(d_north[0])
    tilt_north = peak.d_column / north_c
    clock = -(peak.d_row - tilt_north * north_r) * dt
    offsets = GeometryOffsets(
        clock_offset=float(clock),
        focal_scale=float(f),
        rotation=float(a),
        tilt_north=float(tilt_north),
    )
    log.info(
        "geometry search: %d candidate pairs, peak %d over %.1f by chance at %s",
        ri.size,
        peak.count,
        peak.background,
        offsets,
    )
    return offsets, peak


def _failure(counts: dict, reason: str) -> AstrometryError:
    causes = []
    if counts.get("reference_in_band", 0) == 0:
        causes.append(
            "the reference catalogue does not cover the night's band (check its sky "
            "coverage and the site latitude/longitude)"
        )
    elif counts.get("reference_on_chip", counts["min_matches"]) < counts["min_matches"]:
        # No geometry can match more stars than fall on the chip: say so first,
        # rather than send the user after the site or the clock.
        causes.append(
            f"only {counts['reference_on_chip']} reference stars fall on the chip, fewer "
            f"than min_matches={counts['min_matches']}: the reference catalogue is too "
            "shallow for this strip (the packaged bright-star catalogues hold few stars in "
            "a narrow band); give a deeper one (stages.astrometry.reference: source 'file', "
            "e.g. a Gaia extract of the band) or lower stages.astrometry.min_matches"
        )
    elif counts.get("reference_on_chip", np.inf) < 2 * counts["min_matches"] and max(
        counts.get("matched_nominal", 0), counts.get("search_peak", 0)
    ) >= 0.5 * counts.get("reference_on_chip", np.inf):
        # Most of the few stars on the chip matched where the config puts them
        # (or agreed on one offset in the search): the geometry is right, the
        # field too sparse (a simulated night of 27 reference stars on the
        # chip, 23 matched, 19 kept by the fit, failed with the site and the
        # clock named first).
        agreed = max(counts.get("matched_nominal", 0), counts.get("search_peak", 0))
        causes.append(
            f"only {counts['reference_on_chip']} reference stars fall on the chip, of which "
            f"{agreed} matched at one offset from the configured geometry: too sparse a "
            f"field (or too short a night) for min_matches={counts['min_matches']} once the "
            "fit drops its outliers; give a deeper reference catalogue (stages.astrometry."
            "reference) or lower stages.astrometry.min_matches"
        )
    if counts.get("detections", 0) < 2 * counts.get("min_matches", 0):
        causes.append("too few detections (clouds, bad focus or a wrong detection threshold)")
    causes.append(
        "the site position or clock is further off than the search covers "
        "(clock within the search's seconds, site longitude/latitude, DATE-OBS)"
    )
    causes.append("a wrong focal length, pixel size or camera rotation in the config")
    described = ", ".join(f"{k}={v}" for k, v in counts.items())
    return AstrometryError(
        f"astrometric solution failed: {reason} ({described}). Likely causes: "
        + "; ".join(causes)
        + ".",
        counts,
    )


def _robust_radius(fit: GeometryFit) -> float:
    r = np.hypot(fit.residual_row, fit.residual_column)[fit.used]
    return float(np.median(r) / np.sqrt(2.0 * np.log(2.0)))


def solve_night(
    x: ArrayLike,
    y: ArrayLike,
    ref_ra: ArrayLike,
    ref_dec: ArrayLike,
    model: TDIModel,
    frame: RectifiedFrame,
    *,
    x_err: ArrayLike | None = None,
    y_err: ArrayLike | None = None,
    match_radius: float = 3.0,
    knot_spacing: float | None = 120.0,
    parameters: tuple[str, ...] = FIT_PARAMETERS,
    min_matches: int = 20,
    good_fraction: float = 0.3,
    search: SearchRanges | None = SearchRanges(),
    clip_sigma: float = 5.0,
    fit_error_floor: bool = False,
    transparency=None,
    start: GeometryOffsets | None = None,
    segments: NightSegments | None = None,
    det_segment: ArrayLike | None = None,
    min_segment_stars: int = 10,
) -> AstrometricSolution:
    """Solve a night's geometry from its detections and a reference catalogue.

    Parameters
    ----------
    x, y : array_like, shape (n_det,)
        Detections' night rectified pixel positions (``x`` along the scan,
        ``y`` across it), first moments, as the detect stage gives them.
    ref_ra, ref_dec : array_like, shape (n_ref,)
        Reference stars, ICRS degrees at the observation epoch.
    model : TDIModel
        The nominal geometry of the night (from the config and headers); the
        one rectify used.
    frame : RectifiedFrame
        The night's rectified grid (:meth:`RectifiedFrame.for_night` of ``model``).
    x_err, y_err : array_like or None
        1-sigma errors of ``x`` and ``y``, pixels (weights); None: equal.
    match_radius : float, optional
        Pixels: the first match at the nominal geometry.
    knot_spacing : float or None, optional
        Seconds between knots of the wander correction; None: no correction.
        A wander of period P is followed to (2 pi knot / P)^4 / 384 of its
        amplitude (cubic spline interpolation error, common practice).
    parameters : tuple of str, optional
        Parameters to fit (see :data:`FIT_PARAMETERS`).
    min_matches : int, optional
        Fewest pairs a solution needs.
    good_fraction : float, optional
        The nominal match is accepted if it pairs this fraction of the
        reference stars predicted on the chip (or of the detections, if fewer).
    search : SearchRanges or None, optional
        How far to search when the nominal match is poor; None: do not search.
    clip_sigma : float, optional
        Outlier rejection threshold (robust sigmas of the residual radius).
    fit_error_floor : bool, optional
        Estimate a position error common to every pair and weight with it
        added to ``x_err``, ``y_err`` (see
        :func:`~pipeline.stages.astrometry._fit.error_floor`).
    transparency : callable or None, optional
        Relative transparency of the sky, of true seconds since the model's
        start (:func:`~pipeline.stages.astrometry.fit_transparency`): the
        predicted centroids are then the light-weighted means of the tracks
        (see :mod:`~pipeline.stages.astrometry._transparency`); None: time means.
    start : GeometryOffsets or None, optional
        Geometry of the first match (e.g. an earlier solution of the same
        night); None: the nominal one.  If it matches too few stars the
        search starts from the nominal geometry as usual.
    segments : NightSegments or None, optional
        The night's segments (ingest's block index): each after the first
        with ``min_segment_stars`` matched stars gets a clock offset of its
        own (:mod:`~pipeline.stages.astrometry._segments`); None: one clock
        for the night.  A segment whose stars do not match at the night's
        clock is first searched along the scan, within
        ``search.segment_clock`` seconds (:func:`_search_segments`).
    det_segment : array_like of int or None, optional
        Segment number of each detection (e.g. its stretch's); None or -1:
        the segment of its strip row.
    min_segment_stars : int, optional
        Fewest matched stars for a segment's own clock offset.

    Returns
    -------
    AstrometricSolution

    Raises
    ------
    AstrometryError
        If too few stars match; the message has the counts and likely causes.
    """
    from scipy.spatial import cKDTree

    x = np.asarray(x, dtype=float).ravel()
    y = np.asarray(y, dtype=float).ravel()
    ref_ra = np.asarray(ref_ra, dtype=float).ravel()
    ref_dec = np.asarray(ref_dec, dtype=float).ravel()
    if x.shape != y.shape or ref_ra.shape != ref_dec.shape:
        raise ValueError(
            f"x and y (got {x.shape}, {y.shape}) and ref_ra and ref_dec (got {ref_ra.shape}, "
            f"{ref_dec.shape}) must have matching shapes."
        )
    if x.size == 0:  # the predictor's arrays need at least one track
        raise AstrometryError(
            "astrometric solution failed: the night's catalogue holds no detection "
            f"(detections=0, reference stars={ref_ra.size}). Likely causes: detect found no "
            "source in any stretch (see its problems: every pixel flagged, e.g. a sky "
            "brighter than the full well, or a night of cloud).",
            {"detections": 0, "reference": int(ref_ra.size)},
        )
    sig_x = None if x_err is None else np.asarray(x_err, dtype=float).ravel()
    sig_y = None if y_err is None else np.asarray(y_err, dtype=float).ravel()
    predictor = GeometryPredictor(model)
    predictor.transparency = transparency
    n_rows = model.n_rows
    det_tracks = predictor.tracks_from_rectified(frame, x, y)
    det_row, det_col = predictor.strip(det_tracks)
    det_ok = np.isfinite(det_row) & np.isfinite(det_col)
    det_row = np.where(det_ok, det_row, np.nan)
    det_col = np.where(det_ok, det_col, np.nan)
    det_seg = _segments_of(segments, det_row, det_segment)

    # reference stars in the band the chip may see
    rx, ry = frame.pixel_from_icrs(ref_ra, ref_dec)
    margin = 2.0 * (search.tilt if search else 10.0) / (frame.cdelt2 * 3600.0) + 0.05 * frame.n_y
    in_band = (
        (ry > -margin)
        & (ry < frame.n_y + margin)
        & (rx > np.nanmin(x, initial=0.0) - n_rows)
        & (rx < np.nanmax(x, initial=0.0) + n_rows)
    )
    band = np.flatnonzero(in_band)
    ref_tracks = predictor.tracks(
        ref_ra[band], ref_dec[band], predictor.mid_time_of_column(rx[band])
    )
    counts = {
        "detections": int(det_ok.sum()),
        "reference_in_band": int(band.size),
        "min_matches": int(min_matches),
    }
    if band.size == 0 or det_ok.sum() == 0:
        raise _failure(counts, "no reference stars or no detections in the night's band")
    good_det = np.flatnonzero(det_ok)
    tree = cKDTree(np.column_stack([det_row[good_det], det_col[good_det]]))
    row_lo, row_hi = float(np.nanmin(det_row)), float(np.nanmax(det_row))

    def predicted(offsets: GeometryOffsets, fit: GeometryFit | None = None):
        """Strip rows and columns of the reference stars at ``offsets``."""
        pr = predictor.predict(ref_tracks, offsets)
        dt = predictor.line_time * (1.0 + offsets.line_time_scale)
        r = pr.rows(n_rows, dt, offsets.clock_offset)
        if segments is not None and offsets.has_segments:
            r = pr.rows(n_rows, dt, offsets.clock_offsets(segments.of_rows(r)))
        c = pr.column
        if fit is not None and fit.wander is not None:
            w_r, w_c = fit.wander(pr.t_mid)
            r, c = r + w_r, c + w_c
        return r, c

    def match(offsets: GeometryOffsets, radius: float, fit: GeometryFit | None = None):
        r, c = predicted(offsets, fit)
        on_chip = (c > -0.5) & (c < model.camera.n_columns - 0.5) & (r > row_lo) & (r < row_hi)
        ri, di = match_nearest(r, c, None, None, radius, tree=tree)
        return ri, good_det[di], int(on_chip.sum())

    offsets = GeometryOffsets() if start is None else start
    starts = segment_start_times(segments, predictor.line_time)
    ri, di, n_chip = match(offsets, match_radius)
    counts["reference_on_chip"] = n_chip
    counts["matched_nominal"] = int(ri.size)
    expected = min(n_chip, int(det_ok.sum()))
    radius = match_radius
    if ri.size < max(min_matches, good_fraction * expected):
        if search is None:
            raise _failure(counts, "the nominal geometry matches too few stars")
        offsets, peak = search_geometry(
            predictor, ref_tracks, det_row[good_det], det_col[good_det], search
        )
        counts["search_peak"] = peak.count
        counts["search_chance"] = round(peak.background, 1)
        if peak.count < min_matches or peak.significance < PEAK_SIGNIFICANCE:
            raise _failure(counts, "the search found no significant common offset")
        radius = 2.0 * search.bin_size
        ri, di, _ = match(offsets, radius)
    # every segment's rows timed from its own start (what the fits' line time
    # scale moves them by)
    offsets = dataclasses.replace(offsets, segment_start=starts)
    kwargs = {
        "sigma_row": sig_x,
        "sigma_column": sig_y,
        "parameters": parameters,
        "clip_sigma": clip_sigma,
        "fit_error_floor": fit_error_floor,
        "segment": det_seg,
        "min_segment_stars": min_segment_stars,
    }
    fit = None
    searches: tuple[SegmentSearch, ...] | None = None
    if segments is None or len(segments) < 2 or search is None or not search.segment_clock:
        searches = ()
    for knots in (None, knot_spacing, knot_spacing):
        if ri.size < min_matches:
            counts["matched"] = int(ri.size)
            raise _failure(counts, f"only {ri.size} reference stars matched")
        fit = fit_geometry(
            predictor,
            ref_tracks,
            det_row,
            det_col,
            ri,
            di,
            start=offsets,
            knot_spacing=knots,
            **kwargs,
        )
        offsets = fit.offsets
        radius = max(clip_sigma * _robust_radius(fit), 0.05)
        ri, di, _ = match(offsets, radius, fit)
        if searches is None:
            # after the first fit, which the segments matched at the night's clock
            # made: a segment whose stars missed is searched along the scan
            offsets, searches = _search_segments(
                segments,
                *predicted(offsets, fit),
                det_row,
                det_col,
                det_seg,
                di,
                offsets=offsets,
                line_time=predictor.line_time * (1.0 + offsets.line_time_scale),
                max_offset=search.segment_clock,
                match_radius=match_radius,
                min_stars=min_segment_stars,
                good_fraction=good_fraction,
            )
            if any(s.found for s in searches):
                # its clock is the peak's, to a fraction of a bin: the next fit
                # starts from pairs as loose as the first's.  A found segment that
                # becomes the night's clock's (the first with enough stars) starts
                # from the others' clock: the clocks enter the rows linearly, and
                # the fit's steps take it there
                ri, di, _ = match(offsets, match_radius, fit)
    counts["matched"] = int(fit.n_used)
    if fit.n_used < min_matches:
        raise _failure(counts, f"only {fit.n_used} reference stars survived the fit")
    return AstrometricSolution(
        model=model,
        frame=frame,
        predictor=predictor,
        fit=fit,
        ref_index=band[fit.ref_index],
        det_index=fit.det_index,
        counts=counts,
        ref_tracks=ref_tracks,
        det_row=det_row,
        det_column=det_col,
        segments=segments,
        min_segment_stars=min_segment_stars,
        segment_searches=searches,
    )


def _search_segments(
    segments: NightSegments,
    ref_row: np.ndarray,
    ref_column: np.ndarray,
    det_row: np.ndarray,
    det_column: np.ndarray,
    det_segment: np.ndarray,
    det_index: np.ndarray,
    *,
    offsets: GeometryOffsets,
    line_time: float,
    max_offset: float,
    match_radius: float,
    min_stars: int,
    good_fraction: float,
) -> tuple[GeometryOffsets, tuple[SegmentSearch, ...]]:
    """Search along the scan the clock of each segment whose stars missed at the night's.

    ``ref_row``, ``ref_column``: the reference stars predicted at
    ``offsets`` (the first fit's), each at its segment's clock;
    ``det_index``: the detections matched there.  A segment is searched
    when fewer than ``min_stars`` of its detections matched, or fewer than
    ``good_fraction`` of its reference stars predicted on the chip (or of
    its detections, if fewer), and it holds ``min_stars`` detections
    (:func:`~pipeline.stages.astrometry._segments.search_segment_clock`,
    bins of ``match_radius``).  A significant peak (``found``) sets the
    segment's clock in the returned offsets; the rest keep theirs.

    Returns
    -------
    offsets : GeometryOffsets
        ``offsets`` with the found segments' clocks.
    searches : tuple of SegmentSearch
        One per segment searched.
    """
    ok = np.isfinite(det_row) & np.isfinite(det_column)
    on_chip = np.isfinite(ref_row) & np.isfinite(ref_column)
    ref_segment = segments.of_rows(ref_row)
    matched = det_segment[det_index]
    own = offsets.segment_clock
    searches = []
    for number, start, stop in zip(segments.numbers, segments.starts, segments.stops, strict=True):
        mine = ok & (det_segment == number)
        expected = min(int(np.sum(on_chip & (ref_segment == number))), int(mine.sum()))
        pairs = int(np.sum(matched == number))
        if mine.sum() < min_stars or pairs >= max(min_stars, good_fraction * expected):
            continue
        reach = max_offset / line_time + 4.0 * match_radius
        near = on_chip & (ref_row > start - reach) & (ref_row < stop + reach)
        found = search_segment_clock(
            ref_row[near],
            ref_column[near],
            det_row[mine],
            det_column[mine],
            line_time=line_time,
            max_offset=max_offset,
            match_radius=match_radius,
            min_stars=min_stars,
            segment=int(number),
            clock=own[number] if number < len(own) else 0.0,
        )
        searches.append(found)
        log.info("segment %d: %s", int(number), found.describe())
    if not any(found.found for found in searches):
        return offsets, tuple(searches)
    table = np.zeros(max(int(segments.numbers.max()) + 1, len(own)))
    table[: len(own)] = own
    for found in searches:
        if found.found:
            table[found.segment] = found.clock
    moved = dataclasses.replace(offsets, segment_clock=tuple(float(v) for v in table))
    return moved, tuple(searches)


def _segments_of(segments: NightSegments | None, rows, given=None) -> np.ndarray | None:
    """Segment number of each point: ``given`` where >= 0, else that of its strip row.

    None without segments.
    """
    if segments is None:
        return None
    derived = segments.of_rows(rows)
    if given is None:
        return derived
    given = np.broadcast_to(np.asarray(given, dtype=np.int64), derived.shape)
    return np.where(given >= 0, given, derived)


def invert_groups(groups, strip_of, first=None) -> list[tuple[np.ndarray, np.ndarray]]:
    """Rectified ``(x, y)`` with ``strip_of(x, y) = target``, for each group, at once.

    ``groups`` holds ``(target_r, target_c, x, y)``: strip targets and
    starting rectified positions (arrays of one length per group).

    Each group is solved as it would be alone: Newton steps with the
    median Jacobian of (up to) 64 of its own points, until its own largest
    miss is below 1e-6 px (at most 8 steps); only the evaluations of
    ``strip_of`` are shared, one call per step for the points of every
    group still stepping (each call has a fixed cost of ~1 ms).

    ``first``: ``strip_of`` of every group's starting points, concatenated in
    the groups' order, if the caller has it already (the first step's
    evaluation, which is then not made again); None: evaluated here.
    """
    xs = [np.array(x, dtype=float) for _, _, x, _ in groups]
    ys = [np.array(y, dtype=float) for _, _, _, y in groups]
    samples = [np.linspace(0, x.size - 1, min(x.size, 64)).astype(np.intp) for x in xs]
    sx = np.concatenate([x[s] for x, s in zip(xs, samples, strict=True)])
    sy = np.concatenate([y[s] for y, s in zip(ys, samples, strict=True)])
    r0, c0 = strip_of(sx, sy)
    r1, c1 = strip_of(sx + 1.0, sy)
    r2, c2 = strip_of(sx, sy + 1.0)
    bounds = np.cumsum([0] + [s.size for s in samples])
    inverses = []
    for lo, hi in itertools.pairwise(bounds):
        part = slice(lo, hi)
        jac = np.array(
            [
                [np.nanmedian(r1[part] - r0[part]), np.nanmedian(r2[part] - r0[part])],
                [np.nanmedian(c1[part] - c0[part]), np.nanmedian(c2[part] - c0[part])],
            ]
        )
        inverses.append(np.linalg.inv(jac))
    stepping = list(range(len(groups)))
    for step in range(8):
        if step == 0 and first is not None:
            r, c = first  # every group, at its starting points
        else:
            r, c = strip_of(
                np.concatenate([xs[g] for g in stepping]),
                np.concatenate([ys[g] for g in stepping]),
            )
        ends = np.cumsum([0] + [xs[g].size for g in stepping])
        still = []
        for g, lo, hi in zip(stepping, ends[:-1], ends[1:], strict=True):
            inv, (target_r, target_c) = inverses[g], groups[g][:2]
            er, ec = target_r - r[lo:hi], target_c - c[lo:hi]
            xs[g] += inv[0, 0] * er + inv[0, 1] * ec
            ys[g] += inv[1, 0] * er + inv[1, 1] * ec
            if np.nanmax(np.abs(er) + np.abs(ec), initial=0.0) > 1e-6:
                still.append(g)
        stepping = still
        if not stepping:
            break
    return list(zip(xs, ys, strict=True))


@dataclass(frozen=True, eq=False)
class AstrometricSolution:
    """A night's solved geometry and what follows from it.

    Build with :func:`solve_night`.  Positions in strip pixels are the nominal
    geometry's; ``ref_index``/``det_index`` index the caller's arrays.
    """

    model: TDIModel
    frame: RectifiedFrame
    predictor: GeometryPredictor
    fit: GeometryFit
    ref_index: np.ndarray
    det_index: np.ndarray
    counts: dict
    ref_tracks: SkyTracks
    det_row: np.ndarray
    det_column: np.ndarray
    segments: NightSegments | None = None
    min_segment_stars: int = 10
    segment_searches: tuple[SegmentSearch, ...] = ()

    # ----------------------------------------------------------- parameters
    @property
    def offsets(self) -> GeometryOffsets:
        """Fitted departures from the nominal geometry."""
        return self.fit.offsets

    @property
    def along_scan_offset(self) -> float:
        """Along-scan shift of every star from the clock/east-tilt combination, pixels.

        ``-s_eff / line_time``, where ``s_eff`` is the fitted clock offset,
        i.e. the clock offset plus ``tau_E / (omega cos phi)`` of an unknown
        east tilt ``tau_E`` (see :mod:`pipeline.stages.astrometry._fit`).
        """
        return -self.offsets.clock_offset / self.model.line_time

    @cached_property
    def solved_model(self) -> TDIModel:
        """A full :class:`TDIModel` of the fitted geometry (clock offset in ``start``)."""
        return self.model_for(self.offsets)

    def model_for(self, offsets: GeometryOffsets) -> TDIModel:
        """A full :class:`TDIModel` of the nominal geometry plus ``offsets``."""
        from astropy.time import TimeDelta

        camera = dataclasses.replace(
            self.model.camera, focal_length=self.model.focal_length, spin_period=None
        )
        true_camera, line_time = offsets.apply(camera, self.model.line_time)
        return TDIModel(
            self.model.site,
            true_camera,
            self.model.start + TimeDelta(offsets.clock_offset, format="sec"),
            self.model.duration,
            line_time=line_time,
        )

    @property
    def focal_length(self) -> float:
        """Focal length the fit implies, metres."""
        return self.model.focal_length * (1.0 + self.offsets.focal_scale)

    @property
    def focal_length_from_spin(self) -> float:
        """Focal length the configured spin period implies (the configured one if none), m."""
        camera, site = self.model.camera, self.model.site
        if camera.spin_period is None:
            return float(self.model.focal_length)
        return float(
            focal_length_from_spin(camera.spin_period, normal_gravity(site.latitude, site.height))
        )

    @property
    def line_time(self) -> float:
        """The line time the fit measured (the clocking), seconds."""
        return self.model.line_time * (1.0 + self.offsets.line_time_scale)

    @property
    def matched_line_time(self) -> float:
        """Line time that would match the measured drift at the chip centre, seconds."""
        return self.solved_model.matched_line_time

    def summary(self) -> dict:
        """Fitted parameters with errors, focal lengths and line times, as a flat dict."""
        out = {
            "n_matched": self.fit.n_used,
            "chi2_reduced": self.fit.chi2_reduced,
            "error_floor_px": self.fit.error_floor,
        }
        for name, err in self.fit.errors.items():
            out[name] = float(getattr(self.offsets, name))
            out[name + "_err"] = float(err)
        out.update(
            along_scan_offset_px=self.along_scan_offset,
            focal_length_m=self.focal_length,
            focal_length_from_spin_m=self.focal_length_from_spin,
            # what the config gave: the nominal focal length is the spin period's only then
            focal_length_given=(
                "focal_length" if self.model.camera.spin_period is None else "spin_period"
            ),
            line_time_s=self.line_time,
            matched_line_time_s=self.matched_line_time,
        )
        return out

    def segment_clocks(self) -> list[dict]:
        """Each segment's clock offset relative to the night's, in words and numbers.

        One record per segment (see
        :func:`~pipeline.stages.astrometry._segments.segment_clock_records`:
        milliseconds, and mas along right ascension on the sky); empty
        without segments.
        """
        if self.segments is None:
            return []
        fit = self.fit
        errors = fit.segment_errors
        stars = fit.segment_stars()
        numbers = [int(k) for k in self.segments.numbers]
        _, dec = self.frame.icrs_from_pixel(0.0, 0.5 * (self.frame.n_y - 1))
        reference = fit.reference_segment
        clocks = self.offsets.segment_clocks(numbers)
        return segment_clock_records(
            self.segments,
            [float(v) for v in clocks],
            [0.0 if k == reference else errors.get(k, np.nan) for k in numbers],
            [stars.get(k, 0) for k in numbers],
            [k in errors for k in numbers],
            reference=-1 if reference is None else reference,
            min_stars=self.min_segment_stars,
            declination=float(np.asarray(dec).ravel()[0]),
            searches=self.segment_searches,
        )

    # ------------------------------------------------------------- positions
    def predict_strip(self, ra: ArrayLike, dec: ArrayLike) -> tuple[np.ndarray, np.ndarray]:
        """Strip (row, column) at which stars are recorded in the solved geometry.

        Each star is timed by the clock of the segment whose rows it falls
        in at the night's clock.
        """
        x, _ = self.frame.pixel_from_icrs(ra, dec)
        tracks = self.predictor.tracks(ra, dec, self.predictor.mid_time_of_column(x))
        pred = self.predictor.predict(tracks, self.offsets)
        r, c = self._strip(tracks, pred)
        return r - self._segment_rows(_segments_of(self.segments, r)), c

    def _strip(self, tracks: SkyTracks, pred: PredictedCentroids | None = None):
        """Solved strip (row, column) at the night's clock (no segment clock)."""
        if pred is None:
            pred = self.predictor.predict(tracks, self.offsets)
        r = pred.rows(self.model.n_rows, self.line_time, self.offsets.clock_offset)
        c = pred.column
        if self.fit.wander is not None:
            w_r, w_c = self.fit.wander(pred.t_mid)
            r, c = r + w_r, c + w_c
        return r, c

    def _segment_rows(self, segment: np.ndarray | None) -> np.ndarray | float:
        """Rows by which each segment's own clock moves its points back along the scan."""
        if segment is None or not self.offsets.has_segments:
            return 0.0
        extra = self.offsets.clock_offsets(segment) - self.offsets.clock_offset
        return extra / self.line_time

    def _invert(self, target_r, target_c, x, y, strip_of) -> tuple[np.ndarray, np.ndarray]:
        """Rectified ``(x, y)`` with ``strip_of(x, y) = target`` by Newton steps."""
        ((x, y),) = invert_groups([(target_r, target_c, x, y)], strip_of)
        return x, y

    def _rectified_tracks(self, x: np.ndarray, y: np.ndarray):
        """Sky tracks of rectified ``(x, y)`` and their prediction in the solved geometry."""
        tracks = self.predictor.tracks_from_rectified(self.frame, x, y)
        return tracks, self.predictor.predict(tracks, self.offsets)

    def _solved_strip_of_rectified(self, x, y):
        return self._strip(self.predictor.tracks_from_rectified(self.frame, x, y))

    def _nominal_strip_of_rectified(self, x, y):
        return self.predictor.strip(self.predictor.tracks_from_rectified(self.frame, x, y))

    def sky_from_rectified(
        self, x: ArrayLike, y: ArrayLike, segment: ArrayLike | None = None
    ) -> tuple[np.ndarray, np.ndarray]:
        """Solved ICRS (ra, dec) of detections at night rectified pixels ``(x, y)``, degrees.

        The detection's strip position through the nominal geometry (where
        rectify took it from) is matched by the solved geometry plus wander
        (Newton steps to 1e-6 px), timed by the clock of its segment:
        ``segment`` (each point's segment number, e.g. its stretch's), or
        where None or -1, the segment whose rows hold that strip position.
        """
        ((ra, dec),) = self.sky_from_rectified_groups([(x, y)], [segment])
        return ra, dec

    def sky_from_rectified_groups(
        self, groups, segments=None
    ) -> list[tuple[np.ndarray, np.ndarray]]:
        """:meth:`sky_from_rectified` of each ``(x, y)`` of ``groups``, in one pass.

        Each group's positions are those :meth:`sky_from_rectified` gives for
        it alone (its own Newton steps, see :func:`invert_groups`); the
        predictions of all groups are made together, which saves the fixed
        cost of each call (e.g. the WCS grids of a night's 32 stretches).
        ``segments``: per group, the ``segment`` of :meth:`sky_from_rectified`
        (a stretch's product lies in one segment); None: each point's own.
        """
        points = [(np.asarray(x, float).ravel(), np.asarray(y, float).ravel()) for x, y in groups]
        x = np.concatenate([x for x, _ in points])
        y = np.concatenate([y for _, y in points])
        given = None
        if segments is not None:
            given = np.concatenate(
                [
                    np.broadcast_to(np.asarray(-1 if k is None else k, dtype=np.int64), px.shape)
                    for (px, _), k in zip(points, segments, strict=True)
                ]
            )
        sky, _ = self._sky_of_groups(points, x, y, *self._rectified_tracks(x, y), given)
        return sky

    def _sky_of_groups(self, points, x, y, tracks, pred, segment=None):
        """:meth:`sky_from_rectified_groups` given the concatenated points' tracks.

        Also returns each point's segment number (None without segments).
        """
        # the sky tracks of the points serve twice: the nominal strip position
        # (the target) and the solved one (the first Newton step's evaluation)
        tr, tc = self.predictor.strip(tracks)
        seg = _segments_of(self.segments, tr, segment)
        # a segment's own clock moves its solved rows back by _segment_rows:
        # the point whose row at the night's clock lies that much further on
        target = tr + self._segment_rows(seg)
        ends = np.cumsum([0] + [x.size for x, _ in points])
        parts = [slice(lo, hi) for lo, hi in itertools.pairwise(ends)]
        solved = invert_groups(
            [(target[p], tc[p], x[p], y[p]) for p in parts],
            self._solved_strip_of_rectified,
            first=self._strip(tracks, pred),
        )
        ra, dec = self.frame.icrs_from_pixel(
            np.concatenate([x for x, _ in solved]), np.concatenate([y for _, y in solved])
        )
        return [(ra[p], dec[p]) for p in parts], seg

    def position_errors(
        self,
        x: ArrayLike,
        y: ArrayLike,
        x_err: ArrayLike,
        y_err: ArrayLike,
        segment: ArrayLike | None = None,
    ) -> tuple[np.ndarray, np.ndarray]:
        """1-sigma errors of solved sky positions along RA and Dec, arcseconds.

        The centroid errors and the solution's own uncertainty (the fitted
        parameters' and wander's covariance carried to each position) added
        in quadrature.

        Parameters
        ----------
        x, y : array_like, shape (n,)
            Night rectified pixels of the detections.
        x_err, y_err : array_like, shape (n,)
            Their 1-sigma errors, pixels.
        segment : array_like of int or None
            As for :meth:`sky_from_rectified`.

        Returns
        -------
        ra_err, dec_err : ndarray
            Arcseconds on the sky (``ra_err`` along the RA direction).
        """
        x = np.asarray(x, dtype=float).ravel()
        y = np.asarray(y, dtype=float).ravel()
        tracks, pred = self._rectified_tracks(x, y)
        seg = None
        if self.segments is not None:
            seg = _segments_of(self.segments, self.predictor.strip(tracks)[0], segment)
        return self._errors(x, y, x_err, y_err, tracks, pred, seg)

    def sky_and_errors(
        self,
        x: ArrayLike,
        y: ArrayLike,
        x_err: ArrayLike,
        y_err: ArrayLike,
        segment: ArrayLike | None = None,
    ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """:meth:`sky_from_rectified` and :meth:`position_errors` of the same positions.

        The same values, with the positions' sky tracks and solved prediction
        made once for both (~0.1 s for the ~55 000 detections of a
        4096-column night).

        Returns
        -------
        ra, dec : ndarray
            Degrees.
        ra_err, dec_err : ndarray
            Arcseconds.
        """
        return self.sky_errors_and_exposures(x, y, x_err, y_err, segment)[:4]

    def sky_errors_and_exposures(
        self,
        x: ArrayLike,
        y: ArrayLike,
        x_err: ArrayLike,
        y_err: ArrayLike,
        segment: ArrayLike | None = None,
    ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """:meth:`sky_and_errors` and each position's exposure, from the same tracks.

        A star's exposure in drift scanning is the time it takes to cross the
        chip (entry to exit of its solved track), not the charge packets'
        ``N`` line times: its drift rate varies as cos(dec), so a star off
        the chip's centre line collects its light for longer (poleward) or
        shorter, by about ``tan(phi) * d_dec`` (1.2 % from edge to edge of a
        0.59 deg chip at latitude 50), while every packet collects the sky
        for ``N`` line times.  Zero points of point sources divide by it.

        Returns
        -------
        ra, dec, ra_err, dec_err : ndarray
            As :meth:`sky_and_errors` gives them.
        exposure : ndarray
            Seconds; NaN where the crossing leaves the tracked window.
        """
        x = np.asarray(x, dtype=float).ravel()
        y = np.asarray(y, dtype=float).ravel()
        tracks, pred = self._rectified_tracks(x, y)
        ((ra, dec),), seg = self._sky_of_groups([(x, y)], x, y, tracks, pred, segment)
        exposure = pred.t_end - pred.t_start
        return ra, dec, *self._errors(x, y, x_err, y_err, tracks, pred, seg), exposure

    def _errors(self, x, y, x_err, y_err, tracks, pred, segment=None):
        """:meth:`position_errors` given the positions' tracks, prediction and segments."""
        fit = self.fit
        row = pred.rows(self.model.n_rows, self.line_time, self.offsets.clock_offsets(segment))
        jac = parameter_jacobian(
            self.predictor,
            tracks,
            self.offsets,
            fit.names,
            pred,
            row,
            pred.column,
            segment,
            fit.segments,
        )
        n = x.size
        cov = fit.full_covariance

        def variances(sl: slice) -> tuple[np.ndarray, np.ndarray]:
            g_row, g_col = jac[:n][sl], jac[n:][sl]
            if fit.wander is not None:
                b_row, b_col = fit.wander.reduced_basis(pred.t_mid[sl])
                m = g_row.shape[0]
                g_row = np.column_stack([g_row, b_row, np.zeros((m, b_col.shape[1]))])
                g_col = np.column_stack([g_col, np.zeros((m, b_row.shape[1])), b_col])
            return (
                np.einsum("ij,jk,ik->i", g_row, cov, g_row),
                np.einsum("ij,jk,ik->i", g_col, cov, g_col),
            )

        # Chunks keep the wander's basis small; each chunk's sums are the same
        # in either thread, and einsum releases the GIL: half of them go to a
        # second thread while the pool's other worker idles (this method
        # 0.37-0.40 -> 0.24-0.28 s for the ~55 000 detections of a
        # 4096-column night).
        chunks = [slice(lo, lo + 8192) for lo in range(0, n, 8192)]
        parts = in_two_threads(variances, chunks, "astrometry-errors")
        var_row = np.concatenate([row for row, _ in parts]) if parts else np.empty(0)
        var_col = np.concatenate([col for _, col in parts]) if parts else np.empty(0)
        _, dec = self.frame.icrs_from_pixel(x, y)
        along = self.frame.cdelt1 * 3600.0 * np.cos(np.radians(dec))
        across = self.frame.cdelt2 * 3600.0
        ra_err = along * np.sqrt(np.asarray(x_err, float) ** 2 + var_row)
        dec_err = across * np.sqrt(np.asarray(y_err, float) ** 2 + var_col)
        return ra_err, dec_err

    def predict_rectified(self, ra: ArrayLike, dec: ArrayLike) -> tuple[np.ndarray, np.ndarray]:
        """Night rectified ``(x, y)`` at which stars are recorded in the solved geometry."""
        ra = np.asarray(ra, dtype=float).ravel()
        dec = np.asarray(dec, dtype=float).ravel()
        tr, tc = self.predict_strip(ra, dec)
        x0, y0 = self.frame.pixel_from_icrs(ra, dec)
        return self._invert(tr, tc, x0, y0, self._nominal_strip_of_rectified)

    # ------------------------------------------------------------ statistics
    def residual_grid(self, n_across: int = 4, n_along: int = 8) -> Table:
        """Residuals of the kept pairs (detection minus model) on a grid, mas."""
        fit = self.fit
        scale = self.model.pixel_scale * 1000.0
        used = fit.used
        col = self.det_column[fit.det_index]
        return residual_grid(
            col[used],
            fit.t_mid[used],
            fit.residual_row[used] * scale,  # later rows hold larger RA: along = east
            fit.residual_column[used] * scale,
            column_range=(-0.5, self.model.camera.n_columns - 0.5),
            time_range=(float(np.nanmin(fit.t_mid)), float(np.nanmax(fit.t_mid))),
            n_across=n_across,
            n_along=n_along,
        )
