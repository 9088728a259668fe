"""Tests of the ingest stage: header checks, the block index and broken input."""

from __future__ import annotations

import json
import re
import warnings
from dataclasses import replace
from pathlib import Path

import astropy.units as u
import numpy as np
import pytest
from astropy.io import fits
from astropy.table import Table
from astropy.time import Time

from pipeline.exceptions import IngestError
from pipeline.stages.base import RawFile
from pipeline.stages.ingest import (
    IngestOptions,
    check_block_data,
    describe_rows,
    index_night,
    ingest_files,
    parse_block_header,
    parse_section,
    read_block_header,
    read_block_rows,
)

N_ROWS, N_IMAGE, N_OVERSCAN = 40, 24, 6
LINE_TIME = 0.05
START = Time("2026-03-20T02:00:00", scale="utc")


def make_header(seq: int, start: Time = START, **changes) -> fits.Header:
    """Header of block ``seq`` of a contiguous night (invented demo values)."""
    shape = (N_ROWS, N_IMAGE + N_OVERSCAN)
    header = fits.PrimaryHDU(np.zeros(shape, np.uint16)).header
    header["DATE-OBS"] = (start + seq * N_ROWS * LINE_TIME * u.s).isot
    header["TIMESYS"] = "UTC"
    header["LINETIME"] = LINE_TIME
    header["TDIROWS"] = 16
    header["BLOCKSEQ"] = seq
    header["DATASEC"] = f"[1:{N_IMAGE},1:{N_ROWS}]"
    header["BIASSEC"] = f"[{N_IMAGE + 1}:{N_IMAGE + N_OVERSCAN},1:{N_ROWS}]"
    header["GAIN"] = 2.0
    header["RDNOISE"] = 5.0
    header["SATURATE"] = 65535.0
    header["SITELAT"] = 31.5
    header["SITELONG"] = -110.2
    header["SITEELEV"] = 2400.0
    header["FILTER"] = "r"
    for key, value in changes.items():
        if value is None:
            del header[key]
        else:
            header[key] = value
    return header


def write_block(path, header, data=None):
    """Write a uint16 block (BZERO-scaled, as a camera would)."""
    if data is None:
        rng = np.random.default_rng(header.get("BLOCKSEQ", 0))
        data = rng.integers(1000, 1100, (N_ROWS, N_IMAGE + N_OVERSCAN)).astype(np.uint16)
    hdu = fits.PrimaryHDU(data, header=header)
    hdu.writeto(path, overwrite=True)
    return path


def raw_file(path) -> RawFile:
    """What the runner hands ingest for one file (header read, errors caught)."""
    try:
        with warnings.catch_warnings():
            # The truncation warning is dropped on purpose: ingest must find the
            # truncation from the file size alone.
            warnings.simplefilter("ignore")
            with fits.open(path) as hdul:
                return RawFile(path.name, 0, hdul[0].header.copy(), path.stat().st_size)
    except OSError as exc:
        return RawFile(path.name, None, None, path.stat().st_size, str(exc))


def test_parse_section_matches_fits_convention():
    # FITS standard: 1-based inclusive ranges, NAXIS1 (x, columns) first.
    rows, cols = parse_section("[3:10,1:4]")
    data = np.arange(40 * 12).reshape(40, 12)
    assert data[rows, cols].shape == (4, 8)
    assert data[rows, cols][0, 0] == data[0, 2]
    with pytest.raises(ValueError, match="ascending"):
        parse_section("[10:3,1:4]")
    with pytest.raises(ValueError, match="not a section"):
        parse_section("1:4")


def test_header_values_and_keyword_map():
    header = make_header(0)
    header.rename_keyword("RDNOISE", "RON")
    del header["FILTER"]
    info = parse_block_header(
        header, "b0.fits", keywords={"read_noise": "RON"}, defaults={"filter": "g"}
    )
    assert info.read_noise == 5.0 and info.filter == "g"
    assert info.defaulted == ("filter",)
    assert info.n_rows == N_ROWS and info.n_columns == N_IMAGE + N_OVERSCAN
    assert info.date_obs.scale == "utc"


@pytest.mark.parametrize("text", ["2026-03-20 02:00:00.000", "2026-03-20t02:00:00"])
def test_a_date_obs_with_a_space_for_its_t_says_how_to_write_it(text):
    """It was rejected as "not an ISO 8601 time", which it nearly is (ISO 8601
    allows a space by agreement); the FITS datetime format asks for a 'T'
    (FITS 4.0, section 9.1.1, from memory)."""
    with pytest.raises(IngestError, match=r"write it as 'YYYY-MM-DDThh:mm:ss\[\.sss\]' \(a 'T'"):
        parse_block_header(make_header(0, **{"DATE-OBS": text}), "b0.fits")
    with pytest.raises(IngestError, match=r"write it as 'YYYY-MM-DDThh:mm:ss\[\.sss\]', or"):
        parse_block_header(make_header(0, **{"DATE-OBS": "20/03/2026 02:00:00"}), "b0.fits")


def test_an_out_of_range_value_names_its_keyword_alone():
    """The message said "RDNOISE=-5.0 or SITELAT=31.5 out of range" for a bad
    RDNOISE: it named a good keyword beside the bad one."""
    with pytest.raises(
        IngestError, match=r"^b0.fits: RDNOISE=-5.0 is out of range: it must be 0 or"
    ):
        parse_block_header(make_header(0, RDNOISE=-5.0), "b0.fits")
    with pytest.raises(
        IngestError, match=r"^b0.fits: SITELAT=95.0 is out of range: it must be -90"
    ):
        parse_block_header(make_header(0, SITELAT=95.0), "b0.fits")


def test_a_date_obs_without_time_of_day_is_rejected_with_the_reason():
    """DATE-OBS='2026-03-20' (a date alone, which the FITS standard's datetime
    format allows) used to read as midnight: every block of a night then
    started at 00:00, each 'overlapped' the one before and its rows 'won', so
    the night collapsed onto one block's rows with a message about overlaps."""
    header = make_header(1, **{"DATE-OBS": "2026-03-20", "TIME-OBS": "02:00:02.000"})
    with pytest.raises(IngestError, match=r"b1.fits: DATE-OBS='2026-03-20' gives a date without"):
        parse_block_header(header, "b1.fits")
    with pytest.raises(IngestError, match=r"TIME-OBS='02:00:02.000' may hold the time"):
        parse_block_header(header, "b1.fits")
    # A full date and time still reads, to the millisecond.
    info = parse_block_header(make_header(1, **{"DATE-OBS": "2026-03-20T02:00:02.000"}))
    assert info.date_obs.isot == "2026-03-20T02:00:02.000"


def test_tai_date_obs_is_converted_to_utc():
    # TAI - UTC = 37 s since 2017 (IERS Bulletin C).
    header = make_header(0, TIMESYS="TAI")
    info = parse_block_header(header)
    as_tai = Time(header["DATE-OBS"], scale="tai")
    as_utc = Time(header["DATE-OBS"], scale="utc")
    assert (as_tai - info.date_obs).sec == pytest.approx(0, abs=1e-6)  # same instant
    assert (info.date_obs - as_utc).sec == pytest.approx(-37, abs=1e-6)  # leap seconds


BAD_HEADERS = [
    ({"LINETIME": None}, "missing keyword LINETIME"),
    ({"LINETIME": "fast"}, "LINETIME='fast' is not a float"),
    ({"TDIROWS": 16.5}, "TDIROWS=16.5 is not a int"),
    ({"GAIN": -1.0}, "GAIN=-1.0 must be positive"),
    ({"DATE-OBS": "yesterday"}, "is not a FITS date and time: write it as"),
    # FITS datetimes carry no zone designator (FITS 4.0, section 9.1.1, from memory)
    ({"DATE-OBS": "2026-03-20T02:00:02+00:00"}, "ends with a time-zone designator ('+00:00')"),
    ({"DATASEC": "[1:24,1:30]"}, "do not cover all"),
    ({"BIASSEC": "[20:30,1:40]"}, "overlap"),
    ({"BIASSEC": "[25:40,1:40]"}, "reaches outside"),
    ({"TIMESYS": "LOCAL"}, "TIMESYS"),
]


@pytest.mark.parametrize(("changes", "message"), BAD_HEADERS)
def test_bad_header_is_rejected_in_one_line(changes, message):
    with pytest.raises(IngestError, match=re.escape(message)) as info:
        parse_block_header(make_header(0, **changes), "bad.fits")
    assert str(info.value).startswith("bad.fits: ")
    assert "\n" not in str(info.value)


def test_unknown_canonical_name_is_a_config_error():
    with pytest.raises(ValueError, match="Unknown canonical keyword"):
        parse_block_header(make_header(0), keywords={"readnoise": "RON"})


def test_read_block_header_and_rows(tmp_path):
    path = write_block(tmp_path / "b0.fits", make_header(0))
    info = read_block_header(path)
    image, overscan = read_block_rows(path, info)
    with fits.open(path) as hdul:
        stored = hdul[0].data.astype(np.float32)
    assert image.dtype == np.float32 and image.shape == (N_ROWS, N_IMAGE)
    np.testing.assert_array_equal(image, stored[:, :N_IMAGE])
    np.testing.assert_array_equal(overscan, stored[:, N_IMAGE:])
    flipped, _ = read_block_rows(path, info, slice(0, 5), flip_rows=True, flip_columns=True)
    np.testing.assert_array_equal(flipped, stored[::-1, :N_IMAGE][:5, ::-1])


def test_truncated_and_non_fits_files_are_rejected(tmp_path):
    """A file cut before its first row is whole has nothing to salvage."""
    path = write_block(tmp_path / "b0.fits", make_header(0))
    data = path.read_bytes()
    short = tmp_path / "short.fits"
    row_bytes = (N_IMAGE + N_OVERSCAN) * 2
    short.write_bytes(data[: 2880 + row_bytes - 1])  # one header record, then < 1 row
    with pytest.raises(IngestError, match=r"short\.fits: truncated file: it ends before its first"):
        read_block_header(short)
    text = tmp_path / "notes.fits"
    text.write_text("observing log, not an image\n")
    with pytest.raises(IngestError, match=r"notes\.fits: not a readable FITS file") as error:
        read_block_header(text)
    # astropy's advice (ignore_missing_simple=True) is no use to a night's run.
    assert "ignore_missing_simple" not in str(error.value)
    assert "move it out of the raw folder or narrow night.pattern" in str(error.value)
    empty = tmp_path / "empty.fits"
    empty.write_bytes(b"")
    with pytest.raises(IngestError, match=r"empty\.fits: empty file \(0 bytes: a copy that "):
        read_block_header(empty)  # astropy said "Empty or corrupt FITS file"


def _cut_night(tmp_path, suffix=""):
    """Three contiguous blocks; the middle one cut after 23 whole rows (and 11 bytes)."""
    import gzip

    stored = []
    for seq in range(3):
        path = write_block(tmp_path / f"b{seq}.fits", make_header(seq))
        with fits.open(path) as hdul:
            stored.append(np.asarray(hdul[0].data, np.float32))
    cut = tmp_path / "b1.fits"
    whole = cut.read_bytes()
    row_bytes = (N_IMAGE + N_OVERSCAN) * 2
    cut.write_bytes(whole[: 2880 + 23 * row_bytes + 11])
    if suffix == ".gz":  # an interrupted copy of a gzip file: its stream ends early
        for seq in range(3):
            path = tmp_path / f"b{seq}.fits"
            packed = gzip.compress(whole if seq == 1 else path.read_bytes())
            if seq == 1:  # cut where the stream has given 23 whole rows (and not 24)
                need = 2880 + 23 * row_bytes + 11
                n = next(n for n in range(len(packed)) if len(zlib_partial(packed[:n])) >= need)
                assert len(zlib_partial(packed[:n])) < 2880 + 24 * row_bytes
                packed = packed[:n]
            (tmp_path / f"b{seq}.fits.gz").write_bytes(packed)
            path.unlink()
    return stored


def zlib_partial(packed: bytes) -> bytes:
    """What a cut gzip stream decompresses to (RFC 1952 wrapper, Python's zlib)."""
    import zlib

    return zlib.decompressobj(16 + zlib.MAX_WBITS).decompress(packed)


@pytest.mark.parametrize("suffix", ["", ".gz"])
def test_a_file_cut_short_keeps_its_whole_rows_and_names_the_lost_ones(tmp_path, suffix):
    """An interrupted copy used to reject its block whole, though the rows
    before the cut are readable: now they are the block, the rest a gap,
    and one line names the file and the rows lost."""
    from pipeline.runner._rawio import read_raw_files, read_rows

    stored = _cut_night(tmp_path, suffix)
    names = [f"b{seq}.fits{suffix}" for seq in range(3)]
    info = read_block_header(tmp_path / names[1])
    assert (info.n_rows, info.lost_rows) == (23, N_ROWS - 23)
    image, overscan = read_block_rows(tmp_path / names[1], info)  # the Python reader too
    np.testing.assert_array_equal(np.hstack([image, overscan]), stored[1][:23])
    night = ingest_files(read_raw_files(tmp_path, names), IngestOptions())
    assert not night.rejected
    assert list(night.table["file"]) == names
    assert list(night.table["n_rows"]) == [N_ROWS, 23, N_ROWS]
    assert list(night.table["row_start"]) == [0, N_ROWS, 2 * N_ROWS]
    assert night.problems[0] == (
        f"{names[1]}: truncated file (cut after 23 whole rows: an interrupted copy?): the first "
        f"23 of its {N_ROWS} rows are used; rows 23-{N_ROWS - 1} (night rows {N_ROWS + 23}-"
        f"{2 * N_ROWS - 1}, {(N_ROWS - 23) * LINE_TIME:.2f} s) are lost and left out as a gap; "
        "copy the file again if the camera's copy is whole."
    )
    assert night.problems[1].startswith(f"{names[2]}: gap of {N_ROWS - 23}.0 rows")
    rows = read_rows(tmp_path, night.table, 0, 3 * N_ROWS)
    np.testing.assert_array_equal(rows[N_ROWS : N_ROWS + 23], stored[1][:23])
    assert np.isnan(rows[N_ROWS + 23 : 2 * N_ROWS]).all()
    np.testing.assert_array_equal(rows[2 * N_ROWS :], stored[2])


def test_a_file_without_its_final_padding_holds_every_row(tmp_path):
    """A writer that leaves out the padding after the last row (the FITS
    standard pads the data to 2880-byte records) leaves every pixel readable;
    astropy warns "File may have been truncated" and the block was rejected
    as a truncated file."""
    from pipeline.runner._rawio import read_raw_files, read_rows

    path = write_block(tmp_path / "b0.fits", make_header(0))
    with fits.open(path) as hdul:
        stored = np.asarray(hdul[0].data, np.float32)
    data_bytes = N_ROWS * (N_IMAGE + N_OVERSCAN) * 2
    assert data_bytes % 2880  # there is padding to leave out
    path.write_bytes(path.read_bytes()[: 2880 + data_bytes])
    info = read_block_header(path)
    assert (info.n_rows, info.lost_rows) == (N_ROWS, 0)
    night = ingest_files(read_raw_files(tmp_path, ["b0.fits"]), IngestOptions())
    assert night.ok, (night.rejected, night.problems)
    np.testing.assert_array_equal(read_rows(tmp_path, night.table, 0, N_ROWS), stored)


def test_blank_pixels_of_unsigned_data_are_no_data(tmp_path):
    """A camera's 16-bit unsigned data (BZERO = 32768) with BLANK pixels: the
    pixel summary counted them as no data, but the rows read gave them a
    value, 0 ADU (astropy keeps unsigned data as integers; FITS 4.0, section
    4.4.2.5: BLANK marks undefined integer pixels, from memory)."""
    from pipeline.runner._rawio import read_raw_files, read_rows

    data = np.random.default_rng(0).integers(1000, 1100, (N_ROWS, N_IMAGE + N_OVERSCAN))
    data = data.astype(np.uint16)
    data[5, 7] = 0  # stored as -32768, the BLANK value
    header = make_header(0)
    hdu = fits.PrimaryHDU(data, header=header)
    hdu.header["BLANK"] = -32768
    hdu.writeto(tmp_path / "b0.fits")
    (raw,) = read_raw_files(tmp_path, ["b0.fits"])
    assert raw.pixels.n_finite[7] == N_ROWS - 1
    night = ingest_files([raw], IngestOptions())
    rows = read_rows(tmp_path, night.table, 0, N_ROWS)
    assert np.isnan(rows[5, 7]) and np.count_nonzero(np.isnan(rows)) == 1
    np.testing.assert_array_equal(rows[6], data[6])


def test_a_gap_after_a_cut_file_is_counted_in_blocks_of_the_header_size():
    """Two files cut after half their rows: the gap between them was said to
    be "about 1.00 block(s)", counted in blocks of the 20 rows kept, not of
    the 40 the header promises."""
    infos = [
        replace(parse_block_header(make_header(seq), f"b{seq}.fits"), n_rows=20, lost_rows=20)
        for seq in range(2)
    ]
    (line,) = index_night(infos).problems
    assert line.startswith("b1.fits: gap of 20.0 rows (1.00 s, about 0.50 block(s); ")


def test_a_cut_file_stored_last_read_first_keeps_its_last_read_rows(tmp_path):
    """With camera.flip_rows the rows stored first are the last read: those are
    kept, and the block starts lost_rows line times after its DATE-OBS."""
    from pipeline.runner._rawio import read_raw_files, read_rows

    stored = _cut_night(tmp_path)
    names = [f"b{seq}.fits" for seq in range(3)]
    night = ingest_files(read_raw_files(tmp_path, names), IngestOptions(), flip_rows=True)
    lost = N_ROWS - 23
    assert list(night.table["row_start"]) == [0, N_ROWS + lost, 2 * N_ROWS]
    assert night.table["t_start"][1] == pytest.approx((N_ROWS + lost) * LINE_TIME, abs=1e-6)
    assert f"(night rows {N_ROWS}-{N_ROWS + lost - 1}," in night.problems[0]
    rows = read_rows(tmp_path, night.table, 0, 3 * N_ROWS, flip_rows=True)
    # Readout row k of a flipped block is stored at N_ROWS - 1 - k.
    np.testing.assert_array_equal(rows[N_ROWS + lost : 2 * N_ROWS], stored[1][:23][::-1])
    assert np.isnan(rows[N_ROWS : N_ROWS + lost]).all()


def test_a_tile_compressed_file_cut_short_says_what_to_do(tmp_path):
    """Its rejection named astropy's warning alone, not that nothing was kept."""
    header = make_header(0)
    data = np.random.default_rng(0).integers(1000, 1100, (N_ROWS, N_IMAGE + N_OVERSCAN))
    path = tmp_path / "b0.fits.fz"
    fits.HDUList([fits.PrimaryHDU(), fits.CompImageHDU(data.astype(np.uint16), header)]).writeto(
        path
    )
    assert read_block_header(path).n_rows == N_ROWS
    whole = path.read_bytes()
    path.write_bytes(whole[: len(whole) - 2000])
    with pytest.raises(
        IngestError,
        match=r"b0\.fits\.fz: truncated file \(.*\): none of its rows are used .*copy the file "
        "again from the camera",
    ):
        read_block_header(path)


def test_an_image_extension_inherits_the_primary_keywords_when_it_says_so(tmp_path):
    """A camera that writes its keywords once, in the primary header, and its
    pixels in an extension with INHERIT = T (the FITS INHERIT convention)
    was rejected for a "missing keyword DATE-OBS"."""
    header = make_header(0)
    data = np.random.default_rng(0).integers(1000, 1100, (N_ROWS, N_IMAGE + N_OVERSCAN))
    primary = fits.PrimaryHDU(header=fits.Header([c for c in header.cards if c.keyword not in (
        "SIMPLE", "BITPIX", "NAXIS", "NAXIS1", "NAXIS2", "EXTEND")]))  # fmt: skip
    primary.header["GAIN"] = 99.0  # the extension's own value wins
    image = fits.ImageHDU(data.astype(np.uint16), fits.Header([("INHERIT", True), ("GAIN", 2.0)]))
    path = tmp_path / "mef.fits"
    fits.HDUList([primary, image]).writeto(path)
    info = read_block_header(path)
    assert (info.hdu, info.n_rows, info.gain, info.date_obs.isot) == (
        1, N_ROWS, 2.0, header["DATE-OBS"]
    )  # fmt: skip
    assert info.block_seq == 0 and info.image_section == header["DATASEC"]
    del image.header["INHERIT"]
    fits.HDUList([primary, image]).writeto(path, overwrite=True)
    with pytest.raises(
        IngestError,
        match=r"mef\.fits: missing keyword DATE-OBS .* \(the image is in extension 1, whose "
        r"header is read with the primary's only when it says INHERIT = T\)",
    ):
        read_block_header(path)


def test_a_truncated_compressed_block_is_named_as_such(tmp_path):
    """astropy calls a cut gzip file "Empty or corrupt"; the stream says it ends early.

    (gzip: RFC 1952, a member ends with its CRC-32 and size; Python's gzip
    module raises EOFError for a stream cut before them.)  Here the cut comes
    within the header, so no row can be salvaged."""
    import gzip

    path = write_block(tmp_path / "b0.fits", make_header(0))
    packed = gzip.compress(path.read_bytes())
    cut = tmp_path / "cut.fits.gz"
    cut.write_bytes(packed[:30])
    assert len(zlib_partial(packed[:30])) < 2880
    with pytest.raises(
        IngestError, match=r"cut\.fits\.gz: .*its gz stream is damaged or ends early"
    ):
        read_block_header(cut)
    whole = tmp_path / "whole.fits.gz"
    whole.write_bytes(packed)
    assert read_block_header(whole).n_rows == read_block_header(path).n_rows


def test_nan_filled_data_is_rejected():
    with pytest.raises(IngestError, match="all 6 image pixels are NaN"):
        check_block_data(np.full((2, 3), np.nan), "nan.fits")
    with pytest.raises(IngestError, match=r"equal 0 ADU"):
        check_block_data(np.zeros((2, 3)), "zero.fits")
    check_block_data(np.array([[1.0, np.nan, 2.0]]))


def test_read_block_header_reads_compressed_blocks(tmp_path):
    """Regression: the size check compared the gzip file's size with the data's."""
    plain = write_block(tmp_path / "b0.fits", make_header(0))
    packed = write_block(tmp_path / "b0.fits.gz", make_header(0))
    assert packed.stat().st_size < plain.stat().st_size  # uint16 noise in 0-100 packs well
    assert read_block_header(packed) == replace(read_block_header(plain), name="b0.fits.gz")
    # The project's own demo blocks (gzip, see demo_frames/README.md).
    demo = Path(__file__).resolve().parents[1] / "demo_frames" / "block_0000.fits.gz"
    assert read_block_header(demo).n_rows == 1024


def _unusable(values, **header):
    """A block whose image section holds ``values``, the overscan a live bias."""
    rng = np.random.default_rng(3)
    data = rng.normal(1000.0, 3.0, (N_ROWS, N_IMAGE + N_OVERSCAN)).astype(np.float32)
    data[:, :N_IMAGE] = values
    return data, make_header(0, BITPIX=-32, **header)


UNUSABLE_BLOCKS = [
    (0.0, {}, "all 960 finite image pixels equal 0 ADU (a dead readout?)"),
    (np.nan, {}, "all 960 image pixels are NaN or infinite"),
    (
        np.linspace(61000.0, 65535.0, N_IMAGE),
        {"SATURATE": 60000.0},
        "all 960 finite image pixels are saturated (61000 to 65535 ADU, SATURATE=60000)",
    ),
]


@pytest.mark.parametrize(("values", "header", "message"), UNUSABLE_BLOCKS)
def test_a_block_without_a_usable_pixel_is_rejected_in_one_line(tmp_path, values, header, message):
    from pipeline.runner._rawio import read_raw_files

    data, header = _unusable(values, **header)
    path = tmp_path / "b0.fits"
    fits.PrimaryHDU(data, header).writeto(path)
    (raw,) = read_raw_files(tmp_path, ["b0.fits"])
    night = ingest_files([raw], IngestOptions())
    assert len(night.table) == 0 and len(night.rejected) == 1
    assert night.rejected[0].startswith(f"b0.fits: {message}")
    assert night.rejected[0].endswith("its rows are left out of the night (a gap).")
    with pytest.raises(IngestError, match=re.escape(message)):
        read_block_header(path)
    # One row of usable pixels is enough: a block with some usable data is kept.
    data[5, :N_IMAGE] = np.linspace(1100.0, 1200.0, N_IMAGE)
    fits.PrimaryHDU(data, header).writeto(path, overwrite=True)
    assert read_block_header(path).n_rows == N_ROWS


def test_pixel_summary_in_chunks_equals_the_whole(tmp_path, monkeypatch):
    import pipeline.runner._rawio as rawio
    from pipeline.stages.base import PixelSummary

    data, header = _unusable(np.nan)
    data[7:30, :N_IMAGE] = np.random.default_rng(4).normal(500, 10, (23, N_IMAGE))
    fits.PrimaryHDU(data, header).writeto(tmp_path / "b0.fits")
    monkeypatch.setattr(rawio, "_SUMMARY_ROWS", 6)  # 40 rows in 7 chunks
    (raw,) = rawio.read_raw_files(tmp_path, ["b0.fits"])
    whole = PixelSummary.of(data)
    assert raw.pixels.n_rows == N_ROWS
    for name in ("n_finite", "minimum", "maximum"):
        np.testing.assert_array_equal(getattr(raw.pixels, name), getattr(whole, name))
    # Integer pixels: the extremes are scaled, not the pixels; BLANK is no data
    # (FITS standard 4.0, keyword BLANK).  A negative BSCALE swaps the extremes.
    stored = np.random.default_rng(5).integers(-1000, 1000, (N_ROWS, 9)).astype(np.int16)
    stored[:, 2] = stored[4, 5] = -32768
    hdu = fits.PrimaryHDU(stored)
    hdu.header.update(BLANK=-32768, BSCALE=-2.0, BZERO=10.0)
    hdu.writeto(tmp_path / "b1.fits")
    (raw,) = rawio.read_raw_files(tmp_path, ["b1.fits"])
    with fits.open(tmp_path / "b1.fits") as hdul:  # astropy scales and blanks every pixel
        whole = PixelSummary.of(hdul[0].data.astype(np.float64))
    assert list(raw.pixels.n_finite[:3]) == [N_ROWS, N_ROWS, 0]
    for name in ("n_finite", "minimum", "maximum"):
        np.testing.assert_array_equal(getattr(raw.pixels, name), getattr(whole, name))


def test_integer_pixels_without_blank_are_summarised_as_astropy_scales_them(tmp_path, monkeypatch):
    """Unsigned 16-bit pixels stored as FITS does (BITPIX 16, BZERO 32768: FITS
    standard 4.0, section 5.2.5), no BLANK: every pixel is finite, and the
    extremes of the stored integers, scaled, are those of astropy's scaled
    pixels."""
    import pipeline.runner._rawio as rawio
    from pipeline.stages.base import PixelSummary

    rng = np.random.default_rng(11)
    pixels = rng.integers(0, 65536, (N_ROWS, 9)).astype(np.uint16)
    pixels[:, 3] = 1200  # a constant column
    pixels[17, 4], pixels[31, 4] = 0, 65535  # a column spanning the whole range
    fits.PrimaryHDU(pixels).writeto(tmp_path / "b0.fits")  # astropy stores BZERO 32768
    monkeypatch.setattr(rawio, "_SUMMARY_ROWS", 6)  # 40 rows in 7 chunks
    (raw,) = rawio.read_raw_files(tmp_path, ["b0.fits"])
    with fits.open(tmp_path / "b0.fits") as hdul:
        assert hdul[0].header["BZERO"] == 32768 and "BLANK" not in hdul[0].header
        whole = PixelSummary.of(hdul[0].data.astype(np.float64))
    assert raw.pixels.n_rows == N_ROWS
    assert list(raw.pixels.n_finite) == [N_ROWS] * 9
    assert (raw.pixels.minimum[4], raw.pixels.maximum[4]) == (0.0, 65535.0)
    for name in ("n_finite", "minimum", "maximum"):
        np.testing.assert_array_equal(getattr(raw.pixels, name), getattr(whole, name))
        assert getattr(raw.pixels, name).dtype == getattr(whole, name).dtype
    # Signed and big-endian integers directly: as their float64 values.
    for dtype in (">i2", "<i4", "u1"):
        rows = rng.integers(0, 100, (5, 4)).astype(dtype)
        exact = PixelSummary.of(rows.astype(np.float64))
        summary = PixelSummary.of(rows)
        for name in ("n_finite", "minimum", "maximum"):
            np.testing.assert_array_equal(getattr(summary, name), getattr(exact, name))
            assert getattr(summary, name).dtype == getattr(exact, name).dtype


def test_a_block_whose_date_obs_goes_backwards_is_named():
    """Block 2's clock jumped back 10 rows before block 1's start: without the
    sequence check it would overlap block 0 and the message would blame block 1."""
    early = START + (N_ROWS - 10) * LINE_TIME * u.s
    headers = {seq: make_header(seq) for seq in range(5)}
    headers[2] = make_header(2, **{"DATE-OBS": early.isot})
    infos = [parse_block_header(h, f"b{seq}.fits") for seq, h in headers.items()]
    night = index_night(infos)
    assert list(night.table["file"]) == ["b0.fits", "b1.fits", "b3.fits", "b4.fits"]
    assert len(night.rejected) == 1
    assert night.rejected[0].startswith(
        f"b2.fits: DATE-OBS {early.isot} (BLOCKSEQ 2) goes backwards: earlier than b1.fits"
    )
    assert not any("b1.fits" in line.split(":")[0] for line in night.problems)
    # A block whose clock jumped ahead, past its successor, into block 4, is named too.
    late = START + (4 * N_ROWS + 5) * LINE_TIME * u.s
    infos[1] = parse_block_header(make_header(1, **{"DATE-OBS": late.isot}), "b1.fits")
    night = index_night(infos[:2] + infos[3:])
    assert (
        night.rejected[0].startswith("b1.fits: DATE-OBS")
        and "jumps ahead: later than b3.fits" in (night.rejected[0])
    )


def test_restarted_numbering_leaves_no_block_out():
    # Sequence numbers that restart halfway do not follow the time, but no
    # block collides with another in time: nothing is left out, the blocks are
    # ordered by DATE-OBS, and the restart is reported where it happens.
    infos = [
        parse_block_header(make_header(seq, BLOCKSEQ=seq % 3), f"b{seq}.fits") for seq in range(6)
    ]
    night = index_night(infos)
    assert list(night.table["file"]) == [f"b{seq}.fits" for seq in range(6)]
    assert not night.rejected
    assert night.problems == [
        "b3.fits: BLOCKSEQ 2 -> 0 but the times of b2.fits and b3.fits join up (clock or "
        "numbering error?)."
    ]


def test_site_keywords_are_optional_and_compared_with_the_config():
    from pipeline.geometry.instrument import Site

    site = Site(31.5, -110.2, 2400.0)  # what make_header writes
    files = [RawFile(f"b{seq}.fits", 0, make_header(seq), None) for seq in range(3)]
    assert ingest_files(files, IngestOptions(), site).ok
    # Without site keywords: nothing to compare, nothing wrong.
    bare = [
        RawFile(
            f"b{seq}.fits", 0, make_header(seq, SITELAT=None, SITELONG=None, SITEELEV=None), None
        )
        for seq in range(3)
    ]
    night = ingest_files(bare, IngestOptions(), site)
    assert night.ok and len(night.table) == 3
    # Within the tolerance (a header rounded to 0.01 deg, a height above sea
    # level): no problem.  Longitudes compare modulo 360 deg.
    rounded = [
        RawFile("b0.fits", 0, make_header(0, SITELAT=31.504, SITELONG=249.8, SITEELEV=2300.0), None)
    ]
    assert ingest_files(rounded, IngestOptions(), site).ok
    # Another station's longitude (the sign flipped) on two blocks: one line for both.
    files[1] = RawFile("b1.fits", 0, make_header(1, SITELONG=110.2), None)
    files[2] = RawFile("b2.fits", 0, make_header(2, SITELONG=110.2), None)
    night = ingest_files(files, IngestOptions(), site)
    assert night.problems == [
        "b1.fits and 1 more: header site SITELONG=110.2 (config longitude -110.2 deg) differs "
        "by more than 0.01 deg or 150 m; the geometry uses the config's site: check site: in "
        "the config."
    ]
    assert len(night.table) == 3  # the blocks are still reduced


def test_header_tdirows_that_differ_from_the_config_are_reported():
    """Every header said TDIROWS=2048 while camera.tdi_rows was 1024: the
    geometry and the catalogue's magnitudes used 1024, the images' XPOSURE
    2048, so a simulated night's science images came out at half the scale
    of its catalogue (0.75 mag) without a word."""
    files = [RawFile(f"b{seq}.fits", 0, make_header(seq), None) for seq in range(3)]
    assert ingest_files(files, IngestOptions(), tdi_rows=16).problems == []  # headers: 16
    night = ingest_files(files, IngestOptions(), tdi_rows=32)
    assert night.problems == [
        "b0.fits and 2 more: header TDIROWS=16 but the config's camera.tdi_rows is 32: the "
        "geometry and the catalogue use the config's, the images' exposure (XPOSURE) the "
        "header's; check camera.tdi_rows or the camera's header."
    ]
    assert len(night.table) == 3  # the blocks are still reduced


def test_contiguous_night_is_one_segment():
    infos = [parse_block_header(make_header(seq), f"b{seq}.fits") for seq in (2, 0, 1)]
    night = index_night(infos)
    assert night.ok and night.n_segments == 1
    assert list(night.table["file"]) == ["b0.fits", "b1.fits", "b2.fits"]
    assert list(night.table["row_start"]) == [0, N_ROWS, 2 * N_ROWS]
    rows = describe_rows(night.table, N_ROWS - 1, N_ROWS + 1)
    # Row k of a block is read at DATE-OBS + k * LINETIME (DEVELOPERS.md, "Raw data").
    np.testing.assert_allclose(rows["time"], [(N_ROWS - 1) * LINE_TIME, N_ROWS * LINE_TIME])
    assert rows["covered"].all()


def test_a_shorter_block_or_spaced_sections_keep_the_camera_format():
    """A shorter last block (DATASEC rows 1:20 of its 20 rows) and a DATASEC
    written with spaces used to count as a change of camera format: a new
    segment, a problem line, and calibrate refused a stretch across them
    ("2 different DATASEC/BIASSEC").  Only the sections' columns say what
    the camera read."""
    from pipeline.stages.calibrate._rows import stretch_rows

    short = N_ROWS // 2
    headers = [
        make_header(0),
        make_header(1, DATASEC=f"[1:{N_IMAGE}, 1:{N_ROWS}] "),
        make_header(
            2,
            NAXIS2=short,
            DATASEC=f"[1:{N_IMAGE},1:{short}]",
            BIASSEC=f"[{N_IMAGE + 1}:{N_IMAGE + N_OVERSCAN},1:{short}]",
        ),
    ]
    infos = [parse_block_header(h, f"b{seq}.fits") for seq, h in enumerate(headers)]
    night = index_night(infos)
    assert night.ok and night.n_segments == 1, night.problems
    assert list(night.table["n_rows"]) == [N_ROWS, N_ROWS, short]
    raw = np.arange((N_ROWS + short) * (N_IMAGE + N_OVERSCAN), dtype=np.float32)
    raw = raw.reshape(N_ROWS + short, N_IMAGE + N_OVERSCAN)
    rows = stretch_rows(raw, night.table, N_ROWS, 2 * N_ROWS + short)
    np.testing.assert_array_equal(rows.image, raw[:, :N_IMAGE])
    np.testing.assert_array_equal(rows.overscan, raw[:, N_IMAGE:])
    # A window of other columns is still a new format, named by its columns.
    after_short = START - (N_ROWS - short) * LINE_TIME * u.s  # b3 follows b2 without a gap
    narrow = make_header(3, after_short, DATASEC=f"[1:20,1:{N_ROWS}]")
    night = index_night([*infos, parse_block_header(narrow, "b3.fits")])
    assert night.problems == [
        "b3.fits: format NAXIS1 30, DATASEC columns 1:20, BIASSEC columns 25:30 differs from "
        "the night's (NAXIS1 30, DATASEC columns 1:24, BIASSEC columns 25:30); new segment, "
        "its 20 image columns solved on their own."
    ]


def test_a_gain_that_changes_mid_night_is_reported_and_the_rows_stay_one_segment():
    """A block whose header says GAIN=1.0 among blocks of 2.0 e-/ADU halves its
    fluxes in e-; it used to pass without a word, and the astrometry of a
    simulated night then failed on its transparency ('the solved WCS ... is
    0.0416 px off the solution ...') with nothing pointing at the header."""
    infos = [
        parse_block_header(make_header(seq, GAIN=1.0 if seq == 1 else 2.0), f"b{seq}.fits")
        for seq in range(3)
    ]
    night = index_night(infos)
    assert night.n_segments == 1  # calibrate follows the gain row by row
    assert night.problems == [
        "b1.fits: readout changed mid-night (GAIN 2.0 -> 1.0 e-/ADU); calibrated with its own "
        "values: check the header if the camera's readout mode did not change.",
        "b2.fits: readout changed mid-night (GAIN 1.0 -> 2.0 e-/ADU); calibrated with its own "
        "values: check the header if the camera's readout mode did not change.",
    ]
    same = [parse_block_header(make_header(seq), f"b{seq}.fits") for seq in range(3)]
    assert index_night(same).problems == []


def test_gap_overlap_duplicate_and_change_are_reported():
    infos = [parse_block_header(make_header(seq), f"b{seq}.fits") for seq in (0, 1, 3)]
    infos.append(parse_block_header(make_header(1), "b1_copy.fits"))
    # Block 4 starts 10 rows early: an overlap.
    early = START + (4 * N_ROWS - 10) * LINE_TIME * u.s
    infos.append(parse_block_header(make_header(4, **{"DATE-OBS": early.isot}), "b4.fits"))
    after = early + N_ROWS * LINE_TIME * u.s
    infos.append(parse_block_header(make_header(5, TDIROWS=32, **{"DATE-OBS": after.isot}), "b5"))
    night = index_night(infos)
    text = "\n".join(night.problems)
    assert "b1_copy.fits: duplicate of b1.fits" in text
    assert "b3.fits: gap of 40.0 rows" in text
    assert "b4.fits: starts 10.0 rows" in text and "overlap" in text
    assert "b5: changed mid-night (TDIROWS 16 -> 32)" in text
    assert len(night.problems) == 4 and not night.ok
    # The gap stays in the night rows: block 3 starts where it would have.
    table = night.table
    assert int(table["row_start"][table["file"] == "b3.fits"][0]) == 3 * N_ROWS
    assert list(table["segment"]) == [0, 0, 1, 2, 3]
    rows = describe_rows(table, 2 * N_ROWS - 1, 2 * N_ROWS + 1)
    assert list(rows["covered"]) == [True, False]


def test_broken_night_indexes_every_good_block(tmp_path):
    """One truncated file, one non-FITS file, one missing keyword and one gap."""
    paths = [write_block(tmp_path / f"b{seq}.fits", make_header(seq)) for seq in (0, 1, 2, 4, 5)]
    truncated = tmp_path / "b1.fits"
    truncated.write_bytes(truncated.read_bytes()[:-2000])
    write_block(tmp_path / "b2.fits", make_header(2, GAIN=None))
    (tmp_path / "readme.fits").write_text("not FITS")
    files = [raw_file(p) for p in [*paths, tmp_path / "readme.fits"]]
    night = ingest_files(files, IngestOptions())
    assert list(night.table["file"]) == ["b0.fits", "b4.fits", "b5.fits"]
    assert len(night.rejected) == 3
    reasons = "\n".join(night.rejected)
    assert "b1.fits: truncated file" in reasons
    assert "b2.fits: missing keyword GAIN" in reasons
    assert "readme.fits:" in reasons
    # The truncated and the bad-keyword block leave a gap: blocks 1-3 are absent.
    assert len(night.problems) == 1 and "b4.fits: gap of 120.0 rows" in night.problems[0]
    assert list(night.table["segment"]) == [0, 1, 1]
    assert not night.ok


def test_broken_night_through_the_command_line(tmp_path, capsys):
    """``zdrift run`` on a simulated night with broken files: ingest, columns, calibrate.

    Good blocks are indexed and calibrated; each broken file and each gap is
    reported in one line, in the ingest report and in the run summary; the
    rows of rejected and missing blocks, and those a cut file lost, are in no
    stretch; the exit status is 1 (a partial failure), also on a rerun that
    finds everything up to date.
    """
    from pipeline.cli import main
    from pipeline.geometry.instrument import Camera, Site
    from pipeline.simulate import SimulationOptions, simulate_night, write_night

    site = Site(20.0, -100.0, 2000.0, name="fictional test site")
    camera = Camera(n_columns=48, tdi_rows=128, pixel_size=15.0, focal_length=6.2)
    options = SimulationOptions(
        start="2026-03-20T04:00:00",
        n_blocks=8,
        block_rows=512,
        overscan_columns=8,
        compress=False,
        missing_blocks=[5],
        sky={"sky_ramp": 4.0},
        stars={"density": 20000.0},
    )
    raw = tmp_path / "raw"
    write_night(simulate_night(site, camera, options), raw)
    blocks = sorted(raw.glob("block_*.fits"))
    assert len(blocks) == 7
    blocks[1].write_bytes(blocks[1].read_bytes()[:-20000])  # truncated
    with fits.open(blocks[3], mode="update") as hdul:  # a missing keyword
        del hdul[0].header["GAIN"]
    (raw / "block_notes.fits").write_text("observer's notes, not FITS\n")
    (tmp_path / "night.yaml").write_text(
        """
night: {name: broken, raw_dir: raw, pattern: "block_*.fits", output_dir: out}
site: {latitude: 20.0, longitude: -100.0, height: 2000.0}
camera: {n_columns: 48, tdi_rows: 128, pixel_size: 15.0, focal_length: 6.2}
run: {stretch_rows: 1024, overlap_rows: 64, executor: serial}
stages:
  column_stats: {block_rows: 128}
  columns: {min_blocks: 4}
"""
    )
    night = str(tmp_path / "night.yaml")
    assert main(["run", night, "--to", "calibrate"]) == 1
    summary = capsys.readouterr().out.splitlines()
    # Every unit ran (none failed or was blocked); the input had 6 problems.
    assert summary[0] == (
        "night broken: 10 units ran, 0 up to date, 0 failed, 0 blocked, 6 problems in the input"
    )
    problems = [line for line in summary if line.startswith("  problem: ingest/night: ")]
    assert len(problems) == 6 == len(summary) - 1
    bad = [line.split(": ")[2] for line in problems]
    assert bad == [
        "rejected block_0003.fits", "rejected block_notes.fits", "block_0001.fits",
        "block_0002.fits", "block_0004.fits", "block_0006.fits",
    ]  # fmt: skip
    # A rerun has nothing to do but still reports the problems and fails.
    assert main(["run", night, "--to", "calibrate"]) == 1
    again = capsys.readouterr().out.splitlines()
    assert again[0].startswith("night broken: 0 units ran, 10 up to date")
    assert again[1:] == summary[1:]
    assert main(["status", night]) == 1  # the reported problems, as `run` exits 1
    assert sum(" problem: night: " in line for line in capsys.readouterr().out.splitlines()) == 6
    products = tmp_path / "out" / "broken"
    ingest = json.loads((products / "ingest" / "night" / "ingest_report.json").read_text())
    assert not ingest["ok"] and ingest["n_blocks"] == 6  # blocks 0, 1 (cut), 2, 4, 6, 7
    rejected = sorted(ingest["rejected"])
    assert len(rejected) == 2
    assert rejected[0].startswith("block_0003.fits: missing keyword GAIN")
    assert rejected[1].startswith("block_notes.fits: ")
    assert all("\n" not in line for line in rejected)
    # The cut block 1 keeps its whole rows; its lost rows, block 3 (rejected)
    # and block 5 (missing) leave gaps; each is reported.
    assert [p.split(":")[0] for p in ingest["problems"]] == [
        "block_0001.fits", "block_0002.fits", "block_0004.fits", "block_0006.fits"
    ]  # fmt: skip
    index = Table.read(products / "ingest" / "night" / "block_index.ecsv")
    assert list(index["row_start"]) == [0, 512, 1024, 2048, 3072, 3584]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # astropy: "File may have been truncated"
        with fits.open(blocks[1]) as hdul:
            data_start = hdul.fileinfo(0)["datLoc"]
    whole = int(index["n_rows"][1])  # the rows wholly before the cut (56 columns of 2 bytes)
    assert whole == (blocks[1].stat().st_size - data_start) // (56 * 2) < 512
    assert f"rows {whole}-511 (night rows {512 + whole}-1023, " in ingest["problems"][0]
    # Night rows 512 + whole to 1023, lost with the cut, and those of the
    # rejected block 3 are in no stretch: stretches stop at the end of a
    # segment, margins included.
    from pipeline.config import load_config
    from pipeline.runner._night import NightStore

    plan = [(s.lo, s.hi) for s in NightStore(load_config(night)).stretches]
    assert plan == [(0, 512 + whole), (1024, 1536), (2048, 2560), (3072, 4096)]


def _clocked_night(seqs, line_time_true, pauses=None):
    """Blocks time-stamped by a true clock while the camera shifted rows every
    ``line_time_true`` s and its headers say LINETIME = 0.05 s (invented values);
    ``pauses``: seconds of extra delay before given blocks."""
    pauses = pauses or {}
    infos, t = [], START
    for k, seq in enumerate(seqs):
        if k:
            t = t + ((seq - seqs[k - 1]) * N_ROWS * line_time_true + pauses.get(seq, 0.0)) * u.s
        infos.append(parse_block_header(make_header(seq, **{"DATE-OBS": t.isot}), f"b{seq}.fits"))
    return infos


@pytest.mark.parametrize(("error", "kind"), [(0.02, "gaps"), (-0.03, "overlaps")])
def test_a_camera_clock_off_its_linetime_is_one_problem(error, kind):
    """A camera clocked 2 % slow (or 3 % fast) over 40-row blocks: every boundary
    is off by +0.8 (or -1.2) rows, beyond the 0.5-row tolerance. Ingest used to
    report a gap or an overlap at every block; one line now names the clock
    and the line time the stamps imply (0.051 s, 0.0485 s: what was planted,
    to the 1 ms DATE-OBS is written to over 7 blocks of 2 s). Invented values."""
    true_line_time = LINE_TIME * (1.0 + error)
    night = index_night(_clocked_night(list(range(8)), true_line_time))
    (line,) = night.problems
    assert line.startswith(f"b1.fits to b7.fits: all 7 block boundaries are {kind} of ")
    assert f"not 7 {kind} but a camera clock that is not its LINETIME" in line
    implied = float(line.split("imply a line time of ")[1].split(" s")[0])
    assert implied == pytest.approx(true_line_time, rel=1e-4)
    assert night.n_segments == 8  # the timing model is unchanged: a segment per block
    # a clock within the tolerance (0.4 rows a block) joins up and says nothing
    assert index_night(_clocked_night(list(range(8)), LINE_TIME * 1.01)).problems == []


def test_a_missing_block_in_a_drifting_night_keeps_its_own_gap():
    """The drift is one line; the missing block 4 is a gap of its own (40 rows plus
    the drift)."""
    night = index_night(_clocked_night([0, 1, 2, 3, 5, 6, 7, 8], LINE_TIME * 1.02))
    assert len(night.problems) == 2
    assert night.problems[0].startswith("b1.fits to b8.fits: all 6 block boundaries are gaps")
    assert night.problems[1].startswith("b5.fits: gap of 41.6 rows")


def test_gaps_of_different_sizes_stay_gaps():
    """Pauses of 2, 5 and 12 rows (and two boundaries alike, too few for a
    pattern) are reported one by one: not a clock."""
    pauses = {1: 2 * LINE_TIME, 2: 5 * LINE_TIME, 3: 12 * LINE_TIME}
    night = index_night(_clocked_night([0, 1, 2, 3], LINE_TIME, pauses))
    assert [p.split(":")[0] for p in night.problems] == ["b1.fits", "b2.fits", "b3.fits"]
    assert all("gap of" in p for p in night.problems)
    pair = index_night(_clocked_night([0, 1, 2], LINE_TIME * 1.02))
    assert len(pair.problems) == 2 and all("gap of 0.8 rows" in p for p in pair.problems)


def test_the_stamps_line_time_on_request_joins_the_blocks():
    """stages.ingest.line_time_from_stamps: the drifting night of 2 % is indexed
    at the line time its stamps imply (0.051 s, as planted, to the 1 ms of
    DATE-OBS): one segment, each row at its true time. Off (the default), the
    timing is LINETIME's. Invented values."""
    infos = _clocked_night(list(range(8)), LINE_TIME * 1.02)
    night = index_night(infos, line_time_from_stamps=True)
    assert night.n_segments == 1
    assert list(night.table["row_start"]) == [k * N_ROWS for k in range(8)]
    np.testing.assert_allclose(night.table["line_time"], LINE_TIME * 1.02, rtol=1e-4)
    (line,) = night.problems
    assert line.startswith("LINETIME 0.05 s taken as 0.051") and "+20000 ppm" in line
    rows = describe_rows(night.table, 7 * N_ROWS - 1, 7 * N_ROWS + 1)
    true_times = np.array([7 * N_ROWS - 1, 7 * N_ROWS]) * LINE_TIME * 1.02
    np.testing.assert_allclose(rows["time"], true_times, atol=1.5e-3)  # DATE-OBS: 1 ms
    assert index_night(infos).n_segments == 8
    options = IngestOptions(line_time_from_stamps=True)
    assert options.line_time_from_stamps and not IngestOptions().line_time_from_stamps
