"""Keep astropy strictly offline.

Astropy fetches fresh IERS Earth-orientation tables when its bundled ones are
older than ``auto_max_age`` days.  Telescopes are often off the network, and a
reduction must be reproducible, so the pipeline always uses the tables bundled
with ``astropy-iers-data`` and, past their range, warns instead of failing
(``iers_degraded_accuracy = 'warn'``).  Setting ``auto_download = False`` alone
is not enough: with the default ``auto_max_age`` astropy then raises for recent
dates.
"""

from astropy.utils import iers
from astropy.utils.data import conf as data_conf

__all__ = ["configure_offline"]


def configure_offline() -> None:
    """Configure astropy so that it never tries to download anything.

    Sets ``astropy.utils.iers.conf`` to use the bundled IERS-A/B tables without
    an age limit and to warn (not raise) when a time lies beyond them, and
    forbids astropy's remote data access altogether.
    """
    iers.conf.auto_download = False
    iers.conf.auto_max_age = None
    iers.conf.iers_degraded_accuracy = "warn"
    data_conf.allow_internet = False
