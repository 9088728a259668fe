"""Keep astropy offline while the pipeline works, without touching the caller's settings.

Astropy fetches fresh IERS Earth-orientation tables when its bundled ones are
older than ``auto_max_age`` days.  Telescopes are often off the network, and a
reduction must be reproducible, so while the pipeline computes it uses the
tables bundled with ``astropy-iers-data`` and, past their range, warns instead
of failing (``iers_degraded_accuracy = 'warn'``).  Setting ``auto_download =
False`` alone is not enough: with the default ``auto_max_age`` astropy then
raises for recent dates.

:func:`astropy_offline` sets this for the duration of a ``with`` block only
(astropy's ``conf.set_temp``): the runner (:func:`pipeline.run_night` and
every unit a worker runs), the command line and the geometry's entry points
use it, and ``import pipeline`` changes nothing.  :func:`configure_offline`
sets the same for the whole process, for a script or a test session that
wants it.  :func:`load_earth_orientation` reads the bundled tables ahead of
their first use (a worker process does it as it starts), from a per-user
cache of the parsed table when there is one.

Going offline imports neither ``astropy.utils.iers`` (which brings
``astropy.table`` and ``astropy.io.fits``) nor ``astropy.utils.data``:
astropy's configuration items read their value from its configuration store
(:func:`astropy.config.get_config`, the in-memory form of ``astropy.cfg``)
each time they are used, so the settings are written there, where the
modules find them once a stage imports them: the command line does not
load the tables' code before a command needs it.
"""

from __future__ import annotations

import contextlib
import hashlib
import logging
import os
import pickle
import stat
from collections.abc import Iterator
from pathlib import Path

from astropy.config import get_config

__all__ = [
    "CACHE_ENV",
    "astropy_offline",
    "cache_dir",
    "configure_offline",
    "load_earth_orientation",
]

log = logging.getLogger(__name__)

#: (module that defines the configuration item, item, value while offline):
#: ``astropy.utils.iers.conf`` and ``astropy.utils.data.conf``.
_OFFLINE = (
    ("astropy.utils.iers.iers", "auto_download", False),
    ("astropy.utils.iers.iers", "auto_max_age", None),
    ("astropy.utils.iers.iers", "iers_degraded_accuracy", "warn"),
    ("astropy.utils.data", "allow_internet", False),
)
#: Marks an item absent from astropy's configuration store (its default applies).
_ABSENT = object()


@contextlib.contextmanager
def astropy_offline() -> Iterator[None]:
    """Within the block, astropy never downloads; afterwards its settings are as before.

    Uses the bundled IERS-A/B tables without an age limit, warns (does not
    raise) for times beyond them, and forbids astropy's remote data access.
    Nests freely.  What each item held before (a value, or nothing: astropy's
    default) is put back at the end, as ``ConfigItem.set_temp`` does.
    """
    saved = [(get_config(module), item) for module, item, _ in _OFFLINE]
    saved = [(section, item, section.get(item, _ABSENT)) for section, item in saved]
    configure_offline()
    try:
        yield
    finally:
        for section, item, value in saved:
            if value is _ABSENT:
                section.pop(item, None)
            else:
                section[item] = value


def configure_offline() -> None:
    """Set :func:`astropy_offline`'s settings for the rest of the process."""
    for module, item, value in _OFFLINE:
        get_config(module)[item] = value


#: Environment variable naming the folder of :func:`load_earth_orientation`'s
#: cache; default ``$XDG_CACHE_HOME/zdrift`` (``~/.cache/zdrift``); empty: no cache.
CACHE_ENV = "ZDRIFT_CACHE_DIR"


def cache_dir() -> Path | None:
    """The folder of the pipeline's per-user cache, or None if it is turned off."""
    folder = os.environ.get(CACHE_ENV)
    if folder is not None:
        return Path(folder) if folder else None
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return Path(base) / "zdrift"


def _iers_cache_file(folder: Path) -> Path | None:
    """Where the table parsed from the bundled IERS files is kept, or None if not cacheable.

    The name holds a hash of the astropy, astropy-iers-data and numpy versions and
    of the path, size and modification time of each file the table is read
    from: another version or another file gives another cache file.  None
    when a ``finals2000A.all`` in the working directory would be read instead
    (astropy's backward-compatible behaviour).
    """
    if os.path.exists("finals2000A.all"):
        return None
    import astropy
    import astropy_iers_data
    import numpy
    from astropy.utils import iers

    key = [astropy.__version__, astropy_iers_data.__version__, numpy.__version__]
    for name in (iers.IERS_A_FILE, iers.IERS_A_README, iers.IERS_B_FILE, iers.IERS_B_README):
        info = os.stat(name)
        key.append(f"{os.path.abspath(name)} {info.st_size} {info.st_mtime_ns}")
    digest = hashlib.sha256("\n".join(key).encode()).hexdigest()[:16]
    return folder / f"iers-auto-{digest}.pickle"


def _owned_by_user(folder: Path) -> bool:
    """True if ``folder`` belongs to this user and only this user can write to it."""
    if not hasattr(os, "getuid"):
        return True
    try:
        info = folder.stat()
    except OSError:
        return False
    return info.st_uid == os.getuid() and not info.st_mode & (stat.S_IWGRP | stat.S_IWOTH)


def load_earth_orientation() -> None:
    """Read the bundled IERS tables now, with the offline settings, from a cache if possible.

    Astropy parses them (text tables, about 0.45 s of CPU) the first time a
    transformation needs Earth orientation, once per process, and keeps
    them: a worker process calls this as it starts (see ``Stage.warm``), so
    that the first unit that needs them does not wait.  The parsed table is
    kept in :func:`cache_dir` as a pickle, which loads in about 10 ms: the
    next process takes it from there.  The table is the
    one the first transformation would read (the cached object is the one
    astropy parsed), so nothing it computes changes.

    A pickle runs code as it loads, so the cache is read only from a folder
    that belongs to this user and that no one else can write to.  A cache
    that cannot be read or written is passed over (the tables are parsed).
    """
    from astropy.utils import iers

    if iers.IERS_Auto.iers_table is not None:
        return
    folder = cache_dir()
    path = None if folder is None else _iers_cache_file(folder)
    if path is not None and path.is_file() and _owned_by_user(path.parent):
        try:
            with open(path, "rb") as stream:
                table = pickle.load(stream)
        except Exception as exc:  # unreadable, truncated: parse (and write it again)
            log.debug("IERS cache %s not used: %s", path, exc)
        else:
            if type(table) is iers.IERS_Auto:
                iers.IERS_Auto.iers_table = table
                return
    with astropy_offline():
        table = iers.earth_orientation_table.get()
    if path is None or type(table) is not iers.IERS_Auto:
        return
    try:
        path.parent.mkdir(mode=0o700, parents=True, exist_ok=True)
        if not _owned_by_user(path.parent):
            return
        temporary = path.with_name(f".{path.name}.{os.getpid()}")
        with open(temporary, "wb") as stream:
            pickle.dump(table, stream, protocol=pickle.HIGHEST_PROTOCOL)
        os.replace(temporary, path)  # whole or absent, for processes reading it at once
    except OSError as exc:
        log.debug("IERS cache %s not written: %s", path, exc)
