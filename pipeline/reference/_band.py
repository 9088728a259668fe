"""The band of sky a zenith TDI night covers."""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from pipeline.catalogs import _select as select_region

__all__ = ["SkyBand", "sky_band_for_night", "sky_band_for_site"]


@dataclass(frozen=True)
class SkyBand:
    """A band of the sky: a declination range and an RA range that may wrap.

    Parameters
    ----------
    dec_min, dec_max : float
        Declination limits, degrees, ``-90 <= dec_min <= dec_max <= 90``.
    ra_min, ra_max : float
        Right-ascension limits in degrees within [0, 360].  ``ra_min > ra_max``
        means the range wraps through RA 0 (e.g. 350 to 10); ``0`` and ``360``
        is the full circle.
    """

    dec_min: float
    dec_max: float
    ra_min: float = 0.0
    ra_max: float = 360.0

    def __post_init__(self) -> None:
        if not -90.0 <= self.dec_min <= self.dec_max <= 90.0:
            raise ValueError(
                f"SkyBand needs -90 <= dec_min <= dec_max <= 90 degrees; got dec_min="
                f"{self.dec_min}, dec_max={self.dec_max}."
            )
        if not (0.0 <= self.ra_min <= 360.0 and 0.0 <= self.ra_max <= 360.0):
            raise ValueError(
                f"SkyBand RA limits must lie in [0, 360] degrees (ra_min > ra_max wraps "
                f"through 0); got ra_min={self.ra_min}, ra_max={self.ra_max}."
            )

    @property
    def full_circle(self) -> bool:
        """True if the band covers every right ascension."""
        return self.ra_min == 0.0 and self.ra_max == 360.0

    @property
    def ra_width(self) -> float:
        """Width of the RA range, degrees (0 to 360)."""
        return (self.ra_max - self.ra_min) % 360.0 or (360.0 if self.full_circle else 0.0)

    def contains(self, ra: np.ndarray, dec: np.ndarray) -> np.ndarray:
        """Boolean mask of positions (degrees) inside the band, limits included."""
        ra_range = None if self.full_circle else (self.ra_min, self.ra_max)
        ra = np.asarray(ra, dtype=float) % 360.0
        return select_region(
            ra, np.asarray(dec, dtype=float), (self.dec_min, self.dec_max), ra_range
        )

    def widened(self, margin: float) -> SkyBand:
        """The band grown by ``margin`` degrees of arc on every side.

        The RA range grows by ``margin / cos(dec)`` at the band's most polar
        declination; it becomes the full circle once it would close, or when
        the band reaches a pole.
        """
        dec_min = max(self.dec_min - margin, -90.0)
        dec_max = min(self.dec_max + margin, 90.0)
        polar = max(abs(dec_min), abs(dec_max))
        if self.full_circle or polar >= 89.999:
            return SkyBand(dec_min, dec_max)
        ra_margin = margin / math.cos(math.radians(polar))
        if self.ra_width + 2.0 * ra_margin >= 360.0:
            return SkyBand(dec_min, dec_max)
        return SkyBand(
            dec_min, dec_max, (self.ra_min - ra_margin) % 360.0, (self.ra_max + ra_margin) % 360.0
        )

    def __str__(self) -> str:
        ra = "all RA" if self.full_circle else f"RA {self.ra_min:.4f} to {self.ra_max:.4f} deg"
        return f"dec {self.dec_min:.4f} to {self.dec_max:.4f} deg, {ra}"


def _search_margin(half_width: float, focal_length_range: float, tilt_range: float) -> float:
    """Degrees to add to a half-width (deg) for the solver's focal-length and tilt search."""
    return half_width * (1.0 / (1.0 - focal_length_range) - 1.0) + tilt_range / 3600.0


def _band(dec_lo: float, dec_hi: float, ra_start: float, ra_span: float, margin: float) -> SkyBand:
    """SkyBand of [dec_lo, dec_hi] x [ra_start, ra_start + ra_span], grown by ``margin`` deg."""
    if ra_span >= 360.0:
        core = SkyBand(max(dec_lo, -90.0), min(dec_hi, 90.0))
    else:
        ra0 = ra_start % 360.0
        core = SkyBand(max(dec_lo, -90.0), min(dec_hi, 90.0), ra0, (ra0 + ra_span) % 360.0)
        if core.ra_min == core.ra_max:  # a span of exactly 0 after rounding
            core = SkyBand(core.dec_min, core.dec_max, ra0, ra0)
    return core.widened(margin)


def sky_band_for_site(
    latitude: float,
    half_width: float,
    ra_start: float,
    ra_end: float,
    *,
    obs_epoch: float = 2000.0,
    focal_length_range: float = 0.03,
    tilt_range: float = 60.0,
    margin: float = 0.0,
) -> SkyBand:
    """The sky band a zenith camera covers, from the site and the night's RA span.

    Parameters
    ----------
    latitude : float
        Site latitude, degrees.
    half_width : float
        Half of the chip's extent on the sky across the scan (and along it),
        degrees.
    ra_start, ra_end : float
        Right ascension of the zenith at the start and end of the night,
        degrees (the local sidereal times); the span runs eastward from
        ``ra_start`` to ``ra_end`` through 360 if needed.  A span of 360 or
        more (``ra_end - ra_start >= 360``) gives the full circle.
    obs_epoch : float, optional
        Julian year of the night.  The zenith's ICRS declination differs from
        the latitude by precession (at most 20.04 arcsec per year from J2000,
        from memory), nutation (9.2 arcsec), aberration (20.5 arcsec) and the
        deflection of the vertical (< 30 arcsec, from memory); the band is
        widened by their sum.  Use :func:`sky_band_for_night` for the exact
        band.
    focal_length_range : float, optional
        Fractional focal-length range the solver searches (default 0.03):
        a shorter focal length shows more sky.
    tilt_range : float, optional
        Tilt of the optical axis the solver searches, arcsec (default 60).
    margin : float, optional
        Further margin on every side, arcsec.

    Returns
    -------
    SkyBand
    """
    if not -90.0 <= latitude <= 90.0:
        raise ValueError(f"latitude must lie in [-90, 90] degrees; got {latitude}.")
    if not half_width > 0:
        raise ValueError(f"half_width must be positive degrees; got {half_width}.")
    frame = abs(obs_epoch - 2000.0) * 20.04 + 9.2 + 20.5 + 30.0  # arcsec, see docstring
    extra = _search_margin(half_width, focal_length_range, tilt_range) + (frame + margin) / 3600.0
    span = (ra_end - ra_start) if ra_end - ra_start >= 360.0 else (ra_end - ra_start) % 360.0
    # the chip reaches half_width beyond the zenith's RA at both ends of the night
    polar = min(abs(latitude) + half_width, 89.999)
    ra_half = half_width / math.cos(math.radians(polar))
    return _band(
        latitude - half_width, latitude + half_width, ra_start - ra_half, span + 2 * ra_half, extra
    )


def sky_band_for_night(
    model: Any,
    *,
    t_start: float | None = None,
    t_end: float | None = None,
    focal_length_range: float = 0.03,
    tilt_range: float = 60.0,
    margin: float = 0.0,
    n_samples: int = 64,
) -> SkyBand:
    """The sky band a TDI night covers, from the exact geometry of the model.

    The chip's outline is mapped to the sky with
    :meth:`~pipeline.geometry.TDIModel.sky_from_focal_plane` at ``n_samples``
    times from ``t_start - crossing time`` (stars recorded in the first rows
    entered the chip then) to ``t_end``; the band spans their declinations
    and the RA from the outline's western edge at the start to its eastern
    edge at the end, then grows by the solver's search range.

    Parameters
    ----------
    model : pipeline.geometry.TDIModel
        The night's geometry.
    t_start, t_end : float or None, optional
        Seconds since ``model.start``; default 0 and ``model.duration``.
    focal_length_range : float, optional
        Fractional focal-length range the solver searches (default 0.03).
    tilt_range : float, optional
        Tilt of the optical axis the solver searches, arcsec (default 60).
    margin : float, optional
        Further margin on every side, arcsec.
    n_samples : int, optional
        Times at which the outline is mapped (declination extremes between
        them differ by < 1 mas for the default over a night).

    Returns
    -------
    SkyBand
    """
    t0 = 0.0 if t_start is None else float(t_start)
    t1 = model.duration if t_end is None else float(t_end)
    if not t1 >= t0:
        raise ValueError(f"t_end ({t1} s) must not precede t_start ({t0} s).")
    n_rows, n_columns = model.n_rows, model.camera.n_columns
    edge = np.linspace(0.0, 1.0, 33)
    u_edge = np.concatenate([edge, np.ones_like(edge), edge[::-1], np.zeros_like(edge)]) * n_rows
    v_edge = np.concatenate([np.zeros_like(edge), edge, np.ones_like(edge), edge[::-1]])
    v_edge = v_edge * n_columns - 0.5
    times = np.linspace(t0 - model.crossing_time, t1, n_samples)
    ra, dec = model.sky_from_focal_plane(u_edge[None, :], v_edge[None, :], times[:, None])
    ra_axis, dec_axis = model.axis_radec(times)
    # RA relative to the axis, unwrapped along the night
    ra_axis_unwrapped = np.degrees(np.unwrap(np.radians(ra_axis)))
    rel = (ra - ra_axis[:, None] + 180.0) % 360.0 - 180.0
    ra_lo = float(np.min(ra_axis_unwrapped[:, None] + rel))
    ra_hi = float(np.max(ra_axis_unwrapped[:, None] + rel))
    dec_lo, dec_hi = float(np.min(dec)), float(np.max(dec))
    half_width = max(float(np.max(np.abs(dec - dec_axis[:, None]))), 1e-6)
    extra = _search_margin(half_width, focal_length_range, tilt_range) + margin / 3600.0
    return _band(dec_lo, dec_hi, ra_lo, ra_hi - ra_lo, extra)
