"""The plan summary: focal length, scale, line time, smear, bow, spin errors."""

import re

import erfa
import numpy as np
import pytest
from astropy.time import Time

from pipeline.geometry import Camera, Site, TDIModel, format_plan, summarize_plan
from pipeline.geometry.optics import ARCSEC_PER_RADIAN

P = 0.35 / ARCSEC_PER_RADIAN
START = Time("2025-09-10T22:00:00", scale="utc")


def test_plan_reproduces_check_values_chip():
    # DEVELOPERS.md, "Numerical examples" (derived), latitude 29.4 deg
    # (pure geometry: pressure 0):
    # t_row = 26.709 ms, T = 109.40 s, edge slips -8.022 / +8.019 px, sagittas
    # 2.0215 / 1.9889 px; first order 8.021 px and 3.5586 tan(delta) px.
    # Tolerances: table rounding plus the 1e-4 aberration scale that the
    # table lacks (see tests/test_geometry_tdi.py).
    site = Site(latitude=29.4, longitude=79.7, pressure=0.0)
    camera = Camera(n_columns=4096, tdi_rows=4096, pixel_size=15.0, focal_length=15e-6 / P)
    s = summarize_plan(site, camera, start=START)
    assert s["plate_scale_arcsec"] == pytest.approx(0.35, rel=1e-12)
    assert s["line_time_s"] * 1e3 == pytest.approx(26.709, abs=0.0005 + 0.003)
    assert s["crossing_time_s"] == pytest.approx(109.40, abs=0.005 + 0.012)
    north, south = s["edges"]["north"], s["edges"]["south"]
    assert north["slip_px"] == pytest.approx(-8.022, abs=0.0015)
    assert south["slip_px"] == pytest.approx(+8.019, abs=0.0015)
    assert north["slip_first_order_px"] == pytest.approx(-8.021, abs=0.0006)
    assert north["sagitta_px"] == pytest.approx(2.0215, abs=3e-4)
    assert south["sagitta_px"] == pytest.approx(1.9889, abs=3e-4)
    assert s["centre_sagitta_px"] == pytest.approx(2.0051, abs=3e-4)
    assert north["sagitta_first_order_px"] == pytest.approx(2.0215, abs=6e-5)
    # without refraction the first-order line time p / (w cos phi) differs from
    # the exact one only by aberration and polar motion (< 1.1e-4)
    assert s["line_time_first_order_s"] == pytest.approx(s["line_time_s"], rel=1.1e-4)


def test_plan_spin_period_and_errors():
    # Borra et al. eq. 1, worked example (derived, DEVELOPERS.md): a
    # mirror spun at 8.000 s at Devasthal
    # (29.36 deg, 2450 m; gravity 9.785192) has f = 7.932 m.
    site = Site(latitude=29.36, longitude=79.68, height=2450.0)
    camera = Camera(n_columns=4096, tdi_rows=4096, pixel_size=15.0, spin_period=8.0)
    err = 1e-4  # s
    s = summarize_plan(site, camera, spin_period_error_s=err, start=START)
    assert s["gravity_m_s2"] == pytest.approx(9.785192, abs=6e-7)
    assert s["focal_length_m"] == pytest.approx(7.932, abs=5e-4)
    assert s["spin_period_s"] == 8.0
    # The errors are first order in err/T; compare each with the exact
    # difference to the mirror spun slower by err (second order: err/T ~ 1e-5,
    # 2 err/T ~ 3e-5 for the line time).  The focal length of that mirror:
    # f = g / (2 w^2) (Borra et al. eq. 1), checked at 8.000 s just above.
    slower = Camera(n_columns=4096, tdi_rows=4096, pixel_size=15.0, spin_period=8.0 + err)
    slow = summarize_plan(site, slower, start=START)
    assert slow["focal_length_m"] - s["focal_length_m"] == pytest.approx(
        s["focal_length_error_m"], rel=2e-5
    )
    # the line-time error is what a mirror spun slower by err really needs:
    # compare with the exact model of that mirror
    true_line = TDIModel(site, slower, START, 0.0).matched_line_time
    assert true_line - s["matched_line_time_s"] == pytest.approx(s["line_time_error_s"], rel=1e-4)
    # the old line time then lags the drift by 1 - t'/t of a row per row
    smear = 4096 * (1.0 - true_line / s["matched_line_time_s"])
    assert s["spin_error_smear_px"] == pytest.approx(smear, rel=1e-4)
    assert s["line_time_error_s"] < 0  # longer f, larger image, faster drift in pixels
    # refraction at the standard-atmosphere pressure of 2450 m (~751 hPa, 5 C)
    assert s["pressure_hpa"] == pytest.approx(751.5, abs=0.2)  # ISA power law
    # Refraction near the zenith, R = A tan z.  The plan takes A from ERFA's
    # refco (the model astropy's AltAz frame applies) at the site's pressure,
    # temperature (default 5 C), humidity (0.5) and wavelength (0.6 um):
    # 212.41 ppm at 751.5 hPa.  Checked against the Astronomical Almanac's
    # low-precision k = 0.00452 deg P / (273 + T), by hand 213.26 ppm at
    # 751.5 hPa and 5 C: the two agree to 0.4 % here; 1 %, the accuracy the
    # Almanac gives its formula.  A temperature in kelvin or a pressure in
    # another unit would be off by tens of per cent.
    assert (site.temperature, site.relative_humidity, site.wavelength) == (5.0, 0.5, 0.6)
    almanac = 213.26 * s["pressure_hpa"] / 751.5
    assert s["refraction_ppm"] == pytest.approx(almanac, rel=0.01)
    # and the plan passes the site's humidity and wavelength on (pyerfa's refco,
    # the reference library; humidity and wavelength change A by 0.1-0.4 % here)
    refa, _ = erfa.refco(s["pressure_hpa"], 5.0, 0.5, 0.6)
    assert s["refraction_ppm"] == pytest.approx(refa * 1e6, rel=1e-9)


def test_format_plan_has_units_on_every_line():
    site = Site(latitude=-31.0, longitude=-70.7, height=2400.0, name="fictional ridge")
    camera = Camera(n_columns=2048, tdi_rows=2048, pixel_size=13.5, focal_length=6.0, name="cam")
    text = format_plan(summarize_plan(site, camera, spin_period_error_s=1e-5))
    lines = text.splitlines()
    assert "fictional ridge" in lines[0]
    unit = re.compile(r"\b(deg|m/s\^2|m|mm|s|ms|us|arcsec/px|arcsec/s|hPa|ppm|px)\b")
    for line in lines[1:]:
        assert unit.search(line), f"no unit on: {line!r}"
    assert len(lines) > 25


@pytest.mark.parametrize(("n_columns", "tdi_rows"), [(6, 16), (1, 1), (2, 4), (4096, 64)])
def test_plan_of_a_tiny_camera(n_columns, tdi_rows):
    """A chip crossed in well under a second (e.g. a test camera of 6 x 16 px),
    and a wide chip of few rows whose edge slip is still a good part of a pixel.

    The drift rate, the crossing and the track shapes are then computed with
    time steps shorter than the crossing: every number is finite.  The line
    time matched at the chip centre does not depend on the chip's size, and
    without refraction it is p / (w cos phi) (DEVELOPERS.md, "Track
    geometry", first order) to the 1.1e-4 of aberration and polar motion, as above.
    """
    site = Site(latitude=-20.0, longitude=30.0, pressure=0.0)
    small = Camera(n_columns=n_columns, tdi_rows=tdi_rows, pixel_size=15.0, focal_length=4.0)
    large = Camera(n_columns=2048, tdi_rows=2048, pixel_size=15.0, focal_length=4.0)
    s = summarize_plan(site, small, start=START)
    reference = summarize_plan(site, large, start=START)
    # Same centre line, same model; the drift is a central difference over a
    # step of 1/8 of the crossing instead of 1 s: 2e-9 apart (measured), i.e.
    # 1e-5 rows of smear over 4096 rows.
    assert s["line_time_s"] == pytest.approx(reference["line_time_s"], rel=1e-8)
    assert s["line_time_first_order_s"] == pytest.approx(s["line_time_s"], rel=1.1e-4)
    for name, edge in s["edges"].items():
        # Signed, relative to the first order (the slips are 7e-7 to 7e-5 px
        # on the tiny chips, 0.18 px on the wide one, and an absolute 1e-3 px
        # would not see a sign error).  The exact slip adds the centre track's
        # cubic residual: measured <= 1.2e-3 of the slip (1 x 1 chip) and
        # 3e-3 on the wide chip; 5e-3.  Sagittas: measured <= 1.5e-4; 1e-3.
        assert edge["slip_px"] == pytest.approx(edge["slip_first_order_px"], rel=5e-3)
        assert edge["sagitta_px"] == pytest.approx(edge["sagitta_first_order_px"], rel=1e-3)
        # southern site: the north edge is the equatorward one, ahead of its packet
        assert np.sign(edge["slip_px"]) == (1 if name == "north" else -1)
    assert "nan" not in format_plan(s)


def test_plan_refraction_is_the_models():
    # The plan's refraction compression must be the one the exact geometry
    # applies (astropy/ERFA AltAz with the site's humidity and wavelength):
    # compare with the drift-rate compression of TDIModel, pressure on/off.
    # Measured agreement 2e-4 relative (aberration and the tan^3 z term);
    # 1e-3 allows for that, while the Almanac's low-precision formula, which
    # ignores humidity and colour, is 0.8 % off for this humid blue passband.
    wet = {"latitude": 29.36, "longitude": 79.68, "height": 2450.0}
    wet |= {"relative_humidity": 0.9, "wavelength": 0.45}
    camera = Camera(n_columns=4096, tdi_rows=4096, pixel_size=15.0, focal_length=10.0)
    s = summarize_plan(Site(**wet), camera, start=START)
    on = TDIModel(Site(**wet), camera, START, 0.0).drift_rate
    off = TDIModel(Site(**wet, pressure=0.0), camera, START, 0.0).drift_rate
    assert s["refraction_ppm"] == pytest.approx((1 - on / off) * 1e6, rel=1e-3)


@pytest.mark.parametrize("rotation", [0.0, 0.3, -0.5])
def test_plan_states_the_cross_scan_drift_of_a_turned_camera(rotation):
    """A camera turned by a drifts each star across the columns by -N tan(a)
    over its crossing (rows at angle a to the drift: N rows along, N tan(a)
    across; Camera's sign convention, derived), a smear rectify cannot undo:
    -10.7 px for 0.3 deg on 2048 rows. The plan printed nothing of it."""
    site = Site(latitude=45.0, longitude=10.0, pressure=0.0)
    camera = Camera(
        n_columns=1024, tdi_rows=2048, pixel_size=15.0, focal_length=6.0, rotation=rotation
    )
    s = summarize_plan(site, camera, start=START)
    expected = -2048 * np.tan(np.radians(rotation))
    # 0.02 px: the drift's change over the crossing (the star's rate varies
    # by ~1e-5 along the track) and the sampled ends
    assert s["cross_scan_drift_px"] == pytest.approx(expected, abs=0.02)
    assert "cross-scan drift (rotation)" in format_plan(s)


def test_plan_states_the_smear_of_a_configured_line_time():
    """A line time 0.1 % longer than the drift's smears every star by N x 0.001
    rows along the scan (DESIGN.md section 4, first order)."""
    site = Site(latitude=45.0, longitude=10.0)
    camera = Camera(n_columns=1024, tdi_rows=2048, pixel_size=15.0, focal_length=6.0)
    matched = summarize_plan(site, camera, start=START)
    assert matched["line_time_smear_px"] == 0.0
    slow = Camera(
        n_columns=1024,
        tdi_rows=2048,
        pixel_size=15.0,
        focal_length=6.0,
        line_time=matched["matched_line_time_s"] * 1.001,
    )
    s = summarize_plan(site, slow, start=START)
    # float64 rounding only: the same two line times
    assert s["line_time_smear_px"] == pytest.approx(2048 * 0.001, rel=1e-9)
    assert "+2.048 px over 2048 rows" in format_plan(s)
