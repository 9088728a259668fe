"""Shared fixtures.  Importing ``pipeline`` puts astropy offline (as reproject's
conftest does with IERS auto-download), so the tests are hermetic."""

import pipeline  # noqa: F401  (side effect: astropy offline)
