"""Covariance of the noise in a rectified image (private to the rectify stage).

The rectify stage resamples in two 1-D passes with 4-tap Keys weights
(:mod:`pipeline.stages.rectify._resample`): across the scan with strip columns
``p(y)`` sampled by rectified row ``y`` (held per block of strip rows), then
along it with a shift ``s(y)`` per rectified row (held per block of rectified
columns).  Neighbouring output pixels share input pixels, so independent
input noise of variance ``sigma^2`` comes out correlated over a few pixels.
Within a block the covariance is exact and separable:

    cov(n(x, y), n(x + l_x, y + l_y)) = sigma^2 S_x(y, l_y, l_x) S_y(y, l_y)

with ``S_y(y, l_y) = sum_k u_k(y) u_(k-e)(y + l_y)``, ``e = floor p(y + l_y) -
floor p(y)``, and ``S_x(y, l_y, l_x) = sum_k w_k(y) w_(k-d-l_x)(y + l_y)``,
``d = floor s(y + l_y) - floor s(y)`` (``u``, ``w`` the weights of the two
passes times their Jacobians).  ``S_x(y, 0, 0) S_y(y, 0)`` is the factor the
variance plane holds.  The phases change from row to row (every row when the
rectified pixels are finer than the camera's), so the covariance is kept per
row and pair of rows, not as a stationary autocorrelation.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property

import numpy as np

from pipeline.stages.rectify._resample import keys_weights

__all__ = ["RectifiedNoise"]

#: Taps of the resampling kernel.
_TAPS = 4
#: Largest row lag searched for shared taps (rectified pixels 8x finer than the camera's).
_MAX_ROW_LAG = 32


def _cross_sums(first: np.ndarray, second: np.ndarray) -> np.ndarray:
    """``sum_k first[k] second[k - o]`` for offsets ``o = -3 ... 3``.

    ``first`` and ``second`` have shape ``(4, ...)``; the result ``(...,
    7)`` holds offset ``o`` at index ``o + 3``.
    """
    out = np.zeros((*first.shape[1:], 2 * _TAPS - 1))
    for k in range(_TAPS):
        for j in range(_TAPS):
            out[..., k - j + _TAPS - 1] += first[k] * second[j]
    return out


def _at_offsets(sums: np.ndarray, offsets: np.ndarray) -> np.ndarray:
    """Entries of :func:`_cross_sums` output at integer ``offsets`` (0 beyond +-3)."""
    index = offsets + _TAPS - 1
    valid = (index >= 0) & (index < 2 * _TAPS - 1)
    picked = np.take_along_axis(sums, np.clip(index, 0, 2 * _TAPS - 2), axis=-1)
    return np.where(valid, picked, 0.0)


@dataclass(frozen=True)
class RectifiedNoise:
    """Where the rectified pixels sample the strip, for their noise covariance.

    Parameters
    ----------
    breaks : ndarray of int, shape (n_blocks + 1,)
        Pixel column where each pass-2 block starts, then ``n_x``.
    x_centres : ndarray, shape (n_blocks,)
        Night column at the centre of each pass-2 block.
    shifts, jac_x : ndarray, shape (n_blocks, n_y)
        Strip row minus rectified column, and its Jacobian ``1 + ds/dx``,
        per pass-2 block and rectified row.
    row_starts : ndarray, shape (n_row_blocks,)
        Night row where each pass-1 block starts, increasing.
    positions, jac_y : ndarray, shape (n_row_blocks, n_y)
        Strip column sampled by each rectified row and ``|dp/dy|``, per
        pass-1 block.
    """

    breaks: np.ndarray
    x_centres: np.ndarray
    shifts: np.ndarray
    jac_x: np.ndarray
    row_starts: np.ndarray
    positions: np.ndarray
    jac_y: np.ndarray

    @classmethod
    def white(cls, n_y: int, n_x: int) -> RectifiedNoise:
        """Uncorrelated noise: every pixel samples one input pixel exactly."""
        rows = np.arange(n_y, dtype=float)[None, :]
        ones = np.ones((1, n_y))
        zero = np.zeros(1)
        return cls(np.array([0, n_x]), zero, 0.0 * ones, ones, zero, rows, ones)

    @property
    def n_y(self) -> int:
        return self.shifts.shape[1]

    @cached_property
    def _weights(self) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """Pass-2 and pass-1 weights (times Jacobians) and integer bases."""
        base_x, base_y = np.floor(self.shifts), np.floor(self.positions)
        w = keys_weights(self.shifts - base_x) * self.jac_x  # (4, n_blocks, n_y)
        u = keys_weights(self.positions - base_y) * self.jac_y  # (4, n_row_blocks, n_y)
        return w, u, base_x.astype(np.intp), base_y.astype(np.intp)

    def lags(self) -> tuple[int, int]:
        """Largest row and column lags ``(L_y, L_x)`` at which pixels share input pixels."""
        base_y = np.floor(self.positions)
        base_x = np.floor(self.shifts)
        lag_y = 0
        while lag_y < min(_MAX_ROW_LAG, self.n_y - 1):
            step = np.abs(base_y[:, lag_y + 1 :] - base_y[:, : -(lag_y + 1)])
            if not (step < _TAPS).any():
                break
            lag_y += 1
        drift = max(
            (np.abs(base_x[:, ly:] - base_x[:, : self.n_y - ly]).max() for ly in range(lag_y + 1)),
            default=0.0,
        )
        return lag_y, _TAPS - 1 + int(drift)

    def covariance(
        self, lo: int, hi: int, lags: tuple[int, int], *, dtype=np.float64, chunk: int = 256
    ) -> np.ndarray:
        """Noise covariance per unit input variance for rows ``[lo, hi)``.

        Parameters
        ----------
        lo, hi : int
            Rectified rows (may reach beyond the image: those rows are 0).
        lags : (int, int)
            ``(L_y, L_x)`` as :meth:`lags` returns.
        dtype : numpy dtype, optional
            Of the result (float32 halves the memory of a whole image's).
        chunk : int, optional
            Rows computed at once.

        Returns
        -------
        ndarray, shape (n_blocks, hi - lo, 2 L_y + 1, 2 L_x + 1)
            ``S_x S_y`` of the module docstring at ``[b, y - lo, L_y + l_y,
            L_x + l_x]``; 0 where either row lies outside the image.
        """
        lag_y, lag_x = lags
        out = np.zeros((self.shifts.shape[0], hi - lo, 2 * lag_y + 1, 2 * lag_x + 1), dtype)
        for start in range(lo, hi, chunk):
            stop = min(start + chunk, hi)
            out[:, start - lo : stop - lo] = self._covariance_rows(np.arange(start, stop), lags)
        return out

    def _pass1_blocks(self, rows: np.ndarray) -> np.ndarray:
        """The pass-1 block that holds the strip row each pass-2 block reads at ``rows``.

        Returns an ndarray of int, shape ``(n_blocks, rows.size)``.
        """
        strip_rows = self.x_centres[:, None] + self.shifts[:, rows]
        block = np.searchsorted(self.row_starts, strip_rows, side="right") - 1
        return np.clip(block, 0, self.positions.shape[0] - 1)

    def _covariance_rows(self, rows: np.ndarray, lags: tuple[int, int]) -> np.ndarray:
        lag_y, lag_x = lags
        n_y = self.n_y
        inside = (rows >= 0) & (rows < n_y)
        y1 = np.clip(rows, 0, n_y - 1)
        w, u, base_x, base_y = self._weights
        block = self._pass1_blocks(y1)
        out = np.zeros((self.shifts.shape[0], rows.size, 2 * lag_y + 1, 2 * lag_x + 1))
        shifts_x = np.arange(-lag_x, lag_x + 1)
        for ly in range(-lag_y, lag_y + 1):
            y2 = rows + ly
            both = inside & (y2 >= 0) & (y2 < n_y)
            if not both.any():
                continue
            y2 = np.clip(y2, 0, n_y - 1)
            offset_y = base_y[block, y2] - base_y[block, y1]  # (nb, n)
            across = _at_offsets(_cross_sums(u[:, block, y1], u[:, block, y2]), offset_y[..., None])
            offset_x = (base_x[:, y2] - base_x[:, y1])[..., None] + shifts_x  # (nb, n, n_lx)
            along = _at_offsets(_cross_sums(w[:, :, y1], w[:, :, y2]), offset_x)
            out[:, :, lag_y + ly] = np.where(both[:, None], along * across, 0.0)
        return out

    def power(self, chunk: int = 1024) -> tuple[np.ndarray, np.ndarray]:
        """Noise power at frequency 0 and variance per unit input variance.

        The sum over column lags needs no covariance: ``L_x`` reaches every
        offset at which two rows' pass-2 weights overlap, so ``sum_l_x S_x(y,
        l_y, l_x) = W(y) W(y + l_y)`` with ``W`` the sum of a row's pass-2
        weights, and only ``S_y`` is formed per row lag (equal to summing
        :meth:`covariance` over both lags, to round-off, at ``2 L_x + 1``
        times less work).

        Parameters
        ----------
        chunk : int, optional
            Rows computed at once.

        Returns
        -------
        zero_frequency, variance : ndarray, shape (n_blocks, n_y)
            ``sum_l S_x S_y`` (a large aperture's variance per pixel) and
            ``S_x S_y`` at lag 0 (what the variance plane holds); their ratio
            is the large-aperture factor of :func:`noise_correlation_factor
            <pipeline.stages.rectify._resample.noise_correlation_factor>`.
        """
        from pipeline.stages.rectify._resample_jit import zero_frequency_rows

        lag_y, _ = self.lags()
        n_y = self.n_y
        w, u, _, base_y = self._weights
        total_w = w.sum(axis=0)  # (nb, n_y)
        # The squared weights summed over the taps once per block and row (the
        # same sums, in the same order, as per chunk of the blocks' rows).
        w2 = np.sum(w**2, axis=0)  # (nb, n_y)
        u2 = np.sum(u**2, axis=0)  # (n_row_blocks, n_y)
        zero_frequency = np.zeros(self.shifts.shape)
        variance = np.empty(self.shifts.shape)
        for lo in range(0, n_y, chunk):
            rows = np.arange(lo, min(lo + chunk, n_y))
            block = self._pass1_blocks(rows)
            variance[:, rows] = w2[:, rows] * u2[block, rows]
            zero_frequency_rows(u, base_y, block, rows, total_w, lag_y, zero_frequency)
        return zero_frequency, variance
