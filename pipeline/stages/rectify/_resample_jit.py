"""The compiled loops of the rectify stage: its two resampling passes and its noise power.

:func:`pipeline.stages.rectify._resample.resample_columns` and
:func:`~pipeline.stages.rectify._resample.shift_rows` hand each block of rows
to one loop here.  Per output pixel it adds the four taps in their order,
each as the numpy passes it replaced did for a whole chunk at once (kept in
``tests/_rectify_reference.py``): ``out += w src`` and ``var += w2 vsrc`` in
the planes' dtype, the flags OR-ed where the tap's weight is non-zero, and
the ``outside`` bit where such a tap falls beyond the input.  The same
operations on the same values in the same order give the same bits: no
fused multiply-add (no ``fastmath``), and no constant that would widen a
float32 sum.  One pass over the output instead of four read-modify-writes
of whole chunks per tap (plus a scratch plane) is what makes it cheaper.

:func:`zero_frequency_rows` does the same for the row-lag sum of the noise
power (:meth:`pipeline.stages.rectify._noise.RectifiedNoise.power`), which
formed all seven tap offsets of every pair of rows to pick one.

:func:`zero_nonfinite` clears the non-finite pixels of the input planes in
one pass, where numpy made a pass per test, per ``where`` and per ``|``
(seven over a stretch, on top of the two sums that find them).

Kept apart so that numba is imported only when a stretch is first rectified
(the stage's ``Stage.warm`` loads it, with numba's disk cache, as a worker
starts).
"""

from __future__ import annotations

import numpy as np

from pipeline._jit import njit

__all__ = [
    "resample_columns_block",
    "shift_rows_block",
    "zero_frequency_rows",
    "zero_nonfinite",
]


@njit(nogil=True)
def resample_columns_block(
    src, vsrc, msrc, out, vout, mout, r0, r1, base, w, w2, nonzero, outside_bit
):
    """Pass 1 for rows ``[r0, r1)``: output column ``o`` reads ``base[o] - 1 ... base[o] + 2``.

    ``out``, ``vout`` and ``mout`` hold zeros and are filled in place;
    ``w``, ``w2`` and ``nonzero`` (1 where a tap's weight is non-zero, else 0)
    have shape ``(4, n_out)``.
    """
    n_cols = src.shape[1]
    n_out = out.shape[1]
    for r in range(r0, r1):
        for o in range(n_out):
            value = out[r, o]
            var = vout[r, o]
            flags = np.uint64(mout[r, o])
            first = base[o] - 1
            if first >= 0 and first + 3 < n_cols:  # all four taps inside
                for k in range(4):
                    value += w[k, o] * src[r, first + k]
                    var += w2[k, o] * vsrc[r, first + k]
                    flags |= np.uint64(msrc[r, first + k]) * np.uint64(nonzero[k, o])
            else:
                for k in range(4):
                    s = first + k
                    if 0 <= s < n_cols:
                        value += w[k, o] * src[r, s]
                        var += w2[k, o] * vsrc[r, s]
                        flags |= np.uint64(msrc[r, s]) * np.uint64(nonzero[k, o])
                    else:
                        flags |= outside_bit * np.uint64(nonzero[k, o])
            out[r, o] = value
            vout[r, o] = var
            mout[r, o] = flags


@njit(nogil=True)
def shift_rows_block(src, vsrc, msrc, out, vout, mout, x0, x1, base, w, w2, nonzero, outside_bit):
    """Pass 2 for output rows ``[x0, x1)``: row ``x`` of column ``y`` reads ``base[y] + x - 1 ...``.

    As :func:`resample_columns_block`, with ``w``, ``w2`` and ``nonzero`` of
    shape ``(4, n_columns)``.
    """
    n_rows = src.shape[0]
    n_cols = out.shape[1]
    for x in range(x0, x1):
        for y in range(n_cols):
            value = out[x, y]
            var = vout[x, y]
            flags = np.uint64(mout[x, y])
            first = base[y] + x - 1
            if first >= 0 and first + 3 < n_rows:  # all four taps inside
                for k in range(4):
                    value += w[k, y] * src[first + k, y]
                    var += w2[k, y] * vsrc[first + k, y]
                    flags |= np.uint64(msrc[first + k, y]) * np.uint64(nonzero[k, y])
            else:
                for k in range(4):
                    s = first + k
                    if 0 <= s < n_rows:
                        value += w[k, y] * src[s, y]
                        var += w2[k, y] * vsrc[s, y]
                        flags |= np.uint64(msrc[s, y]) * np.uint64(nonzero[k, y])
                    else:
                        flags |= outside_bit * np.uint64(nonzero[k, y])
            out[x, y] = value
            vout[x, y] = var
            mout[x, y] = flags


@njit(nogil=True)
def zero_frequency_rows(u, base_y, block, rows, total_w, lag_y, zero_frequency):
    """Add ``sum_l_y W(y) W(y + l_y) S_y(y, l_y)`` to ``zero_frequency[:, rows]``.

    The row-lag sum of :meth:`pipeline.stages.rectify._noise.RectifiedNoise.power`
    for pass-2 blocks ``b`` reading pass-1 blocks ``block[b, i]`` at rows
    ``rows[i]``, in the numpy loop's order: lags from ``-lag_y`` up, each
    ``S_y`` summed over the taps ``k`` in order, and 0 added for a lag beyond
    the image.
    """
    n_y = total_w.shape[1]
    for b in range(block.shape[0]):
        for i in range(rows.size):
            y1 = rows[i]
            first = block[b, i]
            total = zero_frequency[b, y1]
            for ly in range(-lag_y, lag_y + 1):
                y2 = min(max(y1 + ly, 0), n_y - 1)
                offset = base_y[first, y2] - base_y[first, y1]
                across = 0.0
                for k in range(4):
                    j = k - offset
                    if 0 <= j < 4:
                        across += u[k, first, y1] * u[j, first, y2]
                if 0 <= y1 + ly < n_y:
                    total += total_w[b, y1] * total_w[b, y2] * across
                else:
                    total += 0.0
            zero_frequency[b, y1] = total


@njit(nogil=True)
def zero_nonfinite(image, variance, mask, bit):
    """Where ``image`` or ``variance`` is not finite: both set to 0, ``bit`` OR-ed into ``mask``.

    In place; ``bit`` has the mask's dtype.
    """
    for i in range(image.shape[0]):
        for j in range(image.shape[1]):
            if not (np.isfinite(image[i, j]) and np.isfinite(variance[i, j])):
                image[i, j] = 0.0
                variance[i, j] = 0.0
                mask[i, j] |= bit
