"""The fine time grid on which beat landmarks are measured (private)."""

import numpy as np

from beatlab.errors import InputError

__all__ = ["FINE_STEP_S", "INTERPOLATIONS", "not_a_knot_spline", "upsample", "upsampling_factor"]

#: landmark grid spacing when the trace is upsampled by a cubic spline
FINE_STEP_S = 0.004
#: at most this many grid points per frame interval
_MAX_FACTOR = 16
INTERPOLATIONS = ("cubic", "linear")


def upsampling_factor(times, interpolation):
    """Grid points per frame interval: ceil(frame interval / 4 ms) in [1, 16]; 1 for linear."""
    if interpolation not in INTERPOLATIONS:
        raise InputError(
            f"interpolation must be one of {', '.join(INTERPOLATIONS)}, got {interpolation!r}"
        )
    if interpolation == "linear" or times.size < 4:
        return 1
    dt = float(np.median(np.diff(times)))
    return int(np.clip(np.ceil(dt / FINE_STEP_S), 1, _MAX_FACTOR))


def upsample(times, factor, *curves):
    """Fine times and each curve on them: a not-a-knot cubic spline through every sample.

    Every sample is kept: sample i of the input is point ``i * factor`` of the output.
    """
    if factor == 1:
        return (times, *curves)
    steps = np.arange(factor) / factor
    fine = (times[:-1, None] + np.diff(times)[:, None] * steps[None, :]).ravel()
    fine = np.concatenate([fine, times[-1:]])
    return (fine, *not_a_knot_spline(times, np.stack(curves), fine))


def not_a_knot_spline(x: np.ndarray, y: np.ndarray, at: np.ndarray) -> np.ndarray:
    """The not-a-knot cubic spline through ``(x, y[j])`` for each row j, evaluated ``at``.

    What ``scipy.interpolate.CubicSpline(x, y[j])(at)`` gives (tests/beats/test_grid.py
    checks it against scipy, the reference, to 1e-12), written here so that an analysis does
    not import ``scipy.interpolate`` (which pulls in ``scipy.optimize``) at every start.

    Parameters
    ----------
    x : ndarray (N,)
        Increasing sample positions, N >= 4.
    y : ndarray (K, N)
        K curves through them.
    at : ndarray (M,)
        Where to evaluate, within ``[x[0], x[-1]]``.

    Returns
    -------
    ndarray (K, M)

    Notes
    -----
    Second derivatives M_i at the samples solve the usual continuity equations
    ``h[i-1] M[i-1] + 2 (h[i-1] + h[i]) M[i] + h[i] M[i+1] = 6 (d[i] - d[i-1])`` (h the
    intervals, d the slopes of the chords); not-a-knot ends (the third derivative continuous
    at the second and the last-but-one sample) give ``M[0]`` and ``M[-1]`` from their two
    neighbours, and the system for the inner M stays tridiagonal (solved by elimination).
    """
    x = np.asarray(x, dtype=np.float64)
    y = np.atleast_2d(np.asarray(y, dtype=np.float64))
    n = x.size
    if n < 4:
        raise ValueError(f"a not-a-knot spline needs at least 4 samples, got {n}")
    h = np.diff(x)
    d = np.diff(y, axis=1) / h
    rhs = 6.0 * np.diff(d, axis=1)  # (K, n - 2): equations for the inner samples 1..n-2
    lower = h[:-1].copy()  # coefficient of M[i-1] in equation i
    diag = 2.0 * (h[:-1] + h[1:])
    upper = h[1:].copy()  # coefficient of M[i+1]
    # M[0] = M[1] + h0/h1 (M[1] - M[2]); into equation 1
    r = h[0] / h[1]
    diag[0] += lower[0] * (1.0 + r)
    upper[0] -= lower[0] * r
    # M[n-1] = M[n-2] + h[n-2]/h[n-3] (M[n-2] - M[n-3]); into equation n-2
    r = h[-1] / h[-2]
    diag[-1] += upper[-1] * (1.0 + r)
    lower[-1] -= upper[-1] * r
    m = _tridiagonal(lower, diag, upper, rhs)
    first = m[:, :1] + h[0] / h[1] * (m[:, :1] - m[:, 1:2])
    last = m[:, -1:] + h[-1] / h[-2] * (m[:, -1:] - m[:, -2:-1])
    second = np.concatenate([first, m, last], axis=1)
    i = np.clip(np.searchsorted(x, at, side="right") - 1, 0, n - 2)
    left, right, width = at - x[i], x[i + 1] - at, h[i]
    m0, m1 = second[:, i], second[:, i + 1]
    return (
        (m0 * right**3 + m1 * left**3) / (6.0 * width)
        + (y[:, i] / width - m0 * width / 6.0) * right
        + (y[:, i + 1] / width - m1 * width / 6.0) * left
    )


def _tridiagonal(lower, diag, upper, rhs):
    """Solve the tridiagonal system (sub-diagonal lower[1:], super-diagonal upper[:-1]) for
    each row of ``rhs`` (Thomas elimination; the spline's matrix is diagonally dominant
    except at the not-a-knot rows, where the elimination still holds for increasing x)."""
    n = diag.size
    c = np.empty(n)
    b = np.empty_like(rhs)
    c[0] = upper[0] / diag[0]
    b[:, 0] = rhs[:, 0] / diag[0]
    for k in range(1, n):
        pivot = diag[k] - lower[k] * c[k - 1]
        c[k] = upper[k] / pivot if k < n - 1 else 0.0
        b[:, k] = (rhs[:, k] - lower[k] * b[:, k - 1]) / pivot
    for k in range(n - 2, -1, -1):
        b[:, k] -= c[k] * b[:, k + 1]
    return b
