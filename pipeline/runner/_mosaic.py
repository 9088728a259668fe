"""Mosaics: the tiles of a mosaic config as runner units.

A mosaic combines the science stage's per-stretch products of several
nights.  :class:`MosaicStore` finds them (through each night's config, which
must show them done, or in a night's product folder), reads only their
headers to lay out the tiles (:func:`pipeline.mosaic.tiles_from_options`)
and tells which products touch which tile.  Each tile is one unit of
:data:`pipeline.mosaic.TILE_STAGE` in ``<output_dir>/<name>/tiles/<tile>/``
with a provenance sidecar, run by :func:`pipeline.runner._unit.execute_unit`
on the night's executors (local pool, dask).

A tile is up to date when its sidecar records the current config hash (the
co-add and detect options, the tile's WCS and shape) and the output hashes
of the products that touch it now; :func:`run_mosaic` skips it then, so a
rerun after one night changed recomputes only the tiles that night touches,
and a killed run resumes.
"""

from __future__ import annotations

import contextlib
import logging
import warnings
from collections.abc import Iterable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from astropy.io import fits
from astropy.table import Table, vstack
from astropy.wcs import WCS, FITSFixedWarning

from pipeline._offline import astropy_offline
from pipeline.config import load_config
from pipeline.mosaic import Tile, footprint_of, tiles_from_options, touches
from pipeline.mosaic._config import MosaicConfig
from pipeline.mosaic._stage import SCIENCE, TILE_STAGE, TileContext, TileOptions
from pipeline.products import FLUX_EXTENSION
from pipeline.runner._executors import make_executor
from pipeline.runner._lock import RunLock
from pipeline.runner._night import NightStore, format_ids
from pipeline.runner._store import (
    Known,
    clear_failure,
    hash_json,
    lost_product,
    read_damage,
    read_failure,
    read_products,
    read_sidecar,
)
from pipeline.runner._unit import InputSpec, UnitTask, execute_unit, failed_outcome

__all__ = [
    "MosaicStatus",
    "MosaicStore",
    "mosaic_dir",
    "mosaic_nights",
    "mosaic_status",
    "run_mosaic",
]

log = logging.getLogger(__name__)


def mosaic_dir(config: MosaicConfig) -> Path:
    """The mosaic's output folder, ``<output_dir>/<name>``."""
    return Path(config.mosaic.output_dir) / config.mosaic.name


@dataclass(frozen=True)
class InputProduct:
    """A science product offered to the mosaic: where it is and where it lies on the sky."""

    night: str
    unit: str
    unit_dir: Path
    sidecar: dict[str, Any]
    wcs: WCS
    shape: tuple[int, int]

    @property
    def digest(self) -> str:
        return self.sidecar["output_hash"]

    @property
    def label(self) -> str:
        return f"{self.night}/{self.unit}"


def _product_geometry(unit_dir: Path, sidecar: dict[str, Any]) -> tuple[WCS, tuple[int, int]]:
    """Celestial WCS and shape of a science product, from its header only."""
    path = unit_dir / sidecar["products"]["image"]["file"]
    header = fits.getheader(path, FLUX_EXTENSION)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", FITSFixedWarning)  # date cards astropy tidies
        wcs = WCS(header).celestial
    return wcs, (int(header["NAXIS2"]), int(header["NAXIS1"]))


def _night_units(path: Path) -> tuple[str, list[tuple[str, Path, dict]], list[str]]:
    """The night's name, its usable science units ``(unit, folder, sidecar)`` and problems."""
    problems: list[str] = []
    units = []
    if path.is_file():  # a night config: only science units that are done
        config = load_config(path)
        night = config.night.name
        store = NightStore(config)
        stage = store.stages.get(SCIENCE)
        if stage is None:
            return night, [], [f"night {night}: its config has no {SCIENCE} stage"]
        left_out: dict[str, list[str]] = {}
        for stretch in store.stretches:
            state, reason = store.state(stage, stretch)
            if state == "done":
                folder = store.unit_dir(stage, stretch.id)
                units.append((stretch.id, folder, store.sidecar(stage, stretch.id)))
            else:
                if state == "missing" and not reason:
                    # why it was not made: its inputs' problem (a blocked or
                    # failed upstream unit), or it was never run
                    reason = store.inputs(stage, stretch)[2] or "not made yet"
                left_out.setdefault(f"{state}{': ' + reason if reason else ''}", []).append(
                    stretch.id
                )
        for why, ids in left_out.items():
            problems.append(f"night {night}: {SCIENCE} {format_ids(ids)} left out ({why})")
        if not store.stretches:
            problems.append(f"night {night}: no stretch plan yet (run the night first)")
        return night, units, problems
    night = path.name  # a product folder: <output_dir>/<night name>
    folder = path / SCIENCE
    for unit_dir in sorted(folder.iterdir()) if folder.is_dir() else ():
        if not unit_dir.is_dir():
            continue
        why = read_failure(unit_dir)
        why = why.get("reason", "failed") if why is not None else read_damage(unit_dir)
        sidecar = None if why is not None else read_sidecar(unit_dir)
        if sidecar is None:
            why = why or lost_product(unit_dir) or "incomplete"
            problems.append(f"night {night}: {SCIENCE} {unit_dir.name} left out ({why})")
            continue
        units.append((unit_dir.name, unit_dir, sidecar))
    units, overlapped = current_layout(units)
    problems.extend(f"night {night}: {SCIENCE} {line}" for line in overlapped)
    if not units and not problems:
        problems.append(f"night {night}: no {SCIENCE} products in {folder}")
    return night, units, problems


def _core_rows(sidecar: dict[str, Any]) -> tuple[int, int] | None:
    """The night rows ``[start, stop)`` a stretch unit's sidecar says are its own, or None."""
    try:
        _, start, stop, _ = sidecar["config"]["rows"]
        return int(start), int(stop)
    except (KeyError, TypeError, ValueError):
        return None


def current_layout(
    units: list[tuple[str, Path, dict[str, Any]]],
) -> tuple[list[tuple[str, Path, dict[str, Any]]], list[str]]:
    """The stretch units of one product folder that belong to its latest stretch layout.

    A night reduced again with other stretches (``run.stretch_rows``, a
    block added or lost) leaves the units of the old layout that the new one
    does not reuse, complete with their sidecars, in its folder.  The
    stretches of one layout never share a row of their own, so a unit whose
    own rows (its sidecar's ``config.rows``) overlap those of a unit made
    after it is left out: co-adding it too would count the same night's sky
    twice.

    Parameters
    ----------
    units : list of (unit, folder, sidecar)

    Returns
    -------
    kept : list of (unit, folder, sidecar)
        In the order given.
    left_out : list of str
        One line per unit left out, naming it, its rows and the later unit.
    """
    order = sorted(
        range(len(units)), key=lambda i: str(units[i][2].get("finished", "")), reverse=True
    )
    kept: list[int] = []
    left_out: dict[int, str] = {}
    for i in order:
        rows = _core_rows(units[i][2])
        later = next(
            (
                units[k][0]
                for k in kept
                if rows is not None
                and (other := _core_rows(units[k][2])) is not None
                and rows[0] < other[1]
                and other[0] < rows[1]
            ),
            None,
        )
        if later is None:
            kept.append(i)
        else:
            left_out[i] = (
                f"{units[i][0]} left out (its rows {rows[0]}-{rows[1] - 1} are also those of "
                f"{later}, made after it: a product of an earlier stretch layout; remove it, or "
                "name the night's config instead of its folder)"
            )
    return [units[i] for i in sorted(kept)], [left_out[i] for i in sorted(left_out)]


class MosaicStore:
    """The mosaic's inputs, tiles and tile units, seen through the current config.

    Parameters
    ----------
    config : MosaicConfig

    Attributes
    ----------
    products : list of InputProduct
        The usable science products of every night, in config order.
    problems : list of str
        Products left out (stale, failed, missing) and nights without any.
    tiles : list of Tile
    """

    def __init__(self, config: MosaicConfig):
        self.config = config
        self.root = mosaic_dir(config)
        self.stages = {TILE_STAGE.name: TILE_STAGE}
        self.damaged: dict[tuple[str, str], str] = {}
        #: What the workers remember of the tiles they wrote (no tile reads another's).
        self.known: Known = {}
        self.options = TileOptions(coadd=config.coadd, detect=config.detect)
        self.products: list[InputProduct] = []
        self.problems: list[str] = []
        seen: dict[str, Path] = {}
        for path in config.mosaic.nights:
            night, units, problems = _night_units(Path(path))
            if night in seen:
                raise ValueError(
                    f"mosaic.nights: {seen[night]} and {path} are both night {night!r}; "
                    "list each night once."
                )
            seen[night] = Path(path)
            self.problems.extend(problems)
            for unit, unit_dir, sidecar in units:
                wcs, shape = _product_geometry(unit_dir, sidecar)
                self.products.append(InputProduct(night, unit, unit_dir, sidecar, wcs, shape))
        footprints = [footprint_of(p.wcs, p.shape) for p in self.products]
        if footprints or config.tiling.layout == "explicit":
            self.tiles = tiles_from_options(config.tiling, footprints)
        else:
            self.tiles = []
        self._touching = {
            tile.name: [
                p for p, f in zip(self.products, footprints, strict=True) if touches(tile, f)
            ]
            for tile in self.tiles
        }

    def unit_dir(self, stage: Any, unit: str) -> Path:
        return self.root / TILE_STAGE.name / unit

    def inputs(self, tile: Tile) -> list[InputProduct]:
        """The products that touch ``tile``."""
        return self._touching[tile.name]

    def config_data(self, tile: Tile) -> dict[str, Any]:
        """What the tile depends on besides its inputs (hashed)."""
        return {
            "version": TILE_STAGE.version,
            "options": self.options.model_dump(mode="json"),
            "tile": {"wcs": dict(tile.wcs.to_header()), "shape": list(tile.shape)},
        }

    def input_hashes(self, tile: Tile) -> dict[str, str]:
        return {p.label: p.digest for p in self.inputs(tile)}

    def state(self, tile: Tile) -> tuple[str, str]:
        """``(state, reason)`` of a tile: done, stale, missing, failed or damaged."""
        unit_dir = self.unit_dir(TILE_STAGE, tile.name)
        failure = read_failure(unit_dir)
        if failure is not None:
            return "failed", failure.get("reason", "unknown reason")
        damage = read_damage(unit_dir)
        if damage is not None:
            return "damaged", damage
        record = read_sidecar(unit_dir)
        if record is None:
            lost = lost_product(unit_dir)  # a tile file removed or resized by hand
            return ("missing", "") if lost is None else ("damaged", lost)
        if record.get("config_hash") != hash_json(self.config_data(tile)):
            return "stale", "config or tile placement changed"
        now, then = self.input_hashes(tile), record.get("inputs", {})
        changed = sorted(k for k in set(now) | set(then) if now.get(k) != then.get(k))
        if changed:
            return "stale", f"inputs changed: {', '.join(changed)}"
        return "done", ""

    def task(self, tile: Tile, capture_logs: bool, lock: tuple[Path, str] | None) -> UnitTask:
        products = self.inputs(tile)
        data = self.config_data(tile)
        context = TileContext(
            night=self.config.mosaic.name,
            tile=tile,
            inputs=tuple((p.night, p.unit, p.digest) for p in products),
            # what the tile is, not where it is stored or how it was run
            config=self.config.model_dump(
                mode="json", exclude={"run": True, "mosaic": {"output_dir"}}
            ),
        )
        units = tuple((p.unit_dir, p.sidecar) for p in products)
        return UnitTask(
            stage=TILE_STAGE,
            unit=tile.name,
            unit_dir=self.unit_dir(TILE_STAGE, tile.name),
            options=self.options,
            context=context,
            inputs=(InputSpec(SCIENCE, "units", units=units),),
            config=data,
            config_hash=hash_json(data),
            input_hashes=self.input_hashes(tile),
            capture_logs=capture_logs,
            lock=lock,
        )


@dataclass
class MosaicStatus:
    """Result of :func:`mosaic_status`: every tile's state and the inputs' problems."""

    name: str
    folder: Path
    n_products: int
    tiles: dict[str, tuple[str, str]] = field(default_factory=dict)
    problems: list[str] = field(default_factory=list)

    def ids(self, state: str) -> list[str]:
        return [tile for tile, (s, _) in self.tiles.items() if s == state]

    @property
    def has_problems(self) -> bool:
        """True if a tile failed or is damaged, or an input was left out."""
        return bool(self.ids("failed") or self.ids("damaged") or self.problems)

    @property
    def complete(self) -> bool:
        """True if every tile is done."""
        return all(state == "done" for state, _ in self.tiles.values())

    def format(self) -> str:
        lines = [
            f"mosaic {self.name} ({len(self.tiles)} tiles from {self.n_products} science "
            f"products) in {self.folder}"
        ]
        states = ("done", "stale", "missing", "failed", "damaged")
        lines.append("  " + "".join(f"{s:>8}" for s in states))
        lines.append("  " + "".join(f"{len(self.ids(s)):>8}" for s in states))
        by_reason: dict[tuple[str, str], list[str]] = {}
        for tile, (state, reason) in self.tiles.items():
            if state not in ("done", "missing"):
                by_reason.setdefault((state, reason), []).append(tile)
        for (state, reason), ids in sorted(by_reason.items()):
            lines.append(f"  {state}: {', '.join(ids)}: {reason}")
        lines.extend(f"  problem: {p}" for p in self.problems)
        return "\n".join(lines)


def mosaic_status(config: MosaicConfig) -> MosaicStatus:
    """The state of every tile of the mosaic (reads only)."""
    with astropy_offline():
        store = MosaicStore(config)
        status = MosaicStatus(config.mosaic.name, store.root, len(store.products))
        status.problems = list(store.problems)
        for tile in store.tiles:
            status.tiles[tile.name] = store.state(tile)
        folder = store.root / TILE_STAGE.name
        for path in sorted(folder.iterdir()) if folder.is_dir() else ():
            if path.is_dir() and path.name not in status.tiles:
                status.tiles[path.name] = ("orphan", "not a tile of the current layout")
    return status


def mosaic_nights(config: MosaicConfig) -> Table:
    """Every built tile's night table, stacked (for a report's figures of the mosaic).

    Returns
    -------
    astropy.table.Table
        The columns of :func:`pipeline.mosaic.night_table` (``night``,
        ``seeing``, ``zero_point``, ``used``, ``rejected``, ``offset``,
        ``reason``) after a ``tile`` column; no rows before a tile is built.
    """
    tables = []
    folder = mosaic_dir(config) / TILE_STAGE.name
    for unit_dir in sorted(folder.iterdir()) if folder.is_dir() else ():
        record = read_sidecar(unit_dir)
        if record is None or "nights" not in record["products"]:
            continue
        table = read_products(unit_dir, {"products": {"nights": record["products"]["nights"]}})
        table = table["nights"]
        table.add_column(unit_dir.name, name="tile", index=0)
        tables.append(table)
    if not tables:
        return Table(names=("tile", "night"), dtype=(str, str))
    return vstack(tables, metadata_conflicts="silent")


def run_mosaic(
    config: MosaicConfig,
    *,
    tiles: Iterable[int] | None = None,
    force: bool = False,
    progress=None,
    executor=None,
):
    """Build the mosaic's tiles, skipping those that are up to date.

    Parameters
    ----------
    config : MosaicConfig
    tiles : iterable of int, optional
        Tile indices to build; default all.
    force : bool
        Rebuild the selected tiles even if they are up to date.
    progress : callable, optional
        ``progress('tiles', done, total)``.
    executor : Executor, optional
        Build the tiles there and leave it open; default one made from
        ``config.run`` for this run.

    Returns
    -------
    pipeline.runner.RunReport
        ``report.ok`` is False if a tile failed or was blocked, or an input
        product was left out (``report.flagged``).

    Raises
    ------
    RunLockedError
        If another live run holds the mosaic's lock.
    ValueError
        For tile indices the layout does not have, or a night listed twice.
    """
    with astropy_offline():
        return _run_mosaic(config, tiles, force, progress, executor)


def _run_mosaic(config, tiles, force, progress, shared):
    from pipeline.runner import LOCK_NAME, RunReport, UnitResult, _record_outcome, no_progress

    progress = progress or no_progress
    store = MosaicStore(config)
    selected = store.tiles
    if tiles is not None:
        wanted = frozenset(tiles)
        absent = sorted(wanted - {t.index for t in store.tiles})
        if absent:
            indices = [t.index for t in store.tiles]
            have = f"tiles {min(indices)} to {max(indices)}" if indices else "no tiles"
            raise ValueError(
                f"--tiles {','.join(map(str, absent))}: the mosaic has {have} (the numbers "
                "in their names); see `zdrift mosaic --status`."
            )
        selected = [t for t in store.tiles if t.index in wanted]
    report = RunReport(config.mosaic.name, kind="mosaic")
    if store.problems:
        report.results.append(
            UnitResult(TILE_STAGE.name, "inputs", "skipped", problems=tuple(store.problems))
        )
    store.root.mkdir(parents=True, exist_ok=True)
    lock = RunLock(store.root / LOCK_NAME)
    workers = make_executor(config.run) if shared is None else contextlib.nullcontext(shared)
    with lock, workers as executor:
        tasks = []
        for tile in selected:
            state, reason = store.state(tile)
            if state == "done" and not force:
                report.results.append(UnitResult(TILE_STAGE.name, tile.name, "skipped"))
                continue
            if not store.inputs(tile):
                why = "no science product touches the tile"
                report.results.append(UnitResult(TILE_STAGE.name, tile.name, "blocked", why))
                continue
            if state == "damaged" and lost_product(store.unit_dir(TILE_STAGE, tile.name)):
                log.error("damaged product in %s/%s: %s", TILE_STAGE.name, tile.name, reason)
                report.damaged.append(f"{TILE_STAGE.name}/{tile.name}: {reason} (recomputed)")
            clear_failure(store.unit_dir(TILE_STAGE, tile.name))
            tasks.append(store.task(tile, executor.remote, (lock.path, lock.token)))
        log.info(
            "mosaic %s: %d tiles to build of %d, executor %s",
            config.mosaic.name,
            len(tasks),
            len(selected),
            config.run.executor,
        )
        progress(TILE_STAGE.name, 0, len(tasks))
        outcomes = executor.map(execute_unit, tasks, on_error=failed_outcome)
        for done, outcome in enumerate(outcomes, start=1):
            report.results.append(_record_outcome(store, TILE_STAGE, outcome, executor.remote))
            progress(TILE_STAGE.name, done, len(tasks))
    report.results.sort(key=lambda r: r.unit)
    log.info("%s", report.format())
    return report
