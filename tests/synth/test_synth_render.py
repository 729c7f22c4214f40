"""Rendering physics of the simulator: warping, mass, noise, kinds, reproducibility."""

import numpy as np
import pytest
from scipy import ndimage
from skimage.registration import phase_cross_correlation

from beatlab.errors import ConfigError
from beatlab.synth import simulate_recording
from beatlab.synth._motion import (
    ContractionField,
    field_displacement,
    field_gradient,
    invert_map,
)

SMALL = {"duration_s": 1.0, "fps": 20.0, "shape_px": (64, 64)}


@pytest.mark.parametrize("kind", ["opd", "phase", "wrapped_phase"])
@pytest.mark.parametrize("layout", ["clusters", "confluent"])
def test_frames_shape_dtype_and_metadata(kind, layout):
    sim = simulate_recording(**SMALL, kind=kind, layout=layout, rng=0)
    assert sim.frames.shape == (20, 64, 64)
    assert sim.frames.dtype == np.float32
    assert sim.opd_nm.shape == sim.frames.shape and sim.opd_nm.dtype == np.float32
    assert sim.kind == ("opd" if kind == "opd" else "phase")
    assert sim.phase_wrapped == (kind == "wrapped_phase")
    assert sim.mask.shape == (64, 64) and sim.mask.dtype == bool
    assert sim.cluster_labels.shape == (64, 64)
    assert sim.displacement_field_um.shape == (2, 64, 64)
    assert sim.activation.shape == (20,)
    assert sim.reference_frames is None
    np.testing.assert_allclose(sim.times_s, np.arange(20) / 20.0)
    assert np.all(np.isfinite(sim.frames))


def test_same_seed_same_output_and_int_seed_equals_generator():
    a = simulate_recording(**SMALL, noise_nm=2.0, rng=7)
    b = simulate_recording(**SMALL, noise_nm=2.0, rng=np.random.default_rng(7))
    c = simulate_recording(**SMALL, noise_nm=2.0, rng=8)
    np.testing.assert_array_equal(a.frames, b.frames)
    assert a.truth["beats"] == b.truth["beats"]
    assert not np.array_equal(a.frames, c.frames)


def test_noise_level_does_not_change_the_scene():
    quiet = simulate_recording(**SMALL, noise_nm=0.0, rng=3)
    noisy = simulate_recording(**SMALL, noise_nm=5.0, rng=3)
    np.testing.assert_array_equal(quiet.rest_opd_nm, noisy.rest_opd_nm)
    np.testing.assert_array_equal(quiet.mask, noisy.mask)


@pytest.mark.parametrize("layout", ["clusters", "confluent"])
def test_rest_opd_in_plausible_cell_range(layout):
    sim = simulate_recording(**{**SMALL, "shape_px": (96, 96)}, layout=layout, rng=2)
    cells = sim.rest_opd_nm[sim.mask]
    # CHECKS.md physiology: cell OPD about 70-550 nm (M); edges of cells run lower
    assert 150 < np.median(cells) < 400
    assert np.percentile(cells, 99.9) < 550
    if layout == "clusters":
        assert 0.02 < sim.mask.mean() < 0.5
        assert (
            np.max(np.abs(sim.rest_opd_nm[~ndimage.binary_dilation(sim.mask, iterations=4)])) < 1
        )
    else:
        assert sim.mask.all()
        assert np.percentile(cells, 1) > 70


def test_mass_conserved_through_a_beat():
    sim = simulate_recording(
        duration_s=1.0,
        fps=100.0,
        shape_px=(96, 96),
        beat_times_s=[0.2],
        strain=0.08,
        noise_nm=0.0,
        rng=4,
    )
    mass = sim.frames.astype(np.float64).sum(axis=(1, 2))
    assert sim.activation.max() == pytest.approx(1.0, abs=1e-9)
    np.testing.assert_allclose(mass, mass[0], rtol=5e-3)  # brief: within 0.5 %
    # tighter than needed: the Jacobian division makes it exact up to interpolation error
    np.testing.assert_allclose(mass, mass[0], rtol=1e-4)
    # without the Jacobian the contracted cluster would lose ~(1 - 0.08)^2 of its mass
    peak = int(np.argmax(sim.activation))
    assert sim.frames[peak].max() > sim.frames[0].max() * 1.05


def test_centroid_moves_by_the_stated_contraction():
    strain = 0.06
    sim = simulate_recording(
        duration_s=1.0,
        fps=100.0,
        shape_px=(96, 96),
        beat_times_s=[0.2],
        strain=strain,
        noise_nm=0.0,
        rng=11,
    )
    cy, cx = sim.truth["regions"][0]["centre_um"]
    yy, xx = np.mgrid[0:96, 0:96] * sim.pixel_size_um

    def centroid(f):
        f = f.astype(np.float64)
        return np.array([(f * yy).sum() / f.sum(), (f * xx).sum() / f.sum()])

    c0 = centroid(sim.frames[0])
    for i in (25, 35, 45):
        a = sim.activation[i]
        # uniform strain inside the core: x - c = (1 - a strain) (x0 - c), mass conserved
        expected = np.array([cy, cx]) + (1 - a * strain) * (c0 - [cy, cx])
        np.testing.assert_allclose(centroid(sim.frames[i]), expected, atol=2e-3)
    assert np.linalg.norm(centroid(sim.frames[35]) - c0) > 0.01


def test_stage_drift_is_a_rigid_shift():
    drift = (1.3, -0.7)
    sim = simulate_recording(
        **{**SMALL, "shape_px": (96, 96)}, rate_bpm=0, stage_drift_um=drift, noise_nm=0.0, rng=5
    )
    ref, last = sim.frames[0].astype(float), sim.frames[-1].astype(float)
    shift, _, _ = phase_cross_correlation(ref, last, upsample_factor=200, normalization=None)
    # reference library scikit-image (L): registering shift = minus the applied shift
    np.testing.assert_allclose(shift, -np.array(drift) / sim.pixel_size_um, atol=0.01)
    # scipy.ndimage.shift with cubic splines, reference library scipy (L)
    moved = ndimage.shift(sim.rest_opd_nm.astype(float), np.array(drift) / 0.5, order=3)
    np.testing.assert_allclose(last, moved, atol=1e-2)
    np.testing.assert_allclose(sim.stage_shift_um[-1], drift)
    assert sim.truth["summary"]["beat_count"] == 0
    np.testing.assert_array_equal(sim.displacement_um, 0.0)


def _fields():
    return [
        ContractionField((10.0, 12.0), 6.0, 12.0, 0.05, None),
        ContractionField((40.0, 35.0), 5.0, 10.0, 0.08, (0.6, 0.8)),
    ]


def test_gradient_matches_finite_differences():
    rng = np.random.default_rng(0)
    y = rng.uniform(0, 50, 500)
    x = rng.uniform(0, 50, 500)
    acts = [0.9, 1.3]
    g = field_gradient(_fields(), acts, y, x)
    h = 1e-6
    uy_p, ux_p = field_displacement(_fields(), acts, y + h, x)
    uy_m, ux_m = field_displacement(_fields(), acts, y - h, x)
    np.testing.assert_allclose(g[0], (uy_p - uy_m) / (2 * h), atol=1e-6)
    np.testing.assert_allclose(g[2], (ux_p - ux_m) / (2 * h), atol=1e-6)
    uy_p, ux_p = field_displacement(_fields(), acts, y, x + h)
    uy_m, ux_m = field_displacement(_fields(), acts, y, x - h)
    np.testing.assert_allclose(g[1], (uy_p - uy_m) / (2 * h), atol=1e-6)
    np.testing.assert_allclose(g[3], (ux_p - ux_m) / (2 * h), atol=1e-6)


def test_inverse_map_round_trips_and_field_is_continuous():
    yy, xx = np.mgrid[0:50:0.37, 0:50:0.41]
    acts = [1.2, 0.7]
    y0, x0 = invert_map(_fields(), acts, yy, xx)
    uy, ux = field_displacement(_fields(), acts, y0, x0)
    np.testing.assert_allclose(y0 + uy, yy, atol=1e-8)
    np.testing.assert_allclose(x0 + ux, xx, atol=1e-8)
    # uniaxial field moves only along its axis; zero beyond the outer radius
    f = _fields()[1]
    uy, ux = field_displacement([f], [1.0], yy, xx)
    np.testing.assert_allclose(uy * 0.8 - ux * 0.6, 0.0, atol=1e-12)
    r = np.hypot(yy - 40.0, xx - 35.0)
    assert np.all(uy[r >= 10.0] == 0)
    # core: uniform strain along the axis
    core = r < 5.0
    along = (yy - 40.0) * 0.6 + (xx - 35.0) * 0.8
    np.testing.assert_allclose((uy * 0.6 + ux * 0.8)[core], -0.08 * along[core], atol=1e-12)


def test_displacement_field_is_the_cluster_contraction():
    sim = simulate_recording(**SMALL, strain=0.04, rng=1)
    cy, cx = sim.truth["regions"][0]["centre_um"]
    core = sim.truth["regions"][0]["core_um"]
    yy, xx = np.mgrid[0:64, 0:64] * sim.pixel_size_um
    inside = np.hypot(yy - cy, xx - cx) < core
    np.testing.assert_allclose(sim.displacement_field_um[0][inside], -0.04 * (yy - cy)[inside])
    np.testing.assert_allclose(sim.displacement_field_um[1][inside], -0.04 * (xx - cx)[inside])
    # the cells lie in the core, where the strain is exact
    assert np.all(inside[sim.mask])


def test_no_beating_gives_static_noise_free_frames():
    for kwargs in ({"rate_bpm": 0}, {"beat_times_s": []}):
        sim = simulate_recording(**SMALL, noise_nm=0.0, **kwargs, rng=2)
        np.testing.assert_array_equal(sim.frames, np.broadcast_to(sim.rest_opd_nm, (20, 64, 64)))
        np.testing.assert_array_equal(sim.activation, 0.0)
        assert sim.truth["summary"]["beat_count"] == 0
        assert sim.truth["summary"]["beat_rate_bpm"] == 0.0
        assert sim.truth["summary"]["rhythm"] == "quiescent"


def test_phase_and_wrapped_phase_follow_the_opd():
    for kind in ("phase", "wrapped_phase"):
        sim = simulate_recording(**SMALL, kind=kind, rng=6)
        phase = 2 * np.pi * sim.opd_nm.astype(np.float64) / sim.wavelength_nm
        if kind == "wrapped_phase":
            phase = np.angle(np.exp(1j * phase))
            assert sim.frames.min() >= -np.pi - 1e-6 and sim.frames.max() <= np.pi + 1e-6
        np.testing.assert_allclose(sim.frames, phase, atol=1e-5)
    # CHECKS.md: 2 pi rad at 632.8 nm = 632.8 nm (P, definition)
    assert 2 * np.pi * 632.8 / 632.8 == pytest.approx(2 * np.pi)


def test_white_correlated_jitter_and_drift_noise_levels():
    base = {"duration_s": 1.0, "fps": 30.0, "shape_px": (96, 96), "rate_bpm": 0, "rng": 9}
    rest = simulate_recording(**base, noise_nm=0.0).rest_opd_nm.astype(np.float64)
    white = simulate_recording(**base, noise_nm=2.0).frames - rest
    assert white.std() == pytest.approx(2.0, rel=0.02)
    assert abs(np.corrcoef(white[:, :, 1:].ravel(), white[:, :, :-1].ravel())[0, 1]) < 0.02

    corr = (
        simulate_recording(
            **base, noise_nm=0.0, correlated_noise_nm=3.0, correlated_noise_um=2.0
        ).frames
        - rest
    )
    assert corr.std() == pytest.approx(3.0, rel=0.15)
    assert np.corrcoef(corr[:, :, 1:].ravel(), corr[:, :, :-1].ravel())[0, 1] > 0.9
    assert not np.allclose(corr[0], corr[1])  # new every frame

    jit = simulate_recording(**base, noise_nm=0.0, jitter_nm=1.5).frames - rest
    offsets = jit.mean(axis=(1, 2))
    np.testing.assert_allclose(jit, np.broadcast_to(offsets[:, None, None], jit.shape), atol=1e-3)
    assert 0.8 < offsets.std() < 2.3

    drift = simulate_recording(**base, noise_nm=0.0, drift_nm=10.0).frames - rest
    np.testing.assert_allclose(drift[0], 0.0, atol=1e-4)
    assert 0.4 * 10 < drift[-1].mean() <= 10.0 and drift[-1].max() <= 10.0 + 1e-3
    assert np.all(np.diff(drift.mean(axis=(1, 2))) > 0)


@pytest.mark.parametrize(
    ("kwargs", "name"),
    [
        ({"fps": 0}, "fps"),
        ({"layout": "sparse"}, "layout"),
        ({"kind": "intensity"}, "kind"),
        ({"strain": 0.5}, "strain"),
        ({"ead_level": 0.1}, "ead_level"),
        ({"overshoot": 0.3}, "overshoot"),
        ({"n_clusters": 0}, "n_clusters"),
        ({"beat_times_s": [0.5, 0.2]}, "beat_times_s"),
        ({"beat_times_s": [0.2], "ibi_cv": 0.1}, "beat_times_s"),
        ({"cluster_rates_bpm": (60, 70)}, "cluster_rates_bpm"),
        ({"shape_px": (8, 8)}, "shape_px"),
        ({"n_clusters": 40}, "n_clusters"),
        ({"stage_drift_um": (1.0,)}, "stage_drift_um"),
        ({"relaxation": "linear"}, "relaxation"),
        ({"relaxation": "exponential", "relax_tau_s": 0}, "relax_tau_s"),
        ({"relaxation": "exponential", "overshoot": 0.05}, "overshoot"),
        ({"ead_shape": "spike"}, "ead_shape"),
        ({"ead_shape": "bump", "ead_level": 0.0}, "ead_level"),
        ({"ead_shape": "bump", "ead_bump_sigma_s": -0.01}, "ead_bump_sigma_s"),
        ({"ead_shape": "bump", "ead_bump_delay_s": -0.1}, "ead_bump_delay_s"),
    ],
)
def test_bad_arguments_raise_config_error_naming_the_parameter(kwargs, name):
    with pytest.raises(ConfigError, match=name):
        simulate_recording(**{**SMALL, **kwargs}, rng=0)


def test_rng_must_be_a_generator_or_seed():
    with pytest.raises(ConfigError, match="rng"):
        simulate_recording(**SMALL, rng="seed")
