"""Detector effects of a TDI camera, for the simulator.

Private helpers of :mod:`pipeline.simulate`: pure numpy functions over images
whose axis 0 is the scan axis (strip rows, time) and axis 1 the columns.

The TDI-specific facts used here (DEVELOPERS.md, "TDI detector facts"): every output
pixel of a column has integrated through all detector rows of that column, so
the flat field and the dark current are 1-D vectors over columns; a hot pixel
adds its rate times one line time to every output pixel of its column; a
saturated packet spills along its column (bleed trails run along the scan);
cosmic rays are sharp (the charge rides with the packet); the first
``tdi_rows`` lines after clocking starts have partial exposure.
"""

from __future__ import annotations

import numpy as np

__all__ = [
    "ColumnProperties",
    "bleed_along_columns",
    "cosmic_ray_hits",
    "digitise",
    "draw_column_properties",
    "exposure_fraction",
]


class ColumnProperties:
    """Fixed per-column properties of the camera.

    Attributes
    ----------
    response : ndarray, shape (n_columns,)
        Relative response (the 1-D TDI flat field), mean about 1.
    dark : ndarray, shape (n_columns,)
        Dark electrons per output pixel at full exposure.
    bias_pattern : ndarray, shape (n_columns,)
        Fixed bias offset of each image column, ADU.
    hot : ndarray of int
        Indices of hot columns.
    dead : ndarray of int
        Indices of dead or low-response columns.
    """

    def __init__(self, response, dark, bias_pattern, hot, dead):
        self.response = response
        self.dark = dark
        self.bias_pattern = bias_pattern
        self.hot = hot
        self.dead = dead


def draw_column_properties(
    n_columns: int,
    rng: np.random.Generator,
    *,
    flat_rms: float,
    vignetting: float,
    dark_rate: float,
    dark_rms: float,
    integration_time: float,
    line_time: float,
    hot_columns: int,
    hot_rate: float,
    dead_columns: int,
    dead_response: tuple[float, float],
    bias_column_rms: float,
) -> ColumnProperties:
    """Draw the camera's fixed column pattern.

    Parameters
    ----------
    n_columns : int
        Image columns.
    rng : numpy.random.Generator
        Random stream.
    flat_rms : float
        Rms of the random column-to-column response (fraction).
    vignetting : float
        Fractional response loss at the chip's cross-scan edges (quadratic).
    dark_rate, dark_rms : float
        Mean dark current and its column-to-column rms, e-/s per detector pixel.
    integration_time : float
        ``tdi_rows * line_time``, seconds.
    line_time : float
        Seconds per row (a hot pixel adds ``hot_rate * line_time`` per output pixel).
    hot_columns : int
        Number of columns with one hot pixel.
    hot_rate : float
        Dark rate of a hot pixel, e-/s.
    dead_columns : int
        Number of dead or low columns.
    dead_response : (float, float)
        Range of the response of dead/low columns.
    bias_column_rms : float
        Rms of the fixed per-column bias offset, ADU.
    """
    x = (np.arange(n_columns) - (n_columns - 1) / 2.0) / max(n_columns / 2.0, 1.0)
    response = (1.0 - vignetting * x**2) * (1.0 + flat_rms * rng.standard_normal(n_columns))
    dark = np.maximum(dark_rate + dark_rms * rng.standard_normal(n_columns), 0.0)
    dark = dark * integration_time
    n_special = min(hot_columns + dead_columns, n_columns)
    special = rng.choice(n_columns, size=n_special, replace=False)
    hot = np.sort(special[:hot_columns])
    dead = np.sort(special[hot_columns:])
    dark[hot] += hot_rate * line_time * rng.uniform(0.5, 2.0, hot.size)
    response[dead] = rng.uniform(dead_response[0], dead_response[1], dead.size)
    bias_pattern = bias_column_rms * rng.standard_normal(n_columns)
    return ColumnProperties(response, dark, bias_pattern, hot, dead)


def exposure_fraction(rows: np.ndarray, tdi_rows: int, start_ramp: bool) -> np.ndarray:
    """Fraction of the full integration received by night rows ``rows``.

    With ``start_ramp`` clocking starts when night row 0 is read out, so row
    ``k`` has integrated ``k / tdi_rows`` of the full time.

    Parameters
    ----------
    rows : ndarray
        Night row indices (row 0 = first row of the first block).
    tdi_rows : int
        Detector rows crossed by a packet.
    start_ramp : bool
        Whether the night starts with clocking (else clocking ran long before).
    """
    rows = np.asarray(rows, dtype=float)
    if not start_ramp:
        return np.ones_like(rows)
    return np.clip(rows / tdi_rows, 0.0, 1.0)


def bleed_along_columns(electrons: np.ndarray, full_well: float) -> np.ndarray:
    """Spill charge above the full well into neighbouring packets of the column.

    Each run of over-full pixels in a column hands its excess outwards, along
    the scan (axis 0), filling the pixels above and below it up to the full
    well, nearest first and both sides alike, until the excess is used up.
    Charge that would leave the image is lost.  Operates in place and returns
    ``electrons``.

    Parameters
    ----------
    electrons : ndarray, shape (n_rows, n_columns)
        Electrons per pixel.
    full_well : float
        Capacity of a packet, electrons.
    """
    over = electrons > full_well
    if not over.any():
        return electrons
    for col in np.flatnonzero(over.any(axis=0)):
        column = electrons[:, col]
        d = np.diff(np.concatenate(([0], over[:, col].view(np.int8), [0])))
        for a, b in zip(np.flatnonzero(d == 1), np.flatnonzero(d == -1), strict=True):
            _spill(column, a, b, full_well)
    return electrons


def _spill(column: np.ndarray, a: int, b: int, full_well: float) -> None:
    """Move the excess of ``column[a:b]`` outwards symmetrically (vectorised)."""
    excess = float(np.sum(np.maximum(column[a:b] - full_well, 0.0)))
    column[a:b] = np.minimum(column[a:b], full_well)
    below, above = column[:a][::-1], column[b:]  # views, nearest pixel first
    n = max(below.size, above.size)
    room = np.zeros((n, 2))
    room[: below.size, 0] = np.maximum(full_well - below, 0.0)
    room[: above.size, 1] = np.maximum(full_well - above, 0.0)
    cumulative = np.cumsum(room.sum(axis=1))
    full = int(np.searchsorted(cumulative, excess))  # distances filled completely
    fill = room.copy()
    if full < n:
        done = cumulative[full - 1] if full > 0 else 0.0
        step = room[full].sum()
        fill[full] *= (excess - done) / step if step > 0 else 0.0
        fill[full + 1 :] = 0.0
    below += fill[: below.size, 0]
    above += fill[: above.size, 1]


def cosmic_ray_hits(
    shape: tuple[int, int],
    n_hits: int,
    rng: np.random.Generator,
    *,
    mean_electrons: float = 2000.0,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Draw sharp cosmic-ray deposits: 1-4 connected pixels per hit.

    Parameters
    ----------
    shape : (int, int)
        Image shape; axis 0 is the scan axis.
    n_hits : int
        Number of events.
    rng : numpy.random.Generator
        Random stream.
    mean_electrons : float
        Mean total charge per event (log-normal spread, common practice).

    Returns
    -------
    rows, cols, electrons : ndarray
        Pixel indices and charges of all deposits (hits split over pixels).
    """
    n_rows, n_cols = shape
    if n_hits <= 0:
        empty = np.zeros(0, dtype=np.int64)
        return empty, empty, np.zeros(0)
    r0 = rng.integers(0, n_rows, n_hits)
    c0 = rng.integers(0, n_cols, n_hits)
    total = mean_electrons * rng.lognormal(-0.32, 0.8, n_hits)  # mean of lognormal(-s^2/2, s) = 1
    n_pix = rng.integers(1, 5, n_hits)
    steps = np.array([[0, 0], [0, 1], [1, 0], [1, 1], [-1, 0], [0, -1]])
    rows, cols, charge = [], [], []
    for k in range(4):
        has = n_pix > k
        pick = steps[rng.integers(0, len(steps), has.sum())] if k else np.zeros((has.sum(), 2), int)
        share = rng.uniform(0.2, 1.0, has.sum()) / n_pix[has]
        rows.append(np.clip(r0[has] + pick[:, 0], 0, n_rows - 1))
        cols.append(np.clip(c0[has] + pick[:, 1], 0, n_cols - 1))
        charge.append(total[has] * share)
    return np.concatenate(rows), np.concatenate(cols), np.concatenate(charge)


def digitise(
    electrons: np.ndarray,
    bias_adu: np.ndarray,
    gain: float,
    saturate: float,
    dtype=np.uint16,
) -> np.ndarray:
    """Convert electrons to ADU, add bias, round and clip at ``saturate``.

    Parameters
    ----------
    electrons : ndarray, shape (n_rows, n_columns)
        Electrons per pixel including read noise.
    bias_adu : ndarray, broadcastable to ``electrons``
        Bias level per pixel, ADU.
    gain : float
        e-/ADU.
    saturate : float
        Highest ADU value written (the ADC or linearity limit).
    dtype : numpy dtype
        Output integer type.
    """
    adu = np.rint(electrons / gain + bias_adu)
    return np.clip(adu, 0, saturate).astype(dtype)
