"""The rectify stage's compiled loops against the numpy code they replaced.

The numpy code (``tests/_rectify_reference.py``) is what the analytic tests
of ``test_rectify_resample.py`` and the covariance check of
``test_rectify_noise.py`` were first written against; these are
self-consistency checks, not external truth: the compiled loops must give the
same bytes, since the stage's products must not change with the speed-up.
"""

import os
import pathlib
import subprocess
import sys

import numpy as np
import pytest

from pipeline.stages.rectify._resample import resample_columns, shift_rows
from tests._rectify_reference import noise_power_numpy, resample_columns_numpy, shift_rows_numpy
from tests.test_rectify_noise import _noise

OUT = 1 << 8
NONFINITE = 1 << 5
BITS = {"outside_bit": OUT, "nonfinite_bit": NONFINITE}


def _planes(rng, shape, dtype):
    """Noisy planes with random flags and a few non-finite values."""
    image = rng.normal(100.0, 30.0, shape).astype(dtype)
    variance = rng.uniform(1.0, 50.0, shape).astype(dtype)
    mask = rng.choice(
        np.array([0, 1, 2, 4, 1 << 12], np.uint16), shape, p=[0.8, 0.05, 0.05, 0.05, 0.05]
    )
    image.flat[rng.choice(image.size, 5, replace=False)] = np.nan
    variance.flat[rng.choice(image.size, 3, replace=False)] = np.inf
    return image, variance, mask


def _positions(rng, n_blocks, n_out, n_in):
    """Positions per block: rising with a non-unit slope, exact integers, falling, far off."""
    index = np.arange(n_out, dtype=float)
    rows = [
        rng.uniform(-1.0, 1.0) + index * 0.93,  # a slope: bases that skip
        np.round(rng.uniform(-3.0, 3.0)) + index,  # integer positions: zero-weight taps
        n_in - 1.3 - index * 1.07,  # falling
        np.linspace(-40.0, n_in + 40.0, n_out),  # far beyond both edges
    ]
    return np.array([rows[b % len(rows)] for b in range(n_blocks)])


def _same_bytes(got, expected):
    for a, b in zip(got, expected, strict=True):
        assert a.dtype == b.dtype and a.shape == b.shape
        assert a.tobytes() == b.tobytes()


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
@pytest.mark.parametrize("seed", [0, 1, 2])
def test_compiled_columns_pass_gives_the_numpy_bytes(dtype, seed):
    rng = np.random.default_rng(seed)
    n_rows, n_cols, n_out = 150, 47, 61
    planes = _planes(rng, (n_rows, n_cols), dtype)
    positions = _positions(rng, 4, n_out, n_cols)
    jacobian = rng.uniform(0.8, 1.2, positions.shape)
    breaks = np.array([0, 37, 37, 101, n_rows])  # one empty block
    args = (*planes, positions, jacobian)
    _same_bytes(
        resample_columns(*args, breaks=breaks, **BITS),
        resample_columns_numpy(*args, breaks=breaks, **BITS),
    )


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
@pytest.mark.parametrize("seed", [0, 1, 2])
def test_compiled_rows_pass_gives_the_numpy_bytes(dtype, seed):
    rng = np.random.default_rng(seed)
    n_rows, n_cols, n_out = 90, 53, 130
    planes = _planes(rng, (n_rows, n_cols), dtype)
    # Offsets per block and column: sub-pixel phases, integers, and far off.
    offsets = np.stack(
        [
            rng.uniform(-5.0, 5.0, n_cols),
            np.round(rng.uniform(-3.0, 3.0, n_cols)),
            rng.uniform(-200.0, 200.0, n_cols),
        ]
    )
    jacobian = rng.uniform(0.9, 1.1, offsets.shape)
    breaks = np.array([0, 70, 71, n_out])
    args = (*planes, offsets, n_out, jacobian)
    _same_bytes(
        shift_rows(*args, breaks=breaks, **BITS),
        shift_rows_numpy(*args, breaks=breaks, **BITS),
    )


def test_big_endian_float32_planes_resample_in_single_precision():
    # Planes read from FITS are big-endian float32 (">f4"), which compares
    # unequal to np.float32: they must resample as native float32 ones do
    # (same values, same precision), not in float64 at twice the memory.
    rng = np.random.default_rng(3)
    planes = _planes(rng, (120, 40), np.float32)
    swapped = (planes[0].astype(">f4"), planes[1].astype(">f4"), planes[2])
    positions = _positions(rng, 1, 52, 40)
    jacobian = np.ones(positions.shape)
    breaks = np.array([0, 120])
    native = resample_columns(*planes, positions, jacobian, breaks=breaks, **BITS)
    got = resample_columns(*swapped, positions, jacobian, breaks=breaks, **BITS)
    assert got[0].dtype == np.float32 and got[1].dtype == np.float32
    _same_bytes(got, native)
    offsets = rng.uniform(-3.0, 3.0, (1, 40))
    native = shift_rows(*planes, offsets, 120, np.ones((1, 40)), breaks=breaks, **BITS)
    got = shift_rows(*swapped, offsets, 120, np.ones((1, 40)), breaks=breaks, **BITS)
    _same_bytes(got, native)


@pytest.mark.parametrize(("scale", "chunk", "seed"), [(0.6, 1024, 0), (0.6, 37, 1), (1.7, 64, 2)])
def test_compiled_noise_power_gives_the_numpy_bytes(scale, chunk, seed):
    # Rows finer (0.6) and coarser (1.7) than the camera's: many row lags or few.
    noise = _noise(scale=scale, seed=seed)
    _same_bytes(noise.power(chunk=chunk), noise_power_numpy(noise, chunk=chunk))


WARM_CHECK = """
import numpy as np
from _rectify_scene import night_model
from pipeline.stages.rectify import rectify
from pipeline.stages.rectify import _resample_jit as jit
from pipeline.stages.rectify._resample import load_compiled

load_compiled()
kernels = (jit.resample_columns_block, jit.shift_rows_block, jit.zero_frequency_rows)
loaded = [list(k.signatures) for k in kernels]
# planes as the stage reads them (float32, big-endian from FITS) and native
image = np.random.default_rng(1).normal(100.0, 10.0, (512, 256)).astype(">f4")
for dtype in (">f4", np.float32):
    rectify(image.astype(dtype), np.full(image.shape, 100.0, dtype),
            np.zeros(image.shape, np.uint16), night_model(30.0, 512))
print([list(k.signatures) == s for k, s in zip(kernels, loaded)])
"""


def test_the_warm_up_loads_what_a_stretch_calls():
    # A worker calls load_compiled as it starts (Stage.warm): a stretch of the
    # stage's planes must then need no other specialisation (each would be
    # compiled, or loaded, on the unit's own time).  In a fresh process, so
    # that other tests' calls have loaded nothing.
    tests = pathlib.Path(__file__).parent
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(tests), str(tests.parent)])}
    out = subprocess.run(
        [sys.executable, "-c", WARM_CHECK], check=True, capture_output=True, text=True, env=env
    )
    assert out.stdout.split() == ["[True,", "True,", "True]"]
