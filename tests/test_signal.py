"""The stages' Savitzky-Golay and FFT convolutions against scipy.signal (the reference).

:mod:`pipeline.stages._signal` repeats scipy.signal's computations on
scipy.fft, scipy.linalg and scipy.ndimage so that a run need not import
scipy.signal.  Each result must equal scipy.signal's to rounding (see
:func:`assert_scipys`); with the scipy these functions were written against
(1.17) they are equal to the bit, which is how the products were kept
unchanged when the stages moved to them.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import signal

from pipeline.stages import _signal

#: (window_length, polyorder): odd windows as the stages use them, an even one
#: (the centre between two samples), and the shortest windows of each degree.
SAVGOL_CASES = [(5, 2), (7, 2), (31, 2), (101, 2), (2001, 2), (9, 3), (8, 2), (3, 2), (1, 0)]

#: (shape of in1, shape of in2): a plane with a small kernel, a kernel wider
#: than half the rows, equal shapes, kernels as large as the input, and a
#: 1-D series with its smoothing window.
CONV_CASES = [
    ((286, 1024), (31, 27)),
    ((40, 700), (31, 9)),
    ((64, 64), (9, 9)),
    ((33, 47), (33, 47)),
    ((5, 300), (1, 31)),
    ((300, 1), (31, 1)),
    ((4000,), (2001,)),
    ((5000,), (101,)),
]


def assert_scipys(ours: np.ndarray, theirs: np.ndarray) -> None:
    """``ours`` is scipy.signal's result to within rounding.

    Tolerance: 1000 units in the last place of the largest value.  An FFT
    convolution's rounding grows with the transform's length and the values'
    range (common practice); the margin lets scipy change its block sizes,
    transform lengths or least-squares driver in a later release, and it is
    still a million times below the error of a misplaced block or a wrong
    coefficient (of the order of the values themselves).
    """
    assert ours.dtype == theirs.dtype and ours.shape == theirs.shape
    scale = float(np.max(np.abs(theirs))) if theirs.size else 0.0
    tolerance = 1000 * np.finfo(theirs.dtype).eps * scale
    assert np.max(np.abs(ours - theirs), initial=0.0) <= tolerance


@pytest.mark.parametrize(("window", "polyorder"), SAVGOL_CASES)
def test_savgol_coeffs_are_scipys(window, polyorder):
    assert_scipys(_signal.savgol_coeffs(window, polyorder), signal.savgol_coeffs(window, polyorder))


@pytest.mark.parametrize(("window", "polyorder"), [c for c in SAVGOL_CASES if c[0] % 2])
@pytest.mark.parametrize("dtype", [np.float64, np.float32])
def test_savgol_filter_is_scipys_interp_mode(window, polyorder, dtype):
    rng = np.random.default_rng(window)
    n = max(window, 3000)
    x = (1000.0 + np.cumsum(rng.normal(size=n)) + rng.normal(0, 3, n)).astype(dtype)
    ours = _signal.savgol_filter(x, window, polyorder)
    theirs = signal.savgol_filter(x, window, polyorder, mode="interp")
    assert_scipys(ours, theirs)


@pytest.mark.parametrize(("shape1", "shape2"), CONV_CASES)
@pytest.mark.parametrize("mode", ["same", "full"])
@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_fftconvolve_is_scipys(shape1, shape2, mode, dtype):
    rng = np.random.default_rng(len(shape1) + shape1[0])
    in1 = rng.normal(100.0, 10.0, shape1).astype(dtype)
    in2 = rng.random(shape2).astype(dtype)
    assert_scipys(_signal.fftconvolve(in1, in2, mode), signal.fftconvolve(in1, in2, mode=mode))


def test_bad_arguments_are_refused():
    with pytest.raises(ValueError, match="mode must be one of"):
        _signal.fftconvolve(np.ones(5), np.ones(3), "valid")
    with pytest.raises(ValueError, match="same number of dimensions"):
        _signal.fftconvolve(np.ones((5, 5)), np.ones(3))
    with pytest.raises(ValueError, match="must not exceed the number of samples"):
        _signal.savgol_filter(np.ones(5), 7, 2)
    with pytest.raises(ValueError, match="polyorder"):
        _signal.savgol_coeffs(5, 5)
