"""Astrometry's second pass: the smear kernels of the solved geometry, and when they matter.

Why a second pass
-----------------
rectify records each star's smear kernel (its track over the crossing,
relative to its mean) from the configured geometry, and detect fits every
star with the seeing profile averaged over that kernel.  If the config is
wrong, so is the kernel: a focal length 1 % short makes rectify expect the
rows to be clocked 1 % off the drift, a streak ``0.01 N`` rows longer than the
real one (41 rows over 4096 TDI rows, DESIGN.md section 4).  A model streak
much longer than the star leaves the fitted position free to slide along it,
so detect's centroids scatter by px, growing with the kernel error towards
the chip's edges, and the solution built on them is poor.

Once a solution exists, the tracks it implies are the ones on the chip.
rectify's resampling is only a change of coordinates, which astrometry undoes
exactly through the same nominal map, so the rectified planes need not be
made again: only the kernels change.  :func:`solved_kernels` computes them
at rectify's recorded positions, as the solved geometry's tracks of the stars
recorded there, turned into rectified pixels with the nominal map's Jacobian
(the map rectify resampled with).  detect then measures the same planes with
these kernels, and the night is solved again.  A deconvolved product is the
exception (its stars were made round with the configured kernels): it would
need rectify again, which this pass does not do.

When
----
:func:`kernel_change` is the largest displacement of any equal-time sample
of any recorded kernel between the kernels detect used and the solved
geometry's.  A model that differs from the star's true image by at most
that much anywhere along the streak cannot pull the fitted centre further
than that; when it stays below the bright stars' centroid noise
(:func:`centroid_noise`) times ``second_pass_noise``, a second measurement
cannot improve the bright stars' positions noticeably and is not made.  Nor
is it when the change is not known: below 3 sigma of its own uncertainty
(:func:`kernel_change_error`, the fit's covariance carried to the kernels),
since kernels that follow the fit's noise move the centroids with it and the
passes would chase that noise (on the demo night, whose config is right, the
focal length and distortion walked off by 1-2 sigma a pass, 0.15 px of
kernel change growing to 0.46 px over three passes).  Unless the geometry
itself moved by many of its errors since the kernels' (the stage's
``geometry_moved``): a solution far from the truth has a covariance inflated
by its misfit, which can hide a real change (0.47 +- 0.28 px on a night
whose camera rotation, 0.23 deg off the config's, had just moved by 35 of
its errors).  A focal length off by
``e`` changes the kernels by about ``N e`` rows (41 rows for the issue's
``e = 1 %`` over 4096 TDI rows, 0.04 px for ``e = 1e-5``), against bright
stars' 0.01-0.05 px of centroid noise.
"""

from __future__ import annotations

import dataclasses
from typing import TYPE_CHECKING

import numpy as np

from pipeline._threads import in_two_threads
from pipeline.stages.rectify._map import StripMap, column_windows, map_nodes, smear_kernels

if TYPE_CHECKING:
    from astropy.table import Table

__all__ = [
    "BRIGHT_SNR",
    "centroid_noise",
    "kernel_change",
    "kernel_change_error",
    "solved_kernels",
    "solved_kernels_of_stretches",
]

#: Signal-to-noise of the bright stars whose centroid noise sets the second
#: pass's threshold (the issue's bright-star residual bound refers to them).
BRIGHT_SNR = 50.0

#: Node spacing of the nominal map used for the kernels' Jacobian, rectified
#: px (rectify's defaults; the Jacobian is smooth on far larger scales).
_MAP_STEP = (256, 16)


def solved_kernels(
    kernels: Table,
    solution,
    nominal_model,
    frame,
    model=None,
    *,
    sky=None,
    nodes=None,
    windows=None,
) -> Table:
    """rectify's kernel record redone with the tracks of a solved geometry.

    Parameters
    ----------
    kernels : astropy.table.Table
        rectify's ``smear_kernels`` product of one stretch (``x``, ``y`` in
        night rectified pixels; ``meta['n_samples']``).
    solution : AstrometricSolution
        The night's solution: ``solution.solved_model`` gives the tracks,
        ``solution.sky_from_rectified`` the star recorded at each position.
    nominal_model : TDIModel
        The geometry rectify resampled with (the config's).
    frame : RectifiedFrame
        The night's rectified grid.
    model : TDIModel or None
        The tracks' geometry; None: ``solution.solved_model``.
    sky : (ndarray, ndarray) or None
        ``solution.sky_from_rectified`` of the kernels' positions, if made
        already (see :func:`solved_kernels_of_stretches`).
    nodes : dict or None
        Node columns of the nominal map shared with other stretches' calls
        (see :class:`~pipeline.stages.rectify._map.StripMap`).
    windows : list or None
        The crossing windows of the kernels' columns in ``model``, if made
        already (:func:`~pipeline.stages.rectify._map.column_windows`); None:
        made here.

    Returns
    -------
    astropy.table.Table
        Same positions and columns as ``kernels`` (see
        :func:`pipeline.stages.rectify.smear_kernels`).
    """
    x = np.asarray(kernels["x"], dtype=float)
    y = np.asarray(kernels["y"], dtype=float)
    strip_map = StripMap(
        nominal_model, frame, *_map_range(x), step_x=_MAP_STEP[0], step_y=_MAP_STEP[1], nodes=nodes
    )
    if sky is None:
        sky = solution.sky_from_rectified(x, y)
    model = solution.solved_model if model is None else model
    return smear_kernels(
        model, frame, strip_map, x, y, _n_samples(kernels), sky=sky, windows=windows
    )


def _map_range(x: np.ndarray) -> tuple[float, float]:
    """Columns the nominal map of a kernel record at columns ``x`` serves."""
    pad = 16 + _MAP_STEP[0] // 4
    return float(x.min()) - pad, float(x.max()) + pad


def _n_samples(kernels: Table) -> int:
    return int(kernels.meta.get("n_samples", np.shape(kernels["dx"])[1]))


def solved_kernels_of_stretches(
    kernels: list[Table], solution, nominal_model, frame, *, nodes=None
) -> list:
    """:func:`solved_kernels` of every stretch's record, each as alone, made together.

    The solved sky of every record's positions comes from one pass
    (:meth:`~AstrometricSolution.sky_from_rectified_groups`), and the nominal
    map's node columns that adjacent stretches share are computed once
    (``nodes``: a dict to keep them in, e.g. for :func:`kernel_change_error`).
    On two CPUs the second half of the stretches is made in a thread
    (:func:`~pipeline._threads.in_two_threads`).
    """
    groups = [(np.asarray(k["x"], dtype=float), np.asarray(k["y"], dtype=float)) for k in kernels]
    if not kernels:
        return []
    skies = solution.sky_from_rectified_groups(groups)
    nodes = {} if nodes is None else nodes
    model = solution.solved_model  # made once, before any thread

    def stretches(part: range) -> list:
        # the part's map nodes in one pass, its kernel columns' crossing windows
        # in another (each the same as alone; a node column both halves need is
        # made in both, to the same values), then each stretch
        map_nodes(
            nominal_model,
            frame,
            [_map_range(groups[i][0]) for i in part],
            nodes,
            step_x=_MAP_STEP[0],
            step_y=_MAP_STEP[1],
        )
        windows = column_windows(model, [(groups[i][0], *skies[i]) for i in part])
        return [
            solved_kernels(
                kernels[i],
                solution,
                nominal_model,
                frame,
                model,
                sky=skies[i],
                nodes=nodes,
                windows=windows[k],
            )
            for k, i in enumerate(part)
        ]

    # each half of the stretches is the same computation in either thread
    half = (len(kernels) + 1) // 2
    halves = in_two_threads(
        stretches, [range(half), range(half, len(kernels))], "astrometry-kernels"
    )
    return [table for part in halves for table in part]


def kernel_change(before: Table, after: Table) -> float:
    """Largest displacement of an equal-time kernel sample between two records, px.

    Both tables hold the kernels of the same positions (as
    :func:`solved_kernels` returns them for rectify's record).
    """
    if len(before) != len(after):
        raise ValueError(
            f"the kernel records differ in length ({len(before)} and {len(after)}); "
            "compare the kernels of the same positions."
        )
    if len(before) == 0:
        return 0.0
    dx = np.asarray(after["dx"], float) - np.asarray(before["dx"], float)
    dy = np.asarray(after["dy"], float) - np.asarray(before["dy"], float)
    return float(np.nanmax(np.hypot(dx, dy)))


def centroid_noise(x_err, y_err, snr, matched) -> float:
    """Typical centroid noise of the night's bright matched stars, px.

    The median of ``sqrt((x_err^2 + y_err^2) / 2)`` over the matched
    detections with S/N >= :data:`BRIGHT_SNR`; if fewer than 5 are that
    bright, over the best-measured tenth of the matched ones (at least 5).

    Parameters
    ----------
    x_err, y_err : array_like, shape (n,)
        Centroid errors, rectified px.
    snr : array_like or None, shape (n,)
        Detection signal-to-noise; None: rank by the errors alone.
    matched : array_like of bool, shape (n,)
        Which detections matched a reference star.

    Returns
    -------
    float
        px; NaN if nothing matched.
    """
    sigma = np.sqrt(0.5 * (np.asarray(x_err, float) ** 2 + np.asarray(y_err, float) ** 2))
    good = np.asarray(matched, bool) & np.isfinite(sigma)
    if not good.any():
        return float("nan")
    if snr is not None:
        bright = good & (np.asarray(snr, float) >= BRIGHT_SNR)
        if bright.sum() >= 5:
            return float(np.median(sigma[bright]))
    ranked = np.sort(sigma[good])
    return float(np.median(ranked[: max(5, ranked.size // 10)]))


def kernel_change_error(
    kernels: Table, solved: Table, solution, nominal_model, frame, *, nodes=None
) -> float:
    """1-sigma uncertainty of :func:`kernel_change` from the solution's covariance, px.

    Each fitted parameter is moved by its error and the kernels redone
    (:func:`solved_kernels`); the displacements, combined with the
    parameters' correlations, give the variance of the kernel sample that
    moves most, along its move.

    Parameters
    ----------
    kernels, solved : astropy.table.Table
        The kernels detect used and the solution's (:func:`solved_kernels`)
        at the same positions.
    solution : AstrometricSolution
        Its ``fit`` holds the parameters' errors and covariance.
    nominal_model, frame
        As for :func:`solved_kernels`.
    nodes : dict or None
        As for :func:`solved_kernels` (the stretches' shared node columns).
    """
    if len(kernels) == 0:
        return 0.0
    dx = np.asarray(solved["dx"], float) - np.asarray(kernels["dx"], float)
    dy = np.asarray(solved["dy"], float) - np.asarray(kernels["dy"], float)
    row, sample = np.unravel_index(np.nanargmax(np.hypot(dx, dy)), dx.shape)
    # the recorded column of the worst kernel is enough (the kernels change
    # smoothly along the scan, and each column costs a track computation)
    column = np.flatnonzero(np.asarray(kernels["x"]) == kernels["x"][row])
    kernels, solved = kernels[column], solved[column]
    worst = (int(np.searchsorted(column, row)), sample)
    dx, dy = dx[column], dy[column]
    size = np.hypot(dx[worst], dy[worst])
    direction = (dx[worst] / size, dy[worst] / size) if size > 0 else (1.0, 0.0)
    fit = solution.fit
    errors = fit.errors
    moves = []
    # the stars recorded at the column's positions: the solution's, whichever
    # parameter is moved (made once)
    sky = solution.sky_from_rectified(
        np.asarray(kernels["x"], dtype=float), np.asarray(kernels["y"], dtype=float)
    )
    for name in fit.names:
        offsets = dataclasses.replace(
            solution.offsets, **{name: getattr(solution.offsets, name) + errors[name]}
        )
        moved = solved_kernels(
            kernels,
            solution,
            nominal_model,
            frame,
            model=solution.model_for(offsets),
            sky=sky,
            nodes=nodes,
        )
        moves.append(
            direction[0] * (moved["dx"][worst] - solved["dx"][worst])
            + direction[1] * (moved["dy"][worst] - solved["dy"][worst])
        )
    sigma = np.sqrt(np.diag(fit.covariance))
    correlation = fit.covariance / np.outer(sigma, sigma)
    moves = np.asarray(moves, dtype=float)
    return float(np.sqrt(max(moves @ correlation @ moves, 0.0)))
