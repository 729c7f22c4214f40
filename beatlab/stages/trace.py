"""Stage: one contraction trace to velocity, beats, landmarks and rhythm.

:func:`analyze_trace` is called once for the whole mask and once per region, with the same
settings, so every region is measured exactly like the whole field.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from beatlab.beats import average_beat, detect_beats, estimate_noise, measure_beats
from beatlab.errors import InputError
from beatlab.rhythm import summarize_rhythm
from beatlab.settings import BeatSettings, RhythmSettings, VelocitySettings
from beatlab.signals.traces import velocity_trace, velocity_window_frames

__all__ = ["MIN_FRAMES", "MIN_PATTERN_SNR", "TraceResult", "analyze_trace"]

#: Fewest finite frames a trace needs (its noise is estimated from differences of three).
MIN_FRAMES = 3

#: Beats are looked for only when the trace at the pattern frames stands this many noise SDs
#: above rest: below it the "pattern" is noise (no contraction in the recording or region).
MIN_PATTERN_SNR = 3.0


@dataclass(frozen=True)
class TraceResult:
    """Beats and rhythm of one contraction trace.

    Attributes
    ----------
    velocity_um_s : ndarray (T,)
        Signed velocity of the displacement trace, um/s.
    beats : pandas.DataFrame
        One row per beat (:func:`beatlab.beats.measure_beats` columns).
    summary : dict
        :func:`beatlab.rhythm.summarize_rhythm` keys, then ``snr`` (median displacement
        amplitude / trace noise SD; None without beats) and ``trace_noise_um`` (robust noise
        SD of the displacement trace, um) and ``pattern_snr`` (mean of the trace over the
        pattern frames / trace noise SD; None when no pattern frames were given).
    average_beat : pandas.DataFrame
        Ensemble average aligned at onset (:func:`beatlab.beats.average_beat`).
    """

    velocity_um_s: np.ndarray
    beats: pd.DataFrame
    summary: dict
    average_beat: pd.DataFrame


def _checked_times(times_s, shape: tuple) -> np.ndarray:
    """Frame times as float, refused unless 1-D, finite, strictly increasing, one per frame."""
    times = np.asarray(times_s, dtype=float)
    if times.ndim != 1 or times.shape != tuple(shape):
        raise InputError(
            f"times_s has shape {times.shape} but the trace {tuple(shape)}; pass one time "
            "per frame of a 1-D trace"
        )
    if not np.all(np.isfinite(times)) or np.any(np.diff(times) <= 0):
        raise InputError("times_s must be finite and strictly increasing; pass the frame times")
    return times


def _usable(trace, times_s: np.ndarray, name: str) -> np.ndarray:
    """`trace` as a float copy; refused when fewer than MIN_FRAMES frames are finite."""
    values = np.array(trace, dtype=float)
    if values.shape != times_s.shape:
        raise InputError(
            f"{name} has shape {values.shape} but times_s {times_s.shape}; pass one value per "
            "frame"
        )
    finite = int(np.count_nonzero(np.isfinite(values)))
    if finite < MIN_FRAMES:
        raise InputError(
            f"{name} has {finite} finite frames of {values.size}; a trace needs at least "
            f"{MIN_FRAMES}: record more frames"
        )
    return values


def _fill_gaps(trace: np.ndarray, times_s: np.ndarray) -> np.ndarray:
    """Non-finite frames (dropped or empty) linearly interpolated from their neighbours."""
    finite = np.isfinite(trace)
    if finite.all():
        return trace
    return np.where(finite, trace, np.interp(times_s, times_s[finite], trace[finite]))


def analyze_trace(
    displacement_um: np.ndarray,
    opd_change_nm: np.ndarray,
    times_s: np.ndarray,
    *,
    velocity: VelocitySettings,
    beats: BeatSettings,
    rhythm: RhythmSettings,
    start_s: float,
    end_s: float,
    pattern_frames: np.ndarray | None = None,
) -> TraceResult:
    """Velocity, beats with their landmarks, rhythm indices and average beat of one trace.

    Parameters
    ----------
    displacement_um : ndarray (T,)
        The primary contraction trace, um (non-finite frames are bridged linearly).
    opd_change_nm : ndarray (T,)
        The OPD-change trace, nm (non-finite frames are bridged linearly).
    times_s : ndarray (T,)
        Frame times, s, strictly increasing.
    velocity, beats, rhythm : settings sections
        ``[velocity]``, ``[beats]`` and ``[rhythm]``.
    start_s, end_s : float
        Start and end of the recording, s (for pauses at the edges).
    pattern_frames : ndarray of int, optional
        The frames that built the contraction pattern the trace is a projection onto. Beats
        are looked for only when the trace at these frames stands out of the noise
        (``pattern_snr`` >= :data:`MIN_PATTERN_SNR`); otherwise no contraction was found and
        the pattern is noise.

    Returns
    -------
    TraceResult

    Raises
    ------
    InputError
        If the times are not strictly increasing, one per frame, or a trace has fewer than
        :data:`MIN_FRAMES` finite frames or holds absurd magnitudes.
    """
    times_s = _checked_times(times_s, np.shape(displacement_um))
    work = _fill_gaps(_usable(displacement_um, times_s, "displacement_um"), times_s)
    opd_change_nm = _fill_gaps(_usable(opd_change_nm, times_s, "opd_change_nm"), times_s)
    noise = float(estimate_noise(work, method="robust"))  # also refuses absurd magnitudes
    vel = velocity_trace(work, times_s, window_ms=velocity.window_ms, polyorder=velocity.polyorder)
    pattern_snr = None
    if pattern_frames is not None and len(pattern_frames):
        at_pattern = work[np.asarray(pattern_frames, dtype=int)]
        at_pattern = at_pattern[np.isfinite(at_pattern)]
        if at_pattern.size and noise > 0:
            pattern_snr = float(np.mean(at_pattern)) / noise
    if pattern_snr is not None and pattern_snr < MIN_PATTERN_SNR:
        peaks = np.zeros(0, dtype=int)
    else:
        peaks = detect_beats(work, times_s, **beats.detect_options())
    frames = velocity_window_frames(
        times_s, window_ms=velocity.window_ms, polyorder=velocity.polyorder
    )
    step = float(np.median(np.diff(times_s))) if times_s.size > 1 else 0.0
    table = measure_beats(
        work, times_s, peaks, velocity=vel, opd_change=opd_change_nm,
        velocity_window_s=max(frames - 1, 0) * step, **beats.measure_options(),
    )  # fmt: skip
    summary = summarize_rhythm(table, start_s=start_s, end_s=end_s, **rhythm.options())
    amplitude = summary.get("displacement_um")
    summary["snr"] = float(amplitude) / noise if amplitude is not None and noise > 0 else None
    summary["trace_noise_um"] = noise
    summary["pattern_snr"] = pattern_snr
    average = average_beat(
        times_s,
        {"displacement_um": work, "velocity_um_s": vel, "opd_change_nm": opd_change_nm},
        table["onset_s"].dropna().to_numpy(),
    )
    return TraceResult(velocity_um_s=vel, beats=table, summary=summary, average_beat=average)
