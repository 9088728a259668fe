"""Zero point: the night's photometric calibration along time.

The stage (:mod:`._stage`, :func:`calibrate_catalog`) takes astrometry's
catalogue of matched reference stars and returns the calibrated catalogue,
the zero point along the night, each stretch's verdict and the star flat;
the ``science`` stage scales the images to one fixed zero point.  Its pure
functions:

* :func:`fit_zero_point` (:mod:`._fit`): ``Z(t)`` as a smooth spline in time
  plus an optional colour term, robust to variable and mismatched stars.
* :func:`interval_quality`, :func:`star_flat`, :func:`scale_to_zero_point`
  (:mod:`._quality`): clouds and thin stretches flagged, the flat field
  checked with the stars, images brought to one fixed zero point.
"""

from pipeline.stages.zeropoint._fit import ZeroPointFit, fit_zero_point
from pipeline.stages.zeropoint._quality import (
    ZeroPointFlag,
    clear_level,
    interval_quality,
    scale_to_zero_point,
    star_flat,
)
from pipeline.stages.zeropoint._stage import (
    STAGE,
    CalibratedNight,
    ZeroPointOptions,
    calibrate_catalog,
    column_times,
    night_line_time,
    psf_scale_shifts,
    source_exposures,
)

__all__ = [
    "STAGE",
    "CalibratedNight",
    "ZeroPointFit",
    "ZeroPointFlag",
    "ZeroPointOptions",
    "calibrate_catalog",
    "clear_level",
    "column_times",
    "fit_zero_point",
    "interval_quality",
    "night_line_time",
    "psf_scale_shifts",
    "scale_to_zero_point",
    "source_exposures",
    "star_flat",
]
