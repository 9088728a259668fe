"""The sky's transparency during the night, from the matched stars' fluxes.

Why astrometry needs it
-----------------------
A TDI image of a star is the light it deposited along its whole crossing of
the chip.  The geometry model predicts the time mean of the track
(:class:`~pipeline.stages.astrometry.GeometryPredictor`); under a cloud that
passes during the crossing, the image is dimmed over part of it, and its
centroid is the light-weighted mean of the track instead.  The track slips
along the scan relative to its charge packet by ``S ~ N eta tan(phi)`` rows
(DEVELOPERS.md, "Track geometry"), so the centroid moves by about ``S tau /
T`` (``tau`` the light-weighted mean time minus mid-crossing, ``T`` the
crossing time): in proportion to the distance from the chip's centre line,
which a fit without it takes for a camera rotation (15" on the demo night's
25 % cloud).  Neither detect (it sees one image, not when its light arrived)
nor the zero-point stage (it runs later, and its zero point is the
crossing-mean transparency, not its course within a crossing) can undo it;
the fit can, given the transparency ``T(t)`` itself: the predictor then
weights each track's time mean by ``T``.  That prediction is the light's
centroid, which detect measures only where the smear kernel is short
against the seeing (along a long kernel the fitted position stays near the
time mean), and ``T`` between its knots is only as good as the
deconvolution below: the stage keeps the light weighting only where the
reference stars follow it at least as well as the time means
(:func:`~pipeline.stages.astrometry.light_weighting_fits_better`).

How it is measured
------------------
Each matched star's flux over its reference brightness,
``flux 10**(0.4 m_ref)``, is the transparency averaged over its crossing
window ``[t0, t1]`` (times a constant: the zero point).  Those windows
overlap and start at every moment of the night, so ``T`` is recovered as a
cubic B-spline with knots a fraction of the crossing apart by linear least
squares on the window means (a boxcar deconvolution, common practice), with a
small first-difference penalty that fixes the components a boxcar of the
crossing's length cannot see (periods ``T / k``) as flat as the data allow,
and outliers (variables, blends, saturated stars) clipped.  Only the shape
matters: the curve is scaled to 1 at its clear level (the 90th percentile over
the stars' mid-crossing times).  A night shorter than about two crossings
cannot place a cloud within the crossings: every star saw all of it.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike

__all__ = ["TransparencyCurve", "fit_transparency"]

log = logging.getLogger(__name__)

_LN10_04 = 0.4 * np.log(10.0)


@dataclass(frozen=True)
class TransparencyCurve:
    """Relative transparency along the night (1 when clear), a cubic B-spline in time.

    Attributes
    ----------
    knots : ndarray
        Full knot vector, seconds since the nominal ``start`` (true time).
    coef : ndarray
        B-spline coefficients.
    depth : float
        Largest fractional loss of light over the stars' mid-crossing times.
    significance : float
        How far the curve fits the fluxes better than a clear sky, sigmas of
        the chi-square a flat sky would gain from noise (see the code).
    n_stars : int
        Stars the curve was fitted to (after clipping).
    applied : bool
        Whether the solution light-weighted its centroids with it.
    """

    knots: np.ndarray
    coef: np.ndarray
    depth: float
    significance: float
    n_stars: int
    applied: bool = True

    def __call__(self, t: ArrayLike) -> np.ndarray:
        """Transparency at times ``t`` (seconds), held at the ends beyond the span."""
        from scipy.interpolate import BSpline

        t = np.clip(np.asarray(t, dtype=float), self.knots[0], self.knots[-1])
        return BSpline(self.knots, self.coef, 3, extrapolate=False)(t)


def _window_means(knots: np.ndarray, t0: np.ndarray, t1: np.ndarray) -> np.ndarray:
    """Mean of every basis spline over each window ``[t0, t1]``, shape (n, n_coef)."""
    from scipy.interpolate import BSpline

    n_coef = knots.size - 4
    # every basis spline's antiderivative at once: one spline whose coefficients
    # are the identity, one column per basis spline (evaluated column by column
    # as the splines one by one, to the bit, in one pass over the windows)
    anti = BSpline(knots, np.eye(n_coef), 3, extrapolate=False).antiderivative()
    lo, hi = knots[0], knots[-1]
    a, b = np.clip(t0, lo, hi), np.clip(t1, lo, hi)
    return (anti(b) - anti(a)) / (t1 - t0)[:, None]


def fit_transparency(
    t0: ArrayLike,
    t1: ArrayLike,
    flux: ArrayLike,
    ref_mag: ArrayLike,
    *,
    flux_err: ArrayLike | None = None,
    mag_error: float = 0.02,
    knot_spacing: float | None = None,
    clip_sigma: float = 4.0,
) -> TransparencyCurve | None:
    """Fit the transparency ``T(t)`` to stars' fluxes averaged over their crossings.

    Parameters
    ----------
    t0, t1 : array_like, shape (n,)
        Start and end of each star's crossing, seconds (true time since the
        nominal start).
    flux : array_like, shape (n,)
        Measured fluxes (any linear unit, e.g. electrons).
    ref_mag : array_like, shape (n,)
        Reference magnitudes of the stars.
    flux_err : array_like or None
        1-sigma errors of ``flux``; None: none (only ``mag_error``).
    mag_error : float
        Magnitudes: scatter of a star's flux about its reference brightness
        besides the photon noise (catalogue errors, colour terms), added in
        quadrature.
    knot_spacing : float or None
        Seconds between knots; None: a sixth of the median crossing.
    clip_sigma : float
        Outliers beyond this many robust sigmas are dropped (iterated).

    Returns
    -------
    TransparencyCurve or None
        None if fewer stars than twice the curve's coefficients have a
        finite, positive flux and magnitude.
    """
    from scipy.interpolate import BSpline
    from scipy.optimize import lsq_linear

    t0, t1, flux, ref_mag = (np.asarray(a, dtype=float).ravel() for a in (t0, t1, flux, ref_mag))
    rel_err = np.zeros_like(flux) if flux_err is None else np.asarray(flux_err, float) / flux
    ok = (
        np.isfinite(t0)
        & np.isfinite(t1)
        & (t1 > t0)
        & np.isfinite(flux)
        & (flux > 0)
        & np.isfinite(ref_mag)
        & np.isfinite(rel_err)
    )
    if not ok.any():
        return None
    crossing = float(np.median(t1[ok] - t0[ok]))
    spacing = knot_spacing or crossing / 6.0
    lo, hi = float(t0[ok].min()), float(t1[ok].max())
    n_int = max(1, int(np.ceil((hi - lo) / spacing)))
    knots = np.r_[[lo] * 3, np.linspace(lo, hi, n_int + 1), [hi] * 3]
    n_coef = knots.size - 4
    if ok.sum() < 2 * n_coef:
        return None
    # flux over reference brightness: a constant times the window's mean transparency
    ratio = flux * 10.0 ** (0.4 * (ref_mag - np.nanmedian(ref_mag[ok])))
    sigma = np.hypot(rel_err, _LN10_04 * mag_error)  # relative
    design = np.zeros((flux.size, n_coef))
    design[ok] = _window_means(knots, t0[ok], t1[ok])
    # unknowns: the clear-sky ratio k and the loss spline e >= 0 (T = 1 - B e / k):
    # ratio = k - design @ e, linear, with the loss bounded below by zero
    system = np.column_stack([np.ones(flux.size), -design])
    # Each (stars x coefficients) array is ~19 MB on the 4096-column benchmark
    # night (~40,000 matched stars), and the factorisation below is where its
    # astrometry, and the process tree, peaked: the design and the weighted
    # system are dropped once used.
    del design
    # a light prior on the loss, each a thousandth of the data's weight per
    # coefficient: its first differences (smooth where the stars cannot tell)
    # and its size (no loss the fluxes do not need: a clear sky is the prior;
    # measured on window means of a Gaussian dip, 0.3x or 3x this prior
    # misplaces up to 0.1 of the light)
    prior = np.vstack([np.diff(np.eye(n_coef), 1, axis=0), np.eye(n_coef)])
    bounds = (np.r_[0.0, np.zeros(n_coef)], np.full(n_coef + 1, np.inf))
    used = ok.copy()
    scale = float(np.median(ratio[ok]))
    for _ in range(10):
        w = np.where(used, 1.0 / (sigma * scale), 0.0)
        weighted = system * w[:, None]
        strength = np.sqrt(1e-3 * np.sum(weighted[:, 1:] ** 2) / n_coef)
        rows = np.column_stack([np.zeros(prior.shape[0]), strength * prior])
        # The same bounded least squares on the triangle of a QR factorisation
        # (||A x - b||^2 = ||R x - Q^T b||^2 + const): one factorisation of the
        # stars' rows instead of one per solver step.
        stacked = np.vstack([weighted, rows])
        del weighted  # not held through the factorisation, the fit's peak
        q, r = np.linalg.qr(stacked)
        del stacked  # nor these two through the bounded solve (19 MB of the unit's peak)
        target = q.T @ np.r_[w * ratio, np.zeros(prior.shape[0])]
        del q
        solution = lsq_linear(r, target, bounds=bounds).x
        model = system @ solution
        pull = (ratio - model) / (sigma * scale)
        robust = 1.4826 * np.median(np.abs(pull[used]))
        new_used = ok & (np.abs(pull) <= clip_sigma * max(robust, 1.0))
        if np.array_equal(new_used, used):
            break
        used = new_used
    clear, loss = solution[0], solution[1:]
    coef = 1.0 - loss / clear
    t_mid = 0.5 * (t0[used] + t1[used])
    grid = np.linspace(t_mid.min(), t_mid.max(), 20 * n_int + 1)
    depth = float(1.0 - BSpline(knots, coef, 3)(grid).min())
    # Is there a cloud at all?  The chi-square gained over a constant sky,
    # in units of the fit's own reduced chi-square (flux errors are often
    # understated), against the n_coef it may gain from noise alone: a
    # chi-square's mean n and sigma sqrt(2 n) (an F-test, common practice).
    w = np.where(used, 1.0 / (sigma * scale), 0.0)
    chi2_fit = float(np.sum((w * (ratio - model)) ** 2))
    flat = np.sum(w**2 * ratio) / np.sum(w**2)
    chi2_flat = float(np.sum((w * (ratio - flat)) ** 2))
    dof = max(int(used.sum()) - n_coef - 1, 1)
    gained = (chi2_flat - chi2_fit) / max(chi2_fit / dof, 1.0)
    significance = float((gained - n_coef) / np.sqrt(2.0 * n_coef))
    log.info(
        "transparency: %d of %d stars, %d knots over %.0f s, deepest loss %.3f "
        "(%.1f sigma over a clear sky)",
        int(used.sum()),
        int(ok.sum()),
        n_int + 1,
        hi - lo,
        depth,
        significance,
    )
    return TransparencyCurve(
        knots=knots, coef=coef, depth=depth, significance=significance, n_stars=int(used.sum())
    )
