"""The rest template: find the frames closest to the relaxed state and average them.

A first cheap pass over block-averaged frames measures how far every frame is from the
relaxed state, *not* how much it changes from the previous frame (the change is near zero at
the peak of a contraction too). The least-deviating frames, aligned for stage drift and
levelled, are averaged into the template, which is less noisy than any single frame.
"""

from __future__ import annotations

import itertools
import logging
from dataclasses import dataclass, field, replace

import cv2
import numpy as np
from scipy import fft as sp_fft
from scipy import ndimage

from beatlab._fork import ForkPool, fork_imap, shared_array
from beatlab._progress import progress_bar
from beatlab.errors import InputError
from beatlab.frames import block_mean
from beatlab.signals.level import PlaneLeveller

__all__ = ["RestTemplate", "block_mean", "estimate_rest_template", "shift_image"]

logger = logging.getLogger(__name__)

#: pixels used for the activity axis of :func:`relaxed_score`
_SCORE_PIXELS = 2048
#: frames whose change exceeds this share of the score's span are moving, in relaxed_score
_MOVING_SHARE = 0.02
#: frames within this many noise SDs of the relaxed end of the activity axis are at rest
_REST_NOISE_SDS = 3.0
#: a recording has a true rest when at least this share of its frames is at rest
_MIN_AT_REST = 0.1


@dataclass(frozen=True)
class TemplateSegment:
    """A rest template refreshed for the frames from ``start_s`` to ``stop_s``."""

    start_s: float
    stop_s: float
    template: np.ndarray
    noise_var: np.ndarray
    frames: np.ndarray


@dataclass(frozen=True)
class RestTemplate:
    """The rest template and what was learnt finding it.

    Attributes
    ----------
    template : ndarray (Y, X) float32
        Mean of the aligned, levelled resting frames (nm).
    rest : ndarray of bool (T,)
        Frames used as resting frames.
    deviation : ndarray (T,)
        Each frame's RMS deviation (nm, block-averaged) from the relaxed state.
    shifts_px : ndarray (T, 2)
        Rigid (dx, dy) shift of each frame against the template from the cheap pass, px.
    noise_var : ndarray (Y, X) float32
        Per-pixel variance (nm^2) of a single resting frame about the true rest state.
    n_frames_used : int
        Number of frames averaged.
    template_frames : ndarray of int
        Indices of the frames averaged into the template.
    activity : ndarray (T, by, bx) float32
        Absolute deviation of every block-averaged, aligned, levelled frame from the rest
        state (nm), block size ``info["block_factor"]``: where and when the field is active.
    segments : tuple of TemplateSegment
        With a refresh interval: one template per stretch of time, from the resting frames
        inside it (empty when one template serves the whole recording).
    method : str
        ``'rest-frames'``, or ``'least-deviating-frames'`` when no frames came close to the
        noise floor (fast or fibrillation-like beating: no true rest).
    """

    template: np.ndarray
    rest: np.ndarray
    deviation: np.ndarray
    shifts_px: np.ndarray
    noise_var: np.ndarray
    n_frames_used: int
    template_frames: np.ndarray
    method: str
    segments: tuple = ()
    activity: np.ndarray | None = None
    info: dict = field(default_factory=dict)

    def segment_of(self, times_s: np.ndarray) -> np.ndarray:
        """Index into :attr:`segments` of each time (all -1 with one template)."""
        if not self.segments:
            return np.full(np.shape(times_s), -1)
        starts = np.array([seg.start_s for seg in self.segments])
        return np.clip(np.searchsorted(starts, times_s, side="right") - 1, 0, len(starts) - 1)


#: Every pixel of a low-resolution frame (``lowres_px`` = 64 gives 4096) enters its plane fit:
#: fitting a quarter of them was measurably faster but changed which frames count as resting,
#: and with them the trace (tests/pipeline/test_quality_checks.py).
_REST_LEVEL_PIXELS = 1 << 16
#: Fewest frames for which the rest pass's iterations run in forked workers.
_FORK_MIN_FRAMES = 400


def _shift_ramp(freq: np.ndarray, shift: float, *, nyquist: int | None) -> np.ndarray:
    """Phase ramp of a shift; the Nyquist bin of an even length (its own mirror) is kept real
    (cos), the Hermitian-symmetric choice that keeps a real image real."""
    ramp = np.exp(-2j * np.pi * freq * shift)
    if nyquist is not None:
        ramp[nyquist] = np.cos(np.pi * shift)
    return ramp.astype(np.complex64)


def shift_image(image: np.ndarray, shift_px: np.ndarray) -> np.ndarray:
    """Translate ``image`` by ``shift_px`` = (dx, dy) with an exact Fourier shift.

    The image is mirror-padded first, so nothing wraps around from the opposite border and
    the border does not ring. NaN pixels are filled with the image median for the transform
    and stay NaN after it.
    """
    image = np.asarray(image, dtype=np.float32)
    bad = ~np.isfinite(image)
    has_bad = bool(bad.any())
    work = image
    if has_bad:
        fill = np.float32(np.median(image[~bad])) if (~bad).any() else np.float32(0.0)
        work = np.where(bad, fill, image)
    dx, dy = float(shift_px[0]), float(shift_px[1])
    pad = int(np.ceil(max(abs(dx), abs(dy)))) + 8
    pad = min(pad, min(image.shape) - 1)
    ny, nx = (n + 2 * pad for n in image.shape)
    fy, fx = sp_fft.next_fast_len(ny, real=True), sp_fft.next_fast_len(nx, real=True)
    # reflect-pad to the fast transform size, the extra split between both sides, so the
    # wrap-around joins mirror images of rows (columns) equally far inside the image
    top, left = pad + (fy - ny) // 2, pad + (fx - nx) // 2
    top, left = min(top, image.shape[0] - 1), min(left, image.shape[1] - 1)
    padded = np.pad(
        work,
        ((top, fy - image.shape[0] - top), (left, fx - image.shape[1] - left)),
        mode="reflect",
    )
    spectrum = sp_fft.rfft2(padded, workers=1)
    ramp_y = _shift_ramp(sp_fft.fftfreq(fy), dy, nyquist=fy // 2 if fy % 2 == 0 else None)
    ramp_x = _shift_ramp(sp_fft.rfftfreq(fx), dx, nyquist=fx // 2 if fx % 2 == 0 else None)
    spectrum *= ramp_y[:, None]
    spectrum *= ramp_x[None, :]
    moved = sp_fft.irfft2(spectrum, s=(fy, fx), workers=1)
    out = np.ascontiguousarray(moved[top : top + image.shape[0], left : left + image.shape[1]])
    out = out.astype(np.float32, copy=False)
    if has_bad:
        shifted = ndimage.shift(bad.astype(np.float32), (dy, dx), order=1, mode="nearest")
        out[shifted > 0.01] = np.nan
    return out


def relaxed_score(frames: np.ndarray, *, iterations: int = 30) -> np.ndarray:
    """Position of every frame along the main activity axis, 0 at the relaxed end.

    Parameters
    ----------
    frames : ndarray (T, P)
        Aligned, levelled frames (flattened pixels).
    iterations : int
        Power iterations for the first principal component.

    Returns
    -------
    ndarray (T,)
        The first principal-component score, shifted and oriented so the relaxed end is 0.

    Notes
    -----
    For small motions a frame is close to ``rest - a(t) u . grad(rest)``, so the first
    principal component of the frames follows the activation ``a(t)`` up to sign. The sign
    is set so that the trace leaves the relaxed end fast: contraction is faster than
    relaxation (time to peak < relaxation time, a fact of cardiomyocyte mechanics; common
    practice), judged by the mean rising against the mean falling speed over the frames that
    move (frame-to-frame change above 2 % of the span). The means, not the extremes: a beat
    whose relaxation ends abruptly (after an EAD-like bump, say) has its fastest frames in
    relaxation, yet relaxes slower on average.
    This holds also when beats overlap and the cells never relax, where the contracted end
    is the more crowded one. When the change shows no clear asymmetry (ratio below 1.3:
    noise, symmetric kinetics), the relaxed end is the one where more frames pile up.
    """
    x = np.asarray(frames, dtype=np.float32)
    if x.shape[1] > _SCORE_PIXELS:  # a regular subset of pixels is plenty for one component
        x = x[:, :: int(np.ceil(x.shape[1] / _SCORE_PIXELS))]
    x = x - x.mean(axis=0)
    n = x.shape[0]
    if n < 3 or not np.any(x):
        return np.zeros(n)
    v = np.random.default_rng(0).standard_normal(x.shape[1]).astype(np.float32)
    for _ in range(iterations):
        v = x.T @ (x @ v)
        norm = np.linalg.norm(v)
        if norm == 0:
            return np.zeros(n)
        v /= norm
    s = x @ v
    span = s.max() - s.min()
    if span <= 0:
        return np.zeros(n)
    d = np.diff(s)
    moving = np.abs(d) > _MOVING_SHARE * span  # frames of real motion, not noise at rest
    rise = d[moving & (d > 0)]
    fall = -d[moving & (d < 0)]
    if len(rise) and len(fall) and abs(np.log(rise.mean() / fall.mean())) > np.log(1.2):
        # the trace leaves the relaxed end fast: contraction is faster than relaxation
        if rise.mean() < fall.mean():
            s = -s
    else:
        # no clear speed asymmetry (noise, symmetric kinetics): the relaxed end is where
        # frames pile up, as cells rest longer than they stay at peak
        low = np.mean(s < s.min() + 0.15 * span)
        high = np.mean(s > s.max() - 0.15 * span)
        if high > low:
            s = -s
    return s - s.min()


def _select_rest(aligned: np.ndarray, rest_quantile: float) -> np.ndarray:
    """Resting frames among aligned, levelled block-averaged frames (T, y, x)."""
    n = aligned.shape[0]
    inner = aligned[:, 2:-2, 2:-2].reshape(n, -1)
    score = relaxed_score(inner)
    rest = score <= np.quantile(score, rest_quantile)
    for _ in range(2):
        ref = inner[rest].mean(axis=0)
        deviation = np.sqrt(np.mean((inner - ref) ** 2, axis=1))
        rest = deviation <= np.quantile(deviation, rest_quantile)
    return rest


def _smooth_shifts(shifts: np.ndarray, *, window: int = 31) -> np.ndarray:
    """Running median (then mean) of per-frame (dx, dy) shifts over ``window`` frames."""
    n = shifts.shape[0]
    w = min(window, n if n % 2 else n - 1)
    if w < 3:
        return shifts
    out = ndimage.median_filter(shifts, size=(w, 1), mode="nearest")
    return ndimage.uniform_filter1d(out, size=max(3, w // 3), axis=0, mode="nearest")


def _spread(indices: np.ndarray, most: int) -> np.ndarray:
    """At most ``most`` of ``indices``, evenly spaced."""
    if indices.size > most:
        indices = indices[np.round(np.linspace(0, indices.size - 1, most)).astype(int)]
    return indices


def _average_frames(source, idx, shifts, level_tilt, *, anchor):
    """Mean of frames ``idx``, each moved to the rigid position ``anchor`` and levelled.

    Returns the mean, the per-pixel variance of one frame about it and the frame count.
    """
    moved = []
    for i in idx:
        f = source.frame(int(i))
        delta = shifts[i] - anchor
        if np.hypot(*delta) > 0.02:
            f = shift_image(f, -delta)
        moved.append(f)
    leveller = PlaneLeveller(moved[0], tilt=level_tilt)
    stack = leveller.level_stack(np.stack(moved))
    template = _nan_mean(stack)
    k = stack.shape[0]
    if k > 1:
        resid = _nan_mean((stack - template) ** 2)
        # each frame is part of the mean: E[resid] = (1 - 1/k) sigma^2
        noise_var = resid * k / (k - 1)
    else:
        noise_var = np.full(template.shape, np.nan)
    return template.astype(np.float32), noise_var.astype(np.float32), int(k)


def _nan_mean(stack: np.ndarray) -> np.ndarray:
    """Mean over axis 0 ignoring NaN; NaN where a pixel is NaN in every frame.

    Unlike ``np.nanmean`` it does not warn "Mean of empty slice" for those pixels (the
    outside of a camera's valid area is NaN in every frame).
    """
    if not np.isnan(stack).any():
        return stack.mean(axis=0)
    count = np.sum(~np.isnan(stack), axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(count > 0, np.nansum(stack, axis=0) / count, np.nan)


def _filled(frame: np.ndarray) -> np.ndarray:
    nan = np.isnan(frame)
    if nan.all():  # a dropped frame stays NaN (np.nanmedian would warn "All-NaN slice")
        return frame.astype(np.float32)
    if nan.any():
        return np.where(np.isnan(frame), np.nanmedian(frame), frame).astype(np.float32)
    return frame


def _phase_shift(ref: np.ndarray, img: np.ndarray, window: np.ndarray) -> np.ndarray:
    ref = np.asarray(ref, dtype=np.float64)  # a float64 reference is used as it is
    (dx, dy), _ = cv2.phaseCorrelate(ref, img.astype(np.float64), window)
    return np.array([dx, dy])


# What the rest pass's span functions read (set just before each map, cleared after); the
# forked readers inherit it.
_JOB: dict = {}


def _spans(n: int, parts: int) -> list[tuple[int, int]]:
    """``[start, stop)`` spans covering ``range(n)`` in about ``parts`` pieces."""
    edges = np.linspace(0, n, min(max(parts, 1), max(n, 1)) + 1).round().astype(int)
    return [(int(a), int(b)) for a, b in itertools.pairwise(edges) if b > a]


def _low_resolution_span(span: tuple[int, int]) -> int:
    """Block-average the frames of a span into ``_JOB["out"]``; returns how many."""
    source, factor, out = _JOB["source"], _JOB["factor"], _JOB["out"]
    t = span[0]
    for _, block in source.chunks(start=span[0], stop=span[1]):
        for frame in block:
            out[t] = _filled(block_mean(frame, factor))
            t += 1
    return t - span[0]


def _low_resolution(
    source, factor: int, *, workers: int, progress: bool, meanwhile=None
) -> np.ndarray:
    """Every frame block-averaged by ``factor`` (NaN filled), (T, Y', X') float32.

    Forked workers read spans of the file themselves when the source allows it, and write
    the small frames into shared memory instead of pickling them back through pipes;
    ``meanwhile()`` runs here while they read.
    """
    n = source.n_frames
    step = max(int(getattr(source, "chunk_frames", 64)), 1)
    spans = [(i, min(i + step, n)) for i in range(0, n, step)]
    parallel = workers > 1 and bool(getattr(source, "readable_in_forks", False))
    shape = (n, source.shape[0] // factor, source.shape[1] // factor)
    low = shared_array(shape, np.float32) if parallel else np.empty(shape, dtype=np.float32)
    _JOB.update(source=source, factor=factor, out=low)
    try:
        with progress_bar(total=n, desc="finding rest frames", enabled=progress) as bar:
            results = fork_imap(
                _low_resolution_span, spans, workers=workers if parallel else 1,
                meanwhile=meanwhile,
            )  # fmt: skip
            for count in results:
                bar.update(count)
    finally:
        _JOB.clear()
    return low


def _phase_shifts(job: tuple) -> np.ndarray:
    """Rigid shifts (dx, dy) px of the frames of a span to the current reference (n, 2)."""
    (start, stop), ref = job
    low, window = _JOB["low"], _JOB["window"]
    ref = ref.astype(np.float64)  # once for the span, not once per frame
    return np.array([_phase_shift(ref, low[t], window) for t in range(start, stop)]).reshape(-1, 2)


#: Frames are aligned when a smoothed rigid shift exceeds this (low-resolution px).
_DRIFT_PX = 0.1
#: A round whose largest shift is below this share of :data:`_DRIFT_PX` ends the measuring:
#: the references of the later rounds are averages of the same frames, not moved by the
#: shifts of a recording that does not drift, so they would find no drift either (on 1,000
#: frames, 0.05 s of phase correlation per round).
_SETTLED_FRACTION = 0.5


def _measured_shifts(pool, spans, ref: np.ndarray) -> np.ndarray:
    """Every frame's rigid shift (T, 2) to ``ref``, low-resolution px: phase correlation,
    smoothed in time, less its median."""
    shifts = np.concatenate(pool.map(_phase_shifts, [(span, ref) for span in spans]))
    # stage drift is slow: a running median takes out the estimation noise (and the brief
    # apparent shift of a contraction), which would otherwise read as motion
    shifts = _smooth_shifts(shifts)
    # the reference is made of the frames themselves, so their true shifts to it have a
    # median of 0; a common offset is a bias of the estimate (seen: phase correlation on
    # 42 px low-resolution frames read every frame as shifted by the same 1.5 px, which each
    # iteration then added again)
    return shifts - np.median(shifts, axis=0)


def _aligned_and_deviation(job: tuple) -> np.ndarray:
    """Frames of a span aligned (when drifting) and levelled, written into the shared stack
    ``_JOB["aligned"]``; returns their deviation (nm) from the reference."""
    (start, stop), ref, leveller, shifts, drifting = job
    low = _JOB["low"]
    part = np.stack(
        [
            shift_image(low[t], -shifts[t - start]) if drifting else low[t]
            for t in range(start, stop)
        ]
    )
    part = leveller.level_stack(part)
    _JOB["aligned"][start:stop] = part
    inner = (part - ref)[:, 2:-2, 2:-2]
    return np.sqrt(np.mean(inner**2, axis=(1, 2)))


def _inner_subset(stack: np.ndarray, most: int) -> np.ndarray:
    """``stack[:, 2:-2, 2:-2]`` flattened to (T, P), every k-th pixel so that P <= ``most``.

    The same columns as flattening the inner frames and taking every k-th, without the copy
    of the whole inner stack.
    """
    n, ny, nx = stack.shape
    width = nx - 4
    inner = (ny - 4) * width
    cols = np.arange(0, inner, int(np.ceil(inner / most)) if inner > most else 1)
    return np.take(stack.reshape(n, -1), (2 + cols // width) * nx + 2 + cols % width, axis=1)


#: Frames per block of the chunked reductions over the low-resolution stack.
_REDUCE_FRAMES = 256


def _pixel_medians(stack: np.ndarray, block: int = 512) -> np.ndarray:
    """``np.median(stack, axis=0)`` of a (T, Y, X) stack, the same numbers, by blocks of pixels
    made contiguous in time first: along the strided time axis numpy took 0.14 s for 1,000
    frames of 64 x 64 px, against 0.09 s this way."""
    n = stack.shape[0]
    flat = stack.reshape(n, -1)
    parts = [
        np.median(np.ascontiguousarray(flat[:, start : start + block].T), axis=1)
        for start in range(0, flat.shape[1], block)
    ]
    return np.concatenate(parts).reshape(stack.shape[1:]) if parts else np.median(stack, axis=0)


def _median_span(span: tuple[int, int]) -> np.ndarray:
    """:func:`_pixel_medians` of the pixels ``[start, stop)`` (flat) of ``_JOB["low"]``."""
    low = _JOB["low"]
    start, stop = span
    return _pixel_medians(low.reshape(low.shape[0], -1)[:, start:stop, None]).ravel()


def _successive_rms(stack: np.ndarray) -> np.ndarray:
    """RMS over the inner pixels of each difference of successive frames (T - 1,), by blocks."""
    n = stack.shape[0]
    out = np.empty(max(n - 1, 0))
    for start in range(0, n - 1, _REDUCE_FRAMES):
        stop = min(start + _REDUCE_FRAMES, n - 1)
        diff = (stack[start + 1 : stop + 1] - stack[start:stop])[:, 2:-2, 2:-2]
        out[start:stop] = np.sqrt(np.mean(diff**2, axis=(1, 2)))
    return out


def _activity_in_place(aligned: np.ndarray, ref: np.ndarray) -> np.ndarray:
    """``|aligned - ref|`` (float32) written over ``aligned``, which is not needed after."""
    np.subtract(aligned, ref.astype(aligned.dtype), out=aligned)
    return np.abs(aligned, out=aligned)


def estimate_rest_template(
    source,
    *,
    rest_quantile: float = 0.25,
    max_rest_frames: int = 64,
    level_tilt: bool = True,
    lowres_px: int = 64,
    refresh_s: float = 0.0,
    times_s: np.ndarray | None = None,
    max_lowres_mb: float = 16.0,
    workers: int = 1,
    progress: bool = False,
    meanwhile=None,
) -> RestTemplate:
    """Find the resting frames of a recording and average them into a rest template.

    Parameters
    ----------
    source : beatlab.frames.OPDSource
        Streams OPD frames (nm) in chunks; ``source.frame(i)`` gives one frame.
    rest_quantile : float
        Share of the frames, those closest to the relaxed state, taken as resting frames.
    max_rest_frames : int
        At most this many resting frames (evenly spaced in time) are averaged.
    level_tilt : bool
        Level offset and tilt of each frame, not only the offset.
    lowres_px : int
        The cheap pass works on frames block-averaged to about this size.
    refresh_s : float
        If > 0, also build one template per stretch of this many seconds from the resting
        frames inside it (:attr:`RestTemplate.segments`), so a slowly changing rest state
        (migration, focus drift) never accumulates into displacement. Needs ``times_s``.
    times_s : ndarray (T,), optional
        Frame times in seconds (for ``refresh_s``).
    max_lowres_mb : float
        Upper bound (MiB) of the block-averaged stack kept by the cheap pass; long recordings
        are block-averaged more coarsely to stay below it, so that the memory of an analysis
        does not grow with the length. 16 MiB keeps 64 x 64 px for 1,000 frames and gives
        32 x 32 px for 4,000 frames of a 256 px field.
    workers : int
        Forked worker processes (Linux) that read and block-average spans of the file (where
        the source allows forked reads); 1 reads here. From 400 frames on, the same number
        of workers, forked once for all three iterations, also do the phase correlation and
        levelling of the small frames, writing the levelled frames into shared memory (on
        1,000 frames of 512 x 512 px: the reference step took 1.37-1.56 s against 1.60-1.77 s
        in one process; forking new workers for every step had cost more than it saved).
        The result is the same either way.
    progress : bool
        Show a progress bar.
    meanwhile : callable, optional
        Called once in this process while forked workers read the file (before reading,
        without them): work for the next steps that would otherwise wait for the reading,
        such as loading compiled code.

    Returns
    -------
    RestTemplate

    Raises
    ------
    InputError
        If every frame is NaN.

    Notes
    -----
    Deviation of frame t: RMS over the block-averaged field of the levelled, drift-aligned
    difference to the current rest estimate. The first estimate is the mean of the frames at
    the relaxed end of the main activity axis (:func:`relaxed_score`), not the temporal
    median, which is a partly contracted state when beats fill most of the time; it is
    refined twice as the mean of the least-deviating ``rest_quantile`` of frames. Rigid
    shifts are measured by phase correlation (Kuglin & Hines 1975) on the block-averaged
    frames, so stage drift does not read as deviation nor blur the template.
    """
    ny, nx = source.shape
    factor = max(1, min(ny, nx) // max(int(lowres_px), 8))
    while (
        source.n_frames * (ny // factor) * (nx // factor) * 4 > max_lowres_mb * 2**20
        and min(ny, nx) // (factor + 1) >= 8
    ):
        factor += 1
    low = _low_resolution(source, factor, workers=workers, progress=progress, meanwhile=meanwhile)
    n = low.shape[0]
    if not np.isfinite(low).any():
        name = getattr(getattr(source, "recording", None), "source", "the recording")
        raise InputError(
            f"{name}: every pixel of every frame is NaN or infinite; nothing to analyse "
            "(check the export that wrote the file)"
        )
    window = cv2.createHanningWindow(low.shape[:0:-1], cv2.CV_64F)
    shifts = np.zeros((n, 2))
    deviation = np.zeros(n)
    rest = np.ones(n, dtype=bool)
    # each iteration's steps over the frames run in forked workers that stay for all three
    # (forked once: they inherit the small frames and write the aligned ones into shared
    # memory), or here for short recordings, where forking costs more than it saves
    processes = workers if n >= _FORK_MIN_FRAMES else 1
    # blocks: temporary copies stay small; at least two per worker, so that they finish together
    spans = _spans(n, max(-(-n // _REDUCE_FRAMES), 2 * processes if processes > 1 else 1))
    # one buffer for the aligned frames of every iteration (the previous ones are not needed
    # once the next reference is made): the pass holds two stacks, not three
    aligned = shared_array(low.shape, np.float32) if processes > 1 else np.empty_like(low)
    _JOB.update(low=low, window=window, aligned=aligned)
    try:
        with ForkPool(processes) as pool:
            # the first reference: each pixel's median over time, pixels shared by the workers
            pixels = _spans(low[0].size, 2 * processes if processes > 1 else 1)
            ref = np.concatenate(pool.map(_median_span, pixels)).reshape(low.shape[1:])
            settled = False  # no shift near the threshold: later rounds need not measure
            for iteration in range(3):
                if settled:
                    shifts[:] = 0.0
                    drifting = False
                else:
                    shifts = _measured_shifts(pool, spans, ref)
                    largest = float(np.max(np.hypot(shifts[:, 0], shifts[:, 1])))
                    # every frame is treated alike: shifting only some (even exactly, in
                    # Fourier space) changes their noise spectrum, a difference the activity
                    # axis would pick up
                    drifting = largest > _DRIFT_PX
                    settled = largest < _SETTLED_FRACTION * _DRIFT_PX
                    if not drifting:
                        shifts[:] = 0.0
                leveller = PlaneLeveller(
                    ref, tilt=level_tilt, step=1, max_pixels=_REST_LEVEL_PIXELS
                )
                jobs = [
                    (span, ref, leveller, shifts[span[0] : span[1]], drifting) for span in spans
                ]
                # each span written in place: memory stays that of one stack
                deviation = np.concatenate(pool.map(_aligned_and_deviation, jobs))
                if iteration == 0:
                    # the temporal median is a partly contracted state when beats fill most of
                    # the time; start from the relaxed end of the main activity axis instead
                    inner_px = aligned[0, 2:-2, 2:-2].size
                    score = relaxed_score(_inner_subset(aligned, _SCORE_PIXELS))
                    rest = score <= np.quantile(score, rest_quantile)
                else:
                    rest = deviation <= np.quantile(deviation, rest_quantile)
                ref = aligned[rest].mean(axis=0)
    finally:
        _JOB.clear()
    # noise floor of the deviation: consecutive resting frames differ by noise only
    diffs = _successive_rms(aligned)
    floor = float(np.median(diffs) / np.sqrt(2)) if n > 1 else 0.0
    rest_level = float(np.median(deviation[rest]))
    # a true rest: the culture comes back to (within noise of) its most relaxed state and
    # stays there for a share of the time; beats that overlap never do
    # noise along the first component of n frames of p pixels is inflated up to
    # (1 + sqrt(p / n)) times (Marchenko-Pastur edge) when there is no activity to align with
    p = min(inner_px, _SCORE_PIXELS)
    score_noise = max(floor, 1e-12) * (1.0 + np.sqrt(p / n))
    at_rest = float(np.mean(score <= _REST_NOISE_SDS * score_noise))
    method = "rest-frames" if at_rest >= _MIN_AT_REST else "least-deviating-frames"
    if method != "rest-frames":
        logger.info(
            "no frames at the noise floor (%.3g nm vs %.3g nm): using the least "
            "deviating frames as the rest state",
            rest_level,
            floor,
        )
    # full-resolution template from the chosen frames
    full_shifts = shifts * factor
    idx = _spread(np.flatnonzero(rest), max_rest_frames)
    template, noise_var, k = _average_frames(
        source, idx, full_shifts, level_tilt, anchor=np.zeros(2)
    )
    segments = []
    times = None if times_s is None else np.asarray(times_s, dtype=float) - times_s[0]
    if refresh_s > 0 and times is not None and times[-1] > 1.5 * refresh_s:
        edges = np.arange(0.0, times[-1] + refresh_s, refresh_s)
        edges[-1] = np.inf
        for lo, hi in itertools.pairwise(edges):
            span = np.flatnonzero((times >= lo) & (times < hi))
            if span.size < 4:  # a short last stretch joins the previous one
                if segments:
                    segments[-1] = replace(segments[-1], stop_s=float(hi))
                continue
            # the resting frames of this stretch, judged within it: the rest state of a
            # drifting recording differs from one stretch to the next
            local = _select_rest(aligned[span], rest_quantile)
            sel = _spread(span[local], max_rest_frames)
            anchor = np.median(full_shifts[sel], axis=0)
            seg_t, seg_var, _ = _average_frames(
                source, sel, full_shifts, level_tilt, anchor=anchor
            )
            segments.append(TemplateSegment(float(lo), float(hi), seg_t, seg_var, sel))
    return RestTemplate(
        template=template.astype(np.float32),
        rest=rest,
        deviation=deviation,
        shifts_px=full_shifts,
        noise_var=noise_var.astype(np.float32),
        n_frames_used=int(k),
        template_frames=idx,
        method=method,
        segments=tuple(segments),
        activity=_activity_in_place(aligned, ref),
        info={
            "deviation_floor_nm": floor,
            "rest_deviation_nm": rest_level,
            "at_rest_fraction": at_rest,
            "block_factor": factor,
        },
    )
