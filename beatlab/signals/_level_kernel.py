"""Robust plane fits of many frames, compiled (numba): the work of :mod:`beatlab.signals.level`.

One pass per frame over its pixels instead of (frames x pixels) temporaries in numpy: the
levelling of every frame of the per-frame pass and of the rest pass's stack costs a few BLAS
calls and a dozen elementwise passes in numpy, most of it call overhead for one frame and
memory traffic for a stack. The estimator is the same (ordinary least squares, the MAD of its
residuals as the scale, three Tukey-biweight reweightings); the sums run in another order, so
the coefficients agree with the numpy formulation to rounding (tests/signals/test_level.py
keeps that formulation as the reference).
"""

from __future__ import annotations

import numba
import numpy as np

__all__ = ["TUKEY_C", "prepare_level", "subtract_plane", "tukey_rows"]

#: Tukey biweight tuning constant, in robust SDs (95 % efficiency at the normal).
TUKEY_C = 4.685
#: Robust SD of a normal sample from its median absolute deviation.
MAD_TO_SD = 1.4826
#: Reweighting steps after the ordinary least-squares start.
TUKEY_STEPS = 3
#: The sums over pixels may be reordered (vectorised): the inputs are finite, and the
#: order only changes the rounding.
_SUMS = {"reassoc", "arcp", "contract"}


@numba.njit(cache=True, nogil=True)
def _solve(normal, rhs):  # pragma: no cover - compiled; tested through tukey_rows
    """``normal @ c = rhs``; the minimum-norm least-squares solution when singular."""
    try:
        return np.linalg.solve(normal, rhs)
    except Exception:  # numba raises a plain exception for a singular matrix
        return np.linalg.lstsq(normal, rhs)[0]


def _row_medians(x: np.ndarray) -> np.ndarray:
    """``np.median(x, axis=1)`` of a finite 2-D array, without its generic overhead.

    The same values (``np.partition`` at the middle index; for an even count the lower middle
    value is the largest of the values it leaves below) and the same mean of the two middle
    values, so the same numbers. (numpy's introselect is faster and steadier than a compiled
    quickselect.)
    """
    n = x.shape[1]
    half = n // 2
    part = np.partition(x, half, axis=1)
    if n % 2:
        return part[:, half]
    pair = np.stack([part[:, :half].max(axis=1), part[:, half]], axis=1)
    return np.mean(pair, axis=1)


@numba.njit(cache=True, nogil=True, fastmath=_SUMS)
def _residuals(a, d, c, resid):  # pragma: no cover - compiled; tested through tukey_rows
    p, k = a.shape
    if k == 3:
        c0, c1, c2 = c[0], c[1], c[2]
        for i in range(p):
            resid[i] = d[i] - (a[i, 0] * c0 + a[i, 1] * c1 + a[i, 2] * c2)
    else:
        for i in range(p):
            fit = 0.0
            for j in range(k):
                fit += a[i, j] * c[j]
            resid[i] = d[i] - fit


@numba.njit(cache=True, nogil=True, fastmath=_SUMS)
def _weighted_system(a, d, resid, cut, normal, rhs):  # pragma: no cover - compiled
    """``a.T W a`` and ``a.T W d`` with the Tukey biweights ``W`` of the residuals."""
    p, k = a.shape
    normal[:] = 0.0
    rhs[:] = 0.0
    if k == 3:
        n00 = n01 = n02 = n11 = n12 = n22 = r0 = r1 = r2 = 0.0
        for i in range(p):
            u = resid[i] / cut
            w = max(1.0 - u * u, 0.0)  # Tukey biweight: 0 beyond the cut
            w *= w
            x0, x1, x2, y = a[i, 0], a[i, 1], a[i, 2], d[i]
            w0, w1, w2 = w * x0, w * x1, w * x2
            n00 += w0 * x0
            n01 += w0 * x1
            n02 += w0 * x2
            n11 += w1 * x1
            n12 += w1 * x2
            n22 += w2 * x2
            r0 += w0 * y
            r1 += w1 * y
            r2 += w2 * y
        normal[0, 0], normal[0, 1], normal[0, 2] = n00, n01, n02
        normal[1, 0], normal[1, 1], normal[1, 2] = n01, n11, n12
        normal[2, 0], normal[2, 1], normal[2, 2] = n02, n12, n22
        rhs[0], rhs[1], rhs[2] = r0, r1, r2
        return
    for i in range(p):
        u = resid[i] / cut
        w = max(1.0 - u * u, 0.0)
        w *= w
        for j in range(k):
            wa = w * a[i, j]
            rhs[j] += wa * d[i]
            for m in range(k):
                normal[j, m] += wa * a[i, m]


@numba.njit(cache=True, nogil=True)
def _ols(a, d, gram, coef, resid):  # pragma: no cover - compiled; tested through tukey_rows
    """Ordinary least-squares coefficients and residuals of each row of ``d``."""
    p, k = a.shape
    rhs = np.zeros(k)
    for t in range(d.shape[0]):
        rhs[:] = 0.0
        for i in range(p):
            for j in range(k):
                rhs[j] += a[i, j] * d[t, i]
        coef[t] = _solve(gram, rhs)
        _residuals(a, d[t], coef[t], resid[t])


@numba.njit(cache=True, nogil=True)
def _reweight(a, d, coef, resid, cut):  # pragma: no cover - compiled; tested through tukey_rows
    """Tukey-biweight steps of each row with a positive ``cut`` (``resid`` is scratch)."""
    k = a.shape[1]
    normal = np.empty((k, k))
    rhs = np.empty(k)
    for t in range(d.shape[0]):
        if not cut[t] > 0:
            continue
        for _ in range(TUKEY_STEPS):
            _residuals(a, d[t], coef[t], resid[t])
            _weighted_system(a, d[t], resid[t], cut[t], normal, rhs)
            coef[t] = _solve(normal, rhs)


def tukey_rows(a: np.ndarray, d: np.ndarray, gram: np.ndarray | None = None) -> np.ndarray:
    """Robust fit of each row of ``d`` (T, P) on the design ``a`` (P, k): coefficients (T, k).

    Ordinary least squares, then :data:`TUKEY_STEPS` Tukey-biweight reweightings (tuning
    :data:`TUKEY_C` robust SDs) with the scale fixed at the MAD of the start's residuals
    (it ignores the moving cells already). A row whose residuals have no spread keeps its
    ordinary least-squares fit; a singular system gets its minimum-norm solution.

    Parameters
    ----------
    a : ndarray (P, k)
        Design matrix (float64).
    d : ndarray (T, P)
        Data, one row per frame (float32 or float64, computed in float64); must be finite.
    gram : ndarray (k, k), optional
        ``a.T @ a``, when the caller keeps it.

    Returns
    -------
    ndarray (T, k) float64
    """
    a = np.ascontiguousarray(a, dtype=np.float64)
    # float32 data stay float32 (each value is widened in the sums): no float64 copy
    d = np.ascontiguousarray(d, dtype=np.float32 if d.dtype == np.float32 else np.float64)
    if d.ndim != 2 or a.ndim != 2 or d.shape[1] != a.shape[0]:
        raise ValueError(f"d must be (T, P) and a (P, k); got d {d.shape}, a {a.shape}")
    gram = a.T @ a if gram is None else np.ascontiguousarray(gram, dtype=np.float64)
    coef = np.zeros((d.shape[0], a.shape[1]))
    if d.shape[0] == 0 or a.shape[0] == 0:
        return coef
    resid = np.empty(d.shape)
    _ols(a, d, gram, coef, resid)
    centre = _row_medians(resid)
    np.subtract(resid, centre[:, None], out=resid)
    scale = MAD_TO_SD * _row_medians(np.abs(resid, out=resid))
    _reweight(a, d, coef, resid, TUKEY_C * scale)
    return coef


@numba.njit(cache=True, nogil=True)
def _subtract_plane(frame, c0, c1, c2, x, y, out):  # pragma: no cover - compiled
    ny, nx = frame.shape
    for r in range(ny):
        for c in range(nx):
            out[r, c] = frame[r, c] - ((c0 + c1 * x[r, c]) + c2 * y[r, c])
    return out


def subtract_plane(
    frame: np.ndarray, coef: np.ndarray, x: np.ndarray, y: np.ndarray
) -> np.ndarray:
    """``frame - (c0 + c1 x + c2 y)`` in float32, one pass.

    The same float32 operations, in the same order, as ``frame - (np.float32(c0) +
    np.float32(c1) * x + np.float32(c2) * y)`` in numpy (tests compare bit for bit).

    Parameters
    ----------
    frame, x, y : ndarray (Y, X) float32
    coef : array-like (3,)
        Offset, x-tilt and y-tilt.
    """
    frame = np.ascontiguousarray(frame, dtype=np.float32)
    c0, c1, c2 = (np.float32(c) for c in coef)
    return _subtract_plane(frame, c0, c1, c2, x, y, np.empty_like(frame))


def prepare_level() -> None:
    """Compile (or load from numba's cache) the fit now, before any worker forks."""
    a = np.ones((4, 1))
    for dtype in (np.float32, np.float64):
        tukey_rows(a, np.arange(8, dtype=dtype).reshape(2, 4))
    grid = np.zeros((2, 2), dtype=np.float32)
    subtract_plane(grid, np.zeros(3), grid, grid)
