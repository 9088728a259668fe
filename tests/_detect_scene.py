"""Rectified images with smeared stars at known positions, for the detect tests.

Stars are rendered straight into a rectified image with the simulator's
pixel-integrating renderer (:func:`pipeline.simulate._render.render_tracks`,
its 4-component Moffat mixture), along an analytic smear track sampled 256
times: a straight smear of length ``L(y)`` along ``x`` with a parabolic bow
of height ``B(y)`` across, both growing from the chip's centre line to its
edges as in a TDI strip off the equator.  The first moment of each track is
the star's true position.  The detect stage sees only a ``smear_kernels``
table in rectify's format (64 samples at a coarse grid of positions), so the
model it fits (8-component Moffat, 64 or fewer kernel samples, interpolated)
is not the one that made the image.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from astropy.table import Table

from pipeline.simulate._render import GaussianMixturePSF, render_tracks


def smear_track(y, ny, n_samples, length_edge, bow_edge, length_centre=1.0):
    """Zero-mean smear samples ``(dx, dy)`` of a star at row ``y``; shape (n, K)."""
    y = np.atleast_1d(np.asarray(y, dtype=float))
    a = (y - 0.5 * (ny - 1)) / (0.5 * (ny - 1))  # -1 .. 1 across the chip
    t = (np.arange(n_samples) + 0.5) / n_samples - 0.5
    length = length_centre + (length_edge - length_centre) * np.abs(a)
    bow = bow_edge * a * np.abs(a)
    dx = length[:, None] * t[None, :]
    q = 4.0 * t**2
    dy = bow[:, None] * (q - q.mean())[None, :]
    return dx, dy


def kernel_table(ny, x_start, nx, length_edge, bow_edge, step=32, n_samples=64) -> Table:
    """A ``smear_kernels`` table (rectify's format) for :func:`smear_track`."""
    ys = np.unique(np.append(np.arange(0, ny, step), ny - 1)).astype(float)
    xs = np.array([x_start, x_start + 0.5 * (nx - 1), x_start + nx - 1], dtype=float)
    xg, yg = np.meshgrid(xs, ys)
    dx, dy = smear_track(yg.ravel(), ny, n_samples, length_edge, bow_edge)
    table = Table({"x": xg.ravel(), "y": yg.ravel(), "dx": dx, "dy": dy})
    for name in table.colnames:
        table[name].unit = "pix"
    return table


@dataclass
class Scene:
    """A rectified image and its truth."""

    image: np.ndarray
    variance: np.ndarray
    mask: np.ndarray
    kernels: Table
    x: np.ndarray  # array column of each star (first moment)
    y: np.ndarray
    flux: np.ndarray
    snr: np.ndarray  # optimal (matched-filter) S/N of each star
    x_start: int


def render_scene(
    x,
    y,
    flux,
    *,
    shape=(512, 1024),
    x_start=1000,
    fwhm=3.2,
    beta=3.5,
    components=6,
    sky=200.0,
    length_edge=12.0,
    bow_edge=2.0,
    seed=None,
    round_stars=False,
    snr=None,
) -> Scene:
    """Render stars at array pixels ``(x, y)`` with ``flux`` electrons.

    Noise is Gaussian with the expected variance (sky + signal) when
    ``seed`` is given; the variance plane is the expected variance.  With
    ``round_stars`` there is no smear (a deconvolved product).  With ``snr``
    given, ``flux`` is ignored and each star gets the flux of that optimal S/N.
    The seeing is a Moffat profile of index ``beta`` drawn as a mixture of
    ``components`` Gaussians (:meth:`GaussianMixturePSF.moffat`).
    """
    ny, nx = shape
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    flux = np.broadcast_to(np.asarray(0.0 if flux is None else flux, dtype=float), x.shape).copy()
    k = 256
    if round_stars:
        dx = dy = np.zeros((x.size, k))
        kernels = kernel_table(ny, x_start, nx, 0.0, 0.0)
    else:
        dx, dy = smear_track(y, ny, k, length_edge, bow_edge)
        kernels = kernel_table(ny, x_start, nx, length_edge, bow_edge)
    psf = GaussianMixturePSF.moffat(fwhm, beta, components)
    units = []
    for i in range(x.size):  # each star's own unit-flux image, for its S/N
        one = np.zeros((64, 96))
        render_tracks(
            (32 + dy[i])[None],
            (48 + dx[i])[None],
            np.full((1, k), 1.0 / k),
            one.shape,
            psf,
            out=one,
        )
        units.append(one)
    if snr is not None:
        target = np.broadcast_to(np.asarray(snr, dtype=float), x.shape)
        for i, one in enumerate(units):
            f = target[i] ** 2 / np.sum(one**2 / sky)  # background-limited start
            for _ in range(30):  # S/N(F) = target: F = target / sqrt(sum u^2 / (sky + F u))
                f = target[i] / np.sqrt(np.sum(one**2 / (sky + f * one)))
            flux[i] = f
    stars = np.zeros(shape)
    render_tracks(
        y[:, None] + dy,
        x[:, None] + dx,
        np.repeat(flux[:, None] / k, k, axis=1),
        shape,
        psf,
        out=stars,
    )
    variance = stars + sky
    image = stars + sky
    if seed is not None:
        image = image + np.random.default_rng(seed).normal(0.0, np.sqrt(variance))
    # Optimal S/N of each star alone: sqrt(sum(m^2 / (sky + m))) over its own image.
    snr = np.empty(x.size)
    for i in range(x.size):
        one = np.zeros((64, 96))
        render_tracks(
            (32 + dy[i])[None],
            (48 + dx[i])[None],
            np.full((1, k), flux[i] / k),
            one.shape,
            psf,
            out=one,
        )
        snr[i] = np.sqrt(np.sum(one**2 / (sky + one)))
    mask = np.zeros(shape, np.uint16)
    return Scene(image, variance, mask, kernels, x, y, flux, snr, x_start)
