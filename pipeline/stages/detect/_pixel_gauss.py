"""Pixel-integrated 1-D Gaussians, the inner loop of the smear-aware model.

Every evaluation of the model needs, per seeing component ``j`` and kernel
sample ``k``, the Gaussian integrated over each pixel of a row of the stamp
and its derivative in the centre: one error function and one exponential per
pixel edge.  Evaluated with ``scipy.special.erf`` and ``numpy.exp`` these
took 8 of the 14 s the fits of a 4096 x 4096 benchmark stretch spent.

:func:`pixel_profiles` gets both from tables of ``erf(z / sqrt 2)`` and
``exp(-z^2 / 2)`` 1/64 apart in ``z`` (the offset in sigmas), by cubic
Hermite interpolation with the exact derivatives (``sqrt(2/pi) exp(-z^2/2)``
and ``-z exp(-z^2/2)``) at the nodes: the error is below ``h^4 / 384``
times the fourth derivative, < 1e-9 (measured 2e-10), far below what a fit
can see.  Beyond ``|z| = 8`` the error function is +-1 and the exponential 0
to 1e-14.  The loop is compiled with numba (``cache=True``: the machine code
is kept beside the module after the first run); it is 4x faster than the
numpy evaluation.  :func:`pixel_profiles_direct` is the numpy evaluation,
the reference the compiled one is tested against.
"""

from __future__ import annotations

import functools
import math

import numpy as np

__all__ = [
    "boxed_profiles",
    "boxed_profiles_direct",
    "load_compiled",
    "pixel_profiles",
    "pixel_profiles_direct",
]

_SQRT2 = math.sqrt(2.0)
_SQRT2PI = math.sqrt(2.0 * math.pi)
_ERF_SLOPE = math.sqrt(2.0 / math.pi)  # d erf(z / sqrt 2) / dz at z = 0
_NODES_PER_SIGMA = 64  # table step 1/64 sigma: Hermite error ~ 2e-10
_REACH = 8.0  # |z| beyond which erf is +-1 and exp(-z^2/2) < 1.3e-14
_Z = np.arange(-_REACH * _NODES_PER_SIGMA, _REACH * _NODES_PER_SIGMA + 1) / _NODES_PER_SIGMA
# A top-hat within this of a whole number of pixels shares its edges' points
# (see boxed_profiles): Taylor's third-order term, (slack / 2 sigma)^3 / 6
# times phi'(z) <= 0.25, is < 4e-8 for sigma >= 0.5 px.
_SHARED_SLACK = 0.01
# A top-hat narrower than this is left out: it widens a profile by box^2 / 12
# < 2.1e-4 px^2 in variance (< 2.6e-4 of the peak of a Gaussian of sigma
# 0.64 px, the narrowest of a Moffat mixture), and the formula's division by
# ``box`` would amplify the tables' rounding (1e-10) beyond 1e-7 below it.
_LEAST_BOX = 0.05


@functools.cache
def profile_tables() -> tuple[np.ndarray, np.ndarray]:
    """The tables of ``erf(z / sqrt 2)`` and ``exp(-z^2 / 2)`` at the nodes ``_Z``.

    Made on first use (scipy.special is imported then, not when a config
    that names detect's options is read or the mosaic package imported).
    """
    from scipy.special import erf

    return erf(_Z / _SQRT2), np.exp(-0.5 * _Z * _Z)


def pixel_profiles(grid: np.ndarray, centres: np.ndarray, sigmas: np.ndarray):
    """Pixel-integrated 1-D Gaussians and their derivatives in the centre.

    Parameters
    ----------
    grid : ndarray, shape (n,)
        Consecutive pixel centres (``grid[0] + arange(n)``), pixels.
    centres : ndarray, shape (K,)
        Gaussian centres, pixels.
    sigmas : ndarray, shape (J,)
        Gaussian sigmas, pixels.

    Returns
    -------
    value, deriv : ndarray, shape (J, K, n)
        Integral of each unit Gaussian over each pixel, and its derivative
        with respect to the centre (per pixel).
    """
    # numba is imported on first use: importing it and loading the cached
    # machine code costs about a second, which a run without detect should not pay.
    from pipeline.stages.detect._pixel_gauss_jit import profiles_compiled

    return profiles_compiled(
        float(grid[0]),
        int(grid.size),
        np.ascontiguousarray(centres, dtype=np.float64),
        np.ascontiguousarray(sigmas, dtype=np.float64),
        *profile_tables(),
    )


def boxed_profiles(grid: np.ndarray, centres: np.ndarray, sigmas: np.ndarray, box: float):
    """:func:`pixel_profiles` of Gaussians averaged over a top-hat ``box`` pixels wide.

    The top-hat (TDI clocking: the charge steps one row while the image
    moves on) is along the grid's axis.  A Gaussian of sigma ``s`` averaged
    over it and integrated over a pixel with edges ``lo``, ``hi`` is (``b`` = ``box``)

        (s / box) [Psi(z(hi + b/2)) - Psi(z(lo + b/2)) - Psi(z(hi - b/2)) + Psi(z(lo - b/2))]

    with ``z(t) = (t - centre) / s`` and ``Psi(z) = z Phi(z) + phi(z)`` the
    integral of the normal CDF ``Phi`` (``phi`` its density); the derivative
    in the centre is the same with ``-Phi / box`` for ``s Psi / box``.
    Where ``box`` is within 0.01 of a whole number ``q`` of pixels (a row
    of one rectified pixel), the edges + box / 2 are the edges - box / 2 ``q``
    pixels on, moved by ``box - q``: each is evaluated once, from the same
    tables as :func:`pixel_profiles`, with the move added by Taylor's formula
    to second order; half the evaluations of two Gaussians +-box / sqrt(12)
    apart (the top-hat's variance, what the model drew before, whose fourth
    moment differs by box^4 / 180).

    Parameters
    ----------
    grid, centres, sigmas
        See :func:`pixel_profiles`.
    box : float
        Width of the top-hat, pixels (narrower than 0.05 px: none).

    Returns
    -------
    value, deriv : ndarray, shape (J, K, n)
    """
    from pipeline.stages.detect._pixel_gauss_jit import boxed_profiles_compiled

    return boxed_profiles_compiled(
        float(grid[0]),
        int(grid.size),
        np.ascontiguousarray(centres, dtype=np.float64),
        np.ascontiguousarray(sigmas, dtype=np.float64),
        float(box),
        *profile_tables(),
    )


def boxed_profiles_direct(grid: np.ndarray, centres: np.ndarray, sigmas: np.ndarray, box: float):
    """:func:`boxed_profiles` with ``scipy.special.ndtr``, the formula at every edge."""
    from scipy.special import ndtr

    edges = np.append(grid - 0.5, grid[-1] + 0.5)
    s = sigmas[:, None, None]
    value = np.zeros((sigmas.size, centres.size, grid.size))
    deriv = np.zeros_like(value)
    for sign in (1.0, -1.0):
        z = (edges[None, None, :] + sign * 0.5 * box - centres[None, :, None]) / s
        cdf = ndtr(z)
        psi = z * cdf + np.exp(-0.5 * z * z) / _SQRT2PI
        value += sign * (s / box) * np.diff(psi, axis=2)
        deriv -= sign * np.diff(cdf, axis=2) / box
    return value, deriv


def load_compiled() -> None:
    """Load the compiled loop in this process (from numba's disk cache once it is there).

    One call on a three-pixel grid with the argument types of every call
    (``pixel_profiles`` normalises them), so no other specialisation is
    compiled.  A worker process calls it as it starts (see ``Stage.warm``).
    """
    pixel_profiles(np.arange(3.0), np.zeros(1), np.ones(1))


def pixel_profiles_direct(grid: np.ndarray, centres: np.ndarray, sigmas: np.ndarray):
    """The same as :func:`pixel_profiles`, with ``scipy.special.erf`` and ``numpy.exp``.

    The error function is evaluated once per pixel edge (``n + 1`` edges).
    """
    from scipy.special import erf

    edges = np.append(grid - 0.5, grid[-1] + 0.5)
    z = (edges[None, None, :] - centres[None, :, None]) / sigmas[:, None, None]
    value = 0.5 * np.diff(erf(z / _SQRT2), axis=2)
    # d value / d centre = -(phi(hi) - phi(lo)) / s
    deriv = -np.diff(np.exp(-0.5 * z * z), axis=2) / (_SQRT2PI * sigmas[:, None, None])
    return value, deriv
