"""Bit mask of calibrated pixels.

Every calibrated product carries a ``uint16`` mask beside its image and
variance.  A pixel's mask is the bitwise OR of the :class:`MaskBit` values
that apply to it; ``0`` means a good pixel.  Bits 0-7 are set by the calibrate
stage; bits 8-15 are left for later stages (rectify, detect).

Pixels flagged :attr:`MaskBit.NONFINITE`, :attr:`MaskBit.GAP` or
:attr:`MaskBit.BAD_COLUMN` carry no usable data: their image and variance are
NaN.  All other flagged pixels keep their calibrated values.
"""

from __future__ import annotations

import enum
import math

import numpy as np

__all__ = [
    "BIT_MEANINGS",
    "MASK_DTYPE",
    "NO_DATA",
    "MaskBit",
    "bits_around",
    "describe_mask",
    "has_bits",
]

#: dtype of every mask array.
MASK_DTYPE = np.dtype(np.uint16)


class MaskBit(enum.IntFlag):
    """Bits of the calibrated-pixel mask.

    SATURATED
        The raw value reached the SATURATE level (charge packet full).
    BLEED
        Charge spilled from a saturated packet into its neighbours along the
        column (the scan axis), plus a small safety margin.
    BAD_COLUMN
        The column is unusable: dead or near-dead response, or a noise far above
        the noise model.  Image and variance are NaN.
    HOT_COLUMN
        The column's additive level (dark current of a hot pixel anywhere along
        it, or a charge trap's deficit) stands out; it has been subtracted, but the
        column is noisier than its neighbours.
    COSMIC_RAY
        Hit by a cosmic ray (Laplacian edge detection, van Dokkum 2001).
    NONFINITE
        The raw value was NaN or infinite.  Image and variance are NaN.
    GAP
        No raw data for this pixel (missing rows), or none exposed: the row
        read out as charge clocking started.  Image and variance are NaN.
    LOW_EXPOSURE
        The row belongs to the start-of-scan ramp: its packets crossed fewer than
        all TDI rows, so its exposure is partial.  Calibrate scales it to the
        full exposure (its variance with it), with the whole chip's 1-D flat
        and dark, which the packet only partly crossed.
    OUTSIDE
        Set by rectify: the rectified pixel draws on strip pixels beyond the
        chip's columns or beyond the rows handed to the stage (start or end of
        the night, or too small an overlap).  Image and variance are NaN.
    ZERO_POINT
        Set by the science stage: the pixel lies in a stretch whose zero point
        is unreliable (a cloud, a jump in the stars' scatter; bridged from its
        neighbours, or not).  A stretch bridged only for want of reference
        stars is not marked (its ``ZPFLAGS``, ``ZPINTERP`` and ``ZPERR`` cards
        say it).  Values are kept.
    TRAIL
        Set by the science stage: the pixel lies on a satellite's or
        aircraft's trail that detect found in the stretch (within a seeing
        FWHM of the trail's band; detect's ``trails`` product).  Values are
        kept; the mosaic leaves such pixels out of its co-adds by default.
    NIGHT_LEFT_OUT
        Set by the mosaic on a tile: a night that has data here was left out
        of the co-add, rejected as an outlier across the nights (a satellite
        trail, a cosmic ray, a transient) or flagged (``ignore_flags``: a
        saturated or bleed pixel, a cosmic-ray hit).  The value is the other
        nights' mean: a star here mixes the nights' seeing otherwise than
        elsewhere, and a trail's light beside it may remain.
    """

    SATURATED = 1 << 0
    BLEED = 1 << 1
    BAD_COLUMN = 1 << 2
    HOT_COLUMN = 1 << 3
    COSMIC_RAY = 1 << 4
    NONFINITE = 1 << 5
    GAP = 1 << 6
    LOW_EXPOSURE = 1 << 7
    OUTSIDE = 1 << 8
    ZERO_POINT = 1 << 9
    NIGHT_LEFT_OUT = 1 << 10
    TRAIL = 1 << 11


#: Bits of pixels without data: image and variance NaN.
NO_DATA = MaskBit.NONFINITE | MaskBit.GAP | MaskBit.BAD_COLUMN | MaskBit.OUTSIDE

#: One-line meaning of each bit (at most 46 characters: a FITS card comment);
#: image products list them in ``FLAGBITn`` cards.
BIT_MEANINGS: dict[MaskBit, str] = {
    MaskBit.SATURATED: "raw value reached SATURATE",
    MaskBit.BLEED: "charge bled from a saturated pixel",
    MaskBit.BAD_COLUMN: "unusable column; no data",
    MaskBit.HOT_COLUMN: "column with a high additive level, subtracted",
    MaskBit.COSMIC_RAY: "cosmic-ray hit",
    MaskBit.NONFINITE: "raw value NaN or infinite; no data",
    MaskBit.GAP: "no raw data for this row; no data",
    MaskBit.LOW_EXPOSURE: "start-of-scan ramp: partial exposure",
    MaskBit.OUTSIDE: "rectify drew on pixels beyond the data",
    MaskBit.ZERO_POINT: "zero point doubtful: a cloud or a scatter",
    MaskBit.NIGHT_LEFT_OUT: "a night with data here left out of the co-add",
    MaskBit.TRAIL: "on a satellite or aircraft trail",
}


def has_bits(mask: np.ndarray, bits: int | MaskBit) -> np.ndarray:
    """Return a boolean array that is true where any of ``bits`` is set.

    Parameters
    ----------
    mask : ndarray of uint16
        Mask array, any shape.
    bits : int or MaskBit
        One bit or an OR of several.

    Returns
    -------
    ndarray of bool
        Same shape as ``mask``.
    """
    return (np.asarray(mask) & MASK_DTYPE.type(int(bits))) != 0


def bits_around(mask, x, y, half_x, half_y=None, *, round_=True) -> np.ndarray:
    """The OR of the mask bits around each of many positions.

    Parameters
    ----------
    mask : ndarray of uint16, shape (ny, nx)
        Mask array.
    x, y : array_like of float
        Positions, array pixels (0-based, pixel centres on integers); NaN
        positions get 0.
    half_x, half_y : float or array_like of float
        Half-sizes of the region, pixels: along x and y (``half_y`` None:
        ``half_x``), one for all positions or one per position.
    round_ : bool
        True: the pixels whose centres lie within the ellipse of these
        semi-axes (a disc if equal); False: the rectangle's pixels, its
        bounds rounded outward to whole pixels (as detect's stamps are,
        :func:`pipeline.stages.detect._measure._stamp`).

    Returns
    -------
    ndarray of uint16
        One OR of bits per position (0: no flagged pixel in the region, or
        the region off the array).
    """
    mask = np.asarray(mask)
    x = np.atleast_1d(np.asarray(x, float))
    y = np.atleast_1d(np.asarray(y, float))
    hx = np.broadcast_to(np.asarray(half_x, float), x.shape)
    hy = hx if half_y is None else np.broadcast_to(np.asarray(half_y, float), x.shape)
    out = np.zeros(x.shape, dtype=MASK_DTYPE)
    n_y, n_x = mask.shape
    for i in np.flatnonzero(np.isfinite(x) & np.isfinite(y) & (hx >= 0) & (hy >= 0)):
        if round_:
            x0, x1 = math.ceil(x[i] - hx[i]), math.floor(x[i] + hx[i]) + 1
            y0, y1 = math.ceil(y[i] - hy[i]), math.floor(y[i] + hy[i]) + 1
        else:  # rounded outward
            x0, x1 = math.floor(x[i] - hx[i]), math.ceil(x[i] + hx[i]) + 1
            y0, y1 = math.floor(y[i] - hy[i]), math.ceil(y[i] + hy[i]) + 1
        x0, x1, y0, y1 = max(x0, 0), min(x1, n_x), max(y0, 0), min(y1, n_y)
        if x0 >= x1 or y0 >= y1:
            continue
        box = mask[y0:y1, x0:x1]
        if not box.any():  # most regions hold no flagged pixel
            continue
        if round_:
            u = (np.arange(x0, x1) - x[i]) / max(hx[i], 1e-12)
            v = (np.arange(y0, y1) - y[i]) / max(hy[i], 1e-12)
            box = box[v[:, None] ** 2 + u[None, :] ** 2 <= 1.0]
        out[i] = np.bitwise_or.reduce(box, axis=None) if box.size else 0
    return out


def describe_mask(mask: np.ndarray) -> dict[str, int]:
    """Count the pixels that carry each bit.

    Parameters
    ----------
    mask : ndarray of uint16
        Mask array, any shape.

    Returns
    -------
    dict
        Bit name -> number of pixels with that bit set, for every bit defined
        in :class:`MaskBit` (zero counts included), for logs and reports.
    """
    values = np.asarray(mask).reshape(-1)
    # Most pixels are good: the bits are counted among the flagged ones only
    # (one pass over the plane instead of two per bit).
    flagged = values[values != 0]
    return {
        bit.name: int(np.count_nonzero(flagged & flagged.dtype.type(int(bit)))) for bit in MaskBit
    }
