"""Cost of ingest's raw-file reading: headers only, and headers plus every pixel.

Ingest rejects blocks without a usable pixel, so the runner reads every raw
pixel once for it (:func:`pipeline.runner._rawio.read_raw_files`).  This
measures, for the demo night's gzip blocks and for the same blocks written
uncompressed (in a temporary folder), the time per block and the throughput
in MB/s of stored (uncompressed) pixel data, with and without the pixels,
and prints the machine's load before and after.

    python benchmarks/bench_ingest.py [--repeat 3]
"""

from __future__ import annotations

import argparse
import tempfile
from pathlib import Path

# the script's folder is on sys.path when it is run as a script
from _machine import limit_threads, machine_state, repeat_timing

DEMO = Path(__file__).resolve().parents[1] / "demo_frames"


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeat", type=int, default=3)
    args = parser.parse_args(argv)
    limit_threads(1)  # before numpy is imported
    print(machine_state())

    from astropy.io import fits

    from pipeline.runner._rawio import read_raw_files

    names = sorted(p.name for p in DEMO.glob("block_*.fits.gz"))
    with tempfile.TemporaryDirectory() as scratch:
        plain = Path(scratch)
        n_bytes = 0
        for name in names:
            with fits.open(DEMO / name) as hdul:
                hdul.writeto(plain / name.removesuffix(".gz"))
                n_bytes += hdul[0].data.nbytes
        for label, folder, files in (
            ("gzip", DEMO, names),
            ("plain", plain, [n.removesuffix(".gz") for n in names]),
        ):
            for pixels in (False, True):
                times = repeat_timing(
                    lambda f=folder, n=files, p=pixels: read_raw_files(f, n, pixels=p),
                    args.repeat,
                )
                what = "headers + pixels" if pixels else "headers only    "
                print(
                    f"{label:5s} {what}: {1000 * min(times) / len(files):7.1f} ms per block, "
                    f"{n_bytes / min(times) / 1e6:7.1f} MB/s of stored pixels (best of "
                    f"{len(times)})"
                )
    print(machine_state())


if __name__ == "__main__":
    main()
