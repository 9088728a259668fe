"""A finished tile's products: its FITS file, catalogue, night table and quick look.

Pure functions of a :class:`~pipeline.mosaic.MosaicTile`; the runner writes
what they return (:mod:`pipeline.runner._mosaic`).

The tile's FITS file (:func:`tile_hdulist`) holds four image extensions on
the tile's WCS: ``IMAGE`` (counts on the scale of ``PHOTZP``), ``WEIGHT``
(inverse predicted pixel variance), ``COVERAGE`` (nights kept per pixel) and
``FLAGS`` (:class:`~pipeline.masks.MaskBit`: the kept nights' and
``NIGHT_LEFT_OUT`` where a night was left out).  Its primary header carries the
zero point (``PHOTZP``) and its error (``ZPERR``), the error the nights'
astrometric solutions leave on its WCS (``CSYER1``, ``CSYER2``), the nights co-added
(``NIGHTn``), every input product with its SHA-256 (``INPUTn``,
``INHASHn``) and the mosaic config (``MOSCONF``, JSON in a long-string card).
"""

from __future__ import annotations

import io
import json
from collections.abc import Mapping, Sequence

import numpy as np
from astropy import units as u
from astropy.io import fits
from astropy.table import QTable, Table

from pipeline.masks import MASK_DTYPE, MaskBit, bits_around
from pipeline.mosaic._coadd import MosaicTile, NightImage, pixel_arcsec
from pipeline.mosaic._kernels import SeeingMix
from pipeline.mosaic._resample import star_noise_ratio
from pipeline.products import (
    FLAGS_EXTENSION,
    ZERO_POINT_ERROR_KEY,
    ZERO_POINT_KEY,
    flag_header,
)

__all__ = [
    "TILE_EXTENSIONS",
    "night_table",
    "quicklook_png",
    "tile_catalog",
    "tile_hdulist",
]

#: Extension names of a tile's FITS file, in order after the primary HDU.
TILE_EXTENSIONS = ("IMAGE", "WEIGHT", "COVERAGE", FLAGS_EXTENSION)

#: 2.5 / ln(10): magnitude error of a relative flux error (common practice).
_MAG_PER_LN = 2.5 / np.log(10.0)


def tile_hdulist(
    tile: MosaicTile,
    inputs: Sequence[tuple[str, str]] = (),
    config: Mapping | None = None,
) -> fits.HDUList:
    """The tile's planes as one FITS file with a standard WCS on every plane.

    Parameters
    ----------
    tile : MosaicTile
    inputs : sequence of (str, str)
        ``(label, sha256)`` of every input product (e.g. ``'2026-10-15/s0003'``).
    config : mapping, optional
        The mosaic config (JSON-able), stored in the primary header.

    Returns
    -------
    astropy.io.fits.HDUList
    """
    header = tile.header()
    primary = fits.PrimaryHDU(header=header)
    primary.header["NINPUTS"] = (len(inputs), "input products (science stretches)")
    for i, (label, digest) in enumerate(inputs, start=1):
        primary.header[f"INPUT{i}"] = (label, "input product: night/stretch")
        primary.header[f"INHASH{i}"] = digest
    if config is not None:
        primary.header["MOSCONF"] = json.dumps(config, sort_keys=True, separators=(",", ":"))
    planes = tile.planes
    weight_unit = (1 / u.ct**2).to_string()
    hdul = fits.HDUList([primary])
    for name, data, unit in (
        ("IMAGE", planes.image, u.ct.to_string()),
        ("WEIGHT", planes.weight, weight_unit),
        ("COVERAGE", planes.coverage, None),
        (FLAGS_EXTENSION, planes.flags.astype(MASK_DTYPE), None),
    ):
        hdu = fits.ImageHDU(data=data, header=header.copy(), name=name)
        if unit is not None:
            hdu.header["BUNIT"] = unit
        hdul.append(hdu)
    hdul[FLAGS_EXTENSION].header.update(flag_header())
    return hdul


def tile_catalog(tile: MosaicTile, **detect_options) -> QTable:
    """Sources detected and measured on the co-add, with calibrated magnitudes.

    The detect stage's :func:`~pipeline.stages.detect.detect` on the
    variance ``1 / weight``, with the smear kernel the co-added stars carry
    (``tile.smear_kernels``: the nights' kernels turned into tile pixels,
    :mod:`pipeline.mosaic._kernels`), so that the fitted position is the
    first moment the tile's WCS maps to the sky and the flux is the whole
    streak's; round stars (``deconvolved=True``) where the tile has no
    kernels (deconvolved nights).  The seeing is the nights' profiles mixed
    with the co-add's weights (:class:`~pipeline.mosaic._kernels.SeeingMix`,
    its width fitted by detect) where the nights' seeing is known.  The
    fits' noise factor is the tile's ``noise_correlation`` times the share
    of it a star fit sees where the nights were averaged over the tile's
    pixels (:func:`_star_noise_ratio`), at least 1.  A source whose stamp
    holds a flagged pixel of the tile (``NIGHT_LEFT_OUT``: a night with data
    left out, as under another night's satellite trail) is ``NEAR_FLAGGED``.

    Parameters
    ----------
    tile : MosaicTile
    **detect_options
        :class:`~pipeline.stages.detect.DetectOptions` fields.

    Returns
    -------
    astropy.table.QTable
        detect's columns (``x``, ``y`` in tile pixels, ``ra``, ``dec`` from
        the tile's WCS, ``flux_psf`` in counts of the zero point, ...) plus
        ``mag`` and ``mag_err`` (``PHOTZP - 2.5 log10(flux_psf)``; NaN for a
        flux <= 0).  ``mag_err`` holds the flux's error and the zero point's
        (``tile.zero_point_error``, the nights' calibration errors as
        co-added; in the meta as ``ZPERR``), as the nights' calibrated
        catalogues do (:func:`pipeline.stages.zeropoint.calibrate_catalog`).
        ``ra_err`` and ``dec_err`` hold the fit's position error and the
        error the nights' astrometric solutions leave on the tile
        (``tile.position_error``, arcsec, in the meta as
        ``wcs_error_arcsec``), as the nights' solved catalogues hold their
        solution's (:mod:`pipeline.stages.astrometry`).  ``mask_near`` and
        ``mask_core`` (int) are the OR of the tile's ``FLAGS`` bits
        (:class:`~pipeline.masks.MaskBit`, listed in the meta's
        ``mask_bits``) over the stamp the source's fit took, which made it
        ``NEAR_FLAGGED``, and over its core (:func:`_add_mask_columns`; the
        sizes in the meta as ``mask_near_half_size`` and
        ``mask_core_radius``, tile pixels).
    """
    from pipeline.stages.detect import detect

    planes = tile.planes
    weight = np.asarray(planes.weight, float)
    variance = np.where(weight > 0, 1.0 / np.where(weight > 0, weight, 1.0), np.nan)
    kernels = tile.smear_kernels
    if kernels is None:
        kernels = Table({"x": [0.0], "y": [0.0], "dx": [[0.0]], "dy": [[0.0]]})
    mix = _seeing_mix(tile, detect_options)
    if mix is not None:  # the nights' mean seeing is a better start than a fixed guess
        detect_options = {**detect_options, "fwhm_guess": mix.fwhm}
    result = detect(
        planes.image,
        variance,
        planes.flags,
        kernels,
        wcs=tile.tile.wcs,
        noise_correlation=max(1.0, tile.noise_correlation * _star_noise_ratio(tile, mix)),
        deconvolved=tile.smear_kernels is None,
        seeing_profile=mix,
        **detect_options,
    )
    catalog = result.catalog
    _add_mask_columns(catalog, planes.flags, _fitted_profile(result.seeing, mix, detect_options),
                      _smear_extent(kernels))  # fmt: skip
    flux = np.asarray(catalog["flux_psf"].value, float)
    error = np.asarray(catalog["flux_psf_err"].value, float)
    positive = flux > 0
    safe = np.where(positive, flux, 1.0)
    catalog["mag"] = np.where(positive, tile.zero_point - 2.5 * np.log10(safe), np.nan) * u.mag
    # the flux's error and the zero point's, independent (common practice)
    flux_error = _MAG_PER_LN * error / safe
    mag_err = np.hypot(flux_error, tile.zero_point_error)
    catalog["mag_err"] = np.where(positive, mag_err, np.nan) * u.mag
    catalog["mag"].info.description = f"{ZERO_POINT_KEY} - 2.5 log10(flux_psf)"
    both = f"flux_psf_err and {ZERO_POINT_ERROR_KEY} in quadrature"
    catalog["mag_err"].info.description = f"1-sigma error of mag: {both}"
    # the fit's position error and the nights' solutions', independent (common practice)
    for name, extra in zip(("ra_err", "dec_err"), tile.position_error, strict=True):
        catalog[name] = np.hypot(catalog[name], extra * u.arcsec)
        axis = "right ascension (on the sky)" if name == "ra_err" else "declination"
        catalog[
            name
        ].info.description = (
            f"1-sigma error along {axis}: the fit's and the nights' astrometric solutions'"
        )
    catalog["x"].info.description = "tile column (0-based)"
    catalog["y"].info.description = "tile row (0-based)"
    catalog.meta[ZERO_POINT_KEY] = tile.zero_point
    catalog.meta[ZERO_POINT_ERROR_KEY] = tile.zero_point_error
    catalog.meta["wcs_error_arcsec"] = [float(e) for e in tile.position_error]
    catalog.meta["tile"] = tile.tile.name
    catalog.meta["problems"] = list(result.problems)
    return catalog


#: Share of a star's peak above which its pixels are its core: detect's own
#: (SATURATED, COSMIC_RAY and EDGE look at the pixels where the star's model
#: exceeds 5 % of its peak, :func:`pipeline.stages.detect._measure._mask_bits`).
CORE_LEVEL = 0.05


def _add_mask_columns(catalog: QTable, flags: np.ndarray, profile, extent) -> None:
    """Add ``mask_core`` and ``mask_near``: the OR of the tile's FLAGS bits around each source.

    ``mask_core``: the pixels whose centres lie within the core radius
    (:func:`core_radius` of ``profile``, the seeing fitted on the tile)
    plus the longest smear track (``extent``) of the fitted position.
    ``mask_near``: the stamp its fit took, where a flagged pixel makes it
    ``NEAR_FLAGGED``: the rectangle of 1.5 FWHM plus the track plus 1 pixel
    each way (:func:`pipeline.stages.detect._measure._stamp`) around the
    source, or around the sources fitted with it (``group``).  Detect's own
    stamps are built around the fits' starting positions with each star's
    track (and widened over a saturated star's footprint), so the two can
    differ at the stamp's edge.
    """
    # detect's own columns of these names (its stamps' and its models' cores)
    # make way for the tile's, which the tile's products have held since
    # tiles 10 (a tile is not made again when detect changes)
    catalog.remove_columns(
        [name for name in ("mask_near", "mask_core") if name in catalog.colnames]
    )
    catalog.meta.pop("mask_bits", None)
    x = np.asarray(catalog["x"].value, float)
    y = np.asarray(catalog["y"].value, float)
    radius = core_radius(*profile.mixture()) + float(np.hypot(*extent))
    half_x, half_y = (1.5 * profile.fwhm + e + 1.0 for e in extent)
    centre_x, centre_y, span_x, span_y = _group_boxes(np.asarray(catalog["group"]), x, y)
    near = bits_around(flags, centre_x, centre_y, span_x + half_x, span_y + half_y, round_=False)
    described = (
        ("mask_core", bits_around(flags, x, y, radius),
         "OR of the tile's FLAGS bits (MaskBit) within the source's core (meta mask_core_radius)"),
        ("mask_near", near,
         "OR of the tile's FLAGS bits (MaskBit) in its fit's stamp (meta mask_near_half_size, "
         "around its group's sources): why it is NEAR_FLAGGED"),
    )  # fmt: skip
    for name, bits, doc in described:
        catalog[name] = bits.astype(np.int32)
        catalog[name].info.description = doc
    catalog.meta["mask_core_radius"] = round(radius, 3)
    catalog.meta["mask_near_half_size"] = [round(half_x, 3), round(half_y, 3)]
    catalog.meta["mask_bits"] = {bit.name: int(bit) for bit in MaskBit}


def _group_boxes(group, x, y):
    """Per source: the centre and half-spans of the box around its group's sources (finite)."""
    centre_x, centre_y = x.copy(), y.copy()
    span_x, span_y = np.zeros_like(x), np.zeros_like(y)
    fine = np.isfinite(x) & np.isfinite(y)
    for g in np.unique(group[fine]):
        members = fine & (group == g)
        if np.count_nonzero(members) < 2:
            continue
        for centre, span, v in ((centre_x, span_x, x), (centre_y, span_y, y)):
            lo, hi = float(np.min(v[members])), float(np.max(v[members]))
            centre[members], span[members] = 0.5 * (lo + hi), 0.5 * (hi - lo)
    return centre_x, centre_y, span_x, span_y


def core_radius(sigmas, weights, level: float = CORE_LEVEL) -> float:
    """Radius (pixels) where a round mixture of Gaussians falls to ``level`` of its peak.

    Parameters
    ----------
    sigmas, weights : array_like of float
        The mixture's Gaussians (pixels) and their flux weights (a weight may
        be negative, as in :class:`~pipeline.mosaic._kernels.SeeingMix`).
    level : float
        Share of the peak, in (0, 1).

    Returns
    -------
    float
        The outermost radius where the profile is ``level`` of its peak
        (the profile of a Gaussian of ``sigma`` falls to it at ``sigma
        sqrt(2 ln(1 / level))``, common practice).
    """
    sigmas, weights = np.asarray(sigmas, float), np.asarray(weights, float)
    heights = weights / sigmas**2

    def profile(r):
        return np.sum(heights * np.exp(-0.5 * (np.asarray(r, float)[..., None] / sigmas) ** 2), -1)

    peak = float(profile(0.0))
    radii = np.linspace(0.0, 10.0 * float(np.max(sigmas)) * np.sqrt(2.0 * np.log(1.0 / level)),
                        4001)  # fmt: skip
    above = np.flatnonzero(profile(radii) >= level * peak)
    k = int(above[-1]) if above.size else 0
    if k + 1 >= radii.size:
        return float(radii[-1])
    lo, hi = radii[k], radii[k + 1]
    for _ in range(40):  # bisection on the crossing between the grid's points
        mid = 0.5 * (lo + hi)
        lo, hi = (mid, hi) if profile(mid) >= level * peak else (lo, mid)
    return float(0.5 * (lo + hi))


def _fitted_profile(seeing: Table, mix: SeeingMix | None, detect_options):
    """The seeing detect fitted on the tile (the whole tile's row), as a profile.

    The nights' mix with its fitted width; a round profile of detect's family
    where the nights' seeing is unknown; the start's width where no star
    gave one.
    """
    from pipeline.stages.detect import SeeingProfile

    fwhm = float(seeing["fwhm"][0]) if len(seeing) else np.nan
    if mix is not None:
        return mix.with_fwhm(fwhm) if np.isfinite(fwhm) else mix
    if not np.isfinite(fwhm):
        fwhm = float(detect_options.get("fwhm_guess", 3.0))
    beta = float(seeing["beta"][0]) if len(seeing) and "beta" in seeing.colnames else np.nan
    if not np.isfinite(beta):
        beta = float(detect_options.get("moffat_beta", 3.5))
    return SeeingProfile(fwhm, detect_options.get("seeing_shape", "moffat"), beta)


def _smear_extent(kernels: Table) -> tuple[float, float]:
    """The longest smear track on the tile along x and y (pixels): largest ``|dx|``, ``|dy|``."""
    extent = [0.0, 0.0]
    for dx, dy in zip(kernels["dx"], kernels["dy"], strict=True):
        extent[0] = max(extent[0], float(np.max(np.abs(dx), initial=0.0)))
        extent[1] = max(extent[1], float(np.max(np.abs(dy), initial=0.0)))
    return extent[0], extent[1]


def _star_noise_ratio(tile: MosaicTile, mix: SeeingMix | None) -> float:
    """The tile's star-fit noise factor over its ``noise_correlation``: nights averaged on it.

    :func:`~pipeline.mosaic._resample.star_noise_ratio` of each night (1
    for a night sampled, not averaged), mean with the nights' shares of a
    star's light; 1 where the seeing is unknown.  Without it, the demo's
    tile catalogues' errors came out ~1.25 times their scatter.
    """
    if mix is None:
        return 1.0
    scale = pixel_arcsec(tile.tile.wcs, tile.tile.shape)
    sigmas, weights = mix.mixture()
    ratios = np.array([star_noise_ratio(sigmas, weights, scale / n[2]) for n in tile.seeing])
    if np.all(ratios == 1.0):  # no night averaged: the factor exactly as before
        return 1.0
    return float(np.sum(np.asarray(mix.fractions) * ratios))


def _seeing_mix(tile: MosaicTile, detect_options) -> SeeingMix | None:
    """The co-added stars' seeing: the nights' profiles mixed with their weights (None: unknown).

    Each night's profile has the Moffat index its detect used (``tile.seeing``'s
    fourth entry, from the science product's ``SEEBETA``); the configured
    ``moffat_beta`` where a night does not record one.
    """
    if not tile.seeing:
        return None
    scale = pixel_arcsec(tile.tile.wcs, tile.tile.shape)
    fwhms, weights, pixels, betas = (np.asarray(c, float) for c in zip(*tile.seeing, strict=True))
    return SeeingMix.of_nights(
        fwhms / scale,
        weights,
        pixels / scale,
        detect_options.get("seeing_shape", "moffat"),
        detect_options.get("moffat_beta", 3.5),
        betas,
    )


def night_table(products: Sequence[NightImage], tile: MosaicTile) -> Table:
    """One row per night offered to the tile: its seeing, transparency and fate.

    What a report needs to draw the mosaic's nights: ``seeing`` (arcsec,
    NaN: unknown), ``zero_point`` (the transparency zero point, mag),
    ``used`` (co-added), ``rejected`` (pixels rejected as outliers),
    ``offset`` (level subtracted, counts) and ``reason`` (why it was left
    out, empty if used).
    """
    nights = list(dict.fromkeys(p.night for p in products))
    reasons = {products[i].night: why for i, why in tile.excluded.items()}
    used = {night: k for k, night in enumerate(tile.nights)}
    rows = []
    for night in nights:
        own = [p for p in products if p.night == night]
        seeing = [p.seeing for p in own if p.seeing is not None]
        k = used.get(night)
        rows.append(
            (
                night,
                float(np.median(seeing)) if seeing else np.nan,
                float(np.median([p.transparency_zero_point for p in own])),
                k is not None,
                int(tile.planes.rejected[k]) if k is not None else 0,
                float(tile.planes.offsets[k]) if k is not None else 0.0,
                "" if k is not None else reasons.get(night, "does not reach the tile"),
            )
        )
    table = Table(
        rows=rows or None,
        names=("night", "seeing", "zero_point", "used", "rejected", "offset", "reason"),
        dtype=(str, float, float, bool, np.int64, float, str),
    )
    table["seeing"].unit = u.arcsec
    table["zero_point"].unit = u.mag
    table["offset"].unit = u.ct
    table.meta["tile"] = tile.tile.name
    return table


def _binned(image: np.ndarray, factor: int) -> np.ndarray:
    """Mean of ``factor`` x ``factor`` blocks (NaN ignored; the edges padded with NaN)."""
    if factor <= 1:
        return image
    n_y, n_x = image.shape
    padded = np.full((-(-n_y // factor) * factor, -(-n_x // factor) * factor), np.nan)
    padded[:n_y, :n_x] = image
    blocks = padded.reshape(padded.shape[0] // factor, factor, -1, factor)
    finite = np.isfinite(blocks)
    counts = finite.sum(axis=(1, 3))
    sums = np.where(finite, blocks, 0.0).sum(axis=(1, 3))
    return np.where(counts > 0, sums / np.maximum(counts, 1), np.nan)


def quicklook_png(image: np.ndarray, *, max_size: int = 1024, dpi: int = 100) -> bytes:
    """A quick-look PNG of a co-add: asinh stretch between the 0.5 and 99.5 percentiles.

    Parameters
    ----------
    image : ndarray, shape (n_y, n_x)
        NaN where there is no data (drawn black).
    max_size : int
        Largest side of the PNG, pixels: a larger image is averaged over
        square blocks of the smallest whole number of its pixels that fits.
    dpi : int
        Resolution written in the PNG (one pixel of the binned image per PNG pixel).

    Returns
    -------
    bytes
        The PNG file's content (no time stamp: the same image gives the same bytes).
    """
    from astropy.visualization import AsinhStretch, ImageNormalize, PercentileInterval
    from matplotlib.figure import Figure

    data = np.asarray(image, float)
    data = _binned(data, -(-max(data.shape) // max_size))
    finite = data[np.isfinite(data)]
    n_y, n_x = data.shape
    fig = Figure(figsize=(n_x / dpi, n_y / dpi), dpi=dpi)
    axes = fig.add_axes((0, 0, 1, 1))
    axes.set_axis_off()
    if finite.size:
        norm = ImageNormalize(finite, interval=PercentileInterval(99.0), stretch=AsinhStretch())
        axes.imshow(
            np.nan_to_num(data, nan=float(np.min(finite))),
            origin="lower",
            cmap="gray",
            norm=norm,
            interpolation="nearest",
        )
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", dpi=dpi, metadata={"Software": None})
    return buffer.getvalue()
