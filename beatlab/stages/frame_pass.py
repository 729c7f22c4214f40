"""Stage: the per-frame pass (levelling, optical flow, drift, OPD change, tile and label means).

:func:`measure_frames` streams the frames once (twice for the resting frames when the drift is
measured there and interpolated in time) and reduces each frame to a few numbers; nothing
per-pixel is kept. The per-frame work is the tested code of :mod:`beatlab.signals`:
:class:`~beatlab.signals.level.PlaneLeveller`, :class:`~beatlab.signals.tracker.FlowTracker`,
:func:`~beatlab.signals.maps.tile_means` and :func:`~beatlab.signals.traces.opd_change_trace`.
"""

from __future__ import annotations

import os
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass

import numpy as np

from beatlab.errors import InputError
from beatlab.settings import Settings
from beatlab.signals.level import PlaneLeveller
from beatlab.signals.maps import tile_grid_shape, tile_labels, tile_means
from beatlab.signals.rest import RestTemplate, shift_image
from beatlab.signals.traces import opd_change_trace
from beatlab.signals.tracker import FlowTracker
from beatlab.stages.reference import Reference

__all__ = ["FrameSignals", "measure_frames", "rest_noise_variance"]

#: Shifts below this (px) are not applied to the OPD frame before differencing.
_MIN_ALIGN_PX = 0.02


@dataclass(frozen=True)
class FrameSignals:
    """Per-frame reductions of one recording.

    Attributes
    ----------
    displacement_um : ndarray (T,)
        Mean flow magnitude over the mask, rigid shift removed, um (NaN: no finite pixel).
    opd_change_nm : ndarray (T,)
        RMS over the mask of (aligned frame - template), frame noise removed in quadrature, nm.
    drift_px : ndarray (T, 2)
        Rigid (dx, dy) shift of each frame, px: the shift removed (or, with rigid removal
        off, the shift measured).
    clipped_fraction : ndarray (T,)
        Share of each frame's pixels clipped by the 8-bit flow mapping.
    expected_noise_var_nm2 : ndarray (T,)
        Expected mean square of (frame - template) at rest: frame plus template noise.
    frame_noise_nm : float or None
        Noise SD of one frame over the mask at rest, nm (None: unknown).
    tile_traces_um : ndarray (T, n_tiles) float32
        Mean flow magnitude per tile of the map grid, um.
    tile_grid : (int, int)
        ``(ny, nx)`` tiles, row-major.
    tile_um : float
        Side of a tile, um.
    tile_coverage : ndarray (n_tiles,)
        Share of each tile inside the mask.
    label_displacement_um : ndarray (L, T)
        Mean flow magnitude over each label of ``Reference.labels`` (row k: label k + 1), um.
    label_mean_square_nm2 : ndarray (L, T)
        Mean of (aligned frame - template)^2 over each label, nm^2.
    label_area_px : ndarray (L + 1,)
        Pixels per label (index 0: outside).
    drift_reference : str
        How the rigid shift was measured.
    template_clipped_fraction : float
        Share of the template clipped by the 8-bit mapping.
    """

    displacement_um: np.ndarray
    opd_change_nm: np.ndarray
    drift_px: np.ndarray
    clipped_fraction: np.ndarray
    expected_noise_var_nm2: np.ndarray
    frame_noise_nm: float | None
    tile_traces_um: np.ndarray
    tile_grid: tuple[int, int]
    tile_um: float
    tile_coverage: np.ndarray
    label_displacement_um: np.ndarray
    label_mean_square_nm2: np.ndarray
    label_area_px: np.ndarray
    drift_reference: str
    template_clipped_fraction: float

    def region_opd_change_nm(self, members: tuple[int, ...]) -> np.ndarray:
        """OPD change of the union of some labels (1-based), nm (area-weighted mean square)."""
        idx = np.asarray(members, dtype=int)
        w = self.label_area_px[idx]
        ms = np.nansum(self.label_mean_square_nm2[idx - 1] * w[:, None], axis=0) / w.sum()
        return opd_change_trace(ms, self.expected_noise_var_nm2)


def rest_noise_variance(
    rest: RestTemplate, mask: np.ndarray, n_frames: int
) -> tuple[float, np.ndarray]:
    """Noise variance of one frame, and the expected mean square of (frame - template), nm^2.

    Returns ``(sigma2, expected)``: the mean over the mask of a single frame's noise variance
    at rest, and per frame (T,) the expected mean square over the mask of (frame - template)
    at rest.

    Frame noise plus template noise: frames averaged into a template of k frames share its
    noise (factor 1 - 1/k), the others add it (1 + 1/k). With refresh segments, the median
    segment size and the mean of the segments' noise (the whole-recording variance would also
    hold the slow change of the rest state).
    """
    k = rest.n_frames_used
    sigma2 = float(np.nanmean(rest.noise_var[mask])) if k > 1 else 0.0
    used = np.zeros(n_frames, dtype=bool)
    used[rest.template_frames] = True
    if rest.segments:
        used[:] = False
        for seg in rest.segments:
            used[seg.frames] = True
        k = int(np.median([seg.frames.size for seg in rest.segments]))
        sigma2 = float(np.nanmean([np.nanmean(seg.noise_var[mask]) for seg in rest.segments]))
    factor = np.where(used, 1 - 1 / k, 1 + 1 / k) if k > 1 else np.ones(n_frames)
    return sigma2, sigma2 * factor


class _FrameReducer:
    """Reduce one frame against one reference (template, leveller, tracker) to numbers."""

    def __init__(self, reference: Reference, settings: Settings, px_um: float):
        f = settings.flow
        self.remove_rigid = f.rigid != "none"
        self.mask = reference.mask
        self.px_um = px_um
        self.labels = reference.labels
        self.n_labels = int(reference.labels.max())
        tile_px = max(4, round(settings.maps.tile_um / px_um))
        self.tile_px = tile_px
        self.tiles = tile_labels(self.mask.shape, tile_px=tile_px)
        self.n_tiles = int(self.tiles.max()) + 1
        segments = [seg.template for seg in reference.rest.segments] or [reference.template]
        self.refs = [
            (
                tmpl,
                PlaneLeveller(tmpl, tilt=settings.template.level_tilt),
                FlowTracker(
                    tmpl,
                    self.mask,
                    pixel_size_um=px_um,
                    method=f.method,
                    preset=f.preset,
                    refine_iterations=f.refine_iterations,
                    window_px=f.window_px,
                    scale=reference.flow_scale,
                    background=reference.rigid_pixels,
                ),
            )
            for tmpl in segments
        ]

    def __call__(self, frame: np.ndarray, drift: np.ndarray | None, ref: int):
        template, leveller, tracker = self.refs[ref]
        levelled = leveller.level(frame)
        remove = drift if self.remove_rigid else np.zeros(2)
        meas = tracker.measure(levelled, rigid_shift_px=remove)
        shift = meas.rigid_shift_px if self.remove_rigid else meas.estimated_shift_px
        magnitude = np.hypot(meas.flow_px[..., 0], meas.flow_px[..., 1]) * self.px_um
        used = meas.rigid_shift_px
        aligned = shift_image(levelled, -used) if np.hypot(*used) > _MIN_ALIGN_PX else levelled
        square = (aligned - template) ** 2
        inside = square[self.mask]
        n1 = self.n_labels + 1
        return (
            meas.displacement_um,
            shift,
            float(np.nanmean(inside)) if np.isfinite(inside).any() else np.nan,
            meas.clipped_fraction,
            tile_means(np.where(self.mask, magnitude, np.nan), self.tiles, self.n_tiles),
            tile_means(magnitude, self.labels, n1)[1:],
            tile_means(square, self.labels, n1)[1:],
        )


def measure_frames(
    source,
    reference: Reference,
    *,
    times_s: np.ndarray,
    settings: Settings,
    workers: int | None = None,
    progress: bool = False,
) -> FrameSignals:
    """The per-frame pass: every frame levelled, tracked and reduced.

    Parameters
    ----------
    source : beatlab.frames.OPDSource
        The recording's OPD frames.
    reference : Reference
        From :func:`beatlab.stages.prepare_reference`.
    times_s : ndarray (T,)
        Frame times, s.
    settings : Settings
        Uses ``flow``, ``template.level_tilt`` and ``maps.tile_um``.
    workers : int, optional
        Threads (default: CPUs, at most 4); OpenCV and NumPy release the GIL.
    progress : bool
        Show a progress bar.

    Returns
    -------
    FrameSignals

    Raises
    ------
    InputError
        Every frame is NaN inside the mask.

    Notes
    -----
    Drift: with a textured cell-free background the rigid shift of each frame is the median
    flow there. Without one it is the median flow over the cells, which is unbiased only
    where they do not contract: so it is measured at the resting frames (done first) and
    interpolated linearly in time for the others.
    """
    from tqdm.auto import tqdm

    n = times_s.size
    px_um = float(source.pixel_size_um)
    reduce = _FrameReducer(reference, settings, px_um)
    rest = reference.rest
    frame_ref = np.maximum(rest.segment_of(times_s), 0)
    disp = np.full(n, np.nan)
    shifts = np.zeros((n, 2))
    mean_sq = np.full(n, np.nan)
    clipped = np.zeros(n)
    tile_tr = np.full((n, reduce.n_tiles), np.nan, dtype=np.float32)
    label_disp = np.full((reduce.n_labels, n), np.nan)
    label_sq = np.full((reduce.n_labels, n), np.nan)

    rest_idx = np.flatnonzero(rest.rest)
    drift_reference = reference.drift_reference
    interpolate = (
        drift_reference == "cell median" and rest.method == "rest-frames" and rest_idx.size >= 2
    )
    if interpolate:
        drift_reference = "cell median at rest frames, interpolated"
    workers = workers or min(4, os.cpu_count() or 1)
    with (
        ThreadPoolExecutor(max_workers=workers) as pool,
        tqdm(total=n, desc="analysing", unit="frame", disable=not progress, leave=False) as bar,
    ):

        def run(keep, drifts):
            for idx, frames in source.select_chunks(keep):
                given = [None if drifts is None else drifts[i] for i in idx]
                results = pool.map(reduce, frames, given, frame_ref[idx])
                for i, res in zip(idx, results, strict=True):
                    (disp[i], shifts[i], mean_sq[i], clipped[i], tile_tr[i], label_disp[:, i],
                     label_sq[:, i]) = res  # fmt: skip
                bar.update(len(idx))

        done = np.zeros(n, dtype=bool)
        drift_px = None
        if interpolate:
            done[rest_idx] = True
            run(done, None)
            drift_px = np.stack(
                [np.interp(times_s, times_s[rest_idx], shifts[rest_idx, c]) for c in (0, 1)],
                axis=1,
            )
        run(~done, drift_px)
    if not np.isfinite(disp).any():
        raise InputError(
            f"{source.recording.source}: every frame is NaN inside the cell mask; nothing to "
            "analyse"
        )
    sigma2, noise_var = rest_noise_variance(rest, reference.mask, n)
    return FrameSignals(
        displacement_um=disp,
        opd_change_nm=opd_change_trace(mean_sq, noise_var),
        drift_px=shifts,
        clipped_fraction=clipped,
        expected_noise_var_nm2=noise_var,
        frame_noise_nm=float(np.sqrt(sigma2)) if sigma2 > 0 else None,
        tile_traces_um=tile_tr,
        tile_grid=tile_grid_shape(reference.mask.shape, tile_px=reduce.tile_px),
        tile_um=reduce.tile_px * px_um,
        tile_coverage=tile_means(reference.mask.astype(np.float32), reduce.tiles, reduce.n_tiles),
        label_displacement_um=label_disp,
        label_mean_square_nm2=label_sq,
        label_area_px=np.bincount(reference.labels.ravel(), minlength=reduce.n_labels + 1).astype(
            float
        ),
        drift_reference=drift_reference if settings.flow.rigid != "none" else "none",
        template_clipped_fraction=float(reduce.refs[0][2].template_clipped_fraction),
    )
