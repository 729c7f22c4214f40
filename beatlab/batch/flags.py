"""Quality flags of one recording's result: what a screen should look at before trusting it.

A flag never drops a recording: it is listed in ``recordings.csv`` (``quality_flags``) so
that a reviewer can exclude the recording in the layout (``exclude``, ``exclude_reason``) and
re-run ``beatlab compare``.
"""

from __future__ import annotations

import math
from collections.abc import Mapping

import pandas as pd

__all__ = [
    "FLAG_RULES",
    "QUALITY_COLUMNS",
    "dominant_region",
    "quality_columns",
]

# regions.csv columns that stand for a recording-level column of another name
_REGION_AS_ROW = {"snr": "quality_snr", "trace_noise_um": "quality_trace_noise_um",
                  "pattern_snr": "quality_pattern_snr"}  # fmt: skip

#: Thresholds of the flags (documented in docs/batch.md).
FLAG_RULES = {
    "few beats": "1 or 2 beats: too few for intervals and rhythm indices",
    "low snr": "quality_snr below 10: landmarks and amplitudes are noisy",
    "drift": "quality_drift_max_um above 2 um: strong stage drift was removed",
    "small mask": "quality_masked_fraction below 0.02: few cell pixels analysed",
    "mixed regions": "two or more regions beat on their own: whole-field metrics mix rhythms",
    "velocity unresolved": "the frame rate does not resolve some strokes (velocities null)",
    "coarse grid": "the analysis grid is below 32 px a side: optical flow may miss motion",
    "possible missed beats": "no beats, yet a contraction-like pattern: beats may be missed",
}
_MIN_BEATS = 3
_MIN_SNR = 10.0  # noisy landmarks; below MIN_TRUSTED_SNR beats themselves are in doubt
_MAX_DRIFT_UM = 2.0
_MIN_MASKED = 0.02

QUALITY_COLUMNS = ("n_beating_regions", "mixed", "quality_flags", "measured_region")
"""Columns :func:`quality_columns` adds to a recording's row."""


def _number(row: Mapping, key: str) -> float:
    value = row.get(key)
    try:
        value = float(value)
    except (TypeError, ValueError):
        return math.nan
    return value


def quality_columns(row: Mapping, regions: pd.DataFrame) -> dict:
    """``n_beating_regions``, ``mixed`` and ``quality_flags`` of one recording.

    Parameters
    ----------
    row : Mapping
        The recording's ``Analysis.to_row()``.
    regions : pandas.DataFrame
        Its regions table (columns ``region``, ``beat_count``, ...).

    Returns
    -------
    dict
        ``n_beating_regions`` (regions with at least 2 beats), ``mixed`` (True when two or
        more regions beat on their own) and ``quality_flags`` (the names of
        :data:`FLAG_RULES` that apply, joined with ``"; "``; empty when none).
    """
    beating = 0
    if len(regions) and "beat_count" in regions:
        beating = int((pd.to_numeric(regions["beat_count"], errors="coerce") >= 2).sum())
    flags = []
    beats = _number(row, "beat_count")
    if 0 < beats < _MIN_BEATS:
        flags.append("few beats")
    snr = _number(row, "quality_snr")
    if beats > 0 and not snr >= _MIN_SNR:
        flags.append("low snr")
    if _number(row, "quality_drift_max_um") > _MAX_DRIFT_UM:
        flags.append("drift")
    if _number(row, "quality_masked_fraction") < _MIN_MASKED:
        flags.append("small mask")
    if beating >= 2:
        flags.append("mixed regions")
    if _number(row, "quality_velocity_unresolved_beats") > 0:
        flags.append("velocity unresolved")
    for check in ("coarse grid", "possible missed beats"):
        if check in str(row.get("quality_checks") or ""):
            flags.append(check)
    return {
        "n_beating_regions": beating,
        "mixed": beating >= 2,
        "quality_flags": "; ".join(flags),
        "measured_region": 0,
    }


def dominant_region(
    row: Mapping, regions: pd.DataFrame, region_beats: pd.DataFrame
) -> tuple[dict, pd.DataFrame]:
    """The recording's row and beats measured on its dominant region only.

    The dominant region is the largest (``area_um2``) of the regions with 2 beats or more,
    else the largest region. Every column of ``regions.csv`` replaces the recording-level
    column of the same meaning; ``measured_region`` names the region (0: the whole field, when
    there is no region).

    Returns
    -------
    (dict, pandas.DataFrame)
        The row and the region's beats (without the ``region`` column).
    """
    out = dict(row)
    if not len(regions):
        return out | {"measured_region": 0}, region_beats.iloc[:0]
    beating = regions[pd.to_numeric(regions["beat_count"], errors="coerce") >= 2]
    pool = beating if len(beating) else regions
    chosen = pool.loc[pd.to_numeric(pool["area_um2"], errors="coerce").idxmax()]
    for name, value in chosen.items():
        target = _REGION_AS_ROW.get(name, name)
        if target in out:
            out[target] = value.item() if hasattr(value, "item") else value
    number = int(chosen["region"])
    beats = region_beats[region_beats["region"] == number].drop(columns="region")
    return out | {"measured_region": number}, beats.reset_index(drop=True)
