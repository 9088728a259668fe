"""Throughput of the rectify stage on one core.

Run::

    python benchmarks/bench_rectify.py [--columns 4096] [--rows 4096] [--repeat 3]
        [--deconvolve] [--against OTHER_TREE] [--rounds 3]

It builds a fictional 4096-column TDI camera at 0.35 arcsec per pixel on a
site at latitude 49 deg, fills a stretch of calibrated rows (plus 64-row
overlap margins) with noise (big-endian float32, as the stage reads them
from the calibrate products), and times, best and median of ``--repeat`` runs
with one BLAS/OpenMP thread:

* ``resample``: the two Keys resampling passes and the transposition, called
  with exactly the arguments the stage passes them in this stretch (the
  positions and shifts per block of rows and columns, the block breaks and
  the Jacobians, recorded from one run of the stage): the part the design
  budgets at >= 15 megapixels per second per core;
* ``rectify``: the whole stage function (frame, map nodes, blocks, smear
  kernels, resampling) without deconvolution;
* ``rectify + deconvolve``: the same with the optional deconvolution and
  the overlap it needs (only with ``--deconvolve``; it is much slower, timed
  once); it also prints the deconvolution's margin, its header noise gain and
  the measured blank-sky rms after / before deconvolution.

Throughput counts rectified output pixels (``n_y * n_x``).  The load average
printed before and after says whether other processes shared the core.

``--against OTHER_TREE`` measures this source tree against another (e.g. a
``git archive`` of an older commit): it runs this script ``--rounds`` times
with each tree's package, alternately (so a drifting load on a shared
machine hits both alike), each run in a fresh process with ``--repeat``
timed runs, and prints the process CPU time of ``resample`` and ``rectify``
per tree and the ratios of their medians.
"""

from __future__ import annotations

import argparse
import json
import pathlib
import statistics
import subprocess
import sys
import time

# the script's folder is on sys.path when it is run as a script
from _machine import describe, limit_threads, machine_state, repeat_timing

limit_threads(1)

ROOT = pathlib.Path(__file__).resolve().parents[1]
# --tree=DIR (given by --against): import the package from that source tree.
TREE = next((a.split("=", 1)[1] for a in sys.argv if a.startswith("--tree=")), str(ROOT))
sys.path.insert(0, TREE)

import numpy as np  # noqa: E402
from astropy.time import Time  # noqa: E402

from pipeline.geometry import Camera, Site, TDIModel  # noqa: E402
from pipeline.geometry.rectified import RectifiedFrame  # noqa: E402
from pipeline.masks import MaskBit  # noqa: E402
from pipeline.stages import rectify as rectify_module  # noqa: E402
from pipeline.stages.rectify._deconvolve import deconvolution_margin  # noqa: E402

RESAMPLING_STEPS = ("resample_columns", "shift_rows", "transposed")


def record_resampling_calls(run) -> list[tuple[str, tuple, dict]]:
    """Run the stage once and record its calls of the resampling functions."""
    calls = []
    originals = {name: getattr(rectify_module, name) for name in RESAMPLING_STEPS}

    def recorder(name):
        def call(*args, **kwargs):
            calls.append((name, args, kwargs))
            return originals[name](*args, **kwargs)

        return call

    try:
        for name in RESAMPLING_STEPS:
            setattr(rectify_module, name, recorder(name))
        run()
    finally:
        for name, function in originals.items():
            setattr(rectify_module, name, function)
    return calls


def replay(calls) -> None:
    """Repeat the recorded resampling calls, in order, with their recorded arguments."""
    functions = {name: getattr(rectify_module, name) for name in RESAMPLING_STEPS}
    for name, args, kwargs in calls:
        functions[name](*args, **kwargs)


def cpu_timing(function, repeat: int) -> list[float]:
    """Process CPU seconds of ``repeat`` calls of ``function``."""
    times = []
    for _ in range(repeat):
        start = time.process_time()
        function()
        times.append(time.process_time() - start)
    return times


def against(args) -> None:
    """Alternate fresh-process runs with this tree's package and another's; print the ratios."""
    trees = {"this": ROOT, "other": pathlib.Path(args.against).resolve()}
    steps = ("resample", "rectify")
    runs = {name: {step: [] for step in steps} for name in trees}
    for _ in range(args.rounds):
        for name, tree in trees.items():
            command = [
                sys.executable,
                str(pathlib.Path(__file__).resolve()),
                f"--columns={args.columns}",
                f"--rows={args.rows}",
                f"--overlap={args.overlap}",
                f"--repeat={args.repeat}",
                "--json",
                f"--tree={tree}",
            ]
            out = subprocess.run(command, check=True, capture_output=True, text=True).stdout
            figures = json.loads(out.strip().splitlines()[-1])
            for step in steps:
                runs[name][step].extend(figures[step])
            cpu = "; ".join(
                f"{step} {', '.join(f'{t:.3f}' for t in figures[step])}" for step in steps
            )
            print(f"{name:5s} ({tree}): CPU s: {cpu}", flush=True)
    print(machine_state())
    for step in steps:
        this, other = (statistics.median(runs[name][step]) for name in trees)
        print(
            f"{step:9s} median CPU: this tree {this:.3f} s, other tree {other:.3f} s; "
            f"other / this = {other / this:.2f}"
        )


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--columns", type=int, default=4096)
    parser.add_argument("--rows", type=int, default=4096, help="core rows of the stretch")
    parser.add_argument("--overlap", type=int, default=64)
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--deconvolve", action="store_true")
    parser.add_argument("--against", help="another source tree to measure alternately")
    parser.add_argument("--rounds", type=int, default=3, help="alternations with --against")
    parser.add_argument("--json", action="store_true", help="print CPU times as JSON only")
    parser.add_argument("--tree", help=argparse.SUPPRESS)  # the package's tree, for --against
    args = parser.parse_args(argv)
    if args.against:
        against(args)
        return
    if not args.json:
        print(machine_state())

    camera = Camera(
        n_columns=args.columns, tdi_rows=4096, pixel_size=15.0, focal_length=8.84, name="bench"
    )
    site = Site(latitude=49.0, longitude=-123.0, height=400.0, name="bench site")
    start = Time("2026-03-14T05:00:00", scale="utc")
    night_rows = 4 * args.rows
    probe = TDIModel(site, camera, start, 0.0)
    model = TDIModel(site, camera, start, night_rows * probe.line_time)
    row_lo = args.rows - args.overlap
    n_in = args.rows + 2 * args.overlap
    rng = np.random.default_rng(0)
    # Big-endian float32, as the stage reads the calibrated planes from FITS
    # (the passes resample those in float64).
    image = rng.normal(100.0, 10.0, (n_in, args.columns)).astype(">f4")
    variance = np.full_like(image, 100.0)
    mask = np.zeros(image.shape, np.uint16)
    mask[::97, ::13] = MaskBit.COSMIC_RAY

    def run(**kwargs):
        return rectify_module.rectify(
            image,
            variance,
            mask,
            model,
            row_lo=row_lo,
            core=(args.rows, 2 * args.rows),
            night_rows=night_rows,
            **kwargs,
        )

    calls = record_resampling_calls(run)
    result = run()
    if args.json:
        resample = cpu_timing(lambda: replay(calls), args.repeat)
        print(json.dumps({"resample": resample, "rectify": cpu_timing(run, args.repeat)}))
        return
    n_pixels = result.image.size
    frame = RectifiedFrame.for_night(model, night_rows)
    print(
        f"stretch: {n_in} x {args.columns} calibrated rows -> {result.image.shape} rectified "
        f"(lat 49 deg, {model.pixel_scale:.3f} arcsec/px)"
    )
    for name, call_args, call_kwargs in calls:
        if name != "transposed":
            breaks = call_kwargs.get("breaks")
            jacobian = np.asarray(call_args[4] if name == "resample_columns" else call_args[5])
            print(
                f"  {name}: {0 if breaks is None else len(breaks) - 1} blocks, "
                f"Jacobian {jacobian.min():.5f} to {jacobian.max():.5f}"
            )

    t_resample = repeat_timing(lambda: replay(calls), args.repeat)
    t_rectify = repeat_timing(run, args.repeat)
    for label, times in (("resample", t_resample), ("rectify", t_rectify)):
        rate = n_pixels / statistics.median(times) / 1e6
        print(f"{label:20s}{rate:6.1f} Mpx/s (median; {describe(times)})")
    if args.deconvolve:
        # The deconvolution reads beyond the stretch: give it the overlap it
        # asks for, on the same noise (so the blank-sky rms ratio is measured).
        margin = deconvolution_margin(model, frame, 1e-3, 1.0)
        overlap = margin + args.overlap
        wide_lo = args.rows - overlap
        wide = rng.normal(100.0, 10.0, (args.rows + 2 * overlap, args.columns))
        wide = wide.astype(np.float32)
        wide[overlap - args.overlap : overlap - args.overlap + n_in] = image
        planes = (wide, np.full_like(wide, 100.0), np.zeros(wide.shape, np.uint16))
        core = (args.rows, 2 * args.rows)
        options = {"row_lo": wide_lo, "core": core, "night_rows": night_rows}

        def deconvolved():
            return rectify_module.rectify(*planes, model, deconvolve=True, **options)

        start_time = time.perf_counter()
        sharp = deconvolved()
        t_deconv = time.perf_counter() - start_time
        plain = rectify_module.rectify(*planes, model, **options)
        inner = (slice(64, -64), slice(64, -64))
        ratio = np.nanstd(sharp.image[inner]) / np.nanstd(plain.image[inner])
        print(f"rectify + deconvolve {t_deconv:6.3f} s  {n_pixels / t_deconv / 1e6:6.1f} Mpx/s")
        print(
            f"deconvolution: margin {margin} columns (overlap_rows >= {overlap} given), "
            f"header noise gain {sharp.deconvolution_noise_gain:.3f}, blank-sky rms "
            f"after / before {ratio:.3f}"
        )
    print(machine_state())


if __name__ == "__main__":
    main()
