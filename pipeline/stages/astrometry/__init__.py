"""Astrometry: a physical model of the night fitted to a reference catalogue.

A zenith telescope cannot point, so where it looked follows from the site, the
clock and the camera.  This package predicts where reference stars are
recorded, matches them to the detect stage's catalogue, and fits one
geometry per night (clock offset, line-time scale, focal length, camera
rotation, axis tilt, radial distortion) plus a smooth image wander along the
night.

* :mod:`~pipeline.stages.astrometry._model`: fast recorded centroids for any
  geometry near the nominal one (:class:`GeometryPredictor`), checked against
  full :class:`~pipeline.geometry.TDIModel` rebuilds to 1e-5 px.
* :mod:`~pipeline.stages.astrometry._match`: KD-tree pairs and the
  pattern-free offset histogram of the search.
* :mod:`~pipeline.stages.astrometry._fit`: robust Gauss-Newton fit with
  covariance and the wander spline; the clock/east-tilt degeneracy.
* :mod:`~pipeline.stages.astrometry._segments`: the night's segments
  (:class:`NightSegments`, from ingest's block index): each after the first
  gets a clock offset of its own, since its first DATE-OBS may be off.
* :mod:`~pipeline.stages.astrometry._solve`: :func:`solve_night` and
  :class:`AstrometricSolution` (solved sky positions, predictions, grid
  statistics, implied focal length and matched line time).
* :mod:`~pipeline.stages.astrometry._stats`: :func:`residual_grid`.
* :mod:`~pipeline.stages.astrometry._transparency`: :func:`fit_transparency`,
  the sky's transparency within the crossings from the matched stars' fluxes;
  under a cloud the predictor weights each track by it (light-weighted
  centroids).
* :mod:`~pipeline.stages.astrometry._second_pass`: :func:`solved_kernels`,
  rectify's smear kernels redone with a solved geometry's tracks, and the
  threshold (kernel change against the bright stars' centroid noise) at
  which the stage has detect measure the night again with them.
* :mod:`~pipeline.stages.astrometry._wcs`: :func:`solved_wcs`, a TAN-SIP
  WCS per product that reproduces the solution (2e-6 px on the test chip).
* :mod:`~pipeline.stages.astrometry._catalog`: :func:`solve_catalog`, the
  table layer (detect's catalogue in, solved catalogue and parameter table
  out) with its :class:`AstrometryOptions`.
* :mod:`~pipeline.stages.astrometry._stage`: the night-scoped ``astrometry``
  stage (``STAGE``): nominal geometry as rectify built it, reference stars
  read in chunks, the solved catalogue with the matched stars' ``ref_mag``
  and ``ref_colour``, and a solved WCS per rectified stretch.

Coordinates: detections come as night rectified pixels ``(x, y)`` (``x``
along the scan) of the rectify stage's :class:`~pipeline.geometry.rectified.RectifiedFrame`;
internally every position is a strip ``(row, column)`` through the nominal
geometry, where rectify took the pixel from, so matching and fitting never
invert the map.
"""

from pipeline.stages.astrometry._catalog import (
    AstrometryOptions,
    SolvedCatalog,
    light_weighting_fits_better,
    solve_catalog,
)
from pipeline.stages.astrometry._fit import (
    FIT_PARAMETERS,
    GeometryFit,
    WanderSpline,
    error_floor,
    fit_geometry,
)
from pipeline.stages.astrometry._match import OffsetPeak, match_nearest, offset_peak
from pipeline.stages.astrometry._model import (
    GeometryOffsets,
    GeometryPredictor,
    PredictedCentroids,
    SkyTracks,
    east_tilt_equivalent,
    sky_tracks,
)
from pipeline.stages.astrometry._second_pass import (
    centroid_noise,
    kernel_change,
    solved_kernels,
)
from pipeline.stages.astrometry._segments import NightSegments, segment_clock_records
from pipeline.stages.astrometry._solve import (
    AstrometricSolution,
    SearchRanges,
    search_geometry,
    solve_night,
)
from pipeline.stages.astrometry._stage import (
    STAGE,
    AstrometryStageOptions,
    reference_columns,
    stretch_wcs_cards,
)
from pipeline.stages.astrometry._stats import residual_grid
from pipeline.stages.astrometry._transparency import TransparencyCurve, fit_transparency
from pipeline.stages.astrometry._wcs import solved_wcs

__all__ = [
    "FIT_PARAMETERS",
    "STAGE",
    "AstrometricSolution",
    "AstrometryOptions",
    "AstrometryStageOptions",
    "GeometryFit",
    "GeometryOffsets",
    "GeometryPredictor",
    "NightSegments",
    "OffsetPeak",
    "PredictedCentroids",
    "SearchRanges",
    "SkyTracks",
    "SolvedCatalog",
    "TransparencyCurve",
    "WanderSpline",
    "centroid_noise",
    "east_tilt_equivalent",
    "error_floor",
    "fit_geometry",
    "fit_transparency",
    "kernel_change",
    "light_weighting_fits_better",
    "match_nearest",
    "offset_peak",
    "reference_columns",
    "residual_grid",
    "search_geometry",
    "segment_clock_records",
    "sky_tracks",
    "solve_catalog",
    "solve_night",
    "solved_kernels",
    "solved_wcs",
    "stretch_wcs_cards",
]
