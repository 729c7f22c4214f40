import numpy as np
import pytest
from skimage.restoration import unwrap_phase

from beatlab.errors import BeatlabWarning, InputError
from beatlab.opd import (
    check_cell_sign,
    opd_to_phase,
    phase_to_opd,
    unwrap_in_time,
    unwrap_phase_ls,
    wrap_phase,
    wrapped_difference,
)


def test_phase_to_opd_definition():
    # CHECKS.md: OPD = phase x wavelength / (2 pi); 2 pi rad at 632.8 nm = 632.8 nm (P, definition)
    assert float(phase_to_opd(np.array(2 * np.pi), 632.8)) == pytest.approx(632.8, rel=1e-6)
    assert float(phase_to_opd(np.array(np.pi / 2), 532.0)) == pytest.approx(133.0, rel=1e-6)
    x = np.linspace(-50, 700, 11)
    assert np.allclose(phase_to_opd(opd_to_phase(x, 632.8), 632.8), x, atol=1e-3)


@pytest.mark.parametrize("bad", [0.0, -1.0, np.nan])
def test_wavelength_must_be_positive(bad):
    with pytest.raises(InputError, match="wavelength_nm=NM"):
        phase_to_opd(np.zeros(3), bad)


def test_wrapped_difference_has_no_jumps():
    ref = np.array([3.1, -3.1, 0.0])
    moved = ref + 0.1
    d = wrapped_difference(wrap_phase(moved), ref)
    assert np.allclose(d, 0.1)
    assert np.all(
        (wrap_phase(np.linspace(-20, 20, 101)) >= -np.pi)
        & (wrap_phase(np.linspace(-20, 20, 101)) < np.pi)
    )


def _smooth_phase(ny=96, nx=112):
    y, x = np.mgrid[:ny, :nx]
    return 25 * np.exp(-((x - 50) ** 2 + (y - 40) ** 2) / 700.0) + 0.07 * x - 0.03 * y


def test_unwrap_ls_recovers_smooth_phase_up_to_constant():
    # CHECKS.md: Ghiglia & Romero 1994 least-squares unwrapping: original up to a constant (P)
    phi = _smooth_phase()
    out = unwrap_phase_ls(wrap_phase(phi))
    assert np.ptp(out - phi) < 1e-9


def test_unwrap_ls_agrees_with_scikit_image():
    # reference library scikit-image unwrap_phase (Herraez et al. 2002) (L)
    phi = _smooth_phase()
    ours = unwrap_phase_ls(wrap_phase(phi))
    ref = unwrap_phase(wrap_phase(phi))
    d = ours - ref
    assert np.ptp(d) < 1e-9


def test_unwrap_ls_recovers_noisy_phase_and_agrees_with_scikit_image():
    rng = np.random.default_rng(1)
    phi = _smooth_phase() + rng.normal(0, 0.3, (96, 112))
    # the noise (0.3 rad) never makes neighbours differ by pi or more, so the true phase is
    # recoverable exactly (up to a constant); returning the wrapped input leaves errors of
    # whole turns on about half the pixels (a spread of 5 turns here)
    assert (
        np.abs(np.diff(phi, axis=0)).max() < np.pi and np.abs(np.diff(phi, axis=1)).max() < np.pi
    )
    w = wrap_phase(phi)
    out = unwrap_phase_ls(w)
    turns = (out - w) / (2 * np.pi)
    assert np.allclose(turns, np.round(turns), atol=1e-9)  # congruent: whole turns only
    # CHECKS.md: Ghiglia & Romero 1994 least-squares unwrapping: the original up to a constant
    # (P); measured spread 2e-15 rad, bound far below the 2 pi of a missed turn
    assert np.ptp(out - phi) < 1e-9
    # CHECKS.md: agree with scikit-image unwrap_phase (Herraez et al. 2002) (L)
    assert np.ptp(out - unwrap_phase(w)) < 1e-9


def test_unwrap_ls_weights_and_nan():
    phi = _smooth_phase()
    w = wrap_phase(phi)
    w[10, 10] = np.nan
    weights = np.ones_like(w)
    weights[30:40, 30:40] = 0.2
    out = unwrap_phase_ls(w, weights=weights)
    assert np.isnan(out[10, 10])
    d = (out - phi)[np.isfinite(out)]
    assert np.ptp(d) < 1e-6


def test_unwrap_ls_rejects_non_2d():
    with pytest.raises(InputError, match="2-D"):
        unwrap_phase_ls(np.zeros((2, 3, 4)))


def test_unwrap_in_time_never_jumps():
    base = _smooth_phase(48, 48)
    # the phase reaches 25 rad (many wraps); each frame differs from the first by < pi
    frames = [base + 0.25 * k for k in range(12)]
    out = list(
        unwrap_in_time((wrap_phase(f) for f in frames), reference_wrapped=wrap_phase(frames[0]))
    )
    for k in range(1, 12):
        step = out[k] - out[k - 1]
        assert np.allclose(step, 0.25, atol=1e-9)
    assert np.ptp(out[0] - base) < 1e-9


def test_check_cell_sign_warns_on_negative_cells():
    field = np.zeros((64, 64))
    field[20:40, 20:40] = 200.0
    assert check_cell_sign(field)
    with pytest.warns(BeatlabWarning, match="negative OPD"):
        assert not check_cell_sign(-field)
