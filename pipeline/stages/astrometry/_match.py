"""Matching predicted reference positions to detections, and the search when it fails.

Positions here are strip coordinates ``(row, column)`` in pixels (rows along
the scan): detections are taken there once through the nominal geometry, and
reference stars are predicted there for each trial geometry, so a match never
needs the inverse map.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
from numpy.typing import ArrayLike

if TYPE_CHECKING:
    from scipy.spatial import cKDTree

__all__ = [
    "OffsetPeak",
    "candidate_pairs",
    "match_nearest",
    "offset_peak",
    "peak_count",
    "scaled_tree",
]

log = logging.getLogger(__name__)


def match_nearest(
    ref_row: ArrayLike,
    ref_column: ArrayLike,
    det_row: ArrayLike,
    det_column: ArrayLike,
    radius: float,
    *,
    tree: cKDTree | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Unique nearest-neighbour pairs of reference stars and detections within ``radius``.

    Each reference star takes its nearest detection; a detection claimed by
    several reference stars goes to the nearest of them and the others stay
    unmatched (a blended or crowded pair is better lost than mismatched).

    Parameters
    ----------
    ref_row, ref_column : array_like, shape (n_ref,)
        Predicted positions of the reference stars, pixels (NaN: not on the chip).
    det_row, det_column : array_like, shape (n_det,)
        Detection positions, pixels.
    radius : float
        Largest separation of a pair, pixels.
    tree : cKDTree or None, optional
        A tree already built on ``(det_row, det_column)``.

    Returns
    -------
    ref_index, det_index : ndarray of int, shape (n_pairs,)
        Matched pairs, sorted by reference index.
    """
    from scipy.spatial import cKDTree

    if not radius > 0:
        raise ValueError(f"radius must be positive pixels; got {radius}.")
    ref = np.column_stack([np.asarray(ref_row, float), np.asarray(ref_column, float)])
    if tree is None:
        tree = cKDTree(np.column_stack([np.asarray(det_row, float), np.asarray(det_column, float)]))
    good = np.flatnonzero(np.isfinite(ref).all(axis=1))
    if good.size == 0 or tree.n == 0:
        return np.empty(0, np.intp), np.empty(0, np.intp)
    dist, idx = tree.query(ref[good], k=1, distance_upper_bound=radius)
    found = np.isfinite(dist)
    ref_idx, det_idx, dist = good[found], idx[found], dist[found]
    # unique detections: keep the closest claimant of each
    order = np.lexsort((dist, det_idx))
    first = np.ones(order.size, bool)
    first[1:] = det_idx[order][1:] != det_idx[order][:-1]
    keep = np.sort(order[first])
    return ref_idx[keep], det_idx[keep]


@dataclass(frozen=True)
class OffsetPeak:
    """The strongest common offset between predicted and detected positions.

    Attributes
    ----------
    d_row, d_column : float
        Detection minus prediction at the peak, pixels.
    count : int
        Pairs in the peak's 3 x 3 bins.
    background : float
        Pairs expected in 3 x 3 bins by chance (mean bin count x 9).
    """

    d_row: float
    d_column: float
    count: int
    background: float

    @property
    def significance(self) -> float:
        """Peak count over its Poisson noise from chance pairs."""
        return (self.count - self.background) / np.sqrt(max(self.background, 1.0))


def candidate_pairs(
    ref_row: np.ndarray,
    ref_column: np.ndarray,
    tree: cKDTree,
    half_row: float,
    half_column: float,
) -> tuple[np.ndarray, np.ndarray]:
    """All (reference, detection) pairs within a box ``+-half_row x +-half_column``.

    ``tree`` is built on detection positions with the row axis scaled by
    ``half_column / half_row`` (see :func:`scaled_tree`).
    """
    scale = half_column / half_row
    pts = np.column_stack([ref_row * scale, ref_column])
    good = np.flatnonzero(np.isfinite(pts).all(axis=1))
    lists = tree.query_ball_point(pts[good], r=half_column, p=np.inf)
    counts = np.fromiter((len(x) for x in lists), dtype=np.intp, count=len(lists))
    ref_idx = np.repeat(good, counts)
    det_idx = np.fromiter((j for x in lists for j in x), dtype=np.intp, count=int(counts.sum()))
    return ref_idx, det_idx


def scaled_tree(det_row: np.ndarray, det_column: np.ndarray, half_row, half_column) -> cKDTree:
    """KD-tree of detections with rows scaled for :func:`candidate_pairs`."""
    from scipy.spatial import cKDTree

    return cKDTree(np.column_stack([det_row * (half_column / half_row), det_column]))


def _peak_bins(d_row, d_column, half_row, half_column, bin_size):
    """Bin indices, in-box mask, 3 x 3 box counts and the peak's bin of pair offsets."""
    n_r = int(np.ceil(2 * half_row / bin_size)) + 1
    n_c = int(np.ceil(2 * half_column / bin_size)) + 1
    i = ((d_row + half_row) * (1.0 / bin_size)).astype(np.intp)
    j = ((d_column + half_column) * (1.0 / bin_size)).astype(np.intp)
    ok = (
        (i >= 0)
        & (i < n_r)
        & (j >= 0)
        & (j < n_c)
        & (d_row > -half_row)
        & (d_column > -half_column)
    )
    hist = np.bincount(i[ok] * n_c + j[ok], minlength=n_r * n_c).reshape(n_r, n_c)
    padded = np.pad(hist, 1)
    box = sum(
        padded[1 + a : 1 + a + n_r, 1 + b : 1 + b + n_c] for a in (-1, 0, 1) for b in (-1, 0, 1)
    )
    k = int(np.argmax(box))
    return i, j, ok, hist, int(box.flat[k]), divmod(k, n_c)


def peak_count(d_row, d_column, half_row: float, half_column: float, bin_size: float) -> int:
    """Pairs in the 3 x 3 bins of the strongest peak (see :func:`offset_peak`)."""
    return _peak_bins(d_row, d_column, half_row, half_column, bin_size)[4]


def offset_peak(
    d_row: np.ndarray,
    d_column: np.ndarray,
    half_row: float,
    half_column: float,
    bin_size: float,
) -> OffsetPeak:
    """Peak of the 2-D histogram of pair offsets (a pattern-free match).

    Pairs of a reference star with its own detection share one offset and
    pile up in one bin; chance pairs spread evenly over the box.  The count
    is taken over 3 x 3 bins so that a peak split between bins still counts
    whole.

    Parameters
    ----------
    d_row, d_column : ndarray
        Offsets (detection minus prediction) of candidate pairs, pixels.
    half_row, half_column : float
        Half-sizes of the box the offsets lie in, pixels.
    bin_size : float
        Bin width, pixels; about the largest spread of the true pairs'
        offsets left by the parameters not being scanned.
    """
    i, j, ok, hist, count, (pi, pj) = _peak_bins(d_row, d_column, half_row, half_column, bin_size)
    # centroid of the pairs in the peak's 3 x 3 bins
    near = ok & (np.abs(i - pi) <= 1) & (np.abs(j - pj) <= 1)
    return OffsetPeak(
        d_row=float(np.median(d_row[near])),
        d_column=float(np.median(d_column[near])),
        count=count,
        background=9.0 * ok.sum() / hist.size,
    )
