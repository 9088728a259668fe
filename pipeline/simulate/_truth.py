"""Truth table and reference catalogue of a simulated night.

Private helpers of :mod:`pipeline.simulate`.
"""

from __future__ import annotations

import functools
from typing import TYPE_CHECKING

import numpy as np

from pipeline.simulate._exposure import peak_fraction

if TYPE_CHECKING:
    from astropy.table import Table

__all__ = ["reference_table", "rounded_table", "truth_table"]


def truth_table(
    stars, ra, dec, tracks, r_geom, c_geom, cols, psf, options, camera, star_response=None
):
    import astropy.units as u
    from astropy.table import Table

    n_cols = camera.n_columns
    recorded = tracks.recorded
    # Light-weighted centroid = exact time mean + (weighted - unweighted) sample means.
    r_mean = np.where(recorded > 0, r_geom + tracks.r_shift, np.nan)
    c_mean = np.where(recorded > 0, c_geom + tracks.c_shift, np.nan)
    column = np.clip(np.rint(np.nan_to_num(c_geom)).astype(int), 0, n_cols - 1)
    response = cols.response[column]
    if star_response is not None:  # star light lost where the sky's flat shows nothing
        response = response * star_response[column]
    block = np.floor((r_geom + 0.5) / options.block_rows).astype(int)
    t = Table()
    if "id" in stars.colnames:  # a shared star field keeps its ids across nights
        t["id"] = np.asarray(stars["id"], dtype=np.int64)
    else:
        t["id"] = np.arange(len(stars), dtype=np.int64)
    t["source"] = stars["source"]
    t["ra"] = ra * u.deg
    t["dec"] = dec * u.deg
    t["pmra"] = stars["pmra"]
    t["pmdec"] = stars["pmdec"]
    t["mag"] = stars["mag"]
    t["colour"] = stars["colour"]
    t["flux"] = tracks.flux * u.electron
    t["flux_recorded"] = recorded * response * u.electron
    t["r_mean"] = r_mean * u.pix
    t["c_mean"] = c_mean * u.pix
    t["r_geom"] = r_geom * u.pix
    t["c_geom"] = c_geom * u.pix
    t["c_file"] = (n_cols - 1 - c_mean if camera.flip_columns else c_mean) * u.pix
    t["t_mid"] = tracks.t_mid * u.s
    t["block"] = block
    t["in_night"] = (
        (r_mean >= -0.5)
        & (r_mean < options.n_blocks * options.block_rows - 0.5)
        & (c_mean >= -0.5)
        & (c_mean < n_cols - 0.5)
    )
    t["in_missing_block"] = np.isin(block, options.missing_blocks)
    t["partial"] = tracks.partial
    t["saturated"] = recorded * response * peak_fraction(psf) > options.detector.full_well
    t.meta["description"] = "simulated stars; strip pixel k covers [k-0.5, k+0.5)"
    units = {"pmra": "mas / yr", "pmdec": "mas / yr", "mag": "mag", "colour": "mag"}
    return _add_units(rounded_table(t), units)


@functools.cache
def _decimals() -> dict:
    """Decimals kept in the written tables, by unit: 1e-9 deg = 3.6 micro-arcsec, 1e-6 px,
    1e-3 e-."""
    import astropy.units as u

    return {u.deg: 9, u.pix: 6, u.electron: 3, u.mag: 5, u.s: 6, u.mas / u.yr: 4, u.mas: 3}


def rounded_table(table: Table) -> Table:
    """Round float columns to a precision far below any use (keeps the ECSV small)."""
    decimals = _decimals()
    for name in table.colnames:
        col = table[name]
        if col.dtype.kind == "f" and col.unit in decimals:
            unit = col.unit
            table[name] = np.round(col, decimals[unit])
            table[name].unit = unit  # np.round returns a column without it
    return table


def _add_units(table: Table, units: dict[str, str]) -> Table:
    """Units of columns given as catalogue values (already at their precision)."""
    for name, unit in units.items():
        table[name].unit = unit
    return table


def reference_table(stars, truth, options, rng) -> Table:
    """Reference catalogue: truth at the reference epoch with catalogue errors."""
    import astropy.units as u
    from astropy.table import Table

    ref = options.reference
    keep = np.asarray(truth["mag"], float) <= ref.mag_limit
    n = int(keep.sum())
    ra = np.asarray(stars["ra"], float)[keep]
    dec = np.asarray(stars["dec"], float)[keep]
    mas = 1.0 / 3.6e6
    dra = ref.position_error * rng.standard_normal(n) * mas / np.cos(np.radians(dec))
    ddec = ref.position_error * rng.standard_normal(n) * mas
    colour = np.asarray(truth["colour"], float)[keep]
    mag = np.asarray(truth["mag"], float)[keep] + ref.colour_term * colour
    t = Table(meta={"epoch": ref.epoch, "description": "simulated reference catalogue"})
    t["id"] = truth["id"][keep]
    t["ra"] = ((ra + dra) % 360.0) * u.deg
    t["dec"] = (dec + ddec) * u.deg
    t["ra_error"] = np.full(n, ref.position_error) * u.mas
    t["dec_error"] = np.full(n, ref.position_error) * u.mas
    t["pmra"] = truth["pmra"][keep]
    t["pmdec"] = truth["pmdec"][keep]
    t["epoch"] = np.full(n, ref.epoch)
    t["mag"] = (mag + ref.mag_error * rng.standard_normal(n)) * u.mag
    t["mag_error"] = np.full(n, ref.mag_error) * u.mag
    t["colour"] = (colour + ref.colour_error * rng.standard_normal(n)) * u.mag
    t["colour_error"] = np.full(n, ref.colour_error) * u.mag
    return _add_units(rounded_table(t), {"pmra": "mas / yr", "pmdec": "mas / yr", "epoch": "yr"})
