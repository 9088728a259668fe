"""Detect: find and measure point sources in rectified stretches.

In a rectified product that is not deconvolved a star is the seeing profile
averaged over its recorded TDI smear kernel, a curved streak whose first
moment is the position the WCS maps to the sky.  Estimators that weight
toward the peak (windowed centroids, round-profile fits) land near the apex
of the bow.  This stage models each star as the seeing profile convolved
with the smear kernel interpolated at its position
(:mod:`pipeline.stages.detect._model`), with the seeing width fitted from
the stretch's bright isolated stars, and fits flux, first-moment position and
local background by least squares.  A deconvolved product (round stars) uses
a point kernel.

Steps (:func:`detect`)
    1. Background and rms: photutils ``Background2D``.
    2. Significance: filter matched to seeing x smear, per band of rows,
       with the variance plane and the noise correlation of the resampling
       (:mod:`pipeline.stages.detect._find`); segmentation and deblending with
       photutils at ``threshold_sigma``.
    3. Seeing FWHM from the brightest isolated sources (the minimum of the
       summed chi-square of smear-aware fits over a grid of widths), once per
       stretch and per band of rows for the report; for a Moffat profile its
       index too, once per stretch (:func:`~._measure.best_moffat_beta`).
    4. Smear-aware PSF fit of every source (deblended children together),
       aperture sums at ``aperture_radii`` seeing FWHMs with model aperture
       corrections, shape from photutils ``SourceCatalog``, flags
       (:class:`SourceFlag`) and the mask bits they come from (``mask_near``,
       ``mask_core``).
5. The ratio of aperture ``psf_scale_aperture``'s corrected fluxes to the
   PSF fluxes of the stretch's bright isolated unflagged stars
   (:func:`~._measure.psf_aperture_scale`), which the zero point applies
   across the night.
"""

from __future__ import annotations

import itertools
import logging
import warnings
from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numpy as np
from pydantic import BaseModel, ConfigDict, Field, model_validator

from pipeline._lazy import lazy_exports
from pipeline.exceptions import DetectWarning
from pipeline.masks import MaskBit, has_bits
from pipeline.products import (
    FLAGS_EXTENSION,
    FLUX_EXTENSION,
    VARIANCE_EXTENSION,
    plane_columns,
)
from pipeline.stages.base import NEIGHBOURS, PROBLEMS, Stage
from pipeline.stages.detect._find import (
    SegmentMoments,
    background_model,
    band_templates,
    filter_scale,
    find_sources,
    inverse_variance,
    measured_noise_correlation_rows,
    narrow_gaps,
    segment_moments,
    significance_map,
)
from pipeline.stages.detect._measure import (
    MOFFAT_BETA_MIN_STARS,
    MOFFAT_BETA_RANGE,
    MOFFAT_BETA_SIGNIFICANCE,
    NO_DATA,
    PSF_SCALE_MAX_STARS,
    PSF_SCALE_MIN_SNR,
    SourceFlag,
    annulus_levels,
    aperture_corrections,
    aperture_fluxes,
    best_fwhm,
    best_moffat_beta,
    isolated_sources,
    measure_groups,
    psf_aperture_scale,
    seeing_stamps,
    single_stars,
    split_pair,
    stamp_curves,
)
from pipeline.stages.detect._night import MERGE_RULE, Planes, padded_stretch
from pipeline.stages.detect._saturated import (
    CLIPPED,
    column_star_cores,
    merge_on_column,
    merge_on_footprints,
    rows_reached,
    saturated_columns,
    saturated_footprints,
)
from pipeline.stages.detect._sky import sky_errors
from pipeline.stages.detect._trails import (
    TRAIL_LENGTH_FWHM,
    Trail,
    kernel_length,
    on_trails,
    trail_segments,
    trail_table,
)

if TYPE_CHECKING:
    from astropy.table import QTable, Table

    from pipeline.stages.detect._model import SeeingProfile

__all__ = [
    "STAGE",
    "DetectOptions",
    "DetectResult",
    "SeeingProfile",
    "SourceFlag",
    "detect",
    "detect_stretch",
    "fit_stars",
    "model_image",
    "seam_margin",
]

# The model and the fits (and numba, scipy with them) are imported on first use.
__getattr__, __dir__ = lazy_exports(
    __name__, {"_model": ["SeeingProfile", "fit_stars", "model_image"]}
)

log = logging.getLogger(__name__)

#: Widest gap of no-data rows, in seeing FWHMs, that a segment of the searches
#: may cross (:func:`~pipeline.stages.detect._find.narrow_gaps`): one bad raw
#: column is ~4 rectified rows (1.5 FWHM of 2.7 px), two side by side ~5; a
#: star centred in a gap of 2 FWHM still shows its wings on both sides, where
#: the matched filter's significance over the gap is meaningful.
GAP_FWHM = 2.0

#: Seeing FWHMs along the scan beyond a column star's clipped core within
#: which a start on the saturated column is the core's (:func:`_with_column_stars`):
#: the matched filter, centred on the column beside the core, still weighs
#: the core's clipped values and peaks there (3-4 FWHM from the core's
#: pixels on the simulated night of stars of r = 5 to 9.5).
CORE_MARGIN_FWHM = 4.0

#: Fewest seeing FWHMs (``fwhm_guess``) along the scan of a saturated
#: column's widening that is a star's clipped core (:func:`column_star_cores`).
CORE_LENGTH_FWHM = 5.0


class DetectOptions(BaseModel):
    """Options of the detect stage (``stages.detect``); names are :func:`detect`'s keywords."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    threshold_sigma: float = Field(
        4.3,
        gt=0,
        description="Matched-filter signal-to-noise a source must reach (4.3: < 1 % of "
        "detections are noise on a 4096 x 4096 stretch with 3000 stars, > 50 % found at S/N 5).",
    )
    min_pixels: int = Field(
        3, ge=1, description="Connected pixels above the threshold a source needs."
    )
    background_box: int = Field(64, ge=8, description="Background mesh size, pixels.")
    filter_band: int = Field(
        32, ge=8, description="Rows per band sharing one matched-filter template."
    )
    deblend_levels: int = Field(
        32, ge=0, description="Thresholds tried when splitting a segment; 0: no deblending."
    )
    deblend_contrast: float = Field(
        0.005, ge=0, le=1, description="Smallest flux fraction a split-off source may have."
    )
    seeing_shape: str = Field(
        "moffat", pattern="^(gaussian|moffat)$", description="Seeing profile family."
    )
    moffat_beta: float = Field(
        3.5,
        gt=1.5,
        description="Moffat index of the seeing profile: the start of its fit, and the index "
        "used where it is not fitted.",
    )
    fit_moffat_beta: bool = Field(
        True,
        description="Fit the Moffat index per stretch from the seeing stars (within "
        f"{MOFFAT_BETA_RANGE[0]}-{MOFFAT_BETA_RANGE[1]}), used where it is more than "
        f"{MOFFAT_BETA_SIGNIFICANCE:g} of its errors from moffat_beta (kept with fewer than "
        f"{MOFFAT_BETA_MIN_STARS} seeing stars); False: hold it at moffat_beta.",
    )
    fwhm_guess: float = Field(
        3.0, gt=0, description="Seeing FWHM used for the first detection pass, pixels."
    )
    seeing_stars: int = Field(
        20, ge=0, description="Bright isolated stars used to fit the seeing width."
    )
    seeing_min_snr: float = Field(
        30.0, gt=0, description="Smallest matched-filter S/N of a star used for the seeing."
    )
    seeing_bands: int = Field(
        4, ge=1, description="Bands across the chip with their own seeing fit (report)."
    )
    aperture_radii: tuple[float, ...] = Field(
        (1.0, 2.0, 3.0), description="Aperture radii in units of the seeing FWHM."
    )
    psf_scale_aperture: int | None = Field(
        2,
        ge=1,
        description="Aperture (1-based, of aperture_radii) whose corrected fluxes of the "
        "stretch's bright isolated unflagged stars give the ratio of aperture to PSF flux "
        "(catalogue columns psf_scale, psf_scale_err; the zero point applies it); null: "
        "not measured.",
    )
    find_in_residual: bool = Field(
        True,
        description="Search the image minus the fitted models once more for sources hidden "
        "by brighter neighbours, then refit.",
    )
    split_pairs: bool = Field(
        True,
        description="Fit a source the model leaves elongated (UNRESOLVED) as two, and keep "
        "the two when the data want them (a pair along a long smear looks like one star).",
    )

    @model_validator(mode="after")
    def _scale_aperture_is_one_of_the_apertures(self):
        if self.psf_scale_aperture is not None and self.psf_scale_aperture > len(
            self.aperture_radii
        ):
            raise ValueError(
                f"psf_scale_aperture {self.psf_scale_aperture} names no aperture: "
                f"aperture_radii has {len(self.aperture_radii)} (count from 1), or set it "
                "to null."
            )
        return self


@dataclass(frozen=True)
class DetectResult:
    """What :func:`detect` returns.

    Attributes
    ----------
    catalog : astropy.table.QTable
        One row per source, a unit on every column that has one (``group``,
        ``flags``, ``mask_near``, ``mask_core`` and the stage's ``stretch`` are
        plain integer columns; see :func:`detect`).
    seeing : astropy.table.Table
        Seeing FWHM of the stretch and per band of rows.
    problems : list of str
        One line per problem with the input.
    trails : list of Trail
        The satellite trails found (array pixels; :func:`trail_table` makes
        them a table).
    trail_reach : float
        Pixels beyond a trail's band within which a source is on it (the
        seeing FWHM of the last fits).
    """

    catalog: QTable
    seeing: Table
    problems: list[str] = field(default_factory=list)
    trails: list[Trail] = field(default_factory=list)
    trail_reach: float = 0.0


def _start_positions(
    moments, segm, snr: np.ndarray, cut: np.ndarray | None = None
) -> tuple[np.ndarray, np.ndarray]:
    """Start positions of the fits: each segment's centroid, or its S/N peak.

    A segment of the S/N map whose image pixels sum to zero or less (noise,
    or a faint source on a dip left by a neighbour's model) has no centroid
    (NaN); it starts at its highest S/N pixel instead.  So does a segment
    that crosses ``cut`` (a saturated column's rows, without data): its
    centroid is that of the pixels on either side, off the star's centre
    by up to half the column's width when the column cuts the core off
    centre (a start more than a FWHM from where the fit ends is a failed
    fit), where the matched filter, which weighs the pixels with data
    alone, is highest at the star's position in expectation (the
    Cauchy-Schwarz inequality), to the pixel.

    Parameters
    ----------
    moments : `~pipeline.stages.detect._find.SegmentMoments`
        Of the segments, in ``segm``'s label order.
    segm : `~pipeline.stages.detect._find.Segmentation`
    snr : ndarray
        The S/N map the segments were cut from.
    cut : ndarray of bool or None
        Pixels without data the segments may cross (a saturated column's).

    Returns
    -------
    x, y : ndarray
        Zero-based pixel positions, all finite.
    """
    x = np.array(moments.x, dtype=float)
    y = np.array(moments.y, dtype=float)
    peaks = ~(np.isfinite(x) & np.isfinite(y))
    if cut is not None:
        peaks |= _crossing(segm, cut)
    for i in np.flatnonzero(peaks):
        box = segm.slices[i]
        local = np.where(segm.data[box] == segm.labels[i], snr[box], -np.inf)
        iy, ix = np.unravel_index(np.argmax(local), local.shape)
        y[i] = box[0].start + iy
        x[i] = box[1].start + ix
    return x, y


def _crossing(segm, cut: np.ndarray) -> np.ndarray:
    """Whether each segment of ``segm`` (in its label order) holds a pixel of ``cut``.

    Only the segments whose boxes reach the rows holding ``cut`` pixels are
    looked at (a saturated column's few rows: a handful of segments).
    """
    out = np.zeros(len(segm.labels), bool)
    reach = rows_reached(
        cut, [box[0].start for box in segm.slices], [box[0].stop for box in segm.slices]
    )
    for i in np.flatnonzero(reach):
        box = segm.slices[i]
        out[i] = bool(np.any(cut[box] & (segm.data[box] == segm.labels[i])))
    return out


def _by_column_star(x, y, fits_: dict, columns: np.ndarray, reach: float) -> np.ndarray:
    """Whether each position lies on ``columns`` near a fit on it.

    Near: within ``reach`` along the scan, and joined to it across the scan
    by the column's pixels.  ``fits_``: :func:`~pipeline.stages.detect._measure.measure_groups`'
    result (its ``x``, ``y``); positions in array pixels.
    """
    ny, nx = columns.shape

    def pixel(xs, ys):
        ix = np.clip(np.round(np.nan_to_num(xs)).astype(int), 0, nx - 1)
        iy = np.clip(np.round(np.nan_to_num(ys)).astype(int), 0, ny - 1)
        return ix, iy

    fx, fy = pixel(np.asarray(fits_["x"], float), np.asarray(fits_["y"], float))
    fitted = columns[fy, fx]
    fx_on, fy_on = np.asarray(fits_["x"], float)[fitted], fy[fitted]
    x = np.asarray(x, dtype=float)
    ix, iy = pixel(x, y)
    out = np.zeros(x.shape, bool)
    for k in np.flatnonzero(columns[iy, ix]).tolist():
        for j in np.flatnonzero(np.abs(fx_on - x[k]) <= reach).tolist():
            lo, hi = sorted((int(iy[k]), int(fy_on[j])))
            if columns[lo : hi + 1, ix[k]].all():
                out[k] = True
                break
    return out


def _with_column_stars(cat, cx, cy, blended, cores, columns, margin):
    """The sources with one at each column star's core (:func:`column_star_cores`).

    The sources that start on a core (:meth:`ColumnCores.near`: the search
    found the core's clipped values beside the column, or the column beside
    them) are one: the first starts at the core's centre, the others are
    dropped; a core without one gets a source there (no segment: NaN shape,
    not blended).  Either way its peak is set to 0, so that it is never
    taken for a seeing star.

    Parameters
    ----------
    cat : `~pipeline.stages.detect._find.SegmentMoments`
    cx, cy : ndarray
        Start positions of the sources, pixels.
    blended : ndarray of bool
    cores : ColumnCores or None
    columns : ndarray of bool or None
        The saturated columns' pixels (without the cores').
    margin : float
        Pixels along the scan beyond a core within which a start on the
        column is the core's (about two FWHM: the matched filter's reach).

    Returns
    -------
    cat, cx, cy, blended
        As given when there is no core, else new ones.
    """
    if cores is None:
        return cat, cx, cy, blended
    cx, cy = np.array(cx, dtype=float), np.array(cy, dtype=float)
    peak = np.array(cat.peak, dtype=float)
    owner = cores.near(cx, cy, columns, margin)
    keep = owner < 0
    added = []
    for i in range(cores.x.size):
        on = np.flatnonzero(owner == i)
        if on.size:
            cx[on[0]], cy[on[0]], peak[on[0]] = cores.x[i], cores.y[i], 0.0
            keep[on[0]] = True
        else:
            added.append(i)
    extra = np.full(len(added), np.nan)

    def more(values, new):
        return np.concatenate([np.asarray(values, float)[keep], new])

    cat = SegmentMoments(
        x=more(cat.x, cores.x[added]),
        y=more(cat.y, cores.y[added]),
        fwhm=more(cat.fwhm, extra),
        ellipticity=more(cat.ellipticity, extra),
        orientation=more(cat.orientation, extra),
        peak=more(peak, np.zeros(len(added))),
    )
    cx = more(cx, cores.x[added])
    cy = more(cy, cores.y[added])
    blended = np.concatenate([np.asarray(blended, bool)[keep], np.zeros(len(added), bool)])
    return cat, cx, cy, blended


def _core_of(cx, cy, cores) -> np.ndarray:
    """Index of the column star's core each source starts at (-1: none)."""
    out = np.full(len(cx), -1)
    if cores is None:
        return out
    for k in range(cores.x.size):
        out[(np.asarray(cx) == cores.x[k]) & (np.asarray(cy) == cores.y[k])] = k
    return out


def _column_stars_unmeasured(fits_: dict, order, core_of: np.ndarray, cores, shown) -> dict:
    """``fits_`` with each column star at its core's centre, FIT_FAILED, its flux NaN.

    A star whose clipped core widens a saturated column is clipped out to
    several FWHM, on one side the column's no-data rows: its fit rests on
    far wings whose shape nothing measures (the seeing stars pin the
    profile within a few FWHM), and its error does not say so.  Measured:
    on a scene drawn with a Moffat profile of 4 Gaussians (the demo's
    drawing) and fitted with detect's 8, the stars of
    ``tests/test_detect_saturated_columns.py`` whose bleed is their column
    came out at 0.19-0.41 of their flux with errors of 0.1-0.4 %, the one
    touching a column at 4.1 times its flux (10 %) and 2 px off; the demo's
    three brightest at 0.01-0.15 (0.2-16 %), pulled up to 5 px toward a
    neighbour.  The core's centre (:func:`column_star_cores`) was within
    0.7 px of them all.  Such a source is flagged FIT_FAILED (no flux) and
    SATURATED | EDGE (its core is clipped and meets the column's pixels
    without data), not UNRESOLVED.  Its ``mask_core`` holds, besides the
    bits under its fit's core, those of its clipped core's pixels (the
    SATURATED or BLEED its flag says), wherever the fit ended.

    Parameters
    ----------
    fits_ : dict
        :func:`~pipeline.stages.detect._measure.measure_groups`' result.
    order : list of int
        The source of each row of ``fits_``.
    core_of : ndarray of int
        :func:`_core_of` of the first search's sources (later ones: none).
    cores : ColumnCores
    shown : ndarray of uint16
        The stretch's mask (the bits ``mask_core`` shows).

    Returns
    -------
    dict
        ``fits_`` itself when no row is a column star's, else a copy.
    """
    which = np.array([core_of[i] if i < core_of.size else -1 for i in order], dtype=int)
    on = which >= 0
    if not on.any():
        return fits_
    out = dict(fits_)
    out["x"] = np.where(on, cores.x[which], fits_["x"])
    out["y"] = np.where(on, cores.y[which], fits_["y"])
    for name in ("x_err", "y_err", "flux", "flux_err"):
        out[name] = np.where(on, np.nan, fits_[name])
    bits = int(SourceFlag.FIT_FAILED | SourceFlag.SATURATED | SourceFlag.EDGE)
    flags = np.where(on, fits_["flags"] | bits, fits_["flags"])
    # not measured, so not tested for a pair either
    out["flags"] = np.where(on, flags & ~int(SourceFlag.UNRESOLVED), flags)
    core_bits = np.array(fits_["mask_core"])
    for row in np.flatnonzero(on).tolist():
        k = which[row]
        box = (slice(int(cores.y_lo[k]), int(cores.y_hi[k]) + 1),
               slice(max(int(cores.x_lo[k]), 0), max(int(cores.x_hi[k]) + 1, 0)))  # fmt: skip
        core_bits[row] |= int(np.bitwise_or.reduce(shown[box][cores.pixels[box]], axis=None))
    out["mask_core"] = core_bits
    return out


#: The catalogue's ``mask_near`` and ``mask_core`` (as the mosaic tiles'
#: catalogues name theirs, :mod:`pipeline.mosaic._products`): the stretch's
#: own FLAGS bits, those the flags were made from.  The flags' rules
#: (:class:`SourceFlag`): NEAR_FLAGGED iff ``mask_near`` is not 0, SATURATED
#: iff ``mask_core`` holds SATURATED or BLEED, COSMIC_RAY iff it holds
#: COSMIC_RAY, PARTIAL_EXPOSURE iff it holds LOW_EXPOSURE; EDGE where
#: ``mask_near`` holds OUTSIDE or GAP or ``mask_core`` NONFINITE, and also
#: where the stamp is cut by the image's edge or the core meets a column
#: saturated through the stretch (whose pixels detect takes as without data;
#: the stretch's bits there are SATURATED or BLEED).
MASK_NEAR_DESCRIPTION = (
    "OR of the stretch's FLAGS bits (pipeline.masks.MaskBit) over the stamp its fit took "
    "(its group's, for sources fitted together): why it is NEAR_FLAGGED"
)
MASK_CORE_DESCRIPTION = (
    "OR of the stretch's FLAGS bits (pipeline.masks.MaskBit) over its core, where its fitted "
    "model exceeds 5 % of its peak (a tile's: within the radius where the seeing falls to 5 %, "
    "plus the smear track): why it is SATURATED or COSMIC_RAY"
)


def _empty_catalog(radii) -> QTable:
    return _catalog({}, radii, 0)


def _catalog(values: dict, radii, n: int) -> QTable:
    """Assemble the catalogue table with units."""
    from astropy import units as u
    from astropy.table import QTable

    pix, e = u.pix, u.electron
    spec = [
        ("x", pix, "night rectified column (first moment; along the scan)"),
        ("y", pix, "rectified row (first moment; across the scan, north up)"),
        ("x_err", pix, "1-sigma error of x"),
        ("y_err", pix, "1-sigma error of y"),
        ("ra", u.deg, "ICRS right ascension from the product WCS"),
        ("dec", u.deg, "ICRS declination from the product WCS"),
        ("ra_err", u.arcsec, "1-sigma error along right ascension (on the sky)"),
        ("dec_err", u.arcsec, "1-sigma error of declination"),
        ("flux_psf", e, "smear-aware PSF flux"),
        ("flux_psf_err", e, "1-sigma error of flux_psf"),
        ("snr", u.dimensionless_unscaled, "flux_psf / flux_psf_err"),
        ("background", e / pix, "local background (mesh + fitted offset)"),
        ("fwhm", pix, "FWHM of the source's segment (second moments)"),
        ("ellipticity", u.dimensionless_unscaled, "1 - b/a of the segment"),
        ("angle", u.deg, "orientation of the major axis, from +x toward +y"),
        ("chi2", u.dimensionless_unscaled, "reduced chi-square of the PSF fit"),
        (
            "psf_scale",
            u.dimensionless_unscaled,
            "the stretch's ratio of aperture (psf_scale_aperture, corrected to the total, less "
            "an annulus's sky) to PSF flux of its bright isolated unflagged stars; NaN: too "
            "few (the zero point puts each stretch's fluxes on this scale)",
        ),
        ("psf_scale_err", u.dimensionless_unscaled, "1-sigma error of psf_scale"),
        # integers without a unit: plain columns, which a reader gets back as
        # integers (a Quantity, even a dimensionless one, comes back as floats,
        # on which a test of the flag bits fails)
        ("group", None, "sources fitted together share a group"),
        ("flags", None, "SourceFlag bits"),
        ("mask_near", None, MASK_NEAR_DESCRIPTION),
        ("mask_core", None, MASK_CORE_DESCRIPTION),
    ]
    table = QTable()
    for name, unit, doc in spec:
        if unit is None:
            table[name] = np.asarray(values.get(name, np.zeros(n)), dtype=np.int32)
        else:
            table[name] = u.Quantity(np.asarray(values.get(name, np.zeros(n)), float), unit)
        table[name].info.description = doc
    for j, r in enumerate(radii):
        tag = f"{j + 1}"
        for name, unit, doc in (
            (f"flux_aper{tag}", e, f"aperture sum, radius {r} seeing FWHM"),
            (f"flux_aper{tag}_err", e, "1-sigma error of the aperture sum"),
            (f"aper{tag}_corr", u.dimensionless_unscaled, "model total / model in aperture"),
        ):
            column = np.asarray(values.get(name, np.zeros(n)), dtype=float)
            table[name] = u.Quantity(column, unit)
            table[name].info.description = doc
    table.meta["flag_bits"] = {flag.name: int(flag) for flag in SourceFlag}
    table.meta["mask_bits"] = {bit.name: int(bit) for bit in MaskBit}
    table.meta["aperture_radii_fwhm"] = [float(r) for r in radii]
    return table


#: Fewer trusted seeing stars than this, far from every other source, and
#: detect takes the stars fitted alone instead (a crowded field).
SEEING_STARS_CROWDED = 5


def _seeing_table(rows, beta: float, fit: tuple[float, float] = (np.nan, np.nan)) -> Table:
    """The seeing table: ``rows`` of ``(y_lo, y_hi, n_stars, fwhm)``.

    ``beta``: the Moffat index used; ``fit``: the index fitted and its error.
    """
    from astropy import units as u
    from astropy.table import Table

    table = Table(
        rows=rows,
        names=("y_lo", "y_hi", "n_stars", "fwhm"),
        dtype=(np.int64, np.int64, np.int64, float),
    )
    table["y_lo"].unit = table["y_hi"].unit = u.pix
    table["fwhm"].unit = u.pix
    for name, value in zip(("beta", "beta_fit", "beta_err"), (beta, *fit), strict=True):
        table[name] = np.full(len(table), value, dtype=float)
        table[name].unit = u.dimensionless_unscaled
    table.meta["description"] = (
        "Seeing FWHM fitted from bright isolated stars: the whole stretch (first row), then "
        "bands of rows across the chip; fwhm NaN where no star qualified.  beta: the Moffat "
        "index of the fits, one per stretch: beta_fit (fitted from the first row's stars, "
        "1-sigma error beta_err) where it differs from the configured moffat_beta by more "
        f"than {MOFFAT_BETA_SIGNIFICANCE:g} errors, else moffat_beta; beta_fit and beta_err "
        "NaN where not fitted (too few stars), beta NaN for a Gaussian seeing."
    )
    return table


def detect(
    image: np.ndarray,
    variance: np.ndarray,
    mask: np.ndarray,
    smear_kernels: Table,
    *,
    wcs=None,
    x_start: int = 0,
    noise_correlation: float = 1.0,
    deconvolved: bool = False,
    own_columns: tuple[int, int] | None = None,
    threshold_sigma: float = 4.3,
    min_pixels: int = 3,
    background_box: int = 64,
    filter_band: int = 32,
    deblend_levels: int = 32,
    deblend_contrast: float = 0.005,
    seeing_shape: str = "moffat",
    moffat_beta: float = 3.5,
    fwhm_guess: float = 3.0,
    seeing_stars: int = 20,
    seeing_min_snr: float = 30.0,
    seeing_bands: int = 4,
    fit_moffat_beta: bool = True,
    aperture_radii: tuple[float, ...] = (1.0, 2.0, 3.0),
    psf_scale_aperture: int | None = 2,
    find_in_residual: bool = True,
    split_pairs: bool = True,
    seeing_profile: SeeingProfile | None = None,
    overwrite_input: bool = False,
) -> DetectResult:
    """Detect and measure the point sources of a rectified stretch.

    Parameters
    ----------
    image, variance : ndarray, shape (ny, nx)
        Rectified electrons and e^2; axis 0 is ``y`` (across the scan), axis 1
        ``x`` (along the scan).  NaN where there is no data.
    mask : ndarray of uint16, shape (ny, nx)
        :class:`pipeline.masks.MaskBit` bits.
    smear_kernels : astropy.table.Table
        rectify's ``smear_kernels`` product (night pixel positions).
    wcs : astropy.wcs.WCS or None
        Celestial WCS of the arrays; None leaves ``ra``/``dec`` NaN.
    x_start : int
        Night column of the arrays' first column.
    noise_correlation : float
        rectify's ``NOISECOR`` (> 0): the variance of an aperture sum over the
        sum of the variance plane.  Not used for a deconvolved product, whose
        factor at the scale of a star is measured on its blank sky instead,
        per band of rows, and multiplies detect's copy of the variance
        (:func:`~pipeline.stages.detect._find.measured_noise_correlation_rows`).
    deconvolved : bool
        The product was deconvolved (round stars): the smear kernel is not
        applied.
    own_columns : (int, int) or None
        Array columns ``[a, b)`` that belong to this stretch when the arrays
        include a neighbour's edge; only sources whose fitted ``x`` lies in
        them are kept (each star of the night is listed once).  None: all.
    threshold_sigma, min_pixels, background_box, filter_band, deblend_levels,
    deblend_contrast, seeing_shape, moffat_beta, fwhm_guess, seeing_stars,
    seeing_min_snr, seeing_bands, fit_moffat_beta, aperture_radii,
    psf_scale_aperture, find_in_residual, split_pairs
        See :class:`DetectOptions`.
    seeing_profile : SeeingProfile or None
        The seeing's shape when it is not one of ``seeing_shape``'s families
        (e.g. a mosaic tile's mixture of nights in different seeing: a
        subclass whose :meth:`~SeeingProfile.with_fwhm` scales every
        component); its width is fitted from ``fwhm_guess`` as the family's
        is (its shape is not fitted).  None: ``seeing_shape`` and
        ``moffat_beta`` (for a Moffat profile, its index fitted as
        ``fit_moffat_beta`` says).
    overwrite_input : bool
        Use ``image`` and ``variance`` as scratch space: float64 planes are
        left holding the image minus the background and the variance, both
        NaN where there is no data, which spares two float64 planes of the
        stretch (16 bytes per pixel); float32 planes (both of them: kept as
        they are, see below) leave the image as it was and the variance NaN
        where there is no data, which spares a float32 copy of it.  Other
        types are converted (copied) to float64 anyway.  The results are the
        same.  Default False: the inputs are not changed.

    Notes
    -----
    float32 ``image`` and ``variance`` (a rectified product's, as stored)
    are not converted: the residual is made from them in double precision,
    the fits get a float64 copy of the variance only while they run, and the
    image minus the models of the second search is made in the residual
    itself, which is then made again from the image; the background plane
    is made again from its mesh where it is needed last.  The same results
    as from float64 copies of the planes, with a float64 plane of the
    stretch fewer at every search (on the benchmark night's stretch 5 of
    4109 x 1090 pixels a unit's peak above the process's memory fell from
    241 MB to 177 MB).

    Returns
    -------
    DetectResult
        The catalogue: ``x``, ``y`` (night rectified pixels, first moment),
        errors, ``ra``, ``dec`` (deg), ``flux_psf`` (e-), aperture sums
        ``flux_aperN`` with corrections ``aperN_corr``, ``background`` (e-/pix),
        shape, ``snr``, ``flags`` (:class:`SourceFlag`), ``mask_near`` and
        ``mask_core`` (the OR of ``mask``'s :class:`pipeline.masks.MaskBit`
        bits over the stamp each source's fit took and over its core, where
        its fitted model exceeds 5 % of its peak: the bits its flags come
        from, :data:`MASK_NEAR_DESCRIPTION`); and the seeing table.
    """
    from scipy.spatial import cKDTree

    from pipeline.stages.detect._model import KernelGrid, SeeingProfile

    given_variance = variance
    image, variance = np.asarray(image), np.asarray(variance)
    # float32 planes (a rectified product's) are kept as they are: the
    # residual is made from them in double precision, the fits get a float64
    # copy of the variance only while they run (see _fit_variance), and the
    # image minus the models for the second search is made in the residual
    # itself, which is then made again from the image.  The same values as
    # from float64 copies of the planes, a float64 plane of the stretch (8
    # bytes per pixel) fewer at every search.
    single = _single(image) and _single(variance)
    if not single:
        image = np.asarray(image, dtype=float)
        variance = np.asarray(variance, dtype=float)
    mask = np.asarray(mask)
    # the stretch's own bits, which the catalogue's mask_near and mask_core
    # show (detect's copy below adds bits where it takes pixels as without data)
    shown = None
    if image.ndim != 2 or variance.shape != image.shape or mask.shape != image.shape:
        raise ValueError(
            f"image, variance and mask must be 2-D arrays of one shape; got {image.shape}, "
            f"{variance.shape} and {mask.shape}."
        )
    if not noise_correlation > 0.0:
        raise ValueError(
            f"noise_correlation must be > 0 (rectify's NOISECOR); got {noise_correlation!r}."
        )
    radii = tuple(float(r) for r in aperture_radii)
    if psf_scale_aperture is not None and not 1 <= psf_scale_aperture <= len(radii):
        raise ValueError(
            f"psf_scale_aperture must name one of the {len(radii)} aperture_radii (1 to "
            f"{len(radii)}) or be null; got {psf_scale_aperture!r}."
        )
    if seeing_profile is None:
        profile = SeeingProfile(float(fwhm_guess), seeing_shape, moffat_beta)
    else:
        profile = seeing_profile.with_fwhm(float(fwhm_guess))
    # The seeing's Moffat index is fitted (once) only for the family's own profile.
    fit_beta = fit_moffat_beta and seeing_profile is None and seeing_shape == "moffat"
    no_data = has_bits(mask, NO_DATA) | ~np.isfinite(image) | ~(variance > 0)
    # Columns saturated from the stretch's edge on: clipped or spilled charge
    # all along, no star's footprint.  detect takes them as a bad column's
    # rows (no data; in its own copy of the mask, BAD_COLUMN | NONFINITE as
    # rectify flags those), so a star whose core they cut is flagged EDGE
    # and not tested for UNRESOLVED, as beside a bad column; the searches'
    # segments cross them and the fits' stamps reach across them.
    clipped = has_bits(mask, CLIPPED)
    columns = saturated_columns(clipped, no_data, own_columns=own_columns)
    cores = None
    if columns is not None:
        # ... but the stars on them are stars: where a star's clipped core
        # widens the column, the core is its footprint, with a source of its
        # own at the core's centre (_with_column_stars), without a flux
        # (_column_stars_unmeasured)
        cores = column_star_cores(columns, min_length=CORE_LENGTH_FWHM * profile.fwhm)
        if cores is not None:
            columns &= ~cores.pixels
        no_data |= columns
        shown = mask
        mask = mask.copy()
        mask[columns] |= mask.dtype.type(int(MaskBit.BAD_COLUMN | MaskBit.NONFINITE))
    beta_used = float(profile.beta) if seeing_shape == "moffat" else np.nan
    empty_seeing = _seeing_table([(0, image.shape[0], 0, np.nan)], beta_used)
    if no_data.all():
        return DetectResult(
            _empty_catalog(radii),
            empty_seeing,
            [f"no usable pixel in the {image.shape[0]} x {image.shape[1]} stretch (all flagged)"],
        )

    # The background's plane is dropped once the residual is made, and made
    # again (from its mesh) where it is needed next: 4 bytes per pixel fewer
    # while the searches run.
    sky = background_model(image, no_data, background_box)
    # Whole-image planes are made once each, and copied only where pixels
    # lack data (each float64 pass over a 4096 x 4096 stretch costs ~50 ms).
    missing = bool(no_data.any())
    residual = _residual(image, sky.plane(), no_data, missing, overwrite_input and not single)
    background = None
    var = _filled(variance, no_data, np.nan, missing, in_place=overwrite_input)
    # ``var`` is detect's own plane (a copy, or the caller's scratch space)
    owned = overwrite_input or not np.may_share_memory(var, given_variance)
    # Saturated stars: fitted on their unsaturated wings, one source each.
    footprints = saturated_footprints(mask, profile.fwhm, columns, clipped)
    del clipped
    grid = KernelGrid(smear_kernels)
    x_centre = x_start + 0.5 * (image.shape[1] - 1)

    lookup = _PointGrid() if deconvolved else grid
    # Per profile: the filter's templates and its scale (1 / sqrt(sum(k^2 / V))),
    # made once and reused by the second search.
    filters: dict = {}
    # float64 planes: the inverse variance is made once, before the fits punch
    # their holes in ``var``; float32 ones: a batch of rows at a time as each
    # search filters, from ``var`` (never holed)
    inverse = None if single else inverse_variance(var)
    if deconvolved:
        # The factor at a star's scale, measured per band of rows on a first
        # filtering with factor 1, goes into detect's variance plane: every
        # use of the noise (the searches' thresholds, the fits' weights and
        # errors, the apertures' errors) then has its own row's.
        templates = band_templates(lookup, profile, x_centre, image.shape[0], filter_band)
        scale = filter_scale(
            var, lookup, profile, x_centre=x_centre, inverse=inverse, templates=templates
        )
        snr = significance_map(
            residual,
            var,
            lookup,
            profile,
            x_centre=x_centre,
            band=filter_band,
            scale=scale,
            inverse=inverse,
            templates=templates,
        )
        factor = measured_noise_correlation_rows(snr, no_data).astype(var.dtype)[:, None]
        del snr, scale
        if np.may_share_memory(var, given_variance):  # the caller's plane stays as it was
            var, owned = var * factor, True
        else:
            var *= factor
        inverse = None if single else inverse_variance(var)
        noise_correlation = 1.0

    # Per gap width: the no-data pixels the searches' segments stay out of,
    # all but the narrow gaps across the scan (a bad column's rows) and a
    # saturated column's rows (whatever their width), which a star's segment
    # crosses: a star whose core they cut is one segment, not one on each
    # side.  Without such pixels, ``no_data`` itself.
    search_masks: dict = {}

    def search_mask(prof):
        rows = max(1, int(GAP_FWHM * prof.fwhm))
        if rows not in search_masks:
            gaps = narrow_gaps(no_data, rows) if missing else None
            if columns is not None:
                gaps = columns if gaps is None else gaps | columns
            search_masks[rows] = no_data & ~gaps if gaps is not None and gaps.any() else no_data
        return search_masks[rows]

    def segment(prof, data=None):
        if prof not in filters:
            templates = band_templates(lookup, prof, x_centre, image.shape[0], filter_band)
            scale = filter_scale(
                var,
                lookup,
                prof,
                x_centre=x_centre,
                noise_correlation=noise_correlation,
                inverse=inverse,
                templates=templates,
            )
            filters[prof] = (templates, scale)
        templates, scale = filters[prof]
        snr = significance_map(
            residual if data is None else data,
            var,
            lookup,
            prof,
            x_centre=x_centre,
            band=filter_band,
            noise_correlation=noise_correlation,
            scale=scale,
            inverse=inverse,
            templates=templates,
        )
        return snr, *find_sources(
            snr,
            search_mask(prof),
            threshold=threshold_sigma,
            min_pixels=min_pixels,
            deblend_levels=deblend_levels,
            deblend_contrast=deblend_contrast,
        )

    filter_profile = profile  # the matched filter's profile (kept for the second search)
    snr, segm, parent = segment(filter_profile)
    if segm is None:
        warnings.warn(
            f"no source above {threshold_sigma} sigma in the stretch at night columns "
            f"[{x_start}, {x_start + image.shape[1]}); its catalogue is empty.",
            DetectWarning,
            stacklevel=2,
        )
        return DetectResult(_empty_catalog(radii), empty_seeing)
    # Satellite trails: the long thin segments, before the merges change them
    longest = 0.0 if deconvolved else kernel_length(smear_kernels["dx"], smear_kernels["dy"])
    trails = trail_segments(segm, parent, mask, TRAIL_LENGTH_FWHM * profile.fwhm + 2.0 * longest)
    if trails:
        log.info(
            "%d trail(s) across the stretch at night columns [%d, %d): their sources are "
            "flagged TRAIL",
            len(trails),
            x_start,
            x_start + image.shape[1],
        )
    # The fits leave the clipped pixels out (NaN variance).  float64 planes:
    # from here on they are NaN in ``var`` itself (held aside and put back
    # before the apertures, its only later reader; the filters use
    # ``inverse``, made above), which spares a copy of the plane (8 bytes per
    # pixel) when it is detect's own.  float32 planes: in a float64 copy made
    # for the fits (_fit_variance), dropped while a search runs.
    if single:
        var_fit, held = None, None
    else:
        var_fit, held = _without_clipped(var, footprints, owned)

    def sources(segm, snr, data, parent):
        """Segments' moments and start positions, one source per saturated footprint.

        And one per star on a saturated column (``parent`` loses the labels
        merged away).
        """
        cat = segment_moments(data, segm, no_data, snr)
        cx, cy = _start_positions(cat, segm, snr, columns)
        if merge_on_footprints(segm, cx, cy, footprints):
            cat = segment_moments(data, segm, no_data, snr)
            cx, cy = _start_positions(cat, segm, snr, columns)
        if merge_on_column(segm, parent, cx, cy, columns, profile.fwhm):
            cat = segment_moments(data, segm, no_data, snr)
            cx, cy = _start_positions(cat, segm, snr, columns)
        return cat, cx, cy

    cat, cx, cy = sources(segm, snr, residual, parent)
    blended = np.asarray(_deblended(segm.labels, parent))
    cat, cx, cy, blended = _with_column_stars(
        cat, cx, cy, blended, cores, columns, CORE_MARGIN_FWHM * profile.fwhm
    )
    # which core each source starts on (-1: none); the first pass's sources
    # keep their indices through the later passes
    core_of = _core_of(cx, cy, cores)
    peak = cat.peak
    point = deconvolved
    fwhm_grid = fwhm_guess * np.exp(np.linspace(np.log(0.3), np.log(3.0), 41))

    def seeing_star_curves(px, py, brightness, usable, reach, prof, widths):
        """Stamps, rows and chi-square curves of the brightest usable stars no other source nears.

        Near: within ``reach`` (the width :func:`_groups` spreads a fit stamp by).
        The stamps are :func:`seeing_stamps`', their ``x``, ``y`` those of
        ``px``, ``py``; the curves over ``widths``.  Also the other such stars,
        brightest first (indices), for :func:`unclipped_stars`.
        """
        isolated = np.zeros(len(px), bool)
        for members in _groups(px, py, grid, x_start, reach, point):
            isolated[members] = len(members) == 1
        ok = isolated & usable
        candidates = [i for i in np.argsort(-brightness) if ok[i]]
        chosen = candidates[:seeing_stars]
        stamps = star_stamps(px, py, chosen, prof)
        curves = stamp_curves(stamps, [prof.with_fwhm(f) for f in widths])
        trusted = single_stars(widths, curves)
        ys_ = np.array([s.y for s in stamps], dtype=float)
        kept = [s for s, t in zip(stamps, trusted, strict=True) if t]
        return kept, ys_[trusted], curves[trusted], candidates[seeing_stars:]

    def star_stamps(px, py, chosen, prof):
        """:func:`seeing_stamps` of the sources ``chosen`` (indices into ``px``, ``py``)."""
        return seeing_stamps(
            residual,
            var_fit,
            [(px[i], py[i]) for i in chosen],
            grid,
            prof,
            x_start=x_start,
            point_kernel=point,
        )

    def unclipped_stars(px, py, stamps, curves, others, prof, widths):
        """The seeing stars to fit the width and the Moffat index on: those without clipped pixels.

        A saturated star's stamp has its core cut out (the clipped pixels):
        its profile rests on the wings beyond the footprint alone, where the
        clipping's edge disturbs them and no core pins the width.  On a
        simulated night of index 3.5, 17 such stars gave an index of 3.35 +-
        0.03, the unsaturated ones 3.47 +- 0.01.  And a saturated star's
        chi-square rises 10-100 times faster with the width than a seeing
        star's of S/N ~100: on a simulated stretch with eight other trusted
        seeing stars, one whose stamp was clipped on 249 of its 529 pixels
        set the width at 3.05 px, where the others gave 4.06 (the index
        fitted with that width went wrong too, and the stretch's corrected
        aperture sums came out 1.29 times its PSF fluxes, 0.98-1.00 on the
        others); fitted without it, 4.12 px and 0.98.

        Saturated seeing stars are replaced by the next brightest isolated
        stars (of the next ``2 * seeing_stars`` candidates), trusted by
        :func:`single_stars` along with the seeing stars.  Only when none is
        left are the saturated ones used (their wings are all there is).

        Returns
        -------
        stamps : list of SeeingStamp
        curves : ndarray, shape (len(stamps), len(widths))
        """
        clipped = np.array([s.clipped for s in stamps], bool)
        keep = [s for s, c in zip(stamps, clipped, strict=True) if not c]
        kept_curves = curves[~clipped]
        missing = int(clipped.sum())
        if missing and others:
            nearest = star_stamps(px, py, others[: 2 * seeing_stars], prof)
            extra = [s for s in nearest if not s.clipped]
            if extra:
                more = stamp_curves(extra, [prof.with_fwhm(f) for f in widths])
                trusted = single_stars(widths, np.concatenate([curves, more]))[len(stamps) :]
                picked = np.flatnonzero(trusted)[:missing]
                keep += [extra[i] for i in picked]
                kept_curves = np.concatenate([kept_curves, more[picked]])
        if not keep:
            return stamps, curves
        return keep, kept_curves

    # The sources (indices into the positions) the Moffat index was last
    # fitted on: a refit on the same stars would find the same index.
    beta_stars: dict = {}

    def fit_seeing(px, py, brightness, split, prof, fit_beta=False, near=False):
        """Seeing profile (or None) and the seeing table rows from isolated bright sources.

        With ``fit_beta`` the Moffat index is fitted too (enough stars
        given, and not the stars it was fitted on last), and the widths are
        those at the fitted index.  With ``near`` (a refit) the widths tried
        are the grid's 13 around ``prof.fwhm`` (+-37 %), not all 41: the
        refit moves the seeing by a few per cent, and the 28 widths fewer
        per star pay for the index's walk.
        """
        widths = fwhm_grid
        if near:
            k = int(np.argmin(np.abs(np.log(fwhm_grid / prof.fwhm))))
            widths = fwhm_grid[max(k - 6, 0) : k + 7]
        usable = ~split & (brightness >= seeing_min_snr) & np.isfinite(px + py)
        # Isolated: no other source within twice the reach of a fit stamp.
        stamps, ys_, curves, others = seeing_star_curves(
            px, py, brightness, usable, 2.0 * prof.fwhm + 2.0, prof, widths
        )
        if len(ys_) < SEEING_STARS_CROWDED:
            # A crowded field has few stars that far from every other (at
            # ~2,600 sources per megapixel, ~1 in 1,000): take the stars whose
            # fit stamp no other source's overlaps, which are fitted alone.
            crowded = seeing_star_curves(px, py, brightness, usable, prof.fwhm, prof, widths)
            if len(crowded[1]) > len(ys_):
                stamps, ys_, curves, others = crowded
        if not len(ys_):
            return None, [(0, image.shape[0], 0, np.nan)]
        stamps, curves = unclipped_stars(px, py, stamps, curves, others, prof, widths)
        ys_ = np.array([s.y for s in stamps], dtype=float)
        best = best_fwhm(widths, curves)
        chosen = [s for s in stamps if not s.clipped] if fit_beta else []
        index = {(float(a), float(b)): i for i, (a, b) in enumerate(zip(px, py, strict=True))}
        stars = frozenset(index[float(s.x), float(s.y)] for s in chosen)
        if fit_beta and len(chosen) >= MOFFAT_BETA_MIN_STARS and stars != beta_stars.get("ids"):
            # A refit starts at the index fitted before, near: fine steps only.
            refit = "ids" in beta_stars
            beta_stars["ids"] = stars
            fitted = best_moffat_beta(chosen, prof.with_fwhm(best), coarse=not refit)
            log.debug("Moffat index %s from %d stars (start %.3f)", fitted, len(chosen), prof.beta)
            # The configured index unless the stars show another: an index
            # within the noise of it would only add the noise to the stretch's
            # fluxes (~0.045 mag per unit of the index, FWHM 2.7 px).  A refit
            # keeps the index in use if within the noise of it too: another
            # index refits every group (a quarter more CPU on a stretch).
            beta, bar = moffat_beta, np.inf
            if fitted is not None:
                beta, bar = fitted.beta, MOFFAT_BETA_SIGNIFICANCE * fitted.error
                if abs(beta - moffat_beta) <= bar:
                    beta = moffat_beta
            if not (refit and abs(beta - prof.beta) <= bar):
                beta_stars["fit"] = (np.nan, np.nan) if fitted is None else tuple(fitted)
            else:
                beta = prof.beta
            if beta != prof.beta:
                # The widths again at the index, over the grid's 5 widths
                # around the best (+-12 %: the width moves 1-2 % per 0.1 of
                # the index), which hold every band's too.
                prof = SeeingProfile(best, prof.shape, beta)
                k = int(np.argmin(np.abs(np.log(fwhm_grid / best))))
                widths = fwhm_grid[max(k - 2, 0) : k + 3]
                curves = stamp_curves(stamps, [prof.with_fwhm(f) for f in widths])
                best = best_fwhm(widths, curves)
        rows = [(0, image.shape[0], len(ys_), best)]
        edges = np.linspace(0, image.shape[0], seeing_bands + 1).astype(int)
        for lo, hi in itertools.pairwise(edges):
            inside = (ys_ >= lo) & (ys_ < hi)
            band = best_fwhm(widths, curves[inside]) if inside.any() else np.nan
            rows.append((lo, hi, int(inside.sum()), band))
        return prof.with_fwhm(best), rows

    point = deconvolved
    # the search's planes are done with: free them before the fits make theirs
    del snr, segm, parent
    if single:
        var_fit = _fit_variance(var, footprints)
    fitted_profile, seeing_rows = fit_seeing(cx, cy, peak, blended, profile, fit_beta)
    if fitted_profile is not None:
        fwhm = fitted_profile.fwhm
        profile = fitted_profile
        if abs(fwhm - fwhm_guess) > 0.25 * fwhm_guess:  # filter far off: detect again
            filter_profile = profile
            if single:  # not held while the search runs
                var_fit = None
            snr, segm, parent = segment(filter_profile)
            cat, cx, cy = sources(segm, snr, residual, parent)
            blended = np.asarray(_deblended(segm.labels, parent))
            cat, cx, cy, blended = _with_column_stars(
                cat, cx, cy, blended, cores, columns, CORE_MARGIN_FWHM * profile.fwhm
            )
            core_of = _core_of(cx, cy, cores)
            del snr, segm, parent
            if single:
                var_fit = _fit_variance(var, footprints)
    else:
        warnings.warn(
            f"no bright isolated star (S/N >= {seeing_min_snr}) to fit the seeing; using "
            f"fwhm_guess = {fwhm_guess} px.",
            DetectWarning,
            stacklevel=2,
        )
    log.debug(
        "seeing FWHM %.3f px, Moffat index %.3f, from %d stars",
        profile.fwhm,
        profile.beta,
        seeing_rows[0][2],
    )

    shape_cols = [cat.fwhm, cat.ellipticity, cat.orientation]
    del cat

    fitted: dict = {}  # groups already fitted, for the later passes

    def split_one(group_xy, which):
        return split_pair(
            residual,
            var_fit,
            group_xy,
            which,
            grid,
            profile,
            x_start=x_start,
            point_kernel=point,
            noise_correlation=noise_correlation,
            min_snr=threshold_sigma,
        )

    started: dict = {}  # where the last fit of every source started

    def fit_all(px, py, split):
        started["x"], started["y"] = np.array(px, dtype=float), np.array(py, dtype=float)
        members = _groups(px, py, grid, x_start, profile.fwhm, point)
        # Python lists: indexing them per source is ~10 times cheaper than arrays
        xy = list(zip(started["x"].tolist(), started["y"].tolist(), strict=True))
        split = np.asarray(split, bool).tolist()
        result = measure_groups(
            residual,
            var_fit,
            mask,
            [[xy[i] for i in g] for g in members],
            grid,
            profile,
            x_start=x_start,
            point_kernel=point,
            noise_correlation=noise_correlation,
            own_columns=own_columns,
            blended=[[split[i] for i in g] for g in members],
            memo=fitted,
            footprints=footprints,
            cut=columns,
            shown=shown,
        )
        return members, result

    members, fits_ = fit_all(cx, cy, blended)
    n_first = len(cx)
    if find_in_residual:
        # Second pass: sources hidden by brighter neighbours show up in the image
        # minus the fitted models.  float32 planes: made in the residual itself
        # (made again from the image below), the fits' variance dropped meanwhile.
        if single:
            var_fit = None
        cleaned = _subtract_models(residual, fits_, profile, in_place=single)
        # The first search's filter: its denominator is reused, and a filter
        # a few per cent off the seeing loses a negligible (second-order) S/N.
        _snr2, segm2, _parent2 = segment(filter_profile, cleaned)
        cat2 = None
        if segm2 is not None:
            cat2, nx2, ny2 = sources(segm2, _snr2, cleaned, _parent2)
        # the last search: its planes, the filters' and the image minus the models
        # are done with
        del cleaned, _snr2, segm2, _parent2
        filters.clear()
        if single:
            background = sky.plane()
            residual = _residual(image, background, no_data, missing, residual)
            var_fit = _fit_variance(var, footprints)
        if cat2 is not None:
            near = cKDTree(np.column_stack([fits_["x"], fits_["y"]])).query(
                np.column_stack([nx2, ny2])
            )[0]
            # Farther than a FWHM from every fitted source: nearer, a residual is
            # the misfit of that source, and a second source there is degenerate.
            # Nor on a column star's core: its clipped pixels left in the
            # image minus the models lie off the star's centre (the column
            # holds the rest), and the core has its source.
            on_core = (
                cores.near(nx2, ny2, columns, CORE_MARGIN_FWHM * profile.fwhm) >= 0
                if cores is not None
                else np.zeros(len(nx2), bool)
            )
            new = np.flatnonzero((near > profile.fwhm) & np.isfinite(nx2) & ~on_core)
            if new.size and columns is not None:
                # ... and, on a saturated column, from every source fitted on
                # it at columns within a FWHM: the misfit of a star whose
                # core the column hides lies across the column's rows
                new = new[~_by_column_star(nx2[new], ny2[new], fits_, columns, profile.fwhm)]
            if new.size:
                log.debug("%d more sources in the residual image", new.size)
                order0 = [i for g in members for i in g]
                px, py, bright = (np.empty(len(cx)) for _ in range(3))
                px[order0], py[order0] = fits_["x"], fits_["y"]
                with np.errstate(invalid="ignore", divide="ignore"):
                    bright[order0] = np.nan_to_num(fits_["flux"] / fits_["flux_err"])
                cx = np.concatenate([px, nx2[new]])
                cy = np.concatenate([py, ny2[new]])
                blended = np.concatenate([blended, np.ones(new.size, bool)])
                bright = np.concatenate([bright, np.asarray(cat2.peak, float)[new]])
                more = [q[new] for q in (cat2.fwhm, cat2.ellipticity, cat2.orientation)]
                shape_cols = [
                    np.concatenate([c0, c1]) for c0, c1 in zip(shape_cols, more, strict=True)
                ]
                del cat2
                # Close companions found now may have widened the seeing stars of the
                # first pass: fit the seeing again on the sources now known to be
                # alone, before the joint refit, so that a seeing that moved costs no
                # second refit of every group.  The seeing stars are isolated, so
                # their first fits are those the joint refit would give them again
                # (their groups are unchanged); the new sources, all flagged as split
                # off, only bar their neighbours.
                # The Moffat index too, if these are other stars than the first's
                # (stars hiding a companion, or a pair along the smear, fit with
                # heavier wings: on a scene of such pairs and 8 single stars the
                # first fit gave 2.58 where the stars' index is ~3.45).
                again, rows = fit_seeing(cx, cy, bright, blended, profile, fit_beta, near=True)
                log.debug("seeing FWHM refitted: %s px", again and again.fwhm)
                if again is not None:
                    seeing_rows = rows
                    moved = abs(again.fwhm - profile.fwhm) > 0.003 * profile.fwhm
                    if moved or again.beta != profile.beta:
                        profile = again
                members, fits_ = fit_all(cx, cy, blended)
                # A source found only in the image minus the models must stand on
                # its own after the joint refit (residuals of a neighbour's imperfect
                # model do not); the others are refitted without it.
                order = np.array([i for g in members for i in g])
                with np.errstate(invalid="ignore", divide="ignore"):
                    weak = ~(fits_["flux"] / fits_["flux_err"] >= threshold_sigma)
                drop = order[(order >= n_first) & weak]
                log.debug("%d of them dropped after the joint refit", drop.size)
                if drop.size:
                    kept = np.setdiff1d(np.arange(len(cx)), drop)
                    cx, cy, blended = cx[kept], cy[kept], blended[kept]
                    shape_cols = [c[kept] for c in shape_cols]
                    members, fits_ = fit_all(cx, cy, blended)
    # One split per group at a time, the one that gains most: a pair fitted as
    # one elongates its neighbours' residuals too, until it is resolved.
    tried: set = set()
    for _ in range(SPLIT_ROUNDS if split_pairs else 0):
        found = _split_unresolved(members, fits_, threshold_sigma, split_one, tried)
        if not found:
            break
        # The other sources start where their last fit started: their groups
        # are the same, and the memo gives their fits back unchanged.
        px, py = started["x"], started["y"]
        parents = np.array([i for i, _ in found])
        for i, (first, _second) in found:
            px[i], py[i] = first
        cx = np.concatenate([px, [second[0] for _, (_, second) in found]])
        cy = np.concatenate([py, [second[1] for _, (_, second) in found]])
        blended = np.asarray(blended, bool).copy()
        blended[parents] = True
        blended = np.concatenate([blended, np.ones(len(found), bool)])
        shape_cols = [np.concatenate([c, c[parents]]) for c in shape_cols]
        members, fits_ = fit_all(cx, cy, blended)
    order = [i for g in members for i in g]
    if cores is not None:
        fits_ = _column_stars_unmeasured(fits_, order, core_of, cores, shown)
    keep = np.ones(len(order), bool)
    if own_columns is not None:
        keep = (fits_["x"] >= own_columns[0] - 0.5) & (fits_["x"] < own_columns[1] - 0.5)
    idx = np.flatnonzero(keep)
    x, y = fits_["x"][idx], fits_["y"][idx]
    kernels = [fits_["kernel"][i] for i in idx]
    if held is not None:
        footprints.put(var, held)
    if single:  # the apertures' variance: the fits' without the holes, as float64 planes'
        if footprints is not None:
            footprints.put(var_fit, footprints.take(var))
        var = var_fit
    ap_flux, ap_err, ap_corr = aperture_fluxes(
        residual,
        var,
        no_data,
        x,
        y,
        kernels,
        profile,
        [r * profile.fwhm for r in radii],
        noise_correlation,
        [fits_["response"][i] for i in idx],
    )
    src = np.asarray(order)[idx]
    flags = fits_["flags"][idx]
    if trails:
        trail = on_trails(trails, x, y, profile.fwhm)
        flags = np.where(trail, flags | int(SourceFlag.TRAIL), flags)
    values = {
        "x": x + x_start,
        "y": y,
        "x_err": fits_["x_err"][idx],
        "y_err": fits_["y_err"][idx],
        "flux_psf": fits_["flux"][idx],
        "flux_psf_err": fits_["flux_err"][idx],
        "chi2": fits_["chi2"][idx],
        "group": fits_["group"][idx],
        "flags": flags,
        "mask_near": fits_["mask_near"][idx],
        "mask_core": fits_["mask_core"][idx],
        "fwhm": shape_cols[0][src],
        "ellipticity": shape_cols[1][src],
        "angle": shape_cols[2][src],
    }
    scale = (1.0, 0.0, 0)
    if psf_scale_aperture is not None and x.size:
        j = psf_scale_aperture - 1
        radius = radii[j] * profile.fwhm
        # The candidates: bright, unflagged, and with no other fitted source (the
        # neighbour stretch's margin's too) within the aperture, two FWHM of the
        # other's light and the smear's extent; at most the PSF_SCALE_MAX_STARS
        # brightest, whose errors outweigh the others' anyway.
        snr = values["flux_psf"] / values["flux_psf_err"]
        chosen = np.flatnonzero((values["flags"] == 0) & (snr >= PSF_SCALE_MIN_SNR))
        dx = [kernels[i][0] for i in chosen]
        extent = np.array([np.ptp(d) if np.size(d) else 0.0 for d in dx], dtype=float)
        reach = radius + 2.0 * profile.fwhm + extent
        alone = isolated_sources(x[chosen], y[chosen], reach, (fits_["x"], fits_["y"]))
        chosen, extent = chosen[alone], extent[alone]
        if chosen.size > PSF_SCALE_MAX_STARS:
            brightest = np.sort(np.argsort(-snr[chosen])[:PSF_SCALE_MAX_STARS])
            chosen, extent = chosen[brightest], extent[brightest]
        take = np.zeros(x.size, dtype=bool)
        take[chosen] = True
        # their sums less the local sky above the mesh, from an annulus beyond
        # the aperture and the smear
        inner = radius + profile.fwhm + 0.5 * np.max(extent, initial=0.0)
        outer = inner + 3.0 * profile.fwhm
        local_sky = np.zeros(x.size)
        local_sky[chosen] = annulus_levels(residual, no_data, x[chosen], y[chosen], inner, outer)
        # less the star's own wings there (its model's share of the annulus,
        # spread over it: ~0.1 % of its flux at 2 FWHM otherwise)
        inside = 1.0 / aperture_corrections(
            [kernels[i] for i in chosen],
            y[chosen],
            profile,
            [inner, outer],
            responses=[fits_["response"][idx[i]] for i in chosen],
        )
        wings = values["flux_psf"][chosen] * (inside[:, 1] - inside[:, 0])
        local_sky[chosen] -= wings / (np.pi * (outer**2 - inner**2))
        scale = psf_aperture_scale(
            values["flux_psf"],
            values["flux_psf_err"],
            ap_flux[:, j] - local_sky * np.pi * radius**2,
            ap_err[:, j],
            ap_corr[:, j],
            values["flags"],
            take,
        )
        log.info(
            "aperture %d over PSF flux of %d bright isolated stars: %.4f +- %.4f",
            psf_scale_aperture,
            scale[2],
            scale[0],
            scale[1],
        )
    measured = scale[2] > 0
    values["psf_scale"] = np.full(x.size, scale[0] if measured else np.nan)
    values["psf_scale_err"] = np.full(x.size, scale[1] if measured else np.nan)
    values["snr"] = values["flux_psf"] / values["flux_psf_err"]
    yi = np.clip(np.round(y).astype(int), 0, image.shape[0] - 1)
    xi = np.clip(np.round(x).astype(int), 0, image.shape[1] - 1)
    if background is None:
        background = sky.plane()
    values["background"] = background[yi, xi] + fits_["background"][idx]
    for j in range(len(radii)):
        values[f"flux_aper{j + 1}"] = ap_flux[:, j]
        values[f"flux_aper{j + 1}_err"] = ap_err[:, j]
        values[f"aper{j + 1}_corr"] = ap_corr[:, j]
    values["ra"] = values["dec"] = values["ra_err"] = values["dec_err"] = np.full(x.size, np.nan)
    if wcs is not None and x.size:
        ra, dec = wcs.all_pix2world(x, y, 0)
        values["ra"], values["dec"] = ra, dec
        errors = sky_errors(wcs, x, y, values["x_err"], values["y_err"])
        values["ra_err"], values["dec_err"] = errors
    catalog = _catalog(values, radii, x.size)
    catalog.meta["seeing_fwhm"] = float(profile.fwhm)
    catalog.meta["seeing_shape"] = seeing_shape
    beta_used = float(profile.beta) if seeing_shape == "moffat" else np.nan
    if seeing_shape == "moffat":
        catalog.meta["seeing_beta"] = beta_used
    fit = beta_stars.get("fit", (np.nan, np.nan))
    return DetectResult(
        catalog,
        _seeing_table(seeing_rows, beta_used, fit),
        trails=trails,
        trail_reach=float(profile.fwhm),
    )


#: Largest fraction of the bright sources (S/N >= 50) flagged UNRESOLVED for
#: which they are split into pairs: beyond it the model is off for the
#: stretch (a smear kernel of the wrong length elongates every bright star's
#: residual), not the sky crowded with pairs, and splitting would double stars.
SPLIT_MAX_FRACTION = 0.05
#: ... and at least this many of them: a few pairs among a few bright stars
#: are pairs.
SPLIT_MIN_SUSPECT = 5
#: Rounds of splitting (each at most one source per group, then a refit).
SPLIT_ROUNDS = 3


def _split_unresolved(members, fits_, threshold_sigma, split_one, tried):
    """``[(source, (first, second)), ...]``: UNRESOLVED sources that are two.

    ``split_one(group_xy, which)`` is :func:`split_pair` on the stretch's
    planes.  Nothing is split (and the log says why) when more than
    :data:`SPLIT_MAX_FRACTION` of the bright sources are flagged.  ``tried``
    (a set, updated) holds the groups already tried, as fitted positions: a
    group left as it was is not tried again.
    """
    flags = np.asarray(fits_["flags"])
    with np.errstate(invalid="ignore", divide="ignore"):
        snr = np.asarray(fits_["flux"]) / np.asarray(fits_["flux_err"])
    flagged = ((flags & SourceFlag.UNRESOLVED) != 0) & ((flags & SourceFlag.FIT_FAILED) == 0)
    if not flagged.any():
        return []
    bright = snr >= 50.0
    n_flagged = int((flagged & bright).sum())
    if n_flagged > max(SPLIT_MIN_SUSPECT, SPLIT_MAX_FRACTION * bright.sum()):
        # Not a warning: the flags are in the catalogue, and a stretch whose
        # smear the nominal geometry misses (before astrometry has solved the
        # night) is common; astrometry measures it again when the solved
        # smear differs.
        log.info(
            "%d of %d sources of S/N >= 50 are elongated against the model (UNRESOLVED): "
            "the smear kernels or the seeing may be off for this stretch; they are kept "
            "whole, not split into pairs",
            n_flagged,
            int(bright.sum()),
        )
        return []
    order = [i for g in members for i in g]
    positions = np.column_stack([fits_["x"], fits_["y"]])
    where = {source: k for k, source in enumerate(order)}
    best: dict[int, tuple] = {}  # per group: (gain, source, halves)
    for k in np.flatnonzero(flagged & (snr >= 2.0 * threshold_sigma)):
        index = int(fits_["group"][k])
        group = members[index]
        group_xy = [tuple(positions[where[i]]) for i in group]
        key = (tuple(group_xy), group.index(order[k]))
        if key in tried:
            continue
        tried.add(key)
        split = split_one(group_xy, group.index(order[k]))
        if split is not None and split[1] > best.get(index, (-np.inf,))[0]:
            best[index] = (split[1], order[k], split[0])
    log.debug("%d of %d UNRESOLVED sources split into pairs", len(best), int(flagged.sum()))
    return [(source, halves) for _, source, halves in best.values()]


def _groups(cx, cy, grid, x_start, fwhm, point) -> list[list[int]]:
    """Sources whose fit stamps overlap, to be fitted together (index lists)."""
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components
    from scipy.spatial import cKDTree

    n = len(cx)
    if point:
        hx = hy = np.zeros(n)
    else:
        hx, hy = grid.extents(x_start + np.asarray(cx, dtype=float), cy)
    hx = hx + 1.5 * fwhm + 1.0
    hy = hy + 1.5 * fwhm + 1.0
    reach = 2.0 * float(np.hypot(hx, hy).max())
    tree = cKDTree(np.column_stack([cx, cy]))
    pairs = tree.query_pairs(reach, output_type="ndarray").reshape(-1, 2).astype(int)
    i, j = pairs[:, 0], pairs[:, 1]
    close = (np.abs(cx[i] - cx[j]) < hx[i] + hx[j]) & (np.abs(cy[i] - cy[j]) < hy[i] + hy[j])
    graph = coo_matrix((np.ones(close.sum()), (i[close], j[close])), shape=(n, n))
    _, labels = connected_components(graph, directed=False)
    order = np.argsort(labels, kind="stable")
    # Slices of one Python list: ``np.split`` makes an array view per group
    # (a few microseconds each, ~1600 groups per crowded stretch and call).
    flat = order.tolist()
    cuts = [0, *(np.flatnonzero(np.diff(labels[order])) + 1).tolist(), len(flat)]
    return [flat[a:b] for a, b in itertools.pairwise(cuts)]


def _without_clipped(
    var: np.ndarray, footprints, owned: bool
) -> tuple[np.ndarray, np.ndarray | None]:
    """The variance the fits see (NaN on clipped pixels) and the values it replaced.

    Returns ``(var, None)`` without saturated footprints; a copy with the
    holes and None when ``var`` is not detect's own (``owned`` False: it is the
    caller's, to be left as it is); else ``var`` itself with the holes and the
    clipped pixels' values, which the caller puts back
    (``var[footprints.clipped] = held``).
    """
    if footprints is None:
        return var, None
    if not owned:
        out = var.copy()
        footprints.put(out, np.nan)
        return out, None
    held = footprints.take(var)
    footprints.put(var, np.nan)
    return var, held


def _single(plane: np.ndarray) -> bool:
    """Whether ``plane`` holds float32 values (either byte order)."""
    return plane.dtype.kind == "f" and plane.dtype.itemsize == 4


def _residual(image, background, no_data, missing: bool, out) -> np.ndarray:
    """``image - background`` in double precision, NaN where ``no_data`` (if ``missing``).

    ``out``: a float64 array to write it in (e.g. ``image`` itself, or the
    residual made before), or True for ``image``, or False/None for a new one.
    The same values whatever the types of ``image`` (float32 or float64) and
    ``out``: each is converted to float64 before the subtraction.
    """
    from pipeline.stages.detect._find_jit import residual_rows

    if out is True:
        out = image
    elif out is False:
        out = None
    if missing and _compiled_types(image, background, no_data, out):
        # one compiled pass (the same values): 7 ms of CPU instead of 12 ms
        # for a 4109 x 1170 plane
        out = np.empty(image.shape) if out is None else out
        return residual_rows(image, background, no_data, out)
    residual = np.subtract(image, background, out=out, dtype=np.float64)
    if missing:
        residual[no_data] = np.nan
    return residual


def _compiled_types(image, background, no_data, out) -> bool:
    """Whether :func:`_residual`'s planes are of the types its compiled loop is made for.

    Native float32 or float64 ``image``, float32 ``background``, bool
    ``no_data``, float64 ``out`` (or None), all C-contiguous: others (e.g. a
    FITS file's big-endian plane) would compile another variant as the unit
    runs.
    """
    types = [(image, (np.float32, np.float64)), (background, (np.float32,)), (no_data, (bool,))]
    if out is not None:
        types.append((out, (np.float64,)))
    return all(
        isinstance(plane, np.ndarray)
        and plane.flags.c_contiguous
        and any(plane.dtype == np.dtype(t) for t in allowed)
        for plane, allowed in types
    )


def _fit_variance(var: np.ndarray, footprints) -> np.ndarray:
    """The variance the fits see, float64: ``var`` with NaN on clipped pixels (a new array)."""
    out = var.astype(np.float64)
    if footprints is not None:
        footprints.put(out, np.nan)
    return out


def _filled(
    plane: np.ndarray, no_data: np.ndarray, value: float, missing: bool, in_place: bool = False
) -> np.ndarray:
    """``plane`` with ``value`` where ``no_data``: ``plane`` itself when ``missing`` is False
    (or, filled, when ``in_place``)."""
    if not missing:
        return plane
    out = plane if in_place else plane.copy()
    out[no_data] = value
    return out


def _subtract_models(image: np.ndarray, fits_, profile, in_place: bool = False) -> np.ndarray:
    """``image`` minus the PSF models of all fitted sources, e- (a new array, or
    ``image`` itself when ``in_place``).

    Each model is :func:`~pipeline.stages.detect._model.model_image`'s on the
    pixels within 3 FWHM plus its kernel's extent of the source, all
    subtracted in one compiled call (one ``model_image`` call per source
    cost as much again in Python as the models).
    """
    from pipeline.stages.detect._fit_jit import subtract_models_compiled
    from pipeline.stages.detect._model import _kernel_samples, _response_rows
    from pipeline.stages.detect._pixel_gauss import profile_tables

    out = image if in_place else image.copy()
    kernels = fits_["kernel"]
    if not kernels:
        return out
    dx, dy, samples = _kernel_samples(kernels)
    sigmas, weights = profile.mixture()
    subtract_models_compiled(
        out,
        np.asarray(fits_["x"], dtype=np.float64),
        np.asarray(fits_["y"], dtype=np.float64),
        np.asarray(fits_["flux"], dtype=np.float64),
        dx,
        dy,
        samples,
        _response_rows(fits_["response"]),
        np.ascontiguousarray(sigmas, dtype=np.float64),
        np.ascontiguousarray(weights, dtype=np.float64),
        3.0 * profile.fwhm,
        *profile_tables(),
    )
    return out


def _deblended(labels, parent) -> list[bool]:
    """Whether each source was split off a larger segment by the deblending."""
    counts: dict[int, int] = {}
    for key in parent.values():
        counts[key] = counts.get(key, 0) + 1
    return [counts[parent[int(label)]] > 1 for label in labels]


class _PointGrid:
    """Kernel lookup for a deconvolved product: no smear."""

    def __call__(self, x, y):
        return np.zeros(1), np.zeros(1)


# ----------------------------------------------------------------------------
# The stage


def _night_column(header) -> int:
    """Night column of a rectified plane's first column (its alternate WCS 'A', NIGHT)."""
    return round(header["CRVAL1A"] - (header["CRPIX1A"] - 1.0) * header["CDELT1A"])


def _planes(products, kernels=None) -> Planes:
    """A rectify stretch product as :class:`Planes` (``kernels``: None, its own)."""
    from astropy.wcs import WCS, FITSFixedWarning

    hdul = products["image"]
    header = hdul[FLUX_EXTENSION].header
    with warnings.catch_warnings():
        # The product's time and observatory cards make astropy.wcs note the
        # fixes it would apply; only the celestial part is used.
        warnings.simplefilter("ignore", FITSFixedWarning)
        wcs = WCS(header).celestial
    # as stored (float32): padded_stretch makes the (float32) planes detect works on,
    # so a copy here would only add to what the unit holds
    return Planes(
        np.asarray(hdul[FLUX_EXTENSION].data),
        np.asarray(hdul[VARIANCE_EXTENSION].data),
        np.asarray(hdul[FLAGS_EXTENSION].data),
        _night_column(header),
        products["smear_kernels"] if kernels is None else kernels,
        wcs,
    )


def _edge_planes(products, margin: int, last: bool, kernels=None) -> Planes | None:
    """The first (or ``last``) ``margin`` columns of a neighbouring rectified stretch.

    Keeps only those columns of its planes (:func:`~pipeline.products.plane_columns`),
    so a stretch's unit holds its own planes and two thin edges, whatever the
    night's length.
    """
    if products is None:
        return None
    hdul = products["image"]
    header = hdul[FLUX_EXTENSION].header
    n_columns = int(header["NAXIS1"])
    columns = slice(max(n_columns - margin, 0), n_columns) if last else slice(0, margin)
    planes = [
        plane_columns(hdul[name], columns)
        for name in (FLUX_EXTENSION, VARIANCE_EXTENSION, FLAGS_EXTENSION)
    ]
    x_start = _night_column(header) + columns.indices(n_columns)[0]
    # as stored (float32): padded_stretch copies them into the padded planes
    return Planes(
        planes[0],
        planes[1],
        planes[2],
        x_start,
        products["smear_kernels"] if kernels is None else kernels,
    )


def _release_planes(hdul) -> None:
    """Drop the image, variance and flag planes an HDU list holds (not its headers)."""
    for name in (FLUX_EXTENSION, VARIANCE_EXTENSION, FLAGS_EXTENSION):
        del hdul[name].data


#: Rows of a stretch :func:`_has_data` looks at in one go.
HAS_DATA_ROWS = 256


def _has_data(planes: Planes) -> bool:
    """Whether any pixel of a stretch holds data (not flagged as none, finite, variance > 0).

    A band of :data:`HAS_DATA_ROWS` rows at a time, stopping at the first
    that holds some: six passes over the whole planes took ~5 ms of CPU per
    unit of the benchmark night to find what the first band tells.
    """
    for first in range(0, planes.image.shape[0], HAS_DATA_ROWS):
        rows = slice(first, first + HAS_DATA_ROWS)
        no_data = has_bits(planes.mask[rows], NO_DATA) | ~np.isfinite(planes.image[rows])
        if np.any(~no_data & (planes.variance[rows] > 0)):
            return True
    return False


def seam_margin(kernels: Table, fwhm: float) -> int:
    """Columns of each neighbour a stretch needs to measure seam stars whole.

    Two fit stamps (a seam star and a neighbour fitted with it) of half-width
    ``2 FWHM + half the smear length`` each, plus 8 columns for the
    matched filter's edge, pixels.
    """
    half = float(np.max(np.abs(np.asarray(kernels["dx"], dtype=float)))) if len(kernels) else 0.0
    return int(np.ceil(2.0 * (2.0 * fwhm + half) + 8.0))


def detect_stretch(
    products,
    before=None,
    after=None,
    options: DetectOptions | None = None,
    *,
    stretch_index: int = 0,
    kernels=None,
    release: bool = False,
) -> dict:
    """Detect and measure one rectified stretch, with its neighbours' edge columns.

    The detect stage's unit of work, also used by astrometry's second pass
    (which measures the same planes with the smear kernels of its solved
    geometry).

    Parameters
    ----------
    products : mapping
        rectify's products of the stretch (``image``, ``smear_kernels``).
    before, after : mapping or None
        The adjacent stretches' rectify products, or None.
    options : DetectOptions, optional
        Default ``DetectOptions()``.
    stretch_index : int
        Written to the catalogue's and seeing table's ``stretch`` column.
    kernels : (Table, Table or None, Table or None) or None
        The smear kernels to model the stars of the stretch, of ``before``
        and of ``after`` with (rectify's record redone for another
        geometry); None: the ones rectify recorded.
    release : bool
        Drop the stretch's planes from ``products["image"]`` (``del
        hdu.data``) once they are copied into the padded planes detect
        measures: the detect stage's unit, whose inputs are its own, then
        holds them once (10 bytes per pixel fewer while it runs, 42 MB on the
        benchmark night's stretches).  Default False: ``products`` is left
        as it is.

    Returns
    -------
    dict
        ``catalog``, ``seeing`` and, if any, ``PROBLEMS`` (the stage's products).
    """
    from astropy import units as u

    options = DetectOptions() if options is None else options

    own_kernels, before_kernels, after_kernels = (None, None, None) if kernels is None else kernels
    own = _planes(products, own_kernels)
    header = products["image"][FLUX_EXTENSION].header
    margin = seam_margin(own.kernels, options.fwhm_guess)
    if _has_data(own):
        padded, own_columns = padded_stretch(
            own,
            _edge_planes(before, margin, True, before_kernels),
            _edge_planes(after, margin, False, after_kernels),
            margin,
        )
    else:  # detect reports it; a neighbour's edge alone would leave too few pixels to measure
        padded, own_columns = own, None
    own_span = own.x_start, own.x_stop
    if release and own_columns is not None:  # the padded planes are copies
        own = None
        _release_planes(products["image"])
    result = detect(
        padded.image,
        padded.variance,
        padded.mask,
        padded.kernels,
        wcs=padded.wcs,
        x_start=padded.x_start,
        noise_correlation=float(header.get("NOISECOR", 1.0)),
        deconvolved=bool(header.get("DECONV", False)),
        own_columns=own_columns,
        # the padded planes are this function's own float64 copies: detect may reuse them
        overwrite_input=own_columns is not None,
        **options.model_dump(),
    )
    catalog = result.catalog
    catalog["stretch"] = np.full(len(catalog), stretch_index, np.int32)
    catalog["stretch"].info.description = "index of the stretch whose columns hold x"
    catalog.meta["merge_rule"] = MERGE_RULE
    seeing = result.seeing
    seeing["stretch"] = np.full(len(seeing), stretch_index, np.int32)
    seeing["x_start"] = np.full(len(seeing), own_span[0]) * u.pix
    seeing["x_stop"] = np.full(len(seeing), own_span[1]) * u.pix
    seeing.meta.update(seeing_shape=options.seeing_shape, moffat_beta=options.moffat_beta)
    out = {
        "catalog": catalog,
        "seeing": seeing,
        "trails": trail_table(result.trails, padded.x_start, result.trail_reach),
    }
    if result.problems:
        out[PROBLEMS] = list(result.problems)
    return out


def _run(*, inputs, options: DetectOptions, context) -> dict:
    before, after = inputs[NEIGHBOURS]["rectify"]
    # the unit's inputs are its own: the stretch's planes are dropped once padded
    out = detect_stretch(
        inputs["rectify"],
        before,
        after,
        options,
        stretch_index=context.stretch.index,
        release=True,
    )
    # the options ride with the catalogue: astrometry's second pass measures again with them
    out["catalog"].meta["detect_options"] = options.model_dump(mode="json")
    log.info(
        "%s: %d sources, seeing FWHM %.2f px",
        context.stretch.id,
        len(out["catalog"]),
        out["seeing"]["fwhm"][0],
    )
    return out


#: What a worker loads as it starts for detect (``Stage.warm``): the libraries
#: its functions import on first use, the smear-aware model and its compiled
#: kernels, the search's compiled loops (numba's disk cache); photutils without its
#: scan of every installed distribution (:func:`pipeline._imports.import_photutils`).
WARM = (
    "pipeline._imports:import_photutils",
    "scipy.fft",
    "scipy.linalg",
    "scipy.ndimage",
    "scipy.sparse.csgraph",
    "scipy.spatial",
    "photutils.aperture",
    "photutils.utils",
    "photutils.geometry",
    "pipeline.stages.detect._model",
    "pipeline.stages.detect._fit_jit",
    "pipeline.stages.detect._measure_jit",
    "pipeline.stages.detect._pixel_gauss:load_compiled",
    "pipeline.stages.detect._find_jit:load_compiled",
)

#: Declaration of the detect stage for the runner.  Per stretch, with the
#: neighbouring rectified stretches' edge columns (rectified stretches adjoin
#: without overlap), so seam stars are measured whole; the night catalogue is
#: assembled by the ``catalog`` stage (:mod:`pipeline.stages.catalog`).
STAGE = Stage(
    name="detect",
    run=_run,
    options=DetectOptions,
    requires=("rectify",),
    scope="stretch",
    uses=(),
    neighbours=("rectify",),
    warm=WARM,
    # 5: a deconvolved product's noise correlation measured at a star's scale
    # 6: a saturated star is one source, fitted on its unclipped wings
    # 7: only the children of a split segment are flagged BLENDED
    # 8: UNRESOLVED sources the data show to be two are split into a pair
    # 9: smear kernels sampled FWHM / 6 apart with end correction, the last
    #    fit step taken to first order (fluxes move <= 0.04 sigma rms)
    # 10: the seeing refitted before the joint refit with the residual's
    #     sources, and the fits' damping raised after a step that gains less
    #     than a quarter of its prediction (crowded stretches: 85 % of the
    #     fluxes unchanged, 99.4 % within 0.1 sigma; ~0.07 %, in blended
    #     groups whose joint fit ends in another local optimum, by 1-10 sigma)
    # 11: a fit converges at a step under a tenth of a standard error (was a
    #     hundredth), taken to first order (crowded stretch: every flux and
    #     position within 0.1 sigma, rms 0.001-0.003 sigma)
    # 12: a deconvolved product's noise factor measured per band of 64 rows
    #     and put into the variance (products of deconvolved stretches only)
    # 13: a crowded field's seeing from the stars fitted alone when fewer
    #     than SEEING_STARS_CROWDED are far from every other source
    # 14: EDGE for pixels without data in the core only (in the wings alone,
    #     NEAR_FLAGGED): a bad column no longer costs its neighbours' stars
    # 15: the searches' segments cross a bad column's rows (narrow gaps of no
    #     data), and a star whose core they cut is not tested for UNRESOLVED:
    #     a star beside or through a bad column is one source, not two
    #     (products without such gaps unchanged)
    # 16: a column saturated from the stretch's edge on (saturated_columns)
    #     is no data and no footprint: the stars beside it are found one by
    #     one, not merged into one source fitted on nothing (products without
    #     such a column unchanged)
    # 17: the seeing's Moffat index fitted per stretch (refitted with the
    #     seeing when the refit takes other stars) and used in the fits when
    #     3 errors off moffat_beta (seeing table columns beta, beta_fit,
    #     beta_err); the refit tries the 13 grid widths around the first fit's
    #     FWHM instead of all 41
    # 18: a star whose core a saturated column cuts is one source fitted on
    #     the wings beyond it (segments cross the column, the fit starts at the
    #     filter's peak on a stamp widened across it), and a column saturated
    #     through a neighbour that stops just past the seam is a column, not a
    #     star's footprint; and the Moffat index fitted on the seeing stars
    #     without clipped pixels, its walk with a second, finer parabola along
    #     the width at each index and a third walk along the index (both had
    #     pulled it low)
    # 19: a star whose clipped core widens a saturated column (its own bleed,
    #     or a saturated star touching it) is one source at the widening's
    #     centre, SATURATED | EDGE | FIT_FAILED, without flux (column_star_cores)
    # 20: flags, group, stretch and n_stars plain integer columns (they read
    #     back as floats as dimensionless Quantities)
    # 21: catalogue columns mask_near and mask_core, the stretch's mask bits
    #     over each source's fit stamp and its core, which its flags come from
    #     (every other column unchanged)
    # 22: columns psf_scale, psf_scale_err: the stretch's ratio of aperture
    #     psf_scale_aperture's corrected fluxes to PSF fluxes of its bright
    #     isolated unflagged stars (every other column unchanged)
    # 23: flag PARTIAL_EXPOSURE, a star whose core lies in the start-of-scan ramp
    # 24: flag TRAIL, a source on a satellite's trail (long thin segments)
    # 25: the trails found, a product of their own (trails.ecsv)
    # 26: the trails' reach is the FWHM the sources were flagged with (the
    #     last fits'), not the seeing table's first row
    # 27: the seeing's width fitted on its stars without clipped pixels, as the
    #     Moffat index is (saturated ones replaced by the next brightest)
    version=27,
    description="Find sources; measure smear-aware PSF positions and fluxes, apertures, flags.",
)
