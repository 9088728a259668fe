"""Satellite trails: a bright point moving straight across the detector.

Private helpers of :mod:`pipeline.simulate`.  A satellite crosses the focal
plane in about a second, far faster than the stars drift, so its light lies
along a straight streak in the strip: charge deposited at detector position
``(u, v)`` at time ``t`` lands at strip row ``t / dt + N - u`` and column ``v``
(the strip mapping of :mod:`pipeline.geometry.tdi`), and ``(u, v)`` moves
linearly in ``t``.
"""

from __future__ import annotations

import numpy as np
from pydantic import BaseModel, ConfigDict, Field

__all__ = ["TrailOptions", "trail_samples"]

# Samples per rendered segment: each segment is rendered like a star with its
# own small stamp, so a trail across the whole chip never needs a chip-sized one.
_SEGMENT_SAMPLES = 32


class TrailOptions(BaseModel):
    """One satellite trail (an entry of ``simulate.trails``).

    The satellite's image moves in a straight line on the detector at
    ``speed``, in the direction ``angle`` from the scan axis (increasing
    detector row) towards increasing column, and passes ``offset`` pixels to
    the left of the chip centre (towards increasing column for ``angle = 0``)
    ``time`` seconds after row 0 of block 0 was really read.
    """

    model_config = ConfigDict(extra="forbid", frozen=True)

    time: float = Field(description="seconds after the night's start at the chip centre")
    angle: float = Field(60.0, description="degrees from the scan axis towards +column")
    speed: float = Field(0.5, gt=0, description="degrees per second on the sky")
    mag: float = Field(8.0, description="magnitude of the moving point (1 e-/s at zero_point)")
    offset: float = Field(0.0, description="pixels from the chip centre, across the motion")


def trail_samples(trail: TrailOptions, model, n_columns: int, margin: float, flux_rate: float):
    """Strip positions and electrons of a trail, in segments of equal samples.

    Parameters
    ----------
    trail : TrailOptions
        The trail.
    model : pipeline.geometry.tdi.TDIModel
        The true geometry (line time, TDI rows, pixel scale).
    n_columns : int
        Image columns.
    margin : float
        Pixels beyond the first and last column at which light still reaches
        the chip (the PSF's reach).
    flux_rate : float
        Electrons per second of the moving point.

    Returns
    -------
    r, c, t, w : ndarray, shape (n_segment, n_sample)
        Strip row, column, time (seconds since the night's start) and
        electrons of each sample (samples ~0.2 px apart); empty if the trail
        misses the chip.
    truth : dict
        The trail as recorded: its options, the detector velocity (pixels/s),
        entry and exit times (seconds since the night's start) and strip
        points, electrons per pixel of strip length and in total (before
        transparency and the column response; light of points beyond the
        first and last column partly misses the chip).
    """
    n_tdi, dt = model.n_rows, model.line_time
    speed_px = trail.speed * 3600.0 / model.pixel_scale
    a = np.radians(trail.angle)
    vel = np.array([np.cos(a), np.sin(a)]) * speed_px  # (du/dt, dv/dt)
    centre = np.array([n_tdi / 2.0, (n_columns - 1) / 2.0])
    centre += trail.offset * np.array([-np.sin(a), np.cos(a)])
    # Times at which the point lies on the light-collecting area: detector rows
    # [0, N], columns within the margin of the chip.
    t_lo, t_hi = -np.inf, np.inf
    for axis, (lo, hi) in enumerate(
        ((0.0, float(n_tdi)), (-0.5 - margin, n_columns - 0.5 + margin))
    ):
        if vel[axis] == 0.0:
            if not lo <= centre[axis] <= hi:
                t_lo, t_hi = 0.0, -1.0
            continue
        ends = sorted(((lo - centre[axis]) / vel[axis], (hi - centre[axis]) / vel[axis]))
        t_lo, t_hi = max(t_lo, ends[0]), min(t_hi, ends[1])
    record = {**trail.model_dump(), "du_dt": float(vel[0]), "dv_dt": float(vel[1])}
    strip_rate = float(np.hypot(1.0 / dt - vel[0], vel[1]))  # strip pixels per second
    record["electrons_per_pixel"] = flux_rate / strip_rate
    if not t_hi > t_lo:
        empty = np.zeros((0, _SEGMENT_SAMPLES))
        return empty, empty, empty, empty, {**record, "on_chip": False, "electrons": 0.0}
    length = (t_hi - t_lo) * strip_rate
    n_seg = max(1, int(np.ceil(length * 5.0 / _SEGMENT_SAMPLES)))
    n = n_seg * _SEGMENT_SAMPLES
    tau = t_lo + (t_hi - t_lo) * (np.arange(n) + 0.5) / n
    t = trail.time + tau
    r = t / dt + n_tdi - (centre[0] + vel[0] * tau)
    c = centre[1] + vel[1] * tau
    w = np.full(n, flux_rate * (t_hi - t_lo) / n)
    ends = {
        "on_chip": True,
        "t_enter": float(trail.time + t_lo),
        "t_exit": float(trail.time + t_hi),
        "r_enter": float(trail.time + t_lo) / dt + n_tdi - float(centre[0] + vel[0] * t_lo),
        "c_enter": float(centre[1] + vel[1] * t_lo),
        "r_exit": float(trail.time + t_hi) / dt + n_tdi - float(centre[0] + vel[0] * t_hi),
        "c_exit": float(centre[1] + vel[1] * t_hi),
        "electrons": float(flux_rate * (t_hi - t_lo)),
    }
    shape = (n_seg, _SEGMENT_SAMPLES)
    return (
        r.reshape(shape),
        c.reshape(shape),
        t.reshape(shape),
        w.reshape(shape),
        {**record, **ends},
    )
