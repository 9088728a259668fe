"""The image product format: one multi-extension FITS file per unit.

Every image product of the pipeline (a calibrated stretch, a rectified
stretch, ...) is one FITS file holding four HDUs:

=====  ============  =========================================================
HDU    ``EXTNAME``   content
=====  ============  =========================================================
0      (primary)     no data; the observation metadata and provenance cards
1      ``FLUX``      the image, float32, ``BUNIT`` (e.g. ``electron``)
2      ``FLUXVAR``   its variance, float32, ``BUNIT`` the square of the image's
                     unit, ``UTYPE = 'VarianceUncertainty'``
3      ``FLAGS``     the flag plane, uint16, OR of :class:`pipeline.masks.MaskBit`
                     bits; ``FLAGBITn`` cards name bit ``n`` (hexadecimal) and say what it means
=====  ============  =========================================================

The three planes carry the same WCS and observation metadata, so each can be
read alone.  :func:`ccddata_from_hdulist` (and ``pipeline.read_image`` on a
file) returns an :class:`astropy.nddata.CCDData` with the image and its unit,
a :class:`~astropy.nddata.VarianceUncertainty`, the flag plane as ``flags``
(usable with :func:`astropy.nddata.bitmask.bitfield_to_boolean_mask`), the
WCS and the header as ``meta``.  astropy's own reader gives the same::

    CCDData.read(path, hdu="FLUX", hdu_uncertainty="FLUXVAR", hdu_flags="FLAGS",
                 hdu_mask=None)

(astropy moves the WCS and time keywords it understands from ``meta`` into
``wcs``; :func:`ccddata_from_hdulist` keeps the whole header in ``meta``).

Observation metadata (the FITS Standard 4.0's keywords describing
observations, and the time keywords of Rots et al. 2015, A&A 574, A36,
"Representations of time coordinates in FITS"): ``TELESCOP``, ``INSTRUME``,
``OBSERVAT``, ``FILTER``, ``OBSGEO-X/Y/Z`` (the site, geocentric metres, from
astropy's ``EarthLocation``) and ``OBSGEO-L/B/H`` (the same point on the IAU
1976 ellipsoid, on which WCSLIB relates the two), ``TIMESYS = 'UTC'``,
``TREFPOS = 'TOPOCENTER'``, ``DATEREF``/``MJDREF`` (the product's time
origin), ``TIMEUNIT = 's'``, ``TSTART``/``TSTOP`` (seconds since
``DATEREF``), ``DATE-OBS`` = ``DATE-BEG`` (the first pixel row's charge
started to collect), ``DATE-END`` (the last row was read out), ``DATE-AVG``,
the matching ``MJD-*``, ``TELAPSE`` (``DATE-END - DATE-BEG``) and
``XPOSURE``, the effective exposure of every pixel: the crossing time
``TDIROWS * LINETIME``.

Position in the night: an alternate linear WCS ``A`` named ``NIGHT``
(``WCSNAMEA``) gives each pixel's 0-based night column and row
(``CTYPE1A``/``CTYPE2A``), so a product's offset in the night's grid is
``CRVAL1A``/``CRVAL2A`` at ``CRPIX = 1``.  The stages document which grid
(the strip's or the rectified frame's) their products use.
"""

from __future__ import annotations

import re
from collections.abc import Mapping
from typing import TYPE_CHECKING

import numpy as np

from pipeline.geometry.instrument import Camera, Site
from pipeline.masks import BIT_MEANINGS, MASK_DTYPE, MaskBit

if TYPE_CHECKING:
    import astropy.units as u
    from astropy.io import fits
    from astropy.nddata import CCDData
    from astropy.time import Time

# astropy.time, astropy.wcs and the site's geometry (which bring
# astropy.coordinates and the IERS tables' code, ~0.1 s of CPU) are imported
# by the functions that use them: the command line imports this module.

__all__ = [
    "FLAGS_EXTENSION",
    "FLUX_EXTENSION",
    "NIGHT_ZERO_POINT_KEY",
    "SEEING_INDEX_KEY",
    "SEEING_KEY",
    "VARIANCE_EXTENSION",
    "ZERO_POINT_ERROR_KEY",
    "ZERO_POINT_FLAGS_KEY",
    "ZERO_POINT_KEY",
    "ccddata_from_hdulist",
    "flag_bits_from_header",
    "flag_header",
    "image_hdulist",
    "night_column",
    "night_grid_header",
    "night_grid_wcs",
    "observation_header",
    "plane_columns",
]

#: Extension names of the three planes of an image product.
FLUX_EXTENSION = "FLUX"
VARIANCE_EXTENSION = "FLUXVAR"
FLAGS_EXTENSION = "FLAGS"

# Header keywords of a calibrated (science) image product, written by
# pipeline.stages.science and read by the mosaic: one definition for both.
#: The fixed zero point of the FLUX plane, mag: ``m = PHOTZP - 2.5 log10(sum of FLUX)``
#: (the keyword of the ESO science data products standard, from memory).
ZERO_POINT_KEY = "PHOTZP"
#: Median zero point at which the stretch was recorded, mag for 1 e-/s (lower: less
#: transparent); only differences between products matter.
NIGHT_ZERO_POINT_KEY = "ZPMED"
#: Largest 1-sigma error of the recorded zero point over the stretch, mag.
ZERO_POINT_ERROR_KEY = "ZPERR"
#: The stretch's zero-point quality bits (pipeline.stages.zeropoint.ZeroPointFlag).
ZERO_POINT_FLAGS_KEY = "ZPFLAGS"
#: Nominal seeing FWHM of the stretch, arcsec.
SEEING_KEY = "SEEING"
#: Moffat index of the seeing profile detect fitted the stretch's stars with
#: (its seeing table's ``beta``); absent for a Gaussian seeing.  Our own
#: keyword: no FITS standard or convention we know of defines it otherwise.
SEEING_INDEX_KEY = "SEEBETA"
#: Keyword prefix of the flag-bit definitions: ``FLAGBITn``, ``n`` the bit's
#: number as one hexadecimal digit (``FLAGBIT0`` ... ``FLAGBIT9``, ``FLAGBITA``
#: for bit 10 ... ``FLAGBITF``), so that every one of a uint16 mask's bits fits
#: FITS's 8-character keywords.
_FLAG_PREFIX = "FLAGBIT"


def flag_header() -> fits.Header:
    """Header cards naming every :class:`~pipeline.masks.MaskBit` and its meaning.

    Returns
    -------
    astropy.io.fits.Header
        ``FLAGBITn = '<NAME>' / <meaning>`` for each defined bit ``n`` (one
        hexadecimal digit: ``FLAGBITA`` for bit 10).
    """
    from astropy.io import fits

    header = fits.Header()
    for bit in MaskBit:
        number = int(bit).bit_length() - 1
        header[f"{_FLAG_PREFIX}{number:X}"] = (bit.name, BIT_MEANINGS[bit])
    return header


def flag_bits_from_header(header: Mapping) -> dict[str, int]:
    """Flag names and their bit values, read back from ``FLAGBITn`` cards.

    Parameters
    ----------
    header : astropy.io.fits.Header or mapping
        Header of an image product's ``FLAGS`` plane (or a CCDData's ``meta``).

    Returns
    -------
    dict
        Name -> bit value (``1 << n``), e.g. for
        :func:`astropy.nddata.bitmask.bitfield_to_boolean_mask`'s
        ``flag_name_map``.
    """
    bits = {}
    for number in range(8 * MASK_DTYPE.itemsize):
        name = header.get(f"{_FLAG_PREFIX}{number:X}")
        if name:
            bits[str(name)] = 1 << number
    return bits


def _time_cards(prefix_date: str, prefix_mjd: str, time: Time, what: str) -> list:
    return [
        (prefix_date, time.utc.isot, f"[UTC] {what}"),
        (prefix_mjd, float(time.utc.mjd), f"[d] {prefix_date} as MJD (UTC)"),
    ]


#: The IAU 1976 reference ellipsoid (equatorial radius, m; flattening): WCSLIB
#: relates OBSGEO-L/B/H to OBSGEO-X/Y/Z on it (its obsfix reports WGS84
#: geodetic values as inconsistent with the X/Y/Z by 3 m).
_IAU1976_ELLIPSOID = (6378140.0, 1.0 / 298.257)


def _geodetic_cards(location) -> list:
    """OBSGEO-L/B/H of a site: its geocentric X/Y/Z on the IAU 1976 ellipsoid (ERFA gc2gde)."""
    import astropy.units as u
    import erfa

    xyz = np.array([location.x.to_value(u.m), location.y.to_value(u.m), location.z.to_value(u.m)])
    longitude, latitude, height = erfa.gc2gde(*_IAU1976_ELLIPSOID, xyz)
    return [
        ("OBSGEO-L", float(np.degrees(longitude)), "[deg] site longitude, east (IAU 1976)"),
        ("OBSGEO-B", float(np.degrees(latitude)), "[deg] site latitude (IAU 1976 ellipsoid)"),
        ("OBSGEO-H", float(height), "[m] site height (IAU 1976 ellipsoid)"),
    ]


def observation_header(
    *,
    reference_time: Time,
    start: float,
    stop: float,
    exposure: float | None,
    site: Site,
    camera: Camera,
    filter_name: str | None = None,
    reference_comment: str = "time origin of TSTART, TSTOP",
) -> fits.Header:
    """Observation metadata of an image product (FITS standard keywords).

    Parameters
    ----------
    reference_time : astropy.time.Time
        Time origin of the product (``DATEREF``/``MJDREF``).
    start, stop : float
        Seconds since ``reference_time`` when the product's first charge
        started to collect and when its last row was read out
        (``DATE-BEG``, ``DATE-END``).
    exposure : float or None
        Effective exposure of each pixel, s (``XPOSURE``): the crossing time
        ``TDIROWS * LINETIME``; None omits the card (the product mixes
        crossing times).
    site, camera : Site, Camera
        From the config: ``OBSERVAT``, ``OBSGEO-*``, ``INSTRUME``, ``TELESCOP``.
    filter_name : str or None
        The raw files' ``FILTER``; None omits the card.
    reference_comment : str
        Comment of ``DATEREF``: what the time origin is.

    Returns
    -------
    astropy.io.fits.Header
    """
    import astropy.units as u
    from astropy.io import fits

    if not stop >= start:
        raise ValueError(f"stop ({stop} s) must not precede start ({start} s).")
    from astropy.time import TimeDelta

    from pipeline.geometry.sitetime import earth_location

    reference = reference_time.utc
    begin = reference + TimeDelta(float(start), format="sec")
    end = reference + TimeDelta(float(stop), format="sec")
    middle = reference + TimeDelta(0.5 * (float(start) + float(stop)), format="sec")
    location = earth_location(site)
    cards = [
        ("TELESCOP", camera.telescope, "telescope"),
        ("INSTRUME", camera.name, "camera"),
        ("OBSERVAT", site.name, "observing site"),
    ]
    if filter_name is not None:
        cards.append(("FILTER", str(filter_name), "passband (raw FILTER)"))
    cards += [
        ("OBSGEO-X", float(location.x.to_value(u.m)), "[m] site, geocentric X (WGS84)"),
        ("OBSGEO-Y", float(location.y.to_value(u.m)), "[m] site, geocentric Y (WGS84)"),
        ("OBSGEO-Z", float(location.z.to_value(u.m)), "[m] site, geocentric Z (WGS84)"),
        *_geodetic_cards(location),
        ("TIMESYS", "UTC", "time scale of all times"),
        ("TREFPOS", "TOPOCENTER", "times are at the site"),
        ("TIMEUNIT", "s", "unit of TSTART, TSTOP, XPOSURE, TELAPSE"),
        ("DATEREF", reference.isot, f"[UTC] {reference_comment}"),
        ("MJDREF", float(reference.mjd), "[d] DATEREF as MJD (UTC)"),
        *_time_cards("DATE-OBS", "MJD-OBS", begin, "start of exposure (= DATE-BEG)"),
        *_time_cards("DATE-BEG", "MJD-BEG", begin, "first charge of the first row"),
        *_time_cards("DATE-AVG", "MJD-AVG", middle, "mid-time of the product"),
        *_time_cards("DATE-END", "MJD-END", end, "last row read out"),
        ("TSTART", float(start), "[s] DATE-BEG since DATEREF"),
        ("TSTOP", float(stop), "[s] DATE-END since DATEREF"),
        ("TELAPSE", float(stop) - float(start), "[s] DATE-END - DATE-BEG"),
    ]
    if exposure is not None:
        cards.append(("XPOSURE", float(exposure), "[s] exposure of a pixel: TDIROWS*LINETIME"))
    header = fits.Header()
    for key, value, comment in cards:
        header[key] = (value, comment)
    return header


def night_grid_header(
    column_start: int, row_start: int, axis_types: tuple[str, str], comments: tuple[str, str]
) -> fits.Header:
    """Alternate linear WCS ``A`` (``WCSNAMEA = 'NIGHT'``): night column and row of each pixel.

    Parameters
    ----------
    column_start, row_start : int
        0-based night column (axis 1) and row (axis 2) of the first pixel.
    axis_types : (str, str)
        ``CTYPE1A``, ``CTYPE2A`` (at most 8 characters; linear axes).
    comments : (str, str)
        What each axis counts.

    Returns
    -------
    astropy.io.fits.Header
    """
    from astropy.io import fits

    header = fits.Header()
    header["WCSNAMEA"] = ("NIGHT", "0-based night column and row of each pixel")
    for axis, (start, ctype, comment) in enumerate(
        zip((column_start, row_start), axis_types, comments, strict=True), start=1
    ):
        header[f"CTYPE{axis}A"] = (ctype, comment)
        header[f"CUNIT{axis}A"] = ("pixel", "")
        header[f"CRPIX{axis}A"] = (1.0, "")
        header[f"CRVAL{axis}A"] = (float(start), "0-based night index at CRPIX")
        header[f"CDELT{axis}A"] = (1.0, "")
    return header


def night_column(header: Mapping) -> int:
    """0-based night column of a product's first pixel column (its alternate WCS ``A``).

    Parameters
    ----------
    header : mapping
        A plane's header with the cards of :func:`night_grid_header`.

    Raises
    ------
    ValueError
        The header has no ``NIGHT`` grid (``CRVAL1A``).
    """
    if "CRVAL1A" not in header:
        raise ValueError(
            "the header has no NIGHT grid (CRVAL1A, alternate WCS 'A'); only products of "
            "the pipeline's stages carry their place in the night."
        )
    first = header.get("CRPIX1A", 1.0) - 1.0
    return round(header["CRVAL1A"] - first * header.get("CDELT1A", 1.0))


#: Keywords of SIP distortion (Shupe et al. 2005): orders and coefficients.
_SIP_KEY = re.compile(r"^(A|B|AP|BP)_(ORDER|\d+_\d+)$")


def night_grid_wcs(header: Mapping):
    """The ``NIGHT`` grid (alternate WCS ``A``) of a product, as an astropy WCS.

    Use this, not ``WCS(header, key='A')``: astropy reads the SIP distortion
    cards (``A_ORDER``, ``A_p_q``, ...) of the primary WCS into every WCS it
    builds from the header, whatever the key, and applies them (only an
    ``INFO`` message says so). The SIP convention has no alternate keys, so
    the solved TAN-SIP WCS of a ``science`` product belongs to the primary
    WCS alone; read with the key, its night grid came out up to 21 px off on
    a 4096 x 1035 product. Here the SIP cards are left out first.

    Parameters
    ----------
    header : mapping
        A plane's header with the cards of :func:`night_grid_header`.

    Returns
    -------
    astropy.wcs.WCS
        Zero-based pixel ``(x, y)`` to 0-based night column and row.
    """
    from astropy.io import fits
    from astropy.wcs import WCS

    night_column(header)  # the same error when the header has no NIGHT grid
    linear = fits.Header(
        [card for card in fits.Header(header).cards if not _SIP_KEY.match(card.keyword)]
    )
    return WCS(linear, key="A")


#: Bytes :func:`plane_columns` reads from a file at a time (whole rows).
_READ_BYTES = 4 * 1024 * 1024
#: ... and this many (fewer) for a plane whose strip it converts itself
#: (:func:`_unsigned_columns`): buffers the C library keeps in its heap.
_RAW_READ_BYTES = 1024 * 1024


def plane_columns(hdu: fits.ImageHDU, columns: slice) -> np.ndarray:
    """The pixel columns ``columns`` of an image plane, all rows, as a new array.

    From a file opened without memory mapping, astropy's ``section[:, columns]``
    reads such a strip one row at a time (a Python call per row: a 4096-row
    plane costs ~0.1 s); this reads whole rows, a few MB at a time, and keeps
    only the columns, so a strip costs about one read of the plane and never
    holds more than a few MB besides it.  An HDU in memory (no file) is sliced.

    Parameters
    ----------
    hdu : `~astropy.io.fits.ImageHDU`
        A 2-d image HDU, from a file (``fits.open(..., lazy_load_hdus=True)``)
        or in memory.
    columns : slice
        The columns (the last axis, ``NAXIS1``), step 1.

    Returns
    -------
    ndarray, shape (NAXIS2, n)
        The strip, in the dtype astropy gives the plane (scaled by
        ``BZERO``/``BSCALE`` as ``.data`` would be).
    """
    if hdu.fileinfo() is None:
        return np.array(hdu.data[:, columns])
    n_rows, n_columns = hdu.shape
    start, stop, step = columns.indices(n_columns)
    if step != 1:
        raise ValueError(f"plane_columns reads contiguous columns; got step {step} in {columns}.")
    row_bytes = max(n_columns * abs(hdu.header["BITPIX"]) // 8, 1)
    rows = max(_READ_BYTES // row_bytes, 1)
    unsigned = _pseudo_unsigned(hdu)
    if unsigned is not None and n_rows and stop > start:
        return _unsigned_columns(hdu, unsigned, start, stop, row_bytes)
    # each strip copied out at once, so that its rows' block can go
    parts = [
        np.asarray(hdu.section[first : min(first + rows, n_rows), :])[:, start:stop].copy()
        for first in range(0, n_rows, rows)
    ]
    if not parts:
        return np.asarray(hdu.section[:, :])[:, start:stop].copy()
    return np.concatenate(parts, axis=0)


def _pseudo_unsigned(hdu: fits.ImageHDU) -> np.dtype | None:
    """The unsigned type astropy gives a plane of signed integers offset by ``BZERO``, else None.

    FITS stores unsigned integers as signed ones with ``BZERO = 2^(bits - 1)``
    and ``BSCALE = 1`` (FITS Standard 4.0 sec. 5.2.5); astropy gives them back
    as unsigned (``uint=True``, its default), which the type of a one-pixel
    section tells.
    """
    bitpix = hdu.header["BITPIX"]
    if bitpix not in (16, 32, 64) or hdu.header.get("BSCALE", 1) != 1:
        return None
    if hdu.header.get("BZERO", 0) != 1 << (bitpix - 1) or 0 in hdu.shape:
        return None
    given = np.asarray(hdu.section[0:1, 0:1]).dtype
    return given if given.kind == "u" and given.itemsize * 8 == bitpix else None


def _unsigned_columns(hdu, unsigned: np.dtype, start: int, stop: int, row_bytes: int):
    """:func:`plane_columns` of a pseudo-unsigned plane: only the strip's pixels converted.

    astropy's section converts every pixel of the rows it reads (``np.array(raw,
    dtype=unsigned)`` less ``2^(bits - 1)``, wrapping) into new arrays:
    5.2 ms of CPU for a 40-column strip of a 4109 x 1024 flag plane.  Here
    the raw rows are read through astropy's handle of the file (its position
    restored after), at most :data:`_RAW_READ_BYTES` at a time, and only the
    strip's pixels are converted, with the same arithmetic: 0.39 ms (least
    of 15; 3.8 ms in 4 MB reads, whose buffers the C library maps afresh
    each time).
    """
    info = hdu.fileinfo()
    file, offset = info["file"], info["datLoc"]
    n_rows, n_columns = hdu.shape
    rows = max(_RAW_READ_BYTES // row_bytes, 1)
    raw = np.dtype(f">i{unsigned.itemsize}")
    out = np.empty((n_rows, stop - start), unsigned)
    position = file.tell()
    try:
        for first in range(0, n_rows, rows):
            count = min(rows, n_rows - first)
            file.seek(offset + first * row_bytes)
            data = file.read(count * row_bytes)
            if len(data) != count * row_bytes:
                raise OSError(f"{hdu.name}: the plane's data end before its last row.")
            strip = out[first : first + count]
            block = np.frombuffer(data, dtype=raw).reshape(count, n_columns)
            strip[...] = block[:, start:stop]  # wraps, as astropy's conversion
            strip -= np.uint64(1 << (unsigned.itemsize * 8 - 1))
    finally:
        file.seek(position)
    return out


def _merged(first: fits.Header, second: fits.Header) -> fits.Header:
    """``first`` updated with ``second`` (a key in both takes ``second``'s card)."""
    merged = first.copy()
    merged.extend(second, update=True)
    return merged


def _plane(data: np.ndarray, header: fits.Header, name: str, cards) -> fits.ImageHDU:
    from astropy.io import fits

    plane_header = header.copy()
    for key, value in cards:
        plane_header[key] = value
    return fits.ImageHDU(data=data, header=plane_header, name=name)


def image_hdulist(
    image: np.ndarray,
    variance: np.ndarray,
    flags: np.ndarray,
    *,
    unit: str | u.UnitBase,
    header: fits.Header,
    metadata: fits.Header,
) -> fits.HDUList:
    """Build an image product: primary HDU and the FLUX, FLUXVAR and FLAGS planes.

    Parameters
    ----------
    image, variance : ndarray, shape (n_y, n_x)
        The image in ``unit`` and its variance in ``unit**2`` (stored float32).
    flags : ndarray of unsigned int, shape (n_y, n_x)
        OR of :class:`~pipeline.masks.MaskBit` bits (stored uint16).
    unit : str or astropy.units.Unit
        Unit of ``image`` (``BUNIT``, astropy's generic unit string).
    header : astropy.io.fits.Header
        WCS and the stage's own cards, copied to every plane.
    metadata : astropy.io.fits.Header
        Observation metadata (:func:`observation_header`), written to the
        primary HDU and every plane.

    Returns
    -------
    astropy.io.fits.HDUList
    """
    import astropy.units as u
    from astropy.io import fits

    image = np.asarray(image)
    if np.shape(variance) != image.shape or np.shape(flags) != image.shape:
        raise ValueError(
            f"image, variance and flags must have one shape; got {image.shape}, "
            f"{np.shape(variance)} and {np.shape(flags)}."
        )
    unit = u.Unit(unit)
    # astropy's generic unit strings ('electron', 'electron2'): the FITS
    # standard's unit table has no electron, and CCDData reads these.
    unit_text = unit.to_string()
    variance_text = (unit**2).to_string()
    header = _merged(metadata, header)
    # The planes themselves when they already have the stored dtype (a copy
    # would cost a pass over each and its memory): the product does not
    # outlive the stage's arrays, which are not changed after.
    planes = [
        _plane(np.asarray(image, np.float32), header, FLUX_EXTENSION, [("BUNIT", unit_text)]),
        _plane(
            np.asarray(variance, np.float32),
            header,
            VARIANCE_EXTENSION,
            [("BUNIT", variance_text), ("UTYPE", "VarianceUncertainty")],
        ),
        _plane(
            np.asarray(flags, MASK_DTYPE),
            _merged(header, flag_header()),
            FLAGS_EXTENSION,
            [],
        ),
    ]
    return fits.HDUList([fits.PrimaryHDU(header=metadata.copy()), *planes])


def ccddata_from_hdulist(hdul: fits.HDUList) -> CCDData:
    """An image product as :class:`astropy.nddata.CCDData`.

    Parameters
    ----------
    hdul : astropy.io.fits.HDUList
        An image product (see the module docstring).

    Returns
    -------
    astropy.nddata.CCDData
        ``data`` (float32) with ``unit`` from ``BUNIT``; ``uncertainty`` a
        :class:`~astropy.nddata.VarianceUncertainty`; ``flags`` the uint16
        flag plane (names of its bits: :func:`flag_bits_from_header` of
        ``meta``); ``wcs`` the primary WCS of the FLUX plane (the ``NIGHT``
        grid: :func:`night_grid_wcs` of ``meta``, not ``WCS(meta, key='A')``,
        which astropy distorts with the primary WCS's SIP terms); ``meta``
        the FLUX plane's header plus the ``FLAGBITn`` cards.

    Raises
    ------
    ValueError
        If a plane is missing or has no ``BUNIT``.
    """
    import astropy.units as u
    from astropy.nddata import CCDData, VarianceUncertainty  # loads scipy: only when used
    from astropy.wcs import WCS

    names = [hdu.name for hdu in hdul]
    missing = [n for n in (FLUX_EXTENSION, VARIANCE_EXTENSION, FLAGS_EXTENSION) if n not in names]
    if missing:
        raise ValueError(
            f"not an image product: no {', '.join(missing)} extension (found {names}); "
            "read tables and JSON products with pipeline.open_product."
        )
    flux = hdul[FLUX_EXTENSION]
    if "BUNIT" not in flux.header:
        raise ValueError("the FLUX plane has no BUNIT; the file was not written by zdrift.")
    unit = u.Unit(flux.header["BUNIT"])
    meta = flux.header.copy()
    flag_cards = hdul[FLAGS_EXTENSION].header
    meta.extend([c for c in flag_cards.cards if c.keyword.startswith(_FLAG_PREFIX)], unique=True)
    return CCDData(
        flux.data,
        unit=unit,
        uncertainty=VarianceUncertainty(hdul[VARIANCE_EXTENSION].data),
        flags=hdul[FLAGS_EXTENSION].data,
        wcs=WCS(flux.header),
        meta=meta,
    )
