"""Config of the reference stars (``stages.astrometry.reference``)."""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING, Literal

from pydantic import Field, field_validator, model_validator

from pipeline.config import StrictModel

if TYPE_CHECKING:
    import astropy.units as u

__all__ = ["ReferenceColumns", "ReferenceOptions", "ReferenceUnits"]

#: Physical type each kind of column must have (unknown units are config
#: errors), as astropy unit strings: :func:`kind_unit` parses them when a
#: catalogue is read, so that reading a config does not load astropy.units.
UNIT_KINDS = {
    "ra": "deg",
    "dec": "deg",
    "pm_ra": "mas / yr",
    "pm_dec": "mas / yr",
    "magnitude": "mag",
    "magnitude_error": "mag",
    "colour": "mag",
    "parallax": "mas",
    "radial_velocity": "km / s",
}


def kind_unit(kind: str) -> u.UnitBase:
    """The astropy unit a ``kind`` of column (a key of :data:`UNIT_KINDS`) is converted to."""
    import astropy.units as u

    return u.Unit(UNIT_KINDS[kind])


class ReferenceColumns(StrictModel):
    """Column names of a reference-catalogue file (``reference.columns``)."""

    ra: str = Field("ra", description="Right ascension (ICRS) at the catalogue epoch.")
    dec: str = Field("dec", description="Declination (ICRS) at the catalogue epoch.")
    pm_ra: str | None = Field(
        "pm_ra", description="Proper motion in RA, including cos(dec); None: no proper motions."
    )
    pm_dec: str | None = Field("pm_dec", description="Proper motion in Dec; None: none.")
    magnitude: str = Field("mag", description="Magnitude the limits apply to.")
    magnitude_error: str | None = Field(
        None, description="1-sigma error of the magnitude (weights of the zero point); None: none."
    )
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
    magnitude_error: str | None = None
    colour: str | None = None
    parallax: str | None = None
    radial_velocity: str | None = None

    @model_validator(mode="after")
    def _known_units(self) -> ReferenceUnits:
        for kind, text in self:
            if text is not None:
                parse_unit(text, kind, "units." + kind)
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


def parse_unit(text: str, kind: str, where: str) -> u.UnitBase:
    import astropy.units as u

    try:
        unit = u.Unit(text, parse_strict="raise")
    except (ValueError, TypeError):
        raise ValueError(
            f"{where}: unknown unit {text!r}; write an astropy unit such as {UNIT_KINDS[kind]!r}"
        ) from None
    if not unit.is_equivalent(kind_unit(kind)):
        raise ValueError(
            f"{where}: {text!r} is not a unit of the right kind; the {kind} column needs one "
            f"like {UNIT_KINDS[kind]!r}"
        )
    return unit
