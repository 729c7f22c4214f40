"""Rhythm indices against sources outside the project (CHECKS.md, "Beat-interval indices" and
"More reference checks"): NeuroKit2 as a reference library for the interval indices, and the
short-term-variability formula of Thomsen et al. 2004 worked by hand.
"""

import warnings

import neurokit2 as nk  # a test extra (pyproject.toml)
import numpy as np
import pandas as pd
import pytest

from beatlab.rhythm import interval_indices, summarize_rhythm

#: CHECKS.md worked examples (Task Force of ESC/NASPE 1996, Circulation 93:1043), in ms
WORKED_MS = {
    "task_force_five": [810, 830, 790, 850, 820],
    "task_force_four": [800, 850, 810, 720],
}


def _random_ms(seed, n):
    """Whole-millisecond intervals, as a 1 kHz peak detector would give them."""
    rng = np.random.default_rng(seed)
    return rng.integers(450, 1600, n).tolist()


CASES = {
    **WORKED_MS,
    "random_3": _random_ms(0, 3),
    "random_7": _random_ms(1, 7),
    "random_30": _random_ms(2, 30),
    "random_120": _random_ms(3, 120),
}


def _neurokit_indices(intervals_ms):
    """SDNN, RMSSD (hrv_time) and SD1, SD2 (hrv_nonlinear) in ms, from 1 kHz peak samples.

    NeuroKit2 takes peak sample indices and a sampling rate, and reports in ms. Its
    nonlinear indices include entropies and fractal dimensions that warn (0/0, too few
    windows) on short series; those warnings are ignored here, in this call only.
    """
    peaks = np.concatenate([[0], np.cumsum(intervals_ms)]).astype(int)
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", module=r"neurokit2(\.|$)")
        time_domain = nk.hrv_time(peaks, sampling_rate=1000)
        nonlinear = nk.hrv_nonlinear(peaks, sampling_rate=1000)
    return {
        "sdnn_s": float(time_domain["HRV_SDNN"].iloc[0]),
        "rmssd_s": float(time_domain["HRV_RMSSD"].iloc[0]),
        "sd1_s": float(nonlinear["HRV_SD1"].iloc[0]),
        "sd2_s": float(nonlinear["HRV_SD2"].iloc[0]),
    }


@pytest.mark.parametrize("case", sorted(CASES))
def test_interval_indices_equal_neurokit2(case):
    intervals_ms = CASES[case]
    ours = interval_indices(np.asarray(intervals_ms, dtype=float) / 1000.0)
    ref = _neurokit_indices(intervals_ms)
    for key in ("sdnn_s", "rmssd_s", "sd1_s", "sd2_s"):
        # NeuroKit2 hrv_time / hrv_nonlinear (L): SDs with ddof 1 as ours; ms -> s. Both
        # compute the same sums in double precision: rounding only (rel 1e-9)
        assert ours[key] * 1000.0 == pytest.approx(ref[key], rel=1e-9), key


def test_neurokit2_reproduces_the_worked_examples():
    # guards the reference itself: CHECKS.md Task Force 1996 worked values (P), by hand
    five = _neurokit_indices(WORKED_MS["task_force_five"])
    assert five["rmssd_s"] == pytest.approx(40.3113, abs=1e-4)
    assert five["sdnn_s"] == pytest.approx(22.3607, abs=1e-4)
    assert _neurokit_indices(WORKED_MS["task_force_four"])["rmssd_s"] == pytest.approx(
        63.7704, abs=1e-4
    )


def _beats_with_durations(duration_s, *, ibi_s=1.0):
    """A beats table of evenly spaced beats (the columns summarize_rhythm reads)."""
    duration = np.asarray(duration_s, dtype=float)
    n = duration.size
    peak = 0.5 + ibi_s * np.arange(n)
    return pd.DataFrame(
        {
            "beat": np.arange(1, n + 1),
            "onset_s": peak - 0.1,
            "peak_s": peak,
            "end_s": peak - 0.1 + duration,
            "ibi_s": np.concatenate([[np.nan], np.diff(peak)]),
            "duration_90_s": duration,
            "displacement_um": np.full(n, 0.5),
        }
    )


def test_short_term_variability_thomsen_2004():
    # Thomsen et al. 2004, Circulation 110:2453 (P, formula): STV = sum |D_n+1 - D_n| /
    # (N x sqrt 2), the mean distance of the Poincare points (D_n, D_n+1) from the line of
    # identity. The paper writes N as the number of beats (30 consecutive beats) (M: from
    # memory, confirm against the paper); the sum has one term per successive pair, and the
    # project defines N as that count, (n - 1) for n beats (DESIGN.md). Worked by hand:
    # D = 400, 430, 410, 460, 440, 445 ms -> |steps| 30, 20, 50, 20, 5 ms, sum 125 ms,
    # 5 pairs -> 125 / (5 sqrt 2) = 17.6777 ms (the n-beats denominator would give 14.7314).
    durations = np.array([400, 430, 410, 460, 440, 445]) / 1000.0
    s = summarize_rhythm(_beats_with_durations(durations), start_s=0.0, end_s=7.0)
    assert s["duration_90_stv_s"] * 1000.0 == pytest.approx(17.6777, abs=1e-4)


def test_short_term_variability_skips_pairs_with_an_undefined_duration():
    # Thomsen et al. 2004 (P): the terms are successive beats; a beat without duration_90
    # (no end found) leaves out both pairs it belongs to, and the count of pairs drops with
    # them (rhythm.py docstring). D = 400, -, 410, 460, 440 ms: pairs (410, 460), (460, 440)
    # -> (50 + 20) / (2 sqrt 2) = 24.7487 ms, by hand
    durations = np.array([400, np.nan, 410, 460, 440]) / 1000.0
    s = summarize_rhythm(_beats_with_durations(durations), start_s=0.0, end_s=6.0)
    assert s["duration_90_stv_s"] * 1000.0 == pytest.approx(24.7487, abs=1e-4)
