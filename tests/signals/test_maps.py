"""Tests of beatlab.signals.maps (tile reduction) and beatlab.maps (beating maps, propagation)."""

import math

import numpy as np
import pytest

from beatlab.errors import BeatlabWarning, ConfigError, InputError
from beatlab.maps import build_maps, estimate_propagation
from beatlab.signals.maps import tile_grid_shape, tile_labels, tile_means

NY, NX, TILE_UM = 8, 10, 20.0
RISE_S, DECAY_S = 0.15, 0.3
#: 10 % upstroke crossing of the raised-cosine rise: 0.5 (1 - cos(pi s / rise)) = 0.1.
ONSET_LAG_S = RISE_S * math.acos(0.8) / math.pi
BEAT_STARTS_S = np.array([0.5, 1.5, 2.5, 3.2])


def _pulse(s):
    """Raised-cosine rise over RISE_S then raised-cosine fall over DECAY_S, peak 1."""
    out = np.zeros_like(s)
    up = (s >= 0) & (s < RISE_S)
    out[up] = 0.5 * (1 - np.cos(np.pi * s[up] / RISE_S))
    down = (s >= RISE_S) & (s < RISE_S + DECAY_S)
    out[down] = 0.5 * (1 + np.cos(np.pi * (s[down] - RISE_S) / DECAY_S))
    return out


def _simulate(
    fps, *, speed_cm_s, direction_deg, amp_um, noise_um, rng, duration_s=4.0, starts_s=None
):
    """Tile traces of a plane wave of contraction with known per-tile delays (ground truth).

    ``amp_um`` is a scalar or one amplitude per tile (0 = a tile that does not beat).
    """
    starts = BEAT_STARTS_S if starts_s is None else np.asarray(starts_s, dtype=float)
    t = np.arange(round(duration_s * fps)) / fps
    iy, ix = np.mgrid[0:NY, 0:NX]
    x = (ix.ravel() + 0.5) * TILE_UM
    y = (iy.ravel() + 0.5) * TILE_UM
    theta = math.radians(direction_deg)
    delay = (x * math.cos(theta) + y * math.sin(theta)) / (speed_cm_s * 1e4)
    delay -= delay.mean()
    amp = np.broadcast_to(np.asarray(amp_um, dtype=float), (NY * NX,))
    traces = np.full((t.size, NY * NX), 0.1)
    rest = np.ones(t.size, dtype=bool)
    for s0 in starts:
        traces += amp * _pulse(t[:, None] - s0 - delay[None, :])
        rest &= ~((t > s0 + delay.min() - 0.05) & (t < s0 + delay.max() + RISE_S + DECAY_S + 0.05))
    traces += noise_um * rng.standard_normal(traces.shape)
    return {
        "tile_traces": traces,
        "times_s": t,
        "onsets_s": starts + ONSET_LAG_S,
        "peaks_s": starts + RISE_S,
        "rest_frames": rest,
        "delay_s": delay.reshape(NY, NX),
    }


def _maps(sim, coverage=None, **options):
    cov = np.ones(NY * NX) if coverage is None else coverage
    return build_maps(
        sim["tile_traces"],
        sim["times_s"],
        grid_shape=(NY, NX),
        tile_um=TILE_UM,
        onsets_s=sim["onsets_s"],
        peaks_s=sim["peaks_s"],
        rest_frames=sim["rest_frames"],
        tile_coverage=cov,
        **options,
    )


def _angle_diff_deg(a, b):
    return abs((a - b + 180.0) % 360.0 - 180.0)


# --- tiles ------------------------------------------------------------------------------------


def test_tile_labels_row_major_with_partial_edge_tiles():
    idx = tile_labels((10, 13), tile_px=4)
    assert tile_grid_shape((10, 13), tile_px=4) == (3, 4)
    assert idx.shape == (10, 13)
    assert idx[0, 0] == 0 and idx[0, 12] == 3 and idx[4, 0] == 4 and idx[9, 12] == 11
    counts = np.bincount(idx.ravel())
    # full tiles hold 16 pixels, the right column 4 x 1, the bottom row 2 x 4, the corner 2 x 1
    assert counts.tolist() == [16, 16, 16, 4, 16, 16, 16, 4, 8, 8, 8, 2]


@pytest.mark.parametrize("bad", [0, -3, 2.5, True])
def test_tile_labels_rejects_bad_tile_size(bad):
    with pytest.raises(ConfigError, match="tile_px"):
        tile_labels((8, 8), tile_px=bad)


def _loop_means(image, index, n, weights=None):
    out = np.full(n, np.nan)
    w_all = np.ones(image.shape) if weights is None else weights
    for k in range(n):
        sel = (index == k) & np.isfinite(image)
        w = w_all[sel]
        if w.sum() > 0:
            out[k] = np.sum(image[sel] * w) / w.sum()
    return out


@pytest.mark.parametrize("with_nan", [False, True])
@pytest.mark.parametrize("with_weights", [False, True])
@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_tile_means_equals_per_tile_loop(with_nan, with_weights, dtype):
    rng = np.random.default_rng(1)
    image = rng.random((37, 29)).astype(dtype)
    if with_nan:
        image[rng.random(image.shape) < 0.2] = np.nan
        image[:8, :8] = np.nan  # tile 0 entirely NaN
    index = tile_labels(image.shape, tile_px=8)
    n = int(np.prod(tile_grid_shape(image.shape, tile_px=8)))
    weights = (rng.random(image.shape) > 0.4).astype(float) if with_weights else None
    got = tile_means(image, index, n, weights=weights)
    want = _loop_means(image.astype(np.float64), index, n, weights)
    np.testing.assert_allclose(got, want, rtol=1e-6, equal_nan=True)
    if with_nan:
        assert np.isnan(got[0])
    assert got.shape == (n,) and got.dtype == np.float64


def test_tile_means_does_not_mutate_and_rejects_bad_index():
    image = np.arange(16.0).reshape(4, 4)
    image[0, 0] = np.nan
    before = image.copy()
    index = tile_labels(image.shape, tile_px=2)
    tile_means(image, index, 4)
    np.testing.assert_array_equal(image, before)
    with pytest.raises(InputError, match="n_tiles"):
        tile_means(image, index, 3)
    with pytest.raises(InputError, match="non-negative"):
        tile_means(image, index - 1, 4)
    with pytest.raises(InputError, match="shape"):
        tile_means(image[:3], index, 4)


# --- maps -------------------------------------------------------------------------------------


@pytest.mark.parametrize("direction_deg", [30.0, 135.0, 260.0])
def test_resolved_wave_at_1000_fps_recovers_speed_and_direction(direction_deg):
    sim = _simulate(
        1000.0,
        speed_cm_s=2.0,
        direction_deg=direction_deg,
        amp_um=0.5,
        noise_um=0.01,
        rng=np.random.default_rng(2),
    )
    maps = _maps(sim)
    prop = maps["propagation"]
    assert prop["resolved"] is True, prop["reason"]
    assert prop["speed_cm_s"] == pytest.approx(2.0, rel=0.10)
    assert _angle_diff_deg(prop["direction_deg"], direction_deg) < 10.0
    assert prop["r2"] >= 0.5 and prop["n_tiles"] == NY * NX
    assert maps["beating"].all() and maps["beating_area_fraction"] == pytest.approx(1.0)
    np.testing.assert_allclose(maps["peak_displacement_um"], 0.5, rtol=0.05)
    np.testing.assert_allclose(maps["noise_um"], 0.01, rtol=0.3)
    # per-tile delays relative to one another (the global onset sets only a constant)
    rel = maps["onset_delay_s"] - np.mean(maps["onset_delay_s"])
    np.testing.assert_allclose(rel, sim["delay_s"], atol=2e-3)


def test_same_wave_at_30_fps_is_not_resolved():
    sim = _simulate(
        30.0,
        speed_cm_s=2.0,
        direction_deg=30.0,
        amp_um=0.5,
        noise_um=0.01,
        rng=np.random.default_rng(3),
    )
    maps = _maps(sim)
    prop = maps["propagation"]
    assert prop["resolved"] is False
    assert prop["speed_cm_s"] is None and prop["direction_deg"] is None
    assert "not resolved at 30 fps" in prop["reason"]
    assert maps["beating"].all()
    assert np.all(np.isfinite(maps["onset_delay_s"]))


def test_noise_only_tiles_and_low_coverage():
    rng = np.random.default_rng(4)
    amp = np.full(NY * NX, 0.4)
    amp[: 2 * NX] = 0.0  # the top two rows only carry noise
    sim = _simulate(100.0, speed_cm_s=20.0, direction_deg=0.0, amp_um=amp, noise_um=0.02, rng=rng)
    coverage = np.ones(NY * NX)
    coverage[-NX:] = 0.2  # bottom row mostly outside the mask: not assessed
    coverage[-2 * NX : -NX] = 0.5  # second-to-last row counts half
    maps = _maps(sim, coverage=coverage)
    beating = maps["beating"]
    assert not beating[:2].any()
    assert beating[2:-1].all()
    assert np.all(np.isnan(maps["onset_delay_s"][:2]))
    for key in ("peak_displacement_um", "noise_um", "onset_delay_s"):
        assert np.all(np.isnan(maps[key][-1])), key
    assert not beating[-1].any() and not maps["assessed"][-1].any()
    # assessed area: 7 rows, one of them at half coverage; beating: rows 2..6
    want = (4 * NX + 0.5 * NX) / (6 * NX + 0.5 * NX)
    assert maps["beating_area_fraction"] == pytest.approx(want)
    assert maps["propagation"]["resolved"] is False


def test_no_beats_gives_zero_area_and_unresolved():
    sim = _simulate(
        100.0,
        speed_cm_s=2.0,
        direction_deg=0.0,
        amp_um=0.0,
        noise_um=0.02,
        rng=np.random.default_rng(5),
        starts_s=[],
    )
    assert sim["rest_frames"].all()
    maps = _maps(sim)
    assert maps["beating_area_fraction"] == 0.0
    assert not maps["beating"].any()
    assert np.all(np.isnan(maps["peak_displacement_um"]))
    assert np.all(np.isfinite(maps["noise_um"]))
    assert maps["propagation"]["resolved"] is False
    assert maps["propagation"]["reason"] == "no beats"
    assert maps["peak_displacement_um"].shape == (NY, NX)
    with pytest.raises(ConfigError, match="min_r2"):
        _maps(sim, min_r2=2.0)  # options are checked even when there is nothing to fit


def test_build_maps_does_not_mutate_inputs_and_warns_without_rest():
    sim = _simulate(
        100.0,
        speed_cm_s=2.0,
        direction_deg=0.0,
        amp_um=0.3,
        noise_um=0.01,
        rng=np.random.default_rng(6),
    )
    before = sim["tile_traces"].copy()
    _maps(sim)
    np.testing.assert_array_equal(sim["tile_traces"], before)
    sim["rest_frames"] = np.zeros_like(sim["rest_frames"])
    with pytest.warns(BeatlabWarning, match="rest_frames"):
        maps = _maps(sim)
    assert not maps["assessed"].any()
    assert math.isnan(maps["beating_area_fraction"])


def test_build_maps_validates_inputs():
    sim = _simulate(
        100.0,
        speed_cm_s=2.0,
        direction_deg=0.0,
        amp_um=0.3,
        noise_um=0.01,
        rng=np.random.default_rng(7),
    )
    with pytest.raises(InputError, match="grid_shape"):
        build_maps(
            sim["tile_traces"],
            sim["times_s"],
            grid_shape=(NY, NX + 1),
            tile_um=TILE_UM,
            onsets_s=sim["onsets_s"],
            peaks_s=sim["peaks_s"],
            rest_frames=sim["rest_frames"],
            tile_coverage=np.ones(NY * NX),
        )
    with pytest.raises(InputError, match="rest_frames"):
        sim_bad = dict(sim, rest_frames=sim["rest_frames"].astype(int))
        _maps(sim_bad)
    with pytest.raises(ConfigError, match="min_snr"):
        _maps(sim, min_snr=0.0)


# --- propagation ------------------------------------------------------------------------------


def _plane_delays(speed_cm_s, direction_deg, shape=(6, 7), tile_um=25.0):
    iy, ix = np.mgrid[0 : shape[0], 0 : shape[1]]
    x, y = (ix + 0.5) * tile_um, (iy + 0.5) * tile_um
    theta = math.radians(direction_deg)
    return (x * math.cos(theta) + y * math.sin(theta)) / (speed_cm_s * 1e4)


@pytest.mark.parametrize("direction_deg", [0.0, 90.0, 200.0, 315.0])
def test_exact_plane_with_outliers(direction_deg):
    delays = _plane_delays(1.5, direction_deg)
    delays[1, 2] += 0.05  # two gross outliers: rejected by the one refit pass
    delays[4, 5] -= 0.04
    delays[0, 0] = np.nan  # a tile that does not beat
    prop = estimate_propagation(delays, tile_um=25.0, frame_interval_s=1e-3)
    assert prop["resolved"] is True
    assert prop["speed_cm_s"] == pytest.approx(1.5, rel=1e-9)
    assert _angle_diff_deg(prop["direction_deg"], direction_deg) < 1e-6
    assert prop["r2"] == pytest.approx(1.0)
    assert prop["n_tiles"] == 41


def test_propagation_needs_enough_tiles_and_a_plane():
    plane = _plane_delays(1.0, 45.0, shape=(4, 4), tile_um=10.0)
    delays = np.full((4, 4), np.nan)
    delays[0, :3] = plane[0, :3]
    prop = estimate_propagation(delays, tile_um=10.0, frame_interval_s=1e-3)
    assert prop["resolved"] is False and "need 6" in prop["reason"]
    delays[1:3] = plane[1:3]
    prop = estimate_propagation(delays, tile_um=10.0, frame_interval_s=1e-3)
    assert prop["resolved"] is True and prop["speed_cm_s"] == pytest.approx(1.0)
    line = np.full((4, 8), np.nan)
    line[2] = np.linspace(0.0, 0.05, 8)
    prop = estimate_propagation(line, tile_um=10.0, frame_interval_s=1e-3)
    assert prop["resolved"] is False and "line" in prop["reason"]


def test_propagation_rejects_unexplained_delays():
    rng = np.random.default_rng(8)
    delays = rng.uniform(0.0, 0.05, size=(6, 6))  # large but random: no plane
    prop = estimate_propagation(delays, tile_um=20.0, frame_interval_s=1e-3)
    assert prop["resolved"] is False
    assert prop["r2"] < 0.5 and "r2" in prop["reason"]
