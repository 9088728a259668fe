"""The runner: stage graph, product store, provenance, reruns and executors.

The runner is the only part of the pipeline that reads and writes files and
knows about parallelism.  For one night it walks the stage graph in order;
each stage runs once for the night or once per stretch of rows ("units").
Consecutive per-stretch stages run together: each unit starts as soon as the
units it reads are written (see :func:`_run_chain`).
Every unit's products live in ``<output_dir>/<night>/<stage>/<unit>/`` with a
provenance sidecar (:mod:`pipeline.runner._store`).

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

import contextlib
import datetime
import difflib
import logging
import socket
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path

from pipeline._lazy import lazy_exports
from pipeline._offline import astropy_offline
from pipeline.config import Config
from pipeline.runner._access import open_product, product_path, read_image
from pipeline.runner._executors import Executor, make_executor
from pipeline.runner._lock import BROKEN_LOCK_AGE, RunLock, pid_alive, read_lock
from pipeline.runner._night import NightStore, format_ids, night_dir, unit_id
from pipeline.runner._nightly import (
    NIGHT_CONFIG_NAME,
    REPORT_PAGE,
    NightOutcome,
    find_nights,
    reduce_night,
    report_page,
)
from pipeline.runner._store import clear_failure, learn_digests, mark_damaged, write_failure
from pipeline.runner._unit import UnitOutcome, UnitTask, execute_unit, failed_outcome
from pipeline.runner._warm import warm_plan
from pipeline.stages.base import RAW_FILES, RAW_ROWS, STRETCH_PIXELS, Stage, Stretch

__all__ = [
    "LOCK_NAME",
    "LOG_NAME",
    "NIGHTS_PAGE",
    "NIGHT_CONFIG_NAME",
    "REPORT_PAGE",
    "MosaicStatus",
    "NightOutcome",
    "NightStatus",
    "NightsRun",
    "Progress",
    "RunReport",
    "StageStatus",
    "UnitResult",
    "describe_lock",
    "find_nights",
    "format_ids",
    "mosaic_dir",
    "mosaic_nights",
    "mosaic_status",
    "night_dir",
    "night_status",
    "nights_page",
    "no_progress",
    "open_product",
    "parse_stretches",
    "product_path",
    "read_image",
    "reduce_night",
    "report_page",
    "run_mosaic",
    "run_night",
    "run_nights_and_mosaic",
    "select_stages",
]

# Imported on first use: the mosaic and the strip of nights load the mosaic's
# modules (and through them the detection's), which a night's run does not need.
__getattr__, __dir__ = lazy_exports(
    __name__,
    {
        "_mosaic": ["MosaicStatus", "mosaic_dir", "mosaic_nights", "mosaic_status", "run_mosaic"],
        "_strip": ["NIGHTS_PAGE", "NightsRun", "nights_page", "run_nights_and_mosaic"],
    },
)

log = logging.getLogger(__name__)

#: Name of the run lock file in the night's output folder.
LOCK_NAME = "_lock.json"
#: Name of the night's log file (written by the command line).
LOG_NAME = "zdrift.log"

#: How often one run recomputes damaged products it finds before giving up.
MAX_REPAIRS = 3

#: ``progress(label, done, total)``: called as units finish.
Progress = Callable[[str, int, int], None]


def no_progress(label: str, done: int, total: int) -> None:
    """The default progress callback: does nothing."""


def parse_stretches(text: str) -> frozenset[int]:
    """Parse an index selection such as ``'0,3-5'`` into ``{0, 3, 4, 5}``.

    Used for stretches and for mosaic tiles alike: the error names neither,
    the caller (argparse's option) says which.

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
                f"cannot read {part.strip()!r} in {text!r}; use indices and ranges such as '0,3-5'."
            ) from None
        if lo < 0 or hi < lo:
            raise ValueError(f"{part.strip()!r} is not a range of indices >= 0.")
        selected.update(range(lo, hi + 1))
    return frozenset(selected)


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
            close = difflib.get_close_matches(name, names, n=1)
            hint = f" Did you mean {close[0]!r}?" if close else ""
            raise ValueError(f"{option}: no stage {name!r}.{hint} Stages are {', '.join(names)}.")
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
    ``'blocked'`` (inputs missing).  ``problems`` are the one-line problems
    with its input that the stage reported (see
    :data:`pipeline.stages.base.PROBLEMS`) and, for a stage with
    ``partial_inputs``, the stretches it ran without; also for a skipped unit.
    """

    stage: str
    unit: str
    status: str
    reason: str = ""
    seconds: float = 0.0
    problems: tuple[str, ...] = ()


@dataclass
class RunReport:
    """Summary of :func:`run_night`."""

    night: str
    results: list[UnitResult] = field(default_factory=list)
    stale_downstream: dict[str, list[str]] = field(default_factory=dict)
    #: One line per damaged product found (and recomputed) during the run.
    damaged: list[str] = field(default_factory=list)
    #: What was run: ``'night'``, or ``'mosaic'`` (:func:`run_mosaic`, units are tiles).
    kind: str = "night"

    @property
    def ok(self) -> bool:
        """True if no unit failed or was blocked, no stage reported a problem and
        no product was found damaged."""
        return not self.problems and not self.flagged and not self.damaged

    @property
    def problems(self) -> list[UnitResult]:
        """Failed and blocked units."""
        return [r for r in self.results if r.status in ("failed", "blocked")]

    @property
    def flagged(self) -> list[UnitResult]:
        """Units whose stage reported problems with its input (partial failures)."""
        return [r for r in self.results if r.problems]

    def count(self, status: str) -> int:
        """Number of units with ``status``."""
        return sum(r.status == status for r in self.results)

    def format(self) -> str:
        """A human-readable summary."""
        summary = (
            f"{self.kind} {self.night}: {self.count('ran')} units ran, {self.count('skipped')} up "
            f"to date, {self.count('failed')} failed, {self.count('blocked')} blocked"
        )
        n_problems = sum(len(r.problems) for r in self.results)
        if n_problems:
            summary += f", {n_problems} problem{'s' if n_problems > 1 else ''} in the input"
        if self.damaged:
            n_damaged = len(self.damaged)
            summary += f", {n_damaged} damaged product{'s' if n_damaged > 1 else ''}"
        lines = [summary]
        lines.extend(f"  damaged: {line}" for line in self.damaged)
        for result in sorted(self.problems, key=lambda r: (r.status, r.stage, r.unit)):
            lines.append(f"  {result.status}: {result.stage}/{result.unit}: {result.reason}")
        for result in self.flagged:
            lines.extend(f"  problem: {result.stage}/{result.unit}: {p}" for p in result.problems)
        if self.stale_downstream:
            first = next(iter(self.stale_downstream))
            lines.append(f"stale products left (rerun with --from {first}):")
            for name, ids in self.stale_downstream.items():
                lines.append(f"  {name}: {format_ids(ids)}")
        return "\n".join(lines)


@dataclass
class StageStatus:
    """State of every unit of one stage: ``unit -> (state, reason)``.

    States: ``'done'``, ``'stale'``, ``'missing'``, ``'failed'``, ``'damaged'``
    (a product file unreadable or changed since it was written), ``'orphan'``
    (a stretch folder outside the current stretch plan).  ``problems`` holds
    the problems with the input that the stage reported, per unit that has any.
    """

    name: str
    scope: str
    units: dict[str, tuple[str, str]] = field(default_factory=dict)
    problems: dict[str, list[str]] = field(default_factory=dict)

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
    #: The run lock, described (a live run, a stale or broken lock), or None.
    lock: str | None = None

    def count(self, *states: str) -> int:
        """Number of units in any of ``states``."""
        return sum(len(stage.ids(state)) for stage in self.stages for state in states)

    @property
    def has_problems(self) -> bool:
        """True if a unit failed or is damaged, or a stage reported problems."""
        return bool(self.count("failed", "damaged") or any(s.problems for s in self.stages))

    @property
    def complete(self) -> bool:
        """True if every unit of every stage is done (nothing stale, missing or worse)."""
        return all(state == "done" for s in self.stages for state, _ in s.units.values())

    def format(self) -> str:
        """A table of unit counts per stage, then the non-done units with reasons."""
        plan = (
            "no stretch plan yet" if self.n_stretches is None else (f"{self.n_stretches} stretches")
        )
        lines = [f"night {self.night} ({plan}) in {self.folder}"]
        states = ("done", "stale", "missing", "failed", "damaged")
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
        for stage in self.stages:
            for unit, problems in stage.problems.items():
                lines.extend(f"  {stage.name} problem: {unit}: {p}" for p in problems)
        if self.lock is not None:
            lines.append(f"lock: {self.lock}")
        return "\n".join(lines)


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
    verify: bool = False,
    executor: Executor | None = None,
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
    verify : bool
        First check every stored product against the SHA-256 its provenance
        records (reads them all).  Without it, only the products a unit
        reads are checked, as it reads them.  Either way a damaged product
        is reported (``report.damaged``), taken out of use and recomputed,
        with what depends on it.
    executor : Executor, optional
        Run the units there, and leave it open (several nights can share
        one pool of workers); default one made from ``config.run`` for this
        run, with no more workers than it has units to run at once, and
        closed at its end.

    Returns
    -------
    RunReport
        ``report.ok`` is False if a unit failed or was blocked, or a stage
        reported problems with its input (``report.flagged``); the failures
        are also recorded in the store (``zdrift status`` shows them).

    Raises
    ------
    RunLockedError
        If another live run holds the night's lock.
    ValueError
        For unknown stage names and stretches the night does not have.

    Notes
    -----
    astropy is kept offline during the run only
    (:func:`pipeline._offline.astropy_offline`); the caller's settings are
    restored afterwards.
    """
    with astropy_offline():
        return _run_night(
            config, stage, from_stage, to_stage, stretches, force, progress, verify, executor
        )


def _run_night(
    config, stage, from_stage, to_stage, stretches, force, progress, verify, shared
) -> RunReport:
    selected = select_stages(config.graph, stage, from_stage, to_stage)
    wanted = None if stretches is None else frozenset(stretches)
    if wanted is not None:
        _note_whole_night(selected)
    progress = progress or no_progress
    night = NightStore(config)
    _check_raw_folder(night, selected)
    report = RunReport(config.night.name)
    results: dict[tuple[str, str], UnitResult] = {}
    lock = RunLock(night.root / LOCK_NAME)
    if shared is None:
        workers = make_executor(config.run, config.camera().n_columns)
    else:
        workers = contextlib.nullcontext(shared)
    with lock, workers as executor:
        night.find_lost()
        if verify:
            night.find_damage()
        plan = _with_recut_upstream(night, selected)
        # workers import the modules of the planned stages only (a stage added to
        # repair a damaged product is imported when its first unit arrives)
        executor.warm(_stage_modules(plan), warm_plan(plan))
        if shared is None:  # a shared executor serves other nights too
            executor.fit(_units_at_once(night, plan, wanted))
        log.info(
            "night %s: stages %s, executor %s",
            config.night.name,
            ", ".join(s.name for s in plan),
            config.run.executor,
        )
        if config.run.stretch_rows is None:
            n_columns = config.camera().n_columns
            log.info(
                "run.stretch_rows not set: %d rows per stretch (%d columns, at most %d pixels)",
                config.run.rows_per_stretch(n_columns),
                n_columns,
                STRETCH_PIXELS,
            )
        position, repairs, forced = 0, 0, set()
        while True:
            damaged = _take_damaged_out_of_use(night, report, repairs < MAX_REPAIRS)
            if damaged and repairs < MAX_REPAIRS:
                repairs += 1
                plan[position:position] = _repair_stages(night, plan, position, damaged)
                if wanted is not None:  # the damaged stretches must be redone too
                    units = {unit for _, unit in damaged}
                    wanted |= {s.index for s in night.stretches if s.id in units}
            if position == len(plan):
                break
            chain = _stretch_chain(plan, position)
            position += len(chain)
            forcing = {s.name for s in chain if force and s in selected and s.name not in forced}
            forced.update(s.name for s in chain)
            lock_token = (lock.path, lock.token)
            if len(chain) > 1 and night.index is not None:
                ran = _run_chain(night, chain, wanted, forcing, executor, progress, lock_token)
            else:
                ran = []
                for current in chain:
                    ran += _run_stage(
                        night,
                        current,
                        wanted,
                        current.name in forcing,
                        executor,
                        progress,
                        lock_token,
                    )
                    _refresh_if_written(night, ran)
            for result in ran:
                key = (result.stage, result.unit)
                if result.status != "skipped" or key not in results:  # keep what a unit did
                    results[key] = result
            _refresh_if_written(night, ran)
        report.results = list(results.values())
        report.stale_downstream = _stale_downstream(night, selected, wanted)
    log.info("%s", report.format())
    return report


def _stage_modules(graph: Sequence[Stage]) -> list[str]:
    """The importable modules that define the stages' run functions (for warm workers)."""
    names = {getattr(stage.run, "__module__", None) for stage in graph}
    return sorted(name for name in names if isinstance(name, str) and name != "__main__")


def _note_whole_night(selected: Sequence[Stage]) -> None:
    """Say which selected stages ``--stretches`` does not narrow: those of night scope.

    A night-scoped stage has one unit, the night (the catalogue, astrometry
    and the zero point need every stretch): it runs whole, on the products
    of all the stretches there are.  A warning when no selected stage is per
    stretch (the option then changes nothing), else a note in the log.
    """
    whole = [stage.name for stage in selected if stage.scope == "night"]
    if not whole:
        return
    names = ", ".join(whole)
    if len(whole) == len(selected):
        log.warning(
            "--stretches has no effect on %s: a night-scoped stage runs over the whole night",
            names,
        )
    else:
        log.info("--stretches narrows the per-stretch stages only; %s run(s) for the night", names)


def _units_at_once(
    night: NightStore, plan: Sequence[Stage], wanted: frozenset[int] | None
) -> int | None:
    """The most units ``plan`` can run at once, or None if that is not known yet.

    One if every stage is night-scoped, else the stretches run (those
    ``wanted``).  The stored stretch plan holds when the stage that defines
    the rows is up to date, forced or not: rerun on the same raw files with
    the same options, it writes the same block index.  Otherwise (a new
    night, new raw files) it may find more rows than the stored index has,
    and only ``wanted`` bounds the count.
    """
    if all(stage.scope == "night" for stage in plan):
        return 1
    row_stage = night.row_stage
    known = night.index is not None and (
        row_stage not in plan or night.state(row_stage, None)[0] == "done"
    )
    if not known:
        return None if wanted is None else len(wanted)
    indices = {stretch.index for stretch in night.stretches}
    return len(indices if wanted is None else indices & wanted)


def _with_recut_upstream(night: NightStore, selected: Sequence[Stage]) -> list[Stage]:
    """``selected``, preceded by the stages whose per-stretch products were cut for other rows.

    After a change of ``run.stretch_rows`` or ``run.overlap_rows``, the
    per-stretch products of the stages before the first selected one cover
    the old stretches, which the selected stages cannot use: those stages
    are recomputed first.
    """
    graph = list(night.config.graph)
    first = graph.index(selected[0])
    recut = [s for s in graph[:first] if night.cut_for_other_rows(s)]
    if not recut:
        return list(selected)
    start = graph.index(recut[0])
    log.warning(
        "the products of %s were cut for other stretch rows (run.stretch_rows or "
        "run.overlap_rows changed): running from %s",
        ", ".join(s.name for s in recut),
        recut[0].name,
    )
    return graph[start:first] + list(selected)


def _check_raw_folder(night: NightStore, selected: Sequence[Stage]) -> None:
    """Stop before anything runs when stages that read raw blocks have no raw folder.

    A mistyped ``night.raw_dir`` otherwise blocked those stages while the
    later ones ran again on the products left by the last run, and rebuilt
    the report without any stretch.  A run from a later stage (``--from``,
    ``--stage``) works on the products without the raw files.

    Raises
    ------
    ValueError
        Some selected stage reads raw blocks and ``night.raw_dir`` is not a
        folder.
    """
    reading = [s.name for s in selected if RAW_FILES in s.requires or RAW_ROWS in s.requires]
    folder = night.raw_dir.resolve()
    if reading and not folder.is_dir():
        last = max(i for i, s in enumerate(selected) if s.name in reading)
        later = selected[last + 1].name if last + 1 < len(selected) else None
        hint = f"; to work on the products already made, run from a later stage (--from {later})"
        raise ValueError(
            f"night {night.config.night.name}: night.raw_dir {folder} is not a folder, and "
            f"stages {', '.join(reading)} read the "
            "raw blocks: point night.raw_dir (relative to the config file) at the night's raw "
            f"folder{hint if later else ''}"
        )


def _take_damaged_out_of_use(
    night: NightStore, report: RunReport, repair: bool
) -> list[tuple[str, str]]:
    """Move the sidecars of the damaged units found so far aside; return ``(stage, unit)``."""
    found = []
    what = "recomputed" if repair else f"not recomputed again after {MAX_REPAIRS} tries"
    for (name, unit), reason in list(night.damaged.items()):
        stage = night.stages[name]
        mark_damaged(night.unit_dir(stage, unit), reason)
        log.error("damaged product in %s/%s: %s (%s)", name, unit, reason, what)
        report.damaged.append(f"{name}/{unit}: {reason} ({what})")
        found.append((name, unit))
    night.damaged.clear()
    if found:
        night.refresh()
    return found


def _repair_stages(
    night: NightStore, plan: list[Stage], position: int, damaged: list[tuple[str, str]]
) -> list[Stage]:
    """The stages to run again, from the earliest damaged one to the one just run."""
    graph = list(night.config.graph)
    first = min(graph.index(night.stages[name]) for name, _ in damaged)
    # found before anything ran: catch up to the first planned stage
    last = graph.index(plan[position - 1]) if position else graph.index(plan[0]) - 1
    return graph[first : last + 1]


def _selected_units(night: NightStore, stage: Stage, wanted: frozenset[int] | None) -> list:
    """The stage's units (stretches, or None for the night) that the run selects."""
    units = night.units(stage)
    if stage.scope == "stretch" and wanted is not None:
        absent = sorted(wanted - {s.index for s in units})
        if absent:
            has = f"stretches 0 to {len(units) - 1}" if units else "no stretch"
            raise ValueError(
                f"--stretches {','.join(map(str, absent))}: the night has {has}; "
                "see `zdrift status`."
            )
        units = [s for s in units if s.index in wanted]
    return units


def _prepare_unit(
    night: NightStore,
    stage: Stage,
    stretch: Stretch | None,
    force: bool,
    remote: bool,
    lock: tuple[Path, str] | None,
) -> UnitResult | UnitTask:
    """The unit's result if it is blocked or up to date, else the task that runs it."""
    unit = unit_id(stretch)
    hashes, specs, problem = night.inputs(stage, stretch)
    if problem is not None:
        log.warning("%s/%s blocked: %s", stage.name, unit, problem)
        return UnitResult(stage.name, unit, "blocked", problem)
    state, reason = night.state(stage, stretch)
    if state == "done" and not force:
        problems = tuple(night.sidecar(stage, unit).get("problems", ()))
        return UnitResult(stage.name, unit, "skipped", problems=problems)
    if reason.startswith("upstream"):
        log.warning(
            "%s/%s: running on upstream products that are not current (%s)",
            stage.name,
            unit,
            reason,
        )
    skipped = night.missing_stretches(stage)
    if skipped:
        log.warning(
            "%s/%s: running without stretches %s (upstream unusable)",
            stage.name,
            unit,
            format_ids(skipped),
        )
    clear_failure(night.unit_dir(stage, unit))
    return night.task(stage, stretch, specs, hashes, remote, lock)


def _refresh_if_written(night: NightStore, results: Sequence[UnitResult]) -> None:
    """Reload the store unless no unit wrote anything (all up to date or blocked).

    A refresh re-reads every sidecar and state the next stage looks at (and
    re-hashes the block index): ~30 ms per stage of a 32-stretch night, most
    of an up-to-date run's own work.
    """
    if any(result.status not in ("skipped", "blocked") for result in results):
        night.refresh()


def _stretch_chain(plan: Sequence[Stage], position: int) -> list[Stage]:
    """The stage at ``position`` and, if stretch-scoped, the stretch-scoped ones right after."""
    chain = [plan[position]]
    if chain[0].scope == "stretch":
        for stage in plan[position + 1 :]:
            if stage.scope != "stretch" or stage in chain:
                break
            chain.append(stage)
    return chain


def _run_chain(
    night: NightStore,
    chain: Sequence[Stage],
    wanted: frozenset[int] | None,
    forcing: set[str],
    executor: Executor,
    progress: Progress,
    lock: tuple[Path, str] | None,
) -> list[UnitResult]:
    """Run consecutive stretch-scoped stages, each unit once the units it reads are done.

    A unit waits for the units of earlier stages of the chain that it reads:
    its own stretch's, and its neighbours' for a stage with ``neighbours``.
    Nothing waits for a whole stage, so a free worker takes e.g. the first
    stretch's rectify while the last stretch is still being calibrated.  The
    units are prepared (inputs hashed, up-to-date check) only then, from the
    products their upstream units have just written.
    """
    units = {(s.name, st.id): (s, st) for s in chain for st in _selected_units(night, s, wanted)}
    waiting: dict[tuple[str, str], set[tuple[str, str]]] = {}
    dependents: dict[tuple[str, str], list[tuple[str, str]]] = {key: [] for key in units}
    for key, (stage, stretch) in units.items():
        needs = set()
        for earlier in chain[: chain.index(stage)]:
            if earlier.name in stage.requires:
                needs.add((earlier.name, stretch.id))
            if earlier.name in stage.neighbours:
                sides = night.neighbour_stretches(stretch)
                needs.update((earlier.name, side.id) for side in sides if side is not None)
        waiting[key] = needs & units.keys()
        for need in waiting[key]:
            dependents[need].append(key)
    depth = {stage.name: position for position, stage in enumerate(chain)}
    counts = {stage.name: [0, sum(s is stage for s, _ in units.values())] for stage in chain}
    results: list[UnitResult] = []

    def finished(key: tuple[str, str]) -> list[tuple[str, str]]:
        """Mark ``key`` done; return the units that waited only for it."""
        now_ready = []
        for dependent in dependents[key]:
            waiting[dependent].discard(key)
            if not waiting[dependent]:
                now_ready.append(dependent)
        return now_ready

    def prepare(keys: list[tuple[str, str]]) -> list[UnitTask]:
        tasks = []
        while keys:
            stage, stretch = units[keys.pop(0)]
            item = _prepare_unit(
                night, stage, stretch, stage.name in forcing, executor.remote, lock
            )
            if isinstance(item, UnitTask):
                tasks.append(item)
                continue
            results.append(item)
            counts[stage.name][1] -= 1  # not run: one unit fewer to wait for
            keys.extend(finished((stage.name, stretch.id)))
        return tasks

    def on_done(outcome: UnitOutcome) -> list[UnitTask]:
        stage = night.stages[outcome.stage]
        results.append(_record_outcome(night, stage, outcome, executor.remote))
        night.forget(stage, outcome.unit)
        counts[stage.name][0] += 1
        progress(stage.name, *counts[stage.name])
        return prepare(finished((stage.name, outcome.unit)))

    tasks = prepare([key for key, needs in waiting.items() if not needs])
    for stage in chain:
        progress(stage.name, 0, counts[stage.name][1])
    executor.flow(
        execute_unit,
        tasks,
        on_error=failed_outcome,
        on_done=on_done,
        key=lambda task: (-depth[task.stage.name], task.context.stretch.index),
    )
    _refresh_if_written(night, results)
    order = {stage.name: position for position, stage in enumerate(chain)}
    return sorted(results, key=lambda r: (order[r.stage], r.unit))


def _run_stage(
    night: NightStore,
    stage: Stage,
    wanted: frozenset[int] | None,
    force: bool,
    executor: Executor,
    progress: Progress,
    lock: tuple[Path, str] | None = None,
) -> list[UnitResult]:
    if stage.scope == "stretch" and night.index is None:
        return [UnitResult(stage.name, "*", "blocked", night.no_index_reason())]
    results, tasks = [], []
    for stretch in _selected_units(night, stage, wanted):
        item = _prepare_unit(night, stage, stretch, force, executor.remote, lock)
        if isinstance(item, UnitTask):
            tasks.append(item)
        else:
            results.append(item)
    progress(stage.name, 0, len(tasks))
    outcomes = executor.map(execute_unit, tasks, on_error=failed_outcome)
    for done, outcome in enumerate(outcomes, start=1):
        results.append(_record_outcome(night, stage, outcome, executor.remote))
        progress(stage.name, done, len(tasks))
    return sorted(results, key=lambda r: r.unit)


def _record_outcome(
    night: NightStore, stage: Stage, outcome: UnitOutcome, remote: bool
) -> UnitResult:
    if remote:  # re-emit what the worker logged, under the original logger names
        for name, level, message in outcome.records:
            logging.getLogger(name).log(level, "[%s/%s] %s", outcome.stage, outcome.unit, message)
    for text in outcome.warnings:
        log.warning("%s/%s: %s", outcome.stage, outcome.unit, text)
    for path, reason in outcome.damaged:
        _note_damage(night, Path(path), reason)
    if outcome.ok:
        night.known.update(outcome.known)  # for the units that read them
        learn_digests(outcome.known)  # and this process (the night's block index)
        log.info("%s/%s done in %.2f s", outcome.stage, outcome.unit, outcome.seconds)
        if outcome.problems:
            log.warning(
                "%s/%s reported %d problem(s) with its input",
                outcome.stage,
                outcome.unit,
                len(outcome.problems),
            )
        return UnitResult(
            outcome.stage,
            outcome.unit,
            "ran",
            seconds=outcome.seconds,
            problems=tuple(outcome.problems),
        )
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


def _note_damage(night: NightStore, path: Path, reason: str) -> None:
    """Remember a damaged product file of the store (its unit is taken out of use)."""
    unit_dir = path.parent
    stage = night.stages.get(unit_dir.parent.name)
    if stage is not None and unit_dir.parent.parent.resolve() == night.root.resolve():
        night.damaged[(stage.name, unit_dir.name)] = f"{path.name} {reason}"
        night.forget(stage, unit_dir.name)  # its state and its dependents' change


def _stale_downstream(
    night: NightStore, selected: Sequence[Stage], wanted: frozenset[int] | None = None
) -> dict[str, list[str]]:
    """The units left stale by a partial run: ``stage -> unit ids``, in graph order.

    Those of the stages after the first one run that the run left out and,
    when it ran some stretches only (``wanted``), those of the stretches it
    did not select in the stages it ran: a stretch beside one that was redone
    reads its new edge columns (``neighbours``), and the night-scoped stages
    that read every stretch need them current too.
    """
    graph = night.config.graph
    first = graph.index(selected[0])
    stale = {}
    for stage in graph[first:]:
        units = night.units(stage)
        if stage in selected:
            if wanted is None or stage.scope != "stretch":
                continue
            units = [s for s in units if s.index not in wanted]
        ids = [unit_id(s) for s in units if night.state(stage, s)[0] == "stale"]
        if ids:
            stale[stage.name] = ids
    return stale


def night_status(config: Config, *, verify: bool = False) -> NightStatus:
    """The state of every unit of the night, stage by stage (reads only).

    Parameters
    ----------
    config : Config
        The resolved config.
    verify : bool
        Also check every product file against the SHA-256 its provenance
        records (reads every product); a mismatch shows the unit as
        ``'damaged'``.  Otherwise only existence and sizes are checked.
    """
    night = NightStore(config, verify=verify)
    night.find_lost()
    stages = []
    for stage in config.graph:
        units, problems = night.stage_status(stage)
        stages.append(StageStatus(stage.name, stage.scope, units, problems))
    n_stretches = len(night.stretches) if night.index is not None else None
    lock = describe_lock(night.root / LOCK_NAME)
    return NightStatus(config.night.name, night.root, n_stretches, stages, lock)


def describe_lock(path: Path) -> str | None:
    """One line on the run lock at ``path`` (a run going on, a stale or broken lock), or None."""
    holder = read_lock(path)
    if holder is None:
        return None
    if not isinstance(holder, dict):
        return (
            f"{path} is broken (empty or not a JSON object); the next run takes it over "
            f"(after {BROKEN_LOCK_AGE:g} s) with a warning"
        )
    who = f"process {holder.get('pid')} on {holder.get('host')}, started {holder.get('started')}"
    if holder.get("host") != socket.gethostname():
        return f"held by {who} (another host: cannot tell whether it still runs)"
    pid = holder.get("pid")
    if isinstance(pid, int) and pid_alive(pid):
        return f"a run is going on: {who} (states may change while it runs)"
    return f"stale: {who}, which no longer exists; the next run takes it over"
