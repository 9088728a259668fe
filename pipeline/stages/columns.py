"""Columns: the night's 1-D TDI flat and per-column additive level.

Combines the ``column_stats`` tables of all stretches with
:func:`pipeline.stages.calibrate.solve_columns`.  The ``columns`` product is a
small table (one row per image column) that later nights can use or compare:
with the option ``flat_file`` naming such a table (another night's, or a
twilight or dome strip's), the stage adopts it instead of solving
(:func:`pipeline.stages.calibrate.adopt_columns`).

It also compares the gain and read noise the raw rows show (measured by
``column_stats``, :mod:`pipeline.stages.calibrate._noise`) with the header's
GAIN and RDNOISE, and reports a contradiction as a problem.

Camera formats
--------------
A night may hold blocks of another format (a windowed readout with another
number of image columns); ingest puts them in segments of their own, so no
stretch mixes formats.  Each format is solved from its own stretches: the
camera's (``camera.n_columns``) gives the ``columns`` product, every other
width ``w`` a ``columns_<w>`` product, which calibrate picks by the width of
its stretch (:func:`~pipeline.stages.calibrate.columns_product_name`).  A
format that cannot be solved is reported as a problem; only its stretches
lack a table.
"""

from __future__ import annotations

import logging
from typing import Any

import numpy as np

from pipeline.stages.base import PROBLEMS, Stage
from pipeline.stages.calibrate import (
    ColumnSolveOptions,
    adopt_columns,
    columns_product_name,
    options_kwargs,
    solve_columns,
)
from pipeline.stages.calibrate._noise import NoiseMeasurement, gain_problems

__all__ = ["STAGE"]

log = logging.getLogger(__name__)


def _run(*, inputs, options: ColumnSolveOptions, context) -> dict[str, Any]:
    camera_columns = context.camera.n_columns
    by_width: dict[int, list] = {}
    for stretch, products in zip(context.input_stretches, inputs["column_stats"], strict=True):
        table = products["column_stats"]
        by_width.setdefault(int(np.shape(table["level"])[1]), []).append((stretch, table))
    if camera_columns not in by_width and inputs["flat_file"] is None:
        raise ValueError(
            f"No stretch has the camera's {camera_columns} image columns (camera.n_columns); "
            f"the stretches have {sorted(by_width)}: fix camera.n_columns."
        )
    solve = options_kwargs(options, exclude=("flat_file",))
    products: dict[str, Any] = {}
    if inputs["flat_file"] is not None:
        products["columns"] = adopt_columns(
            inputs["flat_file"], camera_columns, source=options.flat_file.name
        )
    else:
        products["columns"] = solve_columns([t for _, t in by_width[camera_columns]], **solve)
    problems = gain_problems(
        [
            (stretch.id, NoiseMeasurement(**products["column_stats"].meta["noise"]))
            for stretch, products in zip(
                context.input_stretches, inputs["column_stats"], strict=True
            )
            if "noise" in products["column_stats"].meta
        ]
    )
    for width, stretches in sorted(by_width.items()):
        if width == camera_columns:
            continue
        ids = ", ".join(stretch.id for stretch, _ in stretches)
        try:
            table = solve_columns([t for _, t in stretches], **solve)
        except ValueError as exc:
            problems.append(
                f"no {width}-column table for stretches {ids} (not the camera's "
                f"{camera_columns} columns): {exc}"
            )
            continue
        table.meta["stretches"] = [stretch.id for stretch, _ in stretches]
        products[columns_product_name(width, camera_columns)] = table
        log.info("Solved the %d-column format separately, from stretches %s", width, ids)
    if problems:
        products[PROBLEMS] = problems
    return products


#: Declaration of the columns stage for the runner.
STAGE = Stage(
    name="columns",
    run=_run,
    options=ColumnSolveOptions,
    requires=("column_stats",),
    scope="night",
    uses=("camera.n_columns",),
    files=("flat_file",),
    partial_inputs=True,  # one bad stretch must not stop the night's flat
    description="Solve the night's 1-D flat and per-column additive level from the sky, per "
    "camera format (or adopt a solved table: flat_file).",
    version=4,  # 2: sky from relative levels; normalised lines; 3: hot needs 3 own errors;
    # 4: one table per camera format
)
