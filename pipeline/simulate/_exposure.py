"""Light reaching the detector: sampled star tracks, sky, cloud, bleed trails.

Private helpers of :mod:`pipeline.simulate`; times are seconds since the
night's start (DATE-OBS of block 0), rows are night (strip) rows, axis 0 of
every image is the scan axis.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from pipeline.simulate._detector import bleed_along_columns
from pipeline.simulate._render import GaussianMixturePSF, render_tracks

__all__ = [
    "Tracks",
    "bleed_trails",
    "mean_transparency",
    "peak_fraction",
    "sample_tracks",
    "samples_needed",
    "sky_rows",
    "trails_in_block",
    "transparency",
]


def transparency(t: np.ndarray, duration: float, sky) -> np.ndarray:
    """Fraction of light passing the atmosphere's cloud at time ``t`` (seconds)."""
    if sky.cloud_depth == 0:
        return np.ones_like(np.asarray(t, dtype=float))
    centre = sky.cloud_time * duration
    return 1.0 - sky.cloud_depth * np.exp(-0.5 * ((t - centre) / sky.cloud_width) ** 2)


def mean_transparency(t_mid, crossing: float, *, depth: float, centre: float, width: float):
    """Mean transparency over crossings of ``crossing`` seconds centred on ``t_mid``.

    The mean of :func:`transparency` (a Gaussian dip of ``depth``, centre
    ``centre`` and sigma ``width`` seconds) over ``[t_mid - crossing / 2,
    t_mid + crossing / 2]``, in closed form with the error function.
    """
    from scipy.special import erf

    t_mid = np.asarray(t_mid, dtype=float)
    if depth == 0:
        return np.ones_like(t_mid)
    scale = np.sqrt(2.0) * width
    half = 0.5 * crossing
    upper = erf((t_mid + half - centre) / scale)
    lower = erf((t_mid - half - centre) / scale)
    return 1.0 - depth * width * np.sqrt(np.pi / 2.0) * (upper - lower) / crossing


def sky_rows(rows, *, dt, n_tdi, duration, sky_rate, sky, start_ramp: bool):
    """Sky electrons per pixel for night rows, integrated over each row's exposure.

    Row ``k`` is read at ``k dt`` and integrated from ``(k - N) dt`` (or from
    clock start, time 0, with the start ramp).
    """
    t_read = rows * dt
    t_begin = t_read - n_tdi * dt
    if start_ramp:
        t_begin = np.maximum(t_begin, 0.0)
    grid = np.arange(t_begin.min() - dt, t_read.max() + 2 * dt, dt / 4.0)
    rate = sky_rate * (1.0 + sky.sky_ramp * grid / duration)
    if sky.cloud_dims_sky:
        rate = rate * transparency(grid, duration, sky)
    cumulative = np.concatenate(([0.0], np.cumsum(0.5 * (rate[1:] + rate[:-1]) * np.diff(grid))))
    return np.interp(t_read, grid, cumulative) - np.interp(t_begin, grid, cumulative)


def peak_fraction(psf: GaussianMixturePSF) -> float:
    """Fraction of a static star's light in its central pixel (star at a pixel centre)."""
    from scipy.special import erf

    sig, frac = np.asarray(psf.sigmas), np.asarray(psf.weights)
    return float(np.sum(frac * erf(0.5 / (np.sqrt(2.0) * sig)) ** 2))


def samples_needed(coarse, samples_per_pixel: float) -> np.ndarray:
    """Samples per track so that successive samples are < 1/samples_per_pixel px apart.

    Rounded up a ladder (32, 48, 64, 92, ...) so that stars can be
    rendered in a few groups of equal sample count.
    """
    n_coarse = coarse.r.shape[1]
    length = np.hypot(np.diff(coarse.r, axis=1), np.diff(coarse.c, axis=1)).sum(axis=1)
    length = length * n_coarse / max(n_coarse - 1, 1)
    # At least 32: the midpoint rule shifts the mean of a bowed track of sagitta s
    # by s / (3 n^2), below 1e-3 px for every s once n >= 32 and n >= 10 s.
    needed = np.maximum(32, np.ceil(length * samples_per_pixel) + 1)
    ladder = 32 * 2 ** (np.arange(0, 20) / 2.0)  # 32, 45.3, 64, 90.5, ...
    ladder = np.ceil(ladder / 4) * 4
    return ladder[np.searchsorted(ladder, needed)].astype(int)


@dataclass
class Tracks:
    """Star tracks in groups of equal sample count, with per-star summaries.

    ``groups`` holds (star indices, r, c, weights) with arrays of shape
    (n_in_group, n_samples); the summaries are arrays over all stars.
    """

    groups: list[tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]]
    flux: np.ndarray  # e- over the full crossing at unit transparency
    recorded: np.ndarray  # e- deposited (before the column response)
    r_shift: np.ndarray  # light-weighted minus unweighted sample mean, rows
    c_shift: np.ndarray  # same, columns
    t_mid: np.ndarray  # mid-crossing time, s since start
    partial: np.ndarray  # exposure cut by the start ramp
    max_samples: int


def sample_tracks(model, ra, dec, flux_rate, n_needed, after, duration, options) -> Tracks:
    n = len(ra)
    out = Tracks(
        [],
        np.zeros(n),
        np.zeros(n),
        np.zeros(n),
        np.zeros(n),
        np.zeros(n),
        np.zeros(n, bool),
        int(n_needed.max(initial=0)),
    )
    for n_samp in np.unique(n_needed):
        idx = np.flatnonzero(n_needed == n_samp)
        track = model.track(ra[idx], dec[idx], int(n_samp), after=after)
        crossing = (track.t[:, 1] - track.t[:, 0]) * n_samp
        flux = flux_rate[idx] * crossing
        w = (flux / n_samp)[:, None] * transparency(track.t, duration, options.sky)
        if options.start_ramp:
            w = w * (track.t >= 0.0)
        recorded = w.sum(axis=1)
        with np.errstate(invalid="ignore", divide="ignore"):
            out.r_shift[idx] = (w * track.r).sum(axis=1) / recorded - track.r.mean(axis=1)
            out.c_shift[idx] = (w * track.c).sum(axis=1) / recorded - track.c.mean(axis=1)
        out.flux[idx] = flux
        out.recorded[idx] = recorded
        out.t_mid[idx] = 0.5 * (track.t[:, 0] + track.t[:, -1])
        out.partial[idx] = options.start_ramp & (w == 0).any(axis=1)
        out.groups.append((idx, track.r, track.c, w))
    return out


def bleed_trails(tracks, radius, psf, response, sky_of_rows, n_rows, options):
    """Bleed trails of saturated stars, computed over the whole night.

    A saturated star spills charge along its columns, possibly across block
    boundaries.  Each star whose peak may exceed the full well is rendered
    alone on a canvas of its columns (sky included) long enough for its
    trail, bled with :func:`bleed_along_columns`, and the change (negative in
    the core, positive along the trail) is kept for the blocks to add.
    Trails of different stars are computed independently.

    Returns
    -------
    list of (int, int, ndarray)
        Night row and column of the canvas origin, and the change in
        electrons (after the column response), shape (rows, columns).
    """
    full_well = options.detector.full_well
    peak = peak_fraction(psf)
    box = 1.0 if options.clocking_box else 0.0
    sky_max = float(sky_of_rows(np.arange(-1, n_rows + 1)).max())
    trails = []
    for idx, r, c, w in tracks.groups:
        flux = w.sum(axis=1)
        # The static-star peak overestimates a smeared star's: a safe preselection.
        for k in np.flatnonzero(flux * peak * response.max() + sky_max > full_well):
            rad = radius[idx[k] : idx[k] + 1]
            r0 = max(int(np.floor(r[k].min() - rad[0])), -1)
            r1 = min(int(np.ceil(r[k].max() + rad[0])) + 1, n_rows + 1)
            c0 = max(int(np.floor(c[k].min() - rad[0])), 0)
            c1 = min(int(np.ceil(c[k].max() + rad[0])) + 1, response.size)
            if c1 <= c0 or r1 <= r0:
                continue
            stamp = render_tracks(
                r[k : k + 1], c[k : k + 1], w[k : k + 1], (r1 - r0, c1 - c0), psf,
                origin=(r0, c0), radius=rad, row_box=box,
            )  # fmt: skip
            stamp += sky_of_rows(np.arange(r0, r1))[:, None]
            stamp *= response[None, c0:c1]
            # the sky's own excess over the full well is the block's to clip
            stamp -= np.maximum(_sky(sky_of_rows, r0, r1, response[c0:c1]) - full_well, 0.0)
            excess = np.maximum(stamp - full_well, 0.0).sum(axis=0).max()
            if excess == 0:
                continue
            # Each side of a column receives about half its excess.
            reach = int(np.ceil(0.5 * excess / max(full_well - sky_max, 0.05 * full_well))) + 2
            lo, hi = max(r0 - reach, -1), min(r1 + reach, n_rows + 1)
            canvas = np.minimum(_sky(sky_of_rows, lo, hi, response[c0:c1]), full_well)
            canvas[r0 - lo : r1 - lo] = stamp
            before = canvas.copy()
            bleed_along_columns(canvas, full_well)
            trails.append((lo, c0, canvas - before))
    return trails


def _sky(sky_of_rows, lo: int, hi: int, response: np.ndarray) -> np.ndarray:
    """The sky of night rows ``[lo, hi)`` after the column response, e- per pixel.

    A sky above the full well fills every packet by itself, and the block's
    own bleed clips it; a star's trail is only the change its charge makes,
    so :func:`bleed_trails` leaves the sky's own excess out.  With it in,
    every saturated star's trail took that excess off its whole canvas
    again, and where canvases overlapped the sky went to zero: a simulated
    moonlit night at 17.5 mag/arcsec^2 had a fifth of its pixels at the
    bias level.
    """
    return sky_of_rows(np.arange(lo, hi))[:, None] * response[None, :]


def trails_in_block(trails, row0, shape):
    """Sum of the bleed trails falling in the block whose first night row is ``row0``."""
    out = np.zeros(shape)
    for lo, c0, delta in trails:
        a, b = max(lo, row0), min(lo + delta.shape[0], row0 + shape[0])
        if b > a:
            out[a - row0 : b - row0, c0 : c0 + delta.shape[1]] += delta[a - lo : b - lo]
    return out
