import numpy as np
import pytest

from beatlab.signals.traces import savgol_derivative, velocity_trace, velocity_window_frames


@pytest.mark.parametrize("fps", [15.0, 30.0, 100.0])
def test_velocity_of_a_smooth_trace(fps):
    t = np.arange(0, 4, 1 / fps)
    d = 0.5 * np.sin(2 * np.pi * 0.5 * t)
    v = velocity_trace(d, t, window_ms=60)
    true = 0.5 * np.pi * np.cos(2 * np.pi * 0.5 * t)
    assert np.max(np.abs(v - true)[3:-3]) < 0.02 * np.pi * 0.5


def test_velocity_sign_and_uneven_times():
    rng = np.random.default_rng(0)
    t = np.sort(rng.uniform(0, 2, 200))
    d = np.clip(t - 0.5, 0, None)  # rises at 1 um/s after 0.5 s
    v = velocity_trace(d, t, window_ms=50)
    assert np.median(v[t > 1.0]) == pytest.approx(1.0, rel=0.02)
    assert np.median(v[t < 0.3]) == pytest.approx(0.0, abs=1e-6)


def test_velocity_short_inputs():
    assert np.all(velocity_trace(np.array([1.0, 2.0]), np.array([0.0, 1.0])) == 0)
    v = velocity_trace(np.arange(5.0), np.arange(5.0), window_ms=0)
    np.testing.assert_allclose(v, 1.0)


@pytest.mark.parametrize(
    ("fps", "window_ms", "expected"),
    [(50, 60.0, 3), (100, 60.0, 7), (10, 60.0, 3), (30, 0.0, 0), (1000, 60.0, 61)],
)
def test_velocity_window_frames(fps, window_ms, expected):
    # 60 ms at 50 fps = 3 frames; at 100 fps 6 -> odd 7; at 10 fps 0.6 -> at least
    # polyorder + 1 = 3; 0 ms: central differences (0); 1000 fps: 60 -> 61 (worked by hand)
    times = np.arange(200) / fps
    assert velocity_window_frames(times, window_ms=window_ms, polyorder=2) == expected


def test_velocity_window_never_exceeds_the_recording():
    assert velocity_window_frames(np.arange(6) / 10.0, window_ms=5000.0, polyorder=2) == 5


@pytest.mark.parametrize(("window", "polyorder"), [(3, 2), (5, 2), (7, 3), (11, 2), (21, 4)])
def test_savgol_derivative_is_scipy_savgol_filter(window, polyorder):
    """Against scipy.signal.savgol_filter(deriv=1, mode="interp"), the reference (L)."""
    from scipy.signal import savgol_filter

    rng = np.random.default_rng(window)
    x = np.cumsum(rng.normal(size=120)) + np.sin(np.arange(120) / 5.0)
    for n in (window, window + 1, 120):  # the shortest input takes edge fits only
        expected = savgol_filter(x[:n], window, polyorder, deriv=1, delta=0.02, mode="interp")
        found = savgol_derivative(x[:n], window, polyorder, delta=0.02)
        np.testing.assert_allclose(found, expected, rtol=1e-12, atol=1e-12 * np.abs(x).max())


def test_savgol_derivative_refuses_what_scipy_refuses():
    x = np.arange(10.0)
    for window, polyorder in ((4, 2), (11, 2), (3, 3)):
        with pytest.raises(ValueError, match="window must be odd"):
            savgol_derivative(x, window, polyorder, delta=1.0)
    # a straight line: the slope everywhere, edges included
    np.testing.assert_allclose(savgol_derivative(3.0 * x, 5, 2, delta=0.5), 6.0, rtol=1e-12)
