"""The zero point end to end on a simulated night, against the simulator's truth (slow).

The simulator (:mod:`pipeline.simulate`) makes a night with a known zero
point, a passing cloud (25 % deep, a Gaussian of sigma 25 s in time), a
colour term of 0.1 mag/mag between the passband and the reference colour,
and a 2 % loss of star light in 20 columns that the sky's flat does not show
(``simulate.actual.flat_error``); its reference catalogue holds the truth
stars to r = 21 with their magnitudes (0.015 mag errors) and colours.  The
runner reduces the night through ``zeropoint`` (ingest -> ... -> detect ->
catalog -> astrometry -> zeropoint) and ``science``; the figures are the
zeropoint stage's acceptance figures, each tolerance beyond them stated
beside its check.

The night: a 512-column chip of 256 TDI rows (a 13.7 s crossing, short
against the cloud) at latitude 50, 7168 rows (383 s) in seven stretches,
stars r = 15 to 22.5 at an artificially high density so that every 8 s knot
of the zero point holds ~60 reference stars.  Invented data
(self-consistency): the truth is the simulator's.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import yaml
from _night_truth import night_config
from astropy.io import fits
from astropy.table import Table

from pipeline import load_config, open_product, run_night
from pipeline.runner import night_dir
from pipeline.simulate import (
    column_properties,
    simulate_night,
    tdi_model,
    true_zero_point,
    write_night,
)
from pipeline.stages.zeropoint import ZeroPointFlag

pytestmark = pytest.mark.slow

CLOUD_DEPTH, CLOUD_WIDTH = 0.25, 25.0  # the passing cloud
COLOUR_TERM = 0.1  # mag per mag of reference colour (the issue's)
FLAT_FIRST, FLAT_COLUMNS, FLAT_ERROR = 300, 20, 0.02  # the flat-field error


def _config() -> dict:
    config = night_config(
        latitude=50.0, n_columns=512, n_rows=7168, tdi_rows=256, density=50000.0, seed=11
    )
    sim = config["simulate"]
    sim["sky"] = {
        "sky_brightness": 20.8,
        "sky_ramp": 0.3,  # the sky brightens by 30 %: the column solve needs a changing sky
        "cloud_depth": CLOUD_DEPTH,
        "cloud_time": 0.5,
        "cloud_width": CLOUD_WIDTH,
    }
    sim["stars"] = {"density": 50000.0, "mag_bright": 15.0, "mag_faint": 22.5, "slope": 0.2}
    sim["reference"] = {"mag_limit": 21.0, "mag_error": 0.003, "colour_term": COLOUR_TERM}
    sim["actual"] = {
        "flat_error": {"first_column": FLAT_FIRST, "columns": FLAT_COLUMNS, "error": FLAT_ERROR}
    }
    config["stages"]["astrometry"] = {
        "reference": {
            "source": "file",
            "path": "raw/reference.ecsv",
            "columns": {"ra": "ra", "dec": "dec", "pm_ra": "pmra", "pm_dec": "pmdec",
                        "magnitude": "mag", "magnitude_error": "mag_error",
                        "colour": "colour", "identifier": "id"},
            "epoch": 2016.0,
        }
    }  # fmt: skip
    config["stages"]["zeropoint"] = {
        "knot_spacing": 8.0,  # follows a 25 s cloud (the fit's tests: 8 s knots)
        "fit_colour_term": True,
        "flat_bin_columns": 10,  # 20 bad columns hold at least one whole bin
    }
    return config


def simulate_and_reduce(path: Path):
    """Simulate the night of the config at ``path`` and reduce it; the run's report."""
    config = load_config(path)
    site, camera, options = config.site(), config.camera(), config.section("simulate")
    write_night(simulate_night(site, camera, options), Path(config.night.raw_dir))
    return run_night(config)


class Night:
    """The reduced night's products and its truth."""

    def __init__(self, path: Path, report):
        config = load_config(path)
        site, camera, options = config.site(), config.camera(), config.section("simulate")
        raw = Path(config.night.raw_dir)
        self.report = report
        self.truth = Table.read(raw / "truth.ecsv")
        self.photometry = self.truth.meta["photometry"]
        self.catalog = open_product(config, "zeropoint", "night", "catalog")
        self.zero_point = open_product(config, "zeropoint", "night", "zero_point")
        self.intervals = open_product(config, "zeropoint", "night", "intervals")
        self.star_flat = open_product(config, "zeropoint", "night", "star_flat")
        self.colour_term = open_product(config, "zeropoint", "night", "colour_term")
        self.problems = [p for r in report.results if r.stage == "zeropoint" for p in r.problems]
        # Truth row of each source, through its matched reference star's magnitude
        # (unique to 1e-5 mag: the reference magnitudes carry 0.015 mag of noise).
        reference = Table.read(raw / "reference.ecsv")
        id_of = {int(i): k for k, i in enumerate(self.truth["id"])}
        row_of = {
            round(float(m), 5): id_of[int(i)]
            for m, i in zip(reference["mag"], reference["id"], strict=True)
        }
        self.truth_row = np.array(
            [
                row_of.get(round(float(m), 5), -1)
                for m in np.nan_to_num(self.catalog["ref_mag"].value)
            ]
        )
        # The calibrated images are divided by the solved flat, normalised to mean 1 over
        # its reference columns: their electrons are the true ones times that mean of
        # the true response, a constant that belongs in the true zero point.
        model, _ = tdi_model(site, camera, options)
        response = column_properties(
            options, camera.n_columns, model.line_time, camera.tdi_rows
        ).response
        flat = np.asarray(open_product(config, "columns", "night", "columns")["flat"], float)
        good = np.isfinite(flat) & (flat > 0.5) & (response > 0.5)
        self.flat_scale = float(np.median(response[good] / flat[good]))
        self.response = response
        # The science images' headers (read as FITS: their WCS is not needed here).
        self.science_headers = [
            fits.getheader(night_dir(config) / "science" / str(stretch) / "image.fits", "FLUX")
            for stretch in self.intervals["stretch"]
        ]

    def true_zero_point(self, t):
        """Z(t) of the calibrated electrons: the simulator's plus the flat's scale."""
        return true_zero_point(t, self.photometry) + 2.5 * np.log10(self.flat_scale)


@pytest.fixture(scope="module")
def night(tmp_path_factory):
    folder = tmp_path_factory.mktemp("zeropoint_night")
    path = folder / "night.yaml"
    path.write_text(yaml.safe_dump(_config()))
    return Night(path, simulate_and_reduce(path))


def _bright(night, snr_min=100.0):
    """Catalogue rows of matched, unflagged stars above ``snr_min``, outside the bad band."""
    c = night.catalog
    snr = np.asarray(c["flux_psf"].value / c["flux_psf_err"].value)
    matched = night.truth_row >= 0
    column = np.asarray(night.truth["c_mean"], float)[night.truth_row]
    in_band = np.isin(np.rint(column), night.photometry["flat_error_columns"])
    keep = matched & (snr > snr_min) & (np.asarray(c["flags"]) == 0)
    return np.flatnonzero(keep & ~in_band), np.flatnonzero(keep & in_band)


def _flux_scale_mag(night):
    """2.5 log10 of detect's PSF flux over the true electrons, S/N > 100 (median).

    A constant scale of detect's fluxes goes into the zero point whole (it
    cancels in calibrated magnitudes); measured on this night: +0.0007 mag
    (+0.0004 to +0.0010 from S/N 20 to 1000).  It was +0.020 while detect's
    model left out rectify's resampling and the clocking top-hat and the
    simulator drew its Moffat with four Gaussians.
    """
    k, _ = _bright(night)
    j = night.truth_row[k]
    column = np.clip(np.rint(np.asarray(night.truth["c_mean"], float)[j]), 0, 511).astype(int)
    true = np.asarray(night.truth["flux_recorded"], float)[j] / night.response[column]
    measured = np.asarray(night.catalog["flux_psf"].value)[k] / night.flat_scale
    return 2.5 * np.log10(np.median(measured / true))


def _zero_point_error(night):
    t = np.asarray(night.zero_point["t"].value)
    error = np.asarray(night.zero_point["zero_point"].value) - night.true_zero_point(t)
    return t, error


def test_the_night_runs_through_with_only_the_zero_point_problems(night):
    """No unit fails; the problems are the zeropoint stage's (the cloud, the bad columns)."""
    assert not night.report.problems, night.report.format()
    stages = {r.stage for r in night.report.flagged}
    assert stages == {"zeropoint"}, night.report.format()


def test_column_times_are_the_stars_mid_crossing_times(night):
    """The x -> t map of every stage gives the truth's mid-crossing time.

    Tolerance 0.05 s, one line time (0.054 s): ``x`` is the recorded centroid's
    night row to within a fraction of a row on this short night (the slow drift
    of the frame of date is far below a row over 6 minutes); the 99th
    percentile leaves room for the few sources matched to the wrong truth star.
    """
    k = np.flatnonzero(night.truth_row >= 0)
    t = np.asarray(night.catalog["t"].value)[k]
    t_mid = np.asarray(night.truth["t_mid"], float)[night.truth_row[k]]
    assert np.percentile(np.abs(t - t_mid), 99) < 0.05


def test_zero_point_in_clear_stretches(night):
    """In clear stretches the zero point matches the truth to <= 0.005 mag (the issue).

    The truth is the simulator's zero point at the crossing-mean transparency,
    on the calibrated images' scale (the flat's normalisation).  Detect's PSF
    fluxes are the true electrons (their scale, which the zero point would
    absorb whole, within 0.002 mag: measured +0.0007, the median of ~330
    stars known to 0.0005), and the zero point meets the issue's 0.005 mag
    (measured 0.0043 at worst, the knots' noise).
    """
    t, error = _zero_point_error(night)
    ph = night.photometry
    clear = np.abs(t - ph["cloud_centre"]) > 4.0 * ph["cloud_width"]  # dip < 1e-3 mag
    assert clear.sum() > 100
    scale = _flux_scale_mag(night)
    print(f"flux scale {scale:+.4f} mag; clear: {np.abs(error[clear]).max():.4f} mag")
    assert abs(scale) <= 0.002
    assert np.abs(error[clear]).max() <= 0.005


def test_the_cloud_is_followed_and_flagged(night):
    """The cloud is followed to <= 0.01 mag outside its deepest 10 s; its stretches flagged.

    Followed: the zero point minus the truth within the issue's 0.01 mag
    (measured 0.0042) wherever the cloud dims by
    more than 1e-3 mag, except within 5 s of its deepest point.  Flagged: every
    stretch whose true zero point drops by more than the stage's ``max_drop``
    (0.1 mag) is flagged CLOUD in the intervals, in its sources' ``zp_flags``
    and in its science images' headers; stretches whose zero point drops by
    less than 0.02 mag are not.
    """
    t, error = _zero_point_error(night)
    ph = night.photometry
    distance = np.abs(t - ph["cloud_centre"])
    cloudy = (distance > 5.0) & (distance <= 4.0 * ph["cloud_width"])
    print(f"cloud: {np.abs(error[cloudy]).max():.4f} mag")
    assert np.abs(error[cloudy]).max() <= 0.01
    clear_level = ph["zero_point"]
    cloud = int(ZeroPointFlag.CLOUD)
    catalog_t = np.asarray(night.catalog["t"].value)
    zp_flags = np.asarray(night.catalog["zp_flags"])
    for k, row in enumerate(night.intervals):
        lo, hi = row["t_start"].value, row["t_stop"].value
        grid = np.linspace(lo, hi, 200)
        drop = clear_level - np.min(true_zero_point(grid, ph))
        inside = (catalog_t >= lo) & (catalog_t < hi)
        header = night.science_headers[k]
        if drop > 0.1:
            assert int(row["flags"]) & cloud, (k, drop)
            assert np.all(zp_flags[inside] & cloud), k
            assert header["ZPFLAGS"] & cloud, k
        elif drop < 0.02:
            assert int(row["flags"]) == 0, (k, drop)
            assert header["ZPFLAGS"] == 0, k
    assert any("CLOUD" in p for p in night.problems)


def test_colour_term_is_recovered(night):
    """The injected 0.1 mag/mag is recovered to <= 0.01 (the issue's figure)."""
    fitted = night.colour_term["colour_term"]
    assert abs(fitted - COLOUR_TERM) <= 0.01, night.colour_term
    # Its statistical error (~0.0013 here) is well below the figure.
    assert night.colour_term["colour_term_err"] < 0.005


def test_calibrated_magnitudes_of_bright_stars(night):
    """S/N > 100: <= 0.01 mag rms against the truth, no trend > 0.005 mag across the chip.

    The truth is the star's magnitude in the reference system (passband
    magnitude plus the colour term times its true colour), which the
    calibrated magnitudes are on.  Stars in the 20 columns whose star light the
    sky's flat misses are left out: that error is reported by the star flat,
    not corrected (the issue asks for it to show up).  The trend is the
    edge-to-edge change of a straight line fitted against ``y``.
    """
    k, _ = _bright(night)
    j = night.truth_row[k]
    truth_mag = (
        np.asarray(night.truth["mag"], float)[j]
        + night.photometry["colour_term"] * np.asarray(night.truth["colour"], float)[j]
    )
    error = np.asarray(night.catalog["mag"].value)[k] - truth_mag
    y = np.asarray(night.catalog["y"].value)[k]
    slope = np.polyfit(y, error, 1)[0]
    n_y = float(np.nanmax(night.catalog["y"].value))
    rms = float(np.sqrt(np.mean(error**2)))
    print(f"S/N > 100: {k.size} stars, rms {rms:.4f} mag, trend {slope * n_y:+.4f} mag")
    assert k.size > 200
    assert rms <= 0.01
    assert abs(slope * n_y) <= 0.005


def test_the_bad_columns_show_in_the_star_flat(night):
    """The 2 % flat-field error in 20 columns makes its star-flat bins deviant and reported.

    The band's rows ``y`` in the rectified frame are those of the truth stars
    in its columns; every bin of 10 rows wholly inside it is deviant (its
    offset near -0.021 mag, ~6 of its errors here), and no bin wholly outside
    it and its neighbouring bins is.
    """
    column = np.asarray(night.truth["c_mean"], float)[night.truth_row]
    in_band = (night.truth_row >= 0) & np.isin(
        np.rint(column), night.photometry["flat_error_columns"]
    )
    y = np.asarray(night.catalog["y"].value)[in_band]
    lo, hi = np.percentile(y, [5, 95])
    table = night.star_flat
    start = np.asarray(table["column_start"].value)
    stop = np.asarray(table["column_stop"].value)
    inside = np.flatnonzero((start >= lo) & (stop <= hi))
    near = (stop > lo - 10) & (start < hi + 10)
    deviant = set(table.meta["deviant"])
    assert inside.size >= 1 and set(inside) <= deviant, (lo, hi, deviant)
    assert not deviant - set(np.flatnonzero(near)), deviant
    offsets = np.asarray(table["offset"].value)[inside]
    # The light lost is 2.5 log10(0.98) = -0.022 mag; 0.01: about 3 bin errors.
    assert np.all(np.abs(offsets - 2.5 * np.log10(1 - FLAT_ERROR)) < 0.01), offsets
    assert any("star flat" in p and "deviant" in p for p in night.problems)
