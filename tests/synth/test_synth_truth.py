"""Ground truth of the simulator: landmarks by the exact definitions, summaries, rhythms."""

import json

import numpy as np
import pytest
from scipy.signal import find_peaks

from beatlab.synth import simulate_recording

FAST = {"shape_px": (64, 64), "noise_nm": 0.0}


def _mean_unit(sim, sel=None):
    sel = sim.mask if sel is None else sel
    return float(np.hypot(*sim.displacement_field_um)[sel].mean())


def test_single_beat_landmarks_match_the_hand_computed_values():
    rise, relax = 0.15, 0.30
    sim = simulate_recording(
        duration_s=1.2, fps=50.0, beat_times_s=[0.3], rise_s=rise, relax_s=relax, rng=1, **FAST
    )
    (beat,) = sim.truth["beats"]
    amp = _mean_unit(sim)
    # worked by hand for the half-cosine rise a = (1 - cos(pi t / rise)) / 2 and the fall
    # a = (1 + cos(pi t / relax)) / 2: level f is crossed at rise arccos(1 - 2f) / pi
    assert beat["onset_s"] == pytest.approx(0.3 + rise * np.arccos(0.8) / np.pi, abs=1e-9)
    assert beat["peak_s"] == pytest.approx(0.45, abs=1e-8)
    assert beat["end_s"] == pytest.approx(0.45 + relax * np.arccos(-0.8) / np.pi, abs=1e-9)
    assert beat["time_to_peak_s"] == pytest.approx(rise * (1 - np.arccos(0.8) / np.pi), abs=1e-8)
    assert beat["relax_50_s"] == pytest.approx(relax / 2, abs=1e-8)
    assert beat["relax_90_s"] == pytest.approx(relax * np.arccos(-0.8) / np.pi, abs=1e-8)
    assert beat["duration_50_s"] == pytest.approx(rise / 2 + relax / 2, abs=1e-9)
    assert beat["duration_90_s"] == pytest.approx(beat["end_s"] - beat["onset_s"], abs=1e-12)
    assert beat["displacement_um"] == pytest.approx(amp, rel=1e-9)
    assert beat["baseline_um"] == 0.0
    # largest slopes of the half-cosines: amp pi / (2 rise) and amp pi / (2 relax), by hand
    assert beat["contraction_velocity_um_s"] == pytest.approx(amp * np.pi / (2 * rise), rel=1e-5)
    assert beat["relaxation_velocity_um_s"] == pytest.approx(amp * np.pi / (2 * relax), rel=1e-5)
    assert beat["ibi_s"] is None and beat["secondary_peak"] is False
    summary = sim.truth["summary"]
    assert summary["beat_count"] == 1 and summary["beat_rate_bpm"] is None
    assert summary["ibi_mean_s"] is None and summary["rhythm"] == "undetermined"
    json.dumps(sim.truth, allow_nan=False)


def test_per_frame_trace_is_the_mean_of_the_scaled_field():
    sim = simulate_recording(duration_s=2.0, fps=30.0, rate_bpm=75, rng=3, **FAST)
    mag = np.hypot(*sim.displacement_field_um)
    expected = [np.abs(a * mag)[sim.mask].mean() for a in sim.activation]
    np.testing.assert_allclose(sim.displacement_um, expected, rtol=1e-12, atol=1e-15)
    assert sim.displacement_um.max() > 0.05


def test_beat_truncated_by_the_recording_end_is_not_counted():
    sim = simulate_recording(duration_s=1.2, fps=50.0, beat_times_s=[0.3, 1.1], rng=1, **FAST)
    assert sim.truth["summary"]["beat_count"] == 1
    assert sim.truth["schedules"][0]["onsets_s"] == [0.3, 1.1]


def test_task_force_intervals_give_published_rmssd_and_sdnn():
    intervals = [0.81, 0.83, 0.79, 0.85, 0.82]
    onsets = np.cumsum([0.5, *intervals])
    sim = simulate_recording(duration_s=5.3, fps=30.0, beat_times_s=onsets, rng=2, **FAST)
    s = sim.truth["summary"]
    ibis = [b["ibi_s"] for b in sim.truth["beats"][1:]]
    np.testing.assert_allclose(ibis, intervals, atol=1e-8)
    # CHECKS.md: Task Force of ESC/NASPE 1996 worked example (P)
    assert s["rmssd_s"] * 1000 == pytest.approx(40.3113, abs=1e-3)
    assert s["sdnn_s"] * 1000 == pytest.approx(22.3607, abs=1e-3)
    assert s["ibi_mean_s"] == pytest.approx(0.82, abs=1e-8)
    assert s["beat_rate_bpm"] == pytest.approx(60 / 0.82, rel=1e-7)
    # Brennan, Palaniswami & Kamen 2001 identities (P)
    x = np.array(intervals)
    assert s["sd1_s"] == pytest.approx(np.std(np.diff(x), ddof=1) / np.sqrt(2), rel=1e-6)
    sd2_sq = np.var(x[:-1], ddof=1) + np.var(x[1:], ddof=1) - s["sd1_s"] ** 2
    assert s["sd2_s"] == pytest.approx(np.sqrt(sd2_sq), rel=1e-6)


def test_regular_rhythm_and_rate_correction_ratios():
    sim = simulate_recording(duration_s=6.0, fps=30.0, rate_bpm=75, rng=2, **FAST)
    s = sim.truth["summary"]
    assert s["beat_count"] == 7 and s["rhythm"] == "regular"
    assert s["beat_rate_bpm"] == pytest.approx(75, rel=1e-7)
    assert s["ibi_cv"] == pytest.approx(0, abs=1e-7) and s["irregular_fraction"] == 0
    # CHECKS.md: Bazett 447.21 / 400 and Fridericia 430.89 / 400 at an interval of 0.8 s (P)
    assert s["duration_90_bazett_s"] / s["duration_90_s"] == pytest.approx(447.21 / 400, abs=1e-4)
    assert s["duration_90_fridericia_s"] / s["duration_90_s"] == pytest.approx(
        430.89 / 400, abs=1e-4
    )
    assert s["duration_90_stv_s"] == pytest.approx(0, abs=1e-7)
    assert s["longest_pause_s"] == pytest.approx(0.8, abs=1e-6)


def test_alternans_pattern_appears_in_amplitudes():
    sim = simulate_recording(
        duration_s=10.3, fps=30.0, rate_bpm=60, amplitude_pattern=(1.0, 0.55), rng=4, **FAST
    )
    amps = np.array([b["displacement_um"] for b in sim.truth["beats"]])
    assert amps.size == 10
    np.testing.assert_allclose(amps[1::2] / amps[0::2], 0.55, rtol=1e-9)
    # worked by hand: mean 0.775 A, deviations +-0.225 A -> 2 * 0.225 / 0.775
    assert sim.truth["summary"]["alternans_index"] == pytest.approx(0.45 / 0.775, rel=1e-9)


def _secondary_maxima(trace, times, beat):
    """Local maxima between peak and end by the secondary-peak definition (scipy, L)."""
    amp, base = beat["displacement_um"], beat["baseline_um"]
    sel = (times > beat["peak_s"] + 0.02) & (times < beat["end_s"])
    idx, _ = find_peaks(trace[sel], prominence=0.1 * amp)
    return [i for i in idx if trace[sel][i] > base + 0.2 * amp]


def test_ead_beats_are_flagged_and_meet_the_definition():
    sim = simulate_recording(
        duration_s=4.0,
        fps=200.0,
        beat_times_s=[0.3, 1.5, 2.7],
        ead_beats=(1,),
        ead_level=0.5,
        rng=5,
        **FAST,
    )
    beats = sim.truth["beats"]
    assert [b["secondary_peak"] for b in beats] == [False, True, False]
    assert sim.truth["summary"]["secondary_peak_beats"] == 1
    found = [len(_secondary_maxima(sim.displacement_um, sim.times_s, b)) for b in beats]
    assert found == [0, 1, 0]  # reference library scipy.signal.find_peaks (L)
    # the second step is part of the beat: relaxation lasts longer
    assert beats[1]["relax_90_s"] > beats[0]["relax_90_s"] + 0.2
    assert beats[1]["relax_50_s"] > beats[0]["relax_50_s"]


def test_overshoot_bump_is_not_an_ead():
    overshoot, relax = 0.12, 0.3
    sim = simulate_recording(
        duration_s=3.0,
        fps=200.0,
        beat_times_s=[0.3, 1.5],
        overshoot=overshoot,
        relax_s=relax,
        rng=5,
        **FAST,
    )
    assert sim.activation.min() == pytest.approx(-overshoot, abs=1e-3)
    for beat in sim.truth["beats"]:
        assert beat["secondary_peak"] is False
        assert _secondary_maxima(sim.displacement_um, sim.times_s, beat) == []
        # the bump rises above 10 %: by the definition the beat ends after it
        assert beat["end_s"] > beat["peak_s"] + relax
    bump = sim.displacement_um[(sim.times_s > 0.7) & (sim.times_s < 1.4)].max()
    amp = sim.truth["beats"][0]["displacement_um"]
    assert 0.1 * amp < bump < 0.2 * amp


def test_fast_rate_with_slow_kinetics_never_fully_relaxes():
    sim = simulate_recording(
        duration_s=3.0, fps=100.0, rate_bpm=120, rise_s=0.15, relax_s=0.45, rng=6, **FAST
    )
    beats = sim.truth["beats"]
    assert len(beats) == 6  # the last peak (2.9 s) lies before the last frame (2.99 s)
    # the trace never falls to 10 % of the first (baseline 0) beat before the second starts
    assert beats[0]["end_s"] is None and beats[0]["duration_90_s"] is None
    assert all(b["end_s"] is not None for b in beats[1:-1])
    trace, t = sim.displacement_um, sim.times_s
    for k, b in enumerate(beats):
        if k:
            assert b["baseline_um"] > 0.05 * b["displacement_um"]
            assert b["displacement_um"] < b["baseline_um"] + b["displacement_um"]
            assert b["ibi_s"] == pytest.approx(0.5, abs=1e-6)
        if k + 1 < len(beats):
            assert b["end_s"] is None or b["end_s"] <= beats[k + 1]["onset_s"]
        # crossings agree with a linear interpolation of the per-frame trace (numpy, L)
        level = b["baseline_um"] + 0.1 * b["displacement_um"]
        assert np.interp(b["onset_s"], t, trace) == pytest.approx(level, abs=0.02 * level)
        if b["end_s"] is not None:
            assert np.interp(b["end_s"], t, trace) == pytest.approx(level, abs=0.02 * level)


def test_jittered_intervals_and_irregular_flags():
    sim = simulate_recording(
        duration_s=30.0, fps=20.0, rate_bpm=60, ibi_cv=0.2, rng=7, shape_px=(48, 48), noise_nm=0
    )
    beats = sim.truth["beats"]
    onsets = np.array(sim.truth["schedules"][0]["onsets_s"])
    ibis = np.array([b["ibi_s"] for b in beats[1:]])
    assert np.std(np.diff(onsets)) > 0.1
    assert 0.1 < sim.truth["summary"]["ibi_cv"] < 0.35
    med = np.median(ibis)
    flags = [b["irregular"] for b in beats[1:]]
    assert flags == [bool(abs(x - med) > 0.25 * med) for x in ibis]
    assert beats[0]["irregular"] is False
    assert sim.truth["summary"]["rhythm"] in ("irregular", "regular")


def test_independent_cluster_rates_give_per_region_truth():
    sim = simulate_recording(
        duration_s=4.0,
        fps=30.0,
        n_clusters=2,
        cluster_rates_bpm=(60, 90),
        rng=8,
        shape_px=(96, 96),
        noise_nm=0.0,
    )
    assert sim.truth["beats"] is None and sim.truth["summary"] is None
    assert sim.activation.shape == (2, 120)
    regions = sim.truth["regions"]
    assert [r["label"] for r in regions] == [1, 2]
    assert regions[0]["summary"]["beat_rate_bpm"] == pytest.approx(60, rel=1e-6)
    assert regions[1]["summary"]["beat_rate_bpm"] == pytest.approx(90, rel=1e-6)
    assert set(np.unique(sim.cluster_labels)) == {0, 1, 2}
    for c in range(2):
        sel = sim.cluster_labels == c + 1
        np.testing.assert_allclose(
            sim.region_displacement_um[c], np.abs(sim.activation[c]) * _mean_unit(sim, sel)
        )


def test_coupled_clusters_with_delay():
    delay = 0.08
    sim = simulate_recording(
        duration_s=3.0,
        fps=30.0,
        n_clusters=2,
        cluster_delay_s=delay,
        rng=9,
        shape_px=(96, 96),
        noise_nm=0.0,
    )
    assert sim.activation.shape == (2, 90)
    r1, r2 = (r["beats"] for r in sim.truth["regions"])
    assert len(r1) == len(r2) == 3
    for b1, b2 in zip(r1, r2, strict=True):
        assert b2["peak_s"] - b1["peak_s"] == pytest.approx(delay, abs=1e-8)
    assert sim.truth["summary"]["beat_count"] == 3


def test_confluent_layout_covers_the_field_and_beats():
    sim = simulate_recording(
        duration_s=2.5, fps=30.0, layout="confluent", rate_bpm=60, rng=10, **FAST
    )
    assert sim.mask.all() and np.all(sim.cluster_labels == 1)
    assert sim.truth["summary"]["beat_count"] == 2
    assert sim.truth["beats"][0]["displacement_um"] == pytest.approx(_mean_unit(sim), rel=1e-9)
    # a confluent sheet has no cell-free background
    assert np.percentile(sim.rest_opd_nm, 0.5) > 60


def test_clusters_sharing_one_schedule_have_one_activation_row():
    sim = simulate_recording(
        duration_s=2.5, fps=30.0, n_clusters=2, rng=12, shape_px=(96, 96), noise_nm=0.0
    )
    assert sim.activation.shape == (75,)
    assert sim.region_displacement_um.shape == (2, 75)
    assert sim.truth["summary"]["beat_count"] == 2
    for region in sim.truth["regions"]:
        assert region["summary"]["beat_count"] == 2
        assert region["area_px"] > 0
