"""The compiled functions' disk cache: one folder per version of all their sources.

numba stores a compiled function with the machine code of the compiled
functions it calls from other modules, and checks only the caller's source
file (numba's documentation on caching, from memory; seen in this project
when a change of detect's model left the group fits running the old one), so
a changed callee must change the cache folder.
"""

from __future__ import annotations

import importlib.util
import re
import shutil
from pathlib import Path

import pytest
from numba.core import config as numba_config

import pipeline
import pipeline._jit as jit

PACKAGE = Path(pipeline.__file__).resolve().parent

#: A decoration that compiles with numba, in the package's sources.
COMPILING = re.compile(r"^\s*@(numba\.)?(njit|jit)\b", re.MULTILINE)


def test_every_module_that_compiles_is_listed() -> None:
    found = {
        path.relative_to(PACKAGE).as_posix()
        for path in PACKAGE.rglob("*.py")
        if COMPILING.search(path.read_text(encoding="utf-8"))
    }
    assert found == set(jit.COMPILED_MODULES)


def test_the_packages_compiled_functions_go_through_its_njit() -> None:
    """numba.njit itself would cache next to the sources, where a callee's change is missed."""
    for name in jit.COMPILED_MODULES:
        text = (PACKAGE / name).read_text(encoding="utf-8")
        assert "numba.njit" not in text and "numba.jit" not in text, name
        assert "from pipeline._jit import njit" in text, name


def test_the_digest_follows_every_compiled_source(tmp_path: Path) -> None:
    names = ("a/_caller_jit.py", "b/_callee_jit.py")
    for name in names:
        (tmp_path / name).parent.mkdir(parents=True, exist_ok=True)
        (tmp_path / name).write_text("def f(x):\n    return x + 1\n", encoding="utf-8")
    before = jit.sources_digest(tmp_path, names)
    assert jit.sources_digest(tmp_path, names) == before
    # the callee alone changes (a `git pull` that leaves the caller's file as it was)
    (tmp_path / names[1]).write_text("def f(x):\n    return x + 2\n", encoding="utf-8")
    assert jit.sources_digest(tmp_path, names) != before


@pytest.fixture
def fresh_folder(monkeypatch, tmp_path: Path):
    """cache_folder() worked out again, with the per-user cache in ``tmp_path``."""
    monkeypatch.setenv("ZDRIFT_CACHE_DIR", str(tmp_path / "user-cache"))
    monkeypatch.setattr(numba_config, "CACHE_DIR", "")
    jit.cache_folder.cache_clear()
    yield
    jit.cache_folder.cache_clear()


def _import_file(path: Path):
    spec = importlib.util.spec_from_file_location(path.stem, path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def test_a_compiled_function_caches_in_the_folder_of_the_sources_digest(
    fresh_folder, tmp_path: Path
) -> None:
    source = tmp_path / "src" / "_toy_jit.py"
    source.parent.mkdir()
    source.write_text(
        "from pipeline._jit import njit\n\n\n"
        "@njit(nogil=True)\ndef add_one(x):\n    return x + 1\n",
        encoding="utf-8",
    )
    module = _import_file(source)
    assert module.add_one(1) == 2
    folder = Path(jit.cache_folder())
    assert folder == tmp_path / "user-cache" / "numba" / jit.sources_digest()[:16]
    assert Path(module.add_one._cache._cache_path).parent == folder
    assert list(Path(module.add_one._cache._cache_path).glob("_toy_jit.add_one-*.nbi"))
    # numba's own setting is as it was: other code's functions cache where they did
    assert numba_config.CACHE_DIR == ""


def test_numbas_cache_variable_holds_the_folder(fresh_folder, monkeypatch, tmp_path) -> None:
    monkeypatch.setattr(numba_config, "CACHE_DIR", str(tmp_path / "numba-cache"))
    expected = tmp_path / "numba-cache" / f"zdrift-{jit.sources_digest()[:16]}"
    assert Path(jit.cache_folder()) == expected


def test_without_a_user_cache_numba_keeps_its_own_places(fresh_folder, monkeypatch) -> None:
    monkeypatch.setenv("ZDRIFT_CACHE_DIR", "")
    assert jit.cache_folder() is None


def test_a_copy_of_the_package_with_another_callee_gets_another_folder(tmp_path: Path) -> None:
    """The real modules: a change in the model (a callee of the group fits) moves the folder."""
    copy = tmp_path / "pipeline"
    for name in jit.COMPILED_MODULES:
        (copy / name).parent.mkdir(parents=True, exist_ok=True)
        shutil.copyfile(PACKAGE / name, copy / name)
    assert jit.sources_digest(copy) == jit.sources_digest()
    callee = copy / "stages/detect/_pixel_gauss_jit.py"
    callee.write_text(callee.read_text(encoding="utf-8") + "\n# changed\n", encoding="utf-8")
    assert jit.sources_digest(copy) != jit.sources_digest()
