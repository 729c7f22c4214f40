"""The compiled per-frame kernels give the numbers of the numpy expressions they replace.

Reference: numpy itself (the formulations the kernels replaced, written out here), compared
bit for bit: the kernels exist for speed only and must not change any analysis.
"""

import numpy as np
import pytest

from beatlab.signals._cubic_warp import (
    gauss_newton_update,
    residual_products,
    spline_coefficients,
    warp_cubic,
)
from beatlab.signals._frame_kernels import (
    gather_frame,
    grey_and_uint8,
    project_cells,
    subtract_pair,
)
from beatlab.signals._level_kernel import subtract_plane


def _numpy_grey_u8(image, scale):
    lo, hi = scale
    grey = ((image.astype(np.float32) - np.float32(lo)) * np.float32(255.0 / (hi - lo))).astype(
        np.float32
    )
    finite = np.isfinite(grey)
    u8 = np.clip(np.rint(np.where(finite, grey, 128)), 0, 255).astype(np.uint8)
    clipped = int(np.count_nonzero((grey < -0.5) | (grey > 255.5)))
    return grey, u8, int(finite.sum()), clipped


@pytest.mark.parametrize("seed", range(4))
def test_grey_and_uint8_is_the_numpy_mapping(seed):
    rng = np.random.default_rng(seed)
    image = rng.normal(100, 80, (61, 83)).astype(np.float32)
    image[rng.random(image.shape) < 0.02] = np.nan
    image[0, :4] = [np.inf, -np.inf, 0.5, 1.5]  # infinities; exact half grey levels below
    scale = (0.0, 255.0) if seed == 0 else tuple(sorted(rng.uniform(-50, 300, 2)))
    got, want = grey_and_uint8(image, scale), _numpy_grey_u8(image, scale)
    np.testing.assert_array_equal(got[0], want[0])
    np.testing.assert_array_equal(got[1], want[1])
    assert got[2:] == want[2:]
    if seed == 0:  # round half to even, as np.rint: 0.5 -> 0, 1.5 -> 2
        assert list(got[1][0, 2:4]) == [0, 2]


def test_subtract_plane_is_the_numpy_plane():
    rng = np.random.default_rng(5)
    y, x = (g.astype(np.float32) / 50 for g in np.mgrid[:40, :50])
    frame = rng.normal(0, 30, (40, 50)).astype(np.float32)
    coef = rng.normal(0, 10, 3)
    plane = np.float32(coef[0]) + np.float32(coef[1]) * x + np.float32(coef[2]) * y
    np.testing.assert_array_equal(subtract_plane(frame, coef, x, y), frame - plane)


def test_gather_frame_is_fancy_indexing_with_non_finite_as_zero():
    rng = np.random.default_rng(6)
    field = rng.normal(0, 1, (30, 40, 2)).astype(np.float32)
    image = rng.normal(0, 1, (30, 40)).astype(np.float32)
    field[3, 5] = [np.nan, np.inf]
    image[7, 9] = -np.inf
    pixels = np.flatnonzero(rng.random(1200) < 0.4)
    mask = np.flatnonzero(rng.random(1200) < 0.2)
    f, d, finite = gather_frame(field, image, pixels, mask)
    want_f = np.nan_to_num(field.reshape(-1, 2)[pixels], nan=0.0, posinf=0.0, neginf=0.0)
    np.testing.assert_array_equal(f, want_f)
    np.testing.assert_array_equal(d, np.nan_to_num(image.ravel()[pixels], posinf=0, neginf=0))
    assert finite
    field[:] = np.nan  # nothing finite in the mask
    assert not gather_frame(field, image, pixels, mask)[2]


def test_project_cells_is_bincount_of_the_products():
    rng = np.random.default_rng(7)
    m, n_cells = 5000, 37
    f = rng.normal(0, 1, (m, 2)).astype(np.float32)
    d = rng.normal(0, 1, m).astype(np.float32)
    fp, dp = rng.normal(0, 1, (m, 2)), rng.normal(0, 1, m)
    cell = rng.integers(0, n_cells - 1, m)  # the last cell stays empty
    field_dot, opd_dot = project_cells(f, d, fp, dp, cell, n_cells)
    np.testing.assert_array_equal(
        field_dot, np.bincount(cell, weights=(f * fp).sum(axis=1), minlength=n_cells)
    )
    np.testing.assert_array_equal(opd_dot, np.bincount(cell, weights=d * dp, minlength=n_cells))
    assert field_dot[-1] == 0.0


def test_residual_products_of_a_part_are_that_part_of_the_whole():
    """With an origin, the products over a part of the image are those of the whole image
    at that part, bit for bit; a part that does not fit is refused."""
    rng = np.random.default_rng(3)
    ref = rng.normal(100, 20, (40, 50)).astype(np.float32)
    coeffs = spline_coefficients(rng.normal(100, 20, (40, 50)).astype(np.float32))
    flow = rng.normal(0, 1.5, (40, 50, 2)).astype(np.float32)
    basis = rng.normal(0, 1, (4, 40, 50)).astype(np.float32)
    whole = residual_products(coeffs, flow, ref, basis, np.empty_like(basis))
    rows, cols = slice(7, 31), slice(12, 47)
    part = residual_products(
        coeffs, np.ascontiguousarray(flow[rows, cols]), np.ascontiguousarray(ref[rows, cols]),
        np.ascontiguousarray(basis[:, rows, cols]), np.empty((4, 24, 35), np.float32),
        origin=(7, 12),
    )  # fmt: skip
    np.testing.assert_array_equal(part, whole[:, rows, cols])
    with pytest.raises(ValueError, match="does not fit"):
        residual_products(
            coeffs, np.ascontiguousarray(flow[rows, cols]), np.ascontiguousarray(ref[rows, cols]),
            np.ascontiguousarray(basis[:, rows, cols]), np.empty((4, 24, 35), np.float32),
            origin=(20, 12),
        )  # fmt: skip


def test_residual_products_and_update_are_the_numpy_step():
    rng = np.random.default_rng(8)
    ref = rng.normal(100, 20, (48, 56)).astype(np.float32)
    moving = rng.normal(100, 20, (48, 56)).astype(np.float32)
    flow = rng.normal(0, 0.8, (48, 56, 2)).astype(np.float32)
    flow[2, 3] = np.nan
    basis = rng.normal(0, 1, (4, 48, 56)).astype(np.float32)
    coeffs = spline_coefficients(moving)
    error = warp_cubic(coeffs, flow) - ref
    got = residual_products(coeffs, flow, ref, basis, np.empty_like(basis))
    np.testing.assert_array_equal(got, np.stack([b * error for b in basis]))
    rows = rng.normal(0, 1, (2, 4, 48, 56)).astype(np.float32)
    rhs = rng.normal(0, 1, (4, 48, 56)).astype(np.float32)
    want = flow.copy()
    for comp in (0, 1):
        step = rows[comp, 0] * rhs[0]
        for j in range(1, 4):
            step += rows[comp, j] * rhs[j]
        want[..., comp] -= step
    np.testing.assert_array_equal(gauss_newton_update(rows, rhs, flow.copy()), want)
    with pytest.raises(ValueError, match="shapes do not match"):
        gauss_newton_update(rows, rhs[:3], flow)


def test_subtract_pair_is_numpys_broadcast_subtraction():
    rng = np.random.default_rng(9)
    field = rng.normal(0, 2, (30, 40, 2)).astype(np.float32)
    field[3, 4, 1] = np.nan
    pair = np.array([0.37, -1.25])
    want = field - pair.astype(np.float32)
    got = field.copy()
    subtract_pair(got, pair)
    np.testing.assert_array_equal(got, want)
    strided = np.asfortranarray(field)  # not C-contiguous: numpy's own subtraction
    subtract_pair(strided, pair)
    np.testing.assert_array_equal(strided, want)
