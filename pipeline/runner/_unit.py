"""One unit of work (a stage on one stretch, or on the night), as a worker runs it.

:func:`execute_unit` is the only function the executors ship to worker
processes.  It loads the unit's inputs, calls the stage, writes the products
and then the provenance sidecar, and returns a picklable
:class:`UnitOutcome`; it never raises for a failing stage (the outcome carries
the reason and traceback), so one bad stretch cannot stop the others.
"""

from __future__ import annotations

import contextlib
import datetime
import logging
import os
import platform
import socket
import time
import traceback
import warnings
from collections.abc import Iterator, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

from pydantic import BaseModel

import pipeline
from pipeline._offline import astropy_offline
from pipeline.exceptions import DamagedProductError
from pipeline.runner._heap import release_after, release_before
from pipeline.runner._lock import check_lock_held
from pipeline.runner._rawio import check_block_index, read_raw_files, read_rows
from pipeline.runner._store import (
    Known,
    LazyProducts,
    LazyUnit,
    check_products,
    clean_unit,
    hash_json,
    known_digests,
    learn_digests,
    output_hash,
    read_external,
    read_products,
    verify_product,
    write_products,
    write_sidecar,
)
from pipeline.runner._warm import settle_after_warm, unit_running, wait_warm
from pipeline.stages.base import BLOCK_INDEX, PROBLEMS, ExternalFile, Stage, StageContext

if TYPE_CHECKING:
    from pipeline.runner._blockrows import BlockRows

__all__ = ["InputSpec", "UnitOutcome", "UnitTask", "execute_unit", "failed_outcome"]


#: A stored unit: its folder and its provenance sidecar.
Unit = tuple[Path, Mapping[str, Any]]


@dataclass(frozen=True)
class InputSpec:
    """How a worker obtains one input of a unit.

    ``kind`` is ``'unit'`` (one upstream unit: ``units`` has one
    ``(folder, sidecar)``), ``'units'`` (a night-scoped consumer of a
    stretch-scoped stage: one entry per stretch), ``'neighbours'`` (for
    :data:`~pipeline.stages.base.NEIGHBOURS`: ``neighbours`` holds, per
    upstream name, the ``(folder, sidecar)`` or None of the stretch before and
    the one after), ``'raw_files'`` (``names``
    below ``raw_dir``), ``'raw_rows'`` (rows ``[lo, hi)`` via ``index``, each
    block's rows reversed if ``flip_rows``), ``'file'`` (the file ``path`` an
    option names, see ``Stage.files``; ``digest`` is its SHA-256 when the run
    was planned), ``'stream'`` (the same for ``Stage.streams``: handed over
    as an :class:`~pipeline.stages.base.ExternalFile`, not read),
    ``'value'`` (``value`` itself, e.g. the run status) or ``'none'`` (such
    an option is None, or an optional input the stage runs without).  Stored products are checked
    against their recorded SHA-256 as they are read.
    """

    name: str
    kind: str
    units: tuple[tuple[Path, Mapping[str, Any]], ...] = ()
    raw_dir: Path | None = None
    names: tuple[str, ...] = ()
    index: BlockRows | None = None
    lo: int = 0
    hi: int = 0
    flip_rows: bool = False
    path: Path | None = None
    digest: str | None = None
    neighbours: tuple[tuple[str, tuple[Unit | None, Unit | None]], ...] = ()
    value: Any = None

    def load(
        self, read: dict[str, str] | None = None, files: contextlib.ExitStack | None = None
    ) -> Any:
        """Read the input from the product store or the raw files.

        ``read`` is filled with the SHA-256 of every product file read;
        ``files`` closes the files a lazily read input leaves open (the
        neighbours' image products).

        Raises
        ------
        DamagedProductError
            A stored product, or the file an option names, cannot be read or
            its content is not the one recorded.
        """
        if self.kind == "unit":
            unit_dir, sidecar = self.units[0]
            return read_products(unit_dir, sidecar, read)
        if self.kind == "units":
            return LazyProducts(self.units, read, files)
        if self.kind == "neighbours":
            return {
                name: tuple(None if unit is None else LazyUnit(*unit, read, files) for unit in pair)
                for name, pair in self.neighbours
            }
        if self.kind == "raw_files":
            return read_raw_files(self.raw_dir, self.names)
        if self.kind == "file":
            if self.digest is not None:
                verify_product(self.path, {"sha256": self.digest})
            return read_external(self.path)
        if self.kind == "stream":
            verify_product(self.path, {"sha256": self.digest})
            return ExternalFile(self.path, self.digest)
        if self.kind == "none":
            return None
        if self.kind == "value":
            return self.value
        if self.kind == "raw_rows":
            return read_rows(self.raw_dir, self.index, self.lo, self.hi, flip_rows=self.flip_rows)
        raise ValueError(f"Unknown input kind {self.kind!r}.")


@dataclass(frozen=True)
class UnitTask:
    """Everything a worker needs to run one unit (picklable).

    ``missing_stretches`` (stretch id -> reason) are the stretches a
    ``partial_inputs`` stage runs without, or the neighbouring stretches a
    stage with ``neighbours`` runs without; ``input_problems`` are the
    runner's problem lines about them, recorded before the stage's own problems.
    ``lock`` is the run's lock file and the token it holds: the worker writes
    nothing once the lock is no longer the run's (the run died).
    ``known_inputs`` is what the run's workers remembered of the input files
    they wrote (:func:`pipeline.runner._store.known_digests`).
    """

    stage: Stage
    unit: str
    unit_dir: Path
    options: BaseModel
    context: StageContext
    inputs: tuple[InputSpec, ...]
    config: Mapping[str, Any]
    config_hash: str
    input_hashes: Mapping[str, str]
    capture_logs: bool = False
    missing_stretches: Mapping[str, str] = field(default_factory=dict)
    input_problems: tuple[str, ...] = ()
    lock: tuple[Path, str] | None = None
    known_inputs: Known = field(default_factory=dict)


@dataclass
class UnitOutcome:
    """What came of a unit: success with its output hash, or the failure.

    ``damaged`` lists ``(product file, reason)`` for an input found damaged;
    ``known`` is what the worker remembers of the files it wrote (for the
    units that read them, see :attr:`UnitTask.known_inputs`).
    """

    stage: str
    unit: str
    ok: bool
    seconds: float = 0.0
    output_hash: str | None = None
    error: str | None = None
    traceback: str | None = None
    records: list[tuple[str, int, str]] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)
    problems: list[str] = field(default_factory=list)
    damaged: list[tuple[str, str]] = field(default_factory=list)
    known: Known = field(default_factory=dict)


def failed_outcome(task: UnitTask, error: str, tb: str | None = None) -> UnitOutcome:
    """Outcome for a unit whose worker did not report back (died, lost)."""
    return UnitOutcome(task.stage.name, task.unit, ok=False, error=error, traceback=tb)


class _ListHandler(logging.Handler):
    def __init__(self) -> None:
        super().__init__(logging.DEBUG)
        self.records: list[tuple[str, int, str]] = []

    def emit(self, record: logging.LogRecord) -> None:
        self.records.append((record.name, record.levelno, record.getMessage()))


@contextlib.contextmanager
def _captured_logs(enabled: bool) -> Iterator[list[tuple[str, int, str]]]:
    """Collect log records in a worker process so the main process can re-emit them."""
    if not enabled:
        yield []
        return
    root = logging.getLogger()
    handler, old_level = _ListHandler(), root.level
    root.addHandler(handler)
    root.setLevel(logging.DEBUG)
    try:
        yield handler.records
    finally:
        root.removeHandler(handler)
        root.setLevel(old_level)


def _now() -> str:
    return datetime.datetime.now(datetime.UTC).isoformat(timespec="milliseconds")


def _versions() -> dict[str, str]:
    import astropy
    import numpy

    return {
        "python": platform.python_version(),
        "numpy": numpy.__version__,
        "astropy": astropy.__version__,
    }


def _fits_cards(task: UnitTask) -> dict[str, tuple[Any, str]]:
    cards = {
        "ZDSTAGE": (task.stage.name, "pipeline stage that wrote this file"),
        "ZDUNIT": (task.unit, "stretch id or 'night'"),
        "ZDVERS": (pipeline.__version__, "zdrift version"),
        # SHA-256 hex digests fill the card: no room for a comment.
        "ZDCONF": (task.config_hash, ""),
        "ZDINPUT": (hash_json(task.input_hashes), ""),
    }
    return cards


def _summarize_warnings(caught: list[warnings.WarningMessage]) -> list[str]:
    """Each distinct warning once, in order, with its count if it repeated."""
    counts: dict[str, int] = {}
    for w in caught:
        text = f"{w.category.__name__}: {w.message}"
        counts[text] = counts.get(text, 0) + 1
    return [text if n == 1 else f"{text} (x{n})" for text, n in counts.items()]


def _check_products(task: UnitTask, products: Any) -> tuple[dict[str, Any], list[str]]:
    """The products to store and the problems the stage reported (see PROBLEMS)."""
    if not isinstance(products, Mapping):
        raise TypeError(
            f"Stage {task.stage.name!r} returned {type(products).__name__}; a stage must "
            "return a dict from product name to object."
        )
    products = dict(products)
    problems = products.pop(PROBLEMS, None) or []
    if isinstance(problems, str) or not all(isinstance(p, str) for p in problems):
        raise TypeError(
            f"Stage {task.stage.name!r} returned {PROBLEMS!r} as {problems!r}; it must be a "
            "list of one-line strings."
        )
    if task.stage.defines_rows:
        check_block_index(products.get(BLOCK_INDEX), task.stage.name)
    check_products(products)  # before the unit's old products are removed
    return products, [" ".join(p.split()) for p in problems]


def _check_lock(task: UnitTask) -> None:
    if task.lock is not None:
        check_lock_held(*task.lock)


def _damaged_input(exc: BaseException) -> list[tuple[str, str]]:
    """``[(file, reason)]`` if ``exc`` (or an exception it came from) is a damaged input."""
    seen = set()
    while exc is not None and id(exc) not in seen:
        if isinstance(exc, DamagedProductError):
            return [(exc.path, exc.reason)]
        seen.add(id(exc))
        exc = exc.__cause__ or exc.__context__
    return []


#: Environment variable naming a folder: each unit's computation (the stage's
#: ``run``, not its reading and writing) is profiled with cProfile there, one
#: file ``<stage>-<unit>-<pid>.prof`` per unit, in whichever process runs it.
PROFILE_DIR_VARIABLE = "ZDRIFT_PROFILE_DIR"


@contextlib.contextmanager
def _profiled(task: UnitTask) -> Iterator[None]:
    """Profile the block into :data:`PROFILE_DIR_VARIABLE`'s folder, if it is set.

    A stage's cost inside a whole run can differ from a benchmark of it
    alone (it reads its inputs from files, beside another worker); the
    files add up with ``pstats.Stats(*files)``.
    """
    folder = os.environ.get(PROFILE_DIR_VARIABLE)
    if not folder:
        yield
        return
    import cProfile

    profile = cProfile.Profile()
    profile.enable()
    try:
        yield
    finally:
        profile.disable()
        name = f"{task.stage.name}-{task.unit}-{os.getpid()}.prof"
        os.makedirs(folder, exist_ok=True)
        profile.dump_stats(os.path.join(folder, name))


def execute_unit(task: UnitTask) -> UnitOutcome:
    """Run one unit: load inputs, call the stage, write products, then the sidecar.

    astropy is kept offline meanwhile (a worker process may not have been
    forked from the runner's, so the runner's setting does not carry over).
    """
    release_before(task.stage.scope)  # what earlier units left in the heap
    with astropy_offline(), unit_running():
        outcome = _execute_unit(task)
    settle_after_warm(task.stage.name)  # between units: nothing of the unit's to freeze
    release_after(task.stage.scope)  # ... nor to reuse, once the worker waits
    return outcome


def _execute_unit(task: UnitTask) -> UnitOutcome:
    wait_warm(task.stage.name)  # what the worker loads for the stage as it starts
    learn_digests(task.known_inputs)
    started, t0 = _now(), time.perf_counter()
    with _captured_logs(task.capture_logs) as records:
        read: dict[str, str] = {}
        try:
            with (
                warnings.catch_warnings(record=True) as caught,  # reading warns too
                contextlib.ExitStack() as files,
            ):
                warnings.simplefilter("always")
                inputs = {spec.name: spec.load(read, files) for spec in task.inputs}
                t1 = time.perf_counter()
                with _profiled(task):
                    products = task.stage.run(
                        inputs=inputs, options=task.options, context=task.context
                    )
            products, problems = _check_products(task, products)
            problems = [*task.input_problems, *problems]
            t2 = time.perf_counter()
            _check_lock(task)
            with clean_unit(task.unit_dir):  # the old files removed meanwhile
                entries = write_products(task.unit_dir, products, _fits_cards(task))
            record = {
                "stage": task.stage.name,
                "unit": task.unit,
                "night": task.context.night,
                "stretch": None if task.context.stretch is None else vars(task.context.stretch),
                "config_hash": task.config_hash,
                "config": task.config,
                "inputs": dict(task.input_hashes),
                "read": read,
                "products": entries,
                "output_hash": output_hash(entries),
                "package_version": pipeline.__version__,
                "versions": _versions(),
                "host": socket.gethostname(),
                "pid": os.getpid(),
                "started": started,
                "finished": _now(),
                "timings": {
                    "load_s": round(t1 - t0, 4),
                    "compute_s": round(t2 - t1, 4),
                    "write_s": round(time.perf_counter() - t2, 4),
                },
                "warnings": _summarize_warnings(caught),
                "problems": problems,
            }
            if task.stage.partial_inputs or task.stage.neighbours:
                record["missing_stretches"] = dict(task.missing_stretches)
            _check_lock(task)
            write_sidecar(task.unit_dir, record)
        except Exception as exc:  # reported to the runner, which logs it and goes on
            damaged = _damaged_input(exc)
            return UnitOutcome(
                task.stage.name,
                task.unit,
                ok=False,
                seconds=time.perf_counter() - t0,
                error=f"{type(exc).__name__}: {exc}",
                traceback=traceback.format_exc(),
                records=list(records),
                damaged=damaged,
            )
    return UnitOutcome(
        task.stage.name,
        task.unit,
        ok=True,
        seconds=time.perf_counter() - t0,
        output_hash=record["output_hash"],
        known=known_digests(task.unit_dir / entry["file"] for entry in entries.values()),
        records=list(records),
        warnings=record["warnings"],
        problems=problems,
    )
