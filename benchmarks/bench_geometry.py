"""Speed of the TDI geometry: model build, forward model, tracks, inverse.

Run::

    python benchmarks/bench_geometry.py [--threads 1] [--repeat 5]

Prints star-samples per second for :meth:`TDIModel.focal_plane`, for
:meth:`TDIModel.track` (crossing-window solve included), for the inverse
:meth:`TDIModel.sky_from_focal_plane`, stars per second for
:meth:`TDIModel.recorded_centroid`, and the time to build a model for a
10-hour night, each as the best and median of ``--repeat`` calls in one
process.  The geometry is vectorised numpy and ERFA, which run on one thread
whatever the thread limit; ``--threads`` (default 1) limits BLAS/OpenMP so the
figures are per core.  The design's target, 1e6 forward star-samples per second
on a 2-core machine, is met if one core reaches it.  The load average printed
before and after says whether other processes shared the cores.
"""

from __future__ import annotations

import argparse

# the script's folder is on sys.path when it is run as a script
from _machine import describe, limit_threads, machine_state, repeat_timing

N_STARS = 20_000
N_SAMPLES = 64


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--threads", type=int, default=1, help="BLAS/OpenMP threads")
    parser.add_argument("--repeat", type=int, default=5)
    args = parser.parse_args(argv)
    limit_threads(args.threads)  # before numpy is imported

    import numpy as np
    from astropy.time import Time

    from pipeline.geometry import Camera, Site, TDIModel

    print(machine_state())
    site = Site(latitude=29.36, longitude=79.68, height=2450.0, name="bench site")
    camera = Camera(n_columns=4096, tdi_rows=4096, pixel_size=15.0, spin_period=8.0)
    start = Time("2025-11-20T13:00:00", scale="utc")
    TDIModel(site, camera, start, 60.0)  # warm astropy's caches (IERS tables)

    build = repeat_timing(lambda: TDIModel(site, camera, start, 10 * 3600.0), args.repeat)
    model = TDIModel(site, camera, start, 10 * 3600.0)
    rng = np.random.default_rng(0)
    rows = rng.uniform(0, 10 * 3600.0 / model.line_time, N_STARS)
    ra, dec = model.sky_from_strip(rows, rng.uniform(0, camera.n_columns - 1, N_STARS))
    t0, t1 = model.crossing_window(ra, dec)
    times = t0[:, None] + (t1 - t0)[:, None] * (np.arange(N_SAMPLES) + 0.5) / N_SAMPLES
    n = N_STARS * N_SAMPLES
    u, v = model.focal_plane(ra[:, None], dec[:, None], times)

    def rate(seconds, count, unit, scale):
        return (
            f"{count / min(seconds) / scale:8.2f} {unit} "
            f"(median {count / np.median(seconds) / scale:.2f}; {describe(seconds)})"
        )

    ra2, dec2 = ra[:, None], dec[:, None]
    forward = repeat_timing(lambda: model.focal_plane(ra2, dec2, times), args.repeat)
    track = repeat_timing(lambda: model.track(ra, dec, n_samples=N_SAMPLES), args.repeat)
    inverse = repeat_timing(lambda: model.sky_from_focal_plane(u, v, times), args.repeat)
    centroid = repeat_timing(lambda: model.recorded_centroid(ra, dec), args.repeat)

    print(f"model build, 10-h night:        {describe(build)}")
    print(f"forward (focal_plane):          {rate(forward, n, 'M star-samples/s', 1e6)}")
    print(f"track (with crossing windows):  {rate(track, n, 'M star-samples/s', 1e6)}")
    print(f"inverse (sky_from_focal_plane): {rate(inverse, n, 'M samples/s', 1e6)}")
    print(f"recorded_centroid:              {rate(centroid, N_STARS, 'k stars/s', 1e3)}")
    print(machine_state())


if __name__ == "__main__":
    main()
