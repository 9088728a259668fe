"""Columns: the night's 1-D TDI flat and per-column additive level.

Combines the ``column_stats`` tables of all stretches with
:func:`pipeline.stages.calibrate.solve_columns`.  The ``columns`` product is a
small table (one row per image column) that later nights can use or compare.
"""

from __future__ import annotations

from typing import Any

from pipeline.stages.base import Stage
from pipeline.stages.calibrate import ColumnSolveOptions, options_kwargs, solve_columns

__all__ = ["STAGE"]


def _run(*, inputs, options: ColumnSolveOptions, context) -> dict[str, Any]:
    tables = [products["column_stats"] for products in inputs["column_stats"]]
    return {"columns": solve_columns(tables, **options_kwargs(options))}


#: Declaration of the columns stage for the runner.
STAGE = Stage(
    name="columns",
    run=_run,
    options=ColumnSolveOptions,
    requires=("column_stats",),
    scope="night",
    uses=(),
    description="Solve the night's 1-D flat and per-column additive level from the sky.",
    version=2,  # 2: sky from relative levels; normalised lines
)
