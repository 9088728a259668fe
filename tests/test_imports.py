"""Libraries imported for less: the same library state as a plain import.

:func:`pipeline._imports.import_photutils` answers photutils' question about
its own distribution without scanning every installed distribution.  What
photutils derives from the answer (its distribution name and the optional
dependencies its ``HAS_*`` flags stand for) must be what the real scan gives
(:func:`importlib.metadata.packages_distributions`, the standard library's
reference), and the real function must be back in place afterwards.  Each
check runs in a fresh interpreter, since this process may hold photutils.
"""

from __future__ import annotations

import importlib.metadata
import json
import subprocess
import sys

import pytest

from pipeline._imports import _Distributions, _own_distribution

#: In a fresh interpreter: import photutils our way, then report what it
#: derived, what the real scan derives, and whether the real function is back.
_CHECK = """
import importlib.metadata, json
real = importlib.metadata.packages_distributions
from pipeline._imports import import_photutils
import_photutils()
import photutils.utils._optional_deps as deps
name = real().get("photutils", ["photutils"])[0]
print(json.dumps({
    "dist": deps._pkg_dist_name,
    "real_dist": name,
    "deps": deps._deps_by_key,
    "real_deps": {deps._dist_to_has_key(d): d for d in deps._get_optional_deps(name)},
    "restored": importlib.metadata.packages_distributions is real,
}))
"""


def test_photutils_imported_our_way_derives_what_the_real_scan_gives():
    done = subprocess.run(
        [sys.executable, "-c", _CHECK], capture_output=True, text=True, check=False
    )
    assert done.returncode == 0, done.stderr
    state = json.loads(done.stdout.splitlines()[-1])
    assert state["dist"] == state["real_dist"] == "photutils"
    assert state["deps"] == state["real_deps"]
    assert state["restored"]


def test_other_names_are_answered_by_the_real_scan():
    real = importlib.metadata.packages_distributions()
    mapping = _Distributions(
        _own_distribution("photutils"), importlib.metadata.packages_distributions
    )
    assert mapping.get("photutils") == real["photutils"]
    assert mapping.get("numpy") == real["numpy"]
    assert mapping.get("no_such_package_here") is None
    assert dict(mapping) == real


def test_a_name_no_distribution_provides_is_left_to_the_scan():
    assert _own_distribution("no_such_package_here") == {}
    with pytest.raises(KeyError):
        _Distributions({}, dict)["photutils"]
