"""Shared fixtures.

The test session keeps astropy offline for the whole process (as reproject's
conftest turns off IERS auto-download), so the tests are hermetic.  The
package itself changes no astropy setting on import; tests that check that
the pipeline goes offline by itself restore astropy's defaults first
(``astropy_defaults`` in ``tests/test_geometry_sitetime.py``).
"""

from pipeline._offline import configure_offline

configure_offline()
