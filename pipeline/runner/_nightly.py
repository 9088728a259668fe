"""The nightly batch: every new or incomplete night under a site's raw folder.

Each folder directly below the raw folder is a night (hidden folders and
folders without a raw file are left out).  Its config is the file
:data:`NIGHT_CONFIG_NAME` found beside the data if there is one, else the
site file with the folder's name and path (:func:`pipeline.config.night_config`).
A night whose every unit is done, its report included, is left alone; the
others are run (:func:`pipeline.runner.run_night` skips what is up to date),
which makes their report.
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from pathlib import Path

from pipeline.config import Config, load_config, night_config
from pipeline.exceptions import ConfigError, RunLockedError, RunStartError
from pipeline.runner._access import product_path
from pipeline.runner._rawio import list_raw_files

__all__ = [
    "NIGHT_CONFIG_NAME",
    "REPORT_PAGE",
    "NightOutcome",
    "find_nights",
    "reduce_night",
    "report_page",
]

#: ``(stage, product)`` of the night's report page.
REPORT_PAGE = ("report", "page")

#: Name of a night's own config, beside its raw files (it wins over the site file).
NIGHT_CONFIG_NAME = "night.yaml"


@dataclass(frozen=True)
class NightOutcome:
    """What the batch did with one night.

    ``status`` is ``'up to date'`` (nothing to do), ``'done'`` (reduced, no
    problem), ``'problems'`` (reduced, but a unit failed or was blocked, or a
    stage reported a problem with its input), ``'failed'`` (could not run:
    a bad config, an unwritable output folder), ``'busy'`` (another run holds
    the night's lock) or ``'skipped'`` (no raw file yet).
    """

    night: str
    status: str
    detail: str = ""
    report: Path | None = None

    @property
    def failed(self) -> bool:
        """True if the night needs a look: it failed or its run had problems."""
        return self.status in ("problems", "failed")

    def line(self) -> str:
        """One summary line: night, status, what happened, where the report is."""
        detail = f" ({self.detail})" if self.detail else ""
        where = f"; report: {self.report}" if self.report is not None else ""
        return f"{self.night}: {self.status}{detail}{where}"


def find_nights(
    site_file: str | Path, raw_root: str | Path, overrides: Iterable[str] = ()
) -> Iterator[tuple[str, Config | NightOutcome]]:
    """Each night folder below ``raw_root``: its name and its config (or why there is none).

    Parameters
    ----------
    site_file : str or pathlib.Path
        The site's YAML file (see :func:`pipeline.config.night_config`).
    raw_root : str or pathlib.Path
        The folder holding one folder of raw files per night.
    overrides : iterable of str
        ``dotted.key=value`` overrides applied to every night.

    Yields
    ------
    (str, Config or NightOutcome)
        In name order; a :class:`NightOutcome` (``'failed'`` for a config
        error, ``'skipped'`` for a folder without raw files) instead of a
        config when the night cannot be run.
    """
    root = Path(raw_root)
    if not root.is_dir():
        raise ValueError(f"{root} is not a folder; give the folder of the night folders.")
    for folder in sorted(p for p in root.iterdir() if p.is_dir() and not p.name.startswith(".")):
        own = folder / NIGHT_CONFIG_NAME
        try:
            if own.is_file():
                config = load_config(own, overrides)
            else:
                config = night_config(site_file, folder.name, folder, overrides)
        except ConfigError as exc:
            lines = [line.strip() for line in str(exc).strip().splitlines()]
            more = f" (+{len(lines) - 2} more)" if len(lines) > 2 else ""
            detail = f"config: {' '.join(lines[:2])}{more}"
            yield folder.name, NightOutcome(folder.name, "failed", detail)
            continue
        raw_dir = Path(config.night.raw_dir)
        if not raw_dir.is_dir() or not list_raw_files(raw_dir, config.night.pattern):
            why = f"no file matches {config.night.pattern!r} in {raw_dir} yet"
            yield folder.name, NightOutcome(config.night.name, "skipped", why)
            continue
        yield folder.name, config


def report_page(config: Config) -> Path | None:
    """The night's report page, if the report stage is in the graph and has made it."""
    stage, product = REPORT_PAGE
    if stage not in {s.name for s in config.graph}:
        return None
    try:
        return product_path(config, stage, "night", product)
    except ValueError:  # the report has not been made
        return None


def reduce_night(config: Config) -> NightOutcome:
    """Bring one night up to date, its report included, unless it already is.

    Returns
    -------
    NightOutcome
        ``'up to date'`` when every unit was done (nothing ran; problems the
        stages reported earlier are counted in the detail), else the result
        of :func:`pipeline.runner.run_night`.
    """
    from pipeline.runner import night_status, run_night

    name = config.night.name
    status = night_status(config)
    if status.complete:
        n_problems = sum(len(p) for s in status.stages for p in s.problems.values())
        detail = f"{n_problems} problem(s) reported when it ran" if n_problems else ""
        return NightOutcome(name, "up to date", detail, report_page(config))
    try:
        report = run_night(config)
    except RunLockedError as exc:
        return NightOutcome(name, "busy", str(exc))
    except (RunStartError, OSError, ValueError) as exc:
        return NightOutcome(name, "failed", f"{type(exc).__name__}: {exc}")
    n_problems = sum(len(r.problems) for r in report.results)
    detail = (
        f"{report.count('ran')} units ran, {report.count('failed')} failed, "
        f"{report.count('blocked')} blocked, {n_problems} problem(s)"
    )
    return NightOutcome(name, "done" if report.ok else "problems", detail, report_page(config))
