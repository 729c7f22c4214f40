"""Beat schedules and the activation time course of the simulator.

The activation ``a(t)`` scales a cluster's unit contraction field: 0 at rest, the beat amplitude
at the peak of a beat. Each beat is a chain of half-cosine transitions between levels, so the
activation is continuous with a continuous first derivative (zero slope at every joint).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = [
    "EAD_PROMINENCE",
    "BeatSchedule",
    "beat_segments",
    "evaluate_activation",
    "make_schedule",
]

#: Depth of the dip before the EAD-like re-rise, as a fraction of the beat amplitude.
EAD_PROMINENCE = 0.25

#: Shortest interval between two activation onsets, in units of the rise time plus 0.1 s.
_MIN_INTERVAL_PAD_S = 0.1


@dataclass(frozen=True)
class BeatSchedule:
    """Activation onsets of one cluster and the shape of each beat.

    Attributes
    ----------
    onsets_s : ndarray (K,)
        Start of each beat's rise (activation leaves 0), in seconds from the first frame.
    amplitudes : ndarray (K,)
        Peak activation of each beat (the amplitude-pattern multiplier).
    ead : ndarray (K,) of bool
        Beats that carry an EAD-like second relaxation step.
    segments : tuple of tuple
        Per beat, the ``(duration_s, level)`` pairs of its half-cosine chain, levels as
        fractions of the beat amplitude.
    """

    onsets_s: np.ndarray
    amplitudes: np.ndarray
    ead: np.ndarray
    segments: tuple

    def to_dict(self) -> dict:
        """JSON-ready description of the schedule."""
        return {
            "onsets_s": [float(v) for v in self.onsets_s],
            "amplitudes": [float(v) for v in self.amplitudes],
            "ead": [bool(v) for v in self.ead],
            "segments": [[[float(d), float(lv)] for d, lv in seg] for seg in self.segments],
        }


def beat_segments(*, rise_s, relax_s, ead, ead_level, overshoot):
    """Return the ``(duration_s, level)`` chain of one beat.

    Parameters
    ----------
    rise_s : float
        Onset-to-peak time in s.
    relax_s : float
        Duration of one relaxation step (peak back to rest) in s.
    ead : bool
        Add an EAD-like second step: relax to ``ead_level - EAD_PROMINENCE``, re-rise to
        ``ead_level``, then relax to rest.
    ead_level : float
        Height of the secondary maximum as a fraction of the amplitude.
    overshoot : float
        Relax past rest to ``-overshoot`` and come back to 0 over ``0.6 relax_s``.

    Returns
    -------
    tuple of (float, float)
        Segment durations (s) and end levels (fractions of the amplitude).
    """
    segs = [(rise_s, 1.0)]
    if ead:
        trough = ead_level - EAD_PROMINENCE
        segs += [(relax_s * (1.0 - trough), trough), (0.4 * relax_s, ead_level)]
    if overshoot > 0:
        segs += [(relax_s, -overshoot), (0.6 * relax_s, 0.0)]
    else:
        segs += [(relax_s, 0.0)]
    return tuple((float(d), float(lv)) for d, lv in segs)


def _kernel(t_rel, segments):
    """Evaluate one beat's half-cosine chain at times ``t_rel`` (s from its onset)."""
    durations = np.array([d for d, _ in segments])
    levels = np.array([0.0] + [lv for _, lv in segments])
    edges = np.concatenate([[0.0], np.cumsum(durations)])
    out = np.zeros_like(t_rel)
    inside = (t_rel >= 0) & (t_rel < edges[-1])
    tr = t_rel[inside]
    j = np.clip(np.searchsorted(edges, tr, side="right") - 1, 0, len(durations) - 1)
    frac = (tr - edges[j]) / durations[j]
    out[inside] = levels[j] + (levels[j + 1] - levels[j]) * 0.5 * (1.0 - np.cos(np.pi * frac))
    return out


def evaluate_activation(times_s, schedule: BeatSchedule):
    """Activation of one cluster at ``times_s``.

    Parameters
    ----------
    times_s : ndarray (N,)
        Times in s.
    schedule : BeatSchedule
        The cluster's beats.

    Returns
    -------
    ndarray (N,) float64
        Sum over beats of ``amplitude * kernel(t - onset)``; overlapping beats add
        (incomplete relaxation at high rates).
    """
    times_s = np.asarray(times_s, dtype=np.float64)
    out = np.zeros_like(times_s)
    for onset, amp, seg in zip(
        schedule.onsets_s, schedule.amplitudes, schedule.segments, strict=True
    ):
        length = sum(d for d, _ in seg)
        i0, i1 = np.searchsorted(times_s, [onset, onset + length])
        if i1 > i0:
            out[i0:i1] += amp * _kernel(times_s[i0:i1] - onset, seg)
    return out


def _onsets_from_rate(rate_bpm, *, duration_s, first_s, ibi_cv, min_interval_s, rng):
    interval = 60.0 / rate_bpm
    onsets = []
    t = first_s
    while t < duration_s:
        onsets.append(t)
        if ibi_cv > 0:
            # log-normal intervals: positive, with the requested mean and coefficient of variation
            sigma = np.sqrt(np.log1p(ibi_cv**2))
            step = interval * np.exp(sigma * rng.standard_normal() - 0.5 * sigma**2)
            step = max(step, min_interval_s)
        else:
            step = interval
        t += step
    return np.array(onsets, dtype=np.float64)


def make_schedule(
    *,
    n_clusters,
    duration_s,
    rate_bpm,
    beat_times_s,
    ibi_cv,
    cluster_rates_bpm,
    cluster_delay_s,
    first_beat_s,
    rise_s,
    relax_s,
    amplitude_pattern,
    ead_beats,
    ead_level,
    overshoot,
    rng,
):
    """Build one :class:`BeatSchedule` per cluster (arguments validated by the caller).

    Returns
    -------
    list of BeatSchedule
        Cluster ``c`` (0-based) is delayed by ``c * cluster_delay_s``. With
        ``cluster_rates_bpm`` each cluster draws its own intervals; otherwise all clusters share
        cluster 0's intervals.
    """
    min_interval = rise_s + _MIN_INTERVAL_PAD_S
    rates = cluster_rates_bpm if cluster_rates_bpm is not None else [rate_bpm] * n_clusters
    shared = None
    schedules = []
    for c in range(n_clusters):
        delay = c * cluster_delay_s
        if beat_times_s is not None:
            base = np.asarray(beat_times_s, dtype=np.float64)
        elif rates[c] <= 0:
            base = np.zeros(0)
        elif cluster_rates_bpm is None and shared is not None:
            base = shared
        else:
            first = first_beat_s if first_beat_s is not None else 0.5 * min(60.0 / rates[c], 2.0)
            base = _onsets_from_rate(
                rates[c],
                duration_s=duration_s,
                first_s=first,
                ibi_cv=ibi_cv,
                min_interval_s=min_interval,
                rng=rng,
            )
            if cluster_rates_bpm is None:
                shared = base
        onsets = base + delay
        onsets = onsets[onsets < duration_s]
        k = np.arange(onsets.size)
        pattern = np.asarray(amplitude_pattern if amplitude_pattern else (1.0,), dtype=float)
        amplitudes = pattern[k % pattern.size] if onsets.size else np.zeros(0)
        ead_set = set(ead_beats or ())
        ead = np.array([int(i) in ead_set for i in k], dtype=bool)
        segments = tuple(
            beat_segments(
                rise_s=rise_s,
                relax_s=relax_s,
                ead=bool(e),
                ead_level=ead_level,
                overshoot=overshoot,
            )
            for e in ead
        )
        schedules.append(BeatSchedule(onsets, amplitudes, ead, segments))
    return schedules
