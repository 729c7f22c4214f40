"""The fine time grid on which beat landmarks are measured (private)."""

import numpy as np
from scipy.interpolate import CubicSpline

from beatlab.errors import InputError

__all__ = ["FINE_STEP_S", "INTERPOLATIONS", "upsample", "upsampling_factor"]

#: landmark grid spacing when the trace is upsampled by a cubic spline
FINE_STEP_S = 0.004
#: at most this many grid points per frame interval
_MAX_FACTOR = 16
INTERPOLATIONS = ("cubic", "linear")


def upsampling_factor(times, interpolation):
    """Grid points per frame interval: ceil(frame interval / 4 ms) in [1, 16]; 1 for linear."""
    if interpolation not in INTERPOLATIONS:
        raise InputError(
            f"interpolation must be one of {', '.join(INTERPOLATIONS)}, got {interpolation!r}"
        )
    if interpolation == "linear" or times.size < 4:
        return 1
    dt = float(np.median(np.diff(times)))
    return int(np.clip(np.ceil(dt / FINE_STEP_S), 1, _MAX_FACTOR))


def upsample(times, factor, *curves):
    """Fine times and each curve on them: a not-a-knot cubic spline through every sample.

    Every sample is kept: sample i of the input is point ``i * factor`` of the output.
    """
    if factor == 1:
        return (times, *curves)
    steps = np.arange(factor) / factor
    fine = (times[:-1, None] + np.diff(times)[:, None] * steps[None, :]).ravel()
    fine = np.concatenate([fine, times[-1:]])
    return (fine, *(CubicSpline(times, y)(fine) for y in curves))
