"""Small synthetic products for the report tests (invented data, self-consistency only)."""

from __future__ import annotations

from pathlib import Path

import astropy.units as u
import numpy as np
from astropy.table import QTable, Table

from pipeline.config import Config, config_from_mapping
from pipeline.report import NightProducts, ReportOptions, build_report
from pipeline.stages.base import StageContext
from pipeline.stages.report import about_rows

#: Line time (s) and TDI rows of the synthetic night.
LINE_TIME = 0.05
TDI_ROWS = 40


def block_index() -> Table:
    """Two blocks of 100 rows with a 50-row gap between them."""
    return Table(
        {
            "file": ["a.fits", "b.fits"],
            "hdu": [0, 0],
            "row_start": [0, 150],
            "n_rows": [100, 100],
            "date_obs": ["2026-10-15T23:59:50.000", "2026-10-16T00:00:05.000"],
            "line_time": [LINE_TIME, LINE_TIME],
            "tdi_rows": [TDI_ROWS, TDI_ROWS],
        }
    )


def seeing() -> Table:
    """Two stretches: bands across the chip first, the whole stretch last."""
    rows = []
    for stretch, (x0, x1), whole in ((0, (0, 100), 3.0), (1, (150, 250), 3.4)):
        for band, (y0, y1) in enumerate(((0, 50), (50, 100))):
            rows.append((y0, y1, 5, whole + 0.1 * band, stretch, x0, x1))
        rows.append((0, 100, 10, whole, stretch, x0, x1))
    return Table(
        rows=rows, names=("y_lo", "y_hi", "n_stars", "fwhm", "stretch", "x_start", "x_stop")
    )


def products() -> dict:
    """Every product key the figures need, with small made-up values."""
    rng = np.random.default_rng(5)
    columns = np.arange(64)
    flat = 1.0 + 0.01 * rng.standard_normal(64)
    flags = np.zeros(64, dtype=np.uint16)
    flags[[10, 40]] = 1
    flat[40] = np.nan
    strip = rng.normal(100.0, 5.0, size=(50, 125))
    strip[:, 50:75] = np.nan  # the gap
    return {
        "block_index": block_index(),
        "seeing": seeing(),
        "sky": Table(
            {
                "x": [25.0, 75.0, 175.0, 225.0],
                "sky_rate": [400.0, 300.0, 200.0, 100.0],
                "pixel_area": [0.25] * 4,
            }
        ),
        "columns": Table(
            {"column": columns, "flat": flat, "flat_error": np.full(64, 0.002), "flags": flags}
        ),
        "catalog": Table(
            {
                "x": rng.uniform(0, 250, 300),
                "snr": rng.uniform(5, 500, 300),
                "flags": rng.integers(0, 2, 300),
            }
        ),
        "strip": strip,
        "strip_factor": 2,
        "smear_widths": Table(
            {
                "x": rng.uniform(0, 250, 40),
                "y": rng.uniform(0, 100, 40),
                "fwhm_seeing": np.full(40, 3.0),
                "along": rng.normal(2.0, 0.05, 40),
                "across": rng.normal(1.5, 0.05, 40),
                "model_along": np.full(40, 1.95),
                "model_across": np.full(40, 1.52),
            }
        ),
        "strip_rows": 100,
        "pixel_scale": 0.5,
        **solved_products(),
    }


def solved_products() -> dict:
    """Astrometry and zeropoint products as those stages lay them out, made-up values."""
    rng = np.random.default_rng(6)
    parameters = Table(
        {
            "name": ["clock_offset", "focal_scale", "rotation"],
            "value": [1e-4, 2e-5, 3.5],
            "error": [4e-5, 9e-5, 0.8],
            "unit": ["s", "", "arcsec"],
        }
    )
    parameters.meta.update(
        n_matched=321,
        chi2_reduced=1.2,
        focal_length_m=6.00012,
        focal_length_from_spin_m=6.0,
        line_time_s=LINE_TIME * (1 + 1e-4),
        matched_line_time_s=LINE_TIME,
    )
    cells = [(a, b) for a in range(4) for b in range(8)]
    grid = Table(
        {
            "across": [a for a, _ in cells],
            "along": [b for _, b in cells],
            "n": rng.integers(0, 30, len(cells)),
            "mean_along": rng.normal(0, 10, len(cells)),
            "mean_across": rng.normal(0, 10, len(cells)),
            "rms_along": rng.uniform(20, 40, len(cells)),
            "rms_across": rng.uniform(20, 40, len(cells)),
        }
    )
    t = np.linspace(0.0, 12.0, 50)  # s after night row 0: columns 20 to 260
    zero_point = Table(
        {
            "t": t,
            "zero_point": 27.8 - 0.1 * np.exp(-(((t - 8) / 1.5) ** 2)),
            "zero_point_err": np.full(t.size, 0.01),
        }
    )
    zero_point.meta.update(line_time_s=LINE_TIME, tdi_rows=TDI_ROWS)
    intervals = QTable(  # as the zeropoint stage writes it
        {
            "stretch": ["s0000", "s0001"],
            # seconds as Quantity, as the zeropoint stage writes them
            "t_start": [-1.0, 6.5] * u.s,
            "t_stop": [4.0, 11.5] * u.s,
            "flags": [0, 1],
            "interpolated": [False, True],
        }
    )
    intervals.meta["clear_level_mag"] = 27.8
    star_flat = Table(
        {
            "column_start": np.arange(0, 64, 16),
            "column_stop": np.arange(16, 80, 16),
            "offset": [0.002, -0.001, 0.0, 0.03],
            "offset_err": [0.002] * 4,
        }
    )
    star_flat.meta.update(slope=2e-4, deviant=[3])
    return {
        "astrometry_parameters": parameters,
        "residual_grid": grid,
        "matched_x_range": (10.0, 240.0),
        "n_columns": 64,
        "tdi_rows": TDI_ROWS,
        "zero_point": zero_point,
        "zp_intervals": intervals,
        "star_flat": star_flat,
    }


def config(tmp_path: Path, **site: str) -> Config:
    """A config for the synthetic night (the real stage graph, nothing run)."""
    return config_from_mapping(
        {
            "night": {"name": "synthetic", "raw_dir": str(tmp_path), "output_dir": str(tmp_path)},
            "site": {"latitude": 40.0, "longitude": -1.0, "name": "Test Ridge", **site},
            "camera": {
                "n_columns": 64,
                "tdi_rows": TDI_ROWS,
                "pixel_size": 15.0,
                "focal_length": 6.0,
            },
        }
    )


def page(night: NightProducts, config: Config, options: ReportOptions | None = None) -> str:
    """The page the report stage would write for ``night`` under ``config``."""
    context = StageContext(
        site=config.site(), camera=config.camera(), run=config.run, night=config.night.name
    )
    about = about_rows(context, night.header)
    return build_report(night, config.night.name, about, options or ReportOptions())


def nights(names: tuple[str, ...] = ("2026-10-15", "2026-10-16")) -> list[tuple[str, dict]]:
    """Nights as the page across the nights gets them: the synthetic night, each a bit worse.

    Night ``i`` has its seeing times ``1 + 0.2 i`` and its zero point ``0.1 i``
    mag fainter; each links to ``../<name>/page.html``.
    """
    from pipeline.report import night_sky, summary_rows

    entries = []
    for i, name in enumerate(names):
        night = products()
        night["seeing"]["fwhm"] *= 1 + 0.2 * i
        night["zero_point"]["zero_point"] -= 0.1 * i
        entries.append(
            (
                name,
                {
                    "summary": [list(row) for row in summary_rows(night, None)],
                    "seeing": night["seeing"],
                    "block_index": night["block_index"],
                    "sky": night_sky(night, ReportOptions()),
                    "zero_point": night["zero_point"],
                    "residual_grid": night["residual_grid"],
                    "page": f"../{name}/page.html",
                },
            )
        )
    return entries


def nights_page(entries: list[tuple[str, dict]] | None = None) -> str:
    """The page across the nights for ``entries`` (default :func:`nights`)."""
    from pipeline.report import build_nights_report

    about = [("mosaic", "test-strip"), ("nights", "2")]
    return build_nights_report(entries or nights(), "test-strip", about, ReportOptions())
