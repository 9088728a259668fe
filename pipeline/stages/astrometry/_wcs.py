"""A FITS WCS per product that reproduces the solved geometry.

The rectified products carry the exact WCS of the *nominal* geometry.  After
the solution the sky position of a product pixel is
:meth:`AstrometricSolution.sky_from_rectified`; over one product this differs
from the nominal WCS by a smooth field (a shift, a fraction of a percent of
scale and shear, the wander over a few minutes), so a gnomonic (``TAN``) WCS
with SIP polynomials (Shupe et al. 2005, the SIP convention astropy.wcs
reads) fitted to the solved positions on a grid reproduces it.
:func:`solved_wcs` reports the largest disagreement on a finer, offset grid,
so a caller can refuse a WCS that is not good enough.

The fit is linear: with the reference pixel at the product's centre and
``CRVAL`` the solved sky there, astropy's own gnomonic projection gives each
grid point's intermediate world coordinates, and those are a polynomial in
the pixel offsets whose linear part is the CD matrix and whose higher terms,
through the CD matrix's inverse, are the SIP coefficients.  One least-squares
solve replaces :func:`astropy.wcs.utils.fit_wcs_from_points`' nonlinear fit
(0.2-1 s per stretch, numerical derivatives over astropy.modeling models:
32 stretches of a 4096-column night spent 33 s there).
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    from astropy.wcs import WCS

__all__ = ["solved_wcs", "wcs_position_errors", "wcs_sky"]


def _grid(n_x: int, n_y: int, n: int, offset: float) -> tuple[np.ndarray, np.ndarray]:
    """Zero-based product pixels of an ``n`` x ``n`` grid (``offset`` steps in from the edges)."""
    f = (np.arange(n) + offset) / (n - 1 + 2 * offset)
    gx, gy = np.meshgrid(-0.5 + f * n_x, -0.5 + f * n_y)
    return gx.ravel(), gy.ravel()


def _points(n_x: int, n_y: int, n_grid: int) -> list[tuple[np.ndarray, np.ndarray]]:
    """The fit grid, the reference pixel and the check grid of a product, zero-based."""
    reference = (np.array([0.5 * (n_x - 1)]), np.array([0.5 * (n_y - 1)]))
    return [_grid(n_x, n_y, n_grid, 0.0), reference, _grid(n_x, n_y, 2 * n_grid, 0.25)]


def wcs_sky(
    solution, products, *, n_grid: int = 16, segments=None
) -> list[list[tuple[np.ndarray, np.ndarray]]]:
    """The solved sky of the points :func:`solved_wcs` fits and checks, for many products.

    Parameters
    ----------
    solution : AstrometricSolution
        The night's solution.
    products : sequence of (int, int)
        ``(x_start, n_x)`` of each product (see :func:`solved_wcs`).
    n_grid : int, optional
        As for :func:`solved_wcs`.
    segments : sequence of (int or None), optional
        Per product, the segment number whose clock times it (a stretch lies
        in one segment); None: each point's by its row.

    Returns
    -------
    list
        Per product, the ``(ra, dec)`` (deg) of its fit grid, its reference
        pixel and its check grid: what :func:`solved_wcs` computes for it
        alone (:meth:`~AstrometricSolution.sky_from_rectified_groups`, one
        pass for all of them).
    """
    n_y = solution.frame.n_y
    groups = [
        (px + x_start, py) for x_start, n_x in products for px, py in _points(n_x, n_y, n_grid)
    ]
    per_group = None if segments is None else [k for k in segments for _ in range(3)]
    sky = solution.sky_from_rectified_groups(groups, per_group)
    return [sky[3 * i : 3 * i + 3] for i in range(len(products))]


def wcs_position_errors(
    solution, products, *, n_grid: int = 8, segments=None
) -> list[tuple[float, float]]:
    """The solution's own position error over each product, along RA and Dec, arcsec.

    What a product's solved WCS is uncertain by wherever a star lies on it:
    the fitted parameters' and wander's covariance carried to the sky
    (:meth:`~pipeline.stages.astrometry.AstrometricSolution.position_errors`
    with no centroid error), the root mean square over the centres of an
    ``n_grid`` x ``n_grid`` grid of equal cells of the product.  Every
    position measured on the product (or on anything resampled from it)
    shares this error, beside its own centroid's.

    Parameters
    ----------
    solution : AstrometricSolution
        The night's solution.
    products : sequence of (int, int)
        ``(x_start, n_x)`` of each product (see :func:`solved_wcs`).
    n_grid : int, optional
        Points per axis of the grid.
    segments : sequence of (int or None), optional
        As for :func:`wcs_sky`.

    Returns
    -------
    list of (float, float)
        Per product, the error along right ascension (on the sky) and
        declination, arcsec.
    """
    n_y = solution.frame.n_y
    points = [_grid(n_x, n_y, n_grid, 0.5) for _, n_x in products]  # cell centres
    if not points:
        return []
    starts = [x_start for x_start, _ in products]
    x = np.concatenate([px + x_start for x_start, (px, _) in zip(starts, points, strict=True)])
    y = np.concatenate([py for _, py in points])
    segment = None
    if segments is not None:
        segment = np.repeat([-1 if s is None else int(s) for s in segments], n_grid * n_grid)
    ra_err, dec_err = solution.position_errors(x, y, 0.0, 0.0, segment=segment)
    size = n_grid * n_grid
    return [
        (
            float(np.sqrt(np.mean(ra_err[k * size : (k + 1) * size] ** 2))),
            float(np.sqrt(np.mean(dec_err[k * size : (k + 1) * size] ** 2))),
        )
        for k in range(len(products))
    ]


def solved_wcs(
    solution,
    x_start: int,
    n_x: int,
    *,
    sip_degree: int = 3,
    n_grid: int = 16,
    sky=None,
    segment: int | None = None,
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
    sky : list or None, optional
        The product's item of :func:`wcs_sky` (same ``n_grid``), if made
        already; None: computed here.
    segment : int or None, optional
        The product's segment number, whose clock times it (see
        :func:`wcs_sky`); None: each point's by its row.

    Returns
    -------
    wcs : astropy.wcs.WCS
        Zero-based pixels of the product (as astropy's ``pixel_to_world``).
    max_error : float
        Largest distance, pixels, between the WCS and the solved geometry
        on a ``2 n_grid`` grid offset from the fit points.
    """
    from astropy import units as u
    from astropy.coordinates import SkyCoord

    if n_x < 2:
        raise ValueError(f"n_x must be at least 2 columns; got {n_x}.")
    n_y = solution.frame.n_y
    (px, py), (ref_x, ref_y), (cx, cy) = _points(n_x, n_y, n_grid)
    if sky is None:
        (sky,) = wcs_sky(solution, [(x_start, n_x)], n_grid=n_grid, segments=[segment])
    (ra, dec), (ref_ra, ref_dec), (check_ra, check_dec) = sky
    wcs = _fit_tan_sip(px, py, ra, dec, (ref_x[0], ref_y[0]), (ref_ra[0], ref_dec[0]), sip_degree)
    wcs.pixel_shape = (int(n_x), int(n_y))
    qx, qy = wcs.world_to_pixel(SkyCoord(check_ra * u.deg, check_dec * u.deg, frame="icrs"))
    return wcs, float(np.max(np.hypot(qx - cx, qy - cy)))


def _fit_tan_sip(px, py, ra, dec, ref_pixel, ref_sky, degree: int) -> WCS:
    """A TAN-SIP WCS through zero-based pixels ``(px, py)`` at sky ``(ra, dec)`` (deg).

    ``ref_pixel`` (zero-based) maps to ``ref_sky`` exactly (``CRPIX``,
    ``CRVAL``); the CD matrix and the SIP polynomials of orders 2 to
    ``degree`` are fitted by linear least squares (see the module docstring).
    """
    from astropy.wcs import WCS, Sip

    # Intermediate world coordinates (deg) by astropy's projection: a TAN WCS
    # with a unit CD matrix maps the sky to them as its "pixels".
    plane = WCS(naxis=2)
    plane.wcs.ctype = ["RA---TAN", "DEC--TAN"]
    plane.wcs.crval = ref_sky
    plane.wcs.crpix = [1.0, 1.0]  # zero-based pixel 0 is the reference: xi = "pixel"
    plane.wcs.cd = np.eye(2)
    xi, eta = plane.wcs_world2pix(ra, dec, 0)
    u_off, v_off = px - ref_pixel[0], py - ref_pixel[1]
    scale = max(np.abs(u_off).max(), np.abs(v_off).max(), 1.0)  # conditioning
    terms = [(p, q) for total in range(1, degree + 1) for p in range(total, -1, -1)
             for q in [total - p]]  # fmt: skip
    design = np.column_stack([(u_off / scale) ** p * (v_off / scale) ** q for p, q in terms])
    coef = np.linalg.lstsq(design, np.column_stack([xi, eta]), rcond=None)[0]
    coef /= np.array([scale ** (p + q) for p, q in terms])[:, None]  # back to pixels
    cd = np.array([coef[terms.index((1, 0))], coef[terms.index((0, 1))]]).T
    # CD (u + f, v + g) = (xi, eta): the higher terms through CD^-1 are f and g.
    higher = np.linalg.solve(cd, coef.T)  # (2, n_terms)
    a_sip = np.zeros((degree + 1, degree + 1))
    b_sip = np.zeros((degree + 1, degree + 1))
    for k, (p, q) in enumerate(terms):
        if p + q >= 2:
            a_sip[p, q], b_sip[p, q] = higher[0, k], higher[1, k]
    crpix = [ref_pixel[0] + 1.0, ref_pixel[1] + 1.0]  # FITS pixels are 1-based
    wcs = WCS(naxis=2)
    wcs.wcs.ctype = ["RA---TAN-SIP", "DEC--TAN-SIP"]
    wcs.wcs.crval = ref_sky
    wcs.wcs.crpix = crpix
    wcs.wcs.cd = cd
    wcs.wcs.radesys = "ICRS"
    wcs.sip = Sip(a_sip, b_sip, None, None, crpix)
    wcs.wcs.set()
    return wcs
