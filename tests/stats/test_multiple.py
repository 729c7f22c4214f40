"""Tests of beatlab.stats.multiple (p-value adjustment)."""

import numpy as np
import pytest
from scipy import stats
from statsmodels.stats.multitest import multipletests

from beatlab.errors import InputError
from beatlab.stats.multiple import ADJUST_METHODS, adjust_pvalues

# Benjamini & Hochberg 1995, J R Stat Soc B 57:289, worked example (15 p-values; CHECKS.md)
BH_EXAMPLE = np.array(
    [0.0001, 0.0004, 0.0019, 0.0095, 0.0201, 0.0278, 0.0298, 0.0344, 0.0459,
     0.3240, 0.4262, 0.5719, 0.6528, 0.7590, 1.000]
)  # fmt: skip


def test_bh_worked_example_rejects_four():
    adjusted = adjust_pvalues(BH_EXAMPLE, method="bh")
    # Benjamini & Hochberg 1995 (published example): 4 hypotheses rejected at q = 0.05
    assert int((adjusted <= 0.05).sum()) == 4
    # CHECKS.md (L): first BH-adjusted values
    np.testing.assert_allclose(adjusted[:5], [0.0015, 0.003, 0.0095, 0.035625, 0.0603], rtol=1e-12)


def test_bh_equals_scipy_false_discovery_control():
    adjusted = adjust_pvalues(BH_EXAMPLE, method="bh")
    # reference library: scipy.stats.false_discovery_control (method "bh")
    np.testing.assert_allclose(adjusted, stats.false_discovery_control(BH_EXAMPLE), rtol=1e-12)


def test_holm_equals_statsmodels_on_worked_example():
    adjusted = adjust_pvalues(BH_EXAMPLE, method="holm")
    reject, reference, _, _ = multipletests(BH_EXAMPLE, alpha=0.05, method="holm")
    # reference library: statsmodels multipletests(method="holm"); 3 rejected (CHECKS.md, L)
    np.testing.assert_allclose(adjusted, reference, rtol=1e-12)
    assert int(reject.sum()) == 3
    assert int((adjusted <= 0.05).sum()) == 3
    np.testing.assert_allclose(adjusted[:3], [0.0015, 0.0056, 0.0247], rtol=1e-12)


@pytest.mark.parametrize(("method", "reference_name"), [("holm", "holm"), ("bh", "fdr_bh")])
def test_unsorted_random_family_equals_statsmodels(method, reference_name):
    p = np.random.default_rng(3).uniform(0, 0.2, 25)
    # reference library: statsmodels multipletests on unsorted input
    expected = multipletests(p, method=reference_name)[1]
    np.testing.assert_allclose(adjust_pvalues(p, method=method), expected, rtol=1e-12)


@pytest.mark.parametrize("method", ADJUST_METHODS)
def test_nan_passes_through_and_is_not_counted(method):
    with_nan = adjust_pvalues([0.01, np.nan, 0.04, np.nan], method=method)
    without = adjust_pvalues([0.01, 0.04], method=method)
    assert np.isnan(with_nan[[1, 3]]).all()
    np.testing.assert_allclose(with_nan[[0, 2]], without, rtol=1e-12)


def test_holm_family_of_two_by_hand():
    # by hand: sorted 0.01, 0.04 -> 2 x 0.01 = 0.02, max(0.02, 1 x 0.04) = 0.04
    np.testing.assert_allclose(adjust_pvalues([0.04, 0.01], method="holm"), [0.04, 0.02])


def test_none_returns_a_copy():
    p = np.array([0.2, 0.01])
    out = adjust_pvalues(p, method="none")
    np.testing.assert_array_equal(out, p)
    out[0] = 0.5
    assert p[0] == 0.2


@pytest.mark.parametrize("method", ADJUST_METHODS)
def test_empty_and_all_nan(method):
    assert adjust_pvalues([], method=method).shape == (0,)
    assert np.isnan(adjust_pvalues([np.nan, np.nan], method=method)).all()


def test_unknown_method_lists_the_keys():
    with pytest.raises(InputError, match=r"bh.*holm.*none"):
        adjust_pvalues([0.1], method="bonferroni")


@pytest.mark.parametrize("bad", [[-0.1, 0.5], [1.5], [[0.1, 0.2]]])
def test_bad_values_raise(bad):
    with pytest.raises(InputError):
        adjust_pvalues(bad, method="holm")
