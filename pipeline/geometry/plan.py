"""What a site and camera imply: focal length, scale, line time, smear and bow.

:func:`summarize_plan` returns plain numbers (for a report or a test);
:func:`format_plan` turns them into text with a unit on every line.
"""

from __future__ import annotations

import numpy as np
from astropy.time import Time

from pipeline.geometry.instrument import Camera, Site
from pipeline.geometry.optics import (
    EARTH_ROTATION_RATE,
    normal_gravity,
    plate_scale,
    refraction_constant,
    resolve_focal_length,
    spin_period_from_focal_length,
)
from pipeline.geometry.sitetime import site_pressure
from pipeline.geometry.tdi import TDIModel, first_order_bow, first_order_smear

__all__ = ["DEFAULT_PLAN_EPOCH", "format_plan", "summarize_plan"]

#: Epoch used when :func:`summarize_plan` is given none.  Inside the bundled
#: IERS tables; the results depend on it only through aberration (~1e-4).
DEFAULT_PLAN_EPOCH = "2026-01-01T00:00:00"


def _track_shape(model: TDIModel, column_offset: float) -> dict[str, float]:
    """Exact slip, sagitta and centroid offset of the track through a column offset."""
    ra, dec = model.sky_from_focal_plane(
        model.n_rows / 2.0,
        (model.camera.n_columns - 1) / 2.0 + column_offset,
        model.duration / 2.0,
    )
    shape = model.track_shape(ra, dec)
    return {
        "slip_px": float(shape.slip[0]),
        "sagitta_px": float(shape.sagitta[0]),
        "centroid_offset_px": float(shape.centroid_offset[0]),
    }


def _cross_scan_drift(model: TDIModel) -> float:
    """Exact column change of the chip-centre star from entry to exit, pixels.

    Zero for rows that run along the drift; a turned camera
    (``camera.rotation`` ``a``) makes a star drift across the columns by
    about ``-N tan(a)`` over its crossing (towards decreasing column for a
    positive angle, see :class:`~pipeline.geometry.instrument.Camera`): a
    cross-scan smear no rectification undoes.  The bow's ends lie at one
    column, so it does not enter.
    """
    ra, dec = model.sky_from_focal_plane(
        model.n_rows / 2.0, (model.camera.n_columns - 1) / 2.0, model.duration / 2.0
    )
    n = 65  # samples at the midpoints of equal steps: the ends are 1/(2n) in
    c = model.track(ra, dec, n_samples=n).c[0]
    return float((c[-1] - c[0]) * n / (n - 1))


def summarize_plan(
    site: Site,
    camera: Camera,
    *,
    spin_period_error_s: float | None = None,
    start: Time | None = None,
) -> dict:
    """Key numbers of a site and camera for planning or checking a set-up.

    Parameters
    ----------
    site : Site
        The site.
    camera : Camera
        The camera (``focal_length`` or ``spin_period``).
    spin_period_error_s : float or None, optional
        An error in the mirror's spin period, seconds; reports the line-time
        error and smear it causes (``df/f = -2 dw/w = 2 dT/T``).
    start : `~astropy.time.Time` or None, optional
        Epoch for the exact model; default :data:`DEFAULT_PLAN_EPOCH`.

    Returns
    -------
    summary : dict
        Keys (units in the names): ``latitude_deg``, ``gravity_m_s2``,
        ``focal_length_m``, ``spin_period_s``, ``focal_length_source``,
        ``pixel_angle_rad``, ``plate_scale_arcsec``, ``sky_pixel_scale_arcsec``,
        ``pressure_hpa``, ``refraction_ppm``, ``line_time_s`` (exact, matched
        unless the camera fixes it), ``line_time_first_order_s``,
        ``crossing_time_s``, ``drift_arcsec_s``, ``n_rows``, ``n_columns``,
        ``edges`` (``{'north': {...}, 'south': {...}}`` with exact
        ``slip_px``, ``sagitta_px``, ``centroid_offset_px`` and first-order
        ``slip_first_order_px``, ``sagitta_first_order_px``),
        ``centre_sagitta_px``, ``cross_scan_drift_px`` (the chip-centre
        star's column change over its crossing: the camera rotation's
        cross-scan smear), ``line_time_smear_px`` (``N (dt / dt_matched -
        1)`` rows of along-scan smear from the configured line time, 0 when
        it is the matched one), and, with ``spin_period_error_s``,
        ``spin_period_error_s``, ``focal_length_error_m``,
        ``line_time_error_s``, ``spin_error_smear_px``.
    """
    start = Time(DEFAULT_PLAN_EPOCH, scale="utc") if start is None else start
    gravity = float(normal_gravity(site.latitude, site.height))
    focal = resolve_focal_length(site, camera)
    spin = (
        float(camera.spin_period)
        if camera.spin_period is not None
        else float(spin_period_from_focal_length(focal, gravity))
    )
    p = camera.pixel_size * 1e-6 / focal
    pressure = site_pressure(site)
    k_refr = float(
        refraction_constant(pressure, site.temperature, site.relative_humidity, site.wavelength)
    )
    phi = np.radians(site.latitude)
    first_line = p / (EARTH_ROTATION_RATE * np.cos(phi) * (1.0 - k_refr))
    model = TDIModel(site, camera, start, 0.0)
    scale = float(plate_scale(camera.pixel_size, focal))
    n = camera.tdi_rows
    half = camera.n_columns / 2.0
    edges = {}
    for name, offset in (("north", half), ("south", -half)):
        shape = _track_shape(model, offset)
        shape["slip_first_order_px"] = float(first_order_smear(site.latitude, offset, n, scale))
        shape["sagitta_first_order_px"] = float(first_order_bow(site.latitude, n, scale, offset))
        edges[name] = shape
    summary = {
        "site": site.name,
        "camera": camera.name,
        "epoch": start.isot,
        "latitude_deg": site.latitude,
        "gravity_m_s2": gravity,
        "focal_length_m": focal,
        "focal_length_source": "focal_length" if camera.focal_length is not None else "spin_period",
        "spin_period_s": spin,
        "pixel_angle_rad": p,
        "plate_scale_arcsec": scale,
        "sky_pixel_scale_arcsec": model.pixel_scale,
        "pressure_hpa": pressure,
        "refraction_ppm": k_refr * 1e6,
        "line_time_s": model.line_time,
        "matched_line_time_s": model.matched_line_time,
        "line_time_first_order_s": float(first_line),
        "crossing_time_s": model.crossing_time,
        "drift_arcsec_s": model.drift_rate * model.pixel_scale,
        "n_rows": n,
        "n_columns": camera.n_columns,
        "edges": edges,
        "centre_sagitta_px": _track_shape(model, 0.0)["sagitta_px"],
        "cross_scan_drift_px": _cross_scan_drift(model),
        # a rate mismatch accumulates one relative error per row (DESIGN.md section 4)
        "line_time_smear_px": n * (model.line_time / model.matched_line_time - 1.0),
    }
    if spin_period_error_s is not None:
        rel_f = 2.0 * spin_period_error_s / spin  # df/f = -2 dw/w = +2 dT/T
        summary.update(
            spin_period_error_s=float(spin_period_error_s),
            focal_length_error_m=focal * rel_f,
            # the drift in pixels scales with f: a clock set for the nominal f
            # is wrong by -df/f of the line time
            line_time_error_s=-model.matched_line_time * rel_f,
            spin_error_smear_px=n * abs(rel_f),
        )
    return summary


def format_plan(summary: dict) -> str:
    """Human-readable text of :func:`summarize_plan`'s result, one quantity a line."""
    s = summary
    rows = [
        ("latitude", f"{s['latitude_deg']:.5f} deg"),
        ("normal gravity", f"{s['gravity_m_s2']:.6f} m/s^2 (WGS84)"),
        ("focal length", f"{s['focal_length_m']:.5f} m (from {s['focal_length_source']})"),
        ("spin period", f"{s['spin_period_s']:.5f} s (f = g / (2 w^2), w = 2 pi / T)"),
        ("plate scale (geometric)", f"{s['plate_scale_arcsec']:.5f} arcsec/px"),
        ("plate scale (on sky)", f"{s['sky_pixel_scale_arcsec']:.5f} arcsec/px (with refraction)"),
        ("pressure", f"{s['pressure_hpa']:.1f} hPa"),
        ("refraction scale compression", f"{s['refraction_ppm']:.1f} ppm"),
        ("line time", f"{s['line_time_s'] * 1e3:.6f} ms"),
        ("matched line time", f"{s['matched_line_time_s'] * 1e3:.6f} ms"),
        ("  first order", f"{s['line_time_first_order_s'] * 1e3:.6f} ms"),
        ("drift at chip centre", f"{s['drift_arcsec_s']:.5f} arcsec/s"),
        ("crossing time (exposure)", f"{s['crossing_time_s']:.3f} s over {s['n_rows']} rows"),
    ]
    for name in ("north", "south"):
        e = s["edges"][name]
        rows += [
            (f"{name} edge along-scan slip", f"{e['slip_px']:+.3f} px (+ = ahead of packet)"),
            ("  first order", f"{e['slip_first_order_px']:+.3f} px"),
            (f"{name} edge cross-scan sagitta", f"{e['sagitta_px']:+.4f} px (+ = ends north)"),
            ("  first order", f"{e['sagitta_first_order_px']:+.4f} px"),
            (f"{name} edge centroid offset", f"{e['centroid_offset_px']:+.4f} px cross-scan"),
        ]
    rows.append(("centre track sagitta", f"{s['centre_sagitta_px']:+.4f} px"))
    rows.append(
        ("cross-scan drift (rotation)", f"{s['cross_scan_drift_px']:+.3f} px over the crossing")
    )
    rows.append(
        (
            "line-time smear",
            f"{s['line_time_smear_px']:+.3f} px over {s['n_rows']} rows (line time vs matched)",
        )
    )
    if "spin_period_error_s" in s:
        rows += [
            ("spin period error", f"{s['spin_period_error_s']:+.6f} s"),
            ("  focal length error", f"{s['focal_length_error_m'] * 1e3:+.4f} mm"),
            ("  line time error", f"{s['line_time_error_s'] * 1e6:+.4f} us"),
            (f"  smear over {s['n_rows']} rows", f"{s['spin_error_smear_px']:.4f} px"),
        ]
    head = f"site {s['site']!r}, camera {s['camera']!r}, epoch {s['epoch']}"
    return "\n".join([head] + [f"{label:<32}{value}" for label, value in rows])
