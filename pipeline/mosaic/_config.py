"""The mosaic config: which nights, which tiles, how to co-add and catalogue them.

A mosaic is described by a YAML file read as strictly as a night's
(:func:`pipeline.config.load_model`: unknown keys are errors naming the file,
key and line; ``extends`` and ``--set`` overrides work the same)::

    mosaic:
      name: strip-a                # folder-safe; tiles go to output_dir/strip-a/
      output_dir: mosaics          # relative to this file's folder
      nights:                      # night configs or product folders
        - nights/2026-10-15.yaml
        - products/2026-10-16
    tiling:
      layout: tangent_tiles
      pixel_scale: 1.2
      tile_width: 4096
    coadd:
      max_seeing: 3.0
      weight_by_seeing: true
    detect:                        # the catalogue on each co-add
      threshold_sigma: 5
    run:
      executor: dask

The sections ``tiling``, ``coadd`` and ``detect`` are
:class:`~pipeline.mosaic.TilingOptions`, :class:`~pipeline.mosaic.CoaddOptions`
and the detect stage's :class:`~pipeline.stages.detect.DetectOptions`; ``run``
is :class:`~pipeline.config.ExecutorSection`.
"""

from __future__ import annotations

import datetime
from pathlib import Path
from typing import Any

from pydantic import Field, field_validator

from pipeline.config import ExecutorSection, StrictModel, load_model
from pipeline.mosaic._options import CoaddOptions, TilingOptions
from pipeline.stages.detect import DetectOptions

__all__ = ["MosaicConfig", "MosaicSection", "load_mosaic_config"]


class MosaicSection(StrictModel):
    """The ``mosaic`` section: its name, where it goes, which nights it combines."""

    name: str = Field(pattern=r"^[A-Za-z0-9][A-Za-z0-9._-]*$", description="folder-safe name")
    output_dir: Path = Field(description="tiles go to output_dir/<name>/")
    nights: tuple[Path, ...] = Field(
        min_length=1,
        description="Night config files (.yaml/.yml: their science products are used) or "
        "product folders of nights (<night output_dir>/<night name>).",
    )

    @field_validator("name", mode="before")
    @classmethod
    def _date_as_text(cls, value: Any) -> Any:
        return value.isoformat() if isinstance(value, datetime.date) else value

    @field_validator("nights")
    @classmethod
    def _existing_and_distinct(cls, nights: tuple[Path, ...]) -> tuple[Path, ...]:
        missing = [str(p) for p in nights if not p.exists()]
        if missing:
            raise ValueError(
                f"no such night config or product folder: {', '.join(missing)}; give each "
                "night's YAML config or its product folder (paths relative to this file)"
            )
        not_config = [
            str(p) for p in nights if p.is_file() and p.suffix.lower() not in (".yaml", ".yml")
        ]
        if not_config:
            raise ValueError(
                f"{', '.join(not_config)}: a night is a .yaml/.yml config or a product folder"
            )
        seen, repeated = set(), []
        for p in nights:
            if p.resolve() in seen:
                repeated.append(str(p))
            seen.add(p.resolve())
        if repeated:
            raise ValueError(f"nights listed twice: {', '.join(repeated)}; list each once")
        return nights


class TileDetectOptions(DetectOptions):
    """The detect stage's options for a tile's catalogue: pair splitting and PSF scaling off.

    A tile's model blends its nights' kernels and seeing, so its UNRESOLVED
    flags are mostly the blend's misfit (30 of 770 sources of a demo tile,
    against ~0.1 % on a night's stretch), and trying to split them cost ~40 %
    of the tile catalogue's CPU for 6 more sources.  Its PSF fluxes come from
    a seeing mixture built from the nights' fitted profiles, not fitted on
    a dozen stars, and were within 0.03 % of the truth on simulated tiles;
    scaled to the apertures, whose model corrections on the tile's grid are
    cruder, they came out 0.6 % low.
    """

    split_pairs: bool = Field(
        False, description="As the detect stage's; off by default for a tile (see above)."
    )
    psf_scale_aperture: int | None = Field(
        None,
        ge=1,
        description="As the detect stage's; off (null) by default for a tile (see above).",
    )


class MosaicConfig(StrictModel):
    """A validated mosaic config (see the module docstring)."""

    mosaic: MosaicSection
    tiling: TilingOptions
    coadd: CoaddOptions = Field(default_factory=CoaddOptions)
    detect: TileDetectOptions = Field(default_factory=TileDetectOptions)
    run: ExecutorSection = Field(default_factory=ExecutorSection)


def load_mosaic_config(path: str | Path, overrides=()) -> MosaicConfig:
    """Load and validate a mosaic config file.

    Parameters
    ----------
    path : str or pathlib.Path
    overrides : iterable of str
        ``'dotted.key=value'`` strings, e.g. ``'coadd.max_seeing=2.5'``.

    Raises
    ------
    pipeline.exceptions.ConfigError
        Naming the file, key path and line of every problem.
    """
    return load_model(path, MosaicConfig, overrides)
