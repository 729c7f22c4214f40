"""Local maxima and their topographic prominences (private).

The definitions of ``scipy.signal.find_peaks`` (without conditions) and
``scipy.signal.peak_prominences``, written here so that an analysis does not import
``scipy.signal``: it pulls in ``scipy.stats`` and costs about half a second at the start of
every ``beatlab analyze`` (measured: 0.5 s of 1.7 s of imports). tests/beats/test_peaks.py
checks both against scipy.signal, the reference, on random, flat, tied and NaN traces.
"""

from __future__ import annotations

import numpy as np

__all__ = ["local_maxima", "peak_prominences"]


def local_maxima(x: np.ndarray) -> np.ndarray:
    """Indices of the local maxima of a 1-D array, as ``scipy.signal.find_peaks(x)[0]``.

    A maximum is a sample (or a run of equal samples, a plateau) with a lower neighbour on
    each side; a plateau gives its middle sample (the left one of the two middle samples of
    an even run). The first and last samples are never maxima, nor is a plateau that reaches
    either end. NaN compares false with everything, so it neither is nor bounds a maximum.

    Parameters
    ----------
    x : ndarray (N,)

    Returns
    -------
    ndarray of intp
        Ascending indices.
    """
    x = np.asarray(x)
    if x.ndim != 1:
        raise ValueError(f"x must be 1-D, got shape {x.shape}")
    if x.size < 3:
        return np.zeros(0, dtype=np.intp)
    # runs of equal samples (NaN != NaN: every NaN is a run of its own)
    starts = np.flatnonzero(np.concatenate([[True], x[1:] != x[:-1]]))
    stops = np.append(starts[1:], x.size) - 1
    values = x[starts]
    # an inner run with a lower run on each side
    peak = np.zeros(starts.size, dtype=bool)
    peak[1:-1] = (values[:-2] < values[1:-1]) & (values[2:] < values[1:-1])
    return ((starts[peak] + stops[peak]) // 2).astype(np.intp)


def _window(wlen) -> int:
    """``wlen`` as scipy reads it: None -> no window; else rounded up, and more than 1."""
    if wlen is None:
        return -1
    if not wlen > 1:
        raise ValueError(f"wlen must be larger than 1, was {wlen}")
    return int(np.ceil(wlen))


def _base(walk: np.ndarray) -> tuple[int, float]:
    """Offset and value of the lowest sample of ``walk`` (which starts at the peak) before
    the first higher sample; the nearest to the peak among equal lowest."""
    stop = np.flatnonzero(~(walk <= walk[0]))  # NaN stops the walk, as a higher sample
    walk = walk[: max(int(stop[0]), 1)] if stop.size else walk  # the peak at least
    i = int(np.argmin(walk))  # the first lowest from the peak: the nearest one
    return i, walk[i]


def peak_prominences(
    x: np.ndarray, peaks: np.ndarray, *, wlen: float | None = None
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Topographic prominence of each peak, as ``scipy.signal.peak_prominences``.

    From each peak, walk left (right) while the samples are no higher than the peak, at most
    ``wlen // 2`` samples when a window is given; the base on that side is the lowest sample
    walked (the one nearest the peak among equal lowest). The prominence is the peak minus
    the higher of the two bases. Unlike scipy, a prominence of 0 raises no warning.

    Parameters
    ----------
    x : ndarray (N,)
    peaks : ndarray of int
        Indices into ``x``.
    wlen : float, optional
        Window length in samples (rounded up; an even length acts as the next odd one).

    Returns
    -------
    prominences : ndarray of float (P,)
    left_bases, right_bases : ndarray of intp (P,)

    Raises
    ------
    ValueError
        A peak index outside ``x``, or ``wlen`` <= 1.
    """
    x = np.asarray(x, dtype=np.float64)
    peaks = np.asarray(peaks, dtype=np.intp)
    window = _window(wlen)
    n = x.size
    prominences = np.empty(peaks.size)
    left_bases = np.empty(peaks.size, dtype=np.intp)
    right_bases = np.empty(peaks.size, dtype=np.intp)
    for k, peak in enumerate(peaks.tolist()):
        if not 0 <= peak < n:
            raise ValueError(f"peak {peak} is not a valid index for x")
        lo, hi = 0, n - 1
        if window >= 2:
            lo, hi = max(peak - window // 2, lo), min(peak + window // 2, hi)
        left, left_min = _base(x[lo : peak + 1][::-1])
        right, right_min = _base(x[peak : hi + 1])
        left_bases[k], right_bases[k] = peak - left, peak + right
        prominences[k] = x[peak] - max(left_min, right_min)
    return prominences, left_bases, right_bases
