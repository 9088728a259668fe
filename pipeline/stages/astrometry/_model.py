"""Fast prediction of recorded centroids for a family of camera geometries.

A :class:`~pipeline.geometry.TDIModel` answers "where is this star recorded"
for one geometry; the fit asks it for many nearby geometries, and for the
inverse, for many sky positions.  Rebuilding a model per trial costs an
astropy transform and a crossing search each time (``benchmarks/bench_astrometry.py``
measures it), so the expensive part is done once:

* :func:`sky_tracks` evaluates, per star, the focal-plane path ``(xi, eta)``
  about the *nominal* optical axis with :class:`~pipeline.geometry.ZenithAxis`
  (precession, nutation, aberration, refraction) at Chebyshev nodes of a time
  window around its transit, and keeps it as a polynomial in time;
* :meth:`GeometryPredictor.predict` applies a :class:`GeometryOffsets` to those
  paths with plain arithmetic: a tilt offset re-projects the gnomonic
  coordinates about the tilted axis (exactly, in the local east/north/up
  frame, as :func:`~pipeline.geometry.zenith.axis_basis_enu` defines it), then
  camera rotation, radial distortion and focal length give detector
  ``(u, v)`` as :class:`~pipeline.geometry.TDIModel` does; the crossing
  window ``0 <= u <= N`` is solved by Newton steps on the polynomial and the
  time-mean of the track by 8-point Gauss-Legendre quadrature (48 points,
  light-weighted by the sky's transparency, when
  :attr:`GeometryPredictor.transparency` is set: see
  :mod:`~pipeline.stages.astrometry._transparency`).

The clock offset and the line time enter the strip row linearly
(``r = (t - s) / dt + N - u``), so :class:`PredictedCentroids` keeps the
parts apart and the fit differentiates them analytically.

Times are seconds since the nominal model's ``start``; ``s`` > 0 means the
rows were really read ``s`` seconds later than the headers say.
"""

from __future__ import annotations

import dataclasses
import functools
import os
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike

from pipeline._threads import DaemonHelper, n_cpus
from pipeline.geometry.instrument import Camera
from pipeline.geometry.optics import ARCSEC_PER_RADIAN, EARTH_ROTATION_RATE
from pipeline.geometry.rectified import column_times
from pipeline.geometry.tdi import TDIModel
from pipeline.geometry.zenith import ZenithAxis, axis_basis_enu

__all__ = [
    "GeometryOffsets",
    "GeometryPredictor",
    "PredictedCentroids",
    "SkyTracks",
    "east_tilt_equivalent",
    "sky_tracks",
]

_GAUSS_ORDER = 8
#: Nodes of the light-weighted mean: a cloud's dip of ~a tenth of the crossing
#: (the demo's 25 s sigma in 188 s) needs ~4 nodes across it.
_GAUSS_ORDER_WEIGHTED = 48
_TRACK_DEGREE = 8
#: The axis basis of an untilted geometry (unused by the compiled loop, which
#: skips the re-projection then).
_NO_TILT = np.eye(3)
_NEWTON_STEPS = 3


def _by_segment(table: tuple[float, ...], number: np.ndarray) -> np.ndarray:
    """``table[number]``, 0 for numbers beyond the table (or negative)."""
    values = np.r_[np.asarray(table, dtype=float), 0.0]
    inside = (number >= 0) & (number < len(table))
    return values[np.where(inside, number, -1)]


@dataclass(frozen=True)
class GeometryOffsets:
    """Departures of the real geometry from the nominal (configured) one.

    Attributes
    ----------
    clock_offset : float
        Seconds by which the true time of every row read exceeds the header
        time (a late clock gives a positive value).
    line_time_scale : float
        Fractional error of the line time: the rows were shifted every
        ``line_time * (1 + line_time_scale)`` seconds.
    focal_scale : float
        Fractional error of the focal length: ``F = F_nominal * (1 + focal_scale)``.
    rotation : float
        Camera rotation added to the nominal one, arcseconds (same sense as
        :attr:`Camera.rotation`).
    tilt_east, tilt_north : float
        Optical-axis tilt added to the nominal one, arcseconds.
    distortion_k1 : float
        Radial distortion added to the nominal ``k1``, rad^-2.
    segment_clock : tuple of float
        Seconds added to ``clock_offset`` for the rows of each of the night's
        segments, by segment number (ingest's ``segment``; numbers beyond
        the tuple add 0): a segment's rows are timed from its first block's
        DATE-OBS, which may be off on its own (see
        :mod:`~pipeline.stages.astrometry._segments`).
    segment_start : tuple of float
        Not fitted: the nominal time from night row 0 to each segment's
        first row, seconds (its first night row times the nominal line
        time), by segment number.  Each segment's rows are timed from its
        own first DATE-OBS, so a line time off by ``line_time_scale`` moves
        them by ``line_time_scale`` times their time since that segment's
        start, not since the night's: the segment's clock gains
        ``-line_time_scale * segment_start`` (:meth:`clock_offsets`), and
        ``segment_clock`` is the error of its DATE-OBS alone.
    """

    clock_offset: float = 0.0
    line_time_scale: float = 0.0
    focal_scale: float = 0.0
    rotation: float = 0.0
    tilt_east: float = 0.0
    tilt_north: float = 0.0
    distortion_k1: float = 0.0
    segment_clock: tuple[float, ...] = ()
    segment_start: tuple[float, ...] = ()

    @property
    def has_segments(self) -> bool:
        """Whether rows of different segments may have different clocks."""
        return bool(self.segment_clock) or any(self.segment_start)

    def clock_offsets(self, segment: ArrayLike | None = None) -> float | np.ndarray:
        """The clock offset of rows in the given segments, seconds.

        Parameters
        ----------
        segment : array_like of int or None
            Segment number of each point; None (or no segments,
            :attr:`has_segments`): the night's ``clock_offset`` alone.

        Returns
        -------
        float or ndarray
            ``clock_offset`` plus each point's ``segment_clock`` entry, less
            ``line_time_scale`` times its ``segment_start`` entry.
        """
        if segment is None or not self.has_segments:
            return self.clock_offset
        number = np.asarray(segment, dtype=np.intp)
        return (
            self.clock_offset
            + _by_segment(self.segment_clock, number)
            - self.line_time_scale * _by_segment(self.segment_start, number)
        )

    def segment_clocks(self, segment: ArrayLike) -> np.ndarray:
        """Each point's ``segment_clock`` entry, seconds (0 without one): its DATE-OBS error."""
        return _by_segment(self.segment_clock, np.asarray(segment, dtype=np.intp))

    def segment_starts(self, segment: ArrayLike | None) -> float | np.ndarray:
        """Each point's ``segment_start`` entry, seconds (0 without one)."""
        if segment is None or not any(self.segment_start):
            return 0.0
        return _by_segment(self.segment_start, np.asarray(segment, dtype=np.intp))

    def apply(self, camera: Camera, line_time: float) -> tuple[Camera, float]:
        """The camera and line time these offsets describe, for a full :class:`TDIModel`.

        Parameters
        ----------
        camera : Camera
            Nominal camera (its focal length is resolved by the caller if it
            is given as a spin period: pass ``focal_length`` explicitly).
        line_time : float
            Nominal line time, seconds.

        Returns
        -------
        camera : Camera
        line_time : float
        """
        if camera.focal_length is None:
            raise ValueError(
                "GeometryOffsets.apply needs a camera with focal_length (metres); resolve "
                "the spin period first (pipeline.geometry.resolve_focal_length)."
            )
        true_camera = dataclasses.replace(
            camera,
            focal_length=camera.focal_length * (1.0 + self.focal_scale),
            rotation=camera.rotation + self.rotation / 3600.0,
            tilt_east=camera.tilt_east + self.tilt_east,
            tilt_north=camera.tilt_north + self.tilt_north,
            distortion_k1=camera.distortion_k1 + self.distortion_k1,
            line_time=None,
        )
        return true_camera, line_time * (1.0 + self.line_time_scale)


def east_tilt_equivalent(model: TDIModel, tilt_east: float) -> tuple[float, float]:
    """The clock offset and camera rotation that act like an east tilt of the axis.

    Tilting the axis ``tau`` to the east makes every star cross ``tau / w``
    seconds earlier, ``w`` the drift rate of the focal plane at the axis
    (``omega cos(phi)`` scaled by refraction and aberration: ``drift_rate *
    pixel_angle`` of the model), as a clock running that much late; and it
    turns the drift direction on the chip by ``tau tan(phi)``, because the
    local north of the tilted field differs from the ground's north (which
    the camera follows) by that angle (derived in-house).

    Parameters
    ----------
    model : TDIModel
        The nominal geometry.
    tilt_east : float
        Arcseconds.

    Returns
    -------
    clock_offset : float
        Seconds.
    rotation : float
        Arcseconds.
    """
    rate = model.drift_rate * model.pixel_angle
    tau = tilt_east / ARCSEC_PER_RADIAN
    return tau / rate, tilt_east * float(np.tan(np.radians(model.latitude)))


#: Points (stars x times) from which a prediction's compiled pass is split
#: between two threads (below, a thread hand-over costs more than it saves).
_SPLIT_POINTS = 16384


@functools.cache
def _helper_thread(pid: int | None = None) -> DaemonHelper | None:
    """One helper thread for the predictor's compiled passes; None on a single CPU.

    ``pid``: the calling process' (a process forked from one that made the
    thread gets its own).

    Night-wide, astrometry runs on one worker while the pool's other core
    idles; the compiled pass over the tracks releases the GIL, and so do
    numpy's loops in the sky tracks' evaluations, so half of each large
    prediction and of each large set of tracks runs here.
    """
    if n_cpus() < 2:
        return None
    return DaemonHelper("astrometry-predict")


@functools.cache
def _gauss_legendre(order: int) -> tuple[np.ndarray, np.ndarray]:
    """Gauss-Legendre nodes and weights on [-1, 1] (numpy's), made once per order."""
    x, w = np.polynomial.legendre.leggauss(order)
    x.flags.writeable = w.flags.writeable = False  # shared by every prediction
    return x, w


@dataclass(frozen=True)
class SkyTracks:
    """Focal-plane paths of stars about the nominal axis, as polynomials in time.

    Attributes
    ----------
    t_centre : ndarray, shape (n,)
        Centre of each star's time window, seconds since ``start``.
    half_width : float
        Half-length of the windows, seconds; the polynomial variable is
        ``z = (t - t_centre) / half_width`` in [-1, 1].
    coef : ndarray, shape (degree + 1, 2, n)
        Power-basis coefficients in ``z`` (highest power first) of ``xi`` and
        ``eta`` (radians).
    """

    t_centre: np.ndarray
    half_width: float
    coef: np.ndarray

    def __post_init__(self) -> None:
        # Held C-contiguous (the same values): a subset of stars
        # (``coef[:, :, index]``) comes out strided star-first, and the compiled
        # pass (:meth:`GeometryPredictor._track_detector`) would copy it on every
        # call (~1500 calls a night, 0.5 s of the 4096-column night's unit).
        object.__setattr__(self, "coef", np.ascontiguousarray(self.coef, dtype=float))
        object.__setattr__(self, "t_centre", np.ascontiguousarray(self.t_centre, dtype=float))

    def __len__(self) -> int:
        return self.t_centre.size

    def focal(self, t: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """``(xi, eta)`` at times ``t`` of shape ``(n,)`` or ``(n, k)``."""
        z = (t - (self.t_centre if t.ndim == 1 else self.t_centre[:, None])) / self.half_width
        c = self.coef if t.ndim == 1 else self.coef[..., None]
        xi = np.broadcast_to(c[0, 0], z.shape).copy()
        eta = np.broadcast_to(c[0, 1], z.shape).copy()
        for k in range(1, c.shape[0]):
            xi *= z
            xi += c[k, 0]
            eta *= z
            eta += c[k, 1]
        return xi, eta


def sky_tracks(
    axis: ZenithAxis,
    ra: ArrayLike,
    dec: ArrayLike,
    t_centre: ArrayLike,
    half_width: float,
    degree: int = _TRACK_DEGREE,
    *,
    helper=None,
) -> SkyTracks:
    """Fit each star's focal-plane path over ``t_centre +- half_width``.

    Parameters
    ----------
    axis : ZenithAxis
        The nominal axis; its field and time range must cover the windows.
    ra, dec : array_like, shape (n,)
        ICRS degrees at the observation epoch.
    t_centre : array_like, shape (n,)
        Window centres, seconds since ``axis.start``.
    half_width : float
        Seconds.
    degree : int, optional
        Polynomial degree; 8 keeps the interpolation error below 1e-6 px over
        windows of a few minutes (the paths are smooth: drift, bow, slow
        changes of precession and aberration).
    helper : concurrent.futures.Executor or None, optional
        Evaluates half of the points in another thread (see
        :meth:`ZenithAxis.icrs_to_focal`; the same values either way).

    Returns
    -------
    SkyTracks
    """
    ra = np.radians(np.asarray(ra, dtype=float)).ravel()
    dec = np.radians(np.asarray(dec, dtype=float)).ravel()
    t_centre = np.asarray(t_centre, dtype=float).ravel()
    k = np.arange(degree + 1)
    nodes = np.cos(np.pi * (k + 0.5) / (degree + 1))
    xi, eta = axis.icrs_to_focal(
        ra[:, None], dec[:, None], t_centre[:, None] + half_width * nodes[None, :], helper=helper
    )
    vander_inv = np.linalg.inv(np.vander(nodes, degree + 1))  # highest power first
    coef = np.stack([vander_inv @ xi.T, vander_inv @ eta.T], axis=1)
    return SkyTracks(t_centre=t_centre, half_width=float(half_width), coef=coef)


@dataclass(frozen=True)
class PredictedCentroids:
    """Recorded centroids, split into the parts the clock and line time act on.

    The strip row is ``r = (t_mid - clock_offset) / line_time + N - u_mean``.

    Attributes
    ----------
    t_mid : ndarray
        Middle of the crossing, seconds since ``start`` (true time); the
        light-weighted mean time when the predictor has a transparency.
    u_mean : ndarray
        Time-mean detector row over the crossing, pixels.
    column : ndarray
        Time-mean detector (= strip) column, pixels.
    """

    t_mid: np.ndarray
    u_mean: np.ndarray
    column: np.ndarray
    #: Entry and exit times of the crossing, seconds since ``start``.
    t_start: np.ndarray | None = None
    t_end: np.ndarray | None = None

    def rows(self, n_rows: int, line_time: float, clock_offset: float = 0.0) -> np.ndarray:
        """Strip rows of the centroids for a line time and clock offset."""
        return (self.t_mid - clock_offset) / line_time + n_rows - self.u_mean


class GeometryPredictor:
    """Recorded centroids of stars for any :class:`GeometryOffsets` of a nominal model.

    Parameters
    ----------
    model : TDIModel
        The nominal geometry (site, camera, start and line time of the night).
    time_margin : float, optional
        Seconds added to each star's time window beyond the crossing of the
        nominal chip (covers clock errors, tilts and stretched crossings of
        the search ranges).
    scale_margin : float, optional
        Fractional focal-length range the windows must cover.

    Notes
    -----
    The tracks are built with a :class:`ZenithAxis` of the nominal tilt whose
    field covers the windows; the polynomials reproduce it to better than
    1e-6 px.
    """

    def __init__(
        self, model: TDIModel, *, time_margin: float = 20.0, scale_margin: float = 0.05
    ) -> None:
        self.model = model
        camera = model.camera
        self.n_rows = model.n_rows
        self.line_time = model.line_time
        self.pixel_angle = model.pixel_angle
        self.v_centre = (camera.n_columns - 1) / 2.0
        self.rotation = np.radians(camera.rotation)
        self.distortion_k1 = float(camera.distortion_k1)
        self.tilt_east = float(camera.tilt_east)
        self.tilt_north = float(camera.tilt_north)
        self.basis = axis_basis_enu(self.tilt_east, self.tilt_north)
        cos_lat = np.cos(np.radians(model.latitude))
        crossing = self.n_rows * self.pixel_angle / (EARTH_ROTATION_RATE * cos_lat)
        self.half_width = 0.5 * crossing * (1.0 + scale_margin) + time_margin
        along = self.half_width * EARTH_ROTATION_RATE
        across = (0.5 * camera.n_columns + 8.0) * self.pixel_angle * (1.0 + scale_margin)
        tilt_room = 120.0 / ARCSEC_PER_RADIAN
        self.field_radius = 1.05 * max(along, across) + tilt_room
        self._axis: ZenithAxis | None = None
        self._axis_span: tuple[float, float] | None = None
        #: The last tilt asked for and its matrix, one tuple (see _tilted).
        self._tilt: tuple[tuple[float, float], np.ndarray] | None = None
        #: Relative transparency of the sky, a callable of true seconds since
        #: ``start`` (:class:`~pipeline.stages.astrometry.TransparencyCurve`):
        #: centroids are then light-weighted means of the tracks; None: time means.
        self.transparency = None

    # ---------------------------------------------------------------- tracks
    def _axis_for(self, t_lo: float, t_hi: float) -> ZenithAxis:
        if self._axis_span is None or t_lo < self._axis_span[0] or t_hi > self._axis_span[1]:
            lo = min(t_lo, self._axis_span[0]) if self._axis_span else t_lo
            hi = max(t_hi, self._axis_span[1]) if self._axis_span else t_hi
            self._axis = ZenithAxis(
                self.model.site,
                self.model.start,
                lo,
                hi,
                self.field_radius,
                tilt_east=self.tilt_east,
                tilt_north=self.tilt_north,
            )
            self._axis_span = self._axis.t_range
        return self._axis

    def tracks(self, ra: ArrayLike, dec: ArrayLike, t_mid_guess: ArrayLike) -> SkyTracks:
        """Tracks of stars whose crossing is centred near ``t_mid_guess``.

        Parameters
        ----------
        ra, dec : array_like, shape (n,)
            ICRS degrees at the observation epoch.
        t_mid_guess : array_like, shape (n,)
            Approximate middle of each crossing (seconds since ``start``),
            within ``time_margin`` of the truth.
        """
        t_mid_guess = np.asarray(t_mid_guess, dtype=float).ravel()
        if t_mid_guess.size == 0:
            return SkyTracks(np.empty(0), self.half_width, np.empty((_TRACK_DEGREE + 1, 2, 0)))
        axis = self._axis_for(
            float(t_mid_guess.min()) - self.half_width, float(t_mid_guess.max()) + self.half_width
        )
        return sky_tracks(
            axis, ra, dec, t_mid_guess, self.half_width, helper=_helper_thread(os.getpid())
        )

    def tracks_from_rectified(self, frame, x: ArrayLike, y: ArrayLike) -> SkyTracks:
        """Tracks of the sky positions of rectified pixels ``(x, y)`` of ``frame``."""
        ra, dec = frame.icrs_from_pixel(x, y)
        return self.tracks(ra, dec, self.mid_time_of_column(x))

    def mid_time_of_column(self, x: ArrayLike) -> np.ndarray:
        """Approximate crossing middle of a star in rectified column ``x``, seconds.

        One rectified column is one line time and a star's recorded row is
        its mid-crossing time over the line time plus ``N / 2``
        (:func:`pipeline.geometry.rectified.column_times`).
        """
        return column_times(x, self.line_time, self.n_rows)

    # ---------------------------------------------------------------- predict
    def _detector(
        self, xi: np.ndarray, eta: np.ndarray, offsets: GeometryOffsets
    ) -> tuple[np.ndarray, np.ndarray]:
        if offsets.tilt_east or offsets.tilt_north:
            # direction in east/north/up, then gnomonic about the tilted axis
            m = self._tilted(offsets.tilt_east, offsets.tilt_north)
            w = m[2, 0] * xi + m[2, 1] * eta + m[2, 2]
            xi, eta = (
                (m[0, 0] * xi + m[0, 1] * eta + m[0, 2]) / w,
                (m[1, 0] * xi + m[1, 1] * eta + m[1, 2]) / w,
            )
        angle = self.rotation + offsets.rotation / ARCSEC_PER_RADIAN
        cos, sin = np.cos(angle), np.sin(angle)
        xc = xi * cos + eta * sin
        ec = -xi * sin + eta * cos
        k1 = self.distortion_k1 + offsets.distortion_k1
        if k1 != 0.0:
            scale = 1.0 + k1 * (xc * xc + ec * ec)
            xc, ec = xc * scale, ec * scale
        p = self.pixel_angle / (1.0 + offsets.focal_scale)
        return xc / p + 0.5 * self.n_rows, ec / p + self.v_centre

    def _track_detector(
        self, tracks: SkyTracks, t: np.ndarray, offsets: GeometryOffsets
    ) -> tuple[np.ndarray, np.ndarray]:
        """``self._detector(*tracks.focal(t), offsets)`` in one compiled pass, to the bit.

        ``t`` has shape ``(n,)`` or ``(n, k)`` (see :meth:`SkyTracks.focal`);
        :func:`~pipeline.stages.astrometry._model_jit.track_detector` does the
        same arithmetic per point in the same order.
        """
        from pipeline.stages.astrometry._model_jit import track_detector

        t = np.asarray(t, dtype=float)
        t2 = t.reshape(t.shape[0], -1) if t.ndim == 1 else t
        tilt = bool(offsets.tilt_east or offsets.tilt_north)
        m = self._tilted(offsets.tilt_east, offsets.tilt_north) if tilt else _NO_TILT
        angle = self.rotation + offsets.rotation / ARCSEC_PER_RADIAN
        u = np.empty(t2.shape)
        v = np.empty(t2.shape)
        args = (
            np.ascontiguousarray(tracks.coef, dtype=float),
            np.ascontiguousarray(tracks.t_centre, dtype=float),
            float(tracks.half_width),
            np.ascontiguousarray(t2),
            tilt,
            m,
            float(np.cos(angle)),
            float(np.sin(angle)),
            float(self.distortion_k1 + offsets.distortion_k1),
            float(self.pixel_angle / (1.0 + offsets.focal_scale)),
            float(0.5 * self.n_rows),
            float(self.v_centre),
            u,
            v,
        )
        n = t2.shape[0]
        pool = _helper_thread(os.getpid()) if t2.size >= _SPLIT_POINTS else None
        if pool is None:
            track_detector(*args, 0, n)
        else:
            # the second half of the stars on the helper thread (the loop
            # releases the GIL): each point's arithmetic is the same either way
            half = n // 2
            other = pool.submit(track_detector, *args, half, n)
            track_detector(*args, 0, half)
            other.result()
        return u.reshape(t.shape), v.reshape(t.shape)

    def _tilted(self, tilt_east: float, tilt_north: float) -> np.ndarray:
        """The basis of the axis tilted by these offsets, in the nominal basis (rows).

        The last one is kept: a prediction asks for it about a dozen times.  Key
        and matrix are one tuple, read and replaced whole: predictions of other
        tilts in other threads never hand this one their matrix.
        """
        key = (tilt_east, tilt_north)
        kept = self._tilt
        if kept is None or kept[0] != key:
            new = axis_basis_enu(self.tilt_east + tilt_east, self.tilt_north + tilt_north)
            kept = self._tilt = (key, new @ self.basis.T)
        return kept[1]

    def _crossing(self, tracks: SkyTracks, offsets: GeometryOffsets, target: float, t, slope):
        for _ in range(_NEWTON_STEPS):
            u, _ = self._track_detector(tracks, t, offsets)
            t = t - (u - target) / slope
        return t

    def predict(
        self,
        tracks: SkyTracks,
        offsets: GeometryOffsets | None = None,
        *,
        light_weighted: bool = True,
    ) -> PredictedCentroids:
        """Recorded centroids of the tracked stars for a geometry.

        Parameters
        ----------
        tracks : SkyTracks
            From :meth:`tracks`.
        offsets : GeometryOffsets or None
            Departure from the nominal geometry; None for the nominal one.
        light_weighted : bool, optional
            Weight the track by :attr:`transparency` (if set); False: the
            time mean, as rectify's map of the nominal geometry places pixels.

        Returns
        -------
        PredictedCentroids
            NaN where a crossing leaves the tracked window.
        """
        offsets = offsets or GeometryOffsets()
        t_c = tracks.t_centre
        h = 0.25 * tracks.half_width
        u_plus, _ = self._track_detector(tracks, t_c + h, offsets)
        u_minus, _ = self._track_detector(tracks, t_c - h, offsets)
        slope = (u_plus - u_minus) / (2.0 * h)
        u_c = 0.5 * (u_plus + u_minus)
        t_mid = t_c + (0.5 * self.n_rows - u_c) / slope
        half = 0.5 * self.n_rows / slope
        t0 = self._crossing(tracks, offsets, 0.0, t_mid - half, slope)
        t1 = self._crossing(tracks, offsets, float(self.n_rows), t_mid + half, slope)
        mid = 0.5 * (t0 + t1)
        outside = (np.abs(t0 - t_c) > tracks.half_width) | (np.abs(t1 - t_c) > tracks.half_width)
        if self.transparency is None or not light_weighted:
            x, w = _gauss_legendre(_GAUSS_ORDER)
            t = mid[:, None] + 0.5 * (t1 - t0)[:, None] * x
            u, v = self._track_detector(tracks, t, offsets)
            u_mean = 0.5 * (u @ w)
            column = 0.5 * (v @ w)
        else:
            # light-weighted means of the track (module notes of _transparency)
            x, w = _gauss_legendre(_GAUSS_ORDER_WEIGHTED)
            t = mid[:, None] + 0.5 * (t1 - t0)[:, None] * x
            u, v = self._track_detector(tracks, t, offsets)
            light = w * self.transparency(np.nan_to_num(t))
            light = light / light.sum(axis=1, keepdims=True)
            mid = (t * light).sum(axis=1)
            u_mean = (u * light).sum(axis=1)
            column = (v * light).sum(axis=1)
        t0, t1 = t0.copy(), t1.copy()
        for a in (mid, u_mean, column, t0, t1):
            a[outside] = np.nan
        return PredictedCentroids(t_mid=mid, u_mean=u_mean, column=column, t_start=t0, t_end=t1)

    def strip(
        self, tracks: SkyTracks, offsets: GeometryOffsets | None = None
    ) -> tuple[np.ndarray, np.ndarray]:
        """Strip ``(row, column)`` of the tracks' time means for a geometry, pixels.

        The map rectify's pixels follow (never light-weighted): a detection's
        strip position is this map of its rectified position.
        """
        offsets = offsets or GeometryOffsets()
        pred = self.predict(tracks, offsets, light_weighted=False)
        dt = self.line_time * (1.0 + offsets.line_time_scale)
        return pred.rows(self.n_rows, dt, offsets.clock_offset), pred.column
