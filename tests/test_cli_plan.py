"""The ``zdrift plan`` command on the demo site and camera."""

from pathlib import Path

import pytest

from pipeline.cli import main
from pipeline.geometry.optics import focal_length_from_spin, normal_gravity

DEMO = Path(__file__).parent.parent / "configs" / "simulate_demo.yaml"


def _value(text, label):
    line = next(line for line in text.splitlines() if line.strip().startswith(label))
    return float(line[len(line) - len(line.lstrip()) + len(label) :].split()[0])


def test_plan_reports_spin_error_consequences(capsys):
    assert main(["plan", str(DEMO), "--spin-error", "0.001"]) == 0
    out = capsys.readouterr().out
    # df/f = 2 dT/T: differentiate f = g T^2 / (8 pi^2) (Borra et al. 1990, SPIE 1236,
    # f = g / 2 w^2; CHECK_VALUES row 10).  Demo mirror: T = 6.953115 s.
    g = normal_gravity(41.65, 1350.0)
    f = focal_length_from_spin(6.953115, g)
    expected_mm = 1e3 * f * 2 * 0.001 / 6.953115
    assert _value(out, "focal length error") == pytest.approx(expected_mm, rel=1e-3)
    # A longer focal length makes the drift faster in pixels, so the matched
    # line time shrinks by the same fraction; over 4096 rows the mismatch is
    # 4096 * df/f rows of smear (DESIGN.md section 4, rate-error smear).
    line_time_ms = _value(out, "line time ")
    assert _value(out, "line time error") == pytest.approx(
        -1e3 * line_time_ms * 2 * 0.001 / 6.953115, rel=1e-3
    )
    assert _value(out, "smear over 4096 rows") == pytest.approx(
        4096 * 2 * 0.001 / 6.953115, rel=1e-3
    )


def test_plan_rejects_bad_epoch(capsys):
    assert main(["plan", str(DEMO), "--epoch", "not-a-time"]) == 2
    assert "--epoch" in capsys.readouterr().err
