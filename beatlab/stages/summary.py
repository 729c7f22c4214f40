"""Stage: the recording-level summary (``summary.json``), built in one place."""

from __future__ import annotations

import numpy as np

from beatlab._version import __version__
from beatlab.io.writers import json_ready
from beatlab.output import CAUTION
from beatlab.settings import Settings
from beatlab.stages.frame_pass import FrameSignals
from beatlab.stages.reference import Reference
from beatlab.stages.trace import MIN_PATTERN_SNR, TraceResult

__all__ = [
    "MIN_EPISODES",
    "MIN_GRID_PX",
    "MIN_TRUSTED_SNR",
    "contraction_episodes",
    "quality_checks",
    "summarize",
]

#: Below this SNR the beats of a beating recording may be missed or invented.
MIN_TRUSTED_SNR = 6.0
#: An analysis grid with a shorter side than this is too coarse for optical flow.
MIN_GRID_PX = 32
#: A pattern built in this many separate episodes or more recurs, as beats do.
MIN_EPISODES = 3


def contraction_episodes(pattern_frames, *, gap_frames: int = 2) -> int:
    """Separate runs of the pattern's frames (consecutive up to `gap_frames` apart).

    Beats, however faint, give one run per beat; a slow drift, which also builds a
    pattern, gives one run at an end of the recording.
    """
    frames = np.sort(np.asarray(pattern_frames, dtype=int).ravel())
    if frames.size == 0:
        return 0
    return 1 + int(np.sum(np.diff(frames) > gap_frames))


def quality_checks(
    *, beat_count: int, snr, grid_shape_px, pattern_snr=None, pattern_frames=()
) -> list[str]:
    """What a reader must check before trusting a recording's numbers.

    Parameters
    ----------
    beat_count : int
        Beats found.
    snr : float or None
        Median beat displacement / trace noise.
    grid_shape_px : (int, int)
        Shape of the analysis grid (after reconstruction and binning).
    pattern_snr : float or None
        The trace at the contraction pattern's own frames / trace noise.
    pattern_frames : array_like of int
        The frames that built the contraction pattern.

    Returns
    -------
    list of str
        ``"low snr"`` when beats were found at an SNR below :data:`MIN_TRUSTED_SNR` (some may
        be missed or invented); ``"coarse grid"`` when the short side of the analysis grid
        is below :data:`MIN_GRID_PX` px (optical flow sees too few pixels per cell: motion
        is smoothed and may be missed); ``"possible missed beats"`` when no beat was found
        although the frames hold a contraction-like pattern (``pattern_snr`` at least
        :data:`beatlab.stages.trace.MIN_PATTERN_SNR`; on frames of noise alone it stays
        near 0) built in :data:`MIN_EPISODES` separate episodes or more (a drift builds
        one): a faint culture may beat below the detection threshold.
    """
    checks = []
    strong = pattern_snr is not None and pattern_snr >= MIN_PATTERN_SNR
    if beat_count == 0 and strong and contraction_episodes(pattern_frames) >= MIN_EPISODES:
        checks.append("possible missed beats")
    if beat_count > 0 and not (snr is not None and snr >= MIN_TRUSTED_SNR):
        checks.append("low snr")
    if min(int(n) for n in grid_shape_px) < MIN_GRID_PX:
        checks.append("coarse grid")
    return checks


_SOURCES = ("format", "fps_source", "pixel_size_source", "wavelength_source", "kind_source")


def _quality(
    trace: TraceResult, frames: FrameSignals, reference: Reference, recording, source
) -> dict:
    rest = reference.rest
    drift_um = (frames.drift_px - frames.drift_px[0]) * frames.pixel_size_um
    finite = np.isfinite(drift_um).all(axis=1)
    return {
        "snr": trace.summary["snr"],
        "trace_noise_um": trace.summary["trace_noise_um"],
        "pattern_snr": trace.summary["pattern_snr"],
        "velocity_unresolved_beats": int((~trace.beats["velocity_resolved"].astype(bool)).sum())
        if "velocity_resolved" in trace.beats
        else 0,
        "drift_max_um": float(np.max(np.hypot(*drift_um[finite].T))) if finite.any() else None,
        "drift_net_um": [float(drift_um[-1, 0]), float(drift_um[-1, 1])],
        "masked_fraction": reference.cells.masked_fraction,
        "mask_method": reference.cells.method,
        "drift_reference": frames.drift_reference,
        "clipped_fraction": float(np.mean(frames.clipped_fraction)),
        "template_clipped_fraction": frames.template_clipped_fraction,
        "rest_template_method": rest.method,
        "rest_frames": int(rest.rest.sum()),
        "template_frames": int(rest.n_frames_used),
        "template_segments": [
            {"start_s": seg.start_s, "stop_s": seg.stop_s, "frames": int(seg.frames.size)}
            for seg in rest.segments
        ],
        "frame_noise_nm": frames.frame_noise_nm,
        "uneven_timing": recording.uneven_timing,
        "checks": "; ".join(
            quality_checks(
                beat_count=len(trace.beats),
                snr=trace.summary["snr"],
                grid_shape_px=source.shape,
                pattern_snr=trace.summary["pattern_snr"],
                pattern_frames=frames.pattern_frames,
            )
        ),
    }


def _metadata(recording, source) -> dict:
    meta = {
        "source": recording.source,
        "kind": recording.kind,
        "fps": recording.fps,
        "frames": recording.n_frames,
        "duration_s": recording.duration_s,
        "frame_shape_px": list(recording.shape),
        "pixel_size_um": recording.pixel_size_um,
        "analysis_pixel_size_um": float(source.pixel_size_um),
        "analysis_shape_px": list(source.shape),
        "analysis_bin": int(source.bin),
        "wavelength_nm": recording.wavelength_nm,
        "sources": {key: recording.metadata.get(key) for key in _SOURCES},
    }
    if source.reconstructor is not None:
        recon = source.reconstructor
        meta["holography"] = {
            "carrier": [float(c) for c in np.ravel(recon.carrier)],
            "sign": int(recon.sign),
        }
    return meta


def summarize(
    trace: TraceResult,
    frames: FrameSignals,
    reference: Reference,
    *,
    maps: dict,
    n_regions: int,
    recording,
    source,
    settings: Settings,
    warnings: list[str],
) -> dict:
    """The JSON-ready summary of one recording (keys in ``beatlab.schema`` order).

    Parameters
    ----------
    trace : TraceResult
        The whole-mask analysis (its rhythm keys lead the summary; its ``snr`` and
        ``trace_noise_um`` go to ``quality``).
    frames : FrameSignals
        Drift, clipping and noise of the per-frame pass.
    reference : Reference
        Mask, rest template and its method.
    maps : dict
        From :func:`beatlab.maps.build_maps` (``beating_area_fraction``, ``propagation``).
    n_regions : int
        Independently beating regions found.
    recording : Recording
        The input (metadata used).
    source : OPDSource
        The OPD frames actually analysed (pixel size and shape after reconstruction).
    settings : Settings
        The full parameter set.
    warnings : list of str
        Every warning raised while analysing.

    Returns
    -------
    dict
        JSON-ready (NaN as None, numpy scalars as Python numbers).
    """
    moved = ("snr", "trace_noise_um", "pattern_snr")  # quality, not results
    metrics = {k: v for k, v in trace.summary.items() if k not in moved}
    return json_ready(
        {
            **metrics,
            "beating_area_fraction": maps["beating_area_fraction"],
            "n_regions": int(n_regions),
            "quality": _quality(trace, frames, reference, recording, source),
            "propagation": maps["propagation"],
            "metadata": _metadata(recording, source),
            "parameters": settings.to_dict(),
            "warnings": list(warnings),
            "beatlab_version": __version__,
            "caution": CAUTION,
        }
    )
