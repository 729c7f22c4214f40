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


def test_a_large_frame_is_fitted_on_a_bounded_subsample_with_the_same_precision():
    # 512 x 512 with 1 nm white noise: the fit uses ~1/4 of the pixels of step 2, and the
    # offset still comes out within 0.05 nm (its standard error is ~1 nm / sqrt(16384))
    rng = np.random.default_rng(2)
    template = np.zeros((512, 512), np.float32)
    x = np.mgrid[:512, :512][1]
    frame = template + 4.0 + 0.002 * x + rng.normal(0, 1.0, template.shape)
    frame[100:200, 100:200] += 60.0  # moving cells: not part of the plane
    leveller = PlaneLeveller(template, max_pixels=16384)
    assert leveller._idx.size <= 16384 + 512
    out = leveller.level(frame)
    background = np.ones(out.shape, bool)
    background[100:200, 100:200] = False
    assert abs(float(np.mean(out[background]))) < 0.05
    fine = PlaneLeveller(template, max_pixels=10**7).fit(frame)
    np.testing.assert_allclose(leveller.fit(frame), fine, atol=0.05)


def test_a_stack_is_levelled_exactly_as_frame_by_frame():
    rng = np.random.default_rng(3)
    template = _scene(rng)
    y, x = np.mgrid[:64, :80]
    stack = np.stack(
        [template + k + 0.03 * k * x - 0.02 * y + rng.normal(0, 0.5, template.shape)
         for k in range(6)]
    ).astype(np.float32)  # fmt: skip
    stack[2, 10:30, 10:30] += 80.0  # moving cells in one frame
    stack[4] = template  # an exact copy: zero residual scale, the plain fit
    leveller = PlaneLeveller(template)
    one_by_one = np.stack([leveller.level(f) for f in stack])
    np.testing.assert_allclose(leveller.level_stack(stack), one_by_one, atol=1e-4)
    stack[5, 4, 4] = np.nan  # a NaN at a fitted pixel: frame by frame, same result
    np.testing.assert_allclose(leveller.level_stack(stack)[:5], one_by_one[:5], atol=1e-4)
    # the planes of a stack are made with the float32 operations of one frame's, bit for bit
    for tilt in (True, False):
        leveller = PlaneLeveller(template, tilt=tilt)
        planes = [np.broadcast_to(leveller._plane(c), template.shape)
                  for c in leveller.fit_stack(stack[:5])]  # fmt: skip
        np.testing.assert_array_equal(leveller.level_stack(stack[:5]), stack[:5] - planes)
    assert leveller.level_stack(stack[:0]).shape == (0, *template.shape)


def _tukey_numpy(a, d):
    """The numpy formulation the compiled fit replaced (beatlab 0.1, signals/level.py): OLS,
    scale = 1.4826 MAD of its residuals, three Tukey-biweight (c = 4.685) reweightings."""
    coef = np.linalg.solve(a.T @ a, (d @ a).T).T
    r = d - coef @ a.T
    scale = 1.4826 * np.median(np.abs(r - np.median(r, axis=1)[:, None]), axis=1)
    for t in np.flatnonzero(scale > 0):
        c = coef[t]
        for _ in range(3):
            w = np.clip(1.0 - ((d[t] - a @ c) / (4.685 * scale[t])) ** 2, 0.0, None) ** 2
            c = np.linalg.solve(a.T @ (w[:, None] * a), a.T @ (w * d[t]))
        coef[t] = c
    return coef


@pytest.mark.parametrize("k", [1, 3])
@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_compiled_tukey_fit_is_the_numpy_formulation(k, dtype):
    from beatlab.signals._level_kernel import tukey_rows

    rng = np.random.default_rng(k)
    p = 999  # odd: one middle value; the MAD median of 998 is also covered below
    a = np.column_stack([np.ones(p), rng.uniform(-0.5, 0.5, (p, 2))])[:, :k]
    d = rng.normal(0, 1, (6, p)) + (a @ rng.normal(0, 5, (k, 6))).T
    d[1, :50] += 60.0  # moving cells: outliers the biweight rejects
    d[2] = 7.0  # no spread: the plain least-squares fit
    d = d.astype(dtype)
    for rows in (d, d[:, 1:]):
        a_used = a if rows.shape[1] == p else a[1:]
        got = tukey_rows(a_used, rows)
        want = _tukey_numpy(a_used, rows.astype(np.float64))
        np.testing.assert_allclose(got, want, rtol=1e-9, atol=1e-9)
    # the biweight rejects the outliers: frame 1 fits as without them, within the noise
    clean = d[1:2].astype(np.float64)
    clean[0, :50] -= 60.0
    np.testing.assert_allclose(tukey_rows(a, d[1:2]), tukey_rows(a, clean), atol=0.15)


def test_compiled_tukey_fit_of_a_singular_design_is_minimum_norm():
    # reference library: numpy.linalg.lstsq gives the minimum-norm least-squares solution
    from beatlab.signals._level_kernel import tukey_rows

    a = np.column_stack([np.ones(50), np.ones(50)])  # two identical columns
    d = np.full((1, 50), 4.0)
    np.testing.assert_allclose(tukey_rows(a, d), [[2.0, 2.0]], atol=1e-9)


@pytest.mark.parametrize("n", [1, 2, 3, 8, 7396, 7397])
def test_row_medians_are_numpy_medians(n):
    # reference library: numpy.median along rows, bit for bit (ties included)
    from beatlab.signals._level_kernel import _row_medians

    x = np.random.default_rng(n).normal(0, 1, (4, n))
    x[1] = np.round(x[1], 1)  # many ties
    np.testing.assert_array_equal(_row_medians(x), np.median(x, axis=1))
