"""Resample one calibrated image onto a tile, conserving flux.

Values are electrons per pixel (not surface brightness), so the resampled
value is the interpolated input density times the number of input pixels per
output pixel (the Jacobian of the pixel mapping).

Method: two separable passes (Catmull & Smith 1980, SIGGRAPH 14, 279)
    The mapping from tile pixel ``(X, Y)`` to input pixel ``(x, y)`` is split
    into two 1-D resamplings with the Keys cubic-convolution kernel of the
    rectify stage (:func:`pipeline.stages.rectify._resample.keys_weights`):

    1. along ``x`` for every input row ``y``: ``T[y, X] = I[y, x*(X, y)]``, where
       ``x*`` is the input column at which tile column ``X`` crosses input
       row ``y``;
    2. along ``y`` for every tile column ``X``: ``O[Y, X] = T[y(X, Y), X]``.

    The decomposition is exact for any smooth invertible mapping, and the
    product of the two passes' Jacobians (``dx*/dX`` at fixed ``y``, ``dy/dY``
    at fixed ``X``) is the full Jacobian, so flux is conserved.  Every night's
    frame differs from a tile's by a small rotation and scale, but the
    rotation itself changes across a tile (meridians converge: ~0.7 deg from
    edge to edge of a 1-degree tile at declination 50 deg), so every pixel
    gets its own sampling position and weights.  The mapping is evaluated
    exactly (astropy WCS) on nodes every 32 px, interpolated by bicubic
    splines, and inverted along columns for pass 1.  Axes may be flipped (the
    rectified frame has east to the right); axes turned by more than ~20 deg
    from the tile's are refused (the two-pass method loses resolution there).
Coarser tiles
    A pass whose step ``J`` (input pixels per output pixel, its Jacobian)
    exceeds 1 samples the input every ``J`` pixels, and the pixels between
    the samples hardly count: a star's sky-limited flux error grew 1.49
    times over the night's on a tile of 1.92 night pixels (0.516 arcsec
    nights on 1 arcsec tiles), 1.06 times at 1.33.  Beyond
    ``STRETCH_FROM`` (0.9, :mod:`pipeline.mosaic._resample_jit`: from
    there the taps' blur, which follows the phase at which each star is
    sampled, swings a tile's PSF fluxes by several per cent at steps near
    1) the input is averaged over the output pixel instead, as
    anti-aliasing filters do (common practice): weights ``J B(d / J) / sum
    B(d / J)`` over the input pixels within ``2 J`` (``d`` the distance in
    input pixels), ``B`` the cubic B-spline, which is non-negative (no
    ringing around a star), weighs every input pixel evenly to 0.2 % and,
    normalised, keeps a flat input flat.  The flux error is then 1.12 times
    the night's at steps of 1.33-1.92 (the star blurred by the output pixel,
    the noise correlated over it), 1.01-1.03 on a tile of the night's pixels.  A
    co-added star is the night's star convolved with the B-spline one tile
    pixel wide, which the tile catalogue's seeing model holds
    (:class:`pipeline.mosaic._kernels.SeeingMix`).  Tiles finer than 0.9
    night pixels keep the taps: the phase turns within a star there.
Variance and flags
    Variance is propagated as ``sum(w**2 var)``: exact per pixel for
    independent input pixels, since each pass acts along its own axis.  Flags
    are the OR of every input pixel with non-zero weight, plus
    :attr:`~pipeline.masks.MaskBit.OUTSIDE` where a tap falls beyond the input;
    pixels with a no-data bit are NaN.
Compiled loops
    Both passes run in numba (:mod:`pipeline.mosaic._resample_jit`,
    compiled on first use and cached).  They evaluate the position splines
    one output line at a time instead of storing them for the whole tile, and
    pass 2 writes its pixels straight into the caller's planes
    (:func:`merge_onto_tile` merges them into a night's tile planes for the
    co-add); pass 1's planes are the only intermediate.
    ``tests/_mosaic_reference.py`` keeps the numpy passes, with stored
    positions and a separate merge, that they are checked against.
Noise correlation
    Neighbouring output pixels share input pixels, so the variance of an
    aperture sum differs from the sum of the variance plane over it.
    :class:`ResampledImage` carries ``noise_correlation``, that ratio for a
    large aperture: the input's own factor (rectify's ``NOISECOR``) times
    ``J c_1 c_2 / mean(sum w_1**2 sum w_2**2)`` (``J`` input pixels per
    output pixel, the sums over each pass's weights with their Jacobians,
    ``c_k`` the mean square of the weight an input pixel gives all output
    pixels together along pass ``k``, :func:`_uneven_sampling`: ~1 where
    the input is averaged, for uncorrelated input noise), and
    ``pixel_factor``, the true variance of a pixel over the variance plane:
    1 for uncorrelated input noise.  A tile averaging its nights' pixels
    correlates its own: the large-aperture factor is ~4.4 at a step of 1.92
    (0.80 when the night was sampled every 1.92 pixels), of which a star fit
    sees ~0.75 (:func:`star_noise_ratio`).
"""

from __future__ import annotations

import logging
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
from astropy.wcs import WCS

from pipeline.masks import MASK_DTYPE, MaskBit
from pipeline.mosaic._tiles import Tile
from pipeline.stages.rectify import NO_DATA_BITS
from pipeline.stages.rectify._resample import _cleaned

if TYPE_CHECKING:
    from scipy.interpolate import RectBivariateSpline

__all__ = ["ResampledImage", "merge_onto_tile", "resample_to_tile"]

log = logging.getLogger(__name__)

#: Spacing of the nodes on which the mapping is evaluated exactly, px.
_NODE_STEP = 32
#: Spacing of the grid on which pass 1's sampling positions are computed, px.
_GRID_STEP = 16
#: Largest |shear| (tan of the turn between input and tile axes) accepted: 20 deg.
_MAX_SHEAR = 0.364
#: Reach of the 4-tap kernel beyond the sampled coordinate, px (the average
#: over an output pixel of J input pixels reaches 2 J: :attr:`_Mapping.reach`).
_REACH = 3


@dataclass(frozen=True, eq=False)
class ResampledImage:
    """A calibrated image resampled onto (part of) a tile.

    Attributes
    ----------
    image : ndarray, shape (n_y, n_x)
        Electrons per tile pixel (float32); NaN without data.
    variance : ndarray, shape (n_y, n_x)
        e^2, propagated as ``sum(w**2 var)`` (see the module docstring).
    flags : ndarray of uint16, shape (n_y, n_x)
        OR of the :class:`~pipeline.masks.MaskBit` flags of the contributing
        input pixels.
    y_start, x_start : int
        Tile pixel of ``image[0, 0]``: the arrays cover the bounding box of
        the input's footprint on the tile.
    pixel_factor : float
        True variance of a pixel divided by the variance plane.
    noise_correlation : float
        Variance of a large aperture sum divided by the sum of the variance
        plane over it.
    """

    image: np.ndarray
    variance: np.ndarray
    flags: np.ndarray
    y_start: int
    x_start: int
    pixel_factor: float
    noise_correlation: float

    @property
    def slices(self) -> tuple[slice, slice]:
        """Slices of the tile covered by the arrays."""
        n_y, n_x = self.image.shape
        return (
            slice(self.y_start, self.y_start + n_y),
            slice(self.x_start, self.x_start + n_x),
        )


def _extrapolated(x: np.ndarray, xp: np.ndarray, fp: np.ndarray) -> np.ndarray:
    """``np.interp`` that continues the end segments linearly (``xp`` increasing)."""
    out = np.interp(x, xp, fp)
    lo, hi = x < xp[0], x > xp[-1]
    out[lo] = fp[0] + (x[lo] - xp[0]) * (fp[1] - fp[0]) / (xp[1] - xp[0])
    out[hi] = fp[-1] + (x[hi] - xp[-1]) * (fp[-1] - fp[-2]) / (xp[-1] - xp[-2])
    return out


def _input_pixels(tile: Tile, wcs: WCS, x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Input pixel ``(x, y)`` (stacked on axis 0) of tile pixels ``(x, y)``."""
    world = tile.wcs.pixel_to_world_values(x, y)
    out = np.array([np.asarray(a, float) for a in wcs.world_to_pixel_values(*world)])
    if not np.isfinite(out).all():
        raise ValueError(
            "the input's WCS cannot map every point near the tile; the input lies too far "
            "from the tile (more than 90 deg) for this resampler."
        )
    return out


@dataclass(frozen=True)
class _Mapping:
    """Tile pixel -> input pixel, as bicubic splines over exact nodes (axes flipped as needed).

    ``shear`` is the largest ``|dy/dX / dy/dY|`` or ``|dx/dY / dx/dX|`` over
    the tile: how far a tile row or column strays across the input's.
    """

    x: RectBivariateSpline
    y: RectBivariateSpline
    flip_x: bool
    flip_y: bool
    shear: float
    steps: tuple[float, float] = (1.0, 1.0)

    @property
    def reach(self) -> tuple[int, int]:
        """Taps' reach beyond a sampling position along the input's x and y, px."""
        from pipeline.mosaic._resample_jit import STRETCH_FROM

        return tuple(
            _REACH if s <= STRETCH_FROM else max(_REACH, int(np.ceil(2.0 * s)) + 1)
            for s in self.steps
        )

    @classmethod
    def build(cls, tile: Tile, wcs: WCS, input_shape: tuple[int, int]) -> _Mapping:
        from scipy.interpolate import RectBivariateSpline

        n_y, n_x = tile.shape
        # Local derivatives on a coarse 9 x 9 grid (the turn changes across a tile).
        gx, gy = np.meshgrid(np.linspace(0, n_x - 1, 9), np.linspace(0, n_y - 1, 9))
        h = 0.5 * _NODE_STEP
        dx = (_input_pixels(tile, wcs, gx + h, gy) - _input_pixels(tile, wcs, gx - h, gy)) / (2 * h)
        dy = (_input_pixels(tile, wcs, gx, gy + h) - _input_pixels(tile, wcs, gx, gy - h)) / (2 * h)
        shear = float(max(np.max(np.abs(dx[1] / dy[1])), np.max(np.abs(dy[0] / dx[0]))))
        if shear > _MAX_SHEAR or np.ptp(np.sign(dx[0])) or np.ptp(np.sign(dy[1])):
            angle = np.degrees(np.arctan(shear))
            raise ValueError(
                f"the input's pixel axes are turned by up to ~{angle:.1f} deg from the tile's; "
                f"the separable resampler handles up to {np.degrees(np.arctan(_MAX_SHEAR)):.0f} "
                "deg (a rectified night and a north-up tile differ by about a degree at most)."
            )
        flip_x, flip_y = bool(dx[0].flat[0] < 0), bool(dy[1].flat[0] < 0)
        pad_x = int(2 * shear * n_y) + 4 * _NODE_STEP
        pad_y = int(2 * shear * n_x) + 4 * _NODE_STEP
        xn = np.arange(-pad_x, n_x + pad_x + _NODE_STEP, _NODE_STEP, dtype=float)
        yn = np.arange(-pad_y, n_y + pad_y + _NODE_STEP, _NODE_STEP, dtype=float)
        x, y = _input_pixels(tile, wcs, *np.meshgrid(xn, yn))
        if flip_x:
            x = input_shape[1] - 1 - x
        if flip_y:
            y = input_shape[0] - 1 - y
        splines = RectBivariateSpline(yn, xn, x), RectBivariateSpline(yn, xn, y)
        # the largest steps along each pass (an average over an output pixel reaches 2 steps)
        steps = float(np.max(np.abs(dx[0]))), float(np.max(np.abs(dy[1])))
        return cls(*splines, flip_x, flip_y, shear, steps)


def _covered_box(mapping: _Mapping, tile: Tile, input_shape) -> tuple[int, int, int, int] | None:
    """Tile pixel box ``(y0, y1, x0, x1)`` whose mapping lands on the input (None: none)."""
    n_y, n_x = tile.shape
    ys = np.append(np.arange(0, n_y, _GRID_STEP), n_y - 1).astype(float)
    xs = np.append(np.arange(0, n_x, _GRID_STEP), n_x - 1).astype(float)
    x, y = mapping.x(ys, xs), mapping.y(ys, xs)
    reach_x, reach_y = (r + 0.5 for r in mapping.reach)
    inside = (
        (x > -reach_x)
        & (x < input_shape[1] - 1 + reach_x)
        & (y > -reach_y)
        & (y < input_shape[0] - 1 + reach_y)
    )
    if not inside.any():
        return None
    rows, cols = np.flatnonzero(inside.any(axis=1)), np.flatnonzero(inside.any(axis=0))
    y0 = max(int(ys[rows[0]]) - _GRID_STEP, 0)
    y1 = min(int(ys[rows[-1]]) + _GRID_STEP + 1, n_y)
    x0 = max(int(xs[cols[0]]) - _GRID_STEP, 0)
    x1 = min(int(xs[cols[-1]]) + _GRID_STEP + 1, n_x)
    return y0, y1, x0, x1


@dataclass(frozen=True, eq=False)
class _SplineGrid:
    """A tensor-product spline on a grid, kept as ``B @ table``.

    ``B`` (CSR: ``indptr``, ``indices``, ``data``) holds the B-spline basis
    along the grid's lines (a few non-zero terms per line), ``table`` the
    spline's coefficients already combined with the basis along them, shape
    (n_basis, n_columns).  The resampling passes evaluate it one line at a
    time; :meth:`values` gives the whole grid.
    """

    indptr: np.ndarray
    indices: np.ndarray
    data: np.ndarray
    table: np.ndarray

    @property
    def arrays(self) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        return self.indptr, self.indices, self.data, self.table

    @property
    def shape(self) -> tuple[int, int]:
        return self.indptr.size - 1, self.table.shape[1]

    def values(self) -> np.ndarray:
        """The spline on the whole grid, shape (n_lines, n_columns), float64."""
        from pipeline.mosaic._resample_jit import tensor_grid

        return tensor_grid(*self.arrays)


def _spline_grid(spline: RectBivariateSpline, x: np.ndarray, y: np.ndarray) -> _SplineGrid:
    """``spline`` on the grid ``x`` by ``y`` (lines along ``x``), as a :class:`_SplineGrid`."""
    from scipy.interpolate import BSpline

    tx, ty, coefficients = spline.tck
    kx, ky = spline.degrees
    coefficients = coefficients.reshape(tx.size - kx - 1, ty.size - ky - 1)
    basis_x = BSpline.design_matrix(np.asarray(x, float), tx, kx, extrapolate=True).tocsr()
    basis_y = BSpline.design_matrix(np.asarray(y, float), ty, ky, extrapolate=True)
    table = np.ascontiguousarray((basis_y @ coefficients.T).T)
    return _SplineGrid(basis_x.indptr, basis_x.indices, basis_x.data, table)


def _grid_values(spline: RectBivariateSpline, x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """``spline(x, y)`` on the grid ``x`` by ``y`` (the tensor product of B-spline bases)."""
    return _spline_grid(spline, x, y).values()


def _constant_grid(value: float, n_lines: int, n_columns: int) -> _SplineGrid:
    """A :class:`_SplineGrid` equal to ``value`` everywhere."""
    return _SplineGrid(
        np.arange(n_lines + 1, dtype=np.int32),
        np.zeros(n_lines, np.int32),
        np.ones(n_lines),
        np.full((1, n_columns), float(value)),
    )


def _grid_nodes(first: int, last: int) -> np.ndarray:
    """Every ``_GRID_STEP``-th pixel from ``first``, and ``last``."""
    return np.append(np.arange(first, last, _GRID_STEP), last).astype(float)


def _crossing_grid(
    mapping: _Mapping, rows: np.ndarray, columns: np.ndarray, y_range: tuple[float, float]
) -> tuple[_SplineGrid, float, float]:
    """Input column ``x*(X, y)`` at which tile column ``X`` crosses input row ``y``.

    Exact (spline) on a grid every ``_GRID_STEP`` px, interpolated bicubically
    to ``rows`` x ``columns``.  Returns the grid and the least and largest
    value on its nodes.
    """
    from scipy.interpolate import RectBivariateSpline

    y_nodes = _grid_nodes(rows[0], rows[-1])
    x_nodes = _grid_nodes(columns[0], columns[-1])
    fine = np.arange(y_range[0], y_range[1] + 4.0, 4.0)
    along = mapping.y(fine, x_nodes)  # input row of tile (X, Y) on a fine Y grid
    crossing = np.empty((y_nodes.size, x_nodes.size))
    for j, column in enumerate(x_nodes):
        tile_rows = _extrapolated(y_nodes, along[:, j], fine)
        crossing[:, j] = mapping.x.ev(tile_rows, np.full_like(tile_rows, column))
    lo, hi = float(crossing.min()), float(crossing.max())
    if y_nodes.size < 4 or x_nodes.size < 4:
        degree = (min(3, y_nodes.size - 1), min(3, x_nodes.size - 1))
    else:
        degree = (3, 3)
    if min(degree) < 1:
        return _constant_grid(crossing[0, 0], rows.size, columns.size), lo, hi
    spline = RectBivariateSpline(y_nodes, x_nodes, crossing, kx=degree[0], ky=degree[1])
    return _spline_grid(spline, rows, columns), lo, hi


def _crossing_columns(
    mapping: _Mapping, rows: np.ndarray, columns: np.ndarray, y_range: tuple[float, float]
) -> np.ndarray:
    """:func:`_crossing_grid`'s values on the whole grid, shape (rows.size, columns.size)."""
    return _crossing_grid(mapping, rows, columns, y_range)[0].values()


#: Pixels added beyond the extreme sampling positions found on the nodes
#: every ``_GRID_STEP`` px when cropping the input: the mappings are affine to
#: ~1e-3 px over a tile (their extremes lie on the box's corners, which are
#: nodes), so one pixel is ample; a wider crop changes no output value.
_CROP_MARGIN = 1


@dataclass(frozen=True, eq=False)
class _Plan:
    """What the two passes need: where they sample, and the input crop they read.

    ``box`` is the tile pixel box ``(y0, y1, x0, x1)``; pass 1 fills input
    rows ``t_lo:t_hi`` (columns ``x_lo:x_hi`` of the oriented input) at
    positions ``crossing - x_lo``; pass 2 samples them at ``rows - t_lo``.
    With a core, ``core_columns`` is the input column of every tile pixel and
    ``core_box`` the core in the oriented input's pixels.
    """

    mapping: _Mapping
    box: tuple[int, int, int, int]
    t_lo: int
    t_hi: int
    x_lo: int
    x_hi: int
    rows: _SplineGrid
    crossing: _SplineGrid
    core_columns: _SplineGrid | None
    core_box: tuple[float, float, float, float]


def _plan(shape: tuple[int, int], wcs: WCS, tile: Tile, core) -> _Plan | None:
    """The sampling of an input of ``shape`` onto ``tile``; None if it misses the tile."""
    mapping = _Mapping.build(tile, wcs, shape)
    box = _covered_box(mapping, tile, shape)
    if box is None:
        return None
    y0, y1, x0, x1 = box
    n_rows, n_cols = shape
    reach_x, reach_y = mapping.reach
    ys, xs = np.arange(y0, y1), np.arange(x0, x1)
    # Pass 2's positions: the input row of every tile pixel; its extremes from the nodes.
    on_nodes = mapping.y(_grid_nodes(y0, y1 - 1), _grid_nodes(x0, x1 - 1))
    t_lo = max(int(np.floor(on_nodes.min())) - reach_y - _CROP_MARGIN, 0)
    t_hi = min(int(np.ceil(on_nodes.max())) + reach_y + _CROP_MARGIN + 1, n_rows)
    if t_hi <= t_lo:
        return None
    # Pass 1's positions: where each tile column crosses each input row.
    pad = 1.5 * mapping.shear * (x1 - x0) + 2 * _NODE_STEP
    crossing, lo, hi = _crossing_grid(mapping, np.arange(t_lo, t_hi), xs, (y0 - pad, y1 + pad))
    x_lo = max(int(np.floor(lo)) - reach_x - _CROP_MARGIN, 0)
    x_hi = min(int(np.ceil(hi)) + reach_x + _CROP_MARGIN + 1, n_cols)
    if x_hi <= x_lo:
        return None
    core_columns, core_box = None, (0.0, 0.0, 0.0, 0.0)
    if core is not None:
        y_lo, y_hi, c_lo, c_hi = (float(c) for c in core)
        if mapping.flip_y:
            y_lo, y_hi = n_rows - 1 - y_hi, n_rows - 1 - y_lo
        if mapping.flip_x:
            c_lo, c_hi = n_cols - 1 - c_hi, n_cols - 1 - c_lo
        core_columns, core_box = _spline_grid(mapping.x, ys, xs), (y_lo, y_hi, c_lo, c_hi)
    rows = _spline_grid(mapping.y, ys, xs)
    return _Plan(mapping, box, t_lo, t_hi, x_lo, x_hi, rows, crossing, core_columns, core_box)


def _input_planes(plan: _Plan, image, variance, flags) -> tuple[np.ndarray, ...]:
    """The oriented input's crop that pass 1 reads: finite float32, uint16 flags."""
    if plan.mapping.flip_x:
        image, variance, flags = image[:, ::-1], variance[:, ::-1], flags[:, ::-1]
    if plan.mapping.flip_y:
        image, variance, flags = image[::-1], variance[::-1], flags[::-1]
    crop = np.s_[plan.t_lo : plan.t_hi, plan.x_lo : plan.x_hi]
    return _cleaned(
        image[crop],
        variance[crop],
        flags[crop].astype(MASK_DTYPE, copy=False),
        int(MaskBit.NONFINITE),
        np.dtype(np.float32),
    )


class _Scratch:
    """Pass 1's output planes, kept between calls (fresh memory costs page faults)."""

    def __init__(self) -> None:
        self._buffers = (np.empty(0, np.float32), np.empty(0, np.float32), np.empty(0, MASK_DTYPE))

    def planes(self, shape: tuple[int, int]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        size = shape[0] * shape[1]
        if self._buffers[0].size < size:
            self._buffers = tuple(np.empty(size, b.dtype) for b in self._buffers)
        return tuple(b[:size].reshape(shape) for b in self._buffers)


def _run_passes(plan: _Plan, planes_in, planes_out, origin, factor, merge, scratch):
    """Both passes; pass 2 stores into (or merges into) ``planes_out`` at ``origin``.

    Returns the means over each pass's output of the sum of the squared
    weights and of the Jacobian, the pixels taken and the sum of their
    ``1 / variance`` (merging).
    """
    # numba is imported on first use (loading it and the cached machine code
    # takes about a second, which a run without a mosaic should not pay)
    from pipeline.mosaic._resample_jit import resample_columns, resample_rows

    outside = MASK_DTYPE.type(int(MaskBit.OUTSIDE))
    between = (scratch or _Scratch()).planes(plan.crossing.shape)
    w2_1, jacobian1 = resample_rows(
        *planes_in, plan.crossing.arrays, float(plan.x_lo), outside, *between
    )
    use_core = plan.core_columns is not None
    settings = (outside, MASK_DTYPE.type(int(NO_DATA_BITS)), use_core, np.float32(factor), merge)
    w2_2, jacobian2, taken, inverse = resample_columns(
        *between,
        plan.rows.arrays,
        float(plan.t_lo),
        (plan.core_columns if use_core else plan.rows).arrays,
        plan.core_box,
        settings,
        tuple(planes_out),
        origin,
    )
    size1, size2 = max(between[0].size, 1), max(plan.rows.shape[0] * plan.rows.shape[1], 1)
    return w2_1 / size1, jacobian1 / size1, w2_2 / size2, jacobian2 / size2, taken, inverse


def _cubic_bspline(t: np.ndarray) -> np.ndarray:
    """The cubic B-spline at distances ``t`` (as the compiled passes' ``_cubic_bspline``)."""
    t = np.abs(t)
    return np.where(
        t < 1.0, 2.0 / 3.0 - t * t + 0.5 * t**3, np.where(t < 2.0, (2.0 - t) ** 3 / 6.0, 0.0)
    )


def _uneven_sampling(step: float, n_phases: int = 512) -> float:
    """Mean square of the weight one input pixel gives all output pixels together (one axis).

    An input pixel ``u`` from a sample counts ``c(u) = sum_m w(u + m
    step)`` times in a large aperture's sum, ``w`` the weight a sample
    gives an input pixel at that distance.  ``c`` averages 1 (flux is
    conserved), and the aperture's variance is ``mean(c**2)`` times that of
    even weights (``sum(c**2 var)``).  Up to ``STRETCH_FROM``
    (:mod:`pipeline.mosaic._resample_jit`) ``w`` is the Keys kernel ``K``
    times ``step``: ``c`` is 1 at every phase for ``step`` 1 or 1/n (the
    kernel's partition of unity), and sampling more sparsely counts the
    pixels at the samples for more than those between (``mean(c**2)``
    1.008 at a step of 1.33, 1.05 at 1.5, 1.40 at 1.92).  Beyond it, the
    average over the output pixel, ``step B(d / step) / sum_i B((i - p) /
    step)``, weighs every pixel evenly to 0.2 % (``mean(c**2)`` 1 + 1e-6).
    The mean over ``n_phases`` phases, spread evenly over ``[0, step)`` (the
    samples' phases on the input's pixels).
    """
    from pipeline.mosaic._resample_jit import STRETCH_FROM
    from pipeline.stages.detect._model import _keys

    step = float(step)
    if not step > 0:
        return 1.0
    phases = (np.arange(n_phases) + 0.5) / n_phases * step
    if step <= STRETCH_FROM:
        reach = int(np.ceil(2.0 / step)) + 1
        samples = np.arange(-reach, reach + 1) * step
        counts = step * _keys(phases[:, None] + samples[None, :]).sum(axis=1)
        return float(np.mean(counts**2))
    # the samples within reach of the pixel at 0, and every input pixel within reach of each
    positions = phases[:, None] + np.arange(-3, 4)[None, :] * step
    taps = np.floor(positions)[..., None] + np.arange(-int(2.0 * step) - 1, int(2.0 * step) + 3)
    norm = _cubic_bspline((taps - positions[..., None]) / step).sum(axis=-1)
    counts = (step * _cubic_bspline(positions / step) / norm).sum(axis=1)
    return float(np.mean(counts**2))


def star_noise_ratio(
    sigmas: np.ndarray, weights: np.ndarray, step: float, n_phases: int = 16
) -> float:
    """A star fit's noise factor over the large-aperture one, for a night averaged on a tile.

    Averaged over a tile pixel (``step`` > ``STRETCH_FROM`` night pixels per
    tile pixel), the night's white noise is correlated over ~2 tile pixels,
    so a star-sized fit sees less of the large-aperture factor
    (``NOISECOR``) than a large aperture does.  Per axis, the variance of a
    fit's sum ``sum_P t(P) O(P)`` (``t`` the star's profile on the tile,
    ``O`` the averaged noise) over ``sum_P t(P)**2 var(P)``, divided by
    the same for a flat window, mean over the samples' phases on the
    night's pixels and the star's on the tile's; the square (both axes).
    1 for ``step`` up to ``STRETCH_FROM`` (the four taps, whose factor was
    always taken whole).  0.73 for the demo's tile stars (~2 px FWHM as
    the tile holds them).

    Parameters
    ----------
    sigmas, weights : ndarray
        The star's profile on the tile as Gaussians (sigmas in tile pixels,
        weights summing to 1; a :class:`~pipeline.mosaic._kernels.SeeingMix`
        mixture).
    step : float
        Night pixels per tile pixel.
    """
    from scipy.special import erf

    from pipeline.mosaic._resample_jit import STRETCH_FROM

    step = float(step)
    if not step > STRETCH_FROM:
        return 1.0
    sigmas, weights = np.asarray(sigmas, float), np.asarray(weights, float)
    m = np.arange(-12, 13)
    flat = (np.abs(m) <= 8).astype(float)
    star, large = [], []
    for phase in (np.arange(n_phases) + 0.5) / n_phases:
        # the averaging weights W[m, i] of tile pixel m on night pixel i
        positions = phase + m * step
        i = np.arange(int(positions[0] - 2 * step) - 1, int(positions[-1] + 2 * step) + 2)
        kernel = _cubic_bspline((i[None, :] - positions[:, None]) / step)
        w = step * kernel / kernel.sum(axis=1, keepdims=True)
        plane = (w * w).sum(axis=1)
        large.append(np.sum((flat @ w) ** 2) / np.sum(flat * plane))
        for offset in (np.arange(4) + 0.5) / 4 - 0.5:
            edges = (m[None, :] - offset + np.array([[-0.5], [0.5]]))[:, None, :]
            cdf = 0.5 * erf(edges / (np.sqrt(2.0) * sigmas[None, :, None]))
            t = weights @ (cdf[1] - cdf[0])
            star.append(np.sum((t @ w) ** 2) / np.sum(t * t * plane))
    return float((np.mean(star) / np.mean(large)) ** 2)


def _noise_correlation(plan: _Plan, tile: Tile, sums, noise_correlation: float) -> float:
    """The large-aperture noise factor of the module docstring, from the passes' sums."""
    weight2_1, jacobian1, weight2_2, jacobian2 = sums[:4]
    uneven = _uneven_sampling(jacobian1) * _uneven_sampling(jacobian2)
    correlation = (
        float(noise_correlation) * jacobian1 * jacobian2 * uneven / (weight2_1 * weight2_2)
    )
    log.debug(
        "resampled onto %s: box y %d:%d x %d:%d, noise correlation %.3f",
        tile.name,
        *plan.box,
        correlation,
    )
    return correlation


def _checked(image, variance, flags) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    image, variance, flags = np.asarray(image), np.asarray(variance), np.asarray(flags)
    if image.ndim != 2 or variance.shape != image.shape or flags.shape != image.shape:
        raise ValueError(
            "image, variance and flags must be 2-D arrays of one shape; got "
            f"{image.shape}, {variance.shape} and {flags.shape}."
        )
    return image, variance, flags


def resample_to_tile(
    image: np.ndarray,
    variance: np.ndarray,
    flags: np.ndarray,
    wcs: WCS,
    tile: Tile,
    *,
    noise_correlation: float = 1.0,
    core: tuple[float, float, float, float] | None = None,
) -> ResampledImage | None:
    """Resample an image, its variance and flags onto a tile, conserving flux.

    Parameters
    ----------
    image : ndarray, shape (n_y, n_x)
        Electrons per input pixel; NaN where there is no data.
    variance : ndarray, shape (n_y, n_x)
        e^2.
    flags : ndarray of uint16, shape (n_y, n_x)
        :class:`~pipeline.masks.MaskBit` flags.
    wcs : astropy.wcs.WCS
        Celestial WCS of the input (e.g. a rectified product's, with east to
        the right: flipped axes are handled).
    tile : Tile
        The output tile.
    noise_correlation : float
        The input's own large-aperture noise factor (rectify's ``NOISECOR``).
    core : (y_lo, y_hi, x_lo, x_hi), optional
        Input pixel coordinates (0-based) of the region this call answers
        for: tile pixels whose sampling position lies outside
        ``[y_lo, y_hi) x [x_lo, x_hi)`` are left without data (NaN, flagged
        ``OUTSIDE``), for a neighbour that answers for them.  The arrays may
        reach beyond it (a neighbour's edge pixels feed the interpolation
        near a seam).  None: every pixel the input reaches.

    Returns
    -------
    ResampledImage or None
        The resampled planes over the bounding box of the input on the tile;
        None if the input does not reach the tile.

    Raises
    ------
    ValueError
        Planes of different shapes, or axes turned too far from the tile's.
    """
    image, variance, flags = _checked(image, variance, flags)
    plan = _plan(image.shape, wcs, tile, core)
    if plan is None:
        return None
    y0, y1, x0, x1 = plan.box
    out = (
        np.empty((y1 - y0, x1 - x0), np.float32),
        np.empty((y1 - y0, x1 - x0), np.float32),
        np.empty((y1 - y0, x1 - x0), MASK_DTYPE),
    )
    planes = _input_planes(plan, image, variance, flags)
    sums = _run_passes(plan, planes, out, (0, 0), 1.0, False, None)
    correlation = _noise_correlation(plan, tile, sums, noise_correlation)
    return ResampledImage(*out, y0, x0, 1.0, correlation)


def merge_onto_tile(
    image: np.ndarray,
    variance: np.ndarray,
    flags: np.ndarray,
    wcs: WCS,
    tile: Tile,
    planes: tuple[np.ndarray, np.ndarray, np.ndarray],
    *,
    noise_correlation: float = 1.0,
    core: tuple[float, float, float, float] | None = None,
    scratch: _Scratch | None = None,
) -> tuple[int, float, float, float] | None:
    """:func:`resample_to_tile`, merged straight into a night's tile planes.

    ``planes`` (image, variance, flags of the whole tile: float32, float32,
    uint16) take the resampled pixel where it has data (finite, positive
    variance) and they have none yet (NaN image); their flags become the
    new ones there, stay where they had data, and are OR-ed where neither
    has.  ``scratch`` (a ``_Scratch``) keeps pass 1's planes between calls.

    Returns
    -------
    (taken, inverse, pixel_factor, noise_correlation) or None
        Pixels taken, the sum of their ``1 / variance``, and the factors of
        :class:`ResampledImage`; None if the input does not reach the tile.
    """
    image, variance, flags = _checked(image, variance, flags)
    plan = _plan(image.shape, wcs, tile, core)
    if plan is None:
        return None
    pixel_factor = 1.0
    origin = plan.box[0], plan.box[2]
    inputs = _input_planes(plan, image, variance, flags)
    sums = _run_passes(plan, inputs, planes, origin, pixel_factor, True, scratch)
    correlation = _noise_correlation(plan, tile, sums, noise_correlation)
    return sums[4], sums[5], pixel_factor, correlation
