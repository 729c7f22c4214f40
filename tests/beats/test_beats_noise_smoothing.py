import numpy as np
import pytest

from beatlab.beats import (
    NOISE_METHODS,
    estimate_beat_baselines,
    estimate_noise,
    noise_gain,
    smooth_gaussian,
    smooth_local_quadratic,
)
from beatlab.errors import InputError


@pytest.mark.parametrize("method", sorted(NOISE_METHODS))
def test_noise_sd_of_white_noise(method):
    rng = np.random.default_rng(11)
    noise = 0.3 + rng.normal(0.0, 0.05, 5000)
    assert estimate_noise(noise, method=method) == pytest.approx(0.05, rel=0.06)


@pytest.mark.parametrize("method", sorted(NOISE_METHODS))
def test_noise_of_flat_trace_is_zero(method):
    assert estimate_noise(np.full(100, 0.02), method=method) == 0.0


def test_robust_noise_ignores_dense_beats():
    # 90 bpm narrow beats at 30 fps on a noise floor of SD 0.01: the floor sets the estimate
    rng = np.random.default_rng(3)
    t = np.arange(600) / 30.0
    y = 0.02 + np.exp(-0.5 * ((t % (2 / 3) - 0.3) / 0.05) ** 2) + rng.normal(0, 0.01, t.size)
    assert estimate_noise(y, method="robust") == pytest.approx(0.01, rel=0.4)
    assert estimate_noise(y, method="mad_diff") > 1.5 * estimate_noise(y, method="robust")


def test_noise_errors():
    with pytest.raises(InputError, match="method"):
        estimate_noise(np.zeros(10), method="nope")
    with pytest.raises(InputError, match="at least 3"):
        estimate_noise([1.0, 2.0])
    with pytest.raises(InputError, match="NaN"):
        estimate_noise([1.0, np.nan, 2.0, 3.0])
    with pytest.raises(InputError, match="1-D"):
        estimate_noise(np.zeros((3, 3)))


@pytest.mark.parametrize("uneven", [False, True])
def test_local_quadratic_reproduces_a_quadratic(uneven):
    rng = np.random.default_rng(0)
    steps = rng.uniform(0.5, 1.5, 200) / 50.0 if uneven else np.full(200, 1 / 50.0)
    t = np.cumsum(steps)
    y = 1.0 + 2 * t - 0.5 * t**2
    fitted, slope = smooth_local_quadratic(y, t, bandwidth_s=0.04)
    np.testing.assert_allclose(fitted, y, atol=1e-9)
    np.testing.assert_allclose(slope, 2 - t, atol=1e-7)


def test_local_quadratic_value_exact_for_cubic_inside_even_sampling():
    t = np.arange(200) / 50.0
    y = 1.0 + 2 * t - 0.5 * t**2 + 0.1 * t**3
    fitted, _ = smooth_local_quadratic(y, t, bandwidth_s=0.04)
    np.testing.assert_allclose(fitted[10:-10], y[10:-10], atol=1e-5)  # a bias would be ~1e-3


def test_zero_bandwidth_is_identity_and_inputs_untouched():
    t = np.arange(50) / 20.0
    y = np.sin(t)
    kept = y.copy()
    fitted, slope = smooth_local_quadratic(y, t, bandwidth_s=0.0)
    np.testing.assert_array_equal(fitted, y)
    np.testing.assert_allclose(slope, np.gradient(y, t))
    np.testing.assert_array_equal(smooth_gaussian(y, t, bandwidth_s=0.0), y)
    np.testing.assert_array_equal(y, kept)


@pytest.mark.parametrize("fps", [15, 50, 100])
@pytest.mark.parametrize("kind", ["local_quadratic", "gaussian"])
def test_noise_gain_matches_simulation(fps, kind):
    rng = np.random.default_rng(fps)
    t = np.arange(6000) / fps
    noise = rng.normal(0, 1, t.size)
    smoother = smooth_gaussian if kind == "gaussian" else smooth_local_quadratic
    out = smoother(noise, t, bandwidth_s=0.04)
    out = out if kind == "gaussian" else out[0]
    gain = noise_gain(1 / fps, bandwidth_s=0.04, kind=kind)
    assert np.std(out[50:-50]) == pytest.approx(gain, rel=0.05)


def test_times_are_checked():
    with pytest.raises(InputError, match="increase"):
        smooth_gaussian([1, 2, 3], [0.0, 0.2, 0.1], bandwidth_s=0.1)
    with pytest.raises(InputError, match="one time per"):
        smooth_gaussian([1, 2, 3], [0.0, 0.1], bandwidth_s=0.1)
    with pytest.raises(InputError, match="bandwidth_s"):
        smooth_gaussian([1, 2, 3], [0.0, 0.1, 0.2], bandwidth_s=-1)


def test_baseline_is_window_median_at_lowest_point():
    t = np.arange(100) / 100.0
    y = np.ones(100)
    y[40:51] = [0.5, 0.4, 0.3, 0.2, 0.1, 0.0, 0.1, 0.2, 0.3, 0.4, 0.5]
    base, low = estimate_beat_baselines(y, t, np.array([80]))
    assert low[0] == 45
    # 100 ms centred on sample 45 at 100 fps = samples 40..50; their median is 0.3
    assert base[0] == pytest.approx(0.3)
    # at 10 fps the window holds one sample: min_samples=3 widens it to the 3 samples around
    base3, _ = estimate_beat_baselines(y[::10], t[::10], np.array([8]))
    assert base3[0] == pytest.approx(np.median(y[::10][3:6]))


def test_baseline_rest_band_widens_over_the_resting_stretch():
    rng = np.random.default_rng(5)
    t = np.arange(300) / 100.0
    y = 0.02 + rng.normal(0, 0.01, t.size)
    y[250:] += 1.0
    plain, _ = estimate_beat_baselines(y, t, np.array([260]))
    wide, _ = estimate_beat_baselines(y, t, np.array([260]), rest_band=0.04)
    # the median over the whole rest is closer to the true floor than the one at the deepest dip
    assert abs(wide[0] - 0.02) < 0.003
    assert plain[0] < wide[0]
