"""Synthetic nights for the astrometry tests and benchmark: detections with known truth.

The truth is a full :class:`~pipeline.geometry.TDIModel` of the mis-set
geometry (the clock offset moves its ``start``); each star's recorded centroid
(:meth:`TDIModel.recorded_centroid`) is carried into the night's rectified
frame through the rectify stage's own map of the *nominal* geometry
(:class:`~pipeline.stages.rectify._map.StripMap`, inverted by Newton steps), as
rectify and detect would place it, and Gaussian centroid noise is added.  An
optional image wander (a shift of the image in the strip) is averaged over
each star's true crossing, as the recorded image averages it.  Invented data
for self-consistency tests.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np
from astropy.time import Time, TimeDelta

from pipeline.geometry import (
    Camera,
    Site,
    TDIModel,
    normal_gravity,
    spin_period_from_focal_length,
)
from pipeline.geometry.rectified import RectifiedFrame
from pipeline.stages.astrometry import GeometryOffsets, solve_night
from pipeline.stages.astrometry._segments import NightSegments
from pipeline.stages.rectify._map import StripMap, crossing_after

#: The issue's mis-set geometry: clock 2 s late, focal length 1 % long,
#: rotation 0.05 deg, tilt 15" east and 10" south, plus a 20 ppm clock-rate
#: error of the line time (the header's line time itself is 0.1 % off the
#: true drift, see :func:`make_night`).
ISSUE_OFFSETS = GeometryOffsets(
    clock_offset=2.0,
    line_time_scale=20e-6,
    focal_scale=0.01,
    rotation=180.0,
    tilt_east=15.0,
    tilt_north=-10.0,
)


@dataclass(frozen=True)
class Wander:
    """Sinusoidal image wander in strip pixels: ``amplitude * sin(2 pi t / period + phase)``."""

    amplitude_row: float
    amplitude_column: float
    period: float
    phase: float = 0.3

    def mean_over(self, t0: np.ndarray, t1: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Time-mean of the wander over ``[t0, t1]`` (what a recorded image averages)."""
        w = 2.0 * np.pi / self.period
        mean = (np.cos(w * t0 + self.phase) - np.cos(w * t1 + self.phase)) / (w * (t1 - t0))
        return self.amplitude_row * mean, self.amplitude_column * mean


@dataclass(frozen=True)
class Night:
    """A synthetic night: nominal geometry, truth, reference stars and detections."""

    nominal: TDIModel
    true: TDIModel
    frame: RectifiedFrame
    offsets: GeometryOffsets
    ref_ra: np.ndarray
    ref_dec: np.ndarray
    x: np.ndarray
    y: np.ndarray
    sigma: float
    star: np.ndarray  # index into ref_ra of each detection, -1 for spurious ones
    t_mid: np.ndarray  # true crossing middle of each reference star
    wander: Wander | None
    segments: NightSegments | None = None  # with a gap: the two segments' rows
    segment: np.ndarray | None = None  # segment number of each detection


def _invert_map(strip_map: StripMap, r, c, x, y, steps: int = 6):
    for _ in range(steps):
        r0, c0 = strip_map(x, y)
        jac = strip_map.jacobian(x, y)
        d = np.linalg.solve(jac, np.stack([r - r0, c - c0], axis=-1)[..., None])[..., 0]
        x, y = x + d[..., 0], y + d[..., 1]
    return x, y


def make_night(
    latitude: float,
    *,
    offsets: GeometryOffsets = ISSUE_OFFSETS,
    wander: Wander | None = None,
    n_stars: int = 3000,
    sigma: float = 0.01,
    duration: float = 1800.0,
    n_columns: int = 512,
    focal_length: float = 3.0,
    drift_mismatch: float = 1e-3,
    seed: int = 1,
    spurious: float = 0.2,
    missed: float = 0.15,
    n_detections: int | None = None,
    spin: bool = False,
    gap: tuple[int, int] | None = None,
    segment_clock: float = 0.0,
) -> Night:
    """Build a night at ``latitude`` seen by a mis-set camera.

    Parameters
    ----------
    latitude : float
        Degrees.
    offsets : GeometryOffsets
        Truth minus nominal.
    wander : Wander or None
        Image wander to add.
    n_stars : int
        Reference stars spread over the night's rectified frame.
    sigma : float
        Gaussian centroid noise per coordinate, pixels.
    duration : float
        Night length, seconds.
    n_columns, focal_length : int, float
        Chip (square, 15 um pixels) and nominal focal length, metres.
    drift_mismatch : float
        The header's line time is ``1 + drift_mismatch`` times the line time
        matching the true drift.
    spurious, missed : float
        Fractions of detections without a reference star and of reference
        stars without a detection.
    n_detections : int or None
        Total detections (spurious ones make up the number); overrides
        ``spurious``.
    spin : bool
        Configure the nominal camera by the liquid mirror's spin period
        (giving ``focal_length``) instead of the focal length.
    gap : (int, int) or None
        Night rows ``[start, stop)`` without data: the night is two segments
        (``segments``), no detection lies in the gap.
    segment_clock : float
        Seconds by which the rows after the gap were really read later than
        their header times say, beyond the night's ``offsets.clock_offset``
        (the second segment's first DATE-OBS is that much early): their
        stars are recorded ``segment_clock / line_time`` rows earlier.  The
        camera reads the rows after the gap from that DATE-OBS on, every
        true line time, and ingest places the first at night row
        ``gap[1]`` by the header's: with ``offsets.line_time_scale`` ``e``
        the rows after the gap are timed from ``gap[1]`` nominal line times
        after the start, not ``gap[1]`` true ones, which puts their stars
        ``gap[1] e / (1 + e)`` rows later than a clock running through the
        gap would.
    """
    rng = np.random.default_rng(seed)
    site = Site(latitude=latitude, longitude=-70.5, height=1200.0, name="test site")
    start = Time("2026-04-11T02:00:00", scale="utc")
    base = Camera(
        n_columns=n_columns, tdi_rows=n_columns, pixel_size=15.0, focal_length=focal_length
    )
    true_camera, _ = offsets.apply(base, 1.0)
    matched = TDIModel(site, true_camera, start, duration).matched_line_time
    camera = dataclasses.replace(base, line_time=matched * (1.0 + drift_mismatch))
    configured = camera
    if spin:
        gravity = normal_gravity(site.latitude, site.height)
        configured = dataclasses.replace(
            camera,
            focal_length=None,
            spin_period=float(spin_period_from_focal_length(focal_length, gravity)),
        )
    nominal = TDIModel(site, configured, start, duration)
    true_camera, true_dt = offsets.apply(camera, nominal.line_time)
    true = TDIModel(
        site,
        true_camera,
        start + TimeDelta(offsets.clock_offset, format="sec"),
        duration,
        line_time=true_dt,
    )
    n_rows = int(duration / nominal.line_time)
    frame = RectifiedFrame.for_night(nominal, n_rows)
    n = nominal.n_rows
    xs = rng.uniform(1.5 * n, n_rows - 0.5 * n, n_stars)
    ys = rng.uniform(-0.05 * n_columns, frame.n_y + 0.05 * n_columns, n_stars)
    ra, dec = frame.icrs_from_pixel(xs, ys)
    r = np.empty(n_stars)
    c = np.empty(n_stars)
    t0 = np.empty(n_stars)
    t1 = np.empty(n_stars)
    after = crossing_after(true, 0.0) + xs * true.line_time
    for lo in range(0, n_stars, 500):
        sl = slice(lo, lo + 500)
        a = float(after[sl].min())
        r[sl], c[sl] = true.recorded_centroid(ra[sl], dec[sl], after=a)
        t0[sl], t1[sl] = true.crossing_window(ra[sl], dec[sl], after=a)
    # times since the nominal start
    t0 += offsets.clock_offset
    t1 += offsets.clock_offset
    if wander is not None:
        d_r, d_c = wander.mean_over(t0, t1)
        r, c = r + d_r, c + d_c
    on_chip = (c > 0.0) & (c < n_columns - 1.0) & (r > n) & (r < n_rows - 2)
    segments = None
    if gap is not None:
        after_gap = r >= gap[1] - 0.5
        restart = gap[1] * offsets.line_time_scale / (1.0 + offsets.line_time_scale)
        r = np.where(after_gap, r + restart - segment_clock / true.line_time, r)
        on_chip &= (r < gap[0] - 0.5) | (r >= gap[1] - 0.5)
        segments = NightSegments(
            numbers=np.array([0, 1]),
            starts=np.array([0, gap[1]]),
            stops=np.array([gap[0], n_rows]),
        )
    strip_map = StripMap(nominal, frame, -n, n_rows + n)
    x_det, y_det = _invert_map(strip_map, r, c, xs, ys)
    seen = on_chip & (rng.uniform(size=n_stars) > missed)
    star = np.flatnonzero(seen)
    x_det = x_det[star] + rng.normal(0.0, sigma, star.size)
    y_det = y_det[star] + rng.normal(0.0, sigma, star.size)
    n_fake = int(spurious * star.size) if n_detections is None else n_detections - star.size
    x_fake = rng.uniform(n, n_rows - 2, n_fake)
    y_fake = rng.uniform(0.0, frame.n_y - 1.0, n_fake)
    order = rng.permutation(star.size + n_fake)
    segment = None
    if segments is not None:
        rows_fake, _ = strip_map(x_fake, y_fake)
        segment = segments.of_rows(np.r_[r[star], rows_fake])[order]
    return Night(
        nominal=nominal,
        true=true,
        frame=frame,
        offsets=offsets,
        ref_ra=ra,
        ref_dec=dec,
        x=np.r_[x_det, x_fake][order],
        y=np.r_[y_det, y_fake][order],
        sigma=sigma,
        star=np.r_[star, np.full(n_fake, -1)][order],
        t_mid=0.5 * (t0 + t1),
        wander=wander,
        segments=segments,
        segment=segment,
    )


def solve_scene(night: Night, **kwargs):
    """:func:`solve_night` of a synthetic night's detections, weighted by its noise."""
    sigma = np.full(night.x.size, night.sigma)
    return solve_night(
        night.x,
        night.y,
        night.ref_ra,
        night.ref_dec,
        night.nominal,
        night.frame,
        x_err=sigma,
        y_err=sigma,
        **kwargs,
    )
