"""Landmarks that do not move with amplitude or noise (issue 8): the signed projection.

The mean of the *magnitude* of a noisy displacement field sits on a noise floor and squashes
the relaxation tail into it, so duration_90 shortened as the amplitude fell or the noise rose
(by 18 ms between 4 % and 2 % strain in an independent check). The projection onto the
contraction pattern is linear in the field: zero-mean at rest, the same landmarks at any
amplitude.
"""

import numpy as np
import pytest

from beatlab.synth import simulate_recording
from tests.pipeline.helpers import analyze_here, as_recording, match_beats

#: Same kinetics throughout (60 bpm, 150 ms rise, 300 ms relaxation), 50 fps, 6 s.
SCENE = dict(duration_s=6, fps=50, shape_px=(96, 96), rate_bpm=60, rng=7)


def _run(strain, noise_nm, **extra):
    sim = simulate_recording(strain=strain, noise_nm=noise_nm, **SCENE, **extra)
    res = analyze_here(as_recording(sim))
    return sim, res


def _duration_error_ms(sim, res):
    m = match_beats(res.beats, sim.truth["beats"])
    assert len(m) == len(sim.truth["beats"]) == len(res.beats)
    return 1000 * float(np.nanmedian(m["duration_90_s_err"]))


@pytest.fixture(scope="module")
def runs():
    cases = {
        "4 % strain, 1 nm": (0.04, 1.0),
        "2 % strain, 1 nm": (0.02, 1.0),
        "1 % strain, 1 nm": (0.01, 1.0),
        "2 % strain, 0.5 nm": (0.02, 0.5),
        "2 % strain, 2 nm": (0.02, 2.0),
    }
    return {name: _run(strain, noise) for name, (strain, noise) in cases.items()}


def test_duration_90_does_not_move_with_amplitude_or_noise(runs):
    errors = {name: _duration_error_ms(sim, res) for name, (sim, res) in runs.items()}
    # issue 8 targets: within 5 ms of the truth, and of each other, across 1-4 % strain and
    # 0.5-2 nm noise (simulator truth: the noise-free true trace's landmarks)
    for name, err in errors.items():
        assert abs(err) < 5.0, f"{name}: duration_90 off by {err:.1f} ms"
    assert max(errors.values()) - min(errors.values()) < 5.0, errors


def test_the_trace_has_no_floor_at_rest(runs):
    for name, (sim, res) in runs.items():
        trace = res.trace["displacement_um"].to_numpy()
        at_rest = np.asarray(sim.displacement_um) == 0
        rest = trace[at_rest]
        noise = res.summary["quality"]["trace_noise_um"]
        amplitude = np.median(res.beats["displacement_um"])
        # zero median within its noise, where a magnitude would read its floor (> 0 always)
        assert abs(np.median(rest)) < max(noise, 0.02 * amplitude), name
        assert (rest < 0).mean() > 0.2, f"{name}: a signed trace dips below zero at rest"


def _truth_over(sim, mask):
    """The true amplitude as the mean displacement over ``mask`` (the analysed pixels).

    The simulator's truth averages over the cells' footprint; the analysis mask, found in the
    template by a noise-scaled threshold, is a little larger at low noise. The field is the
    same, so the truth is rescaled by the ratio of the unit field's mean magnitude.
    """
    unit = np.hypot(*np.asarray(sim.displacement_field_um))
    true = np.median([b["displacement_um"] for b in sim.truth["beats"]])
    return true * unit[mask].mean() / unit[np.asarray(sim.mask)].mean()


def test_amplitude_is_proportional_to_strain(runs):
    ratio = {
        name: np.median(res.beats["displacement_um"]) / _truth_over(sim, res.mask)
        for name, (sim, res) in runs.items()
    }
    # one gain for every amplitude and noise (linear in the field): within 3 % of each other,
    # and within 5 % of the true mean displacement over the same pixels (issue 8 target;
    # measured 0.959-0.981)
    assert max(ratio.values()) / min(ratio.values()) < 1.03, ratio
    assert all(0.95 < r < 1.05 for r in ratio.values()), ratio


@pytest.fixture(scope="module")
def runs_256():
    """Frames of 256 px, where DIS estimates its coarse flow on the 8 px grid (level 3)."""
    scene = {**SCENE, "shape_px": (256, 256), "duration_s": 5}
    return {
        strain: (sim, analyze_here(as_recording(sim)))
        for strain in (0.04, 0.01)
        for sim in [simulate_recording(strain=strain, noise_nm=1.0, **scene)]
    }


def test_coarse_flow_on_an_8_px_grid_keeps_landmarks_and_gain(runs_256):
    from beatlab.signals.flow import dis_finest_level

    # the frames are large enough for the default grid: the coarse flow is DIS's level 3
    assert dis_finest_level((256, 256), preset="fast", grid_px=8) == 3
    ratios = []
    for strain, (sim, res) in runs_256.items():
        assert _duration_error_ms(sim, res) == pytest.approx(0.0, abs=5.0), strain
        ratios.append(np.median(res.beats["displacement_um"]) / _truth_over(sim, res.mask))
    # the same targets as at 96 px (measured 0.985 and 0.986; 0.982 and 0.986 with the
    # preset's own 4 px grid)
    assert all(0.95 < r < 1.05 for r in ratios), ratios
    assert max(ratios) / min(ratios) < 1.03, ratios
