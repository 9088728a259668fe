"""Robust least-squares fit of the night's geometry and its slow image wander.

The model of a matched pair (reference star ``j``, detection ``k``) in strip
pixels is::

    row    = (t_mid_j - s) / (dt (1 + lambda)) + N - u_mean_j(theta) + W_row(t_mid_j)
    column = c_mean_j(theta) + W_column(t_mid_j)

with the physical parameters ``theta`` (focal scale, rotation, north tilt,
radial distortion) acting through :class:`GeometryPredictor`, the clock
offset ``s`` and line-time scale ``lambda`` entering analytically, and
``W`` cubic B-splines in time (knots every ``knot_spacing`` seconds) for
mirror wobble and image wander.  On a night of several segments (gaps),
``s`` is ``s + s_k`` for a detection in segment ``k``: each segment after
the first with enough stars has a clock offset of its own (its first
block's DATE-OBS may be off; :mod:`~pipeline.stages.astrometry._segments`).

Degeneracies
------------
* **Clock offset and east-west tilt.**  Tilting the axis ``tau_E`` (radians)
  to the east makes every star cross the chip ``tau_E / w`` seconds earlier
  (``w ~ omega cos phi`` the focal plane's drift rate, scaled by refraction
  and aberration), exactly as a clock that runs that much late, and turns
  the drift direction on the chip by ``tau_E tan phi``, exactly as a camera
  rotation (the local north of the tilted field differs from the ground's by
  that angle); :func:`~pipeline.stages.astrometry.east_tilt_equivalent`
  gives both.  The two descriptions
  agree to 5e-5 px along the scan and 0.002 px across it on a 4096-pixel chip
  at 0.35 arcsec per pixel for 15 arcsec of tilt at latitude 50 (0.0002 and
  0.03 px for 60 arcsec: the difference grows as the tilt squared), see
  ``tests/test_astrometry.py``.  The fit therefore holds the east tilt
  at its configured value and fits ``s_eff = s + tau_E / w``
  (reported as the clock offset and as the along-scan offset
  ``-s_eff / dt`` in pixels) and ``rotation_eff = rotation + tau_E tan phi``
  (reported as the rotation of the rows against the drift).
* A constant along the scan is the clock offset and a linear trend along the
  scan is the line-time scale, a constant across the scan is the north tilt:
  the wander splines are constrained to have zero weighted mean (and, along
  the scan, zero trend) over the matched stars, so those belong to the
  physical model.  Likewise a constant along the scan over one segment is
  that segment's clock offset: the wander along the scan has zero weighted
  mean over each segment that has one.

Outliers (mismatches, blends, variable stars) are rejected by iterative
clipping of the normalised residual radius at ``clip_sigma`` times its
robust (median absolute deviation) scale; the fit is Gauss-Newton with the
physical derivatives from finite differences of the fast predictor.
"""

from __future__ import annotations

import dataclasses
import logging
from dataclasses import dataclass

import numpy as np

from pipeline._threads import in_two_threads
from pipeline.stages.astrometry._model import GeometryOffsets, GeometryPredictor, SkyTracks

__all__ = [
    "FIT_PARAMETERS",
    "GeometryFit",
    "WanderSpline",
    "error_floor",
    "fit_geometry",
    "free_segments",
    "parameter_jacobian",
]

log = logging.getLogger(__name__)

#: Parameters the fit can adjust, in the order of the covariance matrix.
FIT_PARAMETERS = (
    "clock_offset",
    "line_time_scale",
    "focal_scale",
    "rotation",
    "tilt_north",
    "distortion_k1",
)
#: Finite-difference steps of the parameters the predictor differentiates
#: (well inside the linear range, far above rounding: a step moves stars by
#: 1e-3 to 1e-2 px).
_STEPS = {"focal_scale": 1e-6, "rotation": 0.5, "tilt_north": 0.5, "distortion_k1": 20.0}
_UNITS = {
    "clock_offset": "s",
    "line_time_scale": "",
    "focal_scale": "",
    "rotation": "arcsec",
    "tilt_north": "arcsec",
    "distortion_k1": "rad-2",
}


@dataclass(frozen=True)
class WanderSpline:
    """Smooth offsets of the recorded positions along the night, strip pixels.

    Attributes
    ----------
    knots : ndarray
        Full knot vector (cubic), seconds since ``start``.
    coef_row, coef_column : ndarray
        B-spline coefficients, pixels along and across the scan.
    reduce_row, reduce_column : ndarray or None
        Maps from the fitted coefficients (free of the constant and trend the
        physical model owns) to ``coef_row`` and ``coef_column``.
    """

    knots: np.ndarray
    coef_row: np.ndarray
    coef_column: np.ndarray
    reduce_row: np.ndarray | None = None
    reduce_column: np.ndarray | None = None

    def reduced_basis(self, t: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Derivatives of the offsets at ``t`` by the fitted (constrained) coefficients.

        Returns ``(d_row / d a, d_column / d b)``, shapes ``(n, n_a)`` and
        ``(n, n_b)``; ``a`` and ``b`` follow the physical parameters in
        :attr:`GeometryFit.full_covariance`.
        """
        basis = _sparse_design(self.knots, np.asarray(t, float))
        return basis @ self.reduce_row, basis @ self.reduce_column

    def __call__(self, t: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Offsets ``(d_row, d_column)`` at times ``t`` (held constant beyond the ends)."""
        from scipy.interpolate import BSpline

        t = np.clip(np.asarray(t, float), self.knots[0], self.knots[-1])
        return (
            BSpline(self.knots, self.coef_row, 3, extrapolate=False)(t),
            BSpline(self.knots, self.coef_column, 3, extrapolate=False)(t),
        )


def _knots(t_lo: float, t_hi: float, spacing: float) -> np.ndarray:
    n = max(1, int(np.ceil((t_hi - t_lo) / spacing)))
    inner = np.linspace(t_lo, t_hi, n + 1)
    return np.r_[[t_lo] * 3, inner, [t_hi] * 3]


def _sparse_design(knots: np.ndarray, t: np.ndarray):
    """Cubic B-spline basis at ``t`` (held at the ends), sparse (n, n_coef)."""
    from scipy.interpolate import BSpline

    t = np.clip(t, knots[0], knots[-1])
    return BSpline.design_matrix(t, knots, 3).tocsr()


def _normal_equations(jac, res, w, spline_q):
    """Normal matrix and right-hand side of the weighted problem.

    ``jac`` (2 n, n_par) holds the physical derivatives, rows then columns;
    the wander's columns are the sparse B-spline basis times the constraint
    maps, assembled without forming them densely (the basis has four
    non-zeros a row).
    """
    jw = jac * w[:, None]
    rw = res * w
    n_pp = jw.T @ jw
    r_p = jw.T @ rw
    if spline_q is None:
        return n_pp, r_p
    _, basis, q_row, q_col = spline_q
    n = basis.shape[0]
    blocks = []
    for half, q in ((slice(0, n), q_row), (slice(n, 2 * n), q_col)):
        bw = basis.multiply(w[half][:, None]).tocsr()
        n_ss = q.T @ (bw.T @ bw).toarray() @ q
        n_ps = np.asarray(bw.T @ jw[half]).T @ q
        r_s = q.T @ np.asarray(bw.T @ rw[half]).ravel()
        blocks.append((n_ss, n_ps, r_s))
    (n_aa, n_pa, r_a), (n_bb, n_pb, r_b) = blocks
    zero = np.zeros((n_aa.shape[0], n_bb.shape[0]))
    normal = np.block([[n_pp, n_pa, n_pb], [n_pa.T, n_aa, zero], [n_pb.T, zero.T, n_bb]])
    return normal, np.r_[r_p, r_a, r_b]


@dataclass(frozen=True)
class GeometryFit:
    """Result of :func:`fit_geometry`.

    Attributes
    ----------
    offsets : GeometryOffsets
        The fitted geometry (east tilt as given; see the module notes).
    names : tuple of str
        Fitted parameters, the order of ``values`` and ``covariance``.
    values : ndarray
        Fitted values in the units of :class:`GeometryOffsets`.
    full_covariance : ndarray, shape (n_par + n_a + n_b, n_par + n_a + n_b)
        Covariance of ``values`` and the wander's fitted coefficients (see
        :meth:`WanderSpline.reduced_basis`), scaled by the reduced chi-square.
    wander : WanderSpline or None
        The smooth correction, None if not fitted.
    ref_index, det_index : ndarray of int
        The pairs the fit saw.
    used : ndarray of bool
        Pairs kept by the clipping.
    residual_row, residual_column : ndarray
        Detection minus model, strip pixels, for every pair.
    t_mid : ndarray
        Middle of each pair's crossing, seconds since ``start``.
    chi2_reduced : float
        Of the kept pairs, with the given position errors and ``error_floor``.
    error_floor : float
        Position error added in quadrature to every pair's in the weights,
        strip pixels (0 unless the fit estimated it).
    segments : tuple of int
        Segment numbers whose clock offsets (``offsets.segment_clock``) the
        fit adjusted, in the order of their entries of ``full_covariance``
        (after ``names``); empty without segments.
    reference_segment : int or None
        The segment whose clock is the night's ``clock_offset`` (None without
        segments).
    pair_segment : ndarray of int or None
        Segment number of each pair's detection.
    """

    offsets: GeometryOffsets
    names: tuple[str, ...]
    values: np.ndarray
    full_covariance: np.ndarray
    wander: WanderSpline | None
    ref_index: np.ndarray
    det_index: np.ndarray
    used: np.ndarray
    residual_row: np.ndarray
    residual_column: np.ndarray
    t_mid: np.ndarray
    chi2_reduced: float
    error_floor: float = 0.0
    segments: tuple[int, ...] = ()
    reference_segment: int | None = None
    pair_segment: np.ndarray | None = None

    @property
    def covariance(self) -> np.ndarray:
        """Covariance of ``values`` (the physical parameters), shape (n_par, n_par)."""
        n = len(self.names)
        return self.full_covariance[:n, :n]

    @property
    def errors(self) -> dict[str, float]:
        """1-sigma errors of the fitted parameters."""
        return dict(zip(self.names, np.sqrt(np.diag(self.covariance)), strict=True))

    @property
    def segment_errors(self) -> dict[int, float]:
        """1-sigma errors of the fitted segment clock offsets, seconds, by segment number."""
        n = len(self.names)
        diagonal = np.diag(self.full_covariance)[n : n + len(self.segments)]
        return dict(zip(self.segments, np.sqrt(diagonal), strict=True))

    def segment_stars(self) -> dict[int, int]:
        """Pairs kept by the clipping in each segment, by segment number."""
        if self.pair_segment is None:
            return {}
        numbers, counts = np.unique(self.pair_segment[self.used], return_counts=True)
        return {int(k): int(c) for k, c in zip(numbers, counts, strict=True)}

    @property
    def units(self) -> dict[str, str]:
        """Units of the fitted parameters."""
        return {name: _UNITS[name] for name in self.names}

    @property
    def n_used(self) -> int:
        """Pairs kept by the clipping."""
        return int(self.used.sum())


def _subset(tracks: SkyTracks, index: np.ndarray) -> SkyTracks:
    return SkyTracks(tracks.t_centre[index], tracks.half_width, tracks.coef[:, :, index])


def _model(
    predictor: GeometryPredictor,
    tracks: SkyTracks,
    offsets: GeometryOffsets,
    segment: np.ndarray | None = None,
):
    pred = predictor.predict(tracks, offsets)
    dt = predictor.line_time * (1.0 + offsets.line_time_scale)
    return pred, pred.rows(predictor.n_rows, dt, offsets.clock_offsets(segment)), pred.column


def parameter_jacobian(
    predictor, tracks, offsets, names, pred, row, column, segment=None, segments=()
):
    """Derivatives of strip positions by the named parameters; shape (2 n, n_par).

    ``pred``, ``row`` and ``column`` are the prediction at ``offsets``; the
    clock offset and line time are differentiated analytically, the others
    by forward differences of the predictor (steps ``_STEPS``).  Rows of the
    result are the ``n`` rows, then the ``n`` columns.  ``segment``: each
    point's segment number (None: no segment clocks); ``segments``: the
    segment numbers whose clock offsets (``segment_clock``) follow the named
    parameters as columns.
    """
    dt0 = predictor.line_time
    differenced = [name for name in names if name not in ("clock_offset", "line_time_scale")]
    moved = [
        dataclasses.replace(offsets, **{name: getattr(offsets, name) + _STEPS[name]})
        for name in differenced
    ]
    models = dict(zip(differenced, _models(predictor, tracks, moved, segment), strict=True))
    d_clock = -1.0 / (dt0 * (1.0 + offsets.line_time_scale))
    cols = []
    for name in names:
        if name == "clock_offset":
            d_row = np.full(row.shape, d_clock)
            d_col = np.zeros(row.shape)
        elif name == "line_time_scale":
            # each segment's rows are timed from its own start (its clock
            # holds -line_time_scale * segment_start)
            d_row = -(pred.t_mid - offsets.clock_offsets(segment)) / (
                dt0 * (1.0 + offsets.line_time_scale) ** 2
            ) - d_clock * offsets.segment_starts(segment)
            d_col = np.zeros(row.shape)
        else:
            step = _STEPS[name]
            _, row2, col2 = models.pop(name)
            d_row, d_col = (row2 - row) / step, (col2 - column) / step
        cols.append(np.r_[d_row, d_col])
    for number in segments:
        cols.append(np.r_[np.where(segment == number, d_clock, 0.0), np.zeros(row.shape)])
    return np.column_stack(cols)


def _models(
    predictor: GeometryPredictor, tracks: SkyTracks, geometries: list, segment=None
) -> list:
    """:func:`_model` of each geometry, two at a time (see :func:`in_two_threads`).

    A prediction's numpy steps between its compiled passes run on its own
    thread, so two predictions at once fill both cores (their compiled passes
    still split between a thread and the predictor's helper).
    """

    def model(geometry):
        return _model(predictor, tracks, geometry, segment)

    if len(tracks) > _THREADED_STARS:
        return [model(geometry) for geometry in geometries]
    return in_two_threads(model, geometries, "astrometry-models")


#: Stars up to which two predictions are made at once (the fit's ~22 000
#: matched stars on the 4096-column night): the errors of all ~55 000
#: detections would hold two predictions' temporaries at the stage's
#: memory peak, and the process tree's peak with them.
_THREADED_STARS = 30_000


def error_floor(residual: np.ndarray, sigma: np.ndarray, dof: float) -> float:
    """Error to add in quadrature to every ``sigma`` so that the chi-square is ``dof``.

    Solves ``sum(residual^2 / (sigma^2 + e^2)) = dof`` for ``e >= 0`` (the
    left side falls as ``e`` grows); 0 when the residuals are already no
    larger than their errors say.  Adding a common error in quadrature until
    the reduced chi-square is 1 is common practice for a component of the
    noise that the given errors lack (here: the reference catalogue's
    positions, when the config does not give their error).

    Parameters
    ----------
    residual, sigma : ndarray, shape (n,)
        Residuals and their known 1-sigma errors, same units.
    dof : float
        Degrees of freedom of the fit.

    Returns
    -------
    float
        ``e``, in the units of ``residual``.
    """
    from scipy.optimize import brentq

    r2 = np.asarray(residual, float) ** 2
    s2 = np.asarray(sigma, float) ** 2
    if dof <= 0 or np.sum(r2 / s2) <= dof:
        return 0.0
    # at e^2 = sum(r^2) / dof every term is below r^2 / e^2: the sum is < dof
    e2 = brentq(lambda e2: np.sum(r2 / (s2 + e2)) - dof, 0.0, float(np.sum(r2)) / dof)
    return float(np.sqrt(e2))


def free_segments(
    pair_segment: np.ndarray | None, ok: np.ndarray, min_stars: int
) -> tuple[tuple[int, ...], int | None]:
    """The segments whose clock offsets a fit adjusts, and the night's clock's segment.

    Parameters
    ----------
    pair_segment : ndarray of int or None
        Segment number of each pair; None: no segments.
    ok : ndarray of bool
        Pairs with a prediction.
    min_stars : int
        Fewest such pairs for a segment of its own.

    Returns
    -------
    free : tuple of int
        Segment numbers with ``min_stars`` pairs or more, but the first.
    reference : int or None
        The first of those (the night's ``clock_offset`` is its clock), or
        the first segment with pairs if none has enough; None without
        segments or pairs.
    """
    if pair_segment is None or not ok.any():
        return (), None
    numbers, counts = np.unique(pair_segment[ok], return_counts=True)
    enough = [int(k) for k, c in zip(numbers, counts, strict=True) if c >= min_stars]
    if not enough:
        return (), int(numbers[0])
    return tuple(enough[1:]), enough[0]


def _segment_clocks(offsets, pair_segment, free, clocks=None) -> GeometryOffsets:
    """``offsets`` with ``segment_clock`` set for the ``free`` segments, 0 elsewhere.

    ``clocks``: their values in the order of ``free``; None keeps those
    ``offsets`` has (a fit that starts from an earlier one).
    """
    if pair_segment is None:
        return offsets
    size = max(int(pair_segment.max(initial=-1)) + 1, len(offsets.segment_clock))
    table = np.zeros(size)
    if clocks is None:
        clocks = offsets.segment_clocks(list(free))
    table[list(free)] = np.ravel(clocks) if free else []
    return dataclasses.replace(offsets, segment_clock=tuple(float(v) for v in table))


def fit_geometry(
    predictor: GeometryPredictor,
    ref_tracks: SkyTracks,
    det_row: np.ndarray,
    det_column: np.ndarray,
    ref_index: np.ndarray,
    det_index: np.ndarray,
    *,
    start: GeometryOffsets | None = None,
    sigma_row: np.ndarray | None = None,
    sigma_column: np.ndarray | None = None,
    parameters: tuple[str, ...] = FIT_PARAMETERS,
    knot_spacing: float | None = None,
    clip_sigma: float = 5.0,
    max_iterations: int = 10,
    fit_error_floor: bool = False,
    segment: np.ndarray | None = None,
    min_segment_stars: int = 10,
) -> GeometryFit:
    """Fit the geometry (and optionally the wander) to matched pairs.

    Parameters
    ----------
    predictor : GeometryPredictor
        Nominal geometry.
    ref_tracks : SkyTracks
        Tracks of all reference stars (``ref_index`` selects from them).
    det_row, det_column : ndarray, shape (n_det,)
        Detections' strip positions through the nominal geometry, pixels.
    ref_index, det_index : ndarray of int, shape (n_pairs,)
        Matched pairs.
    start : GeometryOffsets or None
        Starting geometry; None for the nominal one.
    sigma_row, sigma_column : ndarray, shape (n_det,) or None
        1-sigma position errors of the detections, pixels; None for equal
        weights (1 px).
    parameters : tuple of str
        Which of :data:`FIT_PARAMETERS` to fit; the rest stay at ``start``.
    knot_spacing : float or None
        Seconds between the wander spline's knots; None fits no wander.
    clip_sigma : float
        Rejection threshold on the normalised residual radius, in units of
        its robust scale.
    max_iterations : int
        Gauss-Newton iterations per clipping round.
    fit_error_floor : bool
        Also estimate a position error added in quadrature to every pair's
        (:func:`error_floor`), re-weighting the pairs with it at each
        clipping round: the reference stars' errors where the caller could
        not include them, or any jitter the model lacks.
    segment : ndarray of int, shape (n_det,), or None
        Segment number of each detection (ingest's ``segment``); None: the
        night is one segment.  Each segment with ``min_segment_stars``
        matched stars gets a clock offset of its own
        (``offsets.segment_clock``), relative to the first such segment's,
        which is the night's ``clock_offset``; the others keep 0.
    min_segment_stars : int
        Fewest matched stars (pairs with a prediction) for a segment's own
        clock offset.

    Returns
    -------
    GeometryFit

    Notes
    -----
    The east tilt is not fitted: it is degenerate with the clock offset and
    the rotation (module notes), so the fitted ``clock_offset`` is
    ``s + tau_E / w`` and the fitted ``rotation`` is
    ``rotation + tau_E tan(phi)`` for an unknown east tilt ``tau_E``.

    A segment's clock offset is a constant along the scan over its rows, so
    with segment clocks the wander along the scan has zero weighted mean
    over each such segment's pairs (and over the other pairs together), not
    only over the night's.
    """
    from scipy.linalg import null_space

    unknown = set(parameters) - set(FIT_PARAMETERS)
    if unknown:
        raise ValueError(
            f"parameters {sorted(unknown)} are not fittable; choose from {FIT_PARAMETERS}."
        )
    names = tuple(p for p in FIT_PARAMETERS if p in parameters)
    offsets = start or GeometryOffsets()
    n = ref_index.size
    tracks = _subset(ref_tracks, ref_index)
    obs = np.r_[det_row[det_index], det_column[det_index]]
    s_r = np.ones(n) if sigma_row is None else np.asarray(sigma_row, float)[det_index]
    s_c = np.ones(n) if sigma_column is None else np.asarray(sigma_column, float)[det_index]
    floor = 0.0
    weight = 1.0 / np.r_[s_r, s_c]
    # the prediction at ``offsets``, None once they move: the first iteration of
    # each round predicts at the geometry the round before ended with (and the
    # first round at ``start``), made already (4 of ~46 predictions a fit)
    pred = predictor.predict(tracks, offsets)
    ok = np.isfinite(pred.t_mid) & np.isfinite(pred.u_mean) & np.isfinite(pred.column)
    pair_segment = None if segment is None else np.asarray(segment, dtype=np.int64)[det_index]
    free, reference = free_segments(pair_segment, ok, min_segment_stars)
    offsets = _segment_clocks(offsets, pair_segment, free)
    dt = predictor.line_time * (1.0 + offsets.line_time_scale)
    model = pred, pred.rows(predictor.n_rows, dt, offsets.clock_offsets(pair_segment)), pred.column
    pred, row, column = model
    used = ok.copy()
    t_mid = np.where(ok, pred.t_mid, np.nanmedian(pred.t_mid) if ok.any() else 0.0)

    spline_q = None
    if knot_spacing is not None:
        knots = _knots(float(t_mid[ok].min()) - 1.0, float(t_mid[ok].max()) + 1.0, knot_spacing)
        basis = _sparse_design(knots, t_mid)
        tn = (t_mid - t_mid.mean()) / max(np.ptp(t_mid), 1.0)
        kept = basis[np.flatnonzero(ok)]
        total = np.asarray(kept.sum(axis=0)).ravel()
        trend = np.asarray(kept.T @ tn[ok]).ravel()
        # a segment's own clock is its constant along the scan (zero weighted
        # mean over it); with none, the night's mean is the night's clock's
        means = [total]
        if free:
            own = np.isin(pair_segment, free)
            means = [
                np.asarray(basis[np.flatnonzero(ok & part)].sum(axis=0)).ravel()
                for part in [~own, *(pair_segment == k for k in free)]
            ]
        q_row = null_space(np.vstack([*means, trend]))
        q_col = null_space(total[None, :])
        spline_q = (knots, basis, q_row, q_col)
        a = np.zeros(q_row.shape[1])
        b = np.zeros(q_col.shape[1])

    def wander_part():
        if spline_q is None:
            return 0.0, 0.0
        _, basis, q_row, q_col = spline_q
        return basis @ (q_row @ a), basis @ (q_col @ b)

    values = np.array([getattr(offsets, nm) for nm in names], float)
    clocks = np.array([offsets.segment_clock[k] for k in free], float)
    n_phys = len(names) + len(free)
    full_cov = np.full((n_phys, n_phys), np.nan)
    chi2 = np.nan
    for _round in range(10):
        for _ in range(max_iterations):
            pred, row, column = model or _model(predictor, tracks, offsets, pair_segment)
            w_r, w_c = wander_part()
            res = obs - np.r_[row + w_r, column + w_c]
            jac = parameter_jacobian(
                predictor, tracks, offsets, names, pred, row, column, pair_segment, free
            )
            keep = np.r_[used, used] & np.isfinite(res) & np.isfinite(jac).all(axis=1)
            w = np.where(keep, weight, 0.0)
            res = np.where(keep, res, 0.0)
            jac = np.where(keep[:, None], jac, 0.0)
            normal, rhs = _normal_equations(jac, res, w, spline_q)
            norm = np.sqrt(np.diag(normal))
            norm[norm == 0] = 1.0
            # normal equations (columns normalised); lstsq on the small matrix
            # copes with a rank-deficient one (e.g. a knot interval without stars)
            scaled = normal / np.outer(norm, norm)
            delta = np.linalg.lstsq(scaled, rhs / norm, rcond=1e-13)[0] / norm
            values = values + delta[: len(names)]
            clocks = clocks + delta[len(names) : n_phys]
            offsets = dataclasses.replace(offsets, **dict(zip(names, values, strict=True)))
            offsets = _segment_clocks(offsets, pair_segment, free, clocks)
            model = None
            step = jac @ delta[:n_phys]
            if spline_q is not None:
                _, basis, q_row, q_col = spline_q
                d_a = delta[n_phys : n_phys + a.size]
                d_b = delta[n_phys + a.size :]
                a, b = a + d_a, b + d_b
                step = step + np.r_[basis @ (q_row @ d_a), basis @ (q_col @ d_b)]
            # largest change of any position, pixels
            change = np.abs(step[keep]).max() if keep.any() else 0.0
            if change < 1e-6:
                break
        pred, row, column = model = model or _model(predictor, tracks, offsets, pair_segment)
        w_r, w_c = wander_part()
        res_r = det_row[det_index] - row - w_r
        res_c = det_column[det_index] - column - w_c
        e_r, e_c = np.hypot(s_r, floor), np.hypot(s_c, floor)
        radius = np.hypot(res_r / e_r, res_c / e_c)
        good = np.isfinite(radius)
        # robust scale of a 2-D Gaussian's radius: median = sigma sqrt(2 ln 2)
        scale = np.median(radius[used & good]) / np.sqrt(2.0 * np.log(2.0))
        new_used = good & (radius <= clip_sigma * scale)
        n_keep = int(new_used.sum())
        dof = max(2 * n_keep - normal.shape[0], 1)
        chi2 = float((radius[new_used] ** 2).sum() / dof)
        full_cov = np.linalg.pinv(scaled, rcond=1e-13) / np.outer(norm, norm) * chi2
        new_floor = floor
        if fit_error_floor:
            k = np.flatnonzero(new_used)
            new_floor = error_floor(np.r_[res_r[k], res_c[k]], np.r_[s_r[k], s_c[k]], dof)
        # a floor within 2 % of the last changes the weights by < 2 %
        settled = abs(new_floor - floor) <= 0.02 * max(new_floor, 1e-12)
        if np.array_equal(new_used, used) and settled:
            break
        used, floor = new_used, new_floor
        weight = 1.0 / np.r_[np.hypot(s_r, floor), np.hypot(s_c, floor)]
    wander = None
    if spline_q is not None:
        knots, _, q_row, q_col = spline_q
        wander = WanderSpline(
            knots=knots,
            coef_row=q_row @ a,
            coef_column=q_col @ b,
            reduce_row=q_row,
            reduce_column=q_col,
        )
    log.info(
        "geometry fit: %d of %d pairs kept, reduced chi2 %.3f, %s",
        int(used.sum()),
        n,
        chi2,
        ", ".join(
            [f"{nm}={v:.6g}" for nm, v in zip(names, values, strict=True)]
            + [f"segment {k} clock={v:.6g}" for k, v in zip(free, clocks, strict=True)]
        ),
    )
    return GeometryFit(
        offsets=offsets,
        names=names,
        values=values,
        full_covariance=full_cov,
        wander=wander,
        ref_index=ref_index,
        det_index=det_index,
        used=used,
        residual_row=res_r,
        residual_column=res_c,
        t_mid=pred.t_mid,
        chi2_reduced=chi2,
        error_floor=floor,
        segments=free,
        reference_segment=reference,
        pair_segment=pair_segment,
    )
