"""Site location, standard atmosphere and offline behaviour of astropy."""

import urllib.request
import warnings

import astropy.units as u
import numpy as np
import pytest
from astropy.time import Time

from pipeline.exceptions import GeometryWarning
from pipeline.geometry import Camera, Site, TDIModel
from pipeline.geometry.sitetime import (
    altaz_frame,
    earth_location,
    iers_table_end,
    site_pressure,
    standard_pressure,
    times_since,
    utc_time,
)


def test_standard_pressure_isa():
    # ICAO/ISO 2533 standard atmosphere: 1013.25 hPa at sea level (definition)
    # and 226.32 hPa at the 11 km tropopause (from memory).  The power law
    # reproduces the tropopause value to ~1e-4 (its constants are rounded).
    assert standard_pressure(0.0) == pytest.approx(1013.25, rel=1e-12)
    assert standard_pressure(11000.0) == pytest.approx(226.32, rel=3e-4)


def test_site_pressure_choices():
    assert site_pressure(Site(latitude=0, longitude=0, height=2450.0, pressure=0.0)) == 0.0
    assert site_pressure(Site(latitude=0, longitude=0, pressure=700.0)) == 700.0
    default = site_pressure(Site(latitude=0, longitude=0, height=2450.0))
    assert default == pytest.approx(float(standard_pressure(2450.0)))
    with pytest.raises(ValueError, match=r"site\.pressure"):
        site_pressure(Site(latitude=0, longitude=0, pressure=-1.0))


def test_earth_location_and_frame():
    site = Site(latitude=-31.0, longitude=-70.5, height=2400.0, pressure=750.0, temperature=0.0)
    loc = earth_location(site)
    # round trip through astropy's WGS84 geodetic conversion (ERFA gc2gd);
    # 1e-9 deg and 1e-6 m are its float precision at Earth radius.
    assert loc.lat.deg == pytest.approx(-31.0, abs=1e-9)
    assert loc.lon.deg == pytest.approx(-70.5, abs=1e-9)
    assert loc.height.to_value(u.m) == pytest.approx(2400.0, abs=1e-6)
    frame = altaz_frame(site, Time("2024-05-01T03:00:00", scale="utc"))
    assert frame.pressure.to_value(u.hPa) == 750.0
    assert frame.temperature.to_value(u.deg_C) == pytest.approx(0.0)


def test_times_since_counts_leap_seconds():
    # IERS Bulletin C 52: a leap second was inserted at the end of 2016-12-31,
    # so 2 SI seconds after 23:59:59 it is 00:00:00 (not 00:00:01).
    t = times_since(Time("2016-12-31T23:59:59", scale="utc"), [2.0])
    assert t[0].isot == "2017-01-01T00:00:00.000"


@pytest.fixture
def astropy_defaults():
    """astropy's own defaults (download allowed), not the test session's offline setup.

    The pipeline must go offline by itself (``pipeline._offline.astropy_offline``
    in the geometry's entry points), not rely on the caller's settings.
    """
    from astropy.utils import iers
    from astropy.utils.data import conf as data_conf

    with (
        iers.conf.set_temp("auto_download", True),
        iers.conf.set_temp("auto_max_age", 30.0),
        iers.conf.set_temp("iers_degraded_accuracy", "error"),
        data_conf.set_temp("allow_internet", True),
    ):
        yield


@pytest.fixture
def no_network(monkeypatch, astropy_defaults):
    """Refuse and record any attempt to open a URL (with astropy's default settings).

    astropy catches a failed download and warns, so the attempts are also
    counted and must be none.
    """
    attempts = []

    def refuse(*args, **kwargs):
        attempts.append(args)
        raise AssertionError("astropy tried to download something")

    monkeypatch.setattr(urllib.request, "urlopen", refuse)
    monkeypatch.setattr("astropy.utils.data.download_file", refuse)
    monkeypatch.setattr("astropy.utils.iers.iers.download_file", refuse)
    yield
    assert attempts == [], f"astropy tried to download: {attempts}"


def test_past_iers_table_warns_instead_of_downloading(no_network):
    # astropy.utils.iers documents that past the bundled tables it raises or
    # downloads unless configured; the geometry configures it, for the time
    # it computes, to warn.
    # The whole model build must give our GeometryWarning and a usable model.
    late = f"{int(iers_table_end().jyear) + 5}-06-01T00:00:00"
    with pytest.warns(GeometryWarning, match="IERS table ends"):
        start = utc_time(late)
    camera = Camera(n_columns=200, tdi_rows=200, pixel_size=15.0, focal_length=8.0)
    with pytest.warns(GeometryWarning, match="Earth-orientation"):
        model = TDIModel(Site(latitude=20.0, longitude=10.0), camera, start, 600.0)
    assert np.isfinite(model.line_time)
    ra, dec = model.sky_from_strip(100.0, 100.0)
    assert np.all(np.isfinite([ra, dec]))


def test_inside_iers_table_is_silent(no_network):
    camera = Camera(n_columns=200, tdi_rows=200, pixel_size=15.0, focal_length=8.0)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        TDIModel(Site(latitude=20.0, longitude=10.0), camera, utc_time("2024-03-01T00:00"), 60.0)


IMPORT_CHECK = """
from astropy.utils import iers
from astropy.utils.data import conf
def settings():
    return (iers.conf.auto_download, iers.conf.auto_max_age,
            iers.conf.iers_degraded_accuracy, conf.allow_internet)
before = settings()
import pipeline, pipeline.cli, pipeline.runner, pipeline.geometry, pipeline.products
from pipeline import load_config, night_status, open_product, read_image, run_night
assert settings() == before, (before, settings())
print(before)
"""


def test_importing_the_package_leaves_astropy_settings_alone():
    # A fresh interpreter: this test session itself runs offline (conftest).
    import subprocess
    import sys

    result = subprocess.run(
        [sys.executable, "-c", IMPORT_CHECK], capture_output=True, text=True, check=False
    )
    assert result.returncode == 0, result.stderr
    # astropy's documented defaults: downloads on, 30-day table age, errors.
    assert result.stdout.strip() == "(True, 30.0, 'error', True)"


def test_offline_block_restores_the_settings():
    from astropy.utils import iers

    from pipeline._offline import astropy_offline

    with iers.conf.set_temp("auto_download", True):
        with astropy_offline():
            assert iers.conf.auto_download is False
            assert iers.conf.iers_degraded_accuracy == "warn"
        assert iers.conf.auto_download is True


LATE_IMPORT_CHECK = """
import sys
from pipeline._offline import astropy_offline
assert "astropy.utils.iers" not in sys.modules and "astropy.utils.data" not in sys.modules
def settings():
    from astropy.utils import iers
    from astropy.utils.data import conf
    return (iers.conf.auto_download, iers.conf.auto_max_age,
            iers.conf.iers_degraded_accuracy, conf.allow_internet)
with astropy_offline():
    with astropy_offline():
        pass
    inside = settings()  # imported here, after the block began
print(inside, settings())
"""


def test_offline_block_holds_for_astropy_modules_imported_inside_it():
    # The settings are written to astropy's configuration store before its
    # IERS and data modules are imported (so a command that never needs them
    # does not import them); once imported inside the block they must read
    # the offline values, and astropy's defaults after it (a nested block
    # must not end the outer one).
    import subprocess
    import sys

    result = subprocess.run(
        [sys.executable, "-c", LATE_IMPORT_CHECK], capture_output=True, text=True, check=False
    )
    assert result.returncode == 0, result.stderr
    # astropy's documented defaults after the block: downloads on, 30-day
    # table age, errors past the table.
    offline, defaults = "(False, None, 'warn', False)", "(True, 30.0, 'error', True)"
    assert result.stdout.strip() == f"{offline} {defaults}"


GEOMETRY_OFFLINE_CHECK = """
import urllib.request, warnings
import astropy.utils.data, astropy.utils.iers.iers
attempts = []
def refuse(*args, **kwargs):
    attempts.append(args)
    raise OSError("no network in this test")
urllib.request.urlopen = refuse
astropy.utils.data.download_file = refuse
astropy.utils.iers.iers.download_file = refuse
# A clock years after the bundled table was made: with its defaults astropy
# would now fetch a fresh one.
from astropy.time import Time
Time.now = classmethod(lambda cls: cls("2040-01-01T00:00:00", scale="tai"))
from pipeline.geometry import Camera, Site, TDIModel
from pipeline.geometry.sitetime import iers_table_end, utc_time
late = f"{int(iers_table_end().jyear) + 5}-06-01T00:00:00"
camera = Camera(n_columns=200, tdi_rows=200, pixel_size=15.0, focal_length=8.0)
with warnings.catch_warnings(record=True) as caught:
    warnings.simplefilter("always")
    model = TDIModel(Site(latitude=20.0, longitude=10.0), camera, utc_time(late), 600.0)
    model.sky_from_strip(100.0, 100.0)
print(len(attempts), sorted({w.category.__name__ for w in caught}))
"""


def test_geometry_never_downloads_in_a_fresh_process():
    # A fresh interpreter with astropy's defaults (downloads allowed), no IERS
    # table loaded yet and a clock that makes the bundled table stale: the
    # model past the table must neither try a download nor fail; it warns (our
    # GeometryWarning) instead.
    import subprocess
    import sys

    result = subprocess.run(
        [sys.executable, "-c", GEOMETRY_OFFLINE_CHECK], capture_output=True, text=True, check=False
    )
    assert result.returncode == 0, result.stderr
    assert result.stdout.strip() == "0 ['GeometryWarning']", result.stdout
