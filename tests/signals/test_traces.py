import numpy as np
import pytest

from beatlab.signals.traces import opd_change_trace, velocity_trace


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


def test_opd_change_quadrature_and_floor():
    ms = np.array([4.0, 4.0 + 9.0, 3.0])
    out = opd_change_trace(ms, 4.0)
    np.testing.assert_allclose(out, [0.0, 3.0, 0.0])
