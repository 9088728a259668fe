"""Throughput of the rectify stage on one core.

Run::

    OMP_NUM_THREADS=1 python benchmarks/bench_rectify.py [--columns 4096] [--rows 4096]

It builds a fictional 4096-column TDI camera at 0.35 arcsec per pixel on a
site at latitude 49 deg, fills a stretch of calibrated rows (plus 64-row
overlap margins) with noise, and times, best of ``--repeat`` runs:

* ``resample``: the two Keys resampling passes and the transposition, with
  the sampling positions precomputed: the part the design budgets at
  >= 15 megapixels per second per core;
* ``rectify``: the whole stage function (frame, map nodes, blocks, smear
  kernels, resampling) without deconvolution;
* ``rectify + deconvolve``: the same with the optional deconvolution and
  the overlap it needs (only with ``--deconvolve``; it is much slower, timed
  once); it also prints the deconvolution's margin, its header noise gain and
  the measured blank-sky rms after / before deconvolution.

Throughput counts rectified output pixels (``n_y * n_x``).
"""

from __future__ import annotations

import argparse
import os
import time

os.environ.setdefault("OMP_NUM_THREADS", "1")

import numpy as np
from astropy.time import Time

from pipeline.geometry import Camera, Site, TDIModel
from pipeline.geometry.rectified import RectifiedFrame
from pipeline.masks import MaskBit
from pipeline.stages import rectify as rectify_module
from pipeline.stages.rectify._deconvolve import deconvolution_margin
from pipeline.stages.rectify._resample import resample_columns, shift_rows, transposed


def _best(function, repeat: int) -> float:
    times = []
    for _ in range(repeat):
        start = time.perf_counter()
        function()
        times.append(time.perf_counter() - start)
    return min(times)


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--columns", type=int, default=4096)
    parser.add_argument("--rows", type=int, default=4096, help="core rows of the stretch")
    parser.add_argument("--overlap", type=int, default=64)
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--deconvolve", action="store_true")
    args = parser.parse_args(argv)

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
    image = rng.normal(100.0, 10.0, (n_in, args.columns)).astype(np.float32)
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

    result = run()
    n_pixels = result.image.size
    print(
        f"stretch: {n_in} x {args.columns} calibrated rows -> {result.image.shape} rectified "
        f"(lat 49 deg, {model.pixel_scale:.3f} arcsec/px)"
    )

    # The resampling alone, with the positions the stage uses.
    frame = RectifiedFrame.for_night(model, night_rows)
    n_y, n_x = result.image.shape
    positions = np.linspace(-2.0, args.columns + 1.0, n_y)
    shifts = np.full(n_y, float(args.overlap) + 0.37)
    bits = {"outside_bit": int(MaskBit.OUTSIDE), "nonfinite_bit": int(MaskBit.NONFINITE)}
    assert frame.n_y == n_y

    def resample():
        across = resample_columns(image, variance, mask, positions, **bits)
        along = shift_rows(*across, shifts, n_x, **bits)
        return [transposed(a) for a in along]

    t_resample = _best(resample, args.repeat)
    t_rectify = _best(run, args.repeat)
    print(f"resample            {t_resample:7.3f} s  {n_pixels / t_resample / 1e6:6.1f} Mpx/s")
    print(f"rectify             {t_rectify:7.3f} s  {n_pixels / t_rectify / 1e6:6.1f} Mpx/s")
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


if __name__ == "__main__":
    main()
