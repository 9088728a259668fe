"""The compiled sums of :func:`pipeline.stages.detect._measure.residual_quadrupole`.

Kept apart so that numba is imported only when the detect stage first measures.
"""

from __future__ import annotations

import math

import numba
import numpy as np

__all__ = ["quadrupole_sums"]


@numba.njit(cache=True, nogil=True)
def quadrupole_sums(data, variance, model, unit, x, y):
    """The sums of ``residual_quadrupole`` over the good pixels of a stamp.

    Returns
    -------
    ndarray, shape (6,)
        ``sum(r g1)``, ``sum(r g2)``, ``sum(g1^2 V)``, ``sum(g1 g2 V)``,
        ``sum(g2^2 V)`` and ``sum(W rho^2 m)`` (see ``residual_quadrupole``;
        ``V`` not yet scaled by the noise correlation).
    """
    out = np.zeros(6)
    ny, nx = data.shape
    for j in range(ny):
        dy = j - y
        for i in range(nx):
            d = data[j, i]
            v = variance[j, i]
            if not (math.isfinite(d) and math.isfinite(v) and v > 0.0):
                continue
            dx = i - x
            w = unit[j, i]
            g1 = w * (dx * dx - dy * dy)
            g2 = w * 2.0 * dx * dy
            r = d - model[j, i]
            out[0] += r * g1
            out[1] += r * g2
            out[2] += g1 * g1 * v
            out[3] += g1 * g2 * v
            out[4] += g2 * g2 * v
            out[5] += w * (dx * dx + dy * dy) * model[j, i]
    return out
