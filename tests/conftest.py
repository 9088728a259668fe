"""Shared fixtures.

The test session keeps astropy offline for the whole process (as reproject's
conftest turns off IERS auto-download), so the tests are hermetic.  The
package itself changes no astropy setting on import; tests that check that
the pipeline goes offline by itself restore astropy's defaults first
(``astropy_defaults`` in ``tests/test_geometry_sitetime.py``).
"""

import pytest

from pipeline._offline import configure_offline

configure_offline()


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
