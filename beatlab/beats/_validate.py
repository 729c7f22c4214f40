"""Boundary checks shared by the beat stages (private)."""

import numpy as np

from beatlab.errors import InputError

__all__ = [
    "MAX_MAGNITUDE",
    "as_peaks",
    "as_times",
    "as_trace",
    "check_fraction",
    "check_non_negative",
    "check_positive",
]

#: Largest |value| a trace may hold: the beat measures square and divide trace values, which
#: overflows float64 near 1e154; far above any trace in a physical unit (um, nm, um/s).
MAX_MAGNITUDE = 1e100


def as_trace(trace, *, name="trace", allow_nan=False):
    """Return `trace` as a new 1-D float64 array, or raise InputError naming `name`.

    Values must be finite (unless `allow_nan`, which admits NaN and infinity) and at most
    :data:`MAX_MAGNITUDE` in magnitude.
    """
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
    finite = values[np.isfinite(values)]
    largest = float(np.max(np.abs(finite))) if finite.size else 0.0
    if largest > MAX_MAGNITUDE:
        raise InputError(
            f"{name} holds values up to {largest:.3g} in magnitude, beyond {MAX_MAGNITUDE:.0e} "
            "where the beat measures overflow; express it in a unit that keeps it smaller"
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
