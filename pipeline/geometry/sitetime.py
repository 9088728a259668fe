"""Site location, atmosphere and offline-safe time handling.

The geometry's entry points (:func:`utc_time`, :func:`offline_astropy_warnings`,
through which every astropy transform of the zenith model runs) keep astropy
offline while they compute (:func:`pipeline._offline.astropy_offline`): it
uses the IERS Earth-orientation tables bundled with ``astropy-iers-data`` and
never downloads; the caller's settings are restored afterwards.  Past the end of those tables
astropy extrapolates UT1-UTC and falls back to mean polar motion, and ERFA flags
"dubious years" past its leap-second knowledge; it says so with its own
warnings.  :func:`offline_astropy_warnings` turns those into one
:class:`~pipeline.exceptions.GeometryWarning` naming the table's end, so a
reduction of data taken after the package was built still runs (with sky
positions good to about a second of time in right ascension, which the
astrometry stage's clock offset absorbs).
"""

from __future__ import annotations

import contextlib
import logging
import warnings
from collections.abc import Iterator
from typing import TYPE_CHECKING

import numpy as np
from erfa import ErfaWarning
from numpy.typing import ArrayLike

from pipeline._offline import astropy_offline
from pipeline.exceptions import GeometryWarning
from pipeline.geometry.instrument import Site

if TYPE_CHECKING:
    from astropy.coordinates import AltAz, EarthLocation
    from astropy.time import Time

__all__ = [
    "altaz_frame",
    "earth_location",
    "iers_table_end",
    "offline_astropy_warnings",
    "site_pressure",
    "standard_pressure",
    "times_since",
    "utc_time",
]

log = logging.getLogger(__name__)


def earth_location(site: Site) -> EarthLocation:
    """The site as an astropy :class:`~astropy.coordinates.EarthLocation` (WGS84)."""
    import astropy.units as u
    from astropy.coordinates import EarthLocation

    return EarthLocation.from_geodetic(
        lon=site.longitude * u.deg, lat=site.latitude * u.deg, height=site.height * u.m
    )


def standard_pressure(height_m: ArrayLike) -> np.ndarray:
    """Pressure of the standard atmosphere at a height, hPa.

    ``P = 1013.25 (1 - 2.25577e-5 h)^5.25588`` hPa, the troposphere of the
    ICAO/ISO 2533 standard atmosphere (common practice; valid below 11 km).

    Parameters
    ----------
    height_m : array_like
        Height above sea level in metres.

    Returns
    -------
    pressure : ndarray
        hPa.
    """
    return 1013.25 * (1.0 - 2.25577e-5 * np.asarray(height_m, dtype=float)) ** 5.25588


def site_pressure(site: Site) -> float:
    """The air pressure used for refraction at a site, hPa.

    ``site.pressure`` if given (0 switches refraction off), else the
    standard-atmosphere pressure at ``site.height``.
    """
    if site.pressure is None:
        return float(standard_pressure(site.height))
    if site.pressure < 0:
        raise ValueError(
            f"site.pressure must be >= 0 hPa (0 = no refraction) or None; got {site.pressure}."
        )
    return float(site.pressure)


def altaz_frame(site: Site, obstime: Time) -> AltAz:
    """The observed (refracted) horizontal frame of the site at ``obstime``.

    Carries the site's pressure, temperature, relative humidity and effective
    wavelength, so that astropy/ERFA apply refraction as well as aberration.
    """
    import astropy.units as u
    from astropy.coordinates import AltAz

    return AltAz(
        obstime=obstime,
        location=earth_location(site),
        pressure=site_pressure(site) * u.hPa,
        temperature=site.temperature * u.deg_C,
        relative_humidity=site.relative_humidity,
        obswl=site.wavelength * u.micron,
    )


def times_since(start: Time, seconds: ArrayLike) -> Time:
    """Absolute times ``start + seconds`` (elapsed SI seconds, leap seconds counted)."""
    from astropy.time import TimeDelta

    return start + TimeDelta(np.asarray(seconds, dtype=float), format="sec")


def utc_time(value: str | float | Time, format: str | None = None) -> Time:
    """A UTC :class:`~astropy.time.Time`, with ERFA's "dubious year" as a GeometryWarning.

    Parameters
    ----------
    value : str, float or Time
        E.g. an ISO 8601 DATE-OBS string.
    format : str or None, optional
        Astropy time format (guessed when None).
    """
    from astropy.time import Time

    with offline_astropy_warnings("The time " + repr(value)):
        return Time(value, format=format, scale="utc")


def iers_table_end() -> Time:
    """Last date covered by the bundled IERS Earth-orientation table (incl. predictions)."""
    from astropy.time import Time
    from astropy.utils import iers

    with astropy_offline():
        table = iers.earth_orientation_table.get()
    return Time(float(table["MJD"][-1].value), format="mjd", scale="utc")


@contextlib.contextmanager
def offline_astropy_warnings(what: str = "the sky geometry") -> Iterator[None]:
    """Collect astropy's IERS/ERFA accuracy warnings into one ``GeometryWarning``.

    Inside the block, astropy and ERFA warnings (IERS table exceeded, polar
    motion defaulted, dubious year) are recorded; on exit one
    :class:`~pipeline.exceptions.GeometryWarning` summarises them.  Any other
    warning is re-issued unchanged.

    Parameters
    ----------
    what : str
        What is being computed, for the message.
    """
    from astropy.utils.exceptions import (
        AstropyDeprecationWarning,
        AstropyPendingDeprecationWarning,
        AstropyWarning,
    )

    with warnings.catch_warnings(record=True) as caught, astropy_offline():
        warnings.simplefilter("always")
        yield
    astropy_messages: list[str] = []
    for item in caught:
        deprecation = issubclass(
            item.category, AstropyDeprecationWarning | AstropyPendingDeprecationWarning
        )
        if issubclass(item.category, AstropyWarning | ErfaWarning) and not deprecation:
            text = str(item.message).split(". ")[0]
            if text not in astropy_messages:
                astropy_messages.append(text)
        else:
            warnings.warn_explicit(item.message, item.category, item.filename, item.lineno)
    if astropy_messages:
        end = iers_table_end().iso[:10]
        message = (
            f"{what} involves times past astropy's bundled Earth-orientation data "
            f"(IERS table ends {end}); UT1-UTC and polar motion are extrapolated, so sky "
            "positions may be off by up to ~1 s of time in right ascension and ~0.3 arcsec "
            "(update the astropy-iers-data package to fix). astropy/ERFA said: "
            + "; ".join(astropy_messages)
        )
        log.info(message)
        warnings.warn(message, GeometryWarning, stacklevel=3)
