"""Noise level and per-beat baseline of a contraction trace."""

from statistics import NormalDist

import numpy as np

from beatlab.beats._validate import as_peaks, as_times, as_trace, check_non_negative
from beatlab.errors import InputError

__all__ = ["NOISE_METHODS", "estimate_beat_baselines", "estimate_noise"]

# the normal quantile function (scipy.special.ndtri to 1 ulp), without importing scipy.special
_NORMAL_QUANTILE = NormalDist().inv_cdf
_MAD_TO_SD = 1.0 / _NORMAL_QUANTILE(0.75)  # 1.4826: MAD of a normal sample -> its SD
_FLOOR_QUANTILES = (0.02, 0.20)
_FLOOR_SPREAD = _NORMAL_QUANTILE(_FLOOR_QUANTILES[1]) - _NORMAL_QUANTILE(_FLOOR_QUANTILES[0])


def _mad(values):
    return float(np.median(np.abs(values - np.median(values))) * _MAD_TO_SD)


def _noise_mad_diff(values):
    return _mad(np.diff(values)) / np.sqrt(2.0)


def _noise_mad_diff2(values):
    return _mad(np.diff(values, n=2)) / np.sqrt(6.0)


def _noise_floor_quantile(values):
    low, high = np.quantile(values, _FLOOR_QUANTILES)
    return float((high - low) / _FLOOR_SPREAD)


def _noise_robust(values):
    return min(_noise_mad_diff(values), _noise_floor_quantile(values))


NOISE_METHODS = {
    "mad_diff": _noise_mad_diff,
    "mad_diff2": _noise_mad_diff2,
    "floor_quantile": _noise_floor_quantile,
    "robust": _noise_robust,
}
"""Registry of noise estimators: name -> function(values) -> SD."""


def estimate_noise(trace, *, method="mad_diff"):
    """Estimate the standard deviation of the white noise on a trace, robust to the beats.

    Parameters
    ----------
    trace : array_like, shape (T,)
        Trace values (any unit), finite, at least 3 samples.
    method : str
        One of ``NOISE_METHODS``:

        - ``"mad_diff"``: MAD of the first differences / sqrt 2. Insensitive to drift and
          to beats that occupy a minority of the differences; overestimates when a fast
          rhythm at a low frame rate makes most frame-to-frame changes signal.
        - ``"mad_diff2"``: MAD of the second differences / sqrt 6 (less signal leakage on
          finely sampled smooth beats).
        - ``"floor_quantile"``: spread of the lowest fifth of the values, (q20 - q02) /
          (z(0.20) - z(0.02)): the resting floor, even when beats fill most of the frames;
          overestimates under drift.
        - ``"robust"``: the smaller of ``"mad_diff"`` and ``"floor_quantile"``, each of which
          can only be inflated by the signal.

    Returns
    -------
    float
        Noise SD, in the unit of the trace (0 for a noise-free resting floor).

    Raises
    ------
    InputError
        If the trace is not 1-D, holds NaN, has fewer than 3 samples, or `method` is unknown.

    Notes
    -----
    The median absolute deviation as a robust scale (Hampel 1974, J Am Stat Assoc 69:383);
    differencing to remove a smooth signal before estimating the noise (von Neumann et al.
    1941, Ann Math Stat 12:153).

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(0)
    >>> round(estimate_noise(rng.normal(0, 2.0, 20000)), 1)
    2.0
    """
    values = as_trace(trace)
    if method not in NOISE_METHODS:
        raise InputError(
            f"method must be one of {sorted(NOISE_METHODS)}, got {method!r}; pick a listed name"
        )
    if values.size < 3:
        raise InputError(
            f"trace needs at least 3 samples to estimate its noise, got {values.size}; "
            "record more frames"
        )
    return float(NOISE_METHODS[method](values))


def estimate_beat_baselines(
    trace, times_s, peaks, *, window_s=0.1, min_samples=3, locator=None, rest_band=0.0
):
    """Baseline of each beat: median of the trace over a window centred on its lowest point.

    Parameters
    ----------
    trace : array_like, shape (T,)
        Primary trace (unit of the trace), finite.
    times_s : array_like, shape (T,)
        Sample times in seconds, strictly increasing.
    peaks : array_like of int, shape (N,)
        Increasing sample indices of the beat peaks.
    window_s : float
        Width of the window centred on the lowest point, seconds (DESIGN.md: 0.1 s).
    min_samples : int
        Fewest samples in the window: when `window_s` covers fewer (low frame rates), the
        `min_samples` samples centred on the lowest point are used, so one noisy low sample
        does not set the baseline alone. 1 keeps the window strictly in time.
    locator : array_like, shape (T,), optional
        Trace on which the lowest point is located (e.g. a more smoothed copy, so the window
        is not centred on a single noise dip); None uses `trace`. The median is always taken
        over `trace`.
    rest_band : float
        Noise allowance (unit of the trace, >= 0). When > 0, the window is widened to the
        whole stretch around the lowest point (between the previous peak and this peak) over
        which `locator` stays within `rest_band` of its lowest value: on a noisy floor the
        median is then taken over the resting stretch, not only over the deepest noise dip.
        0 (a clean trace) keeps the plain window.

    Returns
    -------
    baselines : ndarray, shape (N,)
        Baseline value of each beat, unit of the trace.
    lowest : ndarray of int, shape (N,)
        Index of the lowest point between the previous peak (or the recording start) and
        this peak, both included.

    Raises
    ------
    InputError
        If the peaks are not increasing valid indices, or an option is out of range.
    """
    values = as_trace(trace)
    times = as_times(times_s, values.size)
    window_s = check_non_negative(window_s, "window_s")
    rest_band = check_non_negative(rest_band, "rest_band")
    if int(min_samples) != min_samples or min_samples < 1:
        raise InputError(f"min_samples must be an integer >= 1, got {min_samples!r}")
    idx = as_peaks(peaks, values.size)
    where = values if locator is None else as_trace(locator, name="locator")
    if where.size != values.size:
        raise InputError(
            f"locator must have one value per trace sample ({values.size}), got {where.size}"
        )
    baselines = np.empty(idx.size)
    lowest = np.empty(idx.size, dtype=np.intp)
    previous = 0
    half = int(min_samples) // 2
    for k, peak in enumerate(idx):
        low = previous + int(np.argmin(where[previous : peak + 1]))
        in_window = np.abs(times - times[low]) <= window_s / 2 + 1e-12
        if np.count_nonzero(in_window) < min_samples:
            start = max(0, min(low - half, values.size - int(min_samples)))
            in_window = slice(start, start + int(min_samples))
        if rest_band > 0:
            in_window = _widen_to_rest(in_window, where, previous, peak, low, rest_band)
        baselines[k] = np.median(values[in_window])
        lowest[k] = low
        previous = peak
    return baselines, lowest


def _widen_to_rest(in_window, where, first, last, low, band):
    """Union of the window with the stretch around `low` where `where` <= its minimum + band."""
    mask = np.zeros(where.size, dtype=bool)
    mask[in_window] = True
    quiet = where[first : last + 1] <= where[low] + band
    breaks = np.flatnonzero(~quiet)
    centre = low - first
    left = breaks[breaks < centre]
    right = breaks[breaks > centre]
    start = first + (int(left[-1]) + 1 if left.size else 0)
    stop = first + (int(right[0]) - 1 if right.size else last - first)
    mask[start : stop + 1] = True
    return mask
