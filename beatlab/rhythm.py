"""Rhythm of a recording from its beats: interval indices, rate correction, rhythm class."""

import numpy as np
import pandas as pd

from beatlab.errors import InputError

__all__ = [
    "MEDIAN_COLUMNS",
    "RATE_CORRECTIONS",
    "RHYTHM_CLASSES",
    "classify_rhythm",
    "interval_indices",
    "rate_corrected",
    "summarize_rhythm",
]

MEDIAN_COLUMNS = (
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
)
"""Per-beat timing and amplitude columns whose median over beats enters the summary."""

RATE_CORRECTIONS = {
    "bazett": 1.0 / 2.0,
    "fridericia": 1.0 / 3.0,
}
"""Rate-correction methods: name -> exponent of the interval (s) dividing the duration."""

RHYTHM_CLASSES = ("quiescent", "undetermined", "irregular", "regular")

_MIN_IBIS_INDICES = 3
_MIN_BEATS_ALTERNANS = 8
_REQUIRED = ("peak_s", "onset_s", "end_s", "ibi_s", "duration_90_s", "displacement_um")


def _none_if_nan(value):
    value = float(value)
    return value if np.isfinite(value) else None


def interval_indices(ibi_s):
    """Time-domain and Poincaré indices of an interval series.

    Parameters
    ----------
    ibi_s : array_like, shape (N,)
        Successive inter-beat intervals in seconds; non-finite entries are dropped.

    Returns
    -------
    dict
        ``ibi_mean_s``, ``ibi_cv`` (SD / mean), ``sdnn_s`` (SD, ddof 1), ``rmssd_s`` (root
        mean square of successive differences), ``sd1_s`` (SDSD / sqrt 2, SDSD the SD of
        successive differences with ddof 1) and ``sd2_s`` (SD of (x_n + x_n+1) / sqrt 2, ddof
        1, so that SD1^2 + SD2^2 = var(x_n) + var(x_n+1)). Every value is None with fewer than
        3 intervals.

    Raises
    ------
    InputError
        If an interval is zero or negative.

    Notes
    -----
    Task Force of the ESC and NASPE (1996), Circulation 93:1043 (SDNN, RMSSD); Brennan,
    Palaniswami & Kamen (2001), IEEE Trans Biomed Eng 48:1342 (SD1, SD2 of the Poincaré plot).
    SD2 is computed directly, not as sqrt(2 SDNN^2 - SD1^2), which can go negative on short
    series.

    Examples
    --------
    >>> round(interval_indices([0.81, 0.83, 0.79, 0.85, 0.82])["rmssd_s"] * 1000, 4)
    40.3113
    """
    ibi = np.asarray(ibi_s, dtype=float).ravel()
    ibi = ibi[np.isfinite(ibi)]
    if np.any(ibi <= 0):
        raise InputError(f"ibi_s must be > 0, got a minimum of {ibi.min()!r}; pass intervals in s")
    keys = ("ibi_mean_s", "ibi_cv", "sdnn_s", "rmssd_s", "sd1_s", "sd2_s")
    if ibi.size < _MIN_IBIS_INDICES:
        return dict.fromkeys(keys)
    mean = float(np.mean(ibi))
    sdnn = float(np.std(ibi, ddof=1))
    successive = np.diff(ibi)
    rmssd = float(np.sqrt(np.mean(successive**2)))
    sd1 = float(np.std(successive, ddof=1) / np.sqrt(2.0))
    sd2 = float(np.std((ibi[:-1] + ibi[1:]) / np.sqrt(2.0), ddof=1))
    return {
        "ibi_mean_s": mean,
        "ibi_cv": sdnn / mean,
        "sdnn_s": sdnn,
        "rmssd_s": rmssd,
        "sd1_s": sd1,
        "sd2_s": sd2,
    }


def rate_corrected(duration_s, ibi_s, *, method="bazett"):
    """Correct durations for the beat rate: duration / interval ** exponent.

    Parameters
    ----------
    duration_s : array_like, shape (N,) or scalar
        Durations in seconds (e.g. ``duration_90_s``).
    ibi_s : array_like, shape (N,) or scalar
        The interval preceding each beat, seconds; broadcast against `duration_s`.
    method : str
        One of ``RATE_CORRECTIONS``: ``"bazett"`` (D / IBI^(1/2)) or ``"fridericia"``
        (D / IBI^(1/3)).

    Returns
    -------
    ndarray
        Corrected durations in seconds (the value at an interval of 1 s); NaN where either
        input is NaN.

    Raises
    ------
    InputError
        If `method` is unknown, the shapes do not broadcast, or an interval is <= 0.

    Notes
    -----
    Bazett (1920), Heart 7:353; Fridericia (1920), Acta Med Scand 53:469. Both are written for
    intervals in seconds, so a beat at 60 bpm is unchanged.

    Examples
    --------
    >>> round(float(rate_corrected(0.400, 0.8, method="bazett")) * 1000, 2)
    447.21
    """
    if method not in RATE_CORRECTIONS:
        raise InputError(
            f"method must be one of {sorted(RATE_CORRECTIONS)}, got {method!r}; pick a listed one"
        )
    duration = np.asarray(duration_s, dtype=float)
    ibi = np.asarray(ibi_s, dtype=float)
    try:
        duration, ibi = np.broadcast_arrays(duration, ibi)
    except ValueError as exc:
        raise InputError(
            f"duration_s {duration.shape} and ibi_s {ibi.shape} must have matching shapes"
        ) from exc
    if np.any(ibi[np.isfinite(ibi)] <= 0):
        raise InputError("ibi_s must be > 0 seconds; pass the preceding intervals in seconds")
    with np.errstate(invalid="ignore"):
        return duration / ibi ** RATE_CORRECTIONS[method]


def classify_rhythm(
    summary,
    *,
    irregular_cv=0.15,
    irregular_fraction_max=0.1,
    pause_factor=2.5,
    min_ibis=4,
):
    """Class of the rhythm from a summary dict: quiescent, undetermined, irregular or regular.

    Parameters
    ----------
    summary : dict
        Needs ``beat_count``; with beats also ``ibi_cv``, ``irregular_fraction``,
        ``longest_pause_s`` and ``ibi_s`` (the median IBI), as from :func:`summarize_rhythm`.
    irregular_cv : float
        ``ibi_cv`` above this is irregular.
    irregular_fraction_max : float
        ``irregular_fraction`` above this is irregular.
    pause_factor : float
        ``longest_pause_s`` above this multiple of the median IBI is irregular.
    min_ibis : int
        Fewer intervals than this (``beat_count - 1``) is undetermined.

    Returns
    -------
    str
        ``"quiescent"`` (no beats), ``"undetermined"`` (fewer than `min_ibis` IBIs),
        ``"irregular"`` or ``"regular"``.

    Raises
    ------
    InputError
        If a needed key is missing.
    """
    if "beat_count" not in summary:
        raise InputError("summary needs the key 'beat_count'; pass the summarize_rhythm output")
    count = int(summary["beat_count"])
    if count == 0:
        return "quiescent"
    if count - 1 < min_ibis:
        return "undetermined"
    missing = [
        k for k in ("ibi_cv", "irregular_fraction", "longest_pause_s", "ibi_s") if k not in summary
    ]
    if missing:
        raise InputError(f"summary lacks {missing}; pass the summarize_rhythm output")
    cv = summary["ibi_cv"]
    fraction = summary["irregular_fraction"]
    pause = summary["longest_pause_s"]
    median_ibi = summary["ibi_s"]
    if cv is not None and cv > irregular_cv:
        return "irregular"
    if fraction is not None and fraction > irregular_fraction_max:
        return "irregular"
    if pause is not None and median_ibi is not None and pause > pause_factor * median_ibi:
        return "irregular"
    return "regular"


def summarize_rhythm(
    beats,
    *,
    start_s,
    end_s,
    irregular_cv=0.15,
    irregular_fraction_max=0.1,
    pause_factor=2.5,
    min_ibis=4,
):
    """Recording-level rhythm and beat summary (the beat keys of summary.json).

    Parameters
    ----------
    beats : pandas.DataFrame
        Output of :func:`beatlab.beats.measure_beats` (one row per beat, in time order).
    start_s, end_s : float
        Time of the first and the last frame, seconds.
    irregular_cv, irregular_fraction_max, pause_factor, min_ibis
        Thresholds of :func:`classify_rhythm`.

    Returns
    -------
    dict
        ``beat_count``; ``beat_rate_bpm`` (60 / mean IBI with 2 beats or more, 0 with none,
        None with one); ``longest_pause_s`` (the longest of: the gaps between successive
        peaks, the start to the first onset, the last end to the recording end; a missing
        onset or end falls back to that beat's peak; the whole recording without beats);
        ``ibi_count``; the :func:`interval_indices` keys; the median of each of
        ``MEDIAN_COLUMNS`` under its own name; ``duration_90_bazett_s`` and
        ``duration_90_fridericia_s`` (each beat corrected with its own preceding IBI, then
        the median); ``duration_90_stv_s`` (sum |D_n+1 - D_n| / ((n - 1) sqrt 2) over
        successive beats with both durations defined); ``irregular_fraction`` (irregular
        IBIs / IBIs); ``secondary_peak_beats`` (count); ``alternans_index`` (2 |mean_k
        (-1)^k (A_k - mean A)| / mean A over displacement amplitudes, None below 8 beats);
        ``rhythm``. Undefined values are None.

    Raises
    ------
    InputError
        If a needed column is missing or ``end_s <= start_s``.

    Notes
    -----
    Interval indices: Task Force of the ESC and NASPE (1996), Circulation 93:1043; Brennan
    et al. (2001), IEEE Trans Biomed Eng 48:1342. Rate correction: Bazett (1920), Fridericia
    (1920). Short-term variability of repolarisation duration: Thomsen et al. (2004),
    Circulation 110:2453. Alternans as the alternating component of successive amplitudes.
    """
    if not isinstance(beats, pd.DataFrame):
        raise InputError(f"beats must be a pandas DataFrame, got {type(beats).__name__}")
    missing = [c for c in _REQUIRED if c not in beats.columns]
    if missing:
        raise InputError(f"beats lacks the columns {missing}; pass the measure_beats output")
    start_s, end_s = float(start_s), float(end_s)
    if not (np.isfinite(start_s) and np.isfinite(end_s)) or end_s <= start_s:
        raise InputError(f"end_s must be after start_s, got start_s={start_s}, end_s={end_s}")

    count = len(beats)
    peaks = beats["peak_s"].to_numpy(dtype=float)
    ibi = beats["ibi_s"].to_numpy(dtype=float)
    finite_ibi = ibi[np.isfinite(ibi)]
    summary = {"beat_count": count}
    if count == 0:
        summary["beat_rate_bpm"] = 0.0
    elif finite_ibi.size == 0:
        summary["beat_rate_bpm"] = None
    else:
        summary["beat_rate_bpm"] = 60.0 / float(np.mean(finite_ibi))
    summary["longest_pause_s"] = _longest_pause(beats, peaks, start_s, end_s)
    summary["ibi_count"] = int(finite_ibi.size)
    summary.update(interval_indices(finite_ibi))
    for column in MEDIAN_COLUMNS:
        summary[column] = _median(beats[column]) if column in beats.columns else None

    duration = beats["duration_90_s"].to_numpy(dtype=float)
    for method in RATE_CORRECTIONS:
        corrected = rate_corrected(duration, ibi, method=method) if count else duration
        summary[f"duration_90_{method}_s"] = _median(corrected)
    summary["duration_90_stv_s"] = _short_term_variability(duration)
    summary["irregular_fraction"] = _irregular_fraction(beats)
    summary["secondary_peak_beats"] = (
        int(beats["secondary_peak"].fillna(False).astype(bool).sum())
        if "secondary_peak" in beats.columns
        else 0
    )
    summary["alternans_index"] = _alternans_index(beats["displacement_um"].to_numpy(float))
    summary["rhythm"] = classify_rhythm(
        summary,
        irregular_cv=irregular_cv,
        irregular_fraction_max=irregular_fraction_max,
        pause_factor=pause_factor,
        min_ibis=min_ibis,
    )
    return summary


def _median(values):
    values = np.asarray(values, dtype=float)
    values = values[np.isfinite(values)]
    return float(np.median(values)) if values.size else None


def _longest_pause(beats, peaks, start_s, end_s):
    if len(beats) == 0:
        return end_s - start_s
    onset = beats["onset_s"].to_numpy(dtype=float)
    end = beats["end_s"].to_numpy(dtype=float)
    first = onset[0] if np.isfinite(onset[0]) else peaks[0]
    last = end[-1] if np.isfinite(end[-1]) else peaks[-1]
    gaps = [first - start_s, end_s - last]
    if peaks.size > 1:
        gaps.append(float(np.max(np.diff(peaks))))
    return float(max(0.0, max(gaps)))


def _short_term_variability(duration):
    pairs = np.abs(np.diff(duration))
    pairs = pairs[np.isfinite(pairs)]
    if pairs.size == 0:
        return None
    return float(pairs.sum() / (pairs.size * np.sqrt(2.0)))


def _irregular_fraction(beats):
    if "irregular" not in beats.columns:
        return None
    flags = beats["irregular"].astype("boolean")
    defined = flags.notna() & np.isfinite(beats["ibi_s"].to_numpy(dtype=float))
    if not defined.any():
        return None
    return float(flags[defined].astype(bool).mean())


def _alternans_index(amplitude):
    amplitude = amplitude[np.isfinite(amplitude)]
    if amplitude.size < _MIN_BEATS_ALTERNANS:
        return None
    mean = float(np.mean(amplitude))
    if mean <= 0:
        return None
    signs = np.where(np.arange(amplitude.size) % 2 == 0, 1.0, -1.0)
    return float(2.0 * abs(np.mean(signs * (amplitude - mean))) / mean)
