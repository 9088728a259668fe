"""Reduction pipeline for zenith-fixed drift-scan (TDI) telescopes.

The package turns a night of raw time-delay-integration blocks from a
zenith-pointing telescope (a liquid-mirror telescope is the usual case) into
calibrated, rectified, astrometrically and photometrically solved images,
catalogues and mosaics.

Importing the package puts astropy into offline mode (see
:func:`pipeline._offline.configure_offline`): the pipeline never downloads
Earth-orientation data and degrades with a warning past the bundled tables.
"""

from pipeline._offline import configure_offline

__version__ = "0.1.0.dev0"
__all__ = ["__version__", "configure_offline"]

configure_offline()
