"""Small synthetic products for the report tests (invented data, self-consistency only)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
from astropy.table import Table

from pipeline.config import Config, config_from_mapping

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
        "pixel_scale": 0.5,
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
