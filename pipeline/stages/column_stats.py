"""Column statistics: first pass of the 1-D flat and dark solve, per stretch.

See :mod:`pipeline.stages.calibrate` for the three-stage split
(``column_stats`` -> ``columns`` -> ``calibrate``).
"""

from __future__ import annotations

import warnings
from dataclasses import asdict
from typing import Any

from pipeline.exceptions import CalibrationWarning
from pipeline.stages.base import RAW_ROWS, Stage
from pipeline.stages.calibrate import WARM, ColumnStatsOptions, column_statistics, options_kwargs
from pipeline.stages.calibrate._noise import measure_gain
from pipeline.stages.calibrate._rows import stretch_rows_for_stage

__all__ = ["STAGE", "auto_block_rows"]

#: Rows per statistics block on a night long enough for :data:`AUTO_BLOCKS` of them.
AUTO_BLOCK_ROWS = 256
#: Blocks a night should give the column solve (``stages.columns.min_blocks``'s default).
AUTO_BLOCKS = 8
#: Fewest rows per block: a clipped column mean of 16 pixels still rejects a
#: star's core (sigma clipping wants a dozen samples or more: common practice).
MIN_BLOCK_ROWS = 16


def auto_block_rows(night_rows: int) -> int:
    """Rows per statistics block when the config leaves ``block_rows`` unset.

    256 rows, or on a night of fewer than ``8 x 256`` rows an eighth of its
    rows (at least 16): a short night still gives the column solve its
    eight blocks instead of failing for want of them.
    """
    if night_rows >= AUTO_BLOCKS * AUTO_BLOCK_ROWS:
        return AUTO_BLOCK_ROWS
    return max(MIN_BLOCK_ROWS, int(night_rows) // AUTO_BLOCKS)


def _run(*, inputs, options: ColumnStatsOptions, context) -> dict[str, Any]:
    rows = stretch_rows_for_stage(inputs, context)
    # Partly exposed rows after clocking started (ingest's start_ramp) would
    # bias the regression of level on sky: the dark scales with the exposure.
    use_rows = rows.rows_since_start >= rows.tdi_rows
    if options.solve_rows is not None:  # e.g. only the twilight strip of the night
        start, stop = options.solve_rows
        use_rows &= (rows.night_row >= start) & (rows.night_row < stop)
    if not (use_rows & rows.covered).any() and options.solve_rows is None:
        warnings.warn(
            f"Stretch {context.stretch.id}: no row is usable for the column solve (all "
            f"{int(rows.covered.sum())} rows with data are within TDIROWS={rows.tdi_rows} "
            "rows of the start of clocking); if clocking started before the first block, "
            "set stages.ingest.start_ramp: none.",
            CalibrationWarning,
            stacklevel=2,
        )
    block_rows = options.block_rows
    if block_rows is None:
        block_rows = auto_block_rows(sum(s.stop - s.start for s in context.stretches))
    table = column_statistics(
        rows.image,
        rows.overscan,
        rows.night_row,
        rows.time,
        gain=rows.gain,
        read_noise=rows.read_noise,
        saturation=rows.saturation,
        segment=rows.segment,
        use_rows=use_rows,
        block_rows=block_rows,
        **options_kwargs(options, exclude=("solve_rows", "block_rows")),
    )
    noise = measure_gain(
        rows.image,
        rows.overscan,
        use_rows & rows.covered,
        rows.segment,
        rows.gain,
        rows.read_noise,
        rows.saturation,
    )
    if noise is not None:  # for the columns stage's check of GAIN and RDNOISE
        table.meta["noise"] = asdict(noise)
    return {"column_stats": table}


#: Declaration of the column_stats stage for the runner.
STAGE = Stage(
    name="column_stats",
    run=_run,
    options=ColumnStatsOptions,
    requires=("ingest", RAW_ROWS),
    scope="stretch",
    uses=("camera.flip_columns", "camera.flip_rows"),
    description="Per-block clipped column levels of each stretch (for the 1-D flat and dark).",
    warm=WARM,
    # 2: bias window by cross-validation; 3: faster passes (rounding); 4: units;
    # 5: block rows chosen by the night's length unless configured; 6: readout
    # dropout rows (one raw value in every pixel) left out; 7: the gain and read
    # noise the raw rows show, in the table's meta ('noise'); BLANK pixels of
    # unsigned raw data are NaN (they read as 0 ADU); 8: the gain from at most
    # 256 pairs of rows; 9: the gain from the pixels of sky alone (a crowded
    # field's stars widened the differences: 1.30 e-/ADU for 2.0)
    version=9,
)
