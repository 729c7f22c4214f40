"""Stage: the rest template, the cell mask, the labels to analyse and the drift reference.

:func:`prepare_reference` runs the cheap first pass over the frames
(:func:`beatlab.signals.rest.estimate_rest_template`), segments the cells in the template and
decides which pixels each later reduction uses. Everything the per-frame pass needs that does
not change from frame to frame comes out of here as one :class:`Reference`.
"""

from __future__ import annotations

import logging
import os
from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from beatlab.beats import detect_beats
from beatlab.errors import InputError
from beatlab.opd import check_cell_sign
from beatlab.regions import split_regions
from beatlab.settings import Settings
from beatlab.signals._running_mean import running_mean_time
from beatlab.signals.flow import flow_scale
from beatlab.signals.mask import CellMask, make_cell_mask
from beatlab.signals.rest import RestTemplate, estimate_rest_template

__all__ = ["Reference", "load_label_image", "prepare_reference"]

logger = logging.getLogger(__name__)

#: The 8-bit mapping of the flow input is widened by this many frame-noise SDs (see
#: :func:`prepare_reference`).
_SCALE_MARGIN_SD = 4.0


@dataclass(frozen=True)
class Reference:
    """What the per-frame pass measures against; fixed for the whole recording.

    Attributes
    ----------
    rest : RestTemplate
        The rest template, its resting frames, noise and refresh segments.
    cells : CellMask
        Cells vs background in the template.
    template_noise_nm : float or None
        Noise SD of the template itself (frame noise / sqrt(frames averaged)), nm.
    labels : ndarray of int64 (Y, X)
        Pixels grouped for region analysis: user regions, or connected clusters (split where
        their parts beat independently); 0 outside.
    user_regions : bool
        ``labels`` came from the user.
    rigid_pixels : ndarray of bool (Y, X) or None
        Pixels whose median flow is the rigid whole-field shift (None: the field median).
    drift_reference : str
        What ``rigid_pixels`` are (``'textured background'``, ``'cell median'``, ...).
    flow_scale : (float, float)
        OPD (nm) mapped to grey 0 and 255 for the optical flow.
    """

    rest: RestTemplate
    cells: CellMask
    template_noise_nm: float | None
    labels: np.ndarray
    user_regions: bool
    rigid_pixels: np.ndarray | None
    drift_reference: str
    flow_scale: tuple[float, float]

    @property
    def template(self) -> np.ndarray:
        """The rest template (Y, X), nm."""
        return self.rest.template

    @property
    def mask(self) -> np.ndarray:
        """The analysis mask (Y, X) bool."""
        return self.cells.mask


def load_label_image(path: str | os.PathLike, shape: tuple[int, int]) -> np.ndarray:
    """Read a label image (0 outside, 1..n inside) of the analysed frame shape.

    Raises
    ------
    InputError
        The image has another shape or holds non-integer values.
    """
    from beatlab.io import open_recording

    rec = open_recording(path, fps=1.0)
    labels = np.asarray(rec.frames.read(0, 1)[0])
    if labels.shape != tuple(shape):
        raise InputError(
            f"regions {path}: label image shape {labels.shape} differs from the "
            f"analysed frames {tuple(shape)}; give a label image of the same size"
        )
    if not np.issubdtype(labels.dtype, np.integer) and not np.allclose(labels, np.round(labels)):
        raise InputError(
            f"regions {path}: not a label image (non-integer values); give "
            "an integer image with 0 outside regions and 1..n inside"
        )
    return np.round(labels).astype(np.int64)


def _rigid_reference(template, cells, rigid: str, noise_nm: float | None):
    """Pixels whose median flow is the rigid whole-field shift, and what they are.

    A cell-free background tracks stage drift only where it has texture (debris, fixed
    structure); a flat background gives the optical flow nothing to hold on to, and its
    median flow is noise. Then the median over the cells is used: contraction pulls about a
    centre, so its median vector is close to zero, while drift moves every cell alike.
    """
    if rigid in ("auto", "background") and cells.background.sum() > 0.05 * cells.mask.size:
        filled = np.where(np.isfinite(template), template, np.nanmedian(template))
        texture = np.abs(filled - ndimage.gaussian_filter(filled, 2.0))
        # structures as clear as the cells' own texture; faint background patterns are as
        # likely fixed optical artefacts (which do not move with the stage) as debris
        floor = max(5.0 * (noise_nm or 0.0), 0.25 * float(np.median(texture[cells.mask])))
        textured = cells.background & (texture > max(floor, 1e-6))
        if textured.sum() >= max(64, 0.02 * cells.mask.size):
            return textured, "textured background"
        if rigid == "background":
            logger.info("background has no texture to track drift; using the cell median")
    if rigid == "none":  # measured (and reported) on the cells, but not removed
        return cells.mask, "none"
    if rigid == "median":
        return None, "field median"
    return cells.mask, "cell median"


def _region_labels(rest, cells, times_s, settings: Settings, pixel_size_um) -> np.ndarray:
    """Connected clusters (or the confluent field), split where parts beat on their own."""
    labels = cells.labels if cells.method == "threshold" else cells.mask.astype(np.int64)
    if not settings.regions.detect or rest.activity is None:
        return labels
    detect = settings.beats.detect_options()
    return split_regions(
        labels,
        running_mean_time(rest.activity, 3),
        block_px=int(rest.info["block_factor"]),
        min_area_px=settings.regions.min_area_um2 / pixel_size_um**2,
        merge_correlation=settings.regions.merge_correlation,
        active=lambda trace: detect_beats(trace, times_s, **detect).size >= 2,
    )


def _load_compiled_code() -> None:
    """Load the compiled kernels of the rest pass and of the per-frame pass from numba's
    cache (~0.4 s, most of it numba's own set-up), while the rest pass's workers read."""
    from beatlab.signals._cubic_warp import prepare_warp
    from beatlab.signals._frame_kernels import prepare_frame_kernels
    from beatlab.signals._level_kernel import prepare_level
    from beatlab.signals._running_mean import prepare_running_mean

    prepare_level()
    prepare_running_mean()
    prepare_frame_kernels()
    prepare_warp()


def prepare_reference(
    source,
    *,
    times_s: np.ndarray,
    settings: Settings,
    regions: str | os.PathLike | np.ndarray | None = None,
    workers: int | None = None,
    progress: bool = False,
) -> Reference:
    """First pass: rest template, cell mask, region labels, drift pixels and flow scale.

    Parameters
    ----------
    source : beatlab.frames.OPDSource
        The recording's OPD frames.
    times_s : ndarray (T,)
        Frame times, s.
    settings : Settings
        Uses ``template``, ``mask``, ``flow`` (rigid, percentiles), ``regions`` and ``beats``
        (the region split keeps only parts that beat by the user's detection settings).
    regions : path-like or ndarray (Y, X) of int, optional
        A user label image; replaces the automatic clusters.
    workers : int, optional
        Forked workers of the rest pass (default: CPUs, at most 4; 1 runs in this process).
    progress : bool
        Show a progress bar for the pass.

    Returns
    -------
    Reference

    Raises
    ------
    InputError
        The template is all NaN, no cell is found, or the label image does not fit.
    """
    px_um = float(source.pixel_size_um)
    t = settings.template
    rest = estimate_rest_template(
        source,
        rest_quantile=t.rest_quantile,
        max_rest_frames=t.max_rest_frames,
        level_tilt=t.level_tilt,
        refresh_s=t.refresh_s,
        times_s=times_s,
        workers=workers or min(4, os.cpu_count() or 1),
        progress=progress,
        meanwhile=_load_compiled_code,
    )
    template = rest.template
    name = source.recording.source
    if source.recording.kind != "hologram":  # holograms choose their side-band: cells positive
        check_cell_sign(template, source=name)
    if not np.isfinite(template).any():
        raise InputError(f"{name}: the rest template is all NaN; nothing to analyse")
    noise_nm = (
        float(np.sqrt(np.nanmedian(rest.noise_var) / rest.n_frames_used))
        if rest.n_frames_used > 1
        else None
    )
    m = settings.mask
    cells = make_cell_mask(
        template,
        pixel_size_um=px_um,
        method=m.method,
        threshold_sigma=m.threshold_sigma,
        min_area_um2=m.min_area_um2,
        confluent_fraction=m.confluent_fraction,
        noise_nm=noise_nm,
    )
    if not cells.mask.any():
        raise InputError(
            f"{name}: no cells found in the field (mask empty); try "
            '[mask] method = "all" in a config file'
        )
    if regions is not None:
        if not isinstance(regions, np.ndarray):
            regions = load_label_image(regions, source.unbinned_shape)
        labels = source.bin_labels(regions)
        labels = np.where(np.isfinite(template), labels, 0).astype(np.int64)
    else:
        labels = _region_labels(rest, cells, times_s, settings, px_um)
    rigid_pixels, drift_reference = _rigid_reference(
        template, cells, settings.flow.rigid, noise_nm
    )
    # The template is an average and far smoother than a single frame; without a margin of a
    # few frame-noise SDs, every frame's noise would clip where a percentile falls on a flat
    # background.
    frame_sd = (
        float(np.sqrt(np.nanmedian(rest.noise_var))) if np.isfinite(rest.noise_var).any() else 0.0
    )
    scale = flow_scale(
        template,
        percentiles=(settings.flow.percentile_low, settings.flow.percentile_high),
        margin_nm=_SCALE_MARGIN_SD * frame_sd,
    )
    return Reference(
        rest=rest,
        cells=cells,
        template_noise_nm=noise_nm,
        labels=labels,
        user_regions=regions is not None,
        rigid_pixels=rigid_pixels,
        drift_reference=drift_reference,
        flow_scale=scale,
    )
