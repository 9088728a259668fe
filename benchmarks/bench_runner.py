"""Overheads of the runner: product store, up-to-date checks, executors.

Measures, on invented data in a temporary folder,

* product store throughput: writing (temp file, fsync, SHA-256, rename) and
  reading a calibrated-stretch-sized set of products (float32 image and
  variance, uint16 mask), in MB/s;
* bookkeeping per unit: a night of many stretches through a stage that does
  no work, serially (first run, then an all-up-to-date rerun, then status);
* parallel speed-up: a CPU-bound toy stage (a fixed number of matrix
  products per stretch) over 8 stretches on the serial executor and on the
  local process pool (ratio of wall times; includes the pool's start-up).
  Meaningful only on an otherwise idle machine.

Run::

    OMP_NUM_THREADS=1 python benchmarks/bench_runner.py [--workers 2]
"""

from __future__ import annotations

import argparse
import os
import tempfile
import time
from pathlib import Path

for _name in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_name, "1")

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


def bench_store(root: Path) -> None:
    rng = np.random.default_rng(0)
    shape = (4096 + 128, 2048)  # a stretch with its margins
    products = {
        "image": rng.normal(100, 10, size=shape).astype(np.float32),
        "variance": rng.normal(100, 1, size=shape).astype(np.float32),
        "mask": rng.integers(0, 4, size=shape).astype(np.uint16),
    }
    megabytes = sum(p.nbytes for p in products.values()) / 1e6
    folder = root / "store"
    t0 = time.perf_counter()
    entries = write_products(folder, products, {"ZDSTAGE": ("bench", "")})
    t1 = time.perf_counter()
    read_products(folder, {"products": entries})
    t2 = time.perf_counter()
    print(
        f"store: {megabytes:.0f} MB of products written in {t1 - t0:.2f} s "
        f"({megabytes / (t1 - t0):.0f} MB/s incl. fsync + SHA-256), "
        f"read in {t2 - t1:.2f} s ({megabytes / (t2 - t1):.0f} MB/s)"
    )


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


def bench_parallel(root: Path, workers: int) -> None:
    times = {}
    for label, executor, work in [
        ("serial", "serial", busy),
        ("local", "local", busy),
        ("start-up", "local", nothing),
    ]:
        run = {"stretch_rows": 16, "overlap_rows": 0, "executor": executor, "workers": workers}
        cfg = config(root, f"parallel-{label}", run, work)
        t0 = time.perf_counter()
        report = run_night(cfg)
        times[label] = time.perf_counter() - t0
        assert report.ok, report.format()
    print(
        f"parallel: 8 stretches of equal CPU work: serial {times['serial']:.2f} s, local pool "
        f"({workers} workers) {times['local']:.2f} s, of which pool start-up and bookkeeping "
        f"~{times['start-up']:.2f} s (same night, no work); speed-up "
        f"{times['serial'] / times['local']:.2f}x, "
        f"{times['serial'] / (times['local'] - times['start-up']):.2f}x without start-up"
    )


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--stretches", type=int, default=200, help="units of no work")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp)
        bench_store(root)
        # 16-row stretches: 8 blocks of 128 rows make 64 stretches
        write_night(root / "raw", n_blocks=max(args.stretches // 8, 1), rows=128, columns=8)
        bench_bookkeeping(root)
        write_night(root / "p" / "raw", n_blocks=1, rows=128, columns=8)
        bench_parallel(root / "p", args.workers)


if __name__ == "__main__":
    main()
