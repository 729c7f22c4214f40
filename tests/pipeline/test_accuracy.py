"""End-to-end accuracy of `analyze` on simulator ground truth (issue: analyse one recording).

Tolerances are those the project set itself for its users; the truth is the simulator's exact
noise-free trace (see beatlab.synth), computed independently of beatlab.beats.
"""

import numpy as np
import pytest

from beatlab.synth import simulate_recording
from tests.pipeline.helpers import TIMING, analyze_here, as_recording, match_beats, run

NOISY = dict(noise_nm=2.0, correlated_noise_nm=1.0, jitter_nm=3.0, drift_nm=20.0)


@pytest.mark.parametrize(
    ("layout", "strain"),
    [("clusters", 0.02), ("clusters", 0.05), ("confluent", 0.02), ("confluent", 0.05)],
)
def test_count_and_rate_under_noise(layout, strain):
    sim = simulate_recording(
        duration_s=8,
        fps=30,
        shape_px=(96, 96),
        layout=layout,
        rate_bpm=72,
        strain=strain,
        rng=11,
        **NOISY,
    )
    res = run(sim)
    truth = sim.truth["summary"]
    assert res.summary["beat_count"] == truth["beat_count"]
    assert res.summary["beat_rate_bpm"] == pytest.approx(truth["beat_rate_bpm"], rel=0.01)
    assert res.summary["rhythm"] == "regular"


@pytest.mark.parametrize(("fps", "rate_bpm"), [(15, 60), (15, 120), (30, 60), (50, 60), (100, 60)])
def test_timing_within_half_a_frame(fps, rate_bpm):
    sim = simulate_recording(
        duration_s=8, fps=fps, shape_px=(96, 96), rate_bpm=rate_bpm, noise_nm=1.0, rng=5
    )
    res = run(sim)
    assert res.summary["beat_count"] == sim.truth["summary"]["beat_count"]
    err = match_beats(res.beats, sim.truth["beats"])
    assert len(err) == sim.truth["summary"]["beat_count"]
    frame = 1.0 / fps
    for col in TIMING:
        e = np.abs(err[f"{col}_err"].dropna().to_numpy())
        assert e.size, col
        assert np.median(e) <= max(0.5 * frame, 0.010), (col, np.median(e))
        assert np.percentile(e, 95) <= 1.5 * frame, (col, np.percentile(e, 95))


def test_displacement_velocity_and_strain_scaling():
    common = dict(duration_s=6, fps=100, shape_px=(96, 96), rate_bpm=60, noise_nm=1.0, rng=3)
    full = simulate_recording(strain=0.04, **common)
    half = simulate_recording(strain=0.02, **common)
    res_full, res_half = run(full), run(half)
    # the truth averaged over the mask the tool reports: the true field is a(t) u(x), so the
    # truth over the true mask rescales by mean|u| over the tool's mask / over the true mask
    field = np.hypot(*full.displacement_field_um)
    rescale = field[res_full.mask].mean() / field[full.mask].mean()
    true_amp = full.truth["summary"]["displacement_um"] * rescale
    measured = res_full.summary["displacement_um"]
    assert measured == pytest.approx(true_amp, rel=0.05)
    truth_v = full.truth["summary"]["contraction_velocity_um_s"] * rescale
    assert res_full.summary["contraction_velocity_um_s"] == pytest.approx(truth_v, rel=0.10)
    ratio_d = res_half.summary["displacement_um"] / measured
    ratio_o = res_half.summary["opd_change_nm"] / res_full.summary["opd_change_nm"]
    assert ratio_d == pytest.approx(0.5, rel=0.05)
    assert ratio_o == pytest.approx(0.5, rel=0.08)


def test_irregular_rhythm_indices():
    # 24 s: 23 beats, 22 intervals. SDNN and RMSSD came within 0.3 % of the truth here (40 s:
    # within 0.6 %), within 1.2 % for seeds 1-4: far inside the 5 % asked
    sim = simulate_recording(
        duration_s=24, fps=30, shape_px=(64, 64), rate_bpm=60, ibi_cv=0.25, noise_nm=1.0, rng=8
    )
    res = run(sim)
    truth = sim.truth["summary"]
    assert res.summary["beat_count"] == truth["beat_count"]
    assert res.summary["sdnn_s"] == pytest.approx(truth["sdnn_s"], rel=0.05)
    assert res.summary["rmssd_s"] == pytest.approx(truth["rmssd_s"], rel=0.05)
    assert res.summary["rhythm"] == "irregular"


def test_ead_flagged_exactly_and_overshoot_not():
    sim = simulate_recording(
        duration_s=8,
        fps=50,
        shape_px=(96, 96),
        rate_bpm=45,
        relax_s=0.35,
        ead_beats=[1, 4],
        overshoot=0.08,
        noise_nm=1.0,
        rng=4,
    )
    res = run(sim)
    truth = [b["secondary_peak"] for b in sim.truth["beats"]]
    assert res.summary["beat_count"] == len(truth)
    assert res.beats["secondary_peak"].astype(bool).tolist() == truth


def _alternans_from_pattern(pattern, n_beats):
    """DESIGN.md: 2 |mean_k (-1)^k (A_k - mean A)| / mean A, with A_k the simulator's cycled
    per-beat activation multipliers (beatlab.synth: amplitude_pattern, cycled over beats)."""
    amplitude = np.asarray(pattern, dtype=float)[np.arange(n_beats) % len(pattern)]
    signs = (-1.0) ** np.arange(n_beats)
    return 2 * abs(np.mean(signs * (amplitude - amplitude.mean()))) / amplitude.mean()


@pytest.mark.parametrize(
    ("pattern", "expected", "tolerance"),
    [
        # 12 beats of 1.0, 0.55: 2 x 0.225 / 0.775 = 0.5806. A 5 % error in the amplitude of
        # one parity of beats (issue 8's displacement target) moves the index by 7.6 %, so
        # rel 0.08; measured 0.619 (+6.6 %: the large beats read 8.9 % above the truth, the
        # small 4.0 %)
        ((1.0, 0.55), 0.5806452, 0.08 * 0.5806452),
        # no alternans: only beat-to-beat noise (about 2 % SD of the amplitude here) remains,
        # 2 x 0.02 / sqrt(12) ~ 0.012 expected, 0.05 is 4 SD; measured 0.020
        ((1.0,), 0.0, 0.05),
    ],
)
def test_alternans(pattern, expected, tolerance):
    sim = simulate_recording(
        duration_s=12,
        fps=30,
        shape_px=(80, 80),
        rate_bpm=60,
        amplitude_pattern=pattern,
        noise_nm=1.0,
        rng=6,
    )
    res = run(sim)
    n_beats = sim.truth["summary"]["beat_count"]
    assert res.summary["beat_count"] == n_beats == 12
    # the expected index by hand from the pattern (DESIGN.md formula), and the simulator's
    # truth from its noise-free amplitudes agrees with it
    assert _alternans_from_pattern(pattern, n_beats) == pytest.approx(expected, abs=1e-6)
    assert sim.truth["summary"]["alternans_index"] == pytest.approx(expected, abs=1e-6)
    assert res.summary["alternans_index"] == pytest.approx(expected, abs=tolerance)


def test_no_beating_is_quiescent():
    sim = simulate_recording(
        duration_s=8,
        fps=30,
        shape_px=(96, 96),
        rate_bpm=0,
        noise_nm=1.5,
        drift_nm=20,
        stage_drift_um=(0.6, -0.4),
        rng=2,
    )
    res = run(sim)
    assert res.summary["beat_count"] == 0
    assert res.summary["beat_rate_bpm"] == 0
    assert res.summary["rhythm"] == "quiescent"


def test_wrapped_phase_matches_opd_twin():
    common = dict(
        duration_s=6,
        fps=30,
        shape_px=(96, 96),
        rate_bpm=60,
        noise_nm=1.0,
        layout="confluent",
        wavelength_nm=405.0,  # a violet laser: cells of 100-470 nm OPD wrap in phase
        rng=9,
    )
    opd = simulate_recording(kind="opd", **common)
    phase = simulate_recording(kind="wrapped_phase", **common)
    assert np.nanmax(opd.frames) > 405.0  # OPD above a wavelength: the phase wraps
    a, b = run(opd), run(phase)
    assert a.summary["beat_count"] == b.summary["beat_count"] > 0
    np.testing.assert_allclose(a.beats["peak_s"], b.beats["peak_s"], atol=0.5 / 30)
    np.testing.assert_allclose(a.beats["displacement_um"], b.beats["displacement_um"], rtol=0.02)
    # the OPD change: the phase twin must give the same nm (CHECKS.md: OPD = phase x
    # wavelength / 2 pi, P). The traces agree within 2.4e-5 nm (of a 12.7 nm peak); per beat
    # the baseline window may land on another noise dip, measured up to 1.1 %. A factor 2
    # in the conversion fails both by far.
    opd_a, opd_b = a.trace["opd_change_nm"].to_numpy(), b.trace["opd_change_nm"].to_numpy()
    assert np.ptp(opd_a) > 5.0  # the beats show in the OPD change
    np.testing.assert_allclose(opd_b, opd_a, atol=1e-3 * np.ptp(opd_a))
    np.testing.assert_allclose(a.beats["opd_change_nm"], b.beats["opd_change_nm"], rtol=0.02)
    assert b.summary["opd_change_nm"] == pytest.approx(a.summary["opd_change_nm"], rel=0.02)


def test_two_independent_clusters_give_two_regions():
    # 10 s: 6 beats of the slower cluster; the rates came within 0.02 % of the truth (15 s:
    # 0.2 %), also for seeds 1-3; 1 % is asked
    sim = simulate_recording(
        duration_s=10,
        fps=30,
        shape_px=(128, 128),
        n_clusters=2,
        cluster_rates_bpm=(40, 65),
        noise_nm=1.0,
        rng=12,
    )
    res = run(sim)
    assert res.summary["n_regions"] == 2
    rates = sorted(res.regions["beat_rate_bpm"].tolist())
    truth = sorted(c["summary"]["beat_rate_bpm"] for c in sim.truth["regions"])
    for got, want in zip(rates, truth, strict=False):
        assert got == pytest.approx(want, rel=0.01)


def test_negative_cells_warn():
    from beatlab import BeatlabWarning

    sim = simulate_recording(duration_s=3, fps=15, shape_px=(64, 64), rate_bpm=0, rng=1)
    with pytest.warns(BeatlabWarning, match="negative OPD"):
        analyze_here(as_recording(sim, frames=-sim.frames))


def test_literal_linear_landmarks_are_available_and_more_biased_at_15_fps():
    sim = simulate_recording(
        duration_s=6, fps=15, shape_px=(80, 80), rate_bpm=60, noise_nm=1.0, rng=5
    )
    cubic = run(sim)
    linear = run(sim, {"beats": {"interpolation": "linear"}})
    assert linear.summary["parameters"]["beats"]["interpolation"] == "linear"
    err = {
        name: np.median(np.abs(match_beats(r.beats, sim.truth["beats"])["time_to_peak_s_err"]))
        for name, r in (("cubic", cubic), ("linear", linear))
    }
    assert err["cubic"] < err["linear"]


def test_one_sheet_with_two_independent_halves_is_split():
    # a confluent sheet whose halves beat at their own rates (e.g. a conduction block):
    # one connected field, two regions. 9 s: 6 beats of the slower half; the rates came within
    # 0.03 % of the truth (12 s: 0.01 %), also for seeds 1, 2 and 4; 1 % is asked
    common = dict(duration_s=9, fps=30, shape_px=(96, 96), layout="confluent", noise_nm=1.0, rng=3)
    left = simulate_recording(rate_bpm=40, **common)
    right = simulate_recording(rate_bpm=65, **common)
    frames = left.frames.copy()
    frames[:, :, 48:] = right.frames[:, :, 48:]
    res = analyze_here(as_recording(left, frames=frames))
    assert res.summary["n_regions"] == 2
    rates = sorted(res.regions["beat_rate_bpm"])
    truth = sorted(s.truth["summary"]["beat_rate_bpm"] for s in (left, right))
    for got, want in zip(rates, truth, strict=True):
        assert got == pytest.approx(want, rel=0.01)
    # and a sheet beating as one stays one region
    assert run(left).summary["n_regions"] == 1
