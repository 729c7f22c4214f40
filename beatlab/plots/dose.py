"""Concentration-response: well values, the fitted four-parameter logistic and its EC50.

:func:`tabulate_dose_response` lists what :func:`plot_dose_response` draws: one panel per
compound (and timepoint) of ``dose_response.csv``, the wells at their concentration on a log
axis, the vehicle wells on a separate axis to the left (concentration 0 has no place on a log
axis), the fitted curve from the fit's ``bottom``, ``top``, ``ec50`` and ``hill``, and the EC50
with its 95 % confidence interval.
"""

from __future__ import annotations

import math
import textwrap

import numpy as np
import pandas as pd

from beatlab.errors import InputError
from beatlab.plots.groups import (
    _base,
    _column,
    _jitter,
    _normalization,
    _text,
    _used,
    concentration_unit,
    metric_label,
    metric_unit,
)
from beatlab.plots.style import GREY, PALETTE, message_panel, plotted_rows
from beatlab.stats import logistic4

__all__ = ["FIT_NOTES", "LEFT_OUT", "plot_dose_response", "tabulate_dose_response"]

FIT_NOTES = {
    "extrapolated": "EC50 outside the tested range: no curve drawn",
    "flat response": "flat response (no better fit than a constant): no curve",
    "too few concentrations": "fewer than 4 concentrations: no curve",
    "too few points": "too few wells for a fit: no curve",
    "no convergence": "the fit did not converge: no curve",
}
"""What a panel says for each ``fit`` status of ``dose_response.csv`` other than ``ok``."""

LEFT_OUT = "too few concentrations"
"""Fits with this status get no panel (a single-dose compound is no concentration-response)."""

_CURVE_POINTS = 200
_MARGIN = 3.0  # the log axis reaches this factor beyond the tested concentrations
_VEHICLE_X = 0.0
_MAX_TICKS = 8  # concentrations labelled one by one up to this many
_LABEL_WIDTH = 30  # y labels wrap at this many characters (a panel is about 3 inches tall)


def _value(row: pd.Series, name: str) -> float:
    value = pd.to_numeric(pd.Series([row.get(name)]), errors="coerce").iloc[0]
    return float(value) if pd.notna(value) else math.nan


def _fit_rows(fits: pd.DataFrame, metric: str) -> pd.DataFrame:
    if not {"compound", "metric", "fit"} <= set(fits.columns):
        raise InputError("fits lacks the columns compound, metric and fit; pass dose_response.csv")
    rows = fits[fits["metric"].astype(str) == metric]
    if rows.empty:
        found = sorted(set(fits["metric"].astype(str)))
        raise InputError(f"dose_response has no fit of {metric!r}; pass one of {found}")
    return rows


def _panel_wells(wells: pd.DataFrame, fit: pd.Series, metric: str):
    """The treated wells and the vehicle wells of one fit (as ``dose_response_table``)."""
    used = _used(wells, metric)
    if _timepoint(fit):
        used = used[_column(used, "timepoint") == _timepoint(fit)]
    conc = pd.Series(np.nan, index=used.index)
    if "concentration" in used.columns:
        conc = pd.to_numeric(used["concentration"], errors="coerce").astype(float)
    vehicle = (_column(used, "role").str.lower() == "vehicle") | (conc == 0)
    treated = used[~vehicle & (_column(used, "compound") == str(fit["compound"])) & (conc > 0)]
    controls = used[vehicle]
    if "plate" in used.columns and len(treated):
        controls = controls[_column(controls, "plate").isin(set(_column(treated, "plate")))]
    return treated, controls


def _timepoint(fit: pd.Series) -> str:
    """The fit's timepoint as text (blank when the fits are not by timepoint)."""
    return _text(fit.get("timepoint"))


def _panel_name(fit: pd.Series) -> str:
    tp = _timepoint(fit)
    return f"{fit['compound']} · {tp}" if tp else str(fit["compound"])


def _curve_span(tested: np.ndarray, fit: pd.Series) -> np.ndarray:
    lo, hi = tested.min() / _MARGIN, tested.max() * _MARGIN
    for name in ("ec50_low", "ec50_high"):
        bound = _value(fit, name)
        if np.isfinite(bound):
            lo, hi = min(lo, bound / 1.5), max(hi, bound * 1.5)
    return np.array([lo, hi])


def _ids(rows: pd.DataFrame, part: pd.DataFrame) -> pd.DataFrame:
    for name in ("well_id", "plate", "well"):
        part[name] = _column(rows, name).to_numpy()
    return part


def _panel_rows(wells: pd.DataFrame, fit: pd.Series, metric: str) -> list[pd.DataFrame]:
    treated, controls = _panel_wells(wells, fit, metric)
    unit, y_unit = _text(fit.get("unit")), metric_unit(metric)
    panel = _panel_name(fit)

    def rows(series, x, y, item=None):
        return plotted_rows(panel, series, x=x, y=y, item=item, x_unit=unit, y_unit=y_unit)

    conc = pd.to_numeric(treated["concentration"], errors="coerce").to_numpy(float)
    parts = [
        _ids(treated, rows("well", conc, treated[metric].to_numpy(float), treated.index)),
        _ids(controls, rows("vehicle", np.zeros(len(controls)),
                            controls[metric].to_numpy(float), controls.index)),
    ]  # fmt: skip
    if fit["fit"] == "ok" and conc.size:
        params = {k: _value(fit, k) for k in ("bottom", "top", "ec50", "hill")}
        lo, hi = np.log10(_curve_span(np.unique(conc), fit))
        grid = np.logspace(lo, hi, _CURVE_POINTS)
        parts.append(rows("curve", grid, logistic4(grid, **params)))
        parts.append(rows("fit_at_vehicle", [_VEHICLE_X], [params["bottom"]]))
        middle = float(logistic4(params["ec50"], **params))
        parts.append(rows("ec50", [params["ec50"]], [middle]))
        bounds = [_value(fit, "ec50_low"), _value(fit, "ec50_high")]
        shown = [b for b in bounds if np.isfinite(b)]
        parts.append(rows("ec50_ci", shown, [middle] * len(shown)))
    for part in parts:
        part["compound"], part["fit"] = str(fit["compound"]), str(fit["fit"])
    return parts


def tabulate_dose_response(wells: pd.DataFrame, fits: pd.DataFrame, *, metric: str):
    """What :func:`plot_dose_response` draws, one row per point (the plotted-data table).

    Parameters
    ----------
    wells : pandas.DataFrame
        ``wells.csv`` of the batch.
    fits : pandas.DataFrame
        ``dose_response.csv`` of the batch.
    metric : str
        A value of the ``metric`` column of `fits`, e.g. ``"beat_rate_bpm_norm"``.

    Returns
    -------
    pandas.DataFrame
        The columns of :data:`beatlab.plots.style.PLOTTED_COLUMNS` (``panel`` the compound,
        with `` · <timepoint>`` when the fits are by timepoint; ``x`` the concentration in the
        fit's unit; ``y`` the response) for the series ``well`` (ok wells of the compound with
        a value), ``vehicle`` (the vehicle wells on the compound's plates, at x = 0), and,
        when the fit is ``ok``: ``curve`` (200 points of :func:`beatlab.stats.logistic4` of
        the fit), ``fit_at_vehicle`` (the curve at 0: ``bottom``), ``ec50`` (EC50 at the
        curve's midpoint) and ``ec50_ci`` (the bounds that exist); then ``well_id``,
        ``plate``, ``well``, ``compound`` and ``fit``. Compounds whose fit is
        ``too few concentrations`` have no panel and no rows.

    Raises
    ------
    InputError
        If `fits` has no row of `metric`, or `metric` is not a column of `wells`.
    """
    parts = []
    for _, fit in _shown(_fit_rows(fits, metric)).iterrows():
        parts += _panel_rows(wells, fit, metric)
    if not parts:
        empty = plotted_rows("", "well", x=[], x_unit="", y_unit=metric_unit(metric))
        return empty.assign(well_id=[], plate=[], well=[], compound=[], fit=[])
    return pd.concat(parts, ignore_index=True)


def _shown(rows: pd.DataFrame) -> pd.DataFrame:
    """Fits that get a panel: not those of compounds tested at too few concentrations."""
    return rows[rows["fit"].astype(str) != LEFT_OUT]


def _layout(fig, n: int):
    """One (subfigure, vehicle axis, log axis) per panel, in a grid of up to 3 columns."""
    ncols = min(n, 3)
    nrows = math.ceil(n / ncols)
    panels = []
    for k, sub in enumerate(fig.subfigures(nrows, ncols, squeeze=False).ravel()):
        if k >= n:
            sub.set_visible(False)
            continue
        left, right = sub.subplots(1, 2, sharey=True, gridspec_kw={"width_ratios": [1, 4.5]})
        panels.append((sub, left, right))
    return panels


def _break_marks(left, right) -> None:
    """Two short slashes where the vehicle axis ends and the log axis begins."""
    kw = {"color": "black", "lw": 0.8, "clip_on": False}
    size = 0.025
    left.plot([1 - size * 4, 1 + size * 4], [-size, size], transform=left.transAxes, **kw)
    right.plot([-size, size], [-size, size], transform=right.transAxes, **kw)


def _concentration_ticks(ax, tested: np.ndarray) -> None:
    """Ticks at the tested concentrations (at most 8), else per decade; plain numbers."""
    from matplotlib.ticker import FuncFormatter, NullLocator

    if 0 < tested.size <= _MAX_TICKS:
        ax.set_xticks(tested)
        ax.xaxis.set_minor_locator(NullLocator())
    ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:g}"))


def _ec50_text(fit: pd.Series, unit: str) -> str:
    ec50, low, high = (_value(fit, k) for k in ("ec50", "ec50_low", "ec50_high"))
    lo = f"{low:.3g}" if np.isfinite(low) else "open"
    hi = f"{high:.3g}" if np.isfinite(high) else "open"
    hill, r2, n = _value(fit, "hill"), _value(fit, "r2"), _value(fit, "n")
    return (
        f"EC50 {ec50:.3g} {unit} (95 % CI {lo}–{hi})\n"
        f"Hill {hill:.3g}, R² {r2:.2f}, n = {n:.0f} wells"
    )


def _draw_panel(sub, left, right, part, fit: pd.Series, *, colour: str) -> None:
    unit = concentration_unit(str(part["x_unit"].iloc[0])) if len(part) else ""
    series = {name: group for name, group in part.groupby("series")}
    vehicle = series.get("vehicle")
    if vehicle is not None and len(vehicle):
        x = _jitter(vehicle["y"].to_numpy(), width=0.9)
        left.scatter(x, vehicle["y"], s=16, color=GREY, edgecolor="white", lw=0.4, zorder=4,
                     gid="vehicle")  # fmt: skip
    wells = series.get("well")
    if wells is not None and len(wells):
        right.scatter(wells["x"], wells["y"], s=16, color=colour, edgecolor="white", lw=0.4,
                      zorder=4, gid="wells", label="wells")  # fmt: skip
    if "curve" in series:
        right.plot(series["curve"]["x"], series["curve"]["y"], color="black", lw=1.2,
                   zorder=3, gid="curve", label="4PL fit")  # fmt: skip
        at0 = float(series["fit_at_vehicle"]["y"].iloc[0])
        left.plot([-0.7, 0.7], [at0, at0], color="black", lw=1.2, ls=":", gid="fit_at_vehicle",
                  label="fit at 0")  # fmt: skip
        ec50 = series["ec50"]
        right.plot(ec50["x"], ec50["y"], "D", ms=5, color=PALETTE["vermillion"], zorder=6,
                   gid="ec50", label="EC50")  # fmt: skip
        ci = series.get("ec50_ci")
        if ci is not None and len(ci) == 2:
            right.plot(ci["x"], ci["y"], "-|", color=PALETTE["vermillion"], lw=1.6, ms=7,
                       zorder=5, gid="ec50_ci", label="95 % CI of EC50")  # fmt: skip
        note = _ec50_text(fit, unit)
    else:
        note = textwrap.fill(FIT_NOTES.get(str(fit["fit"]), f"fit: {fit['fit']}"), 46)
    title = part["panel"].iloc[0] if len(part) else str(fit["compound"])
    sub.suptitle(f"{title}\n{note}", x=0.02, ha="left", fontsize=8)
    right.set_xscale("log")
    tested = wells["x"].to_numpy() if wells is not None and len(wells) else np.array([1.0])
    span = [tested.min() / _MARGIN, tested.max() * _MARGIN]
    if "curve" in series:
        span = [series["curve"]["x"].min(), series["curve"]["x"].max()]
    right.set_xlim(*span)
    _concentration_ticks(right, np.unique(tested))
    right.set_xlabel(f"concentration ({unit})" if unit else "concentration")
    left.set_xlim(-1, 1)
    left.set_xticks([_VEHICLE_X], ["vehicle"])
    right.spines["left"].set_visible(False)
    right.tick_params(axis="y", which="both", left=False, labelleft=False)
    _break_marks(left, right)


def plot_dose_response(wells: pd.DataFrame, fits: pd.DataFrame, *, metric: str, fig=None):
    """Concentration-response of each compound: wells, fitted curve, EC50 with its 95 % CI.

    Parameters
    ----------
    wells : pandas.DataFrame
        ``wells.csv`` of the batch.
    fits : pandas.DataFrame
        ``dose_response.csv`` of the batch.
    metric : str
        A value of its ``metric`` column, e.g. ``"beat_rate_bpm_norm"``.
    fig : matplotlib Figure, optional
        Where to draw (an empty figure); a new one otherwise.

    Returns
    -------
    matplotlib.figure.Figure

    Raises
    ------
    InputError
        If `fits` has no row of `metric`, or `metric` is not a column of `wells`.

    Notes
    -----
    One panel per fit row (compound, and timepoint when the fits are by timepoint), except
    compounds tested at fewer than 4 concentrations (fit ``too few concentrations``): a
    curve was never attempted, their wells are in the group figure, and a note under the
    panels names them. The
    concentration axis is logarithmic in the compound's unit (the ``unit`` of the fit); the
    vehicle wells, at concentration 0, are drawn on their own axis to the left of the break,
    with the curve's value at 0 (its ``bottom``) as a dotted line. The curve,
    ``bottom + (top - bottom) / (1 + (ec50 / x)^hill)`` (:func:`beatlab.stats.logistic4`),
    is drawn only when ``fit`` is ``ok``; the EC50 is marked at the curve's midpoint with its
    95 % profile-likelihood interval as a horizontal bar (a bound that does not close is
    written "open"). Otherwise the panel says why there is no curve (:data:`FIT_NOTES`).
    All panels share one y range.
    """
    import matplotlib.pyplot as plt

    every = _fit_rows(fits, metric)
    rows = _shown(every)
    table = tabulate_dose_response(wells, fits, metric=metric)
    n = max(len(rows), 1)
    if fig is None:
        fig = plt.figure(figsize=(3.4 * min(n, 3), 3.0 * math.ceil(n / 3)), layout="constrained")
    left_out = [_panel_name(fit) for _, fit in every.iterrows() if fit["fit"] == LEFT_OUT]
    if left_out:
        fig.text(0.0, 0.0, f"not shown (fewer than 4 concentrations): {', '.join(left_out)}",
                 ha="left", va="top", fontsize=7, color=GREY)  # fmt: skip
    if rows.empty:
        message_panel(fig.add_subplot(), "no compound with 4 concentrations or more")
        return fig
    panels = _layout(fig, len(rows))
    for (sub, left, right), (_, fit) in zip(panels, rows.iterrows(), strict=True):
        part = table[table["panel"] == _panel_name(fit)]
        _draw_panel(sub, left, right, part, fit, colour=PALETTE["blue"])
    y = table["y"].to_numpy(dtype=float)
    y = y[np.isfinite(y)]
    normalised = bool(_base(metric)[1])
    if normalised:
        y = np.append(y, 0.0)
    if y.size:
        span = float(np.ptp(y))
        # identical values (every well at 0, say): a readable range, not one of 1e-11
        pad = 0.06 * span if span > 1e-6 * max(1.0, float(np.abs(y).max())) else 0.1
        for _, left, _ in panels:
            left.set_ylim(y.min() - pad, y.max() + pad)
    label = metric_label(metric, normalization=_normalization(wells, metric))
    for k, (_, left, right) in enumerate(panels):
        if normalised:
            for ax in (left, right):
                ax.axhline(0.0, color=GREY, lw=0.8, ls="--", zorder=0)
        if k % 3 == 0:
            left.set_ylabel(textwrap.fill(label, _LABEL_WIDTH))
        handles, names = right.get_legend_handles_labels()
        extra = left.get_legend_handles_labels()
        if k == 0 and "4PL fit" in names:
            right.legend(handles + extra[0], names + extra[1], loc="best", fontsize=7,
                         handlelength=1.4)  # fmt: skip
    return fig
