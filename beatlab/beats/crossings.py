"""Level crossings of a sampled trace, linearly interpolated, with a noise-aware search."""

import numpy as np

from beatlab.errors import InputError

__all__ = ["CROSSING_DIRECTIONS", "level_crossing"]

CROSSING_DIRECTIONS = ("up", "down")


def _interpolate(times, values, level, i):
    """Time where the segment from sample i to i + 1 meets `level`."""
    y0, y1 = values[i], values[i + 1]
    if y1 == y0:
        return float(times[i])
    frac = (level - y0) / (y1 - y0)
    return float(times[i] + np.clip(frac, 0.0, 1.0) * (times[i + 1] - times[i]))


def _crossings_between(times, values, level, first, last):
    """Times of every crossing of `level` between samples `first` and `last`."""
    above = values[first : last + 1] > level
    steps = np.flatnonzero(above[1:] != above[:-1]) + first
    return [_interpolate(times, values, level, int(i)) for i in steps]


def _fit_crossing(times, values, level, guess, t_from, t_to, start, stop):
    """Refine a crossing by a least-squares fit over the passage through the noise band.

    A quadratic (five samples or more) or a straight line (three or four) is fitted to the
    samples from `t_from` to `t_to`, the window made symmetric about `guess`; the root of
    fit = level nearest to `guess` inside the window replaces it. With fewer samples, or no
    root there, the interpolated `guess` stands.
    """
    half = max(guess - t_from, t_to - guess)
    first = max(start, int(np.searchsorted(times, guess - half, side="left")))
    last = min(stop, int(np.searchsorted(times, guess + half, side="right")) - 1)
    count = last - first + 1
    if count < 3:
        return guess
    x = times[first : last + 1] - guess
    degree = 2 if count >= 5 else 1
    coef = np.polynomial.polynomial.polyfit(x, values[first : last + 1], degree)
    coef[0] -= level
    roots = np.polynomial.polynomial.polyroots(coef) if np.any(coef[1:] != 0) else []
    real = [float(r.real) for r in np.atleast_1d(roots) if abs(r.imag) < 1e-12]
    inside = [r for r in real if x[0] <= r <= x[-1]]
    if not inside:
        return guess
    return guess + min(inside, key=abs)


def level_crossing(values, times_s, level, *, start, stop, direction, hysteresis=0.0, reject=0.0):
    """Time of the last crossing of `level` in one direction within samples start..stop.

    Parameters
    ----------
    values : ndarray, shape (T,)
        Trace (any unit), finite.
    times_s : ndarray, shape (T,)
        Sample times in seconds, strictly increasing.
    level : float
        Level to cross, unit of the trace.
    start, stop : int
        First and last sample index of the search window (both included).
    direction : {"up", "down"}
        ``"up"``: the last upward crossing (from <= level to > level). ``"down"``: the last
        downward crossing (from > level to <= level).
    hysteresis : float
        Half-width of a noise band around the level (unit of the trace, >= 0). 0 applies the
        plain rule. With a band, a crossing only counts once the trace has left the band on
        the far side, and the time is the midpoint of the first and last crossing of the level
        inside that final passage through the band (see Notes).

    reject : float
        Downward crossings only: once the trace has come down through the band, later
        excursions above the band that never rise more than ``reject`` above the level are
        left out of the search (noise spikes of the rest period); 0 keeps them.

    Returns
    -------
    float
        Crossing time in seconds, linearly interpolated between samples; NaN if the trace does
        not cross the level in that direction inside the window.

    Raises
    ------
    InputError
        If `direction` is unknown or the window is empty.

    Notes
    -----
    On a noisy trace a low level is crossed many times at rest, and "the last downward
    crossing" would pick noise long after the relaxation. With a band of half-width h the
    downward rule becomes: take the last sample above level + h, then the first sample after
    it at or below level - h; the result is the midpoint of the first and last crossing of the
    level between those two samples (only the first crossing when the trace never reaches
    level - h, e.g. a low level on a noisy floor). The upward rule mirrors it: the last sample
    at or below level - h, then the first sample above level + h. On a trace that passes the
    band monotonically there is exactly one crossing, so the result equals the plain rule for
    any h: the band never biases a clean trace. Crossing times are linearly interpolated
    between the two samples around them. With a band (h > 0), that time is then refined by a
    least-squares polynomial fit (quadratic from five samples, else linear) over the passage
    through the band, made symmetric about it: a noisy crossing is then set by all the samples
    of the passage rather than by the two around it (local polynomial regression, Cleveland
    1979, J Am Stat Assoc 74:829). With h = 0 the plain interpolation stands, so clean traces
    follow the definition exactly.
    """
    if direction not in CROSSING_DIRECTIONS:
        raise InputError(
            f"direction must be one of {CROSSING_DIRECTIONS}, got {direction!r}; pick one"
        )
    start, stop = max(0, int(start)), min(values.size - 1, int(stop))
    if stop <= start:
        return float("nan")
    band = max(float(hysteresis), 0.0)
    window = values[start : stop + 1]
    if direction == "down":
        if reject > band:
            stop = _before_spikes(values, start, stop, level, band, reject)
            window = values[start : stop + 1]
        return _last_down(times_s, values, window, start, stop, level, band)
    return _last_up(times_s, values, window, start, stop, level, band)


def _before_spikes(values, start, stop, level, band, reject):
    """Last index to search: before a rebound that stays within ``reject`` of the level."""
    clearly_above = np.flatnonzero(values[start : stop + 1] > level + reject)
    if clearly_above.size == 0:
        return stop
    top = start + int(clearly_above[-1])
    down = np.flatnonzero(values[top + 1 : stop + 1] <= level - band)
    if down.size == 0:
        return stop
    came_down = top + 1 + int(down[0])
    rebound = np.flatnonzero(values[came_down + 1 : stop + 1] > level + band)
    return came_down + int(rebound[0]) if rebound.size else stop


def _last_down(times, values, window, start, stop, level, band):
    high = np.flatnonzero(window > level + band)
    if high.size == 0:
        high = np.flatnonzero(window > level)
        if high.size == 0:
            return float("nan")
    hi = start + int(high[-1])
    if hi >= stop:
        return float("nan")
    after = values[hi + 1 : stop + 1]
    low = np.flatnonzero(after <= level - band)
    if band > 0 and low.size:
        lo = hi + 1 + int(low[0])
        crossings = _crossings_between(times, values, level, hi, lo)
        guess = 0.5 * (crossings[0] + crossings[-1])
        return _fit_crossing(times, values, level, guess, times[hi], times[lo], start, stop)
    below = np.flatnonzero(after <= level)
    if below.size == 0:
        return float("nan")
    j = hi + 1 + int(below[0])
    guess = _interpolate(times, values, level, j - 1)
    if band > 0:
        return _fit_crossing(
            times, values, level, guess, times[hi], 2 * guess - times[hi], start, stop
        )
    return guess


def _last_up(times, values, window, start, stop, level, band):
    low = np.flatnonzero(window <= level - band)
    if band > 0 and low.size:
        lo = start + int(low[-1])
        above = np.flatnonzero(values[lo + 1 : stop + 1] > level + band)
        hi = lo + 1 + int(above[0]) if above.size else stop
        crossings = _crossings_between(times, values, level, lo, hi)
        if crossings:
            guess = 0.5 * (crossings[0] + crossings[-1])
            return _fit_crossing(times, values, level, guess, times[lo], times[hi], start, stop)
    at_or_below = np.flatnonzero(window <= level)
    if at_or_below.size == 0:
        return float("nan")
    j = start + int(at_or_below[-1])
    if j >= stop:
        return float("nan")
    guess = _interpolate(times, values, level, j)
    if band > 0:
        above = np.flatnonzero(values[j + 1 : stop + 1] > level + band)
        t_high = times[j + 1 + int(above[0])] if above.size else times[stop]
        return _fit_crossing(times, values, level, guess, 2 * guess - t_high, t_high, start, stop)
    return guess
