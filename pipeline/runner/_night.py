"""The product store of one night, seen through the current config.

:class:`NightStore` answers the runner's questions about a night: which
units exist (the stretch plan comes from the block index), what each unit's
config hash and input hashes are now, how to load its inputs, and whether it
is done, stale, missing, failed or damaged.  It reads only; writing is the
unit runner's job (:mod:`pipeline.runner._unit`).

A unit is *damaged* when one of its product files cannot be read or no
longer has the SHA-256 its sidecar records.  Workers find this as they read
their inputs (and the runner takes the unit out of use, see
:func:`pipeline.runner._store.mark_damaged`); ``NightStore(config,
verify=True)`` checks every product's content up front (``zdrift status
--verify``).
"""

from __future__ import annotations

import dataclasses
import functools
import itertools
import json
import operator
import os
from collections.abc import Iterable, Sequence
from pathlib import Path
from typing import Any

from pipeline.config import Config
from pipeline.exceptions import DamagedProductError
from pipeline.runner._blockrows import BlockRows, read_block_rows
from pipeline.runner._rawio import (
    block_index_rows,
    blocks_fingerprint,
    list_raw_files,
    missing_blocks,
    overlapping_blocks,
    raw_files_fingerprint,
)
from pipeline.runner._store import (
    Known,
    file_digest,
    hash_json,
    lost_product,
    read_damage,
    read_failure,
    read_product,
    read_sidecar,
    verify_product,
    verify_unit,
)
from pipeline.runner._unit import InputSpec, UnitTask
from pipeline.stages.base import (
    BLOCK_INDEX,
    NEIGHBOURS,
    RAW_FILES,
    RAW_ROWS,
    RUN_STATUS,
    Stage,
    StageContext,
    Stretch,
    plan_stretches,
    segment_rows,
)

__all__ = [
    "NIGHT",
    "NightStore",
    "damage_reason",
    "format_ids",
    "missing_problems",
    "night_dir",
    "unit_id",
]

#: Unit id of a night-scoped stage.
NIGHT = "night"
#: Input hash of an optional input the stage runs without.
ABSENT = "absent"


#: How a stale unit's reason names the :data:`RUN_STATUS` input.
_EARLIER_STATES = "the state of an earlier unit"
#: What a stage's hashed config holds for the path of a file whose content is
#: one of its inputs (``Stage.files``, ``Stage.streams``).
FILE_BY_CONTENT = "(a file, by its content)"


def night_dir(config: Config) -> Path:
    """The night's output folder, ``<output_dir>/<night name>``."""
    return Path(config.night.output_dir) / config.night.name


def format_ids(ids: Iterable[str]) -> str:
    """Compress unit ids for display: ``s0000 s0001 s0002 s0005`` -> ``s0000-s0002, s0005``."""
    ids = sorted(ids)
    numbered = [(int(i[1:]), i) for i in ids if i[:1] == "s" and i[1:].isdigit()]
    parts = [i for i in ids if not (i[:1] == "s" and i[1:].isdigit())]
    for _, run in itertools.groupby(enumerate(numbered), lambda p: p[1][0] - p[0]):
        run = [item for _, item in run]
        parts.append(run[0][1] if len(run) == 1 else f"{run[0][1]}-{run[-1][1]}")
    return ", ".join(parts)


def unit_id(stretch: Stretch | None) -> str:
    return NIGHT if stretch is None else stretch.id


def missing_problems(missing: dict[str, str], what: str = "stretch") -> list[str]:
    """Problem lines for the stretches a ``partial_inputs`` stage ran without.

    ``what`` names them (``'neighbour'`` for a stage with ``neighbours``).

    Examples
    --------
    >>> missing_problems({"s0001": "failed in scale", "s0003": "failed in scale"})
    ['ran without stretches s0001, s0003 (failed in scale)']
    >>> missing_problems({"s0002": "failed in scale"}, "neighbour")
    ['ran without neighbour s0002 (failed in scale)']
    """
    plural = "es" if what.endswith("h") else "s"
    return [
        f"ran without {what}{plural if len(ids) > 1 else ''} {format_ids(ids)} ({reason})"
        for reason, ids in _by_reason(missing).items()
    ]


def _flat(value: Any, prefix: str = "") -> dict[str, Any]:
    """A nested mapping as ``dotted.key -> value`` (lists and scalars are leaves)."""
    if not isinstance(value, dict):
        return {prefix: value}
    flat: dict[str, Any] = {}
    for key, item in value.items():
        flat.update(_flat(item, f"{prefix}.{key}" if prefix else str(key)))
    return flat


def _shown(value: Any, limit: int = 40) -> str:
    """A recorded value, its end kept when long (where two paths differ)."""
    text = json.dumps(value)
    return text if len(text) <= limit else "..." + text[3 - limit :]


#: A key one of two configs lacks (:func:`config_change`).
_NONE = object()


def config_change(stage: str, recorded: Any, current: dict[str, Any], most: int = 3) -> str:
    """Why a unit's config hash changed, in the user's keys: ``'config changed: ...'``.

    Compares the config its sidecar recorded (:meth:`NightStore.config_data`)
    with the current one and names up to ``most`` differences, as a config
    file spells them (``stages.detect.threshold_sigma 4.3 -> 5``).

    Examples
    --------
    >>> config_change("detect", {"version": 1, "options": {"threshold_sigma": 4.3}, "uses": {},
    ...     "rows": None}, {"version": 1, "options": {"threshold_sigma": 5}, "uses": {},
    ...     "rows": None})
    'config changed: stages.detect.threshold_sigma 4.3 -> 5'
    """
    if not isinstance(recorded, dict):
        return "config changed"
    old = _flat(recorded)
    new = _flat(json.loads(json.dumps(current)))  # as the sidecar keeps it
    names = {"version": f"the {stage} stage's version (a new release)",
             "rows": "its rows (run.stretch_rows, run.overlap_rows or the raw blocks)"}  # fmt: skip
    lines = []
    for key in sorted(set(old) | set(new)):
        if old.get(key, _NONE) == new.get(key, _NONE):
            continue
        part, _, rest = key.partition(".")
        if part == "rows":  # the same words for every stretch: one line in the status
            lines.append(names["rows"])
            continue
        name = names.get(part) or {"options": f"stages.{stage}.{rest}", "uses": rest}.get(part, key)
        lines.append(f"{name} {_shown(old.get(key))} -> {_shown(new.get(key))}")
    if not lines:
        return "config changed"
    more = f" and {len(lines) - most} more" if len(lines) > most else ""
    return f"config changed: {'; '.join(lines[:most])}{more}"


def damage_reason(exc: DamagedProductError) -> str:
    """What is wrong with a unit's damaged product: its file name, then the reason."""
    return f"{Path(exc.path).name} {exc.reason}"


def _by_reason(missing: dict[str, str]) -> dict[str, list[str]]:
    by_reason: dict[str, list[str]] = {}
    for unit, reason in missing.items():
        by_reason.setdefault(reason, []).append(unit)
    return by_reason


class NightStore:
    """The product store of one night, seen through the current config.

    Parameters
    ----------
    config : Config
        The resolved config.
    verify : bool
        Check every product file's SHA-256 against its sidecar when the unit
        is first looked at (costs a read of every product); otherwise only
        the products a unit reads are checked, by the worker that reads them.
    """

    def __init__(self, config: Config, *, verify: bool = False):
        self.config = config
        self.verify = verify
        #: ``(stage name, unit) -> reason`` of damaged units found by this process
        #: (units already taken out of use have a ``_damaged.json`` record instead).
        self.damaged: dict[tuple[str, str], str] = {}
        self._verified: set[tuple[str, str]] = set()
        #: The block index last parsed, by its SHA-256 (refreshed after every stage):
        #: the columns the runner uses (:mod:`pipeline.runner._blockrows`).
        self._parsed_index: tuple[str, BlockRows] | None = None
        #: SHA-256 of the files options name, by (path, size, modification time).
        self._digests: dict[tuple[str, int, int], str] = {}
        #: What this run's workers remember of the products they wrote, by path
        #: (see :func:`pipeline.runner._store.known_digests`), for the units that read them.
        self.known: Known = {}
        #: Stage name -> the stages whose states depend on its units (see forget()).
        self._affected: dict[str, frozenset[str]] = {}
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
        self._inputs: dict[tuple[str, str], tuple[dict[str, str], list[InputSpec], str | None]] = {}
        self._missing: dict[str, dict[str, str]] = {}
        self._raw_names: list[str] | None = None
        self._index_rows: dict[tuple[int, int], BlockRows] = {}  # block index rows
        self.index: BlockRows | None = None
        self.stretches: tuple[Stretch, ...] = ()
        if self.row_stage is None:
            return
        record = self.usable(self.row_stage, NIGHT)
        if record is not None and BLOCK_INDEX in record["products"]:
            folder = self.unit_dir(self.row_stage, NIGHT)
            entry = record["products"][BLOCK_INDEX]
            try:
                digest = verify_product(folder / entry["file"], entry)
                if self._parsed_index is None or self._parsed_index[0] != digest:
                    path = folder / entry["file"]
                    rows = read_block_rows(path) if path.suffix == ".ecsv" else None
                    if rows is None:
                        rows = BlockRows.of_table(read_product(path, entry))
                    self._parsed_index = (digest, rows)
                self.index = self._parsed_index[1]
            except Exception as exc:  # damaged, or hashes right but does not parse
                if not isinstance(exc, DamagedProductError):
                    reason = f"cannot be read ({type(exc).__name__}: {exc})"
                    exc = DamagedProductError(folder / entry["file"], reason)
                self.damaged[(self.row_stage.name, NIGHT)] = damage_reason(exc)
                self._states.clear()
                self._inputs.clear()
        if self.index is not None:
            run = self.config.run
            rows = block_index_rows(self.index)
            segments = segment_rows(self.index)
            stretch_rows = run.rows_per_stretch(self.context.camera.n_columns)
            self.stretches = plan_stretches(rows, stretch_rows, run.overlap_rows, segments)
        self.context = dataclasses.replace(self.context, stretches=self.stretches)

    def forget(self, stage: Stage, unit: str) -> None:
        """Forget what was read of a unit just (re)written, and every state derived from it.

        The states and inputs of ``stage``'s units and of the stages that
        depend on it (:meth:`_affected_by`); the others' cannot change.  A
        night's run writes 133 units, and each unit's task works out its
        upstream units' states again, down to the raw blocks: forgetting
        all of them after every unit took ~1 s of the run's own CPU on the
        32-stretch night, beside the two workers.
        """
        self._sidecars.pop((stage.name, unit), None)
        affected = self._affected_by(stage.name)
        for cache in (self._states, self._inputs):
            for key in [key for key in cache if key[0] in affected]:
                del cache[key]
        for name in affected:
            self._missing.pop(name, None)

    def _affected_by(self, name: str) -> frozenset[str]:
        """The stage ``name`` and every stage whose units' states depend on its units.

        Those that require it, directly or through others, and those that
        take :data:`RUN_STATUS` after it in the graph (the states of all the
        units before them), with theirs; every stage for the stage that
        defines the rows (the block index: the stretches, and the raw rows
        the stages that read them are handed).
        """
        if name not in self._affected:
            graph = list(self.config.graph)
            names = [stage.name for stage in graph]
            affected = {name}
            after = names.index(name) + 1 if name in names else len(names)
            rows = self.row_stage is not None and name == self.row_stage.name
            for stage in graph[after:]:
                if rows or RUN_STATUS in stage.requires or affected.intersection(stage.requires):
                    affected.add(stage.name)
            self._affected[name] = frozenset(affected)
        return self._affected[name]

    def unit_dir(self, stage: Stage, unit: str) -> Path:
        return self.root / stage.name / unit

    def units(self, stage: Stage) -> list[Stretch | None]:
        return [None] if stage.scope == "night" else list(self.stretches)

    def sidecar(self, stage: Stage, unit: str) -> dict[str, Any] | None:
        key = (stage.name, unit)
        if key not in self._sidecars:
            self._sidecars[key] = read_sidecar(self.unit_dir(stage, unit))
        return self._sidecars[key]

    def damage(self, stage: Stage, unit: str) -> str | None:
        """Why the unit's products cannot be used as recorded, or None if they can."""
        key = (stage.name, unit)
        if key in self.damaged:
            return self.damaged[key]
        reason = read_damage(self.unit_dir(stage, unit))  # already taken out of use
        if reason is not None or not self.verify or key in self._verified:
            return reason
        self._verified.add(key)
        record = self.sidecar(stage, unit)
        try:
            if record is not None:
                verify_unit(self.unit_dir(stage, unit), record)
        except DamagedProductError as exc:
            self.damaged[key] = damage_reason(exc)
            return self.damaged[key]
        return None

    def find_damage(self) -> dict[tuple[str, str], str]:
        """Check every product of every unit now; return (and keep) the damaged units."""
        verify, self.verify = self.verify, True
        try:
            for stage in self.config.graph:
                for stretch in self.units(stage):
                    self.damage(stage, unit_id(stretch))
        finally:
            self.verify = verify
        return dict(self.damaged)

    def find_lost(self) -> dict[tuple[str, str], str]:
        """Find the units a product of which is gone or changed in size; return (and keep) them.

        Cheap (a look at each file's size, no hashing): a unit whose sidecar
        lists a product that was removed or edited by hand is then damaged,
        with the reason (:func:`~pipeline.runner._store.lost_product`), not
        merely missing, so that ``zdrift status`` says what happened to it
        and a run reports it.  Called before a run starts and by the status,
        never while units are being written.
        """
        for stage in self.config.graph:
            for stretch in self.units(stage):
                unit = unit_id(stretch)
                key = (stage.name, unit)
                if key in self.damaged or self.sidecar(stage, unit) is not None:
                    continue
                reason = lost_product(self.unit_dir(stage, unit))
                if reason is not None:
                    self.damaged[key] = reason
        return dict(self.damaged)

    def usable(self, stage: Stage, unit: str) -> dict[str, Any] | None:
        """The unit's sidecar, unless the unit is incomplete, damaged or its last attempt failed."""
        if read_failure(self.unit_dir(stage, unit)) is not None:
            return None
        if self.damage(stage, unit) is not None:
            return None
        return self.sidecar(stage, unit)

    def cut_for_other_rows(self, stage: Stage) -> list[str]:
        """Units of a stretch-scoped ``stage`` whose products cover other rows than the plan's.

        After a change of ``run.stretch_rows`` or ``run.overlap_rows``, the
        products of a per-stretch stage were cut for the old layout: a
        downstream stage cannot use them (their rows do not match), they must
        be recomputed.
        """
        if stage.scope != "stretch":
            return []
        changed = []
        for stretch in self.stretches:
            record = self.sidecar(stage, stretch.id)
            if record is None:
                continue
            rows = (record.get("config") or {}).get("rows")
            if rows != [stretch.lo, stretch.start, stretch.stop, stretch.hi]:
                changed.append(stretch.id)
        return changed

    def missing_stretches(self, stage: Stage) -> dict[str, str]:
        """Stretch id -> why it is left out of a ``partial_inputs`` stage's inputs.

        A stretch is left out when, in any stretch-scoped stage that ``stage``
        requires, its unit failed, is blocked (its own inputs are unavailable)
        or has no products.  Empty for other stages.  In plan order.
        """
        if stage.name not in self._missing:
            missing: dict[str, str] = {}
            upstreams = [
                self.stages[name]
                for name in stage.requires
                if name in self.stages and self.stages[name].scope == "stretch"
            ]
            for stretch in self.stretches if stage.partial_inputs else ():
                for upstream in upstreams:
                    reason = self._unusable(upstream, stretch)
                    if reason is not None:
                        missing[stretch.id] = reason
                        break
            self._missing[stage.name] = missing
        return self._missing[stage.name]

    def neighbour_stretches(self, stretch: Stretch) -> tuple[Stretch | None, Stretch | None]:
        """The stretches just before and after ``stretch`` in its segment (None: none)."""
        index = stretch.index
        before = self.stretches[index - 1] if index > 0 else None
        after = self.stretches[index + 1] if index + 1 < len(self.stretches) else None
        return tuple(
            s if s is not None and s.segment == stretch.segment else None for s in (before, after)
        )

    def missing_neighbours(self, stage: Stage, stretch: Stretch | None) -> dict[str, str]:
        """Neighbour stretch id -> why a stage with ``neighbours`` runs without it.

        A neighbour is left out when, in any stage that ``stage`` takes
        neighbours from, its unit failed, is blocked, is damaged or has no
        products.  Empty for other stages and for night scope.
        """
        missing: dict[str, str] = {}
        if stretch is None:
            return missing
        for neighbour in self.neighbour_stretches(stretch) if stage.neighbours else ():
            if neighbour is None:
                continue
            for name in stage.neighbours:
                reason = self._unusable(self.stages[name], neighbour)
                if reason is not None:
                    missing[neighbour.id] = reason
                    break
        return missing

    def _unusable(self, stage: Stage, stretch: Stretch) -> str | None:
        """Why a stretch's unit of ``stage`` cannot feed a night-wide stage, or None.

        A unit never made whose inputs were never made either (a run of other
        stretches, ``--stretches``) is "not reduced", not "blocked": nothing
        upstream of it failed.
        """
        if read_failure(self.unit_dir(stage, stretch.id)) is not None:
            return f"failed in {stage.name}"
        if self.damage(stage, stretch.id) is not None:
            return f"damaged in {stage.name}"
        made = self.sidecar(stage, stretch.id) is not None
        if self.inputs(stage, stretch)[2] is not None:
            if not made and self._not_reduced_upstream(stage, stretch):
                return f"not reduced in {stage.name}"
            return f"blocked in {stage.name}"
        if not made:
            return f"missing in {stage.name}"
        return None

    def _not_reduced_upstream(self, stage: Stage, stretch: Stretch) -> bool:
        """Whether the stretch's per-stretch inputs of ``stage`` were only never made."""
        reasons = [
            self._unusable(self.stages[name], stretch)
            for name in stage.requires
            if name in self.stages and self.stages[name].scope == "stretch"
        ]
        unusable = [reason for reason in reasons if reason is not None]
        return bool(unusable) and all(
            reason.startswith(("missing in ", "not reduced in ")) for reason in unusable
        )

    def _raw_names_or_reason(self) -> tuple[tuple[str, ...], str | None]:
        """The raw file names, or why there are none (a wrong folder or pattern)."""
        folder = self.raw_dir.resolve()
        if not folder.is_dir():
            return (), (
                f"night.raw_dir {folder} is not a folder: point night.raw_dir (relative "
                "to the config file) at the folder of the night's raw blocks"
            )
        names = tuple(self.raw_names())
        if not names:
            return (), (
                f"no file in {folder} matches night.pattern {self.config.night.pattern!r}: "
                "check the pattern or the folder"
            )
        return names, None

    def raw_names(self) -> list[str]:
        if self._raw_names is None:
            self._raw_names = list_raw_files(self.raw_dir, self.config.night.pattern)
        return self._raw_names

    # -- what a unit depends on -------------------------------------------------

    def stage_status(self, stage: Stage) -> tuple[dict[str, tuple[str, str]], dict[str, list]]:
        """``(unit -> (state, reason), unit -> problems)`` of every unit of ``stage``.

        Stretch folders outside the current plan are listed as ``'orphan'``.
        """
        units, problems = {}, {}
        for stretch in self.units(stage):
            unit = unit_id(stretch)
            units[unit] = self.state(stage, stretch)
            record = self.sidecar(stage, unit)
            if units[unit][0] != "failed" and record and record.get("problems"):
                problems[unit] = list(record["problems"])
        folder = self.root / stage.name
        if stage.scope == "stretch" and self.index is not None and folder.is_dir():
            for path in sorted(folder.iterdir()):
                if path.is_dir() and path.name not in units:
                    units[path.name] = ("orphan", "not in the current stretch plan")
        return units, problems

    def run_status(self, stage: Stage) -> dict[str, Any]:
        """The :data:`RUN_STATUS` input of ``stage``: the units of the stages before it."""
        graph = list(self.config.graph)
        stages = []
        for earlier in graph[: graph.index(stage)]:
            units, problems = self.stage_status(earlier)
            stages.append(
                {
                    "name": earlier.name,
                    "scope": earlier.scope,
                    "units": {unit: list(state) for unit, state in units.items()},
                    "problems": problems,
                }
            )
        n_stretches = len(self.stretches) if self.index is not None else None
        return {"n_stretches": n_stretches, "stages": stages}

    def _optional_absent(self, stage: Stage, name: str) -> str | None:
        """Why ``stage`` runs without its optional input ``name``, or None if it has it."""
        upstream = self.stages.get(name)
        if upstream is None:
            return "not in the pipeline"
        if upstream.scope == "night":
            return None if self.usable(upstream, NIGHT) is not None else "unusable"
        skipped = self.missing_stretches(stage)
        ids = [s.id for s in self.stretches if s.id not in skipped]
        if not ids or any(self.usable(upstream, i) is None for i in ids):
            return "unusable"
        return None

    def _context_value(self, name: str) -> Any:
        # names were checked against the sections when the config was built
        section, _, key = name.partition(".")
        if section == "run":
            values = self.config.run.model_dump(mode="json")
        else:
            values = dataclasses.asdict(getattr(self.context, section))
        return values[key] if key else values

    def config_data(self, stage: Stage, stretch: Stretch | None) -> dict[str, Any]:
        """What the stage's products depend on besides its inputs (hashed).

        The paths of the stage's ``files`` and ``streams`` are left out (a
        placeholder stands for a path given): their files' contents are
        inputs, so a night moved or archived with its files stays up to date.
        """
        options = self.config.stage_options(stage.name).model_dump(mode="json")
        for name in (*stage.files, *stage.streams):
            *parents, last = name.split(".")
            holder = functools.reduce(operator.getitem, parents, options)
            if holder.get(last) is not None:
                holder[last] = FILE_BY_CONTENT
        return {
            "version": stage.version,
            "options": options,
            "uses": {name: self._context_value(name) for name in stage.uses},
            "rows": None
            if stretch is None
            else [stretch.lo, stretch.start, stretch.stop, stretch.hi],
        }

    def inputs(
        self, stage: Stage, stretch: Stretch | None
    ) -> tuple[dict[str, str], list[InputSpec], str | None]:
        """Input hashes, how to load the inputs, and why they are unavailable (or None).

        Worked out once per unit until a unit is rewritten (:meth:`forget`) or
        the store refreshed: a run asks again for every unit a later stage
        reads, and its neighbours' (a night of 32 stretches: ~1800 asks for
        133 units).  Each ask gets its own dict and list.
        """
        key = (stage.name, unit_id(stretch))
        if key not in self._inputs:
            self._inputs[key] = self._find_inputs(stage, stretch)
        hashes, specs, problem = self._inputs[key]
        return dict(hashes), list(specs), problem

    def _find_inputs(
        self, stage: Stage, stretch: Stretch | None
    ) -> tuple[dict[str, str], list[InputSpec], str | None]:
        hashes: dict[str, str] = {}
        specs: list[InputSpec] = []
        skipped = self.missing_stretches(stage)
        for name in stage.requires:
            if name == RUN_STATUS:
                status = self.run_status(stage)
                hashes[name] = hash_json(status)
                specs.append(InputSpec(name, "value", value=status))
                continue
            if name in stage.optional and self._optional_absent(stage, name) is not None:
                hashes[name] = ABSENT
                specs.append(InputSpec(name, "none"))
                continue
            if name == RAW_FILES:
                names, missing = self._raw_names_or_reason()
                if missing is not None:
                    return hashes, specs, missing
                hashes[name] = raw_files_fingerprint(self.raw_dir, names)
                specs.append(InputSpec(name, "raw_files", raw_dir=self.raw_dir, names=names))
                continue
            if name == RAW_ROWS:
                if self.index is None:
                    return hashes, specs, self.no_index_reason()
                lo, hi = stretch.lo, stretch.hi
                gone = missing_blocks(self.raw_dir, self.index, lo, hi)
                if gone:
                    # blocked, not failed: the products made from them stay
                    # as they are (a wrong night.raw_dir, or raw data archived)
                    return (
                        hashes,
                        specs,
                        (
                            f"raw file(s) {', '.join(gone)} of rows {lo}-{hi - 1} not found in "
                            f"night.raw_dir {self.raw_dir.resolve()}: point night.raw_dir at the "
                            "night's raw blocks, or restore them"
                        ),
                    )
                flip = self.context.camera.flip_rows
                hashes[name] = blocks_fingerprint(self.raw_dir, self.index, lo, hi, flip_rows=flip)
                if (lo, hi) not in self._index_rows:
                    self._index_rows[lo, hi] = self.index[overlapping_blocks(self.index, lo, hi)]
                subset = self._index_rows[lo, hi]
                specs.append(
                    InputSpec(
                        name,
                        "raw_rows",
                        raw_dir=self.raw_dir,
                        index=subset,
                        lo=lo,
                        hi=hi,
                        flip_rows=flip,
                    )
                )
                continue
            upstream = self.stages[name]
            if upstream.scope == "night":
                ids = [NIGHT]
            elif stage.scope == "stretch":
                ids = [stretch.id]
            else:
                if not self.stretches:
                    return hashes, specs, self.no_index_reason()
                ids = [s.id for s in self.stretches if s.id not in skipped]
                if not ids:
                    groups = _by_reason(skipped).items()
                    why = "; ".join(f"{format_ids(group)} {reason}" for reason, group in groups)
                    return hashes, specs, f"needs {name} products of a stretch; none usable: {why}"
            units = [(self.unit_dir(upstream, i), self.usable(upstream, i)) for i in ids]
            missing = [i for i, (_, record) in zip(ids, units, strict=True) if record is None]
            if missing:
                problem = (
                    f"needs {name} products for {format_ids(missing)} (missing, failed or damaged)"
                )
                return hashes, specs, problem
            if upstream.scope == "stretch" and stage.scope == "night":
                digests = [record["output_hash"] for _, record in units]
                # a full set hashes as it always did; a partial one also names its stretches
                used = {"stretches": ids, "output_hashes": digests} if skipped else digests
                hashes[name] = hash_json(used)
                specs.append(InputSpec(name, "units", units=tuple(units)))
            else:
                hashes[name] = units[0][1]["output_hash"]
                specs.append(InputSpec(name, "unit", units=tuple(units)))
        if stage.neighbours:
            hashes[NEIGHBOURS], spec = self._neighbour_inputs(stage, stretch)
            specs.append(spec)
        options = self.config.stage_options(stage.name)
        # Files the runner reads for the stage ("file") and files it only hashes
        # and names, for the stage's own chunked reader ("stream").
        for kind, names in (("file", stage.files), ("stream", stage.streams)):
            for name in names:
                path = operator.attrgetter(name)(options)
                if path is None:
                    specs.append(InputSpec(name, "none"))
                    continue
                path = Path(path)
                if not path.is_file():
                    return hashes, specs, f"stages.{stage.name}.{name}: no file {path}"
                hashes[name] = self.file_digest(path)
                specs.append(InputSpec(name, kind, path=path, digest=hashes[name]))
        return hashes, specs, None

    def _neighbour_inputs(self, stage: Stage, stretch: Stretch) -> tuple[str, InputSpec]:
        """Input hash and spec of the neighbouring stretches' products (None where unusable)."""
        missing = self.missing_neighbours(stage, stretch)
        sides = [
            None if s is None or s.id in missing else s for s in self.neighbour_stretches(stretch)
        ]
        digests, pairs = {}, []
        for name in stage.neighbours:
            upstream = self.stages[name]
            units = tuple(
                None if s is None else (self.unit_dir(upstream, s.id), self.sidecar(upstream, s.id))
                for s in sides
            )
            digests[name] = [None if unit is None else unit[1]["output_hash"] for unit in units]
            pairs.append((name, units))
        return hash_json(digests), InputSpec(NEIGHBOURS, "neighbours", neighbours=tuple(pairs))

    def file_digest(self, path: Path) -> str:
        """SHA-256 of a file an option names, hashed once per run unless it changes.

        Every up-to-date check and every task of the stage asks for it; a
        reference catalogue can be large.  A change of the file's size or
        modification time hashes it again.
        """
        stat = path.stat()
        key = (str(path.resolve()), stat.st_size, stat.st_mtime_ns)
        if key not in self._digests:
            self._digests[key] = file_digest(path)
        return self._digests[key]

    def no_index_reason(self) -> str:
        maker = self.row_stage.name if self.row_stage else "a stage with defines_rows"
        if self.index is not None:
            return f"the block index of stage {maker!r} has no rows (were all raw files rejected?)"
        return f"no block index yet; run stage {maker!r} first"

    def state(self, stage: Stage, stretch: Stretch | None) -> tuple[str, str]:
        """``(state, reason)`` of a unit; see :class:`StageStatus`."""
        key = (stage.name, unit_id(stretch))
        if key not in self._states:
            self._states[key] = self._compute_state(stage, stretch)
        return self._states[key]

    def _compute_state(self, stage: Stage, stretch: Stretch | None) -> tuple[str, str]:
        unit = unit_id(stretch)
        failure = read_failure(self.unit_dir(stage, unit))
        if failure is not None:
            return "failed", failure.get("reason", "unknown reason")
        damage = self.damage(stage, unit)
        if damage is not None:
            return "damaged", damage
        record = self.sidecar(stage, unit)
        if record is None:
            return "missing", ""
        hashes, _, problem = self.inputs(stage, stretch)
        if problem is not None:
            return "stale", problem
        current = self.config_data(stage, stretch)
        if record.get("config_hash") != hash_json(current):
            return "stale", config_change(stage.name, record.get("config"), current)
        recorded = record.get("inputs", {})
        changed = sorted(k for k in set(hashes) | set(recorded) if hashes.get(k) != recorded.get(k))
        if changed:
            # the run status is the state of every earlier unit, not a product
            names = [_EARLIER_STATES if k == RUN_STATUS else k for k in changed]
            return "stale", f"inputs changed: {', '.join(names)}"
        for name in stage.requires:
            upstream = self.stages.get(name)
            if upstream is None or hashes.get(name) == ABSENT:
                continue  # a pseudo-input, or an optional input the stage ran without
            if upstream.scope == "night":
                ups = [None]
            elif stage.scope == "stretch":
                ups = [stretch]
                if name in stage.neighbours:  # those left out are problems, not staleness
                    missing = self.missing_neighbours(stage, stretch)
                    ups += [
                        s
                        for s in self.neighbour_stretches(stretch)
                        if s is not None and s.id not in missing
                    ]
            else:  # the stretches left out are reported as problems, not as staleness
                skipped = self.missing_stretches(stage)
                ups = [s for s in self.stretches if s.id not in skipped]
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
        lock: tuple[Path, str] | None = None,
    ) -> UnitTask:
        unit = unit_id(stretch)
        data = self.config_data(stage, stretch)
        if stretch is None:
            missing, problems = self.missing_stretches(stage), None
            left_out = tuple(s for s in self.stretches if s.id in missing)
        else:
            missing = self.missing_neighbours(stage, stretch)
            problems, left_out = missing_problems(missing, "neighbour"), ()
        context = dataclasses.replace(self.context, stretch=stretch, missing_stretches=left_out)
        return UnitTask(
            stage=stage,
            unit=unit,
            unit_dir=self.unit_dir(stage, unit),
            options=self.config.stage_options(stage.name),
            context=context,
            inputs=tuple(specs),
            config=data,
            config_hash=hash_json(data),
            input_hashes=hashes,
            capture_logs=capture_logs,
            missing_stretches=dict(missing),
            input_problems=tuple(missing_problems(missing) if problems is None else problems),
            lock=lock,
            known_inputs=self._known_inputs(specs),
        )

    def _known_inputs(self, specs: Sequence[InputSpec]) -> Known:
        """What the run's workers remember of the product files ``specs`` read."""
        units = []
        for spec in specs:
            units += spec.units
            units += [unit for _, pair in spec.neighbours for unit in pair if unit is not None]
        paths = (
            os.path.abspath(folder / entry["file"])
            for folder, sidecar in units
            for entry in sidecar["products"].values()
        )
        return {path: self.known[path] for path in paths if path in self.known}
