"""Whole-night throughput of ``zdrift run``: raw blocks to the zero point.

Simulates (:mod:`pipeline.simulate`, once: the nights are kept in ``--dir``
and reused by later runs of this script) two nights of a camera of
``--columns`` image columns, in blocks of ``--block-rows`` rows: a long one
of ``--blocks`` blocks and a short one of ``--short-blocks`` (a quarter of
the rows by default), with the simulator's reference catalogue so that
astrometry and the zero point run, and a tiny night (two 256-row blocks)
whose run is nearly all fixed cost.  Each night is reduced with the command
line, ``zdrift run night.yaml --to zeropoint --force`` (ingest, column
statistics, column solve, calibrate, rectify, detect, catalogue, astrometry,
zero point; not science and report), on the local pool of ``--workers``
processes, ``--repeat`` times.  It prints

* wall time (median of the repeats) and megapixels per second, counting raw
  pixels (overscan included) over the whole run's wall time, command-line
  start-up included;
* the fixed cost: the intercept of the line through the short and long
  nights' (raw megapixels, wall time), and the tiny night's wall time;
* how the time scales with the rows (long over short: 4x the rows by
  default);
* the peak memory of the whole process tree (the run and its workers,
  summed; sampled every 0.05 s) as resident size (RSS: shared pages count
  once per process, so this overstates) and as proportional set size (PSS:
  shared pages split among the processes, the tree's real memory), and
  each process's own peak PSS (the run first, then the workers);
* where the time goes: per stage, the span from its first unit's start to
  its last unit's end and the summed compute time of its units (from the
  provenance sidecars of the last run);
* a rerun with everything up to date (``zdrift run night.yaml --to
  zeropoint``);
* the long night on a dask LocalCluster of the same number of workers,
  alternating with the local pool so that drifting load hits both.

The command runs with Python's bytecode cache, as an installed package
does: where the environment forbids writing it (``PYTHONDONTWRITEBYTECODE``,
set in some sandboxes; every command would then compile the package's
sources again, about 0.1 s of each run), the cache is kept in
``--dir/pycache`` instead (``PYTHONPYCACHEPREFIX``).

The machine's load average is printed before and after: on a shared machine
(load near or above the CPU count) the figures are upper bounds, and ratios
measured within one run of this script are the useful ones.  Run::

    python benchmarks/bench_night.py --dir /tmp/zdrift-nights [--columns 4096]
        [--block-rows 2048] [--blocks 16] [--short-blocks 4] [--workers 2]
        [--repeat 3] [--no-dask]
"""

from __future__ import annotations

import argparse
import contextlib
import datetime
import json
import os
import statistics
import subprocess
import sys
import threading
import time
from pathlib import Path

import psutil  # (comes with distributed, the 'distributed' extra)
import yaml

# the script's folder is on sys.path when it is run as a script.  No thread
# limits are set here: the runs are measured with the threads a user gets (the
# local pool gives its workers one BLAS thread each, as dask's nannies do).
from _machine import machine_state

#: The stages measured: everything up to the zero point.
LAST_STAGE = "zeropoint"


def night_config(columns: int, block_rows: int, blocks: int, workers: int) -> dict:
    """A night's config (simulate and reduce): an invented site and camera.

    15 um pixels behind a 6 m focal length (0.516 arcsec per pixel), Moffat
    seeing of 1.4 arcsec, a sky brightening by 30 % over the night (the column
    solve needs a changing sky), stars r = 15 to 22.5, the simulator's
    reference catalogue to r = 21.  Stretches of the default length
    (``run.stretch_rows`` unset: 4096 rows up to 1024 columns, 1024 rows
    on 4096 columns).
    """
    return {
        "night": {"name": "bench", "raw_dir": "raw", "pattern": "block_*.fits",
                  "output_dir": "out"},
        "site": {"latitude": 50.0, "longitude": -1.02, "height": 1350.0, "pressure": 865.0,
                 "temperature": 4.0},
        "camera": {"n_columns": columns, "tdi_rows": 2048, "pixel_size": 15.0,
                   "focal_length": 6.0},
        "run": {"overlap_rows": 64, "executor": "local", "workers": workers},
        "stages": {
            "ingest": {"start_ramp": "none"},
            "column_stats": {"block_rows": 64},
            "columns": {"min_blocks": 4},
            "astrometry": {"reference": {
                "source": "file", "path": "raw/reference.ecsv",
                "columns": {"ra": "ra", "dec": "dec", "pm_ra": "pmra", "pm_dec": "pmdec",
                            "magnitude": "mag", "magnitude_error": "mag_error",
                            "colour": "colour", "identifier": "id"},
                "epoch": 2016.0}},
        },
        "simulate": {
            "seed": 7,
            "start": "2026-03-20T02:00:00",
            "n_blocks": blocks,
            "block_rows": block_rows,
            "overscan_columns": 16,
            "compress": False,
            "psf": {"model": "moffat", "fwhm": 1.4, "beta": 3.5},
            "sky": {"sky_brightness": 20.8, "sky_ramp": 0.3},
            "stars": {"density": 20000.0, "mag_bright": 15.0, "mag_faint": 22.5, "slope": 0.2},
            "reference": {"mag_limit": 21.0},
        },
    }  # fmt: skip


def zdrift(*args: str) -> list[str]:
    """The command line of ``zdrift`` in this interpreter's environment."""
    return [sys.executable, "-m", "pipeline", *args]


#: The environment of the measured commands (see :func:`with_bytecode_cache`).
ENVIRONMENT = dict(os.environ)


def with_bytecode_cache(folder: Path) -> dict[str, str]:
    """This environment, with a bytecode cache in ``folder/pycache`` if it forbids one."""
    env = dict(os.environ)
    if env.pop("PYTHONDONTWRITEBYTECODE", None):
        env.setdefault("PYTHONPYCACHEPREFIX", str(folder / "pycache"))
        print(f"PYTHONDONTWRITEBYTECODE is set: bytecode cached in {folder / 'pycache'}")
    return env


def prepare(folder: Path, columns: int, block_rows: int, blocks: int, workers: int) -> Path:
    """The night's config in ``folder``, simulating its raw blocks unless already there."""
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / "night.yaml"
    path.write_text(yaml.safe_dump(night_config(columns, block_rows, blocks, workers)))
    marker = folder / "raw" / ".complete"
    if not marker.exists():
        print(f"simulating {blocks} blocks of {block_rows} x {columns} in {folder} ...", flush=True)
        t0 = time.perf_counter()
        subprocess.run(zdrift("simulate", str(path)), check=True, stdout=subprocess.DEVNULL)
        marker.write_text("simulated\n")
        print(f"  took {time.perf_counter() - t0:.0f} s", flush=True)
    return path


def raw_megapixels(folder: Path) -> float:
    """Raw pixels of the night's blocks (overscan included), in millions."""
    from astropy.io import fits

    total = 0
    for path in sorted((folder / "raw").glob("block_*.fits")):
        header = fits.getheader(path)
        total += header["NAXIS1"] * header["NAXIS2"]
    return total / 1e6


class TreeMemory:
    """Samples the memory of a process and all its descendants.

    ``peak`` is the largest sum of their resident sizes (RSS: a page shared
    by several processes, e.g. of a library, counts once per process, so this
    overstates); ``peak_pss`` the largest sum of their proportional set sizes
    (PSS: a shared page is split among the processes that map it, so the sum
    is the tree's memory; Linux only, else equal to the RSS); ``processes``
    each process's own largest PSS, by process id, in start order.
    """

    def __init__(self, pid: int, interval: float = 0.05):
        self.pid, self.interval, self.peak, self.peak_pss = pid, interval, 0, 0
        self.processes: dict[int, int] = {}
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._sample, daemon=True)

    def _sample(self) -> None:
        try:
            root = psutil.Process(self.pid)
        except psutil.NoSuchProcess:
            return
        while not self._stop.is_set():
            rss = pss = 0
            try:
                for process in [root, *root.children(recursive=True)]:
                    with contextlib.suppress(psutil.Error):  # it just ended
                        info = process.memory_full_info()
                        own = getattr(info, "pss", info.rss)
                        rss, pss = rss + info.rss, pss + own
                        self.processes[process.pid] = max(self.processes.get(process.pid, 0), own)
            except psutil.Error:
                break
            self.peak, self.peak_pss = max(self.peak, rss), max(self.peak_pss, pss)
            self._stop.wait(self.interval)

    def describe(self) -> str:
        """The peaks in GB: summed RSS, summed PSS, then the run's and each helper's PSS."""
        own = [f"{value / 1e9:.2f}" for value in self.processes.values() if value > 50e6]
        return (
            f"peak tree memory {self.peak / 1e9:.2f} GB RSS, {self.peak_pss / 1e9:.2f} GB PSS "
            f"(per process, PSS: {', '.join(own)})"
        )

    def __enter__(self) -> TreeMemory:
        self._thread.start()
        return self

    def __exit__(self, *exc_info: object) -> None:
        self._stop.set()
        self._thread.join()


def timed_run(config: Path, *settings: str, force: bool = True) -> tuple[float, TreeMemory]:
    """Wall seconds and the memory samples of ``zdrift run`` on the night."""
    args = ["run", str(config), "--to", LAST_STAGE, *(["--force"] if force else [])]
    for setting in settings:
        args += ["--set", setting]
    t0 = time.perf_counter()
    process = subprocess.Popen(
        zdrift(*args), stdout=subprocess.PIPE, stderr=subprocess.STDOUT, env=ENVIRONMENT
    )
    with TreeMemory(process.pid) as memory:
        output, _ = process.communicate()
    wall = time.perf_counter() - t0
    text = output.decode(errors="replace")
    # exit status 1 with nothing failed or blocked: a stage flagged its input
    # (e.g. the zero point's star flat on a short night), which is not a cost
    if process.returncode != 0 and not (process.returncode == 1 and "0 failed, 0 blocked" in text):
        tail = "\n".join(text.splitlines()[-15:])
        raise RuntimeError(f"zdrift run failed on {config} ({process.returncode}):\n{tail}")
    return wall, memory


def unit_spans(folder: Path, since: float) -> list[tuple[str, float, float, float]]:
    """(stage, start, end, compute s) of every unit of the run started at ``since``
    (Unix time), from the provenance sidecars; units written before it (e.g. of
    another stretch plan) are left out."""
    spans = []
    for path in (folder / "out" / "bench").glob("*/*/_provenance.json"):
        record = json.loads(path.read_text())
        start, end = (
            datetime.datetime.fromisoformat(record[key]).timestamp()
            for key in ("started", "finished")
        )
        if start >= since:
            spans.append((record["stage"], start, end, record["timings"]["compute_s"]))
    return spans


def stage_times(folder: Path, since: float) -> list[tuple[str, float, float, int]]:
    """Per stage of the run started at ``since``: (name, span s, summed compute s,
    units), in start order."""
    spans: dict[str, list] = {}
    for stage, start, end, compute in unit_spans(folder, since):
        entry = spans.setdefault(stage, [start, end, 0.0, 0])
        entry[0], entry[1] = min(entry[0], start), max(entry[1], end)
        entry[2] += compute
        entry[3] += 1
    ordered = sorted(spans.items(), key=lambda item: item[1][0])
    return [(name, end - start, compute, n) for name, (start, end, compute, n) in ordered]


def print_stage_times(folder: Path, wall: float) -> None:
    since = time.time() - wall
    rows = stage_times(folder, since)
    if not rows:
        return
    print(f"  per stage (last run, wall {wall:.1f} s): span / summed compute / units")
    for name, span, compute, n in rows:
        print(f"    {name:13s} {span:7.2f} s {compute:8.2f} s {n:4d}")
    spans = unit_spans(folder, since)
    first = min(start for _, start, _, _ in spans) - since
    last = max(end for _, _, end, _ in spans) - since
    print(
        f"    the first unit started {first:.2f} s after the command, the last ended "
        f"{wall - last:.2f} s before it returned"
    )


def median(values: list[float]) -> float:
    return statistics.median(values)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--dir", type=Path, required=True, help="folder of the simulated nights")
    parser.add_argument("--columns", type=int, default=4096, help="image columns of the camera")
    parser.add_argument("--block-rows", type=int, default=2048)
    parser.add_argument("--blocks", type=int, default=16, help="blocks of the long night")
    parser.add_argument("--short-blocks", type=int, default=4, help="blocks of the short night")
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--no-dask", action="store_true", help="skip the dask LocalCluster runs")
    args = parser.parse_args(argv)
    if args.blocks <= args.short_blocks:
        parser.error(
            f"--blocks ({args.blocks}) must be more than --short-blocks ({args.short_blocks}): "
            "the fixed cost is the intercept through the short and the long night"
        )
    print(machine_state(), flush=True)
    ENVIRONMENT.clear()
    ENVIRONMENT.update(with_bytecode_cache(args.dir))
    shape = f"{args.columns}x{args.block_rows}"
    nights = {
        "tiny": prepare(args.dir / f"{args.columns}x256x2", args.columns, 256, 2, args.workers),
        "short": prepare(
            args.dir / f"{shape}x{args.short_blocks}",
            args.columns,
            args.block_rows,
            args.short_blocks,
            args.workers,
        ),
        "long": prepare(
            args.dir / f"{shape}x{args.blocks}",
            args.columns,
            args.block_rows,
            args.blocks,
            args.workers,
        ),
    }
    print(machine_state(), flush=True)
    local = ("run.executor=local",)
    dask = ("run.executor=dask",)
    walls: dict[str, list[float]] = {}
    peaks: dict[str, list[int]] = {}
    for attempt in range(args.repeat):
        for name, config in nights.items():
            runs = [("local", local)]
            if name == "long" and not args.no_dask:
                runs.append(("dask", dask))
            for executor, settings in runs:
                wall, memory = timed_run(config, *settings)
                walls.setdefault(f"{name}/{executor}", []).append(wall)
                peaks.setdefault(f"{name}/{executor}", []).append(memory.peak)
                peaks.setdefault(f"{name}/{executor}/pss", []).append(memory.peak_pss)
                print(
                    f"  run {attempt + 1}: {name} night, {executor}: {wall:.1f} s, "
                    f"{memory.describe()}",
                    flush=True,
                )
                if executor == "local" and attempt == args.repeat - 1:
                    print_stage_times(config.parent, wall)
    up_to_date = []
    for _ in range(args.repeat):
        wall, _ = timed_run(nights["long"], *local, force=False)
        up_to_date.append(wall)
    print(machine_state())

    pixels = {name: raw_megapixels(config.parent) for name, config in nights.items()}
    print(
        f"\nraw -> {LAST_STAGE} (no science, no report), `zdrift run --force`, "
        f"{args.workers} workers, median of {args.repeat}:"
    )
    for name in nights:
        wall = median(walls[f"{name}/local"])
        print(
            f"  {name:5s} night {pixels[name]:7.1f} Mpx: {wall:6.1f} s, "
            f"{pixels[name] / wall:5.2f} Mpx/s, peak tree memory "
            f"{max(peaks[f'{name}/local']) / 1e9:.2f} GB RSS, "
            f"{max(peaks[f'{name}/local/pss']) / 1e9:.2f} GB PSS"
        )
    short, long = median(walls["short/local"]), median(walls["long/local"])
    slope = (long - short) / (pixels["long"] - pixels["short"])
    print(
        f"  fixed cost: intercept {short - slope * pixels['short']:.1f} s "
        f"(marginal {1 / slope:.2f} Mpx/s); tiny night {median(walls['tiny/local']):.1f} s"
    )
    print(
        f"  {pixels['long'] / pixels['short']:.1f}x the rows took {long / short:.2f}x the time "
        f"(per repeat: "
        + ", ".join(
            f"{a / b:.2f}" for a, b in zip(walls["long/local"], walls["short/local"], strict=True)
        )
        + ")"
    )
    print(f"  all up to date: median {median(up_to_date):.2f} s of {len(up_to_date)}")
    if "long/dask" in walls:
        ratios = [d / p for d, p in zip(walls["long/dask"], walls["long/local"], strict=True)]
        print(
            f"  long night on a dask LocalCluster: {median(walls['long/dask']):.1f} s, "
            f"{median(walls['long/dask']) / long:.2f}x the local pool (per repeat: "
            + ", ".join(f"{r:.2f}" for r in ratios)
            + f"), peak tree memory {max(peaks['long/dask']) / 1e9:.2f} GB RSS, "
            f"{max(peaks['long/dask/pss']) / 1e9:.2f} GB PSS"
        )
    return 0


if __name__ == "__main__":
    sys.exit(main())
