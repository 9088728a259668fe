"""Columns: the night's 1-D TDI flat and per-column additive level.

Combines the ``column_stats`` tables of all stretches with
:func:`pipeline.stages.calibrate.solve_columns`.  The ``columns`` product is a
small table (one row per image column) that later nights can use or compare:
with the option ``flat_file`` naming such a table (another night's, or a
twilight or dome strip's), the stage adopts it instead of solving
(:func:`pipeline.stages.calibrate.adopt_columns`).
"""

from __future__ import annotations

from typing import Any

from pipeline.stages.base import Stage
from pipeline.stages.calibrate import (
    ColumnSolveOptions,
    adopt_columns,
    options_kwargs,
    solve_columns,
)

__all__ = ["STAGE"]


def _run(*, inputs, options: ColumnSolveOptions, context) -> dict[str, Any]:
    if inputs["flat_file"] is not None:
        table = adopt_columns(
            inputs["flat_file"], context.camera.n_columns, source=options.flat_file.name
        )
        return {"columns": table}
    tables = [products["column_stats"] for products in inputs["column_stats"]]
    return {"columns": solve_columns(tables, **options_kwargs(options, exclude=("flat_file",)))}


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
    description="Solve the night's 1-D flat and per-column additive level from the sky "
    "(or adopt a solved table: flat_file).",
    version=3,  # 2: sky from relative levels; normalised lines; 3: hot needs 3 own errors
)
