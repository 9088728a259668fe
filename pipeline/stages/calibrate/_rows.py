"""Glue between the runner's raw rows and the calibrate functions.

The runner hands a stretch-scoped stage the raw rows ``[lo, hi)`` of the
night in readout order (overscan included, NaN where no block covers a row)
and the ingest
stage's block index; this module splits them into image and overscan columns
and gathers the per-row header values, segment labels and ramp rows that
:func:`pipeline.stages.calibrate.calibrate_stretch` and
:func:`~pipeline.stages.calibrate.column_statistics` take.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from pipeline.exceptions import StageError
from pipeline.stages.base import BLOCK_INDEX, RAW_ROWS
from pipeline.stages.ingest import camera_format, describe_rows, split_rows

if TYPE_CHECKING:
    from astropy.table import Table

__all__ = ["StretchRows", "dropout_rows", "stretch_rows", "stretch_rows_for_stage"]


@dataclass(frozen=True)
class StretchRows:
    """Raw image, overscan and per-row facts of one stretch (scan axis first)."""

    image: np.ndarray
    overscan: np.ndarray
    night_row: np.ndarray
    time: np.ndarray
    segment: np.ndarray
    rows_since_start: np.ndarray
    gain: np.ndarray
    read_noise: np.ndarray
    saturation: np.ndarray
    tdi_rows: int
    dropout: np.ndarray | None = None

    @property
    def covered(self) -> np.ndarray:
        """Rows some block holds (dropout rows excluded: they hold no data)."""
        return self.segment >= 0


def dropout_rows(image: np.ndarray, overscan: np.ndarray) -> np.ndarray:
    """Rows whose every image and overscan pixel holds one and the same raw value.

    A real row carries read noise (and sky) in every pixel, so its pixels
    never all agree; a row of one value in the image and in the serial
    overscan alike (0 ADU, or the converter's full scale) is a readout
    dropout, not data (common practice).  Its bias cannot be measured and
    its image holds no sky, so it must be kept out like a gap.

    Parameters
    ----------
    image : ndarray, shape (n_rows, n_columns)
        Raw image columns, ADU; axis 0 is the scan axis.
    overscan : ndarray, shape (n_rows, n_overscan)
        Raw serial-overscan columns of the same rows, ADU.

    Returns
    -------
    ndarray of bool, shape (n_rows,)
        True for dropout rows.  NaN rows are not dropouts (they are flagged
        NONFINITE).
    """
    first = image[:, 0] if image.shape[1] else np.full(image.shape[0], np.nan)
    # Cheap screen on a few pixels, then the whole row for the candidates.
    candidate = np.isfinite(first) & (image[:, -1] == first)
    if overscan.shape[1]:
        candidate &= overscan[:, 0] == first
    rows = np.flatnonzero(candidate)
    if rows.size:
        same = (image[rows] == first[rows, None]).all(axis=1)
        same &= (overscan[rows] == first[rows, None]).all(axis=1)
        candidate[rows] = same
    return candidate


def stretch_rows(
    raw_rows: np.ndarray,
    index: Table,
    lo: int,
    hi: int,
    *,
    flip_columns: bool = False,
) -> StretchRows:
    """Split a stretch's raw rows and look up its per-row facts.

    Parameters
    ----------
    raw_rows : ndarray, shape (hi - lo, NAXIS1)
        The runner's ``raw_rows`` input: rows in readout order (the runner has
        applied ``camera.flip_rows``), columns as stored.
    index : astropy.table.Table
        The ingest stage's ``block_index``.
    lo, hi : int
        Night rows of ``raw_rows``.
    flip_columns : bool
        Camera ``flip_columns``: reverse the image columns.

    Returns
    -------
    StretchRows
        ``rows_since_start`` comes from the index's ``clock_row`` (the ingest
        option ``start_ramp``).
    """
    facts = describe_rows(index, lo, hi)
    covered = facts["covered"]
    blocks = index[(index["row_start"] < hi) & (index["row_start"] + index["n_rows"] > lo)]
    # Only the sections' columns count (a shorter block has a shorter row range).
    geometries = {
        camera_format(0, str(b["image_section"]), str(b["overscan_section"]))[1:]: (
            str(b["image_section"]),
            str(b["overscan_section"]),
        )
        for b in blocks
    }
    if len(geometries) != 1:
        raise StageError(
            f"Night rows [{lo}, {hi}) span blocks with {len(geometries)} different "
            f"DATASEC/BIASSEC columns ({sorted(geometries.values())}); a stretch needs one "
            "geometry."
        )
    ((image_section, overscan_section),) = geometries.values()
    image, overscan = split_rows(
        raw_rows, image_section, overscan_section, flip_columns=flip_columns
    )
    dropout = dropout_rows(image, overscan) & covered
    segment = np.where(dropout, -1, facts["segment"])  # kept out like a gap (mask GAP)
    fill = {}
    for name in ("gain", "read_noise", "saturation"):
        values = facts[name]
        fill[name] = np.where(covered, values, np.nanmedian(values[covered]))
    return StretchRows(
        image=image,
        overscan=overscan,
        night_row=facts["night_row"],
        time=facts["time"],
        segment=segment,
        rows_since_start=facts["rows_since_start"],
        tdi_rows=int(facts["tdi_rows"].max()),
        dropout=dropout,
        **fill,
    )


def stretch_rows_for_stage(inputs, context) -> StretchRows:
    """:func:`stretch_rows` from a stretch-scoped stage's ``inputs`` and ``context``."""
    stretch = context.stretch
    return stretch_rows(
        inputs[RAW_ROWS],
        inputs["ingest"][BLOCK_INDEX],
        stretch.lo,
        stretch.hi,
        flip_columns=context.camera.flip_columns,
    )
