"""Speed and flux accuracy of a 5-night mosaic tile, one core: our resampler against reproject.

Run::

    python benchmarks/bench_mosaic.py [--size 2048] [--nights 5] [--repeat 3]

It makes ``--nights`` synthetic nights (CAR grids with rows along circles of
declination, east to the right, as rectify writes them; turned by 0.1-0.3 deg
and scaled by 0.99-1.01 against the tile) of Gaussian stars (each pixel the
analytic integral over it) on noise, and builds one ``size x size``
tangent-plane tile.  It prints, with one BLAS/OpenMP thread:

* megapixels of output tile per second per core (CPU time: the machine may be
  shared; wall-clock beside it) for the whole tile task
  (:func:`pipeline.mosaic.mosaic_tile`: resampling flux, variance and flags of
  every night, then the rejecting co-add), and for the resampling alone;
* the time of the first call in the process (numba compiles the loops, or
  loads them from its cache beside the modules);
* the whole tile task with the numpy loops the compiled ones replaced
  (``tests/_mosaic_reference.py``), timed back to back with the compiled
  ones, and the ratio;
* the same for reproject's interpolating resampler (``reproject_interp``,
  bicubic) on the FLUX plane only (variance and flags would cost more), alone
  and followed by our co-add, and for ``reproject_exact`` on a tile a quarter of the size
  (it is slow), FLUX plane only;
* flux conservation of isolated stars (sum in a box over the analytic flux)
  through each resampler: median and largest |error|.

reproject works on surface brightness, so its output is multiplied by the
ratio of the pixel areas (tile / night, constant to 1e-4 over a tile).
"""

from __future__ import annotations

import argparse
import contextlib
import pathlib
import sys
import time

# the script's folder is on sys.path when it is run as a script
from _machine import limit_threads, machine_state

limit_threads(1)

sys.path.insert(0, str(pathlib.Path(__file__).resolve().parents[1]))

import numpy as np  # noqa: E402
from reproject import reproject_exact, reproject_interp  # noqa: E402

from pipeline._offline import configure_offline  # noqa: E402
from pipeline.masks import MASK_DTYPE  # noqa: E402
from pipeline.mosaic import (  # noqa: E402
    NightImage,
    _coadd,
    coadd,
    mosaic_tile,
    resample_to_tile,
)
from tests._mosaic_reference import coadd_numpy, merge_onto_tile_numpy  # noqa: E402
from tests._mosaic_scene import RA0, gaussian_stars, night_wcs, tile  # noqa: E402

SIGMA = 1.8  # star sigma, night pixels
FLUX = 2.0e4  # e-
SKY_VARIANCE = 200.0  # e^2


def make_nights(size: int, n_nights: int, n_stars: int, seed: int):
    """Nights covering a ``size`` tile with margins, and the stars' tile positions."""
    rng = np.random.default_rng(seed)
    target = tile(size)
    shape = (int(size * 1.08) + 16, int(size * 1.08) + 24)
    margin = 20
    tx = rng.uniform(margin, size - margin, n_stars)
    ty = rng.uniform(margin, size - margin, n_stars)
    sky = target.wcs.pixel_to_world_values(tx, ty)
    nights = []
    for i in range(n_nights):
        f = i / max(n_nights - 1, 1)
        wcs = night_wcs(
            shape, rotation=0.1 + 0.2 * f, scale=0.99 + 0.02 * f, ra=RA0 + 1e-4 * i, dec=49.7
        )
        x, y = wcs.world_to_pixel_values(*sky)
        model = gaussian_stars(shape, x, y, np.full(n_stars, FLUX), SIGMA)
        variance = SKY_VARIANCE + model
        image = model + rng.normal(0.0, np.sqrt(variance))
        night = NightImage(
            image.astype(np.float32),
            variance.astype(np.float32),
            np.zeros(shape, MASK_DTYPE),
            wcs,
            25.0,
            f"night{i}",
        )
        nights.append((night, model.astype(np.float32)))
    return target, nights, tx, ty


def cpu_timing(function, repeat: int) -> tuple[float, float]:
    """Best wall-clock and best CPU seconds of ``repeat`` calls (one thread: CPU = one core)."""
    walls, cpus = [], []
    for _ in range(repeat):
        wall, cpu = time.perf_counter(), time.process_time()
        function()
        walls.append(time.perf_counter() - wall)
        cpus.append(time.process_time() - cpu)
    return min(walls), min(cpus)


def rate(what: str, megapixels: float, timing: tuple[float, float]) -> str:
    wall, cpu = timing
    return (
        f"{what}: {megapixels / cpu:.2f} Mpx/s per core of CPU time "
        f"({megapixels / wall:.2f} Mpx/s wall-clock; {cpu:.2f} s CPU, {wall:.2f} s wall)"
    )


@contextlib.contextmanager
def numpy_loops():
    """The mosaic with the numpy loops it had before (stored positions, separate merge)."""
    saved = _coadd.merge_onto_tile, _coadd.coadd
    _coadd.merge_onto_tile, _coadd.coadd = merge_onto_tile_numpy, coadd_numpy
    try:
        yield
    finally:
        _coadd.merge_onto_tile, _coadd.coadd = saved


def isolated(tx, ty, distance=30.0):
    keep = []
    for i in range(tx.size):
        d = np.hypot(tx - tx[i], ty - ty[i])
        d[i] = np.inf
        keep.append(d.min() > distance)
    return np.array(keep)


def flux_errors(image, tx, ty, keep, half=12):
    errors = []
    for x, y in zip(tx[keep], ty[keep], strict=True):
        xi, yi = round(x), round(y)
        box = image[yi - half : yi + half + 1, xi - half : xi + half + 1]
        errors.append(np.sum(box) / FLUX - 1)
    errors = np.abs(np.array(errors))
    return f"median |error| {np.median(errors):.2e}, max {errors.max():.2e} ({errors.size} stars)"


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--size", type=int, default=2048)
    parser.add_argument("--nights", type=int, default=5)
    parser.add_argument("--stars", type=int, default=200)
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--seed", type=int, default=1)
    args = parser.parse_args(argv)
    configure_offline()
    target, nights, tx, ty = make_nights(args.size, args.nights, args.stars, args.seed)
    products = [n for n, _ in nights]
    megapixels = target.shape[0] * target.shape[1] / 1e6
    keep = isolated(tx, ty)
    print(machine_state())
    print(f"tile {args.size} x {args.size} ({megapixels:.2f} Mpx), {args.nights} nights")

    wall, cpu = time.perf_counter(), time.process_time()
    mosaic_tile(products, target)
    print(
        f"ours, first call (compiling or loading the compiled loops): "
        f"{time.process_time() - cpu:.2f} s CPU, {time.perf_counter() - wall:.2f} s wall"
    )
    compiled = cpu_timing(lambda: mosaic_tile(products, target), args.repeat)
    with numpy_loops():
        reference = cpu_timing(lambda: mosaic_tile(products, target), args.repeat)
    print(rate("ours, whole tile task", megapixels, compiled))
    print(rate("ours with the numpy loops, whole tile task", megapixels, reference))
    print(f"compiled over numpy loops: {reference[1] / compiled[1]:.2f}x faster in CPU time")

    def resample_all():
        return [resample_to_tile(p.image, p.variance, p.flags, p.wcs, target) for p in products]

    print(rate("ours, resampling 3 planes only", megapixels, cpu_timing(resample_all, args.repeat)))

    # flux conservation: noise-free models through each resampler
    _, first_model = nights[0]
    wcs = products[0].wcs
    ours = resample_to_tile(first_model, np.ones_like(first_model), products[0].flags, wcs, target)
    full = np.full(target.shape, np.nan)
    full[ours.slices] = ours.image
    print(f"ours, flux conservation: {flux_errors(full, tx, ty, keep)}")
    area = (1.0 / 0.99) ** 2  # tile pixel area over night 0's (scale 0.99)
    interp, _ = reproject_interp((first_model, wcs), target.wcs, target.shape, order="bicubic")
    print(f"reproject_interp, flux conservation: {flux_errors(interp * area, tx, ty, keep)}")

    def reproject_all():
        return [
            reproject_interp((p.image, p.wcs), target.wcs, target.shape, order="bicubic")[0]
            for p in products
        ]

    timing = cpu_timing(reproject_all, max(1, args.repeat - 1))
    print(rate("reproject_interp, resampling FLUX only", megapixels, timing))

    def reproject_then_coadd():
        images = np.stack(reproject_all())
        coadd(images, np.full(images.shape, SKY_VARIANCE), np.zeros(images.shape, MASK_DTYPE))

    timing = cpu_timing(reproject_then_coadd, max(1, args.repeat - 1))
    print(rate("reproject_interp (FLUX only) + our co-add", megapixels, timing))
    small = tile(args.size // 4)
    start = time.process_time()
    exact, _ = reproject_exact((first_model, wcs), small.wcs, small.shape)
    elapsed = time.process_time() - start
    small_mpx = small.shape[0] * small.shape[1] / 1e6
    print(
        f"reproject_exact (FLUX only, one night): {small_mpx / elapsed:.3f} Mpx/s per core, "
        f"i.e. {small_mpx / elapsed / args.nights:.3f} Mpx/s for {args.nights} nights"
    )
    sx, sy = small.wcs.world_to_pixel_values(*target.wcs.pixel_to_world_values(tx, ty))
    inside = keep & (sx > 15) & (sx < small.shape[1] - 15) & (sy > 15) & (sy < small.shape[0] - 15)
    if inside.any():
        print(f"reproject_exact, flux conservation: {flux_errors(exact * area, sx, sy, inside)}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
