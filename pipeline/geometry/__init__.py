"""Geometry of a zenith-fixed TDI telescope: site, time, sky <-> strip, optics."""

from pipeline.geometry.instrument import Camera, Site

__all__ = ["Camera", "Site"]
