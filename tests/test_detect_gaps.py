"""A bad column's rows without data: one source per star beside or through them.

A dead CCD column is, after rectify, a few rows of the rectified image
without data along the scan.  The searches' segments cross such narrow gaps
(:func:`pipeline.stages.detect._find.narrow_gaps`); before, a star the gap
cut or passed beside was one segment on each side, fitted as two stars.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.spatial import cKDTree

from pipeline.masks import MaskBit
from pipeline.stages.detect import detect
from pipeline.stages.detect._find import narrow_gaps
from tests._detect_scene import render_scene


def _runs_reference(no_data: np.ndarray, max_rows: int) -> np.ndarray:
    """narrow_gaps the slow way: each column's runs walked one pixel at a time."""
    out = np.zeros(no_data.shape, bool)
    ny = no_data.shape[0]
    for c in range(no_data.shape[1]):
        r = 0
        while r < ny:
            if not no_data[r, c]:
                r += 1
                continue
            start = r
            while r < ny and no_data[r, c]:
                r += 1
            if start > 0 and r < ny and r - start <= max_rows:
                out[start:r, c] = True
    return out


@pytest.mark.parametrize("max_rows", [1, 3, 5])
def test_narrow_gaps_are_the_short_runs_across_the_scan(max_rows):
    rng = np.random.default_rng(4)
    no_data = rng.random((60, 40)) < 0.3
    no_data[:4, 5] = True  # a run from the first row: nothing before it
    no_data[-2:, 7] = True  # ... and one to the last row
    no_data[20:24, :] = True  # a bad column's four rows
    no_data[30:45, 10:12] = True  # a hole longer than any max_rows
    expected = _runs_reference(no_data, max_rows)
    assert np.array_equal(narrow_gaps(no_data, max_rows), expected)
    assert not narrow_gaps(np.zeros((8, 8), bool), max_rows).any()
    with pytest.raises(ValueError, match="max_rows"):
        narrow_gaps(no_data, 0)


def test_a_star_beside_or_through_a_bad_column_is_one_source():
    """Self-consistency against the scene's own truth (the stars it rendered).

    Four rows without data (one bad raw column after rectify) run along the
    scan; stars of S/N 12 to ~2000 sit on them (cut through the core) or 2-4
    px beside them, others far away for the seeing fit.  Each true star must
    be found once, and nothing else found.  Before the searches crossed the
    gap, the 30 stars at it left 25 extra sources on its other side or in it
    (all EDGE, 6 FIT_FAILED) and two stars were missed; with the searches
    crossing it but the quadrupole test run on the cut cores, two stars of
    S/N 2000 were flagged UNRESOLVED and split into pairs.
    """
    gap = slice(62, 66)  # rows 62-65: a bad column's four rectified rows
    n = 30
    x = np.linspace(40.0, 960.0, n)
    rng = np.random.default_rng(11)
    # through the core (centre 63.5 +- 1.5) or beside it (2-4 px off its edge rows)
    offset = np.tile([0.0, -1.5, 1.5, -4.0, 4.5, -6.0], n // 6) + rng.uniform(-0.3, 0.3, n)
    y = 63.5 + offset
    snr = np.tile([12.0, 40.0, 300.0, 2000.0, 25.0], n // 5)
    # isolated stars far from the gap, for the seeing
    x = np.concatenate([x, np.linspace(60.0, 940.0, 8)])
    y = np.concatenate([y, np.tile([20.0, 108.0], 4)])
    snr = np.concatenate([snr, np.full(8, 200.0)])
    scene = render_scene(x, y, None, snr=snr, shape=(128, 1000), x_start=0, seed=5)
    image, mask = scene.image.copy(), scene.mask.copy()
    image[gap] = np.nan
    mask[gap] |= np.uint16(MaskBit.BAD_COLUMN | MaskBit.NONFINITE)  # as rectify flags them
    cat = detect(image, scene.variance, mask, scene.kernels, fwhm_guess=3.2).catalog
    found = np.column_stack([cat["x"].value, cat["y"].value])
    # Every detection is a true star: within 1.5 px (a faint star's position
    # across a gap that took its core is off by ~1 px; the stars are 30 px
    # apart, so no detection is a neighbour's), and no star twice.
    d, k = cKDTree(np.column_stack([x, y])).query(found)
    extra = (d > 1.5) | (np.bincount(k, minlength=x.size)[k] > 1)
    assert not extra.any(), (found[extra], cat["flags"].value[extra], cat["snr"].value[extra])
    # ... and every true star is found, but for the faintest (S/N 12) with
    # its core in the gap: the wings alone may be below the threshold.
    missed = np.setdiff1d(np.arange(x.size), k)
    assert np.all((snr[missed] < 20.0) & (np.abs(y[missed] - 63.5) < 2.0)), missed
    assert missed.size <= 1
