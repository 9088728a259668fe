"""The page's words: the summary table and the problems, from products and the night's status."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

__all__ = ["data_seconds", "problem_lines", "segment_clock_text", "solved_rows", "summary_rows"]


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


def data_seconds(index: Any, no_data_rows: np.ndarray | None) -> tuple[float, int]:
    """Seconds of rows with data: the blocks' rows less those without data.

    Parameters
    ----------
    index : astropy.table.Table
        The block index (``row_start``, ``n_rows``, ``line_time``).
    no_data_rows : ndarray of int or None
        Night rows the blocks cover that hold no data (readout dropouts,
        NaN-filled rows: :func:`pipeline.report._collect.rows_without_data`);
        None when calibrate's products are not there.

    Returns
    -------
    seconds : float
        One line time for every row a block holds, less those without data.
    n_without : int
        Rows left out.
    """
    order = np.argsort(np.asarray(index["row_start"]), kind="stable")
    start = np.asarray(index["row_start"], dtype=np.int64)[order]
    n_rows = np.asarray(index["n_rows"], dtype=np.int64)[order]
    line_time = np.asarray(index["line_time"], dtype=float)[order]
    seconds = float(np.sum(n_rows * line_time))
    rows = np.asarray([] if no_data_rows is None else no_data_rows, dtype=np.int64)
    # The block holding each row (where blocks overlap, the later one, as read).
    block = np.searchsorted(start, rows, side="right") - 1
    inside = (block >= 0) & (rows < start[np.maximum(block, 0)] + n_rows[np.maximum(block, 0)])
    return seconds - float(np.sum(line_time[block[inside]])), int(np.count_nonzero(inside))


def problem_lines(status: Any) -> list[str]:
    """What went wrong in the run, one sentence per problem.

    Parameters
    ----------
    status : dict
        The report stage's ``run_status`` input
        (:data:`pipeline.stages.base.RUN_STATUS`): ``stages``, each with
        ``name``, ``units`` (unit -> [state, reason]) and ``problems``.

    Returns
    -------
    list of str
        Failed, damaged and stale units with their reasons, problems the
        stages reported with their input, and stages with missing products.
    """
    from pipeline.runner import format_ids

    lines = []
    for stage in status["stages"]:
        by_reason: dict[tuple[str, str], list[str]] = {}
        for unit, (state, reason) in stage["units"].items():
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
            lines.append(f"Stage {stage['name']} {what} for {format_ids(ids)}{because}.")
        for unit, problems in stage["problems"].items():
            lines.extend(f"Stage {stage['name']} ({unit}) reported: {p}" for p in problems)
    return lines


def _count(status: Mapping[str, Any], state: str) -> int:
    return sum(s == state for stage in status["stages"] for s, _ in stage["units"].values())


def _error_text(value: float, error: float) -> str:
    return f"{value:.6g} +- {error:.2g}" if np.isfinite(error) else f"{value:.6g}"


def segment_clock_text(records: list[dict]) -> str | None:
    """The summary's words for the clock of each segment after a gap, or None.

    Parameters
    ----------
    records : list of dict
        The astrometry parameters' ``meta['segment_clocks']`` (one per
        segment: ``offset_ms``, ``offset_err_ms``, ``ra_mas``, ``ra_err_mas``,
        ``fitted``, ``note``...).

    Returns
    -------
    str or None
        One clause per segment; None for a night of one segment.
    """
    if len(records) < 2:
        return None
    parts = []
    for r in records:
        where = f"segment {r['segment']} (rows {r['rows'][0]}-{r['rows'][1] - 1})"
        if r["fitted"]:
            parts.append(
                f"{where}: {r['offset_ms']:+.2f} +- {r['offset_err_ms']:.2f} ms "
                f"({r['ra_mas']:+.1f} +- {r['ra_err_mas']:.1f} mas in RA), {r['note']}"
            )
        else:
            parts.append(f"{where}: {r['note']}")
    return "; ".join(parts)


def cloud_text(meta: Mapping[str, Any]) -> str | None:
    """What astrometry made of the sky's transparency, in words; None if not recorded.

    From the parameters' ``cloud_depth``, ``cloud_significance``,
    ``light_weighted`` and ``light_weighting_floor_px`` (the common error
    each fit left the reference stars, when both were made), and the
    stretches whose positions' errors got an extra error
    (``stretch_extra_error_px``).
    """
    depth, significance = meta.get("cloud_depth"), meta.get("cloud_significance")
    if depth is None or significance is None:
        return None
    seen = f"deepest loss {100.0 * float(depth):.0f} % ({float(significance):.1f} sigma)"
    floors = meta.get("light_weighting_floor_px")
    if meta.get("light_weighted"):
        decision = "centroids weighted by the light"
        if floors:
            decision += (
                f" (reference stars' common error {floors['light_weighted']:.4f} px, "
                f"against {floors['time_means']:.4f} for time means)"
            )
    elif floors:
        decision = (
            "time means kept: the reference stars followed them better "
            f"(common error {floors['time_means']:.4f} px, against "
            f"{floors['light_weighted']:.4f} weighted by the light)"
        )
    else:
        decision = "taken for a clear sky (time means)"
    extra = meta.get("stretch_extra_error_px") or {}
    if extra:
        decision += "; positions' errors widened in " + ", ".join(
            f"{name} (+{along:.4f} / +{across:.4f} px along / across the scan)"
            for name, (along, across) in extra.items()
        )
    return f"{seen}: {decision}"


def solved_rows(products: Mapping[str, Any]) -> list[tuple[str, str]]:
    """Summary rows of the solved products (astrometry, zero point), or why they are absent."""
    from pipeline.report._solved import (
        fitted_parameter,
        line_time_check,
        line_time_text,
        nominal_focal_length_label,
    )

    rows = []
    parameters = products.get("astrometry_parameters")
    if parameters is None:
        absent = "not available (no astrometry products)"
        rows += [("matched reference stars", absent), ("solved parameters", absent)]
    else:
        meta = parameters.meta
        rows.append(("matched reference stars", str(meta.get("n_matched", "not recorded"))))
        fitted = "; ".join(
            f"{row['name']} = {_error_text(float(row['value']), float(row['error']))}"
            + ("" if str(row["unit"]) in ("", "--") else f" {row['unit']}")
            for row in parameters
        )
        chi2 = meta.get("chi2_reduced")
        rows.append(
            ("solved parameters", fitted + ("" if chi2 is None else f"; reduced chi2 {chi2:.2f}"))
        )
        clocks = segment_clock_text(meta.get("segment_clocks") or [])
        if clocks is not None:
            rows.append(("segment clocks (relative to the night's)", clocks))
        cloud = cloud_text(meta)
        if cloud is not None:
            rows.append(("cloud (astrometry)", cloud))
        if "focal_length_m" in meta and "focal_length_from_spin_m" in meta:
            fit, spin = float(meta["focal_length_m"]), float(meta["focal_length_from_spin_m"])
            # fitted = nominal * (1 + focal_scale): the difference's error is
            # the nominal focal length times the scale's
            scale = fitted_parameter(parameters, "focal_scale")
            error = "" if scale is None else f" +- {1e6 * spin * scale[1]:.0f}"
            rows.append(
                (
                    "focal length",
                    f"{fit:.5f} m fitted, {spin:.5f} m {nominal_focal_length_label(meta)} "
                    f"({1e6 * (fit - spin):+.0f}{error} um)",
                )
            )
        tdi_rows = products.get("tdi_rows")
        if tdi_rows and "line_time_s" in meta and "matched_line_time_s" in meta:
            check = line_time_check(meta, tdi_rows)
            rows.append(("line-time error", line_time_text(check, tdi_rows)))
    intervals = products.get("zp_intervals")
    if intervals is None:
        rows.append(("zero point", "not available (no zeropoint products)"))
    else:
        clear = intervals.meta.get("clear_level_mag")
        flagged = int(np.count_nonzero(np.asarray(intervals["flags"])))
        level = "" if clear is None else f"clear level {float(clear):.3f} mag (1 e-/s), "
        rows.append(("zero point", f"{level}{flagged} of {len(intervals)} stretches flagged"))
    return rows


def summary_rows(products: Mapping[str, Any], status: Any | None = None) -> list[tuple[str, str]]:
    """The summary table: ``(label, value)`` rows, absent products said in words.

    Parameters
    ----------
    products : mapping
        The night's products by key (see :func:`pipeline.report.collect_products`).
    status : dict, optional
        The ``run_status`` input, for the counts of stretches, failures and
        problems.
    """
    rows: list[tuple[str, str]] = []
    index = products.get("block_index")
    if index is not None:
        seconds, without = data_seconds(index, products.get("no_data_rows"))
        rows.append(("blocks", str(len(index))))
        rows.append(("gaps", str(_gaps(index))))
        left_out = f"; {_plural(without, 'row')} without data left out" if without else ""
        rows.append(("hours of usable data", f"{seconds / 3600:.2f} h ({seconds:.0f} s{left_out})"))
    else:
        rows.append(("blocks", "not available (no block index: ingest has not run)"))
    ingest = products.get("ingest_report")
    if ingest is not None:
        rows.append(("rejected raw files", str(len(ingest.get("rejected", [])))))
    if status is not None:
        n_stretches = status["n_stretches"]
        rows.append(("stretches", "none planned" if n_stretches is None else str(n_stretches)))
        n_problems = sum(len(p) for s in status["stages"] for p in s["problems"].values())
        counts = [
            _plural(_count(status, "failed"), "failed unit"),
            _plural(_count(status, "damaged"), "damaged unit"),
        ]
        # the units the page's problems name besides those (its lines tally)
        n_stale, n_missing = _count(status, "stale"), _count(status, "missing")
        if n_stale:
            counts.append(_plural(n_stale, "out-of-date unit"))
        if n_missing:
            counts.append(f"{n_missing} unit{'' if n_missing == 1 else 's'} not run")
        counts.append(_plural(n_problems, "reported problem"))
        rows.append(("problems and failures", ", ".join(counts)))
    catalog = products.get("catalog")
    if catalog is not None:
        flagged = int(np.sum(np.asarray(catalog["flags"]) != 0))
        passes = int(catalog.meta.get("astrometry_passes", 1))
        again = f", as astrometry's pass {passes} measured them" if passes > 1 else ""
        rows.append(("sources", f"{len(catalog)} ({flagged} flagged{again})"))
    else:
        rows.append(("sources", "not available (no detect catalogue)"))
    seeing = products.get("seeing")
    if seeing is not None and np.isfinite(np.asarray(seeing["fwhm"], float)).any():
        median = float(np.nanmedian(np.asarray(seeing["fwhm"], float)))
        scale = products.get("pixel_scale")
        arcsec = f" = {median * scale:.2f} arcsec" if scale else ""
        rows.append(("median seeing FWHM", f"{median:.2f} pix{arcsec}"))
    return rows + solved_rows(products)
