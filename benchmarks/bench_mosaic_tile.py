"""What a mosaic tile's unit spends its time on, one core: co-add, catalogue, file, quick look.

Run::

    python benchmarks/bench_mosaic_tile.py [--size 1024] [--nights 5] [--repeat 2]

On the synthetic nights of ``bench_mosaic.py`` (Gaussian stars on noise, five
frames turned and scaled a little against the tile) it times, with one
BLAS/OpenMP thread, the parts of :data:`pipeline.mosaic.TILE_STAGE`:

* the co-add (:func:`pipeline.mosaic.mosaic_tile`: resampling and rejection);
* the catalogue on the co-add (:func:`pipeline.mosaic.tile_catalog`: the
  detect stage's functions with round stars);
* the FITS file and the quick-look PNG (:func:`~pipeline.mosaic.tile_hdulist`,
  :func:`~pipeline.mosaic.quicklook_png`).

The resampler's own speed against reproject is ``bench_mosaic.py``'s.
"""

from __future__ import annotations

import argparse
import io
import pathlib
import sys

# the script's folder is on sys.path when it is run as a script
from _machine import limit_threads, machine_state

limit_threads(1)

sys.path.insert(0, str(pathlib.Path(__file__).resolve().parents[1]))

from bench_mosaic import cpu_timing, make_nights, rate  # noqa: E402

from pipeline._offline import configure_offline  # noqa: E402
from pipeline.mosaic import (  # noqa: E402
    mosaic_tile,
    quicklook_png,
    tile_catalog,
    tile_hdulist,
)


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--size", type=int, default=1024)
    parser.add_argument("--nights", type=int, default=5)
    parser.add_argument("--stars", type=int, default=100)
    parser.add_argument("--repeat", type=int, default=2)
    parser.add_argument("--seed", type=int, default=1)
    args = parser.parse_args(argv)
    configure_offline()
    target, nights, _, _ = make_nights(args.size, args.nights, args.stars, args.seed)
    products = [n for n, _ in nights]
    megapixels = target.shape[0] * target.shape[1] / 1e6
    print(machine_state())
    print(f"tile {args.size} x {args.size} ({megapixels:.2f} Mpx), {args.nights} nights")
    built = mosaic_tile(products, target)
    tile_catalog(built)  # the first call compiles the detect model's kernels (numba)

    def write() -> None:
        tile_hdulist(built).writeto(io.BytesIO())

    for what, function in [
        ("co-add (resample + reject)", lambda: mosaic_tile(products, target)),
        ("catalogue (detect, round stars)", lambda: tile_catalog(built)),
        ("FITS file (in memory)", write),
        ("quick-look PNG", lambda: quicklook_png(built.planes.image)),
    ]:
        print(rate(what, megapixels, cpu_timing(function, args.repeat)))
    print(f"sources in the catalogue: {len(tile_catalog(built))} of {args.stars} injected")
    return 0


if __name__ == "__main__":
    sys.exit(main())
