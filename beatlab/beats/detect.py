"""Beat detection on a single-peaked contraction trace."""

import numpy as np

from beatlab.beats._peaks import local_maxima, peak_prominences
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

_RELATIVE_RIPPLE = 1e-9
_MAX_GATE_INFLATION = 2.0


def detect_beats(
    trace,
    times_s,
    *,
    max_rate_bpm=240.0,
    min_snr=8.0,
    min_relative_prominence=0.2,
    min_beat_snr=5.0,
    min_rise_fraction=0.5,
    smooth_s=0.05,
    rise_window_s=0.3,
    fall_window_s=1.0,
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
        detection-smoothed trace (white noise; or wander on the time scale of
        `rise_window_s` when larger, up to twice the white value). Otherwise the result is
        empty (pure noise, drift, a flat trace). In 20 s of white noise the largest noise
        prominence is ~4 such SDs (99th percentile ~6), hence the default 8.
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
        The rise of a peak is measured from the lowest point within this many seconds before
        it (scipy's ``wlen``), so slow drift, which changes little over that time, never looks
        like a beat. About the longest rise from rest to peak.
    fall_window_s : float
        The fall of a peak is measured to the lowest point within this many seconds after it
        (longer: a slow or two-step relaxation still counts in full).
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
    Candidates are the local maxima of the smoothed trace (as ``scipy.signal.find_peaks``
    defines them) with their topographic prominence (as ``scipy.signal.peak_prominences``):
    the smaller of the rise from the lowest point within `rise_window_s` before the peak and
    the fall to the lowest point within `fall_window_s` after it, each searched until a
    higher sample. A peak within
    `rise_window_s` of the recording start or end, with no higher sample between it and that
    edge, is judged by its other side alone, over `rise_window_s`, so a beat cut by the
    recording edge is found while drift at the edge is not. The noise gate
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
    fall_window_s = check_positive(fall_window_s, "fall_window_s")
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
    # the gate also faces coloured noise (wander on the time scale of a rise)
    # (capped: dense beats inflate that estimate too, and must still pass)
    slow = _slow_noise(smooth, int(np.ceil(rise_window_s / dt)))
    sigma_gate = max(sigma_smooth, min(slow, _MAX_GATE_INFLATION * sigma_smooth))

    interior = local_maxima(smooth)
    # smoothing can push a peak one sample from the edge onto the edge sample itself
    edges = [i for i, j in ((0, 1), (values.size - 1, values.size - 2)) if smooth[i] > smooth[j]]
    candidates = np.union1d(interior, np.asarray(edges, dtype=np.intp)).astype(np.intp)
    if candidates.size == 0:
        return empty
    half_rise = int(np.ceil(rise_window_s / dt))
    half_fall = int(np.ceil(fall_window_s / dt))
    rise = np.zeros(candidates.size)
    fall = np.zeros(candidates.size)
    fall_short = np.zeros(candidates.size)  # within rise_window_s: judges a cut first beat
    inner = np.isin(candidates, interior)
    if np.any(inner):
        peaks_in = candidates[inner]
        # a plateau cut by the window (a flat trace smoothed into ripple) has prominence 0:
        # a valid answer here, which the noise gate then rejects
        _, left_base, short_base = peak_prominences(smooth, peaks_in, wlen=2 * half_rise + 1)
        _, _, right_base = peak_prominences(smooth, peaks_in, wlen=2 * half_fall + 1)
        rise[inner] = smooth[peaks_in] - smooth[left_base]
        fall[inner] = smooth[peaks_in] - smooth[right_base]
        fall_short[inner] = smooth[peaks_in] - smooth[short_base]
    for k in np.flatnonzero(~inner):
        if candidates[k] == 0:
            fall[k] = _edge_drop(smooth, 0, half_fall)
            fall_short[k] = _edge_drop(smooth, 0, half_rise)
        else:
            rise[k] = _edge_drop(smooth, int(candidates[k]), half_rise)
    left_cut, right_cut = _edge_cut(smooth, candidates, half_rise)
    strength = np.minimum(rise, fall)
    strength = np.where(right_cut & ~left_cut, rise, strength)
    strength = np.where(left_cut & ~right_cut, fall_short, strength)
    strength = np.where(left_cut & right_cut, np.maximum(rise, fall_short), strength)

    # floating-point ripple of a flat trace is no beat, whatever the noise estimate says
    ripple = _RELATIVE_RIPPLE * max(float(np.max(np.abs(values))), np.finfo(float).tiny)
    gated = strength[strength >= max(min_snr * sigma_gate, ripple)]
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
    """Whether a candidate within `half` samples of an edge has no higher sample up to it."""
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


def _slow_noise(smooth, lag):
    """Noise SD of the smoothed trace at the rise time scale, for coloured noise and wander.

    The smaller of the robust SD of its changes over `lag` samples (/ sqrt 2) and of its
    resting-floor spread: white noise gives the same value as the white-noise gain; a random
    walk or wander on the scale of a beat's rise gives more, so it cannot pass as beats.
    """
    if smooth.size <= lag + 2:
        return 0.0
    lagged = smooth[lag:] - smooth[:-lag]
    spread = float(np.median(np.abs(lagged - np.median(lagged)))) * 1.4826 / np.sqrt(2.0)
    return float(min(spread, NOISE_METHODS["floor_quantile"](smooth)))


def _edge_drop(smooth, edge, half):
    """Drop from an edge sample to the lowest point inward, searched until a higher sample."""
    step = 1 if edge == 0 else -1
    stop = edge + step * (half + 1)
    inward = smooth[edge + step : stop : step] if stop >= 0 else smooth[edge + step :: step]
    higher = np.flatnonzero(inward > smooth[edge])
    if higher.size:
        inward = inward[: higher[0]]
    return float(smooth[edge] - inward.min()) if inward.size else 0.0


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
    """Highest raw sample near each peak; a peak on the first or last sample is unobserved."""
    snapped = []
    for c in peaks:
        lo, hi = max(0, c - radius), min(values.size, c + radius + 1)
        best = lo + int(np.argmax(values[lo:hi]))
        if 0 < best < values.size - 1:
            snapped.append(best)
    return np.unique(np.asarray(snapped, dtype=np.intp))
