"""The rectified frame: the output pixel grid of the rectify stage for a night.

Rows of the rectified image are circles of constant declination *of date*
and its columns are lines of constant right ascension of date, so a star's
track, which follows a circle of declination, runs straight along a row.

Frame of date
-------------
The celestial intermediate reference system at the night's mid-time: the
pole is the CIP and right ascension is counted from the CIO (IAU 2006/2000A,
:func:`erfa.c2i06a`).  Only the rotation is used (no aberration, no light
deflection), so the frame is an exact rotation of ICRS and the product's WCS
is an exact ICRS WCS.  "Right ascension of date" below means this CIO-based
intermediate right ascension; it advances at exactly the Earth rotation
angle rate, so a star's transit time is linear in it.

Pixel grid
----------
Zero-based pixel ``(x, y)`` (numpy ``image[y, x]``; FITS pixel
``(x + 1, y + 1)``):

* ``x`` (NAXIS1) runs along the scan, ``ra_date = ra_origin + x * cdelt1``.
  ``cdelt1`` is the right ascension the sky turns through in one line time,
  so one rectified column is one strip row and ``x`` of a star equals, to
  within a constant offset, the strip row of its recorded centroid.  At the
  chip's centre line this makes square pixels when the line time matches the
  drift.  **East is to the right** (RA grows with ``x``), the mirror image of
  the usual sky display with north up.
* ``y`` (NAXIS2) runs across the scan, ``dec_date = dec_origin + y * cdelt2``,
  north up.  ``cdelt2`` defaults to the camera's on-sky pixel scale.

The grid is global for the night, so stretches tile it.  At mid-night ``x``
equals the night row number at the chip's centre line; elsewhere the two
drift apart slowly (by up to ~20 arcsec over a night) because the frame is a
rotation of ICRS while the strip follows apparent places, which annual
aberration displaces by an amount that changes as the zenith sweeps the sky.
For the same reason the strip wanders slowly across the rows (``y``);
:meth:`RectifiedFrame.for_night` sizes ``n_y`` for the whole night and
:meth:`RectifiedFrame.column_of_row` gives the column seen at a night row.

FITS WCS
--------
A plate-carree (``CAR``) projection whose native pole is the pole of date
(Calabretta & Greisen 2002, A&A 395, 1077, "Paper II"): the native longitude
is ``ra_date - ra_ref`` and the native latitude ``dec_date``.  ``CRVAL`` holds
the ICRS coordinates of the point ``(ra_date, dec_date) = (ra_ref, 0)`` (the
reference point of ``CAR`` lies on the native equator), ``LONPOLE`` the
native longitude of the ICRS pole and ``LATPOLE`` the ICRS latitude of the
native pole (which equals the native latitude of the ICRS pole).  The frame's
epoch is the header's time origin, ``DATEREF``/``MJDREF`` (``TIMESYS =
'UTC'``; Rots et al. 2015, A&A 574, A36).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import erfa
import numpy as np
from numpy.typing import ArrayLike

from pipeline.geometry.optics import EARTH_ROTATION_RATE

if TYPE_CHECKING:
    from astropy.io import fits
    from astropy.time import Time
    from astropy.wcs import WCS

__all__ = ["RectifiedFrame", "column_times", "frame_of_date_matrix"]

_DEG = np.pi / 180.0


def column_times(x: ArrayLike, line_time: float, tdi_rows: int) -> np.ndarray:
    """Mid-crossing time of a star in rectified column ``x``, seconds.

    Counted from the read-out of night row 0.  One rectified column is one
    line time and ``x`` equals the night row of a star's recorded centroid
    to within the slow drift described in the module docstring (a few line
    times); the centroid is read out ``tdi_rows / 2`` line times after the
    middle of the crossing (:meth:`pipeline.geometry.tdi.TDIModel.recorded_centroid`),
    so ``t = (x - tdi_rows / 2) * line_time``.  The one map from columns to
    times for every stage (astrometry's track windows, the zero point along
    the night, the science images' zero point per column).

    Parameters
    ----------
    x : array_like
        Rectified (night) columns, pixels.
    line_time : float
        Line time, seconds.
    tdi_rows : int
        Detector rows a charge packet crosses.
    """
    return (np.asarray(x, dtype=float) - 0.5 * tdi_rows) * line_time


def frame_of_date_matrix(epoch: Time) -> np.ndarray:
    """Rotation from ICRS to the celestial intermediate system at ``epoch``.

    Parameters
    ----------
    epoch : `~astropy.time.Time`
        Any scale convertible to TT (UTC needs no Earth-orientation data).

    Returns
    -------
    ndarray, shape (3, 3)
        ``v_date = M @ v_icrs`` for unit vectors (IAU 2006/2000A,
        :func:`erfa.c2i06a`; GCRS and ICRS axes coincide).
    """
    tt = epoch.tt
    return np.asarray(erfa.c2i06a(tt.jd1, tt.jd2), dtype=float)


def _unit(lon_deg: ArrayLike, lat_deg: ArrayLike) -> np.ndarray:
    lon = np.asarray(lon_deg, dtype=float) * _DEG
    lat = np.asarray(lat_deg, dtype=float) * _DEG
    cos_lat = np.cos(lat)
    return np.stack(np.broadcast_arrays(cos_lat * np.cos(lon), cos_lat * np.sin(lon), np.sin(lat)))


def _lonlat(v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    lon = np.arctan2(v[1], v[0]) / _DEG
    lat = np.arctan2(v[2], np.hypot(v[0], v[1])) / _DEG
    return lon, lat


def _wrap180(angle: np.ndarray | float) -> np.ndarray:
    return (np.asarray(angle, dtype=float) + 180.0) % 360.0 - 180.0


@dataclass(frozen=True, eq=False)
class RectifiedFrame:
    """Output grid of the rectify stage for one night.

    Build it with :meth:`for_night`.  All angles in degrees.

    Attributes
    ----------
    epoch : `~astropy.time.Time`
        Epoch of the frame of date (the night's mid-time).
    matrix : ndarray, shape (3, 3)
        ICRS -> frame-of-date rotation at ``epoch``.
    ra_origin : float
        Right ascension of date at ``x = 0``.
    dec_origin : float
        Declination of date at ``y = 0``.
    cdelt1 : float
        Right ascension of date per pixel along ``x`` (> 0).
    cdelt2 : float
        Declination per pixel along ``y`` (> 0).
    n_x, n_y : int
        Extent of the night's grid: ``n_x`` night rows (``x`` runs from
        about ``0`` to about ``n_x``, see :meth:`column_of_row`) and ``y`` in
        ``[0, n_y)``.
    x_ref : int
        Column of the WCS reference meridian (``CRVAL`` lies at ``x_ref``),
        the night's middle, so that native longitudes stay within +-180 deg.
    """

    epoch: Time
    matrix: np.ndarray
    ra_origin: float
    dec_origin: float
    cdelt1: float
    cdelt2: float
    n_x: int
    n_y: int
    x_ref: int

    # ------------------------------------------------------------ construction
    @classmethod
    def for_night(
        cls,
        model,
        n_rows: int,
        *,
        pixel_scale: float | None = None,
        margin: float = 4.0,
    ) -> RectifiedFrame:
        """The rectified frame of a night observed with ``model``.

        Parameters
        ----------
        model : pipeline.geometry.TDIModel
            Geometry of the night: ``model.start`` is the time night row 0
            was shifted out, ``model.line_time`` the line time.
        n_rows : int
            Number of night rows (scan axis); sets ``n_x`` and the epoch.
        pixel_scale : float or None, optional
            Arcsec per pixel across the scan (``cdelt2``); None takes the
            camera's on-sky scale, :attr:`TDIModel.pixel_scale`.
        margin : float, optional
            Pixels added beyond the chip's edge columns on both sides of the
            ``y`` range (recorded centroids lie a third of the bow poleward
            of mid-crossing, so edge stars may fall just beyond the edges).

        Returns
        -------
        RectifiedFrame
        """
        from astropy.time import TimeDelta

        if n_rows < 1:
            raise ValueError(f"n_rows must be a positive number of night rows; got {n_rows}.")
        if pixel_scale is not None and not pixel_scale > 0:
            raise ValueError(
                f"pixel_scale must be positive arcsec per pixel or None; got {pixel_scale}."
            )
        if margin < 0:
            raise ValueError(f"margin must be >= 0 pixels; got {margin}.")
        line_time = float(model.line_time)
        epoch = model.start + TimeDelta(0.5 * n_rows * line_time, format="sec")
        matrix = frame_of_date_matrix(epoch)
        cdelt1 = EARTH_ROTATION_RATE * line_time / _DEG
        scale = model.pixel_scale if pixel_scale is None else float(pixel_scale)
        cdelt2 = scale / 3600.0
        n_columns = model.camera.n_columns
        # Where the chip's centre line and edges look over the night: annual
        # aberration moves the zenith against the ICRS-fixed frame by up to
        # ~20 arcsec over a night, so the strip wanders slowly across the rows.
        x_ref = int(n_rows // 2)
        rows = np.linspace(0.0, float(n_rows), 9)[:, None]
        columns = np.array([-0.5, (n_columns - 1) / 2.0, n_columns - 0.5])[None, :]
        ra, dec = model.sky_from_strip(*np.broadcast_arrays(rows, columns))
        _, dec_d = _lonlat(np.einsum("ij,j...->i...", matrix, _unit(ra, dec)))
        dec_lo, dec_hi = float(dec_d.min()), float(dec_d.max())
        half = 0.5 * (dec_hi - dec_lo) / cdelt2 + margin
        n_y = 2 * int(np.ceil(half)) + 1
        dec_origin = 0.5 * (dec_lo + dec_hi) - (n_y - 1) / 2.0 * cdelt2
        ra_c, dec_c = model.sky_from_strip(float(x_ref), (n_columns - 1) / 2.0)
        ra_d, _ = _lonlat(matrix @ _unit(ra_c, dec_c))
        ra_origin = float((ra_d - x_ref * cdelt1) % 360.0)
        return cls(
            epoch=epoch,
            matrix=matrix,
            ra_origin=ra_origin,
            dec_origin=dec_origin,
            cdelt1=float(cdelt1),
            cdelt2=float(cdelt2),
            n_x=int(n_rows),
            n_y=int(n_y),
            x_ref=x_ref,
        )

    # ---------------------------------------------------------- conversions
    @property
    def ra_ref(self) -> float:
        """Right ascension of date of the reference meridian (at ``x_ref``)."""
        return float((self.ra_origin + self.x_ref * self.cdelt1) % 360.0)

    def date_from_pixel(self, x: ArrayLike, y: ArrayLike) -> tuple[np.ndarray, np.ndarray]:
        """Right ascension and declination of date of zero-based pixels ``(x, y)``."""
        x = np.asarray(x, dtype=float)
        y = np.asarray(y, dtype=float)
        return (self.ra_origin + x * self.cdelt1) % 360.0, self.dec_origin + y * self.cdelt2

    def pixel_from_date(
        self, ra_date: ArrayLike, dec_date: ArrayLike
    ) -> tuple[np.ndarray, np.ndarray]:
        """Zero-based pixel ``(x, y)`` of right ascension and declination of date.

        ``x`` is taken within 180 deg of the reference meridian.
        """
        lon = _wrap180(np.asarray(ra_date, dtype=float) - self.ra_ref)
        x = self.x_ref + lon / self.cdelt1
        y = (np.asarray(dec_date, dtype=float) - self.dec_origin) / self.cdelt2
        return x, y

    def icrs_from_pixel(self, x: ArrayLike, y: ArrayLike) -> tuple[np.ndarray, np.ndarray]:
        """ICRS ``(ra, dec)`` of zero-based pixels, degrees (RA in [0, 360))."""
        ra_d, dec_d = self.date_from_pixel(x, y)
        v = np.einsum("ji,j...->i...", self.matrix, _unit(ra_d, dec_d))
        ra, dec = _lonlat(v)
        return ra % 360.0, dec

    def pixel_from_icrs(self, ra: ArrayLike, dec: ArrayLike) -> tuple[np.ndarray, np.ndarray]:
        """Zero-based pixel ``(x, y)`` of ICRS positions in degrees."""
        v = np.einsum("ij,j...->i...", self.matrix, _unit(ra, dec))
        return self.pixel_from_date(*_lonlat(v))

    def column_of_row(self, model, rows: ArrayLike) -> np.ndarray:
        """Rectified column ``x`` seen by the chip's centre column at night rows.

        The sky point that crosses the chip centre (``u = N/2``) in strip row
        ``rows`` (:meth:`TDIModel.sky_from_strip`), in this frame.

        Parameters
        ----------
        model : pipeline.geometry.TDIModel
            Geometry of the night.
        rows : array_like
            Night (strip) row coordinates, scan axis.

        Returns
        -------
        ndarray
            ``x``, same shape as ``rows``.
        """
        rows = np.asarray(rows, dtype=float)
        ra, dec = model.sky_from_strip(
            rows, np.full(rows.shape, (model.camera.n_columns - 1) / 2.0)
        )
        return self.pixel_from_icrs(ra, dec)[0]

    # ------------------------------------------------------------------ WCS
    def wcs_header(self, x_start: int = 0, n_x: int | None = None) -> fits.Header:
        """FITS WCS header of the sub-image whose first column is ``x = x_start``.

        Parameters
        ----------
        x_start : int, optional
            Night column of the sub-image's first pixel.
        n_x : int or None, optional
            Width of the sub-image (``NAXIS1``); None omits ``NAXIS`` cards.

        Returns
        -------
        astropy.io.fits.Header
        """
        from astropy.io import fits

        pole_lon, pole_lat = _lonlat(self.matrix @ np.array([0.0, 0.0, 1.0]))
        ref_ra, ref_dec = _lonlat(self.matrix.T @ _unit(self.ra_ref, 0.0))
        header = fits.Header()
        if n_x is not None:
            header["NAXIS"] = 2
            header["NAXIS1"] = int(n_x)
            header["NAXIS2"] = self.n_y
        cards = [
            ("WCSAXES", 2, "two image axes"),
            ("CTYPE1", "RA---CAR", "RA of date along the scan (east to the right)"),
            ("CTYPE2", "DEC--CAR", "Dec of date across the scan (north up)"),
            ("CUNIT1", "deg", ""),
            ("CUNIT2", "deg", ""),
            ("CRPIX1", float(self.x_ref - x_start + 1), "reference meridian of the night"),
            ("CRPIX2", float(1.0 - self.dec_origin / self.cdelt2), "equator of date"),
            ("CRVAL1", float(ref_ra % 360.0), "ICRS RA of (RA_date=ref, Dec_date=0)"),
            ("CRVAL2", float(ref_dec), "ICRS Dec of (RA_date=ref, Dec_date=0)"),
            ("CDELT1", self.cdelt1, "deg of RA of date per pixel (one line time)"),
            ("CDELT2", self.cdelt2, "deg of Dec of date per pixel"),
            ("LONPOLE", float(_wrap180(pole_lon - self.ra_ref)), "native lon of ICRS pole"),
            ("LATPOLE", float(pole_lat), "ICRS lat of native pole (pole of date)"),
            ("RADESYS", "ICRS", ""),
            # The frame of date's epoch as the product's time origin (FITS
            # WCS time keywords, Rots et al. 2015, A&A 574, A36).
            ("TIMESYS", "UTC", "time scale of DATEREF"),
            ("DATEREF", self.epoch.utc.isot, "[UTC] epoch of the frame of date"),
            ("MJDREF", float(self.epoch.utc.mjd), "[d] DATEREF as MJD (UTC)"),
        ]
        for key, value, comment in cards:
            header[key] = (value, comment)
        return header

    def wcs(self, x_start: int = 0, n_x: int | None = None) -> WCS:
        """Astropy WCS of the sub-image whose first column is ``x = x_start``."""
        from astropy.wcs import WCS

        wcs = WCS(self.wcs_header(x_start, n_x))
        if n_x is not None:
            wcs.pixel_shape = (int(n_x), self.n_y)
        return wcs
