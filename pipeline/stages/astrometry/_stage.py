"""The astrometry stage: the night catalogue solved against a reference catalogue.

Night scope, after ``catalog``.  The nominal geometry is rebuilt exactly as
rectify built it (:func:`~pipeline.stages.rectify.night_model` from ingest's
block index, :meth:`RectifiedFrame.for_night` with the pixel scale read from
a rectified product's header), the reference stars of the night's band are
read in chunks (the stage's one file, handed over by the runner as an
:class:`~pipeline.stages.base.ExternalFile`, see ``Stage.streams``), and
:func:`solve_catalog` fits the night's geometry.  Each rectified stretch gets
a TAN-SIP WCS of the solution (:func:`solved_wcs`), checked to reproduce it
to ``wcs_tolerance`` pixels, with the solution's own error over the stretch
(:func:`~pipeline.stages.astrometry._wcs.wcs_position_errors`) in its
``CSYER1``, ``CSYER2`` cards (:func:`systematic_error_cards`): the error every
position measured on the science image shares, which the mosaic's tiles
carry on.

Second pass: when the solution's tracks differ from the configured ones by
more than the bright stars' centroid noise (``second_pass_noise``; see
:mod:`~pipeline.stages.astrometry._second_pass`), detect measures every
rectified stretch again with the solved geometry's smear kernels (with the
options it recorded in its catalogue) and the night is solved again, from
the previous solution, up to ``max_passes`` solutions.  Each pass is recorded
in ``parameters.meta['passes']`` (kernel change, centroid noise, threshold,
the geometry found, what followed) and the number of passes in each stretch
WCS's ``ASTPASS`` card, which the science images carry.
"""

from __future__ import annotations

import dataclasses
import logging
from concurrent.futures import ThreadPoolExecutor
from typing import TYPE_CHECKING, Any

import numpy as np
from pydantic import Field

from pipeline.exceptions import AstrometryError
from pipeline.geometry.rectified import RectifiedFrame
from pipeline.products import FLUX_EXTENSION
from pipeline.reference import ReferenceOptions, read_reference, sky_band_for_night
from pipeline.stages.astrometry._catalog import AstrometryOptions, solve_catalog
from pipeline.stages.astrometry._model import GeometryOffsets
from pipeline.stages.astrometry._second_pass import (
    centroid_noise,
    kernel_change,
    kernel_change_error,
    solved_kernels_of_stretches,
)
from pipeline.stages.astrometry._segments import NightSegments
from pipeline.stages.astrometry._wcs import solved_wcs, wcs_position_errors, wcs_sky
from pipeline.stages.base import BLOCK_INDEX, PROBLEMS, Stage
from pipeline.stages.catalog import stack_catalogs
from pipeline.stages.detect import WARM as DETECT_WARM
from pipeline.stages.detect import DetectOptions, detect_stretch
from pipeline.stages.rectify import WARM as RECTIFY_WARM
from pipeline.stages.rectify import night_model, stretch_columns

if TYPE_CHECKING:
    from astropy import units as u
    from astropy.table import QTable

__all__ = [
    "STAGE",
    "AstrometryStageOptions",
    "error_floor_problem",
    "geometry_moved",
    "kernels_differ",
    "next_pass",
    "reference_columns",
    "stretch_wcs_cards",
    "unconverged_problem",
]

log = logging.getLogger(__name__)

#: SIP degrees tried in turn until a stretch's WCS is within the tolerance.
_SIP_DEGREES = (3, 4, 5)


class AstrometryStageOptions(AstrometryOptions):
    """Options of the astrometry stage (``stages.astrometry``).

    The solver's options (:class:`AstrometryOptions`) plus where the
    reference stars come from and how closely each stretch's WCS must
    reproduce the solution.
    """

    reference: ReferenceOptions = Field(
        default_factory=ReferenceOptions, description="Reference stars (see ReferenceOptions)."
    )
    wcs_tolerance: float = Field(
        0.02,
        gt=0,
        description="Pixels: largest allowed distance between a stretch's WCS and the solution.",
    )
    max_passes: int = Field(
        3,
        ge=1,
        description="Solutions per night at most: after each, detect measures the stretches "
        "again with the solved geometry's smear kernels if they differ enough (1: never).",
    )
    max_error_floor: float = Field(
        0.1,
        gt=0,
        description="Arcsec: an error common to every pair (the fit's error floor) above this "
        "is reported as a problem: the geometry does not fit the stars.",
    )
    second_pass_noise: float = Field(
        1.0,
        gt=0,
        description="Measure again when the solved geometry moves some smear-kernel sample "
        "by more than this many bright-star centroid noises (see _second_pass).",
    )


def reference_columns(ref_index: np.ndarray, reference: QTable) -> dict[str, u.Quantity]:
    """``ref_mag``, ``ref_mag_err`` and ``ref_colour`` of each detection's reference star.

    Parameters
    ----------
    ref_index : ndarray of int, shape (n,)
        Row of the matched reference star, -1 where none.
    reference : QTable
        The reference stars (``mag``, optionally ``mag_error`` and ``colour``), as
        :func:`read_reference` returns them.

    Returns
    -------
    dict
        ``ref_mag``, ``ref_mag_err`` and ``ref_colour`` [mag], NaN where
        unmatched (and the error or colour NaN throughout when the reference
        has none).
    """
    from astropy import units as u

    ref_index = np.asarray(ref_index, dtype=np.int64)
    matched = ref_index >= 0
    out = {}
    for name, column in (
        ("ref_mag", "mag"),
        ("ref_mag_err", "mag_error"),
        ("ref_colour", "colour"),
    ):
        values = np.full(ref_index.size, np.nan)
        if column in reference.colnames:
            source = u.Quantity(reference[column], u.mag).value
            values[matched] = source[ref_index[matched]]
        out[name] = values * u.mag
    return out


def stretch_wcs_cards(
    solution,
    x_start: int,
    n_x: int,
    tolerance: float,
    sky=None,
    *,
    strict: bool = True,
    segment: int | None = None,
) -> tuple[dict[str, Any], float]:
    """FITS cards of the solved WCS of one rectified stretch, and its largest error.

    Tries SIP degrees 3, 4, 5 until :func:`solved_wcs` reproduces the
    solution to ``tolerance`` pixels.  ``sky``: the stretch's item of
    :func:`~pipeline.stages.astrometry._wcs.wcs_sky`, if made already (the
    solved positions do not depend on the degree: made once).  ``strict``:
    raise when no degree reaches the tolerance; False: return the closest
    of them (the caller compares ``max_error`` with ``tolerance``).
    ``segment``: the stretch's segment number, whose clock times it (None:
    each point's by its row).

    Returns
    -------
    cards : dict
        Keyword -> value (``astropy.wcs.WCS.to_header(relax=True)``), plus
        ``WCSDEV``: the largest distance to the solution, pixels.
    max_error : float
        That distance.

    Raises
    ------
    AstrometryError
        If no degree reaches the tolerance (the WCS would misplace stars).
    """
    if sky is None and n_x >= 2:
        (sky,) = wcs_sky(solution, [(x_start, n_x)], segments=[segment])
    tried = []
    for degree in _SIP_DEGREES:
        wcs, max_error = solved_wcs(
            solution, x_start, n_x, sip_degree=degree, sky=sky, segment=segment
        )
        if max_error <= tolerance:
            break
        tried.append((max_error, degree, wcs))
    else:
        if not strict:
            max_error, _, wcs = min(tried, key=lambda item: (item[0], item[1]))
            return _wcs_cards(wcs, max_error), float(max_error)
        raise AstrometryError(
            f"the solved WCS of the stretch at night columns [{x_start}, {x_start + n_x}) "
            f"is {max_error:.4f} px off the solution even with SIP degree {degree} "
            f"(tolerance {tolerance} px); use shorter stretches (run.stretch_rows) or a "
            "larger stages.astrometry.wcs_tolerance.",
            {"max_error_px": max_error},
        )
    return _wcs_cards(wcs, max_error), float(max_error)


def systematic_error_cards(ra_err: float, dec_err: float, dec: float) -> dict[str, list]:
    """``CSYER1``, ``CSYER2``: a solved WCS's own error, as the FITS WCS standard writes it.

    ``CSYERia`` is the systematic error of coordinate ``i``, in its
    ``CUNITia`` (a reserved WCS keyword of the FITS Standard 4.0; from memory):
    degrees of right ascension and of declination.  Every star on the
    product shares it; its own centroid's error comes on top.

    Parameters
    ----------
    ra_err, dec_err : float
        The solution's error along right ascension (on the sky) and
        declination, arcsec (:func:`~pipeline.stages.astrometry._wcs.wcs_position_errors`).
    dec : float
        Declination of the product's centre, deg: a distance on the sky
        along right ascension is ``cos(dec)`` of the coordinate's degrees.

    Returns
    -------
    dict
        Keyword -> ``[value, comment]``.
    """
    ra_coordinate = ra_err / np.cos(np.radians(dec)) / 3600.0
    return {
        "CSYER1": [float(f"{ra_coordinate:.4e}"), "[deg] RA error of the solved WCS"],
        "CSYER2": [float(f"{dec_err / 3600.0:.4e}"), "[deg] Dec error of the solved WCS"],
    }


#: A stretch with fewer matched detections than this fraction of the night's
#: median per stretch is reported (:func:`unmatched_stretches`).
UNMATCHED_FRACTION = 0.1


def unmatched_stretches(
    catalog, stretch_ids: list[str], min_median: int = 10, exclude_mask: int = 0
) -> list[str]:
    """One line per stretch whose detections the fit (nearly) all left out.

    A stretch whose stars the night's solution does not fit (a clock error
    in its segment's DATE-OBS, a camera that moved) keeps positions that
    nothing checks; the zero point then calls it FEW_STARS.  Reported when
    the stretch has detections the fit could use (none of the flags
    ``exclude_mask``) but fewer matched ones than
    :data:`UNMATCHED_FRACTION` of the median of the stretches the fit used
    (those with a matched detection: when most stretches are lost, the
    median of all would be 0 and name none), and that median is at least
    ``min_median``.  A stretch whose detections the flags left out (the
    start-of-scan ramp's, all PARTIAL_EXPOSURE) is not named: nothing went
    wrong there.

    Parameters
    ----------
    catalog : astropy.table.Table
        The solved catalogue (``stretch``: index into ``stretch_ids``;
        ``ref_index``: -1 where not in the fit; ``flags``, if ``exclude_mask``).
    stretch_ids : list of str
        The ids of the catalogue's stretches, in order.
    min_median : int, optional
        Fewest matched detections per stretch, as a median, for the check.
    exclude_mask : int, optional
        The detect flags (``fit_exclude_flags``) of detections the fit left
        out by design.

    Returns
    -------
    list of str
    """
    index = np.asarray(catalog["stretch"], dtype=float)
    matched = np.asarray(catalog["ref_index"]) >= 0
    usable = np.ones(len(index), bool)
    if exclude_mask:
        usable = (np.asarray(catalog["flags"], dtype=np.int64) & exclude_mask) == 0
    detected = np.array([np.sum(usable & (index == k)) for k in range(len(stretch_ids))])
    kept = np.array([np.sum(matched & (index == k)) for k in range(len(stretch_ids))])
    used = kept[kept > 0]
    if not used.size or np.median(used) < min_median:
        return []
    median = float(np.median(used))
    return [
        f"{stretch_ids[k]}: {kept[k]} of its {detected[k]} usable detections in the fit "
        f"against a median of {median:g} per stretch fitted: its positions are the "
        "solution's, unchecked (a clock error in its segment's DATE-OBS? a cloud?)."
        for k in range(len(stretch_ids))
        if detected[k] > 0 and kept[k] < UNMATCHED_FRACTION * median
    ]


def _wcs_cards(wcs, max_error: float) -> dict[str, Any]:
    header = wcs.to_header(relax=True)
    cards = {key: header[key] for key in header}
    cards["WCSDEV"] = round(float(max_error), 6)
    return cards


def _pixel_scale(image, x_start: int, n_x: int, frame_x_ref: int) -> float:
    """Across-scan pixel scale [arcsec] of a rectified product, checked against the plan."""
    header = image[FLUX_EXTENSION].header
    crpix1 = float(header["CRPIX1"])
    if crpix1 != float(frame_x_ref - x_start + 1) or int(header["NAXIS1"]) != n_x:
        raise ValueError(
            f"the rectified product's columns (CRPIX1={crpix1}, NAXIS1={header['NAXIS1']}) are "
            f"not the ones the night's geometry gives (x_start={x_start}, n_x={n_x}); rerun "
            "rectify with the current config."
        )
    return float(header["CDELT2"]) * 3600.0


#: Comment of the ``ASTPASS`` card of each stretch's solved WCS.
_PASS_COMMENT = "astrometry passes; >1: smear measured again"


def _detect_options(catalog) -> DetectOptions:
    """The options detect measured the night with (recorded in its catalogue)."""
    recorded = catalog.meta.get("detect_options")
    if recorded is None:
        log.warning(
            "the night catalogue does not record detect's options (made before they were "
            "recorded): the second pass measures with detect's defaults; rerun detect to "
            "measure with the config's."
        )
        return DetectOptions()
    return DetectOptions(**recorded)


def _remeasure(inputs, stretches, kernels: list, detect_options) -> QTable:
    """The night catalogue measured again, each stretch with ``kernels[i]``."""
    products = inputs["rectify"]
    position = {stretch.index: i for i, stretch in enumerate(stretches)}
    catalogs, seeing = [], []
    for i, stretch in enumerate(stretches):
        sides = [position.get(stretch.index - 1), position.get(stretch.index + 1)]
        out = detect_stretch(
            products[i],
            *(None if k is None else products[k] for k in sides),
            detect_options,
            stretch_index=stretch.index,
            kernels=(kernels[i], *(None if k is None else kernels[k] for k in sides)),
            # the stretch's planes, read for this pass (its image files stay open until
            # the unit ends, holding what they read), are dropped once padded
            release=True,
        )
        catalogs.append(out["catalog"])
        seeing.append(out["seeing"])
    catalog, _ = stack_catalogs(catalogs, seeing)
    return catalog


def _deconvolved(rectified, n_stretches: int) -> bool:
    """Whether any rectified stretch was deconvolved (its ``DECONV`` card).

    Asked only when another pass would follow: each stretch's image file is
    checked against its SHA-256 before its header is read, about 1.3 GB on
    the 4096-column night.
    """
    return any(
        bool(rectified[i]["image"][FLUX_EXTENSION].header.get("DECONV", False))
        for i in range(n_stretches)
    )


def _kernel_tables(rectified, n_stretches: int) -> list:
    """rectify's ``smear_kernels`` table of each stretch, in order."""
    return [rectified[i]["smear_kernels"] for i in range(n_stretches)]


#: Errors by which a parameter that shapes the smear kernels must have moved
#: since the geometry the kernels came from for the move to count as the
#: solution still converging (:func:`geometry_moved`): far beyond the 1-2
#: sigma a pass by which a right config's focal length and distortion walk.
MOVED_SIGMA = 5.0


def geometry_moved(before, after, errors: dict[str, float]) -> dict[str, float]:
    """The kernel-shaping parameters that moved beyond :data:`MOVED_SIGMA` of their errors.

    A solution far from the truth (a camera rotated 0.23 deg from the
    config's tilts every track by 8 px over 2048 TDI rows) is fitted to
    centroids measured with wrong kernels, and its covariance is inflated by
    the misfit; carried to the kernels it can make a real change look
    unknown (0.47 +- 0.28 px on a simulated night whose rotation had just
    moved by 117", 35 of its errors), and the passes stopped with the
    stars 48 mas off in Dec.  A parameter that moved by many of its errors
    since the kernels' geometry says the change is real.  The clocks are
    left out: they move the tracks, not their shapes.

    Parameters
    ----------
    before, after : GeometryOffsets
        The geometry the kernels detect used came from, and the new solution's.
    errors : dict of str to float
        The new solution's 1-sigma errors of its fitted parameters.

    Returns
    -------
    dict of str to float
        Each such parameter's move in units of its error.
    """
    moved = {}
    for name, error in errors.items():
        if name == "clock_offset" or not np.isfinite(error) or error <= 0:
            continue
        sigmas = abs(getattr(after, name) - getattr(before, name)) / error
        if sigmas > MOVED_SIGMA:
            moved[name] = round(float(sigmas), 1)
    return moved


def kernels_differ(change: float, error: float, threshold: float, moved: bool = False) -> bool:
    """Whether the solved geometry's smear kernels differ from those detect used.

    Parameters
    ----------
    change : float
        Largest displacement of a kernel sample between the kernels detect
        measured with and the solved geometry's, pixels
        (:func:`~pipeline.stages.astrometry._second_pass.kernel_change`).
    error : float
        Its 1-sigma uncertainty from the solution's covariance, pixels.
    threshold : float
        ``second_pass_noise`` times the bright stars' centroid noise, pixels.
    moved : bool, optional
        Whether the geometry moved beyond its errors since the kernels'
        (:func:`geometry_moved`): the change is then known whatever its
        uncertainty says.

    Returns
    -------
    bool
        True for a change both larger than the bright stars' noise and known:
        above 3 sigma of the solution's own uncertainty (common practice), or
        ``moved``, else the passes would chase the fit's noise.
    """
    return bool(change > threshold and (change > 3.0 * error or moved))


def next_pass(
    wanted: bool, n_done: int, max_passes: int, *, deconvolved: bool = False
) -> tuple[bool, str, str | None]:
    """What follows a solution: another measurement, or the end (and why).

    Parameters
    ----------
    wanted : bool
        Whether the solved kernels differ enough from the ones measured with
        (:func:`kernels_differ`).
    n_done : int
        Solutions made so far, this one included.
    max_passes : int
        ``stages.astrometry.max_passes``.
    deconvolved : bool, optional
        Whether the rectified products were deconvolved with the configured
        kernels (another measurement of the same planes cannot help).

    Returns
    -------
    again : bool
        Whether detect measures the stretches again with the solved kernels.
    next : str
        What followed, for the pass's record.
    problem : str or None
        Why the night ended with kernels that do not match its stars: the
        positions and fluxes were measured with a wrong model, so the
        solution (and the photometry after it) may be biased.  None when the
        kernels match, or another pass follows.
    """
    if not wanted:
        return False, "none", None
    if deconvolved:
        return (
            False,
            "none: the products are deconvolved with the configured kernels (rerun "
            "rectify with a corrected camera section)",
            "the rectified products are deconvolved with the configured kernels: rerun "
            "from rectify with the camera section set nearer the solved geometry "
            "(parameters.ecsv)",
        )
    if n_done >= max_passes:
        return (
            False,
            f"none: max_passes={max_passes} reached",
            f"stages.astrometry.max_passes={max_passes} reached: raise it, or set the camera "
            "section nearer the solved geometry (parameters.ecsv) and rerun from rectify",
        )
    return True, "measure again with these kernels", None


def unconverged_problem(record: dict, why: str) -> str:
    """The problem line of a night whose last solution still moves the smear kernels.

    Parameters
    ----------
    record : dict
        The last pass's record (``kernel_change_px``, ``kernel_change_error_px``,
        ``threshold_px``, ``pass``).
    why : str
        Why no further pass was made, and the fix (from :func:`next_pass`).
    """
    return (
        f"astrometry did not converge: after {record['pass']} pass(es) the solved geometry "
        f"still moves the stars' smear kernels by {record['kernel_change_px']:.3f} +- "
        f"{record['kernel_change_error_px']:.3f} px (threshold "
        f"{record['threshold_px']:.3f} px), so positions and fluxes were measured with "
        f"kernels that do not fit the stars and the solution may be biased; {why}"
    )


def error_floor_problem(floor_px: float, pixel_scale: float, limit: float) -> str | None:
    """The problem line of a solution whose residuals its model does not explain.

    Parameters
    ----------
    floor_px : float
        The fit's error floor: the error common to every pair that makes its
        reduced chi-square 1, rectified pixels.
    pixel_scale : float
        Arcsec per rectified pixel across the scan.
    limit : float
        ``stages.astrometry.max_error_floor``, arcsec.  Its default, 0.1
        arcsec, is twice the absolute accuracy of a well-calibrated drift
        scan (45 mas rms per coordinate; Pier et al. 2003, AJ 125, 1559):
        scatter beyond it is the model's, not the stars'.

    Returns
    -------
    str or None
        None when the floor is within the limit.
    """
    floor = floor_px * pixel_scale
    if not floor > limit:
        return None
    return (
        f"the geometry does not fit the stars: every pair needed an extra error of "
        f"{floor:.3f} arcsec ({floor_px:.3f} px) for a reduced chi-square of 1 (limit "
        f"stages.astrometry.max_error_floor={limit:g} arcsec), so positions are that "
        "uncertain; look for what the model lacks (a LINETIME that is not the camera's "
        "clock: ingest's gaps or overlaps between blocks; a camera section far from the "
        "solved one)"
    )


def stretch_segments(stretches, segments: NightSegments) -> dict[int, int]:
    """Segment number of each stretch (by its index), from its first row."""
    return {stretch.index: segments.containing(stretch.start) for stretch in stretches}


def _catalog_segments(catalog, by_stretch: dict[int, int]) -> np.ndarray:
    """Segment number of each catalogue row: its stretch's (-1 where not known)."""
    index = np.asarray(catalog["stretch"], dtype=np.int64)
    return np.array([by_stretch.get(int(k), -1) for k in index], dtype=np.int64)


def segment_clock_problems(records: list[dict]) -> list[str]:
    """Problem lines of the segments whose DATE-OBS the stars say is off.

    Parameters
    ----------
    records : list of dict
        :meth:`AstrometricSolution.segment_clocks`.

    Returns
    -------
    list of str
        One line per fitted segment whose clock offset lies more than 5
        sigma (common practice) and more than 1 ms from the night's clock:
        less is the rounding of DATE-OBS written to the millisecond.  The
        solution corrects it; the line says by how much.  And one per
        segment whose stars missed at the night's clock and whose search
        along the scan found no clock either: its positions are unchecked.
        A segment with too few stars for a clock of its own whose search
        found no more pairs than matched at the night's clock is no news:
        its stars agree with that clock.
    """
    lines = []
    for r in records:
        where = (
            f"segment {r['segment']} (rows {r['rows'][0]}-{r['rows'][1] - 1}, from "
            f"{r['first_block']})"
        )
        search = r.get("search")
        if r["fitted"] and abs(r["offset_ms"]) > max(5.0 * r["offset_err_ms"], 1.0):
            lines.append(
                f"{where}: its {r['n_stars']} stars put its DATE-OBS "
                f"{abs(r['offset_ms']):.1f} +- {r['offset_err_ms']:.1f} ms "
                f"{'late' if r['offset_ms'] < 0 else 'early'} against the night's clock "
                f"({r['ra_mas']:+.0f} mas in RA): the solution gives the segment its own "
                "clock (parameters' segment_clocks); check the camera computer's clock, or "
                "LINETIME if ingest finds the same jump at every block."
            )
        elif (
            search is not None
            and not search["found"]
            and not r["reference"]
            and r["n_stars"] < max(search["pairs"], 1)
        ):
            lines.append(
                f"{where}: {r['n_stars']} of its stars matched at the night's clock and a "
                f"search along the scan within +-{search['range_s']:g} s found no clock "
                f"(best {search['pairs']} pairs against {search['chance']:g} by chance): "
                "its positions are the night's clock's, unchecked; check its first block's "
                "DATE-OBS (a larger stages.astrometry.search_segment_clock) or its detections."
            )
    return lines


def _solve_passes(inputs, stretches, model, frame, options, reference, ref_mag, segments=None):
    """Solve, and measure again with the solved smear kernels while they differ enough.

    Returns the last solution, one record per pass (what the kernels
    followed, the kernel change the solution implies, the threshold, the
    decision), for the parameters' provenance, and the problems: one line
    when the last solution still moves the kernels (:func:`next_pass`).
    """
    from astropy import units as u

    catalog = inputs["catalog"]["catalog"]
    detect_options = _detect_options(catalog)
    by_stretch = {} if segments is None else stretch_segments(stretches, segments)

    def solve(catalog, options, start=None):
        """:func:`solve_catalog` of this catalogue, each detection timed by its segment."""
        along = {}
        if segments is not None:
            along = {"segments": segments, "segment": _catalog_segments(catalog, by_stretch)}
        return solve_catalog(
            catalog,
            reference["ra"],
            reference["dec"],
            model,
            frame,
            options,
            ref_mag=ref_mag,
            start=start,
            **along,
        )

    # The stretches' smear-kernel tables (32 ECSV files of a 4096-column night,
    # ~0.4 s to parse and check against their SHA-256, mostly outside Python's
    # lock) are read in a thread while the first solution is computed: nothing
    # else reads the store meanwhile, and the thread has ended when the block
    # does, whatever the solution raised.
    with ThreadPoolExecutor(max_workers=1, thread_name_prefix="astrometry-kernels") as reader:
        pending = reader.submit(_kernel_tables, inputs["rectify"], len(stretches))
        first = solve(catalog, options)
        kernels = pending.result()
    passes, start = [], None
    # The next pass's kernels follow a fit weighted by the given errors alone:
    # while the kernels are wrong, the centroids' excess scatter is the same
    # systematic for bright and faint stars, and the error floor fitted to it
    # would hand the faint stars' noise an equal say (on the 4096-column
    # mis-set night the passes then converged to 0.15 px instead of 0.014 px
    # of kernel change, and the rotation ended 3.5" off instead of 0.35").
    # The decision and the night's result use the fit with the floor, whose
    # errors are honest once the kernels are right.
    unfloored = options.model_copy(update={"fit_error_floor": False})
    while True:
        if first is not None:
            solved, first = first, None
        else:
            solved = solve(catalog, options, start)
        nodes: dict = {}  # the nominal map's node columns, shared by every stretch's kernels
        new = solved_kernels_of_stretches(kernels, solved.solution, model, frame, nodes=nodes)
        changes = [kernel_change(a, b) for a, b in zip(kernels, new, strict=True)]
        change, error = 0.0, 0.0
        if changes:
            i = int(np.argmax(changes))
            change = changes[i]
            error = kernel_change_error(
                kernels[i], new[i], solved.solution, model, frame, nodes=nodes
            )
        noise = centroid_noise(
            u.Quantity(catalog["x_err"], u.pix).value,
            u.Quantity(catalog["y_err"], u.pix).value,
            np.asarray(catalog["snr"], float) if "snr" in catalog.colnames else None,
            np.asarray(solved.catalog["ref_index"]) >= 0,
        )
        threshold = options.second_pass_noise * noise
        moved = geometry_moved(
            start or GeometryOffsets(), solved.solution.offsets, solved.solution.fit.errors
        )
        record = {
            "pass": len(passes) + 1,
            "kernels_from": "config" if not passes else f"pass {len(passes)}",
            "n_matched": int(solved.solution.fit.n_used),
            "kernel_change_px": round(change, 4),
            "kernel_change_error_px": round(error, 4),
            "centroid_noise_px": round(noise, 4),
            "error_floor_px": round(float(solved.solution.fit.error_floor), 4),
            "threshold_px": round(threshold, 4),
            "moved_sigma": moved,
            "geometry": {
                k: [float(e) for e in v] if isinstance(v, tuple) else float(v)
                for k, v in dataclasses.asdict(solved.solution.offsets).items()
            },
        }
        wanted = kernels_differ(change, error, threshold, bool(moved))
        guide = solved
        if wanted and options.fit_error_floor and passes:
            # The kernels detect used are the previous pass's fit without the
            # error floor (below); the floor weights the stars otherwise, and the
            # two fits' kernels may differ by more than the noise whatever the
            # passes do (0.05 px on a night of a 500 ppm camera clock, three
            # passes reported as not converged).  When this pass's fit without
            # the floor gives the kernels measured with back, the passes have
            # converged.
            guide = solve(catalog, unfloored, solved.solution.offsets)
            new = solved_kernels_of_stretches(kernels, guide.solution, model, frame)
            own = max(kernel_change(a, b) for a, b in zip(kernels, new, strict=True))
            record["unfloored_kernel_change_px"] = round(own, 4)
            settled = own <= threshold and not moved
            wanted = not settled
        deconvolved = wanted and _deconvolved(inputs["rectify"], len(stretches))
        again, record["next"], problem = next_pass(
            wanted, record["pass"], options.max_passes, deconvolved=deconvolved
        )
        if "unfloored_kernel_change_px" in record and not wanted:
            record["next"] = "none: the fit without the error floor gives the kernels back"
        passes.append(record)
        log.info(
            "astrometry pass %d: %d matched, smear kernels move by %.3f +- %.3f px "
            "(threshold %.3f px = %.1f x centroid noise, and 3 sigma): %s",
            record["pass"],
            record["n_matched"],
            change,
            error,
            threshold,
            options.second_pass_noise,
            record["next"],
        )
        if not again:
            problems = [] if problem is None else [unconverged_problem(record, problem)]
            return solved, passes, problems
        if options.fit_error_floor and guide is solved:  # only a pass that is followed needs it
            guide = solve(catalog, unfloored, solved.solution.offsets)
            new = solved_kernels_of_stretches(kernels, guide.solution, model, frame)
        kernels = new
        catalog = _remeasure(inputs, stretches, kernels, detect_options)
        start = guide.solution.offsets


def _run(*, inputs, options: AstrometryStageOptions, context) -> dict[str, Any]:
    from astropy import units as u

    stretches = context.input_stretches
    night_rows = context.stretches[-1].stop
    model = night_model(context.site, context.camera, inputs["ingest"][BLOCK_INDEX], night_rows)
    first = RectifiedFrame.for_night(model, night_rows)
    columns = [stretch_columns(model, first, (s.start, s.stop)) for s in stretches]
    x_start, x_stop = columns[0]
    scale = _pixel_scale(inputs["rectify"][0]["image"], x_start, x_stop - x_start, first.x_ref)
    frame = RectifiedFrame.for_night(model, night_rows, pixel_scale=scale)

    band = sky_band_for_night(
        model, focal_length_range=options.search_focal, tilt_range=options.search_tilt
    )
    reference_options = options.reference
    handle = inputs.get("reference.path")
    if handle is not None:
        reference_options = reference_options.model_copy(update={"path": handle.path})
    reference = read_reference(reference_options, band, frame.epoch)
    ref_mag = None
    if "mag" in reference.colnames:
        ref_mag = u.Quantity(reference["mag"], u.mag).value
    segments = NightSegments.from_block_index(inputs["ingest"][BLOCK_INDEX])
    solved, passes, problems = _solve_passes(
        inputs, stretches, model, frame, options, reference, ref_mag, segments
    )
    floor = error_floor_problem(
        float(solved.solution.fit.error_floor), scale, options.max_error_floor
    )
    problems = [*problems, floor] if floor is not None else problems
    catalog = solved.catalog
    for name, values in reference_columns(catalog["ref_index"], reference).items():
        catalog[name] = values
        catalog[name].info.description = "magnitude/colour of the matched reference star"

    wcs, worst = {}, 0.0
    products = [
        (s, start, stop - start) for s, (start, stop) in zip(stretches, columns, strict=True)
    ]
    products = [(stretch, start, n_x) for stretch, start, n_x in products if n_x > 1]
    # every stretch's solved points in one pass (the fixed cost of each pass is ~5 ms)
    by_stretch = stretch_segments(stretches, segments)
    skies = wcs_sky(
        solved.solution,
        [(start, n_x) for _, start, n_x in products],
        segments=[by_stretch[stretch.index] for stretch, _, _ in products],
    )
    errors = wcs_position_errors(
        solved.solution,
        [(start, n_x) for _, start, n_x in products],
        segments=[by_stretch[stretch.index] for stretch, _, _ in products],
    )
    for (stretch, start, n_x), sky, error_on_sky in zip(products, skies, errors, strict=True):
        # A stretch whose WCS cannot follow the solution (the start-of-scan ramp,
        # a transparency step) keeps its closest WCS and is reported: failing the
        # stage would cost every stretch of the night its zero point and science.
        wcs[stretch.id], error = stretch_wcs_cards(
            solved.solution, start, n_x, options.wcs_tolerance, sky=sky, strict=False
        )
        wcs[stretch.id]["ASTPASS"] = [len(passes), _PASS_COMMENT]
        wcs[stretch.id].update(systematic_error_cards(*error_on_sky, float(sky[1][1][0])))
        worst = max(worst, error)
        if error > options.wcs_tolerance:
            problems.append(
                f"{stretch.id}: its solved WCS is {error:.4f} px off the solution even with "
                f"SIP degree {_SIP_DEGREES[-1]} (tolerance {options.wcs_tolerance} px): the "
                "image's WCS is approximate there (card WCSDEV), the catalogue's positions "
                "are the solution's; shorter stretches (run.stretch_rows) or a larger "
                "stages.astrometry.wcs_tolerance."
            )
    ids = [s.id for s in stretches]
    problems.extend(unmatched_stretches(catalog, ids, exclude_mask=options.exclude_mask))
    clocks = solved.parameters.meta.get("segment_clocks", [])
    for record in clocks if len(clocks) > 1 else []:
        where = "segment {} (rows {}-{}, {})".format(
            record["segment"], record["rows"][0], record["rows"][1] - 1, record["first_block"]
        )
        if record["fitted"]:
            log.info(
                "%s: clock %+.2f +- %.2f ms (%+.1f +- %.1f mas in RA), %s",
                where,
                record["offset_ms"],
                record["offset_err_ms"],
                record["ra_mas"],
                record["ra_err_mas"],
                record["note"],
            )
        elif record["reference"]:
            log.info("%s: %s", where, record["note"])
        else:
            log.warning("%s: %s", where, record["note"])
    problems.extend(segment_clock_problems(clocks))
    parameters = solved.parameters
    parameters.meta["wcs_max_deviation_px"] = worst
    parameters.meta["passes"] = passes
    catalog.meta["astrometry_passes"] = len(passes)
    parameters.meta["reference"] = {
        key: reference.meta[key] for key in ("source", "n_read", "n_in_band", "n_selected")
    }
    log.info(
        "astrometry: %d of %d detections matched; stretch WCS within %.4f px",
        int(np.sum(catalog["ref_index"] >= 0)),
        len(catalog),
        worst,
    )
    out = {
        "catalog": catalog,
        "parameters": parameters,
        "residual_grid": solved.grid,
        "wcs": wcs,
    }
    if problems:
        out[PROBLEMS] = problems
    return out


#: Declaration of the astrometry stage: night scope, after catalog; it reads the
#: reference catalogue file in chunks (``streams``), so a changed file makes it stale.
STAGE = Stage(
    name="astrometry",
    run=_run,
    options=AstrometryStageOptions,
    requires=("ingest", "rectify", "catalog"),
    scope="night",
    uses=("site", "camera"),
    partial_inputs=True,
    streams=("reference.path",),
    description="Fit the night's geometry to a reference catalogue; a solved WCS per stretch.",
    # the geometry model, the fits, the reference reader, the predictor's compiled
    # loop, detect's for the second pass
    warm=(
        *RECTIFY_WARM,
        "pipeline.stages.astrometry._model_jit:load_compiled",
        "scipy.linalg",
        "scipy.optimize",
        "pyarrow.csv",
        *DETECT_WARM,
    ),
    # 2: the stretch WCSs fitted linearly (closer to the solution); 3: a pass
    # stopped by max_passes (or deconvolved products) is recorded as such;
    # parameters record focal_length_given; 4: a clock offset per segment after a
    # gap (parameters' segment_clocks), the stretch WCSs timed by their segment's;
    # the passes' and the error floor's problems are no longer dropped; 5: a
    # segment whose stars miss at the night's clock is searched along the scan
    # (search_segment_clock), its search in its segment_clocks record, and a
    # stretch the fit left out is named against the stretches the fit used;
    # 6: each stretch's WCS carries the solution's own error there (CSYER1/2)
    # 7: the light weighting under a cloud is kept only if the reference stars
    # follow it at least as well as the time means (light_weighting_floor_px)
    # 8: a stretch whose reference stars scatter beyond the night's common error
    # gives its positions' errors the difference (stretch_extra_error_px)
    # 9: PARTIAL_EXPOSURE (the start-of-scan ramp's stars) left out of the fit
    # 10: each segment's rows timed from its own start at the fitted line time
    #     (GeometryOffsets.segment_start): a segment clock is its DATE-OBS's error
    # 11: another pass also when the geometry moved beyond its errors since the
    #     kernels' (geometry_moved; passes' moved_sigma)
    # 12: TRAIL (sources on a satellite's trail) left out of the fit
    # 13: the passes end when the fit without the error floor gives back the
    #     kernels measured with (passes' unfloored_kernel_change_px)
    version=13,
)
