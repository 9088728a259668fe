"""Detect's night catalogue against the simulator's truth, end to end.

Shared by ``benchmarks/bench_detect_night.py`` and the slow test in
``tests/test_detect_truth.py``: simulate a night (:mod:`pipeline.simulate`),
reduce it with the runner (ingest -> ... -> rectify -> detect), and compare the
catalogue with the truth in the rectified frame.

* Truth positions in the rectified frame: the truth's ICRS positions at the
  observation epoch through the rectified products' WCS (which maps a star's
  time-mean position to its sky position, DESIGN.md section 6), as night
  columns (the alternate WCS 'A' gives a stretch's first night column).
* Truth S/N: the optimal S/N of the raw data, ``S/N^2 = sum_i (F P_i)^2 /
  (B + F P_i)`` (the information bound of a fit with known position and
  background; e.g. Mendez, Silva & Lobos 2013, PASP 125, 580, for the flux),
  with ``F`` the star's recorded electrons, ``P`` its smeared profile rendered
  by the simulator along a track at its column, ``B`` the sky, dark and read
  noise variance per pixel.
"""

from __future__ import annotations

import itertools
import time
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from astropy.io import fits
from astropy.table import Table
from astropy.wcs import WCS, FITSFixedWarning
from scipy.spatial import cKDTree

from pipeline import load_config, open_product, run_night
from pipeline.simulate import _psf_pixels, column_properties, simulate_night, tdi_model, write_night
from pipeline.simulate._render import render_tracks

# A detection matches the nearest true star within one seeing FWHM (~2.8 px): faint
# (S/N ~5) stars are found up to ~2 px off along their smear, and a noise peak falls
# within 1 FWHM of some true star by chance ~3 % of the time on these fields.
MATCH_FWHM = 1.0


def night_config(
    *,
    latitude: float = 50.0,
    n_columns: int = 4096,
    n_rows: int = 2048,
    tdi_rows: int = 4096,
    density: float = 30000.0,
    seed: int = 1,
    block_rows: int = 512,
    stretch_rows: int = 1024,
) -> dict:
    """A night's config (simulate and reduce) as a mapping, ready for YAML.

    A fictional site at ``latitude`` and a camera of 15 um pixels behind a 6 m
    focal length (0.516 arcsec per pixel), Moffat seeing of 1.4 arcsec, a dark
    sky of 20.8 mag/arcsec^2 without trend, stars from r = 17 (a few saturate)
    to 25.5 (S/N ~3 with 4096 TDI rows) with a shallow luminosity function so
    that faint stars do not crowd the field.
    """
    return {
        "night": {"name": "truth", "raw_dir": "raw", "pattern": "block_*.fits",
                  "output_dir": "out"},
        "site": {"latitude": latitude, "longitude": -1.02, "height": 1350.0, "pressure": 865.0,
                 "temperature": 4.0},
        "camera": {"n_columns": n_columns, "tdi_rows": tdi_rows, "pixel_size": 15.0,
                   "focal_length": 6.0},
        "run": {"stretch_rows": stretch_rows, "overlap_rows": 64, "executor": "serial"},
        "stages": {"ingest": {"start_ramp": "none"}, "column_stats": {"block_rows": 64},
                   "columns": {"min_blocks": 4}},
        "simulate": {
            "seed": seed,
            "start": "2026-03-20T02:00:00",
            "n_blocks": n_rows // block_rows,
            "block_rows": block_rows,
            "overscan_columns": 16,
            "compress": False,
            "psf": {"model": "moffat", "fwhm": 1.4, "beta": 3.5},
            "sky": {"sky_brightness": 20.8, "sky_ramp": 0.0},
            "stars": {"density": density, "mag_bright": 17.0, "mag_faint": 25.5, "slope": 0.2},
        },
    }  # fmt: skip


@dataclass
class NightComparison:
    """Truth and detections of one night, matched; figures in :meth:`summary`."""

    truth: Table  # truth rows used, with x, y (rectified), snr (optimal), matched index
    catalog: Table  # detect's night catalogue
    match: np.ndarray  # per catalogue row: truth row index or -1
    fwhm: float  # seeing FWHM, px
    n_columns: int
    threshold: float
    # The calibrated image's electrons over the true ones: the median of the true
    # column response over the solved flat (as tests/test_zeropoint_truth.py).
    flat_scale: float = 1.0
    timings: dict = field(default_factory=dict)

    def completeness(self, snr: float, width: float = 0.1) -> tuple[float, int]:
        """Fraction of isolated true stars with S/N within ``snr (1 +- width)`` found."""
        t = self.truth
        sel = t["isolated"] & (np.abs(t["snr"] / snr - 1.0) < width)
        found = np.isin(np.flatnonzero(sel), self.match)
        return (float(found.mean()) if sel.any() else float("nan")), int(sel.sum())

    def spurious(self) -> tuple[float, int, int]:
        """Fraction of detections above the threshold matching no true star."""
        above = np.asarray(self.catalog["snr"], float) >= self.threshold
        bad = above & (self.match < 0)
        return float(bad.sum() / max(above.sum(), 1)), int(bad.sum()), int(above.sum())

    def _pairs(self, lo: float, hi: float = np.inf, isolation: str = "isolated"):
        """Catalogue and truth indices of matched unflagged stars with measured S/N in [lo, hi).

        ``isolation`` names the truth column that selects the stars: ``isolated``
        (no neighbour with a tenth of the light within 3 FWHM) or ``alone`` (no
        neighbour with a hundredth of it, for fluxes).
        """
        cat_snr = np.asarray(self.catalog["snr"], float)
        k = np.flatnonzero((self.match >= 0) & (cat_snr >= lo) & (cat_snr < hi))
        j = self.match[k]
        keep = np.asarray(self.truth[isolation])[j] & (np.asarray(self.catalog["flags"])[k] == 0)
        return k[keep], j[keep]

    def position_bias(self, n_bins: int = 10, snr_min: float = 50.0):
        """Per tenth of the chip (across the scan): mean dx, dy, their errors, count."""
        k, j = self._pairs(snr_min)
        dx = np.asarray(self.catalog["x"], float)[k] - np.asarray(self.truth["x"], float)[j]
        dy = np.asarray(self.catalog["y"], float)[k] - np.asarray(self.truth["y"], float)[j]
        frac = np.asarray(self.truth["c_mean"], float)[j] / self.n_columns
        rows = []
        for lo, hi in itertools.pairwise(np.linspace(0.0, 1.0, n_bins + 1)):
            s = (frac >= lo) & (frac < hi)
            n = int(s.sum())
            if n < 2:
                rows.append((lo, hi, np.nan, np.nan, np.nan, np.nan, n))
                continue
            rows.append((lo, hi, dx[s].mean(), dx[s].std() / np.sqrt(n), dy[s].mean(),
                         dy[s].std() / np.sqrt(n), n))  # fmt: skip
        return rows

    def pulls(self, lo: float = 20.0, hi: float = 200.0) -> tuple[float, float, int]:
        """Rms of (measured - true) / reported error along x and y, S/N in [lo, hi)."""
        k, j = self._pairs(lo, hi)
        c, t = self.catalog, self.truth
        px = (np.asarray(c["x"], float)[k] - np.asarray(t["x"], float)[j]) / np.asarray(
            c["x_err"], float
        )[k]
        py = (np.asarray(c["y"], float)[k] - np.asarray(t["y"], float)[j]) / np.asarray(
            c["y_err"], float
        )[k]
        return float(np.sqrt(np.mean(px**2))), float(np.sqrt(np.mean(py**2))), int(k.size)

    def flux_ratios(self, column: str, snr_min: float = 100.0):
        """(measured / true - 1) and distance from the centre line (0 to 1) of bright stars.

        The truth is the star's electrons before the column response (the
        calibrated image is divided by the flat); the mean ratio is then the
        flat's normalisation (:attr:`flat_scale`) times the method's loss, the
        rms and trend its errors.
        """
        k, j = self._pairs(snr_min, isolation="alone")
        ratio = (
            np.asarray(self.catalog[column], float)[k]
            / np.asarray(self.truth["flux_flat"], float)[j]
            - 1.0
        )
        centre = (self.n_columns - 1) / 2.0
        edge = np.abs(np.asarray(self.truth["c_mean"], float)[j] - centre) / centre
        return ratio, edge

    def flux_summary(self, column: str, snr_min: float = 100.0):
        """Mean, rms, rms beyond the photon noise and centre-to-edge trend of the flux ratio.

        The noise is each star's reported relative error (``flux_psf_err /
        flux_psf``), removed in quadrature; the trend is the slope of a line
        fitted against the distance from the centre line (0) to the edge (1).
        """
        ratio, edge = self.flux_ratios(column, snr_min)
        k, _ = self._pairs(snr_min, isolation="alone")
        noise = (
            np.asarray(self.catalog["flux_psf_err"], float)[k]
            / np.asarray(self.catalog["flux_psf"], float)[k]
        )
        rms = float(ratio.std())
        excess = float(np.sqrt(max(rms**2 - np.mean(noise**2), 0.0)))
        slope = float(np.polyfit(edge, ratio, 1)[0]) if ratio.size > 2 else float("nan")
        return float(ratio.mean()), rms, excess, slope, int(ratio.size)

    def summary(self) -> list[str]:
        lines = [f"{name:10s} {value:8.1f} s" for name, value in self.timings.items()]
        lines.append(
            f"truth: {len(self.truth)} stars inside the night; catalogue: {len(self.catalog)}"
            f" sources; seeing FWHM {self.fwhm:.2f} px"
        )
        lines.append(f"flat's scale (median true response / solved flat): {self.flat_scale:.5f}")
        for target in (5.0, 10.0):
            frac, n = self.completeness(target)
            lines.append(f"completeness at S/N {target:g} (+-10 %, isolated): {frac:.3f} of {n}")
        frac, bad, above = self.spurious()
        lines.append(
            f"spurious above S/N {self.threshold:g}: {frac:.4f} ({bad} of {above} detections)"
        )
        lines.append("position bias of S/N > 50 stars per tenth of the chip (rectified px):")
        for lo, hi, dx, ex, dy, ey, n in self.position_bias():
            lines.append(
                f"  {lo:.1f}-{hi:.1f}: dx {dx:+.4f} +- {ex:.4f}, dy {dy:+.4f} +- {ey:.4f} ({n})"
            )
        k, j = self._pairs(10.0, 50.0)
        ratio = np.median(np.asarray(self.catalog["snr"], float)[k] / self.truth["snr"][j])
        lines.append(f"measured / optimal S/N, S/N 10-50 ({k.size} stars): median {ratio:.3f}")
        px, py, n = self.pulls()
        lines.append(f"scatter / reported error, S/N 20-200 ({n} stars): x {px:.3f}, y {py:.3f}")
        for name, column in (("PSF", "flux_psf"), ("aperture 2 FWHM", "flux_aper1")):
            mean, rms, excess, slope, n = self.flux_summary(column)
            lines.append(
                f"{name:16s} flux/truth - 1, S/N > 100 ({n}): mean {mean:+.4f}"
                f" ({(1.0 + mean) / self.flat_scale - 1.0:+.4f} over the flat's scale),"
                f" rms {rms:.4f} ({excess:.4f} beyond the noise),"
                f" centre-to-edge trend {slope:+.4f}"
            )
        return lines


def optimal_snr(truth, site, camera, options, n_grid: int = 33) -> np.ndarray:
    """Optimal S/N of every truth star from its smeared profile at its column."""
    model, _ = tdi_model(site, camera, options)
    psf = _psf_pixels(options.psf, model.pixel_scale)  # the simulator's own PSF
    n = camera.tdi_rows
    columns = np.linspace(0.0, camera.n_columns - 1.0, n_grid)
    t_mid = options.n_blocks * options.block_rows * model.line_time / 2.0
    ra, dec = model.sky_from_focal_plane(n / 2.0, columns, t_mid)
    track = model.track(ra, dec, 256, after=0.0)
    profiles = []
    for r, c in zip(track.r, track.c, strict=True):
        r0, c0 = int(np.floor(r.min())) - 15, int(np.floor(c.min())) - 15
        shape = (int(np.ceil(r.max())) - r0 + 16, int(np.ceil(c.max())) - c0 + 16)
        stamp = render_tracks(r[None], c[None], np.full((1, r.size), 1.0 / r.size), shape, psf,
                              origin=(r0, c0), row_box=1.0)  # fmt: skip
        profiles.append(stamp[stamp > 1e-7])
    sky_rate = 10.0 ** (-0.4 * (options.sky.sky_brightness - options.sky.zero_point))
    det = options.detector
    background = (
        sky_rate * model.pixel_scale**2 * model.crossing_time
        + det.dark_rate * model.crossing_time
        + det.read_noise**2
    )
    flux = np.asarray(truth["flux_recorded"], float)
    nearest = np.clip(
        np.rint(np.asarray(truth["c_mean"], float) / (columns[1] - columns[0])), 0, n_grid - 1
    ).astype(int)
    snr = np.zeros(flux.size)
    for g, prof in enumerate(profiles):
        s = nearest == g
        fp = flux[s, None] * prof[None, :]
        snr[s] = np.sqrt(np.sum(fp**2 / (background + fp), axis=1))
    return snr


def _rectified_wcs(config, n_stretches: int):
    """Per stretch: (WCS of the celestial axes, first night column)."""
    out = []
    for i in range(n_stretches):
        image = open_product(config, "rectify", i)
        header = image.header if hasattr(image, "header") else image.meta
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", FITSFixedWarning)
            wcs = WCS(fits.Header(header)).celestial
        x0 = round(header["CRVAL1A"] - (header["CRPIX1A"] - 1.0) * header["CDELT1A"])
        out.append((wcs, x0, image.data.shape[1]))
    return out


def compare(config_path: Path, fwhm_isolation: float = 3.0) -> NightComparison:
    """Match detect's night catalogue with the truth; return a :class:`NightComparison`.

    Reads the night's ``truth.ecsv`` (in ``night.raw_dir``) and its products.
    """
    config = load_config(config_path)
    site, camera, options = config.site(), config.camera(), config.section("simulate")
    catalog = open_product(config, "catalog", "night", "catalog")  # the night's, merged
    n_rows = options.n_blocks * options.block_rows
    n_stretches = int(np.ceil(n_rows / config.run.stretch_rows))
    frames = _rectified_wcs(config, n_stretches)
    truth = Table.read(Path(config.night.raw_dir) / "truth.ecsv")
    truth["snr"] = optimal_snr(truth, site, camera, options)
    # The calibrated image is divided by the flat: compare fluxes with the
    # electrons before the column response (the truth's flux_recorded has it).
    model, _ = tdi_model(site, camera, options)
    response = column_properties(options, camera.n_columns, model.line_time, camera.tdi_rows)
    column = np.clip(np.rint(np.nan_to_num(truth["c_geom"])).astype(int), 0, camera.n_columns - 1)
    truth["flux_flat"] = np.asarray(truth["flux_recorded"], float) / response.response[column]
    # The solved flat is normalised over its reference columns, not to the true
    # response: the calibrated electrons are the true ones times this scale.
    flat = np.asarray(open_product(config, "columns", "night", "columns")["flat"], float)
    good = np.isfinite(flat) & (flat > 0.5) & (response.response > 0.5)
    flat_scale = float(np.median(response.response[good] / flat[good]))
    ra, dec = np.asarray(truth["ra"], float), np.asarray(truth["dec"], float)
    x = np.full(len(truth), np.nan)
    y = np.full(len(truth), np.nan)
    for wcs, x0, width in frames:
        xs, ys = wcs.all_world2pix(ra, dec, 0)
        inside = (xs >= -0.5) & (xs < width - 0.5)
        x[inside], y[inside] = xs[inside] + x0, ys[inside]
    truth["x"], truth["y"] = x, y
    fwhm = float(catalog.meta.get("seeing_fwhm", options.psf.fwhm / 0.516))
    # Stars the night shows whole: away from its first and last rows by the
    # smear plus 3 FWHM, and from the chip's sides by 3 FWHM.
    smear = (
        camera.tdi_rows
        * abs(np.tan(np.radians(site.latitude)))
        * (camera.n_columns / 2.0 * 15e-6 / 6.0)
    )
    margin = smear / 2.0 + 3.0 * fwhm
    c = np.asarray(truth["c_mean"], float)
    r = np.asarray(truth["r_mean"], float)
    whole = (
        np.isfinite(x)
        & (r > margin)
        & (r < n_rows - 1 - margin)
        & (c > 3.0 * fwhm)
        & (c < camera.n_columns - 1 - 3.0 * fwhm)
        & ~np.asarray(truth["saturated"])
    )
    # Isolated: no star giving at least a tenth of its light within 3 FWHM.
    pts = np.column_stack([np.nan_to_num(x), np.nan_to_num(y)])
    tree = cKDTree(pts)
    flux = np.asarray(truth["flux_recorded"], float)
    brightest = np.zeros(len(truth))  # brightest neighbour within 3 FWHM over own flux
    for i, near in enumerate(tree.query_ball_point(pts, fwhm_isolation * fwhm)):
        others = [k for k in near if k != i]
        if others:
            brightest[i] = np.max(flux[others]) / flux[i]
    truth["isolated"] = (brightest <= 0.1) & whole
    # A neighbour with 1 % of the light moves a flux by <= 1 % if fitted as one star.
    truth["alone"] = (brightest <= 0.01) & whole
    truth["whole"] = whole
    # Detections: nearest true star (of all, saturated included) within the radius.
    cat_pts = np.column_stack([np.asarray(catalog["x"], float), np.asarray(catalog["y"], float)])
    d, j = tree.query(cat_pts)
    match = np.where(d < MATCH_FWHM * fwhm, j, -1)
    threshold = float(config.stage_options("detect").threshold_sigma)
    return NightComparison(truth, catalog, match, fwhm, camera.n_columns, threshold, flat_scale)


def simulate_and_reduce(config_path: Path, progress=None) -> NightComparison:
    """Simulate the night of ``config_path``, reduce it through detect, compare."""
    config = load_config(config_path)
    site, camera, options = config.site(), config.camera(), config.section("simulate")
    timings = {}
    tic = time.perf_counter()
    night = simulate_night(site, camera, options)
    write_night(night, Path(config.night.raw_dir))
    timings["simulate"] = time.perf_counter() - tic
    tic = time.perf_counter()
    report = run_night(config, to_stage="catalog")  # detect is what is measured
    timings["reduce"] = time.perf_counter() - tic
    if not report.ok:
        raise RuntimeError(f"the night's reduction failed: {report}")
    tic = time.perf_counter()
    result = compare(config_path)
    timings["compare"] = time.perf_counter() - tic
    result.timings = timings
    return result
