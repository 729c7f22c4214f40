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
    assert out == {"n_beating_regions": 1, "mixed": False, "quality_flags": ""}


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
    assert out == {"n_beating_regions": 0, "mixed": False, "quality_flags": ""}
