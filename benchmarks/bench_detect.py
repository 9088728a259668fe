"""Throughput and accuracy of the detect stage on a large rectified stretch, one core.

Run::

    python benchmarks/bench_detect.py [--size 4096] [--stars 3000] [--seed 1] [--profile]
        [--save CATALOGUE.ecsv]

It renders a ``size x size`` rectified stretch (axis 0 across the chip, axis 1
along the scan) with ``--stars`` stars on a sky of 200 e- per pixel, Moffat
seeing of FWHM 4 px (the simulator's renderer), each averaged over an
analytic TDI smear: 1 px long on the chip's centre line growing to 16 px at
its edges, with a parabolic bow of up to 3 px, as on a 4096-column chip at
0.35 arcsec per pixel near latitude 50 deg (the length from the rectify
stage's measurement; the bow from memory).  The detect stage sees only a
``smear_kernels`` table of 64 samples every 32 rows, in rectify's format.

It prints, with one BLAS/OpenMP thread:

* megapixels per second of process CPU time of
  :func:`pipeline.stages.detect.detect` (background, detection, seeing fit,
  smear-aware fits, apertures), the wall time and the machine's load;
  the once-per-process load of the model's and the fit's compiled loops is
  printed apart;
* completeness at S/N 5 and 10 and the spurious fraction;
* how many isolated stars, and how many stars with another closer than one
  FWHM, are flagged UNRESOLVED;
* position bias of stars with S/N > 50 in each tenth of the chip's width
  (across the scan);
* position scatter over the Cramer-Rao bound for S/N 20 to 200: the bound of
  each star's own model, ``1 / sqrt(sum (dm/dx)^2 / var)`` per axis with
  flux and background known (Mendez, Silva & Lobos 2013, PASP 125, 580,
  eq. 18, for any PSF); the scatter is the rms of error / bound;
* PSF flux over the truth for S/N > 100 (rms, and the trend from the chip's
  centre line to its edges), beside a plain aperture of radius 1 FWHM
  (diameter 2 FWHM) without correction, which loses more light where the
  smear is longer; and how much of the PSF rms the stars' reported flux
  errors (their noise) account for, and what is left beyond them.
"""

from __future__ import annotations

import argparse
import cProfile
import itertools
import pathlib
import pstats
import sys
import time
import warnings

# the script's folder is on sys.path when it is run as a script
from _machine import limit_threads, machine_state

limit_threads(1)

sys.path.insert(0, str(pathlib.Path(__file__).resolve().parents[1]))

import numpy as np  # noqa: E402
from scipy.spatial import cKDTree  # noqa: E402

from pipeline.stages.detect import (  # noqa: E402
    SeeingProfile,
    SourceFlag,
    detect,
    fit_stars,
    model_image,
)
from tests._detect_scene import render_scene, smear_track  # noqa: E402


def _crb(x, y, flux, size, sky, fwhm):
    """Cramer-Rao bounds (x, y) of one star's position, pixels."""
    dx, dy = smear_track([y], size, 64, 16.0, 3.0)
    prof = SeeingProfile(fwhm)
    shape = (48, 64)
    ox, oy = 32 + (x % 1), 24 + (y % 1)
    h = 1e-4
    m = model_image(shape, ox, oy, dx[0], dy[0], prof, flux)
    gx = (model_image(shape, ox + h, oy, dx[0], dy[0], prof, flux) - m) / h
    gy = (model_image(shape, ox, oy + h, dx[0], dy[0], prof, flux) - m) / h
    var = m + sky
    return 1 / np.sqrt(np.sum(gx**2 / var)), 1 / np.sqrt(np.sum(gy**2 / var))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--size", type=int, default=4096)
    parser.add_argument("--stars", type=int, default=3000)
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument(
        "--profile", action="store_true", help="also print where detect spends its time (cProfile)"
    )
    parser.add_argument(
        "--no-twin",
        action="store_true",
        help="skip measuring the same stars rendered without noise (the model's own error)",
    )
    parser.add_argument("--save", help="write the catalogue to this ECSV file (to compare runs)")
    args = parser.parse_args()
    size, n = args.size, args.stars
    rng = np.random.default_rng(args.seed)
    x = rng.uniform(20, size - 20, n)
    y = rng.uniform(20, size - 20, n)
    snr = 10 ** rng.uniform(np.log10(3), np.log10(1000), n)
    print(machine_state())
    t0 = time.perf_counter()
    # The scene: Moffat seeing of FWHM 4 px on 200 e- of sky, smear 1 px long
    # on the centre line to 16 px at the edges with a 3 px bow.
    scene_args = {"shape": (size, size), "x_start": 0, "fwhm": 4.0, "sky": 200.0}
    scene_args.update(length_edge=16.0, bow_edge=3.0)
    scene = render_scene(x, y, None, snr=snr, seed=args.seed, **scene_args)
    print(f"rendered {n} stars on {size} x {size} in {time.perf_counter() - t0:.1f} s")
    # The model's and the fit's compiled loops are loaded (or compiled, the first
    # time), and the libraries detect imports when it first runs (photutils,
    # scipy's filters), once per process; a worker pays it once for all its
    # stretches, so it is timed apart.
    t0 = time.perf_counter()
    star = model_image((9, 9), 4.0, 4.0, np.zeros(1), np.zeros(1), SeeingProfile(2.0), 100.0)
    fit_stars(
        star + 1.0, np.ones((9, 9)), [4.0], [4.0], [(np.zeros(1), np.zeros(1))], SeeingProfile(2.0)
    )
    small = render_scene([40.0], [32.0], [2e5], shape=(64, 96), x_start=0, fwhm=4.0, seed=1)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # one star: the seeing falls back to the guess
        detect(small.image, small.variance, small.mask, small.kernels, fwhm_guess=4.0)
    print(
        f"compiled loops and detect's libraries loaded in {time.perf_counter() - t0:.2f} s "
        "(once per process)"
    )
    # Process CPU time: the machine may be shared, and wall time then counts
    # the other processes' turns too (the load average is printed beside it).
    profiler = cProfile.Profile(time.process_time) if args.profile else None
    t0, w0 = time.process_time(), time.perf_counter()
    if profiler is not None:
        profiler.enable()
    result = detect(scene.image, scene.variance, scene.mask, scene.kernels, fwhm_guess=4.0)
    elapsed, wall = time.process_time() - t0, time.perf_counter() - w0
    if profiler is not None:
        profiler.disable()
        # The profiler's own overhead inflates the time printed below by ~5 %.
        pstats.Stats(profiler).sort_stats("cumulative").print_stats(r"detect|photutils", 30)
    cat = result.catalog
    if args.save:
        cat.write(args.save, format="ascii.ecsv", overwrite=True)
    print(
        f"detect: {elapsed:.1f} s of CPU ({wall:.1f} s wall), {size * size / elapsed / 1e6:.2f} "
        f"Mpx per CPU second, {len(cat)} sources"
    )
    print(machine_state())
    print(f"seeing FWHM {result.seeing['fwhm'][0]:.3f} px (rendered 4.000)")

    truth = np.column_stack([x, y])
    found = np.column_stack([cat["x"].value, cat["y"].value])
    near = cKDTree(truth).query(truth, k=2)[0][:, 1]
    alone = near >= 1.5 * 4.0
    d, j = cKDTree(found).query(truth)
    hit = d < 3.0
    for target in (5.0, 10.0):
        sel = alone & (np.abs(scene.snr / target - 1) < 0.1)
        print(
            f"completeness at S/N {target:g} (+-10 %, isolated): {hit[sel].mean():.3f} "
            f"of {sel.sum()}"
        )
    spurious = cKDTree(truth).query(found)[0] > 3.0
    print(f"spurious: {spurious.mean():.4f} ({spurious.sum()} of {len(cat)})")
    unresolved = (np.asarray(cat["flags"].value)[j] & SourceFlag.UNRESOLVED) > 0
    for name, sel in (
        ("isolated stars", alone & hit),
        ("stars with another closer than 1 FWHM", (near < 4.0) & hit),
    ):
        print(f"flagged UNRESOLVED: {unresolved[sel].sum()} of {sel.sum()} {name}")

    good = hit & alone & (scene.snr > 50)
    k = j[good]
    ex = cat["x"].value[k] - x[good]
    ey = cat["y"].value[k] - y[good]
    print("bias of S/N > 50 stars per tenth of the chip (across the scan), px:")
    edges = np.linspace(0, size, 11)
    for lo, hi in itertools.pairwise(edges):
        s = (y[good] >= lo) & (y[good] < hi)
        if s.sum():
            ex_err = np.std(ex[s]) / np.sqrt(s.sum())
            print(
                f"  y {lo:6.0f}-{hi:6.0f}: dx {np.mean(ex[s]):+.4f} +- {ex_err:.4f}, "
                f"dy {np.mean(ey[s]):+.4f} +- {np.std(ey[s]) / np.sqrt(s.sum()):.4f} "
                f"({s.sum()} stars)"
            )
    mid = hit & alone & (scene.snr >= 20) & (scene.snr <= 200)
    ratios = []
    for i in np.flatnonzero(mid):
        bx, by = _crb(x[i], y[i], scene.flux[i], size, 200.0, 4.0)
        ratios.append(((cat["x"].value[j[i]] - x[i]) / bx, (cat["y"].value[j[i]] - y[i]) / by))
    ratios = np.asarray(ratios)
    rms = np.sqrt(np.mean(ratios**2, axis=0))
    print(
        f"scatter / Cramer-Rao bound, S/N 20-200 ({len(ratios)} stars): x {rms[0]:.3f}, "
        f"y {rms[1]:.3f}"
    )

    bright = hit & alone & (scene.snr > 100)
    kb = j[bright]
    psf = cat["flux_psf"].value[kb] / scene.flux[bright] - 1
    aperture = cat["flux_aper1"].value[kb] / scene.flux[bright] - 1
    edge = np.abs(y[bright] - size / 2) / (size / 2)  # 0 centre line, 1 edge
    for name, r in (("PSF", psf), ("aperture r = 1 FWHM", aperture)):
        slope = np.polyfit(edge, r, 1)[0]
        print(
            f"{name:20s}: mean {np.mean(r):+.4f}, rms {np.std(r):.4f}, "
            f"centre-to-edge trend {slope:+.4f} ({bright.sum()} stars, S/N > 100)"
        )
    # The rms holds the stars' own noise: a fit cannot beat the Cramer-Rao
    # bound of its flux, 1 / (S/N) with the scene's optimal S/N (1 % at S/N 100;
    # Mendez, Silva & Lobos 2013, PASP 125, 580, for any PSF), so over these
    # stars the rms is at least the rms of 1 / S/N, set by how bright the
    # scene's stars are.  The model's own share is measured apart below.
    floor = np.sqrt(np.mean(scene.snr[bright] ** -2.0))
    relative_error = cat["flux_psf_err"].value[kb] / scene.flux[bright]
    noise = np.sqrt(np.mean(relative_error**2))
    excess = np.sqrt(max(np.var(psf) - noise**2, 0.0))
    pulls = (psf - np.mean(psf)) / relative_error
    print(
        f"PSF rms from the photon noise alone (Cramer-Rao, rms of 1 / S/N) {floor:.4f}; "
        f"from the reported errors {noise:.4f}; beyond them (in quadrature) {excess:.4f}; "
        f"rms of (error - mean) / reported error {np.std(pulls):.3f}"
    )
    brighter = scene.snr[bright] > 300
    print(
        f"PSF, S/N > 300: mean {np.mean(psf[brighter]):+.4f}, rms {np.std(psf[brighter]):.4f} "
        f"({brighter.sum()} stars)"
    )
    if args.no_twin:
        return
    # The model's own error, without the noise: the same stars rendered without
    # noise (the variance plane unchanged) and measured again.  The scene's
    # renderer draws the Moffat with fewer Gaussians than detect's model, so a
    # mean offset here is the two approximations' shape difference, not noise.
    twin = render_scene(x, y, scene.flux, seed=None, **scene_args)
    cat0 = detect(twin.image, twin.variance, twin.mask, twin.kernels, fwhm_guess=4.0).catalog
    d0, j0 = cKDTree(np.column_stack([cat0["x"].value, cat0["y"].value])).query(truth)
    both = bright & (d0 < 3.0)
    model = cat0["flux_psf"].value[j0[both]] / scene.flux[both] - 1
    slope = np.polyfit(edge[both[bright]], model, 1)[0]
    print(
        f"PSF, the same stars without noise (the model's own error): mean {np.mean(model):+.4f}, "
        f"rms {np.std(model):.4f}, centre-to-edge trend {slope:+.4f} ({both.sum()} stars)"
    )


if __name__ == "__main__":
    main()
