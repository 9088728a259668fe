"""The simulator's star field: synthetic stars, catalogue stars, user stars.

Private helpers of :mod:`pipeline.simulate`.  Positions are ICRS degrees at the
reference epoch (``options.reference.epoch``); the simulator moves them to the
observation epoch.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    from astropy.table import Table

__all__ = [
    "catalog_stars",
    "draw_magnitudes",
    "draw_star_field",
    "extra_stars",
    "field_bounds",
]


def draw_magnitudes(
    n: int, mag_bright: float, mag_faint: float, slope: float, rng: np.random.Generator
) -> np.ndarray:
    """Draw magnitudes with ``dN/dm ~ 10**(slope * m)`` between two limits.

    Inverse-CDF sampling of the truncated exponential; ``slope = 0`` is uniform.
    """
    x = rng.uniform(size=n)
    if slope == 0:
        return mag_bright + x * (mag_faint - mag_bright)
    a, b = 10.0 ** (slope * mag_bright), 10.0 ** (slope * mag_faint)
    return np.log10(a + x * (b - a)) / slope


def draw_star_field(
    ra_range: tuple[float, float],
    dec_range: tuple[float, float],
    options,
    rng: np.random.Generator,
) -> Table:
    """A reproducible synthetic star field, uniform on the sphere.

    Parameters
    ----------
    ra_range : (float, float)
        RA limits in degrees (the upper may exceed 360; results are wrapped).
    dec_range : (float, float)
        Declination limits in degrees.
    options : StarOptions
        Density or count, magnitude range, luminosity-function slope, colours,
        proper motions.
    rng : numpy.random.Generator
        Random stream.

    Returns
    -------
    astropy.table.Table
        ``ra``, ``dec`` (deg), ``pmra``, ``pmdec`` (mas/yr), ``mag``, ``colour``.
    """
    import astropy.units as u
    from astropy.table import Table

    ra0, ra1 = ra_range
    d0, d1 = np.radians(sorted(dec_range))
    area = np.radians(ra1 - ra0) * (np.sin(d1) - np.sin(d0)) * (180.0 / np.pi) ** 2
    n = options.count if options.count is not None else rng.poisson(options.density * area)
    ra = (ra0 + (ra1 - ra0) * rng.uniform(size=n)) % 360.0
    dec = np.degrees(np.arcsin(np.sin(d0) + (np.sin(d1) - np.sin(d0)) * rng.uniform(size=n)))
    table = Table()
    table["ra"] = ra * u.deg
    table["dec"] = dec * u.deg
    table["pmra"] = options.pm_rms * rng.standard_normal(n) * u.mas / u.yr
    table["pmdec"] = options.pm_rms * rng.standard_normal(n) * u.mas / u.yr
    mags = draw_magnitudes(n, options.mag_bright, options.mag_faint, options.slope, rng)
    table["mag"] = mags * u.mag
    table["colour"] = (options.colour_mean + options.colour_rms * rng.standard_normal(n)) * u.mag
    table["source"] = np.full(n, "synthetic")
    return table


def _unwrap_deg(ra: np.ndarray) -> np.ndarray:
    return np.degrees(np.unwrap(np.radians(ra)))


def field_bounds(model, camera, t_lo: float, t_hi: float, margin_px: float):
    """RA (unwrapped, deg) and Dec ranges seen by the chip, widened by a margin."""
    t = np.linspace(t_lo, t_hi, 9)
    v = np.array([-margin_px, camera.n_columns - 1 + margin_px])
    ra, dec = model.sky_from_focal_plane(model.n_rows / 2.0, v[:, None], t[None, :])
    ra = np.vstack([_unwrap_deg(row) for row in ra])
    ra = ra - 360.0 * np.floor(ra[0, 0] / 360.0)
    scale = model.pixel_scale / 3600.0
    # The track bows poleward by ~N^2 p tan(phi)/8 px; pad by that plus the margin.
    bow = model.n_rows**2 * scale * np.pi / 180.0 * abs(np.tan(np.radians(model.latitude))) / 8.0
    pad_dec = (margin_px + bow) * scale
    cosd = np.cos(np.radians(np.clip(np.abs(dec).max(), 0.0, 89.0)))
    pad_ra = margin_px * scale / cosd
    return (
        (float(ra.min() - pad_ra), float(ra.max() + pad_ra)),
        (float(dec.min() - pad_dec), float(dec.max() + pad_dec)),
    )


def catalog_stars(kind: str, ra_range, dec_range, options) -> Table:
    """Real stars from a packaged catalogue, at the reference epoch."""
    import astropy.units as u
    from astropy.table import Table

    from pipeline.catalogs import HIPPARCOS_EPOCH, read_gaia_bright, read_hipparcos
    from pipeline.geometry.propermotion import positions_at_epoch

    lo, hi = ra_range
    ra_sel = None if hi - lo >= 360.0 else (lo % 360.0, hi % 360.0)
    mag_faint = options.stars.mag_faint
    if kind == "gaia":
        cat = read_gaia_bright(dec_range, ra_sel, mag_limit=mag_faint)
        mag = np.asarray(cat["phot_g_mean_mag"], float)
        colour = np.asarray(cat["phot_bp_mean_mag"] - cat["phot_rp_mean_mag"], float)
        epoch = cat.meta["epoch"]
        ids = np.asarray(cat["source_id"])
    else:
        cat = read_hipparcos(dec_range, ra_sel, mag_limit=mag_faint)
        mag = np.asarray(cat["hp_mag"], float)
        colour = np.asarray(cat["b_v"], float)
        epoch = HIPPARCOS_EPOCH
        ids = np.asarray(cat["hip"])
    pmra = np.nan_to_num(np.asarray(cat["pmra"], float))
    pmdec = np.nan_to_num(np.asarray(cat["pmdec"], float))
    ra, dec = positions_at_epoch(
        np.asarray(cat["ra"], float),
        np.asarray(cat["dec"], float),
        pmra,
        pmdec,
        epoch,
        options.reference.epoch,
    )
    keep = np.isfinite(mag) & (mag >= options.stars.catalog_mag_bright)
    table = Table()
    table["ra"] = ra[keep] * u.deg
    table["dec"] = dec[keep] * u.deg
    table["pmra"] = pmra[keep] * u.mas / u.yr
    table["pmdec"] = pmdec[keep] * u.mas / u.yr
    table["mag"] = mag[keep] * u.mag
    colour = np.where(np.isfinite(colour), colour, options.stars.colour_mean)
    table["colour"] = colour[keep] * u.mag
    table["source"] = np.array([f"{kind}:{i}" for i in ids[keep]], dtype=str)
    return table


def extra_stars(extra: Table, options) -> Table:
    import astropy.units as u
    from astropy.table import Table

    missing = [k for k in ("ra", "dec", "mag") if k not in extra.colnames]
    if missing:
        raise ValueError(
            f"extra_stars lacks column(s) {missing}; give ra, dec (deg) and mag at least."
        )
    n = len(extra)

    def column(name, default, unit):
        values = np.asarray(extra[name], float) if name in extra.colnames else np.full(n, default)
        return values * unit

    table = Table()
    table["ra"] = column("ra", 0.0, u.deg)
    table["dec"] = column("dec", 0.0, u.deg)
    table["pmra"] = column("pmra", 0.0, u.mas / u.yr)
    table["pmdec"] = column("pmdec", 0.0, u.mas / u.yr)
    table["mag"] = column("mag", 0.0, u.mag)
    table["colour"] = column("colour", options.colour_mean, u.mag)
    table["source"] = np.full(n, "extra")
    return table
