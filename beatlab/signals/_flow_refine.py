"""Float Gauss-Newton (Lucas-Kanade) refinement of a dense flow with an exact cubic warp.

Private helper of :mod:`beatlab.signals.flow`; the public entry point is
:func:`beatlab.signals.flow.refine_flow`.

The local model is ``moving(p + u) = (1 + g) reference(p) + b`` with the displacement ``u``
and a local brightness gain ``g`` and offset ``b`` solved together in each Gaussian window.
The gain matters for quantitative phase: a contracting cell thickens (its dry mass is
conserved, so the OPD grows as the area shrinks), and a brightness-constant fit reads that
thickening as outward motion, under-reading the contraction by 15-25 % at 4 % strain
(measured on the simulator, see ``tests/signals/test_flow.py``).
"""

from __future__ import annotations

import functools
from typing import NamedTuple

import cv2
import numpy as np

from beatlab.signals._cubic_warp import (
    gauss_newton_update,
    prepare_warp,
    residual_products,
    spline_coefficients,
)

__all__ = ["ReferenceBasis", "gaussian_window", "prepare_reference", "refine_with_basis"]

# Tikhonov damping of each Gauss-Newton increment, relative to the mean of each diagonal term
# of the windowed normal matrix over the image: pixels without texture keep the initial
# (pyramid) estimate instead of amplifying noise, pixels with texture are barely affected.
_DAMPING = 1e-3

#: brightness models: the basis functions beside the two gradients
BRIGHTNESS_MODELS = ("affine", "constant")


class ReferenceBasis(NamedTuple):
    """Everything about the reference image that does not change from frame to frame."""

    reference: np.ndarray  # (Y, X) float32
    basis: np.ndarray  # (k, Y, X) float32: the gradients (x, y), then the brightness terms
    rows: np.ndarray  # (2, k, Y, X) float32: rows 0 and 1 of the inverse normal matrix
    window_px: float
    textured: bool  # False when the reference has no gradient anywhere (constant image)


def gaussian_window(
    image: np.ndarray, sigma_px: float, *, out: np.ndarray | None = None
) -> np.ndarray:
    """Gaussian-weighted local sum (normalised kernel), mirror borders, float32 in and out.

    ``cv2.GaussianBlur`` with a ``2 ceil(3 sigma) + 1`` kernel, computed as the separable
    filter of the same float32 kernel: the same numbers (checked against ``GaussianBlur`` in
    tests/signals/test_flow.py) without its per-call kernel set-up. ``out``: a C-contiguous
    float32 array of the image's shape to write into.
    """
    kernel = _gaussian_kernel(float(sigma_px))
    if out is None:
        return cv2.sepFilter2D(image, -1, kernel, kernel, borderType=cv2.BORDER_REFLECT)
    return cv2.sepFilter2D(image, -1, kernel, kernel, dst=out, borderType=cv2.BORDER_REFLECT)


@functools.lru_cache(maxsize=8)
def _gaussian_kernel(sigma_px: float) -> np.ndarray:
    size = int(2 * np.ceil(3.0 * sigma_px) + 1)
    return cv2.getGaussianKernel(size, sigma_px).astype(np.float32)


def prepare_reference(
    reference: np.ndarray, *, window_px: float, brightness: str = "affine"
) -> ReferenceBasis:
    """Basis images and the inverted windowed normal matrix of a float reference image."""
    if brightness not in BRIGHTNESS_MODELS:
        raise ValueError(
            f"brightness must be one of {', '.join(BRIGHTNESS_MODELS)}, got {brightness!r}"
        )
    ref = np.ascontiguousarray(reference, dtype=np.float32)
    prepare_warp()  # before any worker forks: they inherit the compiled warp
    grad_y, grad_x = np.gradient(ref)
    basis = [np.ascontiguousarray(grad_x, np.float32), np.ascontiguousarray(grad_y, np.float32)]
    if brightness == "affine":
        centred = ref - np.float32(ref.mean())
        scale = np.float32(max(float(np.std(centred)), 1e-6))
        basis += [-(centred / scale), -np.ones_like(ref)]
    k = len(basis)
    normal = np.empty((*ref.shape, k, k), dtype=np.float64)
    for i in range(k):
        for j in range(i, k):
            s = gaussian_window(basis[i] * basis[j], window_px)
            normal[..., i, j] = s
            normal[..., j, i] = s
    diag = np.array([normal[..., i, i].mean() for i in range(k)])
    grad_energy = float(diag[0] + diag[1])
    textured = bool(grad_energy > 0.0 and np.isfinite(grad_energy))
    if textured:
        damping = _DAMPING * np.where(diag > 0, diag, grad_energy)
        normal[..., np.arange(k), np.arange(k)] += damping
        inverse = np.linalg.inv(normal)
    else:
        inverse = np.zeros_like(normal)
    # contiguous planes: the per-frame solve is then one compiled elementwise pass
    rows = np.ascontiguousarray(np.moveaxis(inverse[..., :2, :], (-2, -1), (0, 1)), np.float32)
    return ReferenceBasis(ref, np.stack(basis), rows, float(window_px), textured)


def refine_with_basis(
    basis: ReferenceBasis, moving: np.ndarray, flow: np.ndarray, *, iterations: int
) -> np.ndarray:
    """Gauss-Newton steps on ``moving(p + flow(p)) = (1 + g) reference(p) + b``.

    Returns a new flow; the brightness terms are re-estimated at every step.
    """
    out = np.array(flow, dtype=np.float32, order="C", copy=True)
    if iterations == 0 or not basis.textured:
        return out
    coeffs = spline_coefficients(moving)
    products = np.empty_like(basis.basis)
    rhs = np.empty_like(basis.basis)
    for _ in range(iterations):
        # b * (moving warped by the current flow - reference) for each basis image b, then
        # their Gaussian-windowed sums; only the two displacement components are solved for
        residual_products(coeffs, out, basis.reference, basis.basis, products)
        for j in range(products.shape[0]):
            gaussian_window(products[j], basis.window_px, out=rhs[j])
        gauss_newton_update(basis.rows, rhs, out)
    return out
