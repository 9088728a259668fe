"""``zdrift run MOSAIC.yaml``: the listed nights, the tiles and the page across the nights."""

from __future__ import annotations

import threading
from pathlib import Path

import pytest
import yaml
from test_mosaic_run import DETECT, tiling

from pipeline.cli import EXIT_OK, EXIT_USAGE, main
from pipeline.mosaic import load_mosaic_config
from pipeline.runner import RunReport, _strip, nights_page
from pipeline.runner._store import output_hash, write_products, write_sidecar
from tests._mosaic_nights import write_nights

NIGHT = """\
night: {{name: {name}, raw_dir: raw, output_dir: out}}
site: {{name: Fictional Ridge, latitude: 31.0, longitude: -105.0, height: 2200}}
camera: {{n_columns: 256, tdi_rows: 256, pixel_size: 15, focal_length: 3.5}}
run: {{executor: {executor}, workers: 2}}
"""


def _mosaic(folder: Path, nights: list[str]) -> Path:
    data = {
        "mosaic": {"name": "strip", "output_dir": "mosaics", "nights": nights},
        "tiling": tiling(),
        "detect": DETECT,
        "run": {"executor": "serial"},
    }
    path = folder / "mosaic.yaml"
    path.write_text(yaml.safe_dump(data, sort_keys=False))
    return path


def test_run_on_a_mosaic_of_product_folders_builds_the_tiles_and_the_page(tmp_path, capsys):
    folders = write_nights(tmp_path / "products")
    path = _mosaic(tmp_path, [str(p) for p in folders])
    assert main(["run", str(path)]) == EXIT_OK, capsys.readouterr()
    out = capsys.readouterr().out
    page = nights_page(load_mosaic_config(path))
    assert "mosaic strip: 3 ran, 0 up to date, 0 failed, 0 blocked" in out, out
    assert f"across the nights: {page}" in out
    assert page.read_text().startswith("<!DOCTYPE html>")
    # Product folders are co-added as they are: no night is reduced.
    assert "night " not in out
    assert main(["run", str(path)]) == EXIT_OK
    assert "mosaic strip: 0 ran, 3 up to date" in capsys.readouterr().out


def test_a_product_folder_has_its_row_on_the_page_across_the_nights(tmp_path, capsys):
    folders = write_nights(tmp_path / "products")
    # the first folder's night was reduced in full once: its report unit is there
    unit_dir = folders[0] / "report" / "night"
    summary = [["stars detected", "1234"]]
    entries = write_products(unit_dir, {"summary": summary, "page": "<html></html>"}, {})
    record = {"stage": "report", "unit": "night", "night": folders[0].name, "products": entries}
    write_sidecar(unit_dir, {**record, "output_hash": output_hash(entries)})
    path = _mosaic(tmp_path, [str(p) for p in folders])
    assert main(["run", str(path)]) == EXIT_OK, capsys.readouterr()
    text = nights_page(load_mosaic_config(path)).read_text()
    for folder in folders:  # a row per night, named as the mosaic names it
        assert f">{folder.name}</" in text
    link = Path("..", "..", "..", "products", folders[0].name, "report", "night", "page.html")
    assert f'<a href="{link.as_posix()}">{folders[0].name}</a>' in text
    assert "<th>stars detected</th>" in text and "<td>1234</td>" in text


def test_the_page_across_the_nights_is_drawn_again_only_when_what_it_shows_changed(
    tmp_path, capsys, monkeypatch
):
    folders = write_nights(tmp_path / "products")
    path = _mosaic(tmp_path, [str(p) for p in folders])
    assert main(["run", str(path)]) == EXIT_OK, capsys.readouterr()
    page = nights_page(load_mosaic_config(path))
    first = page.read_bytes()
    drawn = []
    import pipeline.report as report

    real = report.build_nights_report
    monkeypatch.setattr(report, "build_nights_report", lambda *a: drawn.append(1) or real(*a))
    assert main(["run", str(path)]) == EXIT_OK
    assert drawn == [] and page.read_bytes() == first  # everything up to date: left alone
    assert f"across the nights: {page}" in capsys.readouterr().out
    # a night's report is made (a new product the page shows): drawn again
    unit_dir = folders[1] / "report" / "night"
    entries = write_products(unit_dir, {"summary": [["stars detected", "77"]]}, {})
    record = {"stage": "report", "unit": "night", "night": folders[1].name, "products": entries}
    write_sidecar(unit_dir, {**record, "output_hash": output_hash(entries)})
    assert main(["run", str(path)]) == EXIT_OK
    assert drawn == [1] and "<td>77</td>" in page.read_text()
    assert main(["run", str(path), "--force"]) == EXIT_OK
    assert drawn == [1, 1]
    page.write_text("<html></html>")  # replaced, without the mark of its inputs: drawn again
    assert main(["run", str(path)]) == EXIT_OK
    assert drawn == [1, 1, 1] and "<td>77</td>" in page.read_text()


def test_a_mosaic_run_with_everything_up_to_date_loads_no_heavy_library(tmp_path, capsys):
    """Nothing to build or draw: the tiles' and the page's checks need neither
    scipy nor plotting (they loaded ~1 s of libraries on a slow day)."""
    from test_startup import HEAVY, _heavy_imported

    folders = write_nights(tmp_path / "products")
    path = _mosaic(tmp_path, [str(p) for p in folders])
    assert main(["run", str(path)]) == EXIT_OK, capsys.readouterr()
    code = f"from pipeline.cli import main\nassert main(['run', {str(path)!r}]) == 0"
    assert _heavy_imported(code, HEAVY) == []


@pytest.mark.parametrize("option", [["--stage", "detect"], ["--stretches", "0"], ["--verify"]])
def test_options_for_one_night_are_refused_for_a_mosaic(tmp_path, capsys, option):
    (tmp_path / "n1.yaml").write_text(NIGHT.format(name="n1", executor="local"))
    path = _mosaic(tmp_path, ["n1.yaml"])
    assert main(["run", str(path), *option]) == EXIT_USAGE
    assert "apply to one night; run the night's own config" in capsys.readouterr().err


def test_a_bad_night_config_is_a_usage_error_naming_it(tmp_path, capsys):
    (tmp_path / "n1.yaml").write_text(NIGHT.format(name="n1", executor="local") + "colour: 3\n")
    path = _mosaic(tmp_path, ["n1.yaml"])
    assert main(["run", str(path)]) == EXIT_USAGE
    assert "n1.yaml" in capsys.readouterr().err


def test_nights_with_the_same_run_section_share_one_pool(tmp_path, monkeypatch):
    # n1 and n2 ask for the same local pool; n3 for another kind of executor.
    for name, executor in (("n1", "local"), ("n2", "local"), ("n3", "serial")):
        (tmp_path / f"{name}.yaml").write_text(NIGHT.format(name=name, executor=executor))
    config = load_mosaic_config(_mosaic(tmp_path, ["n1.yaml", "n2.yaml", "n3.yaml"]))
    made, given = [], {}

    threads = set()

    class Pool:
        closed = False

        def __enter__(self):
            return self

        def __exit__(self, *exc):
            self.closed = True
            # A worker process dies with the thread that started it (Linux's
            # parent-death signal): every night's thread must outlive the pool.
            self.threads_alive = [thread.is_alive() for thread in threads]

    def make_executor(run, n_columns=None):
        made.append(Pool())
        return made[-1]

    def run_night(night, *, executor=None, **kwargs):
        assert executor is None or not executor.closed  # open for every night
        threads.add(threading.current_thread())
        given[night.night.name] = executor
        return RunReport(night.night.name)

    monkeypatch.setattr(_strip, "make_executor", make_executor)
    monkeypatch.setattr("pipeline.runner.run_night", run_night)
    monkeypatch.setattr(_strip, "run_mosaic", lambda *a, **k: RunReport("strip", kind="mosaic"))
    outcome = _strip.run_nights_and_mosaic(config)
    assert [name for name, _ in outcome.nights] == ["n1", "n2", "n3"]
    assert len(made) == 1 and given["n1"] is made[0] and given["n2"] is made[0]
    assert given["n3"] is None  # run_night makes its own from its run section
    assert made[0].closed  # and the shared pool ends with the nights
    assert len(threads) >= 1 and all(made[0].threads_alive)


def test_a_night_without_products_is_named_in_the_log_not_dumped(tmp_path, caplog):
    """A night whose products the page lacks is logged by its name, not its whole config."""
    import logging

    from pipeline.config import load_config

    (tmp_path / "n1.yaml").write_text(NIGHT.format(name="n1", executor="serial"))
    night = load_config(tmp_path / "n1.yaml")
    with caplog.at_level(logging.INFO, logger="pipeline.runner._strip"):
        assert _strip._night_products(night) == {}
    lines = [r.getMessage() for r in caplog.records]
    assert lines and all(line.startswith("night n1: no ") for line in lines), lines
    assert not any("Config(" in line for line in lines)
