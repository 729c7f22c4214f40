"""Float Gauss-Newton (Lucas-Kanade) refinement of a dense flow with an exact cubic warp.

Private helper of :mod:`beatlab.signals.flow`; the public entry point is
:func:`beatlab.signals.flow.refine_flow`.
"""

from __future__ import annotations

from typing import NamedTuple

import cv2
import numpy as np
from scipy import ndimage as ndi

__all__ = ["ReferenceBasis", "gaussian_window", "prepare_reference", "refine_with_basis"]

# Tikhonov damping of each Gauss-Newton increment, relative to the mean trace of the windowed
# structure tensor over the image: pixels without texture keep the initial (pyramid) estimate
# instead of amplifying noise, pixels with texture are barely affected.
_DAMPING = 1e-3


class ReferenceBasis(NamedTuple):
    """Everything about the reference image that does not change from frame to frame."""

    reference: np.ndarray  # (Y, X) float32
    grad_x: np.ndarray  # (Y, X) float32, d reference / dx
    grad_y: np.ndarray  # (Y, X) float32, d reference / dy
    inv_xx: np.ndarray  # (Y, X) float32, inverse of the damped windowed structure tensor
    inv_xy: np.ndarray
    inv_yy: np.ndarray
    window_px: float
    textured: bool  # False when the reference has no gradient anywhere (constant image)


def gaussian_window(image: np.ndarray, sigma_px: float) -> np.ndarray:
    """Gaussian-weighted local sum (normalised kernel), mirror borders, float32 in and out."""
    size = int(2 * np.ceil(3.0 * sigma_px) + 1)
    return cv2.GaussianBlur(
        image, (size, size), sigmaX=sigma_px, sigmaY=sigma_px, borderType=cv2.BORDER_REFLECT
    )


def prepare_reference(reference: np.ndarray, *, window_px: float) -> ReferenceBasis:
    """Gradients and the inverted windowed structure tensor of a float reference image."""
    ref = np.ascontiguousarray(reference, dtype=np.float32)
    grad_y, grad_x = np.gradient(ref)
    grad_x = np.ascontiguousarray(grad_x, dtype=np.float32)
    grad_y = np.ascontiguousarray(grad_y, dtype=np.float32)
    jxx = gaussian_window(grad_x * grad_x, window_px)
    jxy = gaussian_window(grad_x * grad_y, window_px)
    jyy = gaussian_window(grad_y * grad_y, window_px)
    damping = _DAMPING * float(np.mean(jxx + jyy))
    textured = bool(damping > 0.0 and np.isfinite(damping))
    if textured:
        jxx = jxx + np.float32(damping)
        jyy = jyy + np.float32(damping)
        det = jxx * jyy - jxy * jxy
        inv_xx, inv_xy, inv_yy = jyy / det, -jxy / det, jxx / det
    else:
        inv_xx = inv_xy = inv_yy = np.zeros_like(ref)
    return ReferenceBasis(ref, grad_x, grad_y, inv_xx, inv_xy, inv_yy, float(window_px), textured)


def refine_with_basis(
    basis: ReferenceBasis, moving: np.ndarray, flow: np.ndarray, *, iterations: int
) -> np.ndarray:
    """Gauss-Newton steps on ``moving(p + flow(p)) = reference(p)``; returns a new flow."""
    out = np.array(flow, dtype=np.float32, copy=True)
    if iterations == 0 or not basis.textured:
        return out
    coeffs = ndi.spline_filter(np.asarray(moving, dtype=np.float64), order=3, mode="nearest")
    ny, nx = basis.reference.shape
    rows, cols = np.mgrid[0:ny, 0:nx].astype(np.float32)
    for _ in range(iterations):
        warped = ndi.map_coordinates(
            coeffs,
            [rows + out[..., 1], cols + out[..., 0]],
            order=3,
            mode="nearest",
            prefilter=False,
            output=np.float32,
        )
        error = warped - basis.reference
        bx = gaussian_window(basis.grad_x * error, basis.window_px)
        by = gaussian_window(basis.grad_y * error, basis.window_px)
        out[..., 0] -= basis.inv_xx * bx + basis.inv_xy * by
        out[..., 1] -= basis.inv_xy * bx + basis.inv_yy * by
    return out
