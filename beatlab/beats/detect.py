"""Beat detection on a single-peaked contraction trace."""

import numpy as np
from scipy.signal import find_peaks, peak_prominences

from beatlab.beats._validate import (
    as_times,
    as_trace,
    check_fraction,
    check_non_negative,
    check_positive,
)
from beatlab.beats.baseline import NOISE_METHODS, estimate_noise
from beatlab.beats.smoothing import noise_gain, smooth_gaussian
from beatlab.errors import InputError

__all__ = ["detect_beats"]


def detect_beats(
    trace,
    times_s,
    *,
    max_rate_bpm=240.0,
    min_snr=6.0,
    min_relative_prominence=0.2,
    min_beat_snr=5.0,
    min_rise_fraction=0.5,
    smooth_s=0.05,
    rise_window_s=0.5,
    floor_window_s=2.0,
    reference_quantile=0.9,
    noise_method="robust",
    noise_sd=None,
):
    """Find the peak of every beat in a single-peaked contraction trace.

    Parameters
    ----------
    trace : array_like, shape (T,)
        Primary trace, e.g. ``displacement_um`` (>= 0, one peak per beat), finite.
    times_s : array_like, shape (T,)
        Sample times in seconds, strictly increasing (uneven spacing is fine).
    max_rate_bpm : float
        Highest beat rate to resolve, beats per minute; peaks closer than 60 / `max_rate_bpm`
        seconds compete and the more prominent one wins.
    min_snr : float
        The recording beats only if its typical beat prominence (the `reference_quantile` of
        the candidate prominences above this gate) reaches `min_snr` noise SDs of the
        unsmoothed trace, i.e. a beat amplitude-to-noise ratio of about `min_snr`.
        Otherwise the result is empty (pure noise, drift, a flat trace).
    min_relative_prominence : float
        Each beat needs a prominence of at least this fraction of the typical beat prominence
        (alternans beats of half the amplitude pass at the default 0.2).
    min_beat_snr : float
        Each beat also needs a prominence of at least this many noise SDs of the smoothed
        trace: it rejects noise maxima during rest, between real beats.
    min_rise_fraction : float
        A beat must rise from its preceding trough by at least this fraction of its height
        above the resting floor; a hump on the relaxation of the previous beat (an EAD-like
        second step) rises less and stays part of that beat.
    smooth_s : float
        Bandwidth (SD, seconds) of the Gaussian smoothing used for detection only; 0 turns it
        off. The returned index is the maximum of the unsmoothed trace near the smoothed peak.
    rise_window_s : float
        The prominence of a peak is measured within this many seconds on each side (scipy's
        ``wlen``), so slow drift never looks like a beat. Longer than any beat's rise.
    floor_window_s : float
        The resting floor under a candidate is the lowest smoothed value within this many
        seconds before it (>= `rise_window_s`).
    reference_quantile : float
        Quantile of the prominences above the noise gate taken as the typical beat prominence.
    noise_method : str
        Noise estimator of :func:`beatlab.beats.estimate_noise` (used when `noise_sd` is None).
    noise_sd : float or None
        Noise SD of the unsmoothed trace if known (unit of the trace); None estimates it.

    Returns
    -------
    ndarray of int, shape (N,)
        Increasing sample indices of the beat peaks; empty when there is no beating.

    Raises
    ------
    InputError
        If the trace or times are malformed or hold NaN, or an option is out of range.

    Notes
    -----
    Candidates are the local maxima of the smoothed trace (``scipy.signal.find_peaks``) with
    their topographic prominence (``scipy.signal.peak_prominences``) inside a window of
    ``2 rise_window_s``: the smaller of the rise from the lowest point before the peak and the
    fall to the lowest point after it, each searched until a higher sample. A peak whose side
    search reaches the recording start or end without meeting a higher sample is judged by its
    other side alone, so a beat cut by the recording edge is still found. The noise gate
    follows the usual peak-picking practice of a prominence threshold in noise SDs; the
    amplitude-relative threshold makes the count independent of the trace's unit.

    Examples
    --------
    >>> import numpy as np
    >>> t = np.arange(0, 10, 1 / 30)
    >>> y = 0.02 + np.exp(-0.5 * ((t % 1.0 - 0.5) / 0.08) ** 2)
    >>> detect_beats(y, t).size
    10
    """
    values = as_trace(trace)
    times = as_times(times_s, values.size)
    max_rate_bpm = check_positive(max_rate_bpm, "max_rate_bpm")
    min_snr = check_non_negative(min_snr, "min_snr")
    min_beat_snr = check_non_negative(min_beat_snr, "min_beat_snr")
    min_relative_prominence = check_fraction(min_relative_prominence, "min_relative_prominence")
    min_rise_fraction = check_non_negative(min_rise_fraction, "min_rise_fraction")
    smooth_s = check_non_negative(smooth_s, "smooth_s")
    rise_window_s = check_positive(rise_window_s, "rise_window_s")
    floor_window_s = check_positive(floor_window_s, "floor_window_s")
    reference_quantile = check_fraction(reference_quantile, "reference_quantile")
    if floor_window_s < rise_window_s:
        raise InputError(
            f"floor_window_s must be >= rise_window_s ({rise_window_s}), got {floor_window_s}; "
            "lengthen floor_window_s"
        )
    if noise_method not in NOISE_METHODS:
        raise InputError(
            f"noise_method must be one of {sorted(NOISE_METHODS)}, got {noise_method!r}"
        )
    empty = np.zeros(0, dtype=np.intp)
    if values.size < 3:
        return empty

    sigma = estimate_noise(values, method=noise_method) if noise_sd is None else noise_sd
    sigma = check_non_negative(sigma, "noise_sd")
    dt = float(np.median(np.diff(times)))
    smooth = smooth_gaussian(values, times, bandwidth_s=smooth_s)
    sigma_smooth = sigma * noise_gain(dt, bandwidth_s=smooth_s, kind="gaussian")

    candidates, _ = find_peaks(smooth)
    if candidates.size == 0:
        return empty
    half = int(np.ceil(rise_window_s / dt))
    _, left_base, right_base = peak_prominences(smooth, candidates, wlen=2 * half + 1)
    rise = smooth[candidates] - smooth[left_base]
    fall = smooth[candidates] - smooth[right_base]
    left_cut, right_cut = _edge_cut(smooth, candidates, half)
    strength = np.minimum(rise, fall)
    strength = np.where(right_cut & ~left_cut, rise, strength)
    strength = np.where(left_cut & ~right_cut, fall, strength)
    strength = np.where(left_cut & right_cut, np.maximum(rise, fall), strength)

    gated = strength[strength >= max(min_snr * sigma_smooth, np.finfo(float).tiny)]
    if gated.size == 0:
        return empty
    reference = float(np.quantile(gated, reference_quantile))
    threshold = max(min_beat_snr * sigma_smooth, min_relative_prominence * reference)
    keep = strength >= threshold

    floor = _trailing_minimum(smooth, times, candidates, floor_window_s)
    height = smooth[candidates] - floor
    keep &= left_cut | (rise >= min_rise_fraction * height)

    chosen = _enforce_interval(candidates[keep], strength[keep], times, 60.0 / max_rate_bpm)
    return _snap_to_raw_maximum(values, chosen, max(1, round(smooth_s / dt)))


def _edge_cut(smooth, candidates, half):
    """Whether each candidate's left / right base search ran into the recording edge."""
    n = smooth.size
    running_max_left = np.maximum.accumulate(smooth)
    running_max_right = np.maximum.accumulate(smooth[::-1])[::-1]
    left_cut = np.zeros(candidates.size, dtype=bool)
    right_cut = np.zeros(candidates.size, dtype=bool)
    for k, c in enumerate(candidates):
        height = smooth[c]
        if c - half <= 0:
            left_cut[k] = c == 0 or running_max_left[c - 1] <= height
        if c + half >= n - 1:
            right_cut[k] = c == n - 1 or running_max_right[c + 1] <= height
    return left_cut, right_cut


def _trailing_minimum(smooth, times, candidates, window_s):
    starts = np.searchsorted(times, times[candidates] - window_s, side="left")
    return np.array([smooth[s : c + 1].min() for s, c in zip(starts, candidates, strict=True)])


def _enforce_interval(peaks, strength, times, min_interval_s):
    """Greedy: keep the strongest peak, drop its neighbours closer than `min_interval_s`."""
    accepted = []
    for k in np.argsort(-strength, kind="stable"):
        t = times[peaks[k]]
        if all(abs(t - times[peaks[j]]) >= min_interval_s for j in accepted):
            accepted.append(k)
    return np.sort(peaks[np.array(accepted, dtype=np.intp)]) if accepted else peaks[:0]


def _snap_to_raw_maximum(values, peaks, radius):
    snapped = []
    for c in peaks:
        lo, hi = max(0, c - radius), min(values.size, c + radius + 1)
        snapped.append(lo + int(np.argmax(values[lo:hi])))
    return np.unique(np.asarray(snapped, dtype=np.intp))
