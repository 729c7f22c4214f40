"""Tests of beatlab.regions: merging clusters that beat together, keeping independent ones."""

import numpy as np
import pandas as pd
import pytest
from skimage.measure import regionprops

from beatlab.errors import ConfigError, InputError
from beatlab.regions import RegionSet, find_regions, region_table
from beatlab.signals.maps import tile_means

FPS = 50.0
PIXEL_UM = 1.5


def _beat_train(period_s, first_s, n_frames, amp_um=0.5):
    """Displacement trace of beats (raised-cosine pulses of 0.4 s) at a fixed period."""
    t = np.arange(n_frames) / FPS
    phase = (t - first_s) % period_s
    pulse = np.where(
        (t >= first_s) & (phase < 0.4), 0.5 * (1 - np.cos(2 * np.pi * phase / 0.4)), 0.0
    )
    return amp_um * pulse


def _label_image():
    """Five clusters: 1-3 are pieces of one sheet, 4 a separate colony, 5 a speck."""
    lab = np.zeros((60, 80), dtype=np.int32)
    lab[5:25, 5:20] = 1
    lab[5:25, 22:40] = 2
    lab[27:40, 5:40] = 3
    lab[10:50, 50:75] = 4
    lab[55:58, 2:5] = 5  # 9 px = 20.25 um^2 < 100 um^2
    return lab


def _traces(rng, n_frames=600):
    sheet = _beat_train(1.0, 0.3, n_frames)
    colony = _beat_train(1.37, 0.75, n_frames)
    rows = [sheet, sheet, sheet, colony, sheet]
    return np.array([r + 0.01 * rng.standard_normal(n_frames) for r in rows])


def test_correlated_pieces_merge_and_independent_rhythm_stays_apart():
    lab = _label_image()
    traces = _traces(np.random.default_rng(0))
    rs = find_regions(lab, traces, pixel_size_um=PIXEL_UM)
    assert isinstance(rs, RegionSet)
    assert rs.n_regions == 2
    assert rs.members == [(1, 2, 3), (4,)]
    assert rs.dropped == (5,)
    assert rs.traces.shape == (2, traces.shape[1])
    assert np.all(rs.labels[lab == 5] == 0)
    assert set(np.unique(rs.labels).tolist()) == {0, 1, 2}
    np.testing.assert_array_equal(rs.labels == 1, np.isin(lab, [1, 2, 3]))
    # area-weighted mean of the members equals the mean over the merged pixels
    px = np.array([np.sum(lab == k) for k in (1, 2, 3)], dtype=float)
    want = (px[:, None] * traces[:3]).sum(axis=0) / px.sum()
    np.testing.assert_allclose(rs.traces[0], want)
    np.testing.assert_allclose(rs.traces[1], traces[3])


def test_areas_and_centroids_match_regionprops():
    lab = _label_image()
    rs = find_regions(lab, _traces(np.random.default_rng(1)), pixel_size_um=PIXEL_UM)
    props = {p.label: p for p in regionprops(rs.labels.astype(np.int32))}
    for r in range(rs.n_regions):
        p = props[r + 1]
        # reference library scikit-image (L): regionprops area (px) and centroid (row, col)
        assert rs.areas_um2[r] == pytest.approx(p.area * PIXEL_UM**2)
        row, col = p.centroid
        assert rs.centroids_um[r, 0] == pytest.approx((col + 0.5) * PIXEL_UM)
        assert rs.centroids_um[r, 1] == pytest.approx((row + 0.5) * PIXEL_UM)


def test_two_independent_rhythms_stay_two():
    lab = np.zeros((30, 30), dtype=np.int32)
    lab[2:14, 2:28] = 1
    lab[16:28, 2:28] = 2
    rng = np.random.default_rng(2)
    n = 800
    traces = np.array(
        [
            _beat_train(0.9, 0.2, n) + 0.01 * rng.standard_normal(n),
            _beat_train(1.45, 0.6, n) + 0.01 * rng.standard_normal(n),
        ]
    )
    rs = find_regions(lab, traces, pixel_size_um=1.0)
    assert rs.members == [(1,), (2,)]
    np.testing.assert_array_equal(rs.labels, lab)


def test_merging_is_transitive():
    # corr(A, B) = 0.89, corr(B, C) = 0.95, corr(A, C) = 0.71: A and C join through B
    rng = np.random.default_rng(3)
    u, v = rng.standard_normal((2, 4000))
    traces = np.array([u, u + 0.5 * v, u + 1.0 * v])
    corr = np.corrcoef(traces)
    assert corr[0, 1] > 0.8 and corr[1, 2] > 0.8 and corr[0, 2] < 0.8
    lab = np.zeros((12, 30), dtype=np.int32)
    lab[1:11, 1:9], lab[1:11, 11:19], lab[1:11, 21:29] = 1, 2, 3
    rs = find_regions(lab, traces, pixel_size_um=4.0)
    assert rs.members == [(1, 2, 3)]


def test_user_rois_are_not_merged_and_keep_their_order():
    lab = _label_image()
    rs = find_regions(lab, _traces(np.random.default_rng(4)), pixel_size_um=PIXEL_UM, merge=False)
    assert rs.members == [(1,), (2,), (3,), (4,)]
    keep = lab != 5
    np.testing.assert_array_equal(rs.labels[keep], lab[keep])
    rs_all = find_regions(
        lab,
        _traces(np.random.default_rng(4)),
        pixel_size_um=PIXEL_UM,
        merge=False,
        min_area_um2=0.0,
    )
    assert rs_all.n_regions == 5 and rs_all.dropped == ()


def test_label_traces_from_tile_means_with_nan_and_gaps():
    lab = np.zeros((20, 20), dtype=np.intp)
    lab[:8, :8] = 2  # label 1 is absent: its row is ignored
    lab[10:, 10:] = 4
    lab[:8, 12:] = 3
    rng = np.random.default_rng(5)
    beat = _beat_train(1.0, 0.1, 200)
    frames = beat[:, None, None] * np.ones((200, 20, 20)) + 0.01 * rng.standard_normal(
        (200, 20, 20)
    )
    frames[:, lab == 3] = rng.standard_normal((200, int(np.sum(lab == 3))))
    frames[50:60, :8, :8] = np.nan
    traces = np.array([tile_means(f, lab, lab.max() + 1)[1:] for f in frames]).T
    assert np.isnan(traces[1, 55])
    rs = find_regions(lab, traces, pixel_size_um=1.0, min_area_um2=10.0)
    assert rs.members == [(2, 4), (3,)]
    # NaN frames of one member: the region trace there is the other member's value
    np.testing.assert_allclose(rs.traces[0, 55], traces[3, 55])
    assert np.all(np.isfinite(rs.traces))


def test_no_regions_and_frozen_result():
    lab = np.zeros((10, 10), dtype=np.int32)
    lab[0, 0] = 1
    rs = find_regions(lab, np.ones((1, 40)), pixel_size_um=1.0)
    assert rs.n_regions == 0 and rs.dropped == (1,)
    assert rs.traces.shape == (0, 40) and rs.centroids_um.shape == (0, 2)
    assert not rs.labels.any()
    with pytest.raises(ValueError, match="read-only"):
        rs.labels[0, 0] = 3
    table = region_table(rs, [])
    assert len(table) == 0 and list(table.columns)[:4] == [
        "region",
        "area_um2",
        "centroid_x_um",
        "centroid_y_um",
    ]


def test_region_table_columns():
    lab = _label_image()
    rs = find_regions(lab, _traces(np.random.default_rng(6)), pixel_size_um=PIXEL_UM)
    summaries = [
        {"beat_count": 6, "beat_rate_bpm": 60.0},
        {"beat_count": 4, "beat_rate_bpm": 43.8, "rhythm": "regular"},
    ]
    table = region_table(rs, summaries)
    assert list(table.columns) == [
        "region",
        "area_um2",
        "centroid_x_um",
        "centroid_y_um",
        "beat_count",
        "beat_rate_bpm",
        "rhythm",
    ]
    assert table["region"].tolist() == [1, 2]
    np.testing.assert_allclose(table["area_um2"], rs.areas_um2)
    np.testing.assert_allclose(table["centroid_y_um"], rs.centroids_um[:, 1])
    assert pd.isna(table.loc[0, "rhythm"]) and table.loc[1, "rhythm"] == "regular"
    with pytest.raises(InputError, match="one dict per region"):
        region_table(rs, summaries[:1])
    with pytest.raises(InputError, match="clashes"):
        region_table(rs, [{"area_um2": 1.0}, {}])


def test_find_regions_validates_inputs():
    lab = _label_image()
    traces = _traces(np.random.default_rng(7))
    with pytest.raises(InputError, match="label_traces"):
        find_regions(lab, traces[:4], pixel_size_um=1.0)
    with pytest.raises(InputError, match="integer"):
        find_regions(lab.astype(float), traces, pixel_size_um=1.0)
    with pytest.raises(InputError, match="pixel_size_um"):
        find_regions(lab, traces, pixel_size_um=0.0)
    with pytest.raises(ConfigError, match="merge_correlation"):
        find_regions(lab, traces, pixel_size_um=1.0, merge_correlation=1.5)
    before = traces.copy()
    find_regions(lab, traces, pixel_size_um=1.0)
    np.testing.assert_array_equal(traces, before)


def _activity(rng, shape=(12, 12), t=300):
    """Block activity: left half beats at one rhythm, right half at another (plus noise)."""
    times = np.arange(t) / 30.0
    a = np.clip(np.sin(2 * np.pi * 0.67 * times), 0, None) ** 4
    b = np.clip(np.sin(2 * np.pi * 1.08 * times + 1.0), 0, None) ** 4
    act = rng.normal(0, 0.05, (t, *shape))
    act[:, :, :6] += a[:, None, None]
    act[:, :, 6:] += b[:, None, None]
    return act


def test_split_regions_separates_independent_halves():
    from beatlab.regions import split_regions

    rng = np.random.default_rng(0)
    labels = np.ones((48, 48), dtype=int)
    out = split_regions(labels, _activity(rng), block_px=4, min_area_px=64)
    assert set(np.unique(out)) == {1, 2}
    assert len(np.unique(out[:, :20])) == 1 and len(np.unique(out[:, 28:])) == 1
    assert out[0, 0] != out[0, -1]


def test_split_regions_keeps_one_rhythm_and_inactive_parts_whole():
    from beatlab.regions import split_regions

    rng = np.random.default_rng(1)
    act = _activity(rng)
    act[:, :, 6:] = act[:, :, :6]  # both halves beat together
    labels = np.ones((48, 48), dtype=int)
    assert set(np.unique(split_regions(labels, act, block_px=4, min_area_px=64))) == {1}
    act = _activity(rng)
    out = split_regions(labels, act, block_px=4, min_area_px=64, active=lambda tr: False)
    assert set(np.unique(out)) == {1}
    labels[:, :2] = 0
    assert (split_regions(labels, act, block_px=4, min_area_px=64)[:, :2] == 0).all()


def test_correlation_matrix_is_pearsons_and_counts_nan_frames_as_the_median():
    """Reference: numpy's corrcoef on rows without NaN; a NaN frame counts as the row's
    median, an all-NaN or constant row correlates with nothing."""
    from beatlab.regions import _correlation_matrix

    rng = np.random.default_rng(12)
    traces = rng.normal(size=(6, 200)).cumsum(axis=1)
    np.testing.assert_allclose(_correlation_matrix(traces), np.corrcoef(traces), atol=1e-12)
    gappy = traces.copy()
    gappy[2, 10:20] = np.nan
    gappy[4] = np.nan
    filled = traces.copy()
    filled[2, 10:20] = np.median(traces[2, np.r_[0:10, 20:200]])
    got = _correlation_matrix(gappy)
    np.testing.assert_allclose(got[2, [0, 1, 3, 5]], np.corrcoef(filled)[2, [0, 1, 3, 5]],
                               atol=1e-12)  # fmt: skip
    assert not got[4].any() and not got[:, 4].any()
