"""Zero point: the night's photometric calibration along time.

The stage itself (matched reference stars in, calibrated catalogues and
images out) joins once astrometry provides the matches; this package holds
its pure functions:

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

__all__ = [
    "ZeroPointFit",
    "ZeroPointFlag",
    "clear_level",
    "fit_zero_point",
    "interval_quality",
    "scale_to_zero_point",
    "star_flat",
]
