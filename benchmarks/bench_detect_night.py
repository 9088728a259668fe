"""The detect stage end to end on a simulated night, against the simulator's truth.

Run::

    python benchmarks/bench_detect_night.py [--latitude 50] [--columns 4096]
        [--rows 2048] [--tdi-rows 4096] [--density 20000] [--seed 1] [--workdir DIR]

It simulates a night (:mod:`pipeline.simulate`: Moffat seeing of 1.4 arcsec on
0.516 arcsec pixels, a twilight-free sky of 20.8 mag/arcsec^2, stars r = 14 to
23, the detector's defects and cosmic rays), reduces it with the runner
(:func:`pipeline.run_night`: ingest, column statistics, columns, calibrate,
rectify, detect) on one core, and compares detect's night catalogue with the
truth.  Unlike ``bench_detect.py``, whose scene is rendered straight into the
rectified frame, every star here went through the raw blocks, calibration and
rectify's resampling.

Truth positions in the rectified frame are the truth's ICRS positions (at the
observation epoch) through the rectified products' WCS, which the issue defines
as mapping a star's time-mean position to its sky position; a detection
matches the nearest true star within one seeing FWHM.

It prints:

* completeness at S/N 5 and 10 (+-10 %) of isolated stars (no brighter
  neighbour within 3 FWHM), where S/N is the optimal one of the raw data: the
  star's recorded electrons F and its smeared profile P (rendered by the
  simulator along its track at that column), ``S/N^2 = sum (F P)^2 / (B + F
  P)`` with B the sky, dark and read-noise variance per pixel (the
  information bound of a fit with known position and background);
* the spurious fraction: detections with S/N above the threshold matching no
  true star within one seeing FWHM;
* the position bias of stars with measured S/N > 50 in each tenth of the
  chip's width, along (x) and across (y) the scan, rectified pixels;
* the scatter of positions over detect's reported errors (the rms of the
  pulls) for S/N 20 to 200;
* PSF flux over the truth's recorded electrons for S/N > 100: mean, rms and
  the trend from the centre line to the edges, beside a plain aperture of
  radius 1 FWHM (diameter 2 FWHM) without correction.  The mean is printed
  as measured and over the flat's scale (the median of the simulator's
  column response over the solved flat, also printed): the calibrated image
  is divided by the solved flat, whose normalisation is not the true one.
"""

from __future__ import annotations

import argparse
import pathlib
import sys
import tempfile

# the script's folder is on sys.path when it is run as a script
from _machine import limit_threads, machine_state

limit_threads(1)

sys.path.insert(0, str(pathlib.Path(__file__).resolve().parents[1]))

import yaml  # noqa: E402

from tests._night_truth import (  # noqa: E402
    compare,
    night_config,
    simulate_and_reduce,
)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--latitude", type=float, default=50.0)
    parser.add_argument("--columns", type=int, default=4096)
    parser.add_argument("--rows", type=int, default=2048, help="night rows (scan axis)")
    parser.add_argument("--tdi-rows", type=int, default=4096)
    parser.add_argument("--density", type=float, default=20000.0, help="stars per deg^2")
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--workdir", help="folder for the night (default: a temporary one)")
    parser.add_argument(
        "--compare-only", action="store_true", help="reuse the night reduced in --workdir"
    )
    args = parser.parse_args(argv)
    print(machine_state())
    with tempfile.TemporaryDirectory() as tmp:
        work = pathlib.Path(args.workdir or tmp)
        work.mkdir(parents=True, exist_ok=True)
        config = night_config(
            latitude=args.latitude,
            n_columns=args.columns,
            n_rows=args.rows,
            tdi_rows=args.tdi_rows,
            density=args.density,
            seed=args.seed,
        )
        path = work / "night.yaml"
        path.write_text(yaml.safe_dump(config))
        result = compare(path) if args.compare_only else simulate_and_reduce(path)
    print(machine_state())
    for line in result.summary():
        print(line)
    return 0


if __name__ == "__main__":
    sys.exit(main())
