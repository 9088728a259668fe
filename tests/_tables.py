"""Two astropy tables compared value for value, with their dtypes, units and meta."""

from __future__ import annotations

import numpy as np
from astropy.table import Table


def assert_same_table(ours: Table, theirs: Table) -> None:
    """Assert that ``ours`` is ``theirs``: class, columns, dtypes, units, descriptions,
    formats, meta, and values bit for bit (NaNs included) with their masks."""
    assert type(ours) is type(theirs)
    assert ours.colnames == theirs.colnames
    assert ours.meta == theirs.meta and type(ours.meta) is type(theirs.meta)
    for name in theirs.colnames:
        mine, other = ours[name], theirs[name]
        assert type(mine) is type(other), name
        assert mine.dtype == other.dtype and mine.shape == other.shape, name
        assert getattr(mine, "unit", None) == getattr(other, "unit", None), name
        assert mine.info.description == other.info.description, name
        assert mine.info.format == other.info.format, name
        assert mine.info.meta == other.info.meta, name
        values = np.asarray(getattr(mine, "value", mine))
        expected = np.asarray(getattr(other, "value", other))
        if values.dtype.kind == "O":
            assert values.tolist() == expected.tolist(), name
        else:
            assert values.tobytes() == expected.tobytes(), name  # bit for bit, NaN too
        assert np.array_equal(np.ma.getmaskarray(mine), np.ma.getmaskarray(other)), name
