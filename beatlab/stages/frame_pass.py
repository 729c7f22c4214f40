"""Stage: the per-frame pass (levelling, optical flow, drift, projections onto the pattern).

:func:`measure_frames` streams the frames and reduces each to a few numbers per group of
pixels (the mask, each label, each map tile); nothing per-pixel is kept per frame. The work per
frame is the tested code of :mod:`beatlab.signals`: :class:`~beatlab.signals.level.PlaneLeveller`,
:class:`~beatlab.signals.tracker.FlowTracker`, :mod:`beatlab.signals.projection`.

Three rounds, each over a subset of the frames:

1. drift: when the rigid shift is measured on the cells (no textured background), only at up
   to :data:`MAX_DRIFT_FRAMES` resting frames, where contraction does not bias it; the other
   frames get it interpolated in time;
2. pattern: the most contracted frames (by the rest pass's deviation from the relaxed state)
   build the contraction pattern ``A`` (mean displacement field) and the OPD-change pattern
   ``B`` (mean frame - template), weighted by how far each is from rest;
3. every frame: its displacement field and OPD difference projected onto ``A`` and ``B``
   (:mod:`beatlab.signals.projection`), summed per cell of pixels.
"""

from __future__ import annotations

import os
import warnings
from dataclasses import dataclass

import numpy as np
from scipy import sparse

from beatlab._progress import progress_bar
from beatlab.errors import BeatlabWarning, InputError
from beatlab.settings import Settings
from beatlab.signals._frame_kernels import gather_frame, project_cells
from beatlab.signals.level import PlaneLeveller
from beatlab.signals.maps import tile_grid_shape, tile_labels, tile_means
from beatlab.signals.projection import (
    CellIndex,
    PatternAccumulator,
    ProjectionSums,
    project_groups,
)
from beatlab.signals.rest import RestTemplate, shift_image
from beatlab.signals.tracker import FlowTracker
from beatlab.stages._parallel import FrameMapper
from beatlab.stages.reference import Reference

__all__ = [
    "MAX_DRIFT_FRAMES",
    "MAX_PATTERN_FRAMES",
    "FrameSignals",
    "interpolate_drift",
    "measure_frames",
    "zero_at_rest",
]

#: Shifts below this (px) are not applied to the OPD frame before differencing.
_MIN_ALIGN_PX = 0.02
#: At most this many resting frames (evenly spread) measure the drift on the cells.
MAX_DRIFT_FRAMES = 64
#: At most this many of the most contracted frames build the patterns (and at least 8).
MAX_PATTERN_FRAMES = 48
#: At most this much memory (MB) keeps the drift and pattern frames' values for the
#: projection round.
_GATHERED_BUDGET_MB = 256
#: Share of the frames, the most contracted, that may build the patterns.
_PATTERN_QUANTILE = 0.15


@dataclass(frozen=True)
class FrameSignals:
    """Per-frame reductions of one recording.

    Attributes
    ----------
    displacement_um : ndarray (T,)
        Contraction coordinate of the whole mask: the displacement field (rigid shift
        removed) projected onto the mask's contraction pattern, scaled to the pattern's mean
        magnitude, um. Signed, 0 at rest within its noise.
    opd_change_nm : ndarray (T,)
        (aligned frame - template) projected onto the OPD-change pattern, scaled to its RMS
        over the mask, nm. Signed, 0 at rest within its noise.
    drift_px : ndarray (T, 2)
        Rigid (dx, dy) shift of each frame, px: the shift removed (or, with rigid removal
        off, the shift measured).
    clipped_fraction : ndarray (T,)
        Share of each frame's pixels clipped by the 8-bit flow mapping.
    frame_noise_nm : float or None
        Noise SD of one frame over the mask at rest, nm (None: unknown).
    tile_traces_um : ndarray (T, n_tiles)
        Contraction coordinate of each map tile (its part of the mask), um.
    tile_grid : (int, int)
        ``(ny, nx)`` tiles, row-major.
    tile_um : float
        Side of a tile, um.
    tile_coverage : ndarray (n_tiles,)
        Share of each tile inside the mask.
    label_displacement_um : ndarray (L, T)
        Contraction coordinate of each label of ``Reference.labels`` (row k: label k + 1), um.
    sums : ProjectionSums
        The per-cell projection sums behind every trace (for unions of labels).
    cells : CellIndex
        Cells of pixels and their groups (families ``mask``, ``labels``, ``tiles``).
    pixel_size_um : float
    pattern_frames : ndarray of int
        Frames that built the patterns (of any label).
    label_pattern_frames : tuple of ndarray of int
        Frames that built each label's pattern (entry k: label k + 1).
    drift_reference : str
        How the rigid shift was measured.
    template_clipped_fraction : float
        Share of the template clipped by the 8-bit mapping.
    rest_frames : ndarray of bool (T,)
        The resting frames; every trace is 0 at their median (:func:`zero_at_rest`).
    segment : ndarray of int (T,)
        Template segment of each frame.
    """

    displacement_um: np.ndarray
    opd_change_nm: np.ndarray
    drift_px: np.ndarray
    clipped_fraction: np.ndarray
    frame_noise_nm: float | None
    tile_traces_um: np.ndarray
    tile_grid: tuple[int, int]
    tile_um: float
    tile_coverage: np.ndarray
    label_displacement_um: np.ndarray
    sums: ProjectionSums
    cells: CellIndex
    pixel_size_um: float
    pattern_frames: np.ndarray
    label_pattern_frames: tuple
    drift_reference: str
    template_clipped_fraction: float

    rest_frames: np.ndarray
    segment: np.ndarray

    def label_union_traces(self, members) -> tuple[np.ndarray, np.ndarray]:
        """Displacement (um) and OPD change (nm) of the union of some labels (1-based)."""
        labels = self.cells.families["labels"]
        union = labels[:, np.asarray(members, dtype=int) - 1].sum(axis=1)
        disp, opd = project_groups(self.sums, np.asarray(union) > 0)
        disp, opd = (zero_at_rest(t, self.rest_frames, self.segment) for t in (disp, opd))
        return disp[:, 0] * self.pixel_size_um, opd[:, 0]

    def union_pattern_frames(self, members) -> np.ndarray:
        """Frames that built the patterns of some labels (1-based), sorted."""
        picked = [self.label_pattern_frames[int(m) - 1] for m in members]
        return np.unique(np.concatenate(picked)) if picked else np.zeros(0, dtype=int)


def _column_medians(values: np.ndarray) -> np.ndarray:
    """Median of the finite values of each column (NaN for a column without any)."""
    out = np.full(values.shape[1], np.nan)
    finite = np.isfinite(values)
    for j in np.flatnonzero(finite.any(axis=0)):
        out[j] = np.median(values[finite[:, j], j])
    return out


def zero_at_rest(traces: np.ndarray, rest: np.ndarray, segment: np.ndarray) -> np.ndarray:
    """Traces (T, G) minus their median over the resting frames of each template segment.

    The rest state is 0 by definition. Each template (one, or one per refresh segment) adds
    its own small constant to every projection (its noise seen as motion, which every frame
    shares); the median over the resting frames measures it.
    """
    out = np.array(traces, dtype=float)
    for seg in np.unique(segment):
        frames = segment == seg
        ref = frames & rest
        if ref.sum() >= 3:
            out[frames] -= np.nan_to_num(_column_medians(out[ref]))
    return out


def rest_noise_nm(rest: RestTemplate, mask: np.ndarray) -> float | None:
    """Noise SD of one frame over the mask at rest (nm), from the resting frames."""
    if rest.segments:
        var = float(np.nanmean([np.nanmean(seg.noise_var[mask]) for seg in rest.segments]))
    elif rest.n_frames_used > 1:
        var = float(np.nanmean(rest.noise_var[mask]))
    else:
        return None
    return float(np.sqrt(var)) if var > 0 else None


def _spread(indices: np.ndarray, most: int) -> np.ndarray:
    """At most ``most`` of ``indices``, evenly spread."""
    if indices.size <= most:
        return indices
    return indices[np.round(np.linspace(0, indices.size - 1, most)).astype(int)]


#: Resting frames at each end whose straight-line fit extends the drift beyond them.
_EDGE_FIT_FRAMES = 6


def interpolate_drift(times_s: np.ndarray, frames: np.ndarray, shifts_px: np.ndarray):
    """Drift of every frame from the drift measured at some frames, px (T, 2).

    Linear between the measured frames; before the first and after the last, the straight
    line fitted to the :data:`_EDGE_FIT_FRAMES` measured frames nearest that end (a constant
    would leave a steadily drifting stage uncorrected over the ends of the recording).
    """
    t = times_s[frames]
    out = np.stack([np.interp(times_s, t, shifts_px[:, c]) for c in (0, 1)], axis=1)
    if frames.size < 2:
        return out
    for outside, near in (
        (times_s < t[0], slice(0, _EDGE_FIT_FRAMES)),
        (times_s > t[-1], slice(-_EDGE_FIT_FRAMES, None)),
    ):
        if outside.any():
            slope, offset = np.polyfit(t[near], shifts_px[near], 1)
            out[outside] = offset + np.outer(times_s[outside], slope)
    return out


def _template_membership(rest: RestTemplate, n_frames: int) -> np.ndarray:
    """Per frame, the number of frames averaged into the template that holds it (else 0)."""
    k = np.zeros(n_frames)
    if rest.segments:
        for seg in rest.segments:
            k[seg.frames] = seg.frames.size
    else:
        k[rest.template_frames] = rest.n_frames_used
    return k


def _share_template_noise(field_dot, opd_dot, in_template, template_k) -> None:
    """Give the frames averaged into a template the projection of the template's noise.

    Every frame's field from the template holds the template's noise (an average of k
    frames' noise), and so does the pattern; a frame averaged into the template holds its
    own noise in both, which cancels: its projection lacks the expected ``sigma^2 / k`` (per
    cell, sigma^2 the noise energy of one frame) that every other frame carries. Adding it
    makes resting frames in and out of the template read alike (the noise-variance factors
    1 - 1/k and 1 + 1/k of a template average). ``sigma^2`` per cell is estimated from the
    template frames themselves, whose own terms have the expectation ``(1 - 1/k) sigma^2``.
    """
    if not in_template:
        return
    frames = np.fromiter(in_template, dtype=int)
    k = template_k[frames]
    for column, dots in ((0, field_dot), (1, opd_dot)):
        own = np.array([in_template[i][column] for i in frames])
        sigma2 = np.mean(own / (1 - 1 / k)[:, None], axis=0)
        dots[frames] += (sigma2[None, :] / k[:, None]).astype(dots.dtype)


def _most_contracted(dev: np.ndarray, level: float) -> tuple[np.ndarray, np.ndarray]:
    """The most contracted frames by ``dev`` and their weights (``dev`` above ``level``)."""
    count = int(np.clip(round(_PATTERN_QUANTILE * dev.size), 8, MAX_PATTERN_FRAMES))
    order = np.argsort(-np.nan_to_num(dev, nan=-np.inf), kind="stable")[:count]
    weights = dev[order] - level
    keep = np.isfinite(weights) & (weights > 0)
    return order[keep], weights[keep]


#: Frames per block when the block activity is reduced to each label's deviation.
_DEVIATION_FRAMES = 256


def label_deviation(rest: RestTemplate, labels: np.ndarray) -> np.ndarray | None:
    """RMS deviation from rest of each label's pixels per frame, nm (T, L); None: unknown.

    From the rest pass's block activity (|aligned block mean - rest|), each block weighted by
    its share of the label's pixels.
    """
    n_labels = int(labels.max())
    if rest.activity is None or n_labels < 1:
        return None
    factor = int(rest.info["block_factor"])
    n, by, bx = rest.activity.shape
    crop = labels[: by * factor, : bx * factor]
    block = (np.arange(by)[:, None] * bx + np.arange(bx)[None, :]).repeat(factor, 0)
    block = block.repeat(factor, 1)[: crop.shape[0], : crop.shape[1]]
    share = np.zeros((by * bx, n_labels + 1))
    np.add.at(share, (block.ravel(), crop.ravel()), 1.0)
    share = share[:, 1:]
    area = share.sum(axis=0)
    flat = rest.activity.reshape(n, -1)
    power = np.empty((n, n_labels))
    for start in range(0, n, _DEVIATION_FRAMES):  # in blocks: no float64 copy of the stack
        block = flat[start : start + _DEVIATION_FRAMES].astype(np.float64)
        power[start : start + _DEVIATION_FRAMES] = block**2 @ share
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.sqrt(np.where(area > 0, power / area, np.nan))


def pattern_weights(
    rest: RestTemplate, labels: np.ndarray, *, n_labels: int | None = None
) -> tuple[np.ndarray, np.ndarray]:
    """Frames that build the patterns and their weight for each label (and the rest).

    Each label of ``labels`` (1..L) takes its own most contracted frames (by the deviation of
    its pixels from rest, :func:`label_deviation`), weighted by how far each lies above the
    label's resting level; pixels in no label (column L) use the whole field's deviation. A
    small region beating on its own beside a large one then builds its pattern from its own
    contractions, not from the large one's spill-over.

    Returns
    -------
    frames : ndarray of int (P,)
        Every frame that builds some label's pattern, sorted.
    weights : ndarray (P, L + 1)
        Weight of each frame for each label (0: not one of its frames) and, last, for the
        pixels in no label. ``L`` is ``n_labels`` when given (labels without pixels take the
        whole field's frames), else the largest label.
    """
    dev = np.asarray(rest.deviation, dtype=float)
    level = float(rest.info.get("rest_deviation_nm", np.median(dev[rest.rest])))
    columns = [(dev, level)]
    per_label = label_deviation(rest, labels)
    n_labels = int(labels.max()) if n_labels is None else int(n_labels)
    for j in range(n_labels):
        own = per_label[:, j] if per_label is not None and j < per_label.shape[1] else None
        if own is None or not np.isfinite(own).any():
            columns.insert(-1, (dev, level))
        else:
            columns.insert(-1, (own, float(np.nanmedian(own[rest.rest]))))
    weights = np.zeros((dev.size, len(columns)))
    for j, (series, lvl) in enumerate(columns):
        frames, w = _most_contracted(series, lvl)
        weights[frames, j] = w
    frames = np.flatnonzero(weights.any(axis=1))
    return frames, weights[frames]


def _cell_index(reference: Reference, tiles: np.ndarray, n_tiles: int) -> CellIndex:
    mask = reference.mask
    labels = reference.labels
    return CellIndex.from_maps(
        {
            "mask": (np.where(mask, 0, -1), 1),
            "labels": (np.where(labels > 0, labels - 1, -1), max(int(labels.max()), 1)),
            "tiles": (np.where(mask, tiles, -1), n_tiles),
        }
    )


class _FrameReducer:
    """Levels, tracks and differences one frame against its reference (template segment)."""

    def __init__(self, reference: Reference, settings: Settings, px_um: float):
        f = settings.flow
        self.remove_rigid = f.rigid != "none"
        segments = [seg.template for seg in reference.rest.segments] or [reference.template]
        self.refs = [
            (
                tmpl,
                PlaneLeveller(tmpl, tilt=settings.template.level_tilt),
                FlowTracker(
                    tmpl,
                    reference.mask,
                    pixel_size_um=px_um,
                    method=f.method,
                    preset=f.preset,
                    refine_iterations=f.refine_iterations,
                    window_px=f.window_px,
                    coarse_grid_px=f.coarse_grid_px,
                    scale=reference.flow_scale,
                    background=reference.rigid_pixels,
                    also_read=reference.labels > 0,  # a user's regions may leave the mask
                ),
            )
            for tmpl in segments
        ]

    def fields(self, frame: np.ndarray, drift: np.ndarray | None, ref: int):
        """``(flow (Y, X, 2) px, frame - template (Y, X) nm, shift (2,), clipped)``."""
        template, leveller, tracker = self.refs[ref]
        levelled = leveller.level(frame)
        meas = tracker.measure(
            levelled,
            rigid_shift_px=drift if self.remove_rigid else np.zeros(2),
            mean_magnitude=False,
            estimate_shift=not self.remove_rigid,
        )
        shift = meas.rigid_shift_px if self.remove_rigid else meas.estimated_shift_px
        used = meas.rigid_shift_px
        aligned = shift_image(levelled, -used) if np.hypot(*used) > _MIN_ALIGN_PX else levelled
        return meas.flow_px, aligned - template, shift, meas.clipped_fraction


class _FrameWork:
    """What one frame's work needs, and the work of each round (picklable results only).

    Forked worker processes inherit it (:mod:`beatlab.stages._parallel`); ``drift_px`` and
    ``patterns`` are filled in by the rounds before the ones that use them.
    """

    def __init__(self, reducer, cells, mask, *, frame_ref, template_k, pattern_frames):
        self.reducer = reducer
        self.cells = cells
        self._mask_pixels = np.flatnonzero(mask)  # where a frame must have a finite field
        self.frame_ref = frame_ref
        self.template_k = template_k
        self.pattern_frames = pattern_frames
        self.drift_px: np.ndarray | None = None
        self.patterns = None

    def _given(self, i):
        return None if self.drift_px is None else self.drift_px[i]

    def drift(self, i, frame):
        """:meth:`pattern` before the drift is known: the shift in it is the frame's own
        rigid shift (2,), px, which the interpolated drift later equals at this frame."""
        return self._gathered(i, frame)

    def _gathered(self, i, frame):
        flow, diff, shift, clip = self.reducer.fields(frame, self._given(i), self.frame_ref[i])
        # one compiled pass: both at the used pixels (non-finite as 0, float32) and whether
        # any mask pixel of the field is finite
        f, d, finite = gather_frame(flow, diff, self.cells.pixels, self._mask_pixels)
        return f, d, shift, clip, finite

    def pattern(self, i, frame):
        """The frame's field and OPD difference at the used pixels, its shift, clipping and
        whether any mask pixel is finite (what :meth:`project_gathered` needs later)."""
        return self._gathered(i, frame)

    def project(self, i, frame):
        """Per-cell projections, own terms (pattern and template frames), shift, clipping,
        whether any mask pixel is finite."""
        return self.project_gathered(i, *self._gathered(i, frame))

    def project_gathered(self, i, f, d, shift, clip, finite):
        """:meth:`project` of a frame whose values at the used pixels are known already."""
        cells, pat = self.cells, self.patterns
        own = None
        if i in self.pattern_frames or self.template_k[i] > 1:
            own = tuple(cells.cell_sums(v) for v in pat.own_terms(f, d))
        # one compiled pass: the cell sums of F . A_perp and D B_perp (bit for bit bincounts)
        dots = project_cells(f, d, pat.field_perp, pat.opd_perp, cells.cell, cells.n_cells)
        return (
            *dots,
            own,
            shift,
            clip,
            finite,
        )


#: Map tiles projected at a time: the (frames x tiles) temporaries of a long recording stay
#: a few MB instead of several copies of the whole table.
_TILE_BLOCK = 64


def _group_traces(sums, cells, rest, segment, finite):
    """Mask displacement and OPD, tile and label displacement (px, nm): 0 at rest, NaN where
    a frame has no finite pixel. The tile traces are float32 (what the maps keep)."""

    def at_rest(trace):
        out = zero_at_rest(trace, rest.rest, segment)
        out[~finite] = np.nan
        return out

    mask_disp, mask_opd = (at_rest(t) for t in project_groups(sums, cells.families["mask"]))
    label_disp = at_rest(project_groups(sums, cells.families["labels"])[0])
    tiles = sparse.csc_matrix(cells.families["tiles"])
    tile_disp = np.empty((finite.size, tiles.shape[1]), dtype=np.float32)
    for start in range(0, tiles.shape[1], _TILE_BLOCK):
        block = slice(start, start + _TILE_BLOCK)
        tile_disp[:, block] = at_rest(project_groups(sums, tiles[:, block])[0])
    return mask_disp, mask_opd, tile_disp, label_disp


def measure_frames(
    source,
    reference: Reference,
    *,
    times_s: np.ndarray,
    settings: Settings,
    workers: int | None = None,
    parallel: str = "auto",
    progress: bool = False,
) -> FrameSignals:
    """The per-frame pass: every frame levelled, tracked and projected onto the patterns.

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
        Parallel workers (default: CPUs, at most 4); 1 runs in this process.
    parallel : str
        ``"auto"`` (forked processes where the platform forks, else threads),
        ``"processes"`` or ``"threads"`` (:class:`beatlab.stages._parallel.FrameMapper`).
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
    where they do not contract: so it is measured at resting frames (round 1) and
    interpolated linearly in time for the others. Projections: see
    :mod:`beatlab.signals.projection`; a pattern frame is projected onto the pattern built
    without it (leave-one-out), so its own noise does not bias it.
    """
    n = times_s.size
    px_um = float(source.pixel_size_um)
    rest = reference.rest
    tile_px = max(4, round(settings.maps.tile_um / px_um))
    tiles = tile_labels(reference.mask.shape, tile_px=tile_px)
    n_tiles = int(tiles.max()) + 1
    cells = _cell_index(reference, tiles, n_tiles)
    accumulator = PatternAccumulator(cells, weight_family="labels")
    pattern_idx, pattern_w = pattern_weights(
        rest, reference.labels, n_labels=cells.families["labels"].shape[1]
    )
    weight_of = dict(zip(pattern_idx.tolist(), pattern_w, strict=True))
    work = _FrameWork(
        _FrameReducer(reference, settings, px_um),
        cells,
        reference.mask,
        frame_ref=np.maximum(rest.segment_of(times_s), 0),
        template_k=_template_membership(rest, n),
        pattern_frames=set(weight_of),
    )
    shifts = np.zeros((n, 2))
    clipped = np.zeros(n)
    field_dot = np.zeros((n, cells.n_cells), dtype=np.float32)
    opd_dot = np.zeros((n, cells.n_cells), dtype=np.float32)
    field_sq, opd_sq = {}, {}
    in_template: dict[int, tuple[np.ndarray, np.ndarray]] = {}
    finite = np.zeros(n, dtype=bool)

    drift_reference = reference.drift_reference
    drift_frames = _spread(np.flatnonzero(rest.rest), MAX_DRIFT_FRAMES)
    interpolate = (
        drift_reference == "cell median"
        and rest.method == "rest-frames"
        and drift_frames.size >= 2
    )
    if interpolate:
        drift_reference = "cell median at rest frames, interpolated"

    rounds = [(pattern_idx, "pattern"), (np.arange(n), "project")]
    if interpolate:
        rounds.insert(0, (drift_frames, "drift"))

    def take_projection(i, result):
        field_dot[i], opd_dot[i], own, shifts[i], clipped[i], finite[i] = result
        if own is not None and i in weight_of:
            field_sq[i], opd_sq[i] = own
        if own is not None and work.template_k[i] > 1:
            in_template[i] = own

    # the drift and pattern frames' values at the used pixels, kept from their rounds so that
    # the projection round need not track those frames again (within a memory budget); a
    # drift frame's interpolated drift is its own measured shift, so nothing differs
    gathered: dict[int, tuple] = {}
    budget = _GATHERED_BUDGET_MB * 2**20
    mapper = FrameMapper(workers or min(4, os.cpu_count() or 1), mode=parallel)
    # forked workers read (and convert: phase unwrapping, hologram reconstruction) their own
    # frames where that is safe; the rest pass has already read every frame here once, so
    # any warning about the file has been raised in this process
    forked_reading = mapper.processes and source.readable_in_forks
    with progress_bar(
        total=sum(idx.size for idx, _ in rounds), desc="measuring frames", enabled=progress
    ) as bar:
        for idx, method in rounds:
            keep = np.zeros(n, dtype=bool)
            keep[idx] = True
            if method == "project":
                work.patterns = accumulator.patterns()
                for i, values in gathered.items():
                    take_projection(i, work.project_gathered(i, *values))
                keep[list(gathered)] = False
                bar.update(len(gathered))
                gathered.clear()
            for done, results in mapper.run(
                work,
                method,
                source.select_indices(keep) if forked_reading else source.select_chunks(keep),
                reader=source.frames_at if forked_reading else None,
            ):
                for i, result in zip(done.tolist(), results, strict=True):
                    if method == "project":
                        take_projection(i, result)
                        continue
                    if method == "drift":
                        shifts[i] = result[2]
                    else:
                        accumulator.add_gathered(i, *result[:2], weight_of[i])
                    budget -= result[0].nbytes + result[1].nbytes
                    if budget >= 0:
                        gathered[i] = result
                bar.update(len(done))
            if method == "drift":
                work.drift_px = interpolate_drift(times_s, idx, shifts[idx])
    if not finite.any():
        raise InputError(
            f"{source.recording.source}: every frame is NaN inside the cell mask; nothing to "
            "analyse"
        )
    _share_template_noise(field_dot, opd_dot, in_template, work.template_k)
    sums = work.patterns.sums(
        cells,
        field_dot,
        opd_dot,
        field_sq,
        opd_sq,
        {k: v for k, v in weight_of.items() if k in field_sq},
    )
    segment = np.maximum(rest.segment_of(times_s), 0)
    mask_disp, mask_opd, tile_disp, label_disp = _group_traces(sums, cells, rest, segment, finite)
    if pattern_idx.size == 0:
        # no frame departs from rest (identical or featureless frames): nothing moved, and a
        # projection onto the empty pattern would be 0/0
        for trace in (mask_disp, mask_opd, tile_disp, label_disp):
            trace[finite] = 0.0
        warnings.warn(
            f"{source.recording.source}: no frame differs from the rest template (identical "
            "or featureless frames); nothing moves, so no beats can be found",
            BeatlabWarning,
            stacklevel=2,
        )
    n_labels = int(reference.labels.max())
    tile_disp *= px_um  # float32 in place (as ``* px_um`` would compute it, without the copy)
    return FrameSignals(
        displacement_um=mask_disp[:, 0] * px_um,
        opd_change_nm=mask_opd[:, 0],
        drift_px=shifts,
        clipped_fraction=clipped,
        frame_noise_nm=rest_noise_nm(rest, reference.mask),
        tile_traces_um=tile_disp,
        tile_grid=tile_grid_shape(reference.mask.shape, tile_px=tile_px),
        tile_um=tile_px * px_um,
        tile_coverage=tile_means(reference.mask.astype(np.float32), tiles, n_tiles),
        label_displacement_um=(label_disp[:, :n_labels] * px_um).T,
        sums=sums,
        cells=cells,
        pixel_size_um=px_um,
        pattern_frames=pattern_idx,
        label_pattern_frames=tuple(
            pattern_idx[pattern_w[:, j] > 0] for j in range(pattern_w.shape[1] - 1)
        ),
        rest_frames=np.asarray(rest.rest, dtype=bool),
        segment=segment,
        drift_reference=drift_reference if settings.flow.rigid != "none" else "none",
        template_clipped_fraction=float(work.reducer.refs[0][2].template_clipped_fraction),
    )
