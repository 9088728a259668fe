"""Pipeline stages and the stage graph.

Each stage lives in its own module ``pipeline/stages/<name>.py``: a public
function over arrays and tables, an options model, and a module-level
``STAGE`` (a :class:`~pipeline.stages.base.Stage`) that declares it to the
runner.  ``GRAPH`` is the ordered tuple of registered stages (built on first
access); the order is the order the runner runs them in, and a stage may only
require earlier ones.  To register a stage, add its module name to
``STAGE_MODULES`` below.
"""

from __future__ import annotations

import importlib
import importlib.util

from pipeline.stages.base import (
    BLOCK_INDEX,
    PROBLEMS,
    RAW_FILES,
    RAW_ROWS,
    RUN_STATUS,
    RawFile,
    Stage,
    StageContext,
    Stretch,
    check_graph,
    plan_stretches,
)

__all__ = [
    "BLOCK_INDEX",
    "GRAPH",
    "PROBLEMS",
    "RAW_FILES",
    "RAW_ROWS",
    "RUN_STATUS",
    "STAGE_MODULES",
    "RawFile",
    "Stage",
    "StageContext",
    "Stretch",
    "check_graph",
    "plan_stretches",
]

#: Stage modules in run order.  A module that does not exist yet is skipped,
#: so stages can be added one at a time; a module that exists must define
#: ``STAGE`` (import errors are not hidden).
STAGE_MODULES = (
    "ingest",
    "column_stats",
    "columns",
    "calibrate",
    "rectify",
    "detect",
    "catalog",
    "astrometry",
    "zeropoint",
    "science",
    "mosaic",
    "report",
)


def _load_graph() -> tuple[Stage, ...]:
    stages = []
    waiting = set()  # registered modules that do not declare a STAGE yet
    for name in STAGE_MODULES:
        module_name = f"{__name__}.{name}"
        if importlib.util.find_spec(module_name) is None:
            continue
        module = importlib.import_module(module_name)
        stage = getattr(module, "STAGE", None)
        if stage is None:
            # The module exists but does not declare itself yet (work in progress).
            waiting.add(name)
            continue
        if waiting.intersection(set(stage.requires) - set(stage.optional)):
            # It needs a stage still in progress: it joins the graph with it
            # (a stage it can do without, in ``optional``, does not hold it back).
            waiting.add(name)
            continue
        stages.append(stage)
    return check_graph(stages)


def __getattr__(name: str):
    # GRAPH is built on first use (PEP 562), so importing pipeline.stages.base
    # (as every stage module does) does not import every stage.
    if name == "GRAPH":
        graph = _load_graph()
        globals()["GRAPH"] = graph
        return graph
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
