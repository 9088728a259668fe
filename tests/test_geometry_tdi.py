"""TDI track geometry: smear, bow, crossing windows, strip conventions.

The numerical tables of DEVELOPERS.md, "Numerical examples" (4096 x 4096 chip at 0.35"/px,
clock at the chip-centre drift rate) are in-house integrations (code C) of the
analytic gnomonic track; the first-order expressions are the analytic
results of DEVELOPERS.md, "Track geometry" (derived).

Those tables are pure geometry: no refraction and no aberration.  We switch
refraction off (pressure 0).  Aberration cannot be switched off in astropy;
it changes the local scale by at most v/c = 1.0e-4 (annual) and 1.5e-6
(diurnal), so every comparison allows 1.1e-4 of the quantity on top of the
table's rounding.
"""

import warnings

import astropy.units as u
import numpy as np
import pytest
from astropy.coordinates import SkyCoord
from astropy.time import Time
from erfa import ErfaWarning

from pipeline.geometry import (
    Camera,
    Site,
    TDIModel,
    first_order_bow,
    first_order_smear,
    positions_at_epoch,
)
from pipeline.geometry.optics import ARCSEC_PER_RADIAN

N = 4096
SCALE = 0.35  # arcsec/px
P = SCALE / ARCSEC_PER_RADIAN
CHIP = Camera(n_columns=4096, tdi_rows=N, pixel_size=15.0, focal_length=15e-6 / P)
ABERRATION = 1.1e-4  # largest relative scale change from aberration (annual + diurnal)

# Numerical examples, slip (DEVELOPERS.md): latitude -> (T s, t_row ms,
# slip N edge exact, 1st order,
# slip S edge exact, 1st order, rms at edge exact, centre-track slip exact)
SLIP_TABLE = {
    0.0: (95.31, 23.270, +0.016, 0.0, +0.016, 0.0, 0.003, +0.016),
    29.4: (109.40, 26.709, -8.022, -8.021, +8.019, +8.021, 2.32, +0.014),
    41.0: (126.29, 30.833, -12.401, -12.374, +12.347, +12.374, 3.58, +0.010),
    49.0: (145.28, 35.469, -16.435, -16.375, +16.315, +16.375, 4.75, +0.006),
    -31.0: (111.19, 27.147, +8.548, +8.553, -8.557, -8.553, 2.47, +0.014),
}
# Numerical examples, sagitta (DEVELOPERS.md): latitude -> (sagitta N
# edge, centre, S edge; signed here,
# + = ends lie north of the middle; time-mean cross-scan offset from the
# meridian point centre / N edge / S edge; cross-scan rms of the centre track)
BOW_TABLE = {
    0.0: (+0.0124, 0.0, -0.0124, 0.0, +0.004, -0.004, 0.0),
    29.4: (2.0215, 2.0051, 1.9889, +0.668, +0.674, +0.663, 0.598),
    41.0: (3.1152, 3.0934, 3.0718, +1.031, +1.038, +1.024, 0.922),
    49.0: (4.1225, 4.0936, 4.0650, +1.365, +1.374, +1.355, 1.221),
    -31.0: (-2.1214, -2.1382, -2.1551, -0.713, -0.707, -0.718, 0.638),
}
OFFSETS = np.array([+2048.0, 0.0, -2048.0])  # N edge, centre, S edge (columns)


@pytest.fixture(scope="module", params=sorted(SLIP_TABLE))
def case(request):
    """A pressure-0 model at one latitude and three stars crossing at t = 300 s."""
    lat = request.param
    site = Site(latitude=lat, longitude=-17.9, height=0.0, pressure=0.0)
    model = TDIModel(site, CHIP, Time("2025-09-10T22:00:00", scale="utc"), 600.0)
    ra, dec = model.sky_from_focal_plane(N / 2, (CHIP.n_columns - 1) / 2 + OFFSETS, 300.0)
    return lat, model, ra, dec


def test_crossing_time_and_line_time(case):
    lat, model, _, _ = case
    T, t_row = SLIP_TABLE[lat][:2]
    # table rounding (0.005 s, 0.0005 ms) plus the aberration scale
    assert model.crossing_time == pytest.approx(T, abs=0.005 + ABERRATION * T)
    assert model.line_time * 1e3 == pytest.approx(t_row, abs=0.0005 + ABERRATION * t_row)


def test_along_scan_slip_matches_table(case):
    lat, model, ra, dec = case
    shape = model.track_shape(ra, dec)
    _, _, n_exact, _, s_exact, _, rms_edge, centre = SLIP_TABLE[lat]
    # 3-decimal table (0.0005) + aberration on up to 16.4 px (0.0018)
    tol = 0.0005 + ABERRATION * 16.5
    assert shape.slip[0] == pytest.approx(n_exact, abs=tol)
    assert shape.slip[2] == pytest.approx(s_exact, abs=tol)
    assert shape.slip[1] == pytest.approx(centre, abs=tol)
    # rms along-scan smear at the (north) edge, 2-decimal table
    assert shape.along_rms[0] == pytest.approx(rms_edge, abs=0.005 + ABERRATION * 5)
    # Track geometry (derived): the smear is a top-hat of length |slip|, rms |slip|/sqrt(12);
    # the centre-rate cubic (<= 0.016 px end to end) bends it by ~1e-3 px
    np.testing.assert_allclose(shape.along_rms, np.abs(shape.slip) / np.sqrt(12), atol=0.002)


def test_along_scan_slip_first_order(case):
    lat, model, ra, dec = case
    shape = model.track_shape(ra, dec)
    first = first_order_smear(lat, OFFSETS, N, SCALE)
    _, _, _, n_first, _, s_first, _, _ = SLIP_TABLE[lat]
    # the helper reproduces the table's first-order column (14.234 tan(phi), 3 decimals)
    assert first[0] == pytest.approx(n_first, abs=0.0006)
    assert first[2] == pytest.approx(s_first, abs=0.0006)
    # Numerical examples (derived): the first order is within 0.4 % of the exact
    # edge slip once the centre-track cubic residual (<= 0.016 px) is added
    exact_minus_centre = shape.slip - shape.slip[1]
    assert np.all(np.abs(exact_minus_centre - first) <= 0.004 * np.abs(first) + 0.002)


def test_cross_scan_bow_matches_table(case):
    lat, model, ra, dec = case
    shape = model.track_shape(ra, dec)
    sag_n, sag_c, sag_s, off_c, off_n, off_s, rms_c = BOW_TABLE[lat]
    # 4-decimal table (5e-5) + aberration on up to 4.1 px (4.5e-4)
    tol = 5e-5 + ABERRATION * 4.2
    np.testing.assert_allclose(shape.sagitta, [sag_n, sag_c, sag_s], atol=tol)
    # first order 3.5586 tan(delta) px (numerical examples: equal to 4 decimals)
    np.testing.assert_allclose(first_order_bow(lat, N, SCALE, OFFSETS), shape.sagitta, atol=tol)
    # time-mean offset from the meridian point (3-decimal table): a third of
    # the sagitta poleward (track geometry, derived)
    tol3 = 5e-4 + ABERRATION * 1.4
    np.testing.assert_allclose(shape.centroid_offset, [off_n, off_c, off_s], atol=tol3)
    # cross-scan rms of the centre track about its chord (polar motion tilts
    # every track by ~1e-6 rad, 0.005 px end to end, which the table lacks)
    track = model.track(ra[1], dec[1], n_samples=4000)
    frac = (track.t[0] - track.t[0, 0]) / (track.t[0, -1] - track.t[0, 0])
    bow = track.c[0] - (track.c[0, 0] + (track.c[0, -1] - track.c[0, 0]) * frac)
    assert bow.std() == pytest.approx(rms_c, abs=tol3)


def test_smear_and_bow_vanish_at_equator_and_flip_in_south(case):
    lat, model, ra, dec = case
    shape = model.track_shape(ra, dec)
    # Track geometry (derived): at latitude 0 there is no
    # differential drift (xi = tan H for every declination), and the centre
    # track is the equator, a great circle: straight on the gnomonic plane.
    if lat == 0.0:
        # only the common centre-rate cubic (0.016 px) is left, the same for all
        assert np.ptp(shape.slip) < 1e-3  # aberration gradient across the chip ~1e-5 px
        assert abs(shape.sagitta[1]) < 1e-4  # centre track exactly straight
    elif lat > 0:
        assert shape.slip[0] < -1 and shape.slip[2] > 1  # poleward (north) stars lag
        assert np.all(shape.sagitta > 1) and np.all(shape.centroid_offset > 0.3)
    else:
        assert shape.slip[0] > 1 and shape.slip[2] < -1  # poleward is south now
        assert np.all(shape.sagitta < -1) and np.all(shape.centroid_offset < -0.3)


def test_crossing_window_hits_the_chip_ends(case):
    _, model, ra, dec = case
    t0, t1 = model.crossing_window(ra, dec)
    u0, _ = model.focal_plane(ra, dec, t0)
    u1, _ = model.focal_plane(ra, dec, t1)
    # Newton stops at 1e-9 s steps: 4e-8 px at ~40 px/s
    np.testing.assert_allclose(u0, 0.0, atol=1e-6)
    np.testing.assert_allclose(u1, N, atol=1e-6)
    # the stars were put at u = N/2 at 300 s; the track is symmetric about
    # mid-crossing to ~1e-5 px, i.e. ~1e-6 s
    np.testing.assert_allclose(0.5 * (t0 + t1), 300.0, atol=1e-4)
    # "the first crossing that ends at or after `after`": just before the
    # exit it is still this crossing (also for the slow, lagging edge star)
    a0, a1 = model.crossing_window(ra, dec, after=float(t1.min()) - 1e-3)
    np.testing.assert_allclose(a0, t0, atol=1e-6)
    np.testing.assert_allclose(a1, t1, atol=1e-6)
    # the next crossing is past the modelled span: NaN, not extrapolation
    assert np.all(np.isnan(model.crossing_window(ra, dec, after=t1.max() + 1.0)))


def test_crossing_window_after_a_sidereal_day():
    # One Earth rotation angle turn is 86164.0989 s (IERS Conventions 2010,
    # 86400 / 1.00273781191135448); a star comes back after that, up to the day's change
    # of aberration and precession (< 0.5" / 15"/s = 0.03 s).
    camera = Camera(n_columns=256, tdi_rows=256, pixel_size=15.0, focal_length=8.0)
    site = Site(latitude=33.0, longitude=-105.0, pressure=0.0)
    model = TDIModel(site, camera, Time("2024-02-01T02:00:00", scale="utc"), 90000.0)
    ra, dec = model.sky_from_focal_plane(128.0, 127.5, 600.0)
    t0, t1 = model.crossing_window(ra, dec)
    s0, s1 = model.crossing_window(ra, dec, after=t1 + 1.0)
    assert 0.5 * (s0 + s1) - 0.5 * (t0 + t1) == pytest.approx(86164.0989, abs=0.05)
    assert s1 - s0 == pytest.approx(t1 - t0, rel=1e-6)


def test_recorded_centroid_is_the_time_mean(case):
    _, model, ra, dec = case
    r_mean, c_mean = model.recorded_centroid(ra, dec)
    track = model.track(ra, dec, n_samples=20000)
    # midpoint rule over 20000 samples of a quadratic-like curve: error
    # ~ (curvature) / (24 n^2) ~ 1e-9 px; the brief asks for < 1e-4 px
    np.testing.assert_allclose(r_mean, track.r.mean(axis=1), atol=1e-6)
    np.testing.assert_allclose(c_mean, track.c.mean(axis=1), atol=1e-6)


def test_sky_from_strip_inverts_strip_from_sky(case):
    _, model, ra, dec = case
    t0, t1 = model.crossing_window(ra, dec)
    t_mid = 0.5 * (t0 + t1)
    r, c = model.strip_from_sky(ra, dec, t_mid)
    u_mid, _ = model.focal_plane(ra, dec, t_mid)
    ra2, dec2 = model.sky_from_strip(r, c, u=u_mid)
    err = np.hypot((ra2 - ra) * np.cos(np.radians(dec)), dec2 - dec) * 3.6e6
    assert err.max() < 1e-3  # mas; forward/inverse fits agree to 1e-7 mas
    # default u = N/2: the track is symmetric about mid-crossing, so u(t_mid)
    # = N/2 to ~1e-5 px and the default recovers the star to ~1e-5 mas
    ra3, dec3 = model.sky_from_strip(r, c)
    err3 = np.hypot((ra3 - ra) * np.cos(np.radians(dec)), dec3 - dec) * 3.6e6
    assert err3.max() < 1e-3


def test_strip_row_convention():
    # Strip row convention (pipeline/geometry/tdi.py): r(t) = t / dt + N - u(t);
    # charge at the serial
    # register (u = N) at t = k dt is strip row k.
    site = Site(latitude=10.0, longitude=0.0, pressure=0.0)
    model = TDIModel(site, CHIP, Time("2024-01-01T00:00:00", scale="utc"), 60.0)
    for k in (0, 1000):
        t = k * model.line_time
        ra, dec = model.sky_from_focal_plane(N, 100.0, t)
        r, c = model.strip_from_sky(ra, dec, t)
        assert r == pytest.approx(k, abs=1e-6)
        assert c == pytest.approx(100.0, abs=1e-6)


def test_wrong_line_time_adds_uniform_smear():
    # Track geometry (derived): a line time that does not match the drift adds a
    # uniform along-scan smear of N * (rate error) rows.
    site = Site(latitude=29.4, longitude=79.7, pressure=0.0)
    start = Time("2025-09-10T22:00:00", scale="utc")
    matched = TDIModel(site, CHIP, start, 600.0)
    eps = 1e-4
    slow = TDIModel(site, CHIP, start, 600.0, line_time=matched.line_time * (1 + eps))
    assert slow.line_time == pytest.approx(matched.line_time * (1 + eps), rel=1e-15)
    ra, dec = matched.sky_from_focal_plane(N / 2, 2047.5 + OFFSETS, 300.0)
    slip = matched.track_shape(ra, dec).slip
    extra = slow.track_shape(ra, dec).slip - slip
    # first order: N * eps = 0.41 px for every star; the edges differ from it
    # by slip * eps = 8e-4 px
    np.testing.assert_allclose(extra, N * eps, atol=1e-3)
    # exactly: the crossing lasts (N - slip) matched rows, each now longer by
    # a factor (1 + eps); only the Newton tolerance (1e-9 s) is left
    np.testing.assert_allclose(extra, (N - slip) * (1 - 1 / (1 + eps)), atol=1e-6)
    # a camera with a fixed line time gives the same model
    fixed = Camera(
        n_columns=4096,
        tdi_rows=N,
        pixel_size=15.0,
        focal_length=15e-6 / P,
        line_time=slow.line_time,
    )
    assert TDIModel(site, fixed, start, 600.0).line_time == slow.line_time


@pytest.mark.parametrize(("pressure", "temperature"), [(1013.25, 10.0), (750.0, 0.0)])
def test_refraction_compresses_the_drift(pressure, temperature):
    # Astronomical Almanac low-precision refraction formula:
    # near the zenith a uniform radial compression by k = 0.00452 deg P/(273+T)
    # (282.5 ppm at 1013 hPa, 10 C; 216.7 ppm at 750 hPa, 0 C).  ERFA's model
    # (dry air, 0.574 um) agrees with the low-precision formula to ~0.2 %; we
    # allow 1 % of k (the formula's stated precision, ~3e-6 in scale).
    start = Time("2023-04-01T02:00:00", scale="utc")
    dry = {"relative_humidity": 0.0, "wavelength": 0.574, "temperature": temperature}
    off = TDIModel(Site(latitude=-24.6, longitude=-70.4, pressure=0.0, **dry), CHIP, start, 0.0)
    on = TDIModel(Site(latitude=-24.6, longitude=-70.4, pressure=pressure, **dry), CHIP, start, 0.0)
    k = np.radians(0.00452) * pressure / (273.0 + temperature)  # the Almanac's formula
    assert 1 - on.drift_rate / off.drift_rate == pytest.approx(k, rel=0.01)
    # the on-sky pixel scale grows by the same factor (1 / (1 - k))
    assert on.pixel_scale / off.pixel_scale - 1 == pytest.approx(k, rel=0.01)
    # and the matched line time follows the observed drift
    assert on.line_time / off.line_time == pytest.approx(1 / (1 - k), rel=1e-5)


def test_positions_at_epoch_matches_erfa():
    # ERFA pmsafe (via astropy's apply_space_motion) with no parallax and zero
    # radial velocity is the same linear space motion; astropy warns that it
    # substitutes a large distance (ErfaWarning "distance overridden").
    rng = np.random.default_rng(3)
    n = 500
    ra = rng.uniform(0, 360, n)
    dec = np.degrees(np.arcsin(rng.uniform(-0.999, 0.999, n)))
    pmra, pmdec = rng.normal(0, 300, n), rng.normal(0, 300, n)
    epoch = Time(2016.0, format="jyear", scale="tcb")
    obstime = Time("2026-03-01T00:00:00", scale="utc")
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", 'ERFA function "pmsafe"', ErfaWarning)  # see above
        ref = SkyCoord(
            ra=ra * u.deg,
            dec=dec * u.deg,
            pm_ra_cosdec=pmra * u.mas / u.yr,
            pm_dec=pmdec * u.mas / u.yr,
            obstime=epoch,
        ).apply_space_motion(new_obstime=obstime)
    ra2, dec2 = positions_at_epoch(ra, dec, pmra, pmdec, 2016.0, obstime)
    sep = SkyCoord(ra=ra2 * u.deg, dec=dec2 * u.deg).separation(ref).to_value(u.mas)
    # motions up to ~12"; measured agreement 0.2 uas (ERFA's light-time terms)
    assert sep.max() < 0.005
    # analytic: 1000 mas/yr in RA on the equator for 10 Julian years moves the
    # star 10" along the tangent plane, i.e. by atan(10") on the sky
    ra3, dec3 = positions_at_epoch(0.0, 0.0, 1000.0, 0.0, 2016.0, 2026.0)
    assert ra3 == pytest.approx(np.degrees(np.arctan(10.0 / ARCSEC_PER_RADIAN)), rel=1e-13)
    assert dec3 == pytest.approx(0.0, abs=1e-12)


def test_invalid_inputs():
    site = Site(latitude=10.0, longitude=0.0)
    with pytest.raises(TypeError, match="start"):
        TDIModel(site, CHIP, "2024-01-01", 60.0)
    with pytest.raises(ValueError, match="duration_s"):
        TDIModel(site, CHIP, Time("2024-01-01"), -1.0)
    turned = Camera(n_columns=10, tdi_rows=10, pixel_size=15.0, focal_length=8.0, rotation=95.0)
    with pytest.raises(ValueError, match=r"camera\.rotation"):
        TDIModel(site, turned, Time("2024-01-01"), 60.0)
    with pytest.raises(ValueError, match="latitude"):
        TDIModel(Site(latitude=88.0, longitude=0.0), CHIP, Time("2024-01-01"), 60.0)
    model = TDIModel(site, CHIP, Time("2024-01-01"), 60.0)
    with pytest.raises(ValueError, match="n_samples"):
        model.track(0.0, 10.0, n_samples=0)
    # far outside the fitted field the model says NaN rather than extrapolating
    ra, dec = model.axis_radec(30.0)
    u_pix, v_pix = model.focal_plane(ra, dec + 5.0, 30.0)
    assert np.isnan(u_pix) and np.isnan(v_pix)
    assert np.all(np.isnan(model.crossing_window(ra, dec + 5.0)))


def test_crossing_window_after_early_in_span():
    """``after`` far before the crossing (even before the modelled span less one
    crossing) still finds the crossing: regression for a NaN when the search
    started before the span.  Self-consistency check."""
    site = Site(latitude=41.65, longitude=-1.02, height=1350.0, pressure=865.0, temperature=4.0)
    camera = Camera(n_columns=1024, tdi_rows=4096, pixel_size=15.0, focal_length=6.0)
    model = TDIModel(site, camera, Time("2026-10-15T23:50:00", scale="utc"), 800.0)
    ra, dec = model.sky_from_strip(np.array([5000.0]), np.array([512.0]))
    reference = model.crossing_window(ra, dec)
    for after in (-0.8 * abs(model.t_range[0]), model.t_range[0] + 1.0):
        t_enter, t_exit = model.crossing_window(ra, dec, after=after)
        # identical solve, so agreement to rounding (1e-9 s)
        np.testing.assert_allclose(t_enter, reference[0], atol=1e-9)
        np.testing.assert_allclose(t_exit, reference[1], atol=1e-9)


def test_groups_of_stars_get_what_each_gets_alone():
    """crossing_windows, tracks_of_groups and recorded_centroids share the model's
    calls between groups of stars, each with its own ``after``: every group must
    get, to the bit, what crossing_window, track and recorded_centroid give it
    alone (the astrometry stage's products are compared byte for byte).
    Self-consistency check."""
    camera = Camera(n_columns=256, tdi_rows=256, pixel_size=15.0, focal_length=8.0)
    site = Site(latitude=33.0, longitude=-105.0, pressure=0.0)
    model = TDIModel(site, camera, Time("2024-02-01T02:00:00", scale="utc"), 90000.0)
    columns = np.linspace(-20.0, 275.0, 7)
    groups, afters = [], []
    for t_centre, after in ((600.0, 0.0), (900.0, 0.0), (3000.0, 2500.0), (600.0, 606.0)):
        # (600 s, after 606 s): the transit found first (the crossing takes
        # 7.9 s) ends before ``after``, the next one, a sidereal day on, is searched
        groups.append(model.sky_from_focal_plane(128.0, columns, t_centre))
        afters.append(after)
    # one star on the centre line: its first search converges a step before
    # the others' (a step more would move its times by rounding)
    groups.append(model.sky_from_focal_plane(128.0, np.array([128.0]), 700.0))
    afters.append(0.0)
    groups.insert(2, (np.empty(0), np.empty(0)))  # a group without stars
    afters.insert(2, 0.0)
    ra = np.concatenate([g[0] for g in groups])
    dec = np.concatenate([g[1] for g in groups])
    sizes = [g[0].size for g in groups]
    t_enter, t_exit = model.crossing_windows(ra, dec, afters, sizes)
    tracks = model.tracks_of_groups(ra, dec, 5, afters, sizes)
    centroids = model.recorded_centroids(ra, dec, afters, sizes)
    ends = np.cumsum([0, *sizes])
    for (g_ra, g_dec), after, lo, hi, track, (r, c) in zip(
        groups, afters, ends[:-1], ends[1:], tracks, centroids, strict=True
    ):
        alone = model.crossing_window(g_ra, g_dec, after=after)
        np.testing.assert_array_equal(t_enter[lo:hi], alone[0])
        np.testing.assert_array_equal(t_exit[lo:hi], alone[1])
        expected = model.track(g_ra, g_dec, 5, after=after)
        for name in ("t", "u", "v", "r", "c"):
            np.testing.assert_array_equal(getattr(track, name), getattr(expected, name))
        r_alone, c_alone = model.recorded_centroid(g_ra, g_dec, after=after)
        np.testing.assert_array_equal(r, r_alone)
        np.testing.assert_array_equal(c, c_alone)
    # the late group's window is the next transit's (the case the test is about)
    assert np.all(t_exit[ends[4] : ends[5]] > 86000.0)
