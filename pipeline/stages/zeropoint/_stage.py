"""The zeropoint stage: the night's zero point from astrometry's matched catalogue.

Time of a source: the rectified frame's ``x`` runs along the scan at one
column per line time (:mod:`pipeline.geometry.rectified`), and ``x`` equals
the night row in which the source's centroid was read out to within a slow
drift of a few line times.  So a column ``x`` was observed, at mid-crossing,
``t = (x - tdi_rows / 2) * line_time`` seconds after night row 0 was read
out (:func:`pipeline.geometry.rectified.column_times`, astrometry's map
too); stretch ``[start, stop)`` covers the times of
columns ``start`` to ``stop``.  The science stage uses the same map.
"""

from __future__ import annotations

import itertools
import logging
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
from pydantic import BaseModel, ConfigDict, Field

from pipeline.geometry.rectified import column_times
from pipeline.stages._line_time import index_line_time
from pipeline.stages.base import BLOCK_INDEX, PROBLEMS, Stage
from pipeline.stages.detect import SourceFlag
from pipeline.stages.zeropoint._fit import fit_zero_point
from pipeline.stages.zeropoint._quality import (
    TREND_SIGNIFICANCE,
    ZeroPointFlag,
    clear_level,
    interval_quality,
    star_flat,
)

if TYPE_CHECKING:
    from astropy.table import QTable, Table

__all__ = [
    "STAGE",
    "CalibratedNight",
    "ZeroPointOptions",
    "calibrate_catalog",
    "column_times",
    "night_line_time",
    "psf_scale_shifts",
    "source_exposures",
]

log = logging.getLogger(__name__)

#: 2.5 / ln(10): magnitude error per unit relative flux error (common practice).
_MAG_PER_RELATIVE_FLUX = 2.5 / np.log(10.0)

#: Source flags that keep a star out of the zero-point fit (its flux is doubtful).
_DOUBTFUL = (
    SourceFlag.SATURATED
    | SourceFlag.BLENDED
    | SourceFlag.EDGE
    | SourceFlag.COSMIC_RAY
    | SourceFlag.FIT_FAILED
    | SourceFlag.PARTIAL_EXPOSURE
    | SourceFlag.TRAIL
)


class ZeroPointOptions(BaseModel):
    """Options of the zeropoint stage (``stages.zeropoint``)."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    knot_spacing: float = Field(
        60.0,
        gt=0,
        description="Seconds between spline knots of Z(t): the shortest change of "
        "transparency followed where the stars show no faster one.",
    )
    min_knot_spacing: float = Field(
        7.5,
        gt=0,
        description="Shortest knot interval (s) where the stars show a change of transparency "
        "faster than knot_spacing follows (a short cloud); knot_spacing or more: none.",
    )
    knot_false_alarm: float = Field(
        1e-4,
        gt=0,
        lt=1,
        description="Chance that a knot interval where Z(t) fits is halved all the same.",
    )
    clip: float = Field(4.0, gt=0, description="Reject stars beyond this many sigma.")
    fit_colour_term: bool = Field(
        False, description="Fit a colour term from the reference colours (needs them)."
    )
    min_snr: float = Field(20.0, gt=0, description="Least S/N of a reference star used in the fit.")
    max_drop: float = Field(
        0.1, gt=0, description="Largest drop below the clear level (mag) of a clear stretch."
    )
    max_scatter_ratio: float = Field(
        2.0, gt=1, description="Largest stars' scatter in a stretch over the night's."
    )
    min_stars: int = Field(
        10, ge=1, description="Fewest reference stars for a stretch's own zero point."
    )
    flat_bin_columns: int = Field(
        16, ge=1, description="Chip columns (rectified rows y) per star-flat bin."
    )
    flat_min_stars: int = Field(5, ge=1, description="Fewest stars of a star-flat bin.")
    flat_max_offset: float = Field(
        0.01, gt=0, description="A star-flat bin further off (mag, and 4 sigma) is deviant."
    )
    flat_max_trend: float = Field(
        0.01, gt=0, description="Largest star-flat trend from edge to edge, mag."
    )
    target_zero_point: float = Field(
        25.0, description="Zero point of calibrated images: mag of a source summing to 1."
    )
    # A reference in the night's own passband matches the stars to a few
    # hundredths of a magnitude beyond their errors (common practice); one of
    # another band leaves its colour term times the stars' colour spread:
    # 0.17 mag for a term of 0.5 and colours of 0.3 mag rms.
    max_extra_scatter: float = Field(
        0.05,
        gt=0,
        description="Largest scatter (mag) of the reference stars about the zero point beyond "
        "their errors; more is reported (a reference of another passband?).",
    )
    # A fitted colour term absorbs a reference of another passband whole (its
    # magnitudes then come out in that band, for stars with a colour): terms
    # between like passbands of two systems are a few tenths at most, between
    # neighbouring bands (g for r) about one (from memory).
    max_colour_term: float = Field(
        0.5,
        gt=0,
        description="Largest fitted colour term (mag per mag of colour) before it is reported: "
        "a reference of another passband than the night's filter?",
    )


@dataclass(frozen=True)
class PSFScales:
    """What :func:`psf_scale_shifts` applies.

    Attributes
    ----------
    shift : ndarray, shape (n_sources,)
        Magnitudes added to each source's instrumental magnitude.
    by_stretch : dict
        Stretch number -> factor applied to its PSF fluxes.
    night : float
        The night's weighted mean factor (a stretch without a measure gets it).
    spread : float
        The stretches' spread of true factors beyond their errors, relative.
    """

    shift: np.ndarray
    by_stretch: dict
    night: float
    spread: float


def psf_scale_shifts(catalog: QTable) -> PSFScales:
    """Put every stretch's PSF fluxes on the apertures' scale, consistently over the night.

    Detect measures each stretch's ratio of aperture to PSF flux
    (``psf_scale`` +- ``psf_scale_err``, NaN where too few bright isolated
    stars): a seeing width or Moffat index a few per cent off moves the PSF
    fluxes by about as much, stretch by stretch.  A stretch's ratio is
    applied as its share of the true spread between stretches allows (the
    random-effects estimate of DerSimonian & Laird 1986, Control. Clin.
    Trials 7, 177, from memory: spread tau^2 from the weighted scatter
    beyond the errors; each stretch shrunk toward the night's weighted mean
    by tau^2 / (tau^2 + error^2)); a stretch without a ratio gets the
    night's mean.  Applying the ratio to some stretches and not others
    would open steps of the size of the night's common offset (7 % with a
    Moffat index held off the seeing's) between them.

    Parameters
    ----------
    catalog : astropy.table.QTable
        With ``stretch``, ``psf_scale``, ``psf_scale_err``; without the
        columns (older catalogues) nothing is applied.

    Returns
    -------
    PSFScales
    """
    n = len(catalog)
    none = PSFScales(np.zeros(n), {}, 1.0, 0.0)
    if n == 0 or not {"stretch", "psf_scale", "psf_scale_err"} <= set(catalog.colnames):
        return none
    stretch = np.asarray(catalog["stretch"], dtype=np.int64)
    scale = _value(catalog["psf_scale"])
    error = _value(catalog["psf_scale_err"])
    labels, first = np.unique(stretch, return_index=True)
    s, e = scale[first], error[first]
    measured = np.isfinite(s) & (s > 0) & np.isfinite(e) & (e > 0)
    if not measured.any():
        return none
    delta = -2.5 * np.log10(s[measured])  # mag
    sigma = _MAG_PER_RELATIVE_FLUX * e[measured] / s[measured]
    w = 1.0 / sigma**2
    mean = float(np.sum(w * delta) / np.sum(w))
    tau2 = 0.0
    if delta.size >= 2:
        q = float(np.sum(w * (delta - mean) ** 2))
        tau2 = max(0.0, (q - (delta.size - 1)) / (np.sum(w) - np.sum(w**2) / np.sum(w)))
    applied = np.full(labels.size, mean)
    applied[measured] = mean + (delta - mean) * tau2 / (tau2 + sigma**2)
    where = np.searchsorted(labels, stretch)
    factors = 10.0 ** (-0.4 * applied)
    return PSFScales(
        shift=applied[where],
        by_stretch={int(k): float(f) for k, f in zip(labels, factors, strict=True)},
        night=float(10.0 ** (-0.4 * mean)),
        spread=float(np.sqrt(tau2) / _MAG_PER_RELATIVE_FLUX),
    )


def night_line_time(block_index: Table) -> float:
    """The night's line time (s) from ingest's block index (column ``line_time``).

    That of the night's most rows, as rectify's
    (:func:`pipeline.stages._line_time.index_line_time`): the stretches of
    blocks at another line time are not rectified, so none of their
    sources comes here.
    """
    return index_line_time(block_index)


@dataclass(frozen=True)
class CalibratedNight:
    """Products of :func:`calibrate_catalog` (see there)."""

    catalog: QTable
    zero_point: QTable
    intervals: QTable
    star_flat: QTable
    colour_term: dict
    problems: list[str]


def _value(column) -> np.ndarray:
    return np.asarray(getattr(column, "value", column), dtype=float)


def source_exposures(catalog: QTable, exposure: float) -> np.ndarray | float:
    """Each source's exposure, seconds: the time its star took to cross the chip.

    Astrometry's ``exposure`` column (the crossing time of the star's solved
    track) where it is known, else ``exposure`` (``XPOSURE``, the charge
    packets' ``N`` line times, which is a star's on the chip's centre line
    when the line time matches the drift).  A star's drift rate varies as
    cos(dec), so off the centre line it collects its light for longer
    (poleward) or shorter while the sky fills every packet for ``N`` line
    times: ``flux / XPOSURE`` alone leaves a trend of about ``tan(phi) *
    d_dec`` across the chip in the calibrated magnitudes (1.2 % from edge to
    edge of a 0.59 deg chip at latitude 50), which the star flat then
    reported as a flat-field error.
    """
    from astropy import units as u

    if "exposure" not in catalog.colnames:
        return exposure
    own = catalog["exposure"]
    own = u.Quantity(own).to_value(u.s) if getattr(own, "unit", None) else _value(own)
    return np.where(np.isfinite(own) & (own > 0), own, exposure)


def _check_reference(catalog: QTable, fit_colour_term: bool) -> None:
    if "ref_mag" not in catalog.colnames or not np.isfinite(_value(catalog["ref_mag"])).any():
        raise ValueError(
            "The reference catalogue gives no magnitude in the night's passband (ref_mag is "
            "missing or NaN for every matched star): use a reference catalogue with that "
            "passband in stages.astrometry, or the zero point cannot be fitted."
        )
    if fit_colour_term and (
        "ref_colour" not in catalog.colnames or not np.isfinite(_value(catalog["ref_colour"])).any()
    ):
        raise ValueError(
            "stages.zeropoint.fit_colour_term is true but the reference catalogue gives no "
            "colour (ref_colour missing or NaN for every star): use a catalogue with colours "
            "or set fit_colour_term: false."
        )


def _reference_error(catalog: QTable) -> np.ndarray:
    """The reference magnitudes' errors (``ref_mag_err``), mag; 0 where not given."""
    if "ref_mag_err" not in catalog.colnames:
        return np.zeros(len(catalog))
    error = _value(catalog["ref_mag_err"])
    return np.where(np.isfinite(error) & (error > 0), error, 0.0)


def _grid_times(t_start: float, t_stop: float, knots: np.ndarray, knot_spacing: float):
    """Times (s) of the zero point's table: 8 per knot interval.

    Every ``knot_spacing / 8`` seconds (linear interpolation between them
    errs by < 1e-4 mag for 25 s clouds fitted with 8 s knots), plus 8 per
    interval wherever the fit halved its knots (a short cloud).
    """
    step = knot_spacing / 8.0
    grid = np.arange(t_start, t_stop + step, step)
    inner = knots[3:-3]  # a cubic spline's knots inside its range
    span = inner[-1] - inner[0]
    even = span / max(1, int(np.ceil(span / knot_spacing)))  # fit_zero_point's first spacing
    short = np.flatnonzero(np.diff(inner) < (1.0 - 1e-9) * even)
    if short.size == 0:
        return grid
    fine = [np.linspace(inner[k], inner[k + 1], 9) for k in short]
    return np.unique(np.concatenate([grid, *fine]))


def calibrate_catalog(
    catalog: QTable,
    *,
    exposure: float,
    line_time: float,
    tdi_rows: int,
    stretch_rows: list[tuple[int, int]],
    n_y: int,
    knot_spacing: float = 60.0,
    min_knot_spacing: float = 7.5,
    knot_false_alarm: float = 1e-4,
    clip: float = 4.0,
    fit_colour_term: bool = False,
    min_snr: float = 20.0,
    max_drop: float = 0.1,
    max_scatter_ratio: float = 2.0,
    min_stars: int = 10,
    flat_bin_columns: int = 16,
    flat_min_stars: int = 5,
    flat_max_offset: float = 0.01,
    flat_max_trend: float = 0.01,
    target_zero_point: float = 25.0,
    max_extra_scatter: float = 0.05,
    max_colour_term: float = 0.5,
    reduced: frozenset[str] | None = None,
) -> CalibratedNight:
    """Fit the night's zero point and calibrate every source of the catalogue.

    Parameters
    ----------
    catalog : astropy.table.QTable
        Astrometry's night catalogue: ``x``, ``y`` (rectified pixels; ``x``
        along the scan), ``flux_psf``, ``flux_psf_err`` (electrons over the
        crossing), ``flags``, ``ref_mag`` and ``ref_colour`` (mag, NaN where
        unmatched); ``snr`` optional (else ``flux_psf / flux_psf_err``);
        ``ref_mag_err`` optional (mag): each star's weight in the fit is
        ``1 / (instrumental error^2 + ref_mag_err^2)`` (plus the fit's extra
        scatter); ``exposure`` optional (s, each star's crossing time).
    exposure : float
        Crossing time of every pixel, s (``XPOSURE``): a source's exposure
        where the catalogue gives none of its own (``exposure``, see
        :func:`source_exposures`).
    line_time : float
        Line time, s; with ``tdi_rows`` sets :func:`column_times`.
    tdi_rows : int
        Rows of the chip a charge packet crosses.
    stretch_rows : list of (int, int)
        Each stretch's own night rows ``[start, stop)``: the intervals judged.
    n_y : int
        Rows ``y`` of the rectified frame (across the scan), for the star flat.
    knot_spacing, min_knot_spacing, clip, fit_colour_term : optional
        See :func:`~pipeline.stages.zeropoint.fit_zero_point`.
    knot_false_alarm : float, optional
        ``false_alarm`` of :func:`~pipeline.stages.zeropoint.fit_zero_point`.
    min_snr : float, optional
        Least S/N of a reference star used in the fit.
    max_drop, max_scatter_ratio, min_stars : optional
        See :func:`~pipeline.stages.zeropoint.interval_quality`.
    flat_bin_columns, flat_min_stars, flat_max_offset : optional
        ``bin_columns``, ``min_stars``, ``max_offset`` of
        :func:`~pipeline.stages.zeropoint.star_flat` (bins of ``y``).
    flat_max_trend : float, optional
        A star-flat trend from edge to edge above this (mag) is reported.
    target_zero_point : float, optional
        Fixed zero point of calibrated images, mag (stored in the products' meta).
    max_extra_scatter : float, optional
        The fit's extra scatter (mag: the stars' scatter beyond their
        errors) above this is reported, as a sign of reference magnitudes
        in another passband.
    max_colour_term : float, optional
        A fitted colour term larger than this (mag per mag, and 3 of its
        errors) is reported, as a sign of reference magnitudes in another
        passband that the colour term absorbed.
    reduced : frozenset of str, optional
        Names (``'s0003'``) of the stretches the stages before reduced;
        the flags of the others' intervals (no stars: a failed stretch,
        another line time) are kept but not reported as problems.  None:
        every stretch.

    Returns
    -------
    CalibratedNight
        ``catalog`` (input plus ``t``, ``mag``, ``mag_err``,
        ``zero_point``, ``zero_point_err``, ``zp_flags``, ``zp_used``),
        ``zero_point`` (grid table), ``intervals``, ``star_flat``,
        ``colour_term`` (dict) and ``problems`` (list of str).

    Raises
    ------
    ValueError
        If the reference catalogue has no magnitudes, or no colours while
        ``fit_colour_term`` is set (the message says what to change).
    """
    from astropy import units as u
    from astropy.table import QTable

    _check_reference(catalog, fit_colour_term)
    flux = _value(catalog["flux_psf"])
    flux_err = _value(catalog["flux_psf_err"])
    with np.errstate(divide="ignore", invalid="ignore"):
        snr = _value(catalog["snr"]) if "snr" in catalog.colnames else flux / flux_err
        m_inst = -2.5 * np.log10(flux / source_exposures(catalog, exposure))
        m_inst_err = _MAG_PER_RELATIVE_FLUX * flux_err / flux
    scales = psf_scale_shifts(catalog)
    m_inst = m_inst + scales.shift
    t = column_times(_value(catalog["x"]), line_time, tdi_rows)
    ref_mag = _value(catalog["ref_mag"])
    colour = _value(catalog["ref_colour"]) if "ref_colour" in catalog.colnames else None
    flags = np.asarray(catalog["flags"]).astype(np.int64)
    star = (
        np.isfinite(ref_mag)
        & np.isfinite(m_inst)
        & (snr >= min_snr)
        & ((flags & int(_DOUBTFUL)) == 0)
    )
    if fit_colour_term:
        star &= np.isfinite(colour)
    edges = column_times(
        np.array([s for s, _ in stretch_rows] + [stretch_rows[-1][1]]), line_time, tdi_rows
    )
    fit = fit_zero_point(
        t[star],
        (ref_mag - m_inst)[star],
        np.hypot(m_inst_err, _reference_error(catalog))[star],
        colour[star] if fit_colour_term else None,
        knot_spacing=knot_spacing,
        t_range=(float(edges[0]), float(edges[-1])),
        clip=clip,
        min_knot_spacing=min_knot_spacing,
        false_alarm=knot_false_alarm,
    )
    grid_t = _grid_times(edges[0], edges[-1], fit.knots, knot_spacing)
    grid_z, grid_err = fit(grid_t), fit.error(grid_t)
    clear = clear_level(grid_z)
    intervals = interval_quality(
        edges,
        t[star],
        fit.residual,
        fit.sigma,
        fit.used,
        grid_t,
        grid_z,
        clear=clear,
        max_drop=max_drop,
        max_scatter_ratio=max_scatter_ratio,
        min_stars=min_stars,
    )
    intervals.add_column([f"s{k:04d}" for k in range(len(stretch_rows))], 0, name="stretch")
    # A stretch is bridged if it has too few stars of its own or lies mostly in holes.
    covered = np.array(
        [
            sum(max(0.0, min(b, hi) - max(a, lo)) for a, b in fit.holes) / (hi - lo)
            for lo, hi in itertools.pairwise(edges)
        ]
    )
    few = (np.asarray(intervals["flags"]) & int(ZeroPointFlag.FEW_STARS)) != 0
    intervals["interpolated"] = few | (covered >= 0.5)
    intervals.meta["clear_level_mag"] = clear
    partial = _ramp_stars(flags, np.isfinite(m_inst), t, edges)
    # the factor each stretch's PSF fluxes were put on the apertures' scale by
    applied = {int(k): v for k, v in scales.by_stretch.items()}
    intervals["psf_scale"] = [applied.get(k, scales.night) for k in range(len(stretch_rows))]
    applied_doc = "factor applied to the stretch's PSF fluxes (psf_scale_shifts)"
    intervals["psf_scale"].info.description = applied_doc
    intervals.meta["psf_scale_spread"] = scales.spread

    # Every source: Z at its time, its stretch's flags, the colour term where it has a colour.
    which = np.clip(np.searchsorted(edges, t, side="right") - 1, 0, len(stretch_rows) - 1)
    z, z_err = fit(t), fit.error(t)
    colour_shift = (
        np.where(np.isfinite(colour), fit.colour_term * colour, 0.0)
        if fit_colour_term
        else np.zeros(len(catalog))
    )
    out = catalog.copy()
    out["t"] = t * u.s
    out["zero_point"] = z * u.mag
    out["zero_point_err"] = z_err * u.mag
    out["mag"] = (m_inst + z + colour_shift) * u.mag
    out["mag_err"] = np.hypot(m_inst_err, z_err) * u.mag
    out["zp_flags"] = np.asarray(intervals["flags"])[which].astype(np.int32)
    used = np.zeros(len(catalog), bool)
    used[np.flatnonzero(star)[fit.used]] = True
    out["zp_used"] = used
    out.meta["zp_flag_bits"] = {flag.name: int(flag) for flag in ZeroPointFlag}
    out.meta["target_zero_point_mag"] = target_zero_point

    zero_point = QTable(
        {"t": grid_t * u.s, "zero_point": grid_z * u.mag, "zero_point_err": grid_err * u.mag}
    )
    zero_point.meta.update(
        {
            "description": "Z(t): mag of a source giving 1 e-/s; t in s after night row 0 "
            "was read out (mid-crossing of the column).",
            "line_time_s": line_time,
            "tdi_rows": int(tdi_rows),
            "exposure_s": exposure,
            "target_zero_point_mag": target_zero_point,
            "holes_s": [list(h) for h in fit.holes],
        }
    )
    flat, trend = star_flat(
        _value(catalog["y"])[star],
        fit.residual,
        fit.used,
        n_y,
        bin_columns=flat_bin_columns,
        min_stars=flat_min_stars,
        max_offset=flat_max_offset,
        sigma=fit.sigma,
    )
    flat.meta.update(trend)
    flat.meta["axis"] = "y (across the scan)"
    colour_term = {
        "fitted": bool(fit_colour_term),
        "colour_term": fit.colour_term,
        "colour_term_err": fit.colour_term_err,
        "extra_scatter_mag": fit.extra_scatter,
        "n_reference": int(star.sum()),
        "n_used": int(fit.used.sum()),
    }
    return CalibratedNight(
        catalog=out,
        zero_point=zero_point,
        intervals=intervals,
        star_flat=flat,
        colour_term=colour_term,
        problems=_problems(
            intervals,
            trend,
            flat_max_trend,
            scatter=(fit.extra_scatter, max_extra_scatter, bool(fit_colour_term)),
            colour=(fit.colour_term, fit.colour_term_err, max_colour_term)
            if fit_colour_term
            else None,
            reduced=reduced,
            ramp=frozenset(str(intervals["stretch"][k]) for k in np.flatnonzero(partial)),
        ),
    )


def _ramp_stars(flags, measured, t, edges) -> np.ndarray:
    """Per stretch, whether most of its sources are PARTIAL_EXPOSURE.

    The start-of-scan ramp's stars are left out of the fit (``_DOUBTFUL``;
    astrometry matched none of them, ``fit_exclude_flags``), so a stretch in
    the ramp has few stars for a reason worth saying.

    Parameters
    ----------
    flags : ndarray of int
        Detect flags of every source.
    measured : ndarray of bool
        Sources with a flux.
    t : ndarray
        Their times (:func:`column_times`), s.
    edges : ndarray, shape (n_stretches + 1,)
        The stretches' time edges, s.

    Returns
    -------
    ndarray of bool, shape (n_stretches,)
    """
    k = np.searchsorted(edges, t, side="right") - 1
    inside = measured & (k >= 0) & (k < len(edges) - 1)
    ramp = (flags & int(SourceFlag.PARTIAL_EXPOSURE)) != 0
    n = len(edges) - 1
    in_ramp = np.bincount(k[inside & ramp], minlength=n)[:n]
    total = np.bincount(k[inside], minlength=n)[:n]
    return in_ramp > total - in_ramp


def _interval_lines(
    intervals: QTable, reduced: frozenset[str] | None, ramp: frozenset[str] = frozenset()
) -> list[str]:
    """One line per run of consecutive flagged stretches alike in flags and handling.

    A sparse field on a small chip flags every stretch FEW_STARS: one line
    for the run, with the range of its star counts and drops, says it
    once.  A run of one stretch reads as it always has.  ``ramp``: the
    stretches whose sources lie mostly in the start-of-scan ramp
    (:func:`_ramp_stars`); their line says why they have few, and when
    that is all (FEW_STARS, bridged from the neighbours) it goes to the log,
    not the problems: every night that starts clocking with its first block
    has such stretches, and a problem on each would hide the nights with
    one (``intervals.ecsv`` and the science images' ``ZPFLAGS`` card keep it).
    """
    from astropy import units as u

    runs: list[list] = []
    for row in intervals:
        flags = ZeroPointFlag(int(row["flags"]))
        if not flags or (reduced is not None and str(row["stretch"]) not in reduced):
            runs.append([])  # a clear or unsolved stretch ends a run
            continue
        key = (int(flags), bool(row["interpolated"]), str(row["stretch"]) in ramp)
        if runs and runs[-1] and runs[-1][0] == key:
            runs[-1][1].append(row)
        else:
            runs.append([key, [row]])
    lines = []
    n_solved = sum(reduced is None or str(r["stretch"]) in reduced for r in intervals)
    for run in filter(None, runs):
        (flags, interpolated, in_ramp), rows = run
        names = "+".join(f.name for f in ZeroPointFlag if f in ZeroPointFlag(flags))
        what = "interpolated from its neighbours" if interpolated else "unreliable"
        if interpolated and len(rows) == n_solved > 1:
            # no neighbour of its own to bridge from: the night's smooth fit
            what = "from the night's fit over all its stars, no stretch having enough of its own"
        stars = _span([int(r["n_stars"]) for r in rows], "{}", "-")
        drops = _span([float(r["drop"].to_value(u.mag)) for r in rows], "{:.3f}", " to ")
        where = rows[0]["stretch"]
        if len(rows) > 1:
            where = f"{rows[0]['stretch']}-{rows[-1]['stretch']} ({len(rows)} stretches)"
        why = (
            ": its stars lie in the start-of-scan ramp, left out of the fit (PARTIAL_EXPOSURE)"
            if in_ramp
            else ""
        )
        line = f"{where}: zero point {what} ({names}; {stars} stars, drop {drops} mag){why}"
        if in_ramp and interpolated and flags == int(ZeroPointFlag.FEW_STARS):
            log.info("%s", line)
            continue
        lines.append(line)
    return lines


def _span(values, form: str, join: str) -> str:
    """``'3'`` for one value or equal values, ``'3-7'`` (``join``) for a range."""
    low, high = form.format(min(values)), form.format(max(values))
    return low if low == high else f"{low}{join}{high}"


def _problems(
    intervals: QTable,
    trend: dict,
    max_trend: float,
    scatter: tuple[float, float, bool] = (0.0, np.inf, False),
    colour: tuple[float, float, float] | None = None,
    reduced: frozenset[str] | None = None,
    ramp: frozenset[str] = frozenset(),
) -> list[str]:
    """The night's problems in words.

    ``scatter``: the fit's extra scatter (mag), its limit (mag), and whether
    a colour term was fitted; ``colour``: the fitted colour term, its error
    and its limit (mag per mag), None when none was fitted; ``reduced``: the
    stretches astrometry solved (None: all), the others' flags not being
    news (the stages before say why they were left out); ``ramp``: the
    stretches of the start-of-scan ramp (:func:`_interval_lines`).
    """

    problems = []
    extra, max_extra, colour_fitted = scatter
    if extra > max_extra:
        problems.append(
            f"reference stars scatter {extra:.3f} mag about the zero point beyond their "
            f"measurement and catalogue errors (limit max_extra_scatter {max_extra} mag): the "
            "reference magnitudes may be of another passband than the night's filter; check "
            "stages.astrometry.reference.columns.magnitude"
            + ("" if colour_fitted else ", or fit a colour term (fit_colour_term: true)")
        )
    if colour is not None:
        term, term_err, max_term = colour
        if abs(term) > max_term and abs(term) > 3.0 * term_err:
            problems.append(
                f"the fitted colour term is {term:+.3f} +- {term_err:.3f} mag per mag of colour "
                f"(limit max_colour_term {max_term}): the reference magnitudes may be of another "
                "passband than the night's filter, which the colour term absorbs (the stars' "
                "magnitudes are then of that band); check "
                "stages.astrometry.reference.columns.magnitude"
            )
    problems.extend(_interval_lines(intervals, reduced, ramp))
    # A trend past the limit but within its noise (a few hundred stars give
    # ~0.006 mag edge to edge on a 1024-column chip) is not reported.
    trend_err = trend.get("edge_to_edge_err", 0.0)
    if (
        np.isfinite(trend["edge_to_edge"])
        and abs(trend["edge_to_edge"]) > max_trend
        and not abs(trend["edge_to_edge"]) <= TREND_SIGNIFICANCE * trend_err
    ):
        problems.append(
            f"star flat: trend of {trend['edge_to_edge']:+.4f} +- {trend_err:.4f} mag from edge "
            f"to edge (limit {max_trend} mag): check the flat field"
        )
    if trend["deviant"]:
        problems.append(
            f"star flat: {len(trend['deviant'])} deviant bin(s) {trend['deviant']}: check the "
            "flat field there"
        )
    return problems


def _run(*, inputs, options: ZeroPointOptions, context) -> dict:
    catalog = inputs["astrometry"]["catalog"]
    line_time = night_line_time(inputs["ingest"][BLOCK_INDEX])
    tdi_rows = int(context.camera.tdi_rows)
    stretches = context.stretches
    n_y = int(np.nanmax(_value(catalog["y"]))) + 1 if len(catalog) else 1
    result = calibrate_catalog(
        catalog,
        exposure=tdi_rows * line_time,
        line_time=line_time,
        tdi_rows=tdi_rows,
        stretch_rows=[(s.start, s.stop) for s in stretches],
        n_y=n_y,
        # the stretches astrometry solved (a WCS each): the others' empty
        # intervals are the earlier stages' news
        reduced=frozenset(inputs["astrometry"]["wcs"]),
        **options.model_dump(),
    )
    log.info(
        "zero point: %d of %d reference stars used, %d stretch(es) flagged",
        result.colour_term["n_used"],
        result.colour_term["n_reference"],
        int(np.count_nonzero(result.intervals["flags"])),
    )
    out = {
        "catalog": result.catalog,
        "zero_point": result.zero_point,
        "intervals": result.intervals,
        "star_flat": result.star_flat,
        "colour_term": result.colour_term,
    }
    if result.problems:
        out[PROBLEMS] = result.problems
    return out


#: Declaration of the zeropoint stage: night scope, after astrometry.
STAGE = Stage(
    name="zeropoint",
    run=_run,
    options=ZeroPointOptions,
    requires=("ingest", "astrometry"),
    scope="night",
    uses=("camera.tdi_rows",),
    description="The night's zero point along time, calibrated magnitudes, star flat.",
    warm=("scipy.interpolate", "scipy.linalg", "scipy.sparse", "scipy.special"),
    # 2: the star-flat trend fitted to the stars, with its error
    # 3: the stars weighted with the fit's extra scatter, and Z(t)'s error with it
    # 4: an extra scatter above max_extra_scatter is reported as a problem
    # 5: knot intervals whose stars show a faster change (a short cloud) are halved,
    #    and what the knots still miss is added to Z(t)'s error
    # 6: a fitted colour term above max_colour_term is reported as a problem
    # 7: the line time of the night's most rows (was the blocks' median: wrong on a
    #    night whose camera changed its line time), no problem lines for the
    #    stretches astrometry did not solve, one line per run of stretches
    #    flagged alike, and each stretch's PSF fluxes put on the apertures'
    #    scale (detect's psf_scale, psf_scale_shifts; intervals' psf_scale)
    # 8: PARTIAL_EXPOSURE stars (the start-of-scan ramp's) left out of the fit
    # 9: TRAIL stars (on a satellite's trail) left out of the fit
    # 10: the start-of-scan ramp's bridged stretches logged, not problems
    version=10,
)
