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

__all__ = [
    "LastStep",
    "ReferenceBasis",
    "gaussian_window",
    "prepare_reference",
    "refine_with_basis",
    "window_reach_px",
]

# Tikhonov damping of each Gauss-Newton increment, relative to the mean of each diagonal term
# of the windowed normal matrix over the image: pixels without texture keep the initial
# (pyramid) estimate instead of amplifying noise, pixels with texture are barely affected.
_DAMPING = 1e-3

#: brightness models: the basis functions beside the two gradients
BRIGHTNESS_MODELS = ("affine", "constant")


class LastStep(NamedTuple):
    """The last Gauss-Newton step on the part of the image whose flow is read after it.

    The step at a pixel needs the residual products within the Gaussian window's reach;
    windowing them over ``outer`` (``inner`` widened by that reach, within the image) gives
    at every pixel of ``inner`` the sums of windowing the whole image. The crops are
    contiguous copies, made once.
    """

    inner: tuple[slice, slice]  # in the image
    outer: tuple[slice, slice]  # in the image
    inner_in_outer: tuple[slice, slice]
    reference: np.ndarray  # (y_o, x_o) float32, the reference over outer
    basis: np.ndarray  # (k, y_o, x_o) float32
    rows: np.ndarray  # (2, k, y_i, x_i) float32, over inner


class ReferenceBasis(NamedTuple):
    """Everything about the reference image that does not change from frame to frame."""

    reference: np.ndarray  # (Y, X) float32
    basis: np.ndarray  # (k, Y, X) float32: the gradients (x, y), then the brightness terms
    rows: np.ndarray  # (2, k, Y, X) float32: rows 0 and 1 of the inverse normal matrix
    window_px: float
    textured: bool  # False when the reference has no gradient anywhere (constant image)
    last_step: LastStep | None = None  # None: the last step refines every pixel


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
    size = 2 * window_reach_px(sigma_px) + 1
    return cv2.getGaussianKernel(size, sigma_px).astype(np.float32)


def window_reach_px(window_px: float) -> int:
    """Pixels on each side of its centre that a Gaussian window of :func:`gaussian_window`
    reads (half its kernel)."""
    return int(np.ceil(3.0 * float(window_px)))


def _last_step(
    reference: np.ndarray, basis: np.ndarray, rows: np.ndarray, inner, window_px: float
) -> LastStep | None:
    ny, nx = reference.shape
    rows_in, cols_in = (range(*sl.indices(n)) for sl, n in zip(inner, (ny, nx), strict=True))
    if len(rows_in) == 0 or len(cols_in) == 0 or (len(rows_in), len(cols_in)) == (ny, nx):
        return None  # nothing read, or every pixel: the whole image as it is
    reach = window_reach_px(window_px)
    inner = (slice(rows_in.start, rows_in.stop), slice(cols_in.start, cols_in.stop))
    outer = (
        slice(max(rows_in.start - reach, 0), min(rows_in.stop + reach, ny)),
        slice(max(cols_in.start - reach, 0), min(cols_in.stop + reach, nx)),
    )
    inner_in_outer = tuple(
        slice(i.start - o.start, i.stop - o.start) for i, o in zip(inner, outer, strict=True)
    )
    return LastStep(
        inner=inner,
        outer=outer,
        inner_in_outer=inner_in_outer,
        reference=np.ascontiguousarray(reference[outer]),
        basis=np.ascontiguousarray(basis[(slice(None), *outer)]),
        rows=np.ascontiguousarray(rows[(slice(None), slice(None), *inner)]),
    )


def prepare_reference(
    reference: np.ndarray,
    *,
    window_px: float,
    brightness: str = "affine",
    read: tuple[slice, slice] | None = None,
) -> ReferenceBasis:
    """Basis images and the inverted windowed normal matrix of a float reference image.

    ``read``: the rectangle (slices) of pixels whose flow is read after the refinement; the
    last step then works only as far as they need (:class:`LastStep`), and the flow
    elsewhere keeps the step before. None: every pixel.
    """
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
    basis = np.stack(basis)
    last = None if read is None else _last_step(ref, basis, rows, read, window_px)
    return ReferenceBasis(ref, basis, rows, float(window_px), textured, last)


def refine_with_basis(
    basis: ReferenceBasis,
    moving: np.ndarray,
    flow: np.ndarray,
    *,
    iterations: int,
    every_pixel: bool = False,
) -> np.ndarray:
    """Gauss-Newton steps on ``moving(p + flow(p)) = (1 + g) reference(p) + b``.

    Returns a new flow; the brightness terms are re-estimated at every step. The last step
    refines only the pixels the basis was prepared to be read at (``read`` of
    :func:`prepare_reference`), unless ``every_pixel``.
    """
    out = np.array(flow, dtype=np.float32, order="C", copy=True)
    if iterations == 0 or not basis.textured:
        return out
    coeffs = spline_coefficients(moving)
    products = np.empty_like(basis.basis)
    rhs = np.empty_like(basis.basis)
    last = None if every_pixel else basis.last_step
    for step in range(iterations):
        if last is not None and step == iterations - 1:
            _last_step_on_part(basis, last, coeffs, out)
            break
        # b * (moving warped by the current flow - reference) for each basis image b, then
        # their Gaussian-windowed sums; only the two displacement components are solved for
        residual_products(coeffs, out, basis.reference, basis.basis, products)
        for j in range(products.shape[0]):
            gaussian_window(products[j], basis.window_px, out=rhs[j])
        gauss_newton_update(basis.rows, rhs, out)
    return out


def _last_step_on_part(
    basis: ReferenceBasis, last: LastStep, coeffs: np.ndarray, flow: np.ndarray
) -> None:
    """The Gauss-Newton step of :func:`refine_with_basis` at the pixels of ``last.inner``
    (``flow`` updated in place there)."""
    outer, inner = last.outer, last.inner
    products = np.empty_like(last.basis)
    residual_products(
        coeffs, np.ascontiguousarray(flow[outer]), last.reference, last.basis, products,
        origin=(outer[0].start, outer[1].start),
    )  # fmt: skip
    rhs = np.empty(last.rows.shape[1:], dtype=np.float32)
    windowed = np.empty(products.shape[1:], dtype=np.float32)
    for j in range(products.shape[0]):
        gaussian_window(products[j], basis.window_px, out=windowed)
        rhs[j] = windowed[last.inner_in_outer]
    part = np.ascontiguousarray(flow[inner])
    gauss_newton_update(last.rows, rhs, part)
    flow[inner] = part
