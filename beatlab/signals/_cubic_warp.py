"""Cubic B-spline warp of an image by a dense displacement field, compiled (numba).

Private helper of the flow refinement (:mod:`beatlab.signals._flow_refine`). It computes what
``scipy.ndimage.map_coordinates(coeffs, [rows + dy, cols + dx], order=3, prefilter=False)``
does on the B-spline coefficients of an edge-extended image (positions in float64, the
weighted sum of the 16 float32 coefficients in float32): no position quantisation (unlike
OpenCV's ``remap``, whose 1/32 px position table reads small motions low), about 5x faster
than scipy at 256 x 256 px (``benchmarks/bench_flow.py``), and it releases the GIL. The
refinement warps every frame once per Gauss-Newton step, which made the scipy call the
largest single cost of the per-frame pass.

Outside the frame the image is extended by its edge values (``mode="edge"`` padding before
the prefilter): pixels within 4 px of the border differ slightly from scipy's ``"nearest"``
mode; the refinement keeps a margin of several window widths around the pixels it reads.
"""

from __future__ import annotations

import numba
import numpy as np

__all__ = [
    "PAD_PX",
    "gauss_newton_update",
    "prepare_warp",
    "residual_products",
    "spline_coefficients",
    "warp_cubic",
]

#: Edge-extension (px) of the coefficient image: displaced positions beyond it are clamped
#: (the extended image is constant there, so nothing changes).
PAD_PX = 4


#: The pole of the cubic B-spline prefilter, sqrt(3) - 2 (Unser et al. 1991).
_POLE = float(np.sqrt(3.0) - 2.0)


def spline_coefficients(image: np.ndarray) -> np.ndarray:
    """Cubic B-spline coefficients (float32) of ``image`` edge-extended by :data:`PAD_PX`.

    The numbers of ``scipy.ndimage.spline_filter(np.pad(image, PAD_PX, mode="edge"),
    order=3, mode="nearest")`` cast to float32 (tests compare bit for bit): the same
    recursive filter, along rows then columns, with the same operations in the same order
    on every line, but all lines of a pass at once (contiguous memory, ~6x faster).
    """
    image = np.ascontiguousarray(image, dtype=np.float32 if image.dtype == np.float32 else None)
    ny, nx = image.shape
    padded = np.empty((ny + 2 * PAD_PX, nx + 2 * PAD_PX))
    _pad_edge(image.astype(np.float64, copy=False), PAD_PX, padded)
    _prefilter_columns(padded)  # along axis 0, as scipy's first pass
    across = np.ascontiguousarray(padded.T)
    _prefilter_columns(across)  # along axis 1
    out = np.empty(padded.shape, dtype=np.float32)
    _transpose_to_float32(across, out)
    return out


@numba.njit(nogil=True, cache=True)
def _pad_edge(image, pad, out):  # pragma: no cover - compiled; tested through the caller
    """``out = np.pad(image, pad, mode="edge")``."""
    ny, nx = image.shape
    for r in range(ny + 2 * pad):
        row = image[min(max(r - pad, 0), ny - 1)]
        for c in range(nx + 2 * pad):
            out[r, c] = row[min(max(c - pad, 0), nx - 1)]


@numba.njit(nogil=True, cache=True)
def _transpose_to_float32(src, out):  # pragma: no cover - compiled; tested through the caller
    n, m = src.shape
    for i in range(m):
        for j in range(n):
            out[i, j] = np.float32(src[j, i])


@numba.njit(nogil=True, cache=True)
def _prefilter_columns(c):  # pragma: no cover - compiled; tested through spline_coefficients
    """The cubic B-spline prefilter along axis 0 of ``c`` (float64, in place), every column
    with the operations of scipy's ``spline_filter1d`` (mode "nearest", i.e. the
    half-sample-symmetric initial values) on one line: gain, causal initial value and pass,
    anticausal initial value and pass."""
    n, m = c.shape
    if n < 2:
        return
    z = _POLE
    gain = (1.0 - z) * (1.0 - 1.0 / z)
    for i in range(n):
        for j in range(m):
            c[i, j] *= gain
    z_n = z**n
    factor = z / (1 - z_n * z_n)
    first = c[0].copy()
    acc = np.empty(m)
    for j in range(m):
        acc[j] = c[0, j] + z_n * c[n - 1, j]
    z_i = z
    for i in range(1, n):
        for j in range(m):
            acc[j] += z_i * (c[i, j] + z_n * c[n - 1 - i, j])
        z_i *= z
    for j in range(m):
        c[0, j] = acc[j] * factor + first[j]
    for i in range(1, n):
        for j in range(m):
            c[i, j] += z * c[i - 1, j]
    tail = z / (z - 1)
    for j in range(m):
        c[n - 1, j] *= tail
    for i in range(n - 2, -1, -1):
        for j in range(m):
            c[i, j] = z * (c[i + 1, j] - c[i, j])


#: Floating-point liberties of the sampling kernels: fused multiply-adds and reciprocals.
#: Not reordered sums (a sum could then round differently in the warp and in the residual
#: products, which must agree bit for bit), nor the no-NaN or no-infinity assumptions (a
#: non-finite position must still give NaN).
_SAMPLING_MATH = {"contract", "arcp", "nsz"}


@numba.njit(nogil=True, cache=True, inline="always", fastmath=_SAMPLING_MATH)
def _weights(t):  # pragma: no cover - compiled; tested through warp_cubic
    """Cubic B-spline weights (float32) of the 4 coefficients at offsets -1, 0, 1, 2 of a
    fraction t (float32)."""
    u = np.float32(1.0) - t
    t2 = t * t
    w0 = u * u * u / np.float32(6.0)
    w3 = t2 * t / np.float32(6.0)
    w1 = (np.float32(3.0) * t2 * t - np.float32(6.0) * t2 + np.float32(4.0)) / np.float32(6.0)
    return w0, w1, np.float32(1.0) - w0 - w1 - w3, w3


@numba.njit(nogil=True, cache=True, inline="always", fastmath=_SAMPLING_MATH)
def _sample(coeffs, pad, y, x, lo, hi_y, hi_x):  # pragma: no cover - compiled
    """The cubic B-spline of ``coeffs`` (float32) at (y, x) (float64), float32; NaN at a
    non-finite position.

    The position and its fraction are float64 (a float32 position 256 px from the origin
    would be quantised to 3e-5 px); the weights and the 16-term sum are float32, like the
    coefficients (0.35 instead of 0.45 ms for the products of a 139 x 146 px region;
    within 6e-5 grey levels of the float64 sum at values of ~100).
    """
    if not (np.isfinite(y) and np.isfinite(x)):
        return np.float32(np.nan)
    y = min(max(y, lo), hi_y)
    x = min(max(x, lo), hi_x)
    fy = np.floor(y)
    fx = np.floor(x)
    by = int(fy) + pad - 1
    bx = int(fx) + pad - 1
    wx0, wx1, wx2, wx3 = _weights(np.float32(x - fx))
    wy0, wy1, wy2, wy3 = _weights(np.float32(y - fy))
    r0, r1, r2, r3 = coeffs[by], coeffs[by + 1], coeffs[by + 2], coeffs[by + 3]
    acc = wy0 * (wx0 * r0[bx] + wx1 * r0[bx + 1] + wx2 * r0[bx + 2] + wx3 * r0[bx + 3])
    acc += wy1 * (wx0 * r1[bx] + wx1 * r1[bx + 1] + wx2 * r1[bx + 2] + wx3 * r1[bx + 3])
    acc += wy2 * (wx0 * r2[bx] + wx1 * r2[bx + 1] + wx2 * r2[bx + 2] + wx3 * r2[bx + 3])
    acc += wy3 * (wx0 * r3[bx] + wx1 * r3[bx + 1] + wx2 * r3[bx + 2] + wx3 * r3[bx + 3])
    return acc


@numba.njit(nogil=True, cache=True, fastmath=_SAMPLING_MATH)
def _warp(coeffs, pad, dy, dx, out):  # pragma: no cover - compiled; tested through warp_cubic
    ny, nx = out.shape
    lo = 1.0 - pad
    hi_y = ny + pad - 3.0
    hi_x = nx + pad - 3.0
    for r in range(ny):
        for c in range(nx):
            out[r, c] = _sample(coeffs, pad, r + dy[r, c], c + dx[r, c], lo, hi_y, hi_x)
    return out


@numba.njit(nogil=True, cache=True, fastmath=_SAMPLING_MATH)
def _residual_products(  # pragma: no cover - compiled; tested through residual_products
    coeffs, pad, flow, reference, basis, products, row0, col0
):
    """``products[j] = basis[j] * (warp(coeffs, flow) - reference)``, float32.

    The samples of :func:`warp_cubic`, then ``error -= reference`` and ``basis[j] * error``
    in numpy, in one pass without the intermediate images. The arrays other than
    ``coeffs`` may cover a part of its image, whose first pixel is (row0, col0).
    """
    ny, nx = reference.shape
    lo = 1.0 - pad
    hi_y = coeffs.shape[0] - pad - 3.0
    hi_x = coeffs.shape[1] - pad - 3.0
    for r in range(ny):
        for c in range(nx):
            y = (r + row0) + flow[r, c, 1]
            x = (c + col0) + flow[r, c, 0]
            error = _sample(coeffs, pad, y, x, lo, hi_y, hi_x) - reference[r, c]
            for j in range(basis.shape[0]):
                products[j, r, c] = basis[j, r, c] * error


@numba.njit(nogil=True, cache=True)
def _gauss_newton_update(rows, rhs, flow):  # pragma: no cover - compiled; tested through refine
    """``flow[..., comp] -= sum_j rows[comp, j] * rhs[j]`` for comp 0, 1, float32.

    Summed in the order of ``step = row[0] * rhs[0]; step += row[j] * rhs[j]`` in numpy,
    a row at a time: each inner loop runs along contiguous memory, which the compiler turns
    into vector instructions (the same numbers; 0.04 instead of 0.10 ms for a 139 x 146 px
    region, whose pixels one at a time went across eight planes).
    """
    k, ny, nx = rhs.shape
    s0 = np.empty(nx, dtype=np.float32)
    s1 = np.empty(nx, dtype=np.float32)
    for r in range(ny):
        for c in range(nx):
            s0[c] = rows[0, 0, r, c] * rhs[0, r, c]
            s1[c] = rows[1, 0, r, c] * rhs[0, r, c]
        for j in range(1, k):
            for c in range(nx):
                s0[c] = s0[c] + rows[0, j, r, c] * rhs[j, r, c]
                s1[c] = s1[c] + rows[1, j, r, c] * rhs[j, r, c]
        for c in range(nx):
            flow[r, c, 0] = flow[r, c, 0] - s0[c]
            flow[r, c, 1] = flow[r, c, 1] - s1[c]


def warp_cubic(coeffs: np.ndarray, flow: np.ndarray) -> np.ndarray:
    """The image of ``coeffs`` sampled at ``p + flow(p)``, float32 (Y, X).

    Parameters
    ----------
    coeffs : ndarray (Y + 2 PAD_PX, X + 2 PAD_PX) float32
        From :func:`spline_coefficients`.
    flow : ndarray (Y, X, 2)
        ``(dx, dy)`` px per pixel; a non-finite displacement gives NaN.

    Returns
    -------
    ndarray (Y, X) float32
    """
    ny, nx = coeffs.shape[0] - 2 * PAD_PX, coeffs.shape[1] - 2 * PAD_PX
    if flow.shape != (ny, nx, 2):
        raise ValueError(f"flow must have shape {(ny, nx, 2)}, got {flow.shape}")
    field = np.asarray(flow, dtype=np.float32)
    out = np.empty((ny, nx), dtype=np.float32)
    return _warp(
        np.ascontiguousarray(coeffs, dtype=np.float32),
        PAD_PX,
        np.ascontiguousarray(field[..., 1]),
        np.ascontiguousarray(field[..., 0]),
        out,
    )


def residual_products(
    coeffs: np.ndarray,
    flow: np.ndarray,
    reference: np.ndarray,
    basis: np.ndarray,
    out: np.ndarray,
    *,
    origin: tuple[int, int] = (0, 0),
) -> np.ndarray:
    """``out[j] = basis[j] * (warp_cubic(coeffs, flow) - reference)`` in one compiled pass.

    Parameters
    ----------
    coeffs : ndarray (Y + 2 PAD_PX, X + 2 PAD_PX) float32
        From :func:`spline_coefficients`.
    flow : ndarray (y, x, 2) float32, C-contiguous
        ``(dx, dy)`` px per pixel.
    reference : ndarray (y, x) float32
    basis : ndarray (k, y, x) float32
    out : ndarray (k, y, x) float32
        Written in place and returned.
    origin : (int, int)
        Row and column of the image of ``coeffs`` where the other arrays begin: they may
        cover a part of it, ``(y, x) <= (Y, X)`` (the numbers of that part of the whole).

    Returns
    -------
    ndarray (k, y, x) float32
        The samples of :func:`warp_cubic`, then the float32 operations of the numpy
        expression in its order.
    """
    ny, nx = reference.shape
    row0, col0 = (int(v) for v in origin)
    full_y, full_x = coeffs.shape[0] - 2 * PAD_PX, coeffs.shape[1] - 2 * PAD_PX
    if flow.shape != (ny, nx, 2) or basis.shape[1:] != (ny, nx) or out.shape != basis.shape:
        raise ValueError(
            f"shapes do not match: flow {flow.shape}, reference {reference.shape}, "
            f"basis {basis.shape}, out {out.shape}"
        )
    if not (0 <= row0 <= full_y - ny and 0 <= col0 <= full_x - nx):
        raise ValueError(
            f"a ({ny}, {nx}) part at {origin} does not fit the ({full_y}, {full_x}) image"
        )
    _residual_products(coeffs, PAD_PX, flow, reference, basis, out, row0, col0)
    return out


def gauss_newton_update(rows: np.ndarray, rhs: np.ndarray, flow: np.ndarray) -> np.ndarray:
    """``flow[..., c] -= sum_j rows[c, j] * rhs[j]`` (c = 0, 1) in place, float32.

    Parameters
    ----------
    rows : ndarray (2, k, Y, X) float32
        Rows 0 and 1 of the inverse normal matrix.
    rhs : ndarray (k, Y, X) float32
        Windowed right-hand sides.
    flow : ndarray (Y, X, 2) float32, C-contiguous
        Updated in place and returned.
    """
    if rows.shape[1:] != rhs.shape or flow.shape != (*rhs.shape[1:], 2):
        raise ValueError(
            f"shapes do not match: rows {rows.shape}, rhs {rhs.shape}, flow {flow.shape}"
        )
    _gauss_newton_update(rows, rhs, flow)
    return flow


def prepare_warp() -> None:
    """Compile (or load from numba's cache) the warp now, in this process.

    Worker processes forked afterwards inherit the compiled code; otherwise every worker of
    every round would load it again on its first frame.
    """
    coeffs = spline_coefficients(np.zeros((4, 4)))
    flow = np.zeros((4, 4, 2), dtype=np.float32)
    warp_cubic(coeffs, flow)
    images = np.zeros((2, 4, 4), dtype=np.float32)
    residual_products(coeffs, flow, images[0], images, np.empty_like(images))
    gauss_newton_update(np.zeros((2, 2, 4, 4), dtype=np.float32), images, flow)
