"""Stretches with their neighbours' edges, and the night catalogue.

Rectified stretches tile the night's columns exactly, without overlap.  A
star on the seam between two stretches is measured whole by handing the
detection the stretch's own columns plus ``margin`` columns of each
neighbour (:func:`padded_stretch`), and by keeping only the sources whose
fitted first-moment column lies in the stretch's own columns.  The merge
rule of the night catalogue is therefore simply the concatenation of the
stretch catalogues: every star belongs to the one stretch whose columns hold
its first moment, so it appears once.

The runner hands a stretch's unit only the neighbours' edge columns
(``Stage(neighbours=...)``, :mod:`pipeline.stages.base`), so a unit's memory
does not grow with the night; a neighbour that failed upstream is replaced by
no-data columns, and the sources there are flagged ``EDGE``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from astropy.table import Table, vstack
from astropy.wcs import WCS

from pipeline.masks import MASK_DTYPE, MaskBit

__all__ = ["MERGE_RULE", "Planes", "padded_stretch"]

#: How the night catalogue lists each source once (stored in the catalogues' meta).
MERGE_RULE = (
    "each source belongs to the stretch whose own columns hold its first-moment column x "
    "(x >= first column - 0.5 and x < last column + 0.5); seam stars were measured with the "
    "neighbouring stretch's edge columns"
)


@dataclass(frozen=True)
class Planes:
    """One rectified stretch's planes and records.

    Attributes
    ----------
    image, variance : ndarray, shape (n_y, n_x)
    mask : ndarray of uint16
    x_start : int
        Night column of the first column.
    kernels : astropy.table.Table
        rectify's ``smear_kernels``.
    wcs : astropy.wcs.WCS or None
        Celestial WCS of the arrays.
    """

    image: np.ndarray
    variance: np.ndarray
    mask: np.ndarray
    x_start: int
    kernels: Table
    wcs: WCS | None = None

    @property
    def x_stop(self) -> int:
        """Night column after the last column."""
        return self.x_start + self.image.shape[1]


def padded_stretch(
    own: Planes, left: Planes | None, right: Planes | None, margin: int
) -> tuple[Planes, tuple[int, int]]:
    """The stretch with up to ``margin`` columns of each adjacent neighbour.

    A neighbour is used only if it adjoins the stretch exactly (its last
    column precedes the first, or its first follows the last) and has the
    same number of rows; otherwise that side is padded with no-data columns
    (flag OUTSIDE), so sources there are flagged EDGE.

    Returns
    -------
    planes : Planes
        The padded arrays, their ``x_start``, the kernels of all three and
        the WCS shifted to the padded arrays.
    own_columns : (int, int)
        Array columns ``[a, b)`` of the stretch's own columns.
    """
    ny = own.image.shape[0]

    def side(neighbour, take_last: bool):
        ok = (
            neighbour is not None
            and neighbour.image.shape[0] == ny
            and (neighbour.x_stop == own.x_start if take_last else neighbour.x_start == own.x_stop)
        )
        if not ok:
            return (
                np.full((ny, margin), np.nan),
                np.full((ny, margin), np.nan),
                np.full((ny, margin), int(MaskBit.OUTSIDE), MASK_DTYPE),
                None,
            )
        cols = (
            slice(max(neighbour.image.shape[1] - margin, 0), None)
            if take_last
            else slice(0, margin)
        )
        planes = [
            np.asarray(a)[:, cols] for a in (neighbour.image, neighbour.variance, neighbour.mask)
        ]
        width = planes[0].shape[1]
        if width < margin:  # a narrow neighbour: pad the rest with no data
            pad = margin - width
            fill = [
                np.full((ny, pad), np.nan),
                np.full((ny, pad), np.nan),
                np.full((ny, pad), int(MaskBit.OUTSIDE), MASK_DTYPE),
            ]
            planes = [
                np.hstack([f, p]) if take_last else np.hstack([p, f])
                for f, p in zip(fill, planes, strict=True)
            ]
        return (*planes, neighbour.kernels)

    lo = side(left, True)
    hi = side(right, False)
    image = np.hstack([lo[0], np.asarray(own.image, dtype=float), hi[0]])
    variance = np.hstack([lo[1], np.asarray(own.variance, dtype=float), hi[1]])
    mask = np.hstack([lo[2], np.asarray(own.mask).astype(MASK_DTYPE), hi[2]])
    kernels = vstack(
        [k for k in (lo[3], own.kernels, hi[3]) if k is not None], metadata_conflicts="silent"
    )
    wcs = None
    if own.wcs is not None:
        wcs = own.wcs.deepcopy()
        wcs.wcs.crpix[0] += margin
    planes = Planes(image, variance, mask, own.x_start - margin, kernels, wcs)
    return planes, (margin, margin + own.image.shape[1])
