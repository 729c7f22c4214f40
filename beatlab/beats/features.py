"""Per-beat landmarks and features of the primary contraction trace (beats.csv)."""

import numpy as np
import pandas as pd
from scipy.signal import find_peaks, peak_prominences

from beatlab.beats._validate import (
    as_peaks,
    as_times,
    as_trace,
    check_fraction,
    check_non_negative,
)
from beatlab.beats.baseline import NOISE_METHODS, estimate_beat_baselines, estimate_noise
from beatlab.beats.crossings import level_crossing
from beatlab.beats.smoothing import noise_gain, smooth_local_quadratic
from beatlab.errors import InputError

__all__ = ["BEAT_COLUMNS", "EXTRA_BEAT_COLUMNS", "measure_beats"]

BEAT_COLUMNS = (
    "beat",
    "onset_s",
    "peak_s",
    "end_s",
    "ibi_s",
    "time_to_peak_s",
    "relax_50_s",
    "relax_90_s",
    "duration_50_s",
    "duration_90_s",
    "displacement_um",
    "opd_change_nm",
    "contraction_velocity_um_s",
    "relaxation_velocity_um_s",
    "secondary_peak",
    "irregular",
)
"""The beats.csv columns fixed by DESIGN.md, in order."""

EXTRA_BEAT_COLUMNS = (
    "baseline_um",
    "peak_um",
    "upstroke_50_s",
    "downstroke_50_s",
    "secondary_peak_s",
    "peak_index",
)
"""Further columns measure_beats adds after BEAT_COLUMNS."""

_ONSET_LEVEL = 0.1
_MID_LEVEL = 0.5


def measure_beats(
    trace,
    times_s,
    peaks,
    *,
    velocity=None,
    opd_change=None,
    secondary_prominence=0.1,
    secondary_min_level=0.2,
    secondary_snr=2.0,
    irregular_tolerance=0.25,
    smooth_s=0.02,
    hysteresis_sd=2.5,
    hysteresis_fraction=0.075,
    baseline_window_s=0.1,
    baseline_min_samples=3,
    baseline_smooth_s=0.05,
    baseline_rest_sd=4.0,
    peak_search_s=0.05,
    noise_method="robust",
    noise_sd=None,
    interpolation="cubic",
):
    """Measure the landmarks and features of every beat (one row per beat).

    Parameters
    ----------
    trace : array_like, shape (T,)
        Primary trace, ``displacement_um`` (µm), finite.
    times_s : array_like, shape (T,)
        Sample times in seconds from the first frame, strictly increasing (uneven is fine).
    peaks : array_like of int, shape (N,)
        Increasing sample indices of the beat peaks, e.g. from :func:`detect_beats`. Each is
        moved to the highest sample of the smoothed trace within `peak_search_s`.
    velocity : array_like, shape (T,), optional
        ``velocity_um_s`` (µm/s), signed. None uses ``numpy.gradient`` of the smoothed trace
        over the times.
    opd_change : array_like, shape (T,), optional
        ``opd_change_nm`` (nm). None leaves ``opd_change_nm`` NaN.
    secondary_prominence : float
        A secondary peak needs a prominence of at least this fraction of the amplitude.
    secondary_min_level : float
        ...and the trace must stay above this fraction of the amplitude from the main peak to
        it (the dip before it is above the level), so a relaxation overshoot near rest does not
        count.
    secondary_snr : float
        ...and a prominence of at least this many noise SDs of the smoothed trace, so noise on
        a slow relaxation does not count.
    irregular_tolerance : float
        A beat is irregular when its IBI differs from the median IBI by more than this
        fraction of the median.
    smooth_s : float
        Bandwidth (s) of the local quadratic smoothing applied before measuring; it keeps
        landmarks of clean traces unbiased (exact for cubics) and reduces noise at high frame
        rates. 0 measures the raw samples.
    interpolation : {'cubic', 'linear'}
        ``'linear'`` applies the definitions literally on the samples: crossings linearly
        interpolated between frames, the peak at the vertex of the parabola through three
        samples. ``'cubic'`` (default) first upsamples the (smoothed) trace with a
        not-a-knot cubic spline through every sample onto a grid of about 4 ms (at most
        16 points per frame), then applies the same rules there. At low frame rates the
        literal rules are biased on the curved foot and on asymmetric peaks: for a
        150 ms half-cosine rise at 15 fps the linear 10 % onset is 12 ms early and the
        parabola peak 18 ms late on average, the spline 3 ms and 11 ms (noise-free,
        all sampling phases); at 50 fps and above the two agree within 1 ms.
    hysteresis_sd : float
        Half-width of the noise band of the crossing search, in noise SDs of the smoothed
        trace (see :func:`beatlab.beats.crossings.level_crossing`); 0 is the plain rule.
    hysteresis_fraction : float
        On a noisy trace, an excursion back above a downstroke level after the trace has
        come down counts only if it rises more than this fraction of the beat's amplitude
        above the level (0.075); smaller ones are rest-period spikes, which are
        heavier-tailed than the robust noise SD suggests. A second relaxation step (above
        20 % by the definition of a secondary peak) still counts. No effect on a clean
        trace.
    baseline_window_s, baseline_min_samples
        Baseline window (s) and its fewest samples (see :func:`estimate_beat_baselines`).
    baseline_smooth_s : float
        Bandwidth (s) of the local quadratic smoothing of the copy on which each beat's
        lowest point is located: on a noisy floor the window is then centred on the resting
        level, not on the deepest noise dip (which would bias the baseline low and the 10 %
        crossings late). 0 locates it on the measured trace itself.
    baseline_rest_sd : float
        On a noisy trace the baseline window is widened to the resting stretch around the
        lowest point over which that smoothed copy stays within this many of its noise SDs of
        its lowest value (see `rest_band` of :func:`estimate_beat_baselines`). The allowance
        is zero on a noise-free trace, which keeps the plain 100 ms window. 0 turns it off.
    peak_search_s : float
        Half-width (s) of the search for the maximum around each given peak index.
    noise_method : str
        Noise estimator (:data:`beatlab.beats.NOISE_METHODS`) when `noise_sd` is None.
    noise_sd : float, optional
        Noise SD of the unsmoothed trace (µm) if known.

    Returns
    -------
    pandas.DataFrame
        One row per beat. Columns `BEAT_COLUMNS` (DESIGN.md): ``beat`` (1-based),
        ``onset_s``, ``peak_s``, ``end_s``, ``ibi_s``, ``time_to_peak_s``, ``relax_50_s``,
        ``relax_90_s``, ``duration_50_s``, ``duration_90_s`` (s), ``displacement_um`` (µm),
        ``opd_change_nm`` (nm), ``contraction_velocity_um_s``, ``relaxation_velocity_um_s``
        (µm/s, both positive), ``secondary_peak`` (bool), ``irregular`` (nullable boolean,
        NA for the first beat); then `EXTRA_BEAT_COLUMNS`: ``baseline_um``, ``peak_um``
        (µm), ``upstroke_50_s``, ``downstroke_50_s`` (s, the 50 % crossings),
        ``secondary_peak_s`` (s, the most prominent secondary peak) and ``peak_index`` (the
        sample nearest the peak). Undefined values are NaN.

    Raises
    ------
    InputError
        If a trace is malformed or holds NaN, the peaks are not valid increasing indices, or
        an option is out of range.

    Notes
    -----
    Landmarks follow DESIGN.md ("Per-beat landmarks"). Baseline: median of the trace over the
    100 ms centred on its lowest point between the previous peak (or the start) and this
    peak. Peak: vertex of the parabola through the three samples around the maximum, using
    their actual times. Levels are fractions of the amplitude above the baseline; upstroke
    crossing = last upward crossing before the peak; downstroke crossing = last downward
    crossing before the next beat's onset (or the recording end); NaN when the trace never
    falls to the level. A noise band of `hysteresis_sd` noise SDs keeps the "last crossing"
    rules from picking noise at rest; it leaves clean traces exactly on the plain rule. The
    smoothing is a local polynomial regression (Savitzky & Golay 1964, Anal Chem 36:1627;
    Cleveland 1979, J Am Stat Assoc 74:829). Secondary peaks use the topographic prominence
    of ``scipy.signal.peak_prominences`` within the stretch from the peak to the end.
    Velocities are the largest positive and most negative velocity samples from the onset
    (or the lowest point) to the end (or the next onset). When the lowest point before the
    first peak is the first frame (its upstroke began before the recording), the first beat
    takes the baseline of the second; its onset is then NaN if the first frame is already
    above the 10 % level.
    """
    values = as_trace(trace)
    times = as_times(times_s, values.size)
    idx = as_peaks(peaks, values.size)
    velocity_in = None if velocity is None else as_trace(velocity, name="velocity")
    opd_in = None if opd_change is None else as_trace(opd_change, name="opd_change")
    for name, other in (("velocity", velocity_in), ("opd_change", opd_in)):
        if other is not None and other.size != values.size:
            raise InputError(
                f"{name} must have one value per trace sample ({values.size}), got "
                f"{other.size}; pass the trace of the same recording"
            )
    secondary_prominence = check_fraction(secondary_prominence, "secondary_prominence")
    secondary_min_level = check_fraction(secondary_min_level, "secondary_min_level")
    secondary_snr = check_non_negative(secondary_snr, "secondary_snr")
    irregular_tolerance = check_non_negative(irregular_tolerance, "irregular_tolerance")
    smooth_s = check_non_negative(smooth_s, "smooth_s")
    hysteresis_sd = check_non_negative(hysteresis_sd, "hysteresis_sd")
    peak_search_s = check_non_negative(peak_search_s, "peak_search_s")
    baseline_smooth_s = check_non_negative(baseline_smooth_s, "baseline_smooth_s")
    if noise_method not in NOISE_METHODS:
        raise InputError(
            f"noise_method must be one of {sorted(NOISE_METHODS)}, got {noise_method!r}"
        )
    if idx.size == 0:
        return _empty_frame()

    smooth, _ = smooth_local_quadratic(values, times, bandwidth_s=smooth_s)
    velocity_used = (
        (np.gradient(smooth, times) if smooth.size > 1 else np.zeros_like(smooth))
        if velocity_in is None
        else velocity_in
    )
    dt = float(np.median(np.diff(times))) if times.size > 1 else 1.0
    if noise_sd is None:
        noise_sd = estimate_noise(values, method=noise_method) if values.size >= 3 else 0.0
    sigma = check_non_negative(noise_sd, "noise_sd") * noise_gain(
        dt, bandwidth_s=smooth_s, kind="local_quadratic"
    )

    idx = _refine_peaks(smooth, idx, round(peak_search_s / dt))
    locator, _ = smooth_local_quadratic(values, times, bandwidth_s=baseline_smooth_s)
    coarse_idx = idx
    factor = _upsampling_factor(times, interpolation)
    tl, smooth, locator, velocity_used, idx = _upsample(
        times, factor, smooth, locator, velocity_used, idx
    )
    idx = _refine_peaks(smooth, idx, factor)
    peak_s, peak_val = _parabola_vertices(smooth, tl, idx)
    rest_band = (
        check_non_negative(baseline_rest_sd, "baseline_rest_sd")
        * check_non_negative(noise_sd, "noise_sd")
        * noise_gain(dt, bandwidth_s=baseline_smooth_s, kind="local_quadratic")
    )
    baseline, lowest = estimate_beat_baselines(
        smooth,
        tl,
        idx,
        window_s=baseline_window_s,
        min_samples=baseline_min_samples * factor,
        locator=locator,
        rest_band=rest_band,
    )
    if lowest[0] == 0 and idx.size > 1:
        # the trace only rises from the first frame to the first peak: that upstroke began
        # before the recording, so its resting level is taken from the next beat
        baseline[0] = baseline[1]
    amplitude = peak_val - baseline
    band = hysteresis_sd * sigma
    n_beats = idx.size
    previous = np.concatenate([[0], idx[:-1]])

    def crossings(fraction, starts, stops, direction):
        """Each beat's crossing of baseline + fraction x amplitude within its window."""
        return np.array(
            [
                level_crossing(
                    smooth,
                    tl,
                    baseline[k] + fraction * amplitude[k],
                    start=starts[k],
                    stop=stops[k],
                    direction=direction,
                    hysteresis=band,
                    reject=hysteresis_fraction * amplitude[k] if band > 0 else 0.0,
                )
                for k in range(n_beats)
            ]
        )

    onset = crossings(_ONSET_LEVEL, previous, idx, "up")
    up50 = crossings(_MID_LEVEL, previous, idx, "up")
    bound = _downstroke_bounds(tl, onset, lowest, idx)
    end = crossings(_ONSET_LEVEL, idx, bound, "down")
    down50 = crossings(_MID_LEVEL, idx, bound, "down")

    beat_start = np.where(np.isfinite(onset), onset, tl[lowest])
    beat_stop = np.where(np.isfinite(end), end, tl[bound])
    contraction, relaxation = _velocity_extremes(velocity_used, tl, beat_start, beat_stop)
    opd_amplitude = _opd_amplitudes(
        opd_in,
        times,
        coarse_idx,
        beat_start,
        beat_stop,
        smooth_s,
        baseline_window_s,
        baseline_min_samples,
    )
    secondary_s = np.array(
        [
            _secondary_peak_time(
                smooth,
                tl,
                idx[k],
                _stop_index(tl, beat_stop[k], bound[k]),
                baseline[k],
                amplitude[k],
                min_prominence=max(secondary_prominence * amplitude[k], secondary_snr * sigma),
                min_level=secondary_min_level,
            )
            for k in range(n_beats)
        ]
    )
    ibi = np.concatenate([[np.nan], np.diff(peak_s)])
    frame = pd.DataFrame(
        {
            "beat": np.arange(1, n_beats + 1),
            "onset_s": onset,
            "peak_s": peak_s,
            "end_s": end,
            "ibi_s": ibi,
            "time_to_peak_s": peak_s - onset,
            "relax_50_s": down50 - peak_s,
            "relax_90_s": end - peak_s,
            "duration_50_s": down50 - up50,
            "duration_90_s": end - onset,
            "displacement_um": amplitude,
            "opd_change_nm": opd_amplitude,
            "contraction_velocity_um_s": contraction,
            "relaxation_velocity_um_s": relaxation,
            "secondary_peak": np.isfinite(secondary_s),
            "irregular": _irregular(ibi, irregular_tolerance),
            "baseline_um": baseline,
            "peak_um": peak_val,
            "upstroke_50_s": up50,
            "downstroke_50_s": down50,
            "secondary_peak_s": secondary_s,
            "peak_index": coarse_idx,
        }
    )
    return frame


def _empty_frame():
    columns = {name: pd.Series(dtype=float) for name in BEAT_COLUMNS + EXTRA_BEAT_COLUMNS}
    columns["beat"] = pd.Series(dtype=np.int64)
    columns["peak_index"] = pd.Series(dtype=np.int64)
    columns["secondary_peak"] = pd.Series(dtype=bool)
    columns["irregular"] = pd.Series(dtype="boolean")
    return pd.DataFrame(columns)


#: landmark grid spacing when the trace is upsampled by a cubic spline
_FINE_STEP_S = 0.004
INTERPOLATIONS = ("cubic", "linear")


def _upsampling_factor(times, interpolation):
    if interpolation not in INTERPOLATIONS:
        raise InputError(
            f"interpolation must be one of {', '.join(INTERPOLATIONS)}, got {interpolation!r}"
        )
    if interpolation == "linear" or times.size < 4:
        return 1
    dt = float(np.median(np.diff(times)))
    return int(np.clip(np.ceil(dt / _FINE_STEP_S), 1, 16))


def _upsample(times, factor, smooth, locator, velocity, idx):
    """Cubic-spline (not-a-knot) values on a grid ``factor`` times finer; samples kept."""
    if factor == 1:
        return times, smooth, locator, velocity, idx
    from scipy.interpolate import CubicSpline

    steps = np.arange(factor) / factor
    fine = (times[:-1, None] + np.diff(times)[:, None] * steps[None, :]).ravel()
    fine = np.concatenate([fine, times[-1:]])
    out = [CubicSpline(times, y)(fine) for y in (smooth, locator, velocity)]
    return fine, out[0], out[1], out[2], idx * factor


def _refine_peaks(smooth, idx, radius):
    if radius < 1:
        return idx
    refined = idx.copy()
    for k, p in enumerate(idx):
        lo, hi = max(0, p - radius), min(smooth.size, p + radius + 1)
        refined[k] = lo + int(np.argmax(smooth[lo:hi]))
    if np.any(np.diff(refined) <= 0):
        return idx
    return refined


def _parabola_vertices(values, times, idx):
    """Vertex of the parabola through samples i - 1, i, i + 1 at their actual times."""
    peak_s = times[idx].astype(float)
    peak_val = values[idx].astype(float)
    inner = (idx > 0) & (idx < values.size - 1)
    for k in np.flatnonzero(inner):
        i = idx[k]
        t0, t1, t2 = times[i - 1 : i + 2] - times[i]
        y0, y1, y2 = values[i - 1 : i + 2]
        # divided differences of the interpolating parabola y = y1 + b (t - t1) + a (t - t1)^2
        d01 = (y1 - y0) / (t1 - t0)
        d12 = (y2 - y1) / (t2 - t1)
        a = (d12 - d01) / (t2 - t0)
        if a >= 0:
            continue
        b = d01 + a * (t1 - t0)
        shift = float(np.clip(-b / (2 * a), t0, t2))
        peak_s[k] = times[i] + shift
        peak_val[k] = y1 + b * shift + a * shift**2
    return peak_s, peak_val


def _downstroke_bounds(times, onset, lowest, idx):
    """Last sample index of each beat's downstroke search: the next onset, else the trough."""
    n = times.size
    bound = np.full(idx.size, n - 1, dtype=np.intp)
    for k in range(idx.size - 1):
        if np.isfinite(onset[k + 1]):
            bound[k] = int(np.searchsorted(times, onset[k + 1], side="right")) - 1
        else:
            bound[k] = lowest[k + 1]
        bound[k] = min(max(bound[k], idx[k]), idx[k + 1])
    return bound


def _stop_index(times, stop_s, bound):
    return min(int(np.searchsorted(times, stop_s, side="right")) - 1, int(bound))


def _velocity_extremes(velocity, times, start_s, stop_s):
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


def _opd_amplitudes(opd, times, idx, start_s, stop_s, smooth_s, window_s, min_samples):
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


def _secondary_peak_time(
    smooth, times, peak, stop, baseline, amplitude, *, min_prominence, min_level
):
    """Time of the most prominent qualifying local maximum after the peak, else NaN."""
    if stop - peak < 2 or amplitude <= 0:
        return np.nan
    segment = smooth[peak : stop + 1]
    local, _ = find_peaks(segment)
    if local.size == 0:
        return np.nan
    prominence, left_base, _ = peak_prominences(segment, local)
    dip = segment[left_base]
    ok = (prominence >= min_prominence) & (dip >= baseline + min_level * amplitude)
    if not np.any(ok):
        return np.nan
    best = local[ok][np.argmax(prominence[ok])]
    return float(times[peak + best])


def _irregular(ibi, tolerance):
    flags = pd.array([pd.NA] * ibi.size, dtype="boolean")
    finite = np.isfinite(ibi)
    if not np.any(finite):
        return flags
    median = float(np.median(ibi[finite]))
    flags[finite] = np.abs(ibi[finite] - median) > tolerance * median
    return flags
