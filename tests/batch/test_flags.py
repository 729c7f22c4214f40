"""Quality flags: listed, never dropped; each rule fires on its own condition only."""

import pandas as pd
import pytest

from beatlab.batch.flags import FLAG_RULES, quality_columns

GOOD = {
    "beat_count": 8,
    "quality_snr": 40.0,
    "quality_drift_max_um": 0.3,
    "quality_masked_fraction": 0.4,
    "quality_velocity_unresolved_beats": 0,
}
ONE_REGION = pd.DataFrame({"region": [1], "beat_count": [8]})


def test_a_clean_recording_has_no_flags():
    out = quality_columns(GOOD, ONE_REGION)
    assert out == {
        "n_beating_regions": 1,
        "mixed": False,
        "quality_flags": "",
        "measured_region": 0,
    }


@pytest.mark.parametrize(
    ("change", "flag"),
    [
        ({"beat_count": 2}, "few beats"),
        ({"quality_snr": 9.9}, "low snr"),
        ({"quality_snr": None}, "low snr"),
        ({"quality_drift_max_um": 2.5}, "drift"),
        ({"quality_masked_fraction": 0.01}, "small mask"),
        ({"quality_velocity_unresolved_beats": 3}, "velocity unresolved"),
    ],
)
def test_each_rule_fires_alone(change, flag):
    assert flag in FLAG_RULES
    out = quality_columns({**GOOD, **change}, ONE_REGION)
    assert out["quality_flags"] == flag


def test_two_regions_beating_on_their_own_are_mixed():
    regions = pd.DataFrame({"region": [1, 2, 3], "beat_count": [9, 5, 1]})
    out = quality_columns(GOOD, regions)
    assert out["n_beating_regions"] == 2 and out["mixed"] is True
    assert out["quality_flags"] == "mixed regions"


def test_an_arrested_recording_is_a_result_not_a_low_snr():
    out = quality_columns({**GOOD, "beat_count": 0, "quality_snr": None}, ONE_REGION.iloc[:0])
    assert out["quality_flags"] == "" and out["mixed"] is False


def test_the_dominant_region_replaces_the_whole_field_numbers():
    from beatlab.batch.flags import dominant_region

    row = {"beat_count": 15, "beat_rate_bpm": 95.4, "quality_snr": 20.0, "rhythm": "irregular"}
    regions = pd.DataFrame(
        {
            "region": [1, 2, 3],
            "area_um2": [900.0, 2500.0, 4000.0],
            "beat_count": [9, 6, 0],  # region 3 is the largest but does not beat
            "beat_rate_bpm": [80.0, 50.0, 0.0],
            "rhythm": ["regular", "regular", "quiescent"],
            "snr": [30.0, 25.0, None],
        }
    )
    beats = pd.DataFrame(
        {"region": [1] * 9 + [2] * 6, "beat": list(range(1, 10)) + list(range(1, 7))}
    )
    out, own = dominant_region(row, regions, beats)
    assert out["measured_region"] == 2
    assert out["beat_count"] == 6 and out["beat_rate_bpm"] == 50.0
    assert out["rhythm"] == "regular" and out["quality_snr"] == 25.0
    assert len(own) == 6 and "region" not in own.columns
    # no region at all: the whole field stays
    out, own = dominant_region(row, regions.iloc[:0], beats.iloc[:0])
    assert out["measured_region"] == 0 and out["beat_count"] == 15
