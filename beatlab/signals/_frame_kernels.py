"""Per-frame elementwise work in single compiled passes (numba): the 8-bit mapping, gathers.

:func:`grey_and_uint8`, for :func:`beatlab.signals.flow.to_uint8` and the tracker: the float
grey image (for the refinement), the rounded 8-bit image (for the coarse flow), and the counts
of finite and clipped pixels, computed with the same float32 operations as the numpy
expression ``(image - lo) * (255 / (hi - lo))``, ``np.rint``, ``np.clip(0, 255)``
(tests/signals/test_frame_kernels.py compares them bit for bit), without a dozen passes over
the frame. :func:`gather_frame`, for the per-frame pass: a frame's field and OPD difference at
the used pixels, non-finite as 0; :func:`project_cells`: their projections summed per cell,
as ``np.bincount`` sums them. :func:`subtract_pair` needs no compiling: one numpy pass over
the field seen as complex numbers.
"""

from __future__ import annotations

import numba
import numpy as np

__all__ = [
    "NAN_GREY",
    "gather_frame",
    "grey_and_uint8",
    "prepare_frame_kernels",
    "project_cells",
    "subtract_pair",
]

#: mid-grey written where the input is not finite
NAN_GREY = 128


@numba.njit(cache=True, nogil=True)
def _grey_u8(image, lo, gain, grey, u8):  # pragma: no cover - compiled; tested through wrapper
    ny, nx = image.shape
    n_finite = 0
    clipped = 0
    for r in range(ny):
        for c in range(nx):
            g = (image[r, c] - lo) * gain
            grey[r, c] = g
            if g < -0.5 or g > 255.5:  # infinities too (NaN compares false), as in numpy
                clipped += 1
            if np.isfinite(g):
                n_finite += 1
                u8[r, c] = np.uint8(min(max(np.rint(g), 0.0), 255.0))
            else:
                u8[r, c] = NAN_GREY
    return n_finite, clipped


def grey_and_uint8(
    image_nm: np.ndarray, scale: tuple[float, float]
) -> tuple[np.ndarray, np.ndarray, int, int]:
    """Grey levels (float32), 8-bit image, finite and clipped pixel counts of one image.

    Parameters
    ----------
    image_nm : ndarray (Y, X)
        OPD image, nm (converted to float32).
    scale : (float, float)
        ``(lo_nm, hi_nm)`` mapped to grey 0 and 255 (a valid scale: ``hi > lo``).

    Returns
    -------
    grey : ndarray (Y, X) float32
        ``(image - lo) * (255 / (hi - lo))``, NaN where the image is NaN.
    image_u8 : ndarray (Y, X) uint8
        Rounded (half to even) and clipped grey; :data:`NAN_GREY` where not finite.
    n_finite : int
        Finite grey pixels.
    n_clipped : int
        Pixels more than half a grey level outside [0, 255] (infinite ones included).
    """
    image = np.ascontiguousarray(image_nm, dtype=np.float32)
    lo, hi = scale
    grey = np.empty(image.shape, dtype=np.float32)
    u8 = np.empty(image.shape, dtype=np.uint8)
    n_finite, clipped = _grey_u8(image, np.float32(lo), np.float32(255.0 / (hi - lo)), grey, u8)
    return grey, u8, int(n_finite), int(clipped)


@numba.njit(cache=True, nogil=True)
def _gather(field, image, pixels, mask_pixels, f_out, d_out):  # pragma: no cover - compiled
    for m in range(pixels.size):
        p = pixels[m]
        for j in range(2):
            v = field[p, j]
            f_out[m, j] = v if np.isfinite(v) else 0.0
        v = image[p]
        d_out[m] = v if np.isfinite(v) else 0.0
    for p in mask_pixels:
        if np.isfinite(field[p, 0]) or np.isfinite(field[p, 1]):
            return True
    return False


def gather_frame(
    field: np.ndarray, image: np.ndarray, pixels: np.ndarray, mask_pixels: np.ndarray
) -> tuple[np.ndarray, np.ndarray, bool]:
    """A field and an image at some pixels (non-finite as 0), and whether the field is finite
    anywhere in a mask.

    Parameters
    ----------
    field : ndarray (Y, X, 2) float32
    image : ndarray (Y, X) float32
    pixels : ndarray of int (M,)
        Flat indices of the pixels to gather.
    mask_pixels : ndarray of int
        Flat indices of the mask's pixels.

    Returns
    -------
    field_at : ndarray (M, 2) float32
        ``np.nan_to_num(field.reshape(-1, 2)[pixels], nan=0, posinf=0, neginf=0)``.
    image_at : ndarray (M,) float32
        The same of ``image``.
    finite : bool
        ``np.isfinite(field.reshape(-1, 2)[mask_pixels]).any()``.
    """
    flat_field = np.ascontiguousarray(field, dtype=np.float32).reshape(-1, 2)
    flat_image = np.ascontiguousarray(image, dtype=np.float32).reshape(-1)
    f_out = np.empty((pixels.size, 2), dtype=np.float32)
    d_out = np.empty(pixels.size, dtype=np.float32)
    finite = _gather(flat_field, flat_image, pixels, mask_pixels, f_out, d_out)
    return f_out, d_out, bool(finite)


@numba.njit(cache=True, nogil=True)
def _project(field, opd, field_perp, opd_perp, cell, field_dot, opd_dot):  # pragma: no cover
    for m in range(cell.size):
        k = cell[m]
        field_dot[k] += field[m, 0] * field_perp[m, 0] + field[m, 1] * field_perp[m, 1]
        opd_dot[k] += opd[m] * opd_perp[m]


def project_cells(
    field_at: np.ndarray,
    opd_at: np.ndarray,
    field_perp: np.ndarray,
    opd_perp: np.ndarray,
    cell: np.ndarray,
    n_cells: int,
) -> tuple[np.ndarray, np.ndarray]:
    """Per-cell sums of ``F . A_perp`` and ``D B_perp`` over the used pixels, float64.

    The numbers of ``np.bincount(cell, weights=(field_at * field_perp).sum(axis=1),
    minlength=n_cells)`` and of ``np.bincount(cell, weights=opd_at * opd_perp, ...)``: the
    products in the inputs' common dtype, summed pixel by pixel in order.

    Parameters
    ----------
    field_at : ndarray (M, 2)
    opd_at : ndarray (M,)
    field_perp : ndarray (M, 2)
    opd_perp : ndarray (M,)
    cell : ndarray of int (M,)
        Cell of each pixel, ``0 <= cell < n_cells``.
    n_cells : int
    """
    field_dot = np.zeros(n_cells)
    opd_dot = np.zeros(n_cells)
    _project(field_at, opd_at, field_perp, opd_perp, cell, field_dot, opd_dot)
    return field_dot, opd_dot


def subtract_pair(field: np.ndarray, pair: np.ndarray) -> None:
    """``field -= pair`` for a (Y, X, 2) float32 field and a (2,) pair, in place.

    The same float32 numbers as numpy's broadcast subtraction, as one contiguous pass: the
    field seen as complex64 values ``dx + i dy`` less ``pair[0] + i pair[1]`` (0.015 ms a
    256 x 256 px field; numpy runs the broadcast as an inner loop of two elements, ~0.4 ms,
    and the pair tiled to the field's length spent most of 0.13 ms making the tile). Any
    other field is left to numpy.
    """
    pair = np.asarray(pair, dtype=np.float32)
    if (
        field.dtype != np.float32
        or not field.flags.c_contiguous
        or field.shape[-1:] != (2,)
        or pair.shape != (2,)
    ):
        field -= pair
        return
    values = field.reshape(-1).view(np.complex64)
    np.subtract(values, np.complex64(complex(pair[0], pair[1])), out=values)


def prepare_frame_kernels() -> None:
    """Compile (or load from numba's cache) the kernels now, before any worker forks."""
    grey_and_uint8(np.zeros((2, 2), dtype=np.float32), (0.0, 1.0))
    index = np.arange(4, dtype=np.intp)
    gather_frame(np.zeros((2, 2, 2), np.float32), np.zeros((2, 2), np.float32), index, index)
    field, image = np.zeros((4, 2), np.float32), np.zeros(4, np.float32)
    project_cells(field, image, field.astype(float), image.astype(float), index, 4)
