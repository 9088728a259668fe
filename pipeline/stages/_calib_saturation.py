"""Saturated pixels and their bleed trails along the scan.

In TDI a packet collects charge while it crosses the chip; once it holds a
full well the excess spills into the packets before and after it in the same
column, so bleed trails run along the scan axis (rows), never across it
(CHECK_VALUES 3.8).  The trail is at or near full well and ends in a partly
filled pixel; the saturated star's unsaturated neighbours across the scan are
not trustworthy either (common practice: grow the mask by a pixel).
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage

__all__ = ["bleed_mask", "saturation_mask"]


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


def bleed_mask(
    raw: np.ndarray,
    saturated: np.ndarray,
    bleed_level: float | np.ndarray,
    grow_rows: int = 2,
    grow_columns: int = 1,
) -> np.ndarray:
    """Bleed trails of saturated pixels along the scan, grown by a margin.

    A bleed pixel lies in the same column as a saturated pixel, is connected to
    it along the column through pixels at or above ``bleed_level``, and is not
    saturated itself; the union of saturated and bleed pixels is then grown by
    ``grow_rows`` along the scan and ``grow_columns`` across it.

    Parameters
    ----------
    raw : ndarray, shape (n_rows, n_columns)
        Raw image in ADU; axis 0 is the scan axis.
    saturated : ndarray of bool, shape (n_rows, n_columns)
        Output of :func:`saturation_mask`.
    bleed_level : float or ndarray of shape (n_rows,)
        Raw level in ADU above which a pixel next to a saturated one along the
        column counts as part of its trail.
    grow_rows, grow_columns : int
        Margin added around saturated and bleed pixels, in rows (along the
        scan) and columns (across it).

    Returns
    -------
    ndarray of bool, shape (n_rows, n_columns)
        True on bleed pixels and on the margin; false on the saturated pixels
        themselves (they carry their own bit).
    """
    result = np.zeros(saturated.shape, dtype=bool)
    columns = np.flatnonzero(saturated.any(axis=0))
    if columns.size == 0:
        return result
    level = np.asarray(bleed_level, dtype=raw.dtype)
    if level.ndim == 1:
        level = level[:, None]
    # Work on the few columns that hold saturated pixels only.
    sub_sat = saturated[:, columns]
    high = (raw[:, columns] >= level) | sub_sat
    # Runs of high pixels along each column (the scan axis only).
    labels, _ = ndimage.label(high, structure=np.array([[0, 0, 0], [1, 1, 1], [0, 0, 0]]).T)
    touched = np.unique(labels[sub_sat])
    trail = np.isin(labels, touched[touched > 0])
    if grow_rows > 0:
        trail = ndimage.binary_dilation(trail, structure=np.ones((2 * grow_rows + 1, 1), bool))
    n_columns = saturated.shape[1]
    for shift in range(-grow_columns, grow_columns + 1):
        target = columns + shift
        inside = (target >= 0) & (target < n_columns)
        result[:, target[inside]] |= trail[:, inside]
    result &= ~saturated
    return result
