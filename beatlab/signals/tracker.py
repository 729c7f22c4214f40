"""Displacement of each frame from a rest template: :class:`FlowTracker`.

Configured once per recording (template, mask, fixed 8-bit mapping, refinement basis), then
applied to every frame: coarse flow (:data:`beatlab.signals.flow.FLOW_METHODS`), float
Gauss-Newton refinement (:func:`beatlab.signals.flow.refine_flow`), rigid shift
(:func:`~beatlab.signals.flow.estimate_rigid_shift`), mean magnitude over the mask
(:func:`~beatlab.signals.flow.mean_displacement_um`).
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np

from beatlab.errors import InputError
from beatlab.signals._flow_checks import (
    check_choice,
    check_image,
    check_mask,
    check_scale,
    check_window,
)
from beatlab.signals._flow_refine import (
    ReferenceBasis,
    prepare_reference,
    refine_with_basis,
    window_reach_px,
)
from beatlab.signals._frame_kernels import grey_and_uint8, prepare_frame_kernels, subtract_pair
from beatlab.signals.flow import (
    _PRESETS,
    FLOW_METHODS,
    _scale_to_grey,
    check_coarse_grid,
    estimate_rigid_shift,
    flow_scale,
    mean_displacement_um,
    to_uint8,
)

__all__ = ["FlowMeasurement", "FlowTracker"]


class FlowMeasurement(NamedTuple):
    """Result of :meth:`FlowTracker.measure` for one frame."""

    displacement_um: float
    rigid_shift_px: np.ndarray  # (2,) float64, (dx, dy): the shift removed
    flow_px: np.ndarray  # (Y, X, 2) float32, rigid shift removed
    clipped_fraction: float
    estimated_shift_px: np.ndarray | None = None  # (2,) the frame's own rigid-shift estimate


def _refine_region(mask, background, window_px):
    """Bounding box (slices) of the pixels whose flow is used, with a margin, and the box of
    those pixels within it.

    The refinement only matters where the flow is read (the mask, and the background when it
    sets the rigid shift); a margin of the Gaussian window's reach plus 8 px keeps the flow of
    those pixels within ~0.001 px of a whole-field refinement (the first step's windows near
    the margin's edge see its mirror image; tests/signals/test_flow.py moves that edge). The
    last step needs only the pixels read (:class:`~beatlab.signals._flow_refine.LastStep`).
    """
    used = mask if background is None else (mask | background)
    if not used.any():
        return (slice(None), slice(None)), None
    margin = window_reach_px(window_px) + 8
    rows = np.flatnonzero(used.any(axis=1))
    cols = np.flatnonzero(used.any(axis=0))
    ny, nx = used.shape
    region = (
        slice(max(rows[0] - margin, 0), min(rows[-1] + margin + 1, ny)),
        slice(max(cols[0] - margin, 0), min(cols[-1] + margin + 1, nx)),
    )
    read = (
        slice(rows[0] - region[0].start, rows[-1] + 1 - region[0].start),
        slice(cols[0] - region[1].start, cols[-1] + 1 - region[1].start),
    )
    return region, read


class FlowTracker:
    """Displacement of each frame from a rest template, configured once per recording.

    Parameters
    ----------
    template_nm : ndarray, shape (Y, X)
        Rest template (levelled OPD, nm), e.g. the median of resting frames. NaN pixels
        are filled with the median template value and left out of the mask.
    mask : ndarray of bool, shape (Y, X)
        Cell mask over which the displacement magnitude is averaged.
    pixel_size_um : float
        Sample-plane pixel size, um.
    method : str
        Coarse flow method, a key of :data:`FLOW_METHODS`.
    preset : str
        Preset of the coarse method (``"ultrafast"``, ``"fast"``, ``"medium"``).
    refine_iterations : int
        Float Gauss-Newton steps after the coarse flow (0: raw OpenCV flow).
    window_px : float
        Gaussian window (standard deviation, px) of the refinement: larger lowers the noise
        floor and smooths the field.
    coarse_grid_px : int
        DIS: spacing (px) of the grid it estimates the coarse flow on
        (:func:`~beatlab.signals.flow.dis_finest_level`; 0: the preset's own, 4 px for
        ``fast``); the refinement then works at every pixel. Farneback does not use it.
    percentiles : (float, float)
        Template percentiles mapped to grey 0 and 255 (:func:`flow_scale`).
    scale : (float, float), optional
        Explicit ``(lo_nm, hi_nm)`` mapping; overrides ``percentiles``.
    background : ndarray of bool, shape (Y, X), optional
        Stationary textured pixels for the rigid shift (:func:`estimate_rigid_shift`).
    also_read : ndarray of bool, shape (Y, X), optional
        Pixels outside the mask whose flow the caller reads too (a user's region labels):
        they are refined like the mask's.

    Attributes
    ----------
    scale : (float, float)
        The fixed 8-bit mapping (lo_nm, hi_nm).
    template_clipped_fraction : float
        Share of template pixels clipped by the mapping.
    mask : ndarray of bool
        The mask used (finite template pixels only).

    Raises
    ------
    InputError
        Invalid shapes, empty mask, unknown method or preset, invalid options.

    Notes
    -----
    Choices, measured with ``tests/signals/test_flow.py`` and
    ``benchmarks/bench_flow.py --study`` (128 px OPD images: 40-220 nm cells with a smooth
    texture of 6-50 nm std, i.e. contrast factors 0.25-2; a radial contraction field of
    25 px radius warped exactly by ``scipy.ndimage.map_coordinates`` order 3 after inverting
    the forward map; gain = mean measured / mean true magnitude over the mask):

    - raw OpenCV flow on the 8-bit pair (``refine_iterations=0``), 0.1-6 px: DIS ultrafast
      0.66-0.87, fast 0.70-0.86, medium 0.90-1.05 (over-reads only at 0.1 px), Farneback
      0.97-1.06. The gain depends on preset, amplitude and contrast: unfit for +-3 %. (An
      earlier colleague's note of Farneback reading a quarter of the truth on a low-contrast
      copy was not reproduced: 0.95 on a copy squeezed into 64 grey levels.)
    - a float Lucas-Kanade refinement with a *linear* warp (first study, not kept) still
      over-read small motions by 4-9 %; with the exact cubic-spline warp, 2 steps give
      0.985-0.999 (DIS fast), 0.988-0.997 (medium), 0.971-1.007 (ultrafast), 0.998-1.019
      (Farneback) over 0.1-6 px and all contrasts; 1 step falls to 0.92-0.98 at 6 px.
      So the coarse method only needs to land within the capture range and DIS fast, the
      cheapest preset that stays within 1.5 %, is the default.
    - the refinement runs on the unquantised template and frame (grey units of the fixed
      mapping), not on the rounded 8-bit pair: rounding adds no noise, clipping no bias.
    - window 4 px keeps the gain within 3.6 % even on a field of 13 px radius at 3 px
      amplitude (a 25 % strain), where window 6 px loses 6-10 %.
    - the coarse DIS flow on an 8 px grid (``coarse_grid_px=8``, DIS's pyramid level 3, on
      frames of about 180 px or more) instead of the fast preset's 4 px: DIS costs 0.40 instead of
      1.37 ms a 256 px frame (its variational refinement runs on a 32 px image), and the
      refined gain on 256 px frames stays 0.996-1.001 on a broad field at 0.1-3 px, 0.995 on
      nine 13 px centres at 1 px (0.994 on the 4 px grid); only at a 25 % local strain (13 px
      centres at 3 px) does it fall to 0.97 (0.99 on the 4 px grid). On simulated recordings
      (``benchmarks/bias_study.py``) the landmarks scatter less: duration_90 SD 1.2-2.0 ms
      against 2.3-2.5 ms. Where DIS's coarsest level is finer than the grid (frames under
      about 180 px), the preset's own grid is kept
      (:func:`~beatlab.signals.flow.dis_finest_level`).

    Noise floor (mean magnitude at rest over the mask, template = mean of 20 rest frames,
    white noise per pixel): with 25 nm texture std and window 4 px, 0.011-0.012 px at 1 nm
    and 0.022-0.025 px at 2 nm (0.029 / 0.061 px at 4x lower texture contrast, 0.007 /
    0.014 px at 2x higher); window 6 px lowers it to 0.009 / 0.017 px, window 2 px raises
    it to 0.026 / 0.052 px. Raw DIS sits near 0.01 px thanks to its own variational
    smoothing, but at the wrong gain. The floor is an upward bias that fades once the true
    displacement exceeds it (at 0.1 px peak amplitude, 1 nm noise: gain 1.03).

    The refinement covers the box of the mask (and background) with a margin; its last step
    covers only the box of the pixels read, which gives them the same numbers (when the
    shift is estimated from the whole field, every pixel of the margin gets that step too).

    ``measure``/``displacement`` do not change the tracker, so frames may run in threads.
    NaN pixels of a frame are filled with the template (no apparent motion there) and left
    out of that frame's mean.
    """

    def __init__(
        self,
        template_nm: np.ndarray,
        mask: np.ndarray,
        *,
        pixel_size_um: float,
        method: str = "dis",
        preset: str = "fast",
        refine_iterations: int = 2,
        window_px: float = 4.0,
        coarse_grid_px: int = 8,
        percentiles: tuple[float, float] = (0.5, 99.5),
        scale: tuple[float, float] | None = None,
        background: np.ndarray | None = None,
        also_read: np.ndarray | None = None,
    ) -> None:
        template = check_image("template_nm", template_nm)
        mask_arr = check_mask("mask", mask, template.shape)
        check_choice("method", method, FLOW_METHODS)
        check_choice("preset", preset, _PRESETS[method])
        check_window(window_px, refine_iterations)
        self.coarse_grid_px = check_coarse_grid(coarse_grid_px)
        if not (np.isfinite(pixel_size_um) and pixel_size_um > 0):
            raise InputError(
                f"pixel_size_um must be a positive number, got {pixel_size_um!r}; "
                "pass pixel_size_um=UM or add PhysicalSizeX"
            )
        finite = np.isfinite(template)
        if not (mask_arr & finite).any():
            raise InputError(
                "mask has no True pixel with a finite template value; pass a cell mask"
            )
        self.scale = (
            flow_scale(template, mask=None, percentiles=percentiles)
            if scale is None
            else check_scale(scale)
        )
        filled = np.where(finite, template, np.median(template[finite])).astype(np.float32)
        self._template_nm = filled
        self.template_u8, self.template_clipped_fraction = to_uint8(filled, self.scale)
        self.mask = mask_arr & finite
        self.background = (
            None if background is None else check_mask("background", background, template.shape)
        )
        self.pixel_size_um = float(pixel_size_um)
        self.method = method
        self.preset = preset
        self.refine_iterations = int(refine_iterations)
        self.window_px = float(window_px)
        read_too = (
            self.mask
            if also_read is None
            else self.mask | check_mask("also_read", also_read, template.shape)
        )
        self._region, read = _refine_region(read_too, self.background, self.window_px)
        prepare_frame_kernels()  # compiled here, before any worker forks: they inherit it
        self._basis: ReferenceBasis = prepare_reference(
            _scale_to_grey(filled, self.scale)[self._region], window_px=self.window_px,
            read=read,
        )  # fmt: skip

    def measure(
        self,
        frame_nm: np.ndarray,
        *,
        rigid_shift_px: np.ndarray | None = None,
        mean_magnitude: bool = True,
        estimate_shift: bool = True,
    ) -> FlowMeasurement:
        """Displacement, rigid shift, shift-free flow and clipped fraction of one frame.

        Parameters
        ----------
        frame_nm : ndarray, shape (Y, X)
            OPD frame, nm, levelled like the template.
        rigid_shift_px : array-like, shape (2,), optional
            (dx, dy) px to remove instead of the frame's own estimate, e.g. a drift
            interpolated in time from resting frames, or zeros to remove nothing.
        mean_magnitude : bool
            Compute ``displacement_um``; False leaves it NaN, for callers that reduce the
            field themselves (the per-frame pass projects it instead).
        estimate_shift : bool
            Estimate the frame's own rigid shift even when ``rigid_shift_px`` is given (a
            median over the background or the mask); False leaves ``estimated_shift_px``
            None in that case, which saves the median on every frame.

        Returns
        -------
        FlowMeasurement
            ``displacement_um`` (float, NaN if no mask pixel is finite), ``rigid_shift_px``
            (2,) the shift removed, ``flow_px`` (Y, X, 2) float32 with it removed (for
            maps), ``clipped_fraction`` of the frame's 8-bit mapping and
            ``estimated_shift_px`` (2,) the frame's own estimate
            (:func:`estimate_rigid_shift`).

        Raises
        ------
        InputError
            Frame shape differs from the template.
        """
        frame = check_image("frame_nm", frame_nm)
        if frame.shape != self._template_nm.shape:
            raise InputError(
                f"frame_nm must have the template shape {self._template_nm.shape}, got "
                f"{frame.shape}; pass frames of the same recording"
            )
        # grey levels and the 8-bit image in one pass (what to_uint8 and _scale_to_grey give)
        grey, moving_u8, n_finite, n_clipped = grey_and_uint8(frame, self.scale)
        complete = n_finite == frame.size  # the usual case: no NaN pixel to fill
        finite = None
        if not complete:
            finite = np.isfinite(frame)
            filled = np.where(finite, frame, self._template_nm)
            grey, moving_u8, n_finite, n_clipped = grey_and_uint8(filled, self.scale)
        clipped = n_clipped / n_finite if n_finite else 0.0
        flow = FLOW_METHODS[self.method](
            self.template_u8, moving_u8, preset=self.preset, grid_px=self.coarse_grid_px
        )
        region = self._region
        # the shift estimate reads the whole field when no background is given: every pixel
        # of the region refined fully then; otherwise only the pixels read need the last step
        estimating = estimate_shift or rigid_shift_px is None
        flow[region] = refine_with_basis(
            self._basis, grey[region], flow[region], iterations=self.refine_iterations,
            every_pixel=estimating and self.background is None,
        )  # fmt: skip
        if not complete:
            flow[~finite] = np.nan
        estimate = (
            estimate_rigid_shift(flow, background=self.background)
            if estimate_shift or rigid_shift_px is None
            else None
        )
        shift = estimate if rigid_shift_px is None else np.asarray(rigid_shift_px, dtype=float)
        if shift.shape != (2,):
            raise InputError(f"rigid_shift_px must have shape (2,), got {shift.shape}; (dx, dy)")
        subtract_pair(flow, shift.astype(np.float32))
        mask = self.mask if complete else self.mask & finite
        value = (
            mean_displacement_um(flow, mask, pixel_size_um=self.pixel_size_um)
            if mean_magnitude and mask.any()
            else float("nan")
        )
        return FlowMeasurement(value, shift, flow, clipped, estimate)

    def displacement(self, frame_nm: np.ndarray) -> tuple[float, np.ndarray, np.ndarray]:
        """``(displacement_um, rigid_shift_px (2,), flow (Y, X, 2))`` of one frame.

        The flow is returned with the rigid shift removed (px, float32, NaN where the frame
        is NaN), ready for displacement maps. See :meth:`measure`.
        """
        result = self.measure(frame_nm)
        return result.displacement_um, result.rigid_shift_px, result.flow_px
