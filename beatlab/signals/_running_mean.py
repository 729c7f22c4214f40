"""Running mean along time of a stack of small frames, compiled (numba; private).

``scipy.ndimage.uniform_filter1d(stack, size, axis=0)`` (mode "reflect") walks the stack
one pixel's time series at a time, across the frames' memory: on the rest pass's activity
stack (1,000 frames of 64 x 64 px) that took ~80 ms. :func:`running_mean_time` does the same
arithmetic (a running sum in float64, updated by the entering minus the leaving sample,
divided by the size at each output) for all pixels of a frame at once, along contiguous
memory: the same numbers (tests/signals/test_running_mean.py compares them bit for bit).
"""

from __future__ import annotations

import numba
import numpy as np
from scipy import ndimage

__all__ = ["prepare_running_mean", "running_mean_time"]


@numba.njit(cache=True, nogil=True)
def _running_mean(x, size, out):  # pragma: no cover - compiled; tested through the wrapper
    n, m = x.shape
    before = size // 2
    total = np.zeros(m)
    # the line as scipy extends it: sample i of the extended line is frame i - before,
    # reflected at both ends (d c b a | a b c d | d c b a); n >= size keeps one reflection
    for i in range(size):
        t = i - before
        t = -t - 1 if t < 0 else (2 * n - 1 - t if t >= n else t)
        for j in range(m):
            total[j] += x[t, j]
    for j in range(m):
        out[0, j] = total[j] / size
    for k in range(1, n):
        enter = k + size - 1 - before
        enter = 2 * n - 1 - enter if enter >= n else enter
        leave = k - 1 - before
        leave = -leave - 1 if leave < 0 else leave
        for j in range(m):
            total[j] += np.float64(x[enter, j]) - np.float64(x[leave, j])
            out[k, j] = total[j] / size


def running_mean_time(stack: np.ndarray, size: int) -> np.ndarray:
    """``scipy.ndimage.uniform_filter1d(stack, size, axis=0)`` of a float32 stack (T, ...).

    Parameters
    ----------
    stack : ndarray (T, ...) float32
    size : int
        Window length in frames.

    Returns
    -------
    ndarray float32, the shape of `stack`
    """
    stack = np.asarray(stack)
    size = int(size)
    if stack.dtype != np.float32 or stack.ndim < 1 or size < 1 or stack.shape[0] < size:
        return ndimage.uniform_filter1d(stack, size, axis=0)  # the general case, as is
    flat = np.ascontiguousarray(stack).reshape(stack.shape[0], -1)
    out = np.empty_like(flat)
    _running_mean(flat, size, out)
    return out.reshape(stack.shape)


def prepare_running_mean() -> None:
    """Compile (or load from numba's cache) the kernel now, before any worker forks."""
    running_mean_time(np.zeros((3, 2), dtype=np.float32), 3)
