"""Well-level tables: fields of view aggregated to wells, then normalised to baseline and vehicle.

The well (one plate x well x timepoint) is the unit of replication of a screen: fields of view
of one well are technical repeats of it. :func:`aggregate_wells` turns the per-recording table
into one row per well and :func:`normalize_wells` expresses each well's metrics as changes from
its own baseline and from the plate's vehicle wells.
"""

from __future__ import annotations

import math
import re
import warnings
from collections import Counter
from collections.abc import Sequence

import numpy as np
import pandas as pd

from beatlab.errors import BeatlabWarning, InputError
from beatlab.schema import ROW_FIELDS

__all__ = [
    "DIFFERENCE_METRICS",
    "NORMALIZATIONS",
    "RHYTHM_SEVERITY",
    "WELL_KEYS",
    "aggregate_wells",
    "normalize_wells",
]

WELL_KEYS = ("plate", "well", "timepoint")
"""Columns that identify a well row (those present in the recordings are used)."""

RHYTHM_SEVERITY = ("irregular", "quiescent", "regular", "undetermined")
"""Rhythm classes from most to least severe, for choosing a well's rhythm."""

DIFFERENCE_METRICS = ("irregular_fraction", "secondary_peak_beats", "alternans_index")
"""Metrics whose baseline can be 0: normalised as differences, not percentages."""

NORMALIZATIONS = {
    "baseline-vehicle": "change from the well's own baseline minus the plate's vehicle change",
    "baseline-only": "change from the well's own baseline; no vehicle to subtract",
    "vehicle": "change from the plate's vehicle mean at the same timepoint (no baseline)",
    "none": "not normalised: status not ok, or neither baseline nor vehicle",
}
"""Values of the ``normalization`` column of :func:`normalize_wells` and their meaning."""

_SEVERITY = {"rhythm": RHYTHM_SEVERITY}
_SCHEMA_DTYPES = {f.name: f.dtype for f in ROW_FIELDS}
_OWN = ("status", "error", "exclude", "exclude_reason")
_ID_UNSAFE = re.compile(r"[^A-Za-z0-9.\-]+")


def _key_text(value) -> str:
    """Text form of a key cell: blank for missing, ``3`` for 3.0 (a CSV round trip)."""
    if value is None or value is pd.NA or (isinstance(value, float) and math.isnan(value)):
        return ""
    if isinstance(value, float | np.floating) and float(value).is_integer():
        return str(int(value))
    return str(value).strip()


def _key_column(table: pd.DataFrame, name: str) -> pd.Series:
    if name not in table.columns:
        return pd.Series("", index=table.index, dtype=object)
    return table[name].map(_key_text).astype(object)


def _flags(table: pd.DataFrame, name: str) -> pd.Series:
    """A true/false column that may have come through a CSV (``"True"``, blank...)."""
    if name not in table.columns:
        return pd.Series(False, index=table.index)
    words = table[name].map(lambda v: _key_text(v).lower())
    return words.isin(("true", "yes", "1")).astype(bool)


def _require(table: pd.DataFrame, columns: Sequence[str], *, what: str) -> None:
    missing = [c for c in columns if c not in table.columns]
    if missing:
        raise InputError(
            f"{what} has no column {', '.join(map(repr, missing))}; pass metrics that are "
            f"columns of {what} (it has: {', '.join(map(str, table.columns))})"
        )


def _is_text(series: pd.Series, name: str) -> bool:
    """Text metric by the schema's declared type, else by the column's own dtype."""
    if name in _SCHEMA_DTYPES:
        return _SCHEMA_DTYPES[name] == "str"
    return not (pd.api.types.is_numeric_dtype(series) or pd.api.types.is_bool_dtype(series))


def _numeric(series: pd.Series) -> pd.Series:
    return pd.to_numeric(series, errors="coerce").astype(float)


def _pick_text(values: list[str], name: str) -> tuple[str | None, str | None]:
    """A well's value of a text metric, and ``class:n`` counts for ranked metrics."""
    if not values:
        return None, None
    counts = Counter(values)  # insertion order: ties go to the first in layout order
    order = _SEVERITY.get(name)
    if order is None:
        return counts.most_common(1)[0][0], None
    rank = {word: i for i, word in enumerate(order)}
    chosen = min(counts, key=lambda v: rank.get(v, len(order)))
    return chosen, ";".join(f"{word}:{n}" for word, n in counts.items())


def _distinct(values: pd.Series, gid: pd.Series, n: int, *, sep: str) -> tuple:
    """Per group: the number of distinct non-blank texts and those texts joined in row order."""
    text = values.map(_key_text)
    kept = pd.DataFrame({"g": gid, "t": text})[text != ""].drop_duplicates()
    count = kept.groupby("g").size().reindex(range(n), fill_value=0)
    joined = kept.groupby("g")["t"].agg(sep.join).reindex(range(n), fill_value="")
    return count.to_numpy(), joined


def _carried(table: pd.DataFrame, gid: pd.Series, n: int, columns: list[str]) -> pd.DataFrame:
    """Layout columns per well: the value when constant (blanks ignored), else joined."""
    out = {}
    for name in columns:
        count, joined = _distinct(table[name], gid, n, sep=";")
        blank = table[name].map(_key_text) == ""
        first = table[name].where(~blank).groupby(gid).first().reindex(range(n))
        out[name] = first.where(count <= 1, joined) if (count > 1).any() else first
    return pd.DataFrame(out, index=range(n))


def _counts(table, gid: pd.Series, n: int, *, used, excluded) -> pd.DataFrame:
    """status, error, the field-of-view counts, exclude and exclude_reason per well."""
    failed = ~used & ~excluded
    sums = pd.DataFrame({"u": used, "f": failed, "x": excluded, "all": True}).groupby(gid).sum()
    sums = sums.reindex(range(n), fill_value=0).astype(int)
    status = np.where(sums["u"] > 0, "ok", np.where(sums["f"] > 0, "error", "excluded"))
    empty = pd.Series("", index=table.index, dtype=object)
    errors = table["error"].where(failed, "") if "error" in table.columns else empty
    reasons = table.get("exclude_reason", empty)
    return pd.DataFrame(
        {
            "status": status,
            "error": _distinct(errors, gid, n, sep="; ")[1].to_numpy(),
            "n_fov": sums["u"].to_numpy(),
            "n_fov_failed": sums["f"].to_numpy(),
            "n_fov_excluded": sums["x"].to_numpy(),
            "exclude": (sums["x"] == sums["all"]).to_numpy(),
            "exclude_reason": _distinct(reasons, gid, n, sep="; ")[1].to_numpy(),
        }
    )


def _metric_columns(table, gid: pd.Series, n: int, *, used, metrics: list[str]) -> pd.DataFrame:
    """Each metric per well over the used fields of view, then beats_total and fov counts."""
    out, counts = {}, {}
    for name in metrics:
        if _is_text(table[name], name):
            text = table[name].map(_key_text)
            keep = used & (text != "")
            picked = {g: _pick_text(list(v), name) for g, v in text[keep].groupby(gid[keep])}
            out[name] = [picked.get(g, (None, None))[0] for g in range(n)]
            if name in _SEVERITY:
                counts[f"{name}_fov_counts"] = [picked.get(g, (None, None))[1] for g in range(n)]
        else:
            out[name] = _numeric(table[name]).where(used).groupby(gid).mean().reindex(range(n))
    if "beat_count" in table.columns:
        beats = _numeric(table["beat_count"]).where(used).groupby(gid)
        out["beats_total"] = beats.sum(min_count=1).reindex(range(n))
    return pd.DataFrame({**out, **counts}, index=range(n))


def aggregate_wells(recordings: pd.DataFrame, *, metrics: Sequence[str]) -> pd.DataFrame:
    """Aggregate fields of view to one row per plate x well x timepoint.

    Parameters
    ----------
    recordings : pandas.DataFrame
        One row per recording: layout columns (:func:`~beatlab.batch.layout.validate_layout`),
        metric columns (:meth:`beatlab.results.Analysis.to_row`), ``status`` (``ok`` or
        ``error``) and optionally ``error``, ``exclude`` and ``exclude_reason``.
    metrics : sequence of str
        Metric columns to aggregate, e.g. ``["beat_rate_bpm", "duration_90_s", "rhythm"]``.

    Returns
    -------
    pandas.DataFrame
        One row per well in order of first appearance. Columns: those of ``plate``, ``well``,
        ``timepoint`` present in ``recordings``; ``well_id`` (``plate_well_timepoint``, blank
        parts left out; a recording without a well is a unit of its own, with its
        ``recording_id``); ``status`` (``ok`` with at least one used field of view, else
        ``error``, or ``excluded`` when every field of view is excluded); ``error`` (the
        distinct errors of the failed fields of view, joined with ``"; "``, also for an ok
        well); ``n_fov`` (used: status ok, not excluded), ``n_fov_failed``,
        ``n_fov_excluded``; ``exclude`` (every field of view excluded); ``exclude_reason``;
        every other column that is not a metric or an analysis output of
        :data:`beatlab.schema.ROW_FIELDS`, its blank cells ignored: its value when constant
        in the well, else the distinct values joined with ``";"``; each metric; ``beats_total``
        (sum of ``beat_count`` over the used fields of view, when ``beat_count`` is a column);
        ``rhythm_fov_counts`` (``class:n`` per class, when ``rhythm`` is a metric).

    Raises
    ------
    InputError
        If ``recordings`` lacks ``status`` or a metric column.

    Notes
    -----
    A numeric metric is the mean over the used fields of view, skipping null values (null
    when none is defined): ``beat_count`` too is averaged, so that wells with different
    numbers of fields stay comparable; ``beats_total`` keeps the sum. Text metrics (type
    ``str`` in :data:`beatlab.schema.ROW_FIELDS`, or non-numeric columns) take the most
    common value (ties: the first in layout order), except ``rhythm``, which takes the most
    severe class present in the order of :data:`RHYTHM_SEVERITY`: ``irregular`` (an
    arrhythmia in any field flags the well), ``quiescent`` (part of the well arrested),
    ``regular``, ``undetermined`` (too few beats to judge, the least informative). A well
    whose every field of view failed keeps its row with null metrics and status ``error``.

    Examples
    --------
    >>> recordings = pd.DataFrame({"plate": "P1", "well": ["A1", "A1", "A1", "B1"],
    ...     "fov": ["1", "2", "3", "1"], "status": ["ok", "ok", "error", "error"],
    ...     "beat_rate_bpm": [60.0, 80.0, None, None]})
    >>> wells = aggregate_wells(recordings, metrics=["beat_rate_bpm"])
    >>> wells[["well", "status", "n_fov", "n_fov_failed", "beat_rate_bpm"]].values.tolist()
    [['A1', 'ok', 2, 1, 70.0], ['B1', 'error', 0, 1, nan]]
    """
    metrics = list(metrics)
    _require(recordings, ["status", *metrics], what="recordings")
    table = recordings.reset_index(drop=True)
    keys = [k for k in WELL_KEYS if k in table.columns]
    groups = pd.DataFrame({k: _key_column(table, k) for k in ("plate", "well", "timepoint")})
    own_id = _key_column(table, "recording_id")
    own_id = own_id.where(own_id != "", "recording-" + table.index.astype(str))
    groups["solo"] = own_id.where(groups["well"] == "", "")
    gid = groups.groupby(list(groups.columns), sort=False).ngroup()  # first appearance
    n = int(gid.max()) + 1 if len(gid) else 0
    first = table.index.to_series().groupby(gid).min().to_numpy()
    excluded = _flags(table, "exclude")
    used = (table["status"].map(_key_text) == "ok") & ~excluded
    dropped = {*metrics, *_OWN, *keys, *(name for name in _SCHEMA_DTYPES if name not in metrics)}
    carried = [c for c in table.columns if c not in dropped]
    out = table.loc[first, keys].reset_index(drop=True)
    out["well_id"] = [_well_id(groups.loc[i]) for i in first]
    parts = (
        _counts(table, gid, n, used=used, excluded=excluded),
        _carried(table, gid, n, carried),
        _metric_columns(table, gid, n, used=used, metrics=metrics),
    )
    return pd.concat([out, *parts], axis=1)


def _well_id(key: pd.Series) -> str:
    if key["solo"]:
        return key["solo"]
    parts = (key["plate"], key["well"], key["timepoint"])
    return "_".join(_ID_UNSAFE.sub("-", p) for p in parts if p)


def normalize_wells(
    wells: pd.DataFrame,
    *,
    metrics: Sequence[str],
    baseline_timepoint=None,
    difference_metrics: Sequence[str] = DIFFERENCE_METRICS,
    vehicle_role: str = "vehicle",
) -> pd.DataFrame:
    """Express each well's metrics as changes from its own baseline and from vehicle wells.

    Parameters
    ----------
    wells : pandas.DataFrame
        One row per plate x well x timepoint, as from :func:`aggregate_wells`: ``status``,
        the metric columns and, where present, ``plate``, ``well``, ``timepoint``, ``role``.
    metrics : sequence of str
        Numeric metric columns to normalise.
    baseline_timepoint : str or number, optional
        The timepoint of the baseline (pre-dose) measurement of every well. Default: the
        timepoint named ``baseline`` or ``pre`` (any case) if there is one, else the first
        timepoint in row order; none when the wells have a single timepoint.
    difference_metrics : sequence of str
        Metrics normalised as differences rather than percentages (their baseline can be 0).
    vehicle_role : str
        The ``role`` of the vehicle-control wells.

    Returns
    -------
    pandas.DataFrame
        A copy of ``wells`` with, for each metric, ``<metric>_change`` (change from the well's
        own baseline: percent, or a difference in the metric's unit for the difference
        metrics) and ``<metric>_norm`` (the vehicle-normalised effect, same units), then
        ``normalization`` (a key of :data:`NORMALIZATIONS`, per row) and
        ``baseline_timepoint`` (the baseline used, blank when none).

    Raises
    ------
    InputError
        If a metric column is missing or not numeric, ``baseline_timepoint`` is not a
        timepoint of the wells, or two rows share plate, well and timepoint.

    Warns
    -----
    BeatlabWarning
        When wells with status ok have no vehicle wells with status ok on their plate at
        their timepoint (their ``_norm`` is then null).

    Notes
    -----
    For metric x of well w on plate p at timepoint t, with b the baseline timepoint:

    - change from the own baseline: C(w,t) = 100 (x(w,t) - x(w,b)) / x(w,b) percent, null
      when x(w,b) is 0 or null; for a difference metric C(w,t) = x(w,t) - x(w,b). At t = b,
      C = 0.
    - ``baseline-vehicle`` (the well has an ok baseline row, the plate ok vehicle wells with
      baselines at t): N(w,t) = C(w,t) - mean over those vehicle wells v of C(v,t) (nulls
      skipped), the double normalisation that removes the time and handling effects the
      vehicle wells share.
    - ``baseline-only`` (no such vehicle wells): C as above, N null.
    - ``vehicle`` (no baseline: a single timepoint, or the well's baseline is missing or
      failed): C null; N(w,t) = 100 (x(w,t) - m) / m percent, m the mean of x over the ok
      vehicle wells of plate p at t (null when m is 0 or null); for a difference metric
      N = x(w,t) - m.
    - ``none`` (status not ok, or neither baseline nor vehicle): C and N null.

    Blank plates form one plate. An arrested well (beat rate 0, amplitudes null) keeps its
    row: its rate change is -100 % and its amplitude changes are null.

    Examples
    --------
    A vehicle well speeds up by 10 % after dosing, a sample well slows by 50 %:

    >>> wells = pd.DataFrame({"plate": "P1", "well": ["A1", "B1", "A1", "B1"],
    ...     "timepoint": ["pre", "pre", "post", "post"],
    ...     "role": ["vehicle", "sample", "vehicle", "sample"], "status": "ok",
    ...     "beat_rate_bpm": [60.0, 80.0, 66.0, 40.0]})
    >>> out = normalize_wells(wells, metrics=["beat_rate_bpm"])
    >>> out["beat_rate_bpm_norm"].round(6).tolist()
    [0.0, 0.0, 0.0, -60.0]
    >>> out["normalization"].unique().tolist()
    ['baseline-vehicle']
    """
    metrics = list(metrics)
    _require(wells, ["status", *metrics], what="wells")
    for name in metrics:
        if _is_text(wells[name], name):
            raise InputError(f"metric {name!r} is not numeric; normalise numeric metrics only")
    out = wells.reset_index(drop=True).copy()
    plate, well, tp = (_key_column(out, k) for k in ("plate", "well", "timepoint"))
    ok = out["status"].map(_key_text) == "ok"
    vehicle = ok & (_key_column(out, "role") == vehicle_role)
    base_tp = _baseline_timepoint(tp, given=baseline_timepoint)
    base_row = _baseline_rows(plate, well, tp, ok=ok, base_tp=base_tp)
    has_base = ok & (base_row >= 0)
    cell = plate + "\x1f" + tp  # one plate at one timepoint
    method = _methods(ok=ok, has_base=has_base, vehicle=vehicle, cell=cell)
    for name in metrics:
        change, norm = _normalize_metric(
            _numeric(out[name]),
            base_row=base_row.where(has_base, -1),
            vehicle=vehicle,
            cell=cell,
            method=method,
            difference=name in difference_metrics,
        )
        out[f"{name}_change"] = change
        out[f"{name}_norm"] = norm
    out["normalization"] = method
    out["baseline_timepoint"] = np.where(has_base, base_tp or "", "")
    _warn_without_vehicle(method, ok=ok, plate=plate, tp=tp, vehicle_role=vehicle_role)
    return out


def _methods(*, ok, has_base, vehicle, cell) -> pd.Series:
    """The normalisation of each row (a key of NORMALIZATIONS), from what it can use."""
    has_vehicle = cell.isin(cell[vehicle])
    has_vehicle_change = cell.isin(cell[vehicle & has_base])
    choice = np.select(
        [~ok, has_base & has_vehicle_change, has_base, has_vehicle],
        ["none", "baseline-vehicle", "baseline-only", "vehicle"],
        "none",
    )
    return pd.Series(choice, index=ok.index, dtype=object)


def _normalize_metric(x, *, base_row, vehicle, cell, method, difference: bool):
    """``(change, norm)`` of one metric; ``base_row`` is -1 where a row has no baseline."""
    has_base = base_row >= 0
    base = pd.Series(x.to_numpy()[base_row.clip(lower=0)], index=x.index).where(has_base)
    change = _relative(x, base, difference=difference).where(has_base)
    vehicle_change = cell.map(change[vehicle & has_base].groupby(cell).mean())
    vehicle_level = cell.map(x[vehicle].groupby(cell).mean())
    by_vehicle = _relative(x, vehicle_level, difference=difference)
    norm = (change - vehicle_change).where(
        method == "baseline-vehicle", by_vehicle.where(method == "vehicle")
    )
    return change, norm


def _relative(x: pd.Series, reference: pd.Series, *, difference: bool) -> pd.Series:
    """x - reference, or 100 (x - reference) / reference (null where the reference is 0)."""
    if difference:
        return x - reference
    safe = reference.where(reference != 0)
    return 100.0 * (x - safe) / safe


def _baseline_timepoint(tp: pd.Series, *, given) -> str | None:
    order = list(dict.fromkeys(tp))
    if given is not None:
        wanted = _key_text(given)
        if wanted not in order:
            raise InputError(
                f"baseline_timepoint {given!r} is not a timepoint of the wells; pass one of "
                f"{', '.join(map(repr, order))}"
            )
        return wanted
    if len(order) <= 1:
        return None
    named = [t for t in order if t.casefold() in ("baseline", "pre")]
    return named[0] if named else order[0]


def _baseline_rows(plate, well, tp, *, ok: pd.Series, base_tp: str | None) -> pd.Series:
    """Position of each row's baseline row (same plate and well, ok, at base_tp), else -1."""
    named = well != ""
    key = plate + "\x1f" + well + "\x1f" + tp
    repeated = key[named & key.duplicated()]
    if not repeated.empty:
        first = repeated.iloc[0].split("\x1f")
        raise InputError(
            f"wells has several rows for plate {first[0]!r}, well {first[1]!r}, timepoint "
            f"{first[2]!r}; aggregate fields of view first (aggregate_wells)"
        )
    if base_tp is None:
        return pd.Series(-1, index=plate.index)
    base = named & ok & (tp == base_tp)
    lookup = pd.Series(np.flatnonzero(base), index=(plate + "\x1f" + well)[base].to_numpy())
    found = (plate + "\x1f" + well).map(lookup)
    return found.where(named, np.nan).fillna(-1).astype(int)


def _warn_without_vehicle(method: pd.Series, *, ok, plate, tp, vehicle_role: str) -> None:
    lacking = ok & method.isin(("baseline-only", "none"))
    places = list(dict.fromkeys(zip(plate[lacking], tp[lacking], strict=True)))
    if not places:
        return
    where = ", ".join(f"plate {p!r} timepoint {t!r}" for p, t in places[:3])
    more = f" and {len(places) - 3} more" if len(places) > 3 else ""
    warnings.warn(
        f"no usable {vehicle_role} wells (status ok, with a baseline when the well has one) at "
        f"{where}{more}: wells there are not vehicle-normalised (their _norm is empty); mark "
        f"the vehicle wells with role {vehicle_role} in the layout",
        BeatlabWarning,
        stacklevel=3,
    )
