"""Speed of the TDI geometry: model build, forward model, tracks, inverse.

Run: ``python benchmarks/bench_geometry.py``.  Prints star-samples per second
for :meth:`TDIModel.focal_plane` (target >= 1e6/s on a 2-core machine), for
:meth:`TDIModel.track` (crossing-window solve included), for the inverse
:meth:`TDIModel.sky_from_focal_plane`, and the time to build a model for a
10-hour night.  Each figure is the best of a few repeats in one run.
"""

from __future__ import annotations

import time

import numpy as np
from astropy.time import Time

from pipeline.geometry import Camera, Site, TDIModel

N_STARS = 20_000
N_SAMPLES = 64
REPEATS = 3


def best_time(func, repeats: int = REPEATS) -> float:
    """Shortest wall-clock time of ``repeats`` calls, seconds."""
    best = np.inf
    for _ in range(repeats):
        t0 = time.perf_counter()
        func()
        best = min(best, time.perf_counter() - t0)
    return best


def main() -> None:
    site = Site(latitude=29.36, longitude=79.68, height=2450.0, name="bench site")
    camera = Camera(n_columns=4096, tdi_rows=4096, pixel_size=15.0, spin_period=8.0)
    start = Time("2025-11-20T13:00:00", scale="utc")
    TDIModel(site, camera, start, 60.0)  # warm astropy's caches (IERS tables)

    build = best_time(lambda: TDIModel(site, camera, start, 10 * 3600.0), repeats=2)
    model = TDIModel(site, camera, start, 10 * 3600.0)
    rng = np.random.default_rng(0)
    rows = rng.uniform(0, 10 * 3600.0 / model.line_time, N_STARS)
    ra, dec = model.sky_from_strip(rows, rng.uniform(0, camera.n_columns - 1, N_STARS))
    t0, t1 = model.crossing_window(ra, dec)
    times = t0[:, None] + (t1 - t0)[:, None] * (np.arange(N_SAMPLES) + 0.5) / N_SAMPLES
    n = N_STARS * N_SAMPLES

    fwd = best_time(lambda: model.focal_plane(ra[:, None], dec[:, None], times))
    trk = best_time(lambda: model.track(ra, dec, n_samples=N_SAMPLES))
    u, v = model.focal_plane(ra[:, None], dec[:, None], times)
    inv = best_time(lambda: model.sky_from_focal_plane(u, v, times))
    cen = best_time(lambda: model.recorded_centroid(ra, dec))

    print(f"model build, 10-h night:        {build:8.3f} s")
    print(f"forward (focal_plane):          {n / fwd / 1e6:8.2f} M star-samples/s")
    print(f"track (with crossing windows):  {n / trk / 1e6:8.2f} M star-samples/s")
    print(f"inverse (sky_from_focal_plane): {n / inv / 1e6:8.2f} M samples/s")
    print(f"recorded_centroid:              {N_STARS / cen / 1e3:8.1f} k stars/s")


if __name__ == "__main__":
    main()
