"""Stage: independently beating regions, each analysed like the whole field.

:func:`analyze_regions` groups the labels of the reference into regions by their traces
(:func:`beatlab.regions.find_regions`) and runs :func:`beatlab.stages.analyze_trace` on each
region's traces with the recording's settings.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from beatlab.regions import find_regions, region_table
from beatlab.schema import TABLES
from beatlab.settings import Settings
from beatlab.stages.frame_pass import FrameSignals
from beatlab.stages.reference import Reference
from beatlab.stages.trace import TraceResult, analyze_trace

__all__ = ["RegionResult", "analyze_regions", "empty_regions"]


@dataclass(frozen=True)
class RegionResult:
    """Regions and their beats.

    Attributes
    ----------
    table : pandas.DataFrame
        One row per region: ``region``, ``area_um2``, ``centroid_x_um``, ``centroid_y_um``,
        then the trace summary keys (:class:`beatlab.stages.TraceResult`).
    beats : pandas.DataFrame
        ``region`` then the per-beat columns, every region's beats.
    traces : pandas.DataFrame
        Long format: ``time_s``, ``region``, ``displacement_um``, ``velocity_um_s``,
        ``opd_change_nm`` (one row per frame and region).
    labels : ndarray of int (Y, X)
        Region of each pixel (0: none).
    results : tuple of TraceResult
        The analysis of each region, in region order.
    """

    table: pd.DataFrame
    beats: pd.DataFrame
    traces: pd.DataFrame
    labels: np.ndarray
    results: tuple[TraceResult, ...] = ()


def empty_regions(shape: tuple[int, int]) -> RegionResult:
    """No regions analysed: empty tables with the columns of the schema."""
    return RegionResult(
        table=pd.DataFrame(columns=list(TABLES["regions"].names())),
        beats=pd.DataFrame(columns=list(TABLES["region_beats"].names())),
        traces=pd.DataFrame(columns=list(TABLES["region_traces"].names())),
        labels=np.zeros(shape, dtype=np.int64),
    )


def analyze_regions(
    frames: FrameSignals,
    reference: Reference,
    *,
    times_s: np.ndarray,
    pixel_size_um: float,
    settings: Settings,
    start_s: float,
    end_s: float,
    whole: TraceResult | None = None,
) -> RegionResult:
    """Find the independently beating regions and analyse each one.

    Parameters
    ----------
    frames : FrameSignals
        Per-label traces from the per-frame pass.
    reference : Reference
        The labels and whether they are user regions (kept as they are, never merged).
    times_s : ndarray (T,)
        Frame times, s.
    pixel_size_um : float
        Sample-plane pixel size of the analysed frames, um.
    settings : Settings
        ``[regions]`` groups the labels; ``[velocity]``, ``[beats]`` and ``[rhythm]`` analyse
        each region exactly as the whole field.
    start_s, end_s : float
        Recording start and end, s.
    whole : TraceResult, optional
        The whole mask's analysis with the same settings and times: a region whose traces
        and pattern frames are exactly the whole mask's (one region covering every cell, the
        usual case) takes it instead of analysing the same numbers again.

    Returns
    -------
    RegionResult
        Empty tables when there are no labels, or automatic detection is off and no user
        regions were given.
    """
    n_labels = int(reference.labels.max())
    nothing_moved = len(frames.pattern_frames) == 0  # no pattern to project onto
    if not n_labels or nothing_moved or not (reference.user_regions or settings.regions.detect):
        return empty_regions(reference.labels.shape)
    user = reference.user_regions
    found = find_regions(
        reference.labels,
        frames.label_displacement_um,
        pixel_size_um=pixel_size_um,
        min_area_um2=0.0 if user else settings.regions.min_area_um2,
        merge_correlation=settings.regions.merge_correlation,
        merge=not user,
    )
    results = []
    beats, traces = [], []
    for number, members in enumerate(found.members, 1):
        trace, opd = frames.label_union_traces(members)
        pattern_frames = frames.union_pattern_frames(members)
        if whole is not None and _same_numbers(
            (trace, opd, pattern_frames),
            (frames.displacement_um, frames.opd_change_nm, frames.pattern_frames),
        ):
            res = whole
        else:
            res = analyze_trace(
                trace,
                opd,
                times_s,
                velocity=settings.velocity,
                beats=settings.beats,
                rhythm=settings.rhythm,
                start_s=start_s,
                end_s=end_s,
                pattern_frames=pattern_frames,
            )
        results.append(res)
        beats.append(res.beats.assign(region=number)[["region", *res.beats.columns]])
        traces.append(
            pd.DataFrame(
                {
                    "time_s": times_s,
                    "region": number,
                    "displacement_um": trace,
                    "velocity_um_s": res.velocity_um_s,
                    "opd_change_nm": opd,
                }
            )
        )
    if not results:
        return empty_regions(reference.labels.shape)
    return RegionResult(
        table=_float_columns(region_table(found, [r.summary for r in results])),
        beats=pd.concat(beats, ignore_index=True),
        traces=pd.concat(traces, ignore_index=True),
        labels=found.labels,
        results=tuple(results),
    )


def _same_numbers(arrays, others) -> bool:
    """Whether each array equals its counterpart exactly: same dtype, shape and values."""
    return all(
        np.asarray(a).dtype == np.asarray(b).dtype and np.array_equal(a, b)
        for a, b in zip(arrays, others, strict=True)
    )


def _float_columns(table: pd.DataFrame) -> pd.DataFrame:
    """The schema's float columns as floats, also where every region's value is undefined.

    A column of None (alternans_index of regions with too few beats, say) would otherwise be
    of object type in memory and float once read back from regions.csv.
    """
    kinds = {f.name: f.dtype for f in TABLES["regions"].columns}
    floats = [c for c in table.columns if kinds.get(c) == "float"]
    return table.assign(**{c: pd.to_numeric(table[c]).astype(float) for c in floats})
