"""Secondary peaks on every shape of an after-contraction, the last beat's end, and velocities
that are reported only where the frame rate resolves them.

Beat shapes are built here from half-cosine segments and exponentials, so each one's levels,
slopes and extrema are known in closed form or from the dense noise-free curve (the source is
named beside each check). Traces are signed and rest at exactly 0; noise is zero-mean white
noise of SD amplitude / snr.
"""

import numpy as np
import pytest
from scipy.signal import find_peaks, peak_prominences, savgol_filter

from beatlab.beats import detect_beats, measure_beats

AMPLITUDE_UM = 0.62
RISE_S = 0.15


def half_cosine_chain(x, segments):
    """0 before x = 0, then half-cosine moves through (duration_s, level) segments."""
    y = np.zeros_like(x)
    start, level = 0.0, 0.0
    for duration, target in segments:
        f = np.clip((x - start) / duration, 0.0, 1.0)
        y = np.where(x >= start, level + (target - level) * 0.5 * (1 - np.cos(np.pi * f)), y)
        start, level = start + duration, target
    return y


def exponential_beat(x, tau_s):
    """Half-cosine rise over RISE_S to 1, then exp(-(x - RISE_S) / tau_s)."""
    up = half_cosine_chain(x, [(RISE_S, 1.0)])
    return np.where(x <= RISE_S, up, np.exp(-np.clip(x - RISE_S, 0, None) / tau_s))


def issue_gaussian_bump(x):
    # issue 8: a Gaussian of SD 45 ms, 0.32 s after the end of the rise, 0.35 of the
    # amplitude high, on a relaxation that has fallen to 10 % there (tau = 0.32 / ln 10)
    bump = 0.35 * np.exp(-0.5 * ((x - RISE_S - 0.32) / 0.045) ** 2)
    return exponential_beat(x, 0.32 / np.log(10.0)) + bump


def gaussian_bump(x):
    # dense curve: the bump tops 0.30 s after the rise, 25 % above a dip at 43 %
    bump = 0.45 * np.exp(-0.5 * ((x - RISE_S - 0.3) / 0.05) ** 2)
    return exponential_beat(x, 0.2) + bump


def plateau_with_rerise(x):
    segments = [(RISE_S, 1.0), (0.12, 0.45), (0.15, 0.45), (0.08, 0.62), (0.25, 0.0)]
    return half_cosine_chain(x, segments)


def second_step(x):
    return half_cosine_chain(x, [(RISE_S, 1.0), (0.15, 0.40), (0.1, 0.62), (0.3, 0.0)])


def shoulder(x):
    # falls to 50 %, then slowly to 42 %, then to rest: no local maximum
    return half_cosine_chain(x, [(RISE_S, 1.0), (0.12, 0.5), (0.2, 0.42), (0.25, 0.0)])


def overshoot(x):
    # relaxes 15 % below the resting level, then comes back
    return half_cosine_chain(x, [(RISE_S, 1.0), (0.25, -0.15), (0.3, 0.0)])


def plain(x):
    return exponential_beat(x, 0.14)


CARRIERS = {
    "gaussian_bump": gaussian_bump,
    "plateau_with_rerise": plateau_with_rerise,
    "second_step": second_step,
}
NON_CARRIERS = {"shoulder": shoulder, "overshoot": overshoot, "plain": plain}
FLAGGED = (1, 4, 6)


def secondary_truth(shape):
    """(is a secondary peak by DESIGN.md, time of its maximum) on the dense noise-free beat.

    scipy.signal.find_peaks and peak_prominences (L) on the curve from its main peak to 1.2 s:
    prominence >= 10 % of the amplitude and the dip before it >= 20 %.
    """
    x = np.linspace(0.0, 1.2, 120001)
    y = shape(x)
    top = int(np.argmax(y))
    local, _ = find_peaks(y[top:])
    if local.size == 0:
        return False, np.nan
    prominence, left, _ = peak_prominences(y[top:], local)
    ok = (prominence >= 0.1) & (y[top:][left] >= 0.2)
    if not np.any(ok):
        return False, np.nan
    return True, float(x[top + local[ok][np.argmax(prominence[ok])]])


def ead_recording(shape, fps, snr, rng, flagged=FLAGGED, duration_s=12.0, period_s=1.2):
    t = np.arange(round(duration_s * fps)) / fps
    starts = 0.4 + np.arange(int(duration_s / period_s)) * period_s
    starts = starts[starts + 1.3 < duration_s]
    y = np.zeros_like(t)
    for k, start in enumerate(starts):
        y += AMPLITUDE_UM * (shape if k in flagged else plain)(t - start)
    if snr is not None:
        y = y + rng.normal(0.0, AMPLITUDE_UM / snr, t.size)
    return t, y, starts


@pytest.mark.parametrize("shape", sorted({**CARRIERS, **NON_CARRIERS}))
def test_the_shapes_are_what_they_claim(shape):
    carries, _ = secondary_truth({**CARRIERS, **NON_CARRIERS}[shape])
    assert carries == (shape in CARRIERS)
    assert secondary_truth(issue_gaussian_bump)[0]


@pytest.mark.parametrize("snr", [30, 60, 100])
@pytest.mark.parametrize("fps", [30, 100])
@pytest.mark.parametrize("shape", sorted(CARRIERS))
def test_secondary_peaks_flagged_on_exactly_the_beats_that_carry_them(shape, fps, snr):
    rng = np.random.default_rng(fps + snr)
    _, bump_s = secondary_truth(CARRIERS[shape])
    for _ in range(2):
        t, y, starts = ead_recording(CARRIERS[shape], fps, snr, rng)
        beats = measure_beats(y, t, detect_beats(y, t))
        assert len(beats) == starts.size
        # truth: the shapes' own secondary peaks (scipy peak_prominences on the dense curve)
        assert np.flatnonzero(beats["secondary_peak"]).tolist() == list(FLAGGED)
        found = beats["secondary_peak_s"].to_numpy()[list(FLAGGED)] - starts[list(FLAGGED)]
        np.testing.assert_allclose(found, bump_s, atol=0.02 + 1.0 / fps)


@pytest.mark.parametrize("snr", [None, 60, 100])
@pytest.mark.parametrize("fps", [30, 100])
def test_the_issues_smooth_bump_is_a_secondary_peak(fps, snr):
    # issue 8 saw 0 of 3 flagged; its dip (24 % of the amplitude) clears the 20 % level by 3.7
    # noise SDs at SNR 100, 2.2 at SNR 60
    rng = np.random.default_rng(fps)
    t, y, starts = ead_recording(issue_gaussian_bump, fps, snr, rng)
    beats = measure_beats(y, t, detect_beats(y, t))
    assert len(beats) == starts.size
    assert np.flatnonzero(beats["secondary_peak"]).tolist() == list(FLAGGED)


@pytest.mark.parametrize("snr", [None, 30, 100])
@pytest.mark.parametrize("fps", [30, 100])
@pytest.mark.parametrize("shape", sorted(NON_CARRIERS))
def test_no_secondary_peak_on_noise_shoulder_or_overshoot(shape, fps, snr):
    rng = np.random.default_rng(2 * fps + (snr or 0))
    for _ in range(2):
        t, y, starts = ead_recording(NON_CARRIERS[shape], fps, snr, rng)
        beats = measure_beats(y, t, detect_beats(y, t))
        assert len(beats) == starts.size
        # truth: no local maximum qualifies on the dense curve (test_the_shapes_are_...)
        assert not beats["secondary_peak"].any()


# --- the last beat ---------------------------------------------------------------------------


def dense_end(starts, k, tau_s):
    """end_s of beat k by DESIGN.md on the dense noise-free curve (1 ms grid): baseline = median
    over the 100 ms centred on the lowest point between the previous peak and this peak; the
    end is where the exponential tail falls to baseline + 10 % of the amplitude (the previous
    beats' tails make the baseline slightly positive, so this is not exactly tau ln 10)."""
    x = np.arange(0.0, 8.0, 0.001)
    y = sum(exponential_beat(x - s, tau_s) for s in starts)
    peak = int(np.argmax(np.where(np.abs(x - starts[k] - RISE_S) < 0.05, y, -np.inf)))
    previous = round((starts[k - 1] + RISE_S) / 0.001)
    low = previous + int(np.argmin(y[previous:peak]))
    baseline = np.median(y[low - 50 : low + 51])
    level = baseline + 0.1 * (y[peak] - baseline)
    after = peak + int(np.argmax(y[peak:] <= level))
    return x[after - 1] + (y[after - 1] - level) / (y[after - 1] - y[after]) * 0.001


@pytest.mark.parametrize("snr", [None, 50])
@pytest.mark.parametrize("fps", [30, 50, 100])
def test_last_beat_gets_its_end_when_a_new_beat_starts_at_the_recording_end(fps, snr):
    # issue 8: 8 s at 72 bpm; the last beat is back at rest 0.5 s before the end, and the next
    # beat's upstroke begins 0.1 s before the end (too short to be detected as a beat)
    tau_s = 0.13
    rng = np.random.default_rng(fps)
    t = np.arange(8 * fps) / fps
    starts = 0.4 + np.arange(10) * 60.0 / 72.0  # the tenth starts at 7.9 s
    clean = AMPLITUDE_UM * sum(exponential_beat(t - s, tau_s) for s in starts)
    # truth: the definition applied to the dense noise-free curve
    end = dense_end(starts, 8, tau_s)
    assert t[-1] - end > 0.45
    errors = []
    for _ in range(1 if snr is None else 5):
        y = clean if snr is None else clean + rng.normal(0.0, AMPLITUDE_UM / snr, t.size)
        beats = measure_beats(y, t, detect_beats(y, t))
        assert len(beats) == 9
        last = beats.iloc[-1]
        assert np.isfinite(last["duration_90_s"]) and np.isfinite(last["relax_90_s"])
        errors.append(last["end_s"] - end)
        # the same beat followed by rest to the recording end has the same end (up to the
        # noise estimate of the shorter trace)
        keep = t < 7.85
        alone = measure_beats(y[keep], t[keep], detect_beats(y[keep], t[keep]))
        assert alone["end_s"].iloc[-1] == pytest.approx(last["end_s"], abs=0.2 / fps)
    # noise-free: within half a frame; at SNR 50 one beat's 10 % crossing scatters by 12-14 ms
    # (SD, measured), so the median over 5 noise draws is checked against one frame
    tolerance = (0.5 if snr is None else 1.0) / fps + 0.003
    assert abs(np.median(errors)) <= tolerance, errors


def test_last_beat_still_relaxing_at_the_end_has_no_end():
    fps = 50
    t = np.arange(int(3.4 * fps)) / fps
    y = AMPLITUDE_UM * sum(exponential_beat(t - s, 0.13) for s in (0.4, 1.4, 2.95))
    beats = measure_beats(y, t, detect_beats(y, t))
    assert len(beats) == 3
    # the third beat is at 0.38 of its amplitude at the last frame: it never reaches 10 %
    assert np.isnan(beats["end_s"].iloc[-1]) and np.isnan(beats["relax_90_s"].iloc[-1])
    assert np.isfinite(beats["end_s"].iloc[1])


# --- velocities ------------------------------------------------------------------------------

FALL_S = 0.35


def smooth_beat(x, rise_s=RISE_S, fall_s=FALL_S):
    """Half-cosine up over rise_s, half-cosine down over fall_s: steepest slopes
    pi / (2 rise_s) and pi / (2 fall_s) per unit amplitude (derivative of the half-cosine)."""
    return half_cosine_chain(x, [(rise_s, 1.0), (fall_s, 0.0)])


def smooth_recording(fps, rise_s=RISE_S, fall_s=FALL_S, duration_s=8.0):
    t = np.arange(round(duration_s * fps)) / fps
    starts = 0.3 + np.arange(int(duration_s / 0.9137)) * 0.9137
    starts = starts[starts + 0.8 < duration_s]
    y = AMPLITUDE_UM * sum(smooth_beat(t - s, rise_s, fall_s) for s in starts)
    return t, y, starts


def savgol_velocity(y, fps, frames):
    """Savitzky-Golay derivative, polynomial order 2 (scipy.signal.savgol_filter, L)."""
    return savgol_filter(y, frames, 2, deriv=1, delta=1.0 / fps, mode="interp")


def test_velocity_not_reported_at_10_fps():
    # issue 8: at 10 fps the contraction velocity read 45 % low with no flag. The 10-90 %
    # upstroke of a 150 ms half-cosine lasts 0.59 x 150 = 88 ms (< 2.5 frames), the 90-10 %
    # downstroke of a 350 ms one 207 ms (< 2.5 frames)
    fps = 10
    t, y, starts = smooth_recording(fps)
    beats = measure_beats(y, t, detect_beats(y, t), velocity=savgol_velocity(y, fps, 3))
    assert len(beats) == starts.size
    assert not beats["velocity_resolved"].any()
    assert beats["contraction_velocity_um_s"].isna().all()
    assert beats["relaxation_velocity_um_s"].isna().all()


@pytest.mark.parametrize(("fps", "frames"), [(30, 3), (50, 3), (100, 7)])
def test_resolved_velocities_match_the_closed_form(fps, frames):
    t, y, starts = smooth_recording(fps)
    vel = savgol_velocity(y, fps, frames)
    span = (frames - 1) / fps
    beats = measure_beats(y, t, detect_beats(y, t), velocity=vel, velocity_window_s=span)
    assert len(beats) == starts.size
    assert beats["velocity_resolved"].all()
    # truth: the steepest slope of a half-cosine of duration D and height A is A pi / (2 D);
    # a quadratic Savitzky-Golay derivative spanning up to 2/3 of the 10-90 % stroke reads
    # it at most 8 % low (measured 3-5 %)
    up = AMPLITUDE_UM * np.pi / (2 * RISE_S)
    down = AMPLITUDE_UM * np.pi / (2 * FALL_S)
    np.testing.assert_allclose(beats["contraction_velocity_um_s"], up, rtol=0.08)
    np.testing.assert_allclose(beats["relaxation_velocity_um_s"], down, rtol=0.08)


def test_velocity_filter_longer_than_the_upstroke_is_not_resolved():
    # 100 fps, a 68 ms half-cosine rise: its 10-90 % upstroke lasts 40 ms (4 frames, resolved
    # by the frame count) but a 7-frame Savitzky-Golay window spans 60 ms and halves the peak
    # slope; given that span, the contraction velocity is not reported
    fps, rise_s = 100, 0.068
    t, y, _ = smooth_recording(fps, rise_s=rise_s)
    vel = savgol_velocity(y, fps, 7)
    peaks = detect_beats(y, t)
    unaware = measure_beats(y, t, peaks, velocity=vel)
    aware = measure_beats(y, t, peaks, velocity=vel, velocity_window_s=6 / fps)
    truth = AMPLITUDE_UM * np.pi / (2 * rise_s)  # closed form, as above
    assert unaware["velocity_resolved"].all()
    assert (unaware["contraction_velocity_um_s"] < 0.8 * truth).all()
    assert not aware["velocity_resolved"].any()
    assert aware["contraction_velocity_um_s"].isna().all()
    # the slower downstroke stays resolved
    np.testing.assert_allclose(
        aware["relaxation_velocity_um_s"], AMPLITUDE_UM * np.pi / (2 * FALL_S), rtol=0.08
    )


def test_peak_value_is_the_curve_top_at_10_fps():
    # issue 8: at 10 fps the peak markers sat below the curve top (0.223 against peak_um 0.245)
    # because they were drawn on straight lines between frames. The maximum of this beat is A
    # (closed form); peak_um is the top of the interpolated curve, which at 10 fps (1.5
    # frames per rise) misses A by -3 to +5 % (measured), while the straight line between
    # frames passes below it
    fps = 10
    t, y, _ = smooth_recording(fps)
    beats = measure_beats(y, t, detect_beats(y, t))
    np.testing.assert_allclose(beats["peak_um"], AMPLITUDE_UM, rtol=0.06)
    polyline = np.interp(beats["peak_s"], t, y)
    assert (beats["peak_um"] >= polyline - 1e-12).all()
    assert (beats["peak_um"] - polyline).max() > 0.01 * AMPLITUDE_UM
