"""Sub-frame peak timing on asymmetric beats whose peak time is known in closed form.

The shapes are built here, each with its maximum found analytically (the source of each
truth is named beside the shape); none is the shape the code was tuned on. Beats repeat every
0.8137 s, a period incommensurate with the frame intervals, so the beats of one trace sample
their peak at many different phases of the frame clock. Noise is zero-mean white noise of SD
amplitude / snr. The check is on the median signed error over the beats: a bias, not the
scatter.
"""

import numpy as np
import pytest

from beatlab.beats import detect_beats, measure_beats
from beatlab.errors import InputError

AMPLITUDE_UM = 0.6
PERIOD_S = 0.8137


def cosine_rise_exponential_decay(x, rise_s=0.15, tau_s=0.12):
    """Half-cosine rise into an exponential decay: the slope jumps from 0 to -1/tau at the top.

    Peak at x = rise_s: the rise is increasing on (0, rise_s), the decay decreasing after it.
    """
    up = 0.5 * (1 - np.cos(np.pi * np.clip(x / rise_s, 0, 1)))
    down = np.exp(-np.clip(x - rise_s, 0, None) / tau_s)
    return np.where(x < 0, 0.0, np.where(x <= rise_s, up, down)), rise_s


def linear_rise_exponential_decay(x, rise_s=0.1, tau_s=0.1):
    """A cusp: straight rise, exponential decay; both slopes non-zero at the peak x = rise_s."""
    up = np.clip(x / rise_s, 0, 1)
    down = np.exp(-np.clip(x - rise_s, 0, None) / tau_s)
    return np.where(x < 0, 0.0, np.where(x <= rise_s, up, down)), rise_s


def gamma_variate(x, peak_s=0.09, k=2.5):
    """u^k exp(k (1 - u)), u = x / peak_s: d/du log = k / u - k = 0 at u = 1 (x = peak_s)."""
    u = np.clip(x, 0, None) / peak_s
    return np.where(x < 0, 0.0, u**k * np.exp(k * (1 - u))), peak_s


def biexponential(x, tau_rise_s=0.04, tau_decay_s=0.15):
    """exp(-x / td) - exp(-x / tr), maximal where its derivative vanishes:
    x = ln(td / tr) tr td / (td - tr)."""
    tr, td = tau_rise_s, tau_decay_s
    peak = np.log(td / tr) * tr * td / (td - tr)
    top = np.exp(-peak / td) - np.exp(-peak / tr)
    xx = np.clip(x, 0, None)
    return np.where(x < 0, 0.0, (np.exp(-xx / td) - np.exp(-xx / tr)) / top), peak


def lognormal_pulse(x, peak_s=0.12, s=0.35):
    """exp(-ln(x / peak_s)^2 / (2 s^2)): d/dx log = -ln(x / peak_s) / (s^2 x) = 0 at peak_s."""
    xx = np.clip(x, 1e-9, None)
    return np.where(x <= 0, 0.0, np.exp(-(np.log(xx / peak_s) ** 2) / (2 * s**2))), peak_s


SHAPES = {
    "cosine_rise_exponential_decay": cosine_rise_exponential_decay,
    "linear_rise_exponential_decay": linear_rise_exponential_decay,
    "gamma_variate": gamma_variate,
    "biexponential": biexponential,
    "lognormal_pulse": lognormal_pulse,
}


def peak_errors_ms(shape, fps, snr, *, seed=0, duration_s=10.0):
    """Signed errors of peak_s (ms) over the beats of two traces with shifted frame clocks."""
    rng = np.random.default_rng(seed)
    errors = []
    for offset in (0.3, 0.3 + 0.37 / fps):
        t = np.arange(round(duration_s * fps)) / fps
        starts = offset + np.arange(int(duration_s / PERIOD_S)) * PERIOD_S
        starts = starts[starts + 0.7 < duration_s]
        y = np.zeros_like(t)
        truth = []
        for start in starts:
            beat, peak = SHAPES[shape](t - start)
            y += AMPLITUDE_UM * beat
            truth.append(start + peak)
        if snr is not None:
            y = y + rng.normal(0.0, AMPLITUDE_UM / snr, t.size)
        beats = measure_beats(y, t, detect_beats(y, t))
        assert len(beats) == len(truth), (shape, fps, snr)
        errors.append((beats["peak_s"].to_numpy() - np.array(truth)) * 1e3)
    return np.concatenate(errors)


def tolerance_ms(fps):
    """Half a frame interval or 3 ms, whichever is larger."""
    return max(500.0 / fps, 3.0)


@pytest.mark.parametrize("fps", [15, 30, 50, 100])
@pytest.mark.parametrize("snr", [None, 100])
@pytest.mark.parametrize("shape", sorted(SHAPES))
def test_peak_time_unbiased_on_asymmetric_peaks(shape, fps, snr):
    errors = peak_errors_ms(shape, fps, snr, seed=fps)
    # truth: the closed-form maximum of each shape (see its docstring)
    assert abs(np.median(errors)) <= tolerance_ms(fps), np.median(errors)


@pytest.mark.parametrize("fps", [15, 30, 50])
@pytest.mark.parametrize("shape", sorted(SHAPES))
def test_peak_time_unbiased_at_snr_30(shape, fps):
    errors = peak_errors_ms(shape, fps, 30, seed=fps + 1)
    # truth: the closed-form maximum of each shape (see its docstring)
    assert abs(np.median(errors)) <= tolerance_ms(fps), np.median(errors)


@pytest.mark.parametrize("shape", ["linear_rise_exponential_decay", "gamma_variate",
                                   "biexponential", "lognormal_pulse"])  # fmt: skip
def test_peak_time_unbiased_at_snr_30_and_100_fps(shape):
    errors = peak_errors_ms(shape, 100, 30, seed=3)
    # truth: the closed-form maximum of each shape (see its docstring)
    assert abs(np.median(errors)) <= tolerance_ms(100), np.median(errors)


def test_peak_of_a_flat_topped_kink_hidden_in_noise_stays_within_a_frame():
    # A rise that ends with zero slope into an exponential decay, at SNR 30 and 100 fps: the
    # last 17 ms of the rise lie within one noise SD of the top, and a plain cubic and the
    # kink model fit the top frames equally well (their residuals differ by ~3 noise
    # variances), so the turn is not identifiable and the smoothed estimate stands; it reads
    # early by about the smoothing bandwidth (measured -8 to -9 ms, 0.9 frame). This records
    # that limit: within one frame, and early.
    errors = peak_errors_ms("cosine_rise_exponential_decay", 100, 30, seed=5)
    # truth: the closed-form maximum, x = rise_s
    assert -10.0 <= np.median(errors) <= 0.0, np.median(errors)


def test_spline_peak_model_is_biased_on_a_kink():
    # the check above can fail: without the kink model the same noise-free beats at 100 fps
    # read their peak ~9 ms early (the smoothing rounds the turn towards the flat side)
    t = np.arange(1000) / 100.0
    starts = 0.3 + np.arange(12) * PERIOD_S
    beat = [cosine_rise_exponential_decay(t - s) for s in starts]
    y = AMPLITUDE_UM * sum(b[0] for b in beat)
    truth = starts + 0.15
    peaks = detect_beats(y, t)
    spline = measure_beats(y, t, peaks, peak_model="spline")["peak_s"].to_numpy()
    kink = measure_beats(y, t, peaks)["peak_s"].to_numpy()
    # truth: the closed-form maximum, x = rise_s
    assert np.median(spline - truth) < -0.006
    assert abs(np.median(kink - truth)) <= 0.003


def test_unknown_peak_model():
    t = np.arange(300) / 50.0
    y, _ = gamma_variate(t - 1.0)
    with pytest.raises(InputError, match="peak_model must be one of"):
        measure_beats(y, t, detect_beats(y, t), peak_model="quartic")
