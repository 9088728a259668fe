"""The real stages through the runner and the command line on small simulated nights.

Self-consistency and regression tests: the nights are invented
(:mod:`pipeline.simulate`), the checks compare runs with each other or with
the simulation's settings.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import numpy as np
import pytest
import yaml
from _demo import demo_copy
from astropy.io import fits
from astropy.stats import mad_std
from astropy.table import Table

from pipeline.cli import main
from pipeline.masks import MaskBit, has_bits
from pipeline.runner._rawio import read_rows
from pipeline.runner._store import read_product

SITE = {"latitude": 20.0, "longitude": -100.0, "height": 2000.0}
CAMERA = {"n_columns": 48, "tdi_rows": 128, "pixel_size": 15.0, "focal_length": 6.2}
#: A 48-column chip holds too few reference stars for the astrometric
#: solution, so the full runs of these small nights stop before it.
TO_CATALOG = ("--to", "catalog")


#: One block as long as the chip: its first rows' charge began a whole night
#: earlier, where the helper's sky ramp of 4 would make the sky negative (the
#: simulator refuses ramps of 1 or more there).
ONE_BLOCK = {"n_blocks": 1, "block_rows": 128, "sky": {"sky_ramp": 0.9}}


def _night(tmp_path: Path, *, camera=None, simulate=None, stages=None, run=None) -> Path:
    """Simulate a small night under ``tmp_path`` and write its config; return the config."""
    config = {
        "night": {"name": "n", "raw_dir": "raw", "pattern": "block_*.fits", "output_dir": "out"},
        "site": SITE,
        "camera": CAMERA | (camera or {}),
        "run": {"stretch_rows": 512, "overlap_rows": 64, "executor": "serial"} | (run or {}),
        "stages": {"column_stats": {"block_rows": 64}, "columns": {"min_blocks": 4}}
        | (stages or {}),
        "simulate": {
            "start": "2026-03-20T04:00:00",
            "n_blocks": 4,
            "block_rows": 256,
            "overscan_columns": 8,
            "compress": False,
            "sky": {"sky_ramp": 4.0},
            "stars": {"density": 20000.0},
        }
        | (simulate or {}),
    }
    tmp_path.mkdir(parents=True, exist_ok=True)
    path = tmp_path / "night.yaml"
    path.write_text(yaml.safe_dump(config))
    assert main(["simulate", str(path)]) == 0
    return path


def _product(unit_dir: Path, name: str):
    sidecar = json.loads((unit_dir / "_provenance.json").read_text())
    return read_product(unit_dir / sidecar["products"][name]["file"], sidecar["products"][name])


def _plane(unit_dir: Path, extension: str) -> np.ndarray:
    """One plane (FLUX, FLUXVAR, FLAGS) of a unit's image product."""
    return _product(unit_dir, "image")[extension].data


# ------------------------------------------------------------------ the store


def test_store_reads_back_an_empty_table_with_vector_columns(tmp_path):
    """astropy cannot read a zero-row ECSV table with a vector column; the store can."""
    from pipeline.runner._store import write_products

    table = Table({"block": np.zeros(0, np.int64)})
    table["level"] = np.zeros((0, 5), np.float32)
    table["level"].unit = "electron"
    table.meta["clip"] = 3.0
    entries = write_products(tmp_path, {"stats": table}, {})
    back = read_product(tmp_path / entries["stats"]["file"], entries["stats"])
    assert len(back) == 0 and back["level"].shape == (0, 5)
    assert back["level"].dtype == np.float32 and back["block"].dtype == np.int64
    assert back["level"].unit == "electron" and back.meta["clip"] == 3.0


# ------------------------------------------------------ start of the scan


def test_a_night_within_the_start_ramp_says_how_to_fix_it(tmp_path, capsys):
    """Regression: a night no longer than TDIROWS (the demo's case) crashed in
    column_stats when every row was taken for the start-of-scan ramp."""
    config = _night(tmp_path, simulate=ONE_BLOCK)
    capsys.readouterr()
    assert main(["run", str(config), "--to", "calibrate"]) == 1
    out = capsys.readouterr().out
    assert "failed: columns/night: ValueError: summaries hold no block" in out
    assert "start_ramp='none'" in out
    sidecar = json.loads((tmp_path / "out/n/column_stats/s0000/_provenance.json").read_text())
    assert "set stages.ingest.start_ramp: none" in sidecar["warnings"][0]
    # The simulated camera was clocking before the first block: say so (and
    # cut the 128 rows into blocks enough for the column solve's min_blocks=4).
    fixed = ["--set", "stages.ingest.start_ramp=none", "--set", "stages.column_stats.block_rows=32"]
    assert main(["run", str(config), "--to", "calibrate", *fixed]) == 0
    mask = _plane(tmp_path / "out/n/calibrate/s0000", "FLAGS")
    assert not has_bits(mask, MaskBit.LOW_EXPOSURE).any()


def test_a_night_too_short_for_the_column_solve_says_how_to_fix_it(tmp_path, capsys):
    """Fewer statistics blocks than min_blocks used to flag every column BAD and
    leave an empty calibrated night with exit 0; now the solve fails and says why."""
    config = _night(tmp_path, simulate=ONE_BLOCK)
    fixed = ["--set", "stages.ingest.start_ramp=none"]  # 128 rows: 2 blocks of 64
    capsys.readouterr()
    assert main(["run", str(config), "--to", "calibrate", *fixed]) == 1
    out = capsys.readouterr().out
    assert "Only 2 blocks of column statistics, fewer than min_blocks=4" in out
    assert "stages.column_stats.block_rows" in out


def test_a_short_night_gets_blocks_enough_for_the_column_solve(tmp_path, capsys):
    """Left unset, the statistics blocks shrink on a short night (an eighth of its
    rows, at least 16) so that its column solve has eight of them, and the
    night is calibrated (with the default 256 rows it had one block and failed)."""
    config = _night(tmp_path, simulate=ONE_BLOCK)
    unset = [
        "--set",
        "stages.ingest.start_ramp=none",
        "--set",
        "stages.column_stats.block_rows=null",
    ]
    assert main(["run", str(config), "--to", "calibrate", *unset]) == 0
    stats = _product(tmp_path / "out/n/column_stats/s0000", "column_stats")
    assert list(stats["block"]) == list(range(8))  # 128 rows: 8 blocks of 16
    columns = _product(tmp_path / "out/n/columns/night", "columns")
    assert (np.asarray(columns["flags"]) == 0).mean() > 0.9


def test_the_start_ramp_is_flagged_and_left_out_of_the_solve(tmp_path, capsys):
    config = _night(tmp_path, simulate={"start_ramp": True})
    assert main(["run", str(config), "--to", "calibrate"]) == 0
    index = _product(tmp_path / "out/n/ingest/night", "block_index")
    assert list(index["clock_row"]) == [0, 256, 512, 768]
    mask = _plane(tmp_path / "out/n/calibrate/s0000", "FLAGS")
    # TDI readout: the first TDIROWS rows after clocking starts are partly exposed.
    low = has_bits(mask, MaskBit.LOW_EXPOSURE).all(axis=1)
    assert low[:128].all() and not low[128:].any()
    stats = _product(tmp_path / "out/n/column_stats/s0000", "column_stats")
    assert stats["block"][0] == 2  # blocks of 64 rows: rows 0-127 are left out


def test_the_flat_can_be_solved_from_a_strip_of_the_night(tmp_path, capsys):
    """stages.column_stats.solve_rows: solve the 1-D flat from chosen night rows
    only (e.g. a strip of twilight).  Self-consistency: the strip's solution
    uses only its blocks and agrees with the whole night's within errors."""
    # The tiny test chip measures responses to ~0.3-0.7 %: allow the regression.
    config = _night(tmp_path, stages={"columns": {"min_blocks": 4, "max_flat_error": 0.02}})
    assert main(["run", str(config), "--to", "columns"]) == 0
    whole = _product(tmp_path / "out/n/columns/night", "columns")
    assert (
        main(
            [
                "run",
                str(config),
                "--to",
                "columns",
                "--set",
                "stages.column_stats.solve_rows=[512, 1024]",
            ]
        )
        == 0
    )
    strip = _product(tmp_path / "out/n/columns/night", "columns")
    # 512 rows in blocks of 64 rows
    assert strip.meta["n_blocks"] == 8 and whole.meta["n_blocks"] > 8
    assert strip.meta["method"] == "regression"
    good = (strip["flags"] == 0) & (whole["flags"] == 0)
    # Both fit the same columns on overlapping data: they agree within 5 times the
    # strip's own (larger) standard errors, for all but a rare outlier.
    pull = (strip["flat"] - whole["flat"])[good] / strip["flat_error"][good]
    assert np.mean(np.abs(pull) < 5) > 0.97, pull
    # A range the wrong way round is a config error naming the key.
    capsys.readouterr()
    assert main(["run", str(config), "--set", "stages.column_stats.solve_rows=[600, 100]"]) == 2
    assert "solve_rows" in capsys.readouterr().err


# ------------------------------------------------------------------- flips


def test_read_rows_reverses_each_block_with_flip_rows(tmp_path):
    stored = np.arange(2 * 5 * 3, dtype=np.float32).reshape(2, 5, 3)
    for b in range(2):
        fits.PrimaryHDU(stored[b]).writeto(tmp_path / f"b{b}.fits")
    index = Table(
        {"file": ["b0.fits", "b1.fits"], "hdu": [0, 0], "row_start": [0, 5], "n_rows": [5, 5]}
    )
    readout = np.concatenate([stored[0][::-1], stored[1][::-1]])
    np.testing.assert_array_equal(read_rows(tmp_path, index, 0, 10, flip_rows=True), readout)
    # Any window: night row r is the (r - row_start)-th row read of its block.
    np.testing.assert_array_equal(read_rows(tmp_path, index, 3, 8, flip_rows=True), readout[3:8])
    np.testing.assert_array_equal(read_rows(tmp_path, index, 3, 8), stored.reshape(10, 3)[3:8])


def test_a_flipped_camera_calibrates_like_an_unflipped_one(tmp_path, capsys):
    """The same night written with both flips gives the same calibrated products.

    The simulator writes each block's rows last-read first and the image
    columns south to north when camera.flip_rows / flip_columns are set
    (DEVELOPERS.md, "Raw data"); DATE-OBS stays the time of the first row read.
    """
    plain = _night(tmp_path / "plain", simulate={"start_ramp": True})
    flips = {"flip_rows": True, "flip_columns": True}
    flipped = _night(tmp_path / "flipped", camera=flips, simulate={"start_ramp": True})
    raw_plain = fits.getdata(tmp_path / "plain/raw/block_0001.fits")
    raw_flipped = fits.getdata(tmp_path / "flipped/raw/block_0001.fits")
    np.testing.assert_array_equal(raw_flipped[::-1, :48], raw_plain[:, 47::-1])
    for config in (plain, flipped):
        assert main(["run", str(config), "--to", "calibrate"]) == 0
    for unit in ("s0000", "s0001"):
        a = tmp_path / "plain/out/n/calibrate" / unit
        b = tmp_path / "flipped/out/n/calibrate" / unit
        # Float32 sums in another order (the overscan columns are reversed too):
        # rounding of ~1e-7 relative, which can move a pixel lying at a
        # cosmic-ray, saturation or bleed threshold across it.  The column flags
        # (set from whole-night statistics) must agree; a pixel flag may differ
        # in at most 1e-3 of the pixels (24 of 24576; measured: none).
        mask_a, mask_b = _plane(a, "FLAGS"), _plane(b, "FLAGS")
        column_bits = MaskBit.BAD_COLUMN | MaskBit.HOT_COLUMN
        np.testing.assert_array_equal(mask_a & column_bits, mask_b & column_bits)
        assert np.mean(mask_a != mask_b) < 1e-3
        np.testing.assert_allclose(
            _plane(a, "FLUX"), _plane(b, "FLUX"), rtol=1e-5, atol=1e-3, equal_nan=True
        )


# -------------------------------------------------------------- the demo night


def test_the_demo_night_runs_end_to_end(tmp_path, capsys):
    """``zdrift run configs/demo_2026-10-15.yaml``: the first demo night alone, on a copy."""
    config = demo_copy(tmp_path)
    assert main(["run", str(config)]) == 0, capsys.readouterr()
    out = capsys.readouterr().out
    assert ", 0 failed, 0 blocked" in out and "problem" not in out
    products = tmp_path / "demo_products" / "demo-2026-10-15"
    columns = _product(products / "columns/night", "columns")
    # demo_frames/README.md: dead/low columns 379 and 996.
    flags = np.asarray(columns["flags"])
    assert flags[379] & MaskBit.BAD_COLUMN and flags[996] & MaskBit.BAD_COLUMN
    # The other BAD columns are the bleeds of the three Gaia stars, which cover
    # their columns in every row of the night (demo_frames/README.md): each such
    # column is SATURATED or BLEED in the calibrated masks in >= 99 % of its rows,
    # and every column that is has a flagged neighbour (the pixel bleed mask
    # grows one column beyond the flagged ones: measured 52, 111).
    masks = np.concatenate(
        [_plane(unit, "FLAGS") for unit in sorted((products / "calibrate").glob("s*"))]
    )
    bled = has_bits(masks, MaskBit.SATURATED | MaskBit.BLEED).mean(axis=0) >= 0.99
    bad = set(np.flatnonzero(flags & MaskBit.BAD_COLUMN)) - {379, 996}
    assert bad and all(bled[c] for c in bad), sorted(bad)
    assert all({c - 1, c, c + 1} & bad for c in np.flatnonzero(bled)), np.flatnonzero(bled)
    # Only the hot columns of the truth are flagged hot (see below for why not all).
    assert set(np.flatnonzero(flags & MaskBit.HOT_COLUMN)) <= {362, 683, 974}
    # The twilight sky fades by a third: the flat comes from the regression of
    # each column's level on the sky, not from the level-ratio fallback.
    assert columns.meta["method"] == "regression"
    # demo_frames/README.md: hot columns 362, 683 and 974.  On this 188 s night
    # the additive levels are measured to ~65 e- (median dark_error) and the
    # levels of the other columns not flagged BAD_COLUMN scatter by ~62 e-
    # (robust sigma), while the hot pixels add a few hundred e-: a 10-sigma
    # separation per column is out of reach (measured 269, 127, 315 e-, i.e.
    # 4.4, 2.1, 5.1 robust sigma above those columns' median).  Checked
    # instead, with ~20 % margin on the fixed demo data: each hot column's
    # level is positive at more than 2 of its own standard errors (measured
    # 3.8, 2.4, 3.4), and the three together stand more than 5 sigma (of their
    # mean) above the other columns (measured 6.6; a ratio solve gives 0).
    hot = [362, 683, 974]
    dark, dark_error = np.asarray(columns["dark"]), np.asarray(columns["dark_error"])
    assert np.all(dark[hot] > 2 * dark_error[hot]), (dark[hot], dark_error[hot])
    others = np.ones(dark.size, bool)
    others[hot] = False
    others &= (flags & MaskBit.BAD_COLUMN) == 0
    centre = np.median(dark[others])
    sigma = mad_std(dark[others])
    assert dark[hot].mean() - centre > 5 * sigma / np.sqrt(len(hot)), (dark[hot], sigma)
    # Against the simulator's per-column truth (same seed, no re-simulation):
    # the issue asks for the response to <= 0.2 % rms; measured 0.125 % on the
    # demo night's usable columns (both sides normalised to the same columns).
    from pipeline.config import load_config
    from pipeline.simulate import column_properties, tdi_model

    demo = load_config(config.parent / "simulate_demo.yaml")
    options = demo.section("simulate")
    model, _ = tdi_model(demo.site(), demo.camera(), options)
    truth = column_properties(options, flags.size, model.line_time, demo.camera().tdi_rows)
    usable = flags == 0
    ratio = np.asarray(columns["flat"])[usable] / truth.response[usable]
    assert np.sqrt(np.mean((ratio / ratio.mean() - 1) ** 2)) <= 0.002
    # Column 52, beside a bleed, has a level of ~1000 e- measured to ~870 e- on
    # its few clean blocks: not significant, so it must not be called hot
    # (regression: it was, before the own-error test).  Self-consistency.
    assert not flags[52] & MaskBit.HOT_COLUMN, (dark[52], dark_error[52])
    # No stage warned on the way (the runner records warnings in each unit's
    # provenance), e.g. no "invalid value encountered" and no ratio fallback.
    for sidecar in sorted(products.glob("*/*/_provenance.json")):
        warned = json.loads(sidecar.read_text())["warnings"]
        assert warned == [], (sidecar, warned)
    assert main(["run", str(config)]) == 0
    assert ": 0 units ran" in capsys.readouterr().out
    assert main(["status", str(config)]) == 0
    for line in capsys.readouterr().out.splitlines()[2:]:
        done, stale, missing, failed = line.split()[2:6]
        assert (stale, missing, failed) == ("0", "0", "0") and int(done) >= 1, line


# ------------------------------------------------------- an external flat


def test_columns_can_come_from_another_night(tmp_path, capsys):
    """stages.columns.flat_file: a solved table is adopted instead of solving one."""
    first = _night(tmp_path / "first")
    assert main(["run", str(first), "--to", "columns"]) == 0
    capsys.readouterr()
    solved = tmp_path / "first/out/n/columns/night/columns.ecsv"
    # A second night of the same camera (another seed, a sky too flat to solve
    # its own flat) uses the first night's table; the path is relative to
    # its config file.
    second = _night(
        tmp_path / "second",
        simulate={"seed": 7, "sky": {"sky_ramp": 0.0}},
        stages={"columns": {"flat_file": "../first/out/n/columns/night/columns.ecsv"}},
    )
    assert main(["run", str(second), "--to", "calibrate"]) == 0
    assert "CalibrationWarning" not in capsys.readouterr().err  # no solve, no fallback
    adopted = _product(tmp_path / "second/out/n/columns/night", "columns")
    reference = Table.read(solved)
    np.testing.assert_array_equal(adopted["flat"], reference["flat"])
    np.testing.assert_array_equal(adopted["dark"], reference["dark"])
    np.testing.assert_array_equal(adopted["flags"], reference["flags"])
    assert adopted.meta["method"] == "external" and adopted.meta["source"] == "columns.ecsv"
    # The file's content is the input, not its path: the same table elsewhere
    # (a night archived with its files) leaves everything up to date.
    moved = tmp_path / "elsewhere/columns.ecsv"
    moved.parent.mkdir()
    moved.write_bytes(solved.read_bytes())
    original = second.read_text()
    config = yaml.safe_load(original)
    config["stages"]["columns"]["flat_file"] = str(moved)
    second.write_text(yaml.safe_dump(config))
    capsys.readouterr()
    assert main(["status", str(second)]) == 5  # the stages after calibrate not run
    assert "columns stale" not in capsys.readouterr().out  # nor calibrate: still done
    second.write_text(original)
    # The file's content is an input: changing it makes the columns stale.
    reference["flat"][0] *= 1.01
    reference.write(solved, overwrite=True)
    assert main(["status", str(second)]) == 5  # stale: nothing failed, work left
    assert "columns stale: night: inputs changed: flat_file" in capsys.readouterr().out
    # A missing file blocks the stage and says which option names it.
    solved.unlink()
    assert main(["run", str(second), "--stage", "columns"]) == 1
    assert "stages.columns.flat_file: no file" in capsys.readouterr().out


@pytest.mark.parametrize("suffix", [".fits", ".json"])
def test_a_columns_file_can_be_fits_or_json(tmp_path, suffix):
    """flat_file as a FITS table or a JSON object of columns reads as the ECSV table does."""
    import json

    from pipeline.runner._store import read_external
    from pipeline.stages.calibrate import adopt_columns

    table = Table({"flat": [1.0, 0.98, 1.02], "dark": [0.0, 1.5, 0.25], "flags": [0, 4, 0]})
    path = tmp_path / f"columns{suffix}"
    if suffix == ".json":
        path.write_text(json.dumps({name: table[name].tolist() for name in table.colnames}))
    else:
        table.write(path)
    adopted = adopt_columns(read_external(path), 3, source=path.name)
    for name in ("flat", "dark", "flags"):
        np.testing.assert_array_equal(adopted[name], table[name])
    assert adopted.meta["method"] == "external" and adopted.meta["source"] == path.name


def test_a_columns_file_that_is_not_a_table_says_what_to_give(tmp_path):
    from pipeline.stages.calibrate import adopt_columns

    with pytest.raises(TypeError, match="holds a list, not a table"):
        adopt_columns([1.0, 1.0], 2, source="columns.json")
    with pytest.raises(ValueError, match="one list per column"):
        adopt_columns({"flat": [1.0, 1.0], "dark": [0.0]}, 2, source="columns.json")


def test_an_adopted_table_must_fit_the_camera():
    from pipeline.stages.calibrate import adopt_columns

    table = Table({"flat": np.ones(4), "dark": np.zeros(4)})
    assert list(adopt_columns(table, 4)["flags"]) == [0, 0, 0, 0]
    with pytest.raises(ValueError, match="has 4 rows but the camera has 6 image columns"):
        adopt_columns(table, 6)
    with pytest.raises(ValueError, match=r"lacks \['dark'\]"):
        adopt_columns(Table({"flat": np.ones(4)}), 4)


def test_a_stage_names_only_option_fields_as_files():
    from pydantic import BaseModel

    from pipeline.stages.base import Stage

    class Options(BaseModel):
        table: Path | None = None

    Stage("uses_a_file", lambda **_: {}, Options, files=("table",))  # fine
    with pytest.raises(ValueError, match="files names 'tabel', which is not a field"):
        Stage("uses_a_file", lambda **_: {}, Options, files=("tabel",))
    with pytest.raises(TypeError, match="must be tuples of names"):
        Stage("uses_a_file", lambda **_: {}, Options, files="table")


# ------------------------------------------------------- a bad stretch


def test_a_failed_stretch_leaves_the_flat_and_the_other_stretches_calibrated(
    tmp_path, capsys, monkeypatch
):
    """columns (partial_inputs) solves from the stretches whose column_stats
    exist; calibrate still runs on every stretch; the gap is reported (exit 1)
    and the solve is redone once the stretch's statistics appear."""
    import pipeline.stages.column_stats as column_stats

    config = _night(tmp_path)  # 1024 rows: stretches s0000 and s0001 of 512 rows
    real = column_stats.stretch_rows_for_stage

    def crash_on_the_second_stretch(inputs, context):  # e.g. odd data in one block
        if context.stretch.index == 1:
            raise ValueError("injected crash on odd data")
        return real(inputs, context)

    monkeypatch.setattr(column_stats, "stretch_rows_for_stage", crash_on_the_second_stretch)
    capsys.readouterr()
    assert main(["run", str(config), "--to", "calibrate"]) == 1
    out = capsys.readouterr().out
    assert "failed: column_stats/s0001: ValueError: injected crash on odd data" in out
    assert "problem: columns/night: ran without stretch s0001 (failed in column_stats)" in out
    assert ", 1 failed, 0 blocked" in out  # only column_stats/s0001
    products = tmp_path / "out/n"
    partial = _product(products / "columns/night", "columns")
    first = _product(products / "column_stats/s0000", "column_stats")
    first = set(first["block"])
    assert partial.meta["n_blocks"] == len(first) > 0  # s0000's blocks only
    partial_images = {
        unit: (
            _plane(products / "calibrate" / unit, "FLUX"),
            _plane(products / "calibrate" / unit, "FLAGS"),
        )
        for unit in ("s0000", "s0001")
    }
    # Fixed: column_stats/s0001 reruns, which makes the columns stale: solved on both.
    monkeypatch.setattr(column_stats, "stretch_rows_for_stage", real)
    assert main(["run", str(config), "--to", "columns"]) == 0
    assert main(["status", str(config)]) == 5  # calibrate is stale
    out = capsys.readouterr().out
    assert "problem" not in out  # neither in the run summary nor in the status
    assert "calibrate stale: s0000-s0001: inputs changed: columns" in out
    whole = _product(products / "columns/night", "columns")
    second = set(_product(products / "column_stats/s0001", "column_stats")["block"])
    # the stretches' margins overlap: a block seen by both counts once
    assert whole.meta["n_blocks"] == len(first | second) > len(first)
    assert (
        json.loads((products / "columns/night/_provenance.json").read_text())["missing_stretches"]
        == {}
    )
    # Compared with the clean run of the same stretches (self-consistency): the
    # flat and level solved from half the blocks differ from the whole night's
    # by their own errors, a small part of a pixel's noise (measured: median
    # 0.03 sigma, worst pixel 2.8 sigma, in an edge column); the same columns
    # are flagged.
    assert np.array_equal(partial["flags"], whole["flags"])
    assert main(["run", str(config), "--to", "calibrate"]) == 0
    for unit, (image, mask) in partial_images.items():
        clean = products / "calibrate" / unit
        deviation = (image - _plane(clean, "FLUX")) / np.sqrt(_plane(clean, "FLUXVAR"))
        assert np.nanmedian(np.abs(deviation)) < 0.1
        assert np.nanmax(np.abs(deviation)) < 5.0
        # A recalibrated pixel can cross a cosmic-ray or saturation threshold
        # (measured: 4 of 24576 pixels, next to a bleed).
        assert np.mean(mask != _plane(clean, "FLAGS")) < 1e-3


# ------------------------------------------------------------ runner paths, real stages


def _product_digests(folder: Path) -> dict[str, str]:
    """SHA-256 of every product file of a night (not provenance, logs or the lock)."""
    return {
        path.relative_to(folder).as_posix(): hashlib.sha256(path.read_bytes()).hexdigest()
        for path in sorted(folder.glob("*/*/*"))
        if not path.name.startswith(("_", "."))
    }


#: Provenance fields that legitimately differ between two runs of the same unit
#: (and the night's name, which differs between the runs compared here).
RUN_FIELDS = ("started", "finished", "timings", "pid", "host", "night")


def _provenance(folder: Path) -> dict[str, dict]:
    """Every unit's provenance record without the fields that say when and where it ran."""
    records = {}
    for path in sorted(folder.glob("*/*/_provenance.json")):
        record = json.loads(path.read_text())
        records[path.parent.relative_to(folder).as_posix()] = {
            key: value for key, value in record.items() if key not in RUN_FIELDS
        }
    return records


def _stage_by_stage(config: Path, name: str, capsys) -> None:
    """Reduce the night to the catalogue one stage per run: every stage waits for the last."""
    stages = ("ingest", "column_stats", "columns", "calibrate", "rectify", "detect", "catalog")
    for stage in stages:
        assert main(["run", str(config), "--stage", stage, "--set", f"night.name={name}"]) == 0, (
            capsys.readouterr()
        )


def test_stretches_flowing_through_the_stages_give_the_products_of_stage_by_stage(tmp_path, capsys):
    """One run lets each stretch through calibrate, rectify and detect as soon as what it
    reads is written (depth first on the serial executor: stretch 0's detect waits only
    for its neighbour's rectify); its products, FITS headers included (files compared
    byte for byte), and provenance are those of one run per stage."""
    config = _night(tmp_path)
    _stage_by_stage(config, "staged", capsys)
    assert main(["run", str(config), *TO_CATALOG]) == 0, capsys.readouterr()
    staged = _product_digests(tmp_path / "out/staged")
    assert len(staged) > 10 and any(key.startswith("detect/s0001") for key in staged)
    assert _product_digests(tmp_path / "out/n") == staged
    assert _provenance(tmp_path / "out/n") == _provenance(tmp_path / "out/staged")


@pytest.mark.slow  # three runs of the real stages, one on a dask cluster: ~40 s
def test_the_real_stages_give_identical_products_on_every_executor(tmp_path, capsys):
    config = _night(tmp_path)
    runs = {
        "n": [],  # serial, as the config says
        "pool": ["run.executor=local", "run.workers=2"],
        "dask": ["run.executor=dask", "run.workers=2"],  # a cluster of its own
    }
    for name, settings in runs.items():
        overrides = [arg for s in [f"night.name={name}", *settings] for arg in ("--set", s)]
        assert main(["run", str(config), *TO_CATALOG, *overrides]) == 0, capsys.readouterr()
    serial = _product_digests(tmp_path / "out/n")
    assert len(serial) > 10 and any(key.startswith("rectify/") for key in serial)
    assert _product_digests(tmp_path / "out/pool") == serial
    assert _product_digests(tmp_path / "out/dask") == serial


def test_a_line_time_change_mid_night_is_reported_and_only_its_stretches_stop(tmp_path, capsys):
    """The camera reconfigured for the last block (1 % longer line time):
    ingest reports it, rectify refuses the stretches with rows from that
    block, naming it, and the night's other stretches go through every stage
    (the whole night used to stop in rectify).  Self-consistency."""
    config = _night(tmp_path)
    last = tmp_path / "raw/block_0003.fits"
    line_time = fits.getval(last, "LINETIME")
    fits.setval(last, "LINETIME", value=line_time * 1.01)  # the camera was reconfigured
    capsys.readouterr()
    assert main(["run", str(config)]) == 1
    out = capsys.readouterr().out
    assert "problem: ingest/night: block_0003.fits: changed mid-night (LINETIME" in out
    rectify = [line for line in out.splitlines() if line.startswith("  failed: rectify/")]
    assert rectify and all("its rows come from block_0003.fits at LINETIME" in x for x in rectify)
    # Detect is blocked on the refused stretches only, and the night catalogue
    # ran on the others (this test night has no reference stars for astrometry).
    blocked = [line for line in out.splitlines() if line.startswith("  blocked: detect/")]
    failed = [line.split(":")[1].split("/")[1] for line in rectify]
    assert failed == ["s0002"]
    assert [line.split(":")[1] for line in blocked] == [" detect/s0002"]
    assert "problem: catalog/night: ran without stretch s0002 (blocked in detect)" in out
    assert (tmp_path / "out/n/detect/s0001/catalog.ecsv").exists()


def test_rectify_with_a_line_time_that_does_not_match_the_drift(tmp_path, capsys):
    """The camera clocks 1 % slower than the sky drifts: every star is smeared
    along the scan by tdi_rows x 1 % = 1.28 rows, and rectify's smear kernels
    say so (common practice: TDI smear = TDI rows x fractional rate error)."""
    matched = 0.035314903  # s, `zdrift plan` for SITE and CAMERA (from its output)
    config = _night(tmp_path, camera={"line_time": matched * 1.01})
    assert main(["run", str(config), *TO_CATALOG]) == 0, capsys.readouterr()
    kernels = _product(tmp_path / "out/n/rectify/s0001", "smear_kernels")
    expected = CAMERA["tdi_rows"] * 0.01
    # 5 %: the kernel's extent is that of its equal-time samples (63/64 of the
    # track for 64 samples) in rectified pixels; measured 1.247 against 1.28.
    np.testing.assert_allclose(kernels["length"], expected, rtol=0.05)


@pytest.mark.slow  # two runs of the real stages and a partial one: ~30 s
def test_from_rectify_after_an_overlap_change_recomputes_what_it_needs(tmp_path, capsys):
    """The reproduction: ``--from rectify`` after changing run.overlap_rows
    crashed a stretch ("core rows ... must lie within the rows given")."""
    config = _night(tmp_path)
    assert main(["run", str(config), *TO_CATALOG]) == 0
    wider = ["--set", "run.overlap_rows=96"]
    capsys.readouterr()
    assert main(["run", str(config), *TO_CATALOG, "--from", "rectify", *wider]) == 0, (
        capsys.readouterr()
    )
    err = capsys.readouterr().err
    assert "were cut for other stretch rows" in err and "running from column_stats" in err
    clean = ["--set", "night.name=clean", *wider]
    assert main(["run", str(config), *TO_CATALOG, *clean]) == 0
    assert _product_digests(tmp_path / "out/n") == _product_digests(tmp_path / "out/clean")


def test_a_damaged_calibrated_product_is_recomputed_before_rectify_reads_it(tmp_path, capsys):
    """The reproduction: a same-size byte flip in a calibrated product, then a
    forced rerun of rectify.  It used to consume the bad data and exit 0."""
    config = _night(tmp_path)
    assert main(["run", str(config), *TO_CATALOG]) == 0
    clean = _product_digests(tmp_path / "out/n")
    unit = tmp_path / "out/n/calibrate/s0001"
    target = max(unit.glob("*.fits"), key=lambda p: p.stat().st_size)  # the image data
    data = bytearray(target.read_bytes())
    data[len(data) // 2] ^= 0x10
    target.write_bytes(bytes(data))
    capsys.readouterr()
    assert main(["run", str(config), *TO_CATALOG, "--from", "rectify", "--force"]) == 1
    captured = capsys.readouterr()
    assert f"damaged: calibrate/s0001: {target.name} content changed since" in captured.out
    assert "(recomputed)" in captured.out
    assert _product_digests(tmp_path / "out/n") == clean
    assert main(["status", str(config), "--verify"]) == 5  # astrometry not run
