"""Ensemble-average beat aligned at onset (average_beat.csv)."""

import numpy as np
import pandas as pd

from beatlab.beats._validate import as_times, as_trace, check_non_negative, check_positive
from beatlab.errors import InputError

__all__ = ["average_beat"]


def average_beat(times_s, traces, onsets_s, *, pre_s=0.1, post_s=None):
    """Average several traces over beats, aligned at each beat's onset.

    Parameters
    ----------
    times_s : array_like, shape (T,)
        Sample times in seconds, strictly increasing.
    traces : dict of str to array_like, shape (T,)
        Named traces, e.g. ``{"displacement_um": ..., "velocity_um_s": ...}``; finite.
    onsets_s : array_like, shape (N,)
        Onset time of each beat (s); NaN onsets are skipped.
    pre_s : float
        Time before the onset included, seconds (>= 0).
    post_s : float, optional
        Time after the onset included, seconds (> 0). None uses the median interval between
        consecutive onsets, or with a single onset the time left to the recording end.

    Returns
    -------
    pandas.DataFrame
        Columns ``time_s`` (relative to the onset, from ``-pre_s``), ``n_beats`` (beats with
        data at that time), then ``<name>_mean`` and ``<name>_sd`` (SD with ddof 1, NaN
        with fewer than two beats) for each trace, in the order of `traces`. The grid step is
        the median frame interval; each beat is resampled on it by linear interpolation, and
        times outside the recording count as missing. No valid onset gives an empty frame
        with these columns.

    Raises
    ------
    InputError
        If a trace does not match the times, a trace holds NaN, or an option is out of range.

    Notes
    -----
    Signal averaging of repeated events aligned at a fiducial point (Dawson 1954,
    Electroencephalogr Clin Neurophysiol 6:65), here the 10 % upstroke crossing.
    """
    times = as_times(times_s, np.asarray(times_s).size)
    if not isinstance(traces, dict) or not traces:
        raise InputError(
            f"traces must be a non-empty dict of name -> array, got {type(traces).__name__}"
        )
    arrays = {}
    for name, values in traces.items():
        arrays[name] = as_trace(values, name=f"traces[{name!r}]")
        if arrays[name].size != times.size:
            raise InputError(
                f"traces[{name!r}] must have one value per time ({times.size}), got "
                f"{arrays[name].size}; pass traces of the same recording"
            )
    onsets = np.asarray(onsets_s, dtype=float).ravel()
    onsets = np.sort(onsets[np.isfinite(onsets)])
    pre_s = check_non_negative(pre_s, "pre_s")
    columns = ["time_s", "n_beats"] + [f"{n}_{s}" for n in arrays for s in ("mean", "sd")]
    if onsets.size == 0 or times.size < 2:
        return pd.DataFrame(
            {c: pd.Series(dtype=np.int64 if c == "n_beats" else float) for c in columns}
        )
    if post_s is None:
        post_s = (
            float(np.median(np.diff(onsets))) if onsets.size > 1 else float(times[-1] - onsets[0])
        )
    post_s = check_positive(post_s, "post_s")
    step = float(np.median(np.diff(times)))
    grid = np.arange(-round(pre_s / step), round(post_s / step) + 1) * step
    when = onsets[:, None] + grid[None, :]
    outside = (when < times[0]) | (when > times[-1])
    count = np.sum(~outside, axis=0)
    result = {"time_s": grid, "n_beats": count}
    for name, values in arrays.items():
        stack = np.interp(when, times, values)
        stack[outside] = 0.0
        total = stack.sum(axis=0)
        mean = np.divide(total, count, out=np.full(grid.size, np.nan), where=count > 0)
        squares = np.where(outside, 0.0, (stack - mean[None, :]) ** 2).sum(axis=0)
        sd = np.sqrt(
            np.divide(squares, count - 1, out=np.full(grid.size, np.nan), where=count > 1)
        )
        result[f"{name}_mean"] = mean
        result[f"{name}_sd"] = sd
    return pd.DataFrame(result, columns=columns)
