"""Where each rectified pixel comes from in the strip: the rectify mapping.

For a rectified pixel ``(x, y)`` the exact mapping is

    (x, y) -> ICRS (ra, dec) by the frame rotation
           -> strip (r, c) = TDIModel.recorded_centroid(ra, dec)

so a star's recorded centroid lands exactly on its catalogue position in the
rectified frame.  The recorded centroid needs a crossing window and a
quadrature per point, far too slow per pixel, but the mapping is smooth: it
is evaluated exactly on a coarse grid of nodes and interpolated.

* Nodes lie on a grid that is global for the night (multiples of
  ``step_x`` and ``step_y``), so every stretch that needs a node computes the
  same value and adjacent stretches agree.
* Across the scan (``y``) each column of nodes is interpolated with a
  not-a-knot cubic spline; along the scan (``x``) the mapping is
  ``r = x + a(x, y)`` with ``a`` nearly constant (one rectified column is one
  line time), interpolated with a 4-point cubic Lagrange rule.

:class:`StripMap` hands the rectify stage the offsets ``a(x, y) = r - x`` and
the columns ``c(x, y)`` on whole columns of output pixels, and their
derivatives for the Jacobian.
"""

from __future__ import annotations

import itertools
import math
from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    from astropy.table import Table

__all__ = [
    "StripMap",
    "column_windows",
    "crossing_after",
    "kernel_table",
    "map_nodes",
    "smear_kernels",
]


def crossing_after(model, x: float) -> float:
    """The ``after`` argument of the model's crossing searches for column ``x``.

    A star that lands in rectified column ``x`` leaves the chip near
    ``t = x * line_time`` (one rectified column is one line time and night row
    ``r`` is read at ``r * line_time``); asking for the first crossing that
    ends after half a crossing time earlier picks that transit and not the
    previous day's, while keeping the search inside the model's time range.
    """
    return (float(x) - 0.5 * model.n_rows) * model.line_time


def _lagrange4(t: np.ndarray) -> np.ndarray:
    """Cubic Lagrange weights of nodes -1, 0, 1, 2 at fraction ``t``; shape (4, ...)."""
    return np.stack(
        [
            -t * (t - 1.0) * (t - 2.0) / 6.0,
            (t + 1.0) * (t - 1.0) * (t - 2.0) / 2.0,
            -(t + 1.0) * t * (t - 2.0) / 2.0,
            (t + 1.0) * t * (t - 1.0) / 6.0,
        ]
    )


def _lagrange4_derivative(t: np.ndarray) -> np.ndarray:
    """d/dt of :func:`_lagrange4`."""
    return np.stack(
        [
            -(3.0 * t * t - 6.0 * t + 2.0) / 6.0,
            (3.0 * t * t - 4.0 * t - 1.0) / 2.0,
            -(3.0 * t * t - 2.0 * t - 2.0) / 2.0,
            (3.0 * t * t - 1.0) / 6.0,
        ]
    )


def _x_nodes(x_lo: float, x_hi: float, step_x: float) -> np.ndarray:
    """Node columns of a map serving rectified columns ``x_lo`` to ``x_hi``."""
    k0 = int(np.floor(x_lo / step_x)) - 1
    k1 = int(np.floor(x_hi / step_x)) + 2
    return np.arange(k0, k1 + 1) * float(step_x)


def _y_nodes(n_y: int, step_y: float) -> np.ndarray:
    """Node rows of a map of a frame ``n_y`` rows high."""
    return np.arange(-2, int(np.ceil((n_y - 1) / step_y)) + 3) * float(step_y)


def map_nodes(model, frame, ranges, nodes: dict, *, step_x: int = 256, step_y: int = 16) -> None:
    """Add to ``nodes`` the node columns of the maps of ``ranges`` it lacks.

    ``ranges``: the ``(x_lo, x_hi)`` of :class:`StripMap` s (of ``model``,
    ``frame`` and these steps) that will read ``nodes``.  Each node column is
    the recorded centroids of the sky at ``(x, y_nodes)``, ``(r - x, c)``,
    exactly as alone; the crossing searches of all of them are made
    together (:meth:`~pipeline.geometry.TDIModel.recorded_centroids`: a
    call of the model has a fixed cost of ~0.1 ms and a node column is a few
    hundred stars).
    """
    y_nodes = _y_nodes(frame.n_y, step_y)
    wanted = dict.fromkeys(xn for lo, hi in ranges for xn in _x_nodes(lo, hi, step_x))
    missing = [xn for xn in wanted if xn not in nodes]
    if not missing:
        return
    skies = [np.broadcast_arrays(*frame.icrs_from_pixel(xn, y_nodes)) for xn in missing]
    centroids = model.recorded_centroids(
        np.concatenate([ra.ravel() for ra, _ in skies]),
        np.concatenate([dec.ravel() for _, dec in skies]),
        [crossing_after(model, xn) for xn in missing],
        [ra.size for ra, _ in skies],
    )
    for xn, (ra, _), (r, c) in zip(missing, skies, centroids, strict=True):
        nodes[xn] = (r.reshape(ra.shape) - xn, c.reshape(ra.shape))


class StripMap:
    """Strip coordinates of rectified pixels for a range of ``x``.

    Parameters
    ----------
    model : pipeline.geometry.TDIModel
        Geometry of the night.
    frame : pipeline.geometry.rectified.RectifiedFrame
        The output grid.
    x_lo, x_hi : float
        Range of rectified columns ``x`` the map must serve.
    step_x, step_y : int
        Node spacing in rectified pixels along and across the scan.
    nodes : dict or None
        Node columns already computed, by ``x``: maps of the same model,
        frame and ``step_y`` share them (adjacent stretches' maps have nodes
        in common) and this map adds its own; None: computed here alone.

    Raises
    ------
    ValueError
        If the model cannot place a node (outside its field or time range).
    """

    def __init__(
        self,
        model,
        frame,
        x_lo: float,
        x_hi: float,
        *,
        step_x: int = 256,
        step_y: int = 16,
        nodes: dict | None = None,
    ) -> None:
        from scipy.interpolate import CubicSpline

        if step_x < 1 or step_y < 1:
            raise ValueError(
                f"map node steps must be positive pixels; got step_x={step_x}, step_y={step_y}."
            )
        if not x_hi >= x_lo:
            raise ValueError(f"x_hi must be >= x_lo; got x_lo={x_lo}, x_hi={x_hi}.")
        self.frame = frame
        self.step_x = int(step_x)
        self.step_y = int(step_y)
        self.x_nodes = _x_nodes(x_lo, x_hi, step_x)
        self._k0 = round(self.x_nodes[0] / self.step_x)  # the first node's index
        self.y_nodes = _y_nodes(frame.n_y, step_y)
        offsets = np.empty((self.x_nodes.size, self.y_nodes.size))
        columns = np.empty_like(offsets)
        nodes = {} if nodes is None else nodes
        map_nodes(model, frame, [(x_lo, x_hi)], nodes, step_x=step_x, step_y=step_y)
        for k, xn in enumerate(self.x_nodes):
            offsets[k], columns[k] = nodes[xn]
        if not (np.isfinite(offsets).all() and np.isfinite(columns).all()):
            raise ValueError(
                f"the TDI model cannot map rectified columns {x_lo:g}..{x_hi:g} (nodes "
                f"{self.x_nodes[0]:g}..{self.x_nodes[-1]:g}): they fall outside the model's "
                "time range or field; build the model over the whole night."
            )
        self.node_offsets = offsets
        self.node_columns = columns
        self._a_spline = CubicSpline(self.y_nodes, offsets, axis=1)
        self._c_spline = CubicSpline(self.y_nodes, columns, axis=1)
        y = np.arange(frame.n_y, dtype=float)
        self._a = self._a_spline(y)  # (n_xnodes, n_y)
        self._c = self._c_spline(y)

    # ------------------------------------------------------------- helpers
    def _stencil(self, x: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Node index of the stencil start, weights and d/dx weights for ``x``."""
        u = np.asarray(x, dtype=float) / self.step_x
        base = np.floor(u).astype(np.intp)
        t = u - base
        first = base - 1 - self._k0
        if np.any(first < 0) or np.any(first + 3 >= self.x_nodes.size):
            raise ValueError(
                f"x outside the map's range {self.x_nodes[1]:g}..{self.x_nodes[-2]:g}; "
                "build the StripMap over the columns you need."
            )
        return first, _lagrange4(t), _lagrange4_derivative(t) / self.step_x

    def _along(self, table: np.ndarray, x: float, order: int = 0) -> np.ndarray:
        """``order``-th x-derivative of the interpolant of ``table[k, y]`` at scalar ``x``."""
        u = float(x) / self.step_x
        base = math.floor(u)
        t = u - base
        first = base - 1 - self._k0
        if first < 0 or first + 3 >= self.x_nodes.size:
            self._stencil(x)  # raises the out-of-range error
        if order == 0:
            weights = (
                -t * (t - 1.0) * (t - 2.0) / 6.0,
                (t + 1.0) * (t - 1.0) * (t - 2.0) / 2.0,
                -(t + 1.0) * t * (t - 2.0) / 2.0,
                (t + 1.0) * t * (t - 1.0) / 6.0,
            )
        elif order == 1:
            h = 1.0 / self.step_x
            weights = (
                -(3.0 * t * t - 6.0 * t + 2.0) / 6.0 * h,
                (3.0 * t * t - 4.0 * t - 1.0) / 2.0 * h,
                -(3.0 * t * t - 2.0 * t - 2.0) / 2.0 * h,
                (3.0 * t * t - 1.0) / 6.0 * h,
            )
        else:  # second derivative of the cubic through the 4 nodes
            h2 = 1.0 / self.step_x**2
            weights = (-(t - 1.0) * h2, (3.0 * t - 2.0) * h2, -(3.0 * t - 1.0) * h2, t * h2)
        rows = table[first : first + 4]
        return (
            weights[0] * rows[0]
            + weights[1] * rows[1]
            + weights[2] * rows[2]
            + weights[3] * rows[3]
        )

    # ---------------------------------------------------------------- API
    def offsets(self, x: float) -> np.ndarray:
        """``a(x, y) = r(x, y) - x`` at column ``x`` for every output row ``y``; shape (n_y,)."""
        return self._along(self._a, x)

    def offsets_dx(self, x: float) -> np.ndarray:
        """``d a / d x`` at column ``x`` for every output row; shape (n_y,)."""
        return self._along(self._a, x, 1)

    def columns(self, x: float) -> np.ndarray:
        """Strip column ``c(x, y)`` at column ``x`` for every output row ``y``; shape (n_y,)."""
        return self._along(self._c, x)

    def columns_for_row(self, row: float) -> np.ndarray:
        """Strip column sampled by each output row ``y`` along strip row ``row``.

        Solves ``x + a(x, y) = row`` for ``x`` per ``y`` and returns
        ``c(x, y)``; shape (n_y,).  Uses Taylor expansions about ``x = row``:
        ``a`` changes by ~1e-5 px per px and the solution lies within a few
        pixels of ``row``, so the neglected terms are far below 1e-6 px.
        """
        a0 = self._along(self._a, row)
        step = -a0 / (1.0 + self._along(self._a, row, 1))
        c = self._along(self._c, row)
        c_x = self._along(self._c, row, 1)
        c_xx = self._along(self._c, row, 2)
        return c + step * (c_x + 0.5 * step * c_xx)

    def __call__(self, x: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Strip ``(r, c)`` of rectified pixels at arbitrary ``(x, y)``.

        Parameters
        ----------
        x, y : ndarray
            Rectified pixel coordinates (broadcast together).

        Returns
        -------
        r, c : ndarray
            Strip row (scan axis) and column, pixels.
        """
        x, y = np.broadcast_arrays(np.asarray(x, dtype=float), np.asarray(y, dtype=float))
        first, w, _ = self._stencil(x)
        a_nodes = self._a_spline(y)  # (n_xnodes,) + y.shape
        c_nodes = self._c_spline(y)
        idx = np.indices(x.shape)
        a = sum(w[j] * a_nodes[(first + j, *idx)] for j in range(4))
        c = sum(w[j] * c_nodes[(first + j, *idx)] for j in range(4))
        return x + a, c

    def jacobian(self, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        """Matrix ``d(r, c) / d(x, y)`` at rectified pixels; shape (..., 2, 2)."""
        x, y = np.broadcast_arrays(np.asarray(x, dtype=float), np.asarray(y, dtype=float))
        first, w, dw = self._stencil(x)
        idx = np.indices(x.shape)
        out = np.empty((*x.shape, 2, 2))
        for row, spline, plus in ((0, self._a_spline, 1.0), (1, self._c_spline, 0.0)):
            nodes = spline(y)
            nodes_y = spline(y, 1)
            out[..., row, 0] = plus + sum(dw[j] * nodes[(first + j, *idx)] for j in range(4))
            out[..., row, 1] = sum(w[j] * nodes_y[(first + j, *idx)] for j in range(4))
        return out


def smear_kernels(
    model,
    frame,
    strip_map: StripMap,
    x: np.ndarray,
    y: np.ndarray,
    n_samples: int = 64,
    sky: tuple[np.ndarray, np.ndarray] | None = None,
    windows: list | None = None,
) -> Table:
    """The smear kernel at rectified positions, in rectified pixels.

    The kernel of a star is its strip track (:meth:`TDIModel.track`, uniform
    in time) relative to its mean, turned into rectified pixel offsets with
    the local inverse Jacobian of the map.  A star's recorded image is the
    seeing PSF averaged over the kernel's samples.

    Parameters
    ----------
    model : pipeline.geometry.TDIModel
        Geometry of the night.
    frame : pipeline.geometry.rectified.RectifiedFrame
        The output grid.
    strip_map : StripMap
        Must cover ``x``.
    x, y : ndarray, shape (n,)
        Rectified (night) pixel positions.
    n_samples : int
        Time samples per kernel.
    sky : (ndarray, ndarray) or None
        ICRS (ra, dec) [deg] of the stars ``model`` records at ``(x, y)``
        when ``model`` is not the geometry ``frame`` and ``strip_map`` were
        made with (a solved geometry: the kernels of the true tracks on the
        grid rectify resampled with the nominal one); None: the frame's sky
        at ``(x, y)``.
    windows : list or None
        :func:`column_windows` of these positions, if made already (e.g. with
        other stretches'); None: made here.

    Returns
    -------
    astropy.table.Table
        One row per position: ``x``, ``y`` (night rectified pixels), ``dx``,
        ``dy`` (shape ``(n_samples,)``: offsets of equal-time samples from the
        kernel's mean, rectified pixels; ``dx`` along the scan), ``length``
        (``max(dx) - min(dx)``), ``bow`` (``max(dy) - min(dy)``),
        ``lattice_x`` and ``lattice_y`` (the strip's pixel centres lie at
        these offsets modulo 1 from the rectified pixel centres, along x and
        y; unwrapped, so they interpolate) and ``row_step`` (the length
        along x of one strip row: the TDI clocking top-hat).
    """
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    dx = np.empty((x.size, n_samples))
    dy = np.empty((x.size, n_samples))
    ra, dec = frame.icrs_from_pixel(x, y) if sky is None else sky
    inverse = np.linalg.inv(strip_map.jacobian(x, y))
    if windows is None:
        (windows,) = column_windows(model, [(x, ra, dec)])
    for value, (t0, t1) in zip(np.unique(x), windows, strict=True):
        sel = np.flatnonzero(x == value)
        track = model.track_in_window(ra[sel], dec[sel], t0, t1, n_samples)
        dr = track.r - track.r.mean(axis=1, keepdims=True)
        dc = track.c - track.c.mean(axis=1, keepdims=True)
        inv = inverse[sel]
        dx[sel] = inv[:, 0, 0, None] * dr + inv[:, 0, 1, None] * dc
        dy[sel] = inv[:, 1, 0, None] * dr + inv[:, 1, 1, None] * dc
    # Where the strip's pixel centres fall between the rectified ones: the two
    # resampling passes interpolate at these offsets (their cubic kernel blurs
    # a star's core by an amount that depends on them), and one line of TDI
    # clocking (the charge steps one row while the image moves continuously:
    # a top-hat of one strip row along the scan) spans ``row_step`` along x.
    r, c = strip_map(x, y)
    sign_c = np.sign(strip_map.jacobian(x, y)[:, 1, 1])
    return kernel_table(
        x,
        y,
        dx,
        dy,
        n_samples,
        "TDI smear kernel: equal-time samples of a star's track relative to its mean, "
        "in rectified pixels (dx along the scan, east; dy north). A star's image is the "
        "seeing PSF averaged over the samples.",
        lattice_x=x - r,
        lattice_y=y - sign_c * c,
        row_step=np.abs(inverse[:, 0, 0]),
    )


def column_windows(model, positions) -> list[list[tuple[np.ndarray, np.ndarray]]]:
    """The crossing windows :func:`smear_kernels` samples, of several sets of positions at once.

    ``positions``: ``(x, ra, dec)`` of each set (night rectified columns, the
    stars recorded there, degrees).  Per set, the
    :meth:`~pipeline.geometry.TDIModel.crossing_window` ``(t_enter, t_exit)``
    of the stars of each of its columns (``np.unique(x)``, in order), with the
    crossing :func:`crossing_after` the column picks: each what the column's
    stars get alone, searched together
    (:meth:`~pipeline.geometry.TDIModel.crossing_windows`; a kernel record
    has a few columns of ~130 stars, and each model call a fixed cost).
    The tracks themselves are sampled column by column, as they are used
    (:meth:`~pipeline.geometry.TDIModel.track_in_window`): a night's kernel
    tracks held at once would be tens of MB.
    """
    columns = []
    for x, ra, dec in positions:
        columns.append([(value, np.flatnonzero(x == value), ra, dec) for value in np.unique(x)])
    flat = [column for per_set in columns for column in per_set]
    sizes = [sel.size for _, sel, _, _ in flat]
    t_enter, t_exit = model.crossing_windows(
        np.concatenate([ra[sel] for _, sel, ra, _ in flat]) if flat else np.empty(0),
        np.concatenate([dec[sel] for _, sel, _, dec in flat]) if flat else np.empty(0),
        [crossing_after(model, value) for value, _, _, _ in flat],
        sizes,
    )
    windows = iter(
        (t_enter[lo:hi], t_exit[lo:hi]) for lo, hi in itertools.pairwise(np.cumsum([0, *sizes]))
    )
    return [[next(windows) for _ in per_set] for per_set in columns]


def kernel_table(x, y, dx, dy, n_samples: int, description: str, **more) -> Table:
    """A ``smear_kernels`` table: kernels ``dx``, ``dy`` (pixels) at ``(x, y)``.

    Adds each kernel's ``length`` and ``bow`` (its extent along ``x`` and
    ``y``); ``more`` are further per-position columns, all in pixels, as the
    detect stage reads them.
    """
    from astropy.table import Table

    table = Table(
        {
            "x": x,
            "y": y,
            "dx": dx,
            "dy": dy,
            "length": dx.max(axis=1) - dx.min(axis=1),
            "bow": dy.max(axis=1) - dy.min(axis=1),
            **more,
        }
    )
    for name in table.colnames:
        table[name].unit = "pix"
    table.meta["description"] = description
    table.meta["n_samples"] = int(n_samples)
    return table
