"""Tests of pipeline.config: loading, merging, overrides, validation errors."""

from __future__ import annotations

import datetime
import textwrap
from pathlib import Path

import pytest
import yaml
from _toy_graph import GRAPH as TOY_GRAPH
from pydantic import BaseModel, ConfigDict

from pipeline.config import (
    config_from_mapping,
    load_config,
    parse_override,
    register_section,
)
from pipeline.exceptions import ConfigError
from pipeline.geometry import Camera, Site

SITE_YAML = """\
site:
  name: Fictional Ridge
  latitude: -29.25
  longitude: -70.7
  height: 2400
camera:
  n_columns: 2048
  tdi_rows: 2048
  pixel_size: 15
  spin_period: 8.5
"""

NIGHT_YAML = """\
extends: ../site/site.yaml
night:
  name: 2026-03-14
  raw_dir: raw
  output_dir: products
run:
  stretch_rows: 500
"""


def write(path: Path, text: str) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(textwrap.dedent(text))
    return path


@pytest.fixture
def night_file(tmp_path: Path) -> Path:
    write(tmp_path / "site" / "site.yaml", SITE_YAML)
    return write(tmp_path / "nights" / "n1.yaml", NIGHT_YAML)


def test_extends_merges_and_fills_defaults(night_file: Path) -> None:
    config = load_config(night_file, graph=TOY_GRAPH)
    assert config.night.name == "2026-03-14"  # YAML reads a date; the name is text
    assert config.run.stretch_rows == 500
    assert config.run.overlap_rows == 64  # default filled in
    assert config.stages.scale.factor == 2.0  # the toy stage's option default
    site, camera = config.site(), config.camera()
    assert isinstance(site, Site) and isinstance(camera, Camera)
    assert site.latitude == -29.25 and site.height == 2400.0
    assert camera.spin_period == 8.5 and camera.focal_length is None


def test_relative_paths_resolve_against_the_file_that_sets_them(tmp_path: Path) -> None:
    write(tmp_path / "site" / "site.yaml", SITE_YAML + "night:\n  output_dir: ../shared_out\n")
    night = write(
        tmp_path / "nights" / "n1.yaml",
        "extends: ../site/site.yaml\nnight:\n  name: n1\n  raw_dir: raw\n",
    )
    config = load_config(night, graph=TOY_GRAPH)
    assert config.night.raw_dir == tmp_path / "nights" / "raw"
    # site/../shared_out, written without the ".." (normalised)
    assert config.night.output_dir == tmp_path / "shared_out"


def test_deep_merge_keeps_base_keys_and_top_wins(tmp_path: Path) -> None:
    write(tmp_path / "base.yaml", SITE_YAML + "run:\n  workers: 2\n  overlap_rows: 10\n")
    top = write(
        tmp_path / "top.yaml",
        "extends: [base.yaml]\nnight: {name: n, raw_dir: r, output_dir: o}\n"
        "run:\n  overlap_rows: 20\nsite:\n  height: 100\n",
    )
    config = load_config(top, graph=TOY_GRAPH)
    assert config.run.workers == 2 and config.run.overlap_rows == 20
    assert config.site().height == 100.0 and config.site().latitude == -29.25


def test_extends_cycle_is_reported(tmp_path: Path) -> None:
    write(tmp_path / "a.yaml", "extends: b.yaml\n")
    write(tmp_path / "b.yaml", "extends: a.yaml\n")
    with pytest.raises(ConfigError, match="'extends' forms a cycle"):
        load_config(tmp_path / "a.yaml", graph=TOY_GRAPH)


def test_missing_extended_file_names_both_files(tmp_path: Path) -> None:
    write(tmp_path / "a.yaml", "extends: nowhere.yaml\n")
    with pytest.raises(ConfigError, match=r"nowhere\.yaml: config file not found \(extended by"):
        load_config(tmp_path / "a.yaml", graph=TOY_GRAPH)


MISSPELLINGS = [
    # (yaml appended to the night file, expected message pattern)
    ("  workrs: 3\n", r"n1\.yaml, line 8: run\.workrs: unknown key; did you mean 'workers'\?"),
    (
        "stages:\n  scale:\n    factr: 3\n",
        r"n1\.yaml, line 10: stages\.scale\.factr: unknown key; did you mean 'factor'\?",
    ),
    ("camra:\n  n_columns: 3\n", r"line 8: camra: unknown key; did you mean 'camera'\?"),
]


@pytest.mark.parametrize(("extra", "pattern"), MISSPELLINGS)
def test_misspelled_key_names_file_line_path_and_suggestion(
    night_file: Path, extra: str, pattern: str
) -> None:
    night_file.write_text(NIGHT_YAML + extra)
    with pytest.raises(ConfigError, match=pattern):
        load_config(night_file, graph=TOY_GRAPH)


def test_bad_values_say_what_was_expected_and_where(night_file: Path) -> None:
    night_file.write_text(NIGHT_YAML + "site:\n  latitude: 95\n  temperature: warm\n")
    with pytest.raises(ConfigError) as info:
        load_config(night_file, graph=TOY_GRAPH)
    message = str(info.value)
    assert "2 problems" in message
    assert "n1.yaml, line 9: site.latitude: Input should be less than or equal to 90; got 95" in (
        message
    )
    assert "line 10: site.temperature: Input should be a valid number" in message
    assert "got 'warm'" in message


def test_error_in_base_file_points_at_the_base_file(tmp_path: Path) -> None:
    write(tmp_path / "site" / "site.yaml", SITE_YAML.replace("height: 2400", "hieght: 2400"))
    night = write(tmp_path / "nights" / "n1.yaml", NIGHT_YAML)
    with pytest.raises(ConfigError, match=r"site\.yaml, line 5: site\.hieght: .*'height'"):
        load_config(night, graph=TOY_GRAPH)


def test_missing_required_key(night_file: Path) -> None:
    night_file.write_text(NIGHT_YAML.replace("  raw_dir: raw\n", ""))
    with pytest.raises(ConfigError, match=r"line 2: night\.raw_dir: missing required key"):
        load_config(night_file, graph=TOY_GRAPH)


def test_camera_own_checks_run_at_load(night_file: Path) -> None:
    night_file.write_text(NIGHT_YAML + "camera:\n  focal_length: 8.0\n")
    with pytest.raises(ConfigError, match=r"camera: Camera needs exactly one of focal_length"):
        load_config(night_file, graph=TOY_GRAPH)


def test_duplicate_key_is_an_error(night_file: Path) -> None:
    night_file.write_text(NIGHT_YAML + "run:\n  workers: 2\n")
    with pytest.raises(ConfigError, match=r"line 8: run: duplicate key"):
        load_config(night_file, graph=TOY_GRAPH)


def test_only_safe_yaml_is_loaded(night_file: Path) -> None:
    night_file.write_text(NIGHT_YAML + "x: !!python/object/apply:os.system ['echo hi']\n")
    with pytest.raises(ConfigError, match="not valid YAML"):
        load_config(night_file, graph=TOY_GRAPH)


def test_a_list_at_top_level_is_rejected(tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match="expected a mapping of sections"):
        load_config(write(tmp_path / "l.yaml", "- 1\n- 2\n"), graph=TOY_GRAPH)


OVERRIDES = [
    ("stages.detect.threshold=4", ("stages", "detect", "threshold"), 4),
    ("run.scheduler=null", ("run", "scheduler"), None),
    ("camera.flip_rows=true", ("camera", "flip_rows"), True),
    ("stages.scale.fail_on=[1, 2]", ("stages", "scale", "fail_on"), [1, 2]),
    ("night.name=2026-03-14", ("night", "name"), datetime.date(2026, 3, 14)),
    ("site.name=a=b", ("site", "name"), "a=b"),
]


@pytest.mark.parametrize(("text", "keys", "value"), OVERRIDES)
def test_parse_override_uses_yaml_scalars(text: str, keys: tuple, value: object) -> None:
    assert parse_override(text) == (keys, value)


@pytest.mark.parametrize("text", ["no_equals_sign", "=3", "a..b=1", "a.b=[unclosed"])
def test_bad_override_is_rejected(text: str) -> None:
    with pytest.raises(ConfigError, match="--set"):
        parse_override(text)


def test_overrides_apply_last_and_are_validated(night_file: Path) -> None:
    config = load_config(
        night_file, ["run.stretch_rows=64", "stages.scale.factor=3.5"], graph=TOY_GRAPH
    )
    assert config.run.stretch_rows == 64 and config.stages.scale.factor == 3.5
    with pytest.raises(
        ConfigError, match=r"--set stages\.scale\.factro=1: .*did you mean 'factor'"
    ):
        load_config(night_file, ["stages.scale.factro=1"], graph=TOY_GRAPH)
    with pytest.raises(ConfigError, match=r"run\.stretch_rows holds a int, not a section"):
        load_config(night_file, ["run.stretch_rows.x=1"], graph=TOY_GRAPH)


def test_scheduler_means_dask(night_file: Path) -> None:
    config = load_config(night_file, ["run.scheduler=tcp://127.0.0.1:8786"], graph=TOY_GRAPH)
    assert config.run.executor == "dask"
    with pytest.raises(ConfigError, match=r"scheduler .* is set but executor is 'serial'"):
        load_config(night_file, ["run.scheduler=tcp://h:1", "run.executor=serial"], graph=TOY_GRAPH)


def test_resolved_yaml_round_trips(night_file: Path, tmp_path: Path) -> None:
    config = load_config(night_file, ["stages.smooth.width=5"], graph=TOY_GRAPH)
    text = config.to_yaml()
    assert "extends" not in text
    again = load_config(write(tmp_path / "resolved.yaml", text), graph=TOY_GRAPH)
    assert again.to_dict() == config.to_dict()
    assert yaml.safe_load(text)["stages"]["smooth"] == {"width": 5}


def test_config_from_mapping_resolves_against_base_dir(tmp_path: Path) -> None:
    data = yaml.safe_load(SITE_YAML)
    data["night"] = {"name": "n", "raw_dir": "raw", "output_dir": "/abs/out"}
    config = config_from_mapping(data, graph=TOY_GRAPH, base_dir=tmp_path)
    assert config.night.raw_dir == tmp_path / "raw"
    assert config.night.output_dir == Path("/abs/out")


def test_registered_section_is_validated(night_file: Path) -> None:
    class ExtraOptions(BaseModel):
        model_config = ConfigDict(extra="forbid", frozen=True)
        depth: int = 1

    register_section("zz_extra", ExtraOptions)
    assert load_config(night_file, graph=TOY_GRAPH).section("zz_extra") is None
    config = load_config(night_file, ["zz_extra.depth=4"], graph=TOY_GRAPH)
    assert config.section("zz_extra") == ExtraOptions(depth=4)
    with pytest.raises(ConfigError, match=r"zz_extra\.dpth: unknown key; did you mean 'depth'"):
        load_config(night_file, ["zz_extra.dpth=4"], graph=TOY_GRAPH)
    with pytest.raises(ValueError, match="reserved"):
        register_section("night", ExtraOptions)


def test_the_template_config_is_valid_with_the_registered_stages() -> None:
    template = Path(__file__).parent.parent / "configs" / "template.yaml"
    config = load_config(template)  # the registered graph, not the toy one
    assert config.night.raw_dir == template.parent / "raw" / "2026-10-15"
    assert config.camera().spin_period == 8.5
