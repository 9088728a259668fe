"""A night-wide stage's stretch tables read ahead of its look-ups: the same reads.

:class:`pipeline.runner._store.LazyProducts` reads the next stretches' table
in threads while the stage looks at one.  Whatever it reads ahead, the stage
must see what a plain read gives: the same values, the same record of the
files it read (in the order it read them; only those), and a damaged file's
error when, and only when, it looks the table up.  Self-consistency checks:
the reference is the store's own read without read-ahead.
"""

from __future__ import annotations

import contextlib
import threading
from pathlib import Path

import numpy as np
import pytest
from astropy.io import fits
from astropy.table import Table

import pipeline.runner._store as _store
from pipeline.exceptions import DamagedProductError
from pipeline.products import image_hdulist

#: Stretches in the test night: more than the read-ahead, so that it moves on.
N_STRETCHES = 6


@pytest.fixture
def stretches(tmp_path: Path) -> list:
    """``(unit folder, sidecar)`` of stretches with a table, a JSON value and an image."""
    image = np.zeros((3, 4), np.float32)
    header = fits.Header()
    hdul = image_hdulist(
        image, image, image.astype(np.uint16), unit="electron", header=header, metadata=header
    )
    units = []
    for index in range(N_STRETCHES):
        table = Table({"level": np.arange(4.0) + index, "n": np.full(4, index)})
        products = {"stats": table, "n": {"index": index}, "image": hdul}
        unit_dir = tmp_path / f"s{index:04d}"
        units.append((unit_dir, {"products": _store.write_products(unit_dir, products, {})}))
    return units


def _plain(units: list, name: str) -> tuple[list, dict]:
    read: dict[str, str] = {}
    values = [_store.read_products(d, s, None)[name] for d, s in units]
    for unit_dir, sidecar in units:
        entry = sidecar["products"][name]
        read[f"{unit_dir.parent.name}/{unit_dir.name}/{entry['file']}"] = entry["sha256"]
    return values, read


def test_tables_read_ahead_are_the_tables_and_the_record_of_a_plain_read(stretches):
    want, want_read = _plain(stretches, "stats")
    read: dict[str, str] = {}
    sequence = _store.LazyProducts(stretches, read)
    got = [products["stats"] for products in sequence]
    for table, expected in zip(got, want, strict=True):
        assert table.colnames == expected.colnames
        for name in table.colnames:
            np.testing.assert_array_equal(table[name], expected[name])
    assert list(read.items()) == list(want_read.items())  # the same files, in order
    # Backwards and by negative index: each stretch's own table.
    assert [sequence[i]["stats"]["n"][0] for i in range(-1, -N_STRETCHES - 1, -1)] == list(
        range(N_STRETCHES - 1, -1, -1)
    )


def test_a_table_is_read_ahead_in_a_thread_and_only_tables_are(stretches, monkeypatch):
    where: dict[str, str] = {}
    load = _store._load_checked

    def traced(path, entry, files=None):
        where[f"{path.parent.name}/{path.name}"] = threading.current_thread().name
        return load(path, entry, files)

    monkeypatch.setattr(_store, "_load_checked", traced)
    sequence = _store.LazyProducts(stretches, {})
    sequence[0]["stats"]
    sequence[0]["n"]  # a JSON value: not read ahead
    sequence[1]["stats"]
    assert where["s0000/stats.ecsv"] == threading.current_thread().name
    assert where["s0001/stats.ecsv"] == where["s0002/stats.ecsv"] == "zdrift-read-ahead"
    assert "s0001/n.json" not in where and not any("image" in key for key in where)


def test_a_damaged_table_raises_only_when_looked_up_and_is_recorded_only_then(stretches):
    unit_dir, sidecar = stretches[2]
    path = unit_dir / sidecar["products"]["stats"]["file"]
    path.write_text(path.read_text().replace("2.0", "7.0", 1))
    read: dict[str, str] = {}
    sequence = _store.LazyProducts(stretches, read)
    assert sequence[0]["stats"]["n"][0] == 0
    assert sequence[1]["stats"]["n"][0] == 1  # stretch 2 is being read ahead by now
    assert not any("s0002" in key for key in read)  # the stage has not read it
    with pytest.raises(DamagedProductError, match=r"s0002.*content changed"):
        sequence[2]["stats"]
    assert not any("s0002" in key for key in read)
    assert sequence[3]["stats"]["n"][0] == 3  # the others read as before


def test_no_read_ahead_outlives_the_unit(stretches, monkeypatch):
    load = _store._load_checked
    release = threading.Event()

    def slow(path, entry, files=None):  # a read ahead still going as the unit ends
        if threading.current_thread().name == "zdrift-read-ahead":
            release.wait(5.0)
        return load(path, entry, files)

    monkeypatch.setattr(_store, "_load_checked", slow)
    with contextlib.ExitStack() as files:  # the runner closes it as the unit ends
        sequence = _store.LazyProducts(stretches, {}, files)
        sequence[0]["stats"]  # the stage stops here: stretches 1 and 2 are read ahead
        threading.Timer(0.2, release.set).start()
    assert not any(t.name == "zdrift-read-ahead" for t in threading.enumerate())
    assert sequence._ahead == {}
