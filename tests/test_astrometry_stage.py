"""The astrometry stage's own pieces: reference columns, per-stretch WCS cards, options.

The solver itself is tested in test_astrometry.py; the stage end to end on
the demo night in test_night_run.py.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from astropy import units as u
from astropy.table import QTable
from astropy.wcs import WCS

from pipeline.exceptions import AstrometryError
from pipeline.stages.astrometry import (
    STAGE,
    AstrometryStageOptions,
    reference_columns,
    solve_night,
    stretch_wcs_cards,
)
from pipeline.stages.base import Stage
from tests._astrometry_scene import make_night


def test_reference_columns_follow_ref_index():
    """ref_mag/ref_colour are the matched star's values, NaN where unmatched."""
    reference = QTable({"mag": [15.0, 16.0, 17.0] * u.mag, "colour": [0.1, 0.2, 0.3] * u.mag})
    out = reference_columns(np.array([2, -1, 0, 2]), reference)
    np.testing.assert_array_equal(out["ref_mag"].to_value(u.mag), [17.0, np.nan, 15.0, 17.0])
    np.testing.assert_array_equal(out["ref_colour"].to_value(u.mag), [0.3, np.nan, 0.1, 0.3])
    # a reference without colours: NaN throughout, the column is still there
    out = reference_columns(np.array([1, -1]), reference[["mag"]])
    assert np.isnan(out["ref_colour"]).all() and out["ref_mag"][0] == 16.0 * u.mag


def test_stage_declaration_and_options():
    """Night scope after catalog; the reference file is streamed; keys are validated."""
    assert STAGE.scope == "night" and "catalog" in STAGE.requires
    assert STAGE.streams == ("reference.path",)
    options = AstrometryStageOptions.model_validate(
        {"min_matches": 10, "reference": {"source": "file", "path": "ref.ecsv"}}
    )
    assert options.reference.path.name == "ref.ecsv" and options.wcs_tolerance == 0.02
    with pytest.raises(ValueError, match="path"):
        AstrometryStageOptions.model_validate({"reference": {"source": "file"}})
    with pytest.raises(ValueError, match="streams names"):
        Stage("x", STAGE.run, AstrometryStageOptions, ("catalog",), "night", streams=("nope",))


@pytest.fixture(scope="module")
def solution():
    night = make_night(50.0, n_stars=1500, duration=900.0)
    sigma = np.full(night.x.size, night.sigma)
    return solve_night(
        night.x, night.y, night.ref_ra, night.ref_dec, night.nominal, night.frame,
        x_err=sigma, y_err=sigma,
    )  # fmt: skip


def test_stretch_wcs_cards_reproduce_the_solution(solution):
    """The cards, through JSON and astropy.wcs, give the solved sky to <= 0.02 px."""
    x_start, n_x = 2000, 700
    cards, max_error = stretch_wcs_cards(solution, x_start, n_x, 0.02)
    assert cards["WCSDEV"] == pytest.approx(max_error, abs=1e-6)
    wcs = WCS(json.loads(json.dumps(cards)))  # the product is stored as JSON
    rng = np.random.default_rng(5)
    x = rng.uniform(-0.5, n_x - 0.5, 200)
    y = rng.uniform(-0.5, solution.frame.n_y - 0.5, 200)
    ra, dec = solution.sky_from_rectified(x + x_start, y)
    px, py = wcs.all_world2pix(ra, dec, 0)
    # 0.02 px: the bound for every image product's WCS
    assert np.max(np.hypot(px - x, py - y)) <= 0.02
    with pytest.raises(AstrometryError, match="SIP degree 5"):
        stretch_wcs_cards(solution, x_start, n_x, 1e-9)
