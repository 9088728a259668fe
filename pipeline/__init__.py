"""Reduction pipeline for zenith-fixed drift-scan (TDI) telescopes.

The package turns a night of raw time-delay-integration blocks from a
zenith-pointing telescope (a liquid-mirror telescope is the usual case) into
calibrated, rectified, astrometrically and photometrically solved images,
catalogues and mosaics.

Public API (see "Use from Python" in the README):

:func:`load_config`
    Read and validate a night's YAML config.
:func:`run_night`
    Run the night's stages (all, one, or a range), skipping up-to-date units.
:func:`night_status`
    Which units are done, stale, missing or failed.
:func:`open_product`
    One product of a unit: an image as :class:`astropy.nddata.CCDData`, a
    table as :class:`astropy.table.Table`, JSON as a dict.
:func:`read_image`
    An image product file as :class:`~astropy.nddata.CCDData`.

Importing the package changes no astropy setting.  While the pipeline works
(:func:`run_night`, the ``zdrift`` command, the geometry) it keeps astropy
offline (:func:`pipeline._offline.astropy_offline`): it never downloads
Earth-orientation data and warns past the bundled tables.
"""

from __future__ import annotations

import importlib
from typing import Any

__version__ = "0.1.0.dev0"
__all__ = [
    "__version__",
    "load_config",
    "night_status",
    "open_product",
    "read_image",
    "run_night",
]

# Public name -> module that defines it; imported on first use, so that
# ``import pipeline`` stays light and free of side effects.
_PUBLIC = {
    "load_config": "pipeline.config",
    "night_status": "pipeline.runner",
    "open_product": "pipeline.runner",
    "read_image": "pipeline.runner",
    "run_night": "pipeline.runner",
}


def __getattr__(name: str) -> Any:
    if name in _PUBLIC:
        return getattr(importlib.import_module(_PUBLIC[name]), name)
    raise AttributeError(f"module 'pipeline' has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))
