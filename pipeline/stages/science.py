"""Science: calibrated images, scaled to one fixed zero point, with the solved WCS.

Per stretch, the rectified image and its variance are multiplied by
:func:`~pipeline.stages.zeropoint.scale_to_zero_point` of the zero point
at each column's time (the zeropoint stage's ``zero_point`` grid,
interpolated; :func:`~pipeline.stages.zeropoint.column_times`), so that a
source of magnitude ``m`` sums to ``10**(0.4 (PHOTZP - m))`` on every night
and nights can be stacked.  The variance is multiplied by the factor's
square; the flags are carried, plus :attr:`~pipeline.masks.MaskBit.ZERO_POINT`
on every pixel of a stretch whose zero point is doubtful (:func:`doubtful_zero_point`:
the zeropoint stage flagged a cloud or a scatter), and
:attr:`~pipeline.masks.MaskBit.TRAIL` on the pixels of the satellite trails
detect found (its ``trails`` product).
The solved WCS of astrometry's ``wcs`` product replaces rectify's nominal
one (the alternate ``NIGHT`` grid stays).  Rectify's ``smear_kernels`` table
goes beside the image unchanged (night pixels, as detect reads it): a
calibrated star is still the seeing averaged over that kernel, and the
mosaic carries it onto its tiles (:mod:`pipeline.mosaic._kernels`).

Header cards (FLUX, FLUXVAR, FLAGS and primary; the keywords are defined once,
in :mod:`pipeline.products`, for this stage and the mosaic that reads them):

``PHOTZP``
    The fixed zero point, mag: ``m = PHOTZP - 2.5 log10(sum of FLUX)``
    (the keyword of the ESO science data products standard, from memory).
``ZPMIN``, ``ZPMAX``, ``ZPMED``, ``ZPERR``
    Range and median of the zero point at which the stretch was recorded
    (mag for 1 e-/s; the mosaic compares nights' transparency by ``ZPMED``)
    and its largest 1-sigma error, mag.
``ZPFLAGS``, ``ZPINTERP``
    The stretch's :class:`~pipeline.stages.zeropoint.ZeroPointFlag` bits and
    whether its zero point was bridged from its neighbours.
``SEEING``
    Nominal seeing FWHM of the stretch (detect's fit), arcsec.
``SEEBETA``
    Moffat index of the seeing profile detect fitted the stretch's stars
    with (its seeing table's ``beta``: fitted, or the configured
    ``moffat_beta``); absent for a Gaussian seeing.  The mosaic mixes each
    night's profile with it.
``CSYER1``, ``CSYER2``
    With the solved WCS: the astrometric solution's own error over the
    stretch, deg of RA and Dec (the FITS WCS systematic error; see
    :func:`pipeline.stages.astrometry._stage.systematic_error_cards`).
``BUNIT``
    ``ct`` (variance ``ct2``): counts on the fixed zero point's scale, no
    longer electrons.
"""

from __future__ import annotations

import logging
import re
import warnings
from typing import TYPE_CHECKING

import numpy as np
from pydantic import BaseModel, ConfigDict

from pipeline.masks import MASK_DTYPE, MaskBit
from pipeline.products import (
    FLAGS_EXTENSION,
    FLUX_EXTENSION,
    NIGHT_ZERO_POINT_KEY,
    SEEING_INDEX_KEY,
    SEEING_KEY,
    VARIANCE_EXTENSION,
    ZERO_POINT_ERROR_KEY,
    ZERO_POINT_FLAGS_KEY,
    ZERO_POINT_KEY,
    flag_header,
    night_column,
)
from pipeline.stages.base import BLOCK_INDEX, Stage
from pipeline.stages.detect._trails import trail_pixels
from pipeline.stages.zeropoint import (
    ZeroPointFlag,
    column_times,
    night_line_time,
    scale_to_zero_point,
)

if TYPE_CHECKING:
    from astropy.io import fits

__all__ = ["STAGE", "ScienceOptions", "calibrate_image", "replace_wcs", "seeing_index"]

log = logging.getLogger(__name__)

#: Keywords of a primary (not alternate) celestial WCS, removed before the solved one goes in.
_WCS_KEY = re.compile(
    r"^(WCSAXES|WCSNAME|CTYPE\d|CUNIT\d|CRPIX\d|CRVAL\d|CDELT\d|CROTA\d|PC\d_\d|CD\d_\d"
    r"|PV\d_\d+|PS\d_\d+|LONPOLE|LATPOLE|RADESYS|EQUINOX|A_\w+|B_\w+|AP_\w+|BP_\w+)$"
)
#: Time cards in a solved WCS's header: ``WCS.to_header`` writes ``MJDREF = 0.0``
#: (and may write ``DATEREF``, ``DATE-OBS``, ...) whatever the product's time
#: origin; the product's own time cards stay, so that ``DATEREF`` and ``MJDREF``
#: name one instant (the time reference of Rots et al. 2015, A&A 574, A36).
_TIME_KEY = re.compile(
    r"^(DATEREF|MJDREF[IF]?|JDREF[IF]?|TIMESYS|TREFPOS|TREFDIR|PLEPHEM|TIMEUNIT"
    r"|TIMEOFFS|DATE-\w+|MJD-\w+|TSTART|TSTOP|TELAPSE|XPOSURE)$"
)
#: Unit of calibrated images: counts of the fixed zero point.
_UNIT = "ct"


class ScienceOptions(BaseModel):
    """Options of the science stage (``stages.science``): none; the zero point is zeropoint's."""

    model_config = ConfigDict(extra="forbid", frozen=True)


def replace_wcs(header: fits.Header, cards) -> fits.Header:
    """``header`` with its primary WCS replaced by ``cards`` (alternate WCSs kept).

    Parameters
    ----------
    header : astropy.io.fits.Header
    cards : astropy.io.fits.Header, mapping or sequence
        The new WCS: a header, ``{keyword: value}``, or ``[keyword, value(,
        comment)]`` entries (astrometry's ``wcs`` product, read from JSON).
        Time cards among them (``MJDREF = 0.0`` from ``WCS.to_header``) are
        left out: the header's own time reference stays.
    """
    from astropy.io import fits
    from astropy.wcs import WCS, FITSFixedWarning

    new = fits.Header()
    if isinstance(cards, fits.Header):
        new = cards.copy()
    elif isinstance(cards, dict):
        for key, value in cards.items():
            new[key] = tuple(value) if isinstance(value, list) else value
    else:
        for entry in cards:
            new[entry[0]] = tuple(entry[1:]) if len(entry) > 2 else entry[1]
    out = header.copy()
    for key in [k for k in out if _WCS_KEY.match(k)]:
        del out[key]
    for card in new.cards:
        if not _TIME_KEY.match(card.keyword):
            out[card.keyword] = (card.value, card.comment)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", FITSFixedWarning)
        if not WCS(out).has_celestial:
            raise ValueError(
                "the solved WCS handed to the science stage is not celestial; check "
                "astrometry's wcs product for this stretch."
            )
    return out


#: The zero-point flags that make a stretch's calibration doubtful, pixel by
#: pixel: a cloud (its light lost by an amount the zero point follows only
#: so far) or stars scattering beyond the night's.  ``FEW_STARS`` alone is not
#: among them: the stretch's zero point is then bridged from its neighbours,
#: or the night's fit over all its stars, and its few stars showed no cloud
#: (they would have been flagged ``CLOUD`` too); its ``ZPERR`` says how well
#: it is known.  Marking such pixels left every source of a sparse field's
#: mosaic NEAR_FLAGGED (a simulated 768-column night whose 9 stretches held 2-9
#: stars each: every stretch bridged, every tile source flagged).
DOUBTFUL = int(ZeroPointFlag.CLOUD | ZeroPointFlag.SCATTER)


def doubtful_zero_point(flags: int) -> bool:
    """Whether a stretch's zero-point flags mark its pixels ZERO_POINT (:data:`DOUBTFUL`)."""
    return bool(int(flags) & DOUBTFUL)


def calibrate_image(
    image: np.ndarray,
    variance: np.ndarray,
    flags: np.ndarray,
    zero_point: np.ndarray,
    *,
    target_zero_point: float,
    exposure: float,
    unreliable: bool = False,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Scale a rectified image to ``target_zero_point``.

    Parameters
    ----------
    image, variance : ndarray, shape (n_y, n_x)
        Rectified electrons and their variance (``x``, axis 1, along the scan).
    flags : ndarray of uint16, shape (n_y, n_x)
    zero_point : ndarray, shape (n_x,)
        Zero point at each column's time, mag for 1 e-/s.
    target_zero_point : float
        Fixed zero point of the result, mag.
    exposure : float
        Crossing time, s.
    unreliable : bool, optional
        Set :attr:`MaskBit.ZERO_POINT` on every pixel.

    Returns
    -------
    image, variance, flags : ndarray
        float32, float32 (scaled by the square) and uint16.
    """
    factor = scale_to_zero_point(zero_point, target_zero_point, exposure)[None, :]
    out_flags = np.asarray(flags).astype(MASK_DTYPE)
    if unreliable:
        out_flags = out_flags | MASK_DTYPE.type(MaskBit.ZERO_POINT)
    return (
        (np.asarray(image, float) * factor).astype(np.float32),
        (np.asarray(variance, float) * factor**2).astype(np.float32),
        out_flags,
    )


def _values(table, name: str) -> np.ndarray:
    column = table[name]
    return np.asarray(getattr(column, "value", column), dtype=float)


def seeing_index(seeing) -> float | None:
    """The Moffat index detect fitted a stretch's stars with, from its seeing table.

    Parameters
    ----------
    seeing : astropy.table.Table
        Detect's ``seeing`` product: ``beta``, one value per stretch (every
        row the same).

    Returns
    -------
    float or None
        The index (dimensionless); None for a Gaussian seeing (``beta``
        NaN) or a table of a detect that did not record it (no ``beta``).
    """
    if "beta" not in seeing.colnames or len(seeing) == 0:
        return None
    beta = float(_values(seeing, "beta")[0])
    return beta if np.isfinite(beta) else None


def _run(*, inputs, options: ScienceOptions, context) -> dict:
    from astropy import units as u
    from astropy.io import fits

    stretch = context.stretch
    rectified = inputs["rectify"]["image"]
    flux_header = rectified[FLUX_EXTENSION].header
    zp = inputs["zeropoint"]
    grid, intervals = zp["zero_point"], zp["intervals"]
    target = float(grid.meta["target_zero_point_mag"])
    line_time = night_line_time(inputs["ingest"][BLOCK_INDEX])
    exposure = float(flux_header.get("XPOSURE", context.camera.tdi_rows * line_time))
    n_x = rectified[FLUX_EXTENSION].data.shape[1]
    x = night_column(flux_header) + np.arange(n_x)
    t = column_times(x, line_time, context.camera.tdi_rows)
    z = np.interp(t, _values(grid, "t"), _values(grid, "zero_point"))
    z_err = np.interp(t, _values(grid, "t"), _values(grid, "zero_point_err"))
    ids = [str(name) for name in intervals["stretch"]]
    if stretch.id not in ids:
        raise ValueError(
            f"zeropoint's intervals have no row for {stretch.id} (the stretch plan changed "
            "since zeropoint ran); rerun zeropoint."
        )
    row = intervals[ids.index(stretch.id)]
    flags, interpolated = int(row["flags"]), bool(row["interpolated"])
    image, variance, mask = calibrate_image(
        rectified[FLUX_EXTENSION].data,
        rectified[VARIANCE_EXTENSION].data,
        rectified[FLAGS_EXTENSION].data,
        z,
        target_zero_point=target,
        exposure=exposure,
        unreliable=doubtful_zero_point(flags),
    )
    trails = inputs["detect"]["trails"]
    if len(trails):
        mask[trail_pixels(trails, x, mask.shape[0])] |= MASK_DTYPE.type(MaskBit.TRAIL)
    solved = inputs["astrometry"]["wcs"].get(stretch.id)
    if solved is None:
        raise ValueError(
            f"astrometry's wcs product has no solution for {stretch.id}; rerun astrometry."
        )
    seeing = inputs["detect"]["seeing"]
    fwhm_px = float(_values(seeing, "fwhm")[0])  # first row: the whole stretch
    scale = 3600.0 * abs(float(flux_header.get("CDELT2", np.nan)))
    cards = [
        (ZERO_POINT_KEY, target, "[mag] m = PHOTZP - 2.5 log10(sum of FLUX)"),
        ("ZPMIN", round(float(np.min(z)), 5), "[mag] lowest zero point recorded (1 e-/s)"),
        ("ZPMAX", round(float(np.max(z)), 5), "[mag] highest zero point recorded (1 e-/s)"),
        (NIGHT_ZERO_POINT_KEY, round(float(np.median(z)), 5), "[mag] median zero point (1 e-/s)"),
        (ZERO_POINT_ERROR_KEY, round(float(np.max(z_err)), 5), "[mag] largest zero point error"),
        (ZERO_POINT_FLAGS_KEY, flags, "zero point: 1 cloud, 2 scatter, 4 few stars"),
        ("ZPINTERP", interpolated, "zero point bridged from neighbouring stretches"),
    ]
    if np.isfinite(fwhm_px * scale):  # detect may find no star to fit the seeing with
        cards.append(
            (SEEING_KEY, round(fwhm_px * scale, 3), "[arcsec] nominal seeing FWHM (detect)")
        )
    beta = seeing_index(seeing)
    if beta is not None:
        cards.append((SEEING_INDEX_KEY, beta, "Moffat index of the seeing detect used"))

    hdul = fits.HDUList([rectified[0].copy()])
    for name, data in (
        (FLUX_EXTENSION, image),
        (VARIANCE_EXTENSION, variance),
        (FLAGS_EXTENSION, mask),
    ):
        header = replace_wcs(rectified[name].header, solved)
        for key, value, comment in cards:
            header[key] = (value, comment)
        hdul.append(fits.ImageHDU(data=data, header=header, name=name))
    hdul[FLUX_EXTENSION].header["BUNIT"] = _UNIT
    hdul[VARIANCE_EXTENSION].header["BUNIT"] = (u.Unit(_UNIT) ** 2).to_string()
    hdul[FLAGS_EXTENSION].header.update(flag_header())  # names the ZERO_POINT bit
    for key, value, comment in cards:
        hdul[0].header[key] = (value, comment)
    log.info("%s: zero point %.3f-%.3f mag -> %.3f", stretch.id, z.min(), z.max(), target)
    # A calibrated product is not deconvolved unless rectify deconvolved it: its
    # stars keep the recorded smear, which the mosaic carries onto its tiles.
    return {"image": hdul, "smear_kernels": inputs["rectify"]["smear_kernels"]}


#: Declaration of the science stage: per stretch, after zeropoint.
STAGE = Stage(
    name="science",
    run=_run,
    options=ScienceOptions,
    requires=("ingest", "rectify", "detect", "astrometry", "zeropoint"),
    scope="stretch",
    uses=("camera.tdi_rows",),
    # 2: the ZPMED card, by which the mosaic compares transparency; 3: rectify's
    # smear kernels beside the image, for the mosaic's tile catalogues;
    # 4: the SEEBETA card (detect's Moffat index), which the mosaic's seeing mix uses
    # 5: TRAIL on the pixels of detect's trails
    # 6: ZERO_POINT only on a stretch flagged CLOUD or SCATTER, not FEW_STARS alone
    version=6,
    description="Calibrated images at one fixed zero point, with the solved WCS.",
)
