"""The store's fast ECSV paths give astropy's bytes and astropy's tables.

The reference is astropy's own ECSV writer and reader (astropy.io.ascii.ecsv,
the ECSV standard of astropy APE 6): every file written here must be the bytes
astropy writes for the same table, and every table read here must equal the
one astropy reads from the same file, value for value (bit for bit, NaNs
included), with the same dtypes, units, descriptions, formats and meta.
"""

import io
import re
from collections import OrderedDict

import astropy.units as u
import numpy as np
import pytest
from _tables import assert_same_table
from astropy.table import Column, MaskedColumn, QTable, Table

from pipeline.runner import _ecsv
from pipeline.runner._ecsv import read_ecsv, write_ecsv


def _astropy_bytes(table: Table) -> bytes:
    stream = io.StringIO()
    table.write(stream, format="ascii.ecsv")
    return stream.getvalue().encode()


def _check_round_trip(table: Table, tmp_path, cls=None) -> Table:
    """Write with both writers, read with both readers; return ours.

    Where the writer also gives the table as it reads back (``as_read``),
    that is the table read.
    """
    cls = cls or type(table)
    path = tmp_path / "table.ecsv"
    kept = write_ecsv(table, path, as_read=cls)
    assert path.read_bytes() == _astropy_bytes(table)
    ours = read_ecsv(path, cls)
    assert_same_table(ours, cls.read(path, format="ascii.ecsv"))
    if kept is not None and kept.table() is not None:
        assert_same_table(kept.table(), ours)
    return ours


def _random_floats(rng, n, dtype):
    """Every kind of float of ``dtype``: random bit patterns (subnormals, huge,
    tiny), the specials, and round numbers that print positionally."""
    unsigned = f"u{np.dtype(dtype).itemsize}"
    values = rng.integers(0, np.iinfo(unsigned).max, n, dtype=unsigned, endpoint=True).view(dtype)
    info = np.finfo(dtype)
    specials = [np.nan, np.inf, -np.inf, 0.0, -0.0, 1.0, 100.0, 1e15, 1e16, 1e-4, 1e-5]
    specials += [info.max, info.min, info.tiny, info.smallest_subnormal, info.eps, 0.1]
    with np.errstate(over="ignore"):  # 1e15 and 1e16 are inf in float16
        return np.concatenate([values, np.array(specials, dtype=dtype)])


def _catalogue_like(n_rows: int, seed: int = 1) -> QTable:
    """A table shaped like a night catalogue (common practice of our stages:
    Quantity float columns, integer and boolean flags, nested meta)."""
    rng = np.random.default_rng(seed)
    table = QTable(meta=OrderedDict(flag_bits={"EDGE": 8, "SATURATED": 1}, radii=[1.0, 2.0]))
    table["x"] = rng.uniform(0, 4096, n_rows) * u.pix
    table["x"].info.description = "night rectified column"
    table["flux"] = rng.lognormal(8, 2, n_rows) * u.electron
    table["snr"] = rng.lognormal(3, 1, n_rows)
    table["ra"] = rng.uniform(0, 360, n_rows) * u.deg
    table["flags"] = rng.integers(0, 256, n_rows).astype(float)
    table["ref_index"] = rng.integers(-1, 10**6, n_rows)
    table["zp_flags"] = rng.integers(0, 8, n_rows).astype(np.int32)
    table["zp_used"] = rng.random(n_rows) < 0.5
    table.meta["detect_options"] = {"split_pairs": True, "threshold_sigma": 4.3}
    return table


@pytest.mark.parametrize("threaded", [False, True])
def test_catalogue_like_table_round_trips(tmp_path, threaded, monkeypatch):
    """astropy's bytes, read back as astropy reads them; also with the second
    half of the columns printed in a thread (as a large table's are)."""
    monkeypatch.setattr(_ecsv, "THREADED_VALUES", 1 if threaded else 10**12)
    table = _catalogue_like(2000)
    table["flux"][3] = np.nan
    ours = _check_round_trip(table, tmp_path)
    assert ours.meta["detect_options"]["threshold_sigma"] == 4.3
    assert ours["ra"].unit == u.deg and ours["x"].info.description == "night rectified column"


@pytest.mark.parametrize("dtype", [np.float64, np.float32, np.float16])
def test_floats_of_every_kind_round_trip(tmp_path, dtype):
    values = _random_floats(np.random.default_rng(2), 20000, dtype)
    _check_round_trip(Table({"v": values}), tmp_path)


def _every_notation(rng) -> np.ndarray:
    """float64 values of every notation Python's repr uses and pyarrow's text does
    not share: integral ones (``100.0``, ``-0.0``, up to 1e16), ones printed
    positionally from 1e-4 up, one-digit exponents (``1e-05`` to ``1e-09``),
    ``e+16`` and up, and the values either side of each boundary (Python's
    ``float_repr_style`` 'short', the Python documentation of ``repr``)."""
    edges = np.array([1e-4, 1e-5, 1e-9, 1e-10, 1e15, 1e16, 2.0**53, 0.0])
    around = np.concatenate([edges, np.nextafter(edges, 0), np.nextafter(edges, np.inf)])
    scale = 10.0 ** rng.uniform(-12, 19, 20000)
    spread = rng.normal(size=20000) * scale
    values = np.concatenate([around, spread, np.round(spread), [1.0, 100.0, 1e-7, 1.5e-5]])
    return np.concatenate([values, -values])


def test_floats_of_every_notation_print_as_python_s_repr(tmp_path):
    values = _every_notation(np.random.default_rng(4))
    assert _ecsv._float64_texts(values).to_pylist() == list(map(str, values.tolist()))
    _check_round_trip(Table({"v": values}), tmp_path)


def test_notation_flags_are_pyarrow_s_substring_kernels():
    """The flags read from the texts' bytes (an ``e``, a ``.``, a one-digit
    exponent) are those of the pyarrow kernels they replaced, on texts of every
    notation, a slice of them (an offset into the buffers) and none."""
    import pyarrow as pa
    import pyarrow.compute as pc

    values = np.concatenate([_every_notation(np.random.default_rng(6)), [np.nan, np.inf, -0.0]])
    texts = pc.cast(pa.array(values), pa.large_string())
    for part in (texts, texts.slice(7, 3000), texts.slice(0, 0)):
        expected = [
            pc.match_substring(part, "e"),
            pc.match_substring(part, "."),
            pc.equal(pc.utf8_slice_codeunits(part, -3, -2), "e"),
        ]
        got = _ecsv._notation_flags(part)
        for mine, theirs in zip(got, expected, strict=True):
            np.testing.assert_array_equal(mine, theirs.to_numpy(zero_copy_only=False))
    assert all(flag.sum() > 100 for flag in _ecsv._notation_flags(texts))


def test_a_fresh_process_writes_integer_columns():
    """The writer imports the pyarrow modules it uses itself: a worker process that
    has read no table (column_stats' first unit) writes integer columns."""
    import subprocess
    import sys

    script = (
        "import numpy as np, pathlib, tempfile\n"
        "from astropy.table import Table\n"
        "from pipeline.runner._ecsv import write_ecsv\n"
        "path = pathlib.Path(tempfile.mkdtemp()) / 't.ecsv'\n"
        "write_ecsv(Table({'n': np.arange(3)}), path)\n"
        "print(path.read_text().splitlines()[-1])\n"
    )
    done = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True)
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip() == "2"


def test_catalogue_values_are_printed_without_python_s_str(monkeypatch):
    """The fast writer hands to ``str`` only the few values pyarrow prints otherwise:
    none of a catalogue's positions, fluxes, integral flags and zeros."""
    printed = []

    def spy(value):
        printed.append(value)
        return str(value)

    monkeypatch.setattr(_ecsv, "str", spy, raising=False)
    table = _catalogue_like(500)
    table["zero"] = np.zeros(500)
    table["zp_used"] = np.zeros(500, dtype=int)  # no booleans: they go through str
    assert _ecsv._column_texts(table) is not None
    assert printed == []


INTEGER_DTYPES = ["int8", "int16", "int32", "int64", "uint8", "uint16", "uint32", "uint64"]


@pytest.mark.parametrize("dtype", INTEGER_DTYPES)
def test_integers_to_their_limits_round_trip(tmp_path, dtype):
    info = np.iinfo(dtype)
    values = np.array([info.min, info.max, 0, 1, info.max - 1], dtype=dtype)
    _check_round_trip(Table({"v": values, "b": [True, False, True, False, True]}), tmp_path)


@pytest.mark.parametrize(
    "dtype", [np.float64, np.float32, np.float16, np.int64, np.int16, np.uint64, np.bool_]
)
def test_vector_columns_round_trip(tmp_path, dtype):
    """A vector per row (rectify's smear kernels), with every kind of value."""
    rng = np.random.default_rng(3)
    if np.dtype(dtype).kind == "f":
        values = _random_floats(rng, 64 * 300 - 17, dtype)
    elif dtype is np.bool_:
        values = rng.random(64 * 300) < 0.5
    else:
        info = np.iinfo(dtype)
        values = rng.integers(info.min, info.max, 64 * 300, dtype=dtype, endpoint=True)
    values = values[: 64 * 300 // 64 * 64].reshape(-1, 64)
    table = QTable({"x": np.arange(len(values)) * u.pix, "dx": values, "one": values[:, :1]})
    _check_round_trip(table, tmp_path)


def test_vector_elements_of_every_notation_print_as_json_does(tmp_path):
    """Each element as ``json.dumps`` writes a float (its ``repr``; NaN and the
    infinities by their JSON names), in rows of specials only, of one element
    and of none; astropy's writer is the reference."""
    values = _every_notation(np.random.default_rng(5))[: 64 * 600].reshape(-1, 64)
    values[1] = np.nan
    values[2, ::2] = np.inf
    values[2, 1::2] = -np.inf
    values[3] = -0.0
    table = Table({"dx": values, "one": values[:, :1], "none": values[:, :0]})
    _check_round_trip(table, tmp_path)


def test_a_table_written_is_kept_as_it_reads_back(tmp_path):
    """``write_ecsv(..., as_read=cls)``: the table the file reads back, from the
    values in memory: every NaN the one the text ``nan`` reads as (whatever its
    sign and payload), each value in the datatype the header declares (a
    big-endian column read as a native one), vectors, units and meta."""
    table = _catalogue_like(300)
    negative = -np.float64(np.nan)
    payload = np.uint64(0x7FF8000000000123).view(np.float64)
    table["flux"][[1, 2, 3]] = [np.nan, negative, payload]
    table["sky"] = np.array([negative, 1.5, payload] * 100, dtype=np.float32)
    table["big"] = (np.arange(300) / 7).astype(">f8")
    table["dx"] = np.full((300, 4), payload)
    table["dx"][5] = [-0.0, np.inf, -np.inf, 1e-7]
    table["n"] = np.arange(1200, dtype=np.uint16).reshape(300, 4)
    path = tmp_path / "table.ecsv"
    for cls in (QTable, Table):
        read_back = write_ecsv(table, path, as_read=cls)
        table["flux"][0] *= 2  # the writer's table changed after the write: no matter
        table["dx"][0] = 7.0
        kept = read_back.table()
        assert kept is not None and read_back.table() is kept  # made once
        assert_same_table(kept, read_ecsv(path, cls))
        assert_same_table(kept, cls.read(path, format="ascii.ecsv"))
    assert write_ecsv(table, tmp_path / "other.ecsv") is None  # only when asked


#: Tables whose file is the only way to the table read back (``as_read`` None):
#: float16 and float128, whose shortest text is read through float64 and rounded
#: again; no rows; columns astropy writes or reads.
NOT_KEPT = {
    "float16": lambda: Table({"v": np.array([0.1, 1 / 3, 7e-5], dtype=np.float16)}),
    "float128": lambda: Table({"v": np.array([0.1, 1 / 3], dtype=np.longdouble) / 3}),
    "no rows": lambda: Table({"v": np.zeros(0)}),
    "strings": lambda: Table({"name": ["a", "b"], "v": [1.0, 2.0]}),
    "masked values": lambda: Table({"v": MaskedColumn([1.0, 2.0, 3.0], mask=[0, 1, 0])}),
}


@pytest.mark.parametrize("make", NOT_KEPT.values(), ids=NOT_KEPT.keys())
def test_other_tables_are_not_kept_as_read(tmp_path, make):
    assert write_ecsv(make(), tmp_path / "table.ecsv", as_read=Table) is None


def test_vector_columns_are_printed_without_json(monkeypatch):
    """No row of a numeric vector column goes through ``json.dumps``, whose call per
    row took most of rectify's write of its smear kernels."""
    calls = []
    monkeypatch.setattr(_ecsv.json, "dumps", lambda *a, **k: calls.append(a) or "[]")
    table = Table({"dx": np.ones((5, 64)), "n": np.ones((5, 3), dtype=np.int32)})
    assert _ecsv._column_texts(table) is not None
    assert calls == []


def test_vector_columns_of_no_rows_are_astropy_s_error(tmp_path):
    """astropy (to 8.0 at least) cannot read them back; the store rebuilds them."""
    path = tmp_path / "table.ecsv"
    table = Table({"dx": np.zeros((0, 4))})
    write_ecsv(table, path)
    assert path.read_bytes() == _astropy_bytes(table)
    with pytest.raises(ValueError, match="shape mismatch"):
        read_ecsv(path, Table)


def test_empty_and_one_row_tables_round_trip(tmp_path):
    table = _catalogue_like(1)
    _check_round_trip(table, tmp_path)
    _check_round_trip(table[:0], tmp_path)


def test_a_qtable_file_reads_as_a_table_and_back(tmp_path):
    table = _catalogue_like(50)
    path = tmp_path / "table.ecsv"
    write_ecsv(table, path)
    plain = read_ecsv(path, Table)
    assert_same_table(plain, Table.read(path, format="ascii.ecsv"))
    assert type(plain["x"]) is Column and plain["x"].unit == u.pix


#: Tables the fast paths leave to astropy, and why.
OTHER_TABLES = {
    "strings with spaces": lambda: Table({"name": ["a b", "c", ""], "v": [1.0, 2.0, 3.0]}),
    "masked values": lambda: Table({"v": MaskedColumn([1.0, 2.0, 3.0], mask=[0, 1, 0])}),
    "a matrix per row": lambda: Table({"v": np.arange(12.0).reshape(3, 2, 2)}),
    "masked vector": lambda: Table({"v": MaskedColumn(np.ones((2, 3)), mask=[[0, 1, 0], [0] * 3])}),
    "object column": lambda: Table({"v": np.array([{"a": 1}, [1, 2], None], dtype=object)}),
    "masked Quantity": lambda: QTable({"v": u.Quantity(np.ma.array([1.0, 2.0], mask=[1, 0]))}),
}


@pytest.mark.parametrize("make", OTHER_TABLES.values(), ids=OTHER_TABLES.keys())
def test_other_tables_are_astropy_s_own(tmp_path, make):
    _check_round_trip(make(), tmp_path)


#: Files written by hand that astropy reads: the fast reader must read them the
#: same or leave them to astropy.
FOREIGN_FILES = {
    "comma delimiter": "# %ECSV 1.0\n# ---\n# delimiter: ','\n"
    "# datatype:\n# - {name: a, datatype: float64}\n# - {name: b, datatype: int64}\n"
    "# schema: astropy-2.0\na,b\n1.5,2\n3.5,4\n",
    "blank line and comment": "# %ECSV 1.0\n# ---\n"
    "# datatype:\n# - {name: a, datatype: float64}\n# - {name: b, datatype: int64}\n"
    "# schema: astropy-2.0\na b\n1.5 2\n\n# a comment\n3.5 4\n",
    "empty value": "# %ECSV 1.0\n# ---\n"
    "# datatype:\n# - {name: a, datatype: float64}\n# - {name: b, datatype: int64}\n"
    '# schema: astropy-2.0\na b\n1.5 ""\n3.5 4\n',
    "two spaces": "# %ECSV 1.0\n# ---\n"
    "# datatype:\n# - {name: a, datatype: float64}\n# - {name: b, datatype: int64}\n"
    "# schema: astropy-2.0\na b\n1.5  2\n3.5 4\n",
    "booleans as 0 and 1": "# %ECSV 1.0\n# ---\n"
    "# datatype:\n# - {name: a, datatype: bool}\n# - {name: b, datatype: float32}\n"
    "# schema: astropy-2.0\na b\n1 0.1\n0 nan\nTrue -inf\n",
    "vector of another length": "# %ECSV 1.0\n# ---\n"
    "# datatype:\n# - {name: a, datatype: string, subtype: 'float64[2]'}\n"
    "# schema: astropy-2.0\na\n[1.5,2,3]\n[4]\n",
    "vector with null": "# %ECSV 1.0\n# ---\n"
    "# datatype:\n# - {name: a, datatype: string, subtype: 'float64[2]'}\n"
    "# schema: astropy-2.0\na\n[1.5,null]\n[1,2]\n",
    "vector of ints and specials": "# %ECSV 1.0\n# ---\n"
    "# datatype:\n# - {name: a, datatype: string, subtype: 'float32[3]'}\n"
    "# schema: astropy-2.0\na\n[1,NaN,-Infinity]\n[1e-3,2.5E+3,-0.0]\n[0,-0e1,1E400]\n",
    "vector with an integer minus zero": "# %ECSV 1.0\n# ---\n"
    "# datatype:\n# - {name: a, datatype: string, subtype: 'float64[2]'}\n"
    "# schema: astropy-2.0\na\n[1.5,-0]\n",
    "vector with numbers json refuses": "# %ECSV 1.0\n# ---\n"
    "# datatype:\n# - {name: a, datatype: string, subtype: 'float64[2]'}\n"
    "# schema: astropy-2.0\na\n[nan,1.]\n",
    "integer vector with a fraction": "# %ECSV 1.0\n# ---\n"
    "# datatype:\n# - {name: a, datatype: string, subtype: 'int32[2]'}\n"
    "# schema: astropy-2.0\na\n[1,2.5]\n",
    "vector of a matrix": "# %ECSV 1.0\n# ---\n"
    "# datatype:\n# - {name: a, datatype: string, subtype: 'float64[2]'}\n"
    "# schema: astropy-2.0\na\n[[1,2],[3,4]]\n",
    "vector without brackets": "# %ECSV 1.0\n# ---\n"
    "# datatype:\n# - {name: a, datatype: string, subtype: 'float64[2]'}\n"
    "# schema: astropy-2.0\na\n[1,2]\n11,22\n",
    # Just above the midpoint of float32 1 and its successor, within a float64's
    # half ulp of it: astropy reads it through a float64 (to the midpoint, then
    # to even: 1.0); read as a float32 at once it would round up.
    "float32 vector at a rounding midpoint": "# %ECSV 1.0\n# ---\n"
    "# datatype:\n# - {name: a, datatype: string, subtype: 'float32[2]'}\n"
    "# schema: astropy-2.0\na\n[1.0000000596046447753906251,1]\n",
    "float32 at a rounding midpoint": "# %ECSV 1.0\n# ---\n"
    "# datatype:\n# - {name: a, datatype: float32}\n"
    "# schema: astropy-2.0\na\n1.0000000596046447753906251\n",
    "windows line ends": "# %ECSV 1.0\r\n# ---\r\n"
    "# datatype:\r\n# - {name: a, datatype: float64}\r\n# schema: astropy-2.0\r\na\r\n1.5\r\n",
}


@pytest.mark.parametrize("text", FOREIGN_FILES.values(), ids=FOREIGN_FILES.keys())
def test_foreign_files_read_as_astropy_reads_them(tmp_path, text):
    path = tmp_path / "table.ecsv"
    path.write_bytes(text.encode())
    try:
        theirs = Table.read(path, format="ascii.ecsv")
    except ValueError as exc:
        with pytest.raises(ValueError, match=re.escape(str(exc))):
            read_ecsv(path, Table)
    else:
        assert_same_table(read_ecsv(path, Table), theirs)


def test_a_bad_file_gets_astropy_s_error(tmp_path):
    path = tmp_path / "table.ecsv"
    path.write_text(
        "# %ECSV 1.0\n# ---\n# datatype:\n# - {name: a, datatype: float64}\n"
        "# schema: astropy-2.0\na\n1.5\nnot-a-number\n",
        encoding="utf-8",
    )
    with pytest.raises(ValueError, match="column 'a' failed to convert"):
        read_ecsv(path, Table)


def test_the_stages_tables_take_the_fast_paths(tmp_path):
    """Without this, a fast path that silently gave up would pass every test above."""
    catalogue = _catalogue_like(100)
    kernels = QTable({"dx": np.linspace(-3, 3, 6400).reshape(100, 64) * u.pix})  # rectify's
    column_stats = QTable(  # column_stats's vector per row of camera columns
        {"level": np.full((4, 4096), 0.1, np.float32) * u.electron, "n": np.ones((4, 4096), int)}
    )
    for table in (catalogue, kernels, column_stats):
        assert _ecsv._column_texts(table) is not None
        path = tmp_path / "table.ecsv"
        write_ecsv(table, path)
        assert _ecsv._read_plain(path.read_bytes()) is not None
        # ... and with Windows line ends (os.linesep there), read as text mode reads them
        path.write_bytes(path.read_bytes().replace(b"\n", b"\r\n"))
        assert _ecsv._read_plain(path.read_bytes()) is not None
        assert_same_table(read_ecsv(path, Table), Table.read(path, format="ascii.ecsv"))


def test_rows_are_parsed_on_the_calling_thread(tmp_path, monkeypatch):
    """pyarrow parses the rows without its thread pool.

    A script that read a table product with the pool's threads still alive
    at its exit was killed by the C++ runtime ("terminate called without an
    active exception", exit status -6) in 3 of 40 runs (measured); none in
    280 runs parsing on the calling thread.  The stages' workers also run
    one thread each by design.
    """
    from pyarrow import csv as pa_csv

    used = []
    read_csv = pa_csv.read_csv

    def spy(*args, **kwargs):
        used.append(kwargs["read_options"].use_threads)
        return read_csv(*args, **kwargs)

    monkeypatch.setattr(pa_csv, "read_csv", spy)
    path = tmp_path / "table.ecsv"
    write_ecsv(_catalogue_like(50), path)
    read_ecsv(path)
    assert used == [False]


def test_the_header_read_by_libyaml_is_astropy_s(tmp_path, monkeypatch):
    """The fast reader parses the header's YAML with libyaml and astropy's
    constructors: the table's and columns' meta (ordered maps, nested maps and
    lists, units, a Quantity, non-ASCII and quoted text) come out as astropy's
    reader gives them, types and order included."""
    import yaml

    if not yaml.__with_libyaml__:
        pytest.skip("PyYAML without libyaml: astropy's parser is used")
    meta = _ecsv._get_cols().__globals__["meta"]
    assert meta.get_header_from_yaml is _ecsv._libyaml_header
    table = _catalogue_like(50)
    table.meta["nested"] = OrderedDict(b=[1, 2.5, "x: y"], a={"deep": [True, None]})
    table.meta["limit"] = 3.5 * u.arcsec
    table.meta["site"] = 'Sierra de Prueba, 1350 m — "north" pier'
    table["x"].info.meta = OrderedDict(z=1, y="two")
    path = tmp_path / "table.ecsv"
    write_ecsv(table, path)
    fallbacks = []
    from astropy.table import meta as table_meta

    astropy_s = table_meta.get_header_from_yaml
    monkeypatch.setattr(
        table_meta,
        "get_header_from_yaml",
        lambda lines: fallbacks.append(1) or astropy_s(lines),
    )
    ours = read_ecsv(path, QTable)
    assert fallbacks == []  # libyaml read it
    monkeypatch.undo()
    theirs = QTable.read(path, format="ascii.ecsv")
    assert_same_table(ours, theirs)
    assert repr(ours.meta) == repr(theirs.meta)
    assert list(ours.meta["nested"]) == ["b", "a"]


def _awkward_meta_table() -> QTable:
    """A table whose header holds what YAML emitters quote, escape, fold or alias
    differently if they differ at all (common practice of YAML: quoting of
    strings that read as other types, escapes of non-ASCII text, line folding)."""
    table = _catalogue_like(5)
    shared = [1, 2, 3]
    table.meta["site"] = 'Sierra de Prueba, 1350 m — "north" pier'
    table.meta["long"] = " ".join(f"word{i}" for i in range(80))  # past the 130 columns
    table.meta["lines"] = "first line\nsecond line\n"
    table.meta["looks_like"] = ["yes", "no", "null", "1.5", "0x1f", "~", "", " padded ", "a: b"]
    table.meta["specials"] = [float("nan"), float("inf"), -float("inf"), 1e17, 1e-7, -0.0]
    table.meta["same_list_twice"] = OrderedDict(a=shared, b=shared)
    table.meta["odd keys"] = {"with space": 1, "3": "three", "key: colon": [True, None]}
    table.meta["limit"] = 3.5 * u.arcsec
    table["x"].info.meta = OrderedDict(z=1, y="two", tab="a\tb", ctrl="bell\x07")
    table["snr"].info.description = "signal-to-noise: 'peak' / sigma, # not a comment"
    return table


def test_the_header_written_by_libyaml_is_astropy_s():
    """The fast writer emits the header's YAML with libyaml and astropy's
    representers: the same lines as astropy's writer (and not a fallback to
    it), for the stages' tables and for meta that YAML emitters treat
    specially."""
    import yaml

    if not yaml.__with_libyaml__:
        pytest.skip("PyYAML without libyaml: astropy's emitter is used")
    tables = [
        _catalogue_like(20),
        _awkward_meta_table(),
        QTable({"dx": np.linspace(-3, 3, 640).reshape(10, 64) * u.pix}),
        Table({"a": [1, 2]}, meta={"empty": {}, "none": None, "tuple": (1, "a")}),
    ]
    for table in tables:
        lines = _ecsv._header_lines(table[:0])
        assert lines is not None  # libyaml wrote it
        theirs = io.StringIO()
        table[:0].write(theirs, format="ascii.ecsv")
        assert "\n".join(lines) + "\n" == theirs.getvalue().replace("\r\n", "\n")
