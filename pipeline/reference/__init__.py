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

from pipeline.reference._band import SkyBand, sky_band_for_night, sky_band_for_site
from pipeline.reference._files import FILE_FORMATS
from pipeline.reference._options import ReferenceColumns, ReferenceOptions, ReferenceUnits
from pipeline.reference._read import read_reference

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
