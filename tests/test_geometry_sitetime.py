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
def no_network(monkeypatch):
    """Make any attempt to open a URL fail loudly."""

    def refuse(*args, **kwargs):
        raise AssertionError("astropy tried to download something")

    monkeypatch.setattr(urllib.request, "urlopen", refuse)
    monkeypatch.setattr("astropy.utils.data.download_file", refuse)
    monkeypatch.setattr("astropy.utils.iers.iers.download_file", refuse)


def test_past_iers_table_warns_instead_of_downloading(no_network):
    # astropy.utils.iers documents that past the bundled tables it raises or
    # downloads unless configured; pipeline._offline configures it to warn.
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
