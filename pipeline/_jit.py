"""Compiled loops: numba's ``njit`` with its disk cache in a folder per version of them.

numba keeps a compiled function's machine code on disk (``cache=True``) so that
a new process loads it in milliseconds instead of compiling it for seconds.  It
stores, with a function, the machine code of the compiled functions it calls
from other modules, but checks only the modification time and size of the
function's own source file.  After an update that changes a called module and
not the caller's (a ``git pull`` in a checkout installed with ``pip install
-e .``), the caller would go on running the old code, silently.

So the package's compiled modules (:data:`COMPILED_MODULES`) share a cache
folder named after a SHA-256 of all their sources (:func:`cache_folder`):
changing any of them starts a fresh folder, and everything is compiled anew
once (seconds, on the first unit that needs it).  The folder is in the
pipeline's per-user cache (``$XDG_CACHE_HOME/zdrift`` or ``~/.cache/zdrift``,
or the ``ZDRIFT_CACHE_DIR`` folder), or under ``NUMBA_CACHE_DIR`` when that is
set.  With the per-user cache turned off (``ZDRIFT_CACHE_DIR=``) and no
``NUMBA_CACHE_DIR``, numba's own places are used (next to the sources), where
the stale machine code described above is possible: clear them after an
update (delete the ``*.nbi`` and ``*.nbc`` files of ``pipeline/``).

Old folders are not removed (a few MB each): delete ``~/.cache/zdrift/numba``
to reclaim them.
"""

from __future__ import annotations

import functools
import hashlib
from collections.abc import Callable
from pathlib import Path

import numba
from numba.core import config as numba_config

__all__ = ["COMPILED_MODULES", "cache_folder", "njit", "sources_digest"]

#: The package's modules of compiled functions (paths from the package's
#: folder): every module that compiles with :func:`njit`.  A test checks that
#: the list is complete.
COMPILED_MODULES = (
    "mosaic/_coadd_jit.py",
    "mosaic/_resample_jit.py",
    "stages/astrometry/_model_jit.py",
    "stages/calibrate/_cosmics_jit.py",
    "stages/detect/_find_jit.py",
    "stages/detect/_fit_jit.py",
    "stages/detect/_measure_jit.py",
    "stages/detect/_pixel_gauss_jit.py",
    "stages/rectify/_resample_jit.py",
)

_PACKAGE = Path(__file__).resolve().parent


def sources_digest(root: Path = _PACKAGE, modules: tuple[str, ...] = COMPILED_MODULES) -> str:
    """SHA-256 (hex) of the names and contents of ``modules`` under ``root``."""
    digest = hashlib.sha256()
    for name in modules:
        data = (root / name).read_bytes()
        digest.update(f"{name}\0{len(data)}\0".encode())
        digest.update(data)
    return digest.hexdigest()


@functools.cache
def cache_folder() -> str | None:
    """The folder of the compiled functions' disk cache (None: numba's own places).

    ``NUMBA_CACHE_DIR/zdrift-<digest>`` when numba's variable is set, else
    ``<per-user cache>/numba/<digest>``; the digest is the first 16 hex
    digits of :func:`sources_digest`.
    """
    from pipeline._offline import cache_dir

    digest = sources_digest()[:16]
    if numba_config.CACHE_DIR:  # the user's NUMBA_CACHE_DIR
        return str(Path(numba_config.CACHE_DIR) / f"zdrift-{digest}")
    base = cache_dir()
    return None if base is None else str(base / "numba" / digest)


def njit(**options) -> Callable[[Callable], Callable]:
    """``numba.njit(cache=True, **options)``, caching in :func:`cache_folder`.

    numba picks a function's cache folder as it is decorated (from its
    ``CACHE_DIR`` setting); the setting is changed for the decoration only,
    so other code's compiled functions keep theirs.
    """

    def decorate(function: Callable) -> Callable:
        folder, saved = cache_folder(), numba_config.CACHE_DIR
        if folder is not None:
            numba_config.CACHE_DIR = folder
        try:
            return numba.njit(cache=True, **options)(function)
        finally:
            numba_config.CACHE_DIR = saved

    return decorate
