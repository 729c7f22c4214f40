"""Each stage on its own: arrays (or the previous stage's result) in, a frozen result out."""

import dataclasses
import math

import numpy as np
import pytest

from beatlab.frames import OPDSource
from beatlab.settings import load_settings
from beatlab.stages import (
    FrameSignals,
    Reference,
    TraceResult,
    analyze_trace,
    measure_frames,
    prepare_reference,
)
from beatlab.synth import simulate_recording
from tests.pipeline.helpers import as_recording

FPS = 50.0
RISE_S, TAU_S = 0.12, 0.1


def _beat_train(peaks_s, times, amplitude=0.5):
    """Half-cosine rise to each peak, exponential relaxation: a shape built here, by hand."""
    trace = np.zeros_like(times)
    for p in peaks_s:
        rise = (times > p - RISE_S) & (times <= p)
        trace[rise] += (
            amplitude * 0.5 * (1 - np.cos(math.pi * (times[rise] - p + RISE_S) / RISE_S))
        )
        fall = times > p
        trace[fall] += amplitude * np.exp(-(times[fall] - p) / TAU_S)
    return trace


def test_analyze_trace_takes_arrays_and_uses_its_settings():
    times = np.arange(0, 8, 1 / FPS)
    peaks = np.arange(0.6, 7.6, 1.0)
    trace = _beat_train(peaks, times) + np.random.default_rng(3).normal(0, 0.004, times.size)
    opd = 20 * trace / 0.5
    settings = load_settings()
    kw = dict(velocity=settings.velocity, rhythm=settings.rhythm, start_s=0.0, end_s=8.0)
    res = analyze_trace(trace, opd, times, beats=settings.beats, **kw)
    assert isinstance(res, TraceResult)
    with pytest.raises(dataclasses.FrozenInstanceError):
        res.beats = None
    assert len(res.beats) == peaks.size
    # the peak of this shape is its cusp at p: sub-frame timing within half a frame
    assert np.abs(res.beats["peak_s"].to_numpy() - peaks).max() < 0.5 / FPS
    assert res.summary["beat_rate_bpm"] == pytest.approx(60.0, rel=1e-3)
    # 10 % onset of a half-cosine rise: 0.5 (1 - cos(pi s / rise)) = 0.1 (closed form)
    onset_lag = RISE_S * (1 - math.acos(0.8) / math.pi)
    assert np.median(res.beats["time_to_peak_s"]) == pytest.approx(onset_lag, abs=0.006)
    # the velocity is the derivative of the trace: positive on the rise, negative after
    assert res.velocity_um_s[np.searchsorted(times, peaks[0] - RISE_S / 2)] > 0
    assert res.velocity_um_s[np.searchsorted(times, peaks[0] + 0.05)] < 0
    # the same trace with a [beats] setting that forbids 60 bpm halves the beats found
    slow = load_settings({"beats": {"max_rate_bpm": 40.0}})
    assert len(analyze_trace(trace, opd, times, beats=slow.beats, **kw).beats) < peaks.size


@pytest.fixture(scope="module")
def drifting():
    """A beating cluster on a stage that drifts 3 um in x and -2 um in y."""
    sim = simulate_recording(
        duration_s=5, fps=20, shape_px=(96, 96), rate_bpm=60, stage_drift_um=(-2.0, 3.0), rng=5
    )
    rec = as_recording(sim)
    return sim, rec, OPDSource(rec)


def test_reference_and_frame_pass_on_their_own(drifting):
    sim, rec, source = drifting
    settings = load_settings()
    times = np.asarray(rec.times_s)
    ref = prepare_reference(source, times_s=times, settings=settings)
    assert isinstance(ref, Reference) and ref.mask.any()
    lo, hi = ref.flow_scale
    assert lo < np.nanpercentile(ref.template, 1) and hi > np.nanpercentile(ref.template, 99)
    frames = measure_frames(source, ref, times_s=times, settings=settings, workers=1)
    assert isinstance(frames, FrameSignals)
    n = times.size
    assert frames.displacement_um.shape == frames.opd_change_nm.shape == (n,)
    assert frames.tile_traces_um.shape == (n, int(np.prod(frames.tile_grid)))
    # the drift removed follows the stage: (dx, dy) px = (x, y) um / pixel size, linear in
    # time (simulator truth: stage_drift_um is (y, x) reached at the last frame)
    drift_um = (frames.drift_px - frames.drift_px[0]) * sim.pixel_size_um
    expected = np.stack([3.0 * times / times[-1], -2.0 * times / times[-1]], axis=1)
    assert np.abs(drift_um - expected).max() < 0.15
    # once the drift is removed, the trace stays at the scale of the beats, not at 3.6 um
    assert np.nanmax(frames.displacement_um) < 1.0


def test_frame_pass_drift_off_leaves_the_stage_motion_in(drifting):
    _, rec, source = drifting
    times = np.asarray(rec.times_s)
    settings = load_settings({"flow": {"rigid": "none"}})
    ref = prepare_reference(source, times_s=times, settings=settings)
    frames = measure_frames(source, ref, times_s=times, settings=settings, workers=1)
    assert frames.drift_reference == "none"
    # nothing removed: the last frames carry the 3.6 um (7 px) stage shift as "displacement"
    # (read short: a 7 px shift is beyond the flow's capture range, so the reading is
    # erratic: 1.17 um, and 0.61 um since the template's levelling fit became subsampled),
    # far above the beats (< 0.3 um)
    assert np.nanmean(frames.displacement_um[-5:]) > 0.45


def test_drift_and_pattern_frames_are_tracked_once_and_read_the_same(drifting, monkeypatch):
    """The projection round reuses the values the drift and pattern rounds measured: the
    same numbers as tracking those frames again, and every frame is tracked once."""
    from collections import Counter

    import beatlab.stages.frame_pass as fp

    _, rec, source = drifting
    times = np.asarray(rec.times_s)
    settings = load_settings()
    ref = prepare_reference(source, times_s=times, settings=settings)
    tracked = Counter()
    original = fp._FrameWork._gathered

    def counted(self, i, frame):
        tracked[i] += 1
        return original(self, i, frame)

    monkeypatch.setattr(fp._FrameWork, "_gathered", counted)
    kept = measure_frames(source, ref, times_s=times, settings=settings, workers=1)
    assert kept.drift_reference.endswith("interpolated")  # a drift round ran
    assert sorted(tracked) == list(range(times.size)) and max(tracked.values()) == 1
    tracked.clear()
    monkeypatch.setattr(fp, "_GATHERED_BUDGET_MB", 0)  # nothing kept: tracked again
    again = measure_frames(source, ref, times_s=times, settings=settings, workers=1)
    twice = {i for i, count in tracked.items() if count == 2}
    assert set(kept.pattern_frames) <= twice and len(twice) > len(kept.pattern_frames)
    for name in ("displacement_um", "opd_change_nm", "drift_px", "tile_traces_um"):
        np.testing.assert_array_equal(getattr(kept, name), getattr(again, name), err_msg=name)


def test_a_region_with_the_whole_masks_traces_takes_the_whole_analysis(drifting):
    """One region covering every cell has the whole mask's traces, number for number: it
    takes the whole analysis instead of repeating it, with the same tables as repeating it."""
    import pandas as pd

    from beatlab.stages import analyze_regions

    _, rec, source = drifting
    times = np.asarray(rec.times_s)
    settings = load_settings()
    ref = prepare_reference(source, times_s=times, settings=settings)
    frames = measure_frames(source, ref, times_s=times, settings=settings, workers=1)
    span = dict(start_s=float(times[0]), end_s=float(times[-1] + 1 / FPS))
    whole = analyze_trace(
        frames.displacement_um, frames.opd_change_nm, times, velocity=settings.velocity,
        beats=settings.beats, rhythm=settings.rhythm, pattern_frames=frames.pattern_frames,
        **span,
    )  # fmt: skip
    kw = dict(times_s=times, pixel_size_um=float(source.pixel_size_um), settings=settings)
    reused = analyze_regions(frames, ref, whole=whole, **kw, **span)
    repeated = analyze_regions(frames, ref, **kw, **span)
    assert len(reused.results) == 1 and reused.results[0] is whole
    assert repeated.results[0] is not whole
    for name in ("table", "beats", "traces"):
        pd.testing.assert_frame_equal(getattr(reused, name), getattr(repeated, name))
    # where the whole mask's trace differs from the region's (here: made to), the region is
    # analysed on its own numbers
    changed = dataclasses.replace(frames, displacement_um=frames.displacement_um * 1.5)
    own = analyze_regions(changed, ref, whole=whole, **kw, **span)
    assert own.results[0] is not whole
    pd.testing.assert_frame_equal(own.beats, repeated.beats)
