"""End-to-end tests that pin the composer (`beatlab.analyze`) down (issue 7, item 6).

Through the public API only (`beatlab.analyze`, `beatlab.synth`, the attributes of the
returned analysis), on simulator truth:

1. stage drift is removed, on each path the drift is measured by: the cells' resting frames,
   interpolated in time (clusters on a flat background; a confluent sheet), and a textured
   cell-free background; a contraction centre cut by the frame edge biases the cells' median
   flow, so the drift must come from the resting frames and not from each frame;
2. regions honour the user's `[beats]`, both in the region split and in each region's beats;
3. every configuration section reaches its stage, and `summary["parameters"]` records it.

Each test was seen to fail under the mutation it targets, in the composer before and after
the stage refactor: drift not removed; the per-frame cell median used instead of the drift
interpolated between resting frames (or no interpolation); the sign of the removed shift or of
the drift columns flipped; region beats or the region split run with default `[beats]`; each
section's settings replaced by the defaults at the stage that uses them.
"""

import numpy as np
import pandas as pd
import pytest
from scipy import ndimage

from beatlab.errors import BeatlabWarning, InputError
from beatlab.synth import simulate_recording
from tests.pipeline.helpers import analyze_here, as_recording, match_beats


def _analyze(sim, config=None, *, frames=None, **kwargs):
    return analyze_here(as_recording(sim, frames=frames), config, **kwargs)


# --------------------------------------------------------------------------------------------
# 1. stage drift
# --------------------------------------------------------------------------------------------

#: Rigid stage shift (y, x) reached at the last frame: 3.2 um, ~20x the beat amplitude.
DRIFT_UM = (2.5, -2.0)
#: The recording starts and ends at rest (first onset 0.5 s, last relaxation over at 4.95 s).
DRIFT_SCENE = dict(duration_s=5.5, fps=20, shape_px=(96, 96), rate_bpm=60, noise_nm=1.0, rng=4)
INTERPOLATED = "cell median at rest frames, interpolated"


def _true_drift_um(sim):
    """The simulated stage drift as the trace reports it: (x, y) columns relative to frame 0."""
    shift = np.asarray(sim.stage_shift_um)
    return (shift - shift[0])[:, ::-1]


def _drift_fit(res, sim, frames):
    """Per column, least-squares ``reported = offset + gain * true`` over ``frames``.

    Returns the gains (2,) and the largest residual (um).
    """
    reported = res.trace[["drift_x_um", "drift_y_um"]].to_numpy()[frames]
    true = _true_drift_um(sim)[frames]
    gains, worst = [], 0.0
    for c in (0, 1):
        design = np.column_stack([np.ones(true.shape[0]), true[:, c]])
        coef = np.linalg.lstsq(design, reported[:, c], rcond=None)[0]
        gains.append(coef[1])
        worst = max(worst, float(np.max(np.abs(reported[:, c] - design @ coef))))
    return np.array(gains), worst


def _interior(n):
    """The middle 70 % of the frames (the ends hold no resting frame to interpolate from)."""
    return slice(round(0.15 * n), round(0.85 * n))


def _resting(sim):
    return np.atleast_2d(sim.activation).max(axis=0) == 0


def _check_beats_against_truth(res, truth_beats, fps):
    assert res.summary["beat_count"] == len(truth_beats)
    err = match_beats(res.beats, truth_beats)
    assert len(err) == len(truth_beats)
    assert np.max(np.abs(err["peak_s_err"])) <= 0.5 / fps
    assert np.max(np.abs(err["onset_s_err"])) <= 1.0 / fps


def _drifting(layout):
    """A drifting recording, its analysis and the analysis of its drift-free twin."""
    sim = simulate_recording(layout=layout, stage_drift_um=DRIFT_UM, **DRIFT_SCENE)
    still = simulate_recording(layout=layout, **DRIFT_SCENE)
    return sim, _analyze(sim), _analyze(still)


@pytest.fixture(scope="module")
def drifting_clusters():
    """Clusters on a flat (cell-free, untextured) background."""
    return _drifting("clusters")


@pytest.fixture(scope="module")
def drifting_sheet():
    """A confluent sheet: no background at all."""
    return _drifting("confluent")


@pytest.fixture(params=["drifting_clusters", "drifting_sheet"])
def drifting(request):
    return request.getfixturevalue(request.param)


def test_stage_drift_is_removed(drifting):
    """Beats, amplitude and drift columns are right only when the drift is removed."""
    sim, res, still = drifting
    quality = res.summary["quality"]
    # no textured background: the drift is measured on the cells at their resting frames
    assert quality["drift_reference"] == INTERPOLATED
    _check_beats_against_truth(res, sim.truth["beats"], sim.fps)
    # amplitude: the truth averaged over the mask the tool reports (its drift-free twin's,
    # which is in the simulator's coordinates): the true field is a(t) u(x), so the truth
    # rescales by mean |u| over that mask / over the true mask
    field = np.hypot(*sim.displacement_field_um)
    true_amp = sim.truth["summary"]["displacement_um"] * field[still.mask].mean()
    true_amp /= field[sim.mask].mean()
    amp = res.summary["displacement_um"]
    assert still.summary["displacement_um"] == pytest.approx(true_amp, rel=0.1)
    assert amp == pytest.approx(true_amp, rel=0.15)
    # drift columns follow the simulated drift in sign and size (x right, y down, um)
    inner = _interior(len(res.trace))
    gains, worst = _drift_fit(res, sim, inner)
    assert np.all(np.abs(gains - 1.0) < 0.05), gains
    assert worst < 0.05
    # at rest, what is left is the noise floor, far below a beat
    rest = _resting(sim)[inner]
    assert np.max(res.trace["displacement_um"].to_numpy()[inner][rest]) < 0.25 * amp


def test_stage_drift_is_removed_up_to_the_recording_edges(drifting):
    """Frames before the first or after the last resting frame must be corrected too.

    With drift, the resting frames the rest pass picks stay away from the recording ends.
    Holding the drift measured there constant beyond them (`np.interp`, the composer before
    issue 7 was closed) left the first and last frames with the drift accumulated since
    (0.09-0.27 um of apparent displacement at the resting first frames of these recordings,
    up to a beat's amplitude) and offset the drift columns, which are relative to frame 0.
    """
    sim, res, _ = drifting
    amp = res.summary["displacement_um"]
    disp = res.trace["displacement_um"].to_numpy()
    assert np.max(disp[_resting(sim)]) < 0.25 * amp
    gains, worst = _drift_fit(res, sim, slice(None))
    assert np.all(np.abs(gains - 1.0) < 0.05) and worst < 0.05


def _debris_field(sim, *, spacing_px=16, height_nm=40.0, clear_px=14):
    """Small fixed particles on the cell-free substrate, moving with the stage (T, Y, X) nm."""
    rng = np.random.default_rng(1)
    pad = 16
    ny, nx = sim.frames.shape[1:]
    canvas = np.zeros((ny + 2 * pad, nx + 2 * pad))
    ys, xs = np.meshgrid(*(np.arange(spacing_px // 2, m, spacing_px) for m in canvas.shape))
    ys = (ys + rng.integers(-2, 3, ys.shape)) % canvas.shape[0]
    xs = (xs + rng.integers(-2, 3, xs.shape)) % canvas.shape[1]
    canvas[ys, xs] = 1.0
    canvas = ndimage.gaussian_filter(canvas, 1.2, mode="wrap")
    canvas *= height_nm / canvas.max()
    canvas *= ~ndimage.binary_dilation(np.pad(sim.mask, pad), iterations=clear_px)
    return np.stack(
        [
            ndimage.shift(canvas, s / sim.pixel_size_um, order=3, mode="wrap")[pad:-pad, pad:-pad]
            for s in sim.stage_shift_um
        ]
    )


def test_stage_drift_is_removed_with_a_textured_background():
    """Debris on the substrate moves with the stage only: the drift is its median flow."""
    sim = simulate_recording(stage_drift_um=DRIFT_UM, **DRIFT_SCENE)
    frames = (sim.frames + _debris_field(sim)).astype(np.float32)
    res = _analyze(sim, frames=frames)
    assert res.summary["quality"]["drift_reference"] == "textured background"
    _check_beats_against_truth(res, sim.truth["beats"], sim.fps)
    amp = res.summary["displacement_um"]
    assert amp == pytest.approx(sim.truth["summary"]["displacement_um"], rel=0.25)
    # measured in every frame: right up to the recording edges
    gains, worst = _drift_fit(res, sim, slice(None))
    assert np.all(np.abs(gains - 1.0) < 0.05), gains
    assert worst < 0.03
    assert np.max(res.trace["displacement_um"].to_numpy()[_resting(sim)]) < 0.25 * amp


@pytest.fixture(scope="module")
def cut_centre():
    """A large cluster whose contraction centre sits 3 um from the left edge of the field, and a
    small cluster beating on its own, both on one drifting stage.

    Two simulations share the stage drift; their OPD adds (flat, cell-free backgrounds). Cut by
    the edge, the large cluster contracts mostly leftwards, so while it beats the median flow
    over all cells is biased by ~0.1 um: measured per frame it would be taken for drift and
    removed from every cell, and the small cluster would show the large one's beats.
    """
    common = dict(
        duration_s=6, fps=20, pixel_size_um=0.5, noise_nm=0.7, stage_drift_um=(1.5, -1.2)
    )
    big = simulate_recording(
        shape_px=(96, 192), cluster_radius_um=20.0, rate_bpm=60, rng=4, **common
    )
    small = simulate_recording(
        shape_px=(96, 96), cluster_radius_um=8.0, rate_bpm=45, first_beat_s=0.9, rng=5, **common
    )
    x0 = round(big.truth["regions"][0]["centre_um"][1] / 0.5) - 6
    roll = 72 - round(small.truth["regions"][0]["centre_um"][1] / 0.5)
    frames = big.frames[:, :, x0 : x0 + 96] + np.roll(small.frames, roll, axis=2)
    res = _analyze(big, frames=frames.astype(np.float32))
    return big, small, res


def test_contraction_is_not_taken_for_drift(cut_centre):
    big, small, res = cut_centre
    assert res.summary["quality"]["drift_reference"] == INTERPOLATED
    # two regions, each with its own beats: the big cluster on the left, the small one right
    assert len(res.regions) == 2
    order = res.regions.sort_values("centroid_x_um")["region"].tolist()
    for region, sim in zip(order, (big, small), strict=True):
        found = res.region_beats[res.region_beats["region"] == region]
        truth = sim.truth["regions"][0]["beats"]
        assert len(found) == len(truth), (region, found["peak_s"].tolist())
        err = match_beats(found, truth)
        assert np.max(np.abs(err["peak_s_err"])) <= 0.5 / big.fps
    # the drift columns do not move with the big cluster's beats
    reported = res.trace[["drift_x_um", "drift_y_um"]].to_numpy()
    t = np.asarray(big.times_s)
    design = np.column_stack([np.ones_like(t), t, np.asarray(big.activation)])
    coef = np.linalg.lstsq(design, reported, rcond=None)[0]
    assert np.all(np.abs(coef[2]) < 0.04), coef[2]  # um per unit activation
    assert np.all(np.sign(reported[-1]) == np.sign(_true_drift_um(big)[-1]))


# --------------------------------------------------------------------------------------------
# 2. regions honour [beats]
# --------------------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def two_centres():
    """A confluent sheet with two contraction centres beating on their own (40 and 90 bpm),
    every second beat at half strength (alternans); with its analysis at the defaults."""
    sim = simulate_recording(
        duration_s=5,
        fps=20,
        shape_px=(80, 80),
        layout="confluent",
        n_clusters=2,
        cluster_rates_bpm=(40, 90),
        amplitude_pattern=(1.0, 0.5),
        rise_s=0.1,
        relax_s=0.2,
        noise_nm=1.0,
        rng=3,
    )
    return sim, _analyze(sim)


def _regions_by_truth(res, sim):
    """Map each simulated centre (label) to the found region nearest to it."""
    cx = res.regions["centroid_x_um"].to_numpy()
    cy = res.regions["centroid_y_um"].to_numpy()
    out = {}
    for truth in sim.truth["regions"]:
        y, x = truth["centre_um"]
        out[truth["label"]] = int(res.regions["region"].iloc[np.argmin(np.hypot(cx - x, cy - y))])
    return out


def _region_peaks(res, region):
    return res.region_beats.loc[res.region_beats["region"] == region, "peak_s"].to_numpy()


def _assert_peaks(found, truth_peaks, fps):
    assert len(found) == len(truth_peaks), (found, truth_peaks)
    np.testing.assert_allclose(np.sort(found), truth_peaks, atol=0.5 / fps)


def test_region_beats_follow_the_beats_settings(two_centres):
    """`[beats] max_rate_bpm = 60` (1 s between peaks) drops the weak beats of the 90 bpm centre
    (0.67 s apart; the strong ones, 1.33 s apart, win) and leaves the 40 bpm centre alone: the
    same rule per region as on the whole field."""
    sim, default = two_centres
    slow = _analyze(sim, {"beats": {"max_rate_bpm": 60.0}})
    assert slow.summary["parameters"]["beats"]["max_rate_bpm"] == 60.0
    assert slow.summary["beat_count"] < default.summary["beat_count"]  # whole field changes
    assert len(default.regions) == len(slow.regions) == 2
    for res, keep_weak in ((default, True), (slow, False)):
        regions = _regions_by_truth(res, sim)
        assert len(set(regions.values())) == 2
        for truth in sim.truth["regions"]:
            beats = truth["beats"]
            strongest = max(b["displacement_um"] for b in beats)
            rate = sim.truth["parameters"]["cluster_rates_bpm"][truth["label"] - 1]
            expected = [
                b["peak_s"]
                for b in beats
                if keep_weak or rate <= 60.0 or b["displacement_um"] > 0.75 * strongest
            ]
            _assert_peaks(_region_peaks(res, regions[truth["label"]]), expected, sim.fps)
        assert res.summary["n_regions"] == len(res.regions)


def test_region_split_uses_the_beats_settings(two_centres):
    """A part stands on its own only if it beats by the user's `[beats]`: when nothing in the
    recording is a beat by them, the sheet is not split into regions."""
    sim, default = two_centres
    assert len(default.regions) == 2  # by default the two centres are split apart
    with pytest.warns(BeatlabWarning, match="contraction-like pattern"):  # and it says so
        deaf = _analyze(sim, {"beats": {"min_snr": 1e4}})
    assert deaf.summary["parameters"]["beats"]["min_snr"] == 1e4
    assert deaf.summary["beat_count"] == 0
    assert deaf.summary["rhythm"] == "quiescent"
    assert len(deaf.region_beats) == 0
    assert len(deaf.regions) <= 1


# --------------------------------------------------------------------------------------------
# 3. every config section reaches its stage
# --------------------------------------------------------------------------------------------

#: 6 beats at 80 bpm (5 intervals: enough for a rhythm class), 75 frames of 64 x 64 px.
SMALL = dict(duration_s=5, fps=15, shape_px=(64, 64), rate_bpm=80, noise_nm=1.0, rng=7)


@pytest.fixture(scope="module")
def small():
    sim = simulate_recording(**SMALL)
    return sim, _analyze(sim)


def _override(sim, section, key, value, **kwargs):
    res = _analyze(sim, {section: {key: value}}, **kwargs)
    assert res.summary["parameters"][section][key] == value
    return res


def test_input_min_frames(small):
    sim, _ = small
    n = sim.frames.shape[0]
    with pytest.raises(InputError, match=str(n + 1)):
        _analyze(sim, {"input": {"min_frames": n + 1}})


def test_input_opd_scale(small):
    sim, base = small
    res = _override(sim, "input", "opd_scale", 2.0)
    # OPD change is in nm: twice the stored values, twice the change; the flow's 8-bit mapping
    # follows the template's percentiles, so the displacement does not change
    assert res.summary["opd_change_nm"] == pytest.approx(
        2 * base.summary["opd_change_nm"], rel=0.05
    )
    assert res.summary["displacement_um"] == pytest.approx(
        base.summary["displacement_um"], rel=0.02
    )


def test_input_bin(small):
    # 2 x 2 binning: the analysis grid halves, the pixel doubles, and the beats and their
    # timing stay right (same beats; landmarks within 1.25 frames of the truth: on this faint
    # 0.1 um, 15 fps recording the unbinned analysis reads duration_90 up to 174 ms long,
    # the binned one at most 23 ms, as the bins average the noise down; measured)
    sim, base = small
    res = _override(sim, "input", "bin", 2)
    meta = res.summary["metadata"]
    assert meta["analysis_bin"] == 2 and base.summary["metadata"]["analysis_bin"] == 1
    assert meta["analysis_shape_px"] == [n // 2 for n in sim.frames.shape[1:]]
    assert meta["analysis_pixel_size_um"] == pytest.approx(2 * sim.pixel_size_um)
    assert res.summary["beat_count"] == base.summary["beat_count"] > 0
    truth = pd.DataFrame(sim.truth["beats"])
    for col in ("onset_s", "peak_s", "duration_90_s"):
        np.testing.assert_allclose(res.beats[col], truth[col], atol=1.25 / sim.fps)
    assert res.summary["displacement_um"] == pytest.approx(
        base.summary["displacement_um"], rel=0.1
    )


def test_template_max_rest_frames(small):
    sim, base = small
    assert base.summary["quality"]["template_frames"] > 3
    res = _override(sim, "template", "max_rest_frames", 3)
    assert res.summary["quality"]["template_frames"] == 3


def test_mask_method(small):
    sim, base = small
    assert base.summary["quality"]["mask_method"] == "threshold"
    res = _override(sim, "mask", "method", "all")
    assert res.summary["quality"]["mask_method"] == "all"
    assert res.summary["quality"]["masked_fraction"] == 1.0
    assert base.summary["quality"]["masked_fraction"] < 0.5


def test_flow_rigid_none(drifting_clusters):
    """Without rigid removal the frames are compared with the template where they drifted to
    (the drift is still measured and reported)."""
    sim, base, _ = drifting_clusters
    res = _override(sim, "flow", "rigid", "none")
    assert res.summary["quality"]["drift_reference"] == "none"
    rest = _resting(sim)
    # misaligned by up to 0.8 um (the template sits at the middle of a 1.6 um drift),
    # resting frames differ from the template more than a beat changes the OPD (measured: up
    # to 32 nm against a 16 nm beat; with removal, less than half of that)
    opd_rest = np.abs(res.trace["opd_change_nm"].to_numpy()[rest])
    assert np.nanmax(opd_rest) > 1.5 * base.summary["opd_change_nm"]
    assert np.nanmax(opd_rest) > 2 * np.nanmax(
        np.abs(base.trace["opd_change_nm"].to_numpy()[rest])
    )
    gains, _ = _drift_fit(res, sim, _interior(len(rest)))
    assert np.all(np.abs(gains - 1.0) < 0.1), gains


def _least_squares_slope(y, dt, half):
    """Centred least-squares slope over 2 * half + 1 samples (interior samples only)."""
    k = np.arange(-half, half + 1)
    kernel = k[::-1] / (np.sum(k**2) * dt)
    return np.convolve(y, kernel, mode="valid")


def test_velocity_window(small):
    """Savitzky-Golay of order 2: the derivative at the centre is the least-squares slope over
    the window; 60 ms at 15 fps is 3 frames (central differences), 333 ms is 5 frames."""
    sim, base = small
    dt = 1.0 / sim.fps
    res = _override(sim, "velocity", "window_ms", 5000.0 / 15)
    for out, half in ((base, 1), (res, 2)):
        d = out.trace["displacement_um"].to_numpy()
        v = out.trace["velocity_um_s"].to_numpy()
        np.testing.assert_allclose(v[half:-half], _least_squares_slope(d, dt, half), atol=1e-9)
    assert res.trace["velocity_um_s"].max() < 0.95 * base.trace["velocity_um_s"].max()
    # a 267 ms filter span does not resolve a 150 ms rise: no velocity per beat, counted
    # (at 15 fps the 3-frame default does not either: its 10-90 % stroke lasts 1.3 frames)
    assert res.summary["contraction_velocity_um_s"] is None
    assert res.summary["quality"]["velocity_unresolved_beats"] == len(res.beats) > 0


def test_beats_interpolation(small):
    """`interpolation = "linear"`: the peak is the vertex of the parabola through the three
    samples around the maximum, literally."""
    sim, base = small
    res = _override(sim, "beats", "interpolation", "linear")
    assert len(res.beats) == len(base.beats) == sim.truth["summary"]["beat_count"]
    d = res.trace["displacement_um"].to_numpy()
    t = res.trace["time_s"].to_numpy()
    for peak in res.beats["peak_s"]:
        i = int(np.argmin(np.abs(t - peak)))
        i = i - 1 + int(np.argmax(d[i - 1 : i + 2]))
        a, b, c = d[i - 1 : i + 2]
        vertex = t[i] + 0.5 * (a - c) / (a - 2 * b + c) * (t[1] - t[0])
        assert peak == pytest.approx(vertex, abs=1e-9)
    assert not np.allclose(res.beats["peak_s"], base.beats["peak_s"], atol=1e-6, rtol=0)


def test_rhythm_irregular_cv(small):
    sim, base = small
    assert base.summary["rhythm"] == "regular"
    res = _override(sim, "rhythm", "irregular_cv", 0.0)
    assert res.summary["ibi_cv"] == pytest.approx(base.summary["ibi_cv"])
    assert res.summary["rhythm"] == "irregular"


def test_maps_tile_um(small):
    sim, base = small
    assert base.maps["peak_displacement_um"].shape == (4, 4)  # 32 um field, 8 um tiles
    res = _override(sim, "maps", "tile_um", 16.0)
    assert res.maps["peak_displacement_um"].shape == (2, 2)


def test_regions_detect(small):
    sim, base = small
    assert len(base.regions) == base.summary["n_regions"] == 1
    res = _override(sim, "regions", "detect", False)
    assert len(res.regions) == res.summary["n_regions"] == 0
    assert len(res.region_beats) == 0


@pytest.fixture(scope="module")
def hologram():
    sim = simulate_recording(
        kind="hologram",
        duration_s=3,
        fps=15,
        shape_px=(128, 128),
        pixel_size_um=0.25,
        rate_bpm=60,
        noise_nm=0.5,
        rng=21,
    )
    # 128 camera pixels reconstruct onto a grid too coarse to trust for flow, which the
    # analysis says; these tests only follow the holography settings through
    with pytest.warns(BeatlabWarning, match="analysis grid is only"):
        return sim, _analyze(sim, reference=sim.reference_frames)


def test_holography_sideband(hologram):
    """The other first order: the phase, and so the OPD, changes sign."""
    sim, base = hologram
    auto = base.summary["metadata"]["holography"]
    assert auto["sign"] == 1  # chosen so that cells come out positive
    with pytest.warns(BeatlabWarning, match="analysis grid is only"):
        res = _override(sim, "holography", "sideband", "-1", reference=sim.reference_frames)
    flipped = res.summary["metadata"]["holography"]
    assert flipped["sign"] == -1
    np.testing.assert_allclose(flipped["carrier"], -np.asarray(auto["carrier"]))
    assert np.nanpercentile(res.template, 99) < 0.2 * np.nanpercentile(base.template, 99)


def test_holography_radius(hologram):
    """A narrower side-band window passes fewer frequencies: a coarser output grid."""
    sim, base = hologram
    with pytest.warns(BeatlabWarning, match="analysis grid is only"):
        res = _override(sim, "holography", "radius", 0.05, reference=sim.reference_frames)
    coarse = res.summary["metadata"]["analysis_pixel_size_um"]
    assert coarse > 1.5 * base.summary["metadata"]["analysis_pixel_size_um"]
