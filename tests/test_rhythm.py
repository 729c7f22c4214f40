import numpy as np
import pandas as pd
import pytest

from beatlab.beats import BEAT_COLUMNS
from beatlab.errors import InputError
from beatlab.rhythm import (
    MEDIAN_COLUMNS,
    classify_rhythm,
    interval_indices,
    rate_corrected,
    summarize_rhythm,
)


def test_task_force_worked_example_five_intervals():
    out = interval_indices(np.array([810, 830, 790, 850, 820]) / 1000.0)
    # CHECKS.md: Task Force of ESC/NASPE 1996, Circulation 93:1043 (P), worked by hand
    assert out["rmssd_s"] * 1000 == pytest.approx(40.3113, abs=1e-4)
    # CHECKS.md: Task Force of ESC/NASPE 1996, Circulation 93:1043 (P), SDNN with ddof 1
    assert out["sdnn_s"] * 1000 == pytest.approx(22.3607, abs=1e-4)
    assert out["ibi_mean_s"] == pytest.approx(0.82)
    assert out["ibi_cv"] == pytest.approx(0.0223607 / 0.82, rel=1e-5)


def test_task_force_worked_example_four_intervals():
    out = interval_indices(np.array([800, 850, 810, 720]) / 1000.0)
    # CHECKS.md: Task Force of ESC/NASPE 1996, Circulation 93:1043 (P)
    assert out["rmssd_s"] * 1000 == pytest.approx(63.7704, abs=1e-4)


@pytest.mark.parametrize("seed", [0, 1, 2])
@pytest.mark.parametrize("n", [3, 5, 40])
def test_poincare_identities(seed, n):
    rng = np.random.default_rng(seed)
    ibi = rng.uniform(0.5, 1.5, n)
    out = interval_indices(ibi)
    sdsd = np.std(np.diff(ibi), ddof=1)
    # CHECKS.md: Brennan, Palaniswami & Kamen 2001, IEEE TBME 48:1342 (P): SD1 = SDSD / sqrt 2
    assert out["sd1_s"] == pytest.approx(sdsd / np.sqrt(2))
    # CHECKS.md: Brennan et al. 2001 (P): SD1^2 + SD2^2 = var(x_n) + var(x_n+1)
    total = np.var(ibi[:-1], ddof=1) + np.var(ibi[1:], ddof=1)
    assert out["sd1_s"] ** 2 + out["sd2_s"] ** 2 == pytest.approx(total)
    assert out["sd2_s"] >= 0


def test_indices_null_below_three_intervals():
    assert all(v is None for v in interval_indices([0.8, 0.9]).values())
    assert interval_indices([0.8, np.nan, 0.9, 1.0])["sdnn_s"] is not None
    with pytest.raises(InputError, match="ibi_s"):
        interval_indices([0.8, -0.1, 0.9])


def test_bazett_and_fridericia_worked_numbers():
    # CHECKS.md: Bazett 1920 (P): 400 ms at an interval of 0.8 s -> 447.21 ms
    assert float(rate_corrected(0.4, 0.8, method="bazett")) * 1000 == pytest.approx(
        447.21, abs=0.01
    )
    # CHECKS.md: Fridericia 1920 (P): 400 ms at 0.8 s -> 430.89 ms
    assert float(rate_corrected(0.4, 0.8, method="fridericia")) * 1000 == pytest.approx(
        430.89, abs=0.01
    )
    # CHECKS.md: both unchanged at an interval of 1 s (P)
    np.testing.assert_allclose(rate_corrected([0.4, 0.5], 1.0, method="bazett"), [0.4, 0.5])
    np.testing.assert_allclose(rate_corrected([0.4, 0.5], 1.0, method="fridericia"), [0.4, 0.5])
    assert np.isnan(rate_corrected(0.4, np.nan))
    with pytest.raises(InputError, match="method"):
        rate_corrected(0.4, 0.8, method="other")
    with pytest.raises(InputError, match="ibi_s"):
        rate_corrected(0.4, 0.0)


def make_beats(peaks_s, *, duration_s=0.4, amplitude=1.0, secondary=None):
    peaks_s = np.asarray(peaks_s, dtype=float)
    n = peaks_s.size
    amplitude = np.broadcast_to(np.asarray(amplitude, dtype=float), (n,))
    duration = np.broadcast_to(np.asarray(duration_s, dtype=float), (n,))
    ibi = np.concatenate([[np.nan], np.diff(peaks_s)]) if n else np.zeros(0)
    finite = ibi[np.isfinite(ibi)]
    median = np.median(finite) if finite.size else np.nan
    irregular = pd.array(
        [pd.NA if not np.isfinite(v) else bool(abs(v - median) > 0.25 * median) for v in ibi],
        dtype="boolean",
    )
    frame = pd.DataFrame(
        {
            "beat": np.arange(1, n + 1),
            "onset_s": peaks_s - 0.1,
            "peak_s": peaks_s,
            "end_s": peaks_s - 0.1 + duration,
            "ibi_s": ibi,
            "time_to_peak_s": np.full(n, 0.1),
            "relax_50_s": np.full(n, 0.15),
            "relax_90_s": duration - 0.1,
            "duration_50_s": np.full(n, 0.2),
            "duration_90_s": duration,
            "displacement_um": amplitude,
            "opd_change_nm": 20 * amplitude,
            "contraction_velocity_um_s": np.full(n, 5.0),
            "relaxation_velocity_um_s": np.full(n, 3.0),
            "secondary_peak": np.zeros(n, dtype=bool) if secondary is None else secondary,
            "irregular": irregular,
        }
    )
    assert tuple(frame.columns) == BEAT_COLUMNS
    return frame


def test_summary_regular_rhythm_values():
    peaks = 0.5 + np.arange(10) * 1.0
    durations = np.array([0.40, 0.42, 0.40, 0.44, 0.40, 0.42, 0.40, 0.44, 0.40, 0.42])
    s = summarize_rhythm(make_beats(peaks, duration_s=durations), start_s=0.0, end_s=10.0)
    assert s["beat_count"] == 10
    assert s["beat_rate_bpm"] == pytest.approx(60.0)
    assert s["ibi_cv"] == pytest.approx(0.0, abs=1e-12)
    # gaps: start -> first onset 0.4 s, peaks 1 s, last end (9.5 - 0.1 + 0.42) -> 10 s
    assert s["longest_pause_s"] == pytest.approx(1.0)
    assert s["duration_90_s"] == pytest.approx(0.41)
    # at IBI 1 s the corrections change nothing
    assert s["duration_90_bazett_s"] == pytest.approx(np.median(durations[1:]))
    steps = np.abs(np.diff(durations))
    assert s["duration_90_stv_s"] == pytest.approx(steps.sum() / (9 * np.sqrt(2)))
    assert s["irregular_fraction"] == 0.0
    assert s["alternans_index"] == pytest.approx(0.0)
    assert s["rhythm"] == "regular"
    for column in MEDIAN_COLUMNS:
        assert column in s
    assert s["ibi_s"] == pytest.approx(1.0)


def test_summary_rate_correction_uses_each_beats_own_interval():
    # beats 1-6, each with its own duration; the intervals all differ, so pairing a beat with
    # its following interval (or none) gives another median
    peaks = np.cumsum([0.5, 0.64, 1.0, 0.81, 1.21, 0.729])
    durations = np.array([0.45, 0.30, 0.40, 0.36, 0.44, 0.27])
    s = summarize_rhythm(make_beats(peaks, duration_s=durations), start_s=0.0, end_s=6.0)
    # DESIGN.md: each beat's duration_90_s with its own *preceding* IBI, then the median.
    # Bazett 1920 (P): D / IBI^(1/2), by hand for beats 2-6 (IBI 0.64, 1.0, 0.81, 1.21, 0.729):
    # 0.30/0.8, 0.40/1.0, 0.36/0.9, 0.44/1.1, 0.27/0.853815 = 0.375, 0.4, 0.4, 0.4, 0.316228
    # -> median 0.4. With the following IBI it would be 0.45/0.8, 0.30/1.0, 0.40/0.9,
    # 0.36/1.1, 0.44/0.853815 -> median 0.444444; uncorrected 0.36 (0.38 over all six)
    assert s["duration_90_bazett_s"] == pytest.approx(0.4, abs=1e-12)
    # Fridericia 1920 (P): D / IBI^(1/3), IBI^(1/3) = 0.861774, 1.0, 0.932170, 1.065602, 0.9
    # -> 0.348119, 0.4, 0.386196, 0.412912, 0.3 -> median 0.386196 (following: 0.429106)
    assert s["duration_90_fridericia_s"] == pytest.approx(0.386196, abs=1e-6)


def test_summary_no_beats_one_beat_two_beats():
    none = summarize_rhythm(make_beats([]), start_s=0.0, end_s=20.0)
    assert none["beat_count"] == 0 and none["beat_rate_bpm"] == 0
    assert none["longest_pause_s"] == pytest.approx(20.0)
    assert none["rhythm"] == "quiescent"
    assert none["ibi_mean_s"] is None and none["duration_90_s"] is None
    assert none["secondary_peak_beats"] == 0 and none["irregular_fraction"] is None
    one = summarize_rhythm(make_beats([5.0]), start_s=0.0, end_s=20.0)
    assert one["beat_rate_bpm"] is None
    assert one["rhythm"] == "undetermined"
    assert one["longest_pause_s"] == pytest.approx(20.0 - 5.3)
    two = summarize_rhythm(make_beats([5.0, 6.5]), start_s=0.0, end_s=8.0)
    assert two["beat_rate_bpm"] == pytest.approx(40.0)
    assert two["rmssd_s"] is None and two["duration_90_stv_s"] == pytest.approx(0.0)
    assert two["longest_pause_s"] == pytest.approx(4.9)


def test_alternans_index():
    peaks = 0.5 + np.arange(8) * 1.0
    amplitude = np.where(np.arange(8) % 2 == 0, 1.0, 0.55)
    s = summarize_rhythm(make_beats(peaks, amplitude=amplitude), start_s=0.0, end_s=9.0)
    mean = amplitude.mean()
    assert s["alternans_index"] == pytest.approx(2 * 0.225 / mean)
    seven = summarize_rhythm(make_beats(peaks[:7], amplitude=amplitude[:7]), start_s=0, end_s=9)
    assert seven["alternans_index"] is None


def test_irregular_and_pause_classification():
    rng = np.random.default_rng(4)
    peaks = np.cumsum(rng.lognormal(0.0, 0.3, 30))
    s = summarize_rhythm(make_beats(peaks), start_s=0.0, end_s=float(peaks[-1] + 1))
    assert s["ibi_cv"] > 0.15 and s["rhythm"] == "irregular"
    # one 3 s pause among 1 s intervals: cv small-ish but the pause exceeds 2.5 x median IBI
    regular = list(0.5 + np.arange(10) * 1.0) + [12.5 + k for k in range(10)]
    p = summarize_rhythm(
        make_beats(regular), start_s=0.0, end_s=22.0, irregular_cv=1.0, irregular_fraction_max=1.0
    )
    assert p["longest_pause_s"] == pytest.approx(3.0)
    assert p["rhythm"] == "irregular"
    relaxed = summarize_rhythm(
        make_beats(regular),
        start_s=0.0,
        end_s=22.0,
        irregular_cv=1.0,
        irregular_fraction_max=1.0,
        pause_factor=4.0,
    )
    assert relaxed["rhythm"] == "regular"


def test_classify_rhythm_thresholds():
    base = {
        "beat_count": 10,
        "ibi_cv": 0.05,
        "irregular_fraction": 0.0,
        "longest_pause_s": 1.2,
        "ibi_s": 1.0,
    }
    assert classify_rhythm(base) == "regular"
    assert classify_rhythm({**base, "ibi_cv": 0.2}) == "irregular"
    assert classify_rhythm({**base, "irregular_fraction": 0.2}) == "irregular"
    assert classify_rhythm({**base, "irregular_fraction": 0.2}, irregular_fraction_max=0.3) == (
        "regular"
    )
    assert classify_rhythm({**base, "beat_count": 4}) == "undetermined"
    assert classify_rhythm({**base, "beat_count": 5}) == "regular"
    assert classify_rhythm({"beat_count": 0}) == "quiescent"
    with pytest.raises(InputError, match="beat_count"):
        classify_rhythm({})


def test_summary_secondary_count_and_validation():
    peaks = 0.5 + np.arange(6) * 1.0
    secondary = np.array([True, False, True, False, False, False])
    s = summarize_rhythm(make_beats(peaks, secondary=secondary), start_s=0.0, end_s=7.0)
    assert s["secondary_peak_beats"] == 2
    with pytest.raises(InputError, match="columns"):
        summarize_rhythm(pd.DataFrame({"peak_s": [1.0]}), start_s=0.0, end_s=2.0)
    with pytest.raises(InputError, match="end_s"):
        summarize_rhythm(make_beats(peaks), start_s=5.0, end_s=1.0)


def test_summary_is_json_ready():
    import json

    s = summarize_rhythm(make_beats(0.5 + np.arange(3) * 1.0), start_s=0.0, end_s=4.0)
    text = json.dumps(s, allow_nan=False)
    assert '"rmssd_s": null' in text
