"""The issue's mis-set night, raw blocks to astrometry, and its figures against the truth.

Shared by the slow tests in ``tests/test_astrometry_stage.py`` (a 512-column
chip, and a 4096-column one with 2048 TDI rows) and
``benchmarks/bench_astrometry_night.py`` (4096 x 4096 by default): the
simulator (``simulate.actual``) takes the night with the true camera, the
config believes another one (the clock 2 s behind, a focal length 1 % short, no
rotation and no tilt), and the camera clocks its rows 0.1 % slower than the
true drift.  :func:`mis_set_figures` compares the stage's products with the
truth.  Invented data for self-consistency checks.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
from astropy import units as u
from astropy.table import Table
from astropy.time import Time

#: The true camera relative to the configured one: focal length 1 % longer,
#: rotated 0.05 deg, axis tilted 15" east and 10" south.
FOCAL_SCALE = 1.01
ROTATION = 0.05  # degrees
TILT_EAST = 15.0  # arcsec
TILT_NORTH = -10.0  # arcsec
CLOCK_OFFSET = 2.0  # s: true start minus the header's DATE-OBS
DRIFT_MISMATCH = 1e-3  # the line time is this much longer than the true drift's
FOCAL_LENGTH = 6.0  # m, as configured
START = "2026-03-20T04:00:00"


@dataclass(frozen=True)
class Chip:
    """Size of the simulated chip and night."""

    n_columns: int = 512
    tdi_rows: int = 512
    n_blocks: int = 4
    block_rows: int = 512
    density: float = 60000.0  # stars per deg^2, r = 14 to 23

    def camera(self) -> dict:
        return {"n_columns": self.n_columns, "tdi_rows": self.tdi_rows, "pixel_size": 15.0}


def true_model(chip: Chip, latitude: float, start: Time):
    """The geometry the night was really taken with (header clock aside)."""
    from pipeline.geometry import Camera, Site, TDIModel

    site = Site(latitude=latitude, longitude=-70.0, height=2000.0)
    camera = Camera(
        **chip.camera(),
        focal_length=FOCAL_LENGTH * FOCAL_SCALE,
        rotation=ROTATION,
        tilt_east=TILT_EAST,
        tilt_north=TILT_NORTH,
    )
    return TDIModel(site, camera, start, 100.0)


def mis_set_config(folder: Path, latitude: float, chip: Chip = Chip(), **stages) -> Path:
    """Simulate the true night (``simulate.actual``); return the config that does not know it.

    ``stages`` are merged into the config's ``stages`` section (e.g. detect's
    options).
    """
    import yaml

    from pipeline.cli import main

    start = Time(START, scale="utc")
    line_time = true_model(chip, latitude, start).matched_line_time * (1.0 + DRIFT_MISMATCH)
    actual = {
        "clock_offset": -CLOCK_OFFSET,  # the headers' times are behind the true ones
        "focal_length_scale": FOCAL_SCALE,
        "rotation_offset": ROTATION,
        "tilt_east_offset": TILT_EAST,
        "tilt_north_offset": TILT_NORTH,
    }
    reference = {
        "source": "file",
        "path": "raw/reference.ecsv",
        "columns": {"pm_ra": "pmra", "pm_dec": "pmdec", "colour": "colour"},
        "epoch": 2016.0,
    }
    night = {
        "night": {"name": "n", "raw_dir": "raw", "pattern": "block_*.fits", "output_dir": "out"},
        "site": {"latitude": latitude, "longitude": -70.0, "height": 2000.0},
        "camera": chip.camera() | {"focal_length": FOCAL_LENGTH, "line_time": line_time},
        "run": {"stretch_rows": 1024, "overlap_rows": 64, "executor": "serial"},
        "stages": {
            # a night shorter than the chip: the simulator starts with a full chip
            "ingest": {"start_ramp": "none" if chip.tdi_rows > 1024 else "night"},
            "column_stats": {"block_rows": 128},
            # 5 mas: the simulator's reference position error (simulate.reference)
            "astrometry": {"reference": reference, "reference_error": 5.0},
        }
        | stages,
        "simulate": {
            "start": start.isot,
            "n_blocks": chip.n_blocks,
            "block_rows": chip.block_rows,
            "overscan_columns": 8,
            "compress": False,
            "stars": {"density": chip.density},
            "actual": actual,
        },
    }
    folder.mkdir(parents=True)
    config = folder / "night.yaml"
    config.write_text(yaml.safe_dump(night))
    assert main(["simulate", str(config)]) == 0
    return config


def solved_minus_truth(catalog, truth):
    """Solved minus true position [mas] along RA and Dec of each detection near a true star."""
    from scipy.spatial import cKDTree

    cos_dec = np.cos(np.radians(np.median(truth["dec"])))
    tree = cKDTree(np.column_stack([np.asarray(truth["ra"]) * cos_dec, truth["dec"]]))
    ra, dec = catalog["ra"].to_value(u.deg), catalog["dec"].to_value(u.deg)
    distance, index = tree.query(np.column_stack([ra * cos_dec, dec]))
    near = distance * 3.6e6 < 300.0  # 0.3": a match, far below the star spacing
    d_ra = (ra[near] - np.asarray(truth["ra"])[index[near]]) * cos_dec * 3.6e6
    d_dec = (dec[near] - np.asarray(truth["dec"])[index[near]]) * 3.6e6
    return near, d_ra, d_dec, index[near]


def unresolved(truth, index, radius: float, shift: float) -> np.ndarray:
    """Whether each true star ``truth[index]`` has a companion that drags its image.

    A companion within ``radius`` [arcsec] whose light moves the pair's light
    centre, ``f2 / (f1 + f2)`` of their separation, by more than ``shift``
    [mas]: a pair closer than about one seeing FWHM shows one peak (common
    practice), so its detection sits near the light centre, not on the star.
    """
    from scipy.spatial import cKDTree

    cos_dec = np.cos(np.radians(np.median(truth["dec"])))
    sky = np.column_stack([np.asarray(truth["ra"]) * cos_dec, truth["dec"]]) * 3.6e6  # mas
    flux = np.asarray(truth["flux"], dtype=float)
    pairs = cKDTree(sky).query_ball_point(sky[index], radius * 1e3)
    return np.array(
        [
            any(
                j != i and flux[j] / (flux[i] + flux[j]) * np.hypot(*(sky[j] - sky[i])) > shift
                for j in near
            )
            for i, near in zip(index, pairs, strict=True)
        ],
        dtype=bool,
    )


@dataclass
class MisSetFigures:
    """The issue's figures of a solved mis-set night (truth minus fit where signed)."""

    along_scan: float  # px: fitted clock (with the east tilt's share) minus truth, in rows
    focal: float  # fitted minus true focal scale
    rotation: float  # arcsec, with the east tilt's share
    rotation_error: float  # arcsec, formal
    tilt_north: float  # arcsec
    tilt_north_error: float  # arcsec, formal
    matched_line_time: float  # fitted over true matched line time, minus 1
    pull_ra: float  # rms of bright stars' (solved - true) / reported error
    pull_dec: float
    n_bright: int
    median_ra: float  # mas, all matched detections
    median_dec: float
    grid: Table  # 4 across x 8 along: mean solved - true of trusted stars, mas

    @property
    def grid_worst(self) -> tuple[float, float]:
        """Largest |cell mean| and largest |cell mean| / its standard error."""
        g = self.grid
        means = np.abs(np.r_[g["mean_ra"], g["mean_dec"]])
        errors = np.r_[g["error_ra"], g["error_dec"]]
        return float(np.nanmax(means)), float(np.nanmax(means / errors))

    def lines(self) -> list[str]:
        worst, worst_z = self.grid_worst
        return [
            f"along-scan offset {self.along_scan:+.4f} px",
            f"focal length {self.focal * 100:+.4f} %",
            f'rotation {self.rotation:+.2f}" +- {self.rotation_error:.2f}',
            f'tilt north {self.tilt_north:+.4f}" +- {self.tilt_north_error:.4f}',
            f"matched line time {self.matched_line_time:+.2e}",
            f"bright-star pull rms RA {self.pull_ra:.2f} Dec {self.pull_dec:.2f} "
            f"(n {self.n_bright})",
            f"median offset RA {self.median_ra:+.1f} Dec {self.median_dec:+.1f} mas",
            f"4x8 grid: largest |mean| {worst:.1f} mas, largest |mean|/error {worst_z:.1f}",
        ]


def _truth_grid(column, t, d_ra, d_dec, weight_ra, weight_dec, n_columns, n_across=4, n_along=8):
    """Weighted mean solved-minus-true per cell (``column`` across, ``t`` along), mas."""
    i = np.clip((column / n_columns * n_across).astype(int), 0, n_across - 1)
    span = (t - t.min()) / max(np.ptp(t), 1e-9)
    j = np.clip((span * n_along).astype(int), 0, n_along - 1)
    rows = []
    for a in range(n_across):
        for b in range(n_along):
            s = (i == a) & (j == b)
            cell = [a, b, int(s.sum())]
            for d, w in ((d_ra, weight_ra), (d_dec, weight_dec)):
                if s.sum() < 2:
                    cell += [np.nan, np.nan]
                    continue
                mean = np.sum(w[s] * d[s]) / np.sum(w[s])
                cell += [float(mean), float(1.0 / np.sqrt(np.sum(w[s])))]
            rows.append(cell)
    names = ("across", "along", "n", "mean_ra", "error_ra", "mean_dec", "error_dec")
    return Table(rows=rows, names=names)


def mis_set_figures(config, folder: Path, latitude: float, chip: Chip) -> MisSetFigures:
    """The issue's figures of the solved night in ``folder`` against its truth."""
    from pipeline.runner import open_product
    from pipeline.simulate import PSFOptions
    from pipeline.stages.astrometry import AstrometryStageOptions, east_tilt_equivalent
    from pipeline.stages.rectify import night_model

    parameters = open_product(config, "astrometry", "night", "parameters")
    fit = dict(zip(parameters["name"], parameters["value"], strict=True))
    error = dict(zip(parameters["name"], parameters["error"], strict=True))
    index = open_product(config, "ingest", "night", "block_index")
    nominal = night_model(
        config.site(), config.camera(), index, int(max(index["row_start"] + index["n_rows"]))
    )
    clock_per_tilt, rotation_per_tilt = east_tilt_equivalent(nominal, 1.0)
    # The east tilt acts as clock and rotation (the fit reports the combination).
    expected_clock = CLOCK_OFFSET + TILT_EAST * clock_per_tilt
    expected_rotation = ROTATION * 3600.0 + TILT_EAST * rotation_per_tilt
    true_matched = true_model(chip, latitude, Time(index.meta["reference_time"])).matched_line_time

    catalog = open_product(config, "astrometry", "night", "catalog")
    truth = Table.read(folder / "raw/truth.ecsv")
    truth = truth[truth["in_night"]]
    near, d_ra, d_dec, star = solved_minus_truth(catalog, truth)
    # Stars whose centroids the fit trusts (not saturated, cut by the edge or
    # hit by a cosmic ray), nor one of an unresolved pair: a companion within
    # the seeing FWHM (the simulator's default) that moves the light centre by
    # more than 10 mas (a fifth of a bright star's ~50 mas centroid error).
    flags = np.asarray(catalog["flags"], dtype=np.int64)[near]
    trusted = (flags & AstrometryStageOptions().exclude_mask) == 0
    trusted &= ~unresolved(truth, star, PSFOptions().fwhm, 10.0)
    ra_err = catalog["ra_err"].to_value(u.mas)[near]
    dec_err = catalog["dec_err"].to_value(u.mas)[near]
    bright = (np.asarray(catalog["snr"])[near] > 50) & trusted
    pull_ra = d_ra[bright] / ra_err[bright]
    pull_dec = d_dec[bright] / dec_err[bright]
    # the grid weighs every trusted star by its reported error
    column = np.asarray(truth["c_mean"], float)[star]
    t_mid = np.asarray(truth["t_mid"], float)[star]
    grid = _truth_grid(
        column[trusted],
        t_mid[trusted],
        d_ra[trusted],
        d_dec[trusted],
        ra_err[trusted] ** -2.0,
        dec_err[trusted] ** -2.0,
        chip.n_columns,
    )
    return MisSetFigures(
        along_scan=float((fit["clock_offset"] - expected_clock) / nominal.line_time),
        focal=float(fit["focal_scale"] - (FOCAL_SCALE - 1.0)),
        rotation=float(fit["rotation"] - expected_rotation),
        rotation_error=float(error["rotation"]),
        tilt_north=float(fit["tilt_north"] - TILT_NORTH),
        tilt_north_error=float(error["tilt_north"]),
        matched_line_time=float(parameters.meta["matched_line_time_s"] / true_matched - 1.0),
        pull_ra=float(np.sqrt(np.mean(pull_ra**2))),
        pull_dec=float(np.sqrt(np.mean(pull_dec**2))),
        n_bright=int(bright.sum()),
        median_ra=float(np.median(d_ra)),
        median_dec=float(np.median(d_dec)),
        grid=grid,
    )
