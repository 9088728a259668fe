"""Shared fixtures.

The test session keeps astropy offline for the whole process (as reproject's
conftest turns off IERS auto-download), so the tests are hermetic.  The
package itself changes no astropy setting on import; tests that check that
the pipeline goes offline by itself restore astropy's defaults first
(``astropy_defaults`` in ``tests/test_geometry_sitetime.py``).  Nor does a
test use the per-user cache folder (``ZDRIFT_CACHE_DIR`` is set empty).
"""

import os

import pytest

from pipeline._offline import CACHE_ENV, configure_offline

configure_offline()
# No per-user cache of parsed IERS tables (the test workers inherit this):
# tests neither read nor write the user's cache folder.
os.environ[CACHE_ENV] = ""


@pytest.fixture(scope="module")
def dask_cluster():
    """A two-worker dask LocalCluster on loopback, one per test module."""
    distributed = pytest.importorskip("distributed")
    cluster = distributed.LocalCluster(
        n_workers=2,
        threads_per_worker=1,
        processes=True,
        host="127.0.0.1",
        # A random loopback port, not the usual 8787: another cluster on the
        # machine must not turn the port-change warning into a test error.
        dashboard_address="127.0.0.1:0",
        scheduler_kwargs={"dashboard": False},
    )
    yield cluster
    cluster.close()
