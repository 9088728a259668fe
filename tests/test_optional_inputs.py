"""Optional requirements, the run-status input and HTML products, on the toy graph.

A night-scoped ``digest`` stage (like the report) requires ``total`` (night),
``smooth`` (per stretch), a stage the graph does not have, and the run
status, all but the status optional.  It must run whatever failed before
it, see what failed, and not rerun on an unchanged night.
"""

from __future__ import annotations

import importlib.machinery
import sys
import types
from pathlib import Path

import _toy_graph
import pytest

import pipeline.stages
from pipeline.config import config_from_mapping
from pipeline.runner import night_status, open_product, run_night
from pipeline.stages.base import RUN_STATUS, Stage, check_graph


def digest(*, inputs, options, context):
    total = inputs["total"]
    smooth = inputs["smooth"]
    failed = sorted(
        f"{stage['name']}/{unit}: {reason}"
        for stage in inputs[RUN_STATUS]["stages"]
        for unit, (state, reason) in stage["units"].items()
        if state == "failed"
    )
    seen = {
        "total": None if total is None else total["summary"]["total"],
        "n_smooth": 0 if smooth is None else len(smooth),
        "nowhere": inputs["nowhere"],
        "failed": failed,
    }
    return {"page": f"<p>{seen}</p>", "seen": seen}


class CheckOptions(_toy_graph.TotalOptions):
    fail: bool = False


def check(*, inputs, options, context):
    """A night-scoped side check that digest does not read: it fails on request."""
    if options.fail:
        raise ValueError("check failed")
    return {"summary": {"rows": len(inputs["index"]["block_index"])}}


CHECK = Stage("check", check, CheckOptions, ("index",), "night", ())
DIGEST = Stage(
    "digest",
    digest,
    _toy_graph.TotalOptions,
    ("total", "smooth", "nowhere", RUN_STATUS),
    "night",
    (),
    optional=("total", "smooth", "nowhere"),
    partial_inputs=True,
)
GRAPH = (*_toy_graph.GRAPH, CHECK, DIGEST)


@pytest.fixture
def night(tmp_path: Path):
    _toy_graph.write_raw_night(tmp_path / "raw")

    def config(*overrides: str):
        data = _toy_graph.toy_config_data(tmp_path)
        return config_from_mapping(data, overrides, graph=GRAPH)

    return config


def _digest(results) -> str:
    return next(r.status for r in results if r.stage == "digest")


def test_a_stage_runs_on_the_inputs_that_exist_and_only_when_they_change(night) -> None:
    broken = night("stages.scale.fail_on=[1]")
    report = run_night(broken)
    # total is blocked (it needs every stretch); digest runs without it, on the
    # three smooth stretches that exist, and sees the failure.
    assert _digest(report.results) == "ran" and not report.ok
    seen = open_product(broken, "digest", product="seen")
    failure = "scale/s0001: ValueError: toy failure on stretch 1"
    assert seen == {"total": None, "n_smooth": 3, "nowhere": None, "failed": [failure]}
    # An unchanged broken night: scale fails again the same way, digest stays.
    assert _digest(run_night(broken).results) == "skipped"
    states = {s.name: s.units for s in night_status(broken).stages}
    assert states["digest"]["night"][0] == "done"

    good = night()
    report = run_night(good)
    assert _digest(report.results) == "ran" and report.ok  # the failure is gone: rebuilt
    seen = open_product(good, "digest", product="seen")
    assert seen["total"] is not None and seen["n_smooth"] == 4 and seen["failed"] == []
    page = open_product(good, "digest", product="page")
    assert isinstance(page, str) and page.startswith("<p>{'total'")  # stored as .html
    assert _digest(run_night(good).results) == "skipped"


def test_a_failed_optional_input_is_none(night) -> None:
    config = night("stages.scale.fail_on=[0,1,2,3]")
    report = run_night(config)
    assert _digest(report.results) == "ran"
    seen = open_product(config, "digest", product="seen")
    assert seen == {
        "total": None,
        "n_smooth": 0,
        "nowhere": None,
        "failed": [f"scale/s000{i}: ValueError: toy failure on stretch {i}" for i in range(4)],
    }


def test_a_failure_elsewhere_alone_rebuilds(night) -> None:
    config = night()
    run_night(config)
    # check fails: nothing digest reads changes, only the run status.
    broken = night("stages.check.fail=true")
    assert _digest(run_night(broken).results) == "ran"
    assert open_product(broken, "digest", product="seen")["failed"] == [
        "check/night: ValueError: check failed"
    ]
    assert _digest(run_night(broken).results) == "skipped"
    assert _digest(run_night(config).results) == "ran"
    assert open_product(config, "digest", product="seen")["failed"] == []


def test_a_stale_earlier_unit_is_named_as_such_in_the_status(night) -> None:
    """The run status is no product: the status says what it stands for."""
    config = night()
    run_night(config)
    stages = {s.name: s for s in night_status(night("stages.check.fail=true")).stages}
    assert stages["check"].units["night"] == (
        "stale",
        "config changed: stages.check.fail false -> true",
    )
    assert stages["digest"].units["night"] == (
        "stale",
        "inputs changed: the state of an earlier unit",
    )


def test_optional_requirements_are_checked() -> None:
    with pytest.raises(ValueError, match="optional names 'other'"):
        Stage("x", digest, _toy_graph.TotalOptions, ("total",), "night", optional=("other",))
    with pytest.raises(ValueError, match="optional needs scope='night'"):
        Stage("x", digest, _toy_graph.TotalOptions, ("scale",), "stretch", optional=("scale",))
    with pytest.raises(ValueError, match="needs scope='night'"):
        Stage("x", digest, _toy_graph.TotalOptions, (RUN_STATUS,), "stretch")
    # An optional requirement may be absent from the graph, but not come later.
    check_graph(GRAPH)
    with pytest.raises(ValueError, match="come after it"):
        check_graph((*_toy_graph.GRAPH[:3], DIGEST, _toy_graph.GRAPH[3]))


def test_the_report_joins_the_graph_while_a_stage_it_can_do_without_is_in_progress(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    # astrometry as a module that does not declare its STAGE yet (work in progress):
    # zeropoint and science need it and wait; the report only uses it if it is there.
    in_progress = types.ModuleType("pipeline.stages.astrometry")
    in_progress.__spec__ = importlib.machinery.ModuleSpec("pipeline.stages.astrometry", None)
    monkeypatch.setitem(sys.modules, "pipeline.stages.astrometry", in_progress)
    names = [stage.name for stage in pipeline.stages._load_graph()]
    assert "astrometry" not in names and "zeropoint" not in names and "science" not in names
    assert names[-1] == "report"
