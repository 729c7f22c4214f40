"""Boundary checks shared by the beat stages (private)."""

import numpy as np

from beatlab.errors import InputError

__all__ = [
    "as_peaks",
    "as_times",
    "as_trace",
    "check_fraction",
    "check_non_negative",
    "check_positive",
]


def as_trace(trace, *, name="trace", allow_nan=False):
    """Return `trace` as a new 1-D float64 array, or raise InputError naming `name`."""
    values = np.array(trace, dtype=np.float64, copy=True)
    if values.ndim != 1:
        raise InputError(
            f"{name} must be 1-D, got shape {values.shape}; pass one trace value per frame"
        )
    if not allow_nan:
        bad = int(np.count_nonzero(~np.isfinite(values)))
        if bad:
            raise InputError(
                f"{name} contains {bad} NaN or infinite values of {values.size}; "
                "interpolate or drop those frames before beat analysis"
            )
    return values


def as_times(times_s, n_samples, *, name="times_s"):
    """Return `times_s` as a new float64 array checked against a trace of `n_samples`."""
    times = np.array(times_s, dtype=np.float64, copy=True)
    if times.ndim != 1 or times.size != n_samples:
        raise InputError(
            f"{name} must be 1-D with one time per trace sample ({n_samples}), got shape "
            f"{times.shape}; pass the frame times in seconds"
        )
    if not np.all(np.isfinite(times)):
        raise InputError(f"{name} contains NaN or infinite values; pass finite frame times")
    if times.size > 1 and np.any(np.diff(times) <= 0):
        raise InputError(
            f"{name} must increase strictly, got a non-increasing step at index "
            f"{int(np.argmax(np.diff(times) <= 0)) + 1}; sort the frames or fix the times"
        )
    return times


def check_positive(value, name):
    """Raise InputError unless `value` is a finite number > 0; return it as float."""
    if not np.isfinite(value) or value <= 0:
        raise InputError(f"{name} must be a finite number > 0, got {value!r}")
    return float(value)


def check_non_negative(value, name):
    """Raise InputError unless `value` is a finite number >= 0; return it as float."""
    if not np.isfinite(value) or value < 0:
        raise InputError(f"{name} must be a finite number >= 0, got {value!r}")
    return float(value)


def check_fraction(value, name):
    """Raise InputError unless 0 < `value` < 1; return it as float."""
    if not np.isfinite(value) or not 0 < value < 1:
        raise InputError(f"{name} must lie strictly between 0 and 1, got {value!r}")
    return float(value)


def as_peaks(peaks, n_samples):
    """Return `peaks` as strictly increasing int indices into a trace of `n_samples`."""
    idx = np.asarray(peaks)
    if idx.size == 0:
        return np.zeros(0, dtype=np.intp)
    if idx.ndim != 1 or not np.issubdtype(idx.dtype, np.integer):
        raise InputError(
            f"peaks must be a 1-D array of integer sample indices, got dtype {idx.dtype} and "
            f"shape {idx.shape}; pass the output of detect_beats"
        )
    if idx.min() < 0 or idx.max() >= n_samples or np.any(np.diff(idx) <= 0):
        raise InputError(
            f"peaks must be strictly increasing indices in [0, {n_samples - 1}], got "
            f"{idx.min()}..{idx.max()}; pass the output of detect_beats for this trace"
        )
    return idx.astype(np.intp)
