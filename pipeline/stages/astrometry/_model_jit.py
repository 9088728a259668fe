"""The compiled loop of the astrometry predictor: tracks to detector pixels.

:meth:`pipeline.stages.astrometry._model.GeometryPredictor.predict` evaluates
every star's track polynomial (:meth:`SkyTracks.focal`, Horner's rule in
``z = (t - t_centre) / half_width``) and turns the focal-plane point into
detector pixels for a geometry (:meth:`GeometryPredictor._detector`: the
tilted axis' gnomonic re-projection, camera rotation, radial distortion,
focal length) about 16 times per star and prediction; the fit predicts ~170
times a night.  As numpy passes that is ~40 read-modify-writes of whole
``(n_stars, n_times)`` arrays per evaluation.  :func:`track_detector` does
the same operations on the same values in the same order per point (no
``fastmath``: no fused multiply-add, no reassociation), so it gives the same
bits, in one pass with the point's values in registers.

Kept apart so that numba is imported only when the astrometry stage first
predicts (the stage's ``Stage.warm`` loads it, with numba's disk cache, as a
worker starts).
"""

from __future__ import annotations

import numpy as np

from pipeline._jit import njit

__all__ = ["load_compiled", "track_detector"]


@njit(nogil=True)
def track_detector(coef, t_centre, half_width, t, tilt, m, cos, sin, k1, p, u0, v0, u, v, lo, hi):
    """Detector ``(u, v)`` of stars ``lo`` to ``hi - 1`` at times ``t``, into ``u`` and ``v``.

    Parameters
    ----------
    coef : ndarray, shape (degree + 1, 2, n)
        :attr:`SkyTracks.coef` (highest power first; ``xi`` then ``eta``), radians.
    t_centre : ndarray, shape (n,)
        :attr:`SkyTracks.t_centre`, seconds.
    half_width : float
        :attr:`SkyTracks.half_width`, seconds.
    t : ndarray, shape (n, k)
        Times, seconds (star ``i``'s track at ``t[i]``).
    tilt : bool
        Whether the axis is tilted from the nominal one (``m`` is used).
    m : ndarray, shape (3, 3)
        The tilted axis' basis in the nominal one (rows), as
        :meth:`GeometryPredictor._tilted` gives it.
    cos, sin : float
        Of the camera's rotation angle.
    k1 : float
        Radial distortion, rad^-2.
    p : float
        Pixel angle of the geometry, radians.
    u0, v0 : float
        Detector row and column of the axis, pixels.
    u, v : ndarray, shape (n, k)
        Out: detector row and column, pixels.
    lo, hi : int
        The stars (rows of ``t``) to do: calls on disjoint ranges may run in
        parallel threads (the loop holds no GIL).
    """
    k = t.shape[1]
    n_coef = coef.shape[0]
    for i in range(lo, hi):
        centre = t_centre[i]
        for j in range(k):
            z = (t[i, j] - centre) / half_width
            xi = coef[0, 0, i]
            eta = coef[0, 1, i]
            for d in range(1, n_coef):
                xi = xi * z + coef[d, 0, i]
                eta = eta * z + coef[d, 1, i]
            if tilt:
                w = m[2, 0] * xi + m[2, 1] * eta + m[2, 2]
                xi, eta = (
                    (m[0, 0] * xi + m[0, 1] * eta + m[0, 2]) / w,
                    (m[1, 0] * xi + m[1, 1] * eta + m[1, 2]) / w,
                )
            xc = xi * cos + eta * sin
            ec = -xi * sin + eta * cos
            if k1 != 0.0:
                scale = 1.0 + k1 * (xc * xc + ec * ec)
                xc = xc * scale
                ec = ec * scale
            u[i, j] = xc / p + u0
            v[i, j] = ec / p + v0


def load_compiled() -> None:
    """Load the compiled loop in this process (from numba's disk cache once it is there).

    One call with the argument types of the predictor's calls.  A worker
    process calls it as it starts (see ``Stage.warm``).
    """
    one = np.zeros((1, 1))
    track_detector(
        np.zeros((2, 2, 1)), np.zeros(1), 1.0, one, False, np.eye(3),
        1.0, 0.0, 0.0, 1.0, 0.0, 0.0, np.empty((1, 1)), np.empty((1, 1)), 0, 1,
    )  # fmt: skip
