"""Several nights and their mosaic in one run: ``zdrift run MOSAIC.yaml``.

A mosaic config lists the nights it co-adds (their configs, or product
folders of nights reduced elsewhere).  :func:`run_nights_and_mosaic` brings
every listed night config up to date, its report included
(:func:`pipeline.runner.run_night`), then builds the mosaic's tiles
(:func:`pipeline.runner.run_mosaic`) and writes the page across the nights
(:func:`pipeline.report.build_nights_report`) to
``<mosaic output_dir>/<name>/report/page.html``.

The nights run at the same time, each in a thread of this process, on one
pool of workers (started once, from the first night's ``run`` section; a
night whose ``run`` section differs gets its own): the pool starts once, its
workers' imports and compiled kernels serve every night, and while one
night waits on a stage with a single unit (the column solve, astrometry,
the report) the other workers take the units of the other nights.  Each
night still keeps its own lock and its stages' order.
"""

from __future__ import annotations

import contextlib
import logging
import os
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor, wait
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from pipeline._offline import astropy_offline
from pipeline.config import Config, load_config
from pipeline.exceptions import ConfigError, DamagedProductError
from pipeline.mosaic._stage import TILE_STAGE
from pipeline.runner._access import open_product
from pipeline.runner._executors import make_executor
from pipeline.runner._mosaic import mosaic_dir, mosaic_nights, run_mosaic
from pipeline.runner._night import night_dir
from pipeline.runner._nightly import REPORT_PAGE, report_page
from pipeline.runner._store import hash_json, read_products, read_sidecar

__all__ = ["NIGHTS_PAGE", "NightsRun", "night_configs", "nights_page", "run_nights_and_mosaic"]

log = logging.getLogger(__name__)

#: Where the page across the nights goes, below the mosaic's folder.
NIGHTS_PAGE = Path("report") / "page.html"
#: Raise it when the page across the nights changes for the same products (its
#: code, not what it draws): pages written before are then drawn again.
NIGHTS_PAGE_VERSION = 1

#: Key of the page's night products -> (stage, product) in the night's store.
_PRODUCTS = {
    "summary": ("report", "summary"),
    "sky": ("report", "sky"),
    "seeing": ("catalog", "seeing"),
    "block_index": ("ingest", "block_index"),
    "zero_point": ("zeropoint", "zero_point"),
    "residual_grid": ("astrometry", "residual_grid"),
}


@dataclass
class NightsRun:
    """What :func:`run_nights_and_mosaic` did.

    ``nights`` holds each night config's name and its
    :class:`pipeline.runner.RunReport`; ``mosaic`` the tiles' report;
    ``page`` the page across the nights (None if it could not be written).
    """

    nights: list[tuple[str, Any]] = field(default_factory=list)
    mosaic: Any = None
    page: Path | None = None

    @property
    def ok(self) -> bool:
        """True if every night and the mosaic ran without failure or problem."""
        reports = [report for _, report in self.nights] + [self.mosaic]
        return all(report is not None and report.ok for report in reports)


def night_configs(config: Any) -> list[Config]:
    """The night configs a mosaic config lists (product folders are left out).

    Raises
    ------
    ConfigError
        If a listed night config is invalid (naming the file).
    """
    return [load_config(path) for path in config.mosaic.nights if Path(path).is_file()]


def _same_pool(run: Any, nights: list[Config]) -> bool:
    """Whether the mosaic's ``run`` section asks for the pool the nights share."""
    if not nights or run.executor == "serial":
        return False
    first = nights[0].run
    return (run.executor, run.workers, run.scheduler) == (
        first.executor,
        first.workers,
        first.scheduler,
    )


def _same_workers(a: Config, b: Config) -> bool:
    return a.run.model_dump() == b.run.model_dump() and (
        a.camera().n_columns == b.camera().n_columns
    )


def run_nights_and_mosaic(
    config: Any,
    *,
    force: bool = False,
    progress: Callable[[str, int, int], None] | None = None,
    on_night: Callable[[Config, Any], None] | None = None,
    night_log: Callable[[Config], contextlib.AbstractContextManager] | None = None,
) -> NightsRun:
    """Reduce the mosaic's nights, build its tiles and the page across the nights.

    Parameters
    ----------
    config : pipeline.mosaic.MosaicConfig
    force : bool
        Recompute every unit and tile even if up to date.
    progress : callable, optional
        ``progress(label, done, total)`` for the units of each stage and the tiles.
    on_night : callable, optional
        ``on_night(night_config, run_report)`` after each night (e.g. to
        print where its page is).
    night_log : callable, optional
        ``night_log(night_config)``: a context manager entered in the night's
        thread for its run (e.g. a log file of the night's records).

    Returns
    -------
    NightsRun

    Raises
    ------
    ConfigError
        If a listed night config is invalid (before anything runs).
    RunLockedError
        If another run holds a night's or the mosaic's lock.
    """
    from pipeline.runner import run_night

    nights = night_configs(config)
    outcome = NightsRun()
    progress = progress or (lambda label, done, total: None)
    # The threads outlive the pool: a worker process dies with the thread that
    # started it (Linux's parent-death signal, see end_with_parent), and any
    # night's thread may start one.  So the pool closes first, then the threads.
    threads = ThreadPoolExecutor(max_workers=max(1, len(nights)))
    with astropy_offline(), threads, contextlib.ExitStack() as stack:  # one astropy setting
        shared = None
        if nights:
            first = nights[0]
            shared = stack.enter_context(make_executor(first.run, first.camera().n_columns))

        def reduce(night: Config) -> Any:
            name = night.night.name
            logged = night_log(night) if night_log is not None else contextlib.nullcontext()
            with logged:
                log.info("night %s of mosaic %s", name, config.mosaic.name)
                report = run_night(
                    night,
                    force=force,
                    progress=lambda label, done, total: progress(f"{name} {label}", done, total),
                    executor=shared if _same_workers(night, nights[0]) else None,
                )
            if on_night is not None:
                on_night(night, report)
            return report

        runs = [threads.submit(reduce, night) for night in nights]
        wait(runs)
        for night, run in zip(nights, runs, strict=True):
            outcome.nights.append((night.night.name, run.result()))  # raises a night's error
        mosaic_executor = shared if _same_pool(config.run, nights) else None
        outcome.mosaic = run_mosaic(
            config, force=force, progress=progress, executor=mosaic_executor
        )
    try:
        outcome.page = write_nights_page(config, nights, force=force)
    except OSError as exc:
        log.error("cannot write the page across the nights: %s", exc)
    return outcome


def _night_products(night: Config) -> dict[str, Any]:
    """The products of a night the page across the nights draws (those that exist)."""
    products: dict[str, Any] = {}
    for key, (stage, name) in _PRODUCTS.items():
        if stage not in {s.name for s in night.graph}:
            continue
        try:
            products[key] = open_product(night, stage, "night", name)
        except (ValueError, OSError) as exc:  # not made, failed, damaged
            log.info(
                "night %s: no %s for the page across the nights (%s)", night.night.name, key, exc
            )
    return products


def _folder_products(folder: Path) -> dict[str, Any]:
    """The page's products in a night's product folder (those made and sound), and its page.

    A product folder listed in a mosaic is co-added as it is, without its
    config: its night-scope units are read from ``<folder>/<stage>/night``.
    """
    products: dict[str, Any] = {}
    for key, (stage, name) in {**_PRODUCTS, "page": REPORT_PAGE}.items():
        unit_dir = folder / stage / "night"
        record = read_sidecar(unit_dir)
        if record is None or name not in record["products"]:
            continue
        entry = record["products"][name]
        if key == "page":
            products[key] = unit_dir / entry["file"]
            continue
        try:
            products[key] = read_products(unit_dir, {"products": {name: entry}})[name]
        except (DamagedProductError, OSError, ValueError) as exc:
            log.info("%s: no %s for the page across the nights (%s)", folder, key, exc)
    return products


def nights_page(config: Any) -> Path:
    """Where the page across the mosaic's nights is written."""
    return mosaic_dir(config) / NIGHTS_PAGE


def write_nights_page(config: Any, nights: list[Config], *, force: bool = False) -> Path:
    """Write the page across ``nights`` and the mosaic's product folders; return its path.

    A product folder's row and figures come from the night-scope products it
    holds (its name is the mosaic's name for the night), after the configs' nights.
    The page is left as it is when it was drawn from the same inputs
    (:func:`page_inputs`), unless ``force``.
    """
    path = nights_page(config)
    inputs = page_inputs(config, nights)
    mark = f"<!-- page inputs: {inputs} -->\n"
    if not force and _ends_with(path, mark):
        log.info("the page across the nights is up to date: %s", path)
        return path
    from pipeline.report import ReportOptions, build_nights_report

    path.parent.mkdir(parents=True, exist_ok=True)
    entries = []
    for night in nights:
        products = _night_products(night)
        page = report_page(night)
        if page is not None:
            products["page"] = _link(page, path.parent)
        entries.append((night.night.name, products))
    for folder in (Path(p) for p in config.mosaic.nights if Path(p).is_dir()):
        products = _folder_products(folder)
        if "page" in products:
            products["page"] = _link(products["page"], path.parent)
        entries.append((folder.name, products))  # the mosaic's name for the night
    options = night_options(nights)
    tiles = mosaic_nights(config)
    about = [
        ("mosaic", config.mosaic.name),
        ("nights", str(len(config.mosaic.nights))),
        ("tiles built", str(len(set(tiles["tile"])) if len(tiles) else 0)),
    ]
    text = build_nights_report(entries, config.mosaic.name, about, options or ReportOptions())
    path.write_text(text + ("" if text.endswith("\n") else "\n") + mark, encoding="utf-8")
    return path


def page_inputs(config: Any, nights: list[Config]) -> str:
    """SHA-256 of what the page across the nights is drawn from.

    The SHA-256 of every product the page draws of each listed night config
    and product folder (from their sidecars), where the nights' own pages
    are, the built tiles' night tables, the mosaic's name and number of
    nights, the report options, and the versions of the report stage and of
    :data:`NIGHTS_PAGE_VERSION`.  A mosaic config run again with everything
    up to date then leaves the page alone instead of drawing it again
    (~3 s of CPU, most of it importing the plotting libraries).
    """
    page_dir = nights_page(config).parent
    rows = []
    for night in nights:
        page = report_page(night)
        link = None if page is None else _link(page, page_dir)
        rows.append([night.night.name, _digests(night_dir(night), _PRODUCTS), link])
    for folder in (Path(p) for p in config.mosaic.nights if Path(p).is_dir()):
        wanted = {**_PRODUCTS, "page": REPORT_PAGE}
        rows.append([folder.name, _digests(folder, wanted), str(folder.resolve())])
    tiles = mosaic_dir(config) / TILE_STAGE.name
    built = [
        [unit_dir.name, _digest(unit_dir, "nights")]
        for unit_dir in (sorted(tiles.iterdir()) if tiles.is_dir() else ())
    ]
    options = night_options(nights)
    graph = nights[0].graph if nights else ()
    report = next((stage.version for stage in graph if stage.name == REPORT_PAGE[0]), None)
    return hash_json(
        {
            "page": NIGHTS_PAGE_VERSION,
            "report": report,
            "mosaic": config.mosaic.name,
            "nights": len(config.mosaic.nights),
            "rows": rows,
            "tiles": built,
            "options": None if options is None else options.model_dump(mode="json"),
        }
    )


def _link(page: Path, folder: Path) -> str:
    """The link to a night's ``page`` from a page in ``folder`` (relative, POSIX)."""
    return Path(os.path.relpath(page, folder)).as_posix()


def _digests(root: Path, products: dict[str, tuple[str, str]]) -> dict[str, str | None]:
    """``key -> SHA-256`` of the products ``(stage, name)`` of the units ``root/<stage>/night``."""
    return {key: _digest(root / stage / "night", name) for key, (stage, name) in products.items()}


def _digest(unit_dir: Path, name: str) -> str | None:
    """The SHA-256 the sidecar of ``unit_dir`` records for its product ``name`` (None: absent)."""
    record = read_sidecar(unit_dir)
    entry = None if record is None else record["products"].get(name)
    return None if entry is None else entry.get("sha256")


def _ends_with(path: Path, mark: str) -> bool:
    """Whether the file ``path`` exists and ends with the text ``mark``."""
    size = len(mark.encode("utf-8"))
    try:
        with open(path, "rb") as stream:
            stream.seek(0, os.SEEK_END)
            if stream.tell() < size:
                return False
            stream.seek(-size, os.SEEK_END)
            return stream.read() == mark.encode("utf-8")
    except OSError:
        return False


def night_options(nights: list[Config]) -> Any:
    """The report options of the first night (figure size, dpi), or None."""
    for night in nights:
        with contextlib.suppress(ConfigError, KeyError, AttributeError):
            return night.stage_options("report")
    return None
