"""CPU time of the detect stage on one saved rectified stretch, one core.

Run::

    python benchmarks/bench_detect_stretch.py NIGHT_OUTPUT [--stretch 1] [--repeat 3]
        [--profile] [--save CATALOGUE.ecsv] [--compare CATALOGUE.ecsv]
        [--against OTHER_TREE] [--rounds 3]

``NIGHT_OUTPUT`` is a reduced night's folder (``<output_dir>/<night>``, the
one holding ``rectify/s0000`` ...), e.g. from ``benchmarks/bench_night.py``
(``--dir DIR``: ``DIR/<columns>x<rows>x<blocks>/out/bench``), whose nights
are crowded (20 000 stars per square degree to r = 22.5, ~400 per
megapixel).  The stretch and its neighbours' products are read once; then
:func:`pipeline.stages.detect.detect_stretch` (the stage's unit of work,
with the stage's default options) runs once untimed (the compiled loops and
the libraries it imports on first use, once per process), the process's
objects are frozen for the garbage collector as a warm worker's are, and
the stage runs ``--repeat`` times timed.  It prints the process CPU time
of each run (least and median), megapixels of the stretch's own columns per
CPU second, and the number of sources.

``--save`` writes the catalogue; ``--compare`` reads one written so and
prints, per column, the largest difference relative to the column's scale
(and the rows that differ in number or order), to show that a change left
the catalogue as it was.

``--against OTHER_TREE`` measures this source tree against another (e.g. a
``git archive`` of an older commit): it runs this script ``--rounds`` times
in each tree, alternately (so a drifting load on a shared machine hits both
alike), each run in a fresh process with ``--repeat`` timed runs, and prints
the CPU time of each tree's runs and the ratio of their medians.
"""

from __future__ import annotations

import argparse
import contextlib
import cProfile
import gc
import json
import pathlib
import pstats
import statistics
import subprocess
import sys
import time
from collections.abc import Mapping

# the script's folder is on sys.path when it is run as a script
from _machine import limit_threads, machine_state

limit_threads(1)

ROOT = pathlib.Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

import numpy as np  # noqa: E402

#: Keeps the neighbours' files open for the process's life (they are read
#: lazily, as a run's worker reads them).
_FILES = contextlib.ExitStack()


def load_stretch(night: pathlib.Path, index: int) -> tuple[dict, Mapping | None, Mapping | None]:
    """The rectify products of stretch ``index`` and of its neighbours (None where absent).

    The neighbours come as a run's worker gets them: each product read when
    looked up, image files opened lazily so that only their edge columns are
    read.
    """
    from pipeline.runner._store import LazyUnit, read_products, read_sidecar

    def sidecar_of(i: int) -> tuple[pathlib.Path, dict | None]:
        unit = night / "rectify" / f"s{i:04d}"
        return unit, (read_sidecar(unit) if i >= 0 else None)

    unit, sidecar = sidecar_of(index)
    if sidecar is None:
        raise SystemExit(f"no finished rectify/s{index:04d} in {night}: reduce the night first.")
    neighbours = []
    for i in (index - 1, index + 1):
        folder, record = sidecar_of(i)
        neighbours.append(None if record is None else LazyUnit(folder, record, files=_FILES))
    return read_products(unit, sidecar), *neighbours


def compare(catalog, path: str) -> list[str]:
    """Lines describing how ``catalog`` differs from the one saved at ``path``."""
    from astropy.table import QTable

    saved = QTable.read(path, format="ascii.ecsv")
    lines = [f"compared with {path}: {len(catalog)} rows here, {len(saved)} there"]
    if len(saved) != len(catalog):
        return [*lines, "  row counts differ: not the same catalogue"]
    for name in saved.colnames:
        if name not in catalog.colnames:
            lines.append(f"  {name}: missing here")
            continue
        a = np.asarray(getattr(catalog[name], "value", catalog[name]), dtype=float)
        b = np.asarray(getattr(saved[name], "value", saved[name]), dtype=float)
        same_nan = np.array_equal(np.isnan(a), np.isnan(b))
        finite = np.isfinite(a) & np.isfinite(b)
        scale = float(np.max(np.abs(b[finite]))) if finite.any() else 0.0
        worst = float(np.max(np.abs(a[finite] - b[finite]))) if finite.any() else 0.0
        relative = worst / scale if scale > 0 else worst
        lines.append(
            f"  {name:18s} largest difference {worst:.3g} ({relative:.2g} of the column's "
            f"largest value){'' if same_nan else ', NaN in different rows'}"
        )
    return lines


def settle_as_a_worker() -> None:
    """Freeze this process's objects for the garbage collector, as a warm worker does.

    A pool worker does it once its warm-up is done
    (:func:`pipeline.runner._warm.settle_after_warm`); without it a full
    collection walks the libraries' objects about once per unit (~0.1 s of
    a crowded unit's CPU) and lands in whichever function allocates then.
    """
    gc.collect()
    gc.freeze()


def measure(args) -> dict:
    """Time detect on the stretch in this process; returns the figures as a dict."""
    from pipeline.stages.detect import DetectOptions, detect_stretch

    own, before, after = load_stretch(pathlib.Path(args.night), args.stretch)
    options = DetectOptions()
    data = own["image"]["FLUX"].data if "FLUX" in own["image"] else own["image"][0].data
    megapixels = data.size / 1e6
    t0 = time.perf_counter()
    detect_stretch(own, before, after, options, stretch_index=args.stretch)
    first = time.perf_counter() - t0
    settle_as_a_worker()
    times, walls = [], []
    result = None
    profiler = cProfile.Profile(time.process_time) if args.profile else None
    for _ in range(args.repeat):
        c0, w0 = time.process_time(), time.perf_counter()
        if profiler is not None:
            profiler.enable()
        result = detect_stretch(own, before, after, options, stretch_index=args.stretch)
        if profiler is not None:
            profiler.disable()
        times.append(time.process_time() - c0)
        walls.append(time.perf_counter() - w0)
    if profiler is not None:
        # The profiler's own overhead inflates the times by a few per cent.
        pstats.Stats(profiler).sort_stats("cumulative").print_stats(r"detect|photutils", 40)
        pstats.Stats(profiler).sort_stats("tottime").print_stats(25)
    catalog = result["catalog"]
    if args.save:
        catalog.write(args.save, format="ascii.ecsv", overwrite=True)
    if args.compare:
        for line in compare(catalog, args.compare):
            print(line)
    return {
        "megapixels": megapixels,
        "first": first,
        "cpu": times,
        "wall": walls,
        "sources": len(catalog),
    }


def against(args) -> None:
    """Alternate fresh-process runs in this tree and in ``args.against``; print the ratio."""
    trees = {"this": ROOT, "other": pathlib.Path(args.against).resolve()}
    runs: dict[str, list[float]] = {name: [] for name in trees}
    for _ in range(args.rounds):
        for name, tree in trees.items():
            command = [
                sys.executable,
                str(tree / "benchmarks" / pathlib.Path(__file__).name),
                args.night,
                "--stretch",
                str(args.stretch),
                "--repeat",
                str(args.repeat),
                "--json",
            ]
            if not (tree / "benchmarks" / pathlib.Path(__file__).name).exists():
                # an older tree without this script: run this one on its package
                command[1] = str(pathlib.Path(__file__).resolve())
                command.append(f"--tree={tree}")
            out = subprocess.run(command, check=True, capture_output=True, text=True).stdout
            figures = json.loads(out.strip().splitlines()[-1])
            runs[name].extend(figures["cpu"])
            print(
                f"{name:5s} ({tree}): CPU {', '.join(f'{t:.2f}' for t in figures['cpu'])} s, "
                f"{figures['sources']} sources",
                flush=True,
            )
    this, other = (statistics.median(runs[name]) for name in ("this", "other"))
    print(machine_state())
    print(
        f"median CPU: this tree {this:.2f} s, other tree {other:.2f} s; other / this = "
        f"{other / this:.2f} (least: {min(runs['other']) / min(runs['this']):.2f})"
    )


def arguments(description: str, stretch: int) -> argparse.ArgumentParser:
    """The options of a stretch benchmark that can run against another tree."""
    parser = argparse.ArgumentParser(description=description)
    parser.add_argument("night", help="the reduced night's folder (holding rectify/)")
    parser.add_argument(
        "--stretch", type=int, default=stretch, help=f"stretch index (default {stretch})"
    )
    parser.add_argument("--repeat", type=int, default=3, help="timed runs (default 3)")
    parser.add_argument("--against", help="another source tree to measure alternately")
    parser.add_argument("--rounds", type=int, default=3, help="alternations with --against")
    parser.add_argument("--json", action="store_true", help="print the figures as JSON")
    parser.add_argument("--tree", help=argparse.SUPPRESS)  # the package's tree, for --against
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = arguments(__doc__.splitlines()[0], 1)
    parser.add_argument("--profile", action="store_true", help="print cProfile's figures")
    parser.add_argument("--save", help="write the catalogue to this ECSV file")
    parser.add_argument("--compare", help="compare the catalogue with this ECSV file")
    args = parser.parse_args(argv)
    if args.tree:
        sys.path.insert(0, args.tree)
    if args.against:
        against(args)
        return 0
    figures = measure(args)
    if args.json:
        print(json.dumps(figures))
        return 0
    cpu = figures["cpu"]
    print(machine_state())
    print(
        f"stretch {args.stretch}: {figures['megapixels']:.2f} Mpx, {figures['sources']} sources; "
        f"first run {figures['first']:.2f} s wall (loads the compiled loops); CPU least "
        f"{min(cpu):.2f} s, median {statistics.median(cpu):.2f} s of {len(cpu)} "
        f"({figures['megapixels'] / min(cpu):.2f} Mpx per CPU second)"
    )
    return 0


if __name__ == "__main__":
    sys.exit(main())
