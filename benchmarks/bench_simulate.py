"""Speed of the raw-strip simulator: one 4096 x 4096 TDI block with ~20,000 stars.

The camera is the demo's (15 um pixels behind a 6.0 m focal length, 4096 TDI
rows, latitude +41.65 deg) widened to 4096 image columns; one block of 4096
rows; Moffat seeing (4-Gaussian mixture), all detector effects on.  Prints the
wall time of ``simulate_night`` (best and median of ``--repeat`` runs), the
breakdown of the last run (geometry, star field, tracks, rendering, detector
effects, tables) and the machine's load before and after; the target is < 60 s.

    python benchmarks/bench_simulate.py [--stars 20000] [--threads 1] [--repeat 2]
"""

from __future__ import annotations

import argparse
import sys

# the script's folder is on sys.path when it is run as a script
from _machine import describe, limit_threads, machine_state, repeat_timing


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--stars", type=int, default=20000, help="stars landing in the block")
    parser.add_argument("--columns", type=int, default=4096)
    parser.add_argument("--rows", type=int, default=4096)
    parser.add_argument("--threads", type=int, default=1, help="BLAS threads")
    parser.add_argument("--psf", choices=["moffat", "gaussian"], default="moffat")
    parser.add_argument("--repeat", type=int, default=2)
    args = parser.parse_args(argv)
    limit_threads(args.threads)  # before numpy is imported
    print(machine_state())

    from pipeline.geometry.instrument import Camera, Site
    from pipeline.simulate import SimulationOptions, simulate_night

    site = Site(41.65, -1.02, 1350.0, 865.0, 4.0, name="Alto Cierzo Zenith Station")
    camera = Camera(
        n_columns=args.columns, tdi_rows=4096, pixel_size=15.0, focal_length=6.0, name="bench"
    )
    # The simulated field has a margin around the block (stamp radius and smear);
    # about 3 % of the drawn stars fall outside, so draw a few more.
    options = SimulationOptions(
        start="2026-10-15T23:30:00",
        n_blocks=1,
        block_rows=args.rows,
        seed=1,
        psf={"model": args.psf},
        stars={"count": int(args.stars * 1.03)},
    )
    nights = []
    times = repeat_timing(lambda: nights.append(simulate_night(site, camera, options)), args.repeat)
    night = nights[-1]
    _, data = night.blocks[0]
    print(f"block {data.shape[0]} x {data.shape[1]} (incl. overscan), {data.dtype}")
    print(f"stars in truth: {len(night.truth)}, samples per track: {night.meta['n_samples']}")
    print(f"psf: {args.psf}, FWHM {night.meta['psf_fwhm_px']:.2f} px, BLAS threads {args.threads}")
    print(f"total simulate_night: {describe(times)} (target < 60 s)")
    print("breakdown of the last run:")
    for key, value in night.meta["timings"].items():
        print(f"  {key:10s} {value:7.2f} s")
    print(machine_state())
    return 0


if __name__ == "__main__":
    sys.exit(main())
