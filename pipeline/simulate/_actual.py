"""The night as it really was, where it differs from what the config describes.

Private helpers of :mod:`pipeline.simulate`.  The ``simulate.actual`` options
hold the true values of quantities the reduction config gets wrong (the clock,
the focal length, the camera's rotation, the optical axis, the distortion) and
a slow image wander that no config describes.  The simulator renders the sky
with the true instrument and writes headers with what the config implies, so
later stages can be tested "without the config knowing".
"""

from __future__ import annotations

import dataclasses

import numpy as np
from pydantic import BaseModel, ConfigDict, Field

from pipeline.geometry.instrument import Camera, Site
from pipeline.geometry.optics import ARCSEC_PER_RADIAN, resolve_focal_length
from pipeline.geometry.tdi import TDIModel

__all__ = [
    "ActualOptions",
    "FlatErrorOptions",
    "WanderOptions",
    "WanderingTDIModel",
    "true_camera",
]


class _Options(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class WanderOptions(_Options):
    """A sinusoidal wander of the whole image on the detector along the night.

    At time ``t`` (seconds since row 0 of block 0 was really read) every image
    is displaced by ``along_amplitude * sin(2 pi t / period + along_phase)``
    along the scan (towards increasing detector row, the drift direction, which
    puts the star at a smaller strip row) and ``across_amplitude * sin(2 pi t /
    period + across_phase)`` across it (towards increasing column).  Amplitudes
    are angles on the focal plane in arcseconds, i.e. ``amplitude /
    geometric_pixel_scale`` pixels.
    """

    along_amplitude: float = Field(0.0, ge=0, description="arcsec, along the scan")
    across_amplitude: float = Field(0.0, ge=0, description="arcsec, across the scan")
    period: float = Field(600.0, gt=0, description="seconds")
    along_phase: float = Field(0.0, description="degrees")
    across_phase: float = Field(0.0, description="degrees")

    @property
    def active(self) -> bool:
        """Whether the image moves at all."""
        return self.along_amplitude > 0 or self.across_amplitude > 0

    def offsets(self, t: np.ndarray, pixel_angle: float) -> tuple[np.ndarray, np.ndarray]:
        """Detector (row, column) displacement in pixels at times ``t`` (seconds).

        ``pixel_angle`` is the focal-plane angle of a pixel in radians.
        """
        omega_t = 2.0 * np.pi * np.asarray(t, dtype=float) / self.period
        per_arcsec = 1.0 / (pixel_angle * ARCSEC_PER_RADIAN)
        du = self.along_amplitude * per_arcsec * np.sin(omega_t + np.radians(self.along_phase))
        dv = self.across_amplitude * per_arcsec * np.sin(omega_t + np.radians(self.across_phase))
        return du, dv


class FlatErrorOptions(_Options):
    """Star light lost in a band of columns where the sky's flat shows nothing.

    The calibrate stage solves the 1-D flat from the night's sky, so it
    corrects whatever dims sky and stars alike.  Here the stars' light (and
    satellite trails') in columns ``[first_column, first_column + columns)``
    is reduced by the fraction ``error`` while the sky is not: the flat
    derived from the sky is wrong there for point sources by ``error``, as
    when scattered light or a ghost brightens the sky in a band of columns
    (an illumination error that only a star flat reveals; common practice).
    Columns are image columns as simulated (before ``flip_columns``).
    """

    first_column: int = Field(0, ge=0, description="first image column of the band")
    columns: int = Field(0, ge=0, description="columns in the band (0: no error)")
    error: float = Field(0.0, gt=-1.0, lt=1.0, description="fraction of star light lost")

    @property
    def active(self) -> bool:
        """Whether any star light is lost."""
        return self.columns > 0 and self.error != 0.0

    def star_response(self, n_columns: int) -> np.ndarray:
        """Factor on point-source light of every image column (1 outside the band)."""
        factor = np.ones(n_columns)
        factor[self.first_column : self.first_column + self.columns] -= self.error
        return factor


class ActualOptions(_Options):
    """True values where the night differs from the config (``simulate.actual``).

    Every default leaves the night as the config describes it.
    """

    clock_offset: float = Field(
        0.0, description="seconds the headers' times are ahead of the true times"
    )
    focal_length_scale: float = Field(
        1.0, gt=0.5, lt=2.0, description="true focal length / the config's"
    )
    rotation_offset: float = Field(
        0.0, gt=-5.0, lt=5.0, description="true camera rotation minus the config's, degrees"
    )
    tilt_east_offset: float = Field(
        0.0, description="true axis tilt east minus the config's, arcsec"
    )
    tilt_north_offset: float = Field(
        0.0, description="true axis tilt north minus the config's, arcsec"
    )
    distortion_k1_offset: float = Field(
        0.0, description="true radial distortion k1 minus the config's, rad^-2"
    )
    wander: WanderOptions = Field(default_factory=WanderOptions)
    flat_error: FlatErrorOptions = Field(default_factory=FlatErrorOptions)

    @property
    def changes_camera(self) -> bool:
        """Whether the true camera differs from the config's."""
        return (
            self.focal_length_scale != 1.0
            or self.rotation_offset != 0.0
            or self.tilt_east_offset != 0.0
            or self.tilt_north_offset != 0.0
            or self.distortion_k1_offset != 0.0
        )

    @property
    def active(self) -> bool:
        """Whether the geometry or the clock differs from the config.

        ``flat_error`` is left out: it changes no geometry, and the truth
        records it with the photometry (``truth.meta['photometry']``).
        """
        return self.changes_camera or self.clock_offset != 0.0 or self.wander.active


def true_camera(site: Site, camera: Camera, actual: ActualOptions) -> Camera:
    """The camera as it really is: the config's camera with ``actual`` applied.

    Parameters
    ----------
    site : Site
        The site (gravity for a focal length given by a spin period).
    camera : Camera
        The camera the config describes.
    actual : ActualOptions
        The true differences.

    Returns
    -------
    Camera
        ``camera`` itself if nothing differs; else a copy with the true focal
        length (metres, even if the config gives a spin period), rotation,
        tilts and distortion.
    """
    if not actual.changes_camera:
        return camera
    focal = resolve_focal_length(site, camera) * actual.focal_length_scale
    return dataclasses.replace(
        camera,
        focal_length=focal,
        spin_period=None,
        rotation=camera.rotation + actual.rotation_offset,
        tilt_east=camera.tilt_east + actual.tilt_east_offset,
        tilt_north=camera.tilt_north + actual.tilt_north_offset,
        distortion_k1=camera.distortion_k1 + actual.distortion_k1_offset,
    )


class WanderingTDIModel(TDIModel):
    """A :class:`TDIModel` whose images wander on the detector along the night.

    Everything that goes through :meth:`focal_plane` (crossings, tracks,
    recorded centroids, strip positions) sees the displaced images; the inverse
    maps (:meth:`sky_from_focal_plane`) do not.  Give ``line_time``: the drift
    rate measured by the base class would include the wander's motion.

    Parameters
    ----------
    *args, **kwargs
        As for :class:`TDIModel`.
    wander : WanderOptions
        The displacement along the night.
    """

    def __init__(self, *args, wander: WanderOptions, **kwargs) -> None:
        self.wander = wander
        super().__init__(*args, **kwargs)

    def focal_plane(self, ra, dec, t):
        """Detector coordinates of stars at times ``t``, wander included (pixels)."""
        u, v = super().focal_plane(ra, dec, t)
        du, dv = self.wander.offsets(t, self.pixel_angle)
        return u + du, v + dv


def actual_record(model: TDIModel, header_start: str, actual: ActualOptions) -> dict:
    """The true instrument and clock of a night, for its truth table's meta.

    Parameters
    ----------
    model : TDIModel
        The true geometry the night was rendered with.
    header_start : str
        The time the headers give row 0 of block 0 (ISO 8601 UTC).
    actual : ActualOptions
        The differences from the config.

    Returns
    -------
    dict
        ``start_header`` and ``start`` (true) ISO times, the differences
        (``clock_offset`` s, ``focal_length_scale``, ``rotation_offset`` deg,
        ``tilt_*_offset`` arcsec, ``distortion_k1_offset`` rad^-2, ``wander``)
        and the true values they give: ``focal_length`` (m), ``pixel_scale``
        (on-sky arcsec/px), ``geometric_pixel_scale`` (arcsec/px),
        ``rotation`` (deg), ``tilt_east``, ``tilt_north`` (arcsec),
        ``distortion_k1`` (rad^-2) and ``line_time`` (s).
    """
    camera = model.camera
    return {
        "start_header": header_start,
        "start": model.start.isot,
        **actual.model_dump(mode="json"),
        "focal_length": float(model.focal_length),
        "pixel_scale": float(model.pixel_scale),
        "geometric_pixel_scale": float(model.geometric_pixel_scale),
        "rotation": float(camera.rotation),
        "tilt_east": float(camera.tilt_east),
        "tilt_north": float(camera.tilt_north),
        "distortion_k1": float(camera.distortion_k1),
        "line_time": float(model.line_time),
    }
