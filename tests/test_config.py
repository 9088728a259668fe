"""Tests of pipeline.config: loading, merging, overrides, validation errors."""

from __future__ import annotations

import datetime
import re
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


# A key written in the wrong section is valid in another one: the message says
# which, so that the user moves it (the section's own keys alone do not tell).
WRONG_SECTION = [
    (
        "site:\n  flip_columns: true\n",
        r"line 9: site\.flip_columns: unknown key; 'flip_columns' is a key of another "
        r"section \(camera\.flip_columns\): move it there\? valid keys here: latitude",
    ),
    (
        "camera:\n  latitude: 10\n",
        r"camera\.latitude: unknown key; 'latitude' is a key of another section "
        r"\(site\.latitude\)",
    ),
    (  # a stage's option under another stage
        "stages:\n  smooth:\n    factor: 3\n",
        r"stages\.smooth\.factor: unknown key; 'factor' is a key of another section "
        r"\(stages\.scale\.factor\)",
    ),
    (  # a stage's option in the night section
        "  width: 5\n",
        r"run\.width: unknown key; 'width' is a key of another section \(stages\.smooth\.width\)",
    ),
]


def test_a_reduction_key_is_not_sent_to_the_simulate_section(night_file: Path) -> None:
    # simulate.psf.fwhm is the simulated seeing: never where a reduction key goes
    night_file.write_text(NIGHT_YAML + "stages:\n  scale:\n    fwhm: 3\n")
    with pytest.raises(ConfigError) as info:
        load_config(night_file, graph=TOY_GRAPH)
    assert "stages.scale.fwhm: unknown key; valid keys here: factor" in str(info.value)


@pytest.mark.parametrize(("extra", "pattern"), MISSPELLINGS + WRONG_SECTION)
def test_unknown_key_names_file_line_path_and_suggestion(
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


# ------------------------------------------------------------------ renamed names

RENAMED = [
    # (yaml appended to the night file, old name, new name); each first key at line 10
    ("stages:\n  calibrate:\n    cosmic_sigclip: 5\n", "cosmic_sigclip", "cosmic_significance"),
    (
        "stages:\n  calibrate:\n    cosmic_sigfrac: 0.3\n",
        "cosmic_sigfrac",
        "cosmic_neighbour_fraction",
    ),
    ("stages:\n  calibrate:\n    cosmic_objlim: 5\n", "cosmic_objlim", "cosmic_contrast"),
    ("stages:\n  ingest:\n    keywords: {datasec: IMSEC}\n", "datasec", "image_section"),
    ("stages:\n  ingest:\n    defaults: {biassec: '[1:2,1:9]'}\n", "biassec", "overscan_section"),
    ("stages:\n  ingest:\n    start_ramp: run\n", "'run' was renamed", "'segment'"),
]


@pytest.mark.parametrize(("extra", "old", "new"), RENAMED)
def test_an_old_name_is_an_error_that_names_the_new_one(
    night_file: Path, extra: str, old: str, new: str
) -> None:
    night_file.write_text(NIGHT_YAML + extra)
    with pytest.raises(ConfigError) as info:
        load_config(night_file, graph=TOY_GRAPH)
    message = str(info.value)
    assert "\n" not in message and "n1.yaml, line 10" in message
    assert old in message and f"write {'stages.' if '.' in new else ''}" in message
    assert new in message


def test_an_old_name_given_with_set_is_an_error_too(night_file: Path) -> None:
    with pytest.raises(ConfigError, match=r"--set .*write stages\.calibrate\.cosmic_contrast"):
        load_config(night_file, ["stages.calibrate.cosmic_objlim=4"], graph=TOY_GRAPH)


def test_the_new_names_are_valid_with_the_registered_stages() -> None:
    template = Path(__file__).parent.parent / "configs" / "template.yaml"
    new = [
        "stages.calibrate.cosmic_significance=5",
        "stages.calibrate.cosmic_neighbour_fraction=0.4",
        "stages.calibrate.cosmic_contrast=4",
        "stages.ingest.start_ramp=segment",
        "stages.ingest.keywords={image_section: IMSEC, overscan_section: OSSEC}",
    ]
    config = load_config(template, new)
    assert config.stage_options("calibrate").cosmic_contrast == 4
    assert config.stage_options("ingest").start_ramp == "segment"


RETIRED = re.compile(r"\b(sigclip|sigfrac|objlim|photcal)\b")


def test_retired_names_are_gone_from_code_configs_and_readme() -> None:
    # The names of another program's options and of another package's stage
    # must not reach users (whole words, as `grep -w` finds them).
    root = Path(__file__).parent.parent
    files = [root / "README.md", *root.glob("configs/*.yaml"), *root.glob("pipeline/**/*.py")]
    found = [
        f"{path.relative_to(root)}:{number}"
        for path in files
        for number, line in enumerate(path.read_text(encoding="utf-8").splitlines(), 1)
        if RETIRED.search(line)
    ]
    assert not found


# ------------------------------------------------------------------- hostile YAML


def _alias_bomb(levels: int = 9, width: int = 9) -> str:
    """Nested aliases: level k repeats level k-1 ``width`` times (width**levels values)."""
    lines = [f"l0: &l0 [{', '.join(['x'] * width)}]"]
    for k in range(1, levels):
        lines.append(f"l{k}: &l{k} [{', '.join([f'*l{k - 1}'] * width)}]")
    return "\n".join(lines) + "\n"


def test_a_yaml_alias_bomb_is_refused(night_file: Path) -> None:
    # nine levels of nine aliases stand for 9**9 ~ 387 million values; the
    # loader must refuse it from the node graph, without expanding it (were it
    # expanded, this test would take minutes and gigabytes, not milliseconds)
    night_file.write_text(NIGHT_YAML + _alias_bomb())
    with pytest.raises(ConfigError, match=r"n1\.yaml: the config expands to more than 100000"):
        load_config(night_file, graph=TOY_GRAPH)


def test_a_few_aliases_are_still_fine(night_file: Path) -> None:
    night_file.write_text(NIGHT_YAML.replace("run:\n", "run: &r\n") + "x: *r\n")
    with pytest.raises(ConfigError, match=r"x: unknown key"):  # loaded, then validated
        load_config(night_file, graph=TOY_GRAPH)


def test_an_alias_inside_its_own_value_is_refused(night_file: Path) -> None:
    night_file.write_text(NIGHT_YAML + "x: &x [1, *x]\n")
    with pytest.raises(ConfigError, match=r"line 8: a YAML alias refers to the value"):
        load_config(night_file, graph=TOY_GRAPH)


def test_a_config_that_is_not_utf8_names_file_and_line(night_file: Path) -> None:
    night_file.write_bytes(NIGHT_YAML.replace("2026-03-14", "caf\xe9").encode("latin-1"))
    with pytest.raises(ConfigError, match=r"n1\.yaml, line 3: not UTF-8 text \(byte 0xe9\)"):
        load_config(night_file, graph=TOY_GRAPH)


def test_a_yaml_syntax_error_names_the_file_in_one_line(night_file: Path) -> None:
    night_file.write_text(NIGHT_YAML + "stages: [unclosed\n")
    with pytest.raises(ConfigError) as info:
        load_config(night_file, graph=TOY_GRAPH)
    message = str(info.value)
    assert message.startswith(f"{night_file}, line ") and "not valid YAML" in message
    assert "<unicode string>" not in message and "\n" not in message


@pytest.mark.parametrize("pattern", ["/data/raw/*.fits", "/*.fits*"])
def test_an_absolute_pattern_is_refused(night_file: Path, pattern: str) -> None:
    with pytest.raises(ConfigError, match=r"night\.pattern: pattern must be relative to raw_dir"):
        load_config(night_file, [f"night.pattern={pattern}"], graph=TOY_GRAPH)


def test_an_output_dir_that_is_a_file_is_refused(night_file: Path) -> None:
    (night_file.parent / "products").write_text("not a folder")
    with pytest.raises(ConfigError, match=r"night\.output_dir: .*products is a file, not a folder"):
        load_config(night_file, graph=TOY_GRAPH)
