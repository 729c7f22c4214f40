"""Tests of beatlab.stats.groups (group-versus-control comparisons)."""

import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from statsmodels.stats.multitest import multipletests
from statsmodels.stats.oneway import anova_oneway

from beatlab.errors import InputError
from beatlab.stats import groups as groups_module
from beatlab.stats.groups import (
    ALTERNATIVES,
    PRIMARY_TESTS,
    compare_groups,
    hedges_g,
    mannwhitney_min_p,
    one_way_anova,
)

# NIST StRD one-way ANOVA "SiRstv" (certified values; CHECKS.md, P)
SIRSTV = [
    [196.3052, 196.1240, 196.1890, 196.2569, 196.3403],
    [196.3042, 196.3825, 196.1669, 196.3257, 196.0422],
    [196.1303, 196.2005, 196.2889, 196.0343, 196.1811],
    [196.2795, 196.1748, 196.1494, 196.1485, 195.9885],
    [196.2119, 196.1051, 196.1850, 196.0052, 196.2090],
]
SIRSTV_F = 1.18046237440255


def make_wells(samples, control, *, metric="beat_rate_bpm", extra=None):
    """A wells table: one vehicle group 'DMSO 0 uM' and compound 'drug' at 1, 2, ... uM."""
    rows = [("DMSO", 0.0, "vehicle", v) for v in control]
    for i, sample in enumerate(samples, start=1):
        rows += [("drug", float(i), "sample", v) for v in sample]
    wells = pd.DataFrame(rows, columns=["compound", "concentration", "role", metric])
    wells["unit"] = "uM"
    wells["plate"] = "P1"
    wells["well"] = [f"W{i:03d}" for i in range(len(wells))]
    for name, values in (extra or {}).items():
        wells[name] = values
    return wells


def simulated(seed, shifts, *, n=8, control_n=8, sd=3.0):
    rng = np.random.default_rng(seed)
    control = rng.normal(60.0, sd, control_n)
    return [rng.normal(60.0 + s, sd, n) for s in shifts], control


# --- reference-library equality -------------------------------------------------------------


@pytest.mark.parametrize("alternative", ALTERNATIVES)
def test_dunnett_equals_scipy(alternative):
    samples, control = simulated(1, [0.0, 2.0, 6.0], n=6)
    table = compare_groups(
        make_wells(samples, control), metrics=["beat_rate_bpm"], alternative=alternative
    )
    # reference library: scipy.stats.dunnett with the same seed (same QMC points)
    seeded = stats.dunnett(
        *samples,
        control=control,
        alternative=alternative,
        rng=np.random.default_rng(groups_module._DUNNETT_SEED),
    )
    np.testing.assert_allclose(table["p_dunnett"], seeded.pvalue, rtol=1e-12)
    # and with scipy's own unseeded integration: the seed choice is immaterial
    unseeded = stats.dunnett(*samples, control=control, alternative=alternative)
    np.testing.assert_allclose(table["p_dunnett"], unseeded.pvalue, atol=2e-3)
    assert (table["test"] == "dunnett").all()
    np.testing.assert_array_equal(table["p"], table["p_dunnett"])
    # Dunnett's p is already adjusted for the family of comparisons with the control
    np.testing.assert_array_equal(table["p_adj"], table["p"])


@pytest.mark.parametrize("alternative", ALTERNATIVES)
def test_welch_equals_scipy(alternative):
    samples, control = simulated(2, [1.0, 4.0], n=5, control_n=9)
    samples[1] = samples[1] * 3  # unequal variances
    table = compare_groups(
        make_wells(samples, control),
        metrics=["beat_rate_bpm"],
        primary_test="welch",
        alternative=alternative,
    )
    for i, sample in enumerate(samples):
        # reference library: scipy.stats.ttest_ind(equal_var=False)
        expected = stats.ttest_ind(sample, control, equal_var=False, alternative=alternative)
        assert table["p_welch"].iloc[i] == pytest.approx(expected.pvalue, rel=1e-12)
    assert (table["test"] == "welch").all()
    # reference library: statsmodels multipletests(method="holm") within the metric
    expected_adj = multipletests(table["p_welch"], method="holm")[1]
    np.testing.assert_allclose(table["p_adj"], expected_adj, rtol=1e-12)


@pytest.mark.parametrize("alternative", ALTERNATIVES)
def test_mannwhitney_equals_scipy(alternative):
    tied = [np.array([61.0, 62.0, 62.0, 65.0, 70.0]), np.array([55.0, 58.0, 60.0, 61.0])]
    untied = [np.array([63.1, 64.2, 66.5, 71.0])]
    control = np.array([58.0, 59.5, 60.0, 61.0, 62.0, 57.2])
    samples = [*tied, *untied]
    table = compare_groups(
        make_wells(samples, control),
        metrics=["beat_rate_bpm"],
        primary_test="mannwhitney",
        alternative=alternative,
        adjust="bh",
    )
    for i, sample in enumerate(samples):
        # reference library: scipy.stats.mannwhitneyu (default method and continuity)
        expected = stats.mannwhitneyu(sample, control, alternative=alternative).pvalue
        assert table["p_mannwhitney"].iloc[i] == pytest.approx(expected, rel=1e-12)
    # reference library: scipy.stats.false_discovery_control within the metric
    np.testing.assert_allclose(
        table["p_adj"], stats.false_discovery_control(table["p_mannwhitney"]), rtol=1e-12
    )


def test_one_way_anova_nist_sirstv_certified_f():
    result = one_way_anova(SIRSTV)
    # NIST StRD SiRstv (published, certified): F = 1.18046237440255, df 4 and 20. The two-pass
    # sums of squares reach ~4e-13; a one-pass (sum x^2 - n mean^2) version only ~2e-10.
    assert result.f == pytest.approx(SIRSTV_F, rel=1e-11)
    assert (result.df_between, result.df_within) == (4, 20)
    # reference libraries: scipy.stats.f_oneway and statsmodels anova_oneway(use_var="equal")
    scipy_result = stats.f_oneway(*SIRSTV)
    assert scipy_result.statistic == pytest.approx(SIRSTV_F, rel=1e-9)
    assert result.p == pytest.approx(scipy_result.pvalue, rel=1e-9)
    values = np.concatenate(SIRSTV)
    labels = np.repeat(np.arange(5), 5)
    assert anova_oneway(values, labels, use_var="equal").statistic == pytest.approx(
        SIRSTV_F, rel=1e-9
    )


def test_compare_groups_anova_and_kruskal_on_sirstv():
    table = compare_groups(make_wells(SIRSTV[1:], SIRSTV[0]), metrics=["beat_rate_bpm"])
    # NIST StRD SiRstv certified F (published) turned into p with F(4, 20)
    expected = stats.f.sf(SIRSTV_F, 4, 20)
    np.testing.assert_allclose(table["p_anova"], expected, rtol=1e-8)
    # reference library: scipy.stats.kruskal across all five groups
    np.testing.assert_allclose(table["p_kruskal"], stats.kruskal(*SIRSTV).pvalue, rtol=1e-12)
    assert len(table) == 4


def test_one_way_anova_rejects_a_single_group():
    with pytest.raises(InputError, match="2 non-empty groups"):
        one_way_anova([[1.0, 2.0, 3.0]])


# --- effect size and the Mann-Whitney floor --------------------------------------------------


def test_hedges_g_hand_worked():
    # by hand: sample 2, 4, 6 (mean 4, SS 8); control 1, 2, 3 (mean 2, SS 2)
    # s_pooled = sqrt((8 + 2) / (3 + 3 - 2)) = sqrt(2.5); d = 2 / sqrt(2.5) = 1.264911
    # J = 1 - 3 / (4 * 6 - 9) = 0.8 (Hedges 1981); g = 0.8 * 1.264911 = 1.011929
    expected = 0.8 * 2.0 / math.sqrt(2.5)
    assert hedges_g([2.0, 4.0, 6.0], [1.0, 2.0, 3.0]) == pytest.approx(expected, rel=1e-12)
    assert expected == pytest.approx(1.011929, abs=1e-6)
    table = compare_groups(
        make_wells([[2.0, 4.0, 6.0]], [1.0, 2.0, 3.0]), metrics=["beat_rate_bpm"]
    )
    assert table["hedges_g"].iloc[0] == pytest.approx(expected, rel=1e-12)
    # by hand: difference 4 - 2 = 2, percent change 100 * 2 / 2 = 100 %
    assert table["difference"].iloc[0] == pytest.approx(2.0)
    assert table["percent_change"].iloc[0] == pytest.approx(100.0)


def test_hedges_g_undefined_without_spread():
    assert math.isnan(hedges_g([1.0, 1.0], [1.0, 1.0]))
    assert math.isnan(hedges_g([1.0], [2.0]))


def test_mannwhitney_floor_and_note():
    # reference library: the exact U test's most extreme p at 3 vs 3 is 2 / C(6, 3) = 0.1
    exact = stats.mannwhitneyu([4.0, 5.0, 6.0], [1.0, 2.0, 3.0], method="exact").pvalue
    assert mannwhitney_min_p(3, 3) == pytest.approx(exact, rel=1e-12)
    assert mannwhitney_min_p(3, 3) == pytest.approx(0.1)
    assert mannwhitney_min_p(3, 3, alternative="greater") == pytest.approx(0.05)
    table = compare_groups(
        make_wells([[4.0, 5.0, 6.0]], [1.0, 2.0, 3.0]), metrics=["beat_rate_bpm"]
    )
    assert table["mannwhitney_min_p"].iloc[0] == pytest.approx(0.1)
    assert "Mann-Whitney cannot reach p < 0.05" in table["note"].iloc[0]
    enough = compare_groups(
        make_wells([np.arange(8.0) + 10], np.arange(8.0)), metrics=["beat_rate_bpm"]
    )
    assert "Mann-Whitney" not in enough["note"].iloc[0]


# --- simulated ground truth ------------------------------------------------------------------


@pytest.mark.parametrize("primary_test", PRIMARY_TESTS)
def test_large_shift_detected_and_null_not(primary_test):
    samples, control = simulated(7, [0.0, 15.0, 0.0], n=8, sd=3.0)
    table = compare_groups(
        make_wells(samples, control), metrics=["beat_rate_bpm"], primary_test=primary_test
    )
    # ground truth from the simulation: groups 1 and 3 have no shift, group 2 a 5-SD shift
    assert table["p_adj"].iloc[1] < 0.01
    assert (table["p_adj"].iloc[[0, 2]] > 0.05).all()
    assert table["difference"].iloc[1] == pytest.approx(15.0, abs=3.0)
    assert table["hedges_g"].iloc[1] > 3.0


# --- edge cases --------------------------------------------------------------------------------


def test_single_well_group_gets_null_p_and_a_note():
    samples, control = simulated(4, [0.0], n=5)
    wells = make_wells([samples[0], [75.0]], control)
    table = compare_groups(wells, metrics=["beat_rate_bpm"])
    single = table.iloc[1]
    assert single["n_wells"] == 1
    assert single["mean"] == 75.0
    assert math.isnan(single["sd"])
    for column in ("p", "p_adj", "p_dunnett", "p_welch", "p_mannwhitney", "hedges_g"):
        assert math.isnan(single[column]), column
    assert "too few values to test (n = 1" in single["note"]
    # the other group is still tested, against scipy's Welch (reference library)
    expected = stats.ttest_ind(samples[0], control, equal_var=False).pvalue
    assert table["p_welch"].iloc[0] == pytest.approx(expected, rel=1e-12)


def test_nan_values_are_dropped_per_metric():
    group = np.array([62.0, np.nan, 64.0, 66.0, 65.0])
    control = np.array([60.0, 61.0, np.nan, 59.0, 58.0])
    other = np.array([1.0, 2.0, 3.0, 4.0, 5.0])
    wells = make_wells([group], control, extra={"duration_90_s": np.r_[other, other]})
    table = compare_groups(wells, metrics=["beat_rate_bpm", "duration_90_s"], primary_test="welch")
    rate = table[table["metric"] == "beat_rate_bpm"].iloc[0]
    assert (rate["n_wells"], rate["control_n_wells"]) == (4, 4)
    finite_g, finite_c = group[~np.isnan(group)], control[~np.isnan(control)]
    assert rate["mean"] == pytest.approx(finite_g.mean())
    assert rate["control_mean"] == pytest.approx(finite_c.mean())
    # reference library: scipy Welch on the finite values
    expected = stats.ttest_ind(finite_g, finite_c, equal_var=False).pvalue
    assert rate["p"] == pytest.approx(expected, rel=1e-12)
    duration = table[table["metric"] == "duration_90_s"].iloc[0]
    assert duration["n_wells"] == 5  # the NaN of another metric does not drop the well


def test_all_null_group_and_constant_metric_give_notes_not_warnings():
    wells = make_wells([[1.0, 1.0, 1.0], [np.nan, np.nan]], [1.0, 1.0, 1.0])
    table = compare_groups(wells, metrics=["beat_rate_bpm"])
    assert math.isnan(table["p"].iloc[0])
    assert "no variance" in table["note"].iloc[0]
    assert table["n_wells"].iloc[1] == 0
    assert "too few values" in table["note"].iloc[1]
    assert math.isnan(table["p_anova"].iloc[0]) and math.isnan(table["p_kruskal"].iloc[0])


def test_zero_control_mean_gives_null_percent_change():
    wells = make_wells([[0.1, 0.2, 0.0]], [0.0, 0.0, 0.0], metric="irregular_fraction")
    table = compare_groups(wells, metrics=["irregular_fraction"])
    assert math.isnan(table["percent_change"].iloc[0])
    assert table["difference"].iloc[0] == pytest.approx(0.1)
    assert "control mean is 0" in table["note"].iloc[0]


def test_missing_control_raises():
    wells = make_wells([[1.0, 2.0]], [1.0, 2.0])
    wells["role"] = "sample"
    with pytest.raises(InputError, match=r"no control wells.*control="):
        compare_groups(wells, metrics=["beat_rate_bpm"])
    with pytest.raises(InputError, match="matches no group label"):
        compare_groups(wells, metrics=["beat_rate_bpm"], control="water")
    with pytest.raises(InputError, match="no 'role' column"):
        compare_groups(wells.drop(columns="role"), metrics=["beat_rate_bpm"])


def test_missing_metric_and_bad_options_raise():
    wells = make_wells([[1.0, 2.0]], [1.0, 2.0])
    with pytest.raises(InputError, match=r"\['amplitude_um'\] missing"):
        compare_groups(wells, metrics=["amplitude_um"])
    with pytest.raises(InputError, match=r"dunnett.*mannwhitney.*welch"):
        compare_groups(wells, metrics=["beat_rate_bpm"], primary_test="t")
    with pytest.raises(InputError, match="alternative"):
        compare_groups(wells, metrics=["beat_rate_bpm"], alternative="both")
    with pytest.raises(InputError, match="adjust"):
        compare_groups(wells, metrics=["beat_rate_bpm"], adjust="bonferroni")
    with pytest.raises(InputError, match="list"):
        compare_groups(wells, metrics="beat_rate_bpm")


def test_control_by_label_or_condition_matches_role_default():
    samples, control = simulated(5, [3.0, 0.0], n=4, control_n=4)
    wells = make_wells(samples, control)
    wells["condition"] = np.where(wells["role"] == "vehicle", "vehicle 0.1% DMSO", "drug")
    by_role = compare_groups(wells, metrics=["beat_rate_bpm"])
    by_label = compare_groups(
        wells.drop(columns="role"), metrics=["beat_rate_bpm"], control="DMSO 0 uM"
    )
    by_condition = compare_groups(wells, metrics=["beat_rate_bpm"], control="vehicle 0.1% DMSO")
    assert by_role["control"].iloc[0] == "DMSO 0 uM"
    assert list(by_role["group"]) == ["drug 1 uM", "drug 2 uM"]
    for other in (by_label, by_condition):
        pd.testing.assert_frame_equal(by_role, other)


def test_layout_counts():
    samples, control = simulated(6, [0.0], n=4, control_n=4)
    extra = {"plate": ["P1", "P2"] * 4, "batch": ["B1"] * 6 + ["B2"] * 2, "n_fov": [3] * 8}
    table = compare_groups(make_wells(samples, control, extra=extra), metrics=["beat_rate_bpm"])
    row = table.iloc[0]
    # by hand: drug wells are rows 4..7 -> plates P1, P2; batches B1, B1, B2, B2; 4 x 3 fields
    assert (row["n_wells"], row["n_plates"], row["n_batches"], row["n_fov"]) == (4, 2, 2, 12)
    no_batch = compare_groups(make_wells(samples, control), metrics=["beat_rate_bpm"])
    assert pd.isna(no_batch["n_batches"].iloc[0]) and pd.isna(no_batch["n_fov"].iloc[0])
    assert no_batch["n_plates"].iloc[0] == 1


def test_input_is_not_modified():
    samples, control = simulated(8, [1.0], n=4)
    wells = make_wells(samples, control)
    before = wells.copy()
    compare_groups(wells, metrics=["beat_rate_bpm"], block="plate")
    pd.testing.assert_frame_equal(wells, before)


# --- blocking --------------------------------------------------------------------------------


def blocked_wells():
    """Two plates with a 20 bpm plate offset; the drug adds 4 bpm; plate P3 has no vehicle."""
    rng = np.random.default_rng(9)
    rows = []
    for plate, offset in (("P1", 0.0), ("P2", 20.0)):
        for _ in range(4):
            rows.append((plate, "DMSO", 0.0, "vehicle", 60 + offset + rng.normal(0, 1)))
            rows.append((plate, "drug", 1.0, "sample", 64 + offset + rng.normal(0, 1)))
    rows.append(("P3", "drug", 1.0, "sample", 90.0))
    columns = ["plate", "compound", "concentration", "role", "beat_rate_bpm"]
    return pd.DataFrame(rows, columns=columns)


def test_block_subtracts_each_plates_control_mean():
    wells = blocked_wells()
    table = compare_groups(wells, metrics=["beat_rate_bpm"], block="plate", primary_test="welch")
    # by hand: subtract each plate's vehicle mean from every well of that plate
    plate_means = wells[wells["role"] == "vehicle"].groupby("plate")["beat_rate_bpm"].mean()
    used = wells[wells["plate"].isin(plate_means.index)]
    within = used["beat_rate_bpm"] - used["plate"].map(plate_means)
    drug = within[used["role"] == "sample"].to_numpy()
    vehicle = within[used["role"] == "vehicle"].to_numpy()
    row = table.iloc[0]
    assert row["n_wells"] == 8  # the P3 well has no vehicle on its plate
    assert "1 well(s) without control wells in their plate left out" in row["note"]
    assert row["difference"] == pytest.approx(drug.mean() - vehicle.mean(), rel=1e-12)
    assert row["difference"] == pytest.approx(4.0, abs=1.0)  # simulated shift
    # reference library: scipy Welch on the within-plate differences
    expected = stats.ttest_ind(drug, vehicle, equal_var=False).pvalue
    assert row["p_welch"] == pytest.approx(expected, rel=1e-12)
    # the raw description is unchanged by blocking (P3 excluded)
    raw_drug = used.loc[used["role"] == "sample", "beat_rate_bpm"]
    assert row["mean"] == pytest.approx(raw_drug.mean())
    # without blocking, the plate offset swamps the 4 bpm effect
    unblocked = compare_groups(
        wells[wells["plate"] != "P3"], metrics=["beat_rate_bpm"], primary_test="welch"
    )
    assert unblocked["p"].iloc[0] > 0.05 > row["p"]


def test_block_column_must_exist():
    with pytest.raises(InputError, match="batch"):
        compare_groups(blocked_wells(), metrics=["beat_rate_bpm"], block="batch")


def test_control_without_values_gives_nulls_not_errors():
    wells = make_wells([[61.0, 62.0, 63.0]], [np.nan, np.nan])
    table = compare_groups(wells, metrics=["beat_rate_bpm"])
    row = table.iloc[0]
    assert row["control_n_wells"] == 0 and row["n_wells"] == 3
    assert row["mean"] == pytest.approx(62.0)
    for column in ("control_mean", "difference", "percent_change", "p", "p_anova"):
        assert math.isnan(row[column]), column
    assert "control n = 0" in row["note"]


def test_duplicate_index_labels_are_harmless():
    samples, control = simulated(12, [2.0, 0.0], n=4, control_n=4)
    wells = make_wells(samples, control)
    stacked = pd.concat([wells.iloc[:6], wells.iloc[6:]])  # index 0..5 then 6..11
    duplicated = stacked.set_axis([0, 1, 2] * 4)
    expected = compare_groups(wells, metrics=["beat_rate_bpm"])
    pd.testing.assert_frame_equal(compare_groups(duplicated, metrics=["beat_rate_bpm"]), expected)


def test_percent_change_is_null_when_the_control_is_zero_up_to_rounding():
    # a column already normalised to its vehicle: the control mean is 0 up to 1e-15, and a
    # percent change of it would be a meaningless 1e17 (seen on a simulated plate)
    control = np.array([0.1, -0.3, 0.2]) - np.mean([0.1, -0.3, 0.2])
    wells = pd.DataFrame(
        {
            "compound": ["v"] * 3 + ["d"] * 3,
            "concentration": [0.0] * 3 + [1.0] * 3,
            "role": ["vehicle"] * 3 + ["sample"] * 3,
            "rate_norm": [*control, 12.0, 13.0, 14.0],
        }
    )
    out = compare_groups(wells, metrics=["rate_norm"])
    row = out[out["concentration"] == 1.0].iloc[0]
    assert np.isnan(row["percent_change"])
    assert "control mean is 0" in row["note"]
    assert row["difference"] == pytest.approx(13.0)
