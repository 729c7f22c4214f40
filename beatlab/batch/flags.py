"""Quality flags of one recording's result: what a screen should look at before trusting it.

A flag never drops a recording: it is listed in ``recordings.csv`` (``quality_flags``) so
that a reviewer can exclude the recording in the layout (``exclude``, ``exclude_reason``) and
re-run ``beatlab compare``.
"""

from __future__ import annotations

import math
from collections.abc import Mapping

import pandas as pd

__all__ = ["FLAG_RULES", "QUALITY_COLUMNS", "quality_columns"]

#: Thresholds of the flags (documented in docs/batch.md).
FLAG_RULES = {
    "few beats": "1 or 2 beats: too few for intervals and rhythm indices",
    "low snr": "quality_snr below 10: landmarks and amplitudes are noisy",
    "drift": "quality_drift_max_um above 2 um: strong stage drift was removed",
    "small mask": "quality_masked_fraction below 0.02: few cell pixels analysed",
    "mixed regions": "two or more regions beat on their own: whole-field metrics mix rhythms",
    "velocity unresolved": "the frame rate does not resolve some strokes (velocities null)",
}
_MIN_BEATS = 3
_MIN_SNR = 10.0
_MAX_DRIFT_UM = 2.0
_MIN_MASKED = 0.02

QUALITY_COLUMNS = ("n_beating_regions", "mixed", "quality_flags")
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
    return {
        "n_beating_regions": beating,
        "mixed": beating >= 2,
        "quality_flags": "; ".join(flags),
    }
