"""Angular-spectrum refocusing, autofocus and background helpers."""

import numpy as np
import pytest

from beatlab.errors import ConfigError, InputError
from beatlab.holography import (
    AngularSpectrumPropagator,
    OffAxisReconstructor,
    autofocus,
    average_reference_field,
    estimate_background_mask,
    fit_phase_polynomial,
    phase_offset,
    propagate_angular_spectrum,
    render_hologram,
    render_reference,
)

LAMBDA_NM = 632.8


def _phase_object(shape, rng, *, count=6, peak_rad=1.5, sigma_px=(2.0, 4.0)):
    yy, xx = np.mgrid[: shape[0], : shape[1]].astype(float)
    phase = np.zeros(shape)
    for _ in range(count):
        cy, cx = rng.uniform(0.2, 0.8, 2) * np.array(shape)
        s = rng.uniform(*sigma_px)
        phase += peak_rad * np.exp(-((yy - cy) ** 2 + (xx - cx) ** 2) / (2 * s * s))
    return phase


def test_zero_distance_is_identity_and_back_and_forth_restores():
    rng = np.random.default_rng(0)
    field = np.exp(1j * _phase_object((64, 64), rng)) * (1 + 0.1 * rng.random((64, 64)))
    prop = AngularSpectrumPropagator((64, 64), wavelength_nm=LAMBDA_NM, pixel_size_um=0.5)
    # Goodman, Introduction to Fourier Optics: z = 0 is the identity; +z then -z restores (P)
    np.testing.assert_array_equal(prop.propagate(field, 0.0), field)
    there = prop.propagate(field, 12.5)
    assert np.max(np.abs(there - field)) > 0.1
    np.testing.assert_allclose(prop.propagate(there, -12.5), field, atol=1e-10)


def test_plane_wave_gains_the_angular_spectrum_phase():
    n, px, z, n_medium = 64, 0.5, 7.0, 1.333
    j = 5  # tilt: 5 cycles across the field
    x = np.arange(n) * px
    field = np.exp(2j * np.pi * j * x / (n * px))[None, :] * np.ones((n, 1))
    out = propagate_angular_spectrum(
        field, z, wavelength_nm=LAMBDA_NM, pixel_size_um=px, n_medium=n_medium
    )
    k = n_medium / (LAMBDA_NM * 1e-3)
    fx = j / (n * px)
    expected = field * np.exp(2j * np.pi * z * (np.sqrt(k * k - fx * fx) - k))
    # analytic transfer function of free space (Goodman, P)
    np.testing.assert_allclose(out, expected, atol=1e-10)


@pytest.mark.parametrize("metric", ["amplitude_std"])
@pytest.mark.parametrize("z_um", [-9.0, 6.0])
def test_autofocus_recovers_defocus_within_half_depth_of_field(metric, z_um):
    rng = np.random.default_rng(1)
    px = 0.5
    focused = np.exp(1j * _phase_object((64, 64), rng))
    blurred = propagate_angular_spectrum(focused, z_um, wavelength_nm=LAMBDA_NM, pixel_size_um=px)
    best = autofocus(blurred, wavelength_nm=LAMBDA_NM, pixel_size_um=px, metric=metric)
    na = LAMBDA_NM * 1e-3 / (2 * px)  # the grid passes frequencies up to Nyquist
    # tolerance 0.5 lambda / NA^2 (from the issue; depth-of-field rule of thumb, T)
    assert abs(best + z_um) <= 0.5 * LAMBDA_NM * 1e-3 / na**2


def test_reconstructor_autofocus_on_a_defocused_hologram():
    rng = np.random.default_rng(2)
    shape, px = (128, 128), 0.1
    focused = np.exp(1j * _phase_object(shape, rng, count=4, peak_rad=1.2, sigma_px=(8.0, 12.0)))
    z_um = 3.0
    blurred = propagate_angular_spectrum(focused, z_um, wavelength_nm=LAMBDA_NM, pixel_size_um=px)
    opd = np.angle(blurred) * LAMBDA_NM / (2 * np.pi)
    optics = {"wavelength_nm": LAMBDA_NM, "shot_noise": False, "bit_depth": None}
    holo = render_hologram(opd, amplitude=np.abs(blurred), **optics)
    ref = render_reference(shape, **optics)
    rec = OffAxisReconstructor.fit(
        holo,
        wavelength_nm=LAMBDA_NM,
        pixel_size_um=px,
        reference=ref,
        refocus_um="auto",
        focus_range_um=(-8, 8),
    )
    na = rec.radius_cycles_per_px / px * LAMBDA_NM * 1e-3  # NA passed by the window
    # tolerance 0.5 lambda / NA^2 (from the issue, T)
    assert abs(rec.refocus_um + z_um) <= 0.5 * LAMBDA_NM * 1e-3 / na**2
    out = next(rec.opd_frames([holo]))
    off = OffAxisReconstructor.fit(holo, wavelength_nm=LAMBDA_NM, pixel_size_um=px, reference=ref)
    # refocused phase image is sharper (larger spread of OPD) than the defocused one
    assert np.ptp(out) > np.ptp(next(off.opd_frames([holo])))


def test_autofocus_rejects_unknown_metric():
    with pytest.raises(ConfigError, match="amplitude_std"):
        autofocus(np.ones((8, 8), complex), wavelength_nm=500, pixel_size_um=1, metric="x")


def test_phase_offset_is_circular():
    phase = np.full((10, 10), np.pi - 0.05)
    phase[::2] = -np.pi + 0.05  # straddles the wrap: the median of the wrapped phase is wrong
    assert abs(abs(phase_offset(np.exp(1j * phase))) - np.pi) < 1e-9


def test_average_reference_removes_per_frame_offsets():
    rng = np.random.default_rng(3)
    base = np.exp(1j * 0.3 * rng.standard_normal((16, 16)))
    frames = [base * np.exp(1j * p) for p in (0.0, 2.0, -2.8, 3.1)]
    mean = average_reference_field(frames)
    np.testing.assert_allclose(np.abs(mean), 1.0, atol=1e-12)
    expected = base * np.exp(-1j * phase_offset(base))
    np.testing.assert_allclose(mean, expected, atol=1e-12)
    with pytest.raises(InputError, match="reference"):
        average_reference_field([])


def test_polynomial_fit_ignores_cells():
    rng = np.random.default_rng(4)
    yy, xx = np.mgrid[:64, :80].astype(float)
    y, x = yy / 31.5 - 1, xx / 39.5 - 1
    surface = 3.0 + 2.0 * x - 1.5 * y + 4.0 * x * x + 0.5 * x * y - 2.0 * y * y
    cells = 2.0 * (((yy - 20) ** 2 + (xx - 30) ** 2) < 100)
    noisy = surface + cells + 0.01 * rng.standard_normal(surface.shape)
    fit, inliers = fit_phase_polynomial(noisy, order=2)
    assert np.max(np.abs(fit - surface)) < 0.02  # invented truth
    assert not inliers[20, 30] and inliers[50, 70]
    mask, level = estimate_background_mask(noisy - fit)
    assert not mask[20, 30] and abs(level) < 0.01
    with pytest.raises(ConfigError, match="order"):
        fit_phase_polynomial(noisy, order=7)
