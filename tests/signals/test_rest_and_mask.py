import numpy as np
import pytest

from beatlab.frames import OPDSource
from beatlab.signals.mask import make_cell_mask
from beatlab.signals.rest import block_mean, estimate_rest_template, shift_image
from beatlab.synth import simulate_recording
from tests.pipeline.helpers import as_recording


def _rest(sim):
    return estimate_rest_template(OPDSource(as_recording(sim)))


def test_rest_frames_are_relaxed_not_merely_still():
    sim = simulate_recording(
        duration_s=6,
        fps=30,
        shape_px=(96, 96),
        rate_bpm=60,
        rise_s=0.15,
        relax_s=0.3,
        noise_nm=1.0,
        rng=1,
    )
    rest = _rest(sim)
    act = np.atleast_2d(sim.activation)[0]
    # the peak of a contraction is still too, but it is not rest
    assert act[rest.rest].max() < 0.05 * act.max()
    assert rest.method == "rest-frames"
    # the template is the noise-free rest scene up to a plane, far less noisy than a frame
    noise_per_frame = np.sqrt(np.nanmean(rest.noise_var))
    assert noise_per_frame == pytest.approx(1.0, rel=0.15)


def test_template_with_stage_drift_stays_sharp():
    sim = simulate_recording(
        duration_s=6,
        fps=30,
        shape_px=(96, 96),
        rate_bpm=0,
        noise_nm=1.0,
        stage_drift_um=(1.0, 0.5),
        rng=2,
    )
    rest = _rest(sim)
    # measured (dx, dy) shifts follow the drift: (y, x) = (1.0, 0.5) um at 0.5 um pixels
    drift_px = rest.shifts_px[-1] - rest.shifts_px[0]
    np.testing.assert_allclose(drift_px, [1.0, 2.0], atol=0.35)
    first = sim.frames[0]
    sharp = np.std(np.diff(first, axis=1))
    assert np.std(np.diff(rest.template, axis=1)) > 0.8 * sharp


def test_mask_sparse_vs_confluent():
    sparse = simulate_recording(
        duration_s=2, fps=15, shape_px=(96, 96), rate_bpm=0, layout="clusters", rng=3
    )
    conf = simulate_recording(
        duration_s=2, fps=15, shape_px=(96, 96), rate_bpm=0, layout="confluent", rng=3
    )
    r1, r2 = _rest(sparse), _rest(conf)
    noise = [float(np.sqrt(np.nanmedian(r.noise_var) / r.n_frames_used)) for r in (r1, r2)]
    m1 = make_cell_mask(r1.template, pixel_size_um=sparse.pixel_size_um, noise_nm=noise[0])
    m2 = make_cell_mask(r2.template, pixel_size_um=conf.pixel_size_um, noise_nm=noise[1])
    assert m1.method == "threshold"
    # the mask covers the true cells (edges taper smoothly, so it may be a little larger)
    assert (m1.mask & sparse.mask).sum() / sparse.mask.sum() > 0.9
    assert m1.background.any() and not (m1.background & sparse.mask).any()
    assert m2.method == "confluent" and m2.masked_fraction > 0.8


def test_mask_drops_nan_and_handles_methods():
    rng = np.random.default_rng(0)
    t = rng.normal(0, 1, (64, 64)).astype(np.float32)
    t[20:40, 20:40] += 200
    t[0:5, 0:5] = np.nan
    m = make_cell_mask(t, pixel_size_um=0.5, method="all")
    assert not m.mask[0:5, 0:5].any() and m.mask[30, 30]
    m = make_cell_mask(t, pixel_size_um=0.5, method="threshold", min_area_um2=1000.0)
    assert not m.mask.any()  # the only object is 100 um^2
    with pytest.raises(ValueError, match="auto, threshold"):
        make_cell_mask(t, pixel_size_um=0.5, method="otsu")


def test_shift_image_exact_and_block_mean():
    y, x = np.mgrid[:64, :64]
    img = np.sin(2 * np.pi * x / 16).astype(np.float32)
    moved = shift_image(img, np.array([2.0, 0.0]))
    # mirror padding: exact away from the border the content moved in from
    np.testing.assert_allclose(
        moved[:, 8:-8], np.sin(2 * np.pi * (x - 2) / 16)[:, 8:-8], atol=1e-3
    )
    smooth = np.exp(-((x - 30.0) ** 2 + (y - 34.0) ** 2) / 50.0).astype(np.float32)
    moved = shift_image(smooth, np.array([0.3, -0.7]))
    truth = np.exp(-((x - 30.3) ** 2 + (y - 33.3) ** 2) / 50.0)
    np.testing.assert_allclose(moved, truth, atol=1e-4)
    a = np.arange(16, dtype=np.float32).reshape(4, 4)
    np.testing.assert_allclose(block_mean(a, 2), [[2.5, 4.5], [10.5, 12.5]])


def test_no_rest_falls_back_and_says_so():
    # beats faster than their own kinetics: the culture never relaxes (fibrillation-like)
    sim = simulate_recording(
        duration_s=4,
        fps=30,
        shape_px=(80, 80),
        rate_bpm=200,
        rise_s=0.15,
        relax_s=0.35,
        noise_nm=1.0,
        rng=4,
    )
    rest = _rest(sim)
    assert rest.method == "least-deviating-frames"
    # the frames taken are still the least contracted ones
    act = np.atleast_2d(sim.activation)[0]
    assert act[rest.rest].mean() < act.mean()


def test_a_common_bias_of_the_shift_estimate_is_not_taken_for_drift(monkeypatch):
    # seen on a 512 px, 4000-frame recording: phase correlation on coarse low-resolution
    # frames read every frame as shifted by the same ~1.5 px; the frames' own reference has
    # no such offset, so the rest pass must not move every frame (and compound it each
    # iteration), which put the template 9 px off and found no rest at all
    import beatlab.signals.rest as rest_module

    true_shift = rest_module._phase_shift

    def biased(ref, img, window):
        return true_shift(ref, img, window) + np.array([1.5, -1.2])

    monkeypatch.setattr(rest_module, "_phase_shift", biased)
    sim = simulate_recording(duration_s=6, fps=20, shape_px=(96, 96), rate_bpm=60, rng=2)
    src = OPDSource(as_recording(sim))
    rest = estimate_rest_template(
        src, rest_quantile=0.25, max_rest_frames=32, level_tilt=True,
        times_s=np.asarray(sim.times_s),
    )  # fmt: skip
    assert rest.method == "rest-frames"
    assert np.abs(rest.shifts_px).max() < 0.5
    activation = np.asarray(sim.activation)
    active = activation.reshape(activation.shape[0], -1).max(axis=1)
    assert np.all(active[rest.rest] < 0.05)  # the resting frames are truly at rest


def _abrupt_end_activation(n_beats=6, rest=12):
    """Per beat: a 6-frame rise, a slow 14-frame fall to 50 %, a 1-frame drop, then rest."""
    rise = 0.5 - 0.5 * np.cos(np.linspace(0, np.pi, 7))[1:]
    fall = np.linspace(1.0, 0.5, 15)[1:]
    beat = np.concatenate([np.zeros(rest), rise, fall, [0.0]])
    return np.tile(beat, n_beats)


def test_relaxed_end_holds_when_relaxation_ends_abruptly():
    # An EAD-like beat can end its relaxation with a fast drop: its fastest frame-to-frame
    # change is then a fall, although it relaxes slower on average (a fact of cardiomyocyte
    # mechanics, common practice: contraction is faster than relaxation). The old rule (99th
    # vs 1st percentile of the change) took the contracted state for rest here.
    from beatlab.signals.rest import relaxed_score

    a = _abrupt_end_activation()
    rng = np.random.default_rng(3)
    pattern = rng.standard_normal(400)
    frames = np.outer(a, pattern) + 0.01 * rng.standard_normal((len(a), 400))
    score = relaxed_score(frames)
    relaxed, contracted = a < 0.05, a > 0.95
    assert score[relaxed].max() < 0.1 * score.max()
    assert score[contracted].min() > 0.9 * score.max()


def test_forked_rest_pass_gives_the_same_template_as_one_process(monkeypatch):
    """Reading, phase correlation and levelling spread over forked workers (in spans) give
    exactly the one-process result: every frame's work is independent of the others'."""
    import beatlab.signals.rest as rest_module

    # the iterations fork for long recordings only: this short one forks too
    monkeypatch.setattr(rest_module, "_FORK_MIN_FRAMES", 1)
    sim = simulate_recording(
        duration_s=4, fps=25, shape_px=(96, 96), rate_bpm=60, stage_drift_um=(1.0, -1.5), rng=4
    )
    source = OPDSource(as_recording(sim), chunk_frames=16)
    one = estimate_rest_template(source, workers=1)
    two = estimate_rest_template(source, workers=2)
    for name in ("template", "rest", "deviation", "shifts_px", "noise_var", "activity"):
        np.testing.assert_array_equal(getattr(one, name), getattr(two, name), err_msg=name)


def test_pixel_medians_are_numpys_median_over_time():
    from beatlab.signals.rest import _pixel_medians

    rng = np.random.default_rng(8)
    for shape in [(7, 5, 9), (10, 40, 30), (1, 3, 3)]:
        stack = rng.normal(size=shape).astype(np.float32)
        stack[0, 0, 0] = np.nan  # a NaN pixel stays NaN, as in np.median
        got = _pixel_medians(stack, block=64)
        np.testing.assert_array_equal(got, np.median(stack, axis=0))
        assert got.dtype == np.median(stack, axis=0).dtype


def test_median_spans_join_into_numpys_median_over_time(monkeypatch):
    """The first reference, shared by pixel spans between the rest pass's workers."""
    import beatlab.signals.rest as rest_module

    stack = np.random.default_rng(9).normal(size=(11, 6, 7)).astype(np.float32)
    monkeypatch.setitem(rest_module._JOB, "low", stack)
    parts = [rest_module._median_span(span) for span in rest_module._spans(42, 4)]
    joined = np.concatenate(parts).reshape(6, 7)
    np.testing.assert_array_equal(joined, np.median(stack, axis=0))


@pytest.mark.parametrize(
    ("drift_um", "rounds"),
    [((0.0, 0.0), 1), ((1.0, 0.5), 3)],  # still stage: measured once; drifting: every round
)
def test_shifts_are_measured_again_only_while_some_frame_moves(monkeypatch, drift_um, rounds):
    """A round with every smoothed shift far below the alignment threshold ends the
    measuring: the later references, averages of the same unshifted frames, find none."""
    import beatlab.signals.rest as rest_module

    calls = []
    real = rest_module._measured_shifts

    def counted(*args):
        calls.append(1)
        return real(*args)

    monkeypatch.setattr(rest_module, "_measured_shifts", counted)
    sim = simulate_recording(duration_s=6, fps=30, shape_px=(96, 96), rate_bpm=60,
                             noise_nm=1.0, stage_drift_um=drift_um, rng=2)  # fmt: skip
    rest = _rest(sim)
    assert len(calls) == rounds
    if rounds == 1:
        assert not rest.shifts_px.any()
        monkeypatch.setattr(rest_module, "_SETTLED_FRACTION", 0.0)  # measure every round
        again = _rest(sim)
        for name in ("template", "rest", "deviation", "shifts_px", "activity"):
            np.testing.assert_array_equal(getattr(again, name), getattr(rest, name), name)
