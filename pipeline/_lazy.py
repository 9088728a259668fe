"""Public names of a package imported from their modules on first use (PEP 562).

A package whose ``__init__`` imports every module it re-exports loads, with
them, the libraries they need (scipy, photutils, matplotlib): a command that
only reads a config and checks which products are up to date would pay for
all of them.  A package built with :func:`lazy_exports` imports a module when
one of its names is first looked up, and raises the module's own ImportError
then, unhidden.
"""

from __future__ import annotations

import importlib
from collections.abc import Callable, Iterable, Mapping
from typing import Any

__all__ = ["lazy_exports"]


def lazy_exports(
    package: str, modules: Mapping[str, Iterable[str]]
) -> tuple[Callable[[str], Any], Callable[[], list[str]]]:
    """Module ``__getattr__`` and ``__dir__`` for a package's lazily imported names.

    Parameters
    ----------
    package : str
        The package's ``__name__``.
    modules : mapping of str to iterable of str
        Module name relative to the package (``'_figures'``) -> the public
        names it defines.

    Returns
    -------
    (callable, callable)
        ``__getattr__(name)``: the attribute ``name`` of its module, imported
        (and cached in the package's namespace) on first use; AttributeError
        for other names.  ``__dir__()``: the package's names and the lazy ones.

    Examples
    --------
    In a package's ``__init__.py``::

        __getattr__, __dir__ = lazy_exports(__name__, {"_sky": ["measure_sky"]})
    """
    where = {name: module for module, names in modules.items() for name in names}
    namespace = importlib.import_module(package).__dict__

    def __getattr__(name: str) -> Any:  # noqa: N807 (the module hook's name)
        if name not in where:
            raise AttributeError(f"module {package!r} has no attribute {name!r}")
        value = getattr(importlib.import_module(f"{package}.{where[name]}"), name)
        namespace[name] = value
        return value

    def __dir__() -> list[str]:  # noqa: N807 (the module hook's name)
        return sorted(set(namespace) | set(where))

    return __getattr__, __dir__
