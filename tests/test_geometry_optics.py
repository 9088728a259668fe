"""Gravity, liquid-mirror focal length, plate scale and refraction constant.

Sources: NIMA TR8350.2 (WGS84 normal gravity), Borra et
al. SPIE 1236, 653 eq. 1 (f = g / 2 w^2), the
Astronomical Almanac low-precision refraction formula (rows 11-12).
"""

import numpy as np
import pytest

from pipeline.geometry import Camera, Site
from pipeline.geometry.optics import (
    ARCSEC_PER_RADIAN,
    focal_length_from_spin,
    normal_gravity,
    plate_scale,
    refraction_constant,
    resolve_focal_length,
    spin_period_from_focal_length,
)

# Gravity of sample sites: computed in-house (derived, DEVELOPERS.md) from
# the NIMA TR8350.2 formulas, printed to 6 decimals.
SITE_GRAVITY = [
    (0.0, 0.0, 9.780325),
    (29.36, 2450.0, 9.785192),
    (32.98, 2751.0, 9.787159),
    (41.0, 0.0, 9.802590),
    (45.0, 0.0, 9.806198),
    (49.29, 395.0, 9.808849),
    (-31.0, 0.0, 9.794037),
]


def test_normal_gravity_equator_and_pole():
    # NIMA TR8350.2 (3rd ed.): gamma_e = 9.7803253359, gamma_p = 9.8321849378 m/s^2
    # (its equator and pole values).  Somigliana's formula must reproduce both exactly;
    # 1e-10 m/s^2 is float rounding of the closed formula.
    assert normal_gravity(0.0) == pytest.approx(9.7803253359, abs=1e-10)
    assert normal_gravity(90.0) == pytest.approx(9.8321849378, abs=1e-10)
    assert normal_gravity(-90.0) == pytest.approx(9.8321849378, abs=1e-10)


@pytest.mark.parametrize(("lat", "height", "expected"), SITE_GRAVITY)
def test_normal_gravity_site_table(lat, height, expected):
    # The table above (derived from NIMA TR8350.2); the table
    # is rounded to 1e-6 m/s^2, so we allow half a unit in the last place plus
    # float noise.
    assert normal_gravity(lat, height) == pytest.approx(expected, abs=6e-7)


def test_normal_gravity_height_term_numeric_form():
    # NIMA TR8350.2 height term, numerical form (hpmuseum.org forum thread 17495):
    # dg = -3.0877e-6 (1 - 0.00139 sin^2 phi) h + 7.2e-13 h^2.  The coefficient
    # 3.0877e-6 is rounded to 5 figures: +-5e-11 * 3000 m = 1.5e-7 m/s^2.
    for lat in (0.0, 29.36, 60.0):
        for h in (500.0, 3000.0):
            s2 = np.sin(np.radians(lat)) ** 2
            expected = -3.0877e-6 * (1 - 0.00139 * s2) * h + 7.2e-13 * h**2
            got = normal_gravity(lat, h) - normal_gravity(lat, 0.0)
            assert got == pytest.approx(expected, abs=2e-7)


def test_focal_length_matches_formula_by_hand():
    # Borra et al. (SPIE 1236, 653, eq. 1): f = g / (2 w^2), w = 2 pi / T.
    # Worked by hand: T = 8 s, g = 9.785192 -> w = 0.785398 rad/s,
    # f = 9.785192 / (2 * 0.616850) = 7.93158 m.
    w = 2 * np.pi / 8.0
    assert focal_length_from_spin(8.0, 9.785192) == pytest.approx(9.785192 / (2 * w * w), rel=1e-14)
    assert focal_length_from_spin(8.0, 9.785192) == pytest.approx(7.93158, abs=5e-6)


@pytest.mark.parametrize(
    ("f", "g", "period"),
    [
        # In-house worked examples of Borra's eq. 1 (derived, DEVELOPERS.md),
        # printed to 1 ms: allow half a unit.
        (8.0, 9.785192, 8.034),  # ILMT, f = 8 m at Devasthal gravity
        (8.0, 9.80665, 8.026),  # same at standard gravity g_n (3rd CGPM, exact)
        (9.0, 9.808849, 8.512),  # LZT
    ],
)
def test_spin_period_worked_examples(f, g, period):
    assert spin_period_from_focal_length(f, g) == pytest.approx(period, abs=5e-4)
    # and back: the two functions are inverses to float precision
    assert focal_length_from_spin(spin_period_from_focal_length(f, g), g) == pytest.approx(
        f, rel=1e-13
    )


@pytest.mark.parametrize(
    ("period", "g", "f"),
    [
        (8.0, 9.785192, 7.932),  # ILMT spun at 8.000 s (derived), to 1 mm
        (6.0, 9.787159, 4.462),  # NASA-LMT 10 rpm at the NODO site (derived)
    ],
)
def test_focal_length_worked_examples(period, g, f):
    assert focal_length_from_spin(period, g) == pytest.approx(f, abs=5e-4)


def test_focal_length_sensitivity_to_spin():
    # Differentiating f = g / (2 w^2): df/f = -2 dw/w; 1 ppm in rotation is 2 ppm in f
    # (16 um at 8 m).  Linearisation error is ~3 ppm of the 2 ppm, far below 1e-9.
    g = 9.785192
    period = float(spin_period_from_focal_length(8.0, g))
    f_fast = focal_length_from_spin(period / (1 + 1e-6), g)  # w larger by 1 ppm
    assert (f_fast - 8.0) == pytest.approx(-16e-6, abs=1e-9)


def test_plate_scale_check_values_chip():
    # DEVELOPERS.md, numerical examples: 0.35"/px <-> p = 1.696848e-6 rad (7 figures, so
    # 3e-7 relative); 206264.806"/rad is the definition of the arcsecond.
    p = 1.696848e-6
    assert plate_scale(15.0, 15e-6 / p) == pytest.approx(0.35, rel=5e-7)
    assert pytest.approx(206264.806, abs=1e-3) == ARCSEC_PER_RADIAN


def test_refraction_constant_almanac():
    # ERFA's refraction constant (dry air, visual 0.55 um) against the Astronomical
    # Almanac's low-precision formula k = 0.00452 deg P / (273 + T): 58.26"
    # tan z at 1013.25 hPa, 10 C -> 282.5 ppm; 216.7 ppm at 750 hPa, 0 C.
    # Tolerances: the Almanac values are printed to 0.1 ppm / 0.01", and the
    # two models agree to ~0.03 % here.
    assert refraction_constant(1013.25, 10.0) * ARCSEC_PER_RADIAN == pytest.approx(58.26, abs=0.01)
    assert refraction_constant(1013.25, 10.0) * 1e6 == pytest.approx(282.5, abs=0.1)
    assert refraction_constant(750.0, 0.0) * 1e6 == pytest.approx(216.7, abs=0.1)
    assert refraction_constant(0.0, 0.0) == 0.0
    # humidity lowers it slightly (ERFA refco; the Almanac formula ignores it)
    assert refraction_constant(1013.25, 10.0, 0.5) < refraction_constant(1013.25, 10.0)


def test_resolve_focal_length():
    site = Site(latitude=29.36, longitude=79.7, height=2450.0)
    direct = Camera(n_columns=10, tdi_rows=10, pixel_size=15.0, focal_length=8.0)
    spun = Camera(n_columns=10, tdi_rows=10, pixel_size=15.0, spin_period=8.0)
    assert resolve_focal_length(site, direct) == 8.0
    # the spin period goes through the site's normal gravity (TR8350.2) and eq. 1
    expected = focal_length_from_spin(8.0, normal_gravity(29.36, 2450.0))
    assert resolve_focal_length(site, spun) == pytest.approx(float(expected), rel=1e-15)


def test_bad_inputs_name_the_parameter():
    with pytest.raises(ValueError, match="spin_period_s"):
        focal_length_from_spin(0.0, 9.8)
    with pytest.raises(ValueError, match="focal_length_m"):
        spin_period_from_focal_length(-1.0, 9.8)
    bad = Camera(n_columns=10, tdi_rows=10, pixel_size=15.0, focal_length=-2.0)
    with pytest.raises(ValueError, match="focal_length"):
        resolve_focal_length(Site(latitude=0.0, longitude=0.0), bad)
