"""Input validation of :mod:`beatlab.signals.flow` (one-line messages naming the fix)."""

from __future__ import annotations

import numpy as np

from beatlab.errors import InputError

__all__ = [
    "check_choice",
    "check_flow",
    "check_image",
    "check_mask",
    "check_scale",
    "check_window",
]


def check_choice(name: str, value: str, choices: dict) -> None:
    if value not in choices:
        raise InputError(
            f"{name} must be one of {sorted(choices)}, got {value!r}; pass one of those names"
        )


def check_image(name: str, image: np.ndarray, *, dtype: type | None = None) -> np.ndarray:
    arr = np.asarray(image)
    if arr.ndim != 2 or min(arr.shape) < 2:
        raise InputError(
            f"{name} must be a 2-D image (Y, X) of at least 2x2 px, got shape {arr.shape}; "
            "pass one frame"
        )
    if dtype is not None and arr.dtype != dtype:
        raise InputError(
            f"{name} must have dtype {np.dtype(dtype).name}, got {arr.dtype}; "
            "map it with to_uint8(image_nm, flow_scale(template_nm))"
        )
    return arr


def check_mask(name: str, mask: np.ndarray, shape: tuple[int, ...]) -> np.ndarray:
    arr = np.asarray(mask)
    if arr.shape != shape:
        raise InputError(f"{name} must have shape {shape}, got {arr.shape}; pass a matching mask")
    if arr.dtype != bool:
        raise InputError(f"{name} must be a boolean array, got dtype {arr.dtype}; pass mask > 0")
    return arr


def check_flow(flow: np.ndarray) -> np.ndarray:
    arr = np.asarray(flow)
    if arr.ndim != 3 or arr.shape[2] != 2:
        raise InputError(
            f"flow must have shape (Y, X, 2), got {arr.shape}; pass the output of compute_flow"
        )
    return arr


def check_window(
    window_px: float, iterations: int, *, iterations_name: str = "refine_iterations"
) -> None:
    if not (np.isfinite(window_px) and window_px >= 0.5):
        raise InputError(f"window_px must be a number >= 0.5 px, got {window_px!r}; e.g. 4.0")
    if int(iterations) != iterations or iterations < 0:
        raise InputError(f"{iterations_name} must be an integer >= 0, got {iterations!r}; e.g. 2")


def check_scale(scale: tuple[float, float]) -> tuple[float, float]:
    try:
        lo, hi = (float(v) for v in scale)
    except (TypeError, ValueError):
        raise InputError(
            f"scale must be a pair (lo_nm, hi_nm), got {scale!r}; use flow_scale(template_nm)"
        ) from None
    if not (np.isfinite(lo) and np.isfinite(hi) and hi > lo):
        raise InputError(
            f"scale must be finite with hi > lo, got {scale!r}; use flow_scale(template_nm)"
        )
    return lo, hi
