"""Savitzky-Golay smoothing and FFT convolution, without importing ``scipy.signal``.

The stages use three functions of :mod:`scipy.signal`: ``savgol_coeffs``,
``savgol_filter`` (``mode='interp'``) and ``fftconvolve``.
Importing ``scipy.signal`` loads its whole package (windows, filter design,
LTI systems, ``scipy.stats``, ``scipy.interpolate``): 0.3 s of CPU once per
process, 0.2 s beyond the libraries a run loads anyway, on its critical
path.  These are the same computations on :mod:`scipy.fft`,
:mod:`scipy.linalg` and :mod:`scipy.ndimage` (which the stages load
anyway), step for step as scipy 1.17 makes them for real NumPy arrays, so
that they return the same numbers to the bit; ``tests/test_signal.py``
checks them against ``scipy.signal``.
"""

from __future__ import annotations

import warnings

import numpy as np

__all__ = ["fftconvolve", "savgol_coeffs", "savgol_filter"]

_MODES = ("full", "same")


def savgol_coeffs(window_length: int, polyorder: int) -> np.ndarray:
    """Savitzky-Golay coefficients: ``scipy.signal.savgol_coeffs(window_length, polyorder)``.

    Parameters
    ----------
    window_length : int
        Number of coefficients (samples the local polynomial is fitted to).
    polyorder : int
        Degree of the polynomial, below ``window_length``.

    Returns
    -------
    ndarray of float64, shape (window_length,)
        For use in a convolution (the smoothed value at the window's centre).
    """
    from scipy.linalg import lstsq

    if not 0 <= polyorder < window_length:
        raise ValueError(
            f"polyorder ({polyorder}) must be at least 0 and less than window_length "
            f"({window_length})."
        )
    half, odd = divmod(window_length, 2)
    pos = half if odd else half - 0.5
    x = np.flip(np.arange(-pos, window_length - pos, dtype=np.float64))
    design = x ** np.arange(polyorder + 1, dtype=np.float64).reshape(-1, 1)
    target = np.zeros(polyorder + 1)
    target[0] = 1.0
    cond = np.finfo(np.float64).eps * max(design.shape)
    return lstsq(design, target, cond=cond)[0]


def _polyfit(x: np.ndarray, y: np.ndarray, degree: int) -> np.ndarray:
    """Least-squares polynomial (highest power first) of the columns ``y`` at ``x`` (scipy's)."""
    from scipy.linalg import lstsq

    design = x[:, None] ** np.flip(np.arange(degree + 1, dtype=x.dtype))[None, :]
    scale = np.sqrt(np.sum(design * design, axis=0))
    design /= scale
    coefficients, _, rank, _ = lstsq(design, y, cond=x.shape[0] * np.finfo(x.dtype).eps)
    if rank != degree + 1:
        warnings.warn("Polyfit may be poorly conditioned", np.exceptions.RankWarning, stacklevel=3)
    return (coefficients.T / scale).T


def _fit_edge(x: np.ndarray, start: int, stop: int, lo: int, hi: int, degree: int, y) -> None:
    """``y[lo:hi]`` from the polynomial fitted to ``x[start:stop]`` (Horner's scheme)."""
    coefficients = _polyfit(
        np.arange(0, stop - start, dtype=x.dtype), x[start:stop].reshape(stop - start, -1), degree
    )
    at = np.arange(lo - start, hi - start, dtype=coefficients.dtype).reshape(-1, 1)
    values = np.zeros_like(at)
    for j in range(coefficients.shape[0]):
        values = values * at + coefficients[j, ...]
    y[lo:hi] = values.reshape(hi - lo)


def savgol_filter(x: np.ndarray, window_length: int, polyorder: int) -> np.ndarray:
    """``scipy.signal.savgol_filter(x, window_length, polyorder, mode='interp')`` of a 1-D array.

    Parameters
    ----------
    x : ndarray, shape (n,)
        Samples (float32 or float64 kept, other types as float64).
    window_length : int
        Odd number of samples each local polynomial is fitted to, at most ``n``.
    polyorder : int
        Degree of the polynomial, below ``window_length``.

    Returns
    -------
    ndarray, shape (n,)
        The smoothed samples; the first and last ``window_length // 2`` take
        the polynomial fitted to the first and last ``window_length`` samples.
    """
    from scipy.ndimage import convolve1d

    x = np.asarray(x)
    if x.ndim != 1:
        raise ValueError(f"x must be one-dimensional, not of shape {x.shape}.")
    if x.dtype not in (np.float64, np.float32):
        x = x.astype(np.float64)
    if window_length > x.shape[0]:
        raise ValueError(
            f"window_length ({window_length}) must not exceed the number of samples "
            f"({x.shape[0]}); shorten the window."
        )
    y = convolve1d(x, savgol_coeffs(window_length, polyorder), mode="constant")
    half, n = window_length // 2, x.shape[0]
    _fit_edge(x, 0, window_length, 0, half, polyorder, y)
    _fit_edge(x, n - window_length, n, n - half, n, polyorder, y)
    return y


def _conv_inputs(in1, in2, mode: str) -> tuple[np.ndarray, np.ndarray, list[int]]:
    """The inputs as arrays, and the axes transformed (of length above 1 in both), checked."""
    in1, in2 = np.asarray(in1), np.asarray(in2)
    if mode not in _MODES:
        raise ValueError(f"mode must be one of {_MODES}, not {mode!r}.")
    if in1.ndim != in2.ndim or in1.ndim == 0:
        raise ValueError(
            f"in1 and in2 must be arrays of the same number of dimensions (>= 1), not of "
            f"shapes {in1.shape} and {in2.shape}."
        )
    if np.iscomplexobj(in1) or np.iscomplexobj(in2):
        raise TypeError("in1 and in2 must be real; complex arrays need scipy.signal.")
    return in1, in2, [a for a in range(in1.ndim) if in1.shape[a] != 1 and in2.shape[a] != 1]


def _product(in1, in2, axes, fshape) -> np.ndarray:
    """``irfftn(rfftn(in1) rfftn(in2))`` over ``axes`` at transform lengths ``fshape``."""
    from scipy.fft import irfftn, rfftn

    if in1.dtype.kind in "iub":
        in1 = in1.astype(np.float64)
    if in2.dtype.kind in "iub":
        in2 = in2.astype(np.float64)
    return irfftn(rfftn(in1, fshape, axes=axes) * rfftn(in2, fshape, axes=axes), fshape, axes=axes)


def _with_mode(full: np.ndarray, shape1: tuple[int, ...], mode: str) -> np.ndarray:
    if mode == "full":
        return full.copy()
    start = [(n - m) // 2 for n, m in zip(full.shape, shape1, strict=True)]
    return full[tuple(slice(s, s + m) for s, m in zip(start, shape1, strict=True))].copy()


def fftconvolve(in1: np.ndarray, in2: np.ndarray, mode: str = "full") -> np.ndarray:
    """``scipy.signal.fftconvolve(in1, in2, mode)`` of real arrays, over all their axes.

    Parameters
    ----------
    in1, in2 : ndarray
        Real arrays of the same number of dimensions.
    mode : {'full', 'same'}
        The whole convolution, or its part centred on ``in1`` (``in1``'s shape).

    Returns
    -------
    ndarray
        Single precision if both inputs are, else double.
    """
    from scipy.fft import next_fast_len

    in1, in2, axes = _conv_inputs(in1, in2, mode)
    if in1.size == 0 or in2.size == 0:
        return np.asarray([])
    s1, s2 = in1.shape, in2.shape
    shape = [s1[i] + s2[i] - 1 if i in axes else max(s1[i], s2[i]) for i in range(in1.ndim)]
    if not axes:
        full = in1 * in2
    else:
        fshape = [next_fast_len(shape[a], True) for a in axes]
        full = _product(in1, in2, axes, fshape)[tuple(slice(n) for n in shape)]
    return _with_mode(full, s1, mode)
