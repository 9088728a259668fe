"""Catalogue files read chunk by chunk: Parquet, CSV, ECSV and FITS binary tables.

Each opener reads only the file's header and returns a :class:`TableFile`
whose ``chunks`` generator yields the wanted columns a block of rows at a
time, so memory stays bounded by the block whatever the file's size.
"""

from __future__ import annotations

import csv
import itertools
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from pipeline.exceptions import ReferenceCatalogError

__all__ = ["FILE_FORMATS", "TableFile", "open_table_file"]

#: File formats and the suffixes that select them when ``format`` is ``'auto'``.
FILE_FORMATS: dict[str, tuple[str, ...]] = {
    "ecsv": (".ecsv",),
    "fits": (".fits", ".fit", ".fts"),
    "csv": (".csv",),
    "parquet": (".parquet", ".pq"),
}


@dataclass(frozen=True)
class TableFile:
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


def _open_parquet(path: Path) -> TableFile:
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

    return TableFile(tuple(schema.names), units, meta_file.metadata.num_rows, chunks)


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


def _open_csv(path: Path) -> TableFile:
    skip = len(_leading_comments(path))
    names = next(csv.reader([_first_line_after(path, skip)]), [])
    names = [n.strip() for n in names]

    def chunks(wanted: list[str], rows: int, ident: str | None) -> Iterator[dict[str, np.ndarray]]:
        return _arrow_csv_chunks(path, wanted, rows, ident, skip + 1, names, ",")

    return TableFile(tuple(names), {}, None, chunks)


def _open_ecsv(path: Path) -> TableFile:
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

    return TableFile(tuple(names), units, None, chunks)


def _open_fits(path: Path) -> TableFile:
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

    return TableFile(tuple(columns), units, n_rows, chunks)


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


def open_table_file(path: Path, fmt: str) -> TableFile:
    """Open ``path`` as ``fmt`` (``'auto'``: by suffix); reads only its header.

    Raises
    ------
    ReferenceCatalogError
        The format cannot be told or the file cannot be read as that format.
    """
    fmt = _format_of(path, fmt)
    try:
        return _OPENERS[fmt](path)
    except ReferenceCatalogError:
        raise
    except (OSError, ValueError, KeyError) as exc:
        raise ReferenceCatalogError(
            f"{path}: cannot read it as {fmt.upper()} ({exc}); check reference.format."
        ) from exc
