"""Time and peak memory of reading a night's reference stars from large catalogue files.

Writes a catalogue of ``--rows`` random stars (uniform on the sky, with
proper motions, G, BP and RP magnitudes and an int64 identifier) as Parquet,
CSV and a FITS binary table in a temporary folder, chunk by chunk, then reads
the band of a night at latitude +29.4 deg (8 h of RA, a 4096-pixel chip at
0.39 arcsec/px, the solver's search margins) with
:func:`pipeline.reference.read_reference`, each format in a fresh process,
and prints the wall time and the reader's peak resident memory
(``resource.getrusage``; the peak before reading, i.e. the interpreter,
imports and geometry, is printed beside it).

    python benchmarks/bench_reference.py [--rows 10000000] [--chunk-rows 1000000]
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from _machine import limit_threads, machine_state

COLUMNS = ("ra", "dec", "pm_ra", "pm_dec", "mag", "bp", "rp")


def _random_chunk(rng, n: int, first_id: int) -> dict:
    import numpy as np

    mag = rng.uniform(8.0, 21.0, n)
    colour = rng.uniform(0.0, 3.0, n)
    return {
        "source_id": np.arange(first_id, first_id + n, dtype=np.int64),
        "ra": rng.uniform(0.0, 360.0, n),
        "dec": np.degrees(np.arcsin(rng.uniform(-1.0, 1.0, n))),
        "pm_ra": rng.normal(0.0, 10.0, n),
        "pm_dec": rng.normal(0.0, 10.0, n),
        "mag": mag,
        "bp": mag + 0.4 * colour,
        "rp": mag - 0.6 * colour,
    }


def write_files(folder: Path, n_rows: int, chunk: int) -> dict[str, Path]:
    """Write the same random catalogue as Parquet, CSV and FITS, ``chunk`` rows at a time."""
    import numpy as np
    import pyarrow as pa
    import pyarrow.parquet as pq
    from astropy.io import fits
    from pyarrow import csv as pa_csv

    paths = {f: folder / f"stars.{f}" for f in ("parquet", "csv", "fits")}
    names = ("source_id", *COLUMNS)
    fits_dtype = np.dtype([("source_id", ">i8")] + [(c, ">f8") for c in COLUMNS])
    header = fits.BinTableHDU.from_columns(
        [fits.Column(name="source_id", format="K")]
        + [fits.Column(name=c, format="D") for c in COLUMNS],
        nrows=0,
    ).header
    header["NAXIS2"] = n_rows
    for c, unit in zip(
        COLUMNS, ("deg", "deg", "mas/yr", "mas/yr", "mag", "mag", "mag"), strict=True
    ):
        header[f"TUNIT{names.index(c) + 1}"] = unit
    rng = np.random.default_rng(2026)
    schema = pa.schema([("source_id", pa.int64())] + [(c, pa.float64()) for c in COLUMNS])
    with (
        pq.ParquetWriter(paths["parquet"], schema) as parquet,
        pa_csv.CSVWriter(paths["csv"], schema) as text,
        open(paths["fits"], "wb") as raw,
    ):
        raw.write(fits.PrimaryHDU().header.tostring().encode())
        raw.write(header.tostring().encode())
        for first in range(0, n_rows, chunk):
            data = _random_chunk(rng, min(chunk, n_rows - first), first)
            batch = pa.record_batch([pa.array(data[n]) for n in names], schema=schema)
            parquet.write_batch(batch)
            text.write_batch(batch)
            record = np.empty(len(data["ra"]), fits_dtype)
            for n in names:
                record[n] = data[n]
            raw.write(record.tobytes())
        raw.write(b"\0" * (-raw.tell() % 2880))
    return paths


def read_one(path: str, chunk_rows: int) -> dict:
    """Read the night's band from ``path`` (in this process); time and peak memory."""
    import resource

    from astropy.time import Time

    from pipeline._offline import configure_offline
    from pipeline.geometry import Camera, Site, TDIModel
    from pipeline.reference import ReferenceOptions, read_reference, sky_band_for_night

    configure_offline()
    site = Site(latitude=29.4, longitude=79.7, height=2450.0)
    camera = Camera(n_columns=4096, tdi_rows=4096, pixel_size=15.0, focal_length=8.0)
    model = TDIModel(site, camera, Time("2026-10-15T14:00:00", scale="utc"), 8 * 3600.0)
    band = sky_band_for_night(model)
    options = ReferenceOptions(
        source="file",
        path=path,
        columns={"colour_bands": ("bp", "rp"), "identifier": "source_id"},
        chunk_rows=chunk_rows,
    )
    before_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
    start = time.perf_counter()
    table = read_reference(options, band, 2026.79)
    seconds = time.perf_counter() - start
    peak_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # KiB on Linux
    return {
        "seconds": seconds,
        "peak_mb": peak_mb,
        "before_mb": before_mb,
        "rows": len(table),
        "band": str(band),
    }


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=10_000_000)
    parser.add_argument("--chunk-rows", type=int, default=1_000_000)
    parser.add_argument("--read", help=argparse.SUPPRESS)  # child process: read one file
    args = parser.parse_args(argv)
    limit_threads(1)  # before numpy is imported
    if args.read:
        print(json.dumps(read_one(args.read, args.chunk_rows)))
        return
    print(machine_state())
    with tempfile.TemporaryDirectory() as scratch:
        start = time.perf_counter()
        paths = write_files(Path(scratch), args.rows, 1_000_000)
        print(f"wrote {args.rows} rows in {time.perf_counter() - start:.1f} s")
        for fmt, path in paths.items():
            size = path.stat().st_size / 1e6
            child = subprocess.run(
                [
                    sys.executable,
                    __file__,
                    "--read",
                    str(path),
                    "--chunk-rows",
                    str(args.chunk_rows),
                ],
                capture_output=True,
                text=True,
                check=True,
            )
            result = json.loads(child.stdout.strip().splitlines()[-1])
            print(
                f"{fmt:8s} {size:8.0f} MB: {result['rows']} stars in the band, "
                f"{result['seconds']:.2f} s, peak RSS {result['peak_mb']:.0f} MB "
                f"({result['before_mb']:.0f} MB before reading)"
            )
        print(f"band: {result['band']}")
    print(machine_state())


if __name__ == "__main__":
    main()
