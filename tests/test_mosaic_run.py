"""Mosaics through the runner: config, tiles as units, reruns, executors, products, CLI."""

from __future__ import annotations

import json
import os
import warnings
from pathlib import Path

import numpy as np
import pytest
import yaml
from astropy.io import fits
from astropy.table import QTable, Table
from astropy.wcs import WCS, FITSFixedWarning
from astropy.wcs.utils import proj_plane_pixel_scales

from pipeline.cli import EXIT_FAILED, EXIT_INCOMPLETE, EXIT_OK, EXIT_USAGE, main
from pipeline.exceptions import ConfigError
from pipeline.mosaic import (
    TILE_EXTENSIONS,
    load_mosaic_config,
    night_image_from_hdulist,
    quicklook_png,
)
from pipeline.mosaic._products import _binned
from pipeline.runner import mosaic_dir, mosaic_nights, mosaic_status, run_mosaic
from pipeline.runner._mosaic import current_layout
from pipeline.runner._store import (
    PNG_SIGNATURE,
    read_product,
    read_sidecar,
    write_products,
    write_sidecar,
)
from tests._mosaic_nights import (
    DEC,
    NIGHTS,
    PHOTZP,
    STARS,
    TILE_SIZE,
    ra_of,
    tiling,
    write_nights,
    write_science,
)

#: Detection on 48-pixel tiles: a background mesh and filter bands that fit in them.
#: The scenes' stars are Gaussians (tests/_mosaic_nights.py).
DETECT = {"background_box": 16, "filter_band": 16, "seeing_shape": "gaussian"}


@pytest.fixture(scope="module")
def nights(tmp_path_factory):
    """The five nights' product folders (written once; tests that change one copy them)."""
    return write_nights(tmp_path_factory.mktemp("products"))


def write_config(folder, nights, run=None, **sections) -> str:
    data = {
        "mosaic": {"name": "strip", "output_dir": "out", "nights": [str(p) for p in nights]},
        "tiling": tiling(),
        "detect": DETECT,
        "run": run or {"executor": "serial"},
        **sections,
    }
    path = folder / "mosaic.yaml"
    path.write_text(yaml.safe_dump(data, sort_keys=False))
    return str(path)


def ran(report) -> list[str]:
    return sorted(r.unit for r in report.results if r.status == "ran")


def product_digests(config) -> dict[str, dict[str, str]]:
    folder = mosaic_dir(config) / "tiles"
    return {
        unit.name: {n: e["sha256"] for n, e in read_sidecar(unit)["products"].items()}
        for unit in sorted(folder.iterdir())
    }


# ------------------------------------------------------------------------ the config


def test_a_mosaic_config_resolves_paths_against_its_file(tmp_path, nights):
    relative = [os.path.relpath(p, tmp_path) for p in nights]
    config = load_mosaic_config(write_config(tmp_path, relative), ["coadd.max_seeing=3"])
    assert config.mosaic.output_dir == tmp_path / "out"
    assert config.mosaic.nights == tuple(nights)
    assert config.coadd.max_seeing == 3.0 and config.detect.background_box == 16
    # a tile's model blends nights: no pair splitting unless asked (its detect
    # section here does not name it)
    assert not config.detect.split_pairs
    assert not load_mosaic_config(write_config(tmp_path, relative)).detect.split_pairs
    asked = load_mosaic_config(write_config(tmp_path, relative), ["detect.split_pairs=true"])
    assert asked.detect.split_pairs
    assert len(config.tiling.tiles) == 3


@pytest.mark.parametrize(
    ("change", "match"),
    [
        ({"tiling": {**tiling(), "tile_widht": 64}}, r"tiling\.tile_widht: unknown key; did you"),
        ({"coadd": {"max_seeing": -1}}, r"coadd\.max_seeing: .*greater than 0"),
        ({"coadd": {"ignore_flags": ["SATURATD"]}}, r"unknown flag name"),
        ({"detect": {"threshold_sgima": 5}}, r"detect\.threshold_sgima: unknown key"),
        ({"run": {"executor": "local", "scheduler": "tcp://h:1"}}, r"scheduler .* is set"),
        ({"tiling": {**tiling(), "tiles": []}}, r"layout 'explicit' needs at least one"),
        ({"mosaic": {"name": "strip", "output_dir": "out"}}, r"mosaic\.nights: missing"),
        ({"extra": 1}, r"extra: unknown key"),
    ],
)
def test_mistakes_in_a_mosaic_config_are_errors_that_say_where(tmp_path, nights, change, match):
    path = tmp_path / "mosaic.yaml"
    data = yaml.safe_load(Path(write_config(tmp_path, nights)).read_text())
    path.write_text(yaml.safe_dump({**data, **change}, sort_keys=False))
    with pytest.raises(ConfigError, match=match) as info:
        load_mosaic_config(path)
    assert str(path) in str(info.value)  # the file (and line) of the mistake


def test_nights_must_exist_and_be_configs_or_folders(tmp_path, nights, capsys):
    (tmp_path / "notes.txt").write_text("x")
    for entry, match in [
        (tmp_path / "nowhere", "no such night config or product folder"),
        (tmp_path / "notes.txt", "is a .yaml/.yml config or a product folder"),
        (nights[0], "nights listed twice"),
    ]:
        path = write_config(tmp_path, [*nights, entry])
        with pytest.raises(ConfigError, match=match):
            load_mosaic_config(path)
    assert main(["mosaic", path]) == EXIT_USAGE
    good = write_config(tmp_path, nights)
    assert main(["mosaic", good, "--status", "--force"]) == EXIT_USAGE
    assert main(["mosaic", good, "--tiles", "7"]) == EXIT_USAGE  # the mosaic has tiles 0-2
    capsys.readouterr()
    assert main(["mosaic", good, "--tiles", "1,x"]) == EXIT_USAGE
    error = capsys.readouterr().err
    assert "--tiles" in error and "cannot read 'x'" in error and "stretches" not in error


# ------------------------------------------------------------ runs, reruns, executors


def test_a_rerun_skips_the_tiles_and_a_changed_night_reruns_only_the_tiles_it_touches(
    tmp_path, nights, capsys
):
    # a copy of the folders: one night's product is rewritten below
    import shutil

    copies = []
    for folder in nights:
        shutil.copytree(folder, tmp_path / "products" / folder.name)
        copies.append(tmp_path / "products" / folder.name)
    config = load_mosaic_config(write_config(tmp_path, copies))
    first = run_mosaic(config)
    assert first.ok, first.format()
    assert ran(first) == ["tile000", "tile001", "tile002"]
    again = run_mosaic(config)
    assert ran(again) == [] and again.count("skipped") == 3
    assert mosaic_status(config).complete
    # night n3's second stretch (only tile002's) changes: only tile002 is rebuilt
    write_science(tmp_path / "products", NIGHTS[2], "s0001", bump=5.0)
    status = mosaic_status(config)
    assert status.tiles["tile002"] == ("stale", "inputs changed: n3/s0001")
    assert [status.tiles[t][0] for t in ("tile000", "tile001")] == ["done", "done"]
    assert ran(run_mosaic(config)) == ["tile002"]
    # a run killed while writing tile001 left no sidecar: the next run resumes there
    (mosaic_dir(config) / "tiles" / "tile001" / "_provenance.json").unlink()
    assert mosaic_status(config).tiles["tile001"] == ("missing", "")
    assert ran(run_mosaic(config)) == ["tile001"]
    # a tile's file removed by hand: damaged and named, rebuilt as it was, reported
    built = product_digests(config)
    (mosaic_dir(config) / "tiles" / "tile000" / "catalog.ecsv").unlink()
    lost = "catalog.ecsv is gone since its unit was made (removed or renamed by hand?)"
    assert mosaic_status(config).tiles["tile000"] == ("damaged", lost)
    repaired = run_mosaic(config)
    assert ran(repaired) == ["tile000"] and not repaired.ok
    assert repaired.damaged == [f"tiles/tile000: {lost} (recomputed)"]
    assert product_digests(config) == built
    # a changed co-add option changes every tile
    changed = load_mosaic_config(config_path := write_config(tmp_path, copies), ["coadd.grow=2"])
    assert {s for s, _ in mosaic_status(changed).tiles.values()} == {"stale"}
    assert main(["mosaic", config_path, "--status"]) == EXIT_OK
    assert main(["mosaic", config_path, "--status", "--set", "coadd.grow=2"]) == EXIT_INCOMPLETE
    capsys.readouterr()
    assert main(["mosaic", config_path, "--tiles", "1", "--set", "coadd.grow=2"]) == EXIT_OK
    assert f"tiles: {mosaic_dir(changed) / 'tiles'}\n" in capsys.readouterr().out  # where to look
    assert mosaic_status(changed).tiles["tile001"][0] == "done"


def test_three_tiles_of_five_nights_on_dask_are_identical_to_the_local_pool(
    tmp_path, nights, dask_cluster
):
    digests = {}
    for name, run in [
        ("pool", {"executor": "local", "workers": 1}),  # one process: the machine is small
        ("dask", {"scheduler": dask_cluster.scheduler_address}),
    ]:
        (tmp_path / name).mkdir()
        config = load_mosaic_config(write_config(tmp_path / name, nights, run=run))
        report = run_mosaic(config)
        assert report.ok, report.format()
        assert ran(report) == ["tile000", "tile001", "tile002"]
        digests[name] = product_digests(config)
    # every product file (FITS, catalogue, night table, PNG) byte for byte
    assert digests["dask"] == digests["pool"]


# ------------------------------------------------------------------- the products


@pytest.fixture(scope="module")
def built(tmp_path_factory, nights):
    folder = tmp_path_factory.mktemp("built")
    config = load_mosaic_config(write_config(folder, nights))
    report = run_mosaic(config)
    assert report.ok, report.format()
    return config


def test_a_tile_file_has_its_planes_wcs_zero_point_inputs_and_config(built):
    with fits.open(mosaic_dir(built) / "tiles" / "tile002" / "tile.fits") as hdul:
        assert [h.name for h in hdul[1:]] == list(TILE_EXTENSIONS)
        primary = hdul[0].header
        assert primary["PHOTZP"] == PHOTZP and primary["NNIGHTS"] == len(NIGHTS)
        # every night's ZPERR is 0.01: the co-add's lies between 0.01 / sqrt(5)
        # (equal weights) and 0.01 (one night); tests/test_mosaic_errors.py has the rule
        assert 0.01 / np.sqrt(len(NIGHTS)) <= primary["ZPERR"] < 0.01
        # and every night's WCS error in Dec is 10 mas (CSYER2, in degrees): alike
        dec_error = primary["CSYER2"] * 3.6e6
        assert 10.0 / np.sqrt(len(NIGHTS)) <= dec_error < 10.0 and primary["CSYER1"] == 0.0
        # tile002 is touched by the second stretch of every night only
        assert [primary[f"INPUT{i + 1}"] for i in range(primary["NINPUTS"])] == [
            f"{night[0]}/s0001" for night in NIGHTS
        ]
        assert json.loads(primary["MOSCONF"])["detect"]["background_box"] == 16
        for hdu in hdul[1:]:
            assert hdu.data.shape == (TILE_SIZE, TILE_SIZE)
            # FITS WCS standard (Calabretta & Greisen 2002): the tile centre is the
            # centre given in the config
            wcs = WCS(hdu.header)
            ra, dec = wcs.pixel_to_world_values((TILE_SIZE - 1) / 2, (TILE_SIZE - 1) / 2)
            assert (ra, dec) == pytest.approx((ra_of(50.0), DEC), abs=1e-9)
        assert hdul["COVERAGE"].data.max() == len(NIGHTS)


def test_the_tile_catalogues_hold_the_stars_at_their_magnitudes_and_positions(built):
    for (x, y, mag), name in zip(STARS, ("tile000", "tile001", "tile002"), strict=True):
        catalog = QTable.read(mosaic_dir(built) / "tiles" / name / "catalog.ecsv")
        assert len(catalog) == 1
        star = catalog[0]
        # The model is the nights' Gaussians mixed with their weights (the scene's
        # family), exact up to noise: S/N 95-120 gives 0.01 mag sigma, 0.03 is
        # 3 sigma (measured -0.006, -0.003, +0.007; one Gaussian fitted to the
        # co-add of nights in 1.6-3.5 arcsec seeing missed by up to 0.04 mag).
        assert star["mag"].value == pytest.approx(mag, abs=0.03)
        # positions through the tile's WCS: within 0.05 arcsec at S/N ~ 100 (its
        # centroid error is ~ FWHM / S/N = 0.02 arcsec)
        assert star["ra"].value == pytest.approx(ra_of(x), abs=0.05 / 3600 / np.cos(0.87))
        assert star["dec"].value == pytest.approx(DEC + y / 3600, abs=0.05 / 3600)


def test_the_night_tables_of_every_tile_for_a_report(built):
    table = mosaic_nights(built)
    assert len(table) == 3 * len(NIGHTS)
    assert list(table["tile"][:: len(NIGHTS)]) == ["tile000", "tile001", "tile002"]
    assert set(table["night"]) == {n[0] for n in NIGHTS}


def test_the_night_table_and_quick_look_of_a_tile(built):
    folder = mosaic_dir(built) / "tiles" / "tile000"
    nights = Table.read(folder / "nights.ecsv")
    assert list(nights["night"]) == [n[0] for n in NIGHTS]
    assert list(nights["seeing"]) == [n[1] for n in NIGHTS]
    assert all(nights["used"])
    png = (folder / "quicklook.png").read_bytes()
    assert png.startswith(PNG_SIGNATURE)
    # PNG specification, section 11.2.2: IHDR holds width then height, big-endian
    assert int.from_bytes(png[16:20], "big") == TILE_SIZE
    assert int.from_bytes(png[20:24], "big") == TILE_SIZE


def test_a_large_tile_has_a_binned_quick_look():
    image = np.arange(60 * 100, dtype=float).reshape(60, 100)
    png = quicklook_png(image, max_size=32)  # 100 px -> blocks of 4 -> 25 x 15
    assert (int.from_bytes(png[16:20], "big"), int.from_bytes(png[20:24], "big")) == (25, 15)
    # the mean of each block of a ramp is the ramp at the block centre; NaN is ignored
    image[:2, :2] = np.nan
    binned = _binned(image, 4)
    assert binned[1, 1] == image[4:8, 4:8].mean()
    assert binned[0, 0] == np.nanmean(image[:4, :4])
    assert binned.shape == (15, 25)


def test_a_png_product_goes_through_the_store_and_other_bytes_do_not(tmp_path):
    png = quicklook_png(np.ones((8, 8)))
    entries = write_products(tmp_path, {"look": png}, {})
    assert entries["look"]["file"] == "look.png"
    assert read_product(tmp_path / "look.png", entries["look"]) == png
    with pytest.raises(TypeError, match="the bytes of a PNG image"):
        write_products(tmp_path, {"other": b"GIF89a"}, {})


def test_nights_beyond_the_seeing_limit_are_left_out_and_listed(tmp_path, nights):
    config = load_mosaic_config(write_config(tmp_path, nights), ["coadd.max_seeing=3.0"])
    report = run_mosaic(config, tiles=[1])
    assert report.ok and ran(report) == ["tile001"]
    folder = mosaic_dir(config) / "tiles" / "tile001"
    table = Table.read(folder / "nights.ecsv")
    left_out = table[~table["used"]]
    assert list(left_out["night"]) == ["n5"] and "max_seeing" in left_out["reason"][0]
    assert fits.getheader(folder / "tile.fits")["NNIGHTS"] == len(NIGHTS) - 1


def test_a_night_with_failed_science_is_a_problem_of_the_run(tmp_path, nights):
    import shutil

    broken = tmp_path / "products" / "n9"
    shutil.copytree(nights[0], broken)
    (broken / "science" / "s0001" / "_failed.json").write_text('{"reason": "boom"}')
    config = load_mosaic_config(write_config(tmp_path, [*nights[1:], broken]))
    report = run_mosaic(config, tiles=[0])
    assert not report.ok
    assert "n9: science s0001 left out (boom)" in report.format()
    assert main(["mosaic", write_config(tmp_path, [*nights[1:], broken]), "--status"]) == (
        EXIT_FAILED
    )


def test_the_mosaic_reads_the_science_stages_header_cards():
    from tests.test_zeropoint_stage import _science

    hdul = _science(1, 24.0)
    night = night_image_from_hdulist(hdul, night="n1")
    header = hdul["FLUX"].header
    assert night.zero_point == header["PHOTZP"]
    assert night.night_zero_point == header["ZPMED"]
    assert night.seeing == header["SEEING"]
    assert night.zero_point_error == header["ZPERR"] > 0


def test_a_science_header_reads_through_astropy_wcs_without_fixes():
    # The solved WCS comes from WCS.to_header (astrometry's stretch_wcs_cards),
    # which writes MJDREF = 0.0; the product's time reference (DATEREF, MJDREF:
    # one instant, FITS WCS time keywords, Rots et al. 2015, A&A 574, A36) must
    # survive, or WCSLIB's datfix warns that they disagree when the mosaic reads it.
    from astropy.time import Time

    from pipeline.geometry import Camera, Site
    from pipeline.products import observation_header
    from pipeline.stages.science import replace_wcs

    reference = Time("2026-10-16T18:49:38.076", scale="utc")
    rectified = observation_header(
        reference_time=reference,
        start=-188.0,
        stop=47.0,
        exposure=30.0,
        site=Site(latitude=49.7, longitude=-120.0, height=1000.0, name="Test site"),
        camera=Camera(n_columns=10, tdi_rows=100, pixel_size=15.0, focal_length=6.0),
    )
    solved = WCS(naxis=2)
    solved.wcs.ctype = ["RA---TAN", "DEC--TAN"]
    solved.wcs.crval = [31.0, 49.7]
    solved.wcs.cdelt = [-1.4e-4, 1.4e-4]
    header = replace_wcs(rectified, solved.to_header(relax=True))
    with warnings.catch_warnings():
        warnings.simplefilter("error", FITSFixedWarning)
        wcs = WCS(header)
    # float MJD of a 2026 date: ~1 us
    assert wcs.wcs.mjdref.sum() == pytest.approx(reference.mjd, abs=1e-10)
    assert header["DATEREF"] == reference.isot


@pytest.mark.slow  # simulates and reduces a small night first: ~1-2 min
def test_a_mosaic_of_a_reduced_night_named_by_its_config(tmp_path, capsys):
    from tests.test_cli import DEMO_NIGHT

    night = tmp_path / "night.yaml"
    night.write_text(DEMO_NIGHT)
    assert main(["simulate", str(night)]) == EXIT_OK
    main(["run", str(night)])  # may report the star flat's problems (see test_cli)
    assert " 0 failed, 0 blocked" in capsys.readouterr().out
    science = sorted((tmp_path / "out" / "2026-10-15" / "science").iterdir())
    header = fits.getheader(science[0] / "image.fits", "FLUX")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", FITSFixedWarning)  # the date cards astropy tidies
        scale = 3600.0 * float(proj_plane_pixel_scales(WCS(header).celestial)[1])
    data = {
        "mosaic": {"name": "strip", "output_dir": "mosaics", "nights": ["night.yaml"]},
        # tiles of twice the night's pixels, as tall as the strip
        "tiling": {
            "layout": "tangent_tiles",
            "pixel_scale": 2 * scale,
            "tile_width": 256,
            "tile_height": header["NAXIS2"] // 2 + 16,
            "overlap": 16,
        },
        "coadd": {"min_nights": 2},
        "detect": {"background_box": 32},
    }
    path = tmp_path / "mosaic.yaml"
    path.write_text(yaml.safe_dump(data))
    assert main(["mosaic", str(path)]) == EXIT_OK, capsys.readouterr()
    out = capsys.readouterr().out
    assert "0 failed, 0 blocked" in out and " 0 units ran" not in out
    config = load_mosaic_config(path)
    status = mosaic_status(config)
    assert status.complete and status.n_products == len(science)
    assert main(["mosaic", str(path)]) == EXIT_OK
    assert " 0 units ran" in capsys.readouterr().out
    tables = mosaic_nights(config)
    assert set(tables["night"]) == {"2026-10-15"} and all(tables["used"])


def test_science_units_of_an_earlier_stretch_layout_are_left_out(tmp_path, nights):
    """A product folder reduced again with other stretches keeps the old layout's
    units that the new one did not overwrite: the same night's sky, which must
    not be co-added twice (the night's config knows its stretches; a folder
    does not)."""
    import shutil

    from pipeline.runner._mosaic import MosaicStore

    folder = tmp_path / "products" / "n1"
    shutil.copytree(nights[0], folder)
    science = folder / "science"
    shutil.copytree(science / "s0001", science / "s0002")
    # own rows [start, stop) in the sidecar's config, as the runner records them
    made = {
        "s0000": ([0, 0, 64, 68], "2026-10-16T08:00:00.000+00:00"),  # the new layout
        "s0001": ([60, 64, 128, 128], "2026-10-16T08:00:01.000+00:00"),
        "s0002": ([60, 64, 96, 100], "2026-10-15T09:00:00.000+00:00"),  # an old one's
    }
    for unit, (rows, finished) in made.items():
        record = read_sidecar(science / unit)
        record.pop("format")
        write_sidecar(science / unit, {**record, "config": {"rows": rows}, "finished": finished})
    config = load_mosaic_config(write_config(tmp_path, [folder]))
    store = MosaicStore(config)
    assert sorted(p.unit for p in store.products) == ["s0000", "s0001"]
    assert store.problems == [
        "night n1: science s0002 left out (its rows 64-95 are also those of s0001, made after "
        "it: a product of an earlier stretch layout; remove it, or name the night's config "
        "instead of its folder)"
    ]
    # units whose sidecars say nothing of their rows are all kept
    units = [(u, science / u, {"finished": f}) for u, (_, f) in made.items()]
    assert current_layout(units) == (units, [])
    # a science file removed by hand: the unit left out says why
    (science / "s0000" / "image.fits").unlink()
    assert (
        "night n1: science s0000 left out (image.fits is gone since its unit was made "
        "(removed or renamed by hand?))"
    ) in MosaicStore(config).problems


def test_a_night_left_out_says_why_its_science_units_are_missing(tmp_path, monkeypatch):
    """A night whose science units were never made (their astrometry blocked, say)
    is reported with the units' own problem, not a bare "missing"."""
    from types import SimpleNamespace

    import pipeline.runner._mosaic as runner_mosaic
    from pipeline.mosaic._stage import SCIENCE

    problem = "needs astrometry products for night (missing, failed or damaged)"
    stretches = [SimpleNamespace(id=f"s000{i}") for i in range(3)]

    class Store:  # the few NightStore answers _night_units asks for
        def __init__(self, config):
            self.stages = {SCIENCE: "science stage"}
            self.stretches = stretches

        def state(self, stage, stretch):
            return "missing", ""

        def inputs(self, stage, stretch):
            return {}, [], problem if stretch.id != "s0002" else None

    config = SimpleNamespace(night=SimpleNamespace(name="n7"))
    monkeypatch.setattr(runner_mosaic, "NightStore", Store)
    monkeypatch.setattr(runner_mosaic, "load_config", lambda path: config)
    path = tmp_path / "n7.yaml"
    path.write_text("")
    night, units, problems = runner_mosaic._night_units(path)
    assert night == "n7" and units == []
    assert problems == [
        f"night n7: science s0000-s0001 left out (missing: {problem})",
        "night n7: science s0002 left out (missing: not made yet)",
    ]
