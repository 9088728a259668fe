"""Sigma-clipped medians of many samples at once, and a background mesh made of them.

:func:`clipped_medians` is, per row of an array, astropy's
:class:`~astropy.stats.SigmaClip` (median centre, standard deviation,
``masked=False``) followed by the median of what is left, as photutils'
:class:`~photutils.background.MedianBackground` and astropy's
:func:`~astropy.stats.sigma_clipped_stats` take it.  astropy clips each row
in compiled code (``_fast_sigma_clip``), but the medians after it are a
Python call per row (``numpy.nanmedian`` along an axis of NaN-holding
rows); here every row is sorted once and each clipping pass keeps a
contiguous run of the sorted values, so the passes, their medians, means
and variances (from running sums) are a few array operations over all
rows.  :func:`background_mesh` is photutils'
:class:`~photutils.background.Background2D` ``background_mesh`` (median
estimator, sigma clipping, ``exclude_percentile``, inverse-distance
filling of excluded boxes, 3 x 3 median filter) built on it, without the
rms mesh the stage does not use.  ``tests/test_detect_search.py`` checks
both against photutils and astropy.
"""

from __future__ import annotations

import numpy as np

__all__ = ["background_mesh", "clipped_medians"]


def clipped_medians(
    values: np.ndarray, sigma: float = 3.0, maxiters: int = 5
) -> tuple[np.ndarray, np.ndarray]:
    """Median of each row after iterative sigma clipping about the median.

    Parameters
    ----------
    values : ndarray of float32, shape (n, m)
        Samples; NaN where there is none.
    sigma : float
        Clipping bounds: median -/+ ``sigma`` standard deviations of the
        values kept so far (both inclusive, as astropy's).
    maxiters : int
        Most clipping passes; fewer when a pass keeps every value or none.

    Returns
    -------
    median : ndarray of float32, shape (n,)
        Median of the values within the last bounds (NaN: none), computed
        as numpy's median of single-precision values: the middle one, or
        the mean of the two middle ones in single precision.
    n_kept : ndarray of int, shape (n,)
        Number of values within the last bounds.

    Notes
    -----
    astropy's passes (``compute_bounds.c``): the median (of the values as
    double precision) and standard deviation of the values kept, bounds
    ``median -/+ sigma std``, the values within them kept; until a pass
    keeps all or none, or ``maxiters`` passes.  The result is the values of
    the whole row within the last bounds.  The same passes here, with the
    sums of the values kept (less each row's median, against cancellation)
    from running sums of the sorted row instead of a loop in the order of
    the values: the bounds agree to ~1e-15 of the standard deviation, so a
    value is clipped differently only if it lies that close to a bound.
    """
    from pipeline.stages.detect._find_jit import clip_sorted_rows

    ordered = np.sort(np.asarray(values, dtype=np.float32), axis=1)  # NaN last
    median = np.empty(ordered.shape[0], np.float32)
    n_kept = np.empty(ordered.shape[0], np.int64)
    clip_sorted_rows(ordered, float(sigma), int(maxiters), median, n_kept)
    return median, n_kept


def _boxes(plane: np.ndarray, box_size: tuple[int, int]) -> list:
    """photutils' boxes of a plane: whole ones, then the partial last row, column, corner.

    Returns ``[(values, shape), ...]``: each group's boxes as rows of
    ``values`` and the group's place in the mesh as ``shape`` (rows, columns).
    """
    ny, nx = plane.shape
    by, bx = box_size
    nby, nbx = ny // by, nx // bx
    y1, x1 = nby * by, nbx * bx
    core = plane[:y1, :x1].reshape(nby, by, nbx, bx).transpose(0, 2, 1, 3)
    groups = {"core": (core.reshape(nby * nbx, by * bx), (nby, nbx))}
    if y1 < ny:
        row = plane[y1:, :x1].reshape(ny - y1, nbx, bx).transpose(1, 0, 2)
        groups["row"] = (row.reshape(nbx, -1), (1, nbx))
    if x1 < nx:
        groups["column"] = (plane[:y1, x1:].reshape(nby, -1), (nby, 1))
    if y1 < ny and x1 < nx:
        groups["corner"] = (plane[y1:, x1:].reshape(1, -1), (1, 1))
    return groups


def background_mesh(
    data: np.ndarray,
    mask: np.ndarray,
    box_size: tuple[int, int],
    *,
    sigma: float = 3.0,
    maxiters: int = 5,
    exclude_percentile: float = 50.0,
) -> np.ndarray:
    """photutils' ``Background2D(...).background_mesh`` with a median estimator.

    The mesh of ``Background2D(data, box_size, mask=mask,
    filter_size=(3, 3), sigma_clip=SigmaClip(sigma=sigma,
    maxiters=maxiters), bkg_estimator=MedianBackground(),
    exclude_percentile=exclude_percentile)``: per box (whole boxes, then
    the partial boxes of the last row and column), the median after sigma
    clipping (:func:`clipped_medians`); a box keeping no more than
    ``1 - exclude_percentile / 100`` of a whole box's pixels is excluded and
    filled by photutils' inverse-distance interpolation of the others (10
    nearest); then the median of each 3 x 3 neighbourhood (inside the mesh).

    Parameters
    ----------
    data : ndarray of float32, shape (ny, nx)
        e- per pixel.
    mask : ndarray of bool, shape (ny, nx)
        Pixels left out (non-finite ones are too).
    box_size : (int, int)
        Box rows and columns, at most the plane's.

    Returns
    -------
    ndarray of float32, shape (mesh rows, mesh columns)

    Raises
    ------
    ValueError
        When every box is excluded (photutils' condition too).
    """
    plane = np.array(data, dtype=np.float32)  # a copy: masked pixels become NaN
    plane[np.asarray(mask, bool)] = np.nan
    groups = _boxes(plane, box_size)
    threshold = (1.0 - exclude_percentile / 100.0) * box_size[0] * box_size[1]
    parts = {}
    for name, (values, shape) in groups.items():
        median, n_kept = clipped_medians(values, sigma, maxiters)
        median[n_kept <= threshold] = np.nan
        parts[name] = median.reshape(shape)
    mesh = parts["core"]
    if "column" in parts:
        column = parts["column"]
        if "corner" in parts:
            column = np.vstack([column, parts["corner"]])
        top = np.vstack([mesh, parts["row"]]) if "row" in parts else mesh
        mesh = np.hstack([top, column])
    elif "row" in parts:
        mesh = np.vstack([mesh, parts["row"]])
    good = ~np.isnan(mesh)
    if not good.any():
        raise ValueError(
            f"every background box of {box_size[0]} x {box_size[1]} pixels has more than "
            f"{exclude_percentile:g} % of its pixels masked or clipped; use larger boxes "
            "(stages.detect.background_box)."
        )
    if not good.all():  # photutils' filling of excluded boxes
        from photutils.utils import ShepardIDWInterpolator

        fill = ShepardIDWInterpolator(np.column_stack(np.nonzero(good)), mesh[good])
        missing = np.nonzero(~good)
        mesh[missing] = fill(
            np.column_stack(missing), n_neighbors=10, power=1.0, eps=0.0, regularization=0.0
        )
    return _median_filter3(mesh)


def _median_filter3(mesh: np.ndarray) -> np.ndarray:
    """``generic_filter(mesh, nanmedian, size=(3, 3), mode='constant', cval=nan)``.

    The median of each pixel's neighbourhood within the mesh, in double
    precision (as ``generic_filter`` hands them to the function), in the
    mesh's type.
    """
    ny, nx = mesh.shape
    padded = np.full((ny + 2, nx + 2), np.nan)
    padded[1:-1, 1:-1] = mesh
    stack = np.stack([padded[i : i + ny, j : j + nx] for i in range(3) for j in range(3)])
    stack.sort(axis=0)  # NaN last
    count = np.count_nonzero(~np.isnan(stack), axis=0)
    half = count // 2
    top = np.take_along_axis(stack, half[None], axis=0)[0]
    below = np.take_along_axis(stack, np.maximum(half - 1, 0)[None], axis=0)[0]
    return np.where(count % 2 == 1, top, (below + top) / 2.0).astype(mesh.dtype)
