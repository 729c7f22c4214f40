"""Analyse one recording: OPD frames -> rest template -> contraction traces -> beats -> rhythm.

:func:`analyze` runs the stages in order and returns an :class:`Analysis`, whose
:meth:`Analysis.save` writes the files of the output contract.
"""

from __future__ import annotations

import logging
import os
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
from scipy import ndimage

from beatlab._version import __version__
from beatlab.beats import average_beat, detect_beats, estimate_noise, measure_beats
from beatlab.config import load_config
from beatlab.errors import InputError
from beatlab.frames import OPDSource
from beatlab.io import open_recording
from beatlab.io.recording import Recording
from beatlab.opd import check_cell_sign
from beatlab.regions import find_regions, region_table, split_regions
from beatlab.rhythm import summarize_rhythm
from beatlab.signals.flow import FlowTracker
from beatlab.signals.level import PlaneLeveller
from beatlab.signals.maps import build_maps, tile_labels, tile_means
from beatlab.signals.mask import make_cell_mask
from beatlab.signals.rest import estimate_rest_template, shift_image
from beatlab.signals.traces import opd_change_trace, velocity_trace

__all__ = ["Analysis", "analyze"]

logger = logging.getLogger(__name__)


@dataclass
class Analysis:
    """The result of analysing one recording.

    Attributes
    ----------
    trace : pandas.DataFrame
        One row per frame: ``time_s``, ``displacement_um``, ``velocity_um_s``,
        ``opd_change_nm`` (plus ``drift_x_um``, ``drift_y_um``).
    beats : pandas.DataFrame
        One row per beat, the columns of the output contract.
    summary : dict
        Recording-level results, quality, metadata used and parameters (JSON-ready).
    average_beat : pandas.DataFrame
        Ensemble-average beat aligned at onset (``time_s``, mean and SD of each trace).
    maps : dict
        Spatial maps (arrays on the tile grid) and the propagation estimate.
    regions : pandas.DataFrame
        One row per independently beating region.
    region_beats, region_traces : pandas.DataFrame
        Per-beat rows with a ``region`` column; per-frame traces per region.
    mask : ndarray of bool (Y, X)
        The analysis mask.
    template : ndarray (Y, X)
        The rest template (nm).
    """

    trace: pd.DataFrame
    beats: pd.DataFrame
    summary: dict
    average_beat: pd.DataFrame
    maps: dict
    regions: pd.DataFrame
    region_beats: pd.DataFrame
    region_traces: pd.DataFrame
    mask: np.ndarray = field(repr=False)
    template: np.ndarray = field(repr=False)
    region_labels: np.ndarray = field(repr=False, default=None)

    def save(self, out_dir: str | os.PathLike, *, figures: bool = True) -> dict[str, Path]:
        """Write the output files into ``out_dir`` (created if needed), each atomically.

        Returns
        -------
        dict
            File role -> path.
        """
        from beatlab.output import save_analysis

        return save_analysis(self, out_dir, figures=figures)


def _beats_and_summary(
    trace: np.ndarray,
    times_s: np.ndarray,
    velocity: np.ndarray,
    opd_change: np.ndarray,
    cfg: dict,
    start_s: float,
    end_s: float,
) -> tuple[pd.DataFrame, dict]:
    b = cfg["beats"]
    r = cfg["rhythm"]
    finite = np.isfinite(trace)
    work = (
        np.where(finite, trace, np.interp(times_s, times_s[finite], trace[finite]))
        if not finite.all() and finite.sum() >= 2
        else trace
    )
    peaks = detect_beats(
        work,
        times_s,
        max_rate_bpm=b["max_rate_bpm"],
        min_snr=b["min_snr"],
        min_relative_prominence=b["min_relative_prominence"],
    )
    beats = measure_beats(
        work,
        times_s,
        peaks,
        velocity=velocity,
        opd_change=opd_change,
        secondary_prominence=b["secondary_prominence"],
        secondary_min_level=b["secondary_min_level"],
        irregular_tolerance=b["irregular_tolerance"],
        interpolation=b["interpolation"],
    )
    summary = summarize_rhythm(
        beats,
        start_s=start_s,
        end_s=end_s,
        irregular_cv=r["irregular_cv"],
        irregular_fraction_max=r["irregular_fraction_max"],
        pause_factor=r["pause_factor"],
    )
    noise = float(estimate_noise(work))
    amp = summary.get("displacement_um")
    summary["trace_noise_um"] = noise
    summary["snr"] = (float(amp) / noise) if (amp is not None and noise > 0) else None
    return beats, summary


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
    if rigid == "median":
        return None, "field median"
    return cells.mask, "cell median"


def _flow_scale(template, flow_cfg: dict, noise_var) -> tuple[float, float]:
    """One 8-bit mapping per recording: template percentiles widened by 4 frame-noise SDs.

    The template is an average and far smoother than a single frame; without the margin, the
    noise of every frame would clip wherever the percentile falls on a flat background.
    """
    finite = template[np.isfinite(template)]
    lo, hi = np.percentile(finite, [flow_cfg["percentile_low"], flow_cfg["percentile_high"]])
    sd = float(np.sqrt(np.nanmedian(noise_var))) if np.isfinite(noise_var).any() else 0.0
    lo, hi = float(lo) - 4 * sd, float(hi) + 4 * sd
    if not hi > lo:
        lo, hi = lo - 1.0, hi + 1.0
    return lo, hi


def _load_regions(path, shape) -> np.ndarray:
    rec = open_recording(path, fps=1.0)
    labels = np.asarray(rec.frames.read(0, 1)[0])
    if labels.shape != tuple(shape):
        raise InputError(
            f"--regions {path}: label image shape {labels.shape} differs from the "
            f"analysed frames {tuple(shape)}; give a label image of the same size"
        )
    if not np.issubdtype(labels.dtype, np.integer):
        if not np.allclose(labels, np.round(labels)):
            raise InputError(
                f"--regions {path}: not a label image (non-integer values); give "
                "an integer image with 0 outside regions and 1..n inside"
            )
    return np.round(labels).astype(np.int64)


def analyze(
    recording: Recording | str | os.PathLike,
    config: dict | str | os.PathLike | None = None,
    *,
    kind: str | None = None,
    fps: float | None = None,
    pixel_size_um: float | None = None,
    wavelength_nm: float | None = None,
    reference: str | os.PathLike | np.ndarray | None = None,
    regions: str | os.PathLike | np.ndarray | None = None,
    workers: int | None = None,
    progress: bool = False,
) -> Analysis:
    """Find every beat in one recording and measure it.

    Parameters
    ----------
    recording : Recording or path-like
        An opened recording or a path for :func:`beatlab.open_recording`.
    config : dict, path-like or None
        Parameter overrides (nested dict or TOML file); defaults otherwise.
    kind, fps, pixel_size_um, wavelength_nm : optional
        Override the file's metadata (used when ``recording`` is a path).
    reference : path-like or ndarray (R, Y, X), optional
        Sample-free hologram frame(s) for ``kind='hologram'``.
    regions : path-like or ndarray (Y, X) of int, optional
        A label image of user regions (0 outside); each region is analysed on its own.
    workers : int, optional
        Threads for frame-level work (default: number of CPUs, at most 4).
    progress : bool
        Show progress bars.

    Returns
    -------
    Analysis

    Raises
    ------
    InputError
        Unreadable or too-short input, missing metadata (naming the flag), all-NaN frames.

    Notes
    -----
    Two streaming passes over the frames, each holding one chunk plus the template: a cheap
    pass on block-averaged frames finds the resting frames and builds the rest template
    (:func:`beatlab.signals.rest.estimate_rest_template`); the main pass levels each frame
    against it, measures the optical flow from the template (rigid shift removed), the OPD
    change and the tile and region reductions for maps and regions.
    """
    from tqdm.auto import tqdm

    cfg = load_config(config)
    rec = (
        recording
        if isinstance(recording, Recording)
        else open_recording(
            recording, kind=kind, fps=fps, pixel_size_um=pixel_size_um, wavelength_nm=wavelength_nm
        )
    )
    rec.require("fps", "pixel_size_um")
    if rec.n_frames < cfg["input"]["min_frames"]:
        raise InputError(
            f"{rec.source}: only {rec.n_frames} frames; at least "
            f"{cfg['input']['min_frames']} are needed (a few beats' worth)"
        )
    holo = None
    if rec.kind == "hologram":
        from beatlab.holography import load_reference, reconstructor_options

        if isinstance(reference, (str, os.PathLike)):
            reference = load_reference(reference)
        holo = reconstructor_options(cfg["holography"])
    source = OPDSource(
        rec,
        opd_scale=cfg["input"]["opd_scale"],
        phase_scale=cfg["input"]["phase_scale"],
        reference=reference,
        holography=holo,
        chunk_frames=cfg["input"]["chunk_frames"],
    )
    px_um = float(source.pixel_size_um)
    times = np.asarray(rec.times_s, dtype=float)
    n = rec.n_frames
    t_cfg = cfg["template"]
    rest = estimate_rest_template(
        source,
        rest_quantile=t_cfg["rest_quantile"],
        max_rest_frames=t_cfg["max_rest_frames"],
        level_tilt=t_cfg["level_tilt"],
        refresh_s=t_cfg["refresh_s"],
        times_s=times,
        progress=progress,
    )
    template = rest.template
    if rec.kind != "hologram":  # holograms choose their side-band so that cells are positive
        check_cell_sign(template, source=rec.source)
    if not np.isfinite(template).any():
        raise InputError(f"{rec.source}: the rest template is all NaN; nothing to analyse")
    m_cfg = cfg["mask"]
    template_noise = (
        float(np.sqrt(np.nanmedian(rest.noise_var) / rest.n_frames_used))
        if rest.n_frames_used > 1
        else None
    )
    cells = make_cell_mask(
        template,
        pixel_size_um=px_um,
        method=m_cfg["method"],
        threshold_sigma=m_cfg["threshold_sigma"],
        min_area_um2=m_cfg["min_area_um2"],
        confluent_fraction=m_cfg["confluent_fraction"],
        noise_nm=template_noise,
    )
    mask = cells.mask
    if not mask.any():
        raise InputError(
            f"{rec.source}: no cells found in the field (mask empty); try "
            '[mask] method = "all" in a --config file'
        )
    user_regions = regions is not None
    if user_regions:
        labels = (
            regions if isinstance(regions, np.ndarray) else _load_regions(regions, source.shape)
        )
        labels = np.where(np.isfinite(template), labels, 0).astype(np.int64)
    else:
        labels = cells.labels if cells.method == "threshold" else mask.astype(np.int64)
        if cfg["regions"]["detect"] and rest.activity is not None:
            # one connected cluster (or a confluent sheet) may hold parts beating on their own
            labels = split_regions(
                labels,
                ndimage.uniform_filter1d(rest.activity, 3, axis=0),
                block_px=int(rest.info["block_factor"]),
                min_area_px=cfg["regions"]["min_area_um2"] / px_um**2,
                merge_correlation=cfg["regions"]["merge_correlation"],
                active=lambda trace: detect_beats(trace, times).size >= 2,
            )
    n_labels = int(labels.max())
    flow_cfg = cfg["flow"]
    rigid = flow_cfg["rigid"]
    rigid_pixels, rigid_source = _rigid_reference(template, cells, rigid, template_noise)
    scale = _flow_scale(template, flow_cfg, rest.noise_var)

    def reference(tmpl):
        tracker = FlowTracker(
            tmpl,
            mask,
            pixel_size_um=px_um,
            method=flow_cfg["method"],
            preset=flow_cfg["preset"],
            refine_iterations=flow_cfg["refine_iterations"],
            window_px=flow_cfg["window_px"],
            scale=scale,
            background=rigid_pixels,
        )
        return tmpl, PlaneLeveller(tmpl, tilt=t_cfg["level_tilt"]), tracker

    # one reference (template, leveller, flow tracker), or one per refresh segment
    refs = [reference(seg.template) for seg in rest.segments] or [reference(template)]
    frame_ref = np.maximum(rest.segment_of(times), 0)
    tracker = refs[0][2]
    tile_px = max(4, round(cfg["maps"]["tile_um"] / px_um))
    tiles = tile_labels(source.shape, tile_px=tile_px)
    n_tiles = int(tiles.max()) + 1
    grid_shape = (-(-source.shape[0] // tile_px), -(-source.shape[1] // tile_px))
    coverage = tile_means(mask.astype(np.float32), tiles, n_tiles)
    label_area = np.bincount(labels.ravel(), minlength=n_labels + 1).astype(float)
    mask_flat = mask.ravel()

    disp = np.full(n, np.nan)
    shifts = np.zeros((n, 2))
    ms = np.full(n, np.nan)
    clipped = np.zeros(n)
    tile_tr = np.full((n, n_tiles), np.nan, dtype=np.float32)
    label_tr = np.full((n_labels, n), np.nan)
    label_ms = np.full((n_labels, n), np.nan)

    def one_frame(frame: np.ndarray, drift: np.ndarray | None, ref: int):
        template_i, leveller, tracker_i = refs[ref]
        lev = leveller.level(frame)
        meas = tracker_i.measure(lev)
        estimate = np.asarray(meas.rigid_shift_px, dtype=float)
        shift = estimate if drift is None else np.asarray(drift, dtype=float)
        if rigid == "none":
            shift = np.zeros(2)
        flow = meas.flow_px + (estimate - shift).astype(np.float32)
        mag = np.hypot(flow[..., 0], flow[..., 1]) * px_um
        inside = mag[mask]
        value = float(np.nanmean(inside)) if np.isfinite(inside).any() else np.nan
        aligned = shift_image(lev, -shift) if np.hypot(*shift) > 0.02 else lev
        sq = (aligned - template_i) ** 2
        tmean = tile_means(np.where(mask, mag, np.nan), tiles, n_tiles)
        msq = sq.ravel()[mask_flat]
        return (
            value,
            estimate if rigid == "none" else shift,
            float(np.nanmean(msq)) if np.isfinite(msq).any() else np.nan,
            meas.clipped_fraction,
            tmean,
            tile_means(mag, labels, n_labels + 1)[1:],
            tile_means(sq, labels, n_labels + 1)[1:],
        )

    def store(i, res):
        (disp[i], shifts[i], ms[i], clipped[i], tile_tr[i], label_tr[:, i], label_ms[:, i]) = res

    # Without a textured background, drift is measured where contraction is zero: at the
    # resting frames (median flow over the cells), and interpolated in time between them.
    rest_idx = np.flatnonzero(rest.rest)
    interpolate = (
        rigid_source == "cell median" and rest.method == "rest-frames" and rest_idx.size >= 2
    )
    if interpolate:
        rigid_source = "cell median at rest frames, interpolated"
    workers = workers or min(4, os.cpu_count() or 1)
    with (
        ThreadPoolExecutor(max_workers=workers) as pool,
        tqdm(total=n, desc="analysing", unit="frame", disable=not progress, leave=False) as bar,
    ):
        done = np.zeros(n, dtype=bool)

        def run(keep, drifts):
            for idx, frames in source.select_chunks(keep):
                args = (
                    frames,
                    [None if drifts is None else drifts[i] for i in idx],
                    frame_ref[idx],
                )
                for i, res in zip(idx, pool.map(one_frame, *args), strict=True):
                    store(i, res)
                bar.update(len(idx))

        drift_px = None
        if interpolate:
            done[rest_idx] = True
            run(done, None)
            drift_px = np.stack(
                [np.interp(times, times[rest_idx], shifts[rest_idx, c]) for c in (0, 1)], axis=1
            )
        run(~done, drift_px)
    if not np.isfinite(disp).any():
        raise InputError(f"{rec.source}: every frame is NaN inside the cell mask")

    # expected mean square of (frame - template) at rest: frame noise plus template noise;
    # frames averaged into the template share its noise (1 - 1/k), others add it (1 + 1/k)
    k = rest.n_frames_used
    sigma2 = float(np.nanmean(rest.noise_var[mask])) if k > 1 else 0.0
    used = np.zeros(n, dtype=bool)
    used[rest.template_frames] = True
    if rest.segments:
        used[:] = False
        for seg in rest.segments:
            used[seg.frames] = True
        k = int(np.median([seg.frames.size for seg in rest.segments]))
        # the whole-recording variance also holds the slow change of the rest state
        sigma2 = float(np.nanmean([np.nanmean(seg.noise_var[mask]) for seg in rest.segments]))
    factor = np.where(used, 1 - 1 / k, 1 + 1 / k) if k > 1 else np.ones(n)
    opd_change = opd_change_trace(ms, sigma2 * factor)
    v_cfg = cfg["velocity"]
    velocity = velocity_trace(
        np.nan_to_num(disp, nan=np.nanmedian(disp)),
        times,
        window_ms=v_cfg["window_ms"],
        polyorder=v_cfg["polyorder"],
    )
    start_s = float(times[0])
    end_s = float(times[-1] + 1.0 / rec.fps)
    beats, summary = _beats_and_summary(disp, times, velocity, opd_change, cfg, start_s, end_s)
    drift_um = (shifts - shifts[0]) * px_um
    trace = pd.DataFrame(
        {
            "time_s": times,
            "displacement_um": disp,
            "velocity_um_s": velocity,
            "opd_change_nm": opd_change,
            "drift_x_um": drift_um[:, 0],
            "drift_y_um": drift_um[:, 1],
        }
    )
    avg = average_beat(
        times,
        {"displacement_um": disp, "velocity_um_s": velocity, "opd_change_nm": opd_change},
        beats["onset_s"].dropna().to_numpy(),
    )

    # maps
    onsets = beats["onset_s"].to_numpy(dtype=float) if len(beats) else np.array([])
    peaks_s = beats["peak_s"].to_numpy(dtype=float) if len(beats) else np.array([])
    maps = build_maps(
        tile_tr,
        times,
        grid_shape=grid_shape,
        tile_um=tile_px * px_um,
        onsets_s=onsets,
        peaks_s=peaks_s,
        rest_frames=rest.rest,
        tile_coverage=coverage,
        min_snr=cfg["maps"]["min_snr"],
    )
    summary["beating_area_fraction"] = maps["beating_area_fraction"]

    # regions
    reg_cfg = cfg["regions"]
    region_summaries = []
    region_beats = []
    region_traces = {"time_s": times}
    region_set = None
    if n_labels and (user_regions or reg_cfg["detect"]):
        region_set = find_regions(
            labels,
            label_tr,
            pixel_size_um=px_um,
            min_area_um2=0.0 if user_regions else reg_cfg["min_area_um2"],
            merge_correlation=reg_cfg["merge_correlation"],
            merge=not user_regions,
        )
        for r_idx, members in enumerate(region_set.members, start=1):
            w = label_area[np.asarray(members)]
            msr = np.nansum(label_ms[np.asarray(members) - 1] * w[:, None], axis=0) / w.sum()
            r_opd = opd_change_trace(msr, sigma2 * factor)
            r_disp = np.asarray(region_set.traces[r_idx - 1], dtype=float)
            r_vel = velocity_trace(
                np.nan_to_num(r_disp, nan=np.nanmedian(r_disp)),
                times,
                window_ms=v_cfg["window_ms"],
                polyorder=v_cfg["polyorder"],
            )
            rb, rs = _beats_and_summary(r_disp, times, r_vel, r_opd, cfg, start_s, end_s)
            rb.insert(0, "region", r_idx)
            region_beats.append(rb)
            region_summaries.append(rs)
            region_traces[f"displacement_um_r{r_idx}"] = r_disp
            region_traces[f"velocity_um_s_r{r_idx}"] = r_vel
            region_traces[f"opd_change_nm_r{r_idx}"] = r_opd
    if region_set is not None:
        regions_df = region_table(region_set, region_summaries)
        region_labels = region_set.labels
    else:
        regions_df = pd.DataFrame(columns=["region", "area_um2", "centroid_x_um", "centroid_y_um"])
        region_labels = np.zeros(source.shape, dtype=np.int64)
    region_beats_df = (
        pd.concat(region_beats, ignore_index=True)
        if region_beats
        else pd.DataFrame(columns=["region", *beats.columns])
    )

    finite_shift = np.isfinite(drift_um).all(axis=1)
    summary.update(
        {
            "n_regions": len(regions_df),
            "quality": {
                "snr": summary.pop("snr"),
                "trace_noise_um": summary.pop("trace_noise_um"),
                "drift_max_um": float(np.max(np.hypot(*drift_um[finite_shift].T)))
                if finite_shift.any()
                else None,
                "drift_net_um": [float(drift_um[-1, 0]), float(drift_um[-1, 1])],
                "masked_fraction": cells.masked_fraction,
                "mask_method": cells.method,
                "drift_reference": rigid_source if rigid != "none" else "none",
                "clipped_fraction": float(np.mean(clipped)),
                "template_clipped_fraction": float(tracker.template_clipped_fraction),
                "rest_template_method": rest.method,
                "rest_frames": int(rest.rest.sum()),
                "template_frames": int(rest.n_frames_used),
                "template_segments": [
                    {"start_s": seg.start_s, "stop_s": seg.stop_s, "frames": int(seg.frames.size)}
                    for seg in rest.segments
                ],
                "frame_noise_nm": float(np.sqrt(sigma2)) if sigma2 > 0 else None,
                "uneven_timing": rec.uneven_timing,
            },
            "propagation": maps["propagation"],
            "metadata": {
                "source": rec.source,
                "kind": rec.kind,
                "fps": rec.fps,
                "frames": n,
                "duration_s": rec.duration_s,
                "frame_shape_px": list(rec.shape),
                "pixel_size_um": rec.pixel_size_um,
                "analysis_pixel_size_um": px_um,
                "analysis_shape_px": list(source.shape),
                "wavelength_nm": rec.wavelength_nm,
                "sources": {
                    key: rec.metadata.get(key)
                    for key in (
                        "format",
                        "fps_source",
                        "pixel_size_source",
                        "wavelength_source",
                        "kind_source",
                    )
                },
            },
            "parameters": cfg,
            "beatlab_version": __version__,
        }
    )
    if source.reconstructor is not None:
        recon = source.reconstructor
        summary["metadata"]["holography"] = {
            "carrier": [float(c) for c in np.ravel(recon.carrier)],
            "sign": int(recon.sign),
        }
    return Analysis(
        trace=trace,
        beats=beats,
        summary=summary,
        average_beat=avg,
        maps=maps,
        regions=regions_df,
        region_beats=region_beats_df,
        region_traces=pd.DataFrame(region_traces),
        mask=mask,
        template=template,
        region_labels=region_labels,
    )
