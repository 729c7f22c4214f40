"""The fine grid of beat landmarks: the not-a-knot cubic spline against scipy (L)."""

import numpy as np
import pytest
from scipy.interpolate import CubicSpline

from beatlab.beats._grid import not_a_knot_spline, upsample


@pytest.mark.parametrize("n", [4, 5, 6, 11, 400])
def test_not_a_knot_spline_is_scipy_cubic_spline(n):
    """scipy.interpolate.CubicSpline (default bc_type "not-a-knot"), the reference."""
    rng = np.random.default_rng(n)
    x = np.cumsum(rng.uniform(0.2, 2.0, n))  # uneven intervals
    y = np.stack([rng.normal(size=n), np.sin(x), x**3])  # a cubic is reproduced exactly
    at = np.concatenate([np.linspace(x[0], x[-1], 7 * n), x])
    expected = np.stack([CubicSpline(x, row)(at) for row in y])
    found = not_a_knot_spline(x, y, at)
    np.testing.assert_allclose(found, expected, rtol=0, atol=1e-12 * np.abs(expected).max())
    np.testing.assert_allclose(found[2], at**3, rtol=1e-9)
    np.testing.assert_allclose(not_a_knot_spline(x, y, x), y, atol=1e-12 * np.abs(y).max())
    with pytest.raises(ValueError, match="at least 4"):
        not_a_knot_spline(x[:3], y[:, :3], at)


def test_upsample_keeps_every_sample_and_interpolates_between():
    times = np.arange(10) * 0.02
    curve = np.sin(times * 20)
    fine, up = upsample(times, 5, curve)
    assert fine.size == 46 and up.shape == (46,)
    np.testing.assert_allclose(fine[::5], times)
    np.testing.assert_allclose(up[::5], curve, atol=1e-14)
    np.testing.assert_allclose(up, CubicSpline(times, curve)(fine), atol=1e-12)
    assert upsample(times, 1, curve)[1] is curve
