"""Sub-frame peak of a beat: parabola vertex, and a kink-aware local model (private).

A symmetric smoother, and a cubic spline through the frames, round a peak where the trace
turns abruptly (a rise that ends into an exponential relaxation: the slope jumps at the top).
Their maximum then moves towards the flatter side, by about the smoothing bandwidth (measured:
-8.7 ms for a 150 ms half-cosine rise into a 120 ms exponential decay at 15-100 fps, 20 ms
smoothing). :func:`kink_peaks` fits the frames around each peak by a local model that can
turn abruptly, and keeps it only where the frames show such a turn beyond their noise.
"""

import numpy as np

__all__ = [
    "KINK_HALF_WIDTH_S",
    "KINK_MIN_GAIN",
    "KINK_MIN_LEVEL",
    "KINK_MIN_SAMPLES",
    "KINK_RELATIVE_FLOOR",
    "KINK_SEARCH_FRAMES",
    "kink_peaks",
    "parabola_vertices",
    "refine_peaks",
]

#: half-width (s) of the frames fitted around a peak by the kink model
KINK_HALF_WIDTH_S = 0.09
#: fewest frames in that window (cubic + kink: 6 coefficients, 3 left for the residual)
KINK_MIN_SAMPLES = 9
#: the fitted frames are those above baseline + this fraction of the amplitude
KINK_MIN_LEVEL = 0.3
#: the kink model must lower the residual sum of squares by this many noise variances
KINK_MIN_GAIN = 16.0
#: noise-free traces: a residual floor of this fraction of the amplitude (model tolerance)
KINK_RELATIVE_FLOOR = 1e-3
#: candidate joints within this many frame intervals of the smoothed peak, in steps of 1/50
KINK_SEARCH_FRAMES = 2.5
_JOINT_STEP_FRAMES = 0.02
_DENSE_STEP_FRAMES = 0.002


def refine_peaks(smooth, idx, radius):
    """Move each peak index to the highest sample of `smooth` within `radius` samples."""
    if radius < 1:
        return idx
    refined = idx.copy()
    for k, p in enumerate(idx):
        lo, hi = max(0, p - radius), min(smooth.size, p + radius + 1)
        refined[k] = lo + int(np.argmax(smooth[lo:hi]))
    if np.any(np.diff(refined) <= 0):
        return idx
    return refined


def parabola_vertices(values, times, idx):
    """Vertex of the parabola through samples i - 1, i, i + 1 at their actual times.

    The vertex is kept within half the shorter of the two sample intervals around sample i.
    On even sampling the vertex of a maximum always lies there (nothing changes); on very
    uneven sampling the parabola overshoots far beyond the samples (its vertex can stand
    well before the level crossings of the rise, at nearly twice the highest sample), and
    the bound keeps it where the samples put the maximum.
    """
    peak_s = times[idx].astype(float)
    peak_val = values[idx].astype(float)
    inner = (idx > 0) & (idx < values.size - 1)
    for k in np.flatnonzero(inner):
        i = idx[k]
        t0, t1, t2 = times[i - 1 : i + 2] - times[i]
        y0, y1, y2 = values[i - 1 : i + 2]
        # divided differences of the interpolating parabola y = y1 + b (t - t1) + a (t - t1)^2
        d01 = (y1 - y0) / (t1 - t0)
        d12 = (y2 - y1) / (t2 - t1)
        a = (d12 - d01) / (t2 - t0)
        if a >= 0:
            continue
        b = d01 + a * (t1 - t0)
        reach = 0.5 * min(t1 - t0, t2 - t1)
        shift = float(np.clip(-b / (2 * a), -reach, reach))
        peak_s[k] = times[i] + shift
        peak_val[k] = y1 + b * shift + a * shift**2
    return peak_s, peak_val


def kink_peaks(values, times, smooth, peak_s, peak_val, baseline, *, noise_sd):
    """Peaks refined by a local cubic-with-kink model where the frames show a kink.

    Parameters
    ----------
    values : ndarray, shape (T,)
        The measured trace at the frames (not smoothed: the fit is the smoother).
    times : ndarray, shape (T,)
        Frame times, s, increasing.
    smooth : ndarray, shape (T,)
        The smoothed trace at the frames; it selects the frames above the fitting level.
    peak_s, peak_val : ndarray, shape (N,)
        Peaks of the smoothed trace (time, value): the starting point, kept where no kink is
        found.
    baseline : ndarray, shape (N,)
        Baseline of each beat (unit of the trace).
    noise_sd : float
        Noise SD of `values` (>= 0).

    Returns
    -------
    peak_s, peak_val : ndarray, shape (N,)
        Refined peaks.
    kinked : ndarray of bool, shape (N,)
        Where the kink model was kept.

    Notes
    -----
    Around each peak, the frames within :data:`KINK_HALF_WIDTH_S` (90 ms) that stay, on the
    smoothed trace, above baseline + :data:`KINK_MIN_LEVEL` (30 %) of the amplitude, at least
    :data:`KINK_MIN_SAMPLES` (9) of them, are fitted by least squares twice: by a cubic,
    and by a cubic plus a jump of slope and curvature at a joint c, ``+ d1 (t - c)_+ +
    d2 (t - c)_+^2``, c scanned in steps of 1/50 frame within
    :data:`KINK_SEARCH_FRAMES` frames of the smoothed peak (a continuous two-phase regression
    with an unknown join point: Hudson 1966, J Am Stat Assoc 61:1097). The kink model is kept
    when it lowers the residual sum of squares by more than :data:`KINK_MIN_GAIN` noise
    variances (``noise_sd^2`` plus a floor of (0.001 x amplitude)^2 for noise-free traces);
    the peak is then the maximum of its fitted curve within the window. Being nested (d1 =
    d2 = 0 gives the cubic), a smooth peak fitted by the kink model keeps its maximum; a peak
    whose turn is hidden in the noise keeps the smoothed estimate.
    """
    peak_s = np.array(peak_s, dtype=float)
    peak_val = np.array(peak_val, dtype=float)
    kinked = np.zeros(peak_s.size, dtype=bool)
    if times.size < KINK_MIN_SAMPLES:
        return peak_s, peak_val, kinked
    dt = float(np.median(np.diff(times)))
    for k in range(peak_s.size):
        amplitude = peak_val[k] - baseline[k]
        window = _fit_window(times, smooth, peak_s[k], baseline[k] + KINK_MIN_LEVEL * amplitude)
        if window is None or amplitude <= 0:
            continue
        x = (times[window] - peak_s[k]) / dt
        threshold = KINK_MIN_GAIN * (noise_sd**2 + (KINK_RELATIVE_FLOOR * amplitude) ** 2)
        found = _fit_kink(x, values[window], threshold)
        if found is not None:
            peak_s[k] += found[0] * dt
            peak_val[k] = found[1]
            kinked[k] = True
    return peak_s, peak_val, kinked


def _fit_window(times, smooth, centre_s, level):
    """Slice of frames fitted around a peak, or None when too few frames qualify."""
    nearest = int(np.argmin(np.abs(times - centre_s)))
    if smooth[nearest] < level:
        return None
    low = np.flatnonzero(smooth[:nearest] < level)
    high = np.flatnonzero(smooth[nearest:] < level)
    first = int(low[-1]) + 1 if low.size else 0
    last = nearest + int(high[0]) - 1 if high.size else times.size - 1
    first = max(first, int(np.searchsorted(times, centre_s - KINK_HALF_WIDTH_S, side="left")))
    last = min(last, int(np.searchsorted(times, centre_s + KINK_HALF_WIDTH_S, side="right")) - 1)
    left = np.count_nonzero(times[first : last + 1] < centre_s)
    right = last - first + 1 - left
    if last - first + 1 < KINK_MIN_SAMPLES or min(left, right) < 3:
        return None
    return slice(first, last + 1)


def _fit_kink(x, y, threshold):
    """(position, value) of the maximum of the kink model when it beats the cubic, else None."""
    cubic = np.stack([x**p for p in range(4)], axis=-1)
    coef0, *_ = np.linalg.lstsq(cubic, y, rcond=None)
    rss0 = float(np.sum((cubic @ coef0 - y) ** 2))
    span = KINK_SEARCH_FRAMES
    joints = np.arange(-span, span + _JOINT_STEP_FRAMES / 2, _JOINT_STEP_FRAMES)
    # at least two frames on each side of the joint determine its slope and curvature jumps
    joints = joints[(joints > x[1]) & (joints < x[-2])]
    if joints.size == 0:
        return None
    hinge = np.clip(x[None, :] - joints[:, None], 0.0, None)
    design = np.concatenate(
        [
            np.broadcast_to(cubic, (joints.size, *cubic.shape)),
            hinge[..., None],
            hinge[..., None] ** 2,
        ],
        axis=-1,
    )
    normal = np.einsum("mni,mnj->mij", design, design)
    normal += 1e-12 * np.trace(normal, axis1=1, axis2=2)[:, None, None] * np.eye(6)
    coef = np.linalg.solve(normal, np.einsum("mni,n->mi", design, y)[..., None])[..., 0]
    rss = np.sum((np.einsum("mni,mi->mn", design, coef) - y) ** 2, axis=1)
    best = int(np.argmin(rss))
    if rss0 - float(rss[best]) <= threshold:
        return None
    dense = np.arange(x[0], x[-1] + _DENSE_STEP_FRAMES / 2, _DENSE_STEP_FRAMES)
    ramp = np.clip(dense - joints[best], 0.0, None)
    c = coef[best]
    fitted = c[0] + dense * (c[1] + dense * (c[2] + dense * c[3])) + ramp * (c[4] + ramp * c[5])
    top = int(np.argmax(fitted))
    return float(dense[top]), float(fitted[top])
