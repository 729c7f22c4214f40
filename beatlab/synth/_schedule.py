"""Beat schedules and the activation time course of the simulator.

The activation ``a(t)`` scales a cluster's unit contraction field: 0 at rest, the beat amplitude
at the peak of a beat. Each beat is a chain of half-cosine transitions between levels, so the
activation is continuous with a continuous first derivative (zero slope at every joint).

Two further shapes the analysis was not designed around:

- exponential relaxation: after the chain (which then ends at its last level instead of 0) the
  activation decays as ``level * exp(-t / tau)``. The activation stays continuous but its slope
  jumps from 0 to ``-level / tau`` at the joint: a fast rise into an exponential decay gives an
  asymmetric, cornered peak. The tail is cut after :data:`TAIL_TAUS` time constants (a jump
  below 1e-9 of the level).
- a smooth EAD-like after-bump: a Gaussian ``h exp(-(t - c)^2 / (2 sigma^2))`` added to the
  relaxing activation, cut at :data:`BUMP_SIGMAS` standard deviations (a jump below 1e-13 h).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = [
    "BUMP_SIGMAS",
    "EAD_PROMINENCE",
    "EAD_SHAPES",
    "RELAXATIONS",
    "TAIL_TAUS",
    "BeatSchedule",
    "beat_bump",
    "beat_kernel",
    "beat_segments",
    "beat_support",
    "evaluate_activation",
    "make_schedule",
]

#: Depth of the dip before the EAD-like re-rise, as a fraction of the beat amplitude.
EAD_PROMINENCE = 0.25

#: Shapes of the final relaxation: half-cosine to rest, or exponential decay.
RELAXATIONS = ("cosine", "exponential")
#: Shapes of an EAD-like after-contraction: a second relaxation step, or a smooth Gaussian bump.
EAD_SHAPES = ("step", "bump")
#: Length of an exponential tail in time constants (exp(-21) < 1e-9).
TAIL_TAUS = 21.0
#: Half-width of a Gaussian bump's support in standard deviations (exp(-32) < 1e-13).
BUMP_SIGMAS = 8.0

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
        Beats given an EAD-like after-contraction (a second step or a bump). Whether the trace
        then carries a secondary peak by the design-notes definition is decided in the truth,
        on the trace itself.
    segments : tuple of tuple
        Per beat, the ``(duration_s, level)`` pairs of its half-cosine chain, levels as
        fractions of the beat amplitude.
    relax_tau_s : float or None
        Time constant of the exponential decay that follows each chain (from its last level to
        0); None for half-cosine relaxation (the chain ends at 0).
    bumps : tuple
        Per beat, None or the ``(centre_s, sigma_s, height)`` of a Gaussian added to the beat:
        centre in s from the beat's onset, height as a fraction of the beat amplitude.
    """

    onsets_s: np.ndarray
    amplitudes: np.ndarray
    ead: np.ndarray
    segments: tuple
    relax_tau_s: float | None = None
    bumps: tuple = ()

    def shape(self, k):
        """Keyword arguments of :func:`beat_kernel` for beat ``k`` (0-based)."""
        bump = self.bumps[k] if self.bumps else None
        return {"segments": self.segments[k], "relax_tau_s": self.relax_tau_s, "bump": bump}

    def to_dict(self) -> dict:
        """JSON-ready description of the schedule."""
        return {
            "onsets_s": [float(v) for v in self.onsets_s],
            "amplitudes": [float(v) for v in self.amplitudes],
            "ead": [bool(v) for v in self.ead],
            "segments": [[[float(d), float(lv)] for d, lv in seg] for seg in self.segments],
            "relax_tau_s": None if self.relax_tau_s is None else float(self.relax_tau_s),
            "bumps": [
                None if b is None else {"centre_s": b[0], "sigma_s": b[1], "height": b[2]}
                for b in (self.bumps or (None,) * len(self.onsets_s))
            ],
        }


def beat_segments(*, rise_s, relax_s, ead, ead_level, overshoot, relaxation="cosine"):
    """Return the ``(duration_s, level)`` chain of one beat.

    Parameters
    ----------
    rise_s : float
        Onset-to-peak time in s.
    relax_s : float
        Duration of one half-cosine relaxation step (peak back to rest) in s.
    ead : bool
        Add an EAD-like second step: relax to ``ead_level - EAD_PROMINENCE``, re-rise to
        ``ead_level``, then relax to rest.
    ead_level : float
        Height of the secondary maximum as a fraction of the amplitude.
    overshoot : float
        Relax past rest to ``-overshoot`` and come back to 0 over ``0.6 relax_s`` (half-cosine
        relaxation only).
    relaxation : {'cosine', 'exponential'}
        With 'exponential' the chain stops before its final relaxation (at level 1, or at
        ``ead_level`` after a step); the exponential tail of the schedule follows it.

    Returns
    -------
    tuple of (float, float)
        Segment durations (s) and end levels (fractions of the amplitude).
    """
    segs = [(rise_s, 1.0)]
    if ead:
        trough = ead_level - EAD_PROMINENCE
        segs += [(relax_s * (1.0 - trough), trough), (0.4 * relax_s, ead_level)]
    if relaxation == "exponential":
        pass
    elif overshoot > 0:
        segs += [(relax_s, -overshoot), (0.6 * relax_s, 0.0)]
    else:
        segs += [(relax_s, 0.0)]
    return tuple((float(d), float(lv)) for d, lv in segs)


def beat_bump(*, rise_s, delay_s, sigma_s, height):
    """Return the ``(centre_s, sigma_s, height)`` of a Gaussian after-bump.

    Parameters
    ----------
    rise_s : float
        Onset-to-peak time in s (the end of the rise).
    delay_s : float
        Time from the end of the rise to the bump's centre in s.
    sigma_s : float
        Standard deviation of the Gaussian in s.
    height : float
        Height of the Gaussian as a fraction of the beat amplitude (added to the relaxation).

    Returns
    -------
    tuple of float
        Centre in s from the beat's onset, sigma in s, height.
    """
    return (float(rise_s + delay_s), float(sigma_s), float(height))


def beat_support(*, segments, relax_tau_s=None, bump=None):
    """Start and stop (s from the onset) outside which one beat's kernel is exactly 0."""
    stop = sum(d for d, _ in segments)
    start = 0.0
    if relax_tau_s is not None:
        stop += TAIL_TAUS * relax_tau_s
    if bump is not None:
        centre, sigma, _ = bump
        start = min(start, centre - BUMP_SIGMAS * sigma)
        stop = max(stop, centre + BUMP_SIGMAS * sigma)
    return start, stop


def beat_kernel(t_rel, *, segments, relax_tau_s=None, bump=None):
    """One beat's activation at unit amplitude.

    Parameters
    ----------
    t_rel : ndarray (N,)
        Times in s from the beat's onset.
    segments : tuple of (float, float)
        The half-cosine chain (:func:`beat_segments`).
    relax_tau_s : float, optional
        Time constant of the exponential decay from the chain's last level to 0; None when the
        chain ends at rest.
    bump : tuple of float, optional
        ``(centre_s, sigma_s, height)`` of a Gaussian added (:func:`beat_bump`).

    Returns
    -------
    ndarray (N,) float64
        The chain, then the tail, plus the bump; 0 outside :func:`beat_support`.
    """
    t_rel = np.asarray(t_rel, dtype=np.float64)
    durations = np.array([d for d, _ in segments])
    levels = np.array([0.0] + [lv for _, lv in segments])
    edges = np.concatenate([[0.0], np.cumsum(durations)])
    out = np.zeros_like(t_rel)
    inside = (t_rel >= 0) & (t_rel < edges[-1])
    tr = t_rel[inside]
    j = np.clip(np.searchsorted(edges, tr, side="right") - 1, 0, len(durations) - 1)
    frac = (tr - edges[j]) / durations[j]
    out[inside] = levels[j] + (levels[j + 1] - levels[j]) * 0.5 * (1.0 - np.cos(np.pi * frac))
    if relax_tau_s is not None:
        x = t_rel - edges[-1]
        tail = (x >= 0) & (x < TAIL_TAUS * relax_tau_s)
        out[tail] = levels[-1] * np.exp(-x[tail] / relax_tau_s)
    if bump is not None:
        centre, sigma, height = bump
        z = (t_rel - centre) / sigma
        near = np.abs(z) < BUMP_SIGMAS
        out[near] += height * np.exp(-0.5 * z[near] ** 2)
    return out


def evaluate_activation(times_s, schedule: BeatSchedule):
    """Activation of one cluster at ``times_s``.

    Parameters
    ----------
    times_s : ndarray (N,)
        Times in s, increasing.
    schedule : BeatSchedule
        The cluster's beats.

    Returns
    -------
    ndarray (N,) float64
        Sum over beats of ``amplitude * kernel(t - onset)``; overlapping beats add
        (incomplete relaxation at high rates, exponential tails).
    """
    times_s = np.asarray(times_s, dtype=np.float64)
    out = np.zeros_like(times_s)
    for k, (onset, amp) in enumerate(zip(schedule.onsets_s, schedule.amplitudes, strict=True)):
        shape = schedule.shape(k)
        start, stop = beat_support(**shape)
        i0, i1 = np.searchsorted(times_s, [onset + start, onset + stop])
        if i1 > i0:
            out[i0:i1] += amp * beat_kernel(times_s[i0:i1] - onset, **shape)
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
    relaxation="cosine",
    relax_tau_s=None,
    ead_shape="step",
    ead_bump_sigma_s=None,
    ead_bump_delay_s=None,
):
    """Build one :class:`BeatSchedule` per cluster (arguments validated by the caller).

    The beat-shape arguments are those of :func:`beatlab.synth.simulate_recording`: with
    ``relaxation='exponential'`` every beat ends in an exponential tail of time constant
    ``relax_tau_s``; with ``ead_shape='bump'`` the ``ead_beats`` get a Gaussian of height
    ``ead_level``, standard deviation ``ead_bump_sigma_s``, centred ``ead_bump_delay_s`` after
    the end of the rise, instead of a second step.

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
        step = ead_shape == "step"
        segments = tuple(
            beat_segments(
                rise_s=rise_s,
                relax_s=relax_s,
                ead=bool(e) and step,
                ead_level=ead_level,
                overshoot=overshoot,
                relaxation=relaxation,
            )
            for e in ead
        )
        bump = (
            None
            if step
            else beat_bump(
                rise_s=rise_s, delay_s=ead_bump_delay_s, sigma_s=ead_bump_sigma_s, height=ead_level
            )
        )
        bumps = tuple(bump if e else None for e in ead)
        tau = float(relax_tau_s) if relaxation == "exponential" else None
        schedules.append(BeatSchedule(onsets, amplitudes, ead, segments, tau, bumps))
    return schedules
