"""Reading the night's raw files for the runner (stages never read files).

Two services back the raw pseudo-inputs of :mod:`pipeline.stages.base`:
the list of raw files with their headers and a summary of their pixels
(``RAW_FILES``) and the rows of one stretch assembled from the blocks a block
index lists (``RAW_ROWS``).
"""

from __future__ import annotations

import io
import warnings
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from pipeline.runner._store import hash_json
from pipeline.stages.base import BLOCK_INDEX, BLOCK_INDEX_COLUMNS, PixelSummary, RawFile

if TYPE_CHECKING:
    from astropy.io import fits
    from astropy.table import Table

    from pipeline.runner._blockrows import BlockRows

__all__ = [
    "blank_to_nan",
    "block_index_rows",
    "blocks_fingerprint",
    "check_block_index",
    "complete_rows",
    "first_image_hdu",
    "image_header",
    "list_raw_files",
    "measurable",
    "missing_blocks",
    "open_raw",
    "overlapping_blocks",
    "raw_files_fingerprint",
    "read_block_readout_rows",
    "read_raw_files",
    "read_rows",
    "summarize_pixels",
]

#: Rows read at a time when summarising a raw file's pixels (bounds the memory).
_SUMMARY_ROWS = 1024


def list_raw_files(raw_dir: Path, pattern: str) -> list[str]:
    """Names (relative to ``raw_dir``, POSIX) of the files matching ``pattern``, sorted."""
    return sorted(p.relative_to(raw_dir).as_posix() for p in raw_dir.glob(pattern) if p.is_file())


def _stat_key(raw_dir: Path, name: str) -> list[Any]:
    try:
        stat = (raw_dir / name).stat()
    except OSError:
        return [name, None, None]
    return [name, stat.st_size, stat.st_mtime_ns]


def raw_files_fingerprint(raw_dir: Path, names: Sequence[str]) -> str:
    """Hash of the raw files' names, sizes and modification times.

    Content hashing a night of raw data on every check would cost as much as
    reading it; like ``make``, size and mtime stand for the content.
    """
    return hash_json([_stat_key(raw_dir, name) for name in names])


#: Primary-header cards an extension never inherits: the structure of the file
#: and of the primary HDU's own data.
_NOT_INHERITED = (
    "SIMPLE", "BITPIX", "NAXIS", "EXTEND", "BSCALE", "BZERO", "BLANK", "BUNIT",
    "CHECKSUM", "DATASUM",
)  # fmt: skip


def image_header(hdul: fits.HDUList, index: int) -> fits.Header:
    """A copy of the image HDU's header, with the primary's cards when it inherits them.

    An extension with ``INHERIT = T`` takes the primary header's keywords it
    does not set itself (the FITS INHERIT convention, a registered FITS
    convention: from memory), as a camera that writes its observation
    keywords once, in the primary header, means it to.  Structural cards
    (``NAXISn``, ``BITPIX``, ``BZERO``, ...) are never inherited.
    """
    header = hdul[index].header.copy()
    if index == 0 or header.get("INHERIT") is not True:
        return header
    for card in hdul[0].header.cards:
        keyword = card.keyword
        if (
            keyword in header
            or keyword in ("", "COMMENT", "HISTORY", "INHERIT")
            or keyword.startswith(_NOT_INHERITED)
        ):
            continue
        header.append(card)
    return header


def first_image_hdu(hdul: fits.HDUList) -> int | None:
    """Index of the first 2-D image HDU of a raw file, or None if it has none."""
    for index, hdu in enumerate(hdul):
        if hdu.header.get("NAXIS") == 2 and hdu.is_image:
            return index
    return None


# Leading bytes of whole-file compression formats astropy reads transparently.
_COMPRESSED_MAGIC = (b"\x1f\x8b", b"BZh", b"\xfd7zXZ\x00", b"PK\x03\x04")


def _file_size(path: Path) -> int | None:
    """Size in bytes, or None if the file is compressed (or unreadable: 0)."""
    try:
        with open(path, "rb") as stream:
            start = stream.read(6)
        size = path.stat().st_size
    except OSError:
        return 0
    return None if start.startswith(_COMPRESSED_MAGIC) else size


def summarize_pixels(
    hdu: fits.ImageHDU | fits.PrimaryHDU | fits.CompImageHDU, n_rows: int | None = None
) -> PixelSummary:
    """Per-column extremes of an image HDU's pixels, read in chunks of rows.

    Reads every pixel once (``_SUMMARY_ROWS`` rows at a time, so memory stays
    flat for any block size) as stored, and applies BSCALE/BZERO to the
    extremes only (a linear map), which is several times faster than scaling
    every pixel; integer pixels equal to BLANK count as non-finite.  Open the
    file with ``memmap=False, do_not_scale_image_data=True``.  ``n_rows``
    limits the summary to the first rows (those wholly in a file cut short,
    :func:`complete_rows`); default all NAXIS2.
    """
    header = hdu.header
    n_columns = int(header["NAXIS1"])
    n_rows = int(header["NAXIS2"]) if n_rows is None else int(n_rows)
    blank = header.get("BLANK") if int(header["BITPIX"]) > 0 else None
    summary = PixelSummary.of(np.zeros((0, n_columns), np.float32))
    for start in range(0, n_rows, _SUMMARY_ROWS):
        rows = np.asarray(hdu.section[start : min(start + _SUMMARY_ROWS, n_rows), :])
        if blank is not None:
            rows = np.where(rows == blank, np.nan, rows.astype(np.float64))
        summary = summary + PixelSummary.of(rows)
    scale, zero = float(header.get("BSCALE", 1.0)), float(header.get("BZERO", 0.0))
    low, high = summary.minimum * scale + zero, summary.maximum * scale + zero
    if scale < 0:
        low, high = high, low
    return PixelSummary(summary.n_rows, summary.n_finite, low, high)


def measurable(hdul: fits.HDUList, index: int, size: int | None) -> bool:
    """True when :func:`complete_rows` can tell which rows of HDU ``index`` the file holds.

    That is, the bytes of the FITS stream are known (a plain file, or a cut
    compressed stream read from memory) and the image is not tile-compressed.
    """
    from astropy.io import fits

    return size is not None and not isinstance(hdul[index], fits.CompImageHDU)


def complete_rows(hdul: fits.HDUList, index: int, size: int | None) -> int | None:
    """Rows of image HDU ``index`` wholly in a file cut short, or None if it holds them all.

    A copy interrupted part-way through a block leaves its header and the
    rows written before the cut: rows are stored one after the other (FITS
    4.0, section 3.3.2, from memory: the first axis varies fastest), so
    every row that ends before the end of the file is whole.

    Parameters
    ----------
    hdul : astropy.io.fits.HDUList
        The open file.
    index : int
        Its image HDU.
    size : int or None
        Bytes of the (uncompressed) FITS stream; None when unknown (a
        compressed file read whole, or a tile-compressed HDU, whose stored
        bytes are not its rows): then None.

    Returns
    -------
    int or None
        The number of whole rows (0 if the cut comes before the first row
        ends), or None when the file holds every row of NAXIS2.
    """
    if not measurable(hdul, index, size):
        return None
    header = hdul[index].header
    n_rows = int(header["NAXIS2"])
    row_bytes = int(header["NAXIS1"]) * abs(int(header["BITPIX"])) // 8
    start = int(hdul.fileinfo(index)["datLoc"])
    whole = max(size - start, 0) // row_bytes if row_bytes else n_rows
    return int(whole) if whole < n_rows else None


def _partial_stream(path: Path) -> bytes | None:
    """What a cut gzip or bzip2 file decompresses to before its end, or None.

    None when the file is not such a file or its stream is whole (then
    nothing is salvaged from it: it is damaged in another way).
    """
    import bz2
    import zlib

    suffix = path.suffix.lower()
    if suffix == ".gz":
        decoder = zlib.decompressobj(16 + zlib.MAX_WBITS)  # gzip wrapper (RFC 1952)
    elif suffix == ".bz2":
        decoder = bz2.BZ2Decompressor()
    else:
        return None
    pieces = []
    try:
        with open(path, "rb") as stream:
            while chunk := stream.read(1 << 20):
                pieces.append(decoder.decompress(chunk))
    except (OSError, EOFError, zlib.error):
        pass  # damaged part-way: keep what came before
    ended = decoder.eof
    return None if ended else b"".join(pieces)


@contextmanager
def open_raw(path: Path, **kwargs: Any) -> Iterator[tuple[fits.HDUList, int | None]]:
    """Open a raw file with astropy, also a gzip or bzip2 file whose stream was cut.

    Yields
    ------
    hdul : astropy.io.fits.HDUList
    size : int or None
        Bytes of the FITS stream: the file's size for a plain file, the
        decompressed bytes of a cut compressed file (read from memory), None
        for a whole compressed file.
    """
    from astropy.io import fits

    path = Path(path)
    size = _file_size(path)
    try:
        hdul = fits.open(path, **kwargs)
    except Exception:
        data = _partial_stream(path) if size is None else None
        if data is None:
            raise
        size = len(data)
        hdul = fits.open(io.BytesIO(data), **kwargs)
    with hdul:
        yield hdul, size


def read_raw_files(raw_dir: Path, names: Sequence[str], *, pixels: bool = True) -> list[RawFile]:
    """Read the header of the first 2-D image HDU of every raw file.

    A file that cannot be read is returned with ``error`` set, not raised, so
    the ingest stage can reject it with its reason and go on.  ``size`` is
    None for compressed files (see :class:`~pipeline.stages.base.RawFile`).
    With ``pixels`` (the default) every pixel is read once too and summarised
    (:func:`summarize_pixels`), so that ingest can reject blocks without any
    usable pixel; pixels that cannot be read leave ``pixel_error`` set.  A
    file cut short (an interrupted copy, plain or gzip/bzip2) has
    ``complete_rows`` set (:func:`complete_rows`) and only those rows
    summarised, so that ingest can use them and report the rest as lost.
    """
    from astropy.io import fits

    files = []
    for name in names:
        path = raw_dir / name
        size = _file_size(path)
        try:
            with warnings.catch_warnings(record=True) as caught:
                warnings.simplefilter("always")
                # Stored values (the header keeps BZERO/BSCALE): see summarize_pixels.
                with open_raw(path, memmap=False, do_not_scale_image_data=True) as (hdul, stream):
                    index = first_image_hdu(hdul)
                    header = image_header(hdul, index) if index is not None else None
                    whole = complete_rows(hdul, index, stream) if index is not None else None
                    if index is not None and isinstance(hdul[index], fits.CompImageHDU):
                        size = None
                    summary, pixel_error = None, None
                    if pixels and index is not None and whole != 0:
                        try:
                            summary = summarize_pixels(hdul[index], whole)
                        except Exception as exc:  # truncated data, bad compression, ...
                            pixel_error = f"{type(exc).__name__}: {exc}"
            # Where complete_rows measured the rows, astropy's truncation warning
            # says no more (a file without its final padding holds every row).
            if index is not None and measurable(hdul, index, stream):
                caught = [w for w in caught if "truncated" not in str(w.message)]
            problems = "; ".join(str(w.message) for w in caught)
            error = None if index is not None else "no 2-D image HDU in the file"
            if problems and error is None:
                header["COMMENT"] = f"astropy warned on reading: {problems}"[:2000]
            files.append(RawFile(name, index, header, size, error, summary, pixel_error, whole))
        except Exception as exc:  # any unreadable file is reported, not fatal
            reason = unreadable_reason(path, exc)
            files.append(RawFile(name, None, None, size, reason))
    return files


def unreadable_reason(path: Path, exc: Exception) -> str:
    """Why astropy could not open a raw file, in words that say what to do.

    An empty file (a copy that never started) and a file that is not FITS
    (notes, a log, a checksum list that matches ``night.pattern``) are said
    as such, without astropy's advice to read a file without its SIMPLE
    card, which a night's reduction cannot take; a damaged compressed stream
    adds :func:`compressed_damage`.
    """
    try:
        size = path.stat().st_size
    except OSError:
        size = None
    if size == 0:
        return "empty file (0 bytes: a copy that never started?); copy it again or remove it"
    text = str(exc).split(" If this is really a FITS file")[0].rstrip()
    reason = f"not a readable FITS file ({type(exc).__name__}: {text})"
    damage = compressed_damage(path)
    if damage is not None:
        return f"{reason}: {damage}"
    if "SIMPLE" in text:
        reason += (
            "; it matches night.pattern but does not start as a FITS file does: move it out "
            "of the raw folder or narrow night.pattern"
        )
    return reason


def compressed_damage(path: Path) -> str | None:
    """Why a gzip or bzip2 file cannot be decompressed to its end, or None.

    astropy reads a damaged or truncated compressed file as "Empty or
    corrupt FITS file"; decompressing it says which (an interrupted copy
    leaves a stream that ends early).  Called only for a file that could not
    be read.

    Parameters
    ----------
    path : pathlib.Path
        The file; other suffixes than ``.gz`` and ``.bz2`` give None.

    Returns
    -------
    str or None
        The reason, for the file's rejection line; None when the stream
        decompresses (or the file is not gzip or bzip2).
    """
    import bz2
    import gzip
    import zlib

    opener = {".gz": gzip.open, ".bz2": bz2.open}.get(path.suffix.lower())
    if opener is None:
        return None
    try:
        with opener(path, "rb") as stream:
            while stream.read(1 << 20):
                pass
    except (EOFError, OSError, zlib.error) as exc:
        return (
            f"its {path.suffix[1:]} stream is damaged or ends early ({exc}): an interrupted "
            "copy? copy the file again"
        )
    return None


def check_block_index(index: Any, stage_name: str) -> Table:
    """Check that a stage's ``block_index`` product has the required columns."""
    from astropy.table import Table

    if not isinstance(index, Table):
        raise TypeError(
            f"Stage {stage_name!r} must return {BLOCK_INDEX!r} as an astropy Table; "
            f"got {type(index).__name__}."
        )
    missing = [c for c in BLOCK_INDEX_COLUMNS if c not in index.colnames]
    if missing:
        raise ValueError(
            f"Stage {stage_name!r}: {BLOCK_INDEX!r} lacks columns {missing}; it needs "
            f"{list(BLOCK_INDEX_COLUMNS)}."
        )
    return index


def block_index_rows(index: Table | BlockRows) -> int:
    """Number of rows in the night: ``max(row_start + n_rows)`` (0 if no block)."""
    if len(index) == 0:
        return 0
    return int(np.max(np.asarray(index["row_start"]) + np.asarray(index["n_rows"])))


def overlapping_blocks(index: Table | BlockRows, lo: int, hi: int) -> np.ndarray:
    """Indices of the block index rows that hold any of night rows ``[lo, hi)``."""
    start = np.asarray(index["row_start"], dtype=np.int64)
    stop = start + np.asarray(index["n_rows"], dtype=np.int64)
    return np.flatnonzero((start < hi) & (stop > lo))


def _overlapping(index: Table | BlockRows, lo: int, hi: int) -> list[tuple[str, int, int, int]]:
    # by column, not by rows of a sliced table (~1 ms per slice in astropy)
    columns = [index[name] for name in ("file", "hdu", "row_start", "n_rows")]
    return [
        (str(columns[0][i]), int(columns[1][i]), int(columns[2][i]), int(columns[3][i]))
        for i in overlapping_blocks(index, lo, hi)
    ]


def missing_blocks(raw_dir: Path, index: Table | BlockRows, lo: int, hi: int) -> list[str]:
    """The raw files holding rows ``[lo, hi)`` that are not in ``raw_dir`` (names, in order)."""
    names = dict.fromkeys(block[0] for block in _overlapping(index, lo, hi))
    return [name for name in names if not (raw_dir / name).is_file()]


def blocks_fingerprint(
    raw_dir: Path, index: Table | BlockRows, lo: int, hi: int, *, flip_rows: bool = False
) -> str:
    """Hash of what :func:`read_rows` would read for rows ``[lo, hi)``."""
    blocks = _overlapping(index, lo, hi)
    key = {"rows": [lo, hi], "blocks": [[*_stat_key(raw_dir, b[0]), *b[1:]] for b in blocks]}
    if flip_rows:  # only then, so that the usual hashes stay what they were
        key["flip_rows"] = True
    return hash_json(key)


def blank_to_nan(rows: np.ndarray, header: fits.Header) -> np.ndarray:
    """Set the pixels an integer image marks undefined (BLANK) to NaN, in place.

    astropy turns BLANK into NaN when it scales an image to floats, but an
    unsigned one (BZERO = 2^(BITPIX-1), as cameras write 16-bit data) it
    returns as integers with the BLANK pixels at ``BLANK + BZERO``, which
    then passed as a value of 0 ADU.  ``rows`` holds physical values
    (BSCALE and BZERO applied).
    """
    blank = header.get("BLANK")
    if blank is None or int(header["BITPIX"]) < 0:
        return rows
    physical = float(blank) * float(header.get("BSCALE", 1.0)) + float(header.get("BZERO", 0.0))
    rows[rows == np.float32(physical)] = np.nan
    return rows


def read_block_readout_rows(
    path: Path, hdu_index: int, start: int, n_rows: int, r0: int, r1: int, flip_rows: bool
) -> np.ndarray:
    """Night rows ``[r0, r1)`` of the block at ``path`` that starts at night row ``start``."""
    name = path.name
    rerun = "the file changed since the block index was built: rerun from the ingest stage"
    try:
        with warnings.catch_warnings(record=True) as caught:  # astropy only warns when a
            warnings.simplefilter("always")  # file is truncated
            with open_raw(path) as (hdul, size):
                hdu = hdul[hdu_index]
                if int(hdu.header["NAXIS2"]) < r1 - start:
                    raise ValueError(
                        f"Raw file {name!r} has {hdu.header['NAXIS2']} rows but the block "
                        f"index says {n_rows}; {rerun}."
                    )
                k0, k1 = r0 - start, r1 - start  # rows in readout order within the block
                if flip_rows:  # readout row k is stored at n_rows - 1 - k
                    section = hdu.section[n_rows - k1 : n_rows - k0, :][::-1]
                else:
                    section = hdu.section[k0:k1, :]
                rows = blank_to_nan(np.asarray(section, dtype=np.float32), hdu.header)
                # A file cut short (or without its final padding) whose rows read
                # are wholly in it: astropy's truncation warning is about others.
                stored_stop = n_rows - k0 if flip_rows else k1
                whole = complete_rows(hdul, hdu_index, size)
                present = measurable(hdul, hdu_index, size) and (
                    whole is None or stored_stop <= whole
                )
        truncated = [w for w in caught if "truncated" in str(w.message)]
        if not truncated or present:
            return rows
        error = OSError(str(truncated[0].message))
    except ValueError as exc:
        if str(exc).startswith("Raw file"):
            raise
        error = exc
    except Exception as exc:  # OSError, IndexError, astropy's warnings made errors
        error = exc
    raise ValueError(
        f"Raw file {name!r} cannot be read (rows {r0 - start}-{r1 - start - 1} of HDU "
        f"{hdu_index}): {type(error).__name__}: {error}; {rerun}, or restore the file."
    ) from error


def read_rows(
    raw_dir: Path, index: Table | BlockRows, lo: int, hi: int, *, flip_rows: bool = False
) -> np.ndarray:
    """Assemble night rows ``[lo, hi)`` from the raw blocks, in readout order.

    Parameters
    ----------
    raw_dir : pathlib.Path
        Folder the ``file`` column is relative to.
    index : astropy.table.Table or BlockRows
        Block index (columns ``file``, ``hdu``, ``row_start``, ``n_rows``).
    lo, hi : int
        Night rows to read (scan axis).
    flip_rows : bool
        Camera ``flip_rows``: each block stores its rows last-read first.
        Its rows are then reversed, block by block, so that night row
        ``row_start + k`` is the ``k``-th row read out (DATE-OBS stays the
        time of the first row read, as the raw data contract says).

    Returns
    -------
    numpy.ndarray of float32, shape (hi - lo, n_columns_in_file)
        Rows in readout order, columns as stored (overscan included),
        BZERO/BSCALE applied.  Rows no block covers are NaN.  A block's later
        rows win where blocks overlap.
    """
    out = None
    for name, hdu_index, start, n_rows in _overlapping(index, lo, hi):
        r0, r1 = max(lo, start), min(hi, start + n_rows)
        rows = read_block_readout_rows(raw_dir / name, hdu_index, start, n_rows, r0, r1, flip_rows)
        n_columns = rows.shape[1]
        if out is None:
            out = np.full((hi - lo, n_columns), np.nan, dtype=np.float32)
        elif out.shape[1] != n_columns:
            raise ValueError(
                f"Raw file {name!r} has {n_columns} columns, other blocks of the stretch "
                f"have {out.shape[1]}; a stretch cannot mix camera formats."
            )
        out[r0 - lo : r1 - lo] = rows
    if out is None:
        raise ValueError(f"No raw block covers night rows [{lo}, {hi}).")
    return out
