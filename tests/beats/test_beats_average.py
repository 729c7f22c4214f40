import numpy as np
import pandas as pd
import pytest

from beatlab.beats import average_beat
from beatlab.errors import InputError


def _pulse(t):
    return np.exp(-0.5 * ((t - 0.2) / 0.05) ** 2) * (t >= 0)


def test_average_of_identical_beats_is_the_beat():
    t = np.arange(0, 10, 0.01)
    onsets = np.array([1.0, 3.0, 5.0, 7.0])
    y = sum(_pulse(t - o) for o in onsets)
    avg = average_beat(t, {"displacement_um": y}, onsets, pre_s=0.1, post_s=1.0)
    assert list(avg.columns) == ["time_s", "n_beats", "displacement_um_mean", "displacement_um_sd"]
    assert avg["time_s"].iloc[0] == pytest.approx(-0.1)
    assert avg["time_s"].iloc[-1] == pytest.approx(1.0)
    np.testing.assert_allclose(np.diff(avg["time_s"]), 0.01)
    np.testing.assert_allclose(
        avg["displacement_um_mean"], _pulse(avg["time_s"].to_numpy()), atol=1e-9
    )
    np.testing.assert_allclose(avg["displacement_um_sd"], 0.0, atol=1e-9)
    assert (avg["n_beats"] == 4).all()


def test_mean_and_sd_over_scaled_beats_with_sub_frame_onsets():
    t = np.arange(0, 10, 0.02)
    onsets = np.array([1.003, 4.011, 7.017])
    scales = np.array([1.0, 2.0, 3.0])
    y = sum(s * _pulse(t - o) for s, o in zip(scales, onsets, strict=True))
    avg = average_beat(t, {"y": y, "minus_y": -y}, onsets, pre_s=0.0, post_s=0.5)
    peak = int(np.argmin(np.abs(avg["time_s"] - 0.2)))
    # linear interpolation at sub-frame offsets flattens this pulse top by up to h^2/(8 s^2)
    # = 2 % at 50 fps
    assert avg["y_mean"].iloc[peak] == pytest.approx(2.0, rel=0.02)
    assert avg["y_sd"].iloc[peak] == pytest.approx(np.std(scales, ddof=1), rel=0.02)
    np.testing.assert_allclose(avg["minus_y_mean"], -avg["y_mean"])


def test_default_window_and_edges_count_as_missing():
    t = np.arange(0, 5, 0.05)
    onsets = np.array([0.05, 2.0, 3.95, np.nan])
    y = sum(_pulse(t - o) for o in onsets[:3])
    avg = average_beat(t, {"y": y}, onsets)
    # post_s defaults to the median onset interval, 1.95 s
    assert avg["time_s"].iloc[-1] == pytest.approx(1.95)
    # before the first frame and after the last one some beats are missing
    assert avg["n_beats"].iloc[0] == 2
    assert avg["n_beats"].max() == 3
    assert avg["n_beats"].iloc[-1] == 2
    single = average_beat(t, {"y": y}, [3.95])
    # one onset: up to the recording end, and no SD
    assert single["time_s"].iloc[-1] == pytest.approx(1.0)
    assert single["y_sd"].isna().all() and (single["n_beats"] == 1).all()


def test_no_onsets_gives_empty_frame():
    t = np.arange(0, 1, 0.1)
    avg = average_beat(t, {"y": np.zeros(10)}, np.array([np.nan]))
    assert isinstance(avg, pd.DataFrame) and len(avg) == 0
    assert list(avg.columns) == ["time_s", "n_beats", "y_mean", "y_sd"]


def test_average_errors():
    t = np.arange(0, 1, 0.1)
    with pytest.raises(InputError, match="traces"):
        average_beat(t, {}, [0.2])
    with pytest.raises(InputError, match="one value per time"):
        average_beat(t, {"y": np.zeros(5)}, [0.2])
    with pytest.raises(InputError, match="post_s"):
        average_beat(t, {"y": np.zeros(10)}, [0.2], post_s=-1.0)
