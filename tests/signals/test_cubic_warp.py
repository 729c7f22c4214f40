"""The compiled cubic B-spline warp against scipy.ndimage.map_coordinates (order 3).

Reference library (L): ``scipy.ndimage.map_coordinates(..., order=3)`` evaluates the same
cubic B-spline interpolant; away from the frame's border (where the two extend the image
differently) the values must agree to float32 rounding.
"""

import numpy as np
import pytest
from scipy import ndimage as ndi

from beatlab.signals._cubic_warp import PAD_PX, spline_coefficients, warp_cubic


def _scene(shape=(48, 56), seed=0):
    rng = np.random.default_rng(seed)
    image = ndi.gaussian_filter(rng.normal(size=shape), 1.2) * 40.0 + 100.0
    flow = np.stack(
        [ndi.gaussian_filter(rng.normal(size=shape), 6.0) * 25.0 for _ in range(2)], axis=-1
    ).astype(np.float32)
    return image, flow


def _scipy(image, flow):
    ny, nx = image.shape
    rows, cols = np.mgrid[0:ny, 0:nx].astype(np.float64)
    coeffs = ndi.spline_filter(image, order=3, mode="nearest")
    return ndi.map_coordinates(
        coeffs, [rows + flow[..., 1], cols + flow[..., 0]], order=3, mode="nearest",
        prefilter=False,
    )  # fmt: skip


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_matches_scipy_away_from_the_border(seed):
    image, flow = _scene(seed=seed)
    assert np.abs(flow).max() > 1.0  # displacements of more than a pixel are exercised
    ours = warp_cubic(spline_coefficients(image), flow)
    ref = _scipy(image, flow)
    ny, nx = image.shape
    rows, cols = np.mgrid[0:ny, 0:nx]
    y, x = rows + flow[..., 1], cols + flow[..., 0]
    inner = (y >= 6) & (y <= ny - 7) & (x >= 6) & (x <= nx - 7)  # sampled 6 px inside or more
    assert inner.mean() > 0.5
    np.testing.assert_allclose(ours[inner], ref[inner], atol=1e-3, rtol=0)


def test_zero_flow_returns_the_image_and_integer_shifts_move_it():
    image, _ = _scene()
    coeffs = spline_coefficients(image)
    zero = np.zeros((*image.shape, 2), np.float32)
    np.testing.assert_allclose(warp_cubic(coeffs, zero), image, atol=2e-3)
    shift = zero.copy()
    shift[..., 0] = 2.0  # sample 2 px to the right: out(r, c) = image(r, c + 2)
    np.testing.assert_allclose(warp_cubic(coeffs, shift)[:, :-2], image[:, 2:], atol=2e-3)


def test_far_outside_positions_read_the_edge_and_nan_gives_nan():
    image, _ = _scene()
    coeffs = spline_coefficients(image)
    flow = np.zeros((*image.shape, 2), np.float32)
    flow[..., 1] = -1e6  # far above the frame: the top row (edge extension), no crash
    flow[0, 0, 0] = np.nan
    out = warp_cubic(coeffs, flow)
    assert np.isnan(out[0, 0])
    np.testing.assert_allclose(out[1:, 0], np.full(image.shape[0] - 1, image[0, 0]), atol=2e-3)
    assert coeffs.shape == (image.shape[0] + 2 * PAD_PX, image.shape[1] + 2 * PAD_PX)


def test_wrong_flow_shape_is_refused():
    image, flow = _scene()
    with pytest.raises(ValueError, match="flow must have shape"):
        warp_cubic(spline_coefficients(image), flow[:-1])


def test_prepare_warp_compiles_in_this_process():
    from beatlab.signals._cubic_warp import _warp, prepare_warp

    prepare_warp()
    assert _warp.signatures  # compiled here: forked workers inherit it


@pytest.mark.parametrize(
    ("shape", "scale"), [((47, 53), 1.0), ((9, 130), 1e3), ((1, 1), 1.0), ((64, 3), 1e-3)]
)
def test_spline_coefficients_are_scipys_bit_for_bit(shape, scale):
    # reference library: scipy.ndimage.spline_filter (order 3, mode "nearest") of the
    # edge-padded image, cast to float32; the compiled filter must give the same numbers
    rng = np.random.default_rng(11)
    image = (scale * (100.0 + 50.0 * rng.standard_normal(shape))).astype(np.float32)
    padded = np.pad(image.astype(np.float64), PAD_PX, mode="edge")
    want = ndi.spline_filter(padded, order=3, mode="nearest").astype(np.float32)
    got = spline_coefficients(image)
    assert got.dtype == np.float32 and got.shape == want.shape
    np.testing.assert_array_equal(got, want)
    # and of a float64 image (the refinement passes float32; callers may pass either)
    np.testing.assert_array_equal(spline_coefficients(image.astype(np.float64)), want)
