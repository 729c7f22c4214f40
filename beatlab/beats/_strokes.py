"""Per-beat helpers of measure_beats: search bounds, velocities, secondary peaks (private)."""

import numpy as np
import pandas as pd

from beatlab.beats._peaks import local_maxima, peak_prominences
from beatlab.beats.baseline import estimate_beat_baselines
from beatlab.beats.smoothing import smooth_local_quadratic

__all__ = [
    "PEAK_MODELS",
    "downstroke_bounds",
    "irregular_flags",
    "opd_amplitudes",
    "secondary_peak_times",
    "stop_index",
    "stroke_resolved",
    "velocity_extremes",
]

PEAK_MODELS = ("kink", "spline")


def downstroke_bounds(times, onset, lowest, idx, locator, rest_level):
    """Last sample index of each beat's downstroke search.

    Parameters
    ----------
    times : ndarray, shape (T,)
        Sample times (s).
    onset : ndarray, shape (N,)
        Onset time of each beat (s, NaN where undefined).
    lowest : ndarray of int, shape (N,)
        Each beat's lowest point before its peak.
    idx : ndarray of int, shape (N,)
        Peak indices.
    locator : ndarray, shape (T,)
        The more smoothed copy of the trace (finds the lowest point after the last peak).
    rest_level : ndarray, shape (N,)
        Each beat's 10 % level.

    Returns
    -------
    ndarray of int, shape (N,)
        The next beat's onset (or, without one, its lowest point). For the last beat, the
        last sample; but when the trace has come back to or below its 10 % level after the
        last peak, its lowest point there: what rises after it is an unfinished beat cut by
        the recording end, not a second relaxation step of the last beat.
    """
    n = times.size
    bound = np.full(idx.size, n - 1, dtype=np.intp)
    for k in range(idx.size - 1):
        if np.isfinite(onset[k + 1]):
            bound[k] = int(np.searchsorted(times, onset[k + 1], side="right")) - 1
        else:
            bound[k] = lowest[k + 1]
        bound[k] = min(max(bound[k], idx[k]), idx[k + 1])
    last = int(idx[-1])
    if last < n - 1:
        low = last + int(np.argmin(locator[last:]))
        if locator[low] <= rest_level[-1]:
            bound[-1] = low
    return bound


def stop_index(times, stop_s, bound):
    """Index of the last sample at or before `stop_s`, at most `bound`."""
    return min(int(np.searchsorted(times, stop_s, side="right")) - 1, int(bound))


def velocity_extremes(velocity, times, start_s, stop_s):
    """Largest positive and (as a positive number) most negative velocity in each window."""
    contraction = np.full(start_s.size, np.nan)
    relaxation = np.full(start_s.size, np.nan)
    for k in range(start_s.size):
        inside = velocity[(times >= start_s[k]) & (times <= stop_s[k])]
        if inside.size == 0:
            continue
        if inside.max() > 0:
            contraction[k] = inside.max()
        if inside.min() < 0:
            relaxation[k] = -inside.min()
    return contraction, relaxation


def stroke_resolved(first_s, last_s, shortest_s):
    """False where a stroke from `first_s` to `last_s` is shorter than `shortest_s`.

    A stroke with an undefined crossing cannot be judged and counts as resolved.
    """
    duration = np.asarray(last_s, dtype=float) - np.asarray(first_s, dtype=float)
    return ~(duration < shortest_s)


def opd_amplitudes(opd, times, idx, start_s, stop_s, *, smooth_s, window_s, min_samples):
    """Maximum of the smoothed OPD change in each beat window minus its own baseline."""
    if opd is None:
        return np.full(idx.size, np.nan)
    smooth, _ = smooth_local_quadratic(opd, times, bandwidth_s=smooth_s)
    baseline, _ = estimate_beat_baselines(
        smooth, times, idx, window_s=window_s, min_samples=min_samples
    )
    result = np.full(idx.size, np.nan)
    for k in range(idx.size):
        inside = smooth[(times >= start_s[k]) & (times <= stop_s[k])]
        if inside.size:
            result[k] = inside.max() - baseline[k]
    return result


def secondary_peak_times(
    curve, times, idx, stops, baseline, amplitude, *, min_prominence, min_level, skip
):
    """Time of each beat's most prominent qualifying secondary peak, else NaN.

    Parameters
    ----------
    curve : ndarray, shape (T,)
        The copy of the trace on which secondary peaks are found.
    times : ndarray, shape (T,)
        Its sample times (s).
    idx, stops : ndarray of int, shape (N,)
        Each beat's peak and the last sample of its stretch.
    baseline, amplitude, min_prominence : ndarray, shape (N,)
        Per beat, unit of the trace.
    min_level : float
        The dip before a secondary peak must stay at or above baseline + this x amplitude.
    skip : int
        The stretch starts at the highest point of `curve` within this many samples after
        the peak (its own main peak, which smoothing can shift by a few samples).
    """
    out = np.full(idx.size, np.nan)
    for k in range(idx.size):
        peak, stop = int(idx[k]), int(stops[k])
        if stop - peak < 2 or amplitude[k] <= 0:
            continue
        peak += int(np.argmax(curve[peak : min(stop, peak + skip) + 1]))
        segment = curve[peak : stop + 1]
        local = local_maxima(segment)
        if local.size == 0:
            continue
        prominence, left_base, _ = peak_prominences(segment, local)
        dip = segment[left_base]
        ok = (prominence >= min_prominence[k]) & (dip >= baseline[k] + min_level * amplitude[k])
        if np.any(ok):
            out[k] = float(times[peak + local[ok][np.argmax(prominence[ok])]])
    return out


def irregular_flags(ibi, tolerance):
    """True where an IBI differs from the median IBI by more than `tolerance` x median."""
    flags = pd.array([pd.NA] * ibi.size, dtype="boolean")
    finite = np.isfinite(ibi)
    if not np.any(finite):
        return flags
    median = float(np.median(ibi[finite]))
    flags[finite] = np.abs(ibi[finite] - median) > tolerance * median
    return flags
