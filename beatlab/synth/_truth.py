"""Ground truth of a simulated recording: per-beat landmarks and summary by the exact definitions.

Written from the definitions in the design notes ("Per-beat landmarks", the beats.csv columns and
the summary.json keys), independently of the analysis code, on a dense noise-free trace.
"""

from __future__ import annotations

import numpy as np
from scipy import optimize

__all__ = [
    "BEAT_COLUMNS",
    "SECONDARY_MIN_LEVEL",
    "SECONDARY_PROMINENCE",
    "TRUTH_DT_S",
    "beat_truth",
    "secondary_peak",
    "summarize_truth",
]

#: Time step of the dense truth grid (s).
TRUTH_DT_S = 1e-4
#: Window of the baseline median, centred on the lowest point (s).
_BASELINE_WINDOW_S = 0.100
#: Relative IBI deviation from the median above which a beat is irregular.
_IRREGULAR_FRACTION = 0.25
#: Secondary peak: least prominence, and least height of the maximum, as fractions of the
#: amplitude above the baseline.
SECONDARY_PROMINENCE = 0.1
SECONDARY_MIN_LEVEL = 0.2

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
    "contraction_velocity_um_s",
    "relaxation_velocity_um_s",
    "secondary_peak",
    "irregular",
    "baseline_um",
)

#: Per-beat columns whose median goes into the summary.
_MEDIAN_COLUMNS = (
    "ibi_s",
    "time_to_peak_s",
    "relax_50_s",
    "relax_90_s",
    "duration_50_s",
    "duration_90_s",
    "displacement_um",
    "contraction_velocity_um_s",
    "relaxation_velocity_um_s",
)


def _refine(trace, level, t0, t1, d0, d1):
    """Crossing time of ``level`` between grid samples, exact when ``trace`` is given."""
    if trace is not None and (d0 - level) * (d1 - level) < 0:
        return float(optimize.brentq(lambda x: trace(x) - level, t0, t1, xtol=1e-12))
    return float(t0 + (level - d0) / (d1 - d0) * (t1 - t0))


def _up_crossing(t, d, level, i0, ip, trace):
    """Last upward crossing of ``level`` in ``d[i0:ip+1]``; or None."""
    seg = d[i0 : ip + 1]
    hits = np.flatnonzero((seg[:-1] < level) & (seg[1:] >= level))
    if hits.size == 0:
        return None
    i = i0 + hits[-1]
    return _refine(trace, level, t[i], t[i + 1], d[i], d[i + 1])


def _down_crossing(t, d, level, ip, i1, trace):
    """Last downward crossing of ``level`` in ``d[ip:i1+1]``; or None."""
    seg = d[ip : i1 + 1]
    hits = np.flatnonzero((seg[:-1] >= level) & (seg[1:] < level))
    if hits.size == 0:
        return None
    i = ip + hits[-1]
    return _refine(trace, level, t[i], t[i + 1], d[i], d[i + 1])


def _peak(t, d, i, trace):
    """Time and value of the maximum near sample ``i``.

    With ``trace`` the continuous maximum in ``[t[i-1], t[i+1]]``; otherwise the vertex of the
    parabola through samples i-1, i, i+1.
    """
    if trace is not None:
        # searched as an offset from t[i]: the bounded method's tolerance grows with |x|, and a
        # cornered peak (exponential relaxation) converges only to that tolerance
        res = optimize.minimize_scalar(
            lambda u: -trace(t[i] + u),
            bounds=(t[i - 1] - t[i], t[i + 1] - t[i]),
            method="bounded",
            options={"xatol": 1e-12},
        )
        if -res.fun >= d[i]:
            return float(t[i] + res.x), float(-res.fun)
        return float(t[i]), float(d[i])
    y0, y1, y2 = d[i - 1], d[i], d[i + 1]
    den = y0 - 2 * y1 + y2
    if den == 0:
        return float(t[i]), float(y1)
    off = 0.5 * (y0 - y2) / den
    dt = t[i + 1] - t[i]
    return float(t[i] + off * dt), float(y1 - 0.25 * (y0 - y2) * off)


def _diff(a, b):
    return None if a is None or b is None else float(a - b)


def secondary_peak(d, base, amp):
    """Whether a trace segment from a beat's peak to its end holds a secondary peak.

    Parameters
    ----------
    d : ndarray (N,)
        The dense noise-free trace from the beat's peak sample to its end (the downstroke
        crossing of 10 %, or the next beat's onset when the trace never falls that far).
    base, amp : float
        The beat's baseline and amplitude.

    Returns
    -------
    bool
        True when a local maximum inside ``d`` stands at least :data:`SECONDARY_MIN_LEVEL` of
        the amplitude above the baseline and its prominence is at least
        :data:`SECONDARY_PROMINENCE` of the amplitude (the design notes' definition).

    Notes
    -----
    Prominence is the topographic one: the maximum minus the higher of the lowest values on
    either side, each side taken up to the first sample above the maximum or the segment end.
    """
    d = np.asarray(d, dtype=float)
    if d.size < 3:
        return False
    inner = np.flatnonzero((d[1:-1] > d[:-2]) & (d[1:-1] >= d[2:])) + 1
    for m in inner:
        v = d[m]
        if v < base + SECONDARY_MIN_LEVEL * amp:
            continue
        above_left = np.flatnonzero(d[:m] > v)
        lo = above_left[-1] + 1 if above_left.size else 0
        above_right = np.flatnonzero(d[m + 1 :] > v)
        hi = m + 1 + above_right[0] if above_right.size else d.size
        left_min = d[lo:m].min() if m > lo else v
        right_min = d[m + 1 : hi].min() if hi > m + 1 else v
        if v - max(left_min, right_min) >= SECONDARY_PROMINENCE * amp:
            return True
    return False


def beat_truth(t, d, onsets_s, *, trace=None, edge_s=0.0):
    """Per-beat landmarks of a dense noise-free trace.

    Parameters
    ----------
    t : ndarray (N,)
        Dense, evenly spaced time grid in s, from the first to the last frame time.
    d : ndarray (N,)
        True displacement trace in um on ``t``.
    onsets_s : ndarray (K,)
        Activation onsets of the schedule that drives this trace; beat ``k`` is searched for
        between onset ``k`` and onset ``k + 1``.
    trace : callable, optional
        ``trace(t_s) -> um``, the continuous trace that ``d`` samples; refines peaks and level
        crossings beyond the grid (continuous maximum, root of ``trace - level``). Without it,
        the parabola vertex and linear interpolation of the definitions are used on the grid.
    edge_s : float
        Beats whose peak lies within this time of the first or last frame are left out: with
        ``edge_s`` one frame interval, such a peak is not a maximum of the sampled trace (the
        recording cuts the beat), so no analysis can resolve it.

    Returns
    -------
    list of dict
        One dict per beat with a peak inside the recording, keys :data:`BEAT_COLUMNS`; undefined
        values are None. ``secondary_peak`` is decided on ``d`` by :func:`secondary_peak`,
        between the peak and ``end_s`` (or the stop of the search when the trace never falls
        to 10 %), whatever shape the schedule gave the beat.
    """
    n = t.size
    dt = t[1] - t[0]
    vel = np.gradient(d, dt)
    found = []
    for k, onset in enumerate(onsets_s):
        i0 = int(np.searchsorted(t, onset))
        nxt = onsets_s[k + 1] if k + 1 < len(onsets_s) else np.inf
        i1 = min(int(np.searchsorted(t, nxt)), n)
        if i1 - i0 < 3:
            continue
        ip = i0 + int(np.argmax(d[i0:i1]))
        # a peak at the window edge is truncated by the recording end or not a maximum
        if ip <= i0 or ip >= i1 - 1 or ip >= n - 1 or d[ip] <= 0:
            continue
        if t[ip] < t[0] + edge_s or t[ip] > t[-1] - edge_s:
            continue
        found.append((k, ip))

    beats = []
    prev_ip = 0
    for k, ip in found:
        peak_s, peak_v = _peak(t, d, ip, trace)
        lo = prev_ip + int(np.argmin(d[prev_ip : ip + 1]))
        half = round(0.5 * _BASELINE_WINDOW_S / dt)
        base = float(np.median(d[max(lo - half, 0) : min(lo + half + 1, n)]))
        amp = peak_v - base
        if amp <= 0:
            prev_ip = ip
            continue
        beats.append(
            {
                "k": k,
                "ip": ip,
                "prev_ip": prev_ip,
                "peak_s": peak_s,
                "base": base,
                "amp": amp,
                "onset_s": _up_crossing(t, d, base + 0.1 * amp, prev_ip, ip, trace),
                "up50_s": _up_crossing(t, d, base + 0.5 * amp, prev_ip, ip, trace),
            }
        )
        prev_ip = ip

    rows = []
    for b, beat in enumerate(beats):
        ip = beat["ip"]
        if b + 1 < len(beats):
            nb = beats[b + 1]
            stop_s = nb["onset_s"] if nb["onset_s"] is not None else nb["peak_s"]
            i1 = min(int(np.searchsorted(t, stop_s)), n - 1)
        else:
            i1 = n - 1
        base, amp = beat["base"], beat["amp"]
        end_s = _down_crossing(t, d, base + 0.1 * amp, ip, i1, trace)
        down50 = _down_crossing(t, d, base + 0.5 * amp, ip, i1, trace)
        ibi = beat["peak_s"] - beats[b - 1]["peak_s"] if b > 0 else None
        i_end = i1 if end_s is None else min(int(np.ceil((end_s - t[0]) / dt)), i1)
        secondary = secondary_peak(d[ip : i_end + 1], base, amp)
        rows.append(
            {
                "beat": b + 1,
                "onset_s": beat["onset_s"],
                "peak_s": beat["peak_s"],
                "end_s": end_s,
                "ibi_s": ibi,
                "time_to_peak_s": _diff(beat["peak_s"], beat["onset_s"]),
                "relax_50_s": _diff(down50, beat["peak_s"]),
                "relax_90_s": _diff(end_s, beat["peak_s"]),
                "duration_50_s": _diff(down50, beat["up50_s"]),
                "duration_90_s": _diff(end_s, beat["onset_s"]),
                "displacement_um": float(amp),
                "contraction_velocity_um_s": float(np.max(vel[beat["prev_ip"] : ip + 1])),
                "relaxation_velocity_um_s": float(-np.min(vel[ip : i1 + 1])),
                "secondary_peak": bool(secondary),
                "irregular": False,
                "baseline_um": float(base),
            }
        )
    ibis = [r["ibi_s"] for r in rows if r["ibi_s"] is not None]
    if ibis:
        med = float(np.median(ibis))
        for r in rows:
            if r["ibi_s"] is not None:
                r["irregular"] = bool(abs(r["ibi_s"] - med) > _IRREGULAR_FRACTION * med)
    return rows


def _median(rows, key):
    vals = [r[key] for r in rows if r[key] is not None]
    return float(np.median(vals)) if vals else None


def summarize_truth(rows, *, t_end_s):
    """Recording-level truth from per-beat rows (the summary.json keys).

    Parameters
    ----------
    rows : list of dict
        Output of :func:`beat_truth`.
    t_end_s : float
        Time of the last frame in s.

    Returns
    -------
    dict
        ``beat_count``, ``beat_rate_bpm``, ``longest_pause_s``, interval indices
        (``ibi_mean_s``, ``ibi_cv``, ``sdnn_s``, ``rmssd_s``, ``sd1_s``, ``sd2_s``; None below
        3 IBIs), the medians of the per-beat columns, rate-corrected durations, short-term
        variability, ``irregular_fraction``, ``secondary_peak_beats``, ``alternans_index``
        (None below 8 beats) and ``rhythm``.

    Notes
    -----
    RMSSD and SDNN as in Task Force of ESC/NASPE 1996 (Circulation 93:1043); SD1/SD2 from the
    identities of Brennan, Palaniswami & Kamen 2001 (IEEE TBME 48:1342); Bazett 1920 and
    Fridericia 1920 rate corrections.
    """
    n = len(rows)
    ibi = np.array([r["ibi_s"] for r in rows if r["ibi_s"] is not None], dtype=float)
    out = {"beat_count": n}
    if n == 0:
        out["beat_rate_bpm"] = 0.0
    elif ibi.size == 0:
        out["beat_rate_bpm"] = None
    else:
        out["beat_rate_bpm"] = float(60.0 / ibi.mean())

    if n == 0:
        pause = t_end_s
    else:
        gaps = list(np.diff([r["peak_s"] for r in rows]))
        first = rows[0]["onset_s"] if rows[0]["onset_s"] is not None else rows[0]["peak_s"]
        last = rows[-1]["end_s"] if rows[-1]["end_s"] is not None else rows[-1]["peak_s"]
        gaps += [first, t_end_s - last]
        pause = max(gaps)
    out["longest_pause_s"] = float(pause)

    keys = ("ibi_mean_s", "ibi_cv", "sdnn_s", "rmssd_s", "sd1_s", "sd2_s")
    out.update(dict.fromkeys(keys))
    if ibi.size >= 3:
        diffs = np.diff(ibi)
        sd1 = np.std(diffs, ddof=1) / np.sqrt(2.0)
        var_sum = np.var(ibi[:-1], ddof=1) + np.var(ibi[1:], ddof=1)
        out.update(
            ibi_mean_s=float(ibi.mean()),
            ibi_cv=float(np.std(ibi, ddof=1) / ibi.mean()),
            sdnn_s=float(np.std(ibi, ddof=1)),
            rmssd_s=float(np.sqrt(np.mean(diffs**2))),
            sd1_s=float(sd1),
            sd2_s=float(np.sqrt(max(var_sum - sd1**2, 0.0))),
        )
    for key in _MEDIAN_COLUMNS:
        out[key] = _median(rows, key)

    bazett, frid = [], []
    for r in rows:
        if r["duration_90_s"] is not None and r["ibi_s"] is not None:
            bazett.append(r["duration_90_s"] / r["ibi_s"] ** 0.5)
            frid.append(r["duration_90_s"] / r["ibi_s"] ** (1.0 / 3.0))
    out["duration_90_bazett_s"] = float(np.median(bazett)) if bazett else None
    out["duration_90_fridericia_s"] = float(np.median(frid)) if frid else None
    durs = [r["duration_90_s"] for r in rows if r["duration_90_s"] is not None]
    out["duration_90_stv_s"] = (
        float(np.sum(np.abs(np.diff(durs))) / ((len(durs) - 1) * np.sqrt(2.0)))
        if len(durs) >= 2
        else None
    )
    irregular = [r["irregular"] for r in rows if r["ibi_s"] is not None]
    out["irregular_fraction"] = float(np.mean(irregular)) if irregular else None
    out["secondary_peak_beats"] = int(sum(r["secondary_peak"] for r in rows))
    amps = np.array([r["displacement_um"] for r in rows], dtype=float)
    if n >= 8:
        sign = (-1.0) ** np.arange(n)
        out["alternans_index"] = float(2 * abs(np.mean(sign * (amps - amps.mean()))) / amps.mean())
    else:
        out["alternans_index"] = None

    if n == 0:
        rhythm = "quiescent"
    elif ibi.size < 4:
        rhythm = "undetermined"
    elif (
        out["ibi_cv"] > 0.15
        or out["irregular_fraction"] > 0.1
        or out["longest_pause_s"] > 2.5 * out["ibi_s"]
    ):
        rhythm = "irregular"
    else:
        rhythm = "regular"
    out["rhythm"] = rhythm
    return out
