"""One-dimensional, flux-conserving resampling passes used by the rectify stage.

The rectify stage splits its 2-D mapping into two 1-D passes (a triangular,
Catmull-Smith style decomposition, exact for any smooth invertible mapping):

1. :func:`resample_columns` resamples every input row along the cross-scan
   axis (axis 1) at column positions shared by a block of rows;
2. :func:`shift_rows` resamples every column of the result along the scan
   axis (axis 0) by a per-column sub-pixel shift.

Both use the cubic-convolution kernel of Keys (1981, IEEE Trans. ASSP 29,
1153) with ``a = -0.5``.  Why that kernel and not bilinear interpolation:

* Both are interpolating, sum to one (flux) and reproduce linear functions,
  so flux and the first moment (centroid) of a translated image are exact.
* Keys with ``a = -0.5`` also reproduces quadratics, so for a translation the
  *second* moments (size and ellipticity) of every star are exact as well.
  Bilinear interpolation adds a variance ``f (1 - f)`` px^2 along each axis
  for a sub-pixel phase ``f``: up to 0.25 px^2, i.e. an ellipticity of ~0.05
  for a star of 1.5 px sigma that varies with the phase across the product.
  Since the rectified grid keeps the phase nearly constant along a row, that
  would be a systematic shape pattern; Keys has none.
* The price is 4 taps per axis instead of 2 and small negative lobes.

Positions follow the numpy convention: input pixel ``j`` has its centre at
coordinate ``j`` and covers ``[j - 0.5, j + 0.5)``.

Flux is conserved by multiplying the interpolated value by the Jacobian of
the mapping (pass by pass: ``|dc/dy|`` then ``|dr/dx|``; their product is the
full Jacobian because the decomposition is triangular).  Variance is
propagated as ``sum(w**2 * var)``: exact per pixel for independent input
pixels, but it ignores the covariance the interpolation creates between
neighbouring output pixels (see :func:`noise_correlation_factor`).  The mask
of an output pixel is the OR of the masks of every input pixel with non-zero
weight; taps that fall outside the input carry ``outside_bit``.

Non-finite input values are treated as zero while interpolating; the caller
is expected to flag them (their mask bits propagate) and to blank the output
pixels that carry a no-data bit.
"""

from __future__ import annotations

import numpy as np

__all__ = [
    "KEYS_A",
    "keys_weights",
    "load_compiled",
    "noise_correlation_factor",
    "resample_columns",
    "shift_rows",
    "transposed",
]

#: The free parameter of the Keys cubic-convolution kernel.  -0.5 is the only
#: value that reproduces quadratics (third-order accurate).
KEYS_A = -0.5


def keys_weights(frac: np.ndarray) -> np.ndarray:
    """Weights of the Keys (a = -0.5) cubic-convolution kernel.

    Parameters
    ----------
    frac : ndarray
        Fractional part ``f = p - floor(p)`` of the sampling position ``p``,
        in ``[0, 1)``, any shape.

    Returns
    -------
    ndarray, shape (4,) + frac.shape
        Weights of the input pixels ``floor(p) - 1 ... floor(p) + 2``.  They
        sum to one and reproduce polynomials up to degree 2.
    """
    f = np.asarray(frac, dtype=float)
    f2 = f * f
    f3 = f2 * f
    return np.stack(
        [
            -0.5 * f3 + f2 - 0.5 * f,
            1.5 * f3 - 2.5 * f2 + 1.0,
            -1.5 * f3 + 2.0 * f2 + 0.5 * f,
            0.5 * f3 - 0.5 * f2,
        ]
    )


def noise_correlation_factor(weights: np.ndarray) -> np.ndarray:
    """Ratio of the true to the propagated variance of a large aperture sum.

    The variance plane holds ``sum(w**2 var)`` per output pixel.  Because
    neighbouring output pixels share input pixels, the variance of a sum over
    many output pixels is larger: ``(sum w)**2 / sum(w**2)`` times larger for
    a large aperture (per axis; multiply the factors of the two passes).

    Parameters
    ----------
    weights : ndarray, shape (4, ...)
        Kernel weights as returned by :func:`keys_weights` (times the
        Jacobian, if any).

    Returns
    -------
    ndarray, shape weights.shape[1:]
        The factor, 1 for a zero shift, up to ~1.56 for a half-pixel shift.
    """
    w = np.asarray(weights, dtype=float)
    return w.sum(axis=0) ** 2 / (w * w).sum(axis=0)


def load_compiled() -> None:
    """Load the compiled loops in this process (from numba's disk cache once it is there).

    One call of each pass on a few pixels, and of the noise power, with the
    argument types of the stage's calls, so no other specialisation is
    compiled: float32 planes of either byte order resample in native float32,
    any others in float64.  A worker process calls it as it
    starts (see ``Stage.warm``): the first compiled call of a process sets
    numba up, ~0.5 s of CPU.
    """
    from pipeline.masks import MASK_DTYPE
    from pipeline.stages.rectify._noise import RectifiedNoise

    bits = {"outside_bit": 1, "nonfinite_bit": 2}
    for dtype in (np.float32, np.float64):
        ones = np.ones((4, 4), dtype)
        ones[0, 0] = np.nan  # and the cleaning of non-finite pixels
        planes = (ones, ones, np.zeros(ones.shape, MASK_DTYPE))
        resample_columns(*planes, np.arange(4.0) + 0.5, **bits)
        shift_rows(*planes, np.full(4, 0.5), 4, **bits)
    RectifiedNoise.white(4, 4).power()


def transposed(array: np.ndarray, tile: int = 256) -> np.ndarray:
    """C-contiguous transpose of a 2-D array, copied tile by tile.

    Copying square tiles keeps both the read and the write side in the
    processor cache; for large images this is ~2x faster than
    ``np.ascontiguousarray(array.T)``.
    """
    n, m = array.shape
    out = np.empty((m, n), array.dtype)
    for i in range(0, n, tile):
        for j in range(0, m, tile):
            out[j : j + tile, i : i + tile] = array[i : i + tile, j : j + tile].T
    return out


def _cleaned(
    image: np.ndarray,
    variance: np.ndarray,
    mask: np.ndarray,
    nonfinite_bit: int,
    dtype: np.dtype,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The planes in ``dtype`` with non-finite values set to 0 and flagged.

    Returns the inputs themselves (no copy) when they are finite and already
    of ``dtype``.
    """
    from pipeline.stages.rectify._resample_jit import zero_nonfinite

    img = np.asarray(image, dtype=dtype)
    var = np.asarray(variance, dtype=dtype)
    # One reduction per plane finds NaN or infinity cheaply in the usual case.
    if np.isfinite(img.sum()) and np.isfinite(var.sum()):
        return img, var, mask
    # Cleaned in place: the conversions made above, copies of the planes given.
    if np.may_share_memory(img, image):
        img = img.copy()
    if np.may_share_memory(var, variance):
        var = var.copy()
    msk = np.array(mask, dtype=mask.dtype.newbyteorder("="))
    zero_nonfinite(img, var, msk, msk.dtype.type(nonfinite_bit))
    return img, var, msk


def _working_dtype(image: np.ndarray) -> np.dtype:
    """Native float32 for single-precision planes of either byte order, else float64.

    Planes read from FITS products are big-endian (``>f4``), which compares
    unequal to ``np.float32``: testing the kind and size keeps them in single
    precision, as native ones are, instead of doubling their memory and work.
    """
    if image.dtype.kind == "f" and image.dtype.itemsize == 4:
        return np.dtype(np.float32)
    return np.dtype(np.float64)


def _check_planes(image: np.ndarray, variance: np.ndarray, mask: np.ndarray) -> None:
    if image.ndim != 2 or variance.shape != image.shape or mask.shape != image.shape:
        raise ValueError(
            "image, variance and mask must be 2-D arrays of one shape; got "
            f"{image.shape}, {variance.shape} and {mask.shape}."
        )
    if not np.issubdtype(mask.dtype, np.unsignedinteger):
        raise TypeError(f"mask must be an unsigned integer array; got dtype {mask.dtype}.")


def _blocks(
    values: np.ndarray, breaks: np.ndarray | None, n: int, width: int, name: str
) -> tuple[np.ndarray, np.ndarray]:
    """Normalise per-block positions ``values`` and block ``breaks``."""
    values = np.asarray(values, dtype=float)
    if values.ndim == 1:
        values = values[None, :]
    if values.ndim != 2 or values.shape[1] != width:
        raise ValueError(
            f"{name} must have shape ({width},) or (n_blocks, {width}); got {values.shape}."
        )
    if breaks is None:
        breaks = np.array([0, n])
    breaks = np.asarray(breaks, dtype=np.intp)
    if (
        breaks.shape != (values.shape[0] + 1,)
        or breaks[0] != 0
        or breaks[-1] != n
        or np.any(np.diff(breaks) < 0)
    ):
        raise ValueError(
            f"breaks must rise from 0 to {n} with one more entry than {name} has rows; "
            f"got {breaks.tolist()} for {values.shape[0]} blocks."
        )
    return values, breaks


def _block_weights(
    positions: np.ndarray, jacobian: np.ndarray, dtype: np.dtype
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Integer base, weights (times the Jacobian), squared weights, non-zero taps."""
    base = np.floor(positions).astype(np.intp)
    weights = keys_weights(positions - base) * jacobian
    return base, weights.astype(dtype), (weights * weights).astype(dtype), weights != 0


def _columns_setup(image, variance, mask, positions, jacobian, breaks, nonfinite_bit):
    """Pass 1's checked inputs: cleaned planes, clamped positions, Jacobians, breaks, outputs."""
    _check_planes(image, variance, mask)
    n_rows, n_cols = image.shape
    width = np.shape(positions)[-1] if np.ndim(positions) else -1
    pos, breaks = _blocks(positions, breaks, n_rows, width, "positions")
    n_out = pos.shape[1]
    jac = np.broadcast_to(np.asarray(jacobian, dtype=float), pos.shape)
    dtype = _working_dtype(image)
    # Far-off positions are clamped; their non-zero taps fall outside and flag them.
    pos = np.clip(pos, -2.0, n_cols + 1.0)
    planes = _cleaned(image, variance, mask, nonfinite_bit, dtype)
    out = np.zeros((n_rows, n_out), dtype)
    vout = np.zeros((n_rows, n_out), dtype)
    mout = np.zeros((n_rows, n_out), mask.dtype)
    return planes, pos, jac, breaks, (out, vout, mout)


def _rows_setup(image, variance, mask, offsets, n_out, jacobian, breaks, nonfinite_bit):
    """Pass 2's checked inputs: cleaned planes, clamped offsets, Jacobians, breaks, outputs."""
    _check_planes(image, variance, mask)
    n_rows, n_cols = image.shape
    if n_out < 0:
        raise ValueError(f"n_out must be >= 0; got {n_out}.")
    off, breaks = _blocks(offsets, breaks, n_out, n_cols, "offsets")
    jac = np.broadcast_to(np.asarray(jacobian, dtype=float), off.shape)
    dtype = _working_dtype(image)
    # Clamp so that the integer bases stay small; a clamped column is flagged
    # outside wherever its taps reach beyond the input.
    off = np.clip(off, -2.0 - n_out, n_rows + 1.0)
    planes = _cleaned(image, variance, mask, nonfinite_bit, dtype)
    out = np.zeros((n_out, n_cols), dtype)
    vout = np.zeros((n_out, n_cols), dtype)
    mout = np.zeros((n_out, n_cols), mask.dtype)
    return planes, off, jac, breaks, (out, vout, mout)


def resample_columns(
    image: np.ndarray,
    variance: np.ndarray,
    mask: np.ndarray,
    positions: np.ndarray,
    jacobian: np.ndarray | float = 1.0,
    *,
    breaks: np.ndarray | None = None,
    outside_bit: int,
    nonfinite_bit: int,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Resample rows along axis 1 (cross-scan) at column positions shared by blocks of rows.

    Parameters
    ----------
    image, variance : ndarray, shape (n_rows, n_columns)
        Input planes (e-, e^2); axis 0 is the scan axis.
    mask : ndarray of unsigned int, shape (n_rows, n_columns)
        Input bit mask.
    positions : ndarray, shape (n_out,) or (n_blocks, n_out)
        Input column coordinate sampled by each output column, per block of
        rows.  Monotonic positions are fastest; any order is correct.
    jacobian : float or ndarray broadcastable to ``positions``
        ``|d position / d output index|``, multiplied into the weights so
        that flux is conserved.
    breaks : ndarray of int, shape (n_blocks + 1,), optional
        Row index where each block starts, then ``n_rows``.  Default: one
        block.
    outside_bit : int
        Mask bit for taps that fall outside ``[0, n_columns)``.
    nonfinite_bit : int
        Mask bit for non-finite input values.

    Returns
    -------
    image, variance : ndarray, shape (n_rows, n_out)
        Float32 if the input image is float32, else float64.
    mask : ndarray, shape (n_rows, n_out)
        Same dtype as the input mask.
    """
    from pipeline.stages.rectify._resample_jit import resample_columns_block

    planes, pos, jac, breaks, (out, vout, mout) = _columns_setup(
        image, variance, mask, positions, jacobian, breaks, nonfinite_bit
    )
    outside = np.uint64(outside_bit)
    for block in range(pos.shape[0]):
        j0, w, w2, nonzero = _block_weights(pos[block], jac[block], out.dtype)
        rows = (int(breaks[block]), int(breaks[block + 1]))
        nonzero = nonzero.astype(mout.dtype)
        resample_columns_block(*planes, out, vout, mout, *rows, j0, w, w2, nonzero, outside)
    return out, vout, mout


def shift_rows(
    image: np.ndarray,
    variance: np.ndarray,
    mask: np.ndarray,
    offsets: np.ndarray,
    n_out: int,
    jacobian: np.ndarray | float = 1.0,
    *,
    breaks: np.ndarray | None = None,
    outside_bit: int,
    nonfinite_bit: int,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Resample each column along axis 0 (the scan) by a sub-pixel shift.

    Output row ``x`` of column ``y`` in block ``b`` samples the input at row
    coordinate ``offsets[b, y] + x``.

    Parameters
    ----------
    image, variance : ndarray, shape (n_rows, n_columns)
        Input planes; axis 0 is the scan axis.
    mask : ndarray of unsigned int, shape (n_rows, n_columns)
        Input bit mask.
    offsets : ndarray, shape (n_columns,) or (n_blocks, n_columns)
        Input row coordinate of output row 0, per block of output rows and
        column.
    n_out : int
        Number of output rows.
    jacobian : float or ndarray broadcastable to ``offsets``
        ``|d row / d output row|`` (multiplied into the weights).
    breaks : ndarray of int, shape (n_blocks + 1,), optional
        Output row where each block starts, then ``n_out``.  Default: one
        block.
    outside_bit, nonfinite_bit : int
        As in :func:`resample_columns`.

    Returns
    -------
    image, variance, mask : ndarray, shape (n_out, n_columns)
    """
    from pipeline.stages.rectify._resample_jit import shift_rows_block

    planes, off, jac, breaks, (out, vout, mout) = _rows_setup(
        image, variance, mask, offsets, n_out, jacobian, breaks, nonfinite_bit
    )
    outside = np.uint64(outside_bit)
    for block in range(off.shape[0]):
        i0, w, w2, nonzero = _block_weights(off[block], jac[block], out.dtype)
        rows = (int(breaks[block]), int(breaks[block + 1]))
        nonzero = nonzero.astype(mout.dtype)
        shift_rows_block(*planes, out, vout, mout, *rows, i0, w, w2, nonzero, outside)
    return out, vout, mout
