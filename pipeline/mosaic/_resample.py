"""Resample one calibrated image onto a tile, conserving flux.

Values are electrons per pixel (not surface brightness), so the resampled
value is the interpolated input density times the number of input pixels per
output pixel (the Jacobian of the pixel mapping).

Method: four separable passes
    Every night's frame differs from a tile's by a small rotation and scale
    and by slowly varying higher-order terms (a circle of declination is
    curved on a tangent-plane tile).  The mapping from tile pixel ``(X, Y)``
    to input pixel ``(x, y)`` is split into four 1-D resamplings with the
    Keys cubic-convolution kernel of the rectify stage
    (:mod:`pipeline.stages.rectify._resample`), each of a kind that shares
    its weights along whole lines, which makes them fast in plain NumPy:

    1. a shift of every input column along ``y``: ``v = y - G(x)``, where the
       curve ``y = G(x)`` is the image of the tile's central row (removes the
       rotation and the curvature of rows);
    2. a resampling of every row along ``x`` at ``x = F(u)``, the input column
       of the central row's tile column ``u`` (scale and its variation);
    3. a shift of every column ``v`` along the tile's ``X``: ``u = X + s(v)``
       (the shear that remains);
    4. a resampling along ``v`` at ``v = p(Y)`` for every tile column.

    ``s`` and ``p`` change slowly with ``X``; they are held fixed over blocks of
    tile columns on which they change by less than 0.002 px.  The mapping
    itself is evaluated exactly (astropy WCS) on nodes every 32 px and
    interpolated by bicubic splines.  The product of the passes' Jacobians
    is the full Jacobian (the decomposition is triangular), so flux is
    conserved.  Input axes that run opposite to the tile's (the rectified
    frame has east to the right) are flipped first; axes more than ~5 deg
    from the tile's are refused.
Variance and flags
    Variance is propagated pass by pass as ``sum(w**2 var)``; flags are the
    OR of every input pixel with non-zero weight, plus
    :attr:`~pipeline.masks.MaskBit.OUTSIDE` where a tap falls beyond the input;
    pixels with a no-data bit are NaN.
Noise correlation
    The variance plane ignores covariances: passes 1 and 4 both act along
    ``y`` and passes 2 and 3 along ``x``, and neighbouring output pixels share
    input pixels.  :class:`ResampledImage` carries two factors computed from
    the passes' weights (averaged over the sub-pixel phases that occur, for
    uncorrelated input noise): ``pixel_factor``, the true variance of a pixel
    over the variance plane, and ``noise_correlation``, the variance of a large
    aperture sum over the sum of the variance plane (the input's own factor,
    rectify's ``NOISECOR``, multiplied in).
"""

from __future__ import annotations

import logging
from dataclasses import dataclass

import numpy as np
from astropy.wcs import WCS
from scipy.interpolate import RectBivariateSpline

from pipeline.masks import MaskBit
from pipeline.mosaic._tiles import Tile
from pipeline.stages.rectify import NO_DATA_BITS
from pipeline.stages.rectify._resample import (
    keys_weights,
    resample_columns,
    shift_rows,
    transposed,
)

__all__ = ["ResampledImage", "resample_to_tile"]

log = logging.getLogger(__name__)

#: Spacing of the nodes on which the mapping is evaluated exactly, px.
_NODE_STEP = 32
#: Largest change of a held shift or position inside a block of tile columns, px.
_TOLERANCE = 0.002
#: Spacing of the tile columns at which the block boundaries are tested, px.
_CANDIDATE_STEP = 8
#: Largest |shear| (tan of the rotation between input and tile axes) accepted.
_MAX_SHEAR = 0.09
#: Reach of the 4-tap kernel beyond the sampled coordinate, px.
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


@dataclass(frozen=True)
class _Mapping:
    """Tile pixel -> input pixel, as bicubic splines over exact nodes (axes flipped as needed)."""

    x: RectBivariateSpline
    y: RectBivariateSpline
    flip_x: bool
    flip_y: bool

    @classmethod
    def build(cls, tile: Tile, wcs: WCS, input_shape: tuple[int, int]) -> _Mapping:
        n_y, n_x = tile.shape
        pad = int(_MAX_SHEAR * max(n_y, n_x)) + 4 * _NODE_STEP
        xn = np.arange(-pad, n_x + pad + _NODE_STEP, _NODE_STEP, dtype=float)
        yn = np.arange(-pad, n_y + pad + _NODE_STEP, _NODE_STEP, dtype=float)
        grid_x, grid_y = np.meshgrid(xn, yn)
        world = tile.wcs.pixel_to_world_values(grid_x, grid_y)
        x, y = (np.asarray(a, float) for a in wcs.world_to_pixel_values(*world))
        if not (np.isfinite(x).all() and np.isfinite(y).all()):
            raise ValueError(
                "the input's WCS cannot map every point near the tile; the input lies too far "
                "from the tile (more than 90 deg) for this resampler."
            )
        c = (yn.size // 2, xn.size // 2)
        dx_dx = (x[c[0], c[1] + 1] - x[c[0], c[1] - 1]) / (2 * _NODE_STEP)
        dx_dy = (x[c[0] + 1, c[1]] - x[c[0] - 1, c[1]]) / (2 * _NODE_STEP)
        dy_dx = (y[c[0], c[1] + 1] - y[c[0], c[1] - 1]) / (2 * _NODE_STEP)
        dy_dy = (y[c[0] + 1, c[1]] - y[c[0] - 1, c[1]]) / (2 * _NODE_STEP)
        if abs(dx_dy) > _MAX_SHEAR * abs(dx_dx) or abs(dy_dx) > _MAX_SHEAR * abs(dy_dy):
            angle = np.degrees(np.arctan2(abs(dx_dy), abs(dx_dx)))
            raise ValueError(
                f"the input's pixel axes are turned by ~{angle:.1f} deg from the tile's; the "
                f"separable resampler handles up to {np.degrees(np.arctan(_MAX_SHEAR)):.1f} deg "
                "(a rectified night and a north-up tile differ by well under a degree)."
            )
        flip_x, flip_y = bool(dx_dx < 0), bool(dy_dy < 0)
        if flip_x:
            x = input_shape[1] - 1 - x
        if flip_y:
            y = input_shape[0] - 1 - y
        return cls(RectBivariateSpline(yn, xn, x), RectBivariateSpline(yn, xn, y), flip_x, flip_y)

    def row(self, y: float, xs: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Input ``(x, y)`` along tile row ``y`` at tile columns ``xs``."""
        return self.x(y, xs)[0], self.y(y, xs)[0]

    def column(self, x: float, ys: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Input ``(x, y)`` along tile column ``x`` at tile rows ``ys``."""
        return self.x(ys, x)[:, 0], self.y(ys, x)[:, 0]


def _covered_box(mapping: _Mapping, tile: Tile, input_shape) -> tuple[int, int, int, int] | None:
    """Tile pixel box ``(y0, y1, x0, x1)`` whose mapping lands on the input (None: none)."""
    n_y, n_x = tile.shape
    ys = np.append(np.arange(0, n_y, _CANDIDATE_STEP), n_y - 1).astype(float)
    xs = np.append(np.arange(0, n_x, _CANDIDATE_STEP), n_x - 1).astype(float)
    x, y = mapping.x(ys, xs), mapping.y(ys, xs)
    reach = _REACH + 0.5
    inside = (
        (x > -reach)
        & (x < input_shape[1] - 1 + reach)
        & (y > -reach)
        & (y < input_shape[0] - 1 + reach)
    )
    if not inside.any():
        return None
    rows, cols = np.flatnonzero(inside.any(axis=1)), np.flatnonzero(inside.any(axis=0))
    y0 = max(int(ys[rows[0]]) - _CANDIDATE_STEP, 0)
    y1 = min(int(ys[rows[-1]]) + _CANDIDATE_STEP + 1, n_y)
    x0 = max(int(xs[cols[0]]) - _CANDIDATE_STEP, 0)
    x1 = min(int(xs[cols[-1]]) + _CANDIDATE_STEP + 1, n_x)
    return y0, y1, x0, x1


def _column_blocks(
    mapping: _Mapping, x0: int, x1: int, ys: np.ndarray, central: tuple[np.ndarray, np.ndarray]
) -> np.ndarray:
    """Tile columns where blocks start (then ``x1``): ``v`` and ``u - X`` vary < tolerance."""
    xs = np.append(np.arange(x0, x1, _CANDIDATE_STEP), x1 - 1).astype(float)
    f, g, xe = central
    x, y = mapping.x(ys, xs), mapping.y(ys, xs)  # (n_ys, n_xs)
    v = y - np.interp(x, f, g)
    shear = np.interp(x, f, xe) - xs[None, :]
    starts = [0]
    while True:
        a = starts[-1]
        moved = np.maximum(
            np.abs(v[:, a:] - v[:, a : a + 1]).max(axis=0),
            np.abs(shear[:, a:] - shear[:, a : a + 1]).max(axis=0),
        )
        beyond = np.flatnonzero(moved > _TOLERANCE)
        if beyond.size == 0:
            break
        starts.append(max(int(beyond[0]) - 1, a + 1))
    breaks = [int(xs[i]) for i in starts] + [x1]
    return np.unique(np.asarray(breaks, dtype=np.intp))


def _noise_factors(
    p1_positions: np.ndarray,
    p2_positions: np.ndarray,
    p2_jacobian: np.ndarray,
    p3_offsets: np.ndarray,
    p3_jacobian: np.ndarray,
    p4_positions: np.ndarray,
    p4_jacobian: np.ndarray,
    widths: np.ndarray,
    n_x: int,
) -> tuple[float, float, float]:
    """``(E num / E den, E den, J)`` of the module docstring's noise factors.

    Returns the pixel factor, the mean variance plane per unit input variance
    and the mean number of input pixels per output pixel.
    """
    # Along y: pass 1's kernel autocorrelation (per input column, averaged) under pass 4.
    e = keys_weights(p1_positions - np.floor(p1_positions))  # (4, n_cols)
    lags = np.arange(-3, 4)
    auto = np.array([sum(e[m] * e[m + lag] for m in range(4) if 0 <= m + lag < 4) for lag in lags])
    auto = auto.mean(axis=1)
    d = keys_weights(p4_positions - np.floor(p4_positions)) * p4_jacobian  # (4, nb, n_y)
    num_y = sum(d[k] * d[j] * auto[j - k + 3] for k in range(4) for j in range(4))
    den_y = (d * d).sum(axis=0) * auto[3]
    block_weight = (widths / widths.sum())[:, None] / p4_positions.shape[1]
    num_y, den_y = float((num_y * block_weight).sum()), float((den_y * block_weight).sum())
    # Along x: pass 2's kernels at the four taps of pass 3, composed per tile column.
    base_a = np.floor(p2_positions).astype(np.intp)
    a = keys_weights(p2_positions - base_a) * p2_jacobian  # (4, n_u)
    middle = p3_offsets.shape[0] // 2
    columns = np.unique(np.linspace(0, p3_offsets.shape[1] - 1, 16).astype(np.intp))
    index = np.arange(n_x)
    num_x = den_x = 0.0
    width = 16 + 3 * int(np.ceil(np.abs(np.diff(p2_positions)).max(initial=1.0)))
    for column in columns:
        offset = p3_offsets[middle, column]
        start = int(np.floor(offset))
        b = keys_weights(np.array(offset - start)) * p3_jacobian[middle, column]
        taps = np.clip(index[:, None] + start - 1 + np.arange(4)[None, :], 0, a.shape[1] - 1)
        composed = np.zeros((n_x, width))
        reference = base_a[taps[:, 0]]
        for k in range(4):
            for m in range(4):
                slot = np.clip(base_a[taps[:, k]] - reference + m, 0, width - 1)
                composed[index, slot] += b[k] * a[m, taps[:, k]]
        num_x += float((composed**2).sum())
        den_x += float(sum(b[k] ** 2 * (a[:, taps[:, k]] ** 2).sum() for k in range(4)))
    num_x /= columns.size * n_x
    den_x /= columns.size * n_x
    jacobian = (
        float(np.mean(p2_jacobian)) * float(np.mean(p4_jacobian)) * float(np.mean(p3_jacobian))
    )
    return (num_y / den_y) * (num_x / den_x), den_y * den_x, jacobian


def resample_to_tile(
    image: np.ndarray,
    variance: np.ndarray,
    flags: np.ndarray,
    wcs: WCS,
    tile: Tile,
    *,
    noise_correlation: float = 1.0,
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
    image, variance, flags = np.asarray(image), np.asarray(variance), np.asarray(flags)
    if image.ndim != 2 or variance.shape != image.shape or flags.shape != image.shape:
        raise ValueError(
            "image, variance and flags must be 2-D arrays of one shape; got "
            f"{image.shape}, {variance.shape} and {flags.shape}."
        )
    mapping = _Mapping.build(tile, wcs, image.shape)
    box = _covered_box(mapping, tile, image.shape)
    if box is None:
        return None
    y0, y1, x0, x1 = box
    if mapping.flip_x:
        image, variance, flags = image[:, ::-1], variance[:, ::-1], flags[:, ::-1]
    if mapping.flip_y:
        image, variance, flags = image[::-1], variance[::-1], flags[::-1]
    n_cols = image.shape[1]

    # The tile's central row, far enough beyond the box for the shear: F(u), G(x).
    y_centre = 0.5 * (y0 + y1 - 1)
    pad = int(_MAX_SHEAR * (y1 - y0)) + 2 * _REACH + 8
    xe = np.arange(x0 - pad, x1 + pad, dtype=float)
    f, g = mapping.row(y_centre, xe)
    if not np.all(np.diff(f) > 0):
        raise ValueError("the mapping folds over along the tile's rows; check the input's WCS.")
    ys_sample = np.append(np.arange(y0, y1, _CANDIDATE_STEP), y1 - 1).astype(float)
    xs_sample = np.append(np.arange(x0, x1, _CANDIDATE_STEP), x1 - 1).astype(float)
    x_box, y_box = mapping.x(ys_sample, xs_sample), mapping.y(ys_sample, xs_sample)
    x_lo = max(int(np.floor(x_box.min())) - _REACH, 0)
    x_hi = min(int(np.ceil(x_box.max())) + _REACH + 1, n_cols)
    v_box = y_box - np.interp(x_box, f, g)
    v_lo = int(np.floor(v_box.min())) - _REACH
    v_hi = int(np.ceil(v_box.max())) + _REACH + 1

    # Blocks of tile columns; per block, p(Y) (pass 4) and s(v) (pass 3).
    breaks = _column_blocks(mapping, x0, x1, ys_sample, (f, g, xe))
    mids = 0.5 * (breaks[:-1] + breaks[1:] - 1)
    ys = np.arange(y0, y1, dtype=float)
    vs = np.arange(v_lo, v_hi, dtype=float)
    p4 = np.empty((mids.size, ys.size))
    s3 = np.empty((mids.size, vs.size))
    for b, mid in enumerate(mids):
        x, y = mapping.column(mid, ys)
        p4[b] = y - np.interp(x, f, g)
        y_of_v = _extrapolated(vs, p4[b], ys)
        s3[b] = np.interp(mapping.x.ev(y_of_v, np.full_like(vs, mid)), f, xe) - mid
    jac4 = np.abs(np.gradient(p4, axis=1)) if ys.size > 1 else np.ones_like(p4)
    jac3 = 1.0 + (np.gradient(s3, mids, axis=0) if mids.size > 1 else np.zeros_like(s3))
    u_lo = int(np.floor(x0 + s3.min())) - _REACH
    u_hi = int(np.ceil(x1 - 1 + s3.max())) + _REACH + 1
    if u_lo < xe[0] or u_hi > xe[-1] + 1:
        raise ValueError(
            "the mapping shears more than the resampler allows; check the input's WCS."
        )
    u_index = slice(int(u_lo - xe[0]), int(u_hi - xe[0]))
    p2 = f[u_index] - x_lo
    jac2 = np.abs(np.gradient(f))[u_index]
    p1 = v_lo + np.interp(np.arange(x_lo, x_hi, dtype=float), f, g)

    bits = {"outside_bit": int(MaskBit.OUTSIDE), "nonfinite_bit": int(MaskBit.NONFINITE)}
    cols = slice(x_lo, x_hi)
    planes = shift_rows(image[:, cols], variance[:, cols], flags[:, cols], p1, v_hi - v_lo, **bits)
    planes = resample_columns(*planes, p2, jac2, **bits)
    planes = shift_rows(
        *(transposed(p) for p in planes),
        x0 + s3 - u_lo,
        x1 - x0,
        jac3,
        breaks=breaks - x0,
        **bits,
    )
    out, vout, mout = resample_columns(*planes, p4 - v_lo, jac4, breaks=breaks - x0, **bits)
    out, vout, mout = transposed(out), transposed(vout), transposed(mout)
    no_data = (mout & int(NO_DATA_BITS)) != 0
    out[no_data] = np.nan
    vout[no_data] = np.nan

    pixel_factor, plane, jacobian = _noise_factors(
        p1, p2, jac2, x0 + s3 - u_lo, jac3, p4 - v_lo, jac4, np.diff(breaks), x1 - x0
    )
    log.debug(
        "resampled %s: box y %d:%d x %d:%d, %d column blocks, pixel factor %.3f",
        tile.name,
        y0,
        y1,
        x0,
        x1,
        mids.size,
        pixel_factor,
    )
    return ResampledImage(
        out,
        vout,
        mout,
        y0,
        x0,
        pixel_factor,
        float(noise_correlation) * jacobian / plane,
    )
