"""The statistics sections of a batch report: metrics by group, dose-response, quality.

Every function takes the tables as read from the batch folder (cells as text) and returns
markup; a missing table gives a one-line note saying why (from ``batch.json`` where it says).
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import pandas as pd

from beatlab.report._format import (
    MISSING,
    as_float,
    column_header,
    format_number,
    format_p,
    is_missing,
    metric_label,
    metric_unit,
)
from beatlab.report._html import Html, badge, element, join, table
from beatlab.report._parts import frame_table

__all__ = [
    "KEY_METRICS",
    "comparisons",
    "dose_response",
    "group_by_columns",
    "group_label",
    "incidence",
    "key_metrics",
    "quality_flags",
    "z_prime",
]

KEY_METRICS = (
    "beat_rate_bpm",
    "duration_90_s",
    "time_to_peak_s",
    "displacement_um",
    "contraction_velocity_um_s",
)
"""Well metrics of the per-group table, in column order (those in wells.csv)."""

_GROUP_COLUMNS = ("condition", "compound", "concentration")


def _note(text: str) -> Html:
    return element("p", text, cls="note missing")


def _key_text(value) -> str:
    """A group key cell compared across tables: numbers as ``%g`` (``0.10`` = ``0.1``)."""
    number = as_float(value)
    if not math.isnan(number):
        return f"{number:g}"
    return "" if is_missing(value) else str(value).strip()


def group_by_columns(wells: pd.DataFrame, groups: pd.DataFrame | None) -> list[str]:
    """Columns naming the groups: those of groups.csv, else the layout's non-blank ones.

    Parameters
    ----------
    wells : pandas.DataFrame
        ``wells.csv``.
    groups : pandas.DataFrame or None
        ``groups.csv`` (its columns between ``metric`` and ``group`` name the groups).

    Returns
    -------
    list of str
        Among ``condition``, ``compound``, ``concentration`` and, with several timepoints,
        ``timepoint``.
    """
    if groups is not None and {"metric", "group"} <= set(groups.columns):
        columns = list(groups.columns)
        by = columns[columns.index("metric") + 1 : columns.index("group")]
        return [c for c in by if c in wells.columns]
    by = [c for c in _GROUP_COLUMNS if c in wells.columns and not wells[c].map(is_missing).all()]
    if "timepoint" in wells.columns:
        if wells["timepoint"][~wells["timepoint"].map(is_missing)].nunique() > 1:
            by.append("timepoint")
    return by


def group_label(row, by: Sequence[str]) -> str:
    """A group's readable label, e.g. ``BL-101 0.3 uM`` or ``P-mono vehicle (DMSO)``.

    The compound with its concentration and unit; the layout's condition leads when it says
    more than they do (a condition that repeats them is not written twice); a concentration
    of 0 (the vehicle) is left out; several timepoints add `` · <timepoint>``.

    Parameters
    ----------
    row : mapping
        One well (or group) row with the `by` columns and optionally ``unit``.
    by : sequence of str
        The group columns.

    Returns
    -------
    str
    """
    texts = {column: _key_text(row[column]) for column in by}
    conc = texts.get("concentration", "")
    if conc == "0":
        conc = ""
    elif conc and not is_missing(row.get("unit")):
        conc = f"{conc} {row['unit']}"
    other = " ".join(p for p in (texts.get("compound", ""), conc) if p)
    condition = texts.get("condition", "")
    if condition and other:
        label = condition if other in condition else f"{condition} ({other})"
    else:
        label = condition or other
    if texts.get("timepoint"):
        label = f"{label} · {texts['timepoint']}" if label else texts["timepoint"]
    return label or "all wells"


def _group_order(part: pd.DataFrame, key: tuple, by: Sequence[str]) -> tuple:
    """Vehicle groups first, then by compound, concentration (as numbers), condition."""
    vehicle = "role" in part.columns and (part["role"].astype(str).str.lower() == "vehicle").any()
    rank = {"compound": 0, "concentration": 1, "condition": 2, "timepoint": 3}
    ordered = tuple(v for _, v in sorted(zip(by, key, strict=True), key=lambda cv: rank[cv[0]]))
    return (not vehicle, _sort_key(ordered))


def _sort_key(key: tuple) -> tuple:
    return tuple((0, as_float(v), "") if not math.isnan(as_float(v)) else (1, 0.0, v) for v in key)


def _p_lookup(groups: pd.DataFrame | None, by: list[str]) -> tuple[dict, str, list[str]]:
    """(group key, metric) -> p_adj; the control's label; the tests used."""
    if groups is None or "metric" not in groups.columns:
        return {}, "", []
    lookup = {}
    for _, row in groups.iterrows():
        metric = str(row["metric"]).removesuffix("_norm")
        lookup[(tuple(_key_text(row[c]) for c in by), metric)] = row.get("p_adj", "")
    control = next((c for c in groups.get("control", []) if not is_missing(c)), "")
    tests = sorted({t for t in groups.get("test", []) if not is_missing(t)})
    return lookup, control, tests


def _mean_sd(values: pd.Series) -> tuple[str, int]:
    """``mean ± SD``: the mean to 3 significant digits, the SD to the same decimals (or to
    its first significant digit when it is smaller), so both read at one precision."""
    numbers = values.map(as_float).dropna()
    if numbers.empty:
        return MISSING, 0
    mean = float(numbers.mean())
    sd = float(numbers.std(ddof=1)) if len(numbers) > 1 else math.nan
    decimals = _decimals(mean, 3)
    if math.isnan(sd):
        return format_number(mean), len(numbers)
    if sd > 0:
        decimals = max(decimals, _decimals(sd, 1))
    decimals = min(decimals, 6)
    return f"{mean:.{decimals}f} ± {sd:.{decimals}f}", len(numbers)


def _decimals(value: float, significant: int) -> int:
    """Decimals that show `value` to `significant` digits (0 for large values)."""
    if value == 0 or not math.isfinite(value):
        return 0
    return max(0, significant - 1 - math.floor(math.log10(abs(value))))


def key_metrics(wells: pd.DataFrame | None, groups: pd.DataFrame | None, *, note: str) -> Html:
    """Mean ± SD of the key metrics per group of wells, with n wells and the group test's p_adj.

    Parameters
    ----------
    wells : pandas.DataFrame or None
        ``wells.csv`` (rows with status ok are used).
    groups : pandas.DataFrame or None
        ``groups.csv``, for ``p_adj`` and the control.
    note : str
        Why wells.csv is missing, shown when `wells` is None.

    Returns
    -------
    Html
    """
    if wells is None:
        return _note(f"No per-group table: {note}.")
    ok = wells[wells["status"] == "ok"] if "status" in wells.columns else wells
    metrics = [m for m in KEY_METRICS if m in ok.columns]
    if ok.empty or not metrics:
        return _note("No per-group table: no well was analysed successfully.")
    by = group_by_columns(ok, groups)
    lookup, _, tests = _p_lookup(groups, by)
    keyed = ok.assign(_key=[tuple(_key_text(r[c]) for c in by) for _, r in ok.iterrows()])
    rows = []
    for key, part in keyed.groupby("_key", sort=False):
        label = group_label(part.iloc[0], by)
        order = _group_order(part, key, by)
        is_control = not order[0]
        cells = [element("strong", label) if is_control else label, str(len(part))]
        for metric in metrics:
            text, n = _mean_sd(part[metric])
            sub = "control" if is_control else ""
            if (key, metric) in lookup:
                sub = f"p_adj {format_p(lookup[(key, metric)])}"
            if 0 < n < len(part):
                sub = f"{sub} · n {n}" if sub else f"n {n}"
            cells.append(Html(render_cell(text, sub)))
        rows.append((order, cells))
    rows.sort(key=lambda r: r[0])
    headers = ["Group", "Wells", *(column_header(m) for m in metrics)]
    titles = [", ".join(by) or None, "n_wells", *metrics]
    body = table(headers, [r[1] for r in rows], numeric=range(1, len(headers)), titles=titles)
    explain = "Mean ± SD over wells (fields of view averaged per well; wells.csv)."
    if tests:
        explain += (
            f" p_adj: {', '.join(tests)} test of each group against the control (the "
            "vehicle wells, in bold) on the normalised well values (groups.csv)."
        )
        compared = {metric for _, metric in lookup}
        untested = [metric_label(m) for m in metrics if m not in compared]
        if untested:
            explain += f" Not compared in groups.csv: {', '.join(untested)}."
    return body + element("p", explain, cls="note")


def render_cell(text: str, sub: str) -> Html:
    """A value with a small second line under it (``p_adj 0.01``)."""
    return element("span", text) + (element("span", sub, cls="sub") if sub else Html(""))


def comparisons(groups: pd.DataFrame | None, *, note: str) -> Html:
    """Every row of groups.csv in a collapsible table (metric, group, n, statistics, tests)."""
    if groups is None:
        return _note(f"No group comparisons: {note}.")
    columns = (
        "metric", "group", "n_wells", "mean", "sd", "difference", "percent_change", "hedges_g",
        "test", "p", "p_adj", "note",
    )  # fmt: skip
    formatters = {
        "metric": column_header,
        "group": str,
        "test": str,
        "note": lambda v: element("span", v, cls="wide"),
    }
    formatters |= {"p": format_p, "p_adj": format_p}
    content = frame_table(groups, columns, formatters=formatters)
    summary = element("summary", f"All {len(groups)} comparisons with the control (groups.csv)")
    return element("details", summary + element("div", content, cls="inner"), cls="block")


def _ec50(row) -> str:
    value = format_number(row.get("ec50"))
    if value == MISSING:
        return MISSING
    unit = "" if is_missing(row.get("unit")) else f" {row['unit']}"
    low, high = format_number(row.get("ec50_low")), format_number(row.get("ec50_high"))
    interval = f" [{low}, {high}]" if MISSING not in (low, high) else " [CI not bounded]"
    return f"{value}{interval}{unit}"


def dose_response(dose: pd.DataFrame | None, *, note: str) -> Html:
    """The 4-parameter logistic fits of dose_response.csv: EC50 with its CI and unit, Hill, r²."""
    if dose is None:
        return _note(f"No dose-response fits: {note}.")
    if dose.empty:
        return _note("dose_response.csv holds no fit.")
    lead = [c for c in dose.columns[: list(dose.columns).index("compound")]] if (
        "compound" in dose.columns) else []  # fmt: skip
    effects = [
        c for c in dose.columns if c.startswith("effect_at_") and not dose[c].map(is_missing).all()
    ]
    headers = [*(column_header(c) for c in lead), "Compound", "Response", "EC50 [95 % CI]",
               "Hill", "Bottom", "Top", "r²", "Wells", "Concentrations", "Fit",
               *(c.removeprefix("effect_at_").replace("_", " ") for c in effects)]  # fmt: skip
    rows = []
    for _, row in dose.iterrows():
        fit = str(row.get("fit", ""))
        rows.append([
            *(str(row[c]) for c in lead), str(row.get("compound", "")),
            column_header(str(row.get("metric", ""))), _ec50(row),
            *(format_number(row.get(c)) for c in ("hill", "bottom", "top", "r2", "n",
                                                  "n_concentrations")),
            fit if fit in ("ok", "") else badge(fit, kind="flag"),
            *(format_number(row.get(c)) for c in effects),
        ])  # fmt: skip
    first = len(lead) + 3
    numeric = [*range(first, first + 6), *range(first + 7, len(headers))]
    explain = (
        "y = bottom + (top − bottom) / (1 + (EC50 / x)^Hill), least squares on the wells' "
        "normalised values, vehicle wells at concentration 0; 95 % profile-likelihood interval "
        "for EC50. Bottom and top in the response's unit."
    )
    return table(headers, rows, numeric=numeric) + element("p", explain, cls="note")


def quality_flags(recordings: pd.DataFrame | None, *, note: str) -> Html:
    """Per-recording quality flags with the numbers behind them, and how often each flag occurs."""
    if recordings is None:
        return _note(f"No quality table: {note}.")
    flags = recordings.get("quality_flags", pd.Series("", index=recordings.index))
    split = flags.map(lambda f: [] if is_missing(f) else [x.strip() for x in str(f).split(";")])
    counts = pd.Series([f for fs in split for f in fs if f], dtype=object).value_counts()
    if counts.empty:
        summary = element("p", "No recording has a quality flag.", cls="note")
    else:
        listed = " · ".join(f"{flag} {n}" for flag, n in counts.items())
        summary = element("p", f"Recordings per flag: {listed}.", cls="note")
    numbers = ("quality_snr", "quality_drift_max_um", "quality_masked_fraction", "n_warnings")
    columns = [c for c in ("recording_id", "plate", "well", "fov", "timepoint") if c in recordings]
    columns = [c for c in columns if not recordings[c].map(is_missing).all()]
    headers = [*(column_header(c) for c in columns), "Status", "Quality flags"]
    headers += [column_header(c) for c in numbers if c in recordings]
    rows = []
    for (_, row), row_flags in zip(recordings.iterrows(), split, strict=True):
        status = str(row.get("status", ""))
        kind = status if status in ("ok", "error", "excluded") else "excluded"
        rows.append([
            *(str(row[c]) for c in columns), badge(status or MISSING, kind=kind),
            join(badge(f, kind="flag") for f in row_flags if f) or MISSING,
            *(format_number(row[c]) for c in numbers if c in recordings),
        ])  # fmt: skip
    start = len(columns) + 2
    headers[0] = "Recording" if columns and columns[0] == "recording_id" else headers[0]
    return summary + table(headers, rows, numeric=range(start, len(headers)))


def z_prime(frame: pd.DataFrame | None, *, note: str) -> Html:
    """The Z'-factor per plate and metric, with the assay-window class of Zhang et al. (1999)."""
    if frame is None:
        return _note(f"No Z' table: {note}.")
    rows = []
    for _, row in frame.iterrows():
        value = as_float(row.get("z_prime"))
        if math.isnan(value):
            window = "not computed (fewer than 2 values in a control)"
        elif value >= 0.5:
            window = "excellent (≥ 0.5)"
        elif value > 0:
            window = "marginal (0 to 0.5)"
        else:
            window = "controls overlap (≤ 0)"
        rows.append([
            str(row.get("plate", "")), column_header(str(row.get("metric", ""))),
            format_number(value), format_number(row.get("n_positive")),
            format_number(row.get("n_negative")), str(row.get("negative_role", "")), window,
        ])  # fmt: skip
    headers = ["Plate", "Metric", "Z'", "Positive wells", "Negative wells", "Negative", "Window"]
    explain = "Z' = 1 − 3 (SD₊ + SD₋) / |mean₊ − mean₋| (Zhang, Chung & Oldenburg 1999)."
    return table(headers, rows, numeric=(2, 3, 4)) + element("p", explain, cls="note")


def _share(row, event: str) -> str:
    k, n = format_number(row.get(f"{event}_wells")), format_number(row.get(f"{event}_n"))
    if MISSING in (k, n):
        return MISSING
    low, high = as_float(row.get(f"{event}_low")), as_float(row.get(f"{event}_high"))
    text = f"{k} / {n}"
    if not (math.isnan(low) or math.isnan(high)):
        text += f" [{format_number(100 * low, digits=2)}–{format_number(100 * high, digits=2)} %]"
    return text


def incidence(frame: pd.DataFrame | None, *, note: str) -> Html:
    """Wells with EAD-like beats, irregular rhythm or arrest per group, with Wilson 95 % CIs."""
    if frame is None:
        return _note(f"No incidence table: {note}.")
    lead = list(frame.columns[: list(frame.columns).index("n_wells")]) if (
        "n_wells" in frame.columns) else []  # fmt: skip
    events = {"ead": "EAD-like beats", "irregular": "Irregular rhythm", "arrest": "Arrest"}
    stv = "duration_90_stv_s_median"
    headers = [*(column_header(c) for c in lead), "Wells", *events.values()]
    headers.append(f"Median STV of duration 90 % ({metric_unit('duration_90_stv_s')})")
    rows = [
        [*(_key_text(row[c]) or MISSING for c in lead), format_number(row.get("n_wells")),
         *(_share(row, e) for e in events), format_number(row.get(stv))]
        for _, row in frame.iterrows()
    ]  # fmt: skip
    explain = "Wells with the event / wells assessed [Wilson 95 % interval]."
    numeric = range(len(lead), len(headers))
    return table(headers, rows, numeric=numeric) + element("p", explain, cls="note")
