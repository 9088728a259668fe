"""Stretches of one night that meet: resample each with its neighbours' edge pixels.

A night's rectified stretches tile the night's pixel grid without overlap.
Resampled one by one, each loses the output pixels whose interpolation
kernel reaches beyond its own edge (they are flagged ``OUTSIDE`` and left
without data), which leaves a gap of ~4 tile pixels along every seam.

:func:`extended_planes` gives a stretch a margin of ``MARGIN`` pixels taken
from the other products of the night that lie on the same pixel grid (a
constant whole-pixel offset between their WCSs, to ``GRID_TOLERANCE``), and
the input box the stretch answers for (its own pixels).  The resampler
leaves the output pixels whose sampling position falls outside that box to
the neighbour, so every output pixel is resampled once, from the pixels on
both sides of the seam, with the WCS of the stretch it lies in.
"""

from __future__ import annotations

import logging
from collections.abc import Sequence

import numpy as np
from astropy.wcs import WCS, Sip

from pipeline.masks import MASK_DTYPE, MaskBit

__all__ = ["GRID_TOLERANCE", "MARGIN", "SEAM_OVERLAP", "extended_planes"]

log = logging.getLogger(__name__)

#: Pixels borrowed from the neighbours on each side: two 4-tap passes reach
#: 2 px each (an average over a tile pixel 2 tile pixels: 3.9 px on
#: the demo's tiles, 1.92 night pixels; tiles over ~3.5 times coarser than
#: their nights leave a gap along the seams), and a small turn between the
#: night and the tile moves a tap row by well under a pixel over this margin.
MARGIN = 8
#: Largest distance from a whole-pixel offset for two products to share a grid,
#: px: the astrometry stage fits each stretch's WCS to 0.02 px of the night's
#: solution, so neighbours on one grid agree to 0.04 px.
GRID_TOLERANCE = 0.1
#: Each product answers for sampling positions up to this far beyond its own
#: pixels, px: more than the 0.04 px two neighbours' WCSs may disagree by, so
#: that no output pixel falls between them (where both answer, the first wins).
SEAM_OVERLAP = 0.05


def _grid_offset(wcs: WCS, shape, other_wcs: WCS) -> tuple[int, int] | None:
    """Whole-pixel ``(dy, dx)`` with ``pixel = other pixel + (dy, dx)``; None: another grid."""
    n_y, n_x = shape
    # the other product's origin and two far points, in this product's pixels
    probe = np.array([[0.0, 0.0], [n_x - 1.0, 0.0], [0.0, n_y - 1.0]])
    world = wcs.pixel_to_world_values(probe[:, 0], probe[:, 1])
    ox, oy = (np.asarray(a, float) for a in other_wcs.world_to_pixel_values(*world))
    dx, dy = probe[:, 0] - ox, probe[:, 1] - oy
    if not (np.isfinite(dx).all() and np.isfinite(dy).all()):
        return None
    offset = (round(float(dy[0])), round(float(dx[0])))
    if max(np.abs(dy - offset[0]).max(), np.abs(dx - offset[1]).max()) > GRID_TOLERANCE:
        return None
    return offset


def _shifted_wcs(wcs: WCS, dy: int, dx: int) -> WCS:
    """The WCS of the same sky with pixel ``(x, y)`` renamed ``(x + dx, y + dy)``."""
    out = wcs.deepcopy()
    out.wcs.crpix = out.wcs.crpix + np.array([dx, dy], float)
    if out.sip is not None:
        sip = out.sip
        out.sip = Sip(
            sip.a, sip.b, sip.ap, sip.bp, np.asarray(sip.crpix) + np.array([dx, dy], float)
        )
    out.pixel_shape = None
    out.wcs.set()
    return out


def extended_planes(
    planes: tuple[np.ndarray, np.ndarray, np.ndarray],
    wcs: WCS,
    neighbours: Sequence[tuple[tuple[np.ndarray, np.ndarray, np.ndarray], WCS]],
):
    """A product's planes with ``MARGIN`` pixels of its same-grid neighbours around them.

    Parameters
    ----------
    planes : (image, variance, flags)
        The product's planes, shape (n_y, n_x).
    wcs : astropy.wcs.WCS
        Its celestial WCS.
    neighbours : sequence of ((image, variance, flags), WCS)
        The other products of the same night (on the same photometric scale).

    Returns
    -------
    planes : (image, variance, flags)
        Shape (n_y + 2 MARGIN, n_x + 2 MARGIN): the neighbours' pixels where
        they reach, 0 flagged ``OUTSIDE`` elsewhere in the margin, the
        product's own pixels in the middle; or the inputs themselves if no
        neighbour on the same grid reaches the margin.
    wcs : astropy.wcs.WCS
        The WCS of the returned planes.
    core : tuple of float or None
        ``(y_lo, y_hi, x_lo, x_hi)``: the sampling positions the product
        answers for in the returned planes (its own pixels' extent, widened by
        ``SEAM_OVERLAP``); None when nothing was added.
    """
    n_y, n_x = planes[0].shape
    m = MARGIN
    big = (n_y + 2 * m, n_x + 2 * m)
    out = None
    for (other_image, other_variance, other_flags), other_wcs in neighbours:
        offset = _grid_offset(wcs, other_image.shape, other_wcs)
        if offset is None:
            continue
        # the neighbour's pixels in the extended frame: [y0, y1) x [x0, x1), clipped
        y0, x0 = offset[0] + m, offset[1] + m
        y1, x1 = y0 + other_image.shape[0], x0 + other_image.shape[1]
        cy0, cy1, cx0, cx1 = max(y0, 0), min(y1, big[0]), max(x0, 0), min(x1, big[1])
        if cy0 >= cy1 or cx0 >= cx1:
            continue
        if out is None:
            out = (
                np.zeros(big, np.float32),
                np.zeros(big, np.float32),
                np.full(big, MaskBit.OUTSIDE, MASK_DTYPE),
            )
        source = np.s_[cy0 - y0 : cy1 - y0, cx0 - x0 : cx1 - x0]
        target = np.s_[cy0:cy1, cx0:cx1]
        for plane, other in zip(out, (other_image, other_variance, other_flags), strict=True):
            plane[target] = other[source]
    if out is None:
        return planes, wcs, None
    core = np.s_[m : m + n_y, m : m + n_x]
    for plane, own in zip(out, planes, strict=True):
        plane[core] = own
    log.debug("product of %d x %d px extended by its neighbours' edges", n_y, n_x)
    low, extra = m - 0.5 - SEAM_OVERLAP, 2 * SEAM_OVERLAP
    return out, _shifted_wcs(wcs, m, m), (low, low + n_y + extra, low, low + n_x + extra)
