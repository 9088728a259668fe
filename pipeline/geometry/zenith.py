"""The optical axis and the ICRS <-> focal-plane mapping of a zenith telescope.

This is the only module in which astropy coordinate transforms run; every
later step is plain NumPy.

Model
-----
The optical axis is fixed to the ground: the zenith, offset by small tilts
towards the east and the north.  The focal plane is the *observed* sky (as
astropy's :class:`~astropy.coordinates.AltAz` frame gives it, i.e. with
precession, nutation, Earth rotation, annual and diurnal aberration and, if the
site has a pressure, refraction) projected gnomonically about the axis:

* ``xi`` towards local west (the drift direction), ``eta`` towards local
  north, both in radians;
* the (xi, eta) basis is fixed in the local east/north/up frame: ``eta`` along
  the component of local north perpendicular to the axis, ``xi = axis x eta``
  (for a zero tilt, exactly west and north).

"Zenith" here is astropy's: the normal to the WGS84 ellipsoid at the site.  A
liquid mirror's axis follows the local plumb line instead, which differs by the
deflection of the vertical (a few arcseconds, more in mountains), and may be
tilted on purpose (e.g. against the Coriolis aberration); both belong in the
camera's ``tilt_east``/``tilt_north``, which the astrometry stage can fit.

On a coarse grid of times (``node_spacing_s``) astropy/ERFA gives (1) the ICRS
position of the axis and (2) for a grid of points around it, covering the chip
and a margin, the observed position.  Per node we fit two 2-D polynomials
(degree 3; degree 5 for fields wider than ~1 deg, see :func:`fit_degree`)
between *ICRS gnomonic* coordinates about the ICRS position of the axis,
``(X, Y)`` with ``X`` towards the west (decreasing RA) and ``Y`` towards ICRS
north, and the focal-plane ``(xi, eta)``: forward and inverse.  The map is a
rotation (local north versus ICRS north: precession turns it by up to
~0.2 deg), a scale change of ~1e-4 (aberration) and ~-2.8e-4 (refraction),
plus sub-mas quadratic and cubic terms; the fit is good to micro-arcseconds.
The axis RA (unwrapped) and Dec and all coefficients are interpolated in time
with cubic splines.
"""

from __future__ import annotations

import logging
from typing import TYPE_CHECKING

import numpy as np
from numpy.typing import ArrayLike

from pipeline._offline import load_earth_orientation
from pipeline.geometry.instrument import Site
from pipeline.geometry.optics import ARCSEC_PER_RADIAN
from pipeline.geometry.sitetime import altaz_frame, offline_astropy_warnings, times_since

if TYPE_CHECKING:
    from astropy.time import Time

__all__ = [
    "ZenithAxis",
    "axis_basis_enu",
    "fit_degree",
    "gnomonic_from_unit",
    "unit_from_gnomonic",
]

log = logging.getLogger(__name__)

_CHUNK = 1 << 12


def axis_basis_enu(tilt_east: float = 0.0, tilt_north: float = 0.0) -> np.ndarray:
    """Focal-plane basis in the local east/north/up frame.

    Parameters
    ----------
    tilt_east, tilt_north : float
        Tilt of the optical axis from the zenith towards the east and the
        north, arcseconds (gnomonic offsets of the axis about the zenith).

    Returns
    -------
    basis : ndarray, shape (3, 3)
        Rows ``e_xi`` (towards west), ``e_eta`` (towards north) and the axis,
        each an (east, north, up) unit vector.
    """
    axis = np.array(
        [np.tan(tilt_east / ARCSEC_PER_RADIAN), np.tan(tilt_north / ARCSEC_PER_RADIAN), 1.0]
    )
    axis /= np.linalg.norm(axis)
    north = np.array([0.0, 1.0, 0.0])
    e_eta = north - axis[1] * axis
    e_eta /= np.linalg.norm(e_eta)
    e_xi = np.cross(axis, e_eta)
    return np.array([e_xi, e_eta, axis])


def gnomonic_from_unit(
    x: ArrayLike, y: ArrayLike, z: ArrayLike, lon0: ArrayLike, lat0: ArrayLike
) -> tuple[np.ndarray, np.ndarray]:
    """Gnomonic coordinates (west, north) of unit vectors about (lon0, lat0).

    Parameters
    ----------
    x, y, z : array_like
        Cartesian components of unit vectors (any common shape).
    lon0, lat0 : array_like
        Tangent point, radians (broadcast with ``x``).

    Returns
    -------
    west, north : ndarray
        Gnomonic coordinates in radians; ``west`` grows towards decreasing
        longitude.  NaN for points 90 degrees or more from the tangent point.
    """
    cl, sl = np.cos(lon0), np.sin(lon0)
    cb, sb = np.cos(lat0), np.sin(lat0)
    along = x * cl + y * sl
    denom = along * cb + z * sb
    east = -x * sl + y * cl
    north = z * cb - along * sb
    with np.errstate(invalid="ignore", divide="ignore"):
        inv = np.where(denom > 0, 1.0 / denom, np.nan)
    return -east * inv, north * inv


def unit_from_gnomonic(
    west: ArrayLike, north: ArrayLike, lon0: ArrayLike, lat0: ArrayLike
) -> tuple[np.ndarray, np.ndarray]:
    """Inverse of :func:`gnomonic_from_unit`: (lon, lat) in radians."""
    cl, sl = np.cos(lon0), np.sin(lon0)
    cb, sb = np.cos(lat0), np.sin(lat0)
    east = -np.asarray(west, dtype=float)
    north = np.asarray(north, dtype=float)
    # centre + east * e_east + north * e_north (not normalised: atan2 does not care)
    along = cb - north * sb
    x = along * cl - east * sl
    y = along * sl + east * cl
    z = sb + north * cb
    return np.arctan2(y, x), np.arctan2(z, np.hypot(x, y))


def _monomials(x: np.ndarray, y: np.ndarray, degree: int = 3) -> np.ndarray:
    """The monomials x**i y**j of total degree <= ``degree``, stacked on the last axis.

    Order by total degree, then decreasing power of x: 1, x, y, x^2, xy,
    y^2, x^3, ... (so the linear terms are always at indices 1 and 2).
    """
    xp = [np.ones_like(x), x]
    yp = [np.ones_like(y), y]
    for _ in range(2, degree + 1):
        xp.append(xp[-1] * x)
        yp.append(yp[-1] * y)
    return np.stack([xp[i] * yp[k - i] for k in range(degree + 1) for i in range(k, -1, -1)], -1)


def fit_degree(field_radius: float) -> int:
    """Polynomial degree for a field: 3 up to 0.02 rad (1.1 deg), else 5.

    The map's terms beyond degree 3 are aberration's ~1e-4 * rho^4: 0.004 uas
    at 0.006 rad, 8 uas at 0.043 rad, 0.12 mas at 0.086 rad; degree 5 takes
    them below a micro-arcsecond for any zenith field up to 0.2 rad.
    """
    return 3 if field_radius <= 0.02 else 5


def _chunked(func, *args: ArrayLike, helper=None) -> tuple[np.ndarray, np.ndarray]:
    """Apply ``func(*args) -> (p, q)`` on 1-D chunks of the broadcast inputs.

    Chunks keep the temporaries (about 30 doubles a point) in cache-sized
    pieces; the result has the broadcast shape of the inputs.  ``helper``: an
    executor (e.g. a ``ThreadPoolExecutor``) that does the second half of
    the chunks while the calling thread does the first (numpy's loops release
    the GIL); every chunk is the same computation either way.
    """
    arrays = np.broadcast_arrays(*(np.asarray(x, dtype=float) for x in args))
    p = np.empty(arrays[0].shape)
    q = np.empty(arrays[0].shape)
    fp, fq = p.reshape(-1), q.reshape(-1)
    flat = [x.ravel() for x in arrays]
    starts = range(0, fp.size, _CHUNK)

    def run(chunk_starts) -> None:
        for lo in chunk_starts:
            sl = slice(lo, lo + _CHUNK)
            fp[sl], fq[sl] = func(*(x[sl] for x in flat))

    if helper is None or len(starts) < 2:
        run(starts)
    else:
        half = len(starts) // 2
        other = helper.submit(run, starts[half:])
        try:
            run(starts[:half])
        finally:
            other.result()
    return p, q


class ZenithAxis:
    """Optical axis of a zenith telescope and its ICRS <-> focal-plane map.

    Parameters
    ----------
    site : Site
        The site (location, pressure, temperature, humidity, wavelength).
    start : `~astropy.time.Time`
        Reference epoch; times are float seconds since ``start``.
    t_min, t_max : float
        Time span to cover, seconds since ``start``.  One extra node is added
        at each end.
    field_radius : float
        Half-size of the square (in ICRS gnomonic radians about the axis) over
        which the map is fitted and valid.
    tilt_east, tilt_north : float, optional
        Axis tilt from the zenith, arcseconds.
    node_spacing_s : float, optional
        Spacing of the astropy evaluations in seconds.  The ICRS declination
        of the axis swings by the precession angle (~0.1-0.2 deg) once a
        sidereal day; cubic splines with 300-s nodes follow it to ~1 uas
        (600 s: ~20 uas, 1200 s: ~0.3 mas).
    n_grid : int, optional
        The fit uses an ``n_grid x n_grid`` grid of points over the field.

    Attributes
    ----------
    t_nodes : ndarray, shape (n_nodes,)
        Node times, seconds since ``start``.
    fit_residual : float
        Largest residual of the per-node polynomial fits, radians (forward
        and inverse); micro-arcseconds for fields up to a degree.
    """

    def __init__(
        self,
        site: Site,
        start: Time,
        t_min: float,
        t_max: float,
        field_radius: float,
        *,
        tilt_east: float = 0.0,
        tilt_north: float = 0.0,
        node_spacing_s: float = 300.0,
        n_grid: int = 11,
    ) -> None:
        if not t_max > t_min:
            raise ValueError(f"t_max must exceed t_min; got t_min={t_min}, t_max={t_max}.")
        if node_spacing_s <= 0:
            raise ValueError(f"node_spacing_s must be positive seconds; got {node_spacing_s}.")
        if not 0 < field_radius <= 0.2:
            raise ValueError(
                f"field_radius must be in (0, 0.2] rad (a zenith field); got {field_radius}."
            )
        self.site = site
        self.start = start
        self.field_radius = float(field_radius)
        self.basis = axis_basis_enu(tilt_east, tilt_north)
        n_int = max(3, int(np.ceil((t_max - t_min) / node_spacing_s)) + 2)
        self.t_nodes = t_min - node_spacing_s + node_spacing_s * np.arange(n_int + 1)
        self._h = float(node_spacing_s)
        self.degree = fit_degree(self.field_radius)
        self._build(n_grid)

    # ------------------------------------------------------------------ build
    def _build(self, n_grid: int) -> None:
        import astropy.units as u
        from astropy.coordinates import ICRS, SkyCoord
        from scipy.interpolate import CubicSpline

        # The transformations need Earth orientation: the bundled tables from
        # the per-user cache when it holds them (~10 ms), instead of astropy
        # parsing their text (~0.45 s) in a process that did not warm up
        # (the serial executor, scripts); the same table either way.
        load_earth_orientation()
        s = self.field_radius
        a = self.basis[2]
        axis_alt = np.arcsin(a[2])
        axis_az = np.arctan2(a[0], a[1])
        with offline_astropy_warnings("The zenith-axis model"):
            times = times_since(self.start, self.t_nodes)
            frame = altaz_frame(self.site, times)
            axis = SkyCoord(
                alt=np.full(times.shape, axis_alt) * u.rad,
                az=np.full(times.shape, axis_az) * u.rad,
                frame=frame,
            ).transform_to(ICRS())
            ra0 = axis.ra.rad
            dec0 = axis.dec.rad
            g = np.linspace(-1.0, 1.0, n_grid)
            gx, gy = (c.ravel() for c in np.meshgrid(g, g))
            lon, lat = unit_from_gnomonic(s * gx, s * gy, ra0[:, None], dec0[:, None])
            grid = SkyCoord(ra=lon * u.rad, dec=lat * u.rad, frame=ICRS())
            observed = grid.transform_to(altaz_frame(self.site, times[:, None]))
        # observed directions -> focal plane (xi west, eta north) about the axis
        alt, az = observed.alt.rad, observed.az.rad
        enu = np.stack([np.cos(alt) * np.sin(az), np.cos(alt) * np.cos(az), np.sin(alt)], -1)
        proj = enu @ self.basis.T
        xi = proj[..., 0] / proj[..., 2] / s
        eta = proj[..., 1] / proj[..., 2] / s

        design = _monomials(gx, gy, self.degree)  # (n_pts, n_terms), same at every node
        target = np.stack([xi, eta], axis=-1)  # (n_nodes, n_pts, 2)
        fwd = np.linalg.lstsq(design, target.transpose(1, 0, 2).reshape(len(gx), -1), rcond=None)
        fwd = fwd[0].reshape(design.shape[1], len(self.t_nodes), 2).transpose(1, 0, 2)
        inv = np.empty_like(fwd)
        src = np.stack([np.broadcast_to(gx, xi.shape), np.broadcast_to(gy, xi.shape)], -1)
        for k in range(len(self.t_nodes)):
            inv[k] = np.linalg.lstsq(_monomials(xi[k], eta[k], self.degree), src[k], rcond=None)[0]
        res_f = np.einsum("pt,ntc->npc", design, fwd) - target
        res_i = (
            np.einsum("nptc->npc", _monomials(xi, eta, self.degree)[..., None] * inv[:, None]) - src
        )
        self.fit_residual = float(s * max(np.abs(res_f).max(), np.abs(res_i).max()))
        log.debug(
            "zenith axis: %d nodes, fit residual %.3g uas",
            len(self.t_nodes),
            self.fit_residual * ARCSEC_PER_RADIAN * 1e6,
        )
        values = np.column_stack(
            [
                np.unwrap(ra0),
                dec0,
                fwd.reshape(len(self.t_nodes), -1),
                inv.reshape(len(self.t_nodes), -1),
            ]
        )
        spline = CubicSpline(self.t_nodes, values, axis=0)
        # Per interval, the cubic in the local coordinate x = (t - t_k) / h in
        # [0, 1), highest power first: (n_intervals, 4, n_values), split into
        # the columns the forward map needs and those the inverse needs.
        powers = self._h ** np.arange(3, -1, -1)
        coef = spline.c.transpose(1, 0, 2) * powers[None, :, None]
        n = design.shape[1]
        self._n_terms = n
        self._coef_axis = np.ascontiguousarray(coef[:, :, :2])
        self._coef_fwd = np.ascontiguousarray(coef[:, :, : 2 + 2 * n])
        self._coef_inv = np.ascontiguousarray(coef[:, :, 2 + 2 * n :])

    # --------------------------------------------------------------- evaluate
    @property
    def t_range(self) -> tuple[float, float]:
        """Times (seconds since ``start``) over which the model is valid."""
        return float(self.t_nodes[0]), float(self.t_nodes[-1])

    def _values(self, t: np.ndarray, coef: np.ndarray) -> np.ndarray:
        """Spline values at times ``t`` (1-D) for one coefficient block; NaN outside the range."""
        pos = (t - self.t_nodes[0]) / self._h
        bad = ~((pos >= 0) & (pos <= len(self.t_nodes) - 1))
        idx = np.clip(np.floor(np.where(bad, 0.0, pos)).astype(np.intp), 0, len(coef) - 1)
        x = pos - idx
        basis = np.stack([x * x * x, x * x, x, np.ones_like(x)], axis=1)
        out = np.einsum("mk,mkv->mv", basis, np.take(coef, idx, axis=0))
        out[bad] = np.nan
        return out

    def axis_icrs(self, t: ArrayLike) -> tuple[np.ndarray, np.ndarray]:
        """ICRS right ascension (unwrapped) and declination of the axis, radians."""
        t = np.asarray(t, dtype=float)
        v = self._values(t.ravel(), self._coef_axis)
        return v[:, 0].reshape(t.shape), v[:, 1].reshape(t.shape)

    def linear_map(self, t: ArrayLike) -> np.ndarray:
        """Jacobian d(xi, eta)/d(X, Y) at the axis, shape ``t.shape + (2, 2)``."""
        t = np.asarray(t, dtype=float)
        n = self._n_terms
        v = self._values(t.ravel(), self._coef_fwd)[:, 2:].reshape(-1, n, 2)
        jac = np.stack([v[:, 1, :], v[:, 2, :]], axis=-1)  # [out, (x, y)]
        return jac.reshape((*t.shape, 2, 2))

    def icrs_to_focal(
        self, ra: ArrayLike, dec: ArrayLike, t: ArrayLike, *, helper=None
    ) -> tuple[np.ndarray, np.ndarray]:
        """Focal-plane (xi, eta) of ICRS directions at times ``t``.

        Parameters
        ----------
        ra, dec : array_like
            ICRS right ascension and declination, radians.
        t : array_like
            Seconds since ``start``; broadcast with ``ra`` and ``dec``.
        helper : concurrent.futures.Executor or None, optional
            Does half of the points' chunks in another thread (the same
            values either way); None: all in the calling thread.

        Returns
        -------
        xi, eta : ndarray
            Observed gnomonic coordinates about the axis (west, north),
            radians.  NaN outside the fitted field or time range.
        """
        # unit vectors before broadcasting: a star's trigonometry is done once
        # however many times it is sampled
        dec = np.asarray(dec, dtype=float)
        cd = np.cos(dec)
        return _chunked(
            self._forward, cd * np.cos(ra), cd * np.sin(ra), np.sin(dec), t, helper=helper
        )

    def _forward(self, sx, sy, sz, t):
        n = self._n_terms
        v = self._values(t, self._coef_fwd)
        x, y = gnomonic_from_unit(sx, sy, sz, v[:, 0], v[:, 1])
        s = self.field_radius
        x = x / s
        y = y / s
        outside = ~((np.abs(x) <= 1.0 + 1e-9) & (np.abs(y) <= 1.0 + 1e-9))
        m = _monomials(x, y, self.degree)
        out = s * np.einsum("pk,pkc->cp", m, v[:, 2:].reshape(-1, n, 2))
        xi, eta = out[0], out[1]
        xi[outside] = np.nan
        eta[outside] = np.nan
        return xi, eta

    def focal_to_icrs(
        self, xi: ArrayLike, eta: ArrayLike, t: ArrayLike
    ) -> tuple[np.ndarray, np.ndarray]:
        """ICRS (ra, dec) in radians of focal-plane points; inverse of :meth:`icrs_to_focal`.

        RA is in [-pi, pi]; NaN outside the fitted field or time range.
        """
        return _chunked(self._inverse, xi, eta, t)

    def _inverse(self, xi, eta, t):
        n = self._n_terms
        s = self.field_radius
        v = self._values(t, self._coef_axis)
        c = self._values(t, self._coef_inv).reshape(-1, n, 2)
        m = _monomials(xi / s, eta / s, self.degree)
        x, y = s * np.einsum("pk,pkc->cp", m, c)
        outside = ~((np.abs(x) <= s * (1.0 + 1e-9)) & (np.abs(y) <= s * (1.0 + 1e-9)))
        ra, dec = unit_from_gnomonic(x, y, v[:, 0], v[:, 1])
        ra[outside] = np.nan
        dec[outside] = np.nan
        return ra, dec
