"""One bad block in an otherwise good night, through the command line.

Each test plants one bad block in a small simulated night (or a copy of the
demo night) and checks three things against a clean run of the same night
without that block's file: the bad block is named in one line, the run
exits 1 (a partial failure, the documented code for problems with the
input), and every good block's products are identical.  Self-consistency
tests: the nights are invented (:mod:`pipeline.simulate`).
"""

from __future__ import annotations

import json
import re
import shutil
from pathlib import Path

import astropy.units as u
import numpy as np
import pytest
import yaml
from _demo import demo_copy
from astropy.io import fits
from astropy.table import Table
from astropy.time import Time
from test_night_run import _night, _plane, _product

from pipeline.cli import main
from pipeline.stages.base import plan_stretches, segment_rows

BAD = "block_0002.fits"


def _problems(out: str) -> list[str]:
    return [line.strip() for line in out.splitlines() if line.startswith("  problem: ")]


def _run(config: Path, capsys, *args: str) -> tuple[int, str]:
    capsys.readouterr()
    code = main(["run", str(config), *args])
    return code, capsys.readouterr().out


@pytest.fixture(scope="module")
def clean_night(tmp_path_factory):
    """The small simulated night without block 2, reduced to calibrate once."""
    root = tmp_path_factory.mktemp("clean")
    config = _night(root)
    (root / "raw" / BAD).unlink()
    assert main(["run", str(config), "--to", "calibrate"]) == 1  # the gap is a problem
    return root


def _copy_night(clean: Path, tmp_path: Path) -> Path:
    """The clean night's config and raw files (block 2 back in) under ``tmp_path``."""
    shutil.copytree(clean / "raw", tmp_path / "raw")
    shutil.copy(clean / "night.yaml", tmp_path / "night.yaml")
    # The simulation is deterministic: the same config gives the same block 2.
    scratch = tmp_path / "scratch"
    _night(scratch)
    shutil.copy(scratch / "raw" / BAD, tmp_path / "raw" / BAD)
    shutil.rmtree(scratch)
    return tmp_path / "night.yaml"


def _rewrite(path: Path, change) -> None:
    """Rewrite a raw block: ``change(data, header) -> (data, header)``."""
    with fits.open(path) as hdul:
        data, header = change(hdul[0].data.astype(np.float32), hdul[0].header.copy())
    fits.PrimaryHDU(data, header).writeto(path, overwrite=True)


def _as_float(data, header):
    for key in ("BZERO", "BSCALE"):
        header.remove(key, ignore_missing=True)
    header["BITPIX"] = -32
    return data, header


def _zero(data, header):
    data[:] = 0.0
    return data, header


def _nan(data, header):
    data[:] = np.nan
    return _as_float(data, header)


def _saturated(data, header):
    # Daylight on the detector: every image pixel clipped at or above
    # SATURATE, the overscan a live bias.
    image = slice(0, int(header["NAXIS1"]) - 8)  # 8 overscan columns (simulate options)
    data[:, image] = header["SATURATE"] + np.arange(data.shape[1])[image] % 7
    return _as_float(data, header)


BAD_DATA = [
    (_zero, "all 12288 finite image pixels equal 0 ADU (a dead readout?)"),
    (_nan, "all 12288 image pixels are NaN or infinite"),
    (_saturated, "all 12288 finite image pixels are saturated"),
]


def _assert_same_products(bad: Path, clean: Path, pairs) -> None:
    """Columns and the calibrate products of matching stretches are identical."""
    for name in ("flat", "dark", "flags", "n_blocks"):
        np.testing.assert_array_equal(
            _product(bad / "columns/night", "columns")[name],
            _product(clean / "columns/night", "columns")[name],
        )
    for ours, theirs in pairs:
        for plane in ("FLUX", "FLUXVAR", "FLAGS"):
            np.testing.assert_array_equal(
                _plane(bad / "calibrate" / ours, plane),
                _plane(clean / "calibrate" / theirs, plane),
            )


@pytest.mark.parametrize(("change", "reason"), BAD_DATA)
def test_a_block_without_usable_pixels_is_named_and_left_out(
    clean_night, tmp_path, capsys, change, reason
):
    """An all-zero (all-NaN, all-saturated) block used to pass silently and
    enter the column solve; now it is rejected in one line, exit 1, and the
    night is reduced exactly as without its file."""
    config = _copy_night(clean_night, tmp_path)
    _rewrite(tmp_path / "raw" / BAD, change)
    code, out = _run(config, capsys, "--to", "calibrate")
    assert code == 1
    _, clean_out = _run(clean_night / "night.yaml", capsys, "--to", "calibrate")
    extra = [line for line in _problems(out) if line not in _problems(clean_out)]
    assert len(extra) == 1, out
    assert extra[0].startswith(f"problem: ingest/night: rejected {BAD}: {reason}"), extra
    assert ", 0 failed, 0 blocked" in out
    _assert_same_products(
        tmp_path / "out/n", clean_night / "out/n", [("s0000", "s0000"), ("s0001", "s0001")]
    )


def test_a_block_whose_clock_went_backwards_is_named_and_left_out(clean_night, tmp_path, capsys):
    """Block 2's DATE-OBS set back to 50 rows before block 1's: it used to be
    reduced there, between blocks 0 and 1, and the overlap message blamed
    block 1 ("starts ... before the end of block_0002")."""
    config = _copy_night(clean_night, tmp_path)
    with fits.open(tmp_path / "raw" / "block_0001.fits") as hdul:
        block_1 = Time(hdul[0].header["DATE-OBS"], scale="utc")
        line_time = hdul[0].header["LINETIME"]

    def backwards(data, header):
        header["DATE-OBS"] = (block_1 - 50 * line_time * u.s).isot
        return data, header

    _rewrite(tmp_path / "raw" / BAD, backwards)
    code, out = _run(config, capsys, "--to", "calibrate")
    assert code == 1
    _, clean_out = _run(clean_night / "night.yaml", capsys, "--to", "calibrate")
    extra = [line for line in _problems(out) if line not in _problems(clean_out)]
    assert len(extra) == 1, out
    assert extra[0].startswith(f"problem: ingest/night: rejected {BAD}: DATE-OBS"), extra
    assert "goes backwards: earlier than block_0001.fits (BLOCKSEQ 1)" in extra[0]
    _assert_same_products(
        tmp_path / "out/n", clean_night / "out/n", [("s0000", "s0000"), ("s0001", "s0001")]
    )


def _dropout(value):
    """Rows 100-159 of the block read as one value in every pixel, overscan included."""

    def change(data, header):
        data[100:160, :] = value
        return _as_float(data, header)

    return change


@pytest.mark.parametrize("value", [0.0, 59800.0])
def test_readout_dropout_rows_are_flagged_gap_and_named(clean_night, tmp_path, capsys, value):
    """Rows of one raw value in every pixel (0 ADU, or full scale, overscan
    included) used to pass as data: their bias followed them, so 0 ADU became
    a sky of 0 e- with the variance of the read noise alone, and detect
    found hundreds of unflagged false sources along the edges of the dark
    band (a 200-row dropout of a simulated night: 2840 sources against 2114).
    Now they are no data (GAP, NaN) and named as a problem, and the rest of
    the block is kept."""
    config = _copy_night(clean_night, tmp_path)
    _rewrite(tmp_path / "raw" / BAD, _dropout(value))
    code, out = _run(config, capsys, "--to", "calibrate")
    assert code == 1
    problems = [line for line in _problems(out) if "calibrate/" in line]
    # Block 2 holds night rows 512-767; stretch s0001 starts at row 512.
    assert problems == [
        f"problem: calibrate/s0001: night rows 612-671 (60 rows) hold one raw value "
        f"({value:g} ADU) in every image and overscan pixel: a readout dropout, not data; "
        "flagged GAP (no data) and left out of the bias, flat and sky."
    ], out
    flags = _plane(tmp_path / "out/n/calibrate/s0001", "FLAGS")
    image = _plane(tmp_path / "out/n/calibrate/s0001", "FLUX")
    rows = Table.read(tmp_path / "out/n/calibrate/s0001/rows.ecsv")
    dropout = (rows["night_row"] >= 612) & (rows["night_row"] <= 671)
    assert (flags[dropout] & 64).all()  # MaskBit.GAP
    assert np.isnan(image[dropout]).all()
    # The rows around it are data, with a bias near the simulator's 1000 ADU.
    assert not (flags[~dropout] & 64).any()
    assert np.all(np.abs(rows["bias"][~dropout] - 1000.0) < 20.0)
    assert list(rows["data"]) == list(~dropout)


def test_the_hours_of_data_leave_out_readout_dropout_rows(clean_night, tmp_path, capsys):
    """The report's hours of usable data counted every row a block holds, the
    rows of a readout dropout (no data, flagged GAP by calibrate) too."""
    config = _copy_night(clean_night, tmp_path)
    _rewrite(tmp_path / "raw" / BAD, _dropout(0.0))
    assert _run(config, capsys, "--to", "rectify")[0] == 1  # the report reads rectify's too
    assert _run(config, capsys, "--stage", "report")[0] == 0
    index = Table.read(tmp_path / "out/n/ingest/night/block_index.ecsv")
    line_time = float(index["line_time"][0])
    assert np.allclose(index["line_time"], line_time)
    seconds = (int(np.sum(index["n_rows"])) - 60) * line_time  # the 60 dropout rows out
    summary = dict(json.loads((tmp_path / "out/n/report/night/summary.json").read_text()))
    assert summary["hours of usable data"] == (
        f"{seconds / 3600:.2f} h ({seconds:.0f} s; 60 rows without data left out)"
    )


def _narrow(data, header):
    """Block 2 read out with a window of 40 image columns instead of 48."""
    narrow = np.concatenate([data[:, :40], data[:, 48:]], axis=1)
    rows = header["NAXIS2"]
    header["DATASEC"] = f"[1:40,1:{rows}]"
    header["BIASSEC"] = f"[41:48,1:{rows}]"
    return narrow, header


@pytest.mark.parametrize("overlap_rows", [64, 0])
def test_a_block_of_another_format_spares_its_neighbours(
    clean_night, tmp_path, capsys, overlap_rows
):
    """Block 2 with 40 image columns: blocks 1 and 3 used to lose every
    product (the stretches mixed formats), or with overlap_rows 0 the whole
    night was blocked at columns.  Now block 2 is a segment of its own, its
    columns are solved on their own, and the others are reduced as without it."""
    config = _copy_night(clean_night, tmp_path)
    clean = clean_night
    if overlap_rows != 64:  # a clean run with the same overlap
        clean = tmp_path / "clean"
        shutil.copytree(clean_night / "raw", clean / "raw")
        shutil.copy(clean_night / "night.yaml", clean / "night.yaml")
    for folder in {tmp_path, clean}:
        text = yaml.safe_load((folder / "night.yaml").read_text())
        text["run"]["overlap_rows"] = overlap_rows
        (folder / "night.yaml").write_text(yaml.safe_dump(text))
    if clean != clean_night:
        assert main(["run", str(clean / "night.yaml"), "--to", "calibrate"]) == 1
    _rewrite(tmp_path / "raw" / BAD, _narrow)
    code, out = _run(config, capsys, "--to", "calibrate")
    assert code == 1 and ", 0 failed, 0 blocked" in out, out
    problems = _problems(out)
    assert problems == [
        f"problem: ingest/night: {BAD}: format NAXIS1 48, DATASEC columns 1:40, BIASSEC "
        "columns 41:48 differs from the night's (NAXIS1 56, DATASEC columns 1:48, BIASSEC "
        "columns 49:56); new segment, its 40 image columns solved on their own."
    ], out
    # Night rows 0-511 (blocks 0, 1), 512-767 (block 2), 768-1023 (block 3).
    products = tmp_path / "out/n"
    assert _product(products / "columns/night", "columns_40").meta["stretches"] == ["s0001"]
    assert _plane(products / "calibrate/s0001", "FLUX").shape == (256, 40)
    _assert_same_products(products, clean / "out/n", [("s0000", "s0000"), ("s0002", "s0001")])
    # Rectify flags what lies beyond a segment's edge OUTSIDE, as at the
    # night's ends, without asking for more overlap_rows (a regression: it did).
    code, out = _run(config, capsys, "--stage", "rectify", "--stretches", "0,2")
    assert code == 0, out
    for unit in ("s0000", "s0002"):
        sidecar = json.loads((products / "rectify" / unit / "_provenance.json").read_text())
        assert sidecar["warnings"] == [], sidecar["warnings"]


def test_stretches_are_cut_at_segment_boundaries():
    index = Table(
        {"row_start": [0, 100, 200, 400], "n_rows": [100, 100, 100, 100], "segment": [0, 1, 1, 2]}
    )
    segments = segment_rows(index)
    assert segments == [(0, 100), (100, 300), (400, 500)]  # rows 300-399: a gap
    stretches = plan_stretches(500, 150, 20, segments)
    assert [(s.start, s.stop, s.lo, s.hi) for s in stretches] == [
        (0, 100, 0, 100),
        (100, 250, 100, 270),
        (250, 300, 230, 300),
        (400, 500, 400, 500),
    ]
    assert [s.index for s in stretches] == [0, 1, 2, 3]
    # Without labels, a gap or an overlap still ends a segment; a later block's rows win.
    overlap = Table({"row_start": [0, 90, 300], "n_rows": [100, 100, 50], "segment": [0, 1, 2]})
    assert segment_rows(overlap) == [(0, 90), (90, 190), (300, 350)]
    assert segment_rows(Table({"row_start": [0, 100], "n_rows": [100, 100]})) == [(0, 200)]
    with pytest.raises(ValueError, match="segments must be ascending"):
        plan_stretches(100, 10, 0, [(50, 60), (0, 10)])


def test_a_header_site_that_differs_from_the_config_is_reported(tmp_path, capsys):
    config = _night(tmp_path)  # SITELAT 20.0 in the headers
    text = yaml.safe_load(config.read_text())
    text["site"]["latitude"] = 20.5
    config.write_text(yaml.safe_dump(text))
    code, out = _run(config, capsys, "--stage", "ingest")
    assert code == 1
    assert _problems(out) == [
        "problem: ingest/night: block_0000.fits and 3 more: header site SITELAT=20 (config "
        "latitude 20.5 deg) differs by more than 0.01 deg or 150 m; the geometry uses the "
        "config's site: check site: in the config."
    ]


@pytest.mark.slow
def test_an_all_zero_demo_block_leaves_the_flat_and_dark_as_without_it(tmp_path, capsys):
    """The reproduction on the demo night: a zero-filled block_0002 drove every
    column's dark to ~0 (sky_min -0.0004 e-) and lost six column flags, with
    exit 0 and no message."""
    config = demo_copy(tmp_path / "bad")
    clean = demo_copy(tmp_path / "clean")
    (tmp_path / "clean/demo_frames/block_0002.fits.gz").unlink()
    _rewrite(tmp_path / "bad/demo_frames/block_0002.fits.gz", _zero)
    code, out = _run(config, capsys, "--to", "columns")
    assert code == 1
    _, clean_out = _run(clean, capsys, "--to", "columns")
    extra = [line for line in _problems(out) if line not in _problems(clean_out)]
    assert extra == [
        "problem: ingest/night: rejected block_0002.fits.gz: all 1048576 finite image pixels "
        "equal 0 ADU (a dead readout?); its rows are left out of the night (a gap)."
    ]
    ours = _product(tmp_path / "bad/demo_products/demo-2026-10-15/columns/night", "columns")
    theirs = _product(tmp_path / "clean/demo_products/demo-2026-10-15/columns/night", "columns")
    for name in ("flat", "dark", "flags"):
        np.testing.assert_array_equal(ours[name], theirs[name])
    assert ours.meta["sky_min"] == theirs.meta["sky_min"] > 40000  # e-, demo_frames/README.md


def test_a_format_that_cannot_be_solved_costs_only_its_stretches():
    """The odd format's solve fails (no usable row): one problem line; the
    camera's table is still solved, and calibrate of an odd stretch fails
    naming the missing table."""
    from types import SimpleNamespace

    from pipeline.exceptions import StageError
    from pipeline.stages.base import Stretch
    from pipeline.stages.calibrate import ColumnSolveOptions, _columns_table, summarize_columns
    from pipeline.stages.columns import STAGE

    rng = np.random.default_rng(8)
    sky = np.linspace(1000.0, 5000.0, 512)[:, None]  # a fading twilight: a regression solve
    good = summarize_columns(
        sky * rng.uniform(0.95, 1.05, 48) + rng.normal(0, 5, (512, 48)),
        np.arange(512),
        np.arange(512) * 0.05,
        5.0,
        block_rows=32,
    )
    empty = summarize_columns(np.zeros((0, 40)), np.arange(0), np.arange(0.0), 5.0)
    stretches = (Stretch(0, 0, 512, 0, 512), Stretch(1, 512, 768, 512, 768))
    context = SimpleNamespace(camera=SimpleNamespace(n_columns=48), input_stretches=stretches)
    products = STAGE.run(
        inputs={
            "column_stats": [{"column_stats": good}, {"column_stats": empty}],
            "flat_file": None,
        },
        options=ColumnSolveOptions(min_blocks=4),
        context=context,
    )
    assert sorted(products) == ["columns", "problems"]
    assert len(products["columns"]) == 48
    (line,) = products["problems"]
    assert line.startswith("no 40-column table for stretches s0001 (not the camera's 48 columns)")
    odd = SimpleNamespace(camera=context.camera, stretch=stretches[1])
    with pytest.raises(StageError, match="has 40 image columns but the columns stage solved no"):
        _columns_table(products, 40, odd)
    assert _columns_table(products, 48, odd) is products["columns"]


def test_a_gain_the_raw_data_contradict_is_named(clean_night, tmp_path, capsys):
    """GAIN=1e5 e-/ADU in every header (the simulator's camera has 2.0) ran to
    the end without a word, while the noise model it implies flagged most
    pixels as cosmic rays; the columns stage now compares it with the gain
    the sky's photon noise shows.  The clean night raises no such line."""
    clean = _problems(_run(clean_night / "night.yaml", capsys, "--to", "columns")[1])
    assert not [line for line in clean if "columns/night" in line]
    config = _copy_night(clean_night, tmp_path)
    for path in sorted((tmp_path / "raw").glob("block_*.fits")):
        with fits.open(path, mode="update") as hdul:
            hdul[0].header["GAIN"] = 1e5
    code, out = _run(config, capsys, "--to", "columns")
    assert code == 1
    (line,) = [line for line in _problems(out) if "columns/night" in line]
    said = re.search(r"GAIN=1e\+05 e-/ADU, but the sky's photon noise says (\S+)", line)
    assert float(said.group(1).rstrip(".;")) == pytest.approx(2.0, rel=0.1), line
