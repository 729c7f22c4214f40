"""Local maxima and prominences against scipy.signal, the reference library (L).

beatlab computes them itself so that an analysis need not import scipy.signal; these checks
hold it to scipy.signal.find_peaks (no conditions) and scipy.signal.peak_prominences exactly:
same indices, same bases, same prominences.
"""

import warnings

import numpy as np
import pytest
from scipy import signal

from beatlab.beats._peaks import local_maxima, peak_prominences


def _traces():
    rng = np.random.default_rng(7)
    yield rng.normal(size=500)  # noise: many maxima
    yield np.round(rng.normal(size=400) * 2) / 2  # coarse levels: plateaus, ties
    t = np.linspace(0, 6, 300)
    yield np.clip(np.sin(2 * np.pi * t), 0, 0.8)  # flat tops and flat bottoms
    yield np.repeat(rng.integers(0, 4, 60), rng.integers(1, 5, 60)).astype(float)
    with_nan = rng.normal(size=200)
    with_nan[[0, 17, 18, 90, 150, 199]] = np.nan
    yield with_nan
    yield np.zeros(50)  # flat: no maximum
    yield np.array([0.0, 1.0, 1.0])  # a plateau that reaches the end is no maximum
    yield np.array([1.0, 0.0, 2.0, 2.0, 2.0, 2.0, 0.0])  # even plateau: the left middle
    yield np.array([2.0, 1.0])  # too short


@pytest.mark.parametrize("x", list(_traces()), ids=lambda x: f"n{x.size}")
def test_local_maxima_are_scipy_find_peaks(x):
    expected, _ = signal.find_peaks(x)
    found = local_maxima(x)
    np.testing.assert_array_equal(found, expected)
    assert found.dtype == np.intp


@pytest.mark.parametrize("wlen", [None, 2, 3, 7, 8.5, 40, 1000])
@pytest.mark.parametrize("x", list(_traces())[:5], ids=lambda x: f"n{x.size}")
def test_prominences_and_bases_are_scipy_peak_prominences(x, wlen):
    peaks, _ = signal.find_peaks(x)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # scipy warns of zero prominences; we do not
        expected = signal.peak_prominences(x, peaks, wlen=wlen)
    found = peak_prominences(x, peaks, wlen=wlen)
    for mine, theirs in zip(found, expected, strict=True):
        np.testing.assert_array_equal(mine, theirs)


def test_prominences_of_any_index_and_of_nothing():
    x = np.array([0.0, 3.0, 1.0, 2.0, 0.5, 4.0, 0.0])
    peaks = np.array([0, 3, 6, 5])  # not only maxima: an edge, a shoulder, unsorted
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # scipy warns of the edge's zero prominence
        expected = signal.peak_prominences(x, peaks)
    for mine, theirs in zip(peak_prominences(x, peaks), expected, strict=True):
        np.testing.assert_array_equal(mine, theirs)
    empty = peak_prominences(x, np.zeros(0, dtype=int))
    assert all(a.size == 0 for a in empty)
    with pytest.raises(ValueError, match="not a valid index"):
        peak_prominences(x, [7])
    with pytest.raises(ValueError, match="wlen"):
        peak_prominences(x, [3], wlen=1)
