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

Importing the package is light: each name is imported from its module on
first use (the coordinate machinery and scipy only when the sky geometry is
needed), so that reading a config, which needs :class:`Site` and
:class:`Camera`, does not load them.
"""

from __future__ import annotations

from pipeline._lazy import lazy_exports

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

__getattr__, __dir__ = lazy_exports(
    __name__,
    {
        "instrument": ["Camera", "Site"],
        "optics": [
            "focal_length_from_spin",
            "normal_gravity",
            "plate_scale",
            "refraction_constant",
            "resolve_focal_length",
            "spin_period_from_focal_length",
        ],
        "plan": ["format_plan", "summarize_plan"],
        "propermotion": ["positions_at_epoch"],
        "sitetime": ["earth_location", "site_pressure", "standard_pressure", "utc_time"],
        "tdi": ["TDIModel", "Track", "TrackShape", "first_order_bow", "first_order_smear"],
        "zenith": ["ZenithAxis"],
    },
)
