"""Row chunks and reusable temporaries for whole-stretch array work.

Element-wise work on a large stretch is fastest in chunks of rows small
enough for the temporaries to stay in the processor cache; reusing the
temporaries also avoids the page faults of fresh large allocations, which
can cost more than the arithmetic itself.
"""

from __future__ import annotations

from collections.abc import Iterator

import numpy as np

__all__ = ["CHUNK_ROWS", "Scratch", "row_chunks"]

#: Rows per chunk.
CHUNK_ROWS = 64


def row_chunks(n_rows: int, size: int = CHUNK_ROWS) -> Iterator[tuple[int, int]]:
    """``(start, stop)`` of consecutive chunks of rows (the scan axis)."""
    for start in range(0, n_rows, size):
        yield start, min(start + size, n_rows)


class Scratch:
    """Named temporaries of shape (rows, n_columns), allocated once and reused.

    Parameters
    ----------
    n_columns : int
        Length of axis 1.
    """

    def __init__(self, n_columns: int):
        self.n_columns = n_columns
        self.buffers: dict[tuple[str, np.dtype], np.ndarray] = {}

    def get(self, name: str, n_rows: int, dtype=np.float32) -> np.ndarray:
        """A ``(n_rows, n_columns)`` view of the buffer ``name`` (contents undefined)."""
        key = (name, np.dtype(dtype))
        buffer = self.buffers.get(key)
        if buffer is None or buffer.shape[0] < n_rows:
            buffer = np.empty((max(n_rows, CHUNK_ROWS + 2), self.n_columns), dtype)
            self.buffers[key] = buffer
        return buffer[:n_rows]
