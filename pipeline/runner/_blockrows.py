"""The block index columns the runner itself uses, read without astropy.

The runner plans a night's stretches from the block index (rows and
segments), fingerprints each stretch's raw rows and hands a worker the
blocks to read: all from the columns ``file``, ``hdu``, ``row_start``,
``n_rows`` and the optional ``segment``.  Parsing the index as an astropy
Table loads ``astropy.table`` and ``astropy.units`` (~0.2 s of CPU on a fast
day, twice that on a slow one), which was most of a run with every product
up to date.  :func:`read_block_rows` reads those columns of an ECSV block
index with PyYAML and the standard ``csv`` module instead, and gives up
(returns None, the caller reads the Table) on anything but a plain file:
a header it cannot parse, a missing or masked value, a column of the wrong
type.
"""

from __future__ import annotations

import csv
import functools
import io
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import yaml

from pipeline.stages.base import BLOCK_INDEX_COLUMNS, SEGMENT

__all__ = ["BlockRows", "read_block_rows"]

#: The columns kept, with the kind of value each holds.
_KINDS = {"file": "str", "hdu": "int", "row_start": "int", "n_rows": "int", SEGMENT: "int"}
#: ECSV datatypes read as Python ints.
_INTEGER_TYPES = {f"{sign}int{bits}" for sign in ("", "u") for bits in (8, 16, 32, 64)}


@dataclass(frozen=True)
class BlockRows:
    """Columns of a block index: what the runner reads of an astropy Table.

    ``rows[name]`` is a column (ndarray), ``rows[selection]`` the rows a
    slice, mask or index array selects, ``len(rows)`` the number of blocks
    and ``rows.colnames`` the column names, as for a Table.
    """

    columns: Mapping[str, np.ndarray]

    @classmethod
    def of_table(cls, table: Any) -> BlockRows:
        """The columns of a block index Table (the runner's own use)."""
        names = [name for name in _KINDS if name in table.colnames]
        return cls({name: np.asarray(table[name]) for name in names})

    def __getitem__(self, key: Any) -> Any:
        if isinstance(key, str):
            return self.columns[key]
        return BlockRows({name: column[key] for name, column in self.columns.items()})

    def __len__(self) -> int:
        return len(self.columns["row_start"])

    @property
    def colnames(self) -> list[str]:
        """The column names, in the file's order."""
        return list(self.columns)


def read_block_rows(path: Path) -> BlockRows | None:
    """The runner's columns of an ECSV block index, or None where only astropy can read it.

    Parameters
    ----------
    path : pathlib.Path
        A block index as the runner writes it (ECSV, space-delimited).

    Returns
    -------
    BlockRows or None
        ``file`` as str, ``hdu``, ``row_start``, ``n_rows`` and ``segment``
        (if present) as int64: the values astropy's reader gives.  None when
        the file is not plain enough to be sure of that: read it as a Table
        and use :meth:`BlockRows.of_table`.
    """
    try:
        text = Path(path).read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError):
        return None
    lines = text.splitlines()
    n_header = next((i for i, line in enumerate(lines) if not line.startswith("#")), len(lines))
    header, body = lines[:n_header], lines[n_header:]
    if not header or not header[0].startswith("# %ECSV") or header[1:2] != ["# ---"]:
        return None
    if any(line.startswith("#") for line in body):
        return None  # astropy skips such a row as a comment: an unquoted name '#...'?
    try:
        meta = yaml.load("\n".join(line[2:] for line in header[2:]), Loader=_loader())
        types = {entry["name"]: entry["datatype"] for entry in meta["datatype"]}
    except Exception:  # astropy's reader reads it, or says why not
        return None
    if meta.get("delimiter", " ") != " " or any(name not in types for name in BLOCK_INDEX_COLUMNS):
        return None
    rows = list(csv.reader(io.StringIO("\n".join(body)), delimiter=" ", quotechar='"'))
    if not rows or rows[0] != list(types) or any(len(row) != len(rows[0]) for row in rows):
        return None  # astropy says what is wrong with it
    columns = {}
    for name, kind in _KINDS.items():
        if name not in types:
            continue
        datatype = types[name]
        if (kind == "str") != (datatype == "string") or (
            kind == "int" and datatype not in _INTEGER_TYPES
        ):
            return None
        at = rows[0].index(name)
        cells = [row[at] for row in rows[1:]]
        if kind == "int":
            if any(not cell.lstrip("-").isdigit() for cell in cells):
                return None  # masked ('') or not an integer
            columns[name] = np.array([int(cell) for cell in cells], dtype=np.int64)
        else:
            if any(cell == "" for cell in cells):
                return None  # masked, or an empty name astropy would mask
            columns[name] = np.array(cells, dtype=str)
    return BlockRows(columns)


@functools.cache
def _loader() -> type:
    """libyaml's safe loader (PyYAML's when there is no libyaml) that reads any tag as None.

    The header's ``meta`` may hold astropy objects (tags such as
    ``!astropy.units.Unit``); the runner needs only the ``datatype`` list.
    """
    base = yaml.CSafeLoader if yaml.__with_libyaml__ else yaml.SafeLoader

    class Loader(base):
        """A safe loader that reads a tag it does not know as None."""

    Loader.add_multi_constructor("!", lambda loader, suffix, node: None)
    return Loader
