"""Tests of the optical-flow displacement signal on textured OPD images warped exactly."""

from concurrent.futures import ThreadPoolExecutor

import numpy as np
import pytest
from scipy import ndimage as ndi
from skimage.registration import phase_cross_correlation

from beatlab.errors import InputError
from beatlab.signals.flow import (
    COARSE_GRIDS_PX,
    FLOW_METHODS,
    compute_flow,
    dis_finest_level,
    estimate_rigid_shift,
    flow_scale,
    mean_displacement_um,
    refine_flow,
    to_uint8,
)
from beatlab.signals.tracker import FlowTracker

N_PX = 128
BORDER_PX = 12
PIXEL_UM = 0.5


def make_opd(rng, *, contrast=1.0, n=N_PX):
    """Cell-like blobs (40-220 nm) with a smooth texture of 25 nm std times ``contrast``."""
    field = ndi.gaussian_filter(rng.standard_normal((n, n)), n / 16, mode="wrap")
    cells = 1.0 / (1.0 + np.exp(-3.0 * (field / field.std() + 0.3)))
    texture = ndi.gaussian_filter(rng.standard_normal((n, n)), 1.5, mode="wrap")
    opd = 40.0 + 180.0 * cells + contrast * cells * 25.0 * texture / texture.std()
    mask = cells > 0.5
    inner = np.zeros_like(mask)
    inner[BORDER_PX:-BORDER_PX, BORDER_PX:-BORDER_PX] = True
    return opd, mask & inner


def contraction_field(amplitude_px, *, n=N_PX):
    """Radial contraction towards the centre, largest magnitude ``amplitude_px``; (Y, X, 2)."""
    rows, cols = np.mgrid[0:n, 0:n].astype(float)
    radius = n / 5
    dy, dx = rows - n / 2, cols - n / 2
    g = np.exp(-0.5 * (dx**2 + dy**2) / radius**2)
    field = np.stack([-dx * g, -dy * g], axis=-1)
    return field * (amplitude_px / np.hypot(field[..., 0], field[..., 1]).max())


def warp_exact(image, displacement, *, shift=(0.0, 0.0), iterations=30):
    """Frame in which the template point p0 moved to p0 + d(p0) + shift (cubic spline).

    The forward map is inverted by fixed-point iteration, then the template is sampled with
    ``scipy.ndimage.map_coordinates(order=3)`` (no position quantisation).
    """
    n_y, n_x = image.shape
    rows, cols = np.mgrid[0:n_y, 0:n_x].astype(float)
    target_x, target_y = cols - shift[0], rows - shift[1]
    x0, y0 = target_x.copy(), target_y.copy()
    for _ in range(iterations):
        dx = ndi.map_coordinates(displacement[..., 0], [y0, x0], order=3, mode="nearest")
        dy = ndi.map_coordinates(displacement[..., 1], [y0, x0], order=3, mode="nearest")
        x0, y0 = target_x - dx, target_y - dy
    return ndi.map_coordinates(image, [y0, x0], order=3, mode="nearest")


def true_mean_um(displacement, mask):
    return float(np.hypot(displacement[..., 0], displacement[..., 1])[mask].mean() * PIXEL_UM)


@pytest.mark.parametrize("method", sorted(FLOW_METHODS))
@pytest.mark.parametrize("contrast", [0.25, 1.0, 2.0])
@pytest.mark.parametrize("amplitude_px", [0.1, 0.3, 1.0, 3.0])
def test_gain_within_3_percent(method, contrast, amplitude_px):
    opd, mask = make_opd(np.random.default_rng(11), contrast=contrast)
    field = contraction_field(amplitude_px)
    frame = warp_exact(opd, field)
    tracker = FlowTracker(opd, mask, pixel_size_um=PIXEL_UM, method=method)
    measured_um, _, _ = tracker.displacement(frame)
    gain = measured_um / true_mean_um(field, mask)
    assert abs(gain - 1.0) < 0.03, f"gain {gain:.4f}"


def contraction_centres(amplitude_px, *, n, radius_px, centres=9, seed=0):
    """Several contraction centres of ``radius_px``, largest magnitude ``amplitude_px``."""
    rows, cols = np.mgrid[0:n, 0:n].astype(float)
    field = np.zeros((n, n, 2))
    for cy, cx in np.random.default_rng(seed).uniform(40, n - 40, (centres, 2)):
        dy, dx = rows - cy, cols - cx
        g = np.exp(-0.5 * (dx**2 + dy**2) / radius_px**2)
        field[..., 0] -= dx * g
        field[..., 1] -= dy * g
    return field * (amplitude_px / np.hypot(field[..., 0], field[..., 1]).max())


@pytest.mark.parametrize(
    ("radius_px", "amplitude_px", "tolerance"),
    [
        # one broad field (radius 51 px): measured 0.996-1.001 on the 8 px grid at contrast
        # 0.25-2, 0.994-0.998 with the preset's 4 px grid
        (51, 0.1, 0.01),
        (51, 1.0, 0.01),
        (51, 3.0, 0.01),
        # nine centres of 13 px radius: at 1 px 0.995 (grid 8) and 0.994 (grid 4); at 3 px, a
        # 25 % local strain, 0.970 and 0.992: the coarser grid starts the refinement further
        # off where the field turns within a few grid points
        (13, 1.0, 0.01),
        (13, 3.0, 0.036),
    ],
)
def test_gain_with_the_coarse_flow_on_an_8_px_grid(radius_px, amplitude_px, tolerance):
    n = 256  # large enough for DIS's level 3 (an 8 px grid)
    assert dis_finest_level((n, n), preset="fast", grid_px=8) == 3
    opd, mask = make_opd(np.random.default_rng(11), n=n)
    if radius_px == 51:
        field = contraction_field(amplitude_px, n=n)
    else:
        field = contraction_centres(amplitude_px, n=n, radius_px=radius_px)
    frame = warp_exact(opd, field)
    tracker = FlowTracker(opd, mask, pixel_size_um=PIXEL_UM, coarse_grid_px=8)
    gain = tracker.displacement(frame)[0] / true_mean_um(field, mask)
    assert abs(gain - 1.0) < tolerance, f"gain {gain:.4f}"


@pytest.mark.parametrize(
    ("shape", "preset", "grid_px", "level"),
    [
        ((256, 256), "fast", 8, 3),  # OpenCV's coarsest level at 256 px is 3
        ((512, 512), "fast", 8, 3),
        ((512, 512), "fast", 16, 4),
        ((256, 256), "fast", 16, 3),  # capped at the coarsest level
        ((256, 320), "fast", 2, 1),  # finer than the preset's own when asked
        ((96, 96), "fast", 8, 2),  # coarsest 2: the preset's own
        ((64, 64), "fast", 8, 2),  # coarsest 1: never finer than the preset's own
        ((64, 64), "medium", 8, 1),
        ((256, 256), "fast", 0, 2),  # OpenCV's presets: fast and ultrafast 2, medium 1
        ((256, 256), "ultrafast", 0, 2),
        ((256, 256), "medium", 0, 1),
    ],
)
def test_dis_finest_level(shape, preset, grid_px, level):
    assert dis_finest_level(shape, preset=preset, grid_px=grid_px) == level


def test_coarse_grid_changes_dis_only_where_the_frame_allows_it():
    for n, differs in ((96, False), (256, True)):
        opd, _ = make_opd(np.random.default_rng(5), n=n)
        frame = warp_exact(opd, contraction_field(1.0, n=n))
        scale = flow_scale(opd)
        ref_u8, mov_u8 = to_uint8(opd, scale)[0], to_uint8(frame, scale)[0]
        coarse = compute_flow(ref_u8, mov_u8, refine_iterations=0, coarse_grid_px=8)
        own = compute_flow(ref_u8, mov_u8, refine_iterations=0, coarse_grid_px=0)
        assert (not np.array_equal(coarse, own)) is differs, n
    # Farneback estimates at every pixel: the grid changes nothing
    farneback = [
        compute_flow(ref_u8, mov_u8, method="farneback", coarse_grid_px=g) for g in (0, 8)
    ]
    np.testing.assert_array_equal(*farneback)


@pytest.mark.parametrize("grid_px", [3, -8, 128, 6.0, True])
def test_coarse_grid_must_be_a_listed_power_of_two(grid_px):
    assert grid_px not in COARSE_GRIDS_PX or isinstance(grid_px, bool)
    img = np.zeros((32, 32), np.uint8)
    with pytest.raises(InputError, match="coarse_grid_px must be one of"):
        compute_flow(img, img, coarse_grid_px=grid_px)


@pytest.mark.parametrize("contrast", [0.25, 2.0])
def test_raw_opencv_gain_is_off_so_refinement_matters(contrast):
    # Documents why the refinement exists: raw DIS (fast preset) under-reads by > 3 %.
    opd, mask = make_opd(np.random.default_rng(11), contrast=contrast)
    field = contraction_field(1.0)
    frame = warp_exact(opd, field)
    raw = FlowTracker(opd, mask, pixel_size_um=PIXEL_UM, refine_iterations=0)
    gain = raw.displacement(frame)[0] / true_mean_um(field, mask)
    assert gain < 0.97


@pytest.mark.parametrize("method", sorted(FLOW_METHODS))
@pytest.mark.parametrize("shift_px", [(0.37, -0.62), (-1.8, 2.25)])
def test_pure_shift_agrees_with_phase_cross_correlation(method, shift_px):
    opd, _ = make_opd(np.random.default_rng(3))
    frame = warp_exact(opd, np.zeros((*opd.shape, 2)), shift=shift_px)
    scale = flow_scale(opd)
    ref_u8, _ = to_uint8(opd, scale)
    mov_u8, _ = to_uint8(frame, scale)
    flow = compute_flow(ref_u8, mov_u8, method=method)
    inner = (slice(BORDER_PX, -BORDER_PX),) * 2
    ours = estimate_rigid_shift(flow[inner])
    # skimage returns the (row, col) shift that registers moving onto reference: minus ours
    ref_shift, _, _ = phase_cross_correlation(opd, frame, upsample_factor=100)
    # reference library scikit-image phase_cross_correlation (L)
    np.testing.assert_allclose(ours, -ref_shift[::-1], atol=0.05)
    np.testing.assert_allclose(ours, shift_px, atol=0.02)


@pytest.mark.parametrize("method", sorted(FLOW_METHODS))
def test_zero_motion_noise_free_gives_zero(method):
    opd, mask = make_opd(np.random.default_rng(5))
    tracker = FlowTracker(opd, mask, pixel_size_um=PIXEL_UM, method=method)
    value, shift, flow = tracker.displacement(opd.copy())
    assert value < 1e-4 * PIXEL_UM
    np.testing.assert_allclose(shift, 0.0, atol=1e-4)
    assert flow.shape == (*opd.shape, 2) and flow.dtype == np.float32


@pytest.mark.parametrize(
    ("noise_nm", "floor_px"),
    # floors measured at window 4 px: 0.011 px at 1 nm, 0.022 px at 2 nm (FlowTracker Notes)
    [(1.0, 0.015), (2.0, 0.03)],
)
def test_noise_floor_at_rest(noise_nm, floor_px):
    rng = np.random.default_rng(7)
    opd, mask = make_opd(rng)
    template = opd + rng.normal(0.0, noise_nm / np.sqrt(20), opd.shape)  # mean of 20 frames
    tracker = FlowTracker(template, mask, pixel_size_um=PIXEL_UM)
    floors = [
        tracker.displacement(opd + rng.normal(0.0, noise_nm, opd.shape))[0] / PIXEL_UM
        for _ in range(3)
    ]
    assert 0.0 < np.mean(floors) < floor_px


def test_larger_window_lowers_noise_floor():
    rng = np.random.default_rng(8)
    opd, mask = make_opd(rng)
    frame = opd + rng.normal(0.0, 2.0, opd.shape)
    narrow = FlowTracker(opd, mask, pixel_size_um=PIXEL_UM, window_px=2.0).displacement(frame)
    wide = FlowTracker(opd, mask, pixel_size_um=PIXEL_UM, window_px=6.0).displacement(frame)
    assert wide[0] < 0.7 * narrow[0]


@pytest.mark.parametrize("method", sorted(FLOW_METHODS))
def test_rigid_shift_removed(method):
    opd, mask = make_opd(np.random.default_rng(13))
    field = contraction_field(1.0)
    drift = (1.3, -0.8)
    tracker = FlowTracker(opd, mask, pixel_size_um=PIXEL_UM, method=method)
    alone, shift_alone, _ = tracker.displacement(warp_exact(opd, field))
    shifted, shift, _ = tracker.displacement(warp_exact(opd, field, shift=drift))
    assert abs(shifted / alone - 1.0) < 0.03
    np.testing.assert_allclose(shift - shift_alone, drift, atol=0.05)


def test_nan_pixels_do_not_propagate():
    opd, mask = make_opd(np.random.default_rng(17))
    field = contraction_field(1.0)
    frame = warp_exact(opd, field)
    tracker = FlowTracker(opd, mask, pixel_size_um=PIXEL_UM)
    clean, _, _ = tracker.displacement(frame)
    holed = frame.copy()
    holed[40:46, 70:78] = np.nan
    holed[90, 30] = np.nan
    value, shift, flow = tracker.displacement(holed)
    assert np.isfinite(value) and np.isfinite(shift).all()
    bad = ~np.isfinite(flow).all(axis=2)
    np.testing.assert_array_equal(bad, np.isnan(holed))
    assert abs(value / clean - 1.0) < 0.03

    template = opd.copy()
    template[20:24, 20:24] = np.nan
    tracker_nan = FlowTracker(template, mask, pixel_size_um=PIXEL_UM)
    assert not tracker_nan.mask[20:24, 20:24].any()
    value_nan = tracker_nan.displacement(frame)[0]
    assert np.isfinite(value_nan) and abs(value_nan / clean - 1.0) < 0.03


def test_all_nan_frame_gives_nan_not_crash():
    opd, mask = make_opd(np.random.default_rng(2))
    tracker = FlowTracker(opd, mask, pixel_size_um=PIXEL_UM)
    value, shift, flow = tracker.displacement(np.full(opd.shape, np.nan))
    assert np.isnan(value) and np.isnan(flow).all()
    np.testing.assert_array_equal(shift, 0.0)


@pytest.mark.parametrize("call", ["compute_flow", "tracker"])
def test_unknown_method_lists_registry(call):
    img = np.zeros((32, 32), np.uint8)
    with pytest.raises(InputError, match="'dis', 'farneback'") as info:
        if call == "compute_flow":
            compute_flow(img, img, method="lucas")
        else:
            FlowTracker(img.astype(float), img == 0, pixel_size_um=1.0, method="lucas")
    assert "lucas" in str(info.value)


def test_unknown_preset_lists_presets():
    img = np.zeros((32, 32), np.uint8)
    with pytest.raises(InputError, match="'fast', 'medium', 'ultrafast'"):
        compute_flow(img, img, preset="slow")


@pytest.mark.parametrize("method", sorted(FLOW_METHODS))
def test_constant_image_gives_zero(method):
    constant = np.full((64, 64), 150.0)
    scale = flow_scale(constant)
    assert scale == (149.0, 151.0)  # documented widening: value -/+ 1 nm
    u8, clipped = to_uint8(constant, scale)
    assert clipped == 0.0 and np.all(u8 == 128)
    np.testing.assert_array_equal(compute_flow(u8, u8, method=method), 0.0)
    tracker = FlowTracker(constant, constant > 0, pixel_size_um=PIXEL_UM, method=method)
    value, shift, flow = tracker.displacement(constant + 5.0)
    assert value == 0.0 and np.all(shift == 0.0) and np.all(flow == 0.0)


def test_flow_scale_uses_percentiles_and_mask():
    image = np.arange(10000, dtype=float).reshape(100, 100)
    lo, hi = flow_scale(image, percentiles=(1.0, 99.0))
    np.testing.assert_allclose((lo, hi), np.percentile(image, [1.0, 99.0]))  # numpy (L)
    mask = image < 5000
    assert flow_scale(image, mask=mask, percentiles=(0.0, 100.0)) == (0.0, 4999.0)
    with pytest.raises(InputError, match="percentiles"):
        flow_scale(image, percentiles=(50.0, 10.0))
    with pytest.raises(InputError, match="finite"):
        flow_scale(np.full((8, 8), np.nan))


def test_to_uint8_fixed_scale_clipping_and_nan():
    image = np.array([[-10.0, 0.0, 50.0], [100.0, 200.0, np.nan]])
    u8, clipped = to_uint8(image, (0.0, 100.0))
    np.testing.assert_array_equal(u8, [[0, 0, 128], [255, 255, 128]])
    assert clipped == pytest.approx(2 / 5)  # -10 and 200 of 5 finite pixels


def test_flicker_does_not_rescale_per_frame():
    # a frame brighter by 5 % must map with the template's scale, not its own
    opd, _ = make_opd(np.random.default_rng(1))
    scale = flow_scale(opd)
    bright, _ = to_uint8(opd * 1.05, scale)
    plain, _ = to_uint8(opd, scale)
    assert bright.astype(int).mean() > plain.astype(int).mean() + 5


def test_estimate_rigid_shift_prefers_background():
    flow = np.zeros((32, 32, 2), np.float32)
    flow[..., 0] = 2.0  # the cells all move
    background = np.zeros((32, 32), bool)
    background[:10] = True
    flow[:10] = (0.5, -0.25)  # stationary debris shows the true drift
    np.testing.assert_allclose(estimate_rigid_shift(flow, background=background), (0.5, -0.25))
    np.testing.assert_allclose(estimate_rigid_shift(flow), (2.0, 0.0))
    few = np.zeros((32, 32), bool)
    few[0, :5] = True  # too few background pixels: field median
    np.testing.assert_allclose(estimate_rigid_shift(flow, background=few), (2.0, 0.0))
    # a pixel with either component non-finite is left out of both medians
    partial = flow.copy()
    partial[:6, :, 1] = np.nan  # 192 of the 320 background pixels: their dx (0.5) goes too
    partial[10:, :, 0] = 7.0
    partial[10:16, :, 0] = np.nan  # 192 of the 704 moving pixels
    np.testing.assert_allclose(estimate_rigid_shift(partial, background=background), (0.5, -0.25))
    np.testing.assert_allclose(estimate_rigid_shift(partial), (7.0, 0.0))


def test_mean_displacement_um_subtracts_shift():
    flow = np.zeros((16, 16, 2), np.float32)
    flow[..., 0], flow[..., 1] = 4.0, 3.0
    mask = np.ones((16, 16), bool)
    assert mean_displacement_um(flow, mask, pixel_size_um=0.5) == pytest.approx(2.5)
    assert mean_displacement_um(flow, mask, pixel_size_um=0.5, rigid_shift=(4.0, 3.0)) == 0.0
    with pytest.raises(InputError, match="pixel_size_um"):
        mean_displacement_um(flow, mask, pixel_size_um=0.0)
    with pytest.raises(InputError, match="mask"):
        mean_displacement_um(flow, np.zeros((16, 16), bool), pixel_size_um=1.0)


def test_refine_flow_does_not_mutate_inputs_and_converges():
    opd, mask = make_opd(np.random.default_rng(21))
    field = contraction_field(0.5)
    frame = warp_exact(opd, field)
    start = np.zeros((*opd.shape, 2), np.float32)
    before = (opd.copy(), frame.copy(), start.copy())
    refined = refine_flow(opd, frame, start, iterations=3)
    for a, b in zip(before, (opd, frame, start), strict=True):
        np.testing.assert_array_equal(a, b)
    error = np.hypot(*(refined - field).transpose(2, 0, 1))[mask].mean()
    assert error < 0.02  # mean end-point error in px; CHECKS.md asks well below 0.2 px (L)


def test_compute_flow_rejects_float_input():
    with pytest.raises(InputError, match="uint8"):
        compute_flow(np.zeros((8, 8)), np.zeros((8, 8)))


def test_threaded_frames_match_serial():
    opd, mask = make_opd(np.random.default_rng(23))
    frames = [warp_exact(opd, contraction_field(a)) for a in (0.2, 0.8, 1.5, 2.5)]
    tracker = FlowTracker(opd, mask, pixel_size_um=PIXEL_UM)
    serial = [tracker.displacement(f)[0] for f in frames]
    with ThreadPoolExecutor(2) as pool:
        threaded = [r[0] for r in pool.map(tracker.displacement, frames)]
    assert threaded == serial
    assert serial == sorted(serial)  # larger contraction, larger displacement


def test_measure_reports_frame_clipping():
    opd, mask = make_opd(np.random.default_rng(4))
    tracker = FlowTracker(opd, mask, pixel_size_um=PIXEL_UM)
    assert 0.0 < tracker.template_clipped_fraction < 0.02  # 0.5/99.5 percentiles
    result = tracker.measure(opd + 100.0)  # far brighter than the template's range
    assert result.clipped_fraction > 0.5


def test_measure_can_skip_the_mean_magnitude():
    opd, mask = make_opd(np.random.default_rng(5))
    tracker = FlowTracker(opd, mask, pixel_size_um=PIXEL_UM)
    moved = ndi.shift(opd, (0.0, 0.5), order=3, mode="nearest")
    full = tracker.measure(moved, rigid_shift_px=np.zeros(2))
    lean = tracker.measure(moved, rigid_shift_px=np.zeros(2), mean_magnitude=False)
    # same field, no mean: a 0.5 px shift reads about 0.25 um of displacement when computed
    assert np.isnan(lean.displacement_um)
    np.testing.assert_array_equal(lean.flow_px, full.flow_px)
    assert full.displacement_um == pytest.approx(0.5 * PIXEL_UM, rel=0.1)


@pytest.mark.parametrize("shape", [(256, 256), (97, 131), (13, 17)])
@pytest.mark.parametrize("sigma", [0.5, 2.5, 4.0, 6.0])
def test_gaussian_window_is_opencv_gaussian_blur(shape, sigma):
    # reference library: cv2.GaussianBlur with the 2 ceil(3 sigma) + 1 kernel, mirror borders
    import cv2

    from beatlab.signals._flow_refine import gaussian_window

    image = (np.random.default_rng(1).normal(0, 30, shape) + 100).astype(np.float32)
    size = int(2 * np.ceil(3 * sigma) + 1)
    expected = cv2.GaussianBlur(
        image, (size, size), sigmaX=sigma, sigmaY=sigma, borderType=cv2.BORDER_REFLECT
    )
    np.testing.assert_array_equal(gaussian_window(image, sigma), expected)


def test_last_step_on_the_pixels_read_gives_their_whole_field_numbers():
    """prepare_reference(read=...) makes the last Gauss-Newton step work only as far as the
    pixels read need: there the flow is that of refining every pixel (the Gaussian windows
    see the same products), elsewhere it keeps the step before; every_pixel refines all."""
    from beatlab.signals._flow_refine import prepare_reference, refine_with_basis

    opd, _ = make_opd(np.random.default_rng(4), n=96)
    ref = opd.astype(np.float32)
    mov = warp_exact(opd, contraction_field(1.5, n=96)).astype(np.float32)
    coarse = np.zeros((96, 96, 2), np.float32)
    read = (slice(30, 61), slice(25, 70))
    whole = refine_with_basis(prepare_reference(ref, window_px=4.0), mov, coarse, iterations=2)
    one = refine_with_basis(prepare_reference(ref, window_px=4.0), mov, coarse, iterations=1)
    basis = prepare_reference(ref, window_px=4.0, read=read)
    part = refine_with_basis(basis, mov, coarse, iterations=2)
    np.testing.assert_array_equal(part[read], whole[read])
    outside = np.ones((96, 96), bool)
    outside[read] = False
    np.testing.assert_array_equal(part[outside], one[outside])
    np.testing.assert_array_equal(
        refine_with_basis(basis, mov, coarse, iterations=2, every_pixel=True), whole
    )
    # reading every pixel, or none, needs no part
    assert prepare_reference(ref, window_px=4.0, read=(slice(None), slice(None))).last_step is None
    assert prepare_reference(ref, window_px=4.0, read=(slice(5, 5), slice(0, 9))).last_step is None


def test_tracker_refines_fully_where_the_flow_is_read():
    """Without a shift to estimate, the tracker's last step covers only the mask's box: the
    flow at the mask is the same as when every pixel is refined (for a field-wide shift
    estimate), bit for bit."""
    opd, mask = make_opd(np.random.default_rng(6))
    frame = warp_exact(opd, contraction_field(1.0))
    small = np.zeros_like(mask)
    small[40:80, 50:90] = mask[40:80, 50:90]  # a mask box well inside the refined region
    tracker = FlowTracker(opd, small, pixel_size_um=PIXEL_UM)
    assert tracker._basis.last_step is not None
    zero = np.zeros(2)
    part = tracker.measure(frame, rigid_shift_px=zero, estimate_shift=False).flow_px
    every = tracker.measure(frame, rigid_shift_px=zero, estimate_shift=True).flow_px
    np.testing.assert_array_equal(part[small], every[small])
    assert not np.array_equal(part, every)  # elsewhere in the region: the step before


def test_pixels_read_outside_the_mask_are_refined_too():
    """A user's region may leave the cell mask: with also_read its pixels get the full
    refinement (the numbers of refining every pixel), not the raw coarse flow they had
    outside the mask's refined box."""
    opd, _ = make_opd(np.random.default_rng(7))
    frame = warp_exact(opd, contraction_field(1.0))
    mask = np.zeros(opd.shape, bool)
    mask[40:60, 40:60] = True
    roi = np.zeros(opd.shape, bool)
    roi[95:110, 95:110] = True  # beyond the mask's box and its 20 px margin
    zero = np.zeros(2)
    plain = FlowTracker(opd, mask, pixel_size_um=PIXEL_UM)
    wide = FlowTracker(opd, mask, pixel_size_um=PIXEL_UM, also_read=roi)
    coarse = plain.measure(frame, rigid_shift_px=zero, estimate_shift=False).flow_px
    part = wide.measure(frame, rigid_shift_px=zero, estimate_shift=False).flow_px
    every = wide.measure(frame, rigid_shift_px=zero, estimate_shift=True).flow_px
    np.testing.assert_array_equal(part[roi | mask], every[roi | mask])
    # the mask's own flow as before, within 0.001 px: the box's edge is elsewhere
    np.testing.assert_allclose(part[mask], coarse[mask], rtol=0, atol=1e-3)
    assert not np.array_equal(part[roi], coarse[roi])
    with pytest.raises(InputError, match="also_read must be a boolean"):
        FlowTracker(opd, mask, pixel_size_um=PIXEL_UM, also_read=roi.astype(int))
