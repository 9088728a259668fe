"""Saturated pixels and their bleed trails along the scan.

In TDI a packet collects charge while it crosses the chip; once it holds a
full well the excess spills into the packets before and after it in the same
column, so bleed trails run along the scan axis (rows), never across it
(DEVELOPERS.md, "TDI detector facts").  The trail is at or near full well and ends in a partly
filled pixel; the saturated star's unsaturated neighbours across the scan are
not trustworthy either (common practice: grow the mask by a pixel).
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

__all__ = ["bleed_level", "bleed_mask", "bleed_pixels", "saturation_mask"]

#: Every how many columns a row's sky is sampled for :func:`bleed_level`
#: (the median of 512 of a 4096-column row: a star or a hot column moves it
#: by a fraction of the sky's noise, and the level needs it to a few %).
SKY_STEP = 8


def saturation_mask(raw: np.ndarray, saturation: float | np.ndarray) -> np.ndarray:
    """Pixels whose raw value reached the saturation level.

    Parameters
    ----------
    raw : ndarray, shape (n_rows, n_columns)
        Raw image in ADU (bias included, as the SATURATE keyword is); axis 0 is
        the scan axis.
    saturation : float or ndarray of shape (n_rows,)
        SATURATE in ADU, for all rows or per row.

    Returns
    -------
    ndarray of bool, shape (n_rows, n_columns)
    """
    saturation = np.asarray(saturation, dtype=raw.dtype)
    if saturation.ndim == 1:
        saturation = saturation[:, None]
    return raw >= saturation


def bleed_level(
    raw: np.ndarray,
    bias: np.ndarray,
    saturation: float | np.ndarray,
    fraction: float,
    rows: np.ndarray | None = None,
) -> np.ndarray:
    """Raw level of rows above which a saturated pixel's neighbour is its trail.

    A trail pixel holds spilled charge on top of the sky: it lies above the
    row's sky (or its bias, if that is higher) by ``fraction`` of the room
    left between that and ``SATURATE``.  Measured from the bias alone, a
    twilight sky above ``bias + fraction * (SATURATE - bias)`` would continue
    every trail through the sky to the end of its column.  The sky is the
    median of every :data:`SKY_STEP`-th pixel of the row (a non-finite one
    counts as the lowest: a row mostly without data takes its bias).

    Parameters
    ----------
    raw : ndarray, shape (n_rows, n_columns)
        Raw image in ADU; axis 0 is the scan axis.
    bias : ndarray of float, shape (n_rows,)
        Each row's bias level, ADU (0 where unknown).
    saturation : float or ndarray of shape (n_rows,)
        SATURATE in ADU.
    fraction : float
        Fraction of the room between the row's sky and SATURATE, in (0, 1].
    rows : ndarray of int or None
        The rows wanted (:func:`bleed_pixels` asks only for those its walks
        reach); None: all.

    Returns
    -------
    ndarray of float, shape (n_rows,) or ``rows.shape``
        ADU.
    """
    rows = np.arange(raw.shape[0]) if rows is None else np.asarray(rows, dtype=np.int64)
    sample = np.array(raw[rows, ::SKY_STEP], dtype=np.float64)
    if sample.shape[1] == 0:
        sky = np.full(rows.size, -np.inf)
    else:
        sample[~np.isfinite(sample)] = -np.inf
        sky = np.median(sample, axis=1)
    base = np.fmax(np.asarray(bias, dtype=np.float64)[rows], sky)
    saturation = np.broadcast_to(np.asarray(saturation, dtype=np.float64), (raw.shape[0],))
    return base + fraction * (saturation[rows] - base)


def bleed_pixels(
    raw: np.ndarray,
    saturated_index: np.ndarray,
    bleed_level: float | np.ndarray | Callable[[np.ndarray], np.ndarray],
    grow_rows: int = 2,
    grow_columns: int = 1,
) -> np.ndarray:
    """Flat indices of the bleed trails of saturated pixels, grown by a margin.

    A bleed pixel lies in the same column as a saturated pixel, is connected to
    it along the column through pixels at or above ``bleed_level``, and is not
    saturated itself; the union of saturated and bleed pixels is then grown by
    ``grow_rows`` along the scan and ``grow_columns`` across it.

    Parameters
    ----------
    raw : ndarray, shape (n_rows, n_columns)
        Raw image in ADU (C order); axis 0 is the scan axis.
    saturated_index : ndarray of int
        Sorted flat indices of the saturated pixels.
    bleed_level : float, ndarray of shape (n_rows,) or callable
        Raw level in ADU above which a pixel next to a saturated one along the
        column counts as part of its trail; a callable gives the levels of the
        rows (ndarray of int) it is called with, and is asked only for the
        rows the trails reach (e.g. :func:`bleed_level` with ``rows``).
    grow_rows, grow_columns : int
        Margin added around saturated and bleed pixels, in rows (along the
        scan) and columns (across it).

    Returns
    -------
    ndarray of int
        Sorted flat indices of the bleed pixels and the margin, saturated
        pixels excluded (they carry their own bit).
    """
    n_rows, n_columns = raw.shape
    saturated_index = np.asarray(saturated_index, dtype=np.int64)
    if saturated_index.size == 0:
        return saturated_index
    if callable(bleed_level):
        known = np.zeros(n_rows, dtype=bool)
        level = np.empty(n_rows)

        def levels(rows: np.ndarray) -> np.ndarray:
            wanted = np.unique(rows[~known[rows]])
            if wanted.size:
                level[wanted] = bleed_level(wanted)
                known[wanted] = True
            return level[rows]
    else:
        fixed = np.broadcast_to(np.asarray(bleed_level, dtype=np.float64), (n_rows,))

        def levels(rows: np.ndarray) -> np.ndarray:
            return fixed[rows]

    flat_raw = raw.reshape(-1)
    is_saturated = np.zeros(raw.size, dtype=bool)
    is_saturated[saturated_index] = True
    trail = [saturated_index]
    # Walk from the ends of every saturated run along its column (the scan
    # axis) while the pixels stay at or above the bleed level.
    for step in (-n_columns, n_columns):
        front = saturated_index
        while front.size:
            nxt = front + step
            nxt = nxt[(nxt >= 0) & (nxt < raw.size)]
            nxt = nxt[~is_saturated[nxt]]  # saturated pixels are walked from themselves
            nxt = nxt[flat_raw[nxt] >= levels(nxt // n_columns)]
            trail.append(nxt)
            front = nxt
    rows, cols = np.divmod(np.concatenate(trail), n_columns)
    dr = np.arange(-grow_rows, grow_rows + 1)
    dc = np.arange(-grow_columns, grow_columns + 1)
    r = np.clip(rows[:, None, None] + dr[None, :, None], 0, n_rows - 1)
    c = np.clip(cols[:, None, None] + dc[None, None, :], 0, n_columns - 1)
    grown = np.zeros(raw.size, dtype=bool)
    grown[(r * n_columns + c).ravel()] = True
    grown[saturated_index] = False
    return np.flatnonzero(grown)


def bleed_mask(
    raw: np.ndarray,
    saturated: np.ndarray,
    bleed_level: float | np.ndarray,
    grow_rows: int = 2,
    grow_columns: int = 1,
) -> np.ndarray:
    """Boolean-image form of :func:`bleed_pixels`.

    Parameters
    ----------
    raw : ndarray, shape (n_rows, n_columns)
        Raw image in ADU; axis 0 is the scan axis.
    saturated : ndarray of bool, shape (n_rows, n_columns)
        Output of :func:`saturation_mask`.
    bleed_level, grow_rows, grow_columns
        See :func:`bleed_pixels`.

    Returns
    -------
    ndarray of bool, shape (n_rows, n_columns)
        True on bleed pixels and on the margin; false on saturated pixels.
    """
    result = np.zeros(saturated.shape, dtype=bool)
    index = bleed_pixels(
        np.ascontiguousarray(raw), np.flatnonzero(saturated), bleed_level, grow_rows, grow_columns
    )
    result.reshape(-1)[index] = True
    return result
