"""Analyse one recording: the stages in order, from OPD frames to an :class:`Analysis`.

Each stage is a function in :mod:`beatlab.stages` with arrays (or the previous stage's frozen
result) in and a frozen result out; :func:`analyze` only calls them in order:

1. :func:`~beatlab.stages.open_source`: the recording as a stream of OPD frames (nm);
2. :func:`~beatlab.stages.prepare_reference`: rest template, cell mask, labels, drift pixels;
3. :func:`~beatlab.stages.measure_frames`: the per-frame pass (flow, drift, OPD change, tiles);
4. :func:`~beatlab.stages.analyze_trace`: velocity, beats, landmarks, rhythm of the whole mask;
5. :func:`beatlab.maps.build_maps`: tile maps and propagation;
6. :func:`~beatlab.stages.analyze_regions`: each independently beating region, like step 4;
7. :func:`~beatlab.stages.summarize`: ``summary.json``.

A batch worker calls :func:`analyze` (or these stages) once per recording.
"""

from __future__ import annotations

import contextlib
import os
import warnings
from collections.abc import Iterator

import numpy as np
import pandas as pd

from beatlab._progress import timed
from beatlab.errors import BeatlabWarning
from beatlab.io.recording import Recording
from beatlab.maps import build_maps
from beatlab.results import Analysis
from beatlab.settings import Settings, load_settings
from beatlab.stages import (
    analyze_regions,
    analyze_trace,
    measure_frames,
    open_source,
    prepare_reference,
    summarize,
)

__all__ = ["analyze"]


def _unique(caught: list[warnings.WarningMessage]) -> list[warnings.WarningMessage]:
    seen, kept = set(), []
    for w in caught:
        key = (w.category, str(w.message))
        if key not in seen:
            seen.add(key)
            kept.append(w)
    return kept


def _messages(caught: list[warnings.WarningMessage]) -> list[str]:
    """One line per distinct warning; other libraries' warnings name their category."""
    return [
        str(w.message)
        if issubclass(w.category, BeatlabWarning)
        else f"{w.category.__name__}: {w.message}"
        for w in _unique(caught)
    ]


def _warn_if_untrustworthy(whole, source, pattern_frames) -> None:
    """Warn of each quality check that fails (low snr, coarse grid): the numbers may be wrong."""
    from beatlab.stages.summary import MIN_GRID_PX, MIN_TRUSTED_SNR, quality_checks

    checks = quality_checks(
        beat_count=len(whole.beats),
        snr=whole.summary["snr"],
        grid_shape_px=source.shape,
        pattern_snr=whole.summary["pattern_snr"],
        pattern_frames=pattern_frames,
    )
    if "possible missed beats" in checks:
        warnings.warn(
            BeatlabWarning(
                "no beats found, yet the frames hold a contraction-like pattern (pattern snr "
                f"{whole.summary['pattern_snr']:.1f}; frames of noise alone give about 0): a "
                "faint culture may beat below the detection threshold; check trace.png, or "
                "lower [beats] min_snr"
            ),
            stacklevel=3,
        )
    if "low snr" in checks:
        snr = whole.summary["snr"]
        warnings.warn(
            BeatlabWarning(
                f"low signal-to-noise ratio ({'n/a' if snr is None else f'{snr:.1f}'}, below "
                f"{MIN_TRUSTED_SNR:g}): beats may be missed or invented; check trace.png, and "
                "record longer exposures, more cells or a steadier stage"
            ),
            stacklevel=3,
        )
    if "coarse grid" in checks:
        ny, nx = source.shape
        warnings.warn(
            BeatlabWarning(
                f"the analysis grid is only {nx} x {ny} px ({source.pixel_size_um:.2f} um per "
                f"pixel, below {MIN_GRID_PX} px a side): optical flow sees too few pixels per "
                "cell and may smooth or miss the motion; record larger frames, or holograms "
                "with finer fringes (a wider sideband)"
            ),
            stacklevel=3,
        )


def _no_propagation_across_regions(maps: dict) -> dict:
    """Onset delays between regions that beat on their own are no propagation: unresolved."""
    prop = dict(maps["propagation"])
    if not prop.get("resolved"):
        return maps
    prop.update(
        resolved=False,
        speed_cm_s=None,
        direction_deg=None,
        reason="regions beat on their own: delays between them are not a propagating wave",
    )
    return {**maps, "propagation": prop}


def _warn_if_mixed(regions: pd.DataFrame) -> bool:
    """Warn when two or more regions beat on their own (whole-field numbers mix them).

    Returns
    -------
    bool
        Whether they do.
    """
    from beatlab.results import beating_regions

    beating = beating_regions(regions)
    if len(beating) < 2:
        return False
    rates = ", ".join(
        f"region {int(r.region)} at {r.beat_rate_bpm:.1f} bpm"
        if np.isfinite(r.beat_rate_bpm)
        else f"region {int(r.region)}"
        for r in beating.sort_values("region").itertuples()
    )
    warnings.warn(
        BeatlabWarning(
            f"{len(beating)} regions beat on their own ({rates}): the whole-field beats and "
            "rhythm mix them; use each region's numbers (regions.csv, region_beats.csv)"
        ),
        stacklevel=3,
    )
    return True


@contextlib.contextmanager
def _recorded_warnings() -> Iterator[list[warnings.WarningMessage]]:
    """Record every warning raised inside, then raise each distinct one again on the way out.

    The analysis keeps them as results (``summary["warnings"]``) and the caller still sees
    them (the command line prints them).
    """
    caught: list[warnings.WarningMessage] = []
    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            yield caught
    finally:
        for w in _unique(caught):
            warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)


def analyze(
    recording: Recording | str | os.PathLike,
    config: Settings | dict | str | os.PathLike | None = None,
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
    config : Settings, dict, path-like or None
        Settings, parameter overrides (nested dict or TOML file), or None for the defaults.
    kind, fps, pixel_size_um, wavelength_nm : optional
        Override the file's metadata (used when ``recording`` is a path).
    reference : path-like or ndarray (R, Y, X), optional
        Sample-free hologram frame(s) for ``kind='hologram'``.
    regions : path-like or ndarray (Y, X) of int, optional
        A label image of user regions (0 outside); each region is analysed on its own.
    workers : int, optional
        Parallel workers for the per-frame pass (default: number of CPUs, at most 4; forked
        processes on Linux, threads elsewhere); 1 keeps everything in this process (what a
        batch worker wants).
    progress : bool
        Show progress bars.

    Returns
    -------
    Analysis
        Every warning raised on the way is also in ``summary["warnings"]``.

    Raises
    ------
    InputError
        Unreadable or too-short input, missing metadata, all-NaN frames.
    ConfigError
        An unknown or invalid configuration key.
    """
    settings = load_settings(config)
    with _recorded_warnings() as caught:
        with timed("stage open"):
            rec, source = open_source(
                recording, settings, kind=kind, fps=fps, pixel_size_um=pixel_size_um,
                wavelength_nm=wavelength_nm, reference=reference,
            )  # fmt: skip
        times = np.asarray(rec.times_s, dtype=float)
        start_s, end_s = float(times[0]), float(times[-1] + 1.0 / rec.fps)
        with timed("stage reference"):
            ref = prepare_reference(
                source, times_s=times, settings=settings, regions=regions, workers=workers,
                progress=progress,
            )  # fmt: skip
        with timed("stage frames"):
            frames = measure_frames(
                source, ref, times_s=times, settings=settings, workers=workers,
                progress=progress,
            )  # fmt: skip
        with timed("stage beats, maps, regions"):
            whole = analyze_trace(
                frames.displacement_um, frames.opd_change_nm, times, velocity=settings.velocity,
                beats=settings.beats, rhythm=settings.rhythm, start_s=start_s, end_s=end_s,
                pattern_frames=frames.pattern_frames,
            )  # fmt: skip
            _warn_if_untrustworthy(whole, source, frames.pattern_frames)
            maps = build_maps(
                frames.tile_traces_um, times, grid_shape=frames.tile_grid, tile_um=frames.tile_um,
                onsets_s=whole.beats["onset_s"].to_numpy(float),
                peaks_s=whole.beats["peak_s"].to_numpy(float), rest_frames=ref.rest.rest,
                tile_coverage=frames.tile_coverage, min_snr=settings.maps.min_snr,
            )  # fmt: skip
            found = analyze_regions(
                frames, ref, times_s=times, pixel_size_um=float(source.pixel_size_um),
                settings=settings, start_s=start_s, end_s=end_s, whole=whole,
            )  # fmt: skip
            if _warn_if_mixed(found.table):
                maps = _no_propagation_across_regions(maps)
            summary = summarize(
                whole, frames, ref, maps=maps, n_regions=len(found.table), recording=rec,
                source=source, settings=settings, warnings=_messages(caught),
            )  # fmt: skip
    drift_um = (frames.drift_px - frames.drift_px[0]) * float(source.pixel_size_um)
    trace = pd.DataFrame(
        {
            "time_s": times,
            "displacement_um": frames.displacement_um,
            "velocity_um_s": whole.velocity_um_s,
            "opd_change_nm": frames.opd_change_nm,
            "drift_x_um": drift_um[:, 0],
            "drift_y_um": drift_um[:, 1],
        }
    )
    return Analysis(
        trace=trace, beats=whole.beats, summary=summary, average_beat=whole.average_beat,
        maps=maps, regions=found.table, region_beats=found.beats, region_traces=found.traces,
        mask=ref.mask, template=ref.template, region_labels=found.labels,
    )  # fmt: skip
