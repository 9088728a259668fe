"""A bad column's rows without data: one source per star beside or through them.

A dead CCD column is, after rectify, a few rows of the rectified image
without data along the scan.  The searches' segments cross such narrow gaps
(:func:`pipeline.stages.detect._find.narrow_gaps`); before, a star the gap
cut or passed beside was one segment on each side, fitted as two stars.
"""

from __future__ import annotations

import numpy as np
import pytest

from pipeline.stages.detect._find import narrow_gaps


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
