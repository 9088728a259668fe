"""The nightly batch (``zdrift nightly``): two small simulated nights, one broken.

The nights are written by the simulator (:func:`pipeline.simulate.simulate_to_folders`,
one folder per night named by its date).  The quick test runs the real
``ingest`` stage and the report (the report's other inputs are optional and
absent, as in a pipeline where they are not configured); the slow one runs
the whole stage graph.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import yaml

import pipeline.stages
from pipeline.cli import main
from pipeline.config import load_config, night_config
from pipeline.runner import NIGHT_CONFIG_NAME, open_product
from pipeline.simulate import simulate_to_folders

#: The site file of the fictional station: everything but the night.
SITE = {
    "night": {"output_dir": "products", "pattern": "*.fits*"},
    "site": {"name": "Fictional Ridge", "latitude": 31.0, "longitude": -105.0, "height": 2200},
    "camera": {"n_columns": 64, "tdi_rows": 64, "pixel_size": 15, "focal_length": 3.5},
    "run": {"stretch_rows": 256, "overlap_rows": 16, "executor": "serial"},
}
#: mag: the report's sky level and pixel area against the simulator's sky, both
#: with the simulator's zero point.  Measured +0.007 mag on the slow test's night;
#: 0.02 mag leaves room for another seed and still names a 2 % error in the
#: sky level or the pixel area (a plane instead of a sky area is 0.27 mag here).
SKY_LEVEL_TOLERANCE = 0.02
#: mag: the same with the night's solved zero point, which on that undersampled
#: night (0.88 arcsec pixels) comes out 0.043 to 0.051 mag above the simulator's
#: 27.8 (the zeropoint stage's business); 0.08 covers it and the sky level's 0.02.
SKY_TOLERANCE = 0.08
#: Two nights of one strip, a sidereal day apart, 2 blocks of 128 rows each.
SIMULATE = {
    "start": "2026-10-15T05:00:00",
    "n_blocks": 2,
    "block_rows": 128,
    "overscan_columns": 8,
    "nights": [{"days": 1}],
}


def _nights(tmp_path: Path, site: dict, simulate: dict) -> tuple[Path, Path, list[Path]]:
    """The site file, the raw folder and the night folders of a simulated pair of nights."""
    site_file = tmp_path / "site.yaml"
    site_file.write_text(yaml.safe_dump(site))
    data = {**site, "night": {**site["night"], "name": "sim", "raw_dir": "raw"}}
    config_file = tmp_path / "simulate.yaml"
    config_file.write_text(yaml.safe_dump({**data, "simulate": simulate}))
    config = load_config(config_file)
    written = simulate_to_folders(
        config.site(), config.camera(), config.section("simulate"), tmp_path / "raw"
    )
    config_file.unlink()
    return site_file, tmp_path / "raw", [folder for _, folder, _ in written]


def _break(folder: Path) -> None:
    """Make every raw block of a night unusable: a copy cut off before its first row.

    (A copy cut later keeps its whole rows: a gzip stream cut after 2880 bytes
    holds the header and a few rows.)
    """
    for path in folder.glob("*.fits*"):
        path.write_bytes(path.read_bytes()[: 200 if path.suffix == ".gz" else 2880])


@pytest.fixture
def ingest_and_report(monkeypatch: pytest.MonkeyPatch) -> None:
    graph = {stage.name: stage for stage in pipeline.stages.GRAPH}
    monkeypatch.setattr(pipeline.stages, "GRAPH", (graph["ingest"], graph["report"]))


def _lines(capsys) -> dict[str, str]:
    out = capsys.readouterr().out
    return dict(line.split(": ", 1) for line in out.strip().splitlines())


def test_nightly_reduces_new_nights_and_says_which_failed(
    tmp_path: Path, capsys, ingest_and_report
) -> None:
    site_file, raw, (good, bad) = _nights(tmp_path, SITE, SIMULATE)
    assert (good.name, bad.name) == ("2026-10-15", "2026-10-16")
    _break(bad)
    (raw / ".partial").mkdir()  # hidden: not a night
    (raw / "2026-10-17").mkdir()  # no raw file yet: skipped, not a failure

    assert main(["nightly", str(site_file), str(raw)]) == 1
    lines = _lines(capsys)
    assert list(lines) == ["2026-10-15", "2026-10-16", "2026-10-17"]
    products = tmp_path / "products"
    page = products / "2026-10-15" / "report" / "night" / "page.html"
    assert lines["2026-10-15"].startswith("done (2 units ran, 0 failed, 0 blocked, 0 problem(s))")
    assert lines["2026-10-15"].endswith(f"; report: {page}")
    assert lines["2026-10-16"].startswith("problems (")
    bad_page = products / "2026-10-16" / "report" / "night" / "page.html"
    assert lines["2026-10-16"].endswith(f"; report: {bad_page}")  # a page all the same
    assert "Stage ingest" in bad_page.read_text(encoding="utf-8")
    assert lines["2026-10-17"].startswith("skipped (no file matches")

    # The next morning nothing is new: both nights are left alone (the broken
    # one's problems are recalled, but the exit status is about this run).
    mtime = page.stat().st_mtime_ns
    assert main(["nightly", str(site_file), str(raw)]) == 0
    lines = _lines(capsys)
    assert lines["2026-10-15"] == f"up to date; report: {page}"
    assert page.stat().st_mtime_ns == mtime
    assert (
        lines["2026-10-16"] == f"up to date (2 problem(s) reported when it ran); report: {bad_page}"
    )

    # New raw files (the broken night copied again) make the night new: it is redone.
    for path in bad.glob("*.fits*"):
        path.unlink()
    for path in good.glob("*.fits*"):
        (bad / path.name).write_bytes(path.read_bytes())
    assert main(["nightly", str(site_file), str(raw)]) == 0
    assert _lines(capsys)["2026-10-16"].startswith("done (")
    assert main(["nightly", str(site_file), str(raw)]) == 0
    assert all(line.startswith(("up to date", "skipped")) for line in _lines(capsys).values())


def test_a_config_beside_the_data_wins_and_a_bad_one_is_a_failed_night(
    tmp_path: Path, capsys, ingest_and_report
) -> None:
    site_file, raw, (good, bad) = _nights(tmp_path, SITE, SIMULATE)
    own = {**SITE, "night": {"name": "renamed", "raw_dir": ".", "output_dir": "../../own"}}
    (good / NIGHT_CONFIG_NAME).write_text(yaml.safe_dump(own))
    (bad / NIGHT_CONFIG_NAME).write_text("night: {name: [not, a, name]}\n")
    assert main(["nightly", str(site_file), str(raw)]) == 1
    lines = _lines(capsys)
    assert lines["renamed"].startswith("done (")
    assert (tmp_path / "own" / "renamed" / "report" / "night" / "page.html").is_file()
    assert lines["2026-10-16"].startswith("failed (config: ")


def test_nightly_usage_errors(tmp_path: Path, capsys) -> None:
    assert main(["nightly", str(tmp_path / "site.yaml"), str(tmp_path / "nowhere")]) == 2
    assert "is not a folder" in capsys.readouterr().err


@pytest.mark.slow
def test_nightly_takes_simulated_nights_through_every_stage(tmp_path: Path, capsys) -> None:
    """The whole graph: the good night's page has every figure, the broken one a page too."""
    site = {
        **SITE,
        "camera": {"n_columns": 256, "tdi_rows": 256, "pixel_size": 15, "focal_length": 3.5},
        "run": {"stretch_rows": 512, "overlap_rows": 32, "workers": 2},
        "stages": {
            "column_stats": {"block_rows": 64},
            "astrometry": {  # the simulator's reference catalogue of the strip (both nights')
                "reference": {
                    "source": "file",
                    "path": "raw/2026-10-15/reference.ecsv",
                    "columns": {"pm_ra": "pmra", "pm_dec": "pmdec"},
                }
            },
        },
    }
    # A steady sky (no twilight ramp, no cloud) of known surface brightness.
    sky = {"sky_brightness": 20.8, "sky_ramp": 0.0, "cloud_depth": 0.0}
    simulate = {**SIMULATE, "n_blocks": 4, "block_rows": 256, "overscan_columns": 16, "sky": sky}
    site_file, raw, (good, bad) = _nights(tmp_path, site, simulate)
    _break(bad)
    assert main(["nightly", str(site_file), str(raw)]) == 1
    lines = _lines(capsys)
    # The tiny night may report the star flat's problems (a 256-column night
    # whose sky is too flat for the column solve), never failures.
    assert ", 0 failed, 0 blocked," in lines[good.name], lines
    assert lines[bad.name].startswith("problems (")
    page = (tmp_path / "products" / good.name / "report" / "night" / "page.html").read_text()
    assert page.count("Not drawn") == 0
    for anchor in ("zero_point", "star_flat", "residual_map", "residual_night", "focal_length"):
        assert f'<h2 id="{anchor}">' in page
    # Self-consistency with the simulator: the sky brightness the report
    # measures is the one the simulator put in (columns with data only: the
    # first 256 night columns of the rectified strip hold none).
    measured = open_product(night_config(site_file, good.name, good), "report", product="sky")
    assert measured.meta["solved"]
    has_data = np.isfinite(np.asarray(measured["sky_brightness"]))
    assert has_data.sum() >= 8
    sky_mag = np.asarray(measured["sky_brightness"])[has_data]
    zero_point = np.asarray(measured["zero_point"])[has_data]
    # With the simulator's zero point (27.8 mag for 1 e-/s) the report's own
    # part (sky level per second, pixel area on the sky) is checked alone.
    np.testing.assert_allclose(sky_mag - zero_point + 27.8, 20.8, atol=SKY_LEVEL_TOLERANCE)
    np.testing.assert_allclose(sky_mag, 20.8, atol=SKY_TOLERANCE)
    broken = (tmp_path / "products" / bad.name / "report" / "night" / "page.html").read_text()
    assert "Stage ingest (night) reported: rejected" in broken
    # The next morning the good night is left alone; the broken one stays
    # incomplete (its per-stretch stages are blocked without a block index), so
    # it is tried again, runs nothing and is reported again.
    assert main(["nightly", str(site_file), str(raw)]) == 1
    lines = _lines(capsys)
    assert lines[good.name].startswith("up to date")
    assert lines[bad.name].startswith("problems (0 units ran, 0 failed, ")
