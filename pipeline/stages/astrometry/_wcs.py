"""A FITS WCS per product that reproduces the solved geometry.

The rectified products carry the exact WCS of the *nominal* geometry.  After
the solution the sky position of a product pixel is
:meth:`AstrometricSolution.sky_from_rectified`; over one product this differs
from the nominal WCS by a smooth field (a shift, a fraction of a percent of
scale and shear, the wander over a few minutes), so a gnomonic (``TAN``) WCS
with SIP polynomials (Shupe et al. 2005, the SIP convention astropy.wcs
reads) fitted to the solved positions on a grid reproduces it
(:func:`astropy.wcs.utils.fit_wcs_from_points`).  :func:`solved_wcs` reports
the largest disagreement on a finer, offset grid, so a caller can refuse a
WCS that is not good enough.
"""

from __future__ import annotations

import numpy as np
from astropy import units as u
from astropy.coordinates import SkyCoord
from astropy.wcs import WCS
from astropy.wcs.utils import fit_wcs_from_points

__all__ = ["solved_wcs"]


def solved_wcs(
    solution, x_start: int, n_x: int, *, sip_degree: int = 3, n_grid: int = 16
) -> tuple[WCS, float]:
    """A TAN-SIP WCS of the product whose first column is night column ``x_start``.

    Parameters
    ----------
    solution : AstrometricSolution
        The night's solution.
    x_start, n_x : int
        First night column and width (``NAXIS1``) of the product; its rows
        are the night frame's ``n_y`` rows.
    sip_degree : int, optional
        Degree of the SIP polynomials.
    n_grid : int, optional
        Fit points per axis (``n_grid**2`` solved positions).

    Returns
    -------
    wcs : astropy.wcs.WCS
        Zero-based pixels of the product (as astropy's ``pixel_to_world``).
    max_error : float
        Largest distance, pixels, between the WCS and the solved geometry
        on a ``2 n_grid`` grid offset from the fit points.
    """
    if n_x < 2:
        raise ValueError(f"n_x must be at least 2 columns; got {n_x}.")
    n_y = solution.frame.n_y

    def grid(n, offset):
        f = (np.arange(n) + offset) / (n - 1 + 2 * offset)
        gx, gy = np.meshgrid(-0.5 + f * n_x, -0.5 + f * n_y)
        return gx.ravel(), gy.ravel()

    px, py = grid(n_grid, 0.0)
    ra, dec = solution.sky_from_rectified(px + x_start, py)
    wcs = fit_wcs_from_points(
        (px, py),  # astropy fits zero-based pixels here (measured: +1 gives a 1-px offset)
        SkyCoord(ra * u.deg, dec * u.deg, frame="icrs"),
        proj_point="center",
        projection="TAN",
        sip_degree=sip_degree,
    )
    wcs.pixel_shape = (int(n_x), int(n_y))
    cx, cy = grid(2 * n_grid, 0.25)
    ra, dec = solution.sky_from_rectified(cx + x_start, cy)
    qx, qy = wcs.world_to_pixel(SkyCoord(ra * u.deg, dec * u.deg, frame="icrs"))
    return wcs, float(np.max(np.hypot(qx - cx, qy - cy)))
