"""Table layer of the astrometry stage: detect's catalogue in, solved catalogue out.

Which detections the fit sees
-----------------------------
Every detection gets a solved position, but the geometry is fitted only to
detections whose centroid and error detect could measure: not flagged
SATURATED, EDGE, COSMIC_RAY, FIT_FAILED, PARTIAL_EXPOSURE or TRAIL
(``fit_exclude_flags``).  A saturated core, a stamp cut by the chip edge (the
star's track partly off the chip) or a cosmic-ray hit in the core moves the
fitted centroid by 0.01 to 0.1 px while the formal error of so bright a star
is ~0.002 px, so a handful of them outweighs all the other stars (measured on
the simulated mis-set nights of ``tests/test_astrometry_stage.py``: the
camera rotation came out 16" off with them, within 2" without).  A star of
the start-of-scan ramp trailed along only the end of its smear track (on a
simulated night at latitude -51 with 2048 TDI rows, the ramp's stars of S/N
> 100 scattered by 290 mas in RA against 6 mas elsewhere).  Leaving such
stars out of an astrometric fit is common practice.

Each pair is weighted by the detection's centroid error and the reference
star's position error at the observation epoch (``reference_error``) added
in quadrature: the residual of a pair contains both, and a star whose
centroid error is below the reference's would otherwise take a weight its
residual does not have.  When the config does not give that error, the fit
estimates it (``fit_error_floor``): an error common to every pair, added in
quadrature until the reduced chi-square is 1.  Without it, a catalogue of
5 mas errors against bright stars' 4 mas centroids left the fit weighting by
the centroids alone: on a short simulated night (81 stars, correct config)
the focal scale and distortion came out 4 sigma off the truth by their
chi-square-scaled errors (reduced chi-square 3.1), and the second pass
measured the night again for a kernel change that was not there.
"""

from __future__ import annotations

import dataclasses
import logging
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
from pydantic import BaseModel, ConfigDict, Field, field_validator

from pipeline.exceptions import AstrometryError
from pipeline.geometry.rectified import RectifiedFrame
from pipeline.geometry.tdi import TDIModel
from pipeline.stages.astrometry._fit import FIT_PARAMETERS, _subset
from pipeline.stages.astrometry._model import east_tilt_equivalent
from pipeline.stages.astrometry._segments import NightSegments
from pipeline.stages.astrometry._solve import AstrometricSolution, SearchRanges, solve_night
from pipeline.stages.astrometry._stats import stretch_excess_errors
from pipeline.stages.astrometry._transparency import fit_transparency
from pipeline.stages.detect import SourceFlag

if TYPE_CHECKING:
    from astropy.table import QTable, Table

__all__ = ["AstrometryOptions", "SolvedCatalog", "light_weighting_fits_better", "solve_catalog"]

log = logging.getLogger(__name__)


class AstrometryOptions(BaseModel):
    """Options of the astrometric solution; names are :func:`solve_night`'s keywords."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    match_radius: float = Field(
        3.0, gt=0, description="Pixels: the first match at the configured geometry."
    )
    knot_spacing: float | None = Field(
        120.0,
        gt=0,
        description="Seconds between knots of the wander correction (None: no correction); "
        "120 s follows a 10-minute wander to ~1 % of its amplitude.",
    )
    fit_parameters: tuple[str, ...] = Field(
        FIT_PARAMETERS, description=f"Parameters to fit, from {FIT_PARAMETERS}."
    )
    min_matches: int = Field(20, ge=3, description="Fewest matched stars a solution needs.")
    min_segment_stars: int = Field(
        10,
        ge=2,
        description="Fewest matched stars for a segment after a gap to get a clock offset "
        "of its own (its first DATE-OBS may be off); one with fewer keeps the night's clock.",
    )
    min_snr: float = Field(
        0.0, ge=0, description="Detections below this S/N are solved but not used in the fit."
    )
    fit_exclude_flags: tuple[str, ...] = Field(
        ("SATURATED", "EDGE", "COSMIC_RAY", "FIT_FAILED", "PARTIAL_EXPOSURE", "TRAIL"),
        description="Detect flags (SourceFlag names) of detections solved but not fitted: "
        "their centroids are off by more than their errors say.",
    )
    reference_error: float = Field(
        0.0,
        ge=0,
        description="mas: position error of the reference stars at the observation epoch, "
        "per coordinate (added in quadrature to the centroid errors in the fit's weights).",
    )
    fit_error_floor: bool = Field(
        True,
        description="Estimate from the residuals a position error common to every matched "
        "star (added in quadrature to its centroid error and reference_error so that the "
        "fit's reduced chi-square is 1) and weight the fit with it: the reference stars' "
        "errors when reference_error does not give them, or jitter the model lacks.",
    )
    clip_sigma: float = Field(5.0, gt=1, description="Outlier rejection, robust sigmas.")
    light_weighting: bool = Field(
        True,
        description="Measure the sky's transparency from the matched stars' fluxes and, "
        "where a cloud dims it, predict light-weighted centroids (needs flux_psf and "
        "reference magnitudes), if the reference stars' positions follow them better "
        "than time means.",
    )
    min_cloud_depth: float = Field(
        0.05,
        ge=0,
        description="Fractional loss of light below which the sky counts as clear (no "
        "light weighting): above the ~0.01-0.02 a clear night's curve shows from noise.",
    )
    min_cloud_significance: float = Field(
        5.0,
        ge=0,
        description="Sigmas by which the transparency curve must fit the stars' fluxes "
        "better than a clear sky before it is used (a few stars per knot make noisy "
        "curves deep).",
    )
    search_clock: float = Field(10.0, ge=0, description="Search range of the clock, +- s.")
    search_focal: float = Field(0.03, ge=0, description="Search range of the focal length, +-.")
    search_rotation: float = Field(0.5, ge=0, description="Search range of rotation, +- deg.")
    search_tilt: float = Field(60.0, ge=0, description="Search range of the tilt, +- arcsec.")
    search_segment_clock: float = Field(
        10.0,
        ge=0,
        description="Search range of the clock of a segment after a gap, +- s: a segment "
        "whose stars do not match at the night's clock (its first DATE-OBS off by more "
        "than match_radius rows) is searched along the scan within it (0: no search).",
    )

    @field_validator("fit_exclude_flags")
    @classmethod
    def _known_flags(cls, value: tuple[str, ...]) -> tuple[str, ...]:
        unknown = [name for name in value if name not in SourceFlag.__members__]
        if unknown:
            raise ValueError(
                f"fit_exclude_flags {unknown} are not detect flags; choose from "
                f"{list(SourceFlag.__members__)}."
            )
        return value

    @property
    def exclude_mask(self) -> int:
        """The bits of :attr:`fit_exclude_flags` as one integer."""
        bits = 0
        for name in self.fit_exclude_flags:
            bits |= int(SourceFlag[name])
        return bits


@dataclass(frozen=True)
class SolvedCatalog:
    """What :func:`solve_catalog` returns.

    Attributes
    ----------
    catalog : QTable
        The input catalogue with ``ra``, ``dec``, ``ra_err``, ``dec_err``
        replaced by the solved values and ``ref_index`` (row of the matched
        reference star, -1 if none) added.
    parameters : Table
        One row per fitted parameter (``name``, ``value``, ``error``,
        ``unit``); ``meta['covariance']`` holds the covariance matrix and
        ``meta`` the derived figures (along-scan offset, focal lengths, line
        times, the east-tilt degeneracy) and ``meta['segment_clocks']`` each
        segment's clock offset (:meth:`AstrometricSolution.segment_clocks`).
    grid : Table
        Residuals against the reference catalogue, 4 across x 8 along, mas.
    solution : AstrometricSolution
        The full solution (predictions, inverse, model).
    """

    catalog: QTable
    parameters: Table
    grid: Table
    solution: AstrometricSolution


def _degrees(column) -> np.ndarray:
    from astropy import units as u

    return np.asarray(u.Quantity(column, u.deg).value, dtype=float)


def _with_reference_error(frame: RectifiedFrame, x, y, x_err, y_err, reference_error: float):
    """Centroid errors with the reference stars' position error added, pixels.

    ``reference_error`` (mas per coordinate on the sky) is turned into
    rectified pixels: ``cdelt1 cos(dec)`` along ``x`` (right ascension of
    date), ``cdelt2`` along ``y``.
    """
    if reference_error == 0.0:
        return x_err, y_err
    _, dec = frame.icrs_from_pixel(x, y)
    along = reference_error / (frame.cdelt1 * 3.6e6 * np.cos(np.radians(dec)))
    across = reference_error / (frame.cdelt2 * 3.6e6)
    return np.hypot(x_err, along), np.hypot(y_err, across)


def _stretch_extra(catalog, fit, fit_rows, x_err, y_err) -> dict[int, tuple[float, float]]:
    """:func:`stretch_excess_errors` of the fit's kept pairs, by the catalogue's ``stretch``.

    ``x_err``, ``y_err``: the fitted detections' errors as the fit weighed
    them (reference error included).  Empty without a ``stretch`` column.
    """
    if "stretch" not in catalog.colnames:
        return {}
    used = np.flatnonzero(fit.used)
    det = fit.det_index[used]
    stretch = np.asarray(catalog["stretch"], dtype=np.int64)[fit_rows[det]]
    return stretch_excess_errors(
        stretch,
        fit.residual_row[used],
        fit.residual_column[used],
        x_err[det],
        y_err[det],
    )


#: Share of the catalogue's detections that the fit's flags leave out above
#: which a failed solution names them as a likely cause.
_LEFT_OUT_SHARE = 0.5


def _with_left_out(error: AstrometryError, catalog, exclude_mask: int) -> AstrometryError:
    """``error`` with a first likely cause when the fit left out most detections.

    A sky that fills most of the wells' range saturates most stars: detect
    flags them SATURATED, the fit leaves them out (``fit_exclude_flags``),
    and the search fails for want of matches.  The counts say so before the
    site or the clock are blamed.
    """
    if "flags" not in catalog.colnames or len(catalog) == 0:
        return error
    flags = np.asarray(catalog["flags"], dtype=np.int64)
    left_out = (flags & exclude_mask) != 0
    if left_out.sum() <= _LEFT_OUT_SHARE * flags.size:
        return error
    counts = {
        flag.name: int(np.count_nonzero(flags[left_out] & int(flag)))
        for flag in SourceFlag
        if int(flag) & exclude_mask
    }
    named = ", ".join(f"{n} {name}" for name, n in counts.items() if n)
    cause = (
        f"{int(left_out.sum())} of the catalogue's {flags.size} detections are left out of "
        f"the fit by their flags ({named}; fit_exclude_flags)"
    )
    if counts.get("SATURATED", 0) > _LEFT_OUT_SHARE * flags.size:
        cause += (
            ": most stars saturated, a sky that fills most of the range to saturation "
            "(calibrate's problems say how much) or a SATURATE set too low"
        )
    message = str(error).replace("Likely causes: ", f"Likely causes: {cause}; ", 1)
    return AstrometryError(message, {**error.counts, "left_out_by_flags": int(left_out.sum())})


def light_weighting_fits_better(weighted, time_means) -> bool:
    """Whether the light-weighted fit describes the reference stars at least as well.

    Under a passing cloud a star's image is its track weighted by the light,
    and the fit predicts the light's centroid.  detect's fit follows that
    centroid only where the smear kernel is short against the seeing: along
    a long kernel the model's shape holds the fitted position near the time
    mean (a model image whose light centroid moved 0.32 px, fitted with the
    equal-time kernel of a 13-px track, moved 0.03 px), and a transparency
    curve deconvolved from crossing-window means can wander between its
    knots.  The reference stars tell which prediction the measured positions
    follow: the fit with the smaller common error (``error_floor``, what
    its reduced chi-square of 1 needs beyond the given errors) or, both
    without one, the smaller reduced chi-square; a tie keeps the light
    weighting.

    Parameters
    ----------
    weighted, time_means : GeometryFit
        The fits with and without the light weighting, of the same pairs'
        catalogue and options.

    Returns
    -------
    bool
    """
    a, b = float(weighted.error_floor), float(time_means.error_floor)
    if a > 0.0 or b > 0.0:
        return a <= b
    return float(weighted.chi2_reduced) <= float(time_means.chi2_reduced)


def _transparency(solution: AstrometricSolution, flux, flux_err, ref_mag):
    """The sky's transparency from the fitted pairs' fluxes and crossing windows."""
    fit = solution.fit
    used = fit.used
    predictor = solution.predictor
    tracks = _subset(solution.ref_tracks, fit.ref_index[used])
    pred = predictor.predict(tracks, solution.offsets, light_weighted=False)
    det = fit.det_index[used]
    return fit_transparency(
        pred.t_start,
        pred.t_end,
        flux[det],
        ref_mag[solution.ref_index[used]],
        flux_err=None if flux_err is None else flux_err[det],
    )


def solve_catalog(
    catalog: QTable,
    ref_ra,
    ref_dec,
    model: TDIModel,
    frame: RectifiedFrame,
    options: AstrometryOptions | None = None,
    ref_mag=None,
    start=None,
    segments: NightSegments | None = None,
    segment=None,
) -> SolvedCatalog:
    """Solve a night's detect catalogue against reference positions.

    Parameters
    ----------
    catalog : QTable
        Detect's night catalogue: ``x``, ``y``, ``x_err``, ``y_err`` (pixels),
        optionally ``snr`` and ``flags`` (see the module notes).
    ref_ra, ref_dec : Quantity or array_like
        Reference positions, ICRS at the observation epoch (degrees if bare).
    model, frame : TDIModel, RectifiedFrame
        The night's nominal geometry and rectified grid.
    options : AstrometryOptions or None
        None for the defaults.
    ref_mag : array_like or None
        Reference magnitudes (for the sky's transparency, see
        ``light_weighting``); None: the fit assumes a clear sky.
    start : GeometryOffsets or None
        Geometry of the first match (see :func:`solve_night`); None: nominal.
    segments : NightSegments or None
        The night's segments, each with its own clock (see
        :func:`solve_night`); None: one clock for the night.
    segment : array_like of int or None
        Segment number of each catalogue row (its stretch's); None: that of
        its strip row.

    Returns
    -------
    SolvedCatalog

    Raises
    ------
    AstrometryError
        If too few stars match (counts and likely causes in the message).
    """
    from astropy import units as u
    from astropy.table import Table

    options = options or AstrometryOptions()
    missing = [c for c in ("x", "y", "x_err", "y_err") if c not in catalog.colnames]
    if missing:
        raise ValueError(
            f"the catalogue lacks columns {missing}; give detect's night catalogue "
            "(x, y, x_err, y_err in pixels)."
        )
    x, y, x_err, y_err = (
        np.asarray(u.Quantity(catalog[c], u.pix).value, dtype=float)
        for c in ("x", "y", "x_err", "y_err")
    )
    use = np.isfinite(x) & np.isfinite(y)
    if "snr" in catalog.colnames:
        use &= np.asarray(catalog["snr"], dtype=float) >= options.min_snr
    if "flags" in catalog.colnames:
        use &= (np.asarray(catalog["flags"], dtype=np.int64) & options.exclude_mask) == 0
    fit_rows = np.flatnonzero(use)
    if segment is not None:
        segment = np.asarray(segment, dtype=np.int64)
    fit_x_err, fit_y_err = _with_reference_error(
        frame, x[fit_rows], y[fit_rows], x_err[fit_rows], y_err[fit_rows], options.reference_error
    )
    ranges = SearchRanges(
        clock_offset=options.search_clock,
        focal_scale=options.search_focal,
        rotation=options.search_rotation,
        tilt=options.search_tilt,
        segment_clock=options.search_segment_clock,
    )
    args = (x[fit_rows], y[fit_rows], _degrees(ref_ra), _degrees(ref_dec), model, frame)
    kwargs = {
        "x_err": fit_x_err,
        "y_err": fit_y_err,
        "match_radius": options.match_radius,
        "knot_spacing": options.knot_spacing,
        "parameters": options.fit_parameters,
        "min_matches": options.min_matches,
        "clip_sigma": options.clip_sigma,
        "fit_error_floor": options.fit_error_floor,
        "search": ranges,
        "start": start,
        "segments": segments,
        "det_segment": None if segment is None else segment[fit_rows],
        "min_segment_stars": options.min_segment_stars,
    }
    try:
        solution = solve_night(*args, **kwargs)
    except AstrometryError as error:
        raise _with_left_out(error, catalog, options.exclude_mask) from None
    cloud = None
    time_means, weighted = solution, None
    if options.light_weighting and ref_mag is not None and "flux_psf" in catalog.colnames:
        flux = np.asarray(u.Quantity(catalog["flux_psf"]).value, dtype=float)[fit_rows]
        flux_err = None
        if "flux_psf_err" in catalog.colnames:
            flux_err = np.asarray(u.Quantity(catalog["flux_psf_err"]).value, float)[fit_rows]
        cloud = _transparency(solution, flux, flux_err, np.asarray(ref_mag, dtype=float))
        if (
            cloud is not None
            and cloud.depth >= options.min_cloud_depth
            and cloud.significance >= options.min_cloud_significance
        ):
            weighted = solve_night(*args, transparency=cloud, **kwargs)
            if light_weighting_fits_better(weighted.fit, solution.fit):
                solution = weighted
            else:
                log.info(
                    "light-weighted centroids fit the reference stars worse than time means "
                    "(common error %.4f px against %.4f, reduced chi2 %.3f against %.3f): "
                    "the time means are kept (long smear kernels, or a transparency curve "
                    "the stars' fluxes do not pin down)",
                    weighted.fit.error_floor,
                    solution.fit.error_floor,
                    weighted.fit.chi2_reduced,
                    solution.fit.chi2_reduced,
                )
        if cloud is not None and solution is not weighted:
            cloud = dataclasses.replace(cloud, applied=False)
    extra = _stretch_extra(catalog, solution.fit, fit_rows, fit_x_err, fit_y_err)
    if extra:
        # the positions of a stretch whose stars the solution does not follow as
        # well as the night's carry the difference (a passing cloud's)
        x_err, y_err = x_err.copy(), y_err.copy()
        stretch = np.asarray(catalog["stretch"], dtype=np.int64)
        for k, (along, across) in extra.items():
            sel = stretch == k
            x_err[sel] = np.hypot(x_err[sel], along)
            y_err[sel] = np.hypot(y_err[sel], across)
        log.info(
            "stretches whose positions carry an error beyond the night's (px, along and "
            "across the scan): %s",
            ", ".join(f"s{k:04d} {a:.4f}/{b:.4f}" for k, (a, b) in extra.items()),
        )
    ra, dec, ra_err, dec_err, exposure = solution.sky_errors_and_exposures(
        x, y, x_err, y_err, segment
    )
    out = catalog.copy()
    out["ra"] = ra * u.deg
    out["dec"] = dec * u.deg
    out["ra_err"] = ra_err * u.arcsec
    out["dec_err"] = dec_err * u.arcsec
    out["exposure"] = exposure * u.s
    crossing = "the star's crossing time of the chip in the solved geometry: its exposure"
    out["exposure"].info.description = crossing
    ref_index = np.full(len(out), -1, dtype=np.int64)
    fit = solution.fit
    ref_index[fit_rows[fit.det_index[fit.used]]] = solution.ref_index[fit.used]
    out["ref_index"] = ref_index
    out["ref_index"].info.description = "row of the matched reference star, -1 if none"
    for name in ("ra", "dec"):
        out[name].info.description = f"ICRS {name} from the solved geometry of the night"

    errors = fit.errors
    parameters = Table(
        {
            "name": list(fit.names),
            "value": [float(getattr(solution.offsets, n)) for n in fit.names],
            "error": [errors[n] for n in fit.names],
            "unit": [fit.units[n] for n in fit.names],
        }
    )
    clock_per_tilt, rotation_per_tilt = east_tilt_equivalent(model, 1.0)
    parameters.meta.update(solution.summary())
    parameters.meta["covariance"] = fit.covariance.tolist()
    parameters.meta["segment_clocks"] = solution.segment_clocks()
    parameters.meta["cloud_depth"] = None if cloud is None else cloud.depth
    parameters.meta["cloud_significance"] = None if cloud is None else cloud.significance
    parameters.meta["light_weighted"] = cloud is not None and cloud.applied
    parameters.meta["stretch_extra_error_px"] = {
        f"s{k:04d}": [round(a, 5), round(b, 5)] for k, (a, b) in extra.items()
    }
    if weighted is not None:  # both fits made: what each left of the reference stars
        parameters.meta["light_weighting_floor_px"] = {
            "light_weighted": round(float(weighted.fit.error_floor), 5),
            "time_means": round(float(time_means.fit.error_floor), 5),
        }
    parameters.meta["east_tilt_note"] = (
        "clock_offset and rotation include any east tilt of the axis: 1 arcsec east acts as "
        f"{clock_per_tilt:.6f} s of clock and {rotation_per_tilt:.6f} arcsec of rotation"
    )
    return SolvedCatalog(
        catalog=out, parameters=parameters, grid=solution.residual_grid(), solution=solution
    )
