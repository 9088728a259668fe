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
their first use (a worker process does it as it starts).
"""

from __future__ import annotations

import contextlib
from collections.abc import Iterator

from astropy.utils import iers
from astropy.utils.data import conf as data_conf

__all__ = ["astropy_offline", "configure_offline", "load_earth_orientation"]

#: (configuration object, item, value while offline).
_OFFLINE = (
    (iers.conf, "auto_download", False),
    (iers.conf, "auto_max_age", None),
    (iers.conf, "iers_degraded_accuracy", "warn"),
    (data_conf, "allow_internet", False),
)


@contextlib.contextmanager
def astropy_offline() -> Iterator[None]:
    """Within the block, astropy never downloads; afterwards its settings are as before.

    Uses the bundled IERS-A/B tables without an age limit, warns (does not
    raise) for times beyond them, and forbids astropy's remote data access.
    Nests freely.
    """
    with contextlib.ExitStack() as stack:
        for conf, item, value in _OFFLINE:
            stack.enter_context(conf.set_temp(item, value))
        yield


def configure_offline() -> None:
    """Set :func:`astropy_offline`'s settings for the rest of the process."""
    for conf, item, value in _OFFLINE:
        setattr(conf, item, value)


def load_earth_orientation() -> None:
    """Read the bundled IERS tables now, with the offline settings.

    Astropy parses them (text tables, about half a second on an idle core)
    the first time a transformation needs Earth orientation, once per
    process, and keeps them: a worker process calls this as it starts (see
    ``Stage.warm``), so that the first unit that needs them does not wait.
    The table is the one the first transformation would read, so nothing it
    computes changes.
    """
    with astropy_offline():
        iers.earth_orientation_table.get()
