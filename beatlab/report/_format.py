"""Numbers, units and labels as a reader sees them in the report.

Values come from CSV cells (text), JSON (numbers, null) or pandas (NaN); every formatter takes
any of these and returns text. Units come from :mod:`beatlab.schema`, so a column keeps the unit
it has in the files.
"""

from __future__ import annotations

import math

import numpy as np

from beatlab.batch.wells import DIFFERENCE_METRICS
from beatlab.schema import (
    BEAT_FIELDS,
    METADATA_FIELDS,
    PROPAGATION_FIELDS,
    QUALITY_FIELDS,
    REGION_FIELDS,
    ROW_FIELDS,
    SUMMARY_FIELDS,
)

__all__ = [
    "MISSING",
    "as_float",
    "column_header",
    "format_number",
    "format_p",
    "is_missing",
    "known_metric",
    "metric_label",
    "metric_unit",
]

MISSING = "—"
"""Shown for an undefined value (empty cell, null, NaN)."""

_UNIT_TEXT = {"um": "µm", "um/s": "µm/s", "um^2": "µm²", "deg": "°"}
_NO_UNIT = {"1", "count", "bool", "text", "list", "dict"}
_UNITS: dict[str, str] = {}
for _field in (*METADATA_FIELDS, *REGION_FIELDS, *BEAT_FIELDS, *SUMMARY_FIELDS, *ROW_FIELDS):
    _UNITS.setdefault(_field.name, _field.unit)
for _field in QUALITY_FIELDS:
    _UNITS.setdefault(f"quality_{_field.name}", _field.unit)
for _field in PROPAGATION_FIELDS:
    _UNITS.setdefault(f"propagation_{_field.name}", _field.unit)
del _field

_LABELS = {
    "beat_count": "Beats",
    "beat_rate_bpm": "Beat rate",
    "longest_pause_s": "Longest pause",
    "ibi_count": "Intervals",
    "ibi_mean_s": "Mean IBI",
    "ibi_cv": "IBI CV",
    "sdnn_s": "SDNN",
    "rmssd_s": "RMSSD",
    "sd1_s": "Poincaré SD1",
    "sd2_s": "Poincaré SD2",
    "ibi_s": "IBI",
    "time_to_peak_s": "Time to peak",
    "relax_50_s": "Relaxation 50 %",
    "relax_90_s": "Relaxation 90 %",
    "duration_50_s": "Duration 50 %",
    "duration_90_s": "Duration 90 %",
    "displacement_um": "Displacement",
    "opd_change_nm": "OPD change",
    "contraction_velocity_um_s": "Contraction velocity",
    "relaxation_velocity_um_s": "Relaxation velocity",
    "duration_90_bazett_s": "Duration 90 %, Bazett",
    "duration_90_fridericia_s": "Duration 90 %, Fridericia",
    "duration_90_stv_s": "STV of duration 90 %",
    "irregular_fraction": "Irregular IBI fraction",
    "secondary_peak_beats": "Beats with secondary peak",
    "alternans_index": "Alternans index",
    "rhythm": "Rhythm",
    "beating_area_fraction": "Beating area fraction",
    "n_regions": "Regions",
    "snr": "SNR",
    "pattern_snr": "Pattern SNR",
    "trace_noise_um": "Trace noise",
    "drift_max_um": "Largest drift",
    "drift_net_um": "Net drift (x, y)",
    "masked_fraction": "Masked fraction",
    "clipped_fraction": "Clipped fraction",
    "template_clipped_fraction": "Template clipped fraction",
    "rest_template_method": "Rest template",
    "velocity_unresolved_beats": "Beats with unresolved velocity",
    "frame_noise_nm": "Frame noise",
    "speed_cm_s": "Speed",
    "direction_deg": "Direction",
    "r2": "r²",
    "delay_span_s": "Delay span",
    "n_tiles": "Tiles with an onset delay",
    "n_warnings": "Warnings",
    # columns of the statistics tables
    "metric": "Metric",
    "group": "Group",
    "n_wells": "Wells",
    "mean": "Mean",
    "sd": "SD",
    "median": "Median",
    "difference": "Difference",
    "percent_change": "Change vs control",
    "hedges_g": "Hedges' g",
    "test": "Test",
    "p": "p",
    "p_adj": "p_adj",
    "note": "Note",
}
_OTHER_UNITS = {"percent_change": "%"}
_SUFFIXES = ("_um_s", "_cm_s", "_bpm", "_um2", "_um", "_nm", "_px", "_deg", "_s")
_PREFIXES = ("quality_", "propagation_")


def is_missing(value) -> bool:
    """True for None, NaN, pandas NA and blank text.

    Parameters
    ----------
    value : object
        A table cell or JSON value.

    Returns
    -------
    bool
    """
    if value is None:
        return True
    if isinstance(value, str):
        return value.strip() == "" or value.strip().lower() in ("nan", "none", "null")
    try:
        return bool(value != value)  # NaN and pandas.NA (whose comparison is ambiguous)
    except TypeError:
        return True


def as_float(value) -> float:
    """The value as a float; NaN when it is missing or not a number.

    Parameters
    ----------
    value : object
        A number, numeric text (``"0.25"``) or anything else.

    Returns
    -------
    float
    """
    if is_missing(value) or isinstance(value, (bool, np.bool_)):
        return math.nan
    try:
        return float(value)
    except (TypeError, ValueError):
        return math.nan


def format_number(value, *, digits: int = 3) -> str:
    """A value as short text with `digits` significant digits.

    Parameters
    ----------
    value : object
        Number, numeric text, boolean (``True``/``"False"``) or other text.
    digits : int
        Significant digits of a number; integral parts are never rounded away
        (1234.56 at 3 digits reads ``1235``).

    Returns
    -------
    str
        :data:`MISSING` for a missing value, ``yes``/``no`` for booleans, text other than a
        number unchanged; numbers below 0.001 or from 1e6 up in scientific notation
        (``2.1e-05``), whole numbers without decimals.

    Examples
    --------
    >>> format_number(60.0274), format_number(0.38329), format_number("4.0"), format_number(None)
    ('60.0', '0.383', '4', '—')
    """
    if is_missing(value):
        return MISSING
    if isinstance(value, (bool, np.bool_)):
        return "yes" if value else "no"
    if isinstance(value, str) and value.strip() in ("True", "False", "true", "false"):
        return "yes" if value.strip().lower() == "true" else "no"
    number = as_float(value)
    if math.isnan(number):
        return str(value)
    if math.isinf(number):
        return "∞" if number > 0 else "−∞"
    magnitude = abs(number)
    if number == round(number) and magnitude < 1e6:
        return str(round(number))
    if magnitude < 1e-3 or magnitude >= 1e6:
        return f"{number:.{digits}g}"
    # digits from the rounded value, so 0.99954 reads 1.00, not 1.000
    rounded = abs(float(f"{number:.{digits}g}"))
    decimals = max(0, digits - 1 - math.floor(math.log10(rounded)))
    return f"{number:.{decimals}f}"


def format_p(value) -> str:
    """A p-value: two significant digits, ``< 0.001`` below 0.001.

    Parameters
    ----------
    value : object
        The p-value (number or numeric text).

    Returns
    -------
    str

    Examples
    --------
    >>> format_p(0.0067567), format_p(0.54101), format_p(2e-6), format_p("")
    ('0.0068', '0.54', '< 0.001', '—')
    """
    number = as_float(value)
    if math.isnan(number):
        return MISSING
    if number < 1e-3:
        return "< 0.001"
    return format_number(number, digits=2)


def _base_metric(name: str) -> tuple[str, str]:
    """(metric, suffix) for normalised columns: ``rate_bpm_norm`` -> (``rate_bpm``, ``norm``)."""
    for suffix in ("_norm", "_change"):
        if name.endswith(suffix) and name[: -len(suffix)] in _UNITS:
            return name[: -len(suffix)], suffix[1:]
    return name, ""


def known_metric(name: str) -> bool:
    """True when the column (or the metric of a ``_norm``/``_change`` column) is in the schema."""
    return _base_metric(name)[0] in _UNITS


def metric_unit(name: str) -> str:
    """The display unit of a column (``µm``, ``bpm``, ``%``), empty when it has none.

    Parameters
    ----------
    name : str
        Column or key name, as in the output files (``displacement_um``,
        ``beat_rate_bpm_norm``, ``quality_snr``).

    Returns
    -------
    str
        The schema's unit; ``%`` for a ``_change``/``_norm`` column of a metric normalised as a
        percentage, the metric's own unit for one normalised as a difference; empty for
        dimensionless, count, text and unknown columns.
    """
    base, kind = _base_metric(name)
    if kind and base not in DIFFERENCE_METRICS:
        return "%"
    if base in _OTHER_UNITS:
        return _OTHER_UNITS[base]
    unit = _UNITS.get(base)
    if unit is None:
        unit = next((s[1:].replace("_", "/") for s in _SUFFIXES if base.endswith(s)), "1")
        unit = {"um2": "um^2"}.get(unit, unit)
    if unit in _NO_UNIT:
        return ""
    return _UNIT_TEXT.get(unit, unit)


def metric_label(name: str) -> str:
    """A readable label of a column without its unit (``Duration 90 %, change``).

    Parameters
    ----------
    name : str
        Column or key name.

    Returns
    -------
    str
    """
    base, kind = _base_metric(name)
    stem = base
    for prefix in _PREFIXES:
        stem = stem.removeprefix(prefix)
    label = _LABELS.get(base, _LABELS.get(stem))
    if label is None:
        for suffix in _SUFFIXES:
            if stem.endswith(suffix):
                stem = stem[: -len(suffix)]
                break
        label = stem.replace("_", " ").strip().capitalize() or base
    kinds = {"norm": "normalised", "change": "change from baseline"}
    return f"{label}, {kinds[kind]}" if kind else label


def column_header(name: str) -> str:
    """Label and unit for a table header: ``Beat rate (bpm)``; the label alone without a unit.

    Parameters
    ----------
    name : str
        Column or key name.

    Returns
    -------
    str
    """
    unit = metric_unit(name)
    label = metric_label(name)
    return f"{label} ({unit})" if unit else label
