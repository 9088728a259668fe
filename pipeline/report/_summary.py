"""The page's words: the summary table and the problems, from products and the night's status."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

__all__ = ["PENDING_ROWS", "problem_lines", "summary_rows"]

#: Summary rows whose stages are not in the pipeline yet: shown as not available.
PENDING_ROWS = (
    ("matched reference stars", "astrometry"),
    ("solved parameters", "astrometry"),
    ("zero point", "zeropoint"),
)


def _plural(n: int, word: str) -> str:
    return f"{n} {word}{'' if n == 1 else 's'}"


def _gaps(block_index: Any) -> int:
    """Gaps in the night's rows: blocks that start after the previous block's end."""
    starts = np.sort(np.asarray(block_index["row_start"], dtype=np.int64))
    order = np.argsort(np.asarray(block_index["row_start"]), kind="stable")
    stops = np.maximum.accumulate(
        (np.asarray(block_index["row_start"]) + np.asarray(block_index["n_rows"]))[order]
    )
    return int(np.sum(starts[1:] > stops[:-1]))


def problem_lines(status: Any) -> list[str]:
    """What went wrong in the run, one sentence per problem.

    Parameters
    ----------
    status : pipeline.runner.NightStatus
        The night's status (:func:`pipeline.runner.night_status`).

    Returns
    -------
    list of str
        Failed, damaged and stale units with their reasons, problems the
        stages reported with their input, and stages with missing products.
    """
    from pipeline.runner import format_ids

    lines = []
    for stage in status.stages:
        by_reason: dict[tuple[str, str], list[str]] = {}
        for unit, (state, reason) in stage.units.items():
            if state != "done":
                by_reason.setdefault((state, reason), []).append(unit)
        for (state, reason), ids in sorted(by_reason.items()):
            what = {
                "failed": "failed",
                "damaged": "has damaged products",
                "stale": "is out of date",
                "missing": "has not run",
                "orphan": "has products outside the stretch plan",
            }.get(state, state)
            because = f": {reason}" if reason else ""
            lines.append(f"Stage {stage.name} {what} for {format_ids(ids)}{because}.")
        for unit, problems in stage.problems.items():
            lines.extend(f"Stage {stage.name} ({unit}) reported: {p}" for p in problems)
    if status.lock is not None:
        lines.append(f"Run lock: {status.lock}.")
    return lines


def summary_rows(products: Mapping[str, Any], status: Any | None = None) -> list[tuple[str, str]]:
    """The summary table: ``(label, value)`` rows, absent products said in words.

    Parameters
    ----------
    products : mapping
        The night's products by key (see :func:`pipeline.report.collect_products`).
    status : pipeline.runner.NightStatus, optional
        For the counts of stretches, failures and problems.
    """
    rows: list[tuple[str, str]] = []
    index = products.get("block_index")
    if index is not None:
        seconds = float(np.sum(np.asarray(index["n_rows"]) * np.asarray(index["line_time"])))
        rows.append(("blocks", str(len(index))))
        rows.append(("gaps", str(_gaps(index))))
        rows.append(("hours of usable data", f"{seconds / 3600:.2f} h ({seconds:.0f} s)"))
    else:
        rows.append(("blocks", "not available (no block index: ingest has not run)"))
    ingest = products.get("ingest_report")
    if ingest is not None:
        rows.append(("rejected raw files", str(len(ingest.get("rejected", [])))))
    if status is not None:
        rows.append(
            ("stretches", "none planned" if status.n_stretches is None else str(status.n_stretches))
        )
        n_problems = sum(len(p) for s in status.stages for p in s.problems.values())
        rows.append(
            (
                "problems and failures",
                f"{_plural(status.count('failed'), 'failed unit')}, "
                f"{_plural(status.count('damaged'), 'damaged unit')}, "
                f"{_plural(n_problems, 'reported problem')}",
            )
        )
    catalog = products.get("catalog")
    if catalog is not None:
        flagged = int(np.sum(np.asarray(catalog["flags"]) != 0))
        rows.append(("sources", f"{len(catalog)} ({flagged} flagged)"))
    else:
        rows.append(("sources", "not available (no detect catalogue)"))
    seeing = products.get("seeing")
    if seeing is not None and np.isfinite(np.asarray(seeing["fwhm"], float)).any():
        median = float(np.nanmedian(np.asarray(seeing["fwhm"], float)))
        scale = products.get("pixel_scale")
        arcsec = f" = {median * scale:.2f} arcsec" if scale else ""
        rows.append(("median seeing FWHM", f"{median:.2f} pix{arcsec}"))
    for label, stage in PENDING_ROWS:
        if products.get(label) is None:
            rows.append((label, f"not available (no {stage} products yet)"))
        else:
            rows.append((label, str(products[label])))
    return rows
