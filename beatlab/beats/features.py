"""Per-beat landmarks and features of the primary contraction trace (beats.csv)."""

from dataclasses import dataclass, replace

import numpy as np
import pandas as pd

from beatlab.beats._grid import upsample, upsampling_factor
from beatlab.beats._peak import kink_peaks, parabola_vertices, refine_peaks
from beatlab.beats._strokes import (
    PEAK_MODELS,
    downstroke_bounds,
    irregular_flags,
    opd_amplitudes,
    secondary_peak_times,
    stop_index,
    stroke_resolved,
    velocity_extremes,
)
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
    "velocity_resolved",
)
"""Further columns measure_beats adds after BEAT_COLUMNS."""

_ONSET_LEVEL = 0.1
_MID_LEVEL = 0.5
_TOP_LEVEL = 0.9


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
    secondary_smooth_s=0.03,
    irregular_tolerance=0.25,
    smooth_s=0.02,
    hysteresis_sd=2.5,
    hysteresis_fraction=0.075,
    baseline_window_s=0.1,
    baseline_min_samples=3,
    baseline_smooth_s=0.05,
    baseline_rest_sd=4.0,
    peak_search_s=0.05,
    peak_model="kink",
    noise_method="robust",
    noise_sd=None,
    interpolation="cubic",
    min_stroke_frames=2.5,
    velocity_window_s=None,
):
    """Measure the landmarks and features of every beat (one row per beat).

    Parameters
    ----------
    trace : array_like, shape (T,)
        Primary trace, ``displacement_um`` (µm), finite; signed traces are fine.
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
        ...and a prominence of at least this many noise SDs of the trace smoothed by
        `secondary_smooth_s`, so noise on a slow relaxation does not count.
    secondary_smooth_s : float
        Bandwidth (s) of the local quadratic smoothing of the copy on which secondary peaks
        are found and their prominence and dip are measured (0.03). On a noisy trace the dip
        is the deepest noise excursion and the top the highest, so a smoother copy misses
        fewer dips near the 20 % level and counts less noise on a shoulder, but flattens
        narrow bumps. Measured at 30 fps and peak / noise SD 30 (120 bumps, 360 beats without):
        20 ms missed 33 of the issue-8 bump (dip 24 %) and 3 of a bump of prominence 15 %,
        and flagged 10 shoulders; 30 ms missed 16 and 10 and flagged none; 50 ms loses a third
        of the prominence of a bump of SD 50 ms on an exponential tail. 0 uses the measured
        trace.
    irregular_tolerance : float
        A beat is irregular when its IBI differs from the median IBI by more than this
        fraction of the median.
    smooth_s : float
        Bandwidth (s) of the local quadratic smoothing applied before measuring; it keeps
        landmarks of clean traces unbiased (exact for cubics) and reduces noise at high frame
        rates. 0 measures the raw samples.
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
    peak_model : {'kink', 'spline'}
        With ``interpolation='cubic'``: ``'kink'`` (default) refines each peak by a local
        model of the frames that can turn abruptly, kept where the frames show such a turn
        beyond their noise (see Notes); ``'spline'`` keeps the vertex on the upsampled smoothed
        trace. Ignored with ``'linear'``.
    noise_method : str
        Noise estimator (:data:`beatlab.beats.NOISE_METHODS`) when `noise_sd` is None.
    noise_sd : float, optional
        Noise SD of the unsmoothed trace (µm) if known.
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
    min_stroke_frames : float
        A beat's contraction velocity is reported only when its upstroke from the 10 % to
        the 90 % level lasts at least this many frame intervals (and at least
        `velocity_window_s`); likewise the relaxation velocity with the downstroke from
        90 % to 10 %. Otherwise the velocity is NaN and ``velocity_resolved`` False.
    velocity_window_s : float, optional
        Span (s) of the filter that made `velocity`, e.g. (n - 1) / fps for a
        Savitzky-Golay window of n frames; a stroke shorter than it is smoothed away.
        None: only `min_stroke_frames` applies.

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
        ``secondary_peak_s`` (s, the most prominent secondary peak), ``peak_index`` (the
        sample nearest the peak) and ``velocity_resolved`` (bool: False when the frame rate
        or the velocity filter does not resolve the upstroke or the downstroke; the
        unresolved velocity is then NaN). Undefined values are NaN.

    Raises
    ------
    InputError
        If a trace is malformed or holds NaN, the peaks are not valid increasing indices, or
        an option is out of range.

    Notes
    -----
    Landmarks follow DESIGN.md ("Per-beat landmarks"). Baseline: median of the trace over the
    100 ms centred on its lowest point between the previous peak (or the start) and this
    peak. Levels are fractions of the amplitude above the baseline; upstroke crossing = last
    upward crossing before the peak; downstroke crossing = last downward crossing before the
    next beat's onset, or for the last beat before the recording end or, when the trace has
    come back below its 10 % level, before its lowest point after the peak (a beat that
    starts just before the recording ends is not part of the last one); NaN when the trace
    never falls to the level. A noise band of `hysteresis_sd` noise SDs keeps the "last
    crossing" rules from picking noise at rest; it leaves clean traces exactly on the plain
    rule. The smoothing is a local polynomial regression (Savitzky & Golay 1964, Anal Chem
    36:1627; Cleveland 1979, J Am Stat Assoc 74:829).

    Peak: with ``'linear'``, the vertex of the parabola through the three samples around the
    maximum, at their actual times (kept within half the shorter of the two intervals, which
    only matters on very uneven sampling). With ``'cubic'``, that vertex on the upsampled
    smoothed trace; a symmetric smoother rounds an abrupt turn (a rise ending into an exponential
    decay), which moves that maximum towards the flatter side (-8.7 ms for a 150 ms
    half-cosine rise into a 120 ms exponential decay, at 15-100 fps). With
    ``peak_model='kink'`` the frames above 30 % of the amplitude within 90 ms of the peak are
    also fitted by a cubic with a jump of slope and curvature at a free joint (two-phase
    regression with an unknown join point, Hudson 1966, J Am Stat Assoc 61:1097); where that
    lowers the residual sum of squares by more than 16 noise variances compared with a plain
    cubic, the peak is the maximum of the fitted curve. It needs at least 9 such frames (in
    practice 50 fps or more) and an abrupt turn that stands out of the noise.

    Secondary peaks: local maxima of the `secondary_smooth_s` copy between the peak and the
    beat's stop, with the topographic prominence of ``scipy.signal.peak_prominences`` within
    that stretch. Velocities are the largest positive and most negative velocity samples from
    the onset (or the lowest point) to the end (or the downstroke bound). When the lowest
    point before the first peak is the first frame (its upstroke began before the recording),
    the first beat takes the baseline of the second; its onset is then NaN if the first frame
    is already above the 10 % level.
    """
    values, times, idx, velocity_in, opd_in = _checked_inputs(
        trace, times_s, peaks, velocity, opd_change
    )
    secondary_prominence = check_fraction(secondary_prominence, "secondary_prominence")
    secondary_min_level = check_fraction(secondary_min_level, "secondary_min_level")
    secondary_snr = check_non_negative(secondary_snr, "secondary_snr")
    irregular_tolerance = check_non_negative(irregular_tolerance, "irregular_tolerance")
    hysteresis_sd = check_non_negative(hysteresis_sd, "hysteresis_sd")
    min_stroke_frames = check_non_negative(min_stroke_frames, "min_stroke_frames")
    velocity_window_s = check_non_negative(
        0.0 if velocity_window_s is None else velocity_window_s, "velocity_window_s"
    )
    if peak_model not in PEAK_MODELS:
        raise InputError(f"peak_model must be one of {PEAK_MODELS}, got {peak_model!r}")
    if idx.size == 0:
        return _empty_frame()

    curves = _prepare_curves(
        values,
        times,
        idx,
        velocity_in,
        smooth_s=smooth_s,
        baseline_smooth_s=baseline_smooth_s,
        secondary_smooth_s=secondary_smooth_s,
        peak_search_s=peak_search_s,
        noise_method=noise_method,
        noise_sd=noise_sd,
        interpolation=interpolation,
    )
    top = _peaks_and_baselines(
        curves,
        kink=peak_model == "kink" and curves.factor > 1,
        window_s=baseline_window_s,
        min_samples=baseline_min_samples,
        rest_sd=check_non_negative(baseline_rest_sd, "baseline_rest_sd"),
        baseline_smooth_s=check_non_negative(baseline_smooth_s, "baseline_smooth_s"),
    )
    marks = _landmark_crossings(curves, top, hysteresis_sd * curves.sigma, hysteresis_fraction)
    top = _bracket_peaks(top, marks)

    start = np.where(np.isfinite(marks["onset"]), marks["onset"], curves.tl[top.lowest])
    stop = np.where(np.isfinite(marks["end"]), marks["end"], curves.tl[marks["bound"]])
    velocities = _resolved_velocities(
        curves, marks, start, stop, max(min_stroke_frames * curves.dt, velocity_window_s)
    )
    stops = [stop_index(curves.tl, s, b) for s, b in zip(stop, marks["bound"], strict=True)]
    secondary = secondary_peak_times(
        curves.secondary,
        curves.tl,
        curves.idx,
        stops,
        top.baseline,
        top.amplitude,
        min_prominence=np.maximum(
            secondary_prominence * top.amplitude, secondary_snr * curves.secondary_sigma
        ),
        min_level=secondary_min_level,
        skip=max(1, round(peak_search_s / (curves.dt / curves.factor))),
    )
    opd_amplitude = opd_amplitudes(
        opd_in,
        times,
        curves.coarse_idx,
        start,
        stop,
        smooth_s=curves.smooth_s,
        window_s=baseline_window_s,
        min_samples=baseline_min_samples,
    )
    return _beat_table(
        curves, top, marks, velocities, secondary, opd_amplitude, irregular_tolerance
    )


def _resolved_velocities(curves, marks, start, stop, shortest_s):
    """Contraction and relaxation velocity of each beat, NaN where its stroke is too short.

    Returns ``(contraction, relaxation, resolved)``: the strokes are the upstroke from the
    10 % to the 90 % crossing and the downstroke from the 90 % to the 10 % crossing.
    """
    contraction, relaxation = velocity_extremes(curves.velocity, curves.tl, start, stop)
    rise_ok = stroke_resolved(marks["onset"], marks["up90"], shortest_s - 1e-9)
    fall_ok = stroke_resolved(marks["down90"], marks["end"], shortest_s - 1e-9)
    return (
        np.where(rise_ok, contraction, np.nan),
        np.where(fall_ok, relaxation, np.nan),
        rise_ok & fall_ok,
    )


def _beat_table(curves, top, marks, velocities, secondary, opd_amplitude, irregular_tolerance):
    """The beats table: BEAT_COLUMNS then EXTRA_BEAT_COLUMNS, one row per beat."""
    contraction, relaxation, resolved = velocities
    ibi = np.concatenate([[np.nan], np.diff(top.peak_s)])
    return pd.DataFrame(
        {
            "beat": np.arange(1, top.peak_s.size + 1),
            "onset_s": marks["onset"],
            "peak_s": top.peak_s,
            "end_s": marks["end"],
            "ibi_s": ibi,
            "time_to_peak_s": top.peak_s - marks["onset"],
            "relax_50_s": marks["down50"] - top.peak_s,
            "relax_90_s": marks["end"] - top.peak_s,
            "duration_50_s": marks["down50"] - marks["up50"],
            "duration_90_s": marks["end"] - marks["onset"],
            "displacement_um": top.amplitude,
            "opd_change_nm": opd_amplitude,
            "contraction_velocity_um_s": contraction,
            "relaxation_velocity_um_s": relaxation,
            "secondary_peak": np.isfinite(secondary),
            "irregular": irregular_flags(ibi, irregular_tolerance),
            "baseline_um": top.baseline,
            "peak_um": top.peak_val,
            "upstroke_50_s": marks["up50"],
            "downstroke_50_s": marks["down50"],
            "secondary_peak_s": secondary,
            "peak_index": curves.coarse_idx,
            "velocity_resolved": resolved,
        }
    )


def _checked_inputs(trace, times_s, peaks, velocity, opd_change):
    """The validated trace, times, peak indices, velocity and OPD change (or None)."""
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
    return values, times, idx, velocity_in, opd_in


@dataclass(frozen=True)
class _Curves:
    """The trace, its smoothed copies and the velocity, at the frames and on the fine grid."""

    times: np.ndarray  # frame times
    values: np.ndarray  # the measured trace at the frames
    smooth_frames: np.ndarray  # smoothed (smooth_s) at the frames
    tl: np.ndarray  # fine grid (the frames themselves with linear interpolation)
    smooth: np.ndarray  # smoothed trace on the grid
    locator: np.ndarray  # smoothed by baseline_smooth_s on the grid: finds lowest points
    secondary: np.ndarray  # smoothed by secondary_smooth_s on the grid: secondary peaks
    velocity: np.ndarray  # velocity on the grid
    idx: np.ndarray  # peak indices on the grid
    coarse_idx: np.ndarray  # peak indices at the frames
    factor: int  # grid points per frame interval
    dt: float  # median frame interval
    noise_sd: float  # noise SD of the measured trace
    sigma: float  # noise SD of the smoothed trace
    secondary_sigma: float  # noise SD of the secondary copy
    smooth_s: float
    baseline_gain: float  # noise gain of the locator's smoothing


def _prepare_curves(
    values,
    times,
    idx,
    velocity,
    *,
    smooth_s,
    baseline_smooth_s,
    secondary_smooth_s,
    peak_search_s,
    noise_method,
    noise_sd,
    interpolation,
):
    """Smooth the trace, estimate its noise, refine the peaks and upsample onto the grid."""
    smooth_s = check_non_negative(smooth_s, "smooth_s")
    peak_search_s = check_non_negative(peak_search_s, "peak_search_s")
    baseline_smooth_s = check_non_negative(baseline_smooth_s, "baseline_smooth_s")
    secondary_smooth_s = check_non_negative(secondary_smooth_s, "secondary_smooth_s")
    if noise_method not in NOISE_METHODS:
        raise InputError(
            f"noise_method must be one of {sorted(NOISE_METHODS)}, got {noise_method!r}"
        )
    smooth, _ = smooth_local_quadratic(values, times, bandwidth_s=smooth_s)
    if velocity is None:
        velocity = np.gradient(smooth, times) if smooth.size > 1 else np.zeros_like(smooth)
    dt = float(np.median(np.diff(times))) if times.size > 1 else 1.0
    if noise_sd is None:
        noise_sd = estimate_noise(values, method=noise_method) if values.size >= 3 else 0.0
    noise_sd = check_non_negative(noise_sd, "noise_sd")

    def gain(bandwidth_s):
        return noise_gain(dt, bandwidth_s=bandwidth_s, kind="local_quadratic")

    coarse_idx = refine_peaks(smooth, idx, round(peak_search_s / dt))
    locator, _ = smooth_local_quadratic(values, times, bandwidth_s=baseline_smooth_s)
    secondary, _ = smooth_local_quadratic(values, times, bandwidth_s=secondary_smooth_s)
    factor = upsampling_factor(times, interpolation)
    tl, fine, fine_locator, fine_secondary, fine_velocity = upsample(
        times, factor, smooth, locator, secondary, velocity
    )
    return _Curves(
        times=times,
        values=values,
        smooth_frames=smooth,
        tl=tl,
        smooth=fine,
        locator=fine_locator,
        secondary=fine_secondary,
        velocity=fine_velocity,
        idx=refine_peaks(fine, coarse_idx * factor, factor),
        coarse_idx=coarse_idx,
        factor=factor,
        dt=dt,
        noise_sd=noise_sd,
        sigma=noise_sd * gain(smooth_s),
        secondary_sigma=noise_sd * gain(secondary_smooth_s),
        smooth_s=smooth_s,
        baseline_gain=gain(baseline_smooth_s),
    )


@dataclass(frozen=True)
class _Top:
    """Each beat's peak, baseline, lowest point (grid index) and amplitude."""

    peak_s: np.ndarray
    peak_val: np.ndarray
    baseline: np.ndarray
    lowest: np.ndarray
    amplitude: np.ndarray


def _peaks_and_baselines(curves, *, kink, window_s, min_samples, rest_sd, baseline_smooth_s):
    """Peak time and value, baseline and amplitude of every beat."""
    c = curves
    peak_s, peak_val = parabola_vertices(c.smooth, c.tl, c.idx)
    baseline, lowest = estimate_beat_baselines(
        c.smooth,
        c.tl,
        c.idx,
        window_s=window_s,
        min_samples=min_samples * c.factor,
        locator=c.locator,
        rest_band=rest_sd * c.noise_sd * c.baseline_gain,
    )
    if lowest[0] == 0 and c.idx.size > 1:
        # the trace only rises from the first frame to the first peak: that upstroke began
        # before the recording, so its resting level is taken from the next beat
        baseline[0] = baseline[1]
    if kink:
        peak_s, peak_val, _ = kink_peaks(
            c.values, c.times, c.smooth_frames, peak_s, peak_val, baseline, noise_sd=c.noise_sd
        )
    return _Top(peak_s, peak_val, baseline, lowest, peak_val - baseline)


def _bracket_peaks(top, marks):
    """Peak times moved, where needed, between their own upstroke and downstroke crossings.

    The crossings are searched before and after the peak's sample, but the sub-sample vertex
    may lie on either side of it; on a beat of two or three samples, or on very uneven
    sampling, it can then pass the 10 % or 50 % crossing by a fraction of an interval. The
    peak is put back at that crossing, so onset <= peak <= end and the durations stay >= 0.
    """
    low = np.fmax(marks["onset"], marks["up50"])  # fmax, fmin: a NaN crossing binds nothing
    high = np.fmin(marks["end"], marks["down50"])
    return replace(top, peak_s=np.fmin(np.fmax(top.peak_s, low), high))


def _landmark_crossings(curves, top, band, hysteresis_fraction):
    """Upstroke (10, 50, 90 %) and downstroke (90, 50, 10 %) crossings of every beat.

    Returns a dict of arrays: ``onset``, ``up50``, ``up90``, ``end``, ``down50``, ``down90``
    (s, NaN where undefined) and ``bound`` (grid index: last point of the downstroke search).
    """
    c = curves
    previous = np.concatenate([[0], c.idx[:-1]])

    def crossings(fraction, starts, stops, direction):
        """Each beat's crossing of baseline + fraction x amplitude within its window."""
        return np.array(
            [
                level_crossing(
                    c.smooth,
                    c.tl,
                    top.baseline[k] + fraction * top.amplitude[k],
                    start=starts[k],
                    stop=stops[k],
                    direction=direction,
                    hysteresis=band,
                    reject=hysteresis_fraction * top.amplitude[k] if band > 0 else 0.0,
                )
                for k in range(c.idx.size)
            ]
        )

    marks = {
        "onset": crossings(_ONSET_LEVEL, previous, c.idx, "up"),
        "up50": crossings(_MID_LEVEL, previous, c.idx, "up"),
        "up90": crossings(_TOP_LEVEL, previous, c.idx, "up"),
    }
    rest_level = top.baseline + _ONSET_LEVEL * top.amplitude
    bound = downstroke_bounds(c.tl, marks["onset"], top.lowest, c.idx, c.locator, rest_level)
    marks["bound"] = bound
    marks["end"] = crossings(_ONSET_LEVEL, c.idx, bound, "down")
    marks["down50"] = crossings(_MID_LEVEL, c.idx, bound, "down")
    marks["down90"] = crossings(_TOP_LEVEL, c.idx, bound, "down")
    return marks


def _empty_frame():
    columns = {name: pd.Series(dtype=float) for name in BEAT_COLUMNS + EXTRA_BEAT_COLUMNS}
    columns["beat"] = pd.Series(dtype=np.int64)
    columns["peak_index"] = pd.Series(dtype=np.int64)
    columns["secondary_peak"] = pd.Series(dtype=bool)
    columns["velocity_resolved"] = pd.Series(dtype=bool)
    columns["irregular"] = pd.Series(dtype="boolean")
    return pd.DataFrame(columns)
