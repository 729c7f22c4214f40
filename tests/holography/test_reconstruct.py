"""OffAxisReconstructor on simulated holograms with a known OPD (ground truth invented here)."""

import numpy as np
import pytest

from beatlab.errors import BeatlabWarning, ConfigError, InputError, MetadataError
from beatlab.holography import OffAxisReconstructor, render_hologram, render_reference

LAMBDA_NM = 632.8
SHAPE = (128, 128)
PIXEL_UM = 0.3


def _cell_model(rng, *, count=5, opd_max_nm=300.0, shape=SHAPE):
    """Gaussian cells as a function of (y, x) in input pixels: the OPD in nm anywhere."""
    cells = []
    for _ in range(count):
        cy, cx = rng.uniform(0.2, 0.8, 2) * np.array(shape)
        sy, sx = rng.uniform(5.0, 10.0, 2)
        amp = rng.uniform(0.5, 1.0) * opd_max_nm
        cells.append((cy, cx, sy, sx, amp))

    def opd_at(yy, xx):
        out = np.zeros(np.broadcast_shapes(np.shape(yy), np.shape(xx)))
        for cy, cx, sy, sx, amp in cells:
            out += amp * np.exp(-((yy - cy) ** 2 / (2 * sy**2) + (xx - cx) ** 2 / (2 * sx**2)))
        return out

    return opd_at


def _on_camera(opd_at, shape=SHAPE):
    yy, xx = np.mgrid[: shape[0], : shape[1]].astype(float)
    return opd_at(yy, xx)


def _cells(rng, shape=SHAPE, *, count=5, opd_max_nm=300.0):
    return _on_camera(_cell_model(rng, count=count, opd_max_nm=opd_max_nm, shape=shape), shape)


def _curvature(shape=SHAPE, strength=5e-4):
    yy, xx = np.mgrid[: shape[0], : shape[1]].astype(float)
    return strength * ((yy - 0.4 * shape[0]) ** 2 + (xx - 0.55 * shape[1]) ** 2)


def _truth_on_grid(rec, opd_at):
    """The known OPD the hologram was rendered from, at the centres of the OPD pixels.

    Nothing of the code under test but its documented output geometry: OPD pixel (j, i) lies
    at input pixel ``output_origin_px + (j, i) x step``, step = output over input pixel size.
    The truth is not band-limited: the bounds below include the resolution loss of the
    spatial filter (2.3 nm RMS in the cells on the noise-free hologram of the first test).
    """
    step = rec.output_pixel_size_um / rec.input_pixel_size_um
    ys = rec.output_origin_px + step * np.arange(rec.output_shape[0])
    xs = rec.output_origin_px + step * np.arange(rec.output_shape[1])
    return opd_at(ys[:, None], xs[None, :])


def test_noisy_hologram_with_curvature_matches_truth_within_3nm():
    rng = np.random.default_rng(11)
    opd_at = _cell_model(rng)
    opd = _on_camera(opd_at)
    assert opd.max() > LAMBDA_NM / 2  # the tallest cell wraps: the unwrapping is exercised
    optics = {"wavelength_nm": LAMBDA_NM, "aberration_rad": _curvature(), "read_noise_counts": 3.0}
    holo = render_hologram(opd, rng=rng, **optics)
    ref = render_reference(SHAPE, rng=rng, **optics)
    rec = OffAxisReconstructor.fit(
        holo, wavelength_nm=LAMBDA_NM, pixel_size_um=PIXEL_UM, reference=ref
    )
    out = next(rec.opd_frames([holo]))
    assert out.dtype == np.float32 and out.shape == rec.output_shape
    assert rec.output_pixel_size_um == pytest.approx(PIXEL_UM * rec._filter.scale)
    truth = _truth_on_grid(rec, opd_at)
    cells = truth > 20.0
    rms = np.sqrt(np.mean((out - truth)[cells] ** 2))
    # the known OPD the hologram was rendered from (invented ground truth, shot + read noise,
    # 12 bit); bound from the issue (ours): measured 2.49 nm, of which 2.3 nm is the filter's
    # resolution loss on these 1.5-3 um cells
    assert rms <= 3.0
    assert abs(np.median((out - truth)[~cells])) < 1.0


def test_without_reference_polynomial_levelling():
    rng = np.random.default_rng(12)
    opd_at = _cell_model(rng)
    holo = render_hologram(
        _on_camera(opd_at), wavelength_nm=LAMBDA_NM, aberration_rad=_curvature(), rng=rng
    )
    rec = OffAxisReconstructor.fit(holo, wavelength_nm=LAMBDA_NM, pixel_size_um=PIXEL_UM)
    assert not rec.uses_reference
    out = next(rec.opd_frames([holo]))
    truth = _truth_on_grid(rec, opd_at)
    inner = np.zeros(out.shape, dtype=bool)
    inner[2:-2, 2:-2] = True
    cells = (truth > 20.0) & inner
    # the known OPD (invented ground truth); looser bound: the order-2 fit absorbs part of the
    # cells' tails (ours; measured 5.85 nm)
    assert np.sqrt(np.mean((out - truth)[cells] ** 2)) <= 8.0
    assert rec.sign == 1


@pytest.mark.parametrize("carrier", [(0.23, 0.17), (-0.23, 0.17), (0.22, -0.18), (0.0, 0.3)])
def test_any_carrier_either_sideband(carrier):
    rng = np.random.default_rng(13)
    opd_at = _cell_model(rng)
    opd = _on_camera(opd_at)
    optics = {
        "wavelength_nm": LAMBDA_NM,
        "carrier_cycles_per_px": carrier,
        "shot_noise": False,
        "bit_depth": None,
    }
    holo = render_hologram(opd, **optics)
    ref = render_reference(SHAPE, **optics)
    results = {}
    for side in ("auto", "+1", "-1"):
        rec = OffAxisReconstructor.fit(
            holo, wavelength_nm=LAMBDA_NM, pixel_size_um=PIXEL_UM, reference=ref, sideband=side
        )
        results[side] = (rec.sign, next(rec.opd_frames([holo])))
    assert results["+1"][0] == 1 and results["-1"][0] == -1
    np.testing.assert_allclose(results["+1"][1], -results["-1"][1], atol=0.05)
    sign_auto, auto = results["auto"]
    cells = _truth_on_grid(rec, opd_at) > 20.0
    assert np.mean(auto[cells]) > 50.0  # automatic choice: cells positive
    np.testing.assert_allclose(auto, results["+1" if sign_auto > 0 else "-1"][1], atol=1e-6)


def test_vibrating_reference_stack_equals_one_clean_reference():
    rng = np.random.default_rng(14)
    opd = _cells(rng)
    optics = {
        "wavelength_nm": LAMBDA_NM,
        "aberration_rad": _curvature(),
        "shot_noise": False,
        "bit_depth": None,
    }
    holo = render_hologram(opd, reference_tilt_rad=0.4, **optics)
    clean = render_reference(SHAPE, **optics)
    shaken = np.stack(
        [render_reference(SHAPE, reference_tilt_rad=t, **optics) for t in (0.0, 1.3, 2.9, -2.2)]
    )
    one = OffAxisReconstructor.fit(
        holo, wavelength_nm=LAMBDA_NM, pixel_size_um=PIXEL_UM, reference=clean
    )
    many = OffAxisReconstructor.fit(
        holo, wavelength_nm=LAMBDA_NM, pixel_size_um=PIXEL_UM, reference=shaken
    )
    a = next(one.opd_frames([holo]))
    b = next(many.opd_frames([holo]))
    inner = (slice(2, -2), slice(2, -2))  # the frame edges keep a little leakage (< 1 nm)
    np.testing.assert_allclose(a[inner], b[inner], atol=0.05)
    np.testing.assert_allclose(a, b, atol=1.0)
    # a naive average of the shaken fields (no offset removal) would lose the fringe contrast
    assert np.ptp(a) > 100.0


def test_time_series_across_wrap_boundaries_has_no_jumps():
    rng = np.random.default_rng(15)
    # more than a wavelength (wraps in space), smooth enough for the window's pass band: its
    # steepest slope (30 nm/px at the largest scale) is 0.048 cycles/px of fringe, half the
    # window radius (0.096). (A 40 px, 1000 nm bump, 49 nm/px, reads 59 nm off its own OPD.)

    def base_at(yy, xx):
        r = np.hypot(yy - 60, xx - 66) / 56.0
        return np.where(r < 1, 800.0 * np.cos(0.5 * np.pi * np.clip(r, 0, 1)) ** 2, 0.0)

    base = _on_camera(base_at)
    optics = {"wavelength_nm": LAMBDA_NM, "read_noise_counts": 2.0}
    ref = render_reference(SHAPE, rng=rng, **optics)
    # frame-to-frame changes of up to 155 nm (< half a wavelength), 560 nm in all
    scales = 1.0 + 0.35 * np.sin(np.linspace(0, 4 * np.pi, 24))
    vibration = rng.uniform(-np.pi, np.pi, scales.size)

    def frames():
        for s, v in zip(scales, vibration, strict=True):
            yield render_hologram(base * s, rng=rng, reference_tilt_rad=v, **optics)

    first = render_hologram(base * scales[0], rng=np.random.default_rng(0), **optics)
    rec = OffAxisReconstructor.fit(
        first, wavelength_nm=LAMBDA_NM, pixel_size_um=PIXEL_UM, reference=ref
    )
    truth = _truth_on_grid(rec, base_at)
    peak = np.unravel_index(np.argmax(truth), truth.shape)
    series = np.array([f[peak] for f in rec.opd_frames(frames())])
    expected = truth[peak] * scales
    assert truth[peak] > 1.2 * LAMBDA_NM and np.ptp(expected) > 0.8 * LAMBDA_NM
    # invented ground truth: no 2 pi (632.8 nm) jumps, each frame on the OPD it was rendered
    # from (measured within 1.2 nm; ours)
    assert np.max(np.abs(np.diff(series))) < 0.5 * LAMBDA_NM
    assert np.max(np.abs(series - expected)) < 5.0


def test_polystyrene_sphere_centre_opd():
    # Ma et al. 2003, Phys Med Biol 48:4165: n = 1.5725 + 3108/l^2 + 3.4779e8/l^4 (P)
    n_sphere = 1.5725 + 3108 / LAMBDA_NM**2 + 3.4779e8 / LAMBDA_NM**4
    assert n_sphere == pytest.approx(1.5824, abs=1e-4)  # CHECKS.md value (P)
    n_medium = 1.333  # water at 589 nm, 20 C (CHECKS.md, T)
    diameter_um, pixel_um, n = 5.0, 0.04, 256
    yy, xx = np.mgrid[:n, :n].astype(float)
    r2 = ((yy - n / 2) * pixel_um) ** 2 + ((xx - n / 2) * pixel_um) ** 2
    thickness_nm = 2e3 * np.sqrt(np.clip((diameter_um / 2) ** 2 - r2, 0.0, None))
    opd = thickness_nm * (n_sphere - n_medium)
    expected = diameter_um * 1e3 * (n_sphere - n_medium)
    assert expected == pytest.approx(1250.0, rel=0.01)  # CHECKS.md: about 1.25 um (P)
    rng = np.random.default_rng(16)
    optics = {"wavelength_nm": LAMBDA_NM, "carrier_cycles_per_px": (0.3, 0.22)}
    holo = render_hologram(opd, rng=rng, **optics)
    ref = render_reference(opd.shape, rng=rng, **optics)
    rec = OffAxisReconstructor.fit(
        holo, wavelength_nm=LAMBDA_NM, pixel_size_um=pixel_um, reference=ref
    )
    out = next(rec.opd_frames([holo]))
    cy, cx = (s // 2 for s in rec.output_shape)
    centre = float(out[cy - 1 : cy + 2, cx - 1 : cx + 2].max())
    # thin-object approximation, centre only, 5 % (CHECKS.md, P); needs unwrapping past 2 pi
    assert centre == pytest.approx(expected, rel=0.05)


def test_piston_per_frame_is_removed():
    rng = np.random.default_rng(17)
    opd = _cells(rng)
    optics = {"wavelength_nm": LAMBDA_NM, "shot_noise": False, "bit_depth": None}
    ref = render_reference(SHAPE, **optics)
    frames = [render_hologram(opd, reference_tilt_rad=p, **optics) for p in (0.0, 2.0, -3.0)]
    rec = OffAxisReconstructor.fit(
        frames[0], wavelength_nm=LAMBDA_NM, pixel_size_um=PIXEL_UM, reference=ref
    )
    out = list(rec.opd_frames(iter(frames)))
    inner = (slice(2, -2), slice(2, -2))  # the frame edges keep a little leakage (< 1 nm)
    for o in out[1:]:
        np.testing.assert_allclose(o[inner], out[0][inner], atol=0.05)
        np.testing.assert_allclose(o, out[0], atol=1.0)


def test_featureless_field_warns_about_sign():
    flat = render_reference(SHAPE, wavelength_nm=LAMBDA_NM, rng=np.random.default_rng(18))
    with pytest.warns(BeatlabWarning, match="sideband"):
        rec = OffAxisReconstructor.fit(flat, wavelength_nm=LAMBDA_NM, pixel_size_um=PIXEL_UM)
    assert rec.sign == 1


@pytest.mark.parametrize(
    ("kwargs", "error", "match"),
    [
        ({"wavelength_nm": None, "pixel_size_um": 0.3}, MetadataError, "wavelength_nm=NM"),
        ({"wavelength_nm": 632.8, "pixel_size_um": -1}, MetadataError, "pixel_size_um=UM"),
        (
            {"wavelength_nm": 632.8, "pixel_size_um": 0.3, "sideband": "+2"},
            ConfigError,
            "sideband",
        ),
        (
            {"wavelength_nm": 632.8, "pixel_size_um": 0.3, "radius": 0.05, "na": 0.3},
            ConfigError,
            "radius",
        ),
        (
            {"wavelength_nm": 632.8, "pixel_size_um": 0.3, "reference": np.zeros((2, 8, 8))},
            InputError,
            "reference",
        ),
    ],
)
def test_bad_options(kwargs, error, match):
    holo = render_hologram(np.zeros(SHAPE), wavelength_nm=LAMBDA_NM, shot_noise=False)
    with pytest.raises(error, match=match):
        OffAxisReconstructor.fit(holo, **kwargs)


def test_phase_image_is_rejected_with_a_hint():
    phase_like = _cells(np.random.default_rng(19))
    with pytest.raises(InputError, match="kind=phase or kind=opd"):
        OffAxisReconstructor.fit(phase_like, wavelength_nm=LAMBDA_NM, pixel_size_um=PIXEL_UM)


def test_wrong_frame_shape_in_stream():
    holo = render_hologram(
        _cells(np.random.default_rng(20)), wavelength_nm=LAMBDA_NM, shot_noise=False
    )
    rec = OffAxisReconstructor.fit(holo, wavelength_nm=LAMBDA_NM, pixel_size_um=PIXEL_UM)
    with pytest.raises(InputError, match="same size"):
        list(rec.opd_frames([holo[:64]]))


def test_configuration_zeros_mean_automatic():
    # beatlab.config writes 0 for "automatic / unused" radius, na and refocus distance
    rng = np.random.default_rng(21)
    holo = render_hologram(_cells(rng), wavelength_nm=LAMBDA_NM, rng=rng)
    a = OffAxisReconstructor.fit(holo, wavelength_nm=LAMBDA_NM, pixel_size_um=PIXEL_UM)
    b = OffAxisReconstructor.fit(
        holo,
        wavelength_nm=LAMBDA_NM,
        pixel_size_um=PIXEL_UM,
        radius=0.0,
        na=0.0,
        refocus_um=0.0,
        autofocus=False,
    )
    assert a.output_shape == b.output_shape and b.refocus_um == 0.0
    np.testing.assert_array_equal(next(a.opd_frames([holo])), next(b.opd_frames([holo])))
    with pytest.raises(ConfigError, match="autofocus"):
        OffAxisReconstructor.fit(
            holo, wavelength_nm=LAMBDA_NM, pixel_size_um=PIXEL_UM, refocus_um=5.0, autofocus=True
        )


@pytest.mark.parametrize("refocus_um", [None, 2.0])
def test_frames_reconstructed_in_threads_are_those_of_one_thread(refocus_um):
    # workers > 1 reconstructs frames in parallel threads, each with one-threaded transforms:
    # the same frames, in the same order, bit for bit (reference: the one-thread stream)
    rng = np.random.default_rng(21)
    opd_at = _cell_model(rng, count=4)
    optics = {"wavelength_nm": LAMBDA_NM, "read_noise_counts": 2.0}
    ref = render_reference(SHAPE, rng=rng, **optics)
    holograms = [
        render_hologram(_on_camera(opd_at) * (1 + 0.03 * k), rng=rng, **optics) for k in range(11)
    ]
    options = {"wavelength_nm": LAMBDA_NM, "pixel_size_um": PIXEL_UM, "reference": ref}
    fits = [
        OffAxisReconstructor.fit(holograms[0], refocus_um=refocus_um, workers=w, **options)
        for w in (1, 3)
    ]
    one, three = (list(rec.opd_frames(iter(holograms))) for rec in fits)
    assert len(three) == len(one) == len(holograms)
    for a, b in zip(one, three, strict=True):
        np.testing.assert_array_equal(a, b)
    assert fits[1]._filter.workers == 3  # the copy used by the threads changed nothing
