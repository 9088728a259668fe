"""Raw block headers: keyword names, checks and the parsed :class:`BlockInfo`.

The raw data contract (DEVELOPERS.md, "Raw data") names the keywords a raw block
must carry.  Real cameras spell them differently or omit some, so every
keyword is looked up through a map from our canonical name to the camera's
keyword, and a missing keyword may be replaced by a default from the config.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

from pipeline.exceptions import IngestError

if TYPE_CHECKING:
    from astropy.time import Time

__all__ = [
    "KEYWORDS",
    "OPTIONAL",
    "BlockInfo",
    "camera_format",
    "expected_file_size",
    "parse_block_header",
    "parse_section",
]

#: Canonical name -> (default FITS keyword, type, meaning).
KEYWORDS: dict[str, tuple[str, type, str]] = {
    "date_obs": ("DATE-OBS", str, "time the block's first row was shifted out (ISO 8601)"),
    "line_time": ("LINETIME", float, "seconds between row shifts"),
    "tdi_rows": ("TDIROWS", int, "detector rows each packet crosses"),
    "block_seq": ("BLOCKSEQ", int, "sequence number of the block in the night"),
    "image_section": ("DATASEC", str, "image section '[x1:x2,y1:y2]' (1-based)"),
    "overscan_section": ("BIASSEC", str, "serial overscan section '[x1:x2,y1:y2]' (1-based)"),
    "gain": ("GAIN", float, "e-/ADU"),
    "read_noise": ("RDNOISE", float, "read noise, e-"),
    "saturation": ("SATURATE", float, "saturation level, ADU"),
    "site_lat": ("SITELAT", float, "site latitude, deg north"),
    "site_long": ("SITELONG", float, "site longitude, deg east"),
    "site_elev": ("SITEELEV", float, "site height, m"),
    "filter": ("FILTER", str, "passband name"),
}

#: Canonical names whose keyword may be missing (then None, unless defaulted):
#: the site is the config's; a header site is only compared with it.
OPTIONAL = ("site_lat", "site_long", "site_elev")

_SECTION = re.compile(r"^\s*\[\s*(\d+)\s*:\s*(\d+)\s*,\s*(\d+)\s*:\s*(\d+)\s*\]\s*$")
_TIME_SCALES = {"UTC": "utc", "TAI": "tai", "TT": "tt"}
_DATE_ONLY = re.compile(r"^\s*\d{4}-\d{2}-\d{2}\s*$")
#: A time-zone designator at the end of an ISO 8601 time ('Z', '+00:00', '-0500').
_ZONE = re.compile(r"(Z|[+-]\d{2}:?\d{2})$")
#: A date and a time joined by something else than 'T' (a space, a lower-case 't').
_SPACED = re.compile(r"^\d{4}-\d{2}-\d{2}(\s+|t)\d{2}:\d{2}")
_BYTES_PER_RECORD = 2880


def parse_section(text: str) -> tuple[slice, slice]:
    """Convert a 1-based FITS section ``'[x1:x2,y1:y2]'`` to numpy slices.

    Parameters
    ----------
    text : str
        Section string, inclusive 1-based ranges, x (NAXIS1, columns) first.

    Returns
    -------
    (slice, slice)
        ``(rows, columns)`` 0-based slices for an array of shape
        ``(NAXIS2, NAXIS1)``.

    Raises
    ------
    ValueError
        If the text is not a section with ascending ranges.

    Examples
    --------
    >>> parse_section("[1:2048,1:4096]")
    (slice(0, 4096, None), slice(0, 2048, None))
    """
    match = _SECTION.match(str(text))
    if match is None:
        raise ValueError(f"not a section '[x1:x2,y1:y2]': {text!r}")
    x1, x2, y1, y2 = (int(g) for g in match.groups())
    if x1 < 1 or y1 < 1 or x2 < x1 or y2 < y1:
        raise ValueError(f"section {text!r} must have ascending 1-based ranges")
    return slice(y1 - 1, y2), slice(x1 - 1, x2)


def camera_format(
    n_columns: int, image_section: str, overscan_section: str
) -> tuple[int, tuple[int, int], tuple[int, int]]:
    """What a block's columns are: NAXIS1 and the DATASEC and BIASSEC columns.

    Only the columns say what the camera read out: the sections' row ranges
    span each block's own rows (a shorter block, such as the last of a
    night, has a shorter range), and the text may be spaced differently.

    Parameters
    ----------
    n_columns : int
        NAXIS1.
    image_section, overscan_section : str
        DATASEC and BIASSEC, 1-based FITS sections.

    Returns
    -------
    (int, (int, int), (int, int))
        NAXIS1 and the 1-based inclusive column ranges of DATASEC and BIASSEC.

    Examples
    --------
    >>> camera_format(1056, "[1:1024,1:512]", "[1025:1056, 1:512]")
    (1056, (1, 1024), (1025, 1056))
    """
    data = parse_section(image_section)[1]
    bias = parse_section(overscan_section)[1]
    return (int(n_columns), (data.start + 1, data.stop), (bias.start + 1, bias.stop))


@dataclass(frozen=True)
class BlockInfo:
    """What ingest knows about one raw block, from its header.

    Parameters
    ----------
    name : str
        File name as the night lists it.
    hdu : int
        Index of the image HDU.
    n_rows, n_columns : int
        NAXIS2 (rows, the scan axis) and NAXIS1 (columns incl. overscan).
    bitpix : int
        BITPIX of the stored data.
    date_obs : astropy.time.Time
        UTC time at which the block's first row was shifted out.
    line_time : float
        Seconds between row shifts.
    tdi_rows : int
        Detector rows crossed by each packet.
    block_seq : int
        Block sequence number.
    image_section, overscan_section : str
        Image and overscan sections, 1-based FITS notation.
    gain, read_noise, saturation : float
        e-/ADU, e-, ADU.
    site_lat, site_long, site_elev : float or None
        Degrees, degrees, metres; None where the header has no such keyword.
    filter : str
        Passband name.
    defaulted : tuple of str
        Canonical names whose values came from the config defaults.
    lost_rows : int
        Rows the header promises (NAXIS2) that a file cut short does not
        hold whole; ``n_rows`` counts only the whole rows, stored first.
    """

    name: str
    hdu: int
    n_rows: int
    n_columns: int
    bitpix: int
    date_obs: Time
    line_time: float
    tdi_rows: int
    block_seq: int
    image_section: str
    overscan_section: str
    gain: float
    read_noise: float
    saturation: float
    site_lat: float | None
    site_long: float | None
    site_elev: float | None
    filter: str
    defaulted: tuple[str, ...] = ()
    lost_rows: int = 0

    @property
    def geometry(self) -> tuple[Any, ...]:
        """Everything that must stay the same within a segment of blocks."""
        return (
            *camera_format(self.n_columns, self.image_section, self.overscan_section),
            self.tdi_rows,
            self.filter,
        )


def expected_file_size(header_bytes: int, n_rows: int, n_columns: int, bitpix: int) -> int:
    """Smallest size in bytes a FITS file with this image HDU can have.

    Parameters
    ----------
    header_bytes : int
        Bytes of all headers up to and including the image HDU's.
    n_rows, n_columns, bitpix : int
        NAXIS2, NAXIS1 and BITPIX.

    Returns
    -------
    int
        ``header_bytes`` plus the unpadded data size (the FITS standard pads
        to 2880-byte records, but a writer that omits the final padding still
        leaves every pixel readable, so the padding is not required here).
    """
    return header_bytes + n_rows * n_columns * abs(int(bitpix)) // 8


def _reader_note(header) -> str:
    """Text of the COMMENT cards the runner appends with astropy's reading warnings."""
    comments = [str(c.value) for c in header.cards if c.keyword == "COMMENT"]
    for position, text in enumerate(comments):
        if text.startswith("astropy warned on reading: "):
            text = "".join(comments[position:])[len("astropy warned on reading: ") :]
            return "; ".join(dict.fromkeys(text.split("; ")))  # each warning once
    return ""


def _header_bytes(header, hdu: int) -> int:
    """Lower bound of the bytes before the data of HDU ``hdu``."""
    n_cards = len(header.cards)
    for position, card in enumerate(header.cards):
        # The runner appends astropy's reading warnings as COMMENT cards at the
        # end; they are not in the file.
        if card.keyword == "COMMENT" and str(card.value).startswith("astropy warned"):
            n_cards = position
            break
    n_bytes = 80 * (n_cards + 1)  # + END
    return -(-n_bytes // _BYTES_PER_RECORD) * _BYTES_PER_RECORD + _BYTES_PER_RECORD * hdu


def _lookup(header, canonical, keywords, defaults, name, hdu=0):
    keyword = keywords.get(canonical, KEYWORDS[canonical][0])
    if keyword in header:
        return header[keyword], False
    if canonical in defaults:
        return defaults[canonical], True
    if canonical in OPTIONAL:
        return None, False
    extension = (
        f" (the image is in extension {hdu}, whose header is read with the primary's only "
        "when it says INHERIT = T)"
        if hdu
        else ""
    )
    raise IngestError(
        f"{name}: missing keyword {keyword} ({KEYWORDS[canonical][2]}){extension}; add it to "
        f"the file or give stages.ingest.defaults.{canonical} in the config."
    )


def _convert(value, canonical, keywords, name):
    if value is None:  # an optional keyword that is missing
        return None
    kind = KEYWORDS[canonical][1]
    keyword = keywords.get(canonical, KEYWORDS[canonical][0])
    if kind is str:
        return str(value).strip()
    not_integer = kind is int and isinstance(value, float) and not value.is_integer()
    if isinstance(value, bool) or not_integer:
        raise IngestError(f"{name}: keyword {keyword}={value!r} is not a {kind.__name__}.")
    try:
        converted = kind(value)
    except (TypeError, ValueError):
        raise IngestError(
            f"{name}: keyword {keyword}={value!r} is not a {kind.__name__}."
        ) from None
    if kind is float and not math.isfinite(converted):
        raise IngestError(f"{name}: keyword {keyword}={value!r} is not finite.")
    return converted


_POSITIVE = ("line_time", "tdi_rows", "gain", "saturation")


def parse_block_header(
    header,
    name: str = "<header>",
    *,
    hdu: int = 0,
    size: int | None = None,
    header_bytes: int | None = None,
    keywords: dict[str, str] | None = None,
    defaults: dict[str, Any] | None = None,
    complete_rows: int | None = None,
) -> BlockInfo:
    """Check a raw block's header and return its :class:`BlockInfo`.

    Parameters
    ----------
    header : astropy.io.fits.Header
        Header of the block's image HDU.
    name : str
        File name, for messages.
    hdu : int
        Index of the image HDU in the file.
    size : int, optional
        File size in bytes; if given, a file too short for its data is
        rejected as truncated.
    header_bytes : int, optional
        Bytes before the data; default the padded length of ``header`` plus one
        2880-byte record per earlier HDU (a lower bound).
    keywords : dict, optional
        Canonical name -> the camera's keyword, for names that differ from
        :data:`KEYWORDS`.
    defaults : dict, optional
        Canonical name -> value used when the keyword is missing.
    complete_rows : int, optional
        For a file cut short (the runner measures it,
        :func:`pipeline.runner._rawio.complete_rows`): the rows stored whole
        before the cut.  The block is then those rows (``n_rows``), the rest
        ``lost_rows``, and ``size`` is not checked; with none whole the file
        is rejected.

    Returns
    -------
    BlockInfo

    Raises
    ------
    IngestError
        One line naming the file and the reason.
    """
    keywords = dict(keywords or {})
    defaults = dict(defaults or {})
    unknown = sorted((set(keywords) | set(defaults)) - set(KEYWORDS))
    if unknown:
        raise ValueError(
            f"Unknown canonical keyword name(s) {unknown} in keywords/defaults; "
            f"known: {sorted(KEYWORDS)}."
        )
    if header.get("NAXIS") != 2:
        raise IngestError(f"{name}: image HDU {hdu} has NAXIS={header.get('NAXIS')}, not 2.")
    n_columns, n_rows = int(header["NAXIS1"]), int(header["NAXIS2"])
    bitpix = int(header["BITPIX"])
    if n_rows < 1 or n_columns < 2:
        raise IngestError(f"{name}: empty image ({n_columns} x {n_rows}).")
    note = _reader_note(header)
    lost_rows = 0
    if complete_rows is not None and complete_rows < n_rows:
        if complete_rows < 1:
            raise IngestError(
                f"{name}: truncated file: it ends before its first row ({n_columns} pixels of "
                f"BITPIX {bitpix}) is whole, so none of its {n_rows} rows can be used; copy the "
                "file again from the camera."
            )
        lost_rows = n_rows - complete_rows
    elif "truncated" in note:
        # The runner measures the whole rows of plain and gzip/bzip2 files; a
        # tile-compressed image's rows are in tiles it does not salvage.
        raise IngestError(
            f"{name}: truncated file ({note}): none of its rows are used (whole rows are "
            "kept only from a plain file or a gzip/bzip2 stream cut short, not from a "
            "tile-compressed image); copy the file again from the camera."
        )
    elif size is not None:
        if header_bytes is None:
            header_bytes = _header_bytes(header, hdu)
        need = expected_file_size(header_bytes, n_rows, n_columns, bitpix)
        if size < need:
            raise IngestError(
                f"{name}: truncated file: {size} bytes, but the header promises at least "
                f"{need} ({n_columns} x {n_rows} pixels of BITPIX {bitpix})."
            )
    values, defaulted = {}, []
    for canonical in KEYWORDS:
        raw, was_default = _lookup(header, canonical, keywords, defaults, name, hdu)
        values[canonical] = _convert(raw, canonical, keywords, name)
        if was_default:
            defaulted.append(canonical)
    for canonical in _POSITIVE:
        if values[canonical] <= 0:
            raise IngestError(
                f"{name}: {keywords.get(canonical, KEYWORDS[canonical][0])}="
                f"{values[canonical]} must be positive."
            )
    latitude = values["site_lat"]
    for canonical, bad, allowed in (
        ("read_noise", values["read_noise"] < 0, "0 or more (e-)"),
        ("site_lat", not (latitude is None or -90 <= latitude <= 90), "-90 to 90 (deg)"),
    ):
        if bad:
            keyword = keywords.get(canonical, KEYWORDS[canonical][0])
            raise IngestError(
                f"{name}: {keyword}={values[canonical]} is out of range: it must be {allowed}."
            )
    values["date_obs"] = _parse_time(values["date_obs"], header, name)
    _check_sections(values["image_section"], values["overscan_section"], n_rows, n_columns, name)
    return BlockInfo(
        name=name,
        hdu=hdu,
        n_rows=n_rows - lost_rows,
        n_columns=n_columns,
        bitpix=bitpix,
        defaulted=tuple(defaulted),
        lost_rows=lost_rows,
        **values,
    )


def _parse_time(text, header, name):
    from astropy.time import Time

    system = str(header.get("TIMESYS", "UTC")).strip().upper()
    if system not in _TIME_SCALES:
        raise IngestError(f"{name}: TIMESYS={system!r} is not one of {sorted(_TIME_SCALES)}.")
    if _DATE_ONLY.match(str(text)):
        # The FITS datetime format allows a date alone (FITS 4.0, section 9.1.1, from memory),
        # which astropy reads as midnight: every block of the night would start at 00:00.
        hint = "".join(
            f"; the header's {key}={header[key]!r} may hold the time"
            for key in ("TIME-OBS", "UTSTART", "UT")
            if key in header
        )
        raise IngestError(
            f"{name}: DATE-OBS={text!r} gives a date without a time of day{hint}; a block "
            "needs the UTC time its first row was read, as 'YYYY-MM-DDThh:mm:ss.sss': write "
            "it into DATE-OBS, or name the keyword that holds it in stages.ingest.keywords."
        )
    try:
        return Time(text, format="isot", scale=_TIME_SCALES[system]).utc
    except ValueError:
        zone = _ZONE.search(str(text).strip())
        if zone is not None:
            # FITS datetimes carry no time-zone designator: the time scale is
            # TIMESYS's (FITS 4.0, section 9.1.1, from memory)
            raise IngestError(
                f"{name}: DATE-OBS={text!r} ends with a time-zone designator "
                f"({zone.group(0)!r}), which a FITS date does not carry (its time scale is "
                f"TIMESYS, here {system}): write the time without it."
            ) from None
        spaced = _SPACED.match(str(text).strip()) is not None
        hint = " (a 'T', not a space or a 't', between date and time)" if spaced else ""
        raise IngestError(
            f"{name}: DATE-OBS={text!r} is not a FITS date and time: write it as "
            f"'YYYY-MM-DDThh:mm:ss[.sss]'{hint}, or name the keyword that holds it in "
            "stages.ingest.keywords."
        ) from None


def _check_sections(image_section, overscan_section, n_rows, n_columns, name):
    try:
        data_rows, data_cols = parse_section(image_section)
        bias_rows, bias_cols = parse_section(overscan_section)
    except ValueError as exc:
        raise IngestError(f"{name}: {exc}.") from None
    for label, rows, cols in (("DATASEC", data_rows, data_cols), ("BIASSEC", bias_rows, bias_cols)):
        if rows.stop > n_rows or cols.stop > n_columns:
            raise IngestError(f"{name}: {label} reaches outside the {n_columns} x {n_rows} image.")
    for label, rows in (("DATASEC", data_rows), ("BIASSEC", bias_rows)):
        if (rows.start, rows.stop) != (0, n_rows):
            raise IngestError(
                f"{name}: {label} rows {rows.start + 1}:{rows.stop} do not cover all "
                f"{n_rows} rows; a TDI block's image and overscan span every row."
            )
    if data_cols.start < bias_cols.stop and bias_cols.start < data_cols.stop:
        raise IngestError(
            f"{name}: DATASEC {image_section} and BIASSEC {overscan_section} overlap."
        )
