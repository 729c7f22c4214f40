"""The compiled running mean along time: scipy's uniform_filter1d numbers, bit for bit."""

import numpy as np
import pytest
from scipy import ndimage

from beatlab.signals._running_mean import running_mean_time


@pytest.mark.parametrize("size", [1, 2, 3, 4, 5])
@pytest.mark.parametrize("frames", [5, 6, 257])
def test_running_mean_is_scipys_uniform_filter1d_bit_for_bit(size, frames):
    # reference library: scipy.ndimage.uniform_filter1d (mode "reflect") along axis 0
    rng = np.random.default_rng(size * 1000 + frames)
    scales = rng.choice([1e-3, 1.0, 1e4], size=(1, 6, 5))
    stack = (rng.lognormal(size=(frames, 6, 5)) * scales).astype(np.float32)
    want = ndimage.uniform_filter1d(stack, size, axis=0)
    got = running_mean_time(stack, size)
    assert got.dtype == np.float32 and got.shape == stack.shape
    np.testing.assert_array_equal(got, want)


def test_running_mean_hands_what_it_does_not_compile_to_scipy():
    short = np.arange(6, dtype=np.float32).reshape(2, 3)  # fewer frames than the window
    np.testing.assert_array_equal(
        running_mean_time(short, 3), ndimage.uniform_filter1d(short, 3, axis=0)
    )
    doubles = np.random.default_rng(1).normal(size=(10, 4))
    np.testing.assert_array_equal(
        running_mean_time(doubles, 3), ndimage.uniform_filter1d(doubles, 3, axis=0)
    )
    # a constant series stays constant; a step is smoothed over three frames
    step = np.repeat(np.array([0, 0, 0, 3, 3, 3], dtype=np.float32)[:, None], 2, axis=1)
    np.testing.assert_array_equal(running_mean_time(step, 3)[:, 0], [0, 0, 1, 2, 3, 3])
