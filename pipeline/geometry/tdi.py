"""Sky <-> detector <-> strip geometry of a zenith TDI (drift-scan) camera.

Conventions
-----------
Times
    ``t`` is float seconds since ``start`` (elapsed SI seconds; UTC seconds,
    leap seconds counted).  ``start`` is the epoch at which strip row 0 was
    shifted into the serial register (DATE-OBS of the night's first block).
Focal plane
    Observed gnomonic coordinates about the optical axis (see
    :mod:`pipeline.geometry.zenith`): ``xi`` towards local west (the drift
    direction), ``eta`` towards local north, radians.  The camera is turned by
    ``camera.rotation`` degrees from ``+xi`` towards ``+eta`` (west towards
    north):  ``xi_cam = xi cos(a) + eta sin(a)``,
    ``eta_cam = -xi sin(a) + eta cos(a)``; then radial distortion
    ``rho -> rho (1 + k1 rho^2)``.
Detector
    ``u = xi_cam / p + N / 2`` is the row coordinate along the scan (the scan
    axis): charge moves from ``u = 0`` to ``u = N`` (= ``camera.tdi_rows``),
    where the serial register is, so detector row ``j`` spans
    ``u in [j, j + 1)``.  ``v = eta_cam / p + (n_columns - 1) / 2`` is the
    column coordinate: column ``j`` spans ``v in [j - 0.5, j + 0.5)``, integer
    ``v`` is a pixel centre.  ``p = pixel_size / focal_length`` radians.
    The geometry always uses the default orientation (columns grow to the
    north, later rows hold larger RA); ``camera.flip_rows`` and
    ``camera.flip_columns`` are applied by ingest at file I/O, not here.
Line time
    ``camera.line_time`` if given (or the ``line_time`` argument), else the
    line time matching the drift at the chip centre computed from the model
    itself (so it includes refraction and aberration): ``dt = 1 / (du/dt)``
    for a star crossing the chip centre at ``t = duration / 2``.
Strip
    Charge deposited at time ``t`` at detector row coordinate ``u(t)`` is
    shifted out at ``t + (N - u) dt``, so it lands in the strip at row
    ``r(t) = t / dt + N - u(t)`` and column ``c(t) = v(t)``, for times with
    ``0 <= u(t) <= N``.  Strip pixel ``k`` covers ``r in [k - 0.5, k + 0.5)``:
    pixel centres are at integers (NumPy/zero-based; FITS pixel = k + 1).  The
    discrete clocking adds a one-row box along the scan on top of this
    continuous mapping (the mean is unchanged).

A star's recorded image is the seeing PSF convolved with the curve
``{(r(t), c(t))}``, uniform in ``t`` over the crossing (the smear kernel,
:meth:`TDIModel.track`); its recorded centroid is the time mean of that curve
(:meth:`TDIModel.recorded_centroid`).
"""

from __future__ import annotations

import itertools
import logging
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
from numpy.typing import ArrayLike

from pipeline.geometry.instrument import Camera, Site
from pipeline.geometry.optics import (
    ARCSEC_PER_RADIAN,
    EARTH_ROTATION_RATE,
    plate_scale,
    resolve_focal_length,
)
from pipeline.geometry.propermotion import positions_at_epoch
from pipeline.geometry.zenith import ZenithAxis

if TYPE_CHECKING:
    from astropy.time import Time

__all__ = [
    "TDIModel",
    "Track",
    "TrackShape",
    "first_order_bow",
    "first_order_smear",
    "positions_at_epoch",
]

log = logging.getLogger(__name__)

_GAUSS_ORDER = 16


def _starts(sizes: np.ndarray) -> np.ndarray:
    """First index of each of consecutive groups of these sizes."""
    return np.cumsum(sizes) - sizes


def _members(sizes: np.ndarray, groups: np.ndarray) -> np.ndarray:
    """Indices of the points of ``groups`` (in order) among consecutive groups of ``sizes``."""
    starts = _starts(sizes)[groups]
    parts = [np.arange(lo, lo + n) for lo, n in zip(starts, sizes[groups], strict=True)]
    return np.concatenate(parts) if parts else np.empty(0, dtype=np.intp)


@dataclass(frozen=True)
class Track:
    """A star's path across the chip, sampled uniformly in time.

    Each sample stands for an equal share of the exposure (samples sit at the
    midpoints of ``n_samples`` equal time steps), so the track is the smear
    kernel: the recorded image is the PSF averaged over the samples.

    Attributes
    ----------
    t : ndarray, shape (n_star, n_samples)
        Seconds since the model's ``start``.
    u, v : ndarray, shape (n_star, n_samples)
        Detector row (along the scan) and column coordinates, pixels.
    r, c : ndarray, shape (n_star, n_samples)
        Strip row (along the scan) and column, pixels.
    """

    t: np.ndarray
    u: np.ndarray
    v: np.ndarray
    r: np.ndarray
    c: np.ndarray


@dataclass(frozen=True)
class TrackShape:
    """Measures of the distortion of stars' tracks (all pixels).

    Attributes
    ----------
    slip : ndarray
        Along-scan advance of the star relative to its charge packet over the
        crossing, ``N - (t_exit - t_enter) / line_time``; positive when the
        star ends ahead of its packet (in the drift direction).  In the strip
        the track runs from ``r`` to ``r - slip``: its along-scan smear length
        is ``|slip|``.
    sagitta : ndarray
        Largest cross-scan deviation of the track from the chord joining its
        ends, signed: positive when the ends lie north of the middle.
    along_rms : ndarray
        Standard deviation of the strip row over the crossing (uniform in
        time): the rms along-scan smear.
    centroid_offset : ndarray
        Cross-scan offset of the time-mean column from the column at
        mid-crossing, positive north.
    """

    slip: np.ndarray
    sagitta: np.ndarray
    along_rms: np.ndarray
    centroid_offset: np.ndarray


class TDIModel:
    """Exact geometry of a TDI camera on a zenith telescope over a time span.

    Parameters
    ----------
    site : Site
        The observing site.
    camera : Camera
        The camera.
    start : `~astropy.time.Time`
        Epoch at which strip row 0 was shifted into the serial register.
    duration_s : float
        Length of the stretch to model, seconds.  The model is valid from
        about two crossing times before ``start`` to two after the end
        (:attr:`t_range`).
    node_spacing_s : float, optional
        Spacing of the astropy evaluations of the axis (see
        :class:`~pipeline.geometry.zenith.ZenithAxis`).
    line_time : float or None, optional
        Seconds between row shifts; overrides ``camera.line_time``.  ``None``
        (and ``camera.line_time`` None) means the line time matching the
        drift at the chip centre.
    field_margin : float, optional
        The sky map is fitted over a square of half-size ``field_margin``
        times the chip's half-diagonal; positions beyond it come out NaN.

    Notes
    -----
    Angles in and out are degrees (ICRS, at the observation epoch: apply
    proper motion first with :func:`positions_at_epoch`); detector and strip
    coordinates are pixels; times are seconds since ``start``.  All methods
    are vectorised and broadcast their array arguments.
    """

    def __init__(
        self,
        site: Site,
        camera: Camera,
        start: Time,
        duration_s: float,
        *,
        node_spacing_s: float = 300.0,
        line_time: float | None = None,
        field_margin: float = 1.25,
    ) -> None:
        from astropy.time import Time

        if not isinstance(start, Time):
            raise TypeError(f"start must be an astropy Time; got {type(start).__name__}.")
        if not duration_s >= 0:
            raise ValueError(f"duration_s must be >= 0 seconds; got {duration_s}.")
        if abs(site.latitude) > 85:
            raise ValueError(
                f"site.latitude={site.latitude} deg: the drift model needs |latitude| <= 85 deg."
            )
        if not -90 < camera.rotation < 90:
            raise ValueError(
                f"camera.rotation must lie in (-90, 90) deg (use flip_rows/flip_columns for "
                f"reversed axes); got {camera.rotation}."
            )
        self.site = site
        self.camera = camera
        self.start = start
        self.duration = float(duration_s)
        self._f = resolve_focal_length(site, camera)
        self._p = camera.pixel_size * 1e-6 / self._f
        self._N = camera.tdi_rows
        self._vc = (camera.n_columns - 1) / 2.0
        rot = np.radians(camera.rotation)
        self._cos, self._sin = np.cos(rot), np.sin(rot)
        self._k1 = float(camera.distortion_k1)

        corner = self._p * np.hypot(self._N / 2.0, camera.n_columns / 2.0)
        if self._k1 != 0.0 and 1.0 + 3.0 * self._k1 * (2.0 * corner) ** 2 <= 0:
            raise ValueError(
                f"camera.distortion_k1={self._k1} rad^-2 folds the field over inside the chip; "
                "use a smaller |k1|."
            )
        radius = field_margin * float(self._undistort_radius(np.array(corner)))
        if radius > 0.2:
            raise ValueError(
                f"The camera's field (corner {np.degrees(corner):.2f} deg from the axis, "
                f"x field_margin={field_margin}) exceeds the 0.2 rad a zenith model covers; "
                "check pixel_size, focal_length and the chip size."
            )
        rough_crossing = (
            self._N * self._p / (EARTH_ROTATION_RATE * np.cos(np.radians(site.latitude)))
        )
        margin = 2.0 * rough_crossing + node_spacing_s
        self.axis = ZenithAxis(
            site,
            start,
            -margin,
            self.duration + margin,
            radius,
            tilt_east=camera.tilt_east,
            tilt_north=camera.tilt_north,
            node_spacing_s=node_spacing_s,
        )
        # Time step of the numerical drift rates: a star must stay on the
        # mapped field during it, and a small chip is crossed in well under 1 s.
        self._h = min(1.0, rough_crossing / 8.0)
        self._drift = self._drift_rate(self.duration / 2.0, h=self._h)
        if not self._drift > 0:
            raise ValueError(
                "the model gives no forward drift along the rows; check camera.rotation."
            )
        if line_time is None:
            line_time = camera.line_time
        self._dt = 1.0 / self._drift if line_time is None else float(line_time)
        if not self._dt > 0:
            raise ValueError(f"line_time must be positive seconds; got {line_time}.")
        ra0, _ = self.axis.axis_icrs(np.array(self.axis.t_range))
        self._ra_rate = float((ra0[1] - ra0[0]) / (self.axis.t_range[1] - self.axis.t_range[0]))
        log.info(
            "TDI model: f=%.4f m, %.4f arcsec/px, line time %.6f s, crossing %.3f s",
            self._f,
            self.pixel_scale,
            self._dt,
            self.crossing_time,
        )

    # -------------------------------------------------------------- properties
    @property
    def focal_length(self) -> float:
        """Focal length, metres."""
        return self._f

    @property
    def pixel_angle(self) -> float:
        """``p = pixel_size / focal_length``: focal-plane radians per pixel."""
        return self._p

    @property
    def geometric_pixel_scale(self) -> float:
        """Plate scale before refraction and aberration, arcsec per pixel."""
        return float(plate_scale(self.camera.pixel_size, self._f))

    @property
    def pixel_scale(self) -> float:
        """On-sky (ICRS) scale at the axis at mid-span, arcsec per pixel.

        Includes refraction (which compresses the observed field, so each
        pixel sees more sky) and aberration.
        """
        jac = self.axis.linear_map(self.duration / 2.0)
        return self._p / np.sqrt(abs(np.linalg.det(jac))) * ARCSEC_PER_RADIAN

    @property
    def line_time(self) -> float:
        """Seconds between row shifts."""
        return self._dt

    @property
    def matched_line_time(self) -> float:
        """Line time that matches the drift at the chip centre at mid-span, seconds."""
        return 1.0 / self._drift

    @property
    def drift_rate(self) -> float:
        """Drift of a star across the chip centre at mid-span, rows per second."""
        return self._drift

    @property
    def crossing_time(self) -> float:
        """``N * line_time``: the effective exposure time, seconds."""
        return self._N * self._dt

    @property
    def n_rows(self) -> int:
        """``N``, the number of TDI rows."""
        return self._N

    @property
    def latitude(self) -> float:
        """Site latitude, degrees."""
        return self.site.latitude

    @property
    def t_range(self) -> tuple[float, float]:
        """Times (seconds since ``start``) over which the model is valid."""
        return self.axis.t_range

    @property
    def sidereal_period(self) -> float:
        """Mean time for the axis to return to the same ICRS RA over the span, seconds."""
        return 2.0 * np.pi / self._ra_rate

    # ------------------------------------------------------- detector mapping
    def _distort_radius(self, rho: np.ndarray) -> np.ndarray:
        return rho * (1.0 + self._k1 * rho * rho)

    def _undistort_radius(self, rho_d: np.ndarray) -> np.ndarray:
        rho = np.array(rho_d, dtype=float)
        if self._k1 == 0.0:
            return rho
        for _ in range(6):  # Newton; k1 rho^2 << 1 so this reaches machine precision
            rho = rho - (self._distort_radius(rho) - rho_d) / (1.0 + 3.0 * self._k1 * rho * rho)
        return rho

    def _to_detector(self, xi: np.ndarray, eta: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        xc = xi * self._cos + eta * self._sin
        ec = -xi * self._sin + eta * self._cos
        if self._k1 != 0.0:
            scale = 1.0 + self._k1 * (xc * xc + ec * ec)
            xc, ec = xc * scale, ec * scale
        return xc / self._p + self._N / 2.0, ec / self._p + self._vc

    def _from_detector(self, u: np.ndarray, v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        xc = (np.asarray(u, dtype=float) - self._N / 2.0) * self._p
        ec = (np.asarray(v, dtype=float) - self._vc) * self._p
        if self._k1 != 0.0:
            rho_d = np.hypot(xc, ec)
            with np.errstate(invalid="ignore", divide="ignore"):
                scale = np.where(rho_d > 0, self._undistort_radius(rho_d) / rho_d, 1.0)
            xc, ec = xc * scale, ec * scale
        return xc * self._cos - ec * self._sin, xc * self._sin + ec * self._cos

    def focal_plane(
        self, ra: ArrayLike, dec: ArrayLike, t: ArrayLike
    ) -> tuple[np.ndarray, np.ndarray]:
        """Detector coordinates of stars at times ``t``.

        Parameters
        ----------
        ra, dec : array_like
            ICRS coordinates at the observation epoch, degrees.
        t : array_like
            Seconds since ``start``.  Broadcast with ``ra`` and ``dec``.

        Returns
        -------
        u, v : ndarray
            Detector row (along the scan, 0 to N) and column coordinates,
            pixels.  NaN outside the modelled field or time range.
        """
        xi, eta = self.axis.icrs_to_focal(np.radians(ra), np.radians(dec), t)
        return self._to_detector(xi, eta)

    def sky_from_focal_plane(
        self, u: ArrayLike, v: ArrayLike, t: ArrayLike
    ) -> tuple[np.ndarray, np.ndarray]:
        """ICRS (ra, dec) in degrees seen at detector position (u, v) at time ``t``.

        Inverse of :meth:`focal_plane`; RA in [0, 360).
        """
        xi, eta = self._from_detector(u, v)
        ra, dec = self.axis.focal_to_icrs(xi, eta, t)
        return np.degrees(ra) % 360.0, np.degrees(dec)

    def strip_from_sky(
        self, ra: ArrayLike, dec: ArrayLike, t: ArrayLike
    ) -> tuple[np.ndarray, np.ndarray]:
        """Strip (row, column) where charge deposited at time ``t`` lands, pixels."""
        u, v = self.focal_plane(ra, dec, t)
        return np.asarray(t, dtype=float) / self._dt + self._N - u, v

    def sky_from_strip(
        self, r: ArrayLike, c: ArrayLike, u: ArrayLike | None = None
    ) -> tuple[np.ndarray, np.ndarray]:
        """Sky position (ICRS degrees) of strip pixel coordinates.

        Parameters
        ----------
        r, c : array_like
            Strip row (along the scan) and column, pixels.
        u : array_like or None, optional
            Detector row at which the charge was deposited; default ``N / 2``
            (the chip centre, i.e. the star's mid-crossing for a matched
            clock).  The time is ``t = (r - N + u) * line_time``.

        Returns
        -------
        ra, dec : ndarray
            Degrees.
        """
        u = self._N / 2.0 if u is None else np.asarray(u, dtype=float)
        t = (np.asarray(r, dtype=float) - self._N + u) * self._dt
        return self.sky_from_focal_plane(u, c, t)

    # ----------------------------------------------------------- crossings
    def _drift_rate(self, t_ref: float, h: float = 1.0) -> float:
        """du/dt for a star at the chip centre at ``t_ref``, rows per second."""
        ra, dec = self.sky_from_focal_plane(self._N / 2.0, self._vc, t_ref)
        u, _ = self.focal_plane(ra, dec, np.array([t_ref - h, t_ref + h]))
        return float((u[1] - u[0]) / (2.0 * h))

    def _solve_u(
        self,
        ra: np.ndarray,
        dec: np.ndarray,
        t: np.ndarray,
        target: float,
        rate,
        ends: np.ndarray | None = None,
    ) -> np.ndarray:
        """Newton steps with slope ``rate`` for the times at which u = target.

        ``ends``: the points form groups ``ends[g]:ends[g + 1]``, each stepped
        as if alone (until its own steps are all below 1e-9 s, at most 30),
        with one :meth:`focal_plane` call per step for the points of every
        group still stepping (a call has a fixed cost of ~0.1 ms, and the
        smear kernels' searches are of a few hundred stars); None: one group.
        Every point's arithmetic is elementwise, so a group's times are the
        same whatever other groups are solved with it.
        """
        t = np.array(t, dtype=float)  # stepped in place
        rate = np.broadcast_to(rate, t.shape)
        sizes = np.diff(np.array([0, t.size]) if ends is None else ends)
        stepping = np.flatnonzero(sizes)
        points = slice(None) if stepping.size == sizes.size else _members(sizes, stepping)
        for _ in range(30):
            u, _ = self.focal_plane(ra[points], dec[points], t[points])
            step = (u - target) / rate[points]
            t[points] -= step
            if not stepping.size:
                break
            still = np.logical_or.reduceat(np.abs(step) > 1e-9, _starts(sizes[stepping]))
            if not still.all():
                stepping = stepping[still]
                if not stepping.size:
                    break
                points = _members(sizes, stepping)
        return t

    def crossing_window(
        self, ra: ArrayLike, dec: ArrayLike, *, after: float = 0.0
    ) -> tuple[np.ndarray, np.ndarray]:
        """Times at which stars enter (u = 0) and leave (u = N) the chip.

        Parameters
        ----------
        ra, dec : array_like
            ICRS degrees at the observation epoch.
        after : float, optional
            Return the first crossing that ends at or after this time
            (seconds since ``start``).

        Returns
        -------
        t_enter, t_exit : ndarray
            Seconds since ``start``; NaN where the star is outside the
            modelled field (too far across the scan) or the crossing falls
            outside :attr:`t_range`.
        """
        ra, dec = np.broadcast_arrays(np.asarray(ra, dtype=float), np.asarray(dec, dtype=float))
        t_enter, t_exit = self.crossing_windows(ra.ravel(), dec.ravel(), [after], [ra.size])
        return t_enter.reshape(ra.shape), t_exit.reshape(ra.shape)

    def crossing_windows(
        self, ra: np.ndarray, dec: np.ndarray, afters, sizes
    ) -> tuple[np.ndarray, np.ndarray]:
        """:meth:`crossing_window` of groups of stars, each with its own ``after``, at once.

        ``ra`` and ``dec`` (1-D, degrees) hold the groups one after the
        other, ``sizes[g]`` stars with ``afters[g]``.  Each group's times are
        those :meth:`crossing_window` gives it alone (the same steps, to the
        bit); only the :meth:`focal_plane` calls are shared.
        """
        ra = np.asarray(ra, dtype=float)
        dec = np.asarray(dec, dtype=float)
        sizes = np.asarray(sizes, dtype=np.intp)
        ends = np.r_[0, np.cumsum(sizes)]
        after = np.repeat(np.asarray(afters, dtype=float), sizes)
        rate0 = self._drift
        # first guess: the first time after t_b at which the axis RA reaches the
        # star's; t_b is a whole crossing early so that slow (long) crossings
        # ending just after ``after`` are not missed; early ones are moved on
        # by a sidereal period below.
        # (clamped to the modelled span: the axis is NaN before it)
        t_b = np.maximum(np.asarray(afters, dtype=float) - self._N / rate0, self.t_range[0])
        ra0_b, _ = self.axis.axis_icrs(t_b)
        lag = np.mod(np.radians(ra) - np.repeat(ra0_b, sizes), 2.0 * np.pi) / self._ra_rate
        t_mid = self._solve_u(ra, dec, np.repeat(t_b, sizes) + lag, self._N / 2.0, rate0, ends)
        t_enter = np.empty_like(t_mid)
        t_exit = np.empty_like(t_mid)
        groups = np.flatnonzero(sizes)  # those whose window is (still) sought
        for attempt in range(2):
            points = _members(sizes, groups)
            part = np.r_[0, np.cumsum(sizes[groups])]
            p_ra, p_dec, p_mid = ra[points], dec[points], t_mid[points]
            h = self._h
            up, _ = self.focal_plane(p_ra, p_dec, p_mid + h)
            um, _ = self.focal_plane(p_ra, p_dec, p_mid - h)
            rate = (up - um) / (2.0 * h)
            enter = self._solve_u(p_ra, p_dec, p_mid - 0.5 * self._N / rate, 0.0, rate, part)
            leave = self._solve_u(
                p_ra, p_dec, p_mid + 0.5 * self._N / rate, float(self._N), rate, part
            )
            t_enter[points], t_exit[points] = enter, leave
            late = leave < after[points]
            if not groups.size or attempt == 1:
                break
            again = np.logical_or.reduceat(late, part[:-1])
            if not again.any():
                break
            # a crossing that ended before ``after``: the next transit
            p_mid = np.where(late, p_mid + self.sidereal_period, p_mid)
            keep = np.repeat(again, sizes[groups])
            groups = groups[again]
            t_mid[points[keep]] = self._solve_u(
                p_ra[keep],
                p_dec[keep],
                p_mid[keep],
                self._N / 2.0,
                rate0,
                np.r_[0, np.cumsum(sizes[groups])],
            )
        return t_enter, t_exit

    def track(
        self, ra: ArrayLike, dec: ArrayLike, n_samples: int = 64, *, after: float = 0.0
    ) -> Track:
        """The sampled strip curve (smear kernel) of each star.

        Parameters
        ----------
        ra, dec : array_like
            ICRS degrees; broadcast together and flattened to ``n_star``.
        n_samples : int, optional
            Samples per star, at the midpoints of equal time steps over the
            crossing.
        after : float, optional
            Use the first crossing ending at or after this time (see
            :meth:`crossing_window`).

        Returns
        -------
        Track
            Arrays of shape ``(n_star, n_samples)``.
        """
        ra, dec = (
            a.ravel() for a in np.broadcast_arrays(np.asarray(ra, float), np.asarray(dec, float))
        )
        (track,) = self.tracks_of_groups(ra, dec, n_samples, [after])
        return track

    def tracks_of_groups(
        self, ra: np.ndarray, dec: np.ndarray, n_samples: int, afters, sizes=None
    ) -> list[Track]:
        """:meth:`track` of groups of stars, each with its own ``after``, at once.

        ``ra``, ``dec``, ``afters`` and ``sizes`` as :meth:`crossing_windows`
        takes them (``sizes`` None: one group).  Each group's track is the one
        :meth:`track` gives it alone: its crossing window is searched with the
        others' (:meth:`crossing_windows`), then sampled alone.
        """
        if n_samples < 1:
            raise ValueError(f"n_samples must be >= 1; got {n_samples}.")
        ra = np.asarray(ra, dtype=float)
        dec = np.asarray(dec, dtype=float)
        sizes = [ra.size] if sizes is None else sizes
        t_enter, t_exit = self.crossing_windows(ra, dec, afters, sizes)
        return [
            self.track_in_window(ra[lo:hi], dec[lo:hi], t_enter[lo:hi], t_exit[lo:hi], n_samples)
            for lo, hi in itertools.pairwise(np.r_[0, np.cumsum(sizes)])
        ]

    def track_in_window(
        self, ra: np.ndarray, dec: np.ndarray, t0: np.ndarray, t1: np.ndarray, n_samples: int
    ) -> Track:
        """The :meth:`track` of stars (1-D, degrees) over their crossing windows ``[t0, t1]``.

        With the windows of :meth:`crossing_window` (or :meth:`crossing_windows`)
        it is :meth:`track`, to the bit.
        """
        if n_samples < 1:
            raise ValueError(f"n_samples must be >= 1; got {n_samples}.")
        frac = (np.arange(n_samples) + 0.5) / n_samples
        t = t0[:, None] + (t1 - t0)[:, None] * frac
        u, v = self.focal_plane(ra[:, None], dec[:, None], t)
        return Track(t=t, u=u, v=v, r=t / self._dt + self._N - u, c=v)

    def recorded_centroid(
        self, ra: ArrayLike, dec: ArrayLike, *, after: float = 0.0
    ) -> tuple[np.ndarray, np.ndarray]:
        """Time-mean strip position of each star's track, pixels.

        Gauss-Legendre quadrature of order 16 over the crossing; the track is
        a low-order polynomial in time, so this is exact to ~1e-9 px.  This
        is where a star's image is centred in the strip (DEVELOPERS.md, "Track geometry":
        astrometry must use it, not the track's apex).

        Parameters
        ----------
        ra, dec : array_like
            ICRS degrees at the observation epoch.
        after : float, optional
            Use the first crossing ending at or after this time (see
            :meth:`crossing_window`).

        Returns
        -------
        r_mean, c_mean : ndarray
            Strip row and column, broadcast shape of ``ra`` and ``dec``.
        """
        ra, dec = np.broadcast_arrays(np.asarray(ra, dtype=float), np.asarray(dec, dtype=float))
        return self._time_mean(ra, dec, *self.crossing_window(ra, dec, after=after))

    def recorded_centroids(
        self, ra: np.ndarray, dec: np.ndarray, afters, sizes
    ) -> list[tuple[np.ndarray, np.ndarray]]:
        """:meth:`recorded_centroid` of groups of stars, each with its own ``after``, at once.

        ``ra``, ``dec`` (1-D), ``afters`` and ``sizes`` as
        :meth:`crossing_windows` takes them.  Each group's ``(r_mean, c_mean)``
        is the one :meth:`recorded_centroid` gives it alone: its crossing
        window is searched with the others', then averaged alone.
        """
        ra = np.asarray(ra, dtype=float)
        dec = np.asarray(dec, dtype=float)
        t0, t1 = self.crossing_windows(ra, dec, afters, sizes)
        return [
            self._time_mean(ra[lo:hi], dec[lo:hi], t0[lo:hi], t1[lo:hi])
            for lo, hi in itertools.pairwise(np.r_[0, np.cumsum(sizes)])
        ]

    def _time_mean(self, ra, dec, t0, t1) -> tuple[np.ndarray, np.ndarray]:
        """Strip ``(r, c)`` of the tracks averaged over the windows ``[t0, t1]`` (16-point rule)."""
        x, w = np.polynomial.legendre.leggauss(_GAUSS_ORDER)
        t = 0.5 * (t0 + t1)[..., None] + 0.5 * (t1 - t0)[..., None] * x
        u, v = self.focal_plane(ra[..., None], dec[..., None], t)
        r = t / self._dt + self._N - u
        return 0.5 * (r @ w), 0.5 * (v @ w)

    def track_shape(self, ra: ArrayLike, dec: ArrayLike, n_samples: int = 4001) -> TrackShape:
        """Slip, sagitta, rms smear and centroid offset of stars' tracks.

        Parameters
        ----------
        ra, dec : array_like
            ICRS degrees; broadcast together and flattened.
        n_samples : int, optional
            Samples from entry to exit, both included (sagitta and rms).

        Returns
        -------
        TrackShape
            Arrays of shape ``(n_star,)``.
        """
        ra, dec = (
            a.ravel() for a in np.broadcast_arrays(np.asarray(ra, float), np.asarray(dec, float))
        )
        t0, t1 = self.crossing_window(ra, dec)
        t = t0[:, None] + (t1 - t0)[:, None] * np.linspace(0.0, 1.0, n_samples)
        u, v = self.focal_plane(ra[:, None], dec[:, None], t)
        frac = np.linspace(0.0, 1.0, n_samples)
        dev = v[:, :1] + (v[:, -1:] - v[:, :1]) * frac - v
        sagitta = np.take_along_axis(dev, np.argmax(np.abs(dev), axis=1)[:, None], 1)[:, 0]
        r = t / self._dt + self._N - u
        # trapezoid-weighted moments of r (uniform in time)
        w = np.full(n_samples, 1.0 / (n_samples - 1))
        w[[0, -1]] *= 0.5
        r_mean = r @ w
        along_rms = np.sqrt(((r - r_mean[:, None]) ** 2) @ w)
        _, c_mean = self.recorded_centroid(ra, dec)
        _, v_mid = self.focal_plane(ra, dec, 0.5 * (t0 + t1))
        return TrackShape(
            slip=self._N - (t1 - t0) / self._dt,
            sagitta=sagitta,
            along_rms=along_rms,
            centroid_offset=c_mean - v_mid,
        )

    def axis_radec(self, t: ArrayLike) -> tuple[np.ndarray, np.ndarray]:
        """ICRS RA (in [0, 360)) and Dec of the optical axis at times ``t``, degrees."""
        ra, dec = self.axis.axis_icrs(t)
        return np.degrees(ra) % 360.0, np.degrees(dec)


# ------------------------------------------------------------------ first order
def first_order_smear(
    latitude_deg: ArrayLike,
    column_offset_px: ArrayLike,
    n_rows: int,
    pixel_scale_arcsec: float,
) -> np.ndarray:
    """First-order along-scan slip of a star relative to its charge packet, pixels.

    A star ``eta = column_offset * p`` radians north of the chip's centre
    line drifts at ``(1 - eta tan(phi))`` times the centre rate, so over a
    crossing of ``N`` rows it slips by ``-N * eta * tan(phi)`` pixels
    (negative: it ends behind its packet, against the drift; DEVELOPERS.md,
    "Track geometry").  In the strip the recorded image is smeared along the scan
    by the magnitude of this slip; stars poleward of the centre lag.

    Parameters
    ----------
    latitude_deg : array_like
        Site latitude (declination of the chip centre), degrees.
    column_offset_px : array_like
        Column offset from the chip centre, pixels, positive north.
    n_rows : int
        TDI rows crossed.
    pixel_scale_arcsec : float
        Arcsec per pixel.

    Returns
    -------
    slip : ndarray
        Pixels along the scan, positive in the drift direction.
    """
    p = pixel_scale_arcsec / ARCSEC_PER_RADIAN
    eta = np.asarray(column_offset_px, dtype=float) * p
    return -n_rows * eta * np.tan(np.radians(latitude_deg))


def first_order_bow(
    latitude_deg: ArrayLike,
    n_rows: int,
    pixel_scale_arcsec: float,
    column_offset_px: ArrayLike = 0.0,
) -> np.ndarray:
    """First-order cross-scan sagitta of a star's track, pixels.

    The track is a small circle of declination ``delta``; in the gnomonic
    focal plane it bends by ``eta - eta0 = (xi^2 / 2) tan(delta)``, so over a
    chord of ``N`` rows its sagitta is ``N^2 p tan(delta) / 8`` pixels.  The
    ends lie poleward of the middle; the time-mean sits a third of the
    sagitta poleward of the meridian point.

    Parameters
    ----------
    latitude_deg : array_like
        Site latitude, degrees.
    n_rows : int
        TDI rows crossed.
    pixel_scale_arcsec : float
        Arcsec per pixel.
    column_offset_px : array_like, optional
        Column offset of the track from the chip centre at its meridian
        crossing, pixels north; sets ``delta = phi + atan(offset * p)``.

    Returns
    -------
    sagitta : ndarray
        Pixels, positive towards the north (negative in the south).
    """
    p = pixel_scale_arcsec / ARCSEC_PER_RADIAN
    delta = np.radians(latitude_deg) + np.arctan(np.asarray(column_offset_px, dtype=float) * p)
    return n_rows**2 * p * np.tan(delta) / 8.0
