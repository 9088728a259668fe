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
from typing import TYPE_CHECKING

import numpy as np

from pipeline.masks import MASK_DTYPE, MaskBit

if TYPE_CHECKING:
    from astropy.table import Table
    from astropy.wcs import WCS

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

    The image and variance planes are float32 (native byte order) when the
    stretch's and the neighbours' edges are (a rectified product's, as
    stored; :func:`~pipeline.stages.detect.detect` keeps them so), else
    float64; each padded plane is made once and filled in place (no copy
    of the stretch's planes in between).

    Returns
    -------
    planes : Planes
        The padded arrays, their ``x_start``, the kernels of all three and
        the WCS shifted to the padded arrays.
    own_columns : (int, int)
        Array columns ``[a, b)`` of the stretch's own columns.
    """
    from astropy.table import vstack

    ny, nx = own.image.shape[0], own.image.shape[1]

    def edge(neighbour, take_last: bool):
        """The neighbour's edge planes (views), or None if it does not adjoin."""
        ok = (
            neighbour is not None
            and neighbour.image.shape[0] == ny
            and (neighbour.x_stop == own.x_start if take_last else neighbour.x_start == own.x_stop)
        )
        if not ok:
            return None
        cols = (
            slice(max(neighbour.image.shape[1] - margin, 0), None)
            if take_last
            else slice(0, margin)
        )
        return [
            np.asarray(a)[:, cols] for a in (neighbour.image, neighbour.variance, neighbour.mask)
        ]

    lo, hi = edge(left, True), edge(right, False)
    sources = [own.image, own.variance] + [p for e in (lo, hi) if e is not None for p in e[:2]]
    single = all(np.asarray(a).dtype.kind == "f" and np.asarray(a).itemsize == 4 for a in sources)
    dtype = np.float32 if single else np.float64
    width = nx + 2 * margin
    image = np.empty((ny, width), dtype)
    variance = np.empty((ny, width), dtype)
    mask = np.empty((ny, width), MASK_DTYPE)
    for planes, columns, take_last in (
        (lo, slice(0, margin), True),
        ([own.image, own.variance, own.mask], slice(margin, margin + nx), None),
        (hi, slice(margin + nx, width), False),
    ):
        targets = (image[:, columns], variance[:, columns], mask[:, columns])
        n = columns.stop - columns.start
        if planes is None:
            got = 0
        else:
            got = np.asarray(planes[0]).shape[1]
            # a narrow neighbour: its columns next to the stretch, no data beyond
            place = slice(n - got, n) if take_last else slice(0, got)
            for target, plane in zip(targets, planes, strict=True):
                target[:, place] = plane
        if got < n:  # no neighbour, or a narrow one: the rest has no data
            rest = slice(0, n - got) if take_last else slice(got, n)
            targets[0][:, rest] = np.nan
            targets[1][:, rest] = np.nan
            targets[2][:, rest] = int(MaskBit.OUTSIDE)
    kernels = vstack(
        [
            k
            for k in (
                left.kernels if lo is not None else None,
                own.kernels,
                right.kernels if hi is not None else None,
            )
            if k is not None
        ],
        metadata_conflicts="silent",
    )
    wcs = None
    if own.wcs is not None:
        wcs = own.wcs.deepcopy()
        wcs.wcs.crpix[0] += margin
    planes = Planes(image, variance, mask, own.x_start - margin, kernels, wcs)
    return planes, (margin, margin + nx)
