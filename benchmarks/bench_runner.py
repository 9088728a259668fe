"""Overheads of the runner: product store, up-to-date checks, executors.

Measures, on invented data in a temporary folder (``--dir``, default the
system's temporary folder; its file system type is printed),

* product store throughput: writing (temp file, fsync, SHA-256, rename) and
  reading a calibrated-stretch-sized set of products (float32 image and
  variance, uint16 mask), in MB/s.  Reads are timed twice: "cold", after the
  written files' pages are dropped from the page cache
  (``posix_fadvise(DONTNEED)``, so the read comes from the storage device
  unless the folder lives in memory, e.g. tmpfs), and "warm", from the page
  cache, as a reread right after a write is;
* bookkeeping per unit: a night of many stretches through a stage that does
  no work, serially (first run, then an all-up-to-date rerun, then status);
* parallel speed-up: a CPU-bound toy stage (a fixed number of matrix
  products per stretch) over 8 stretches on the serial executor and on the
  local process pool, alternately, ``--repeat`` times each on fresh output
  folders; the speed-up is the ratio of the median wall times, everything
  included (the pool's start-up too), and cannot exceed the worker count or
  the cores.

Each figure is repeated; the machine's load average is printed before and
after: on a loaded machine (load near the CPU count or above) the parallel
speed-up is meaningless.  Run::

    python benchmarks/bench_runner.py [--workers 2] [--repeat 3]
"""

from __future__ import annotations

import argparse
import os
import statistics
import tempfile
import time
from pathlib import Path

# the script's folder is on sys.path when it is run as a script
from _machine import describe, limit_threads, machine_state

limit_threads(1)  # one BLAS thread per process: the pool's workers are the parallelism

import numpy as np  # noqa: E402
from astropy.io import fits  # noqa: E402
from astropy.table import Table  # noqa: E402
from pydantic import BaseModel, ConfigDict  # noqa: E402

from pipeline.config import config_from_mapping  # noqa: E402
from pipeline.runner import night_status, run_night  # noqa: E402
from pipeline.runner._store import read_products, write_products  # noqa: E402
from pipeline.stages.base import BLOCK_INDEX, RAW_FILES, RAW_ROWS, Stage  # noqa: E402


class NoOptions(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class BusyOptions(NoOptions):
    n_products: int = 1500


def index_blocks(*, inputs, options, context):
    files = sorted(inputs[RAW_FILES], key=lambda f: f.header["BLOCKSEQ"])
    n = [f.header["NAXIS2"] for f in files]
    table = Table(
        {
            "file": [f.name for f in files],
            "hdu": [f.hdu for f in files],
            "row_start": np.cumsum([0, *n])[:-1],
            "n_rows": n,
        }
    )
    return {BLOCK_INDEX: table}


def nothing(*, inputs, options, context):
    return {"info": {"rows": context.stretch.n_rows}}


def busy(*, inputs, options, context):
    """A fixed amount of CPU work (200 x 200 matrix products), the same in every unit."""
    a = np.random.default_rng(context.stretch.index).normal(size=(200, 200))
    for _ in range(options.n_products):
        a = np.tanh(a @ a.T / 200.0)
    return {"result": a[:2]}


def graph(work) -> tuple[Stage, ...]:
    return (
        Stage("index", index_blocks, NoOptions, (RAW_FILES,), "night", (), defines_rows=True),
        Stage("work", work, BusyOptions if work is busy else NoOptions, (RAW_ROWS,), "stretch", ()),
    )


def write_night(raw: Path, n_blocks: int, rows: int, columns: int) -> None:
    raw.mkdir(parents=True)
    rng = np.random.default_rng(1)
    for seq in range(n_blocks):
        data = rng.integers(1000, 2000, size=(rows, columns)).astype(np.uint16)
        fits.PrimaryHDU(data, header=fits.Header({"BLOCKSEQ": seq})).writeto(
            raw / f"b{seq:04d}.fits"
        )


def config(root: Path, name: str, run: dict, work) -> object:
    data = {
        "night": {"name": name, "raw_dir": str(root / "raw"), "output_dir": str(root / "out")},
        "site": {"latitude": 30.0, "longitude": 0.0},
        "camera": {"n_columns": 64, "tdi_rows": 64, "pixel_size": 15.0, "focal_length": 4.0},
        "run": run,
    }
    return config_from_mapping(data, graph=graph(work))


def _drop_from_page_cache(folder: Path) -> None:
    """Ask the kernel to drop the (already fsynced) files' pages from its cache."""
    for path in folder.iterdir():
        fd = os.open(path, os.O_RDONLY)
        try:
            os.fsync(fd)
            os.posix_fadvise(fd, 0, 0, os.POSIX_FADV_DONTNEED)
        finally:
            os.close(fd)


def _file_system(path: Path) -> str:
    """Type of the file system holding ``path`` (from /proc/mounts), or 'unknown'."""
    try:
        mounts = [line.split()[1:3] for line in Path("/proc/mounts").read_text().splitlines()]
    except OSError:
        return "unknown"
    resolved = str(path.resolve())
    best = max(
        (m for m in mounts if resolved == m[0] or resolved.startswith(m[0].rstrip("/") + "/")),
        key=lambda m: len(m[0]),
        default=(None, "unknown"),
    )
    return best[1]


def bench_store(root: Path, repeat: int) -> None:
    rng = np.random.default_rng(0)
    shape = (4096 + 128, 2048)  # a stretch with its margins
    products = {
        "image": rng.normal(100, 10, size=shape).astype(np.float32),
        "variance": rng.normal(100, 1, size=shape).astype(np.float32),
        "mask": rng.integers(0, 4, size=shape).astype(np.uint16),
    }
    megabytes = sum(p.nbytes for p in products.values()) / 1e6
    write, cold, warm = [], [], []
    for attempt in range(repeat):
        folder = root / f"store{attempt}"
        t0 = time.perf_counter()
        entries = write_products(folder, products, {"ZDSTAGE": ("bench", "")})
        write.append(time.perf_counter() - t0)
        _drop_from_page_cache(folder)
        for times in (cold, warm):
            t0 = time.perf_counter()
            read_products(folder, {"products": entries})
            times.append(time.perf_counter() - t0)
    print(f"store: {megabytes:.0f} MB of products on {_file_system(root)} ({root})")

    def rate(times):
        return f"{megabytes / statistics.median(times):.0f} MB/s ({describe(times)})"

    print(f"  write incl. fsync + SHA-256: {rate(write)}")
    print(f"  read, dropped from the page cache: {rate(cold)}")
    print(f"  read again, from the page cache:   {rate(warm)}")


def bench_bookkeeping(root: Path) -> None:
    cfg = config(
        root, "bookkeeping", {"stretch_rows": 16, "overlap_rows": 2, "executor": "serial"}, nothing
    )
    t0 = time.perf_counter()
    report = run_night(cfg)
    t1 = time.perf_counter()
    run_night(cfg)
    t2 = time.perf_counter()
    night_status(cfg)
    t3 = time.perf_counter()
    n = report.count("ran")
    print(
        f"bookkeeping: {n} units (no work) in {t1 - t0:.2f} s = {1e3 * (t1 - t0) / n:.1f} ms "
        f"per unit; up-to-date rerun {1e3 * (t2 - t1) / n:.2f} ms per unit; "
        f"status {1e3 * (t3 - t2) / n:.2f} ms per unit"
    )


def bench_parallel(root: Path, workers: int, repeat: int) -> None:
    times: dict[str, list[float]] = {"serial": [], "local": []}
    for attempt in range(repeat):
        for executor, taken in times.items():  # alternate, so drifting load hits both
            run = {"stretch_rows": 16, "overlap_rows": 0, "executor": executor, "workers": workers}
            cfg = config(root, f"parallel-{executor}-{attempt}", run, busy)  # fresh products
            t0 = time.perf_counter()
            report = run_night(cfg)
            taken.append(time.perf_counter() - t0)
            assert report.ok, report.format()
    serial, local = times["serial"], times["local"]
    ratios = [s / p for s, p in zip(serial, local, strict=True)]
    print(
        f"parallel: 8 stretches of equal CPU work, serial executor {describe(serial)}; "
        f"local pool of {workers} workers {describe(local)}, its start-up included"
    )
    print(
        f"  speed-up {statistics.median(serial) / statistics.median(local):.2f}x "
        f"(median of each; per repeat {', '.join(f'{r:.2f}' for r in ratios)}); "
        f"at most {min(workers, os.cpu_count() or 1)}x on this machine"
    )


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--stretches", type=int, default=200, help="units of no work")
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--dir", type=Path, default=None, help="folder for the temporary data")
    args = parser.parse_args()
    print(machine_state())
    with tempfile.TemporaryDirectory(dir=args.dir) as tmp:
        root = Path(tmp)
        bench_store(root, args.repeat)
        # 16-row stretches: 8 blocks of 128 rows make 64 stretches
        write_night(root / "raw", n_blocks=max(args.stretches // 8, 1), rows=128, columns=8)
        bench_bookkeeping(root)
        write_night(root / "p" / "raw", n_blocks=1, rows=128, columns=8)
        bench_parallel(root / "p", args.workers, args.repeat)
    print(machine_state())


if __name__ == "__main__":
    main()
