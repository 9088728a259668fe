"""The per-user cache of the parsed IERS table (:func:`pipeline._offline.load_earth_orientation`).

A worker process parses astropy's bundled IERS-A/B text tables once (about
0.45 s of CPU); the parsed table is kept as a pickle so that later processes
load it in milliseconds.  What it holds must be the table astropy itself
reads (the reference: ``astropy.utils.iers.IERS_Auto.open`` on the files of
``astropy-iers-data``), or every transformation would change.
"""

from __future__ import annotations

import os
import shutil

import numpy as np
import pytest
from astropy.utils import iers

import pipeline._offline as offline
from pipeline._offline import CACHE_ENV, load_earth_orientation


@pytest.fixture
def fresh_table(tmp_path, monkeypatch):
    """No IERS table parsed yet in this process, a cache folder of the test's; the
    process's table is put back afterwards."""
    folder = tmp_path / "cache"
    monkeypatch.setenv(CACHE_ENV, str(folder))
    monkeypatch.setattr(iers.IERS_Auto, "iers_table", None)
    return folder


def _same_table(a, b) -> None:
    assert type(a) is type(b) and a.colnames == b.colnames and a.meta == b.meta
    for name in a.colnames:
        x, y = a[name], b[name]
        assert type(x) is type(y) and getattr(x, "unit", None) == getattr(y, "unit", None), name
        x, y = np.asarray(x), np.asarray(y)
        assert x.dtype == y.dtype, name
        assert np.array_equal(x, y, equal_nan=x.dtype.kind == "f"), name  # bit for bit


def test_the_cached_table_is_the_one_astropy_parses(fresh_table):
    load_earth_orientation()  # parses (astropy) and writes the cache
    parsed = iers.IERS_Auto.iers_table
    assert parsed is not None
    cached = list(fresh_table.glob("iers-auto-*.pickle"))
    assert len(cached) == 1
    iers.IERS_Auto.iers_table = None
    load_earth_orientation()  # from the cache
    loaded = iers.IERS_Auto.iers_table
    assert loaded is not parsed
    _same_table(loaded, parsed)
    # and what a transformation asks for is that table (astropy's science state)
    assert iers.earth_orientation_table.get() is loaded


def test_other_bundled_files_give_another_cache_file(fresh_table, tmp_path, monkeypatch):
    first = offline._iers_cache_file(fresh_table)
    copy = tmp_path / "finals.copy"
    shutil.copy(iers.IERS_A_FILE, copy)
    monkeypatch.setattr(iers, "IERS_A_FILE", str(copy))
    moved = offline._iers_cache_file(fresh_table)
    assert moved != first
    info = copy.stat()
    os.utime(copy, ns=(info.st_atime_ns, info.st_mtime_ns + 1_000_000_000))  # an update
    assert offline._iers_cache_file(fresh_table) not in (first, moved)
    monkeypatch.chdir(tmp_path)
    (tmp_path / "finals2000A.all").write_text("")  # astropy would read this one: no cache
    assert offline._iers_cache_file(fresh_table) is None


def test_a_damaged_cache_is_parsed_again_and_replaced(fresh_table):
    load_earth_orientation()
    parsed = iers.IERS_Auto.iers_table
    (path,) = fresh_table.glob("iers-auto-*.pickle")
    path.write_bytes(path.read_bytes()[:1000])  # truncated
    iers.IERS_Auto.iers_table = None
    load_earth_orientation()
    _same_table(iers.IERS_Auto.iers_table, parsed)
    iers.IERS_Auto.iers_table = None
    load_earth_orientation()  # the rewritten cache loads
    _same_table(iers.IERS_Auto.iers_table, parsed)


@pytest.mark.skipif(not hasattr(os, "getuid"), reason="POSIX file ownership")
def test_a_cache_others_can_write_to_is_not_loaded(fresh_table, monkeypatch):
    load_earth_orientation()
    fresh_table.chmod(0o777)  # anyone could have put a pickle there

    loaded = []
    monkeypatch.setattr(offline.pickle, "load", loaded.append)
    iers.IERS_Auto.iers_table = None
    load_earth_orientation()  # parsed instead
    assert not loaded, "a pickle was loaded from a folder others can write to"
    assert iers.IERS_Auto.iers_table is not None


def test_no_cache_folder_parses(tmp_path, monkeypatch):
    monkeypatch.setenv(CACHE_ENV, "")
    monkeypatch.setattr(iers.IERS_Auto, "iers_table", None)
    monkeypatch.setenv("HOME", str(tmp_path))
    load_earth_orientation()
    assert iers.IERS_Auto.iers_table is not None and not list(tmp_path.rglob("*.pickle"))


def test_the_geometry_takes_the_tables_from_the_cache(fresh_table, monkeypatch):
    # A process that did not warm up (serial executor, a script) builds the
    # sky geometry: it must take the parsed tables from the cache, not have
    # astropy parse their text again (~0.45 s of CPU), and compute the same.
    from astropy.time import Time

    from pipeline.geometry import Site
    from pipeline.geometry.zenith import ZenithAxis

    site, start = Site(latitude=50.0, longitude=-1.0), Time("2024-03-01T00:00", scale="utc")
    parsed = ZenithAxis(site, start, 0.0, 600.0, 0.01)  # the first parses, writes the cache
    assert list(fresh_table.glob("iers-auto-*.pickle"))
    iers.IERS_Auto.iers_table = None

    def refuse(*args, **kwargs):
        raise AssertionError("astropy parsed the IERS text tables")

    monkeypatch.setattr(iers.IERS_Auto, "read", refuse)
    cached = ZenithAxis(site, start, 0.0, 600.0, 0.01)
    assert iers.IERS_Auto.iers_table is not None
    for name in ("_coef_axis", "_coef_fwd", "_coef_inv"):  # bit for bit
        assert np.array_equal(getattr(cached, name), getattr(parsed, name)), name
