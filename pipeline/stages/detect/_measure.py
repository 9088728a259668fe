"""Per-source measurement: seeing width, smear-aware PSF fits, apertures, flags."""

from __future__ import annotations

import enum
import itertools
import logging
import math
import operator
from dataclasses import dataclass
from typing import TYPE_CHECKING, NamedTuple

import numpy as np

from pipeline.masks import NO_DATA, MaskBit
from pipeline.stages.detect._saturated import (
    Footprints,
    footprint_bounds,
    on_footprint,
    rows_reached,
)

if TYPE_CHECKING:
    from pipeline.stages.detect._model import KernelGrid, SeeingProfile

__all__ = [
    "MoffatIndex",
    "SourceFlag",
    "annulus_levels",
    "aperture_fluxes",
    "best_fwhm",
    "best_moffat_beta",
    "isolated_sources",
    "measure_groups",
    "psf_aperture_scale",
    "residual_quadrupole",
    "seeing_curves",
    "seeing_stamps",
    "single_stars",
    "split_pair",
    "stamp_curves",
]

log = logging.getLogger(__name__)


class SourceFlag(enum.IntFlag):
    """Bits of a catalogue source's ``flags`` column.

    SATURATED
        A saturated or bleed pixel lies in the star's core (where the unit
        model exceeds 5 % of its peak).
    NEAR_FLAGGED
        A pixel with any mask bit lies in the fitted stamp.
    BLENDED
        Fitted together with other sources of the same deblended segment.
    EDGE
        The stamp is cut by the image edge or reaches the chip's outside or
        a gap in the night's rows, or a pixel without data (a bad column, a
        non-finite raw pixel, a column saturated through the stretch) lies
        in the star's core.  With SATURATED: the star's core lies on a
        saturated column (or its own clipped core meets a pixel without
        data), and its flux comes from the wings beyond.  Such pixels in the
        wings alone (NEAR_FLAGGED) cost the fit their weight, not its
        accuracy.
    COSMIC_RAY
        A pixel flagged as a cosmic-ray hit lies in the star's core.
    OVERLAP
        The stamp reaches into a neighbouring stretch's columns (the star was
        measured with the neighbour's edge).
    FIT_FAILED
        The fit did not converge, or moved the star by more than a FWHM, or
        gave a non-positive flux; the position is the segment's first moment
        and the PSF flux is NaN.
    UNRESOLVED
        Likely two sources closer than about a seeing FWHM fitted as one: the
        fit's residual has a quadrupole moment (an elongation the model
        lacks) that is both significant (chi-square of its two components
        above :data:`UNRESOLVED_CHI2`) and large (above
        :data:`UNRESOLVED_ELONGATION` of the model's own second moment); see
        :func:`residual_quadrupole`.  Not tested for sources of groups fitted
        star by star (more than ``max_joint`` members).
    PARTIAL_EXPOSURE
        The star's core lies in the start-of-scan ramp (mask LOW_EXPOSURE):
        its charge packets crossed only part of the chip, so it trailed along
        only the end of the smear track the model averages over.  Calibrate
        scales the ramp to the full exposure, but the position is off along
        the track (by hundreds of mas on the curved tracks far from the
        equator) and the flux by a few per cent.  The geometry's and the zero
        point's fits leave such stars out.
    TRAIL
        The source lies on a satellite's or aircraft's trail (within a seeing
        FWHM of a long, thin segment of the first search,
        :mod:`~pipeline.stages.detect._trails`): a piece of the trail, or a
        star measured with the trail's light.  The astrometric and zero-point
        fits leave it out.
    """

    SATURATED = 1 << 0
    NEAR_FLAGGED = 1 << 1
    BLENDED = 1 << 2
    EDGE = 1 << 3
    COSMIC_RAY = 1 << 4
    OVERLAP = 1 << 5
    FIT_FAILED = 1 << 6
    UNRESOLVED = 1 << 7
    PARTIAL_EXPOSURE = 1 << 8
    TRAIL = 1 << 9


#: Largest distance between a fit's smear-kernel samples, in seeing FWHMs
#: (:func:`~pipeline.stages.detect._model.reduce_kernel`): a 0.7 sigma step,
#: with which the model of a reduced kernel differs from the full kernel's by
#: < 3.5e-4 of its peak and its fitted flux by < 1e-4 (FWHM 2.7 px, tracks up
#: to 12 px); FWHM / 8 took a third more samples for no better a model.
KERNEL_SPACING = 1.0 / 6.0


def _stamp(shape, xs, ys, kernels, fwhm, extents=None):
    """Stamp bounds ``(y0, y1, x0, x1)`` around stars, and whether they were clipped.

    ``extents``: each kernel's largest ``|dx|`` and ``|dy|``, if known
    (:func:`_reduced_kernels`); the stamp is formed with Python's
    arithmetic on them, a tenth of the numpy calls' cost.
    """
    if extents is None:
        extents = [(float(np.max(np.abs(dx))), float(np.max(np.abs(dy)))) for dx, dy in kernels]
    hx = 1.5 * fwhm + max(e[0] for e in extents) + 1.0
    hy = 1.5 * fwhm + max(e[1] for e in extents) + 1.0
    y0 = math.floor(float(min(ys)) - hy)
    y1 = math.ceil(float(max(ys)) + hy) + 1
    x0 = math.floor(float(min(xs)) - hx)
    x1 = math.ceil(float(max(xs)) + hx) + 1
    clipped = y0 < 0 or x0 < 0 or y1 > shape[0] or x1 > shape[1]
    return max(y0, 0), min(y1, shape[0]), max(x0, 0), min(x1, shape[1]), clipped


def _kernels_at(grid: KernelGrid, x_start, xs, ys, spacing, point: bool):
    return _reduced_kernels(grid, x_start, xs, ys, spacing, point)[0]


def _reduced_kernels(grid: KernelGrid, x_start, xs, ys, spacing, point: bool):
    """The reduced kernels at many positions and their extents, in one pass.

    Returns a list of ``(dx, dy)``
    (:func:`~pipeline.stages.detect._model.reduce_kernel` of the kernel the
    grid gives) and a list of their largest ``(|dx|, |dy|)``.
    """
    from pipeline.stages.detect._fit_jit import reduce_many_compiled

    n = len(xs)
    if point:
        return [(np.zeros(1), np.zeros(1)) for _ in range(n)], [(0.0, 0.0)] * n
    full_x, full_y = grid.many(x_start + np.asarray(xs, dtype=float), ys)
    dx, dy, bounds, extents = reduce_many_compiled(full_x, full_y, float(spacing))
    kernels = [(dx[a:b], dy[a:b]) for a, b in itertools.pairwise(bounds.tolist())]
    return kernels, [tuple(e) for e in extents.tolist()]


def _responses_at(grid: KernelGrid, x_start, xs, ys, point: bool):
    """Rectify's resampling and clocking response at each position (None: not recorded).

    A deconvolved product has neither (its filter acts on the resampled image).
    """
    if point:
        return [None for _ in xs]
    if not len(xs):
        return []
    # all at once: the same values as ``grid.response`` one by one
    return grid.responses(x_start + np.asarray(xs, dtype=float), ys)


def seeing_curves(
    residual,
    variance,
    candidates,
    grid: KernelGrid,
    profile: SeeingProfile,
    fwhm_grid: np.ndarray,
    *,
    x_start: int = 0,
    point_kernel: bool = False,
) -> tuple[np.ndarray, np.ndarray]:
    """Chi-square of bright stars' fits as a function of the seeing FWHM.

    Each star's position is fitted once with ``profile`` (the first moment
    of a symmetric profile averaged over a zero-mean kernel does not depend
    on the profile's width); then, for each trial FWHM, flux and background
    are solved linearly at that position and the chi-square recorded.

    Parameters
    ----------
    residual, variance : ndarray, shape (ny, nx)
        Background-subtracted image and its variance.
    candidates : sequence of (x, y)
        Starting positions of the stars (array pixels).
    grid : KernelGrid
    profile : SeeingProfile
        Family and starting width.
    fwhm_grid : ndarray, shape (m,)
        Trial FWHMs, pixels.
    x_start : int
        Night column of the array's first column.
    point_kernel : bool
        The product is deconvolved: no smear.

    Returns
    -------
    y : ndarray, shape (n,)
        Row of each star used (stars whose stamp is cut by the edge are
        dropped).
    chi2 : ndarray, shape (n, m)
        Reduced chi-square of each star at each trial FWHM.
    """
    stamps = seeing_stamps(
        residual,
        variance,
        candidates,
        grid,
        profile,
        x_start=x_start,
        point_kernel=point_kernel,
    )
    rows = np.asarray([stamp.y for stamp in stamps], dtype=float)
    profiles = [profile.with_fwhm(fwhm) for fwhm in fwhm_grid]
    return rows, stamp_curves(stamps, profiles)


@dataclass(frozen=True)
class SeeingStamp:
    """A seeing star's stamp and fitted position: what its chi-square at any profile needs.

    Attributes
    ----------
    x, y : float
        The star's column and row (array pixels), as a candidate.
    dof : int
        Degrees of freedom of its chi-square: pixels with data less 2.
    data, variance : ndarray, shape (h, w)
        The stamp of the background-subtracted image and its variance, float64.
    x0, y0 : float
        The fitted position in stamp pixels.
    dx, dy : ndarray
        The reduced smear kernel's samples, pixels.
    response : ndarray
        Rectify's sampling response as the compiled model takes it.
    """

    x: float
    y: float
    dof: int
    data: np.ndarray
    variance: np.ndarray
    x0: float
    y0: float
    dx: np.ndarray
    dy: np.ndarray
    response: np.ndarray

    @property
    def clipped(self) -> bool:
        """Whether the stamp holds clipped pixels (data without variance: a saturated footprint)."""
        return bool(np.any(np.isfinite(self.data) & ~(self.variance > 0)))


def seeing_stamps(
    residual,
    variance,
    candidates,
    grid: KernelGrid,
    profile: SeeingProfile,
    *,
    x_start: int = 0,
    point_kernel: bool = False,
) -> list[SeeingStamp]:
    """The seeing stars' stamps, each star's position fitted once with ``profile``.

    Stars whose stamp the edge cuts, whose fit fails or gives a flux <= 0
    are left out.  See :func:`seeing_curves` for the parameters.
    """
    from pipeline.stages.detect._model import _response_row, fit_stars

    stamps = []
    # every candidate's kernel and response looked up at once (the same values
    # as one by one)
    xs, ys = [x for x, _ in candidates], [y for _, y in candidates]
    spacing = KERNEL_SPACING * profile.fwhm
    kernels = _kernels_at(grid, x_start, xs, ys, spacing, point_kernel) if xs else []
    responses = _responses_at(grid, x_start, xs, ys, point_kernel)
    for x, y, one_kernel, one_response in zip(xs, ys, kernels, responses, strict=True):
        kern, resp = [one_kernel], [one_response]
        y0, y1, x0, x1, clipped = _stamp(residual.shape, [x], [y], kern, 1.5 * profile.fwhm)
        if clipped:
            continue
        data, var = residual[y0:y1, x0:x1], variance[y0:y1, x0:x1]
        fit = fit_stars(data, var, [x], [y], kern, profile, origin=(y0, x0), responses=resp)
        if not (fit.success and fit.flux[0] > 0):
            continue
        stamps.append(
            SeeingStamp(
                x,
                y,
                max(int(np.count_nonzero(np.isfinite(data) & (var > 0))) - 2, 1),
                np.asarray(data, dtype=np.float64),
                np.asarray(var, dtype=np.float64),
                float(fit.x[0] - x0),
                float(fit.y[0] - y0),
                np.ascontiguousarray(kern[0][0], dtype=np.float64),
                np.ascontiguousarray(kern[0][1], dtype=np.float64),
                _response_row(resp[0]),  # stamp and image pixels differ by whole pixels
            )
        )
    return stamps


def stamp_curves(stamps: list[SeeingStamp], profiles) -> np.ndarray:
    """Reduced chi-square of each seeing stamp at each trial profile.

    At each profile, flux and background are solved linearly at the star's
    fitted position.

    Parameters
    ----------
    stamps : list of SeeingStamp
        :func:`seeing_stamps`.
    profiles : sequence of SeeingProfile
        The trial profiles (any widths and Moffat indices).

    Returns
    -------
    ndarray, shape (n, m)
        ``n`` stamps by ``m`` profiles.
    """
    from pipeline.stages.detect._measure_jit import seeing_chi2_compiled
    from pipeline.stages.detect._pixel_gauss import profile_tables

    if not stamps:
        return np.zeros((0, len(profiles)))
    sigmas, weights = _mixture_tables(profiles)
    erf, gauss = profile_tables()
    out = np.empty((len(stamps), len(profiles)))
    for i, s in enumerate(stamps):
        out[i] = seeing_chi2_compiled(
            s.data, s.variance, s.x0, s.y0, s.dx, s.dy, s.response, sigmas, weights, erf, gauss
        )
    return out


def _mixture_tables(profiles) -> tuple[np.ndarray, np.ndarray]:
    """Sigmas and weights of each of ``profiles``, shape (m, J) each.

    A mixture with fewer components than the longest is padded with zero
    weights (sigma 1), which add nothing to a model.
    """
    parts = [profile.mixture() for profile in profiles]
    size = max(len(sigmas) for sigmas, _ in parts)
    sigmas = np.ones((len(parts), size))
    weights = np.zeros((len(parts), size))
    for t, (s, w) in enumerate(parts):
        sigmas[t, : len(s)], weights[t, : len(w)] = s, w
    return sigmas, weights


def single_stars(fwhm_grid: np.ndarray, chi2: np.ndarray) -> np.ndarray:
    """Which seeing stars to trust: those that look like one star.

    A star with an undetected close companion fits worse and looks wider.
    Kept: minimum reduced chi-square within 1.5 times the median one, and
    best FWHM within 3 robust sigma (at least 2 %) of the median.

    Returns
    -------
    ndarray of bool, shape (n,)
    """
    if len(chi2) == 0:
        return np.zeros(0, bool)
    lowest = chi2.min(axis=1)
    best = fwhm_grid[np.argmin(chi2, axis=1)]
    centre = np.median(best)
    spread = max(3.0 * 1.4826 * np.median(np.abs(best - centre)), 0.02 * centre)
    return (lowest <= 1.5 * np.median(lowest)) & (np.abs(best - centre) <= spread)


def best_fwhm(fwhm_grid: np.ndarray, chi2: np.ndarray) -> float:
    """FWHM at the minimum of summed chi-square curves (parabola through the lowest 3)."""
    total = np.sum(chi2, axis=0)
    k = int(np.clip(np.argmin(total), 1, len(fwhm_grid) - 2))
    a, b, c = total[k - 1 : k + 2]
    h = fwhm_grid[k + 1] - fwhm_grid[k]
    denom = a - 2 * b + c
    shift = 0.5 * (a - c) / denom if denom > 0 else 0.0
    return float(fwhm_grid[k] + np.clip(shift, -1.0, 1.0) * h)


#: Bounds of the fitted Moffat index.  Seeing profiles have indices of about
#: 2.5-5 (common practice; a Kolmogorov atmosphere's long exposure is fitted
#: best by ~4.8, Trujillo et al. 2001, MNRAS 328, 977, from memory), with some
#: margin each side, so that a night at either end is not clipped.  Below 2 the
#: profile's second moment diverges and most of its wing flux lies beyond
#: the seeing stamps (~2.3 FWHM), which cannot constrain it; above 6 it is
#: within a few per cent of its peak of a Gaussian over the stamp and the
#: chi-square is flat along the index.
MOFFAT_BETA_RANGE = (2.0, 6.0)
#: Factor between the Moffat indices tried (a parabola in log(beta) through
#: the lowest three gives the index).
MOFFAT_BETA_STEP = 1.2
#: The fitted Moffat index replaces the configured one when it differs from
#: it by more than this many of its errors.  The index's error from ~20
#: stars is ~0.03, and the fluxes of unsaturated stars move ~0.045 mag per
#: unit of the index (FWHM 2.7 px): an index fitted within the noise of the
#: configured one adds ~0.0015 mag of noise to each stretch's flux scale
#: (0.0044 -> 0.0052 mag in the zero point of a simulated night), while
#: one 3 errors off (~0.1) kept leaves the most saturated stars ~0.05-0.1
#: mag off (0.56 mag per unit of the index for the saturated stars' median,
#: ~1 for those of magnitude 12-15 on a simulated night of 1.3", measured).
#: The error came out 1-2 times smaller than the scatter of the fits on
#: simulated nights: 3 errors are ~2 of the real ones.
MOFFAT_BETA_SIGNIFICANCE = 3.0
#: Fewest trusted seeing stars that fit the Moffat index; with fewer the
#: configured index is kept.  The index rests on the wings at 1-10 % of the
#: peak, where an undetected faint neighbour or a cosmic ray of one star
#: weighs as much as a real change of the index; 8 stars (of the default 20)
#: spread it.
MOFFAT_BETA_MIN_STARS = 8


class MoffatIndex(NamedTuple):
    """A fitted Moffat index and its 1-sigma error (both dimensionless)."""

    beta: float
    error: float


def best_moffat_beta(
    stamps: list[SeeingStamp],
    profile: SeeingProfile,
    *,
    bounds: tuple[float, float] = MOFFAT_BETA_RANGE,
    step: float = MOFFAT_BETA_STEP,
    fwhm_step: float = 0.0576,
    coarse: bool = True,
) -> MoffatIndex | None:
    """The Moffat index that fits the seeing stars best, the FWHM fitted along with it.

    Three walks along ``log(beta)``: the first from ``profile.beta`` in
    factors of ``step``, the second from the first's result in factors of
    ``step ** (1 / 3)``, the third from the second's in factors of
    ``step ** (1 / 9)``.  At each index the stars' summed reduced
    chi-square is evaluated at three FWHMs, ``fwhm * exp(-fwhm_step, 0,
    fwhm_step)`` around the best width at the nearest index already tried
    (``profile.fwhm`` at the start), then at three a third as far apart
    around the vertex of the parabola through them, and its minimum over
    the width taken from the second parabola: the index and the width are
    correlated (a lower index, with more flux in the wings, fits with a
    narrower core).  A walk goes downhill until the lowest value has a
    neighbour on each side (or reaches a bound); its result is the vertex
    of the parabola through the lowest and its neighbours, at most one step
    beyond the lowest, clipped to ``bounds``.  The finer walks take the
    coarser ones' interpolation error out (a chi-square that is not a
    parabola in ``log(beta)`` over +-20 %: on a simulated night of index
    3.0 the first walk alone gave 3.03-3.09; the first two, with one
    parabola along the width, left 0.011 and 0.022 too low an index on
    noise-free model stamps of index 3.0 and 3.5 of a simulated night's
    seeing stars, and the three with two parabolas leave +0.001).
    Typically 4 + 3 + 3 indices of 6 widths each: ~60 model evaluations per
    star.  Without ``coarse`` only the second and third walks: an index
    known to be near (a refit on other stars), ~36.

    Parameters
    ----------
    stamps : list of SeeingStamp
        The trusted seeing stars (:func:`seeing_stamps`).
    profile : SeeingProfile
        A Moffat profile: the best FWHM at the starting index, and that index.
    bounds : (float, float)
        Smallest and largest index returned.
    step : float
        Factor (> 1) between neighbouring indices of the first walk.
    fwhm_step : float
        Logarithmic step between the widths tried at each index.
    coarse : bool
        Walk in steps of ``step`` first.

    Returns
    -------
    MoffatIndex or None
        The index and its error; None if the summed chi-square has no
        minimum along it (flat or concave at the lowest value: the stars do
        not tell).  The error is that of a chi-square rising by 1 (common
        practice), from the last walk's parabola in the stars' summed
        chi-square: their reduced chi-squares' sum times their mean degrees
        of freedom, over its mean at the minimum (> 1 where the model
        misses: the error widened by the misfit, as a fit's usually is).
    """
    from pipeline.stages.detect._model import SeeingProfile

    lo, hi = (float(b) for b in bounds)
    if not (1.5 < lo < hi and step > 1.0):
        raise ValueError(f"bounds must be 1.5 < lo < hi and step > 1; got {bounds!r}, {step!r}.")
    tried: dict[float, tuple[float, float]] = {}  # log(beta) -> (lowest chi-square, its width)

    def along_width(u: float, fwhm: float, du: float) -> tuple[float, float]:
        """Lowest summed chi-square along the width at index ``exp(u)``, and its width.

        From the parabola through ``fwhm * exp(-du, 0, du)``, its vertex at
        most ``du`` from ``fwhm``.
        """
        trials = [SeeingProfile(float(fwhm * math.exp(f)), "moffat", math.exp(u))
                  for f in (-du, 0.0, du)]  # fmt: skip
        a, b, c = np.sum(stamp_curves(stamps, trials), axis=0)
        curvature = a - 2.0 * b + c
        if curvature > 0:
            shift = float(np.clip(0.5 * (a - c) / curvature, -1.0, 1.0))
            value = float(b - 0.25 * (a - c) * shift)
        else:
            shift, value = 0.0, float(min(a, b, c))
        return value, float(fwhm * math.exp(shift * du))

    def evaluate(u: float) -> float:
        near = min(tried, key=lambda v: abs(v - u)) if tried else None
        fwhm = profile.fwhm if near is None else tried[near][1]
        # Twice: the parabola through widths +-fwhm_step apart misses the
        # chi-square's minimum along the width by an amount that changes with
        # the index (the chi-square of bright stars is far from a parabola
        # over +-6 %): on noise-free model stamps of index 3.0 and 3.5 the
        # index came out 0.011 and 0.022 low.  A second parabola, a third of
        # the step wide around the first's vertex, leaves +0.005 at both (and
        # the third walk along the index +0.001).
        _, fwhm = along_width(u, fwhm, fwhm_step)
        tried[u] = along_width(u, fwhm, fwhm_step / 3.0)
        return tried[u][0]

    start = math.log(min(max(profile.beta, lo), hi))
    bend = 0.0
    for du in (math.log(step), math.log(step) / 3.0, math.log(step) / 9.0)[0 if coarse else 1 :]:
        walked = _walk(start, du, math.log(lo), math.log(hi), evaluate)
        if walked is None:
            return None
        start, bend = walked
    beta = float(min(max(math.exp(start), lo), hi))
    # chi-square = dof * sum(reduced) / mean(reduced at the minimum): its
    # second derivative along log(beta), d2, gives sigma = sqrt(2 / d2)
    dof = float(np.mean([stamp.dof for stamp in stamps]))
    level = max(min(value for value, _ in tried.values()) / len(stamps), 1e-12)
    return MoffatIndex(beta, beta * math.sqrt(2.0 * level / (dof * bend)))


def _walk(start: float, du: float, lo: float, hi: float, evaluate) -> tuple[float, float] | None:
    """Vertex and second derivative of a function's parabola near its lowest lattice value.

    The lattice: ``start + k du``.

    ``evaluate(u)`` is called at lattice points within ``[lo, hi]``, first
    ``start`` and its neighbours, then downhill until the lowest value has
    a neighbour on each side or the lattice ends.  Returns the vertex of the
    parabola through the lowest point and its neighbours (the three points
    at the lattice's end if the lowest is there), at most ``du`` beyond the
    lowest point and within ``[lo, hi]``, and the parabola's second
    derivative; None if fewer than three lattice points lie in the range or
    the parabola has no minimum.
    """
    k_lo = -math.floor((start - lo) / du + 1e-9)
    k_hi = math.floor((hi - start) / du + 1e-9)
    if k_hi - k_lo < 2:
        return None
    values = {k: evaluate(start + k * du) for k in (0, -1, 1) if k_lo <= k <= k_hi}
    while True:
        best = min(values, key=values.get)
        missing = [j for j in (best - 1, best + 1) if k_lo <= j <= k_hi and j not in values]
        if not missing:
            break
        values[missing[0]] = evaluate(start + missing[0] * du)
    if len(values) < 3:  # the start on a bound: its one neighbour, and one more
        k = best + (2 if best + 2 <= k_hi else -2)
        values[k] = evaluate(start + k * du)
    keys = sorted(values)
    k = keys[int(np.clip(keys.index(best), 1, len(keys) - 2))]
    a, b, c = values[k - 1], values[k], values[k + 1]
    curvature = a - 2.0 * b + c
    if not curvature > 0:
        return None
    shift = float(np.clip(0.5 * (a - c) / curvature, best - 1 - k, best + 1 - k))
    return min(max(start + (k + shift) * du, lo), hi), curvature / du**2


def _mask_bits(mask, core, stamp_box) -> tuple[int, int]:
    """The OR of the mask bits over a stamp and over a star's ``core`` (bool, on the stamp)."""
    y0, y1, x0, x1 = stamp_box
    stamp_mask = mask[y0:y1, x0:x1]
    stamp_bits = core_bits = 0
    if stamp_mask.any():  # most stamps have no flagged pixel: skip the bit tests
        stamp_bits = int(np.bitwise_or.reduce(stamp_mask, axis=None))
        core_bits = int(np.bitwise_or.reduce(stamp_mask[core], axis=None))
    return stamp_bits, core_bits


def _quadrupole_usable(core_bits: int) -> bool:
    """Whether a fit's residual quadrupole can mark its star UNRESOLVED.

    Not when pixels without data (a bad column's rows) cut the star's core:
    the quadrupole is summed over the pixels with data, and a round misfit of
    the model (the seeing's shape a little off, significant in a bright
    star) summed over one side of the core is elongated.  On a scene of
    stars cut by a bad column's four rows, stars of S/N 2000 were flagged so
    and split into a pair, a second source of S/N 4-8 on the cut's other
    side.
    """
    return not core_bits & _NO_DATA_BITS


# The bits as plain ints: an IntFlag's ``|`` and ``&`` are Python calls (0.14 s
# of CPU per crowded stretch's 3600 sources).
_EDGE_BITS = int(MaskBit.OUTSIDE | MaskBit.GAP)
_NONFINITE_BIT = int(MaskBit.NONFINITE)
_SATURATED_BITS = int(MaskBit.SATURATED | MaskBit.BLEED)
_COSMIC_RAY_BIT = int(MaskBit.COSMIC_RAY)
_LOW_EXPOSURE_BIT = int(MaskBit.LOW_EXPOSURE)
_EDGE, _NEAR_FLAGGED = int(SourceFlag.EDGE), int(SourceFlag.NEAR_FLAGGED)
_SATURATED, _COSMIC_RAY = int(SourceFlag.SATURATED), int(SourceFlag.COSMIC_RAY)
_BLENDED, _OVERLAP = int(SourceFlag.BLENDED), int(SourceFlag.OVERLAP)
_FIT_FAILED, _UNRESOLVED = int(SourceFlag.FIT_FAILED), int(SourceFlag.UNRESOLVED)
_PARTIAL_EXPOSURE = int(SourceFlag.PARTIAL_EXPOSURE)
_NO_DATA_BITS = int(NO_DATA)


def _flags_from_bits(stamp_bits: int, core_bits: int, clipped, blended) -> int:
    """The flags of a star from the OR of the mask bits over its stamp and its core."""
    flags = 0
    if clipped or stamp_bits & _EDGE_BITS or core_bits & _NONFINITE_BIT:
        flags |= _EDGE
    if stamp_bits:
        flags |= _NEAR_FLAGGED
    if core_bits & _SATURATED_BITS:
        flags |= _SATURATED
    if core_bits & _COSMIC_RAY_BIT:
        flags |= _COSMIC_RAY
    if core_bits & _LOW_EXPOSURE_BIT:
        flags |= _PARTIAL_EXPOSURE
    if blended:
        flags |= _BLENDED
    return flags


def measure_groups(
    residual,
    variance,
    mask,
    groups,
    grid: KernelGrid,
    profile: SeeingProfile,
    *,
    x_start: int = 0,
    point_kernel: bool = False,
    noise_correlation: float = 1.0,
    own_columns: tuple[int, int] | None = None,
    blended: list[list[bool]] | None = None,
    max_joint: int = 6,
    memo: dict | None = None,
    footprints: Footprints | None = None,
    cut: np.ndarray | None = None,
    shown: np.ndarray | None = None,
) -> dict[str, np.ndarray]:
    """Fit each group of sources with the smear-aware model.

    Parameters
    ----------
    residual, variance, mask : ndarray, shape (ny, nx)
        Background-subtracted image (e-), variance (e^2), mask bits.
    groups : list of list of (x, y)
        Starting positions of sources fitted together (array pixels).
    grid, profile, x_start, point_kernel, noise_correlation
        See :func:`fit_seeing` and :func:`~pipeline.stages.detect._model.fit_stars`.
    own_columns : (int, int) or None
        Array columns ``[a, b)`` that belong to this stretch; stamps reaching
        beyond are flagged OVERLAP.
    blended : list of list of bool or None
        Per group and member: split off a larger segment by the deblending
        (flagged BLENDED).
    max_joint : int
        Largest group fitted jointly; larger groups are fitted star by star
        with the others' models subtracted (two sweeps).
    memo : dict or None
        Results of earlier calls on the same images, keyed by profile, member
        positions and blend flags; a group started where an earlier fit of it
        started or ended is taken from there (a refit would land on the same
        optimum).  Updated in place.  None: fit every group.
    footprints : Footprints or None
        Saturated stars' footprints
        (:func:`~pipeline.stages.detect._saturated.saturated_footprints`): a
        jointly fitted group on one has its stamp widened to the footprint
        and the wings around it (the clipped pixels themselves carry no
        weight: NaN in ``variance``).
    cut : ndarray of bool or None
        Pixels without data that may cut a star's core: a saturated
        column's (:func:`~pipeline.stages.detect._saturated.saturated_columns`).
        A jointly fitted group's stamp that holds some of them is widened
        across the scan by as many rows as it holds of them on each side,
        so that the wings beyond them are fitted (a stamp over a star
        centred on a column 10 rows wide otherwise holds 1-2 rows of data on
        either side).
    shown : ndarray of uint16, shape (ny, nx), or None
        The mask whose bits ``mask_near`` and ``mask_core`` show, when
        ``mask`` (which the flags are made from) is another: detect's copy
        of the stretch's mask with bits added.  None: ``mask``.

    Returns
    -------
    dict of ndarray
        Per source: ``x``, ``y``, ``x_err``, ``y_err``, ``flux``,
        ``flux_err``, ``background`` (fitted offset), ``chi2``, ``flags``,
        ``mask_near`` and ``mask_core`` (the OR of ``shown``'s bits over the
        stamp its fit took and over its core, where its fitted unit model
        exceeds 5 % of its peak: the bits the flags were made from),
        ``group``, ``kernel`` (list of the reduced kernels used) and
        ``response`` (list of the :class:`~pipeline.stages.detect._model.Response`
        used, or None).
    """
    names = (
        "x", "y", "x_err", "y_err", "flux", "flux_err", "background", "chi2", "flags",
        "mask_near", "mask_core",
    )  # fmt: skip
    spacing = KERNEL_SPACING * profile.fwhm
    # The profile's fields, not the profile, in the keys: its dataclass hash
    # is a Python call at every look-up of a key.
    shape = (profile.fwhm, profile.shape, profile.beta)
    splits = [
        list(blended[index]) if blended is not None else [False] * len(members)
        for index, members in enumerate(groups)
    ]
    # tuples of lists, not of generators: the same keys, ~2 ms of CPU fewer
    # per unit of the benchmark night (four calls of ~1700 sources)
    keys = [
        (shape, tuple([(float(m[0]), float(m[1])) for m in members]), tuple(split))
        for members, split in zip(groups, splits, strict=True)
    ]
    # What each source to fit needs from the whole stretch, looked up for all
    # of them at once: a few array operations instead of ~25 numpy calls each.
    pending = [i for i, key in enumerate(keys) if memo is None or key not in memo]
    looked_up = _lookups(
        grid, x_start, [groups[i] for i in pending], point_kernel, footprints, spacing
    )
    lookups = dict(zip(pending, looked_up, strict=True))
    options = {
        "x_start": x_start,
        "point_kernel": point_kernel,
        "noise_correlation": noise_correlation,
        "own_columns": own_columns,
        "max_joint": max_joint,
        "footprints": footprints,
        "cut": cut if cut is not None and cut.any() else None,
        "shown": shown,
    }
    # The joint fits, all in one compiled call; None for a group to fit here.
    batch = _measure_joint(
        residual,
        variance,
        mask,
        {i: groups[i] for i in pending if len(groups[i]) <= max_joint},
        splits,
        lookups,
        profile,
        options,
    )
    all_rows: list[dict] = []
    group: list[int] = []
    for index, members in enumerate(groups):
        split, key = splits[index], keys[index]
        if memo is None or key not in memo:
            rows = batch.get(index)
            if rows is None:
                model = (grid, profile, spacing)
                looked = lookups.get(index)
                planes = (residual, variance, mask)
                rows = _measure_group(*planes, members, split, *model, looked_up=looked, **options)
            if memo is not None:
                # A refit that starts where this fit ended (or where it started)
                # ends here again: later passes look the group up instead.
                memo[key] = rows
                fitted = tuple([(float(r["x"]), float(r["y"])) for r in rows])
                memo[(shape, fitted, tuple(split))] = rows
        got = memo[key] if memo is not None else rows
        all_rows.extend(got)
        group.extend([index] * len(got))
    # one pass over the rows for all the columns
    rows = map(operator.itemgetter(*names), all_rows)
    columns = zip(*rows, strict=True) if all_rows else [[]] * len(names)
    result = {name: np.asarray(column) for name, column in zip(names, columns, strict=True)}
    result["group"] = np.asarray(group)
    result["kernel"] = [row["kernel"] for row in all_rows]
    result["response"] = [row["response"] for row in all_rows]
    return result


def _lookups(grid: KernelGrid, x_start, groups, point: bool, footprints, spacing) -> list:
    """Per group, its members' kernels, responses and saturated-footprint numbers, in one pass.

    Returns a list of ``(kernels, extents, responses, owners)``: the
    members' reduced kernels and their extents (:func:`_reduced_kernels`),
    rectify responses (:func:`_responses_at`) and the footprint under each
    (:func:`~pipeline.stages.detect._saturated.on_footprint`).
    """
    xs = np.array([m[0] for members in groups for m in members], dtype=float)
    ys = np.array([m[1] for members in groups for m in members], dtype=float)
    kernels, extents = _reduced_kernels(grid, x_start, xs, ys, spacing, point)
    responses = [None] * xs.size if point else grid.responses(x_start + xs, ys)
    owners = on_footprint(xs, ys, footprints)
    out, start = [], 0
    for members in groups:
        stop = start + len(members)
        out.append(
            (kernels[start:stop], extents[start:stop], responses[start:stop], owners[start:stop])
        )
        start = stop
    return out


def _measure_group(
    residual,
    variance,
    mask,
    members,
    split,
    grid,
    profile,
    spacing,
    *,
    x_start,
    point_kernel,
    noise_correlation,
    own_columns,
    max_joint,
    footprints=None,
    cut=None,
    shown=None,
    looked_up=None,
) -> list[dict]:
    """Fit one group of sources; one row (dict) per member.

    ``looked_up``: the group's entry of :func:`_lookups`, if known.
    """
    xs = np.array([m[0] for m in members], dtype=float)
    ys = np.array([m[1] for m in members], dtype=float)
    if looked_up is None:
        looked_up = _lookups(grid, x_start, [members], point_kernel, footprints, spacing)[0]
    kern, extents, resp, owners = looked_up
    if xs.size <= max_joint:
        box = _joint_box(residual.shape, xs, ys, kern, extents, owners, profile.fwhm, footprints)
        box = _across_cut(box, cut)
        fit = _fit_box(residual, variance, box, xs, ys, kern, profile, noise_correlation, resp)
        per_star = [(fit, i, box) for i in range(xs.size)]
        pair = _unresolved(residual, variance, box, fit, profile, noise_correlation)
    else:
        pair = np.zeros(xs.size, bool)
        per_star = _fit_in_turn(
            residual, variance, xs, ys, kern, profile, noise_correlation, resp, extents
        )
    rows = []
    for i, (fit, j, box) in enumerate(per_star):
        y0, y1, x0, x1, clipped = box
        unit = fit.units[j]
        core = unit > 0.05 * unit.max()
        stamp_bits, core_bits = _mask_bits(mask, core, (y0, y1, x0, x1))
        flags = _flags_from_bits(stamp_bits, core_bits, clipped, bool(split[i]))
        bits = (stamp_bits, core_bits)
        if shown is not None:
            bits = _mask_bits(shown, core, (y0, y1, x0, x1))
        values = (fit.flux[j], fit.x[j], fit.y[j], fit.flux_err[j], fit.x_err[j], fit.y_err[j])
        fitted = (values, fit.background, fit.chi2, fit.success)
        pair_i = bool(pair[i]) and _quadrupole_usable(core_bits)
        rows.append(
            _row(members[i], fitted, flags, bits, pair_i, box, kern[i], resp[i], profile,
                 own_columns)
        )  # fmt: skip
    return rows


def _joint_box(shape, xs, ys, kern, extents, owners, fwhm, footprints):
    """The stamp of a group fitted jointly: :func:`_stamp`, widened over saturated footprints."""
    box = _stamp(shape, xs, ys, kern, fwhm, extents)
    corners = footprint_bounds(xs, ys, footprints, owners)
    if corners is None:
        return box
    # the clipped core and the wings around it
    wide = _stamp(shape, *corners, kern, fwhm, extents)
    return (min(wide[0], box[0]), max(wide[1], box[1]), min(wide[2], box[2]),
            max(wide[3], box[3]), box[4])  # fmt: skip


def _across_cut(box: tuple, cut: np.ndarray | None) -> tuple:
    """``box`` (a :func:`_stamp` tuple) widened across the scan over ``cut``'s rows in it.

    The stamp grows by the number of rows of ``box`` that hold a ``cut``
    pixel, on each side (within the image), so that a star whose core a
    saturated column cuts is fitted on as many rows of wings as a star
    without one.  A box without such pixels is returned as it is.
    """
    if cut is None:
        return box
    y0, y1, x0, x1, clipped = box
    rows = int(np.count_nonzero(cut[y0:y1, x0:x1].any(axis=1)))
    if not rows:
        return box
    return (max(y0 - rows, 0), min(y1 + rows, cut.shape[0]), x0, x1, clipped)


def _stamps(shape, xs, ys, extents, bounds, fwhm) -> list[tuple]:
    """:func:`_stamp` of many groups at once (the same arithmetic): a list of its tuples.

    ``xs``, ``ys``: the stars' positions; ``extents``: their kernels' largest
    ``|dx|``, ``|dy|``, shape (n, 2); group ``g`` is ``[bounds[g], bounds[g + 1])``.
    """
    first = bounds[:-1]
    hx = 1.5 * fwhm + np.maximum.reduceat(extents[:, 0], first) + 1.0
    hy = 1.5 * fwhm + np.maximum.reduceat(extents[:, 1], first) + 1.0
    y0 = np.floor(np.minimum.reduceat(ys, first) - hy).astype(np.int64)
    y1 = np.ceil(np.maximum.reduceat(ys, first) + hy).astype(np.int64) + 1
    x0 = np.floor(np.minimum.reduceat(xs, first) - hx).astype(np.int64)
    x1 = np.ceil(np.maximum.reduceat(xs, first) + hx).astype(np.int64) + 1
    clipped = (y0 < 0) | (x0 < 0) | (y1 > shape[0]) | (x1 > shape[1])
    return list(
        zip(np.maximum(y0, 0).tolist(), np.minimum(y1, shape[0]).tolist(),
            np.maximum(x0, 0).tolist(), np.minimum(x1, shape[1]).tolist(), clipped.tolist(),
            strict=True)
    )  # fmt: skip


def _row(start, fitted, flags, bits, pair, box, kernel, response, profile, own_columns) -> dict:
    """The catalogue row (dict) of one star of a fitted group.

    ``start``: the star's starting ``(x, y)``; ``fitted``: ``((flux, x, y,
    flux_err, x_err, y_err), background, chi2, success)`` of its fit;
    ``flags``: those of the mask, the stamp's edge and the blend; ``bits``:
    the mask bits shown over its stamp and its core (``mask_near``,
    ``mask_core``), kept whether or not the fit failed; ``pair``:
    the residual's quadrupole marks it UNRESOLVED.  A fit that failed (not
    converged, a flux not positive, or a move of more than a FWHM) keeps the
    start as the position and NaN as the flux.
    """
    (flux, x, y, flux_err, x_err, y_err), background, chi2, success = fitted
    moved = math.hypot(x - start[0], y - start[1]) > profile.fwhm
    failed = moved or not (flux > 0) or not success
    if own_columns is not None and (box[2] < own_columns[0] or box[3] > own_columns[1]):
        flags |= _OVERLAP
    if failed:
        flags |= _FIT_FAILED
    elif pair:
        flags |= _UNRESOLVED
    return {
        "x": float(start[0]) if failed else x,
        "y": float(start[1]) if failed else y,
        "x_err": np.nan if failed else x_err,
        "y_err": np.nan if failed else y_err,
        "flux": np.nan if failed else flux,
        "flux_err": np.nan if failed else flux_err,
        "background": background,
        "chi2": chi2,
        "flags": flags,
        "mask_near": bits[0],
        "mask_core": bits[1],
        "kernel": kernel,
        "response": response,
    }


#: Groups from which the joint fits are shared with a thread when a core is
#: idle (see :func:`fit_groups`): fewer cost less than the thread's start.
SHARED_GROUPS = 16


def fit_groups(
    residual, variance, mask, boxes, members, x, y, dx, dy, kernels, sigmas, weights,
    responses, erf, gauss, noise_correlation, shown, separate,
):  # fmt: skip
    """``fit_groups_compiled`` of the groups; the later ones in a thread while a core is idle.

    The compiled call releases the GIL and fits each group on its own, so
    the groups split in two give the same numbers, bit for bit, in either
    thread.  Shared only when :func:`pipeline._threads.spare_cores` reports
    an idle core (a stretch's last units, with the pool's other worker
    waiting; a night of one stretch), at the group where the stamps' pixels
    times their stars (the fits' work, roughly) reach half of the total.
    Arguments and results as ``fit_groups_compiled``'s.
    """
    from concurrent.futures import ThreadPoolExecutor

    from pipeline._threads import spare_cores
    from pipeline.stages.detect._measure_jit import fit_groups_compiled

    shared = (residual, variance, mask)
    table = (sigmas, weights)
    rest = (erf, gauss, noise_correlation, shown, separate)
    n_groups = boxes.shape[0]
    if n_groups < SHARED_GROUPS or spare_cores() < 1:
        return fit_groups_compiled(
            *shared, boxes, members, x, y, dx, dy, kernels, *table, responses, *rest
        )
    work = (boxes[:, 1] - boxes[:, 0]) * (boxes[:, 3] - boxes[:, 2]) * np.diff(members)
    half = int(np.searchsorted(np.cumsum(work), work.sum() / 2.0)) + 1
    half = min(max(half, 1), n_groups - 1)

    def part(first: int, stop: int):
        a, b = members[first], members[stop]
        k0, k1 = kernels[a], kernels[b]
        return fit_groups_compiled(
            *shared, boxes[first:stop], members[first : stop + 1] - a, x[a:b], y[a:b],
            dx[k0:k1], dy[k0:k1], kernels[a : b + 1] - k0, *table, responses[a:b], *rest,
        )  # fmt: skip

    with ThreadPoolExecutor(max_workers=1, thread_name_prefix="detect-fits") as pool:
        later = pool.submit(part, half, n_groups)
        first = part(0, half)
        second = later.result()
    return tuple(np.concatenate([a, b]) for a, b in zip(first, second, strict=True))


def _measure_joint(residual, variance, mask, groups, splits, lookups, profile, options) -> dict:
    """Rows of the groups fitted jointly, by :func:`_measure_group`'s rules, in one compiled call.

    ``groups``: ``{index: members}`` of groups of at most ``max_joint``
    stars; ``splits`` and ``lookups``: per group index, its blend flags and
    :func:`_lookups` entry.  Returns ``{index: rows}``, without the groups
    whose fit met a singular step (the Python loop fits them again and
    reports it).
    """
    from pipeline.stages.detect._model import _kernel_samples, _response_rows
    from pipeline.stages.detect._pixel_gauss import profile_tables

    if not groups:
        return {}
    fwhm = profile.fwhm
    order = list(groups)
    starts = [m for i in order for m in groups[i]]
    kern = [k for i in order for k in lookups[i][0]]
    resp = [r for i in order for r in lookups[i][2]]
    bounds = np.zeros(len(order) + 1, dtype=np.int64)
    bounds[1:] = np.cumsum([len(groups[i]) for i in order])
    xs = np.array([m[0] for m in starts], dtype=np.float64)
    ys = np.array([m[1] for m in starts], dtype=np.float64)
    extents = np.array([e for i in order for e in lookups[i][1]], dtype=np.float64)
    boxes = _stamps(residual.shape, xs, ys, extents.reshape(-1, 2), bounds, fwhm)
    # the few groups on a saturated footprint (none without footprints)
    on = []
    if options["footprints"] is not None:
        owned = np.concatenate([lookups[i][3] for i in order]) != 0
        on = np.flatnonzero(np.logical_or.reduceat(owned, bounds[:-1])).tolist()
    for g in on:
        i = order[g]
        _, extents_i, _, owners = lookups[i]
        if owners.any():
            members = groups[i]
            boxes[g] = _joint_box(residual.shape, [m[0] for m in members], [m[1] for m in members],
                                  None, extents_i, owners, fwhm, options["footprints"])  # fmt: skip
    if options["cut"] is not None:
        cut = options["cut"]
        rows = np.array([b[:2] for b in boxes], dtype=np.int64).reshape(-1, 2)
        for g in np.flatnonzero(rows_reached(cut, rows[:, 0], rows[:, 1])).tolist():
            boxes[g] = _across_cut(boxes[g], cut)
    dx, dy, samples = _kernel_samples(kern)
    sigmas, weights = profile.mixture()
    stars, quadrupoles, fits = fit_groups(
        residual,
        variance,
        mask,
        np.array([b[:4] for b in boxes], dtype=np.int64).reshape(-1, 4),
        bounds,
        xs,
        ys,
        dx,
        dy,
        samples,
        np.ascontiguousarray(sigmas, dtype=np.float64),
        np.ascontiguousarray(weights, dtype=np.float64),
        _response_rows(resp),
        *profile_tables(),
        float(options["noise_correlation"]),
        mask if options["shown"] is None else options["shown"],
        options["shown"] is not None,
    )
    nc, own_columns = options["noise_correlation"], options["own_columns"]
    out = {}
    stars_list, sums, fits_list = stars.tolist(), quadrupoles.tolist(), fits.tolist()
    cuts = bounds.tolist()  # Python ints: numpy's scalars cost more per group
    for g, index in enumerate(order):
        background, chi2, status, stamp_bits, near = fits_list[g]
        if status < 0:
            continue
        box, first, split = boxes[g], cuts[g], splits[index]
        stamp_bits, near, success = int(stamp_bits), int(near), status == 1
        rows = []
        for s in range(first, cuts[g + 1]):
            values = stars_list[s]
            core_bits = int(values[6])
            pair = (
                math.isfinite(sums[s][0])
                and _quadrupole_usable(core_bits)
                and _quadrupole_test(sums[s], nc)
            )
            flags = _flags_from_bits(stamp_bits, core_bits, box[4], split[s - first])
            fitted = (tuple(values[:6]), background, chi2, success)
            bits = (near, int(values[7]))
            rows.append(
                _row(starts[s], fitted, flags, bits, pair, box, kern[s], resp[s], profile,
                     own_columns)
            )  # fmt: skip
        out[index] = rows
    return out


#: Chi-square (two degrees of freedom) of a fit residual's quadrupole moment
#: above which a source may be flagged UNRESOLVED: pure noise exceeds it with
#: probability exp(-16 / 2) = 3e-4 (chi-square with 2 degrees of freedom).
UNRESOLVED_CHI2 = 16.0
#: Residual quadrupole over the model's weighted second moment above which a
#: source may be flagged UNRESOLVED.  See :func:`residual_quadrupole`.
UNRESOLVED_ELONGATION = 0.005


def residual_quadrupole(data, variance, model, unit, x, y, noise_correlation=1.0):
    """The quadrupole moment of a fit's residual around one source, and its significance.

    Two sources closer than the seeing fitted as one leave a residual shaped
    like the second derivative of the profile along the line joining them:
    the pair is wider along that line by ``s^2 f1 f2 / F^2`` (separation
    ``s``, fluxes ``f1``, ``f2``, total ``F``) than the model.  The residual
    ``r = data - model`` is projected on the two quadrupole patterns
    ``g1 = W (dx^2 - dy^2)`` and ``g2 = W 2 dx dy`` about ``(x, y)`` with the
    source's own unit model as the weight ``W``: a round weight misses a pair
    along a long smear, whose residual lies near the streak's ends.

    Parameters
    ----------
    data, variance, model : ndarray, shape (ny, nx)
        Stamp (e-), its variance (e^2) and the fitted model (all sources and
        background, e-); pixels with non-finite data or variance <= 0 are
        left out.
    unit : ndarray, shape (ny, nx)
        The source's unit-flux model on the stamp (the weight).
    x, y : float
        Source position (first moment) in the stamp's pixels.
    noise_correlation : float
        rectify's ``NOISECOR``: the projections' variance is scaled by it.

    Returns
    -------
    chi2 : float
        ``e^T C^-1 e`` of the projections ``e = (r g1, r g2)`` with their
        noise covariance ``C`` (from the variance plane); chi-square with 2
        degrees of freedom for an isolated source the model describes.
    elongation : float
        ``|e|`` over the model's weighted second moment ``sum W rho^2 m``
        (dimensionless; about ``s^2 f1 f2 / F^2`` over twice the source's
        weighted second moment per axis).
    """
    # numba is imported on first use (see pixel_profiles).  Compiled: the
    # array expressions of the sums cost 70 us per source (0.21 s of CPU for
    # the 2956 sources of the 4096 x 4096 benchmark stretch), mostly numpy's
    # per-call overhead on stamps of ~1500 pixels.
    from pipeline.stages.detect._measure_jit import quadrupole_sums

    sums = quadrupole_sums(
        np.asarray(data, dtype=float),
        np.asarray(variance, dtype=float),
        np.asarray(model, dtype=float),
        np.asarray(unit, dtype=float),
        float(x),
        float(y),
    )
    return _quadrupole_figures(sums.tolist(), noise_correlation)


def _quadrupole_figures(sums, noise_correlation) -> tuple[float, float]:
    """``residual_quadrupole``'s chi-square and elongation from its six sums (a list)."""
    e1, e2, c11, c12, c22, second = sums
    c11, c12, c22 = c11 * noise_correlation, c12 * noise_correlation, c22 * noise_correlation
    # e^T C^-1 e of the 2 x 2 covariance written out: numpy's solve took
    # 40 us of its call overhead per source (0.15 s of CPU on a crowded
    # stretch), for the same value to rounding (~1e-16 of it).
    det = c11 * c22 - c12 * c12
    if det == 0.0 or not math.isfinite(det):  # a singular covariance: nothing measured
        return 0.0, 0.0
    chi2 = (c22 * e1 * e1 - 2.0 * c12 * e1 * e2 + c11 * e2 * e2) / det
    return chi2, math.hypot(e1, e2) / second if second > 0 else 0.0


def _quadrupole_test(sums, noise_correlation) -> bool:
    """Whether a fit's residual quadrupole (its six sums, a list) marks the source UNRESOLVED."""
    chi2, elongation = _quadrupole_figures(sums, noise_correlation)
    return chi2 > UNRESOLVED_CHI2 and elongation > UNRESOLVED_ELONGATION


def _fitted_model(fit) -> np.ndarray:
    """The whole model of a fit on its stamp: background plus every star (e-)."""
    return fit.background + sum(f * u for f, u in zip(fit.flux, fit.units, strict=True))


def _unresolved(residual, variance, box, fit, profile, noise_correlation) -> np.ndarray:
    """Per source of a joint fit: flagged as a likely unresolved pair (bool array)."""
    y0, y1, x0, x1, _ = box
    data, var = residual[y0:y1, x0:x1], variance[y0:y1, x0:x1]
    model = _fitted_model(fit)
    out = np.zeros(len(fit.flux), bool)
    for j in range(len(fit.flux)):
        if not (fit.success and fit.flux[j] > 0):
            continue
        chi2, elongation = residual_quadrupole(
            data, var, model, fit.units[j], fit.x[j] - x0, fit.y[j] - y0, noise_correlation
        )
        out[j] = chi2 > UNRESOLVED_CHI2 and elongation > UNRESOLVED_ELONGATION
    return out


#: Chi-square that splitting an UNRESOLVED source into two must gain over its
#: fit as one, on the same stamp, in units of the split fit's reduced
#: chi-square (a model a little off for a bright star inflates both): the
#: second source adds three parameters, and a chi-square with 3 degrees of
#: freedom exceeds 25 with probability 1.6e-5 (normal tail beyond ~4.3 sigma).
SPLIT_CHI2 = 25.0
#: Separations tried for the two halves of a split, in seeing FWHMs, along the
#: residual's elongation: from just resolved to the longest smears (a pair
#: along a 16 px track of 4 px seeing can be 4 FWHM apart and look like one);
#: each half may move a FWHM from its start, so the steps leave no gap.
SPLIT_SEPARATIONS = (0.75, 1.5, 2.5, 3.5)
#: Most model evaluations of one split trial (a fit of 7 parameters).  A trial
#: on a pair converges in a few steps; on one star the two halves creep along
#: the valley of a degenerate fit (hundreds of evaluations, up to 0.1 s each
#: trial) to an end that fails the :data:`SPLIT_CHI2` test or that another
#: separation reaches faster.  On a crowded 1035 x 4096 stretch (68 trials of
#: 17 sources) the trials that passed took 4 to 33 evaluations, except four
#: (46 to 176) whose sources another separation split with the same
#: chi-square in 33 or fewer; the trials beyond 50 took 40 % of all trials'
#: evaluations.  A trial not converged by then is no pair.  With the cap, the
#: trials that reach it (5 of 68 there, 250 of 1190 evaluations) are not
#: cut sooner: no test proves them hopeless earlier.  The fit only lowers
#: the chi-square, so the gain test cannot fail early; each ended with a
#: half more than a FWHM from its start, but a half may come back, and the
#: bound that a step moves a position at most 1 px per axis proves it
#: cannot only at evaluation 46 to 50.
SPLIT_MAX_EVALUATIONS = 50


def split_pair(
    residual,
    variance,
    members,
    which: int,
    grid: KernelGrid,
    profile: SeeingProfile,
    *,
    x_start: int = 0,
    point_kernel: bool = False,
    noise_correlation: float = 1.0,
    min_snr: float = 5.0,
) -> tuple[tuple[tuple[float, float], tuple[float, float]], float] | None:
    """Two sources in place of one that the fit left elongated, if the data want them.

    The group of ``members`` is fitted again on its stamp; then, with the
    other members' models held and subtracted, member ``which`` is fitted as
    two sources started symmetrically about it along the major axis of its
    residual's quadrupole (see :func:`residual_quadrupole`), at each of
    :data:`SPLIT_SEPARATIONS`, each trial with at most
    :data:`SPLIT_MAX_EVALUATIONS` evaluations.  The best split is kept when it
    lowers the chi-square by more than :data:`SPLIT_CHI2` times its reduced
    chi-square, both halves have a positive flux of S/N >= ``min_snr``, and
    they end at least half a FWHM apart (closer, two sources only widen the
    model), each within a FWHM of where it was put and a FWHM or more from
    the group's other sources.

    Parameters
    ----------
    residual, variance : ndarray, shape (ny, nx)
        Background-subtracted image (e-) and variance (e^2).
    members : list of (x, y)
        The group's fitted positions (array pixels).
    which : int
        Index in ``members`` of the source to split.
    grid, profile, x_start, point_kernel, noise_correlation
        See :func:`measure_groups`.
    min_snr : float
        Least S/N of each half.

    Returns
    -------
    (((x1, y1), (x2, y2)), gain) or None
        The halves' fitted positions (array pixels), the brighter first, and
        the chi-square the split gained; None when the source stays one.
    """
    from pipeline.stages.detect._measure_jit import quadrupole_sums
    from pipeline.stages.detect._model import fit_stars

    xs = np.array([m[0] for m in members], dtype=float)
    ys = np.array([m[1] for m in members], dtype=float)
    spacing = KERNEL_SPACING * profile.fwhm
    kern = _kernels_at(grid, x_start, xs, ys, spacing, point_kernel)
    resp = _responses_at(grid, x_start, xs, ys, point_kernel)
    box = _stamp(residual.shape, xs, ys, kern, profile.fwhm)
    y0, y1, x0, x1, _ = box
    data, var = residual[y0:y1, x0:x1], variance[y0:y1, x0:x1]
    n_good = int(np.sum(np.isfinite(data) & np.isfinite(var) & (var > 0)))
    one = _fit_box(residual, variance, box, xs, ys, kern, profile, noise_correlation, resp)
    if not (one.success and one.flux[which] > 0):
        return None
    chi2_one = one.chi2 * max(n_good - (3 * xs.size + 1), 1)
    model = _fitted_model(one)
    sums = quadrupole_sums(
        np.asarray(data, dtype=float),
        np.asarray(var, dtype=float),
        np.asarray(model, dtype=float),
        np.asarray(one.units[which], dtype=float),
        float(one.x[which] - x0),
        float(one.y[which] - y0),
    )
    angle = 0.5 * np.arctan2(sums[1], sums[0])  # major axis of the residual's excess
    axis = np.array([np.cos(angle), np.sin(angle)])
    centre = np.array([one.x[which], one.y[which]])
    # The halves are fitted with the group's other sources held at their fit
    # (their models subtracted): two stars instead of the whole group again
    # per trial, and a gain that can only understate the joint refit's.
    others = np.delete(np.arange(xs.size), which)
    held = data - sum((one.flux[i] * one.units[i] for i in others), np.zeros(data.shape))
    best, best_chi2 = None, np.inf
    for separation in SPLIT_SEPARATIONS:
        half = 0.5 * separation * profile.fwhm * axis
        first, second = centre + half, centre - half
        two = fit_stars(
            held,
            var,
            [first[0], second[0]],
            [first[1], second[1]],
            [kern[which]] * 2,
            profile,
            origin=(y0, x0),
            noise_correlation=noise_correlation,
            responses=[resp[which]] * 2,
            max_evaluations=SPLIT_MAX_EVALUATIONS,
        )
        if not two.success:
            continue
        chi2_two = two.chi2 * max(n_good - 7, 1)
        with np.errstate(invalid="ignore", divide="ignore"):
            snr = two.flux / two.flux_err
        apart = float(np.hypot(two.x[0] - two.x[1], two.y[0] - two.y[1]))
        # Each half stays about where it was put (a half that slid onto a
        # neighbour fits the neighbour's misfit, not a pair), and clear of
        # the group's other sources.
        drift = np.hypot(two.x - [first[0], second[0]], two.y - [first[1], second[1]])
        clear = np.hypot(two.x[:, None] - one.x[others], two.y[:, None] - one.y[others])
        gain = chi2_one - chi2_two
        if (
            np.all(snr >= min_snr)
            and apart >= 0.5 * profile.fwhm
            and np.all(drift <= profile.fwhm)
            and np.all(clear >= profile.fwhm)
            and gain > SPLIT_CHI2 * max(two.chi2, 1.0)
            and chi2_two < best_chi2
        ):
            order = np.argsort(-two.flux)
            positions = tuple((float(two.x[k]), float(two.y[k])) for k in order)
            best, best_chi2 = (positions, float(gain)), chi2_two
    return best


def _fit_box(residual, variance, box, xs, ys, kern, profile, noise_correlation, resp, others=None):
    from pipeline.stages.detect._model import fit_stars

    y0, y1, x0, x1, _ = box
    data = residual[y0:y1, x0:x1]
    if others is not None:
        data = data - others[y0:y1, x0:x1]
    return fit_stars(
        data,
        variance[y0:y1, x0:x1],
        xs,
        ys,
        kern,
        profile,
        origin=(y0, x0),
        noise_correlation=noise_correlation,
        responses=resp,
    )


def _fit_in_turn(
    residual, variance, xs, ys, kern, profile, noise_correlation, resp, extents, sweeps=2
):
    """Fit the stars of a large group one at a time, the others' models subtracted.

    A joint fit of dozens of stars (a crowded patch, a bleed trail split into
    many sources) costs far more than it gains; two sweeps of single fits,
    each on its own stamp minus the current models of the others, converge
    for the separations a group is made of.

    Returns
    -------
    list of (FitResult, int, box)
        Per star: its fit, its index in the fit (0) and its stamp box.
    """
    models = np.zeros(residual.shape)
    boxes = [
        _stamp(residual.shape, [x], [y], [k], profile.fwhm, [e])
        for x, y, k, e in zip(xs, ys, kern, extents, strict=True)
    ]
    fits: list = [None] * len(xs)
    added: list = [None] * len(xs)  # the model of each star now in ``models``
    x_now, y_now = xs.copy(), ys.copy()
    for _ in range(sweeps):
        for i in range(len(xs)):
            y0, y1, x0, x1, _clipped = boxes[i]
            if added[i] is not None:  # take this star's own model out of the others
                models[y0:y1, x0:x1] -= added[i]
                added[i] = None
            fit = _fit_box(
                residual,
                variance,
                boxes[i],
                [x_now[i]],
                [y_now[i]],
                [kern[i]],
                profile,
                noise_correlation,
                [resp[i]],
                others=models,
            )
            fits[i] = fit
            near = np.hypot(fit.x[0] - xs[i], fit.y[0] - ys[i]) <= profile.fwhm
            if fit.success and fit.flux[0] > 0 and near:
                x_now[i], y_now[i] = fit.x[0], fit.y[0]
                added[i] = fit.flux[0] * fit.units[0]
                models[y0:y1, x0:x1] += added[i]
    return [(fits[i], 0, boxes[i]) for i in range(len(xs))]


def aperture_fluxes(
    residual, variance, no_data, x, y, kernels, profile, radii, noise_correlation, responses=None
):
    """Aperture sums and their model-based aperture corrections.

    Parameters
    ----------
    residual, variance : ndarray, shape (ny, nx)
    no_data : ndarray of bool
    x, y : ndarray, shape (n,)
        Source positions (array pixels).
    kernels : list of (dx, dy)
        Smear kernels of the sources.
    profile : SeeingProfile
    radii : sequence of float
        Aperture radii, pixels.
    noise_correlation : float
    responses : list of (Response or None), optional
        Rectify's resampling and clocking response of each source.

    Returns
    -------
    flux, flux_err, correction : ndarray, shape (n, n_radii)
        Sums (e-), their errors and the factor (model total / model inside
        the aperture) that turns a sum into a total flux.
    """
    n = len(x)
    flux = np.full((n, len(radii)), np.nan)
    err = np.full((n, len(radii)), np.nan)
    corr = np.full((n, len(radii)), np.nan)
    if n == 0:
        return flux, err, corr
    sums, variances = _aperture_sums(residual, variance, no_data, x, y, radii)
    flux[:] = sums
    err[:] = np.sqrt(variances * noise_correlation)
    corr[:] = aperture_corrections(kernels, y, profile, radii, responses=responses)
    return flux, err, corr


#: Least S/N of a star whose aperture and PSF fluxes set :func:`psf_aperture_scale`.
PSF_SCALE_MIN_SNR = 50.0
#: Fewest such stars for a scale; with fewer none is measured (NaN in the catalogue).
PSF_SCALE_MIN_STARS = 5
#: Most such stars measured (the brightest), for the annuli's cost.
PSF_SCALE_MAX_STARS = 100
#: Clipping of the stars' ratios about their median, robust sigmas.
PSF_SCALE_CLIP = 3.0


def psf_aperture_scale(
    flux_psf, flux_psf_err, flux_aper, flux_aper_err, correction, flags, isolated=None
):
    """The factor that puts a stretch's PSF fluxes on its aperture fluxes' scale.

    A PSF flux is the flux of the fitted model, so it inherits the model's
    errors: a seeing width 2.5 % too wide (a fit on a dozen stars, or a
    profile that is not quite a Moffat) gave PSF fluxes ~3 % too bright on a
    simulated stretch, differently on every stretch, and the zero point
    followed only part of it.  An aperture of a few FWHM (its model-based
    correction to the total being small and nearly independent of the
    width) does not care.  As is common practice in PSF photometry, the PSF
    fluxes are put on the apertures' scale by the weighted mean ratio of
    aperture to PSF flux of the stretch's bright unflagged stars (detect
    records it; the zero point applies it consistently over the night,
    :func:`pipeline.stages.zeropoint.psf_scale_shifts`).

    Parameters
    ----------
    flux_psf, flux_psf_err : ndarray, shape (n,)
        PSF fluxes and errors, e-.
    flux_aper, flux_aper_err : ndarray, shape (n,)
        Aperture sums and errors, e-, less the local sky
        (:func:`annulus_levels` times the aperture's area).
    correction : ndarray, shape (n,)
        The apertures' corrections to the total (model total / model inside).
    flags : ndarray of int, shape (n,)
        :class:`SourceFlag` bits: only sources without any take part.
    isolated : ndarray of bool, shape (n,), optional
        Sources with no other within reach of their aperture (an aperture
        sums its neighbours' light too: :func:`isolated_sources`); None: all.

    Returns
    -------
    scale : float
        Aperture over PSF flux (1.0 with fewer than :data:`PSF_SCALE_MIN_STARS`
        stars of S/N >= :data:`PSF_SCALE_MIN_SNR`).
    error : float
        Its 1-sigma error (0 when not measured).
    n_stars : int
        Stars that set it (0 when not measured).
    """
    flux_psf = np.asarray(flux_psf, dtype=float)
    total = np.asarray(flux_aper, dtype=float) * np.asarray(correction, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = total / flux_psf
        error = np.abs(ratio) * np.hypot(
            np.asarray(flux_aper_err, dtype=float) / np.asarray(flux_aper, dtype=float),
            np.asarray(flux_psf_err, dtype=float) / flux_psf,
        )
        snr = flux_psf / np.asarray(flux_psf_err, dtype=float)
    use = (
        (np.asarray(flags) == 0)
        & (True if isolated is None else np.asarray(isolated, dtype=bool))
        & (snr >= PSF_SCALE_MIN_SNR)
        & np.isfinite(ratio)
        & np.isfinite(error)
        & (error > 0)
    )
    if use.sum() < PSF_SCALE_MIN_STARS:
        return 1.0, 0.0, 0
    r, e = ratio[use], error[use]
    centre = np.median(r)
    spread = 1.4826 * np.median(np.abs(r - centre))
    keep = np.abs(r - centre) <= PSF_SCALE_CLIP * np.maximum(spread, e)
    if keep.sum() < PSF_SCALE_MIN_STARS:
        return 1.0, 0.0, 0
    w = 1.0 / e[keep] ** 2
    scale = float(np.sum(w * r[keep]) / np.sum(w))
    # the weighted mean's error, widened by the ratios' scatter beyond their errors
    chi2 = float(np.sum(w * (r[keep] - scale) ** 2)) / max(int(keep.sum()) - 1, 1)
    return scale, float(np.sqrt(max(chi2, 1.0) / np.sum(w))), int(keep.sum())


def annulus_levels(image, no_data, x, y, inner, outer):
    """Sigma-clipped median of ``image`` in an annulus about each position.

    The local sky that an aperture sum holds above the background mesh (in
    a crowded field the mesh sits below the sky between the stars' wings;
    the PSF fit's own background term cannot stand in, as it takes up part
    of the model's error), measured without any model: the median of a
    photutils ``CircularAnnulus``'s pixels, clipped at 3 sigma (common
    practice for sky annuli).

    Parameters
    ----------
    image : ndarray, shape (ny, nx)
        The background-subtracted image, e-.
    no_data : ndarray of bool, shape (ny, nx)
        Pixels left out.
    x, y : ndarray, shape (n,)
        Centres, pixels.
    inner, outer : float
        Annulus radii, pixels.

    Returns
    -------
    ndarray, shape (n,)
        e- per pixel (0 where the annulus holds no pixel).
    """
    levels = np.zeros(len(x))
    if len(x) == 0:
        return levels
    from photutils.aperture import CircularAnnulus

    # per source on its own cutout (photutils' ApertureStats copies the whole
    # plane to mask it: a float64 plane of the stretch at detect's peak)
    annuli = CircularAnnulus(np.column_stack([x, y]), float(inner), float(outer))
    for k, footprint in enumerate(annuli.to_mask(method="center")):
        values = footprint.get_values(image, mask=no_data)
        values = values[np.isfinite(values)]
        if values.size:
            levels[k] = _clipped_median(values)
    return levels


def _clipped_median(values: np.ndarray, sigma: float = 3.0, rounds: int = 5) -> float:
    """Median of ``values`` clipped at ``sigma`` robust (MAD) spreads about it, iterated.

    What astropy's ``sigma_clipped_stats(..., stdfunc='mad_std')[1]`` gives,
    without its per-call overhead (~0.5 ms: 0.25 s of a stretch's detect
    with an annulus per candidate star).
    """
    centre = float(np.median(values))
    for _ in range(rounds):
        spread = 1.4826 * float(np.median(np.abs(values - centre)))
        kept = values[np.abs(values - centre) <= sigma * spread] if spread > 0 else values
        if kept.size == values.size or kept.size == 0:
            break
        values = kept
        centre = float(np.median(values))
    return centre


def isolated_sources(x, y, reach, among=None):
    """Which sources have no other source within ``reach`` pixels.

    Parameters
    ----------
    x, y : ndarray, shape (n,)
        Positions, pixels.
    reach : float or ndarray, shape (n,)
        Each source's distance within which another spoils its aperture sum
        (its radius, a few seeing FWHM for the other's light, its smear).
    among : (ndarray, ndarray) or None
        ``x``, ``y`` of every source, these among them; None: these alone.

    Returns
    -------
    ndarray of bool, shape (n,)
    """
    from scipy.spatial import cKDTree

    points = np.column_stack([np.asarray(x, dtype=float), np.asarray(y, dtype=float)])
    pool = points if among is None else np.column_stack([np.asarray(a, float) for a in among])
    if len(points) == 0 or len(pool) < 2:
        return np.ones(len(points), dtype=bool)
    # the nearest other source (k=2: the first is the source itself)
    distance, _ = cKDTree(pool).query(points, k=2)
    return distance[:, 1] > np.broadcast_to(np.asarray(reach, dtype=float), (len(points),))


def _aperture_sums(residual, variance, no_data, x, y, radii):
    """Exact circular-aperture sums of ``residual`` and ``variance``, shape (n, n_radii) each.

    The sums photutils' ``aperture_photometry`` forms (exact overlap from
    :func:`photutils.geometry.circular_overlap_grid`, no-data pixels
    counted as 0), with one cutout per source for all radii and both planes:
    the sum of error^2 x overlap photutils forms for an error is the
    aperture sum of the variance plane.  Two ``aperture_photometry`` calls
    built each overlap grid twice and a table per call: 0.38 s of CPU for
    2800 sources and 3 radii on the 4096 x 4096 benchmark stretch.

    The boxes and their pixels' edges are found for all sources at once
    (the same floor, ceiling and differences of the same double-precision
    values as per source in Python) and each source's sums are the same
    matrix products as before: the same values, with ~4 us of Python per
    source fewer (27 ms of CPU instead of 33 ms for the 1733 sources of the
    benchmark night's stretch 5, least of 5).
    """
    ny, nx = residual.shape
    rmax = float(max(radii))
    radii = [float(r) for r in radii]
    sums = np.zeros((len(x), len(radii)))
    variances = np.zeros((len(x), len(radii)))
    missing = bool(no_data.any())
    xs, ys = np.asarray(x, dtype=float), np.asarray(y, dtype=float)
    if not (np.isfinite(xs).all() and np.isfinite(ys).all()):
        raise ValueError("aperture positions must be finite; got NaN or inf in x or y.")
    # photutils' bounding box of the largest aperture (pixel centres at
    # integers), cut by the image's edges, and its pixels' edges about the
    # centre (:func:`_overlap_weights`' arithmetic)
    a0 = np.maximum(np.floor(xs - rmax + 0.5), 0).astype(np.int64)
    a1 = np.minimum(np.ceil(xs + rmax + 0.5), nx).astype(np.int64)
    b0 = np.maximum(np.floor(ys - rmax + 0.5), 0).astype(np.int64)
    b1 = np.minimum(np.ceil(ys + rmax + 0.5), ny).astype(np.int64)
    boxes = zip(
        b0.tolist(), b1.tolist(), a0.tolist(), a1.tolist(),
        (a0 - 0.5 - xs).tolist(), (a1 - 0.5 - xs).tolist(),
        (b0 - 0.5 - ys).tolist(), (b1 - 0.5 - ys).tolist(),
        strict=True,
    )  # fmt: skip
    for i, (y0, y1, x0, x1, *edges) in enumerate(boxes):
        if x1 <= x0 or y1 <= y0:
            continue
        weights = _overlap_of_edges(edges, x1 - x0, y1 - y0, radii)
        data = residual[y0:y1, x0:x1]
        var = variance[y0:y1, x0:x1]
        # no-data pixels as 0 (most cutouts have none: two np.where spared)
        if missing and (gone := no_data[y0:y1, x0:x1]).any():
            data = np.where(gone, 0.0, data)
            var = np.where(gone, 0.0, var)
        sums[i] = weights @ data.ravel()
        variances[i] = weights @ var.ravel()
    return sums, variances


def _overlap_weights(xc, yc, box, radii) -> np.ndarray:
    """Exact overlap of circles of ``radii`` around ``(xc, yc)`` with the pixels of ``box``.

    ``box``: ``(y0, y1, x0, x1)``, pixel centres at integers.  Returns an
    array of shape ``(n_radii, (y1 - y0) * (x1 - x0))``, each row the
    flattened :func:`photutils.geometry.circular_overlap_grid` that
    photutils' ``CircularAperture.to_mask(method="exact")`` forms.
    """
    y0, y1, x0, x1 = box
    edges = (x0 - 0.5 - xc, x1 - 0.5 - xc, y0 - 0.5 - yc, y1 - 0.5 - yc)
    return _overlap_of_edges(edges, x1 - x0, y1 - y0, radii)


def _overlap_of_edges(edges, nx: int, ny: int, radii) -> np.ndarray:
    """:func:`_overlap_weights` from the box's pixel edges about the centre.

    ``edges``: ``(xmin, xmax, ymin, ymax)`` of the ``nx`` x ``ny`` pixels'
    outer edges relative to the circles' centre.
    """
    from photutils.geometry import circular_overlap_grid

    return np.array([circular_overlap_grid(*edges, nx, ny, r, 1, 1).ravel() for r in radii])


def aperture_corrections(
    kernels, y, profile, radii, step: float = 16.0, responses=None
) -> np.ndarray:
    """Model total over model inside circular apertures, per source.

    The correction depends on the smear kernel, which changes slowly across
    the chip: it is computed exactly (photutils exact aperture overlap on the
    rendered unit model) for the first source of each ``step``-row bin of
    ``y`` and used for every source of the bin (the kernel changes by less
    than 1 % of its length over 16 rows on a 4096-column chip).

    Returns
    -------
    ndarray, shape (n, n_radii)
    """
    from pipeline.stages.detect._model import model_image

    n = len(kernels)
    if n == 0:
        return np.empty((0, len(radii)))
    rmax = max(radii)
    bins = np.floor(np.asarray(y, dtype=float) / step).astype(int)
    # The first source of each bin (np.unique's first occurrences) and each
    # source's bin: the rows of the bins' corrections are gathered at the
    # end, not looked up and set source by source (the same values).
    _, first, inverse = np.unique(bins, return_index=True, return_inverse=True)
    done = np.empty((first.size, len(radii)))
    for b, i in enumerate(first.tolist()):
        dx, dy = kernels[i]
        hx = int(np.ceil(rmax + 4 * profile.fwhm + np.max(np.abs(dx))))
        hy = int(np.ceil(rmax + 4 * profile.fwhm + np.max(np.abs(dy))))
        # The stamp's pixels differ from the image's by whole pixels: the
        # lattice offsets hold on it as they are.
        resp = None if responses is None else responses[i]
        unit = model_image((2 * hy + 1, 2 * hx + 1), hx, hy, dx, dy, profile, response=resp)
        # photutils' bounding box of the largest aperture, inside the stamp
        y0, x0 = int(np.floor(hy - rmax + 0.5)), int(np.floor(hx - rmax + 0.5))
        y1, x1 = int(np.ceil(hy + rmax + 0.5)), int(np.ceil(hx + rmax + 0.5))
        weights = _overlap_weights(hx, hy, (y0, y1, x0, x1), radii)
        done[b] = 1.0 / (weights @ unit[y0:y1, x0:x1].ravel())
    return done[inverse.reshape(-1)]
