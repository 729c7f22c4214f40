"""Quality checks: what a reader must check before trusting a recording's numbers."""

import pytest

from beatlab.errors import BeatlabWarning
from beatlab.stages.summary import (
    MIN_GRID_PX,
    MIN_TRUSTED_SNR,
    contraction_episodes,
    quality_checks,
)
from beatlab.synth import simulate_recording
from tests.pipeline.helpers import analyze_here, as_recording


def test_each_check_and_its_threshold():
    ok = dict(beat_count=10, snr=MIN_TRUSTED_SNR, grid_shape_px=(MIN_GRID_PX, 400))
    assert quality_checks(**ok) == []
    assert quality_checks(**{**ok, "snr": MIN_TRUSTED_SNR - 0.1}) == ["low snr"]
    assert quality_checks(**{**ok, "snr": None}) == ["low snr"]
    assert quality_checks(**{**ok, "grid_shape_px": (MIN_GRID_PX - 1, 400)}) == ["coarse grid"]
    quiet = dict(beat_count=0, snr=None, grid_shape_px=(128, 128))
    beats = [13, 14, 32, 33, 53, 54, 73, 74]  # 4 episodes, one per faint beat
    assert quality_checks(**quiet, pattern_snr=0.4, pattern_frames=beats) == []  # noise: ~0
    assert quality_checks(**quiet, pattern_snr=3.2, pattern_frames=beats) == [
        "possible missed beats"
    ]
    drift = list(range(73, 109))  # a drift's most displaced frames: one episode at the end
    assert quality_checks(**quiet, pattern_snr=11.4, pattern_frames=drift) == []
    assert contraction_episodes(beats) == 4 and contraction_episodes([]) == 0


def test_a_faint_culture_below_the_threshold_is_not_called_quiescent_silently():
    # 0.6 % strain on 64 px at 1.5 nm noise: the beats stay below the detection threshold,
    # but the frames hold the contraction pattern (pattern snr 3.2, noise alone gives ~0) in
    # one episode per beat
    sim = simulate_recording(
        duration_s=6, fps=20, shape_px=(64, 64), rate_bpm=60, strain=0.006, noise_nm=1.5,
        rng=3,
    )  # fmt: skip
    with pytest.warns(BeatlabWarning, match="contraction-like pattern"):
        a = analyze_here(as_recording(sim))
    assert a.summary["beat_count"] == 0
    assert a.summary["quality"]["checks"] == "possible missed beats"
    assert a.headline().endswith("(check: possible missed beats)")


def test_a_quiescent_culture_is_not_flagged():
    sim = simulate_recording(
        duration_s=6, fps=20, shape_px=(64, 64), beat_times_s=[], noise_nm=1.5, rng=3
    )
    a = analyze_here(as_recording(sim))  # the suite turns any warning into an error
    assert a.summary["beat_count"] == 0 and a.summary["quality"]["checks"] == ""


def test_a_drifting_quiescent_culture_is_not_taken_for_missed_beats():
    # 20 nm OPD drift and a 0.7 um stage drift build a pattern too (pattern snr about 11),
    # but in one episode, not one per beat
    sim = simulate_recording(
        duration_s=8, fps=30, shape_px=(96, 96), rate_bpm=0, noise_nm=1.5, drift_nm=20,
        stage_drift_um=(0.6, -0.4), rng=2,
    )  # fmt: skip
    a = analyze_here(as_recording(sim))  # the suite turns any warning into an error
    assert a.summary["beat_count"] == 0 and a.summary["quality"]["checks"] == ""
