"""Sky errors of catalogue positions from their pixel errors, through the product's WCS.

A rectified product's projection (plate carree about an oblique pole, rows
along circles of constant declination) has projection-plane scales that
differ from the scales on the sky: along ``x`` the plane's degree is a degree
of native longitude, ``cos(latitude)`` of a degree on the sky (0.75 at
declination 41 deg).  The errors on the sky therefore come from the local
Jacobian of the WCS at each source, not from the plane's ``CDELT``.
"""

from __future__ import annotations

import numpy as np

__all__ = ["sky_errors"]


def sky_errors(wcs, x, y, x_err, y_err) -> tuple[np.ndarray, np.ndarray]:
    """1-sigma errors along right ascension (on the sky) and declination.

    Parameters
    ----------
    wcs : astropy.wcs.WCS
        Celestial WCS of the pixel coordinates (0-based).
    x, y : array_like
        Positions, pixels.
    x_err, y_err : array_like
        Their 1-sigma errors, pixels (taken as uncorrelated).

    Returns
    -------
    ra_err, dec_err : ndarray
        Arcsec; ``ra_err`` is the error of ``ra * cos(dec)``, a distance on
        the sky.  From the WCS's derivatives by central differences over one
        pixel (the projection is smooth: their error is far below 1e-6).
    """
    x, y = np.asarray(x, dtype=float), np.asarray(y, dtype=float)
    _, dec = wcs.all_pix2world(x, y, 0)
    cos_dec = np.cos(np.radians(dec))

    def derivative(dx, dy):
        ra1, dec1 = wcs.all_pix2world(x + dx, y + dy, 0)
        ra0, dec0 = wcs.all_pix2world(x - dx, y - dy, 0)
        d_ra = (ra1 - ra0 + 180.0) % 360.0 - 180.0  # across RA = 0 too
        return d_ra * cos_dec * 3600.0, (dec1 - dec0) * 3600.0  # arcsec per pixel

    ra_x, dec_x = derivative(0.5, 0.0)
    ra_y, dec_y = derivative(0.0, 0.5)
    x_err, y_err = np.asarray(x_err, dtype=float), np.asarray(y_err, dtype=float)
    return np.hypot(ra_x * x_err, ra_y * y_err), np.hypot(dec_x * x_err, dec_y * y_err)
