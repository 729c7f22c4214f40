"""Per-frame traces derived from the displacement trace: velocity."""

from __future__ import annotations

import numpy as np

__all__ = ["savgol_derivative", "velocity_trace", "velocity_window_frames"]


def savgol_derivative(x: np.ndarray, window: int, polyorder: int, *, delta: float) -> np.ndarray:
    """First derivative by a Savitzky-Golay filter, edges by a polynomial fit to the first
    and last windows: ``scipy.signal.savgol_filter(x, window, polyorder, deriv=1,
    delta=delta, mode="interp")``.

    Written here so that an analysis does not import ``scipy.signal`` (half a second at every
    start); tests/signals/test_traces.py checks it against scipy.signal to 1e-12.

    Parameters
    ----------
    x : ndarray (N,)
        Evenly sampled values.
    window : int
        Odd window length in samples, ``polyorder < window <= N``.
    polyorder : int
        Order of the local least-squares polynomial.
    delta : float
        Sample spacing (the derivative is per unit of it).

    Returns
    -------
    ndarray of float64 (N,)

    Raises
    ------
    ValueError
        An even window, one longer than ``x``, or ``polyorder >= window``.
    """
    x = np.asarray(x, dtype=np.float64)
    window, polyorder = int(window), int(polyorder)
    if window % 2 == 0 or not polyorder < window <= x.size:
        raise ValueError(
            f"window must be odd, above polyorder ({polyorder}) and at most the length "
            f"({x.size}); got {window}"
        )
    half = window // 2
    powers = np.arange(polyorder + 1)[:, None]
    target = np.zeros(polyorder + 1)
    target[1] = 1.0 / delta
    out = np.empty_like(x)
    # inside: the derivative at the centre of the least-squares polynomial of each window,
    # a fixed weighting of the window's samples
    centre = np.arange(-half, half + 1, dtype=np.float64)
    weights = np.linalg.lstsq(centre[None, :] ** powers, target, rcond=None)[0]
    out[half : x.size - half] = np.correlate(x, weights, mode="valid")
    # edges: the derivative of the polynomial fitted to the first (last) window, at each of
    # the half window's samples nearest the edge
    positions = np.arange(window, dtype=np.float64)
    for part, samples, where in (
        (slice(0, half), x[:window], positions[:half]),
        (slice(x.size - half, x.size), x[x.size - window :], positions[window - half :]),
    ):
        slope = np.polyder(np.polyfit(positions, samples, polyorder))
        out[part] = np.polyval(slope, where) / delta
    return out


def velocity_window_frames(times_s: np.ndarray, *, window_ms: float, polyorder: int) -> int:
    """Frames in the Savitzky-Golay window of :func:`velocity_trace` (0: central differences).

    ``window_ms`` at the median frame interval, rounded to an odd count of at least
    ``polyorder + 1`` frames and at most the recording's length.
    """
    t = np.asarray(times_s, dtype=np.float64)
    if t.size < 3 or window_ms <= 0:
        return 0
    step = float(np.median(np.diff(t)))
    n = max(round(window_ms / 1e3 / step), polyorder + 1)
    if n % 2 == 0:
        n += 1
    if n > t.size:
        n = t.size if t.size % 2 else t.size - 1
    return int(n)


def velocity_trace(
    displacement_um: np.ndarray,
    times_s: np.ndarray,
    *,
    window_ms: float = 60.0,
    polyorder: int = 2,
) -> np.ndarray:
    """Signed time derivative of the displacement trace (um/s).

    Parameters
    ----------
    displacement_um : ndarray (T,)
        Displacement trace in um.
    times_s : ndarray (T,)
        Frame times in seconds (even or uneven).
    window_ms : float
        Savitzky-Golay window in ms; rounded to an odd number of frames, at least
        ``polyorder + 1`` (made odd) frames. 0 gives central differences.
    polyorder : int
        Polynomial order of the Savitzky-Golay filter.

    Returns
    -------
    ndarray (T,)
        Velocity in um/s: positive while contracting, negative while relaxing.

    Notes
    -----
    Savitzky & Golay (1964), Anal Chem 36:1627: the derivative of a local least-squares
    polynomial. With uneven frame times the trace is first interpolated onto an even grid at
    the median interval, differentiated, and sampled back.
    """
    d = np.asarray(displacement_um, dtype=np.float64)
    t = np.asarray(times_s, dtype=np.float64)
    if d.size < 3:
        return np.zeros_like(d)
    dt = np.diff(t)
    step = float(np.median(dt))
    even = np.allclose(dt, step, rtol=1e-3)
    n = velocity_window_frames(t, window_ms=window_ms, polyorder=polyorder)
    if n <= polyorder:
        return np.gradient(d, t)
    if even:
        return savgol_derivative(d, n, polyorder, delta=step)
    grid = np.arange(t[0], t[-1] + step / 2, step)
    # the even grid can hold fewer points than the frames (clustered times): the window
    # must fit it, odd and above the polynomial order, or there is no window at all
    n = min(n, grid.size if grid.size % 2 else grid.size - 1)
    if n <= polyorder:
        return np.gradient(d, t)
    v = savgol_derivative(np.interp(grid, t, d), n, polyorder, delta=step)
    return np.interp(t, grid, v)
