"""Reference (numpy) versions of the mosaic's compiled loops, for tests and benchmarks.

These are the implementations the compiled ones replaced, kept verbatim so
that tests can compare the two on random inputs and the benchmark can time
both in one run; the average over an output pixel beyond ``STRETCH_FROM``
(tiles much coarser than their nights) was added to the compiled passes later,
and here as a plain loop over those pixels (:func:`_averaged_taps`).
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage
from scipy.interpolate import RectBivariateSpline

from pipeline.masks import MASK_DTYPE, MaskBit
from pipeline.mosaic import CoaddedPlanes, CoaddOptions
from pipeline.mosaic._coadd import (
    _WEIGHT_BLOCK,
    _WEIGHT_STRIDE,
    _flag_bits,
    _level_offsets,
    _sky_level,
    level_grid_nodes,
)
from pipeline.mosaic._resample import (
    ResampledImage,
    _checked,
    _cubic_bspline,
    _input_planes,
    _noise_correlation,
    _plan,
)
from pipeline.mosaic._resample_jit import STRETCH_FROM
from pipeline.stages.rectify import NO_DATA_BITS
from pipeline.stages.rectify._resample import keys_weights

#: The co-add's default flags to ignore.
_IGNORE_FLAGS = CoaddOptions().ignore_flags
#: Output lines handled at once, so that the working set stays in the processor cache.
CHUNK = 32


def resample_axis_numpy(
    planes: tuple[np.ndarray, np.ndarray, np.ndarray],
    positions: np.ndarray,
    jacobian: np.ndarray,
    axis: int,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, float]:
    """``pipeline.mosaic._resample._resample_axis`` as it was in numpy."""
    image, variance, flags = planes
    n_rows, n_cols = image.shape
    n_line = n_cols if axis == 1 else n_rows
    flat, vflat, mflat = image.ravel(), variance.ravel(), flags.ravel()
    out = np.zeros(positions.shape, np.float32)
    vout = np.zeros(positions.shape, np.float32)
    mout = np.zeros(positions.shape, MASK_DTYPE)
    outside = MASK_DTYPE.type(int(MaskBit.OUTSIDE))
    sum_w2 = 0.0
    for r0 in range(0, positions.shape[0], CHUNK):
        r1 = min(r0 + CHUNK, positions.shape[0])
        p = positions[r0:r1]
        base = np.floor(p)
        w = (keys_weights(p - base) * jacobian[r0:r1]).astype(np.float32)
        w[:, jacobian[r0:r1] > STRETCH_FROM] = 0  # averaged below
        base = base.astype(np.intp)
        if axis == 1:
            offset, stride = (np.arange(r0, r1) * n_cols)[:, None], 1
        else:
            offset, stride = np.arange(positions.shape[1])[None, :], n_cols
        o, vo, mo = out[r0:r1], vout[r0:r1], mout[r0:r1]
        for k in range(4):
            line = base + (k - 1)
            inside = (line >= 0) & (line < n_line)
            index = offset + np.clip(line, 0, n_line - 1) * stride
            wk = w[k] if inside.all() else np.where(inside, w[k], np.float32(0))
            o += wk * flat[index]
            w2 = wk * wk
            vo += w2 * vflat[index]
            sum_w2 += float(w2.sum(dtype=np.float64))
            nonzero = w[k] != 0
            mo |= np.where(nonzero & inside, mflat[index], 0).astype(MASK_DTYPE)
            if not inside.all():
                mo |= np.where(nonzero & ~inside, outside, 0).astype(MASK_DTYPE)
    for i, j in zip(*np.nonzero(jacobian > STRETCH_FROM), strict=True):
        line = (i, slice(None)) if axis == 1 else (slice(None), j)
        pixel = _averaged_taps(
            image[line], variance[line], flags[line], positions[i, j], jacobian[i, j], outside
        )
        out[i, j], vout[i, j], mout[i, j] = pixel[:3]
        sum_w2 += pixel[3]
    return out, vout, mout, sum_w2 / max(positions.size, 1)


def _averaged_taps(image, variance, flags, position, step, outside):
    """One output pixel of a line averaged over ``step`` input pixels, tap by tap."""
    taps = np.arange(int(np.floor(position - 2.0 * step)) + 1, int(np.ceil(position + 2.0 * step)))
    kernel = _cubic_bspline((taps - position) / step)
    weights = (step * kernel / kernel.sum()).astype(np.float32)
    o, vo, mo, sum_w2 = np.float32(0), np.float32(0), MASK_DTYPE.type(0), 0.0
    for tap, w in zip(taps, weights, strict=True):
        if w == 0:
            continue
        if not 0 <= tap < image.size:
            mo |= outside
            continue
        o += w * image[tap]
        vo += w * w * variance[tap]
        sum_w2 += float(w * w)
        mo |= flags[tap]
    return o, vo, mo, sum_w2


def _numpy_pass(planes, positions, axis):
    """One pass with ``numpy.gradient``'s Jacobian, as the resampler had it."""
    one = positions.shape[axis] == 1
    jacobian = np.ones(positions.shape) if one else np.abs(np.gradient(positions, axis=axis))
    *out, weight2 = resample_axis_numpy(planes, positions, jacobian, axis)
    return out, weight2, float(np.mean(jacobian))


def resample_to_tile_numpy(image, variance, flags, wcs, tile, *, noise_correlation=1.0, core=None):
    """:func:`pipeline.mosaic.resample_to_tile` with stored positions and the numpy passes.

    The sampling (the plan: box, crops and position splines) is the
    resampler's own; the positions are evaluated on the whole grid first, and
    the two passes, the no-data and core masks run as whole-array numpy
    operations, as they did before the passes were compiled and fused.
    """
    image, variance, flags = _checked(image, variance, flags)
    plan = _plan(image.shape, wcs, tile, core)
    if plan is None:
        return None
    planes = _input_planes(plan, image, variance, flags)
    crossing = plan.crossing.values() - plan.x_lo
    planes, weight2_1, jacobian1 = _numpy_pass(planes, crossing, axis=1)
    rows = plan.rows.values() - plan.t_lo
    (out, vout, mout), weight2_2, jacobian2 = _numpy_pass(planes, rows, axis=0)
    no_data = (mout & MASK_DTYPE.type(int(NO_DATA_BITS))) != 0
    if core is not None:
        y_lo, y_hi, x_lo, x_hi = plan.core_box
        rows += plan.t_lo
        columns = plan.core_columns.values()
        elsewhere = ~((rows >= y_lo) & (rows < y_hi) & (columns >= x_lo) & (columns < x_hi))
        no_data |= elsewhere
        mout[elsewhere] |= MASK_DTYPE.type(int(MaskBit.OUTSIDE))
    out[no_data] = np.nan
    vout[no_data] = np.nan
    sums = (weight2_1, jacobian1, weight2_2, jacobian2)
    correlation = _noise_correlation(plan, tile, sums, noise_correlation)
    return ResampledImage(out, vout, mout, plan.box[0], plan.box[2], 1.0, correlation)


def merge_onto_tile_numpy(
    image, variance, flags, wcs, tile, planes, *, noise_correlation=1.0, core=None, scratch=None
):
    """:func:`pipeline.mosaic._resample.merge_onto_tile`: the numpy resampling, then a merge."""
    result = resample_to_tile_numpy(
        image, variance, flags, wcs, tile, noise_correlation=noise_correlation, core=core
    )
    if result is None:
        return None
    image, variance, flags = (plane[result.slices] for plane in planes)
    v = result.variance * np.float32(result.pixel_factor)
    new = np.isfinite(result.image) & np.isfinite(v) & (v > 0)
    old = np.isfinite(image)
    take = new & ~old
    image[take] = result.image[take]
    variance[take] = v[take]
    flags[take] = result.flags[take]
    flags[~old & ~new] |= result.flags[~old & ~new]
    inverse = float(np.sum(1.0 / v[take].astype(np.float64)))
    return int(take.sum()), inverse, result.pixel_factor, result.noise_correlation


#: Up to this many nights the weighted median sorts with a compare-exchange network.
_NETWORK_NIGHTS = 8
#: Rows of a tile whose weighted median is computed at once.
_MEDIAN_ROWS = 16


def _sorted_pairs(values: np.ndarray, weights: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``values`` sorted along axis 0 and ``weights`` carried with them."""
    n = values.shape[0]
    if n > _NETWORK_NIGHTS:
        order = np.argsort(values, axis=0)
        return np.take_along_axis(values, order, 0), np.take_along_axis(weights, order, 0)
    # odd-even transposition sort (Knuth, TAOCP vol. 3, 5.3.4): n rounds of
    # compare-exchanges, each a few whole-array operations
    v, w = [values[i] for i in range(n)], [weights[i] for i in range(n)]
    for round_ in range(n):
        for i in range(round_ % 2, n - 1, 2):
            swap = v[i] > v[i + 1]
            v[i], v[i + 1] = np.minimum(v[i], v[i + 1]), np.maximum(v[i], v[i + 1])
            w[i], w[i + 1] = np.where(swap, w[i + 1], w[i]), np.where(swap, w[i], w[i + 1])
    return np.stack(v), np.stack(w)


def _weighted_median(values: np.ndarray, weights: np.ndarray) -> np.ndarray:
    values = np.where(weights > 0, values, np.inf)
    ordered, carried = _sorted_pairs(values, np.where(weights > 0, weights, 0))
    half = 0.5 * carried.sum(axis=0)
    cumulative = np.zeros_like(half)
    median = np.full(half.shape, np.nan, dtype=np.result_type(values, np.float32))
    found = half <= 0
    for value, weight in zip(ordered, carried, strict=True):
        cumulative += weight
        take = (cumulative >= half) & ~found
        median = np.where(take, value, median)
        found |= take
    return median


def weighted_median_numpy(values: np.ndarray, weights: np.ndarray) -> np.ndarray:
    """:func:`pipeline.mosaic.weighted_median` as it was in numpy."""
    values, weights = np.asarray(values), np.asarray(weights)
    if values.ndim < 3:
        return _weighted_median(values, weights)
    # in bands of rows, so that the sort's working set stays in the processor cache
    out = np.empty(values.shape[1:], np.result_type(values, np.float32))
    for r0 in range(0, values.shape[1], _MEDIAN_ROWS):
        band = slice(r0, r0 + _MEDIAN_ROWS)
        out[band] = _weighted_median(values[:, band], weights[:, band])
    return out


def background_variance_numpy(variance: np.ndarray) -> np.ndarray:
    """``_background_grid`` and its bilinear interpolation, as they were in numpy."""
    n_y, n_x = variance.shape
    n_by, n_bx = -(-n_y // _WEIGHT_BLOCK), -(-n_x // _WEIGHT_BLOCK)
    # every _WEIGHT_STRIDE-th row and column of each block
    b = _WEIGHT_BLOCK // _WEIGHT_STRIDE
    sample = variance[::_WEIGHT_STRIDE, ::_WEIGHT_STRIDE]
    padded = np.full((n_by * b, n_bx * b), np.nan)
    padded[: sample.shape[0], : sample.shape[1]] = sample
    blocks = padded.reshape(n_by, b, n_bx, b).transpose(0, 2, 1, 3).reshape(n_by, n_bx, b * b)
    finite = np.isfinite(blocks)
    counts = finite.sum(axis=-1)
    ordered = np.sort(np.where(finite, blocks, np.inf), axis=-1)
    middle = np.take_along_axis(ordered, np.maximum(counts - 1, 0)[..., None] // 2, axis=-1)[..., 0]
    good = counts > 0
    if not good.any():
        return np.full(variance.shape, np.nan)
    grid = np.where(good, middle, np.median(middle[good]))
    if n_by < 2 or n_bx < 2:
        return np.full(variance.shape, float(np.median(grid)))
    centres_y = (np.arange(n_by) + 0.5) * _WEIGHT_BLOCK - 0.5
    centres_x = (np.arange(n_bx) + 0.5) * _WEIGHT_BLOCK - 0.5
    spline = RectBivariateSpline(centres_y, centres_x, grid, kx=1, ky=1)
    rows = np.clip(np.arange(n_y, dtype=float), centres_y[0], centres_y[-1])
    cols = np.clip(np.arange(n_x, dtype=float), centres_x[0], centres_x[-1])
    return spline(rows, cols)


def level_surface_numpy(grid: np.ndarray, shape: tuple[int, int]) -> np.ndarray:
    """A night's level on the tile (float32): ``grid`` bilinear between its nodes, linear beyond."""
    first, spacing = level_grid_nodes()
    axes = []
    for n_pixels, n_nodes in zip(shape, grid.shape, strict=True):
        t = (np.arange(n_pixels) - first) / spacing
        k = np.clip(np.floor(t).astype(int), 0, n_nodes - 2)
        axes.append((k, t - k))
    (ky, fy), (kx, fx) = axes
    fy, fx = fy[:, None], fx[None, :]
    low = (1.0 - fx) * grid[ky][:, kx] + fx * grid[ky][:, kx + 1]
    high = (1.0 - fx) * grid[ky + 1][:, kx] + fx * grid[ky + 1][:, kx + 1]
    return ((1.0 - fy) * low + fy * high).astype(np.float32)


def weighted_inputs_numpy(images, variances, flags, scale, match_levels, ignore_flags):
    """``pipeline.mosaic._coadd._weighted_inputs`` as it was in numpy."""
    images = np.asarray(images, dtype=np.float32)
    variances = np.asarray(variances, dtype=np.float32)
    flags = np.asarray(flags)
    n_nights = images.shape[0]
    scale = np.ones(n_nights) if scale is None else np.asarray(scale, dtype=float)
    valid = np.isfinite(images) & np.isfinite(variances) & (variances > 0)
    valid &= (flags & MASK_DTYPE.type(_flag_bits(ignore_flags))) == 0
    background = np.stack(
        [
            background_variance_numpy(np.where(valid[i], variances[i], np.nan))
            for i in range(n_nights)
        ]
    )
    scale = scale.astype(np.float32)[:, None, None]
    weights = np.where(valid, scale / np.where(valid, background, 1.0), 0.0).astype(np.float32)
    images = np.where(valid, images, np.float32(0))
    grids = _level_offsets(images, valid, weights) if match_levels else None
    offsets = np.zeros(n_nights) if grids is None else grids.mean(axis=(1, 2))
    if grids is not None:
        images = images - np.stack([level_surface_numpy(g, images.shape[1:]) for g in grids])
    images = np.where(valid, images, np.float32(0))
    return images, variances, flags, valid, weights, offsets


def coadd_numpy(
    images: np.ndarray,
    variances: np.ndarray,
    flags: np.ndarray,
    *,
    scale: np.ndarray | None = None,
    reject_sigma: float = 4.0,
    source_tolerance: float = 0.5,
    source_radius: int = 5,
    min_nights: int = 3,
    grow: int = 1,
    match_levels: bool = True,
    ignore_flags=_IGNORE_FLAGS,
    overwrite_input: bool = False,  # accepted as coadd does; the numpy version always copies
) -> CoaddedPlanes:
    """:func:`pipeline.mosaic.coadd` as it was in numpy (steps 5-6 of its docstring).

    With the flags it has had since: ``NIGHT_LEFT_OUT`` where a night with
    data is left out and within ``max(grow, source_radius)`` of a rejection.
    """
    images, variances, flags, valid, weights, offsets = weighted_inputs_numpy(
        images, variances, flags, scale, match_levels, ignore_flags
    )
    n_nights = images.shape[0]
    count = valid.sum(axis=0)
    rejected = np.zeros(images.shape, bool)
    # NIGHT_LEFT_OUT within max(grow, source_radius) of a rejection (before growing)
    near_rejection = np.zeros(images.shape[1:], bool)
    if n_nights >= min_nights:
        median = weighted_median_numpy(images, weights)
        sky = _sky_level(median)
        # the noise of a median is ~sqrt(pi/2) times that of the mean (common practice)
        inverse = np.where(valid, 1.0 / np.where(valid, variances, 1.0), 0.0).sum(axis=0)
        noise = np.sqrt(0.5 * np.pi / np.where(inverse > 0, inverse, np.inf))
        signal = np.nan_to_num(median - sky)
        signal = np.where(signal > 3.0 * noise, signal, 0.0)
        if source_radius > 0:
            signal = ndimage.maximum_filter(signal, size=2 * source_radius + 1)
        sigma2 = np.where(valid, variances, 1.0) + noise**2 + (source_tolerance * signal) ** 2
        rejected = (
            valid & (count >= min_nights) & ((images - median) ** 2 > reject_sigma**2 * sigma2)
        )
        if rejected.any():
            reach = max(grow, source_radius, 0)
            near_rejection = ndimage.binary_dilation(
                rejected.any(axis=0), np.ones((2 * reach + 1, 2 * reach + 1), bool)
            )
        if grow > 0 and rejected.any():
            structure = np.ones((1, 2 * grow + 1, 2 * grow + 1), bool)
            rejected = ndimage.binary_dilation(rejected, structure) & valid
    kept = valid & ~rejected
    weights = np.where(kept, weights, 0.0)
    total = weights.sum(axis=0)
    has_data = total > 0
    safe = np.where(has_data, total, 1.0)
    image = np.where(has_data, (weights * images).sum(axis=0) / safe, np.nan)
    spread = (weights**2 * np.where(kept, variances, 0.0)).sum(axis=0)
    weight = np.where(has_data, total**2 / np.where(has_data, spread, 1.0), 0.0)
    used = np.bitwise_or.reduce(np.where(kept, flags, 0).astype(MASK_DTYPE), axis=0)
    every = np.bitwise_or.reduce(flags.astype(MASK_DTYPE), axis=0)
    # a night with data left out: rejected, or flagged with an ignored bit that keeps data
    kept_data_bits = _flag_bits(ignore_flags) & ~int(NO_DATA_BITS)
    left_out = (valid & ~kept).any(axis=0) | ((every & kept_data_bits) != 0) | near_rejection
    every = every | np.where(left_out, MaskBit.NIGHT_LEFT_OUT, 0).astype(MASK_DTYPE)
    used = used | np.where(left_out, MaskBit.NIGHT_LEFT_OUT, 0).astype(MASK_DTYPE)
    return CoaddedPlanes(
        image=image.astype(np.float32),
        weight=weight.astype(np.float32),
        coverage=kept.sum(axis=0).astype(np.uint16),
        flags=np.where(has_data, used, every).astype(MASK_DTYPE),
        rejected=rejected.sum(axis=(1, 2)),
        offsets=offsets,
    )
