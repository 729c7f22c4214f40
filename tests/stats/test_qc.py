"""Tests of beatlab.stats.qc (Z'-factor, binomial intervals, incidence table)."""

import math

import numpy as np
import pandas as pd
import pytest
from statsmodels.stats.proportion import proportion_confint

from beatlab.errors import InputError
from beatlab.stats.qc import (
    BINOMIAL_CI_METHODS,
    binomial_ci,
    incidence_table,
    plate_z_prime,
    z_prime,
)

# statsmodels' name for each of our interval methods
STATSMODELS_METHOD = {"wilson": "wilson", "clopper-pearson": "beta"}


# --- Z'-factor -------------------------------------------------------------------------------


def test_z_prime_published_example():
    # Zhang, Chung & Oldenburg 1999 (published formula; example in CHECKS.md): means 100 / 10,
    # SDs 5 / 5 -> 1 - 3 * 10 / 90 = 0.6667. 95, 100, 105 has mean 100 and SD 5 with ddof 1.
    positive = [95.0, 100.0, 105.0]
    negative = [5.0, 10.0, 15.0]
    assert z_prime(positive, negative) == pytest.approx(2.0 / 3.0, rel=1e-12)
    # sides are interchangeable (absolute difference of the means)
    assert z_prime(negative, positive) == pytest.approx(2.0 / 3.0, rel=1e-12)


def test_z_prime_uses_sample_sd():
    # by hand with ddof 0 the SDs would be sqrt(50/3) = 4.08 and Z' = 0.728 instead of 0.667
    pop = 1 - 3 * 2 * math.sqrt(50 / 3) / 90
    value = z_prime([95.0, 100.0, 105.0], [5.0, 10.0, 15.0])
    assert value != pytest.approx(pop, abs=1e-3)


def test_z_prime_ignores_nan_and_handles_degenerate_cases():
    assert z_prime([95.0, np.nan, 100.0, 105.0], [5.0, 10.0, 15.0]) == pytest.approx(2 / 3)
    assert z_prime([1.0, 2.0], [1.0, 2.0]) == -math.inf
    assert math.isnan(z_prime([1.0, 1.0], [1.0, 1.0]))
    assert z_prime([10.0, 10.0], [0.0, 0.0]) == 1.0
    with pytest.raises(InputError, match="positive has 1 finite"):
        z_prime([1.0, np.nan], [1.0, 2.0])


def plate_wells():
    rows = []
    for v in (95.0, 100.0, 105.0):
        rows += [("P1", "positive", v), ("P2", "positive", v), ("P3", "positive", v)]
    for v in (5.0, 10.0, 15.0):
        rows += [("P1", "negative", v), ("P2", "vehicle", v + 10.0)]
    rows += [("P1", "vehicle", 50.0), ("P1", "vehicle", 52.0), ("P3", "vehicle", 10.0)]
    return pd.DataFrame(rows, columns=["plate", "role", "beat_rate_bpm"])


def test_plate_z_prime():
    table = plate_z_prime(plate_wells(), metrics=["beat_rate_bpm"]).set_index("plate")
    # P1 has negative controls: the published example, 0.6667 (vehicle wells ignored)
    assert table.loc["P1", "z_prime"] == pytest.approx(2 / 3)
    assert table.loc["P1", "negative_role"] == "negative"
    # P2 falls back to vehicle: means 100 / 20, SDs 5 / 5 -> 1 - 30 / 80 = 0.625 (by hand)
    assert table.loc["P2", "z_prime"] == pytest.approx(0.625)
    assert table.loc["P2", "negative_role"] == "vehicle"
    # P3 has one vehicle well only: null, with the counts saying why
    assert math.isnan(table.loc["P3", "z_prime"])
    assert (table.loc["P3", "n_positive"], table.loc["P3", "n_negative"]) == (3, 1)
    assert list(table.columns) == [
        "metric",
        "z_prime",
        "n_positive",
        "n_negative",
        "negative_role",
    ]


def test_plate_z_prime_missing_column():
    with pytest.raises(InputError, match="displacement_um"):
        plate_z_prime(plate_wells(), metrics=["displacement_um"])


# --- binomial intervals ----------------------------------------------------------------------


@pytest.mark.parametrize("method", BINOMIAL_CI_METHODS)
@pytest.mark.parametrize(
    ("k", "n"), [(0, 1), (0, 12), (1, 12), (3, 10), (6, 12), (12, 12), (1, 1), (47, 96)]
)
@pytest.mark.parametrize("confidence", [0.95, 0.9])
def test_binomial_ci_equals_statsmodels(method, k, n, confidence):
    low, high = binomial_ci(k, n, confidence=confidence, method=method)
    # reference library: statsmodels proportion_confint ("wilson" / "beta" = Clopper-Pearson)
    ref_low, ref_high = proportion_confint(
        k, n, alpha=1 - confidence, method=STATSMODELS_METHOD[method]
    )
    assert low == pytest.approx(ref_low, abs=1e-12)
    assert high == pytest.approx(ref_high, abs=1e-12)
    assert 0.0 <= low <= k / n <= high <= 1.0


@pytest.mark.parametrize("method", BINOMIAL_CI_METHODS)
def test_binomial_ci_edges(method):
    assert binomial_ci(0, 10, method=method)[0] == 0.0
    assert binomial_ci(10, 10, method=method)[1] == 1.0
    assert all(math.isnan(v) for v in binomial_ci(0, 0, method=method))


def test_binomial_ci_wilson_hand_value():
    # by hand (Wilson 1927 formula), k = 3, n = 10, z = 1.959964, z^2 = 3.841459:
    # centre (0.3 + 0.192073) / 1.384146 = 0.355506; half-width
    # 1.959964 / 1.384146 * sqrt(0.021 + 0.009604) = 0.247715; interval 0.107791 .. 0.603222
    low, high = binomial_ci(3, 10)
    assert low == pytest.approx(0.107791, abs=1e-6)
    assert high == pytest.approx(0.603222, abs=1e-6)


@pytest.mark.parametrize(
    ("k", "n", "options", "match"),
    [(5, 4, {}, "0 <= k <= n"), (-1, 4, {}, "0 <= k <= n"), (1.5, 4, {}, "whole"),
     (1, 4, {"confidence": 95}, "confidence"), (1, 4, {"method": "wald"}, "clopper-pearson")],
)  # fmt: skip
def test_binomial_ci_bad_input(k, n, options, match):
    with pytest.raises(InputError, match=match):
        binomial_ci(k, n, **options)


# --- incidence table -------------------------------------------------------------------------


def incidence_wells():
    return pd.DataFrame(
        {
            "compound": ["DMSO"] * 4 + ["dofetilide"] * 5,
            "concentration": [0.0] * 4 + [0.01] * 5,
            "secondary_peak_beats": [0, 0, 0, np.nan, 3, 0, 1, 0, np.nan],
            "rhythm": ["regular", "regular", "irregular", "regular",
                       "irregular", "irregular", None, "quiescent", "quiescent"],
            "beat_count": [30, 31, 25, 29, 12, 20, np.nan, np.nan, 0],
            "duration_90_stv_s": [0.01, 0.02, 0.03, np.nan, 0.05, 0.07, 0.09, np.nan, np.nan],
        }
    )  # fmt: skip


def test_incidence_table_counts_by_hand():
    table = incidence_table(incidence_wells()).set_index("compound")
    dmso, drug = table.loc["DMSO"], table.loc["dofetilide"]
    # by hand, DMSO: EAD 0 of 3 assessed (one null), irregular 1 of 4, arrest 0 of 4
    assert (dmso["ead_wells"], dmso["ead_n"], dmso["n_wells"]) == (0, 3, 4)
    assert (dmso["irregular_wells"], dmso["irregular_n"]) == (1, 4)
    assert (dmso["arrest_wells"], dmso["arrest_n"]) == (0, 4)
    assert dmso["duration_90_stv_s_median"] == pytest.approx(0.02)
    # by hand, dofetilide: EAD 2 of 4; irregular 2 of 4 (a null rhythm is not assessed);
    # arrest: rhythm quiescent twice (one with a null beat count), two beating wells, and one
    # well with neither a rhythm nor a beat count, which is not assessed -> 2 of 4
    assert (drug["ead_wells"], drug["ead_n"], drug["ead_fraction"]) == (2, 4, 0.5)
    assert (drug["irregular_wells"], drug["irregular_n"]) == (2, 4)
    assert (drug["arrest_wells"], drug["arrest_n"]) == (2, 4)
    assert drug["arrest_fraction"] == pytest.approx(0.5)
    assert drug["duration_90_stv_s_median"] == pytest.approx(0.07)
    assert (drug["arrest_low"], drug["arrest_high"]) == binomial_ci(2, 4)


def test_incidence_arrest_from_beat_count_alone():
    wells = incidence_wells().drop(columns=["rhythm"])
    table = incidence_table(wells, flags=["arrest"]).set_index("compound")
    # by hand: beat_count 0 once among the 3 dofetilide wells with a count
    assert (table.loc["dofetilide", "arrest_wells"], table.loc["dofetilide", "arrest_n"]) == (1, 3)
    assert "irregular_wells" not in table.columns


def test_incidence_empty_flag_gives_null_fraction():
    wells = incidence_wells()
    wells["secondary_peak_beats"] = np.nan
    table = incidence_table(wells, by=["compound"], flags=["ead"])
    assert (table["ead_n"] == 0).all()
    assert table["ead_fraction"].isna().all() and table["ead_low"].isna().all()
    assert table["duration_90_stv_s_median"].notna().all()


def test_incidence_errors():
    with pytest.raises(InputError, match="unknown flag"):
        incidence_table(incidence_wells(), flags=["torsades"])
    with pytest.raises(InputError, match="secondary_peak_beats"):
        incidence_table(incidence_wells().drop(columns="secondary_peak_beats"))
    with pytest.raises(InputError, match="plate"):
        incidence_table(incidence_wells(), by=["plate"])


def test_incidence_duplicate_index_labels_are_harmless():
    wells = incidence_wells()
    expected = incidence_table(wells)
    pd.testing.assert_frame_equal(incidence_table(wells.set_axis([0] * len(wells))), expected)
