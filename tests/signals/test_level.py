import numpy as np
import pytest

from beatlab.signals.level import PlaneLeveller


def _scene(rng, ny=64, nx=80):
    from scipy import ndimage

    return ndimage.gaussian_filter(rng.normal(0, 1, (ny, nx)), 3) * 400 + 150


def test_offset_and_tilt_removed_exactly():
    rng = np.random.default_rng(0)
    template = _scene(rng)
    y, x = np.mgrid[:64, :80]
    frame = template + 7.5 + 0.05 * x - 0.08 * y
    out = PlaneLeveller(template).level(frame)
    np.testing.assert_allclose(out, template, atol=1e-3)


def test_robust_to_a_moving_patch():
    rng = np.random.default_rng(1)
    template = _scene(rng)
    frame = template + 3.0 + rng.normal(0, 0.5, template.shape)
    frame[10:30, 10:30] += 80.0  # a contracting cluster: not part of the offset
    out = PlaneLeveller(template).level(frame)
    resid = out - template
    resid[10:30, 10:30] = 0
    assert abs(np.median(resid)) < 0.1


def test_offset_only_and_nan():
    rng = np.random.default_rng(2)
    template = _scene(rng)
    _y, x = np.mgrid[:64, :80]
    frame = template + 5 + 0.05 * x
    frame[0, 0] = np.nan
    out = PlaneLeveller(template, tilt=False).level(frame)
    assert np.isnan(out[0, 0])
    # only the offset goes: the tilt stays
    assert np.nanmean(out - template) == pytest.approx(0.0, abs=0.05)
    assert np.nanstd(out - template) > 0.5
