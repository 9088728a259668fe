"""Geometry of a zenith-fixed TDI telescope: site, time, sky <-> strip, optics.

* :mod:`~pipeline.geometry.instrument`: the :class:`Site` and :class:`Camera`
  descriptions (the contract with the configuration).
* :mod:`~pipeline.geometry.optics`: normal gravity, liquid-mirror focal length,
  plate scale, refraction constant.
* :mod:`~pipeline.geometry.sitetime`: EarthLocation, atmosphere, offline-safe
  times.
* :mod:`~pipeline.geometry.zenith`: the optical axis and the ICRS <->
  focal-plane map (the only place astropy coordinate transforms run).
* :mod:`~pipeline.geometry.tdi`: :class:`TDIModel`, sky <-> detector <-> strip,
  crossing windows, tracks (smear kernels), recorded centroids.
* :mod:`~pipeline.geometry.propermotion`: catalogue positions at the epoch.
* :mod:`~pipeline.geometry.plan`: what a site and camera imply.
"""

from pipeline.geometry.instrument import Camera, Site
from pipeline.geometry.optics import (
    focal_length_from_spin,
    normal_gravity,
    plate_scale,
    refraction_constant,
    resolve_focal_length,
    spin_period_from_focal_length,
)
from pipeline.geometry.plan import format_plan, summarize_plan
from pipeline.geometry.propermotion import positions_at_epoch
from pipeline.geometry.sitetime import (
    earth_location,
    site_pressure,
    standard_pressure,
    utc_time,
)
from pipeline.geometry.tdi import (
    TDIModel,
    Track,
    TrackShape,
    first_order_bow,
    first_order_smear,
)
from pipeline.geometry.zenith import ZenithAxis

__all__ = [
    "Camera",
    "Site",
    "TDIModel",
    "Track",
    "TrackShape",
    "ZenithAxis",
    "earth_location",
    "first_order_bow",
    "first_order_smear",
    "focal_length_from_spin",
    "format_plan",
    "normal_gravity",
    "plate_scale",
    "positions_at_epoch",
    "refraction_constant",
    "resolve_focal_length",
    "site_pressure",
    "spin_period_from_focal_length",
    "standard_pressure",
    "summarize_plan",
    "utc_time",
]
