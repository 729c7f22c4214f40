"""A metric by group: every well as a point over a box, vehicle first.

:func:`label_groups` names the group of every well (compound x concentration, plus timepoint
when there are several; the vehicle wells form one group per timepoint) and orders them: the
vehicle first, then each compound in order of first appearance by rising concentration.
:func:`tabulate_metric_by_group` lists what :func:`plot_metric_by_group` draws (the points and
the box of each group) and :func:`metric_label` writes a metric's axis label with its unit.
"""

from __future__ import annotations

import math
import textwrap

import numpy as np
import pandas as pd

from beatlab.batch.wells import DIFFERENCE_METRICS
from beatlab.errors import InputError
from beatlab.plots.style import GREY, PALETTE, axis_label, plotted_rows
from beatlab.schema import ROW_FIELDS

__all__ = [
    "COMPOUND_COLOURS",
    "MIN_BOX_WELLS",
    "concentration_unit",
    "group_colours",
    "label_groups",
    "metric_label",
    "metric_unit",
    "plot_metric_by_group",
    "tabulate_metric_by_group",
]

#: Colours of the compounds in turn (the vehicle is grey).
COMPOUND_COLOURS = tuple(
    PALETTE[k] for k in ("blue", "vermillion", "green", "purple", "orange", "sky")
)

MIN_BOX_WELLS = 5
"""Boxes are drawn when every group has this many wells; else mean +- SD for all groups."""

_UNITS = {f.name: f.unit for f in ROW_FIELDS}
_SUFFIXES = {"bpm": "_bpm", "s": "_s", "um": "_um", "nm": "_nm", "um/s": "_um_s",
             "cm/s": "_cm_s", "um^2": "_um2", "deg": "_deg", "Hz": "_hz"}  # fmt: skip
_NAMES = {
    "beat_rate_bpm": "beat rate",
    "duration_90_s": "contraction duration 90 %",
    "duration_50_s": "contraction duration 50 %",
    "duration_90_fridericia_s": "duration 90 %, Fridericia-corrected",
    "duration_90_bazett_s": "duration 90 %, Bazett-corrected",
    "displacement_um": "displacement amplitude",
    "contraction_velocity_um_s": "contraction velocity",
    "relaxation_velocity_um_s": "relaxation velocity",
    "irregular_fraction": "irregular-beat fraction",
    "opd_change_nm": "OPD change",
}
_NORMALIZED = {
    "vehicle": "change vs vehicle mean",
    "baseline-vehicle": "change from baseline, vehicle-corrected",
    "baseline-only": "change from baseline",
}
_JITTER_WIDTH = 0.36
# Axis labels longer than this many characters are wrapped onto two lines.
_LABEL_WIDTH = 40
_GOLDEN = (math.sqrt(5.0) - 1.0) / 2.0


def _base(column: str) -> tuple[str, str]:
    """``(metric, kind)``: kind is ``""``, ``"norm"`` or ``"change"``."""
    for kind in ("norm", "change"):
        if column.endswith(f"_{kind}"):
            return column[: -len(kind) - 1], kind
    return column, ""


def metric_unit(column: str) -> str:
    """The unit of a metric column of ``wells.csv``, as a key of ``UNIT_LABELS`` or ``"%"``.

    Parameters
    ----------
    column : str
        A metric (``"beat_rate_bpm"``) or its ``_change`` / ``_norm`` column.

    Returns
    -------
    str
        The schema's unit for a metric (``"1"`` for a fraction, ``""`` when unknown), ``"%"``
        for the change columns of a percentage metric, the metric's own unit for those of
        the difference metrics (:data:`beatlab.batch.wells.DIFFERENCE_METRICS`).
    """
    metric, kind = _base(column)
    unit = _UNITS.get(metric, "")
    if kind and metric not in DIFFERENCE_METRICS:
        return "%"
    return unit


def _quantity(metric: str) -> str:
    if metric in _NAMES:
        return _NAMES[metric]
    suffix = _SUFFIXES.get(_UNITS.get(metric, ""), "")
    stem = metric[: -len(suffix)] if suffix and metric.endswith(suffix) else metric
    return stem.replace("_", " ")


def metric_label(column: str, *, normalization: str | None = None) -> str:
    """An axis label for a metric column of ``wells.csv``, with its unit.

    Parameters
    ----------
    column : str
        A metric or its ``_change`` / ``_norm`` column (docs/batch.md, Normalisation).
    normalization : str, optional
        How the ``_norm`` column was made (the ``normalization`` column of ``wells.csv``):
        ``"vehicle"``, ``"baseline-vehicle"`` or ``"baseline-only"``; None when unknown or
        mixed.

    Returns
    -------
    str
        E.g. ``"beat rate (bpm)"``, ``"beat rate, change vs vehicle mean (%)"``,
        ``"irregular beats (fraction), difference vs vehicle"``.
    """
    metric, kind = _base(column)
    name, unit = _quantity(metric), metric_unit(column)
    if not kind:
        return axis_label(name, unit)
    difference = metric in DIFFERENCE_METRICS
    if kind == "change":
        what = "difference from baseline" if difference else "change from baseline"
    else:
        what = _NORMALIZED.get(normalization or "", "normalised change")
        if difference:
            what = what.replace("change", "difference")
    return axis_label(f"{name}, {what}", unit)


def _text(value) -> str:
    if value is None or (isinstance(value, float) and math.isnan(value)) or value is pd.NA:
        return ""
    if isinstance(value, float | np.floating) and float(value).is_integer():
        return str(int(value))
    return str(value).strip()


def _column(table: pd.DataFrame, name: str) -> pd.Series:
    if name not in table.columns:
        return pd.Series("", index=table.index, dtype=object)
    return table[name].map(_text).astype(object)


def concentration_unit(unit: str) -> str:
    """A concentration unit as axis labels write it: ``"uM"`` -> ``"µM"``, others unchanged."""
    return {"uM": "µM", "μM": "µM"}.get(unit, unit)


def _concentration_text(value: float, unit: str) -> str:
    return f"{value:g} {concentration_unit(unit)}".strip()


def label_groups(table: pd.DataFrame) -> pd.DataFrame:
    """The group of every row of a well (or recording) table, and the order of the groups.

    Parameters
    ----------
    table : pandas.DataFrame
        ``wells.csv`` or ``recordings.csv``; uses ``role``, ``compound``, ``concentration``,
        ``unit``, ``condition`` and ``timepoint`` where present.

    Returns
    -------
    pandas.DataFrame
        Indexed like `table`: ``group`` (label, e.g. ``"vehicle (DMSO)"``,
        ``"isoprox 0.3 µM"``, with ``" · <timepoint>"`` when there are several timepoints),
        ``tick`` (the short label under the axis: the concentration, ``"vehicle"`` or the
        condition), ``block`` (the label under a run of ticks: the compound with its
        unit, or the vehicle's compounds; blank for condition groups), ``order`` (0 for
        the first group), ``vehicle`` (bool).

    Notes
    -----
    Groups are compound x concentration (x timepoint); a row with neither compound nor
    concentration is grouped by its ``condition``. The condition is added to the label only
    where one compound x concentration holds several conditions. Rows with role ``vehicle``
    form one group per timepoint, first. Compounds follow in order of first appearance, each
    by rising concentration; timepoints in order of first appearance.
    """
    vehicle = (_column(table, "role").str.lower() == "vehicle").to_numpy()
    compound, condition = _column(table, "compound"), _column(table, "condition")
    unit, timepoint = _column(table, "unit").to_numpy(), _column(table, "timepoint")
    conc = np.full(len(table), np.nan)
    if "concentration" in table.columns:
        conc = pd.to_numeric(table["concentration"], errors="coerce").to_numpy(dtype=float)
    several_tp = timepoint[timepoint != ""].nunique() > 1
    key = (
        compound
        + "\x1f"
        + pd.Series(conc, index=table.index).map(lambda v: "" if np.isnan(v) else f"{v:.12g}")
    )
    split = condition.groupby([key, timepoint]).transform("nunique").to_numpy()
    tp_rank = {t: i for i, t in enumerate(dict.fromkeys(timepoint))}
    cp_rank = {c: i for i, c in enumerate(dict.fromkeys(compound[~vehicle]))}
    cond_rank = {c: i for i, c in enumerate(dict.fromkeys(condition))}
    vehicle_names = ", ".join(sorted(set(compound[vehicle]) - {""}))
    compound, condition = compound.to_numpy(), condition.to_numpy()
    rows = []
    for i, tp in enumerate(timepoint.to_numpy()):
        suffix = f" · {tp}" if several_tp and tp else ""
        if vehicle[i]:
            label = f"vehicle ({vehicle_names})" if vehicle_names else "vehicle"
            sort = (0, tp_rank[tp], 0, 0.0, 0)
            rows.append((label + suffix, "vehicle", vehicle_names + suffix, sort))
            continue
        name, value, cond = compound[i], conc[i], condition[i]
        dose = "" if np.isnan(value) else _concentration_text(value, unit[i])
        if not name and not dose:
            tick = cond or "(unlabelled)"
            sort = (2, cond_rank[cond], tp_rank[tp], 0.0, 0)
            rows.append((tick + suffix, tick, "", sort))
            continue
        prefix = f"{cond} " if cond and split[i] > 1 else ""
        number = "" if np.isnan(value) else f"{value:g}"
        tick = f"{prefix}{number}".strip() or name
        shown = concentration_unit(unit[i])
        block = f"{name} ({shown})" if shown and number else name
        sort = (1, cp_rank.get(name, 0), tp_rank[tp], -np.inf if np.isnan(value) else value,
                cond_rank[cond])  # fmt: skip
        rows.append((f"{prefix}{name} {dose}".strip() + suffix, tick, block + suffix, sort))
    out = pd.DataFrame(rows, columns=["group", "tick", "block", "sort"], index=table.index)
    order = {g: k for k, g in enumerate(out.sort_values("sort", kind="stable")["group"].unique())}
    out["order"] = out["group"].map(order).astype(int)
    out["vehicle"] = vehicle
    return out.drop(columns="sort")


def _jitter(values: np.ndarray, *, width: float) -> np.ndarray:
    """Deterministic offsets in [-width/2, width/2]: a golden-ratio sequence by value rank."""
    n = values.size
    if n < 2:
        return np.zeros(n)
    base = (np.arange(n) * _GOLDEN) % 1.0
    base = base - base.mean()
    base = base / np.abs(base).max() * (width / 2.0)
    out = np.empty(n)
    out[np.argsort(values, kind="stable")] = base
    return out


def _used(wells: pd.DataFrame, metric: str) -> pd.DataFrame:
    """Ok wells with a finite value; for change columns, not the baseline timepoint itself."""
    if metric not in wells.columns:
        numeric = [c for c in wells.columns if pd.api.types.is_numeric_dtype(wells[c])]
        raise InputError(
            f"wells has no column {metric!r}; pass one of its metric columns, e.g. "
            f"{', '.join(numeric[:4]) or 'beat_rate_bpm'}"
        )
    keep = _column(wells, "status") == "ok" if "status" in wells.columns else True
    keep = keep & np.isfinite(pd.to_numeric(wells[metric], errors="coerce").astype(float))
    if _base(metric)[1] and "baseline_timepoint" in wells.columns:
        base = _column(wells, "baseline_timepoint")
        keep = keep & ((base == "") | (_column(wells, "timepoint") != base))
    return wells[keep]


def _normalization(wells: pd.DataFrame, metric: str) -> str | None:
    if _base(metric)[1] != "norm" or "normalization" not in wells.columns:
        return None
    kinds = set(_column(wells, "normalization")) - {"", "none"}
    return kinds.pop() if len(kinds) == 1 else None


def _summary(y: np.ndarray, *, boxes: bool) -> dict[str, float]:
    """Box statistics, or the mean and mean -+ SD (ddof 1; the mean alone for one well)."""
    if boxes:
        q1, median, q3 = np.percentile(y, [25, 50, 75])
        iqr = q3 - q1
        inside = y[(y >= q1 - 1.5 * iqr) & (y <= q3 + 1.5 * iqr)]
        return {"median": median, "q1": q1, "q3": q3, "whisker_low": inside.min(),
                "whisker_high": inside.max()}  # fmt: skip
    stats = {"mean": float(np.mean(y))}
    if y.size >= 2:
        sd = float(np.std(y, ddof=1))
        stats |= {"mean_minus_sd": stats["mean"] - sd, "mean_plus_sd": stats["mean"] + sd}
    return stats


def tabulate_metric_by_group(wells: pd.DataFrame, *, metric: str) -> pd.DataFrame:
    """What :func:`plot_metric_by_group` draws, one row per point (the plotted-data table).

    Parameters
    ----------
    wells : pandas.DataFrame
        ``wells.csv`` of a batch (or any table with ``status`` and the metric column).
    metric : str
        The column to show, e.g. ``"beat_rate_bpm_norm"``.

    Returns
    -------
    pandas.DataFrame
        The columns of :data:`beatlab.plots.style.PLOTTED_COLUMNS` (``panel`` the metric;
        ``x`` the group position, 0 for the first group, jittered for the wells; ``y`` the
        value) for the series ``well`` (one row per ok well with a value) and, per group,
        either ``median``, ``q1``, ``q3``, ``whisker_low``, ``whisker_high`` (boxes, when
        every group has at least :data:`MIN_BOX_WELLS` wells; whiskers at the furthest well
        within 1.5 IQR of the box) or ``mean``, ``mean_minus_sd``, ``mean_plus_sd`` (SD with
        ddof 1; the mean alone for a single well); then ``group``, ``order``, ``well_id``,
        ``plate``, ``well``.
    """
    used = _used(wells, metric)
    groups = label_groups(used)
    values = pd.to_numeric(used[metric], errors="coerce").to_numpy(dtype=float)
    unit = metric_unit(metric)
    ids = {name: _column(used, name).to_numpy() for name in ("well_id", "plate", "well")}
    boxes = bool(len(groups)) and int(groups["order"].value_counts().min()) >= MIN_BOX_WELLS
    parts = []
    for order in sorted(groups["order"].unique()):
        rows = np.flatnonzero(groups["order"].to_numpy() == order)
        y = values[rows]
        x = order + _jitter(y, width=_JITTER_WIDTH)
        item = used.index.to_numpy()[rows]
        wells_part = plotted_rows(metric, "well", x=x, y=y, item=item, x_unit="", y_unit=unit)
        for name, column in ids.items():
            wells_part[name] = column[rows]
        stats = _summary(y, boxes=boxes)
        box = pd.concat(
            [plotted_rows(metric, name, x=[order], y=[v], x_unit="", y_unit=unit)
             for name, v in stats.items()]
        )  # fmt: skip
        for part in (wells_part, box):
            part["group"] = groups["group"].iloc[rows[0]]
            part["order"] = order
        parts += [wells_part, box]
    if not parts:
        empty = plotted_rows(metric, "well", x=[], x_unit="", y_unit=unit)
        return empty.assign(group=[], order=[], well_id=[], plate=[], well=[])
    return pd.concat(parts, ignore_index=True)


def group_colours(groups: pd.DataFrame) -> dict[str, str]:
    """The colour of each group: grey for the vehicle, one colour per compound.

    Parameters
    ----------
    groups : pandas.DataFrame
        The result of :func:`label_groups`.

    Returns
    -------
    dict of str to str
        Group label -> colour: grey for the vehicle and condition groups, else
        :data:`COMPOUND_COLOURS` in turn by the compound's first appearance (the same
        colour at every timepoint).
    """
    compounds = groups.loc[~groups["vehicle"] & (groups["block"] != ""), "block"].map(_strip_tp)
    ranks = {name: k for k, name in enumerate(dict.fromkeys(compounds))}
    out = {}
    for row in groups.drop_duplicates("group").itertuples(index=False):
        if row.vehicle or not row.block:
            out[row.group] = GREY
        else:
            out[row.group] = COMPOUND_COLOURS[ranks[_strip_tp(row.block)] % len(COMPOUND_COLOURS)]
    return out


def _strip_tp(block: str) -> str:
    return block.split(" · ")[0]


def _draw_summary(ax, x: float, stats: dict, colour: str) -> None:
    """A box (quartiles, whiskers, median) or a mean line with a +-SD bar."""
    from matplotlib.patches import Rectangle

    half = _JITTER_WIDTH / 2.0 + 0.06
    if "q1" in stats:
        box = Rectangle(
            (x - half, stats["q1"]),
            2 * half,
            stats["q3"] - stats["q1"],
            facecolor=colour,
            alpha=0.12,
            edgecolor=colour,
            lw=0.9,
            zorder=1,
        )
        ax.add_patch(box)  # fmt: skip
        for lo, hi in ((stats["whisker_low"], stats["q1"]), (stats["q3"], stats["whisker_high"])):
            ax.plot([x, x], [lo, hi], color=colour, lw=0.9, zorder=1)
    if "mean_minus_sd" in stats:
        ax.errorbar([x + half + 0.05], [stats["mean"]], capsize=2.5, color=colour, lw=1.0,
                    yerr=[[stats["mean"] - stats["mean_minus_sd"]],
                          [stats["mean_plus_sd"] - stats["mean"]]], zorder=2)  # fmt: skip
    centre = stats.get("median", stats.get("mean"))
    ax.plot([x - half, x + half], [centre, centre], color=colour, lw=2.0, zorder=3,
            solid_capstyle="butt")  # fmt: skip


def plot_metric_by_group(wells: pd.DataFrame, *, metric: str, ax=None):
    """Each well's value of a metric, by group, over a box per group.

    Parameters
    ----------
    wells : pandas.DataFrame
        ``wells.csv`` of a batch: ok wells with a finite value are drawn (for ``_norm`` and
        ``_change`` columns, not the baseline timepoint, whose value is 0 by definition).
    metric : str
        The column, e.g. ``"beat_rate_bpm_norm"`` (percent vs vehicle) or ``"beat_rate_bpm"``.
    ax : matplotlib Axes, optional
        Where to draw; a new figure otherwise.

    Returns
    -------
    matplotlib.axes.Axes

    Raises
    ------
    InputError
        If `metric` is not a column of `wells`.

    Notes
    -----
    Groups as in :func:`label_groups`, vehicle first. Points are jittered sideways by a
    deterministic golden-ratio sequence over the value ranks (the same table gives the same
    figure). When every group has at least :data:`MIN_BOX_WELLS` wells, each gets a box
    (quartiles, median; whiskers to the furthest well within 1.5 IQR); otherwise quartiles
    of a few wells mislead, and every group gets its mean (line) and mean +- SD (bar beside
    the points). A dashed line marks 0 on the ``_norm`` and ``_change`` columns. Tick labels
    give each group's number of wells; the axis note says which summary is drawn.
    """
    import matplotlib.pyplot as plt
    from matplotlib.transforms import blended_transform_factory

    if ax is None:
        ax = plt.figure(figsize=(6, 3.2), layout="constrained").add_subplot()
    table = tabulate_metric_by_group(wells, metric=metric)
    used = _used(wells, metric)
    groups = label_groups(used).drop_duplicates("order").sort_values("order")
    by_label = group_colours(label_groups(used))
    colours = {o: by_label[g] for o, g in zip(groups["order"], groups["group"], strict=True)}
    points = table[table["series"] == "well"]
    for order, part in points.groupby("order"):
        colour = colours[order]
        ax.scatter(part["x"], part["y"], s=16, color=colour, edgecolor="white", lw=0.4,
                   zorder=4, gid=f"wells_{order}")  # fmt: skip
        stats = table[(table["order"] == order) & (table["series"] != "well")]
        _draw_summary(ax, float(order), dict(zip(stats["series"], stats["y"], strict=True)),
                      colour)  # fmt: skip
    if _base(metric)[1]:
        ax.axhline(0.0, color=GREY, lw=0.8, ls="--", zorder=0)
    counts = points.groupby("order").size()
    ticks = [f"{t}\nn={counts.get(o, 0)}" for t, o in zip(groups["tick"], groups["order"],
                                                           strict=True)]  # fmt: skip
    ax.set_xticks(groups["order"].to_numpy(), ticks)
    ax.set_xlim(-0.6, max(len(groups) - 0.4, 0.6))
    label = metric_label(metric, normalization=_normalization(wells, metric))
    ax.set_ylabel(textwrap.fill(label, width=_LABEL_WIDTH))
    where = blended_transform_factory(ax.transData, ax.transAxes)
    for block, part in groups[groups["block"] != ""].groupby("block", sort=False):
        ax.annotate(block, xy=(part["order"].mean(), 0), xycoords=where, xytext=(0, -30),
                    textcoords="offset points", ha="center", va="top", fontsize=8,
                    color=colours[part["order"].iloc[0]], gid="block")  # fmt: skip
    if len(points):
        boxes = bool((table["series"] == "q1").any())
        note = "box: median, quartiles; whiskers 1.5 IQR" if boxes else "line: mean; bar: ± SD"
        ax.text(1.0, 1.01, f"points: wells; {note}", transform=ax.transAxes, ha="right",
                va="bottom", fontsize=7, color=GREY, gid="summary")  # fmt: skip
    if points.empty:
        ax.text(0.5, 0.5, f"no ok well has a value of {metric}", transform=ax.transAxes,
                ha="center", va="center", color=GREY)  # fmt: skip
    return ax
