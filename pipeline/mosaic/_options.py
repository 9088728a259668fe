"""Options of a mosaic: how its tiles are laid out and how nights are co-added."""

from __future__ import annotations

from typing import Literal

from pydantic import BaseModel, ConfigDict, Field, field_validator, model_validator

from pipeline.masks import MaskBit

__all__ = ["CoaddOptions", "TileCentre", "TilingOptions"]


class TileCentre(BaseModel):
    """One explicitly placed tile (``tiling.tiles`` entries)."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    ra: float = Field(ge=0, lt=360, description="Right ascension of the tile centre, deg (ICRS).")
    dec: float = Field(ge=-90, le=90, description="Declination of the tile centre, deg (ICRS).")
    width: int | None = Field(
        None, ge=16, description="Tile width, pixels; None: the section's tile_width."
    )
    height: int | None = Field(
        None, ge=16, description="Tile height, pixels; None: the section's tile_height."
    )


class TilingOptions(BaseModel):
    """The ``tiling`` section of a mosaic config.

    :func:`pipeline.mosaic.tiles_from_options` turns it into tiles (through
    :func:`~pipeline.mosaic.strip_tiles` or :func:`~pipeline.mosaic.explicit_tiles`).
    """

    model_config = ConfigDict(extra="forbid", frozen=True)

    layout: Literal["tangent_tiles", "cylindrical_strip", "explicit"] = Field(
        "tangent_tiles",
        description="tangent_tiles: gnomonic (TAN) tiles centred along the strip's central "
        "declination; cylindrical_strip: one long plate-carree (CAR) image along the strip; "
        "explicit: the tiles listed under 'tiles'.",
    )
    pixel_scale: float = Field(gt=0, description="Tile pixel size, arcsec.")
    tile_width: int = Field(4096, ge=16, description="Tile size along the strip, pixels.")
    tile_height: int = Field(
        4096,
        ge=16,
        description="Tile size across the strip, pixels (the cylindrical strip's height too).",
    )
    overlap: int = Field(
        256, ge=0, description="Pixels shared by neighbouring tangent tiles along the strip."
    )
    tiles: tuple[TileCentre, ...] = Field(
        (), description="Tile centres and sizes for layout 'explicit'."
    )

    @model_validator(mode="after")
    def _consistent(self) -> TilingOptions:
        if self.layout == "explicit" and not self.tiles:
            raise ValueError("layout 'explicit' needs at least one entry under 'tiles'.")
        if self.layout != "explicit" and self.tiles:
            raise ValueError(
                f"'tiles' is only read with layout 'explicit' (layout is {self.layout!r}); "
                "remove it or set layout: explicit."
            )
        if self.overlap >= self.tile_width:
            raise ValueError(
                f"overlap ({self.overlap} px) must be smaller than tile_width "
                f"({self.tile_width} px)."
            )
        return self


class CoaddOptions(BaseModel):
    """The ``coadd`` section of a mosaic config.

    Field names mirror the keyword arguments of :func:`pipeline.mosaic.coadd`.
    """

    model_config = ConfigDict(extra="forbid", frozen=True)

    max_seeing: float | None = Field(
        None,
        gt=0,
        description="Leave out nights whose seeing FWHM exceeds this, arcsec; null: no limit.",
    )
    max_transparency_loss: float | None = Field(
        None,
        ge=0,
        description="Leave out nights whose zero point is more than this many magnitudes "
        "below the best night's; null: no limit.",
    )
    filter: str | None = Field(
        None,
        description="Passband (the products' FILTER) to co-add, leaving out nights of "
        "others; null: every product must have the same FILTER (a tile that would mix "
        "passbands fails and names them).",
    )
    weight_by_seeing: bool = Field(
        False,
        description="Multiply each night's inverse-variance weight by (best FWHM / FWHM)^2, "
        "which favours sharp nights for point sources.",
    )
    reject_sigma: float = Field(
        4.0, gt=0, description="Reject a night's pixel this many sigma from the weighted median."
    )
    source_tolerance: float = Field(
        0.5,
        ge=0,
        description="Part of the median's signal above the sky (its highest within "
        "source_radius) added in quadrature to the noise when rejecting, so that stars seen "
        "in different seeing are kept.",
    )
    source_radius: int = Field(
        5,
        ge=0,
        description="Reach of a source's allowance (source_tolerance) around it, pixels: the "
        "wings of a star in poor seeing stand out of the median far from its core.",
    )
    min_nights: int = Field(
        3, ge=2, description="Reject outliers only where at least this many nights have data."
    )
    grow: int = Field(
        1, ge=0, description="Also reject a rejected pixel's neighbours up to this far, pixels."
    )
    match_levels: bool = Field(
        True,
        description="Subtract from each night its median offset from the other nights "
        "(sky level) before rejecting and averaging.",
    )
    ignore_flags: tuple[str, ...] = Field(
        (
            "SATURATED",
            "BLEED",
            "BAD_COLUMN",
            "COSMIC_RAY",
            "NONFINITE",
            "GAP",
            "OUTSIDE",
            "TRAIL",
        ),
        description="Flag names (pipeline.masks.MaskBit) whose pixels are left out of the co-add.",
    )

    @field_validator("ignore_flags")
    @classmethod
    def _known_flags(cls, names: tuple[str, ...]) -> tuple[str, ...]:
        unknown = [n for n in names if n not in MaskBit.__members__]
        if unknown:
            raise ValueError(
                f"unknown flag name(s) {unknown}; known: {', '.join(MaskBit.__members__)}."
            )
        return names
