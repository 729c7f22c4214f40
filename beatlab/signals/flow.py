"""Optical-flow displacement signal: template-to-frame dense flow over the cell mask.

The primary contraction trace ``displacement_um`` is the mean over the cell mask of the
magnitude of the dense optical flow from a rest template to each frame, after removing the
rigid shift of the whole field (stage drift, vibration).

Pipeline per frame (:class:`beatlab.signals.tracker.FlowTracker`):

1. map template and frame to 8 bits with ONE fixed scale per recording (:func:`flow_scale`,
   robust percentiles of the template; never per frame, since per-frame scaling turns
   brightness flicker into fake motion), report the clipped fraction (:func:`to_uint8`);
2. coarse dense flow with OpenCV, DIS by default or Farneback (:data:`FLOW_METHODS`);
3. a float Gauss-Newton (Lucas-Kanade) refinement on the unquantised images with an exact
   cubic-spline warp (:func:`refine_flow`), which removes the gain error of the 8-bit
   pyramid methods and acts as the flow's own regularisation (Gaussian window);
4. rigid shift = median flow over background pixels, or over the field
   (:func:`estimate_rigid_shift`); mean magnitude over the mask (:func:`mean_displacement_um`).
"""

from __future__ import annotations

import functools
from collections.abc import Callable

import cv2
import numpy as np

from beatlab.errors import InputError
from beatlab.signals._flow_checks import (
    check_choice,
    check_flow,
    check_image,
    check_mask,
    check_scale,
    check_window,
)
from beatlab.signals._flow_refine import prepare_reference, refine_with_basis
from beatlab.signals._frame_kernels import grey_and_uint8

__all__ = [
    "COARSE_GRIDS_PX",
    "DIS_PRESETS",
    "FARNEBACK_PRESETS",
    "FLOW_METHODS",
    "compute_flow",
    "dis_finest_level",
    "estimate_rigid_shift",
    "flow_scale",
    "mean_displacement_um",
    "refine_flow",
    "to_uint8",
]

#: DIS presets by name (Kroeger et al. 2016), as defined by OpenCV.
DIS_PRESETS: dict[str, int] = {
    "ultrafast": cv2.DISOPTICAL_FLOW_PRESET_ULTRAFAST,
    "fast": cv2.DISOPTICAL_FLOW_PRESET_FAST,
    "medium": cv2.DISOPTICAL_FLOW_PRESET_MEDIUM,
}

#: Farneback (2003) parameter sets by name: (pyr_scale, levels, winsize, iterations, poly_n,
#: poly_sigma), from cheap to careful.
FARNEBACK_PRESETS: dict[str, tuple[float, int, int, int, int, float]] = {
    "ultrafast": (0.5, 3, 9, 2, 5, 1.1),
    "fast": (0.5, 3, 15, 3, 5, 1.2),
    "medium": (0.5, 4, 21, 5, 7, 1.5),
}

_MIN_BACKGROUND_PX = 64
_MAX_MEDIAN_PX = 65536


#: Choices of the coarse grid (px between the points where DIS estimates the flow): powers of
#: two, the spacing of the levels of its pyramid; 0 keeps the preset's own.
COARSE_GRIDS_PX = (0, 1, 2, 4, 8, 16, 32, 64)


def check_coarse_grid(grid_px) -> int:
    """``grid_px`` as an int, or InputError unless it is one of :data:`COARSE_GRIDS_PX`."""
    if isinstance(grid_px, bool) or grid_px not in COARSE_GRIDS_PX:
        raise InputError(
            f"coarse_grid_px must be one of {', '.join(map(str, COARSE_GRIDS_PX))}, got "
            f"{grid_px!r}; pass a power of two (0: the preset's own)"
        )
    return int(grid_px)


@functools.lru_cache(maxsize=32)
def dis_finest_level(shape: tuple[int, int], *, preset: str, grid_px: int) -> int:
    """The finest pyramid level DIS works at for a coarse grid of ``grid_px`` px.

    Parameters
    ----------
    shape : (int, int)
        Frame shape (Y, X), px.
    preset : str
        A key of :data:`DIS_PRESETS` (its patch size and own finest level).
    grid_px : int
        One of :data:`COARSE_GRIDS_PX`: level ``log2(grid_px)``; 0 keeps the preset's level.

    Returns
    -------
    int
        The level. Where the frame is too small for it (DIS's coarsest level, OpenCV's rule:
        ``min(round(log2(max side / (4 patch))), floor(log2(min side / patch)))``, is finer),
        the coarsest level, but never finer than the preset's own: OpenCV then chooses its
        levels itself, as it did before this option existed.
    """
    check_choice("preset", preset, DIS_PRESETS)
    check_coarse_grid(grid_px)
    engine = cv2.DISOpticalFlow_create(DIS_PRESETS[preset])
    own, patch = int(engine.getFinestScale()), int(engine.getPatchSize())
    if grid_px == 0:
        return own
    level = int(grid_px).bit_length() - 1
    ny, nx = (int(n) for n in shape)
    coarsest = min(
        int(np.log2(max(ny, nx) / (4.0 * patch)) + 0.5), int(np.log2(min(ny, nx) / patch))
    )
    return level if level <= coarsest else max(coarsest, own)


def _flow_dis(
    reference_u8: np.ndarray, moving_u8: np.ndarray, *, preset: str, grid_px: int = 0
) -> np.ndarray:
    level = dis_finest_level(reference_u8.shape, preset=preset, grid_px=grid_px)
    # A new instance per call: cheap (~10 us) and safe when frames run in parallel threads.
    engine = cv2.DISOpticalFlow_create(DIS_PRESETS[preset])
    engine.setFinestScale(level)
    return engine.calc(reference_u8, moving_u8, None)


def _flow_farneback(
    reference_u8: np.ndarray, moving_u8: np.ndarray, *, preset: str, grid_px: int = 0
) -> np.ndarray:
    """Farneback estimates at every pixel: ``grid_px`` is accepted and not used."""
    check_choice("preset", preset, FARNEBACK_PRESETS)
    pyr_scale, levels, winsize, iterations, poly_n, poly_sigma = FARNEBACK_PRESETS[preset]
    return cv2.calcOpticalFlowFarneback(
        reference_u8, moving_u8, None, pyr_scale, levels, winsize, iterations, poly_n,
        poly_sigma, 0,
    )  # fmt: skip


#: Coarse dense-flow methods by name; each maps (reference_u8, moving_u8, *, preset, grid_px)
#: to a (Y, X, 2) float32 flow (dx, dy) in px (``grid_px``: :func:`dis_finest_level`).
FLOW_METHODS: dict[str, Callable[..., np.ndarray]] = {
    "dis": _flow_dis,
    "farneback": _flow_farneback,
}


_PRESETS: dict[str, dict] = {"dis": DIS_PRESETS, "farneback": FARNEBACK_PRESETS}


def flow_scale(
    template_nm: np.ndarray,
    *,
    mask: np.ndarray | None = None,
    percentiles: tuple[float, float] = (0.5, 99.5),
    margin_nm: float = 0.0,
) -> tuple[float, float]:
    """Fixed 8-bit mapping of a recording: the OPD values mapped to grey 0 and 255.

    Parameters
    ----------
    template_nm : ndarray, shape (Y, X)
        Rest template (background-levelled OPD, nm). NaN pixels are ignored.
    mask : ndarray of bool, shape (Y, X), optional
        Pixels whose values set the scale (default: every finite pixel).
    percentiles : (float, float)
        Lower and upper percentiles (0-100) of the template mapped to 0 and 255.
    margin_nm : float
        Widen the range by this much on both sides (nm, >= 0). The template is an average,
        far smoother than one frame: a margin of a few frame-noise SDs keeps the noise of
        every frame from clipping where a percentile falls on a flat background.

    Returns
    -------
    (lo_nm, hi_nm) : tuple of float
        OPD mapped to grey 0 and to grey 255. For a template without contrast (hi == lo) the
        range is widened to value -/+ max(1 nm, margin), so the image maps to mid-grey and the
        flow is 0.

    Raises
    ------
    InputError
        No finite template pixel (inside the mask), or percentiles not increasing in [0, 100].

    Notes
    -----
    One scale per recording, never per frame: per-frame contrast stretching turns brightness
    flicker into apparent motion. Robust percentiles instead of min/max keep a few extreme
    pixels (debris, unwrapping errors) from compressing the texture into a few grey levels;
    the fraction clipped by this choice is reported by :func:`to_uint8`.
    """
    template = check_image("template_nm", template_nm)
    lo_p, hi_p = (float(p) for p in percentiles)
    if not (0.0 <= lo_p < hi_p <= 100.0):
        raise InputError(
            f"percentiles must be increasing values in [0, 100], got {percentiles!r}; "
            "e.g. (0.5, 99.5)"
        )
    valid = np.isfinite(template)
    if mask is not None:
        valid &= check_mask("mask", mask, template.shape)
    if not valid.any():
        raise InputError(
            "template_nm has no finite pixel inside the mask; pass a template with data "
            "or a mask that covers finite pixels"
        )
    margin = float(margin_nm)
    if not (np.isfinite(margin) and margin >= 0):
        raise InputError(f"margin_nm must be a finite number >= 0, got {margin_nm!r}")
    lo, hi = np.percentile(template[valid].astype(np.float64), [lo_p, hi_p])
    if not hi > lo:
        hi = lo = float(lo)
        margin = max(margin, 1.0)
    return float(lo) - margin, float(hi) + margin


def _scale_to_grey(image_nm: np.ndarray, scale: tuple[float, float]) -> np.ndarray:
    lo, hi = scale
    return ((np.asarray(image_nm, dtype=np.float32) - np.float32(lo)) * np.float32(
        255.0 / (hi - lo)
    )).astype(np.float32)  # fmt: skip


def to_uint8(image_nm: np.ndarray, scale: tuple[float, float]) -> tuple[np.ndarray, float]:
    """Map an OPD image to 8 bits with a fixed scale.

    Parameters
    ----------
    image_nm : ndarray, shape (Y, X)
        OPD image, nm.
    scale : (float, float)
        ``(lo_nm, hi_nm)`` from :func:`flow_scale`, mapped to grey 0 and 255.

    Returns
    -------
    image_u8 : ndarray of uint8, shape (Y, X)
        Rounded, clipped grey values; NaN pixels become mid-grey (128).
    clipped_fraction : float
        Share of the finite pixels saturated by the mapping, i.e. more than half a grey
        level outside ``[lo_nm, hi_nm]`` (0 when there is no finite pixel).

    Raises
    ------
    InputError
        Not a 2-D image, or an invalid scale.
    """
    image = check_image("image_nm", image_nm)
    scale = check_scale(scale)
    # one compiled pass: the numbers of _scale_to_grey, np.rint and np.clip (bit for bit)
    _, out, n_finite, clipped = grey_and_uint8(image, scale)
    return out, (clipped / n_finite if n_finite else 0.0)


def refine_flow(
    reference: np.ndarray,
    moving: np.ndarray,
    flow: np.ndarray,
    *,
    iterations: int = 2,
    window_px: float = 4.0,
) -> np.ndarray:
    """Refine a dense flow by Gauss-Newton steps on float images with an exact cubic warp.

    Parameters
    ----------
    reference, moving : ndarray, shape (Y, X)
        Float images in the same units (e.g. grey levels of the fixed mapping, unrounded).
        Must be finite (fill NaN first).
    flow : ndarray, shape (Y, X, 2)
        Initial flow (dx, dy) in px, with ``moving(p + flow(p)) ~ reference(p)``.
    iterations : int
        Gauss-Newton steps (0 returns a float32 copy of ``flow``).
    window_px : float
        Standard deviation (px) of the Gaussian window of the local least-squares fit.

    Returns
    -------
    ndarray of float32, shape (Y, X, 2)
        Refined flow (dx, dy), px.

    Raises
    ------
    InputError
        Shapes differ, non-finite images, or invalid options.

    Notes
    -----
    Each step warps ``moving`` back by the current estimate with a cubic B-spline
    (``scipy.ndimage.map_coordinates``, order 3: no position quantisation) and solves the
    windowed Lucas-Kanade normal equations (Lucas & Kanade 1981) for the residual, with the
    reference gradient and structure tensor fixed (inverse-compositional form, Baker &
    Matthews 2004) and a small Tikhonov damping, so textureless pixels keep the initial
    estimate. The fixed point does not depend on the contrast of the images.
    """
    ref = check_image("reference", reference)
    mov = check_image("moving", moving)
    fl = check_flow(flow)
    if mov.shape != ref.shape or fl.shape[:2] != ref.shape:
        raise InputError(
            f"reference, moving and flow must share (Y, X), got {ref.shape}, {mov.shape}, "
            f"{fl.shape[:2]}; pass images of one recording"
        )
    if not (np.isfinite(ref).all() and np.isfinite(mov).all()):
        raise InputError("reference and moving must be finite; fill NaN pixels before refining")
    check_window(window_px, iterations, iterations_name="iterations")
    basis = prepare_reference(ref, window_px=window_px)
    return refine_with_basis(basis, mov, fl, iterations=int(iterations))


def compute_flow(
    reference_u8: np.ndarray,
    moving_u8: np.ndarray,
    *,
    method: str = "dis",
    preset: str = "fast",
    refine_iterations: int = 2,
    window_px: float = 4.0,
    coarse_grid_px: int = 8,
) -> np.ndarray:
    """Dense optical flow from a reference image to a moving image.

    Parameters
    ----------
    reference_u8, moving_u8 : ndarray of uint8, shape (Y, X)
        Images mapped with the same fixed scale (:func:`to_uint8`).
    method : str
        Coarse method, a key of :data:`FLOW_METHODS` (``"dis"`` or ``"farneback"``).
    preset : str
        ``"ultrafast"``, ``"fast"`` or ``"medium"`` (:data:`DIS_PRESETS`,
        :data:`FARNEBACK_PRESETS`).
    refine_iterations : int
        Float Gauss-Newton steps after the coarse method (:func:`refine_flow`), run here on
        the 8-bit images as floats; 0 returns the raw OpenCV flow.
    window_px : float
        Gaussian window (standard deviation, px) of the refinement.
    coarse_grid_px : int
        DIS: spacing (px) of the grid it estimates the coarse flow on, one of
        :data:`COARSE_GRIDS_PX` (:func:`dis_finest_level`; 0: the preset's own). Farneback
        estimates at every pixel and does not use it.

    Returns
    -------
    ndarray of float32, shape (Y, X, 2)
        Flow (dx, dy) in px: ``moving(x + dx, y + dy) ~ reference(x, y)``.

    Raises
    ------
    InputError
        Unknown method or preset (the message lists the choices), wrong dtype or shape.

    Notes
    -----
    DIS: Kroeger, Timofte, Dai & Van Gool 2016, "Fast optical flow using dense inverse
    search", ECCV. Farneback 2003, "Two-frame motion estimation based on polynomial
    expansion", SCIA. Both work on 8-bit images; alone, their gain on sub-pixel motion depends
    on the preset and the texture contrast (see :class:`FlowTracker` Notes), which the
    refinement removes. :class:`FlowTracker` refines on the unquantised images instead.
    """
    check_choice("method", method, FLOW_METHODS)
    coarse_grid_px = check_coarse_grid(coarse_grid_px)
    ref = check_image("reference_u8", reference_u8, dtype=np.uint8)
    mov = check_image("moving_u8", moving_u8, dtype=np.uint8)
    if mov.shape != ref.shape:
        raise InputError(
            f"moving_u8 must have the shape of reference_u8 {ref.shape}, got {mov.shape}; "
            "pass frames of one recording"
        )
    check_window(window_px, refine_iterations)
    ref = np.ascontiguousarray(ref)
    mov = np.ascontiguousarray(mov)
    flow = FLOW_METHODS[method](ref, mov, preset=preset, grid_px=coarse_grid_px)
    flow = flow.astype(np.float32, copy=False)
    if refine_iterations:
        basis = prepare_reference(ref.astype(np.float32), window_px=window_px)
        flow = refine_with_basis(
            basis, mov.astype(np.float32), flow, iterations=int(refine_iterations)
        )
    return flow


def estimate_rigid_shift(
    flow: np.ndarray,
    *,
    background: np.ndarray | None = None,
    mask: np.ndarray | None = None,
) -> np.ndarray:
    """Rigid shift of the whole field (drift, vibration) from a dense flow.

    Parameters
    ----------
    flow : ndarray, shape (Y, X, 2)
        Flow (dx, dy), px.
    background : ndarray of bool, shape (Y, X), optional
        Pixels known to be stationary and textured (cell-free debris, fiducials). Used when
        at least 64 of them have a finite flow.
    mask : ndarray of bool, shape (Y, X), optional
        Pixels allowed in the field median when no background is used (default: all).

    Returns
    -------
    ndarray of float64, shape (2,)
        (dx, dy) px; zeros when no pixel has a finite flow.

    Raises
    ------
    InputError
        Wrong shapes or non-boolean masks.

    Notes
    -----
    Per-component median, robust to the moving minority; the field median of frames above
    65,536 px uses a regular sub-grid (every k-th row and column). The field median equals
    the drift when contracting regions pull in balanced directions or cover less than half
    of the pixels used; a whole field sliding one way is indistinguishable from drift.
    """
    fl = check_flow(flow)
    # both components finite; not .all(axis=2), whose inner loop of two elements cost 1.5 ms
    # on a 256 x 256 px field against 0.05 ms
    finite = np.isfinite(fl[..., 0]) & np.isfinite(fl[..., 1])
    if background is not None:
        use = finite & check_mask("background", background, fl.shape[:2])
        if np.count_nonzero(use) >= _MIN_BACKGROUND_PX:
            return np.median(fl[use], axis=0).astype(np.float64)
    use = finite if mask is None else finite & check_mask("mask", mask, fl.shape[:2])
    # The flow is smooth over the refinement window, so a regular sub-grid of at most
    # ~65k pixels gives the same median several times faster on large frames.
    step = max(1, int(np.ceil(np.sqrt(use.size / _MAX_MEDIAN_PX))))
    sub_flow, sub_use = fl[::step, ::step], use[::step, ::step]
    if not sub_use.any():
        return np.zeros(2)
    return np.median(sub_flow[sub_use], axis=0).astype(np.float64)


def mean_displacement_um(
    flow: np.ndarray,
    mask: np.ndarray,
    *,
    pixel_size_um: float,
    rigid_shift: np.ndarray | None = None,
) -> float:
    """Mean over the mask of the flow magnitude after removing the rigid shift, um.

    Parameters
    ----------
    flow : ndarray, shape (Y, X, 2)
        Flow (dx, dy), px.
    mask : ndarray of bool, shape (Y, X)
        Cell mask; pixels with a non-finite flow are left out.
    pixel_size_um : float
        Sample-plane pixel size, um.
    rigid_shift : array-like, shape (2,), optional
        (dx, dy) px subtracted from every vector first.

    Returns
    -------
    float
        Mean magnitude, um; NaN when no mask pixel has a finite flow.

    Raises
    ------
    InputError
        Empty mask, wrong shapes, or a pixel size that is not a positive number.

    Notes
    -----
    A magnitude of noisy vectors is biased upward (Rice distribution): the floor at rest is
    documented in :class:`FlowTracker`.
    """
    fl = check_flow(flow)
    m = check_mask("mask", mask, fl.shape[:2])
    if not m.any():
        raise InputError("mask has no True pixel; pass a cell mask that covers cells")
    if not (np.isfinite(pixel_size_um) and pixel_size_um > 0):
        raise InputError(
            f"pixel_size_um must be a positive number, got {pixel_size_um!r}; "
            "pass pixel_size_um=UM or add PhysicalSizeX"
        )
    vectors = fl[m].astype(np.float64)
    if rigid_shift is not None:
        shift = np.asarray(rigid_shift, dtype=np.float64)
        if shift.shape != (2,):
            raise InputError(f"rigid_shift must have shape (2,), got {shift.shape}; (dx, dy)")
        vectors = vectors - shift
    magnitude = np.hypot(vectors[:, 0], vectors[:, 1])
    magnitude = magnitude[np.isfinite(magnitude)]
    if magnitude.size == 0:
        return float("nan")
    return float(magnitude.mean() * pixel_size_um)
