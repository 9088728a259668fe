"""The runner's own read of a block index: astropy's values, or no answer.

:func:`pipeline.runner._blockrows.read_block_rows` reads the columns the
runner plans stretches and reads raw rows with, without astropy.  The
reference is astropy's ECSV reader (``Table.read(format='ascii.ecsv')``),
column by column and through everything the runner derives from them; a
file it cannot be sure to read as astropy does must give None.
"""

from __future__ import annotations

import numpy as np
import pytest
from astropy.table import MaskedColumn, Table

from pipeline.runner._blockrows import BlockRows, read_block_rows
from pipeline.runner._ecsv import write_ecsv
from pipeline.runner._rawio import _overlapping, block_index_rows, overlapping_blocks
from pipeline.stages.base import plan_stretches, segment_rows


def _index(n: int = 7, *, segment: bool = True) -> Table:
    """A block index as ingest writes one, with awkward file names and a gap."""
    starts = np.array([0, 100, 200, 290, 500, 600, 700][:n], dtype=np.int64)
    table = Table()
    names = ["b 0.fits", 'b"1".fits', "b,2.fits", "b#3.fits", "b4.fits.gz", "b5", "b6.fits"]
    table["file"] = np.array(names[:n], dtype=str)
    table["hdu"] = np.arange(n, dtype=np.int32) % 2
    table["row_start"] = starts
    table["n_rows"] = np.full(n, 100, dtype=np.int64)
    table["date_obs"] = np.array(["2026-03-20T02:00:00.000"] * n, dtype=str)
    table["gain"] = np.full(n, 2.0)
    if segment:
        table["segment"] = np.array([0, 0, 0, 1, 2, 2, 2][:n], dtype=np.int32)
    table.meta["reference_time"] = "2026-03-20T02:00:00.000"
    table.meta["n_rejected"] = 0
    return table


def _runner_views(rows) -> tuple:
    """What the runner derives from a block index: night rows, segments, stretches, reads."""
    total = block_index_rows(rows)
    segments = segment_rows(rows)
    stretches = plan_stretches(total, 120, 16, segments)
    reads = [_overlapping(rows, s.lo, s.hi) for s in stretches]
    picked = [overlapping_blocks(rows, s.lo, s.hi).tolist() for s in stretches]
    return total, segments, [(s.lo, s.hi) for s in stretches], reads, picked


@pytest.mark.parametrize("segment", [True, False])
@pytest.mark.parametrize("n", [0, 1, 7])
def test_the_runner_reads_what_astropy_reads(tmp_path, n, segment):
    path = tmp_path / "block_index.ecsv"
    write_ecsv(_index(n, segment=segment), path)
    theirs = Table.read(path, format="ascii.ecsv")  # the reference: astropy's reader
    ours = read_block_rows(path)
    assert ours is not None
    wanted = ["file", "hdu", "row_start", "n_rows"] + (["segment"] if segment else [])
    assert ours.colnames == wanted
    assert len(ours) == len(theirs) == n
    for name in wanted:
        assert ours[name].tolist() == theirs[name].tolist(), name
    if n:
        assert _runner_views(ours) == _runner_views(theirs)
        assert _runner_views(ours) == _runner_views(BlockRows.of_table(theirs))
    if n == 7:
        subset = ours[overlapping_blocks(ours, 150, 320)]
        assert subset["file"].tolist() == ['b"1".fits', "b,2.fits", "b#3.fits"]


def test_astropy_s_own_writer_is_read_too(tmp_path):
    path = tmp_path / "block_index.ecsv"
    _index().write(path, format="ascii.ecsv")
    theirs = Table.read(path, format="ascii.ecsv")
    assert _runner_views(read_block_rows(path)) == _runner_views(theirs)


def _masked(table: Table) -> Table:
    table["n_rows"] = MaskedColumn(table["n_rows"], mask=[False, True] + [False] * 5)
    return table


def _float_rows(table: Table) -> Table:
    table["row_start"] = table["row_start"].astype(float)
    return table


def _no_hdu(table: Table) -> Table:
    del table["hdu"]
    return table


def _comment_like_name(table: Table) -> Table:
    # astropy writes it unquoted and reads the row back as a comment: left out
    table["file"][3] = "#b3.fits"
    return table


@pytest.mark.parametrize("spoil", [_masked, _float_rows, _no_hdu, _comment_like_name])
def test_what_it_cannot_be_sure_of_is_left_to_astropy(tmp_path, spoil):
    path = tmp_path / "block_index.ecsv"
    _table = spoil(_index())
    _table.write(path, format="ascii.ecsv")
    assert read_block_rows(path) is None


def test_other_files_are_left_to_astropy(tmp_path):
    comma = tmp_path / "comma.ecsv"
    _index().write(comma, format="ascii.ecsv", delimiter=",")
    assert read_block_rows(comma) is None
    plain = tmp_path / "plain.csv"
    plain.write_text("file hdu row_start n_rows\nb0.fits 0 0 100\n")
    assert read_block_rows(plain) is None
    assert read_block_rows(tmp_path / "absent.ecsv") is None
    short = tmp_path / "short.ecsv"
    write_ecsv(_index(), short)
    short.write_text(short.read_text().rstrip("\n").rsplit(" ", 1)[0] + "\n")  # a cell lost
    assert read_block_rows(short) is None
    binary = tmp_path / "binary.ecsv"
    binary.write_bytes(b"# %ECSV 1.0\n\xff\xfe")
    assert read_block_rows(binary) is None
