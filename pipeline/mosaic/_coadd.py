"""Co-add the nights that cover a tile.

Steps (:func:`mosaic_tile`; :func:`coadd` is the part that sees only arrays):

1. Select: products whose seeing FWHM exceeds ``max_seeing`` or whose night
   zero point lies more than ``max_transparency_loss`` magnitudes below the
   best product's are left out (:func:`select_products`).
2. Put every product on one photometric scale (the first kept product's zero
   point: flux times ``10**(0.4 (zp_common - zp))``, variance times its square)
   and resample it onto the tile (:func:`~pipeline.mosaic.resample_to_tile`);
   the products of one night (its stretches) form one plane per night, each
   resampled with its neighbours' edge pixels so that their seams leave no
   gap (:mod:`pipeline.mosaic._seams`).
3. Match levels: each night's offset from the nights' median (its sky
   level) is removed, keeping the weighted mean level: the median difference
   over blocks of 128 pixels, interpolated bilinearly (a night's sky changes
   along the scan, i.e. with time; one offset per night would leave ramps
   that the rejection takes for outliers).
4. Weights: ``w_i = s_i / B_i``, ``B_i`` the median of the night's predicted
   pixel variance ``V_i`` (variance plane times the resampling's pixel
   factor) over blocks of 32 x 32 pixels, interpolated bilinearly: smooth and
   blind to a star's own photon noise (weights that fall where a night has
   more signal bias co-added fluxes low: 14 % for bright stars in seeing of
   1.2-2.4 px sigma; weights that follow the resampling's pixel-to-pixel
   ripple bias them by ~0.5 %), and ``s_i = (best FWHM / FWHM_i)**2`` if ``weight_by_seeing``,
   else 1.
5. Reject outliers across nights where at least ``min_nights`` nights have
   data: a night's pixel is rejected when it lies more than ``reject_sigma``
   times ``sqrt(V_i + V_m + (source_tolerance * S)**2)`` from the weighted
   median, ``V_m = (pi/2) / sum(1/V_i)`` the median's own variance,
   ``S`` the highest significant (3 sigma) signal of the median above the
   tile's sky within ``source_radius`` pixels (stars seen in different seeing differ by a
   fraction of their signal, out to their wings; a satellite trail, a cosmic
   ray or a transient on blank sky does not have that allowance).  Rejections
   grow by ``grow`` pixels in that night (the faint wings of a trail).
6. Average: ``image = sum(w x) / sum(w)`` over the kept nights; ``weight =
   (sum w)**2 / sum(w**2 V)``, the inverse of the predicted pixel variance;
   ``coverage`` the number of kept nights; ``flags`` the OR of the kept
   nights' flags (of all nights where none is kept), plus
   :attr:`~pipeline.masks.MaskBit.NIGHT_LEFT_OUT` where a night with data
   was left out (rejected, or flagged with an ``ignore_flags`` bit that
   keeps data: saturated, bleed, cosmic ray) and within
   ``max(grow, source_radius)`` of a rejection: there the source allowance
   may have kept a rejected feature's light under a star (a satellite trail
   across it), which the tile catalogue then flags ``NEAR_FLAGGED``.

The tile's ``noise_correlation`` is the variance of a large aperture sum over
the sum of ``1 / weight`` across it: the weighted mean over nights of their
resampled images' ``noise_correlation / pixel_factor``.
"""

from __future__ import annotations

import logging
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
from astropy.io import fits
from astropy.table import Table
from astropy.wcs import WCS

from pipeline.masks import MASK_DTYPE, NO_DATA, MaskBit
from pipeline.mosaic._kernels import carried_kernels
from pipeline.mosaic._options import CoaddOptions
from pipeline.mosaic._resample import _Scratch, merge_onto_tile
from pipeline.mosaic._seams import extended_planes
from pipeline.mosaic._tiles import Tile
from pipeline.products import (
    FLAGS_EXTENSION,
    FLUX_EXTENSION,
    NIGHT_ZERO_POINT_KEY,
    SEEING_INDEX_KEY,
    SEEING_KEY,
    VARIANCE_EXTENSION,
    ZERO_POINT_ERROR_KEY,
    ZERO_POINT_KEY,
    night_column,
)

__all__ = [
    "NIGHT_ZERO_POINT_KEY",
    "SEEING_KEY",
    "ZERO_POINT_KEY",
    "CoaddedPlanes",
    "MosaicTile",
    "NightImage",
    "coadd",
    "mosaic_tile",
    "night_image_from_hdulist",
    "select_products",
    "weighted_median",
]

log = logging.getLogger(__name__)


@dataclass(frozen=True, eq=False)
class NightImage:
    """A calibrated image product of one night, ready for a mosaic.

    Attributes
    ----------
    image, variance : ndarray, shape (n_y, n_x)
        Electrons per pixel (on the scale of ``zero_point``) and e^2.
    flags : ndarray of uint16, shape (n_y, n_x)
        :class:`~pipeline.masks.MaskBit` flags.
    wcs : astropy.wcs.WCS
        Celestial WCS of the arrays.
    zero_point : float
        Magnitude of one electron in ``image``.
    night : str
        The night it belongs to (products of one night count as one in ``coverage``).
    night_zero_point : float or None
        Zero point the night measured where the product was recorded
        (transparency), e.g. the median of
        :func:`pipeline.stages.zeropoint.fit_zero_point`'s ``Z(t)`` over it;
        only differences between products matter.  None: ``zero_point``.
    seeing : float or None
        Seeing FWHM, arcsec; None: unknown (never excluded by seeing).
    noise_correlation : float
        Large-aperture noise factor of the product (rectify's ``NOISECOR``).
    smear_kernels : astropy.table.Table or None
        The TDI smear kernels of its stars (rectify's ``smear_kernels``
        layout) with ``x``, ``y`` in the arrays' own pixels (0-based); None:
        round stars (a deconvolved product, or no kernel recorded).
    zero_point_error : float
        1-sigma error of the calibration that put ``image`` on ``zero_point``,
        mag (the science stage's ``ZPERR``: the largest over the product);
        0: unknown or exact.
    position_error : (float, float)
        1-sigma error of ``wcs`` itself along right ascension (on the sky)
        and declination, arcsec: the night's astrometric solution's own
        error, which every star on the product shares (the astrometry
        stage's ``CSYER1``, ``CSYER2``); 0: unknown or exact.
    seeing_beta : float or None
        Moffat index of the seeing profile the night's detect used (the
        science stage's ``SEEBETA``); None: unknown (a Gaussian seeing, or a
        product of a science stage before it wrote the card), the tile's
        configured ``moffat_beta`` stands in.
    filter_name : str or None
        Passband of the product (its ``FILTER`` card); None: unknown (never
        left out by passband).
    """

    image: np.ndarray
    variance: np.ndarray
    flags: np.ndarray
    wcs: WCS
    zero_point: float
    night: str
    night_zero_point: float | None = None
    seeing: float | None = None
    noise_correlation: float = 1.0
    smear_kernels: Table | None = None
    zero_point_error: float = 0.0
    position_error: tuple[float, float] = (0.0, 0.0)
    seeing_beta: float | None = None
    filter_name: str | None = None

    @property
    def transparency_zero_point(self) -> float:
        return self.zero_point if self.night_zero_point is None else self.night_zero_point


def night_image_from_hdulist(
    hdul: fits.HDUList, night: str | None = None, smear_kernels: Table | None = None
) -> NightImage:
    """A calibrated image product (FLUX, FLUXVAR, FLAGS) as a :class:`NightImage`.

    Parameters
    ----------
    hdul : astropy.io.fits.HDUList
        The product (:func:`pipeline.products.image_hdulist` layout) with
        ``PHOTZP`` and optionally ``ZPMED``, ``ZPERR``, ``SEEING``, ``SEEBETA`` and
        ``NOISECOR``, ``CSYER1``, ``CSYER2`` on its FLUX plane: the science
        stage's calibrated product (the keywords:
        :data:`pipeline.products.ZERO_POINT_KEY` and its neighbours; the
        WCS's systematic errors, :func:`_wcs_error_on_sky`).
    night : str or None
        Night label; None: the FLUX plane's ``DATE-OBS`` (its date part).
    smear_kernels : astropy.table.Table or None
        The science stage's ``smear_kernels`` product (night pixels: ``x`` is
        shifted by the product's first night column, ``NIGHT`` grid ``CRVAL1A``).
        Not used for a deconvolved product (``DECONV``: round stars).

    Raises
    ------
    ValueError
        A plane or ``PHOTZP`` is missing.
    """
    names = [hdu.name for hdu in hdul]
    missing = [n for n in (FLUX_EXTENSION, VARIANCE_EXTENSION, FLAGS_EXTENSION) if n not in names]
    if missing:
        raise ValueError(
            f"not an image product: no {', '.join(missing)} extension (found {names})."
        )
    header = hdul[FLUX_EXTENSION].header
    if ZERO_POINT_KEY not in header:
        raise ValueError(
            f"the product has no {ZERO_POINT_KEY} card: mosaics combine calibrated products "
            "(run the science stage first)."
        )
    if night is None:
        night = str(header.get("DATE-OBS", ""))[:10]
    if smear_kernels is not None and not header.get("DECONV", False):
        smear_kernels = Table(smear_kernels, copy=True)
        smear_kernels["x"] = np.asarray(smear_kernels["x"], float) - night_column(header)
    else:
        smear_kernels = None
    wcs = WCS(header).celestial
    image = hdul[FLUX_EXTENSION].data
    return NightImage(
        image=image,
        variance=hdul[VARIANCE_EXTENSION].data,
        flags=hdul[FLAGS_EXTENSION].data,
        wcs=wcs,
        zero_point=float(header[ZERO_POINT_KEY]),
        night=night,
        night_zero_point=(
            float(header[NIGHT_ZERO_POINT_KEY]) if NIGHT_ZERO_POINT_KEY in header else None
        ),
        seeing=float(header[SEEING_KEY]) if SEEING_KEY in header else None,
        noise_correlation=float(header.get("NOISECOR", 1.0)),
        smear_kernels=smear_kernels,
        zero_point_error=float(header.get(ZERO_POINT_ERROR_KEY, 0.0)),
        position_error=_wcs_error_on_sky(header, wcs, image.shape),
        seeing_beta=float(header[SEEING_INDEX_KEY]) if SEEING_INDEX_KEY in header else None,
        filter_name=(str(header["FILTER"]).strip() or None) if "FILTER" in header else None,
    )


def _wcs_error_on_sky(header: fits.Header, wcs: WCS, shape) -> tuple[float, float]:
    """A product's ``CSYER1``, ``CSYER2`` on the sky: along RA and Dec, arcsec.

    ``CSYERia`` is the systematic error of a WCS coordinate in its unit
    (degrees of right ascension and of declination; a reserved WCS keyword
    of the FITS Standard 4.0, from memory): along right ascension, a
    distance on the sky is ``cos(dec)`` of it, at the product's centre.
    Missing cards count as 0.
    """
    ra, dec = float(header.get("CSYER1", 0.0)), float(header.get("CSYER2", 0.0))
    if ra == 0.0:
        return 0.0, 3600.0 * dec
    centre = wcs.pixel_to_world_values((shape[1] - 1) / 2, (shape[0] - 1) / 2)
    return 3600.0 * ra * float(np.cos(np.radians(centre[1]))), 3600.0 * dec


def select_products(
    products: Sequence[NightImage],
    *,
    max_seeing: float | None = None,
    max_transparency_loss: float | None = None,
    filter_name: str | None = None,
) -> tuple[list[NightImage], dict[int, str]]:
    """Keep the products of one passband within the seeing and transparency limits.

    Parameters
    ----------
    products : sequence of NightImage
    max_seeing : float or None
        Largest seeing FWHM kept, arcsec; None: no limit.
    max_transparency_loss : float or None
        Largest loss of zero point below the best product's, mag; None: no limit.
    filter_name : str or None
        Passband kept (products of another ``filter_name`` are left out;
        those of an unknown one kept); None: every product's must agree.

    Returns
    -------
    kept : list of NightImage
    excluded : dict
        Index in ``products`` -> why it was left out.

    Raises
    ------
    ValueError
        If ``filter_name`` is None and the products are of several passbands
        (the message names the nights of each): a co-add adds one passband.
    """
    bands: dict[str, list[str]] = {}
    for product in products:
        if product.filter_name is not None:
            bands.setdefault(product.filter_name, []).append(product.night)
    if filter_name is None and len(bands) > 1:
        listed = "; ".join(
            f"FILTER {band}: {', '.join(dict.fromkeys(nights))}" for band, nights in bands.items()
        )
        raise ValueError(
            f"the products of this tile are of {len(bands)} passbands ({listed}); a mosaic "
            "co-adds one: set coadd.filter to the one to build (the nights of the others "
            "are left out), or list only the nights of one passband."
        )

    def in_band(product: NightImage) -> bool:
        return filter_name is None or product.filter_name in (None, filter_name)

    excluded: dict[int, str] = {}
    best = max((p.transparency_zero_point for p in products if in_band(p)), default=0.0)
    for i, product in enumerate(products):
        if not in_band(product):
            excluded[i] = f"FILTER {product.filter_name}, not coadd.filter {filter_name}"
        elif max_seeing is not None and product.seeing is not None and product.seeing > max_seeing:
            excluded[i] = f"seeing {product.seeing:.2f} arcsec > max_seeing {max_seeing:g}"
        elif (
            max_transparency_loss is not None
            and best - product.transparency_zero_point > max_transparency_loss
        ):
            loss = best - product.transparency_zero_point
            excluded[i] = (
                f"zero point {loss:.2f} mag below the best > max_transparency_loss "
                f"{max_transparency_loss:g}"
            )
    for i, reason in excluded.items():
        log.info("night %s left out: %s", products[i].night, reason)
    return [p for i, p in enumerate(products) if i not in excluded], excluded


@dataclass(frozen=True, eq=False)
class CoaddedPlanes:
    """The co-add of aligned night planes.

    Attributes
    ----------
    image : ndarray, shape (n_y, n_x)
        Weighted mean, e- per pixel; NaN where no night is kept.
    weight : ndarray, shape (n_y, n_x)
        Inverse of the predicted pixel variance, e^-2; 0 without data.
    coverage : ndarray of uint16, shape (n_y, n_x)
        Nights kept per pixel.
    flags : ndarray of uint16, shape (n_y, n_x)
        OR of the kept nights' flags (of all nights' where none is kept),
        plus ``NIGHT_LEFT_OUT`` where a night with data was left out and
        near rejections (step 6 of the module docstring).
    rejected : ndarray of int, shape (n_nights,)
        Pixels of each night rejected as outliers (after growing).
    offsets : ndarray, shape (n_nights,)
        Mean level subtracted from each night, e- (the level follows the
        night's sky across the tile: step 3 of the module docstring).
    """

    image: np.ndarray
    weight: np.ndarray
    coverage: np.ndarray
    flags: np.ndarray
    rejected: np.ndarray
    offsets: np.ndarray


def _flag_bits(names: Sequence[str]) -> int:
    bits = 0
    for name in names:
        try:
            bits |= int(MaskBit[name])
        except KeyError:
            known = ", ".join(b.name for b in MaskBit)
            raise ValueError(
                f"unknown flag name {name!r} in ignore_flags; known: {known}."
            ) from None
    return bits


#: Side of the blocks over which a night's variance is summarised for its weights, px.
_WEIGHT_BLOCK = 32
#: Every this many rows and columns of a block feed its median: 16 x 16 of its
#: pixels at a quarter of the cost; their median differs from the whole
#: block's by ~1.25 / 16 of the variance plane's pixel-to-pixel scatter (a few
#: % of the variance: well under 1 % on a weight; common practice).
_WEIGHT_STRIDE = 2


def _background_grid(
    variance: np.ndarray,
    valid: np.ndarray,
    block: int = _WEIGHT_BLOCK,
    stride: int = _WEIGHT_STRIDE,
) -> np.ndarray:
    """The median of ``variance`` over blocks of ``block`` pixels (at least 2 x 2 of them).

    A star's pixels carry its photon noise and the resampling's phases make
    the variance plane ripple from pixel to pixel; the block median is the
    sky's, and varies smoothly (interpolated bilinearly between the block
    centres).  Blocks without data take the median of the other blocks; a
    tile less than two blocks wide gets one value.  NaN without any data, in
    the shape the image's blocks give (every night's grid on a tile has the
    same shape, so that they stack; a night with no usable pixel there, all
    of them flagged, is one of them).
    """
    from pipeline.mosaic._coadd_jit import block_medians

    grid = block_medians(variance, valid, block, stride)
    good = np.isfinite(grid)
    shape = grid.shape if min(grid.shape) >= 2 else (2, 2)
    if not good.any():
        return np.full(shape, np.nan)
    grid = np.where(good, grid, np.median(grid[good]))
    if min(grid.shape) < 2:
        return np.full(shape, np.median(grid))
    return grid


#: Every this many rows and columns feed the reference of the level matching.
_LEVEL_STEP = 4
#: Side of the blocks (in those samples) over which a night's level offset is
#: the median difference from the reference: 32 samples = 128 tile pixels, so
#: that the offset's own noise (1.25 sigma / 32 per block) adds < 0.2 % to the
#: co-add's variance, while a sky that changes along the night (along the
#: scan) is followed to within a small fraction of its gradient.
_LEVEL_BLOCK = 32


def _sky_level(median: np.ndarray) -> float:
    """The tile's sky: the median of ``median`` over every ``_LEVEL_STEP``-th row and column."""
    sample = median[::_LEVEL_STEP, ::_LEVEL_STEP]
    finite = sample[np.isfinite(sample)]
    return float(np.median(finite)) if finite.size else 0.0


def weighted_median(values: np.ndarray, weights: np.ndarray) -> np.ndarray:
    """Weighted median along axis 0 (weight 0 marks a missing value).

    Parameters
    ----------
    values, weights : ndarray, shape (n, ...)

    Returns
    -------
    ndarray, shape values.shape[1:]
        The lowest value at which the cumulative weight reaches half the
        total; NaN where every weight is 0.
    """
    from pipeline.mosaic._coadd_jit import weighted_median_flat

    values, weights = np.asarray(values), np.asarray(weights)
    if values.shape != weights.shape or values.ndim < 1:
        raise ValueError(
            "values and weights must be arrays of one shape (n, ...); got "
            f"{values.shape} and {weights.shape}."
        )
    flat = weighted_median_flat(
        np.ascontiguousarray(values, np.float64).reshape(values.shape[0], -1),
        np.ascontiguousarray(weights, np.float64).reshape(values.shape[0], -1),
    )
    return flat.reshape(values.shape[1:]).astype(np.result_type(values, np.float32))


def _weighted_inputs(images, variances, flags, scale, match_levels, ignore_flags, overwrite_input):
    """Steps 3-4 of the module docstring: validity, weights and levels of the night planes.

    Returns the images (invalid pixels 0, levels matched), the variances and
    flags, ``valid``, the weights (0 where invalid) and the level offsets.
    """
    from pipeline.mosaic._coadd_jit import bilinear_weights, shift_levels, validity

    images = np.asarray(images, dtype=np.float32)
    variances = np.asarray(variances, dtype=np.float32)
    flags = np.asarray(flags)
    if images.ndim != 3 or variances.shape != images.shape or flags.shape != images.shape:
        raise ValueError(
            "images, variances and flags must be 3-D (n_nights, n_y, n_x) of one shape; got "
            f"{images.shape}, {variances.shape} and {flags.shape}."
        )
    n_nights = images.shape[0]
    scale = np.ones(n_nights) if scale is None else np.asarray(scale, dtype=float)
    planes = (n_nights, -1)
    images = np.ascontiguousarray(images).reshape(planes)
    valid = np.empty(images.shape, np.bool_)
    cleaned = images if overwrite_input else np.empty_like(images)
    validity(
        images,
        np.ascontiguousarray(variances).reshape(planes),
        np.ascontiguousarray(flags, MASK_DTYPE).reshape(planes),
        MASK_DTYPE.type(_flag_bits(ignore_flags)),
        cleaned,
        valid,
    )
    images = cleaned
    valid, images = valid.reshape(variances.shape), images.reshape(variances.shape)
    weights = np.empty(images.shape, np.float32)
    for i in range(n_nights):
        grid = _background_grid(variances[i], valid[i])
        bilinear_weights(grid, _WEIGHT_BLOCK, valid[i], float(np.float32(scale[i])), weights[i])
    grids = _level_offsets(images, valid, weights) if match_levels else None
    offsets = np.zeros(n_nights) if grids is None else grids.mean(axis=(1, 2))
    if grids is not None and grids.any():
        shift_levels(images, valid, grids.astype(np.float32), *level_grid_nodes())
    return images, variances, flags, valid, weights, offsets


def level_grid_nodes() -> tuple[float, float]:
    """Tile pixel of the first node of :func:`_level_offsets`' grids, and their spacing, px."""
    return _LEVEL_STEP * (0.5 * _LEVEL_BLOCK - 0.5), float(_LEVEL_STEP * _LEVEL_BLOCK)


def _level_offsets(images: np.ndarray, valid: np.ndarray, weights: np.ndarray) -> np.ndarray | None:
    """Each night's offset from the nights' weighted median, smooth across the tile.

    The median of the difference over blocks of ``_LEVEL_BLOCK`` samples
    (every ``_LEVEL_STEP`` pixels), on nodes at :func:`level_grid_nodes`,
    to be interpolated bilinearly (a night's sky changes along the scan: a
    single offset per night leaves a ramp that the rejection takes for an
    outlier).  Blocks without data take the median of the night's other
    blocks; a tile less than two blocks wide gets one offset.  Per node the
    nights' offsets, weighted by their total weights, average to 0 (the
    co-add keeps the weighted mean level).

    Returns
    -------
    ndarray, shape (n_nights, n_by, n_bx) or None
        None for fewer than two nights.
    """
    n_nights = images.shape[0]
    if n_nights < 2:
        return None
    step = np.s_[:, ::_LEVEL_STEP, ::_LEVEL_STEP]
    sample, sample_valid = images[step], valid[step]
    reference = weighted_median(sample, weights[step])
    grids = []
    for i in range(n_nights):
        both = sample_valid[i] & np.isfinite(reference)
        difference = np.where(both, sample[i] - reference, 0.0)
        grid = _background_grid(difference, both, _LEVEL_BLOCK, 1)
        grids.append(np.where(np.isfinite(grid), grid, 0.0))
    shape = np.broadcast_shapes(*(g.shape for g in grids))
    grids = np.stack([np.broadcast_to(g, shape) for g in grids])
    totals = weights.sum(axis=(1, 2))
    if totals.sum() > 0:
        grids -= np.tensordot(totals, grids, axes=1) / totals.sum()
    grids[totals == 0] = 0.0  # a night without a usable pixel here has no level to shift
    return grids


def coadd(
    images: np.ndarray,
    variances: np.ndarray,
    flags: np.ndarray,
    *,
    scale: np.ndarray | None = None,
    reject_sigma: float = 4.0,
    source_tolerance: float = 0.5,
    source_radius: int = 5,
    min_nights: int = 3,
    grow: int = 1,
    match_levels: bool = True,
    ignore_flags: Sequence[str] = CoaddOptions().ignore_flags,
    overwrite_input: bool = False,
) -> CoaddedPlanes:
    """Inverse-variance weighted, outlier-rejecting mean of aligned nights.

    Parameters
    ----------
    images : ndarray, shape (n_nights, n_y, n_x)
        Each night on the tile, e- per pixel; NaN without data.
    variances : ndarray, shape (n_nights, n_y, n_x)
        Predicted pixel variance of each night, e^2 (the resampled variance
        plane times its ``pixel_factor``).
    flags : ndarray of uint16, shape (n_nights, n_y, n_x)
    scale : ndarray, shape (n_nights,), optional
        Extra factor on each night's weight (e.g. for seeing); default 1.
    reject_sigma, source_tolerance, source_radius, min_nights, grow, match_levels, ignore_flags
        See :class:`~pipeline.mosaic.CoaddOptions` and the module docstring.
    overwrite_input : bool
        Let the co-add use ``images`` (float32, C-contiguous) as its working
        copy: saves a copy of the tile's planes; ``images`` is left level
        matched, 0 where invalid.  Default False.

    Returns
    -------
    CoaddedPlanes
    """
    images, variances, flags, valid, weights, offsets = _weighted_inputs(
        images, variances, flags, scale, match_levels, ignore_flags, overwrite_input
    )
    n_nights, tile_shape = images.shape[0], images.shape[1:]
    # numba is imported on first use, as for the resampler
    from pipeline.mosaic._coadd_jit import combine, exclude, flag_around, median_and_noise, reject

    planes = (n_nights, -1)
    images = np.ascontiguousarray(images).reshape(planes)
    variances = np.ascontiguousarray(variances).reshape(planes)
    weights = weights.reshape(planes)
    # the kept nights: valid, less the (grown) rejections, cleared in place
    kept = valid.reshape(planes)
    rejected = np.zeros(n_nights, np.int64)
    m = images.shape[1]
    # outputs are allocated by numpy (which asks for huge pages: far fewer
    # page faults than the compiled code's own allocations)
    image, weight = np.empty(m, np.float32), np.empty(m, np.float32)
    coverage, used = np.empty(m, MASK_DTYPE), np.empty(m, MASK_DTYPE)
    out = (image, weight, coverage, used)
    flags = np.ascontiguousarray(flags, MASK_DTYPE).reshape(planes)
    arrays = (images, variances, flags, weights)
    # a night's pixel flagged with these still has data, which the co-add leaves out
    left_out = MASK_DTYPE.type(_flag_bits(ignore_flags) & ~int(NO_DATA))
    if n_nights < min_nights:
        combine(arrays, kept, out, np.empty(0, np.int64), left_out)
    else:
        # combined with every valid night kept as the median is found; the
        # pixels whose nights the rejections clear are combined again
        median, noise2, count = np.empty(m, images.dtype), np.empty(m), np.empty(m, np.uint16)
        limit = float(reject_sigma) * float(reject_sigma)
        suspects = median_and_noise(arrays, kept, limit, median, noise2, count, out, left_out)
        sky = _sky_level(median.reshape(tile_shape))
        # the noise of a median is ~sqrt(pi/2) times that of the mean (common practice)
        arguments = (
            float(reject_sigma),
            float(source_tolerance),
            int(min_nights),
            max(int(source_radius), 0),
        )
        hits = reject(
            images, variances, kept, median, noise2, count, tile_shape[1], sky, arguments, suspects
        )
        del median, noise2, count
        rejected, touched = exclude(kept, hits, tile_shape[1], max(int(grow), 0))
        if touched.size:
            combine(arrays, kept, out, touched, left_out)
        # A rejected feature's light may remain within a source's allowance
        # (source_radius) of where it was rejected: a trail under a star.
        radius = max(int(grow), int(source_radius), 0)
        flag_around(used, hits, m, tile_shape[1], radius)
    return CoaddedPlanes(
        image=image.reshape(tile_shape),
        weight=weight.reshape(tile_shape),
        coverage=coverage.reshape(tile_shape),
        flags=used.reshape(tile_shape),
        rejected=rejected,
        offsets=offsets,
    )


@dataclass(frozen=True, eq=False)
class MosaicTile:
    """A finished tile: the co-added planes and what went into them.

    Attributes
    ----------
    tile : Tile
    planes : CoaddedPlanes
    zero_point : float
        Magnitude of one electron in ``planes.image``.
    nights : tuple of str
        The nights co-added, in plane order.
    noise_correlation : float
        Variance of a large aperture sum over the sum of ``1 / weight``.
    excluded : dict
        Index of a left-out product in the input -> the reason.
    smear_kernels : astropy.table.Table or None
        The smear kernel of a co-added star on nodes of the tile, in tile
        pixels (:func:`~pipeline.mosaic._kernels.carried_kernels`); None:
        round stars.
    seeing : tuple of (float, float, float, float)
        ``(FWHM arcsec, weight, pixel arcsec, Moffat index)`` of each night
        co-added whose seeing is known: a star's seeing is their mix
        (:class:`~pipeline.mosaic._kernels.SeeingMix`).  The index is the
        one the night's detect used (``NightImage.seeing_beta``), NaN where
        unknown (the configured ``moffat_beta`` stands in).
    zero_point_error : float
        1-sigma error of ``zero_point`` as the co-add inherits it, mag
        (:func:`_coadded_error`); 0: the nights' are unknown.
    position_error : (float, float)
        1-sigma error of the co-added stars' positions that the nights'
        astrometric solutions leave, along right ascension (on the sky) and
        declination, arcsec (the nights' ``position_error`` as co-added,
        :func:`_coadded_error`); 0: the nights' are unknown.
    """

    tile: Tile
    planes: CoaddedPlanes
    zero_point: float
    nights: tuple[str, ...]
    noise_correlation: float
    excluded: dict[int, str] = field(default_factory=dict)
    smear_kernels: Table | None = None
    seeing: tuple[tuple[float, float, float, float], ...] = ()
    zero_point_error: float = 0.0
    position_error: tuple[float, float] = (0.0, 0.0)

    def header(self) -> fits.Header:
        """The tile's WCS and the mosaic's cards (zero point, its error, nights, noise factor).

        ``CSYER1``, ``CSYER2``: ``position_error`` as the WCS's systematic
        errors, in degrees of right ascension and declination (at the
        tile's centre), as the nights' science images carry theirs.
        """
        header = self.tile.wcs.to_header()
        n_y, n_x = self.tile.shape
        _, dec = self.tile.wcs.pixel_to_world_values((n_x - 1) / 2, (n_y - 1) / 2)
        ra_err, dec_err = self.position_error
        header["CSYER1"] = (
            float(f"{ra_err / 3600.0 / np.cos(np.radians(float(dec))):.4e}"),
            "[deg] RA error the nights' WCSs leave",
        )
        header["CSYER2"] = (
            float(f"{dec_err / 3600.0:.4e}"),
            "[deg] Dec error the nights' WCSs leave",
        )
        header[ZERO_POINT_KEY] = (self.zero_point, "[mag] m = PHOTZP - 2.5 log10(sum of IMAGE)")
        header[ZERO_POINT_ERROR_KEY] = (
            round(self.zero_point_error, 5),
            "[mag] PHOTZP error, the nights' as co-added",
        )
        header["NOISECOR"] = (
            round(self.noise_correlation, 5),
            "aperture variance / sum of 1/weight",
        )
        header["NNIGHTS"] = (len(self.nights), "nights co-added")
        for i, night in enumerate(self.nights):
            header[f"NIGHT{i + 1}"] = (night, "night co-added")
        return header


def _night_planes(
    products: Sequence[NightImage],
    tile: Tile,
    zero_point: float,
    planes: tuple[np.ndarray, np.ndarray, np.ndarray],
    scratch: _Scratch | None = None,
) -> tuple[float, float, float] | None:
    """One night's products resampled onto the tile and merged into ``planes``.

    Each product is resampled with the edge pixels of the night's other
    products on its grid and answers for the tile pixels that sample its own
    pixels (:mod:`pipeline.mosaic._seams`), so stretches that meet leave no
    gap.  Where products overlap, the first one's pixels are kept: one
    night's products hold the same photons there (a mean of the two would
    halve the predicted variance of one measurement).

    ``planes`` (image, predicted pixel variance, flags: float32, float32,
    uint16, shape of the tile) start as NaN, NaN and ``OUTSIDE`` and are
    filled in place.  Returns the night's pixel and large-aperture noise
    factors (means over its products, weighted by area) and the sum of
    ``1 / variance`` over its pixels; None if no product reaches the tile.
    """
    factors, areas = [], []
    inverse_total = 0.0
    scaled = []
    for product in products:
        gain = np.float32(10.0 ** (0.4 * (zero_point - product.zero_point)))
        night = np.asarray(product.image, np.float32), np.asarray(product.variance, np.float32)
        if gain != 1:
            night = night[0] * gain, night[1] * gain**2
        scaled.append(((*night, product.flags), product.wcs))
    for i, product in enumerate(products):
        extended, wcs, core = extended_planes(*scaled[i], scaled[:i] + scaled[i + 1 :])
        merged = merge_onto_tile(
            *extended,
            wcs,
            tile,
            planes,
            noise_correlation=product.noise_correlation,
            core=core,
            scratch=scratch,
        )
        if merged is None:
            continue
        taken, inverse, pixel_factor, correlation = merged
        inverse_total += inverse
        factors.append((pixel_factor, correlation / pixel_factor))
        areas.append(taken)
    if not factors:
        return None
    pixel, aperture = np.average(np.array(factors), axis=0, weights=np.maximum(areas, 1))
    return float(pixel), float(aperture), inverse_total


def mosaic_tile(
    products: Sequence[NightImage], tile: Tile, options: CoaddOptions | None = None
) -> MosaicTile:
    """Build one tile from the calibrated products that touch it.

    Parameters
    ----------
    products : sequence of NightImage
        Every product touching the tile (any nights; several per night allowed).
    tile : Tile
    options : CoaddOptions, optional
        Defaults if None.

    Returns
    -------
    MosaicTile

    Raises
    ------
    ValueError
        If no product is left after the seeing and transparency limits.
    """
    options = options or CoaddOptions()
    kept, excluded = select_products(
        products,
        max_seeing=options.max_seeing,
        max_transparency_loss=options.max_transparency_loss,
        filter_name=options.filter,
    )
    if not kept:
        raise ValueError(
            f"all {len(products)} products are outside the limits (max_seeing "
            f"{options.max_seeing}, max_transparency_loss {options.max_transparency_loss}, "
            f"filter {options.filter}); relax them to build this tile."
        )
    zero_point = kept[0].zero_point
    nights: list[str] = list(dict.fromkeys(p.night for p in kept))
    n_y, n_x = tile.shape
    # every night's planes, filled in place (no copies of tile-sized planes)
    images = np.full((len(nights), n_y, n_x), np.nan, np.float32)
    variances = np.full((len(nights), n_y, n_x), np.nan, np.float32)
    flags = np.full((len(nights), n_y, n_x), MaskBit.OUTSIDE, MASK_DTYPE)
    planes = []
    scratch = _Scratch()  # pass 1's planes, shared by every product's resampling
    for i, night in enumerate(nights):
        merged = _night_planes(
            [p for p in kept if p.night == night],
            tile,
            zero_point,
            (images[i], variances[i], flags[i]),
            scratch,
        )
        planes.append(None if merged is None else (night, *merged))
    if any(p is None for p in planes):
        reached = [i for i, p in enumerate(planes) if p is not None]
        images, variances, flags = images[reached], variances[reached], flags[reached]
    planes = [p for p in planes if p is not None]
    # A night none of whose pixels here the co-add may use (every one flagged
    # with ignore_flags: a cloudy stretch's ZERO_POINT, a gap) adds no light:
    # it is left out like a night beyond the limits, so that it weighs in
    # neither the seeing mix, the kernels nor the errors.
    usable = _usable_nights(images, flags, options.ignore_flags)
    if 0 < len(usable) < len(planes):
        for k in sorted(set(range(len(planes))) - set(usable)):
            for i, product in enumerate(products):
                if product.night == planes[k][0] and i not in excluded:
                    excluded[i] = "every pixel on the tile flagged with ignore_flags"
                    log.info("night %s left out: %s", product.night, excluded[i])
        images, variances, flags = images[usable], variances[usable], flags[usable]
        planes = [planes[k] for k in usable]
    seeing = {p.night: p.seeing for p in kept}
    seeing_beta = {p.night: p.seeing_beta for p in kept}
    pixel = {p.night: pixel_arcsec(p.wcs, p.image.shape) for p in kept}
    scale = np.ones(len(planes))
    if options.weight_by_seeing:
        known = [s for s in seeing.values() if s is not None]
        if known:
            best = min(known)
            scale = np.array([(best / (seeing[p[0]] or best)) ** 2 for p in planes])
    # The nights' weights for their stars' kernels: the co-add's, w = s / (sky variance)
    # (its block medians are the sky's; one value per night is enough for kernels that
    # differ little between nights).
    night_weight = {
        p[0]: s / _sky_variance(v) for p, s, v in zip(planes, scale, variances, strict=True)
    }
    kernels = carried_kernels(kept, tile, [night_weight.get(p.night, 0.0) for p in kept])
    # a night's flux scale is off by its zero point's error (the largest of its products)
    night_error = {
        night: max(p.zero_point_error for p in kept if p.night == night) for night in nights
    }
    # and its WCS by its astrometric solution's error (the largest of its products)
    night_position_error = {
        night: np.max([p.position_error for p in kept if p.night == night], axis=0)
        for night in nights
    }
    result = coadd(
        images,
        variances,
        flags,
        scale=scale,
        reject_sigma=options.reject_sigma,
        source_tolerance=options.source_tolerance,
        source_radius=options.source_radius,
        min_nights=options.min_nights,
        grow=options.grow,
        match_levels=options.match_levels,
        ignore_flags=options.ignore_flags,
        overwrite_input=True,  # the planes are this function's own
    )
    if planes:
        totals = scale * np.array([p[3] for p in planes])
        aperture = np.array([p[2] for p in planes])
        noise_correlation = float(np.sum(totals * aperture) / max(totals.sum(), 1e-300))
    else:
        noise_correlation = 1.0
    log.info(
        "%s: %d nights co-added, %d products left out, rejected pixels per night %s",
        tile.name,
        len(planes),
        len(excluded),
        result.rejected.tolist(),
    )
    return MosaicTile(
        tile=tile,
        planes=result,
        zero_point=zero_point,
        nights=tuple(p[0] for p in planes),
        noise_correlation=noise_correlation,
        excluded=excluded,
        smear_kernels=kernels,
        zero_point_error=_coadded_error(
            [night_error[p[0]] for p in planes], [night_weight[p[0]] for p in planes]
        ),
        position_error=tuple(
            _coadded_error(
                [night_position_error[p[0]][axis] for p in planes],
                [night_weight[p[0]] for p in planes],
            )
            for axis in (0, 1)
        ),
        seeing=tuple(
            (
                float(seeing[night]),
                float(night_weight[night]),
                pixel[night],
                np.nan if seeing_beta[night] is None else float(seeing_beta[night]),
            )
            for night in (p[0] for p in planes)
            if seeing[night] is not None and night_weight[night] > 0
        ),
    )


def _usable_nights(images: np.ndarray, flags: np.ndarray, ignore_flags: Sequence[str]) -> list[int]:
    """Indices of the nights with a pixel that has data and none of ``ignore_flags``."""
    ignored = MASK_DTYPE.type(_flag_bits(ignore_flags))
    return [
        i
        for i, (image, flag) in enumerate(zip(images, flags, strict=True))
        if np.any(np.isfinite(image) & ((flag & ignored) == 0))
    ]


def pixel_arcsec(wcs: WCS, shape: tuple[int, int]) -> float:
    """Side of a pixel of ``wcs`` at the centre of an image of ``shape`` (root of its area), arcsec.

    From the sky positions of the neighbouring pixels: a plate carree's
    right-ascension increment is not an angle on the sky.
    """
    y, x = (shape[0] - 1) / 2.0, (shape[1] - 1) / 2.0
    world = wcs.pixel_to_world_values([x, x + 1, x], [y, y, y + 1])
    ra, dec = (np.asarray(a, float) for a in world)
    east = (ra[1:] - ra[0] + 180.0) % 360.0 - 180.0
    d_east = east * np.cos(np.radians(dec[0]))
    d_north = dec[1:] - dec[0]
    area = abs(d_east[0] * d_north[1] - d_east[1] * d_north[0])
    return 3600.0 * float(np.sqrt(area))


def _coadded_error(errors: Sequence[float], weights: Sequence[float]) -> float:
    """Error the co-add inherits from the nights' independent calibration errors.

    A co-added star's flux is the weighted mean of the nights' (weights
    ``w_i``), each off by its night's zero point error ``e_i`` (small, so
    magnitudes and relative fluxes add alike); its position (the first
    moment of the weighted mean of the nights' images of it, all on one
    flux scale) is the weighted mean of the nights' positions, each off by
    its night's astrometric error ``e_i``.  Either way ``sqrt(sum (w_i
    e_i)**2) / sum w_i``, the error of a weighted mean of independent values
    (common practice).  0 without weights.
    """
    errors, weights = np.asarray(errors, float), np.asarray(weights, float)
    total = weights.sum()
    if not total > 0:
        return 0.0
    return float(np.sqrt(np.sum((weights * errors) ** 2)) / total)


def _sky_variance(variance: np.ndarray) -> float:
    """Median of a night's variance plane on the tile (every 4th row and column), e^2."""
    sample = variance[::4, ::4]
    finite = sample[np.isfinite(sample) & (sample > 0)]
    return float(np.median(finite)) if finite.size else np.inf
