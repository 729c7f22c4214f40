import math
import warnings

import numpy as np
import pandas as pd
import pytest

from beatlab.batch.wells import aggregate_wells, normalize_wells
from beatlab.errors import BeatlabWarning, InputError

nan = np.nan


def _recordings():
    """Well A1 with 3 fields of view, the third failed; well B1 with one excluded field."""
    return pd.DataFrame(
        {
            "recording_id": ["P1_A1_1", "P1_A1_2", "P1_A1_3", "P1_B1_1", "P1_B1_2"],
            "layout_row": [2, 3, 4, 5, 6],
            "plate": ["P1"] * 5,
            "well": ["A1", "A1", "A1", "B1", "B1"],
            "fov": ["1", "2", "3", "1", "2"],
            "timepoint": ["pre"] * 5,
            "compound": ["cA", "cA", "cA", "", ""],
            "operator": ["ann", "bob", "ann", "ann", "ann"],
            "role": ["sample", "sample", "sample", "vehicle", "vehicle"],
            "exclude": [False, False, False, False, True],
            "exclude_reason": ["", "", "", "", "out of focus"],
            "status": ["ok", "ok", "error", "ok", "ok"],
            "error": ["", "", "too short", "", ""],
            "source": ["a", "b", "c", "d", "e"],
            "frames": [300, 300, 10, 300, 300],
            "beat_count": [10, 14, nan, 8, 99],
            "beat_rate_bpm": [60.0, 80.0, nan, 50.0, 500.0],
            "duration_90_s": [0.40, nan, nan, 0.50, 9.0],
            "rhythm": ["regular", "irregular", None, "regular", "quiescent"],
            "quality_mask_method": ["threshold", "confluent", None, "all", "all"],
        }
    )


METRICS = ["beat_count", "beat_rate_bpm", "duration_90_s", "rhythm", "quality_mask_method"]


def test_three_fields_of_view_with_one_failed():
    wells = aggregate_wells(_recordings(), metrics=METRICS)
    a1 = wells.set_index("well").loc["A1"]
    assert (a1["n_fov"], a1["n_fov_failed"], a1["n_fov_excluded"]) == (2, 1, 0)
    assert a1["status"] == "ok"
    assert a1["error"] == "too short"
    assert a1["beat_rate_bpm"] == pytest.approx(70.0)  # (60 + 80) / 2; the failed fov left out
    assert a1["duration_90_s"] == pytest.approx(0.40)  # NaN of fov 2 skipped
    assert a1["beat_count"] == pytest.approx(12.0)  # averaged like the rest
    assert a1["beats_total"] == pytest.approx(24.0)  # 10 + 14
    assert a1["well_id"] == "P1_A1_pre"
    assert a1["compound"] == "cA"  # constant within the well
    assert a1["operator"] == "ann;bob"  # differs: distinct values joined
    assert a1["quality_mask_method"] == "threshold"  # tie with confluent: the first
    assert a1["fov"] == "1;2;3"
    assert a1["recording_id"] == "P1_A1_1;P1_A1_2;P1_A1_3"
    assert "source" not in wells.columns and "frames" not in wells.columns  # analysis outputs


def test_excluded_fields_of_view_are_not_used():
    b1 = aggregate_wells(_recordings(), metrics=METRICS).set_index("well").loc["B1"]
    assert (b1["n_fov"], b1["n_fov_failed"], b1["n_fov_excluded"]) == (1, 0, 1)
    assert b1["beat_rate_bpm"] == pytest.approx(50.0)
    assert b1["rhythm"] == "regular"
    assert not b1["exclude"]
    assert b1["exclude_reason"] == "out of focus"


def test_numeric_metrics_are_the_mean_not_the_median():
    recordings = _recordings()
    recordings.loc[2, ["status", "beat_rate_bpm"]] = ["ok", 130.0]
    a1 = aggregate_wells(recordings, metrics=METRICS).set_index("well").loc["A1"]
    assert a1["beat_rate_bpm"] == pytest.approx(90.0)  # (60 + 80 + 130) / 3; the median is 80


def test_rhythm_takes_the_most_severe_class_and_other_text_the_most_common():
    recordings = _recordings()
    recordings.loc[2, ["status", "rhythm", "quality_mask_method"]] = ["ok", "regular", "threshold"]
    recordings.loc[0, "quality_mask_method"] = "confluent"
    a1 = aggregate_wells(recordings, metrics=METRICS).set_index("well").loc["A1"]
    assert a1["rhythm"] == "irregular"  # regular, irregular, regular: the most severe
    assert a1["rhythm_fov_counts"] == "regular:2;irregular:1"
    assert a1["quality_mask_method"] == "confluent"  # confluent, confluent, threshold


def test_quiescent_outranks_regular_and_regular_outranks_undetermined():
    recordings = _recordings().iloc[:2].copy()
    recordings["rhythm"] = ["regular", "quiescent"]
    assert aggregate_wells(recordings, metrics=["rhythm"]).loc[0, "rhythm"] == "quiescent"
    recordings["rhythm"] = ["undetermined", "regular"]
    assert aggregate_wells(recordings, metrics=["rhythm"]).loc[0, "rhythm"] == "regular"


def test_a_well_whose_every_field_failed_is_kept_with_null_metrics():
    recordings = _recordings()
    recordings.loc[:2, "status"] = "error"
    wells = aggregate_wells(recordings, metrics=METRICS)
    a1 = wells.set_index("well").loc["A1"]
    assert len(wells) == 2
    assert a1["status"] == "error"
    assert a1["n_fov"] == 0 and a1["n_fov_failed"] == 3
    assert math.isnan(a1["beat_rate_bpm"]) and math.isnan(a1["beats_total"])
    assert pd.isna(a1["rhythm"])


def test_a_well_whose_every_field_is_excluded_has_status_excluded():
    recordings = _recordings()
    recordings.loc[3, "exclude"] = True
    b1 = aggregate_wells(recordings, metrics=METRICS).set_index("well").loc["B1"]
    assert b1["status"] == "excluded" and b1["exclude"]
    assert math.isnan(b1["beat_rate_bpm"])


def test_wells_keep_the_order_of_first_appearance_and_split_timepoints():
    recordings = _recordings()
    recordings.loc[1, "timepoint"] = "post"
    wells = aggregate_wells(recordings.iloc[::-1], metrics=["beat_rate_bpm"])
    assert list(wells["well_id"]) == ["P1_B1_pre", "P1_A1_pre", "P1_A1_post"]
    assert list(wells["n_fov"]) == [1, 1, 1]


def test_recordings_read_back_from_csv(tmp_path):
    path = tmp_path / "recordings.csv"
    recordings = _recordings()
    recordings["timepoint"] = [0, 0, 0, 0, 0]
    recordings.to_csv(path, index=False)
    wells = aggregate_wells(pd.read_csv(path), metrics=METRICS)
    b1 = wells.set_index("well").loc["B1"]
    assert b1["n_fov_excluded"] == 1 and b1["beat_rate_bpm"] == pytest.approx(50.0)
    assert b1["well_id"] == "P1_B1_0"


def test_recordings_without_a_well_are_units_of_their_own():
    recordings = _recordings().drop(columns=["well"])
    wells = aggregate_wells(recordings, metrics=["beat_rate_bpm"])
    assert list(wells["well_id"]) == list(recordings["recording_id"])
    assert list(wells["n_fov"]) == [1, 1, 0, 1, 0]


def test_missing_metric_column():
    with pytest.raises(InputError, match="'ibi_cv'"):
        aggregate_wells(_recordings(), metrics=["ibi_cv"])


# --- normalisation ---------------------------------------------------------------------------


def _wells(rows):
    columns = ["plate", "well", "timepoint", "role", "status", "beat_rate_bpm",
               "duration_90_s", "irregular_fraction"]  # fmt: skip
    return pd.DataFrame(rows, columns=columns)


TWO_TIMEPOINTS = _wells(
    [
        ("P1", "A1", "pre", "vehicle", "ok", 60.0, 0.40, 0.0),
        ("P1", "A2", "pre", "vehicle", "ok", 50.0, 0.50, 0.0),
        ("P1", "B1", "pre", "sample", "ok", 80.0, 0.40, 0.0),
        ("P2", "A1", "pre", "vehicle", "ok", 60.0, 0.40, 0.0),
        ("P2", "B1", "pre", "sample", "ok", 60.0, 0.40, 0.0),
        ("P1", "A1", "post", "vehicle", "ok", 66.0, 0.40, 0.1),
        ("P1", "A2", "post", "vehicle", "ok", 60.0, 0.55, 0.0),
        ("P1", "B1", "post", "sample", "ok", 40.0, 0.60, 0.5),
        ("P2", "A1", "post", "vehicle", "ok", 30.0, 0.40, 0.0),
        ("P2", "B1", "post", "sample", "ok", 60.0, 0.40, 0.0),
    ]
)
METRICS_N = ["beat_rate_bpm", "duration_90_s", "irregular_fraction"]


def test_double_normalisation_on_a_hand_worked_example():
    out = normalize_wells(TWO_TIMEPOINTS, metrics=METRICS_N).set_index(
        ["plate", "well", "timepoint"]
    )
    # Rate, plate P1: vehicle A1 60 -> 66 is +10 %, vehicle A2 50 -> 60 is +20 %: mean +15 %.
    # Sample B1 80 -> 40 is -50 %, so -50 - 15 = -65; the vehicles give 10 - 15 = -5, 20 - 15 = 5.
    b1 = out.loc[("P1", "B1", "post")]
    assert b1["beat_rate_bpm_change"] == pytest.approx(-50.0)
    assert b1["beat_rate_bpm_norm"] == pytest.approx(-65.0)
    assert out.loc[("P1", "A1", "post"), "beat_rate_bpm_norm"] == pytest.approx(-5.0)
    assert out.loc[("P1", "A2", "post"), "beat_rate_bpm_norm"] == pytest.approx(5.0)
    # Plate P2 has its own vehicle: 60 -> 30 is -50 %; sample 60 -> 60 is 0 %, so 0 - (-50) = 50.
    assert out.loc[("P2", "B1", "post"), "beat_rate_bpm_norm"] == pytest.approx(50.0)
    # Duration, P1: vehicles 0 % and +10 % (mean 5 %); sample 0.40 -> 0.60 is +50 %: 50 - 5 = 45.
    assert b1["duration_90_s_change"] == pytest.approx(50.0)
    assert b1["duration_90_s_norm"] == pytest.approx(45.0)
    # Irregular fraction is a difference metric: vehicles +0.1 and 0 (mean 0.05); sample +0.5.
    assert b1["irregular_fraction_change"] == pytest.approx(0.5)
    assert b1["irregular_fraction_norm"] == pytest.approx(0.45)
    assert set(out["normalization"]) == {"baseline-vehicle"}
    assert set(out["baseline_timepoint"]) == {"pre"}
    # At the baseline itself every change is 0.
    assert (out.xs("pre", level="timepoint")["beat_rate_bpm_norm"] == 0).all()


def test_normalisation_does_not_change_its_input():
    before = TWO_TIMEPOINTS.copy()
    normalize_wells(TWO_TIMEPOINTS, metrics=METRICS_N)
    pd.testing.assert_frame_equal(TWO_TIMEPOINTS, before)


def test_vehicle_only_normalisation_with_a_single_timepoint():
    wells = TWO_TIMEPOINTS[TWO_TIMEPOINTS["timepoint"] == "post"]
    out = normalize_wells(wells, metrics=METRICS_N).set_index(["plate", "well"])
    # P1 vehicle rates 66 and 60: mean 63; sample 40 is 100 (40 - 63) / 63 = -36.507936... %.
    assert out.loc[("P1", "B1"), "beat_rate_bpm_norm"] == pytest.approx(100 * (40 - 63) / 63)
    assert out.loc[("P1", "A1"), "beat_rate_bpm_norm"] == pytest.approx(100 * 3 / 63)
    # Difference metric: vehicle irregular fractions 0.1 and 0 (mean 0.05); sample 0.5 -> 0.45.
    assert out.loc[("P1", "B1"), "irregular_fraction_norm"] == pytest.approx(0.45)
    # P2: the vehicle rate 30; the sample 60 is +100 %.
    assert out.loc[("P2", "B1"), "beat_rate_bpm_norm"] == pytest.approx(100.0)
    assert out["beat_rate_bpm_change"].isna().all()  # no baseline: no change from it
    assert set(out["normalization"]) == {"vehicle"}
    assert set(out["baseline_timepoint"]) == {""}


def test_difference_metrics_survive_a_zero_baseline():
    as_difference = normalize_wells(TWO_TIMEPOINTS, metrics=["irregular_fraction"])
    as_percent = normalize_wells(
        TWO_TIMEPOINTS, metrics=["irregular_fraction"], difference_metrics=()
    )
    sample = (TWO_TIMEPOINTS["well"] == "B1") & (TWO_TIMEPOINTS["timepoint"] == "post")
    assert as_difference.loc[sample, "irregular_fraction_change"].tolist() == [0.5, 0.0]
    assert as_percent.loc[sample, "irregular_fraction_change"].isna().all()  # 0 baseline


def test_an_arrested_well_stays_in_with_rate_minus_100_percent():
    wells = pd.DataFrame(
        {
            "plate": ["P1"] * 4,
            "well": ["A1", "B1", "A1", "B1"],
            "timepoint": ["pre", "pre", "post", "post"],
            "role": ["vehicle", "sample", "vehicle", "sample"],
            "status": ["ok"] * 4,
            "beat_rate_bpm": [60.0, 60.0, 60.0, 0.0],
            "displacement_um": [1.0, 2.0, 1.0, nan],
        }
    )
    out = normalize_wells(wells, metrics=["beat_rate_bpm", "displacement_um"])
    arrested = out.iloc[3]
    assert len(out) == 4
    assert arrested["beat_rate_bpm_change"] == pytest.approx(-100.0)
    assert arrested["beat_rate_bpm_norm"] == pytest.approx(-100.0)  # the vehicle did not change
    assert math.isnan(arrested["displacement_um_change"])
    assert math.isnan(arrested["displacement_um_norm"])
    assert arrested["normalization"] == "baseline-vehicle"


def test_baseline_named_pre_is_chosen_even_when_not_first():
    wells = TWO_TIMEPOINTS.iloc[[5, 6, 7, 0, 1, 2]]
    out = normalize_wells(wells, metrics=["beat_rate_bpm"])
    assert set(out["baseline_timepoint"]) == {"pre"}
    sample = out[(out["well"] == "B1") & (out["timepoint"] == "post")]
    assert sample["beat_rate_bpm_norm"].item() == pytest.approx(-65.0)


def test_explicit_baseline_timepoint():
    wells = TWO_TIMEPOINTS[TWO_TIMEPOINTS["plate"] == "P1"]
    out = normalize_wells(wells, metrics=["beat_rate_bpm"], baseline_timepoint="post")
    b1_pre = out[(out["well"] == "B1") & (out["timepoint"] == "pre")]
    assert b1_pre["beat_rate_bpm_change"].item() == pytest.approx(100.0)  # 40 -> 80
    with pytest.raises(InputError, match=r"baseline_timepoint 'day 2'.*'pre', 'post'"):
        normalize_wells(wells, metrics=["beat_rate_bpm"], baseline_timepoint="day 2")


def test_numeric_timepoints_from_a_csv_match_the_baseline():
    wells = TWO_TIMEPOINTS.replace({"timepoint": {"pre": 0.0, "post": 30.0}})
    out = normalize_wells(wells, metrics=["beat_rate_bpm"], baseline_timepoint=0)
    assert set(out["baseline_timepoint"]) == {"0"}
    assert out.loc[7, "beat_rate_bpm_norm"] == pytest.approx(-65.0)


def test_well_without_its_baseline_falls_back_to_the_vehicle():
    wells = TWO_TIMEPOINTS.copy()
    wells.loc[2, "status"] = "error"  # P1 B1 pre failed
    out = normalize_wells(wells, metrics=["beat_rate_bpm"])
    b1_post = out.loc[7]
    assert b1_post["normalization"] == "vehicle"
    assert b1_post["beat_rate_bpm_norm"] == pytest.approx(100 * (40 - 63) / 63)
    assert out.loc[2, "normalization"] == "none"
    assert math.isnan(out.loc[2, "beat_rate_bpm_norm"])


def test_without_vehicle_wells_changes_are_kept_and_a_warning_raised():
    wells = TWO_TIMEPOINTS.assign(role="sample")
    with pytest.warns(BeatlabWarning, match=r"no usable vehicle wells .*plate 'P1'"):
        out = normalize_wells(wells, metrics=["beat_rate_bpm"])
    assert set(out["normalization"]) == {"baseline-only"}
    assert out.loc[7, "beat_rate_bpm_change"] == pytest.approx(-50.0)
    assert out["beat_rate_bpm_norm"].isna().all()


def test_no_warning_when_every_plate_has_vehicles():
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        normalize_wells(TWO_TIMEPOINTS, metrics=["beat_rate_bpm"])


def test_a_zero_percent_baseline_gives_null_not_infinity():
    wells = TWO_TIMEPOINTS.copy()
    wells.loc[2, "beat_rate_bpm"] = 0.0
    out = normalize_wells(wells, metrics=["beat_rate_bpm"])
    assert math.isnan(out.loc[7, "beat_rate_bpm_change"])
    assert np.isfinite(out["beat_rate_bpm_norm"].dropna()).all()


def test_repeated_well_rows_are_refused():
    wells = pd.concat([TWO_TIMEPOINTS, TWO_TIMEPOINTS.iloc[[0]]])
    with pytest.raises(InputError, match="several rows for plate 'P1', well 'A1'"):
        normalize_wells(wells, metrics=["beat_rate_bpm"])


def test_text_metric_cannot_be_normalised():
    with pytest.raises(InputError, match="'rhythm' is not numeric"):
        normalize_wells(TWO_TIMEPOINTS.assign(rhythm="regular"), metrics=["rhythm"])


def test_aggregate_then_normalise_end_to_end():
    recordings = pd.concat(
        [_recordings().assign(timepoint="pre"), _recordings().assign(timepoint="post")],
        ignore_index=True,
    )
    recordings.loc[recordings["timepoint"] == "post", "beat_rate_bpm"] *= 1.5
    wells = aggregate_wells(recordings, metrics=["beat_rate_bpm"])
    out = normalize_wells(wells, metrics=["beat_rate_bpm"])
    post = out[out["timepoint"] == "post"].set_index("well")
    assert post.loc["A1", "beat_rate_bpm_change"] == pytest.approx(50.0)
    assert post.loc["A1", "beat_rate_bpm_norm"] == pytest.approx(0.0)  # vehicle also +50 %
