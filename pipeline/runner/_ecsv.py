"""ECSV tables read and written fast, byte for byte and value for value astropy's.

astropy's ECSV writer formats every value through ``str(column[i])`` and its
reader splits every line with the ``csv`` module, appends every value to a
list and checks each against the fill values: on a night catalogue (55 000
sources x 40 columns) about 2 s to write and 1.2 s to read, paid by every
night-wide stage that hands the catalogue on.

Writing, for numeric and boolean columns of a value or a vector per row with
no masked values, the same file is made here from whole columns at once: the
header is astropy's own (written for the table's first zero rows), and each
value's text is the same function of the value (``str`` of a Python float is
the shortest repr that numpy's ``str`` of a float64 also gives; integers and
booleans print alike; a vector is the JSON of its list, as astropy writes it).
float64 and integer columns are printed by pyarrow's cast to strings (C++,
~6x faster than ``str`` per value: a night catalogue's 40 columns took 0.6-0.9
s of every night-wide stage's write): its float64 text has the same shortest
round-trip digits as Python's ``repr`` but another notation in places (``1``
for ``1.0``, ``0.00001`` for ``1e-05``, ``1e-7`` for ``1e-07``, ``1e+15``), so
its text is kept only where it is Python's by construction (see
:func:`_float64_texts`) and the other values are printed by ``str``.  The rows
are joined by pyarrow too.

Reading, for numeric and boolean columns of a value or a vector per row,
the rows are parsed by pyarrow (its CSV reader, and for vectors its string
split and cast, after a check that each cell is a JSON list of numbers;
floats correctly rounded, as numpy and json read them) and handed to
astropy's own header reader and outputter.

The writer can also give the table as the reader reads the file back
(``write_ecsv(..., as_read=cls)``, a :class:`ReadBack`), made on first use
from the values in memory: the header it wrote read as the reader reads it,
each value cast to the datatype declared and every NaN made the one ``nan``
reads as (the store hands it to the later units of the process that wrote
it, :func:`pipeline.runner._store._keep_parsed`).

A night catalogue (from :data:`THREADED_VALUES` values) is printed and joined
on two threads, half of its columns, then half of its rows each (the
night-wide stages that write it run while the pool's other worker idles).
The header's YAML is read by libyaml's parser with astropy's constructors
(:func:`_get_cols`), astropy's pure-Python parser taking ~13 ms a header,
and written by libyaml's emitter with astropy's representers
(:func:`_header_lines`), PyYAML's pure-Python emitter taking about half of
the 35 ms a detect catalogue's header took to write.

Anything else (string, masked, object or matrix columns, boolean vectors, a comma delimiter,
comments, blank lines or quotes among the rows) goes to astropy unchanged, so
the fast paths never decide what a file means, only how fast it is read.
"""

from __future__ import annotations

import functools
import io
import json
import os
import re
import string
import textwrap
import threading
import types
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
import yaml

from pipeline._threads import in_two_threads

if TYPE_CHECKING:
    from astropy.table import Table

__all__ = ["ReadBack", "read_ecsv", "write_ecsv"]

#: Column kinds the fast paths handle: booleans, integers and floats.
_FAST_KINDS = "biuf"

#: ECSV datatypes of such columns (the ECSV standard, astropy APE 6).
_FAST_DATATYPES = frozenset(
    ["bool", "float16", "float32", "float64", "float128"]
    + [f"{sign}int{bits}" for sign in ("", "u") for bits in (8, 16, 32, 64)]
)

#: The bytes the rows of such a file are made of: numbers (``1.5e-05``,
#: ``nan``, ``-inf``), ``True``/``False``, vectors (``[1.5,NaN]``), single
#: spaces and newlines.  Anything else (quotes, tabs, ``#`` comment lines,
#: non-ASCII text) is astropy's to read.  Checked by deleting these bytes
#: from the rows (``bytes.translate``; a regular expression took 11 ms of the
#: 52 ms a column statistics table of the 4096-column night took to read).
_PLAIN_BYTES = (string.digits + string.ascii_letters + ".+-,[] \n").encode("ascii")

#: A column of strings, objects or matrices in the header: ``datatype: string``
#: not followed by the subtype of a vector of numbers (``'float32[4096]'``).
_OTHER_COLUMNS = re.compile(
    r"^# +- \{.*datatype: string(?!, subtype: '?(?:u?int|float)[0-9]+\[[0-9]+\]'?[,}])",
    re.MULTILINE,
)

#: Datatypes of the vector columns the fast reader parses: not booleans (JSON's
#: ``true``/``false``), not float128.
_VECTOR_DATATYPES = _FAST_DATATYPES - {"bool", "float128"}

#: A number as Python's json module writes a float or an integer (RFC 8259,
#: section 6, with json's NaN and Infinity), for pyarrow's RE2: one vector
#: element.  The integer ``-0`` is left out apart (json reads it as 0, a float
#: parser as -0.0).
_JSON_NUMBER = r"^(?:-?(?:0|[1-9][0-9]*)(?:\.[0-9]+)?(?:[eE][+-]?[0-9]+)?|NaN|-?Infinity)$"

#: A JSON list of such numbers, no spaces (``[1.5,-0.0,NaN]``), as json writes it.
_JSON_NUMBER_LIST = rf"^\[{_JSON_NUMBER[1:-1]}(?:,{_JSON_NUMBER[1:-1]})*\]$"

#: The header: the lines from the start that begin with ``#``.
_HEADER = re.compile(rb"(?:#[^\n]*\n)*")


def write_ecsv(table: Table, path: Path, *, as_read: type[Table] | None = None) -> Table | None:
    """Write ``table`` to ``path`` as ECSV, the same bytes as astropy's writer.

    Parameters
    ----------
    table : astropy.table.Table or QTable
        The table (Quantity columns are written as astropy writes them).
    path : pathlib.Path
        The file to write (replaced if it exists).
    as_read : type, optional
        ``Table`` or ``QTable``: also return the table as :func:`read_ecsv`
        reads the file back as this class, to be made from the values in
        memory rather than by parsing the text (:class:`ReadBack`).

    Returns
    -------
    ReadBack or None
        With ``as_read``, what makes the table :func:`read_ecsv` would read,
        or None where only reading the file tells (astropy's writer, a
        dtype whose text is read through another, no rows).
    """
    columns = _fast_columns(table)
    if columns is None:
        table.write(path, format="ascii.ecsv", overwrite=True)
        return None
    texts = _column_texts_of(columns, len(table))
    header = _header_text(table)
    # astropy opens the file the same way: the locale's encoding, no newline
    # translation (its line ends are os.linesep already).  The rows are ASCII,
    # the same bytes in any encoding that extends it.
    with open(path, "w", newline="") as stream:
        stream.write(header)
        if len(table):
            stream.flush()
            for rows in _joined_rows(texts):
                stream.buffer.write(rows)
    if as_read is None or not len(table):
        return None
    if any(column.data.dtype.name not in _EXACT_DATATYPES for column in columns):
        return None
    return ReadBack(header, [np.array(column.data) for column in columns], as_read)


#: Datatypes whose values the fast writer prints so that the reader gets them
#: back exactly: booleans, integers, float32 and float64 (the shortest text
#: that reads back to the value, through float64).  Not float16 nor float128,
#: whose own shortest text is read through float64 and rounded again.
_EXACT_DATATYPES = frozenset(
    ["bool", "float32", "float64"]
    + [f"{sign}int{bits}" for sign in ("", "u") for bits in (8, 16, 32, 64)]
)


class ReadBack:
    """A table as :func:`read_ecsv` reads its file back, made on first use from what was written.

    Holds the header written and copies of the columns' values (taken as the
    file is written: what the writer's table holds later does not matter).
    :meth:`table` makes the table once, by the reader's own steps with the
    values instead of the parsed rows (:func:`_as_read`); a writer that keeps
    many tables pays only for a copy of each (the header's parse and the
    table's columns cost ~10 ms for a detect catalogue of 40 columns).
    """

    def __init__(self, header: str, arrays: list[np.ndarray], cls: type[Table]):
        self._header = header
        self._arrays: list[np.ndarray] | None = arrays
        self._cls = cls
        self._table: Table | None = None
        self._lock = threading.Lock()
        #: Bytes of the values held.
        self.nbytes = sum(array.nbytes for array in arrays)

    def table(self) -> Table | None:
        """The table as read back, of the class asked for; None where only reading
        the file tells (the reader would hand it to astropy).  The same object
        at every call: copy it before changing it."""
        with self._lock:
            if self._arrays is not None:
                kept = _as_read(self._header, self._arrays)
                self._table = None if kept is None else _of_class(kept, self._cls)
                self._arrays = None
        return self._table


def _as_read(header: str, arrays: list[np.ndarray]) -> Table | None:
    """The table :func:`read_ecsv` reads from a file of ``header`` and ``arrays``' rows.

    The same steps as the reader's (:func:`_read_plain`), the values taken
    from ``arrays`` instead of parsed from the rows: each cast to the
    datatype the header declares, NaN made the one NaN the text ``nan``
    reads as (the writer prints every NaN so, whatever its sign and
    payload).  ``arrays`` are used, and changed, where their dtype is the
    declared one.  None where the reader would hand the file to astropy, or
    where a datatype's text reads back to another value (see
    :data:`_EXACT_DATATYPES`).
    """
    parts = _plain_header(header)
    if parts is None:
        return None
    reader, columns, dtypes, lengths = parts
    values = []
    for data, dtype, length in zip(arrays, dtypes, lengths, strict=True):
        shape_ok = data.ndim == 1 if not length else data.shape[1:] == (length,)
        if dtype.name not in _EXACT_DATATYPES or not shape_ok:
            return None
        value = np.asarray(data, dtype=dtype)
        if dtype.kind == "f":
            value[np.isnan(value)] = np.nan
        values.append(value)
    return _assembled(reader, columns, values)


def _header_text(table: Table) -> str:
    """The header astropy's ECSV writer writes for ``table``: what it writes for
    the table's first zero rows, each line ended by ``os.linesep``."""
    empty = table[:0]
    lines = _header_lines(empty)
    if lines is not None:
        return os.linesep.join(lines) + os.linesep
    stream = io.StringIO()
    empty.write(stream, format="ascii.ecsv")
    return stream.getvalue()


def _header_lines(table: Table) -> list[str] | None:
    """The lines astropy's ECSV writer writes for ``table``, its YAML emitted by
    libyaml; None where PyYAML has no libyaml or astropy no longer looks the
    emitter up as this expects, or where the write raised (astropy's own write
    then gives the error, in its words).

    astropy's ``ascii.write`` hands its writer a shallow copy of the table and
    joins the lines it returns; here the writer is :func:`_libyaml_writer`'s
    (astropy's ECSV writer, its header's YAML dumped through
    :func:`_libyaml_dump`), made as ``ascii.write`` makes it.
    """
    writer_class = _libyaml_writer()
    if writer_class is None:
        return None
    from astropy.io.ascii import core as ascii_core

    try:
        writer = ascii_core._get_writer(writer_class, False, strip_whitespace=True)
        return writer.write(table.__class__(table, copy=False))
    except Exception:
        return None


@functools.cache
def _libyaml_writer() -> type | None:
    """astropy's ECSV writer, its header's YAML emitted by libyaml (see :func:`_header_lines`).

    The header's ``write`` is astropy's ``EcsvHeader.write`` (its code,
    defaults and closure) with the name ``meta`` bound to a namespace whose
    ``get_yaml_from_header`` is astropy's with the name ``yaml`` bound to
    PyYAML with :func:`_libyaml_dump` for ``dump``: astropy's table dumper,
    representers and resolver, libyaml's emitter (the C library PyYAML's own
    emitter was ported from, ~10x faster).  A test compares the bytes with
    astropy's for the stages' tables and for meta with quotes, non-ASCII
    text, long lines, nested and repeated values.  None when PyYAML has no
    libyaml, or either function no longer looks the name up.
    """
    from astropy.io.ascii.ecsv import Ecsv, EcsvHeader
    from astropy.table import meta as table_meta

    write, to_yaml = EcsvHeader.write, table_meta.get_yaml_from_header
    if not yaml.__with_libyaml__ or "meta" not in write.__code__.co_names:
        return None
    if "yaml" not in to_yaml.__code__.co_names:
        return None
    libyaml = types.SimpleNamespace(**vars(yaml))
    libyaml.dump = _libyaml_dump
    meta = types.SimpleNamespace(get_yaml_from_header=_with_names(to_yaml, yaml=libyaml))
    header = type("_LibyamlEcsvHeader", (EcsvHeader,), {"write": _with_names(write, meta=meta)})
    # no ``_format_name``: astropy's registry of formats is left as it is
    return type("_LibyamlEcsv", (Ecsv,), {"header_class": header})


def _libyaml_dump(data, stream=None, Dumper=yaml.Dumper, **kwds):
    """``yaml.dump`` through libyaml's emitter, with ``Dumper``'s representers and resolver."""
    from yaml._yaml import CEmitter
    from yaml.representer import BaseRepresenter
    from yaml.resolver import BaseResolver

    class LibyamlDumper(CEmitter, Dumper):
        """libyaml's emitter and serializer, ``Dumper``'s representers and resolver
        (as PyYAML's ``CSafeDumper`` combines them with the safe ones)."""

        def __init__(
            self, stream, default_style=None, default_flow_style=False, canonical=None,
            indent=None, width=None, allow_unicode=None, line_break=None, encoding=None,
            explicit_start=None, explicit_end=None, version=None, tags=None, sort_keys=True,
        ):  # fmt: skip
            CEmitter.__init__(
                self, stream, canonical=canonical, indent=indent, width=width,
                encoding=encoding, allow_unicode=allow_unicode, line_break=line_break,
                explicit_start=explicit_start, explicit_end=explicit_end, version=version,
                tags=tags,
            )  # fmt: skip
            BaseRepresenter.__init__(
                self, default_style=default_style, default_flow_style=default_flow_style,
                sort_keys=sort_keys,
            )  # fmt: skip
            BaseResolver.__init__(self)

    return yaml.dump(data, stream, Dumper=LibyamlDumper, **kwds)


def _with_names(function: types.FunctionType, **names) -> types.FunctionType:
    """``function`` (its code, defaults and closure) with global ``names`` bound anew."""
    rebound = types.FunctionType(
        function.__code__,
        dict(function.__globals__, **names),
        function.__name__,
        function.__defaults__,
        function.__closure__,
    )
    rebound.__kwdefaults__ = function.__kwdefaults__
    return rebound


def _joined_rows(texts: list) -> list:
    """The rows of the columns' ``texts``: values joined by spaces, each row ended by
    ``os.linesep`` (as astropy writes them), as consecutive pieces of bytes.

    A large table's second half of rows is joined in a thread of its own (see
    :data:`THREADED_VALUES`; pyarrow's kernel releases the GIL).
    """
    n_rows = len(texts[0])
    half = n_rows // 2
    if half == 0 or n_rows * len(texts) < THREADED_VALUES:
        return [_rows_text(texts)]
    halves = [[text.slice(0, half) for text in texts], [text.slice(half) for text in texts]]
    return in_two_threads(_rows_text, halves, "zdrift-ecsv")


def _rows_text(texts: list) -> memoryview:
    """The text of the rows of ``texts`` (see :func:`_joined_rows`), not copied."""
    import pyarrow as pa
    import pyarrow.compute as pc

    space, end, nothing = (pa.scalar(text, pa.large_string()) for text in (" ", os.linesep, ""))
    rows = pc.binary_join_element_wise(*texts, space) if len(texts) > 1 else texts[0]
    rows = pc.binary_join_element_wise(rows, nothing, end)
    offsets = np.frombuffer(rows.buffers()[1], dtype=np.int64)
    start, stop = offsets[rows.offset], offsets[rows.offset + len(rows)]
    return memoryview(rows.buffers()[2])[start:stop]


def _fast_columns(table: Table) -> list | None:
    """The columns the fast path writes for ``table``, or None.

    None when the table has no column, a column is not one the fast path
    writes (see the module's docstring) or the table carries indices.
    """
    from astropy.table import serialize
    from astropy.utils.data_info import serialize_context_as

    if table.indices or not table.colnames:
        return None
    with serialize_context_as("ecsv"):
        plain = serialize.represent_mixins_as_columns(table)
    columns = list(plain.itercols())
    if not all(_fast_column(column) for column in columns):
        return None
    return columns


def _column_texts(table: Table) -> list | None:
    """Each column's values as astropy's ECSV writer prints them, or None (see
    :func:`_fast_columns`)."""
    columns = _fast_columns(table)
    return None if columns is None else _column_texts_of(columns, len(table))


def _column_texts_of(columns: list, n_rows: int) -> list:
    """Each of the fast ``columns``' values as astropy's ECSV writer prints them.

    Each is a pyarrow array of (large) strings.  A large table's second half
    of columns is printed in a thread of its own (see :data:`THREADED_VALUES`).
    """
    half = len(columns) // 2
    if half == 0 or n_rows * _n_values(columns) < THREADED_VALUES:
        return [_texts(column.data) for column in columns]
    # pyarrow's kernels and numpy's loops release the GIL: a night-wide stage's
    # catalogue is printed on two cores while the pool's other worker idles
    return in_two_threads(lambda column: _texts(column.data), columns, "zdrift-ecsv")


#: Values (rows x columns, a vector's elements each) from which a table's
#: columns are printed in two threads: the 4096-column night's catalogue
#: (~2.2 million, written by catalog, astrometry and zero point while the
#: pool's other worker idles; 0.22 -> 0.13-0.16 s), not a stretch's tables
#: (column statistics ~0.4 million), written while both workers compute.
THREADED_VALUES = 1_000_000


def _n_values(columns: list) -> int:
    """Values per row of ``columns`` (a vector's elements each)."""
    return sum(int(np.prod(column.data.shape[1:], dtype=np.int64)) for column in columns)


def _fast_column(column) -> bool:
    """Whether the fast path prints ``column`` (see the module's docstring)."""
    from astropy.table import Column

    values = column.data
    if type(column) is not Column or values.dtype.kind not in _FAST_KINDS:
        return False
    return values.ndim == 1 or (values.ndim == 2 and values.dtype.itemsize <= 8)


def _texts(values: np.ndarray):
    """The text of each of a fast column's ``values`` (see :func:`_column_texts`)."""
    import pyarrow as pa
    import pyarrow.compute as pc

    if values.ndim == 2 and values.dtype.kind in "iuf":
        return _vector_texts(values)
    if values.ndim == 2:
        # A vector of booleans per row: JSON of its list, as astropy writes it.
        text = [json.dumps(row, separators=(",", ":")) for row in values.tolist()]
    elif values.dtype == np.dtype(float):
        return _float64_texts(values)
    elif values.dtype.kind in "iu":
        # pyarrow prints integers as Python does: the digits, a minus sign
        return pc.cast(pa.array(values), pa.large_string())
    elif values.dtype.kind == "f":
        # float16/32/128: numpy's own str of each scalar, as astropy prints it.
        text = [str(value) for value in values]
    else:
        # Python bools print as numpy's do.
        text = list(map(str, values.tolist()))
    return pa.array(text, pa.large_string())


#: JSON's names of the float specials (Python's json module; RFC 8259 has none).
_JSON_SPECIALS = {"nan": "NaN", "inf": "Infinity", "-inf": "-Infinity"}


def _vector_texts(values: np.ndarray):
    """JSON of each row's list of numbers (``[1.5,-0.0,NaN]``), as astropy writes a
    vector per row (rectify's smear kernels), as a pyarrow array of large strings.

    ``json.dumps`` writes a Python float as its ``repr`` (NaN and the infinities
    by their JSON names) and an integer as its digits; a float16/32 element's
    Python float is its exact float64, so every float is printed by
    :func:`_float64_texts` and the elements of a row joined by commas (one
    ``json.dumps`` per row took 20 ms of rectify's 390-row table).
    """
    import pyarrow as pa
    import pyarrow.compute as pc

    flat = values.reshape(-1)
    if values.dtype.kind == "f":
        with np.errstate(invalid="ignore"):  # a signalling NaN: NaN all the same
            flat = flat.astype(np.float64)
        texts = _float64_texts(flat)
        special = ~np.isfinite(flat)
        if special.any():
            names = [_JSON_SPECIALS[str(value)] for value in flat[special].tolist()]
            texts = pc.replace_with_mask(
                texts, pa.array(special), pa.array(names, pa.large_string())
            )
    else:
        texts = pc.cast(pa.array(flat), pa.large_string())
    offsets = pa.array(np.arange(len(values) + 1, dtype=np.int64) * values.shape[1])
    comma, open_, close, nothing = (pa.scalar(t, pa.large_string()) for t in (",", "[", "]", ""))
    rows = pc.binary_join(pa.LargeListArray.from_arrays(offsets, texts), comma)
    return pc.binary_join_element_wise(open_, rows, close, nothing)


def _float64_texts(values: np.ndarray):
    """``str`` of every float64 of ``values``, as a pyarrow array of large strings.

    pyarrow's cast gives the shortest digits that read back to the value (as
    Python's ``repr``, David Gay's shortest round trip) in its own notation.
    Python's ``repr`` writes ``ddd.ddd`` (``ddd.0`` if integral, zero
    included) from 1e-4 up to 1e16 (decimal exponent -4 to 15), and
    ``d.ddde-05``/``d.ddde+16`` (two exponent digits at least) elsewhere:
    pyarrow's text is kept where it has that form (``.0`` added to an
    integral value's digits), NaN and infinities print alike (``nan``,
    ``inf``, ``-inf``), and the rest (e.g. ``0.00001``, ``1e-7``, ``1e+15``)
    is printed by ``str``.  Only pyarrow's plain substring kernels look at
    the texts (a regular expression per value cost more than the cast).
    """
    import pyarrow as pa
    import pyarrow.compute as pc

    texts = pc.cast(pa.array(values), pa.large_string())
    exponent, point, one_digit = _notation_flags(texts)
    with np.errstate(invalid="ignore"):
        magnitude = np.abs(values)
        finite = np.isfinite(values)
        positional = ((magnitude >= 1e-4) & (magnitude < 1e16)) | (magnitude == 0.0)
        integral = positional & (values == np.trunc(values))
    digits = integral & ~exponent & ~point
    kept = (
        ~finite
        | digits
        | (positional & ~integral & point & ~exponent)
        | (finite & ~positional & exponent & ~one_digit)
    )
    if digits.any():
        ends = pa.array(np.where(digits, ".0", ""), pa.large_string())
        texts = pc.binary_join_element_wise(texts, ends, pa.scalar("", pa.large_string()))
    redo = np.flatnonzero(~kept)
    if redo.size:
        python = pa.array(list(map(str, values[redo].tolist())), pa.large_string())
        texts = pc.replace_with_mask(texts, pa.array(~kept), python)
    return texts


def _notation_flags(texts) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per text of ``texts`` (pyarrow large strings of ASCII, no nulls): whether it
    holds an ``e``, whether it holds a ``.``, and whether its third character from
    the end is the ``e`` (a one-digit exponent, ``1e-7``).

    From the texts' bytes and offsets, by numpy: pyarrow's substring kernels,
    one pass over every text each, took 4.4 ms per 55 000 values (0.16 s of
    the ~0.44 s a night catalogue's 36 float columns took to print on one
    thread).
    """
    n = len(texts)
    offsets = np.frombuffer(texts.buffers()[1], dtype=np.int64)[texts.offset : texts.offset + n + 1]
    first, last = int(offsets[0]), int(offsets[-1])
    data = np.frombuffer(texts.buffers()[2], dtype=np.uint8)

    def holding(byte: int) -> np.ndarray:
        found = np.zeros(n, dtype=bool)
        at = np.flatnonzero(data[first:last] == byte) + first
        found[np.searchsorted(offsets, at, side="right") - 1] = True
        return found

    starts, ends = offsets[:-1], offsets[1:]
    one_digit = np.zeros(n, dtype=bool)
    long = ends - starts >= 3
    one_digit[long] = data[ends[long] - 3] == ord("e")
    return holding(ord("e")), holding(ord(".")), one_digit


def read_ecsv(path: Path, cls: type[Table] | None = None) -> Table:
    """Read an ECSV file as astropy's ``cls.read(path, format='ascii.ecsv')`` does.

    Parameters
    ----------
    path : pathlib.Path
        The file.
    cls : type, optional
        ``Table`` (the default) or ``QTable``: the class of the table returned.

    Returns
    -------
    astropy.table.Table
        The table, with the same columns, values, dtypes, units, descriptions,
        formats and meta as astropy's reader gives.
    """
    if cls is None:
        from astropy.table import Table

        cls = Table
    table = _read_plain(Path(path).read_bytes())
    if table is None:
        return cls.read(path, format="ascii.ecsv")
    return _of_class(table, cls)


def _of_class(table: Table, cls: type[Table]) -> Table:
    """``table`` as a ``cls``, as astropy's reader hands it out."""
    return table if type(table) is cls else cls(table, copy=False)


def _read_plain(data: bytes) -> Table | None:
    """The table in a file's bytes ``data`` if the fast path can read it, else None.

    The header is decoded as astropy's reader opens the file (the locale's
    encoding, universal newlines); the rows, plain ASCII if the fast path
    reads them, are parsed as bytes, each line end made a newline as text
    mode makes it.
    """
    names_start = _HEADER.match(data).end()
    names_end = data.find(b"\n", names_start)
    if names_start == 0 or names_end < 0:
        return None
    body = data[names_end + 1 :]
    if b"\r" in body:  # universal newlines, as astropy's reader sees the rows
        body = body.replace(b"\r\n", b"\n").replace(b"\r", b"\n")
    if body.translate(None, _PLAIN_BYTES):
        return None
    try:
        header = io.TextIOWrapper(io.BytesIO(data[: names_end + 1])).read()
    except UnicodeDecodeError:
        return None  # astropy's reader says what is wrong with it
    parts = _plain_header(header)
    if parts is None:
        return None
    reader, columns, dtypes, lengths = parts
    if any(lengths) and not body.strip():
        return None  # astropy cannot read vector columns of no rows (the store can)
    try:
        values = _parse_rows(body, dtypes, lengths)
    except ValueError:  # pyarrow's ArrowInvalid is a ValueError
        return None  # a masked (empty) value, a blank line, a ragged row
    return _assembled(reader, columns, values)


def _plain_header(header: str) -> tuple | None:
    """The fast reader's reading of a file's ``header`` (its lines up to the
    column names'): ``(reader, columns, dtypes, lengths)``, or None where
    astropy reads the file (see :func:`_read_plain`).

    ``dtypes`` are the columns' values' (a vector's elements'), ``lengths``
    those of :func:`_vector_length`.
    """
    from astropy.io.ascii.ecsv import Ecsv

    if _OTHER_COLUMNS.search(header):
        return None  # found before the YAML is parsed: astropy reads such files alone
    reader = Ecsv()
    try:
        _get_cols()(reader.header, header.splitlines())
    except Exception:  # astropy's own read gives the error, in its words
        return None
    columns = reader.header.cols
    lengths = [_vector_length(column) for column in columns]
    plain = reader.header.splitter.delimiter == " " and -1 not in lengths
    if not plain or "__table_indices__" in reader.header.table_meta:
        return None
    dtypes = [
        np.dtype(column.subtype if length else column.dtype)
        for column, length in zip(columns, lengths, strict=True)
    ]
    return reader, columns, dtypes, lengths


def _assembled(reader, columns: list, values: list[np.ndarray]) -> Table:
    """The table of ``reader``'s header (:func:`_plain_header`) and the columns' ``values``."""
    for column, data in zip(columns, values, strict=True):
        column.data = data
    reader.meta["table"].update(reader.header.table_meta)
    return _outputter_class()()(columns, reader.meta)


@functools.cache
def _get_cols():
    """astropy's ``EcsvHeader.get_cols``, its YAML read by libyaml's parser.

    astropy's reader parses the header's YAML with PyYAML's pure-Python
    parser (~13 ms for a detect catalogue's 28 columns and meta, 0.4 s of
    the 4096-column night's catalog stage, under Python's lock).  This is
    astropy's own function (its code, defaults and closure) with the name
    ``meta`` bound to a namespace whose ``get_header_from_yaml``
    (:func:`_libyaml_header`) builds the same objects with astropy's
    constructors through libyaml's scanner and parser, and hands any header
    it cannot read to astropy's.  astropy's own function when PyYAML has no
    libyaml, or when it no longer looks the parser up as ``meta``.
    """
    from astropy.io.ascii.ecsv import EcsvHeader
    from astropy.table import meta as table_meta

    original = EcsvHeader.get_cols
    if not yaml.__with_libyaml__ or "meta" not in original.__code__.co_names:
        return original
    meta = types.SimpleNamespace(
        YamlParseError=table_meta.YamlParseError, get_header_from_yaml=_libyaml_header
    )
    return _with_names(original, meta=meta)


def _libyaml_header(lines: list[str]):
    """astropy's header dict of the ECSV header ``lines`` (comment marks removed)."""
    from astropy.table import meta as table_meta

    text = textwrap.dedent("\n".join(lines))  # as astropy's
    # The first line is the '%ECSV 1.0' version line, a directive libyaml
    # refuses and PyYAML's parser passes over; the document starts after it.
    version, _, document = text.partition("\n")
    if version.startswith("%ECSV"):
        try:
            return yaml.load(document, Loader=_libyaml_loader())
        except Exception:  # astropy's parser reads it, or says why not
            pass
    return table_meta.get_header_from_yaml(lines)


@functools.cache
def _libyaml_loader() -> type:
    """A libyaml loader with the constructors of astropy's table header loader."""
    from astropy.io.misc.yaml import AstropyLoader
    from astropy.table import meta as table_meta

    class Loader(yaml.CSafeLoader):
        """libyaml's scanner and parser, PyYAML's resolver, astropy's constructors."""

    Loader.yaml_constructors = dict(AstropyLoader.yaml_constructors)
    Loader.add_constructor("tag:yaml.org,2002:omap", table_meta._construct_odict)
    return Loader


def _vector_length(column) -> int:
    """0 for a scalar column the fast reader parses, n for a vector of n numbers,
    -1 for any other column."""
    if not column.subtype and not column.shape:
        return 0 if column.dtype in _FAST_DATATYPES else -1
    vector = column.dtype == "str" and column.subtype in _VECTOR_DATATYPES
    shape = column.shape
    if vector and len(shape) == 1 and isinstance(shape[0], int) and shape[0] >= 1:
        return shape[0]
    return -1


def _parse_rows(body: bytes, dtypes: list[np.dtype], lengths: list[int]) -> list[np.ndarray]:
    """The columns of space-separated rows, parsed as astropy's converters do.

    Floats are read as float64 (correctly rounded, as ``numpy.array(texts,
    float)`` and ``json.loads`` read them) and cast, integers exactly, booleans
    from ``True``/``False``/``1``/``0`` (astropy's bool converter), vectors
    (``lengths`` > 0) from their JSON lists.  A row of another length, an
    empty value or text that is not a number raises.
    """
    import pyarrow as pa  # loaded only when a table is read
    from pyarrow import csv as pa_csv

    names = [str(index) for index in range(len(dtypes))]
    types = {
        name: pa.string()
        if length
        else (pa.float64() if dtype.kind == "f" else pa.from_numpy_dtype(dtype))
        for name, dtype, length in zip(names, dtypes, lengths, strict=True)
    }
    # On the calling thread: pyarrow's thread pool, left running when a script
    # that read a product exits, got the process killed by the C++ runtime now
    # and then (and a worker computes on one thread by design).
    table = pa_csv.read_csv(
        io.BytesIO(body),
        read_options=pa_csv.ReadOptions(column_names=names, use_threads=False),
        parse_options=pa_csv.ParseOptions(
            delimiter=" ", quote_char=False, escape_char=False, ignore_empty_lines=False
        ),
        convert_options=pa_csv.ConvertOptions(
            column_types=types,
            null_values=[],
            strings_can_be_null=False,
            true_values=["True", "1"],
            false_values=["False", "0"],
        ),
    )
    return [
        _parse_vectors(table.column(name), dtype, length)
        if length
        else table.column(name).to_numpy(zero_copy_only=False).astype(dtype, copy=False)
        for name, dtype, length in zip(names, dtypes, lengths, strict=True)
    ]


def _parse_vectors(cells, dtype: np.dtype, length: int) -> np.ndarray:
    """A vector column from its cells (a pyarrow string array of JSON lists).

    Each cell must be ``[`` ``length`` JSON numbers ``]``; the numbers are
    read as astropy reads them through ``json.loads`` and a cast to ``dtype``
    (floats through float64, integers exactly).  Anything else (a null, a
    nested list, a list of another length) raises, and astropy reads the file.
    """
    import pyarrow as pa
    import pyarrow.compute as pc

    if len(cells) == 0:
        raise ValueError("no rows")
    # one match per cell (a match per element cost twice as much)
    if not pc.all(pc.match_substring_regex(cells, _JSON_NUMBER_LIST)).as_py():
        raise ValueError("not a JSON list of numbers")
    lists = pc.split_pattern(pc.utf8_slice_codeunits(cells, 1, -1), ",")
    if not pc.all(pc.equal(pc.list_value_length(lists), length)).as_py():
        raise ValueError("a list of another length")
    numbers = pc.list_flatten(lists)
    if pc.any(pc.equal(numbers, "-0")).as_py():
        raise ValueError("the integer -0")
    kind = pa.float64() if dtype.kind == "f" else pa.from_numpy_dtype(dtype)
    values = pc.cast(numbers, kind).to_numpy(zero_copy_only=False)
    return values.reshape(len(cells), length).astype(dtype, copy=False)


@functools.cache
def _outputter_class() -> type:
    """astropy's ECSV outputter for columns whose data are converted already."""
    from astropy.io.ascii.ecsv import EcsvOutputter

    class Outputter(EcsvOutputter):
        def _convert_vals(self, cols):
            pass

    return Outputter
