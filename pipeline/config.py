"""YAML configuration: load, merge, override, validate into typed objects.

A night is described by a YAML file such as::

    extends: ../site.yaml          # site and camera, shared by all nights
    night:
      name: 2026-03-14
      raw_dir: raw/2026-03-14      # relative to this file's folder
      output_dir: products
    run:
      stretch_rows: 2048           # default: 4096 up to 1024 columns, fewer on wider chips
    stages:
      calibrate:
        cosmic_rays: true

Top-level sections are ``extends``, ``night``, ``site`` (fields of
:class:`pipeline.geometry.Site`), ``camera`` (fields of
:class:`pipeline.geometry.Camera`), ``run``, ``stages`` (one section per
registered stage, holding that stage's options) and extra sections registered
with :func:`register_section` (``simulate``).

Why pydantic models with ``extra='forbid'``: a typo in a config key is the
commonest config mistake and must not silently fall back to a default, so
unknown keys are errors; pydantic gives typed, validated, immutable objects,
fills defaults, and reports every problem with its location in one pass, which
hand-written checks would duplicate across every stage.  YAML is read with
``yaml.SafeLoader`` only (no arbitrary Python objects), and the node tree is
walked to remember the line of every mapping key, so errors name the file,
the key path and the line, and say what was expected.

``extends`` names one file or a list of files (relative to the extending
file) that are loaded first and deep-merged underneath: mappings merge key by
key, anything else is replaced.  Relative paths in path-valued fields resolve
against the folder of the file that sets them.  Overrides such as
``stages.calibrate.cosmic_significance=5`` are applied last; the value is
parsed as a YAML scalar (``5`` is an int, ``true`` a bool, ``null`` None,
``[1, 2]`` a list).

A config file must be UTF-8 text, and its YAML may expand to at most
:data:`MAX_CONFIG_VALUES` values once aliases are followed: a few nested
aliases can otherwise stand for billions of values and exhaust the memory.
Keys that were renamed (:data:`RENAMED_KEYS`, :data:`RENAMED_VALUES`) are
errors that name the new key or value.
"""

from __future__ import annotations

import dataclasses
import datetime
import difflib
import functools
import importlib
import importlib.util
import os
import types
import typing
from collections.abc import Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Literal

import yaml
from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
    ValidationError,
    create_model,
    field_validator,
    model_validator,
)

from pipeline.exceptions import ConfigError
from pipeline.geometry.instrument import Camera, Site
from pipeline.stages.base import Stage, check_graph, default_stretch_rows

__all__ = [
    "MAX_CONFIG_VALUES",
    "RENAMED_KEYS",
    "RENAMED_VALUES",
    "Config",
    "ExecutorSection",
    "NightSection",
    "RunSection",
    "StrictModel",
    "apply_overrides",
    "config_from_mapping",
    "load_config",
    "load_model",
    "night_config",
    "parse_override",
    "register_section",
]

KeyPath = tuple[str | int, ...]
#: (source label, line or None) of each key path, for error messages.
Locations = dict[KeyPath, tuple[str, int | None]]

#: Most values (mappings, lists and scalars, aliases followed) a config file
#: may hold.  A full night config holds a few hundred; the limit refuses YAML
#: alias bombs (nested aliases standing for billions of values) in
#: milliseconds instead of running out of memory.
MAX_CONFIG_VALUES = 100_000

#: Keys that were renamed: old key path -> new key path.  The old names are
#: kept only here, to tell users of old configs what to write instead.
RENAMED_KEYS: dict[tuple[str, ...], tuple[str, ...]] = {
    ("stages", "calibrate", "cosmic_sigclip"): ("stages", "calibrate", "cosmic_significance"),
    ("stages", "calibrate", "cosmic_sigfrac"): ("stages", "calibrate", "cosmic_neighbour_fraction"),
    ("stages", "calibrate", "cosmic_objlim"): ("stages", "calibrate", "cosmic_contrast"),
    **{
        ("stages", "ingest", table, old): ("stages", "ingest", table, new)
        for table in ("keywords", "defaults")
        for old, new in (("datasec", "image_section"), ("biassec", "overscan_section"))
    },
}

#: Values that were renamed: key path -> {old value: new value}.
RENAMED_VALUES: dict[tuple[str, ...], dict[str, str]] = {
    ("stages", "ingest", "start_ramp"): {"run": "segment"},
}


class StrictModel(BaseModel):
    """Base of config sections: unknown keys are errors, values are immutable."""

    model_config = ConfigDict(extra="forbid", frozen=True)


class NightSection(StrictModel):
    """Which night to reduce and where its files are."""

    name: str = Field(pattern=r"^[A-Za-z0-9][A-Za-z0-9._-]*$", description="folder-safe name")
    raw_dir: Path = Field(description="folder holding the raw TDI blocks")
    pattern: str = Field("*.fits*", description="glob of raw files below raw_dir (.fits, .fits.gz)")
    output_dir: Path = Field(description="products go to output_dir/<name>/")

    @field_validator("name", mode="before")
    @classmethod
    def _date_as_text(cls, value: Any) -> Any:
        # YAML reads an unquoted 2026-03-14 as a date; a night name is text.
        return value.isoformat() if isinstance(value, datetime.date) else value

    @field_validator("pattern")
    @classmethod
    def _relative_pattern(cls, value: str) -> str:
        if Path(value).is_absolute() or Path(value).drive:
            raise ValueError(
                "pattern must be relative to raw_dir (e.g. '*.fits*'); put the folder "
                "in night.raw_dir"
            )
        return value

    @field_validator("output_dir")
    @classmethod
    def _output_dir_is_a_folder(cls, value: Path) -> Path:
        # The nearest existing part of the path must be a folder: products,
        # the log and the lock are written below it.
        for part in (value, *value.parents):
            if part.exists():
                if not part.is_dir():
                    raise ValueError(
                        f"{part} is a file, not a folder; point output_dir at a folder"
                    )
                break
        return value


class ExecutorSection(StrictModel):
    """Where the runner's units run (the ``run`` section of a mosaic; part of a night's)."""

    executor: Literal["local", "serial", "dask"] = "local"
    workers: int | None = Field(None, ge=1, description="processes; None: all cores")
    scheduler: str | None = Field(None, description="dask scheduler address, e.g. tcp://h:8786")

    @model_validator(mode="before")
    @classmethod
    def _scheduler_implies_dask(cls, data: Any) -> Any:
        if isinstance(data, Mapping) and data.get("scheduler") and "executor" not in data:
            return {**data, "executor": "dask"}
        return data

    @model_validator(mode="after")
    def _check_scheduler(self) -> ExecutorSection:
        if self.scheduler and self.executor != "dask":
            raise ValueError(
                f"scheduler {self.scheduler!r} is set but executor is {self.executor!r}; "
                "remove one of them (a scheduler means executor 'dask')"
            )
        return self


class RunSection(ExecutorSection):
    """How the runner splits and schedules the work (never what it computes)."""

    stretch_rows: int | None = Field(
        None,
        ge=1,
        description="night rows per stretch (scan axis); None: 4096, fewer on chips wider "
        "than 1024 columns so that a stretch holds at most 4096 x 1024 pixels",
    )

    def rows_per_stretch(self, n_columns: int) -> int:
        """``stretch_rows``, or when unset the default for a chip of ``n_columns`` columns
        (:func:`pipeline.stages.base.default_stretch_rows`)."""
        return self.stretch_rows or default_stretch_rows(n_columns)

    overlap_rows: int = Field(64, ge=0, description="margin rows on each side of a stretch")


# Limits the dataclasses do not check themselves; pydantic enforces them.
_FIELD_LIMITS: dict[tuple[type, str], dict[str, float]] = {
    (Site, "latitude"): {"ge": -90.0, "le": 90.0},
    (Site, "longitude"): {"ge": -180.0, "le": 360.0},
    (Site, "pressure"): {"ge": 0.0},
    (Site, "temperature"): {"ge": -100.0, "le": 100.0},
    (Site, "relative_humidity"): {"ge": 0.0, "le": 1.0},
    (Site, "wavelength"): {"gt": 0.0},
    (Camera, "n_columns"): {"ge": 1},
    (Camera, "tdi_rows"): {"ge": 1},
    (Camera, "pixel_size"): {"gt": 0.0},
    (Camera, "focal_length"): {"gt": 0.0},
    (Camera, "spin_period"): {"gt": 0.0},
    (Camera, "line_time"): {"gt": 0.0},
}


def _section_for_dataclass(cls: type) -> type[StrictModel]:
    """A strict pydantic model with the fields, types and defaults of ``cls``.

    The geometry dataclass stays the single source of truth: a field added
    there is accepted in the config without touching this module.  The
    dataclass's own checks (``__post_init__``) run as a model validator.
    """
    hints = typing.get_type_hints(cls)
    fields: dict[str, Any] = {}
    for f in dataclasses.fields(cls):
        default = ... if f.default is dataclasses.MISSING else f.default
        fields[f.name] = (hints[f.name], Field(default, **_FIELD_LIMITS.get((cls, f.name), {})))

    def _check(self: BaseModel) -> BaseModel:
        cls(**dict(self))
        return self

    return create_model(
        f"{cls.__name__}Section",
        __base__=StrictModel,
        __module__=__name__,
        __doc__=f"Config section mirroring :class:`{cls.__module__}.{cls.__name__}`.",
        __validators__={"_check": model_validator(mode="after")(_check)},
        **fields,
    )


SiteSection = _section_for_dataclass(Site)
CameraSection = _section_for_dataclass(Camera)

# Extra top-level sections: name -> model, or "module:attribute" resolved lazily
# (a missing module or attribute means "any mapping" until its owner adds it).
_SECTIONS: dict[str, type[BaseModel] | str] = {
    "simulate": "pipeline.simulate:SimulateOptions",
}


def register_section(name: str, model: type[BaseModel]) -> None:
    """Register an extra optional top-level config section.

    Parameters
    ----------
    name : str
        Top-level key, e.g. ``'simulate'``.
    model : type of pydantic.BaseModel
        Its model; declare ``extra='forbid'`` so typos are caught.
    """
    if name in ("extends", "night", "site", "camera", "run", "stages"):
        raise ValueError(f"Section name {name!r} is reserved; choose another.")
    _SECTIONS[name] = model
    _config_model.cache_clear()


def _resolve_section(spec: type[BaseModel] | str) -> Any:
    if not isinstance(spec, str):
        return spec
    module_name, attribute = spec.split(":")
    if importlib.util.find_spec(module_name) is None:
        return dict[str, Any]
    return getattr(importlib.import_module(module_name), attribute, dict[str, Any])


def _check_uses(graph: tuple[Stage, ...]) -> None:
    """Check that every stage ``uses`` only existing site/camera/run fields."""
    sections = {"site": SiteSection, "camera": CameraSection, "run": RunSection}
    for stage in graph:
        for name in stage.uses:
            section, _, key = name.partition(".")
            model = sections.get(section)
            if model is None or (key and key not in model.model_fields):
                known = ", ".join(model.model_fields) if model else ", ".join(sections)
                raise ValueError(
                    f"Stage {stage.name!r} uses {name!r}, which is not 'site', 'camera', "
                    f"'run' or one of their fields ({known})."
                )


@functools.lru_cache(maxsize=16)
def _config_model(graph: tuple[Stage, ...]) -> type[BaseModel]:
    _check_uses(graph)
    stage_fields: dict[str, Any] = {
        stage.name: (stage.options, Field(default_factory=stage.options)) for stage in graph
    }
    stages_model = create_model(
        "StagesSection", __base__=StrictModel, __module__=__name__, **stage_fields
    )
    extra = {name: (_resolve_section(spec) | None, None) for name, spec in _SECTIONS.items()}
    return create_model(
        "ConfigModel",
        __base__=StrictModel,
        __module__=__name__,
        night=(NightSection, ...),
        site=(SiteSection, ...),
        camera=(CameraSection, ...),
        run=(RunSection, Field(default_factory=RunSection)),
        stages=(stages_model, Field(default_factory=stages_model)),
        **extra,
    )


@dataclass(frozen=True)
class Config:
    """A validated, fully resolved configuration.

    Attributes
    ----------
    model : pydantic.BaseModel
        The validated tree; ``night``, ``run`` and ``stages`` are shortcuts.
    graph : tuple of Stage
        The stage graph the ``stages`` section was validated against.
    path : pathlib.Path or None
        The file it was loaded from (None when built from a mapping).
    """

    model: BaseModel
    graph: tuple[Stage, ...]
    path: Path | None = None

    @property
    def night(self) -> NightSection:
        """The ``night`` section."""
        return self.model.night

    @property
    def run(self) -> RunSection:
        """The ``run`` section."""
        return self.model.run

    @property
    def stages(self) -> BaseModel:
        """The ``stages`` section; ``config.stages.<name>`` is a stage's options."""
        return self.model.stages

    def stage_options(self, name: str) -> BaseModel:
        """Options of stage ``name`` (an instance of its options model)."""
        if name not in type(self.model.stages).model_fields:
            raise KeyError(f"No stage {name!r}; stages: {[s.name for s in self.graph]}.")
        return getattr(self.model.stages, name)

    def section(self, name: str) -> Any:
        """An extra top-level section (e.g. ``'simulate'``), or None if absent."""
        return getattr(self.model, name)

    def site(self) -> Site:
        """The ``site`` section as a :class:`pipeline.geometry.Site`."""
        return Site(**dict(self.model.site))

    def camera(self) -> Camera:
        """The ``camera`` section as a :class:`pipeline.geometry.Camera`."""
        return Camera(**dict(self.model.camera))

    def to_dict(self) -> dict[str, Any]:
        """The resolved config as plain JSON-able data, defaults filled in.

        Extra sections that are absent (None) are left out.
        """
        data = self.model.model_dump(mode="json")
        return {key: value for key, value in data.items() if value is not None}

    def to_yaml(self) -> str:
        """The resolved config as YAML; loading it back gives the same config."""
        return yaml.safe_dump(self.to_dict(), sort_keys=False, default_flow_style=False)


def load_config(
    path: str | Path,
    overrides: Iterable[str] = (),
    *,
    graph: Sequence[Stage] | None = None,
) -> Config:
    """Load, merge, override and validate a YAML config file.

    Parameters
    ----------
    path : str or pathlib.Path
        The config file.  Its ``extends`` files are loaded first.
    overrides : iterable of str
        ``'dotted.key=value'`` strings applied last, in order.
    graph : sequence of Stage, optional
        Stages whose options form the ``stages`` section; default the
        registered graph :data:`pipeline.stages.GRAPH`.

    Returns
    -------
    Config

    Raises
    ------
    ConfigError
        Naming the file, key path and line of every problem found.
    """
    path = Path(path)
    graph_t = _graph(graph)
    path_keys = _path_keys(_config_model(graph_t))
    data, locations = _load_tree(path.absolute(), (), path_keys)
    data, locations = apply_overrides(data, locations, overrides)
    return _validate(data, locations, graph_t, str(path), path.absolute())


def night_config(
    site_file: str | Path,
    name: str,
    raw_dir: str | Path,
    overrides: Iterable[str] = (),
    *,
    graph: Sequence[Stage] | None = None,
) -> Config:
    """The config of one night made from a site file and the night's raw folder.

    The site file (with its ``extends``) holds everything but the night: the
    site, the camera, the stages' options, and in its ``night`` section the
    ``output_dir`` (and ``pattern``) shared by every night.  This adds
    ``night.name = name`` and ``night.raw_dir = raw_dir``, as a night file
    extending the site file would.

    Parameters
    ----------
    site_file : str or pathlib.Path
        The site's YAML file.
    name : str
        The night's name (its raw folder's name, e.g. ``2026-10-15``).
    raw_dir : str or pathlib.Path
        The night's raw folder.
    overrides, graph
        As for :func:`load_config`.

    Raises
    ------
    ConfigError
        As :func:`load_config`; e.g. when the site file sets no
        ``night.output_dir``.
    """
    path = Path(site_file)
    graph_t = _graph(graph)
    data, locations = _load_tree(path.absolute(), (), _path_keys(_config_model(graph_t)))
    night = data.get("night")
    data["night"] = {
        **(night if isinstance(night, dict) else {}),
        "name": name,
        "raw_dir": Path(raw_dir).absolute(),
    }
    data, locations = apply_overrides(data, locations, overrides)
    return _validate(data, locations, graph_t, f"{path} (night {name})", path.absolute())


def load_model(
    path: str | Path, model: type[BaseModel], overrides: Iterable[str] = ()
) -> BaseModel:
    """Load a YAML file other than a night's (e.g. a mosaic's) into ``model``, as strictly.

    The same rules as :func:`load_config`: ``extends``, relative paths
    resolved against the folder of the file that sets them (also in lists of
    paths), ``--set`` overrides, unknown keys and bad values reported with
    the file, key path and line.

    Parameters
    ----------
    path : str or pathlib.Path
    model : type of pydantic.BaseModel
        The file's model; declare ``extra='forbid'`` in it and its sections.
    overrides : iterable of str
        ``'dotted.key=value'`` strings applied last.

    Raises
    ------
    ConfigError
    """
    path = Path(path)
    data, locations = _load_tree(path.absolute(), (), _path_keys(model))
    data, locations = apply_overrides(data, locations, overrides)
    try:
        return model.model_validate(data)
    except ValidationError as exc:
        raise ConfigError(_format_errors(exc, model, locations, str(path))) from None


def config_from_mapping(
    data: Mapping[str, Any],
    overrides: Iterable[str] = (),
    *,
    graph: Sequence[Stage] | None = None,
    base_dir: str | Path = ".",
) -> Config:
    """Validate an in-memory config mapping (no ``extends``).

    Relative paths resolve against ``base_dir``.  See :func:`load_config`.
    """
    data = _copy_tree(data)
    if "extends" in data:
        raise ConfigError("<mapping>: 'extends' is only allowed in files; merge mappings yourself.")
    graph_t = _graph(graph)
    _resolve_paths(data, _path_keys(_config_model(graph_t)), Path(base_dir).absolute())
    data, locations = apply_overrides(data, {}, overrides)
    return _validate(data, locations, graph_t, "<mapping>", None)


def _graph(graph: Sequence[Stage] | None) -> tuple[Stage, ...]:
    if graph is None:
        from pipeline.stages import GRAPH

        return GRAPH
    return check_graph(graph)


def _validate(
    data: dict[str, Any],
    locations: Locations,
    graph_t: tuple[Stage, ...],
    label: str,
    path: Path | None,
) -> Config:
    renamed = _renamed_problems(data, locations, label)
    if renamed:
        raise ConfigError(_problem_report(label, renamed))
    model_cls = _config_model(graph_t)
    try:
        model = model_cls.model_validate(data)
    except ValidationError as exc:
        raise ConfigError(_format_errors(exc, model_cls, locations, label)) from None
    return Config(model=model, graph=graph_t, path=path)


def _lookup(data: Any, keys: Sequence[str]) -> tuple[bool, Any]:
    """(found, value) of the key path ``keys`` in nested mappings."""
    for key in keys:
        if not isinstance(data, Mapping) or key not in data:
            return False, None
        data = data[key]
    return True, data


def _renamed_problems(data: dict[str, Any], locations: Locations, label: str) -> list[str]:
    """One line per renamed key or value still used in ``data``."""
    lines = []
    for old, new in RENAMED_KEYS.items():
        if _lookup(data, old)[0]:
            lines.append(
                f"{_where(old, locations, label)}: {'.'.join(old)}: this key was renamed; "
                f"write {'.'.join(new)} instead (same meaning)."
            )
    for keys, values in RENAMED_VALUES.items():
        found, value = _lookup(data, keys)
        if found and isinstance(value, str) and value in values:
            lines.append(
                f"{_where(keys, locations, label)}: {'.'.join(keys)}: {value!r} was renamed; "
                f"write {values[value]!r} instead (same meaning)."
            )
    return lines


# --------------------------------------------------------------------------- YAML


def _load_tree(
    path: Path, chain: tuple[Path, ...], path_keys: list[KeyPath]
) -> tuple[dict[str, Any], Locations]:
    """Load ``path`` and, recursively, the files it extends; merge them."""
    path = path.resolve()
    if path in chain:
        cycle = " -> ".join(str(p) for p in (*chain, path))
        raise ConfigError(f"{path}: 'extends' forms a cycle: {cycle}.")
    if not path.is_file():
        where = f" (extended by {chain[-1]})" if chain else ""
        raise ConfigError(f"{path}: config file not found{where}.")
    data, locations = _load_yaml(path)
    extends = data.pop("extends", None)
    if extends is None:
        bases: list[Any] = []
    elif isinstance(extends, str):
        bases = [extends]
    elif isinstance(extends, list) and all(isinstance(b, str) for b in extends):
        bases = extends
    else:
        line = locations.get(("extends",), (str(path), None))[1]
        raise ConfigError(
            f"{path}, line {line}: extends: expected a file name or a list of file names; "
            f"got {extends!r}."
        )
    _resolve_paths(data, path_keys, path.parent)
    merged: dict[str, Any] = {}
    merged_locations: Locations = {}
    for base in bases:
        base_data, base_locations = _load_tree(path.parent / base, (*chain, path), path_keys)
        merged = _deep_merge(merged, base_data)
        merged_locations.update(base_locations)
    merged = _deep_merge(merged, data)
    merged_locations.update(locations)
    return merged, merged_locations


def _load_yaml(path: Path) -> tuple[dict[str, Any], Locations]:
    """Safe-load one YAML file and record the line of every mapping key."""
    try:
        text = path.read_bytes().decode("utf-8")
    except UnicodeDecodeError as exc:
        line = path.read_bytes()[: exc.start].count(b"\n") + 1
        raise ConfigError(
            f"{path}, line {line}: not UTF-8 text (byte 0x{exc.object[exc.start]:02x}); "
            "save the file as UTF-8."
        ) from None
    except OSError as exc:
        raise ConfigError(f"{path}: cannot read the config file: {exc.strerror}.") from None
    loader = yaml.SafeLoader(text)
    loader.name = str(path)  # marks in YAML errors name the file, not "<unicode string>"
    try:
        node = loader.get_single_node()
        locations: Locations = {}
        if node is not None:
            _check_size(node, path)
            _record_lines(node, (), locations, str(path))
        data = loader.construct_document(node) if node is not None else {}
    except yaml.YAMLError as exc:
        raise ConfigError(_yaml_error(path, exc)) from None
    except RecursionError:
        raise ConfigError(f"{path}: the YAML is nested too deeply to be a config.") from None
    finally:
        loader.dispose()
    if data is None:
        data = {}
    if not isinstance(data, dict):
        raise ConfigError(
            f"{path}, line 1: expected a mapping of sections (night:, site:, ...); "
            f"got a {type(data).__name__}."
        )
    return data, locations


def _yaml_error(path: Path, exc: yaml.YAMLError) -> str:
    """One line: the file, the line and column of the problem, and what it is."""
    if isinstance(exc, yaml.MarkedYAMLError) and exc.problem_mark is not None:
        mark = exc.problem_mark
        context = f" ({exc.context})" if exc.context else ""
        return (
            f"{path}, line {mark.line + 1}, column {mark.column + 1}: not valid YAML: "
            f"{exc.problem}{context}."
        )
    return f"{path}: not valid YAML: {' '.join(str(exc).split())}."


def _check_size(root: yaml.Node, path: Path) -> None:
    """Refuse a node tree that stands for more than MAX_CONFIG_VALUES values.

    Aliases make the tree a graph whose shared nodes count once per use; the
    count is memoised per node, so it costs one visit per distinct node.
    """
    sizes: dict[int, int] = {}
    active: set[int] = set()

    def size(node: yaml.Node) -> int:
        key = id(node)
        if key in sizes:
            return sizes[key]
        if key in active:
            line = node.start_mark.line + 1
            raise ConfigError(
                f"{path}, line {line}: a YAML alias refers to the value that contains it; "
                "write the value out instead."
            )
        active.add(key)
        total = 1
        if isinstance(node, yaml.MappingNode):
            total += sum(size(k) + size(v) for k, v in node.value)
        elif isinstance(node, yaml.SequenceNode):
            total += sum(size(item) for item in node.value)
        active.discard(key)
        sizes[key] = min(total, MAX_CONFIG_VALUES + 1)
        return sizes[key]

    if size(root) > MAX_CONFIG_VALUES:
        raise ConfigError(
            f"{path}: the config expands to more than {MAX_CONFIG_VALUES} values once its "
            "YAML aliases (*name) are followed; a night config holds a few hundred. "
            "Write values out instead of nesting aliases."
        )


def _record_lines(node: yaml.Node, prefix: KeyPath, out: Locations, label: str) -> None:
    if isinstance(node, yaml.MappingNode):
        seen: set[str] = set()
        for key_node, value_node in node.value:
            if key_node.tag == "tag:yaml.org,2002:merge":
                continue  # '<<' merge keys: their pairs override like plain keys
            line = key_node.start_mark.line + 1
            if not isinstance(key_node, yaml.ScalarNode):
                raise ConfigError(f"{label}, line {line}: keys must be plain names.")
            key = key_node.value
            if key in seen:
                where = ".".join(str(k) for k in (*prefix, key))
                raise ConfigError(
                    f"{label}, line {line}: {where}: duplicate key; keep only one of them."
                )
            seen.add(key)
            out[(*prefix, key)] = (label, line)
            _record_lines(value_node, (*prefix, key), out, label)
    elif isinstance(node, yaml.SequenceNode):
        for index, item in enumerate(node.value):
            out[(*prefix, index)] = (label, item.start_mark.line + 1)
            _record_lines(item, (*prefix, index), out, label)


def _deep_merge(base: dict[str, Any], top: Mapping[str, Any]) -> dict[str, Any]:
    merged = dict(base)
    for key, value in top.items():
        if isinstance(value, Mapping) and isinstance(merged.get(key), Mapping):
            merged[key] = _deep_merge(dict(merged[key]), value)
        else:
            merged[key] = value
    return merged


def _copy_tree(data: Any) -> Any:
    if isinstance(data, Mapping):
        return {key: _copy_tree(value) for key, value in data.items()}
    if isinstance(data, list):
        return [_copy_tree(value) for value in data]
    return data


# ----------------------------------------------------------------------- overrides


def parse_override(text: str) -> tuple[tuple[str, ...], Any]:
    """Split ``'a.b.c=value'`` into the key path and the YAML-parsed value.

    Examples
    --------
    >>> parse_override("stages.calibrate.cosmic_significance=5")
    (('stages', 'calibrate', 'cosmic_significance'), 5)
    >>> parse_override("run.scheduler=null")
    (('run', 'scheduler'), None)
    """
    key, sep, raw = text.partition("=")
    keys = tuple(key.strip().split("."))
    if not sep or not all(keys):
        raise ConfigError(
            f"--set {text!r}: expected 'dotted.key=value', "
            "e.g. 'stages.calibrate.cosmic_significance=5'."
        )
    try:
        value = yaml.safe_load(raw) if raw.strip() else None
    except yaml.YAMLError as exc:
        raise ConfigError(f"--set {text!r}: value is not valid YAML: {exc}") from None
    return keys, value


def apply_overrides(
    data: dict[str, Any], locations: Locations, overrides: Iterable[str]
) -> tuple[dict[str, Any], Locations]:
    """Apply ``'dotted.key=value'`` overrides to a config tree (copied).

    Relative path values given this way resolve against the current folder.
    """
    data = _copy_tree(data)
    locations = dict(locations)
    for text in overrides:
        keys, value = parse_override(text)
        node = data
        for depth, key in enumerate(keys[:-1]):
            child = node.setdefault(key, {})
            if not isinstance(child, dict):
                where = ".".join(keys[: depth + 1])
                raise ConfigError(
                    f"--set {text!r}: {where} holds a {type(child).__name__}, not a section; "
                    "cannot set a key below it."
                )
            node = child
        node[keys[-1]] = value
        for depth in range(1, len(keys) + 1):
            locations.setdefault(keys[:depth], (f"--set {text}", None))
        locations[keys] = (f"--set {text}", None)
    return data, locations


# --------------------------------------------------------------------------- paths


def _unwrap(annotation: Any) -> list[Any]:
    """Members of a union annotation (or the annotation itself)."""
    if typing.get_origin(annotation) in (typing.Union, types.UnionType):
        return [a for a in typing.get_args(annotation) if a is not type(None)]
    return [annotation]


def _is_path_list(annotation: Any) -> bool:
    """Whether ``annotation`` is ``tuple[Path, ...]`` or ``list[Path]``."""
    return typing.get_origin(annotation) in (tuple, list) and typing.get_args(annotation)[:1] == (
        Path,
    )


def _path_keys(model: type[BaseModel], prefix: KeyPath = ()) -> list[KeyPath]:
    """Key paths of every ``Path``-typed field in ``model``, recursively."""
    keys = []
    for name, info in model.model_fields.items():
        for member in _unwrap(info.annotation):
            if member is Path or _is_path_list(member):
                keys.append((*prefix, name))
            elif isinstance(member, type) and issubclass(member, BaseModel):
                keys.extend(_path_keys(member, (*prefix, name)))
    return keys


def _resolve_paths(data: dict[str, Any], keys: Iterable[KeyPath], folder: Path) -> None:
    """Make relative path values in ``data`` absolute against ``folder`` (in place)."""
    for key in keys:
        node: Any = data
        for part in key[:-1]:
            node = node.get(part) if isinstance(node, dict) else None
        if not isinstance(node, dict):
            continue
        value = node.get(key[-1])
        if isinstance(value, str):
            node[key[-1]] = _resolved(value, folder)
        elif isinstance(value, list):  # a list of paths
            node[key[-1]] = [_resolved(v, folder) if isinstance(v, str) else v for v in value]


def _resolved(text: str, folder: Path) -> str:
    value = Path(text).expanduser()
    # normpath: show users demo_products/, not configs/../demo_products/
    return os.path.normpath(value if value.is_absolute() else folder / value)


# -------------------------------------------------------------------------- errors


def _fields_at(model: type[BaseModel], loc: KeyPath) -> list[str]:
    """Field names of the section at ``loc`` (empty if it is not a model)."""
    current: Any = model
    for part in loc:
        if not (isinstance(current, type) and issubclass(current, BaseModel)):
            return []
        info = current.model_fields.get(str(part))
        if info is None:
            return []
        members = [m for m in _unwrap(info.annotation) if isinstance(m, type)]
        current = next((m for m in members if issubclass(m, BaseModel)), None)
    if isinstance(current, type) and issubclass(current, BaseModel):
        return list(current.model_fields)
    return []


def _sections(
    model: type[BaseModel], prefix: tuple[str, ...] = (), seen: tuple[type, ...] = ()
) -> Iterator[tuple[tuple[str, ...], list[str]]]:
    """Every section of ``model`` (its own, then each nested one): key path, field names."""
    yield prefix, list(model.model_fields)
    for name, info in model.model_fields.items():
        for member in _unwrap(info.annotation):
            nested = isinstance(member, type) and issubclass(member, BaseModel)
            if nested and member not in (*seen, model):  # a model holding itself: once
                yield from _sections(member, (*prefix, name), (*seen, model))


def _other_homes(model: type[BaseModel], loc: KeyPath) -> list[str]:
    """Dotted paths where the unknown key ``loc[-1]`` is valid, in other sections.

    A key written in the wrong section (``flip_columns`` under ``site``, a
    stage's option under another stage) is valid somewhere: the user needs to
    be told where, not only which keys this section has.
    """
    key = str(loc[-1])
    here = tuple(str(part) for part in loc[:-1])
    # The simulator's section describes synthetic data, not the reduction: a
    # reduction key is never meant to go there (detect's seeing is not the
    # simulated ``simulate.psf.fwhm``), so it is offered only from inside it.
    inside_simulate = here[:1] == ("simulate",)
    return [
        ".".join((*prefix, key))
        for prefix, fields in _sections(model)
        if key in fields and prefix != here and (inside_simulate or prefix[:1] != ("simulate",))
    ]


def _unknown_key_text(model: type[BaseModel], loc: KeyPath) -> str:
    """The message for an unknown key: a near spelling, where it belongs, the valid keys."""
    valid = _fields_at(model, loc[:-1])
    close = difflib.get_close_matches(str(loc[-1]), valid, n=1, cutoff=0.6)
    hint = f"did you mean {close[0]!r}? " if close else ""
    homes = _other_homes(model, loc)
    if homes:
        shown = ", ".join(homes[:3]) + (f" (and {len(homes) - 3} more)" if len(homes) > 3 else "")
        hint += f"{loc[-1]!r} is a key of another section ({shown}): move it there? "
    return f"unknown key; {hint}valid keys here: {', '.join(valid)}"


def _where(loc: KeyPath, locations: Locations, label: str) -> str:
    for depth in range(len(loc), -1, -1):
        if loc[:depth] in locations:
            source, line = locations[loc[:depth]]
            return source if line is None else f"{source}, line {line}"
    return label


def _format_errors(
    exc: ValidationError, model: type[BaseModel], locations: Locations, label: str
) -> str:
    lines = []
    for error in exc.errors(include_url=False):
        loc = tuple(error["loc"])
        key_path = ".".join(str(part) for part in loc) or "(top level)"
        where = _where(loc, locations, label)
        if error["type"] == "extra_forbidden":
            text = _unknown_key_text(model, loc)
        elif error["type"] == "missing":
            text = "missing required key"
        else:
            message = error["msg"].removeprefix("Value error, ").rstrip(".")
            got = error.get("input")
            text = message if isinstance(got, Mapping) else f"{message}; got {got!r}"
        lines.append(f"{where}: {key_path}: {text}.")
    return _problem_report(label, lines)


def _problem_report(label: str, lines: list[str]) -> str:
    """The problems as one message: one line for one problem, else a header line
    and one indented line each."""
    if len(lines) == 1:
        return lines[0]
    header = f"{label}: {len(lines)} problems in the config:"
    return "\n  ".join([header, *lines])
