"""The issue's mis-set night on a full-width chip, raw blocks to astrometry.

Run::

    python benchmarks/bench_astrometry_night.py [--latitude 41.65] [--columns 4096]
        [--tdi-rows 2048] [--blocks 6] [--block-rows 512] [--density 30000] [--workdir DIR]

The slow tests ``tests/test_astrometry_stage.py -k mis_set`` run this night on
a 512-column chip, whose lever arm and few reference stars fix the camera
rotation only to ~2".  Here the
chip is the issue's 4096 columns (2048 TDI rows by default), the night
3072 rows long: long enough for ~200 trusted stars in each cell of the 4 x 8
grid, whose means are then known to ~0.5-0.9 mas against the 5 mas bound
(with two blocks a cell mean was known to ~2.4 mas only, and the largest of
the 64 reached 6 mas, 2.5 of its sigmas), and short enough to run
in ~25 minutes on a loaded machine: the
simulator (``simulate.actual``) takes it with the true camera, the config
believes the clock 2 s behind, a focal length 1 % short, no rotation and no
tilt, and the rows are clocked 0.1 % slower than the true drift.  The runner
reduces it (ingest to astrometry) on one core; the script prints the stage
times and the issue's figures against the truth (``tests/_mis_set_night.py``):
along-scan offset, focal length, rotation, north-south tilt, the matched line
time, the bright stars' (S/N > 50) residuals over their reported errors, and
the largest cell mean of a 4 (across) x 8 (along) grid of solved minus true
positions.  The astrometry stage's passes (``parameters.meta['passes']``: the
first solution's smear kernels are ~20 px off on this chip, so detect
measures again with the solved geometry's) are printed too.
"""

from __future__ import annotations

import argparse
import pathlib
import sys
import tempfile
import time

# the script's folder is on sys.path when it is run as a script
from _machine import limit_threads, machine_state

sys.path.insert(0, str(pathlib.Path(__file__).resolve().parents[1]))


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--latitude", type=float, default=41.65, help="site latitude, deg")
    parser.add_argument("--columns", type=int, default=4096)
    parser.add_argument("--tdi-rows", type=int, default=2048)
    parser.add_argument("--blocks", type=int, default=6)
    parser.add_argument("--block-rows", type=int, default=512)
    parser.add_argument("--density", type=float, default=30000.0, help="stars per deg^2")
    parser.add_argument("--workdir", type=pathlib.Path, default=None, help="keep the night here")
    args = parser.parse_args(argv)
    limit_threads(1)

    from pipeline import load_config, open_product, run_night
    from pipeline._offline import configure_offline
    from tests._mis_set_night import Chip, mis_set_config, mis_set_figures

    configure_offline()
    print(machine_state())
    chip = Chip(
        n_columns=args.columns,
        tdi_rows=args.tdi_rows,
        n_blocks=args.blocks,
        block_rows=args.block_rows,
        density=args.density,
    )
    workdir = args.workdir or pathlib.Path(tempfile.mkdtemp(prefix="zdrift-astrometry-"))
    folder = workdir / f"lat{args.latitude:+.2f}"
    t = time.perf_counter()
    config_path = mis_set_config(folder, args.latitude, chip)
    print(f"simulate {time.perf_counter() - t:8.1f} s  ({folder})")
    config = load_config(config_path)
    t = time.perf_counter()
    report = run_night(config)
    print(f"reduce   {time.perf_counter() - t:8.1f} s")
    if report.count("failed") or report.count("blocked"):
        print(report.format())
        raise SystemExit(1)
    figures = mis_set_figures(config, folder, args.latitude, chip)
    parameters = open_product(config, "astrometry", "night", "parameters")
    for record in parameters.meta.get("passes", []):
        print("  pass", record)
    print(f"latitude {args.latitude:+.2f}, chip {chip}")
    for line in figures.lines():
        print("  " + line)
    print(figures.grid)


if __name__ == "__main__":
    main()
