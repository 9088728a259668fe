"""The runner: stage graph, product store, provenance, reruns and executors.

The runner is the only part of the pipeline that reads and writes files and
knows about parallelism.  For one night it walks the stage graph in order;
each stage runs once for the night or once per stretch of rows ("units").
Every unit's products live in ``<output_dir>/<night>/<stage>/<unit>/`` with a
provenance sidecar (:mod:`pipeline._store`).

A unit is *up to date* when its sidecar records the current config hash
(the stage's options, the context fields it ``uses``, its row range) and the
current hashes of its inputs (upstream output hashes; raw file names, sizes
and modification times).  ``run_night`` skips up-to-date units, so a run
killed at any point resumes where it stopped, and a rerun with changed options
redoes only what they affect.  Because the input hashes are content hashes of
the upstream products, a rerun upstream stage that produces identical files
does not invalidate what follows.

Example
-------
>>> from pipeline.config import load_config                  # doctest: +SKIP
>>> config = load_config("configs/night.yaml")               # doctest: +SKIP
>>> report = run_night(config, stage="calibrate", stretches={0, 3})  # doctest: +SKIP
>>> print(report.format())                                   # doctest: +SKIP
"""

from __future__ import annotations

import dataclasses
import datetime
import itertools
import logging
import socket
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from pipeline._executors import Executor, make_executor
from pipeline._lock import RunLock
from pipeline._rawio import (
    block_index_rows,
    blocks_fingerprint,
    list_raw_files,
    overlapping_blocks,
    raw_files_fingerprint,
)
from pipeline._store import (
    clear_failure,
    hash_json,
    read_failure,
    read_product,
    read_sidecar,
    write_failure,
)
from pipeline._unit import InputSpec, UnitOutcome, UnitTask, execute_unit, failed_outcome
from pipeline.config import Config
from pipeline.stages.base import (
    BLOCK_INDEX,
    RAW_FILES,
    RAW_ROWS,
    Stage,
    StageContext,
    Stretch,
    plan_stretches,
)

__all__ = [
    "LOCK_NAME",
    "LOG_NAME",
    "NightStatus",
    "Progress",
    "RunReport",
    "StageStatus",
    "UnitResult",
    "format_ids",
    "night_dir",
    "night_status",
    "no_progress",
    "parse_stretches",
    "run_night",
    "select_stages",
]

log = logging.getLogger(__name__)

#: Name of the run lock file in the night's output folder.
LOCK_NAME = "_lock.json"
#: Name of the night's log file (written by the command line).
LOG_NAME = "zdrift.log"
#: Unit id of a night-scoped stage.
NIGHT = "night"

#: ``progress(label, done, total)``: called as units finish.
Progress = Callable[[str, int, int], None]


def no_progress(label: str, done: int, total: int) -> None:
    """The default progress callback: does nothing."""


def night_dir(config: Config) -> Path:
    """The night's output folder, ``<output_dir>/<night name>``."""
    return Path(config.night.output_dir) / config.night.name


def parse_stretches(text: str) -> frozenset[int]:
    """Parse a stretch selection such as ``'0,3-5'`` into ``{0, 3, 4, 5}``.

    Examples
    --------
    >>> sorted(parse_stretches("0,3-5"))
    [0, 3, 4, 5]
    """
    selected: set[int] = set()
    for part in text.split(","):
        first, sep, last = part.strip().partition("-")
        try:
            lo = int(first)
            hi = int(last) if sep else lo
        except ValueError:
            raise ValueError(
                f"stretches: cannot read {part.strip()!r} in {text!r}; use indices and "
                "ranges such as '0,3-5'."
            ) from None
        if lo < 0 or hi < lo:
            raise ValueError(f"stretches: {part.strip()!r} is not a range of indices >= 0.")
        selected.update(range(lo, hi + 1))
    return frozenset(selected)


def format_ids(ids: Iterable[str]) -> str:
    """Compress unit ids for display: ``s0000 s0001 s0002 s0005`` -> ``s0000-s0002, s0005``."""
    ids = sorted(ids)
    numbered = [(int(i[1:]), i) for i in ids if i[:1] == "s" and i[1:].isdigit()]
    parts = [i for i in ids if not (i[:1] == "s" and i[1:].isdigit())]
    for _, run in itertools.groupby(enumerate(numbered), lambda p: p[1][0] - p[0]):
        run = [item for _, item in run]
        parts.append(run[0][1] if len(run) == 1 else f"{run[0][1]}-{run[-1][1]}")
    return ", ".join(parts)


def select_stages(
    graph: Sequence[Stage],
    stage: str | None = None,
    from_stage: str | None = None,
    to_stage: str | None = None,
) -> tuple[Stage, ...]:
    """The stages to run: all, one (``stage``), or a range ``from_stage..to_stage``."""
    names = [s.name for s in graph]

    def position(name: str, option: str) -> int:
        if name not in names:
            raise ValueError(f"{option}: no stage {name!r}; stages are {', '.join(names)}.")
        return names.index(name)

    if stage is not None:
        if from_stage is not None or to_stage is not None:
            raise ValueError("Give either a single stage or a from/to range, not both.")
        return (graph[position(stage, "stage")],)
    first = position(from_stage, "from") if from_stage is not None else 0
    last = position(to_stage, "to") if to_stage is not None else len(graph) - 1
    if last < first:
        raise ValueError(f"from {from_stage!r} comes after to {to_stage!r} in the stage order.")
    return tuple(graph[first : last + 1])


# ------------------------------------------------------------------------- results


@dataclass(frozen=True)
class UnitResult:
    """What a run did with one unit.

    ``status`` is ``'ran'``, ``'skipped'`` (up to date), ``'failed'`` or
    ``'blocked'`` (inputs missing).
    """

    stage: str
    unit: str
    status: str
    reason: str = ""
    seconds: float = 0.0


@dataclass
class RunReport:
    """Summary of :func:`run_night`."""

    night: str
    results: list[UnitResult] = field(default_factory=list)
    stale_downstream: dict[str, list[str]] = field(default_factory=dict)

    @property
    def ok(self) -> bool:
        """True if no unit failed or was blocked."""
        return not self.problems

    @property
    def problems(self) -> list[UnitResult]:
        """Failed and blocked units."""
        return [r for r in self.results if r.status in ("failed", "blocked")]

    def count(self, status: str) -> int:
        """Number of units with ``status``."""
        return sum(r.status == status for r in self.results)

    def format(self) -> str:
        """A human-readable summary."""
        lines = [
            f"night {self.night}: {self.count('ran')} units ran, {self.count('skipped')} up "
            f"to date, {self.count('failed')} failed, {self.count('blocked')} blocked"
        ]
        for result in sorted(self.problems, key=lambda r: (r.status, r.stage, r.unit)):
            lines.append(f"  {result.status}: {result.stage}/{result.unit}: {result.reason}")
        if self.stale_downstream:
            first = next(iter(self.stale_downstream))
            lines.append(f"stale products downstream (rerun with --from {first}):")
            for name, ids in self.stale_downstream.items():
                lines.append(f"  {name}: {format_ids(ids)}")
        return "\n".join(lines)


@dataclass
class StageStatus:
    """State of every unit of one stage: ``unit -> (state, reason)``.

    States: ``'done'``, ``'stale'``, ``'missing'``, ``'failed'``, ``'orphan'``
    (a stretch folder outside the current stretch plan).
    """

    name: str
    scope: str
    units: dict[str, tuple[str, str]] = field(default_factory=dict)

    def ids(self, state: str) -> list[str]:
        """Unit ids in ``state``."""
        return [unit for unit, (s, _) in self.units.items() if s == state]


@dataclass
class NightStatus:
    """Result of :func:`night_status`."""

    night: str
    folder: Path
    n_stretches: int | None
    stages: list[StageStatus]

    def format(self) -> str:
        """A table of unit counts per stage, then the non-done units with reasons."""
        plan = (
            "no stretch plan yet" if self.n_stretches is None else (f"{self.n_stretches} stretches")
        )
        lines = [f"night {self.night} ({plan}) in {self.folder}"]
        states = ("done", "stale", "missing", "failed")
        lines.append(f"  {'stage':<14}{'scope':<9}" + "".join(f"{s:>8}" for s in states))
        for stage in self.stages:
            counts = "".join(f"{len(stage.ids(s)):>8}" for s in states)
            lines.append(f"  {stage.name:<14}{stage.scope:<9}{counts}")
        for stage in self.stages:
            by_reason: dict[tuple[str, str], list[str]] = {}
            for unit, (state, reason) in stage.units.items():
                if state not in ("done", "missing"):
                    by_reason.setdefault((state, reason), []).append(unit)
            for (state, reason), ids in sorted(by_reason.items()):
                lines.append(f"  {stage.name} {state}: {format_ids(ids)}: {reason}")
        return "\n".join(lines)


# ----------------------------------------------------------------------- the night


def _unit_id(stretch: Stretch | None) -> str:
    return NIGHT if stretch is None else stretch.id


class _Night:
    """The product store of one night, seen through the current config."""

    def __init__(self, config: Config):
        self.config = config
        self.root = night_dir(config)
        self.raw_dir = Path(config.night.raw_dir)
        self.stages = {stage.name: stage for stage in config.graph}
        self.row_stage = next((s for s in config.graph if s.defines_rows), None)
        self.context = StageContext(
            site=config.site(), camera=config.camera(), run=config.run, night=config.night.name
        )
        self.refresh()

    def refresh(self) -> None:
        """Forget cached sidecars and states; reload the block index and stretch plan."""
        self._sidecars: dict[tuple[str, str], dict[str, Any] | None] = {}
        self._states: dict[tuple[str, str], tuple[str, str]] = {}
        self._raw_names: list[str] | None = None
        self.index = None
        self.stretches: tuple[Stretch, ...] = ()
        if self.row_stage is None:
            return
        record = self.usable(self.row_stage, NIGHT)
        if record is not None and BLOCK_INDEX in record["products"]:
            folder = self.unit_dir(self.row_stage, NIGHT)
            entry = record["products"][BLOCK_INDEX]
            self.index = read_product(folder / entry["file"], entry)
            run = self.config.run
            rows = block_index_rows(self.index)
            self.stretches = plan_stretches(rows, run.stretch_rows, run.overlap_rows)
        self.context = dataclasses.replace(self.context, stretches=self.stretches)

    def unit_dir(self, stage: Stage, unit: str) -> Path:
        return self.root / stage.name / unit

    def units(self, stage: Stage) -> list[Stretch | None]:
        return [None] if stage.scope == "night" else list(self.stretches)

    def sidecar(self, stage: Stage, unit: str) -> dict[str, Any] | None:
        key = (stage.name, unit)
        if key not in self._sidecars:
            self._sidecars[key] = read_sidecar(self.unit_dir(stage, unit))
        return self._sidecars[key]

    def usable(self, stage: Stage, unit: str) -> dict[str, Any] | None:
        """The unit's sidecar, unless the unit is incomplete or its last attempt failed."""
        if read_failure(self.unit_dir(stage, unit)) is not None:
            return None
        return self.sidecar(stage, unit)

    def raw_names(self) -> list[str]:
        if self._raw_names is None:
            self._raw_names = list_raw_files(self.raw_dir, self.config.night.pattern)
        return self._raw_names

    # -- what a unit depends on -------------------------------------------------

    def _context_value(self, name: str) -> Any:
        # names were checked against the sections when the config was built
        section, _, key = name.partition(".")
        if section == "run":
            values = self.config.run.model_dump(mode="json")
        else:
            values = dataclasses.asdict(getattr(self.context, section))
        return values[key] if key else values

    def config_data(self, stage: Stage, stretch: Stretch | None) -> dict[str, Any]:
        """What the stage's products depend on besides its inputs (hashed)."""
        options = self.config.stage_options(stage.name)
        return {
            "version": stage.version,
            "options": options.model_dump(mode="json"),
            "uses": {name: self._context_value(name) for name in stage.uses},
            "rows": None
            if stretch is None
            else [stretch.lo, stretch.start, stretch.stop, stretch.hi],
        }

    def inputs(
        self, stage: Stage, stretch: Stretch | None
    ) -> tuple[dict[str, str], list[InputSpec], str | None]:
        """Input hashes, how to load the inputs, and why they are unavailable (or None)."""
        hashes: dict[str, str] = {}
        specs: list[InputSpec] = []
        for name in stage.requires:
            if name == RAW_FILES:
                names = tuple(self.raw_names())
                hashes[name] = raw_files_fingerprint(self.raw_dir, names)
                specs.append(InputSpec(name, "raw_files", raw_dir=self.raw_dir, names=names))
                continue
            if name == RAW_ROWS:
                if self.index is None:
                    return hashes, specs, self.no_index_reason()
                lo, hi = stretch.lo, stretch.hi
                hashes[name] = blocks_fingerprint(self.raw_dir, self.index, lo, hi)
                subset = self.index[overlapping_blocks(self.index, lo, hi)]
                specs.append(
                    InputSpec(name, "raw_rows", raw_dir=self.raw_dir, index=subset, lo=lo, hi=hi)
                )
                continue
            upstream = self.stages[name]
            if upstream.scope == "night":
                ids = [NIGHT]
            elif stage.scope == "stretch":
                ids = [stretch.id]
            else:
                ids = [s.id for s in self.stretches]
                if not ids:
                    return hashes, specs, self.no_index_reason()
            units = [(self.unit_dir(upstream, i), self.usable(upstream, i)) for i in ids]
            missing = [i for i, (_, record) in zip(ids, units, strict=True) if record is None]
            if missing:
                problem = f"needs {name} products for {format_ids(missing)} (missing or failed)"
                return hashes, specs, problem
            if upstream.scope == "stretch" and stage.scope == "night":
                hashes[name] = hash_json([record["output_hash"] for _, record in units])
                specs.append(InputSpec(name, "units", units=tuple(units)))
            else:
                hashes[name] = units[0][1]["output_hash"]
                specs.append(InputSpec(name, "unit", units=tuple(units)))
        return hashes, specs, None

    def no_index_reason(self) -> str:
        maker = self.row_stage.name if self.row_stage else "a stage with defines_rows"
        if self.index is not None:
            return f"the block index of stage {maker!r} has no rows (were all raw files rejected?)"
        return f"no block index yet; run stage {maker!r} first"

    def state(self, stage: Stage, stretch: Stretch | None) -> tuple[str, str]:
        """``(state, reason)`` of a unit; see :class:`StageStatus`."""
        key = (stage.name, _unit_id(stretch))
        if key not in self._states:
            self._states[key] = self._compute_state(stage, stretch)
        return self._states[key]

    def _compute_state(self, stage: Stage, stretch: Stretch | None) -> tuple[str, str]:
        unit = _unit_id(stretch)
        failure = read_failure(self.unit_dir(stage, unit))
        if failure is not None:
            return "failed", failure.get("reason", "unknown reason")
        record = self.sidecar(stage, unit)
        if record is None:
            return "missing", ""
        hashes, _, problem = self.inputs(stage, stretch)
        if problem is not None:
            return "stale", problem
        if record.get("config_hash") != hash_json(self.config_data(stage, stretch)):
            return "stale", "config changed"
        recorded = record.get("inputs", {})
        changed = sorted(k for k in set(hashes) | set(recorded) if hashes.get(k) != recorded.get(k))
        if changed:
            return "stale", f"inputs changed: {', '.join(changed)}"
        for name in stage.requires:
            upstream = self.stages.get(name)
            if upstream is None:
                continue
            if upstream.scope == "night":
                ups = [None]
            else:
                ups = [stretch] if stage.scope == "stretch" else list(self.stretches)
            for up in ups:
                up_state = self.state(upstream, up)[0]
                if up_state != "done":
                    return "stale", f"upstream {name} is {up_state}"
        return "done", ""

    def task(
        self,
        stage: Stage,
        stretch: Stretch | None,
        specs: list[InputSpec],
        hashes: dict[str, str],
        capture_logs: bool,
    ) -> UnitTask:
        unit = _unit_id(stretch)
        data = self.config_data(stage, stretch)
        return UnitTask(
            stage=stage,
            unit=unit,
            unit_dir=self.unit_dir(stage, unit),
            options=self.config.stage_options(stage.name),
            context=dataclasses.replace(self.context, stretch=stretch),
            inputs=tuple(specs),
            config=data,
            config_hash=hash_json(data),
            input_hashes=hashes,
            capture_logs=capture_logs,
        )


# ----------------------------------------------------------------------------- run


def run_night(
    config: Config,
    *,
    stage: str | None = None,
    from_stage: str | None = None,
    to_stage: str | None = None,
    stretches: Iterable[int] | None = None,
    force: bool = False,
    progress: Progress | None = None,
) -> RunReport:
    """Run the night's stages, skipping units that are up to date.

    Parameters
    ----------
    config : Config
        The resolved config; ``config.graph`` is the stage graph.
    stage : str, optional
        Run only this stage.
    from_stage, to_stage : str, optional
        Run the stages from ``from_stage`` to ``to_stage`` (inclusive, graph
        order); either may be omitted.
    stretches : iterable of int, optional
        Stretch indices for stretch-scoped stages (night-scoped stages run as
        usual); default all.
    force : bool
        Recompute selected units even if they are up to date.
    progress : callable, optional
        ``progress(stage_name, done, total)``; default :func:`no_progress`.

    Returns
    -------
    RunReport
        ``report.ok`` is False if a unit failed or was blocked; the failures
        are also recorded in the store (``zdrift status`` shows them).

    Raises
    ------
    RunLockedError
        If another live run holds the night's lock.
    ValueError
        For unknown stage names.
    """
    selected = select_stages(config.graph, stage, from_stage, to_stage)
    wanted = None if stretches is None else frozenset(stretches)
    progress = progress or no_progress
    night = _Night(config)
    report = RunReport(config.night.name)
    with RunLock(night.root / LOCK_NAME), make_executor(config.run) as executor:
        log.info(
            "night %s: stages %s, executor %s",
            config.night.name,
            ", ".join(s.name for s in selected),
            config.run.executor,
        )
        for current in selected:
            report.results.extend(_run_stage(night, current, wanted, force, executor, progress))
            night.refresh()
        report.stale_downstream = _stale_downstream(night, selected)
    log.info("%s", report.format())
    return report


def _run_stage(
    night: _Night,
    stage: Stage,
    wanted: frozenset[int] | None,
    force: bool,
    executor: Executor,
    progress: Progress,
) -> list[UnitResult]:
    if stage.scope == "stretch" and night.index is None:
        return [UnitResult(stage.name, "*", "blocked", night.no_index_reason())]
    units = night.units(stage)
    if stage.scope == "stretch" and wanted is not None:
        absent = sorted(wanted - {s.index for s in units})
        if absent:
            log.warning("%s: no stretches %s (the night has %d)", stage.name, absent, len(units))
        units = [s for s in units if s.index in wanted]
    results, tasks = [], []
    for stretch in units:
        unit = _unit_id(stretch)
        hashes, specs, problem = night.inputs(stage, stretch)
        if problem is not None:
            log.warning("%s/%s blocked: %s", stage.name, unit, problem)
            results.append(UnitResult(stage.name, unit, "blocked", problem))
            continue
        state, reason = night.state(stage, stretch)
        if state == "done" and not force:
            results.append(UnitResult(stage.name, unit, "skipped"))
            continue
        if reason.startswith("upstream"):
            log.warning(
                "%s/%s: running on upstream products that are not current (%s)",
                stage.name,
                unit,
                reason,
            )
        clear_failure(night.unit_dir(stage, unit))
        tasks.append(night.task(stage, stretch, specs, hashes, executor.remote))
    progress(stage.name, 0, len(tasks))
    outcomes = executor.map(execute_unit, tasks, on_error=failed_outcome)
    for done, outcome in enumerate(outcomes, start=1):
        results.append(_record_outcome(night, stage, outcome, executor.remote))
        progress(stage.name, done, len(tasks))
    return sorted(results, key=lambda r: r.unit)


def _record_outcome(night: _Night, stage: Stage, outcome: UnitOutcome, remote: bool) -> UnitResult:
    if remote:  # re-emit what the worker logged, under the original logger names
        for name, level, message in outcome.records:
            logging.getLogger(name).log(level, "[%s/%s] %s", outcome.stage, outcome.unit, message)
    for text in outcome.warnings:
        log.warning("%s/%s: %s", outcome.stage, outcome.unit, text)
    if outcome.ok:
        log.info("%s/%s done in %.2f s", outcome.stage, outcome.unit, outcome.seconds)
        return UnitResult(outcome.stage, outcome.unit, "ran", seconds=outcome.seconds)
    write_failure(
        night.unit_dir(stage, outcome.unit),
        {
            "stage": outcome.stage,
            "unit": outcome.unit,
            "reason": outcome.error,
            "traceback": outcome.traceback,
            "host": socket.gethostname(),
            "time": datetime.datetime.now(datetime.UTC).isoformat(timespec="seconds"),
        },
    )
    log.error("%s/%s failed: %s", outcome.stage, outcome.unit, outcome.error)
    if outcome.traceback:
        log.debug("%s/%s traceback:\n%s", outcome.stage, outcome.unit, outcome.traceback)
    return UnitResult(outcome.stage, outcome.unit, "failed", outcome.error or "", outcome.seconds)


def _stale_downstream(night: _Night, selected: Sequence[Stage]) -> dict[str, list[str]]:
    graph = night.config.graph
    first = graph.index(selected[0])
    stale = {}
    for stage in graph[first + 1 :]:
        if stage in selected:
            continue
        ids = [_unit_id(s) for s in night.units(stage) if night.state(stage, s)[0] == "stale"]
        if ids:
            stale[stage.name] = ids
    return stale


def night_status(config: Config) -> NightStatus:
    """The state of every unit of the night, stage by stage (reads only)."""
    night = _Night(config)
    stages = []
    for stage in config.graph:
        status = StageStatus(stage.name, stage.scope)
        for stretch in night.units(stage):
            status.units[_unit_id(stretch)] = night.state(stage, stretch)
        folder = night.root / stage.name
        if stage.scope == "stretch" and night.index is not None and folder.is_dir():
            for path in sorted(folder.iterdir()):
                if path.is_dir() and path.name not in status.units:
                    status.units[path.name] = ("orphan", "not in the current stretch plan")
        stages.append(status)
    n_stretches = len(night.stretches) if night.index is not None else None
    return NightStatus(config.night.name, night.root, n_stretches, stages)
