"""Libraries imported for less than their own import costs, with the same result.

photutils (3.0), as it is imported, maps its import name to its
distribution name with :func:`importlib.metadata.packages_distributions`,
which reads the metadata (``top_level.txt`` or ``RECORD``) of every
installed distribution: ~0.2 s of CPU in an environment of ~80 packages,
a fifth of a worker's whole warm-up.  :func:`import_photutils` imports it
while that function answers photutils' own question (which distribution
provides the ``photutils`` package) from photutils' own metadata, and any
other question as the real function does.  Nothing photutils computes
changes: its optional-dependency flags come from the same distribution.
"""

from __future__ import annotations

import importlib.metadata
import sys
from collections.abc import Callable, Iterator, Mapping

__all__ = ["import_photutils"]

#: photutils' import name, which is also its distribution's name.
PHOTUTILS = "photutils"


class _Distributions(Mapping):
    """``packages_distributions()``, scanned only if asked about another package.

    ``known`` answers for the names it holds; any other look-up, iteration
    or length calls ``scan`` (the real function) once.
    """

    def __init__(self, known: dict[str, list[str]], scan: Callable[[], Mapping]):
        self._known = known
        self._scan = scan
        self._all: Mapping | None = None

    def _full(self) -> Mapping:
        if self._all is None:
            self._all = self._scan()
        return self._all

    def __getitem__(self, name: str) -> list[str]:
        if name in self._known:
            return self._known[name]
        return self._full()[name]

    def __iter__(self) -> Iterator[str]:
        return iter(self._full())

    def __len__(self) -> int:
        return len(self._full())


def _own_distribution(name: str) -> dict[str, list[str]]:
    """``{name: [name]}`` if a distribution of that name provides package ``name``, else {}."""
    try:
        dist = importlib.metadata.distribution(name)
    except importlib.metadata.PackageNotFoundError:
        return {}
    top_level = dist.read_text("top_level.txt")
    if top_level is not None:
        return {name: [name]} if name in top_level.split() else {}
    files = dist.files or ()
    return {name: [name]} if any(f.parts[0] == name for f in files if f.parts) else {}


def import_photutils() -> None:
    """Import photutils without its scan of every installed distribution's metadata.

    See the module docstring.  Does nothing if photutils is imported already.
    """
    if PHOTUTILS in sys.modules:
        return
    real = importlib.metadata.packages_distributions
    known = _own_distribution(PHOTUTILS)
    importlib.metadata.packages_distributions = lambda: _Distributions(known, real)
    try:
        importlib.import_module(PHOTUTILS)
    finally:
        importlib.metadata.packages_distributions = real
