"""Reference (numpy) versions of the rectify stage's compiled resampling loops.

These are the passes the compiled loops
(:mod:`pipeline.stages.rectify._resample_jit`) replaced, kept as they were
(whole chunks of rows, one multiply-add per tap) so that tests can check that
the compiled passes give the same bytes and the benchmark can time both.
"""

from __future__ import annotations

import numpy as np

from pipeline.stages.rectify._noise import _at_offsets, _cross_sums
from pipeline.stages.rectify._resample import _block_weights, _columns_setup, _rows_setup

#: Rows (pass 1) or output rows (pass 2) handled at once, so that the working
#: set stays in the processor cache.
_CHUNK = 64


def _runs(values: np.ndarray) -> list[tuple[int, int, int]]:
    """Maximal runs ``[start, stop)`` of equal integers in ``values``."""
    cut = np.flatnonzero(np.diff(values)) + 1
    starts = np.concatenate([[0], cut])
    stops = np.concatenate([cut, [values.size]])
    return [(int(a), int(b), int(values[a])) for a, b in zip(starts, stops, strict=True)]


def _add_tap(out, vout, mout, src, vsrc, msrc, w, w2, nonzero, scratch) -> None:
    """``out += w src``, ``vout += w2 vsrc``, ``mout |= msrc`` where ``nonzero``."""
    tmp = scratch[: out.shape[0], : out.shape[1]]
    np.multiply(src, w, out=tmp)
    out += tmp
    np.multiply(vsrc, w2, out=tmp)
    vout += tmp
    if nonzero.all():
        mout |= msrc
    else:
        mout |= msrc * nonzero


def _flag(mout: np.ndarray, outside_bit: int, nonzero: np.ndarray) -> None:
    if mout.size:
        mout |= np.asarray(outside_bit, mout.dtype) * nonzero


def resample_columns_numpy(
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
    """:func:`pipeline.stages.rectify._resample.resample_columns` in numpy."""
    planes, pos, jac, breaks, (out, vout, mout) = _columns_setup(
        image, variance, mask, positions, jacobian, breaks, nonfinite_bit
    )
    src, vsrc, msrc = planes
    n_cols, n_out, dtype = src.shape[1], out.shape[1], out.dtype
    scratch = np.empty((_CHUNK, n_out), dtype)
    index = np.arange(n_out)
    for block in range(pos.shape[0]):
        j0, w, w2, nonzero = _block_weights(pos[block], jac[block], dtype)
        runs = _runs(j0 - index)
        for r0 in range(int(breaks[block]), int(breaks[block + 1]), _CHUNK):
            r1 = min(r0 + _CHUNK, int(breaks[block + 1]))
            for a, b, offset in runs:
                for k in range(4):
                    s = a + offset + k - 1  # source column of output column a
                    lo, hi = max(s, 0), min(s + b - a, n_cols)
                    oa, ob = a + lo - s, a + hi - s  # output columns with a source
                    if hi > lo:
                        cols = slice(oa, ob)
                        _add_tap(
                            out[r0:r1, cols],
                            vout[r0:r1, cols],
                            mout[r0:r1, cols],
                            src[r0:r1, lo:hi],
                            vsrc[r0:r1, lo:hi],
                            msrc[r0:r1, lo:hi],
                            w[k, cols],
                            w2[k, cols],
                            nonzero[k, cols],
                            scratch,
                        )
                    oa, ob = min(max(oa, a), b), min(max(ob, a), b)
                    _flag(mout[r0:r1, a:oa], outside_bit, nonzero[k, a:oa])
                    _flag(mout[r0:r1, ob:b], outside_bit, nonzero[k, ob:b])
    return out, vout, mout


def shift_rows_numpy(
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
    """:func:`pipeline.stages.rectify._resample.shift_rows` in numpy."""
    planes, off, jac, breaks, (out, vout, mout) = _rows_setup(
        image, variance, mask, offsets, n_out, jacobian, breaks, nonfinite_bit
    )
    src, vsrc, msrc = planes
    n_rows, n_cols, dtype = src.shape[0], out.shape[1], out.dtype
    scratch = np.empty((_CHUNK, n_cols), dtype)
    for block in range(off.shape[0]):
        i0, w, w2, nonzero = _block_weights(off[block], jac[block], dtype)
        runs = _runs(i0)
        for x0 in range(int(breaks[block]), int(breaks[block + 1]), _CHUNK):
            x1 = min(x0 + _CHUNK, int(breaks[block + 1]))
            for a, b, base in runs:
                cols = slice(a, b)
                for k in range(4):
                    s = base + x0 + k - 1  # source row of output row x0
                    lo, hi = max(s, 0), min(s + x1 - x0, n_rows)
                    oa, ob = x0 + lo - s, x0 + hi - s  # output rows with a source
                    if hi > lo:
                        _add_tap(
                            out[oa:ob, cols],
                            vout[oa:ob, cols],
                            mout[oa:ob, cols],
                            src[lo:hi, cols],
                            vsrc[lo:hi, cols],
                            msrc[lo:hi, cols],
                            w[k, cols],
                            w2[k, cols],
                            nonzero[k, cols],
                            scratch,
                        )
                    oa, ob = min(max(oa, x0), x1), min(max(ob, x0), x1)
                    _flag(mout[x0:oa, cols], outside_bit, nonzero[k, cols])
                    _flag(mout[ob:x1, cols], outside_bit, nonzero[k, cols])
    return out, vout, mout


def noise_power_numpy(noise, chunk: int = 1024) -> tuple[np.ndarray, np.ndarray]:
    """:meth:`pipeline.stages.rectify._noise.RectifiedNoise.power` in numpy."""
    lag_y, _ = noise.lags()
    n_y = noise.n_y
    w, u, _, base_y = noise._weights
    total_w = w.sum(axis=0)  # (nb, n_y)
    zero_frequency = np.zeros(noise.shifts.shape)
    variance = np.empty(noise.shifts.shape)
    for lo in range(0, n_y, chunk):
        rows = np.arange(lo, min(lo + chunk, n_y))
        block = noise._pass1_blocks(rows)
        u1 = u[:, block, rows]
        variance[:, rows] = np.sum(w[:, :, rows] ** 2, axis=0) * np.sum(u1**2, axis=0)
        for ly in range(-lag_y, lag_y + 1):
            y2 = rows + ly
            both = (y2 >= 0) & (y2 < n_y)
            y2 = np.clip(y2, 0, n_y - 1)
            offset_y = base_y[block, y2] - base_y[block, rows]  # (nb, n)
            across = _at_offsets(_cross_sums(u1, u[:, block, y2]), offset_y[..., None])
            along = total_w[:, rows] * total_w[:, y2]
            zero_frequency[:, rows] += np.where(both, along * across[..., 0], 0.0)
    return zero_frequency, variance
