"""The smear kernels of a tile's stars, carried from the nights through the resampling.

A calibrated product that is not deconvolved holds each star as the seeing
profile averaged over its TDI smear kernel (rectify's ``smear_kernels``: the
equal-time samples of the star's track relative to their mean, in the
product's pixels), and its WCS maps the kernel's mean, the star's first
moment, to the sky.  Resampling onto a tile moves every point of the sky to
the tile's pixels through the same local linear map, so the co-added star is
the seeing averaged over the kernel turned into tile pixels: ``A (dx, dy)``,
``A`` the Jacobian of the map from the product's pixels to the tile's at
the star (a flip of the east axis, a turn of up to a degree, the ratio of
the pixel scales).  The kernel's mean stays 0, so a model with it fits the
first moment, the position the tile's WCS maps to the sky.

Nights of one strip record nearly the same kernel at a sky position (the
same track across the same part of the field, a day apart); the tile's
kernel is their mean sample by sample (samples of equal time correspond),
weighted as the co-add weights the nights.  A product without kernels
(deconvolved: round stars) counts as a point.

:func:`carried_kernels` records the result on nodes of the tile, in
rectify's table layout, so detect's :class:`~pipeline.stages.detect._model.KernelGrid`
looks it up as it does a night's.

A night's pixel holds more than the seeing over the kernel: TDI clocking
spreads a star over a top-hat of one strip row along the scan (rectify's
``row_step``), which detect models on a night.  It is carried too: the
top-hat turned into tile pixels (``row_step`` times the Jacobian's x scale,
along the tile's x: the nights are turned by about a degree, which puts
under 2 % of it across), as the tile's ``row_step``.  Left out, the demo's
tiles, whose nights' kernels are short near the chip's centre, fit their
stars 0.5 to 1 % too bright: the fitted width grows by 1 to 5 % to take the
top-hat in, the profile's shape does not.

So is rectify's cubic interpolation of the strip at the night's lattice
offsets (detect's :class:`~pipeline.stages.detect._model.Response`): its
four taps, a rectified pixel apart, are a tile pixel's ``step`` (the
Jacobian's diagonal, signed: the east axis flips) apart on the tile, and
the tile's ``lattice_x``, ``lattice_y``, ``lattice_step_x`` and
``lattice_step_y`` hold them.  The taps keep a star's first moment but not
its symmetry (at offsets other than 0 and 1/2), so a model without them
fits the centre off the first moment the WCS maps: the demo's nights'
offsets drift by -0.12 px per 1024 columns along the scan, and its tiles'
positions came out 3.5 mas per tile further east (-3.2, +0.6, +3.7 mas on
three tiles against the nights' own).  Nights of one strip are clocked alike
(the demo's offsets agree to 0.003 px at a sky position): the tile's
offsets are the nights' circular mean with the co-add's weights.

The seeing of a co-added star is the nights' seeing profiles added with the
co-add's weights, not one profile of the family: a single Moffat fitted to
nights in 1.2 to 1.8 arcsec seeing puts the stars' fluxes 2 % low (the demo's
tiles).  :class:`SeeingMix` is that sum, with one width fitted by detect
as for a night (every night's profile scaled together).
"""

from __future__ import annotations

import dataclasses
import logging
from collections.abc import Sequence

import numpy as np
from astropy.table import Table

from pipeline.mosaic._tiles import Tile
from pipeline.stages.detect import SeeingProfile
from pipeline.stages.detect._model import KernelGrid
from pipeline.stages.rectify._map import kernel_table

__all__ = ["SeeingMix", "carried_kernels"]

log = logging.getLogger(__name__)

#: Spacing of the tile's kernel nodes, tile pixels.  Rectify records a night's
#: kernels every 32 of its pixels (16 tile pixels at the demo's scales) and
#: they change smoothly: linear between rows, nearest node along a row.
NODE_STEP = 16

#: Step of the finite differences of the pixel map, tile pixels (the map is
#: smooth: its second derivative across a pixel is ~1e-6).
_STEP = 1.0


def _nodes(n: int, step: int) -> np.ndarray:
    return np.append(np.arange(0, n, step), n - 1).astype(float) if n > 1 else np.zeros(1)


def _in_time(dx: np.ndarray, n_samples: int) -> np.ndarray:
    """Kernel samples (rows of ``dx``) resampled to ``n_samples`` equal times."""
    if dx.shape[1] == n_samples:
        return dx
    old = (np.arange(dx.shape[1]) + 0.5) / dx.shape[1]
    new = (np.arange(n_samples) + 0.5) / n_samples
    out = np.array([np.interp(new, old, row) for row in dx])
    return out - out.mean(axis=1, keepdims=True)


def _night_pixels(tile: Tile, wcs, x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Product pixels ``(x, y)`` (stacked on axis 0) of tile pixels ``(x, y)``."""
    world = tile.wcs.pixel_to_world_values(x, y)
    return np.array([np.asarray(a, float) for a in wcs.world_to_pixel_values(*world)])


def _product_kernels(product, tile: Tile, x: np.ndarray, y: np.ndarray, n_samples: int):
    """The product's kernels at tile pixels ``(x, y)``, in tile pixels; and where it has data.

    Returns
    -------
    dx, dy : ndarray, shape (n, n_samples)
        Kernel samples turned into tile pixels (zero where ``inside`` is False
        or the product has no kernels: a round star).
    inside : ndarray of bool, shape (n,)
        The product has data at the pixel nearest the point.
    box : ndarray, shape (n,) or None
        The clocking top-hat's length along the tile's x, tile pixels (0
        where ``inside`` is False); None if the product records none.
    lattice : ndarray, shape (4, n) or None
        Rectify's lattice offsets along the night's x and y (rectified
        pixels, in [0, 1)) and tile pixels per rectified pixel along the
        tile's x and y (signed); None with ``box``.
    """
    n_y, n_x = product.image.shape
    px, py = _night_pixels(tile, product.wcs, x, y)
    ix, iy = np.rint(px), np.rint(py)
    inside = np.isfinite(px + py) & (ix >= 0) & (ix < n_x) & (iy >= 0) & (iy < n_y)
    idx = np.flatnonzero(inside)
    inside[idx] = np.isfinite(product.image[iy[idx].astype(int), ix[idx].astype(int)])
    idx = np.flatnonzero(inside)
    dx = np.zeros((x.size, n_samples))
    dy = np.zeros((x.size, n_samples))
    if product.smear_kernels is None or not idx.size:
        return dx, dy, inside, None, None
    # Jacobian of product pixels over tile pixels, by central differences, inverted:
    # it carries an offset in the product's pixels into the tile's.
    d_x = (
        _night_pixels(tile, product.wcs, x[idx] + _STEP, y[idx])
        - _night_pixels(tile, product.wcs, x[idx] - _STEP, y[idx])
    ) / (2 * _STEP)
    d_y = (
        _night_pixels(tile, product.wcs, x[idx], y[idx] + _STEP)
        - _night_pixels(tile, product.wcs, x[idx], y[idx] - _STEP)
    ) / (2 * _STEP)
    carry = np.linalg.inv(np.stack([d_x.T, d_y.T], axis=-1))  # (n, 2, 2): tile per product px
    grid = KernelGrid(product.smear_kernels)
    samples = [grid(float(a), float(b)) for a, b in zip(px[idx], py[idx], strict=True)]
    kx = _in_time(np.array([s[0] for s in samples]), n_samples)
    ky = _in_time(np.array([s[1] for s in samples]), n_samples)
    dx[idx] = carry[:, 0, 0, None] * kx + carry[:, 0, 1, None] * ky
    dy[idx] = carry[:, 1, 0, None] * kx + carry[:, 1, 1, None] * ky
    steps = grid.row_steps(px[idx], py[idx])
    if steps is None:
        return dx, dy, inside, None, None
    box = np.zeros(x.size)
    box[idx] = steps * np.abs(carry[:, 0, 0])  # one strip row along the night's x, in tile px
    lattice = np.zeros((4, x.size))
    responses = grid.responses(px[idx], py[idx])
    lattice[0, idx] = [r.lattice_x for r in responses]
    lattice[1, idx] = [r.lattice_y for r in responses]
    # a rectified pixel along the night's x (y) in tile pixels along the tile's x (y)
    lattice[2, idx], lattice[3, idx] = carry[:, 0, 0], carry[:, 1, 1]
    return dx, dy, inside, box, lattice


def carried_kernels(
    products: Sequence,
    tile: Tile,
    weights: Sequence[float] | None = None,
    *,
    step: int = NODE_STEP,
) -> Table | None:
    """The smear kernel of a co-added star at nodes of the tile, in tile pixels.

    Parameters
    ----------
    products : sequence of NightImage
        The products co-added on the tile (scaled or not: only their WCSs,
        where they have data and their ``smear_kernels`` are used).
    tile : Tile
    weights : sequence of float, optional
        Weight of each product's night in the co-add (e.g. its inverse sky
        variance times the seeing factor); default equal.  Products of one
        night answer for different pixels: where they overlap, the first one's
        kernel is taken, as the co-add takes its pixels.
    step : int
        Spacing of the nodes, tile pixels.

    Returns
    -------
    astropy.table.Table or None
        Rectify's ``smear_kernels`` layout on the tile: ``x``, ``y`` (tile
        pixels of the nodes that some product covers), ``dx``, ``dy`` (shape
        ``(n, K)``, zero mean, tile pixels), ``length`` and ``bow``; where
        the products record it, ``row_step`` (the clocking top-hat along x,
        tile pixels: the root of the nights' weighted mean square) with
        ``lattice_x`` and ``lattice_y`` (rectify's lattice offsets, the
        nights' weighted circular mean, rectified pixels) and
        ``lattice_step_x`` and ``lattice_step_y`` (tile pixels per rectified
        pixel, signed, weighted mean).  None if no product has kernels
        (round stars).
    """
    weights = np.ones(len(products)) if weights is None else np.asarray(weights, float)
    if weights.shape != (len(products),) or not np.all(weights >= 0):
        raise ValueError(
            f"weights must be one non-negative number per product ({len(products)}); "
            f"got {weights!r}."
        )
    with_kernels = [p.smear_kernels for p in products if p.smear_kernels is not None]
    if not any(len(k) for k in with_kernels):
        return None
    n_samples = max(np.asarray(k["dx"]).shape[1] for k in with_kernels if len(k))
    xs, ys = np.meshgrid(_nodes(tile.shape[1], step), _nodes(tile.shape[0], step))
    x, y = xs.ravel(), ys.ravel()
    sum_x = np.zeros((x.size, n_samples))
    sum_y = np.zeros((x.size, n_samples))
    sum_box2 = np.zeros(x.size)
    sum_phase = np.zeros((2, x.size), complex)  # lattice offsets on the unit circle
    sum_step = np.zeros((2, x.size))
    with_response = np.zeros(x.size)  # the weights of the products that record a response
    boxed = False
    total = np.zeros(x.size)
    nights = list(dict.fromkeys(p.night for p in products))
    for night in nights:
        taken = np.zeros(x.size, bool)
        for product, weight in zip(products, weights, strict=True):
            if product.night != night:
                continue
            dx, dy, inside, box, lattice = _product_kernels(product, tile, x, y, n_samples)
            use = inside & ~taken
            sum_x[use] += weight * dx[use]
            sum_y[use] += weight * dy[use]
            if box is not None:
                sum_box2[use] += weight * box[use] ** 2
                sum_phase[:, use] += weight * np.exp(2j * np.pi * lattice[:2, use])
                sum_step[:, use] += weight * lattice[2:, use]
                with_response[use] += weight
                boxed = True
            total[use] += weight
            taken |= inside
    keep = total > 0
    if not keep.any():
        return None
    dx = sum_x[keep] / total[keep, None]
    dy = sum_y[keep] / total[keep, None]
    # The nights' top-hats mixed with their weights: one top-hat of their mean
    # variance (they differ by < 1e-3 of a row between nights of one strip);
    # their lattice offsets' circular mean and their steps' mean.
    response = {}
    if boxed:
        offsets = np.mod(np.angle(sum_phase[:, keep]) / (2.0 * np.pi), 1.0)
        # (where no product records one, step 1 and offset 0: a model without taps)
        recorded = with_response[keep] > 0
        steps = np.where(
            recorded, sum_step[:, keep] / np.where(recorded, with_response[keep], 1.0), 1.0
        )
        response = {
            "lattice_x": offsets[0],
            "lattice_y": offsets[1],
            "row_step": np.sqrt(sum_box2[keep] / total[keep]),
            "lattice_step_x": steps[0],
            "lattice_step_y": steps[1],
        }
    table = kernel_table(
        x[keep],
        y[keep],
        dx,
        dy,
        n_samples,
        "TDI smear kernel of a co-added star: the nights' recorded kernels carried into "
        "tile pixels and averaged with the co-add's weights (equal-time samples relative "
        "to their mean; a star's image is the seeing averaged over them); row_step: the "
        "nights' TDI clocking top-hat along x, tile pixels; lattice_x, lattice_y: rectify's "
        "lattice offsets (rectified px) and lattice_step_x, lattice_step_y: tile px per "
        "rectified px, signed (its cubic interpolation's taps on the tile).",
        **response,
    )
    log.debug(
        "%s: kernels on %d nodes, longest %.2f px, widest bow %.2f px",
        tile.name,
        int(keep.sum()),
        float(table["length"].max()),
        float(table["bow"].max()),
    )
    return table


#: Smallest sigma a Gaussian of the mix is narrowed to, pixels (a point, to the fit).
_MIN_SIGMA = 0.1

#: Fourth moment of the Keys (a = -1/2) cubic-convolution kernel, ``integral t**4
#: K(t) dt`` in pixels**4 of the grid it interpolates: 2 (17/560 - 101/560) from
#: its two cubics on [0, 1] and [1, 2] (Keys 1981, IEEE Trans. ASSP 29, 1153).
KEYS_M4 = -0.3


def resampling_cumulants(pixel: float) -> tuple[float, float]:
    """Variance and fourth cumulant of the resampler's kernel on the tile, in tile pixels.

    For a night's ``pixel`` (tile pixels): up to ``STRETCH_FROM`` (0.9)
    night pixels per tile pixel (a tile finer than the night), the Keys
    kernel on the night's pixels,
    variance 0 and fourth cumulant ``M4 pixel**4``; beyond, the cubic
    B-spline one tile pixel wide that averages the night over each tile
    pixel (:func:`pipeline.mosaic._resample_jit._sample_wide`), four
    top-hats of 1 convolved: variance ``4 / 12``, fourth cumulant ``-4 /
    120`` (see :class:`SeeingMix`).
    """
    from pipeline.mosaic._resample_jit import STRETCH_FROM

    if pixel * STRETCH_FROM < 1.0:
        return 4.0 / 12.0, -4.0 / 120.0
    return 0.0, KEYS_M4 * float(pixel) ** 4


#: Share ``w`` of a night's Gaussian taken off by the wider one of its pair (any
#: w > 0 gives the pair's fourth cumulant; 1/2 keeps both variances within
#: ~0.1 px**2 of the night's on the demo).
_PAIR = 0.5


@dataclasses.dataclass(frozen=True)
class SeeingMix(SeeingProfile):
    """Nights' seeing profiles of one family added with weights: a co-added star's seeing.

    The model of detect integrates each Gaussian over a tile pixel, but a
    tile pixel is the resampled night (:mod:`pipeline.mosaic._resample`),
    whose stars are integrated over the night's own pixels and then either
    interpolated with the Keys cubic kernel (a night's pixel over 1.1 of
    the tile's: a finer tile) or averaged over the tile's pixel with the
    cubic B-spline (any other).  Along each axis, in tile pixels, a star's
    samples are the seeing convolved with a top-hat of the night's pixel
    ``s`` (the night's pixel over the tile's) and the resampler's kernel,
    of variance ``r2`` and fourth cumulant ``r4``
    (:func:`resampling_cumulants`); the model is a Gaussian convolved with
    a top-hat of 1.  Cumulants add under convolution (common practice), so
    each Gaussian of a night is replaced by a pair of Gaussians with the
    same variance ``sigma**2 + (s**2 - 1) / 12 + r2`` and the fourth
    cumulant the samples need beyond the model's top-hat, ``k4 = (1 -
    s**4) / 120 + r4``: a top-hat of width ``w`` has variance ``w**2 / 12``
    and fourth cumulant ``-w**4 / 120`` (the uniform distribution, common
    practice).  The Keys kernel on the night's pixels has ``r2 = 0`` (it
    reproduces quadratics) and ``r4 = M4 s**4``, ``M4 = -3/10`` its fourth
    moment, its mean over the interpolation's phases (``integral t**4 K(t)
    dt`` of the kernel of Keys 1981, IEEE Trans. ASSP 29, 1153); the cubic
    B-spline of one tile pixel, four top-hats of 1, ``r2 = 4 / 12`` and
    ``r4 = -4 / 120``.  A pair of weights ``p``, ``1 - p`` and variances
    ``v_1``, ``v_2`` has fourth cumulant ``3 p (1 - p) (v_1 - v_2)**2``
    along an axis; ``k4`` is negative on the demo, so the pair is a
    Gaussian of weight ``1 + w`` less a wider one of weight ``w``.
    Noise-free Gaussian stars of 1.46 px FWHM on the demo's 0.52 px nights
    come out +0.04 % (width held) and -0.06 % (fitted), 36 stars with a
    spread of 0.02 % (``tests/test_mosaic_kernels.py``; with the Keys
    kernel sampling the nights, -0.42 % with the variance alone, +0.14 %
    with the pair and a spread of 0.5 % over the stars' phases on the
    night's pixels).  The pairs double the Gaussians: a tile's catalogue
    takes ~1.9 times the CPU time.

    Parameters
    ----------
    fwhm : float
        Width of the mix, pixels: the fraction-weighted mean of the nights' FWHMs.
    shape, beta
        The family (see :class:`~pipeline.stages.detect.SeeingProfile`);
        ``beta``, the Moffat index of every night without one in ``betas``
        (as a summary, :meth:`of_nights` makes it the nights' mean).
    widths : tuple of float
        Each night's FWHM over ``fwhm`` (kept by :meth:`with_fwhm`).
    fractions : tuple of float
        Each night's share of a star's light (the co-add's weights), summing to 1.
    pixels : tuple of float
        Each night's pixel over the tile's (1: no narrowing).
    betas : tuple of float
        Each night's Moffat index, the one its detect used (NaN: ``beta``);
        empty: ``beta`` for every night.  Ignored for a Gaussian family.
    """

    widths: tuple[float, ...] = (1.0,)
    fractions: tuple[float, ...] = (1.0,)
    pixels: tuple[float, ...] = (1.0,)
    betas: tuple[float, ...] = ()

    def __post_init__(self) -> None:
        super().__post_init__()
        if not (len(self.widths) == len(self.fractions) == len(self.pixels) > 0):
            raise ValueError(
                "widths, fractions and pixels must be one number per night; got "
                f"{self.widths!r}, {self.fractions!r} and {self.pixels!r}."
            )
        if self.betas and len(self.betas) != len(self.widths):
            raise ValueError(
                f"betas must be one Moffat index per night ({len(self.widths)}) or none; "
                f"got {self.betas!r}."
            )

    @classmethod
    def of_nights(
        cls,
        fwhms: Sequence[float],
        weights: Sequence[float],
        pixels: Sequence[float],
        shape: str,
        beta: float,
        betas: Sequence[float] | None = None,
    ) -> SeeingMix:
        """The mix of nights of FWHMs ``fwhms`` and pixels ``pixels`` (tile pixels), weighted.

        ``betas``: each night's Moffat index (NaN or None: ``beta``, e.g. a
        night whose product does not record it); the mix's own ``beta`` is
        then their mean with the nights' shares, a summary for the
        catalogue (the model uses each night's).
        """
        fwhms, weights = np.asarray(fwhms, float), np.asarray(weights, float)
        fractions = weights / weights.sum()
        fwhm = float(np.sum(fractions * fwhms))
        own: tuple[float, ...] = ()
        if betas is not None and shape == "moffat":
            known = np.asarray([np.nan if b is None else b for b in betas], float)
            own = tuple(float(b) for b in np.where(np.isfinite(known), known, beta))
            beta = float(np.sum(fractions * np.asarray(own)))
        return cls(
            fwhm,
            shape,
            beta,
            tuple(float(f) for f in fwhms / fwhm),
            tuple(float(f) for f in fractions),
            tuple(float(p) for p in pixels),
            own,
        )

    def mixture(self) -> tuple[np.ndarray, np.ndarray]:
        """Sigmas (pixels) and flux weights (summing to 1) of every night's pairs of Gaussians."""
        sigmas, weights = [], []
        betas = self.betas or (self.beta,) * len(self.widths)
        for width, fraction, pixel, beta in zip(
            self.widths, self.fractions, self.pixels, betas, strict=True
        ):
            s, w = SeeingProfile(self.fwhm * width, self.shape, beta).mixture()
            k2_resampling, k4_resampling = resampling_cumulants(pixel)
            variance = s * s + (pixel * pixel - 1.0) / 12.0 + k2_resampling
            k4 = (1.0 - pixel**4) / 120.0 + k4_resampling
            if k4 < 0.0:  # weights 1 + w and -w, variances v + w e and v + (1 + w) e
                e = np.sqrt(-k4 / (3.0 * _PAIR * (1.0 + _PAIR)))
                pair = (variance + _PAIR * e, variance + (1.0 + _PAIR) * e)
                shares = (1.0 + _PAIR, -_PAIR)
            else:  # weights 1/2 and 1/2, variances v -+ sqrt(k4 / 3)
                d = np.sqrt(k4 / 3.0)
                pair, shares = (variance - d, variance + d), (0.5, 0.5)
            for v, share in zip(pair, shares, strict=True):
                sigmas.append(np.sqrt(np.maximum(v, _MIN_SIGMA**2)))
                weights.append(w * fraction * share)
        return np.concatenate(sigmas), np.concatenate(weights)

    def with_fwhm(self, fwhm: float) -> SeeingMix:
        """The same mix, every night's profile scaled to a mean width ``fwhm``."""
        return dataclasses.replace(self, fwhm=float(fwhm))
