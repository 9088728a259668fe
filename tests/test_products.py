"""The demo night's products: the README's Python section, the image format, the loaders.

One run of the demo night (on a copy) serves every test here: it is the
README's "Use from Python" code, saved as a script and run in a fresh
interpreter with astropy's default settings, as a user would.
"""

from __future__ import annotations

import io
import json
import re
import subprocess
import sys
import warnings
from pathlib import Path

import astropy
import astropy.units as u
import numpy as np
import pytest
from _demo import REPO, demo_copy
from _previous_layout import VALUES
from _tables import assert_same_table
from astropy.io import fits
from astropy.nddata import CCDData, VarianceUncertainty
from astropy.table import QTable, Table
from astropy.time import Time
from astropy.wcs import WCS
from packaging.version import Version

import pipeline
from pipeline import products
from pipeline.masks import MaskBit
from pipeline.products import flag_bits_from_header
from pipeline.runner._ecsv import write_ecsv
from pipeline.runner._store import read_product
from pipeline.stages.rectify import NO_DATA_BITS

#: CCDData.read loads a flag plane from astropy 8.0 on.
ASTROPY_READS_FLAGS = Version(astropy.__version__) >= Version("8.0")

#: Mask bits that mean "no data" in a calibrated stretch (pipeline/masks.py).
CALIBRATE_NO_DATA = MaskBit.NONFINITE | MaskBit.GAP | MaskBit.BAD_COLUMN


def _readme_code() -> str:
    readme = (REPO / "README.md").read_text(encoding="utf-8")
    section = readme[readme.index("### Use from Python") :]
    return re.search(r"```python\n(.*?)```", section, re.S).group(1)


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    """The demo night reduced by the README's Python section: (folder, its output)."""
    folder = tmp_path_factory.mktemp("demo")
    demo_copy(folder)
    script = folder / "use_from_python.py"
    script.write_text(_readme_code(), encoding="utf-8")
    result = subprocess.run(
        [sys.executable, "-W", "error", str(script)],
        cwd=folder,
        capture_output=True,
        text=True,
        timeout=600,
        check=False,
    )
    assert result.returncode == 0, result.stderr
    return folder, result.stdout


def _night(folder: Path) -> Path:
    return folder / "demo_products" / "demo-2026-10-15"


def _image_products(folder: Path) -> list[tuple[str, Path, dict]]:
    """(stage/unit, image file, sidecar) of every image product of the night."""
    found = []
    for sidecar_path in sorted(_night(folder).glob("*/*/_provenance.json")):
        sidecar = json.loads(sidecar_path.read_text())
        entry = sidecar["products"].get("image")
        if entry is not None:
            unit = f"{sidecar['stage']}/{sidecar['unit']}"
            found.append((unit, sidecar_path.parent / entry["file"], sidecar))
    return found


def test_readme_python_section_runs(demo):
    folder, out = demo
    lines = out.splitlines()
    # 18 units up to detect (ingest, columns and 4 stretches of column_stats,
    # calibrate, rectify, detect), the night-scoped catalog, astrometry and
    # zeropoint, 4 stretches of science, and the night's report.
    assert lines[0] == "night demo-2026-10-15: 26 units ran, 0 up to date, 0 failed, 0 blocked"
    assert "electron electron2 (1035, 1024)" in lines
    # The flag-based "no data" count is the number of NaN pixels of the image.
    image = pipeline.read_image(_night(folder) / "rectify/s0001/image.fits")
    assert f"{np.count_nonzero(np.isnan(image.data))} pixels without data" in lines
    assert lines[-1].startswith("electron ") and lines[-1].endswith(" flagged columns")


def test_every_fits_product_verifies(demo):
    folder, _ = demo
    files = sorted(_night(folder).glob("*/*/*.fits"))
    assert len(files) == 12  # calibrate, rectify and science, 4 stretches each
    for path in files:
        with fits.open(path) as hdul:
            hdul.verify("exception")  # astropy's FITS standard checks


def test_every_image_product_is_a_ccddata(demo):
    folder, _ = demo
    products = _image_products(folder)
    assert [unit for unit, _, _ in products] == [
        f"{stage}/s000{i}" for stage in ("calibrate", "rectify", "science") for i in range(4)
    ]
    # science images are in counts at a fixed zero point (test_zeropoint_stage.py)
    products = [entry for entry in products if not entry[0].startswith("science/")]
    for unit, path, sidecar in products:
        image = pipeline.read_image(path)
        assert isinstance(image, CCDData), unit
        assert image.unit == u.electron, unit
        assert isinstance(image.uncertainty, VarianceUncertainty), unit
        assert image.uncertainty.unit == u.electron**2, unit
        assert image.flags.dtype == np.uint16 and image.flags.shape == image.shape, unit
        no_data = CALIBRATE_NO_DATA if unit.startswith("calibrate") else NO_DATA_BITS
        nan = np.isnan(image.data)
        np.testing.assert_array_equal(nan, (image.flags & int(no_data)) != 0, err_msg=unit)
        np.testing.assert_array_equal(nan, np.isnan(image.uncertainty.array), err_msg=unit)
        # The flag names round-trip through the header (FLAGBITn cards).
        assert flag_bits_from_header(image.meta) == {b.name: int(b) for b in MaskBit}
        for key in ("TELESCOP", "INSTRUME", "FILTER", "DATE-OBS", "XPOSURE", "OBSGEO-X"):
            assert key in image.meta, (unit, key)
        # astropy's own reader with the documented extension names agrees
        # (astropy < 8 cannot load flags: "loading flags is currently not
        # supported"; measured with 7.2.0).
        flags = {"hdu_flags": "FLAGS"} if ASTROPY_READS_FLAGS else {}
        with warnings.catch_warnings():
            warnings.simplefilter("error")
            same = CCDData.read(path, hdu="FLUX", hdu_uncertainty="FLUXVAR", hdu_mask=None, **flags)
        np.testing.assert_array_equal(same.data, image.data)
        np.testing.assert_array_equal(same.uncertainty.array, image.uncertainty.array)
        assert isinstance(same.uncertainty, VarianceUncertainty) and same.unit == image.unit
        if ASTROPY_READS_FLAGS:
            np.testing.assert_array_equal(same.flags, image.flags)
        assert same.wcs.to_header() == image.wcs.to_header(), unit
        assert set(same.meta) <= set(image.meta), unit
        # The NIGHT grid (alternate WCS A) places the first pixel in the night.
        night = WCS(image.meta, key="A")
        assert night.wcs.name == "NIGHT"
        column, row = night.pixel_to_world_values(0, 0)
        if unit.startswith("calibrate"):
            assert (column, row) == (0.0, sidecar["stretch"]["lo"]), unit


def test_calibrate_time_axis_gives_each_rows_readout_time(demo):
    # The FITS WCS time axis (Rots et al. 2015, through astropy.wcs) against
    # the readout times the rows table lists (seconds since the block
    # index's reference time).  The axis is uniform; the rows table follows
    # each block's DATE-OBS, which the raw headers give to the millisecond:
    # rounding both ends sets the 1e-3 s (1/46 of a line time) tolerance
    # (measured 0.34 ms at block 1).
    folder, _ = demo
    config = pipeline.load_config(folder / "configs/demo_2026-10-15.yaml")
    for stretch in range(4):
        image = pipeline.open_product(config, "calibrate", stretch)
        rows = pipeline.open_product(config, "calibrate", stretch, "rows")
        reference = Time(rows.meta["reference_time"], scale="utc")
        picks = np.linspace(0, len(rows) - 1, 7).astype(int)
        with warnings.catch_warnings():
            warnings.simplefilter("error")
            times = [image.wcs.pixel_to_world(0, k)[1] for k in picks]
        seconds = [(t - reference).to_value(u.s) for t in times]
        np.testing.assert_allclose(seconds, np.asarray(rows["time"])[picks], rtol=0, atol=1e-3)
        # XPOSURE: the crossing time TDIROWS * LINETIME of the raw headers.
        index = pipeline.open_product(config, "ingest", "night", "block_index")
        crossing = index["tdi_rows"][0] * index["line_time"][0]
        assert image.meta["XPOSURE"] == pytest.approx(crossing, rel=1e-12)  # same float product
        assert image.meta["DATE-END"] > image.meta["DATE-BEG"] == image.meta["DATE-OBS"]


def test_rectify_stretches_tile_the_night_grid(demo):
    # The NIGHT grid of adjacent rectify stretches: each starts where the
    # previous one ended, along the scan.  Their celestial WCS is one grid:
    # a pixel's position is the same through either stretch's WCS (to 1e-9
    # deg, float precision of the CRPIX/CRVAL arithmetic).
    folder, _ = demo
    config = pipeline.load_config(folder / "configs/demo_2026-10-15.yaml")
    images = [pipeline.open_product(config, "rectify", i) for i in range(4)]
    starts = [WCS(image.meta, key="A").pixel_to_world_values(0, 0)[0] for image in images]
    for image, start, following in zip(images, starts, starts[1:], strict=False):
        assert start + image.shape[1] == following
    first, second = images[0], images[1]
    width = first.shape[1]
    ra1, dec1 = first.wcs.pixel_to_world_values(width, 10)
    ra2, dec2 = second.wcs.pixel_to_world_values(0, 10)
    assert ra1 == pytest.approx(ra2, abs=1e-9) and dec1 == pytest.approx(dec2, abs=1e-9)


# Tolerances against the previous layout (tests/_previous_layout.py):
#: Image summaries: float32 planes (eps 6e-8) summed over ~1e6 pixels in
#: float64.  A change of the IERS tables' UT1-UTC by 0.05 s (about a year of
#: IERS-A prediction error, from memory) moves the rectify summaries by 1e-10
#: (measured by shifting the bundled table's UT1-UTC and rectifying stretch 1
#: again: the frame follows the geometry; only the WCS's CRVAL moves, by
#: 0.75 arcsec), so the sky geometry does not set this tolerance.
IMAGE_RTOL = 1e-6
#: Rectify summaries with the oldest dependencies the package allows
#: (astropy 7.2.0, astropy-iers-data 0.2025.10.27, whose UT1-UTC prediction
#: for the demo night is 0.17 s off) differ by up to 1.9e-5 (measured, image
#: sum of s0000; smear-kernel sums by 8e-7): the geometry of date moves
#: stars across the stretch's edges and changes the kernels slightly.  The
#: calibrate summaries do not depend on the geometry.
RECTIFY_RTOL = 1e-4
#: Table sums: float64 columns, values stored rounded to 10 digits (5e-10).
TABLE_RTOL = 1e-8


def _summary(image: CCDData) -> dict:
    data = np.asarray(image.data, dtype=np.float64)
    variance = np.asarray(image.uncertainty.array, dtype=np.float64)
    finite = np.isfinite(data)
    flags = np.asarray(image.flags)
    bits = {b: int(((flags >> b) & 1).sum()) for b in range(16)}
    return {
        "shape": list(data.shape),
        "n_nan": int((~finite).sum()),
        "image_sum": data[finite].sum(),
        "variance_sum": variance[np.isfinite(variance)].sum(),
        "image_quantiles": np.quantile(data[finite], [0.01, 0.5, 0.99]),
        "bit_counts": {b: n for b, n in bits.items() if n},
    }


def test_products_keep_the_previous_layouts_values(demo):
    folder, _ = demo
    config = pipeline.load_config(folder / "configs/demo_2026-10-15.yaml")
    for stage in ("calibrate", "rectify"):
        for stretch in range(4):
            key = f"{stage}/s000{stretch}"
            old = VALUES[key]
            image = pipeline.open_product(config, stage, stretch)
            new = _summary(image)
            assert new["shape"] == old["shape"] and new["n_nan"] == old["n_nan"], key
            # Integer decisions (thresholds): a changed count means changed pixels.
            assert new["bit_counts"] == old["bit_counts"], key
            rtol = IMAGE_RTOL if stage == "calibrate" else RECTIFY_RTOL
            for name in ("image_sum", "variance_sum", "image_quantiles"):
                np.testing.assert_allclose(new[name], old[name], rtol=rtol, err_msg=key)
            if stage == "calibrate":
                rows = pipeline.open_product(config, stage, stretch, "rows")
                for column in ("bias", "time"):
                    total = np.nansum(rows[column])
                    assert total == pytest.approx(old[f"rows_{column}_sum"], rel=TABLE_RTOL)
            else:
                night = WCS(image.meta, key="A")
                assert night.pixel_to_world_values(0, 0)[0] == old["x_start"], key
                kernels = pipeline.open_product(config, stage, stretch, "smear_kernels")
                for column in ("length", "bow"):
                    total = np.sum(kernels[column])
                    assert total == pytest.approx(old[f"kernel_{column}_sum"], rel=RECTIFY_RTOL)
    index = pipeline.open_product(config, "ingest", "night", "block_index")
    for column, total in VALUES["ingest/block_index"].items():
        assert np.sum(index[column]) == pytest.approx(total, rel=TABLE_RTOL), column
    columns = pipeline.open_product(config, "columns", "night", "columns")
    for column, total in VALUES["columns/columns"].items():
        assert np.nansum(columns[column]) == pytest.approx(total, rel=TABLE_RTOL), column
    for stretch in range(4):
        stats = pipeline.open_product(config, "column_stats", stretch)
        old = VALUES[f"column_stats/s000{stretch}"]
        assert np.nansum(stats["level"]) == pytest.approx(old["level_sum"], rel=TABLE_RTOL)
        assert np.nansum(stats["scatter"]) == pytest.approx(old["scatter_sum"], rel=TABLE_RTOL)


#: Units of the table columns that have one (the issue's list and the stages' docs).
TABLE_UNITS = {
    ("ingest", "block_index"): {
        "gain": "electron / adu",
        "read_noise": "electron",
        "saturation": "adu",
        "t_start": "s",
        "line_time": "s",
    },
    ("calibrate", "rows"): {"time": "s", "bias": "adu"},
    ("column_stats", "column_stats"): {
        "time": "s",
        "read_noise": "electron",
        "level": "electron",
        "scatter": "electron",
    },
    ("columns", "columns"): {"dark": "electron", "dark_error": "electron"},
    ("rectify", "smear_kernels"): {"x": "pix", "y": "pix", "dx": "pix", "length": "pix"},
}


def test_table_columns_carry_units(demo):
    folder, _ = demo
    config = pipeline.load_config(folder / "configs/demo_2026-10-15.yaml")
    for (stage, name), units in TABLE_UNITS.items():
        unit = "night" if stage in ("ingest", "columns") else 0
        table = pipeline.open_product(config, stage, unit, name)
        assert isinstance(table, Table)
        for column, expected in units.items():
            assert table[column].unit == u.Unit(expected), (stage, name, column)
    for name, units in (
        ("reference.ecsv", {"ra": "deg", "pmra": "mas / yr", "mag": "mag", "epoch": "yr"}),
        ("truth.ecsv", {"ra": "deg", "flux": "electron", "r_mean": "pix", "t_mid": "s"}),
    ):
        table = Table.read(REPO / "demo_frames" / name)
        for column, expected in units.items():
            assert table[column].unit == u.Unit(expected), (name, column)


def test_every_table_product_is_astropy_s_ecsv(demo, tmp_path):
    """The store writes and reads its tables on fast paths (pipeline/runner/_ecsv.py);
    astropy's ECSV writer and reader are the reference: the store reads each
    table product of the demo night to the table astropy reads, and writes
    that table to the bytes astropy writes (tests/test_ecsv.py for the rest)."""
    folder, _ = demo
    paths = sorted(_night(folder).glob("*/*/*.ecsv"))
    catalogues = [path for path in paths if path.name == "catalog.ecsv"]
    assert len(catalogues) >= 7, paths  # detect's four, catalog, astrometry, zeropoint
    for path in paths:
        sidecar = json.loads((path.parent / "_provenance.json").read_text(encoding="utf-8"))
        entry = next(e for e in sidecar["products"].values() if e["file"] == path.name)
        cls = QTable if entry.get("class") == "QTable" else Table
        theirs = cls.read(path, format="ascii.ecsv")
        assert_same_table(read_product(path, entry), theirs)
        stream = io.StringIO()
        theirs.write(stream, format="ascii.ecsv")
        write_ecsv(theirs, tmp_path / "ours.ecsv")
        assert (tmp_path / "ours.ecsv").read_bytes() == stream.getvalue().encode(), path


def test_a_one_pass_astrometry_reads_one_image_header(demo):
    """The demo night is solved in one pass: astrometry reads the first stretch's image
    for its pixel scale and no other image (each is checked against its SHA-256
    whole before its header is read: 1.3 GB on the issue's 4096-column night)."""
    folder, _ = demo
    sidecar = json.loads(
        (_night(folder) / "astrometry/night/_provenance.json").read_text(encoding="utf-8")
    )
    images = [name for name in sidecar["read"] if name.startswith("rectify/")]
    assert [name.rsplit("/", 1)[1] for name in images].count("image.fits") == 1, images


def test_open_product_says_what_is_missing(demo):
    folder, _ = demo
    config = pipeline.load_config(folder / "configs/demo_2026-10-15.yaml")
    with pytest.raises(ValueError, match=r"has no product 'nope'; it has .*rows"):
        pipeline.open_product(config, "calibrate", 0, "nope")
    with pytest.raises(ValueError, match="no complete products"):
        pipeline.open_product(config, "calibrate", 9)


def test_public_api_is_documented():
    # Every public name resolves and is described in the package docstring.
    names = [name for name in pipeline.__all__ if name != "__version__"]
    assert {"load_config", "run_night", "night_status", "open_product"} <= set(names)
    for name in names:
        assert callable(getattr(pipeline, name)), name
        assert f":func:`{name}`" in pipeline.__doc__, name


# ------------------------------------------------------ metadata on analytic cases


def _index(line_time: float = 0.05, tdi_rows: int = 100) -> Table:
    """Two blocks of 100 rows with a 50-row gap between them (rows 100-149)."""
    return Table(
        {
            "row_start": [0, 150],
            "n_rows": [100, 100],
            "t_start": [0.0, 150 * line_time],
            "line_time": [line_time, line_time],
            "tdi_rows": [tdi_rows, tdi_rows],
            "filter": ["r", "r"],
        },
        meta={"reference_time": "2026-10-15T18:52:00.000"},
    )


def test_row_times_follow_the_block_clocks():
    from pipeline.stages._observation import row_times

    # Rows 50-199: read from 2.5 s (row 50) to 9.95 s (row 199); the first
    # charge of row 50 was collected one crossing (100 x 0.05 s) earlier.
    times = row_times(_index(), 50, 200)
    assert times.first == pytest.approx(2.5, abs=1e-12)  # float sums of 0.05
    assert times.start == pytest.approx(2.5 - 5.0, abs=1e-12)
    assert times.stop == pytest.approx(9.95, abs=1e-12)
    assert times.exposure == pytest.approx(5.0, rel=1e-12) and times.filter_name == "r"
    # Rows entirely in the gap keep the earlier block's clock.
    gap = row_times(_index(), 110, 140)
    assert (gap.first, gap.stop) == pytest.approx((5.5, 6.95), abs=1e-12)


def test_observation_header_is_standard_fits_time_and_site():
    # Read back through astropy.wcs (WCSLIB's time and observatory keywords):
    # no fix-up warning, and the times and site astropy sees are ours.
    from astropy.coordinates import EarthLocation

    from pipeline.geometry import Camera, Site
    from pipeline.products import observation_header

    site = Site(latitude=-31.0, longitude=-70.5, height=2400.0, name="Test site")
    camera = Camera(n_columns=10, tdi_rows=100, pixel_size=15.0, focal_length=6.0)
    reference = Time("2026-10-15T18:52:00", scale="utc")
    header = observation_header(
        reference_time=reference,
        start=-5.0,
        stop=10.0,
        exposure=5.0,
        site=site,
        camera=camera,
        filter_name="r",
    )
    header["WCSAXES"] = 1
    header["CTYPE1"] = "TIME"
    header["CUNIT1"] = "s"
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        wcs = WCS(header)
    begin = Time(wcs.wcs.mjdbeg, format="mjd", scale="utc")
    assert abs((begin - reference).to_value(u.s) + 5.0) < 1e-6  # float MJD: ~1 us
    assert header["TELAPSE"] == 15.0 and header["XPOSURE"] == 5.0
    # OBSGEO-X/Y/Z: astropy's WGS84 geocentric position of the site, to 1 mm.
    location = EarthLocation.from_geodetic(-70.5 * u.deg, -31.0 * u.deg, 2400.0 * u.m)
    geocentric = [c.to_value(u.m) for c in location.to_geocentric()]
    np.testing.assert_allclose(wcs.wcs.obsgeo[:3], geocentric, atol=1e-3)
    assert header["OBSERVAT"] == "Test site" and header["TELESCOP"] == "unnamed telescope"
    with pytest.raises(ValueError, match="must not precede"):
        observation_header(
            reference_time=reference, start=1.0, stop=0.0, exposure=None, site=site, camera=camera
        )


def test_the_demo_night_is_solved_in_one_pass(demo):
    """The demo's config is its camera: the first solution's smear kernels differ from
    rectify's by less than the bright stars' centroid noise, or by less than 3
    sigma of the fit's own uncertainty, so detect does not measure the night
    again (self-consistency; pipeline/stages/astrometry/_second_pass.py).
    Measured 0.17 +- 0.29 px against 0.02 px of noise: the focal length and
    distortion of 275 stars on a narrow chip are that uncertain."""
    folder, _ = demo
    parameters = Table.read(_night(folder) / "astrometry/night/parameters.ecsv")
    (only,) = parameters.meta["passes"]
    change = only["kernel_change_px"]
    assert change <= only["threshold_px"] or change <= 3 * only["kernel_change_error_px"], only
    assert only["next"] == "none"


@pytest.mark.parametrize("read_bytes", [4 << 20, 3 * 2 * 37, 1])
@pytest.mark.parametrize("columns", [slice(0, 5), slice(30, 37), slice(12, 20), slice(35, 99)])
def test_plane_columns_match_astropy(tmp_path, monkeypatch, read_bytes, columns):
    # The reference is astropy's own reading of the planes (``.data``): the
    # strips hold the same values and dtypes, float32 and the flags' uint16
    # (stored as int16 with BZERO = 32768, FITS Standard 4.0 sec. 5.2.5),
    # whether read in one piece, a few rows (3 * 2 * 37: three rows of int16)
    # or one row at a time.
    monkeypatch.setattr(products, "_READ_BYTES", read_bytes)
    rng = np.random.default_rng(5)
    image = rng.normal(size=(23, 37)).astype(np.float32)
    flags = rng.integers(0, 65536, size=(23, 37)).astype(np.uint16)
    path = tmp_path / "planes.fits"
    fits.HDUList(
        [fits.PrimaryHDU(), fits.ImageHDU(image, name="FLUX"), fits.ImageHDU(flags, name="FLAGS")]
    ).writeto(path)
    with fits.open(path, memmap=False, lazy_load_hdus=True) as hdul:
        for name, plane in (("FLUX", image), ("FLAGS", flags)):
            strip = products.plane_columns(hdul[name], columns)
            assert strip.dtype == plane.dtype
            np.testing.assert_array_equal(strip, plane[:, columns])
    # in memory (no file): the same strips, sliced
    memory = fits.ImageHDU(flags, name="FLAGS")
    np.testing.assert_array_equal(products.plane_columns(memory, columns), flags[:, columns])


def test_plane_columns_of_unsigned_flags_match_astropy(tmp_path, monkeypatch):
    # The flags' strip is read raw and only its pixels converted (int16 less
    # BZERO = 32768, wrapping: FITS Standard 4.0 sec. 5.2.5); astropy's
    # ``.data`` is the reference, with the extreme values, read four rows at a
    # time through astropy's handle, whose position is left as it was.
    monkeypatch.setattr(products, "_READ_BYTES", 2 * 41 * 4)
    rng = np.random.default_rng(6)
    flags = rng.integers(0, 65536, size=(31, 41)).astype(np.uint16)
    flags[0, :4] = [0, 65535, 32768, 32767]
    path = tmp_path / "flags.fits"
    fits.HDUList([fits.PrimaryHDU(), fits.ImageHDU(flags, name="FLAGS")]).writeto(path)
    with fits.open(path, memmap=False, lazy_load_hdus=True) as hdul:
        handle = hdul["FLAGS"].fileinfo()["file"]
        handle.seek(5)
        for columns in (slice(0, 4), slice(37, 41), slice(10, 11)):
            strip = products.plane_columns(hdul["FLAGS"], columns)
            assert strip.dtype == np.uint16
            np.testing.assert_array_equal(strip, flags[:, columns])
            assert handle.tell() == 5
        np.testing.assert_array_equal(hdul["FLAGS"].data, flags)


def test_plane_columns_rejects_a_step(tmp_path):
    path = tmp_path / "plane.fits"
    fits.HDUList([fits.PrimaryHDU(), fits.ImageHDU(np.zeros((4, 6), np.float32))]).writeto(path)
    with (
        fits.open(path, memmap=False, lazy_load_hdus=True) as hdul,
        pytest.raises(ValueError, match="contiguous columns"),
    ):
        products.plane_columns(hdul[1], slice(0, 6, 2))


def test_the_night_grid_of_a_product_with_a_sip_wcs_stays_linear():
    """A science product's primary WCS is TAN-SIP (astrometry's solution); its
    NIGHT grid (alternate WCS A) is linear: night = CRVAL + CDELT (p - CRPIX)
    (FITS WCS standard, Greisen & Calabretta 2002, A&A 395, 1061, eq. 3, via
    astropy.wcs). The SIP convention (Shupe et al. 2005) has no alternate
    keys, but astropy builds every WCS of the header with the SIP cards,
    so WCS(header, key='A') put the night grid of a simulated night's science
    product up to 21 px off; night_grid_wcs leaves them out."""
    from astropy.wcs import Sip

    sip = WCS(naxis=2)
    sip.wcs.ctype = ["RA---TAN-SIP", "DEC--TAN-SIP"]
    sip.wcs.crval = [217.6, 45.1]
    sip.wcs.crpix = [2048.5, 518.0]
    sip.wcs.cd = [[1.43e-4, 3e-7], [-3e-7, 1.43e-4]]
    a = np.zeros((4, 4))
    b = np.zeros((4, 4))
    a[1, 1], b[2, 0] = -2.5e-6, 1.25e-6  # the size of the simulated night's terms
    sip.sip = Sip(a, b, None, None, sip.wcs.crpix)
    header = sip.to_header(relax=True)
    header.update(products.night_grid_header(12288, 40, ("X", "Y"), ("along", "across")))
    pixels = np.array([[0.0, 0.0], [4095.0, 1034.0], [2048.0, 517.0]])
    night = products.night_grid_wcs(header).all_pix2world(pixels, 0)  # distortions included
    # float64 rounding only: a linear axis with unit CDELT
    np.testing.assert_allclose(night, pixels + np.array([12288.0, 40.0]), atol=1e-9)
    assert "A_ORDER" in header  # the product's own WCS is untouched
    with pytest.raises(ValueError, match="no NIGHT grid"):
        products.night_grid_wcs(sip.to_header(relax=True))
