"""Satellite and aircraft trails: long, thin segments of the first search.

A satellite crosses the chip in a fraction of a second and leaves a straight
line of light tens to thousands of pixels long and a seeing wide.  The search
takes it for one long segment, which the deblending cuts into a chain of
"sources" (a simulated 1024-column night: 127 false sources along one trail),
and a real star under it is measured with the trail's light.  Masking linear
features before measuring is common practice; here the sources on a trail are
flagged TRAIL (they stay in the catalogue: a star under a trail cannot be told
from a piece of it), and the astrometric and zero-point fits leave them out.
Detect writes the trails (:func:`trail_table`, its ``trails`` product), and
the science stage marks their pixels TRAIL (:func:`trail_pixels`).

A segment (the whole segment before deblending) is a trail when it is long,
:data:`TRAIL_LENGTH_FWHM` seeing FWHMs plus twice the stretch's longest smear
kernel, and thin, its length at least :data:`TRAIL_ELONGATION` times its
width (along and across the axis of its pixels' second moments; the width
from their median distance from the axis, which the stars the trail's
segment swallowed barely move).  A source is on it within a seeing FWHM of
that band.  A star's streak is at most a kernel and a few FWHMs long; a
blend of stars or a galaxy is not that thin.  A saturated star's bleed
trail runs along the scan as thin and long, but its segment holds the
saturated and bleed pixels: a segment with more than
:data:`CLIPPED_FRACTION` of them is not a trail.  A trail too faint to make
one long segment (broken into short pieces) is not found.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from pipeline.masks import MaskBit

__all__ = [
    "CLIPPED_FRACTION",
    "TRAIL_ELONGATION",
    "TRAIL_LENGTH_FWHM",
    "Trail",
    "kernel_length",
    "on_trails",
    "trail_pixels",
    "trail_segments",
    "trail_table",
]

#: Shortest trail, seeing FWHMs (plus twice the longest smear kernel).
TRAIL_LENGTH_FWHM = 10.0
#: Least ratio of a trail's length to its width.
TRAIL_ELONGATION = 6.0
#: Largest fraction of a trail's pixels that may be saturated or bleed.
CLIPPED_FRACTION = 0.2

_CLIPPED = int(MaskBit.SATURATED | MaskBit.BLEED)


def kernel_length(dx: np.ndarray, dy: np.ndarray) -> float:
    """Longest extent of any recorded smear kernel, pixels.

    Parameters
    ----------
    dx, dy : ndarray, shape (n, K)
        rectify's ``smear_kernels`` samples (pixels).

    Examples
    --------
    >>> kernel_length(np.array([[-2.0, 0.0, 3.0]]), np.array([[0.0, 0.5, 0.0]]))
    5.0
    """
    dx, dy = np.atleast_2d(dx), np.atleast_2d(dy)
    if dx.size == 0:
        return 0.0
    return float(max(np.ptp(dx, axis=1).max(), np.ptp(dy, axis=1).max()))


@dataclass(frozen=True)
class Trail:
    """A straight trail across a stretch (array pixels; ``x`` along the scan).

    Attributes
    ----------
    x, y : float
        Its centre (the mean of its segment's pixels).
    ux, uy : float
        Unit vector along it.
    half_length : float
        Half its length along ``(ux, uy)``, px (to its farthest pixel).
    half_width : float
        Half its width across, px: twice the median distance of its pixels
        from its axis (a uniform band of width ``w`` has a median of ``w / 4``),
        robust to the stars whose segments it swallowed.
    """

    x: float
    y: float
    ux: float
    uy: float
    half_length: float
    half_width: float


def trail_segments(segm, parent: dict, mask: np.ndarray, min_length: float) -> list[Trail]:
    """The segments that are trails.

    Parameters
    ----------
    segm : Segmentation
        The search's segments after deblending (``data``, ``labels``,
        ``slices``).
    parent : dict
        Label -> key shared by the children of one split segment
        (:func:`~pipeline.stages.detect._find.find_sources`).
    mask : ndarray of uint16, shape of ``segm.data``
        The stretch's :class:`~pipeline.masks.MaskBit` bits.
    min_length : float
        Shortest trail, pixels (:data:`TRAIL_LENGTH_FWHM` FWHMs plus twice
        the longest smear kernel).

    Returns
    -------
    list of Trail
    """
    if segm is None or not len(segm.labels):
        return []
    groups: dict[int, list[int]] = {}
    for i, label in enumerate(segm.labels):
        groups.setdefault(parent.get(int(label), int(label)), []).append(i)
    trails = []
    for members in groups.values():
        rows = [segm.slices[i][0] for i in members]
        cols = [segm.slices[i][1] for i in members]
        y0, y1 = min(s.start for s in rows), max(s.stop for s in rows)
        x0, x1 = min(s.start for s in cols), max(s.stop for s in cols)
        if np.hypot(y1 - y0, x1 - x0) < min_length:
            continue  # most segments: too small to be a trail
        box = segm.data[y0:y1, x0:x1]
        yy, xx = np.nonzero(np.isin(box, np.asarray(segm.labels)[members]))
        if yy.size < 3:
            continue
        trail = _as_line(xx + float(x0), yy + float(y0))
        if 2.0 * trail.half_length < min_length:
            continue
        if 2.0 * trail.half_length < TRAIL_ELONGATION * 2.0 * trail.half_width:
            continue
        clipped = mask[yy + y0, xx + x0] & _CLIPPED
        if np.mean(clipped != 0) > CLIPPED_FRACTION:
            continue  # a saturated star and its bleed trail
        trails.append(trail)
    return trails


def _as_line(x: np.ndarray, y: np.ndarray) -> Trail:
    """The pixels ``(x, y)`` as a straight band: axis from their second moments."""
    cx, cy = float(x.mean()), float(y.mean())
    cov = np.cov(np.vstack([x - cx, y - cy]))
    _, vectors = np.linalg.eigh(cov)
    ux, uy = (float(v) for v in vectors[:, -1])
    along = (x - cx) * ux + (y - cy) * uy
    across = -(x - cx) * uy + (y - cy) * ux
    half_width = max(2.0 * float(np.median(np.abs(across))), 0.5)
    return Trail(cx, cy, ux, uy, float(np.max(np.abs(along))), half_width)


def on_trails(trails: list[Trail], x: np.ndarray, y: np.ndarray, reach: float) -> np.ndarray:
    """Whether each position lies on a trail: within ``reach`` pixels of its band.

    Parameters
    ----------
    trails : list of Trail
        :func:`trail_segments`.
    x, y : ndarray
        Array positions (pixels; ``x`` along the scan).
    reach : float
        Pixels (a seeing FWHM: a star whose core the trail crosses).

    Returns
    -------
    ndarray of bool
    """
    x, y = np.asarray(x, float), np.asarray(y, float)
    hit = np.zeros(x.shape, bool)
    for t in trails:
        along = (x - t.x) * t.ux + (y - t.y) * t.uy
        across = -(x - t.x) * t.uy + (y - t.y) * t.ux
        hit |= (np.abs(along) <= t.half_length + reach) & (np.abs(across) <= t.half_width + reach)
    return hit


def trail_table(trails: list[Trail], x_start: float, fwhm: float):
    """The trails as detect's ``trails`` product, in the night's rectified pixels.

    Parameters
    ----------
    trails : list of Trail
        :func:`trail_segments` of a stretch's arrays.
    x_start : float
        Night column of the arrays' first column.
    fwhm : float
        The seeing FWHM of the stretch's fits, px: the reach of a trail
        beyond its band (``reach``), within which a source is on it.

    Returns
    -------
    astropy.table.Table
        Columns ``x``, ``y`` (centre), ``ux``, ``uy`` (unit vector along),
        ``half_length``, ``half_width``, ``reach``; no rows without trails.
    """
    from astropy import units as u
    from astropy.table import Table

    reach = float(fwhm)
    table = Table(
        {
            "x": [t.x + float(x_start) for t in trails],
            "y": [t.y for t in trails],
            "ux": [t.ux for t in trails],
            "uy": [t.uy for t in trails],
            "half_length": [t.half_length for t in trails],
            "half_width": [t.half_width for t in trails],
            "reach": [reach] * len(trails),
        },
        dtype=[float] * 7,
    )
    for name in ("x", "y", "half_length", "half_width", "reach"):
        table[name].unit = u.pix
    table.meta["description"] = (
        "satellite or aircraft trails across the stretch (detect's _trails): a band of "
        "half_width about the line through (x, y) along (ux, uy), half_length either way; "
        "a source within reach (the seeing FWHM) of it is flagged TRAIL"
    )
    return table


def trail_pixels(trails, x: np.ndarray, n_y: int) -> np.ndarray:
    """Pixels on the trails of a ``trails`` table, as a boolean image.

    Parameters
    ----------
    trails : astropy.table.Table
        :func:`trail_table` (night pixels).
    x : ndarray of float, shape (n_x,)
        Night column of each of the image's columns.
    n_y : int
        The image's rows.

    Returns
    -------
    ndarray of bool, shape (n_y, n_x)
        True within ``reach`` of each trail's band.
    """
    x = np.asarray(x, float)
    on = np.zeros((n_y, x.size), bool)
    for row in trails:
        value = {k: float(np.asarray(getattr(row[k], "value", row[k]))) for k in row.colnames}
        reach = value.pop("reach")
        trail = Trail(**value)
        # the band's bounding box, then the pixels in it (on_trails)
        along, across = trail.half_length + reach, trail.half_width + reach
        xs = trail.x + np.array([-1.0, 1.0]) * along * trail.ux
        ys = trail.y + np.array([-1.0, 1.0]) * along * trail.uy
        cols = np.flatnonzero((x >= xs.min() - across) & (x <= xs.max() + across))
        y0 = max(int(np.floor(ys.min() - across)), 0)
        y1 = min(int(np.ceil(ys.max() + across)) + 1, n_y)
        if cols.size == 0 or y0 >= y1:
            continue
        yy, xx = np.meshgrid(np.arange(y0, y1, dtype=float), x[cols], indexing="ij")
        on[y0:y1, cols] |= on_trails([trail], xx, yy, reach)
    return on
