"""Optics of a zenith telescope: gravity, liquid-mirror focal length, plate scale.

A liquid spinning at angular speed w (relative to the ground) takes the shape
of a paraboloid of focal length ``f = g / (2 w**2)`` (Borra et al., SPIE 1236,
653, eq. 1), where ``g`` is the local effective gravity.  We take ``g`` as the
WGS84 normal gravity at the site's latitude and height, which already contains
the centrifugal term of the Earth's rotation.

The functions here are small, pure and vectorised over NumPy arrays.
"""

from __future__ import annotations

import erfa
import numpy as np
from numpy.typing import ArrayLike

from pipeline.geometry.instrument import Camera, Site

__all__ = [
    "ARCSEC_PER_RADIAN",
    "EARTH_ROTATION_RATE",
    "GRAVITY_EQUATOR",
    "GRAVITY_POLE",
    "focal_length_from_spin",
    "normal_gravity",
    "plate_scale",
    "refraction_constant",
    "resolve_focal_length",
    "spin_period_from_focal_length",
]

#: Arcseconds in one radian (exact: 648000 / pi).
ARCSEC_PER_RADIAN = 648000.0 / np.pi

#: Earth's rotation rate relative to the stars in rad per UT1 second, from the
#: Earth rotation angle of the IERS Conventions 2010:
#: 2 pi * 1.00273781191135448 / 86400.
EARTH_ROTATION_RATE = 2.0 * np.pi * 1.00273781191135448 / 86400.0

# WGS84 normal-gravity constants (NIMA TR8350.2, 3rd edition).
#: Normal gravity at the equator, m/s^2.
GRAVITY_EQUATOR = 9.7803253359
#: Normal gravity at the poles, m/s^2.
GRAVITY_POLE = 9.8321849378
_SOMIGLIANA_K = 0.00193185265241
_WGS84_E2 = 0.00669437999013
_WGS84_A = 6378137.0
_WGS84_F = 1.0 / 298.257223563
_WGS84_M = 0.00344978650684


def normal_gravity(latitude_deg: ArrayLike, height_m: ArrayLike = 0.0) -> np.ndarray:
    """WGS84 normal gravity at a geodetic latitude and ellipsoidal height.

    Somigliana's closed formula on the ellipsoid with the second-order height
    expansion of NIMA TR8350.2::

        g0 = g_e (1 + k sin^2 phi) / sqrt(1 - e^2 sin^2 phi)
        g  = g0 [1 - (2/a)(1 + f + m - 2 f sin^2 phi) h + 3 h^2 / a^2]

    Parameters
    ----------
    latitude_deg : array_like
        Geodetic latitude in degrees.
    height_m : array_like, optional
        Height above the WGS84 ellipsoid in metres (valid for the few km of
        observatory heights).

    Returns
    -------
    gravity : ndarray
        Normal gravity in m/s^2, broadcast shape of the inputs.
    """
    s2 = np.sin(np.radians(latitude_deg)) ** 2
    h = np.asarray(height_m, dtype=float)
    g0 = GRAVITY_EQUATOR * (1.0 + _SOMIGLIANA_K * s2) / np.sqrt(1.0 - _WGS84_E2 * s2)
    height_factor = (
        1.0
        - (2.0 / _WGS84_A) * (1.0 + _WGS84_F + _WGS84_M - 2.0 * _WGS84_F * s2) * h
        + 3.0 * h**2 / _WGS84_A**2
    )
    return g0 * height_factor


def focal_length_from_spin(spin_period_s: ArrayLike, gravity: ArrayLike) -> np.ndarray:
    """Focal length of a liquid mirror, ``f = g / (2 w^2)`` with ``w = 2 pi / T``.

    Parameters
    ----------
    spin_period_s : array_like
        Rotation period of the mirror relative to the ground, seconds.
    gravity : array_like
        Local effective gravity in m/s^2 (see :func:`normal_gravity`).

    Returns
    -------
    focal_length : ndarray
        Focal length in metres.
    """
    period = np.asarray(spin_period_s, dtype=float)
    if np.any(period <= 0):
        raise ValueError(f"spin_period_s must be positive seconds; got {spin_period_s!r}.")
    w = 2.0 * np.pi / period
    return np.asarray(gravity, dtype=float) / (2.0 * w**2)


def spin_period_from_focal_length(focal_length_m: ArrayLike, gravity: ArrayLike) -> np.ndarray:
    """Spin period that gives a liquid mirror the focal length ``f``.

    Inverse of :func:`focal_length_from_spin`: ``w = sqrt(g / (2 f))``,
    ``T = 2 pi / w``.

    Parameters
    ----------
    focal_length_m : array_like
        Focal length in metres.
    gravity : array_like
        Local effective gravity in m/s^2.

    Returns
    -------
    spin_period : ndarray
        Rotation period in seconds.
    """
    f = np.asarray(focal_length_m, dtype=float)
    if np.any(f <= 0):
        raise ValueError(f"focal_length_m must be positive metres; got {focal_length_m!r}.")
    w = np.sqrt(np.asarray(gravity, dtype=float) / (2.0 * f))
    return 2.0 * np.pi / w


def plate_scale(pixel_size_um: ArrayLike, focal_length_m: ArrayLike) -> np.ndarray:
    """Geometric plate scale at the optical axis, arcsec per pixel.

    ``pixel_size / focal_length`` radians, converted to arcseconds.  This is
    the scale before atmospheric refraction and aberration (which change the
    on-sky scale by a few parts in 10^4; see
    :attr:`pipeline.geometry.tdi.TDIModel.pixel_scale`).

    Parameters
    ----------
    pixel_size_um : array_like
        Pixel pitch in micrometres.
    focal_length_m : array_like
        Focal length in metres.

    Returns
    -------
    scale : ndarray
        Arcseconds per pixel.
    """
    return (
        np.asarray(pixel_size_um, dtype=float)
        * 1e-6
        / np.asarray(focal_length_m, dtype=float)
        * ARCSEC_PER_RADIAN
    )


def resolve_focal_length(site: Site, camera: Camera) -> float:
    """The camera's focal length in metres.

    ``camera.focal_length`` if given, else the liquid-mirror focal length for
    ``camera.spin_period`` at the site's normal gravity.

    Parameters
    ----------
    site : Site
        The observing site (latitude and height set the gravity).
    camera : Camera
        The camera (``focal_length`` or ``spin_period``).

    Returns
    -------
    focal_length : float
        Metres.
    """
    if camera.focal_length is not None:
        if camera.focal_length <= 0:
            raise ValueError(
                f"camera.focal_length must be positive metres; got {camera.focal_length}."
            )
        return float(camera.focal_length)
    gravity = normal_gravity(site.latitude, site.height)
    return float(focal_length_from_spin(camera.spin_period, gravity))


def refraction_constant(
    pressure_hpa: ArrayLike,
    temperature_c: ArrayLike,
    relative_humidity: ArrayLike = 0.0,
    wavelength_um: ArrayLike = 0.55,
) -> np.ndarray:
    """Refraction constant near the zenith from ERFA's model, in radians.

    Refraction is ``R = A tan z + B tan^3 z`` with ERFA's constants ``A`` and
    ``B`` (``erfa.refco``, the model astropy's AltAz frame applies); near the
    zenith ``B tan^3 z`` is negligible and ``A`` is a uniform radial
    compression of gnomonic coordinates about the zenith by the factor
    ``1 - A``: about 282e-6 at 1013.25 hPa, 10 C, dry air.

    Parameters
    ----------
    pressure_hpa : array_like
        Air pressure in hPa (0 for no refraction).
    temperature_c : array_like
        Air temperature in degrees Celsius.
    relative_humidity : array_like, optional
        0 to 1; default dry air.
    wavelength_um : array_like, optional
        Effective wavelength in micrometres; default 0.55 (visual light).

    Returns
    -------
    k : ndarray
        Refraction constant ``A`` in radians (dimensionless scale compression).
    """
    refa, _ = erfa.refco(
        np.asarray(pressure_hpa, dtype=float),
        np.asarray(temperature_c, dtype=float),
        np.asarray(relative_humidity, dtype=float),
        np.asarray(wavelength_um, dtype=float),
    )
    return np.asarray(refa)
